//! Speed of the watch service against `analyze` on the same frames: a writer
//! drives the real `framewarden watch` process and the bench reports sustained
//! frames/s, latency from "file complete" to "row committed" (median, 99th
//! percentile), the service's peak memory, and the throughput ratio
//! service / `analyze` with the same number of workers; then `reprocess` of
//! the recorded run and its ratio to `analyze`. Reported, never asserted.
//!
//! Frames are drawn once by `framewarden::synth` and placed into the watched
//! folder as hard links (each a new name, complete at once, no copy), so the
//! writer costs next to nothing and both sides read the same bytes from the
//! page cache. See `benches/README.md` for flags.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

use framewarden::synth::{self, SceneSpec};
use rusqlite::{Connection, OpenFlags};

const BIN: &str = env!("CARGO_BIN_EXE_framewarden");

struct Options {
    frames: usize,
    size: usize,
    workers: usize,
    settle_ms: u64,
    baseline_frames: usize,
}

fn options() -> Options {
    let mut o = Options {
        frames: 1000,
        size: 2048,
        workers: std::thread::available_parallelism().map_or(1, |n| n.get()),
        settle_ms: 100,
        baseline_frames: 400,
    };
    let args: Vec<String> = std::env::args().skip(1).collect();
    let mut i = 0;
    while i < args.len() {
        let value = args.get(i + 1).and_then(|v| v.parse::<usize>().ok());
        match (args[i].as_str(), value) {
            ("--frames", Some(v)) => o.frames = v,
            ("--size", Some(v)) => o.size = v,
            ("--workers", Some(v)) => o.workers = v.max(1),
            ("--settle-ms", Some(v)) => o.settle_ms = v as u64,
            ("--baseline-frames", Some(v)) => o.baseline_frames = v.max(1),
            // cargo bench passes --bench; anything else unknown is ignored too.
            _ => {
                i += 1;
                continue;
            }
        }
        i += 2;
    }
    o
}

fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| d.as_millis() as i64)
}

/// A few distinct frames, written once as TIFFs.
fn stage_frames(dir: &Path, size: usize) -> Vec<PathBuf> {
    (0..4u64)
        .map(|seed| {
            let scale = size as f64 / 2048.0;
            let spec = SceneSpec {
                width: size,
                height: size,
                bit_depth: 16,
                object_count: ((600.0 * scale * scale) as usize).max(1),
                radius_px: (6.0, 20.0),
                gradient: 0.1,
                seed: seed + 1,
                ..SceneSpec::default()
            };
            let scene = synth::generate(&spec).expect("bench scene fits");
            let path = dir.join(format!("source_{seed}.tif"));
            synth::write_tiff(&path, &scene.frame).expect("staging folder is writable");
            path
        })
        .collect()
}

fn link(sources: &[PathBuf], dest: &Path, i: usize) {
    std::fs::hard_link(&sources[i % sources.len()], dest)
        .expect("hard link in the same filesystem");
}

/// `analyze` on `n` frames with `workers` workers: frames/s.
fn analyze_rate(sources: &[PathBuf], dir: &Path, n: usize, workers: usize) -> f64 {
    let folder = dir.join("analyze-input");
    std::fs::create_dir_all(&folder).unwrap();
    for i in 0..n {
        link(sources, &folder.join(format!("f{i:05}.tif")), i);
    }
    let start = Instant::now();
    let status = Command::new(BIN)
        .args(["analyze", "--workers", &workers.to_string()])
        .arg(&folder)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .status()
        .expect("the framewarden binary runs");
    assert!(status.success(), "analyze failed");
    n as f64 / start.elapsed().as_secs_f64()
}

fn done_count(db: &Path) -> usize {
    let Ok(conn) = Connection::open_with_flags(db, OpenFlags::SQLITE_OPEN_READ_ONLY) else {
        return 0;
    };
    conn.query_row(
        "SELECT count(*) FROM frames WHERE status = 'done'",
        [],
        |r| r.get::<_, i64>(0),
    )
    .map_or(0, |n| n as usize)
}

fn peak_rss_mib(child: &Child) -> Option<f64> {
    let status = std::fs::read_to_string(format!("/proc/{}/status", child.id())).ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / 1024.0)
}

fn percentile(sorted: &[i64], p: f64) -> i64 {
    if sorted.is_empty() {
        return 0;
    }
    sorted[((sorted.len() - 1) as f64 * p).round() as usize]
}

