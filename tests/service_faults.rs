//! The service under faults: the real binary killed with SIGKILL at random
//! moments (fixed seed) while a writer drops a few hundred files in three ways
//! (whole, in chunks with pauses, under a temporary name then renamed). At the
//! end every file is exactly one row, done, with the count `framewarden
//! analyze` gives for it: nothing lost, nothing twice, no healthy frame failed.
//!
//! No time is asserted; the schedule only decides when the kills fall.

// Shared with the watch tests; not every helper is used here.
#[allow(dead_code)]
mod watch_support;

use std::collections::HashMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use framewarden::synth::SplitMix64;
use watch_support::{tiff_bytes, Bench, BIN};

/// Files the writer drops.
const FILES: usize = 300;
/// Of which written at once before the first kill: a backlog that keeps many
/// rows queued behind the workers at every kill.
const BURST: usize = 150;
/// Unclean stops (SIGKILL), each followed by a restart.
const KILLS: usize = 12;
/// Seeds of the kill schedule and of the writer.
const KILL_SEED: u64 = 0x6b69_6c6c;
const WRITER_SEED: u64 = 0x7772_6974;

/// How one file reaches the folder.
#[derive(Debug, Clone, Copy)]
enum Way {
    Whole,
    Chunked,
    Renamed,
}

/// A uniform pause in `[lo_ms, hi_ms)`.
fn pause(rng: &mut SplitMix64, lo_ms: u64, hi_ms: u64) -> Duration {
    Duration::from_millis(lo_ms + rng.next_u64() % (hi_ms - lo_ms))
}

/// Writes `bytes` as `name` in `acq` in the given way; `paced`: with pauses
/// between chunks, which stay well under the settle time (300 ms), so no file
/// is complete early by the rule.
fn drop_file(acq: &Path, name: &str, bytes: &[u8], way: Way, mut paced: Option<&mut SplitMix64>) {
    let path = acq.join(name);
    match way {
        Way::Whole => std::fs::write(&path, bytes).unwrap(),
        Way::Chunked | Way::Renamed => {
            let target = match way {
                Way::Renamed => acq.join(format!("{name}.part")),
                _ => path.clone(),
            };
            let mut file = std::fs::File::create(&target).unwrap();
            for chunk in bytes.chunks(bytes.len() / 4 + 1) {
                file.write_all(chunk).unwrap();
                file.flush().unwrap();
                if let Some(rng) = paced.as_deref_mut() {
                    std::thread::sleep(pause(rng, 5, 30));
                }
            }
            drop(file);
            if target != path {
                std::fs::rename(&target, &path).unwrap();
            }
        }
    }
}

/// The counts `framewarden analyze` gives for every file in `acq`, by file name.
fn analyze_counts(config: &Path, acq: &Path) -> HashMap<String, i64> {
    let out = Command::new(BIN)
        .args(["analyze", "--json", "--config"])
        .arg(config)
        .arg(acq)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "analyze failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout)
        .unwrap()
        .lines()
        .map(|line| {
            let v: serde_json::Value = serde_json::from_str(line).unwrap();
            let file = PathBuf::from(v["file"].as_str().unwrap());
            (
                file.file_name().unwrap().to_string_lossy().into_owned(),
                v["object_count"].as_i64().unwrap(),
            )
        })
        .collect()
}

#[test]
fn random_kill_nine_while_files_arrive_loses_none_doubles_none_and_fails_none() {
    // One worker on frames that take a rolling-ball background each (a few
    // tens of ms): the backlog outlasts several kills, so at every kill many
    // rows wait in the queue besides the one in hand.
    let mut bench = Bench::new("workers = 1\nqueue_capacity = 64");
    let mut config = std::fs::OpenOptions::new()
        .append(true)
        .open(&bench.config)
        .unwrap();
    writeln!(
        config,
        "[segment]\nbackground = \"rolling-ball\"\nrolling_ball_radius_px = 50.0"
    )
    .unwrap();
    drop(config);
    // Six different scenes, so a row that took another file's result shows.
    let scenes: Vec<Vec<u8>> = (0..6)
        .map(|s| tiff_bytes(100 + s, 384, 30 + 8 * s as usize).0)
        .collect();
    bench.start();

    let acq = bench.acq.clone();
    let writer = std::thread::spawn(move || {
        let mut rng = SplitMix64::new(WRITER_SEED);
        let ways = [Way::Whole, Way::Chunked, Way::Renamed];
        for i in 0..FILES {
            let name = format!("F07_t{i:04}.tif");
            let bytes = &scenes[i % scenes.len()];
            // The burst goes in as fast as it can be written, chunks and
            // renames included; the rest at a microscope's pace.
            let paced = i >= BURST;
            drop_file(
                &acq,
                &name,
                bytes,
                ways[i % ways.len()],
                paced.then_some(&mut rng),
            );
            if paced {
                std::thread::sleep(pause(&mut rng, 10, 40));
            }
        }
    });

    let mut rng = SplitMix64::new(KILL_SEED);
    for _ in 0..KILLS {
        std::thread::sleep(pause(&mut rng, 250, 1000));
        bench.kill_hard();
        bench.start();
    }
    writer.join().expect("the writer finishes");

    let rows = bench.wait_finished(FILES, Duration::from_secs(120));
    let failed: Vec<_> = rows.iter().filter(|r| r.status != "done").collect();
    assert!(
        failed.is_empty(),
        "{} healthy frames not done after {KILLS} kills, e.g. {:?}",
        failed.len(),
        failed.first()
    );
    let mut per_file: HashMap<&str, usize> = HashMap::new();
    for r in &rows {
        *per_file.entry(r.path.as_str()).or_default() += 1;
    }
    assert_eq!(per_file.len(), FILES, "every file recorded");
    assert!(
        per_file.values().all(|&n| n == 1),
        "a file recorded twice: {:?}",
        per_file.iter().filter(|(_, &n)| n > 1).collect::<Vec<_>>()
    );
    assert!(
        rows.iter().all(|r| r.path.ends_with(".tif")),
        "temporary names are never recorded"
    );

    let expected = analyze_counts(&bench.config, &bench.acq);
    assert_eq!(expected.len(), FILES);
    for r in &rows {
        let name = Path::new(&r.path).file_name().unwrap().to_string_lossy();
        assert_eq!(
            r.object_count,
            Some(expected[name.as_ref()]),
            "{} differs from analyze",
            r.path
        );
    }
}
