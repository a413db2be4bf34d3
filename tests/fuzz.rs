//! A fuzz harness on stable Rust: an in-process mutation loop over a seed
//! corpus of valid files written by outside libraries (tifffile and Pillow,
//! through `tests/reference/make_format_cases.py` and `make_short_streams.py`),
//! with byte flips, special values, truncations, insertions, deletions and
//! splices between files, each case run through the whole per-file analysis
//! (`pipeline::analyze_file`: decode, segment, measure).
//!
//! A case fails when the decoder or the analysis panics (even a panic the
//! decoder's facade contains), when it runs past a hang bound, when it holds
//! more heap than the bound README.md states for one worker, or when an error
//! does not name the file. Each failing input is saved under
//! `target/fuzz-failures/` to be replayed.
//!
//! The suite runs a short fixed-seed run (`FUZZ_CASES`). Before a release, run a
//! long one, e.g.
//! `FRAMEWARDEN_FUZZ_CASES=200000 FRAMEWARDEN_FUZZ_SEED=$RANDOM cargo test --release --test fuzz -- --nocapture`.

mod common;
#[path = "common/counting_alloc.rs"]
mod counting_alloc;

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{mpsc, Arc, Mutex};
use std::time::Duration;

use counting_alloc::{peak_heap_during, CountingAlloc};
use framewarden::decode::DecodeLimits;
use framewarden::pipeline::{analyze_file, FileError, PipelineParams};

#[global_allocator]
static ALLOC: CountingAlloc = CountingAlloc;

/// Cases in the suite's run (a few seconds here).
const FUZZ_CASES: usize = 1500;
/// The suite's fixed seed.
const FUZZ_SEED: u64 = 20_261_202;
/// A case still running after this long is a hang (the largest frame the
/// limits below allow takes well under a second).
const HANG_BOUND: Duration = Duration::from_secs(30);
/// Pixel limit for the fuzzed files: small, so that a hostile header is
/// refused quickly and the memory bound is tight.
const MAX_PIXELS: u64 = 1 << 20;

/// Decoded-size limit for the fuzzed files: a 32-bit page of `MAX_PIXELS`.
const MAX_DECODED_BYTES: u64 = 4 * MAX_PIXELS;

/// README.md's bound for one worker: 48 bytes per pixel, plus `max_decoded_mib`
/// (what the `tiff` crate may allocate for a tag's values before reading them),
/// plus 48 MiB, of which 16 MiB are the decoders' own metadata budgets and the
/// rest the program's (not counted here: this measures the heap a case adds).
fn heap_bound() -> usize {
    (48 * MAX_PIXELS + MAX_DECODED_BYTES) as usize + (16 << 20)
}

/// SplitMix64 (Steele, Lea & Flood 2014): a small seeded generator, enough to
/// choose mutations reproducibly.
struct SplitMix(u64);

impl SplitMix {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// A number in `0..n` (`n > 0`).
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
}

/// One mutation of `bytes`, using `other` (another seed file) for splices.
fn mutate(rng: &mut SplitMix, bytes: &mut Vec<u8>, other: &[u8]) {
    if bytes.is_empty() {
        bytes.push(0);
    }
    let at = rng.below(bytes.len());
    match rng.below(7) {
        // Random bytes.
        0 => {
            for _ in 0..=rng.below(8) {
                let i = rng.below(bytes.len());
                bytes[i] = rng.next() as u8;
            }
        }
        // Values that sit at the edges of fields (counts, offsets, sizes).
        1 => {
            const SPECIAL: [u8; 6] = [0x00, 0x01, 0x7F, 0x80, 0xFE, 0xFF];
            let n = 1 + rng.below(4).min(bytes.len() - at - 1);
            for b in &mut bytes[at..at + n] {
                *b = SPECIAL[rng.below(SPECIAL.len())];
            }
        }
        // Truncation.
        2 => bytes.truncate(at),
        // Insertion of random bytes.
        3 => {
            let n = 1 + rng.below(64);
            let junk: Vec<u8> = (0..n).map(|_| rng.next() as u8).collect();
            bytes.splice(at..at, junk);
        }
        // Deletion.
        4 => {
            let n = 1 + rng.below(64).min(bytes.len() - at - 1);
            bytes.drain(at..at + n);
        }
        // Splice: a stretch of another file over this one.
        5 if !other.is_empty() => {
            let from = rng.below(other.len());
            let n = (1 + rng.below(256))
                .min(other.len() - from)
                .min(bytes.len() - at);
            bytes[at..at + n].copy_from_slice(&other[from..from + n]);
        }
        // A stretch of this file repeated elsewhere in it.
        _ => {
            let from = rng.below(bytes.len());
            let n = (1 + rng.below(256)).min(bytes.len() - from);
            let stretch = bytes[from..from + n].to_vec();
            let to = rng.below(bytes.len());
            let m = n.min(bytes.len() - to);
            bytes[to..to + m].copy_from_slice(&stretch[..m]);
        }
    }
}

