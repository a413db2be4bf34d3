//! `framewarden export` at scale: a generated run of 5,000 frames and
//! 1 million, then 5 million, object rows (inserted with plain SQL, values
//! drawn with SQLite's `random()` so that files compress as real data would), exported by the real binary to CSV and to Parquet, each
//! under `/usr/bin/time -v` for its peak resident memory.
//!
//! Prints, per size and format: seconds, rows per second, output size and
//! peak RSS; then the ratios that matter: peak RSS at 5 M rows over peak RSS
//! at 1 M rows (bounded memory: about 1) and Parquet's time and size over
//! CSV's.
//!
//!     cargo bench --bench export            # sizes 1000000 and 5000000
//!     cargo bench --bench export -- 300000  # other sizes, in object rows

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

const BIN: &str = env!("CARGO_BIN_EXE_framewarden");
const FRAMES: i64 = 5_000;

/// A database with one run of [`FRAMES`] done frames (4 × 12 wells × 3 sites
/// × time points) and `objects` object rows spread evenly over them.
fn generate(db: &Path, objects: i64) {
    // A fresh folder: no WAL or shared-memory file of an earlier database.
    let dir = db
        .parent()
        .expect("the database is inside the bench folder");
    let _ = std::fs::remove_dir_all(dir);
    std::fs::create_dir_all(dir).unwrap();
    let conn = framewarden::store::open_for_writing(db).unwrap();
    let per_frame = objects / FRAMES;
    conn.execute_batch(&format!(
        "PRAGMA synchronous = OFF;
         BEGIN;
         INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings, ended_at_ms)
             VALUES ('[\"/acq/bench\"]', 1764669845000, 1764669845000, '', NULL);
         WITH RECURSIVE n(i) AS (SELECT 0 UNION ALL SELECT i + 1 FROM n WHERE i + 1 < {FRAMES})
         INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status, attempts,
                 detected_at_ms, ready_at_ms, analyzed_at_ms, latency_ms, well, site, time_point,
                 channel, width, height, bit_depth, method, threshold, separability, object_count,
                 foreground_fraction, background_level, saturation_fraction, focus,
                 illumination_change, pixel_size_source, bimodality, size_filtered, merged_fraction)
         SELECT 1, printf('/acq/bench/%s%02d_s%d_t%04d.tif', char(65 + i % 4), 1 + (i / 4) % 12,
                        1 + (i / 48) % 3, i / 144),
                1000 + i, i, 1, 'done', 1, 1764669845000 + i * 1000, 1764669845500 + i * 1000,
                1764669845900 + i * 1000, 400, printf('%s%02d', char(65 + i % 4), 1 + (i / 4) % 12),
                CAST(1 + (i / 48) % 3 AS TEXT), printf('%04d', i / 144), 'dapi', 1024, 1024, 16,
                'otsu', 300.0 + i % 97, 0.8 + (i % 13) / 100.0, {per_frame}, 0.12, 100.0 + i % 7,
                0.0, 2.5 + (i % 11) / 10.0, 0.02, 'none', 0.7, i % 5, 0.01
         FROM n;
         WITH RECURSIVE k(j) AS (SELECT 1 UNION ALL SELECT j + 1 FROM k WHERE j < {per_frame})
         INSERT INTO objects (frame_id, result, label, area_px, area_um2, centroid_x, centroid_y,
                 bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity,
                 integrated_intensity, max_intensity, perimeter_px, circularity, major_axis_px,
                 minor_axis_px, eccentricity, solidity, channels)
         SELECT f.id, 'raw', k.j, 20 + abs(random()) % 400, abs(random()) % 170001 / 1000.0,
                abs(random()) % 1024001 / 1000.0, abs(random()) % 1024001 / 1000.0,
                k.j % 1000, k.j * 7 % 1000, k.j % 1000 + 14, k.j * 7 % 1000 + 14,
                500.0 + abs(random()) % 3000001 / 1000.0, abs(random()) % 1000000001 / 1000.0,
                600.0 + abs(random()) % 60000, 20.0 + abs(random()) % 1000001 / 10000.0,
                0.5 + abs(random()) % 500001 / 1000000.0, 10.0 + abs(random()) % 200001 / 10000.0,
                8.0 + abs(random()) % 100001 / 10000.0, abs(random()) % 1000001 / 1000000.0,
                0.7 + abs(random()) % 300001 / 1000000.0, NULL
         FROM frames f, k;
         COMMIT;"
    ))
    .unwrap();
}

/// One export under `/usr/bin/time -v`: (seconds, peak RSS in MB, output MB).
fn measure(db: &Path, format: &str, out: &Path) -> (f64, f64, f64) {
    let started = Instant::now();
    let run = Command::new("/usr/bin/time")
        .arg("-v")
        .arg(BIN)
        .args(["export", "--table", "objects", "--db"])
        .arg(db)
        .args(["--format", format, "-o"])
        .arg(out)
        .output()
        .expect("/usr/bin/time (Debian package `time`)");
    let seconds = started.elapsed().as_secs_f64();
    let stderr = String::from_utf8_lossy(&run.stderr);
    assert!(run.status.success(), "{stderr}");
    let peak_kb: f64 = stderr
        .lines()
        .find_map(|l| {
            l.trim()
                .strip_prefix("Maximum resident set size (kbytes): ")
        })
        .and_then(|v| v.trim().parse().ok())
        .expect("peak RSS in /usr/bin/time's report");
    let size = std::fs::metadata(out).unwrap().len() as f64 / 1e6;
    (seconds, peak_kb / 1024.0, size)
}

fn main() {
    let sizes: Vec<i64> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let sizes = if sizes.is_empty() {
        vec![1_000_000, 5_000_000]
    } else {
        sizes
    };
    let dir: PathBuf = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench-export");
    let db = dir.join("bench.db");
    println!(
        "{:>10} {:>8} {:>8} {:>12} {:>10} {:>12}",
        "objects", "format", "s", "rows/s", "file MB", "peak RSS MB"
    );
    let mut results = Vec::new();
    for &objects in &sizes {
        let started = Instant::now();
        generate(&db, objects);
        let rows = objects / FRAMES * FRAMES;
        eprintln!(
            "generated {rows} object rows ({:.0} MB database) in {:.0} s",
            std::fs::metadata(&db).unwrap().len() as f64 / 1e6,
            started.elapsed().as_secs_f64()
        );
        for format in ["csv", "parquet"] {
            let out = dir.join(format!("objects.{format}"));
            let (s, rss, mb) = measure(&db, format, &out);
            println!(
                "{rows:>10} {format:>8} {s:>8.1} {:>12.0} {mb:>10.0} {rss:>12.0}",
                rows as f64 / s
            );
            results.push((rows, format, s, rss, mb));
            let _ = std::fs::remove_file(&out);
        }
    }
    let of = |rows: i64, format: &str| {
        results
            .iter()
            .find(|r| r.0 == rows && r.1 == format)
            .copied()
            .unwrap()
    };
    let (small, large) = (
        sizes[0] / FRAMES * FRAMES,
        sizes[sizes.len() - 1] / FRAMES * FRAMES,
    );
    for format in ["csv", "parquet"] {
        println!(
            "{format}: peak RSS at {large} rows / at {small} rows = {:.2}",
            of(large, format).3 / of(small, format).3
        );
    }
    println!(
        "parquet / csv at {large} rows: time {:.2}, size {:.2}",
        of(large, "parquet").2 / of(large, "csv").2,
        of(large, "parquet").4 / of(large, "csv").4
    );
    let _ = std::fs::remove_dir_all(&dir);
}