fn main() {
    let o = options();
    let dir = tempfile::tempdir().expect("temp folder");
    let staging = dir.path().join("staging");
    let acq = dir.path().join("acq");
    std::fs::create_dir_all(&staging).unwrap();
    std::fs::create_dir_all(&acq).unwrap();
    println!(
        "watch bench: {} frames of {}x{} 16-bit, {} workers, settle {} ms",
        o.frames, o.size, o.size, o.workers, o.settle_ms
    );
    let sources = stage_frames(&staging, o.size);

    let baseline = analyze_rate(&sources, dir.path(), o.baseline_frames, o.workers);
    println!(
        "analyze: {baseline:.1} frames/s ({} frames)",
        o.baseline_frames
    );

    let db = dir.path().join("fw.db");
    let config = dir.path().join("bench.toml");
    std::fs::write(
        &config,
        format!(
            "[watch]\nfolders = [\"acq\"]\nsettle_ms = {}\nworkers = {}\n[store]\ndatabase = \"fw.db\"\n",
            o.settle_ms, o.workers
        ),
    )
    .unwrap();
    let mut child = Command::new(BIN)
        .args(["watch", "--config"])
        .arg(&config)
        .env("RUST_LOG", "warn")
        .stdout(Stdio::null())
        .stderr(Stdio::inherit())
        .spawn()
        .expect("the framewarden binary runs");
    while !db.exists() {
        std::thread::sleep(Duration::from_millis(20));
    }

    // Phase 1, throughput: keep the service saturated (a backlog of a few
    // queues' worth) and time the frames it finishes.
    let throughput_frames = o.frames.saturating_sub(o.frames / 5).max(1);
    let backlog = 4 * 64;
    let mut written = 0;
    let mut done = 0;
    let start = Instant::now();
    while done < throughput_frames {
        while written < throughput_frames && written < done + backlog {
            link(&sources, &acq.join(format!("t{written:06}.tif")), written);
            written += 1;
        }
        std::thread::sleep(Duration::from_millis(50));
        done = done_count(&db);
    }
    let service_rate = throughput_frames as f64 / start.elapsed().as_secs_f64();

    // Phase 2, latency: one frame at a time at about half the sustained rate,
    // so what is measured is the pipeline, not a queue.
    let latency_frames = o.frames - throughput_frames;
    let gap = Duration::from_secs_f64(2.0 / service_rate.max(0.1));
    let mut completed_at = Vec::with_capacity(latency_frames);
    for i in 0..latency_frames {
        let name = format!("l{i:06}.tif");
        link(&sources, &acq.join(&name), i);
        completed_at.push((name, now_ms()));
        std::thread::sleep(gap);
    }
    while done_count(&db) < o.frames {
        std::thread::sleep(Duration::from_millis(50));
    }
    let peak = peak_rss_mib(&child);
    let _ = Command::new("kill")
        .arg("-TERM")
        .arg(child.id().to_string())
        .status();
    let _ = child.wait();

    let conn = Connection::open_with_flags(&db, OpenFlags::SQLITE_OPEN_READ_ONLY).unwrap();
    let mut latencies: Vec<i64> = completed_at
        .iter()
        .filter_map(|(name, at)| {
            let path = acq.canonicalize().ok()?.join(name);
            conn.query_row(
                "SELECT analyzed_at_ms FROM frames WHERE file = ?1 AND status = 'done'",
                [path.to_string_lossy()],
                |r| r.get::<_, i64>(0),
            )
            .ok()
            .map(|analyzed| analyzed - at)
        })
        .collect();
    latencies.sort_unstable();

    println!("watch:   {service_rate:.1} frames/s sustained ({throughput_frames} frames)");
    println!(
        "ratio:   watch / analyze = {:.2} (target >= 0.80)",
        service_rate / baseline
    );
    println!(
        "latency: file complete -> row committed, {} frames: median {} ms, p99 {} ms \
         (settle {} ms; target median <= settle + 50 ms)",
        latencies.len(),
        percentile(&latencies, 0.5),
        percentile(&latencies, 0.99),
        o.settle_ms
    );
    match peak {
        Some(mib) => println!(
            "memory:  peak RSS of the service {mib:.0} MiB over {} frames (target < 150 MiB)",
            o.frames
        ),
        None => println!("memory:  peak RSS unavailable (no /proc)"),
    }
    drop(conn);

    // The recorded run analysed again, from the same files, as a new analysis.
    let start = Instant::now();
    let status = Command::new(BIN)
        .args(["reprocess", "--workers", &o.workers.to_string(), "--db"])
        .arg(&db)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .status()
        .expect("the framewarden binary runs");
    assert!(status.success(), "reprocess failed");
    let reprocess_rate = o.frames as f64 / start.elapsed().as_secs_f64();
    println!(
        "reprocess: {reprocess_rate:.1} frames/s ({} frames)",
        o.frames
    );
    println!(
        "ratio:   reprocess / analyze = {:.2} (target >= 0.90)",
        reprocess_rate / baseline
    );
}