fn env_or<T: std::str::FromStr>(key: &str, default: T) -> T {
    std::env::var(key)
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(default)
}

/// The seed corpus: every image file the reference scripts write.
fn seed_corpus(dir: &Path) -> Vec<(String, Vec<u8>)> {
    common::run_reference_script("make_format_cases.py", &dir.join("formats"));
    common::run_reference_script("make_short_streams.py", &dir.join("streams"));
    let mut seeds = Vec::new();
    for sub in ["formats", "streams"] {
        for entry in std::fs::read_dir(dir.join(sub)).unwrap() {
            let path = entry.unwrap().path();
            let ext = path.extension().and_then(|e| e.to_str()).unwrap_or("");
            if ext == "tif" || ext == "png" {
                let name = path.file_name().unwrap().to_string_lossy().to_string();
                seeds.push((name, std::fs::read(&path).unwrap()));
            }
        }
    }
    seeds.sort();
    seeds
}

#[test]
fn mutated_files_never_panic_hang_or_exceed_the_memory_bound() {
    let cases: usize = env_or("FRAMEWARDEN_FUZZ_CASES", FUZZ_CASES);
    let seed: u64 = env_or("FRAMEWARDEN_FUZZ_SEED", FUZZ_SEED);
    let dir = tempfile::tempdir().unwrap();
    let seeds = seed_corpus(dir.path());
    assert!(
        seeds.len() >= 12,
        "the seed corpus has {} files",
        seeds.len()
    );

    // Every panic is counted, also those the decoder's facade contains.
    let panics = Arc::new(Mutex::new(Vec::<String>::new()));
    let seen = Arc::clone(&panics);
    let previous = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        seen.lock().unwrap().push(info.to_string());
    }));

    let params = PipelineParams {
        limits: DecodeLimits {
            max_pixels: MAX_PIXELS,
            max_decoded_bytes: MAX_DECODED_BYTES,
            ..DecodeLimits::default()
        },
        ..PipelineParams::default()
    };
    let failures_dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target/fuzz-failures");
    let mut rng = SplitMix(seed);
    let mut failures = Vec::new();
    let (decoded, refused) = (AtomicUsize::new(0), AtomicUsize::new(0));
    for case in 0..cases {
        let (name, original) = &seeds[rng.below(seeds.len())];
        let other = &seeds[rng.below(seeds.len())].1;
        let mut bytes = original.clone();
        for _ in 0..=rng.below(4) {
            mutate(&mut rng, &mut bytes, other);
        }
        let ext = if name.ends_with(".png") { "png" } else { "tif" };
        let path = dir.path().join(format!("case.{ext}"));
        std::fs::write(&path, &bytes).unwrap();

        panics.lock().unwrap().clear();
        let (tx, rx) = mpsc::channel();
        let (p, worker_params) = (path.clone(), params.clone());
        std::thread::spawn(move || {
            let outcome =
                std::panic::catch_unwind(|| peak_heap_during(|| analyze_file(&p, &worker_params)));
            let _ = tx.send(outcome);
        });
        let problem = match rx.recv_timeout(HANG_BOUND) {
            Err(_) => Some(format!("still running after {} s", HANG_BOUND.as_secs())),
            Ok(Err(_)) => Some("the analysis panicked".to_string()),
            Ok(Ok((outcome, peak))) => {
                let caught = panics.lock().unwrap().clone();
                if let Some(first) = caught.first() {
                    Some(format!(
                        "a panic (contained by the decoder's facade): {first}"
                    ))
                } else if peak > heap_bound() {
                    Some(format!("held {peak} bytes of heap, bound {}", heap_bound()))
                } else {
                    match outcome {
                        Ok(_) => {
                            decoded.fetch_add(1, Ordering::Relaxed);
                            None
                        }
                        Err(e) => {
                            refused.fetch_add(1, Ordering::Relaxed);
                            let shown = e.to_string();
                            let named = match &e {
                                FileError::Decode(d) => d.to_string().contains("case."),
                                FileError::Analysis { .. } => true,
                            };
                            (!named).then(|| format!("error without the file's name: {shown}"))
                        }
                    }
                }
            }
        };
        if let Some(problem) = problem {
            std::fs::create_dir_all(&failures_dir).unwrap();
            let saved = failures_dir.join(format!("seed{seed}-case{case}-from-{name}"));
            std::fs::write(&saved, &bytes).unwrap();
            failures.push(format!(
                "case {case} (from {name}, saved as {}): {problem}",
                saved.display()
            ));
            if failures.len() >= 20 {
                break;
            }
        }
    }
    std::panic::set_hook(previous);
    eprintln!(
        "fuzz: {cases} cases from seed {seed}: {} analysed, {} refused with an error, {} failures",
        decoded.load(Ordering::Relaxed),
        refused.load(Ordering::Relaxed),
        failures.len()
    );
    common::check(failures, "fuzzing the decoder and the analysis");
}
