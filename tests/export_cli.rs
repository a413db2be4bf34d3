//! `framewarden export` on the real binary: every table of a small database,
//! in CSV and Parquet, read back by pandas, pyarrow and DuckDB, and the CSV
//! files by base R's `read.csv`, and compared row for row with what Python's
//! sqlite3 module reads from the same file (`tests/reference/check_export.py`,
//! `read_export.R`, `check_export_r.py`); standard output; and the bad cases
//! (missing database, unknown run, Parquet without a file, an empty database).

// Shared by the test binaries; each uses only part of it.
#[allow(dead_code)]
mod common;

use std::path::Path;
use std::process::{Command, Output};

const BIN: &str = env!("CARGO_BIN_EXE_framewarden");

/// Two runs; the second has frames done, recounted, failed and queued, file
/// names with and without position parts, text that needs quoting, flags and
/// alerts with and without a frame.
fn small_database(db: &Path) {
    framewarden::store::open_for_writing(db)
        .unwrap()
        .execute_batch(
            r#"
INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings, ended_at_ms)
    VALUES ('["/acq/monday"]', 1764669845250, 1764669845250, '', 1764670000000),
           ('["/acq/tuesday"]', 1764756245000, 1764756245000, '', NULL);
INSERT INTO frames (id, run_id, file, size_bytes, mtime_ns, version, status, error, attempts,
        detected_at_ms, ready_at_ms, analyzed_at_ms, latency_ms, well, site, time_point, channel,
        width, height, bit_depth, method, threshold, separability, object_count,
        foreground_fraction, background_level, saturation_fraction, focus, illumination_change,
        pixel_size_um, pixel_size_source, recount_threshold, recount_object_count, count_source,
        bimodality, interruptions, size_filtered, merged_fraction)
VALUES
 (1, 1, '/acq/monday/A01_t1.tif', 10, 1, 1, 'done', NULL, 1, 1764669845250, 1764669845999,
  1764669846001, 2, 'A01', NULL, '1', NULL, 64, 48, 16, 'otsu', 301.5, 0.8125, 2,
  0.1, 101.25, 0.0, 12.5, 0.01, NULL, 'none', NULL, NULL, NULL, 0.7, 0, 0, 0.0),
 (2, 2, '/acq/tuesday/A01_s2_t0003_dapi.tif', 10, 1, 1, 'done', NULL, 1, 1764756245000,
  1764756245500, 1764756245777, 277, 'A01', '2', '0003', 'dapi', 64, 48, 16, 'otsu',
  1234.0000000001, 0.93, 2, 0.123456789012345, 98.7, 1e-7, 0.333333333333333, 0.02,
  0.65, 'ome-xml', NULL, NULL, NULL, 0.71, 0, 1, 0.5),
 (3, 2, '/acq/tuesday/B12_s1_t10_gfp.tif', 10, 1, 1, 'done', NULL, 1, 1764756246000,
  1764756246100, 1764756246900, 800, 'B12', '1', '10', 'gfp', 64, 48, 8, 'otsu', 40.0,
  0.41, 3, 0.2, 30.5, 0.0, 2.25, 0.35, NULL, 'none', 35.0, 1, 'recount', 0.4, 0, 0, NULL),
 (4, 2, '/acq/tuesday/weird, "quoted"
name.tif', 10, 1, 1, 'failed', 'truncated: 12 of 96 rows, "short" read', 3, 1764756247000,
  1764756247000, 1764756248000, 1000, NULL, NULL, 't7', NULL, NULL, NULL, NULL, NULL, NULL,
  NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, 1, NULL, NULL),
 (5, 2, '/acq/tuesday/A01_s2_t0004_dapi.tif', 10, 1, 2, 'queued', NULL, 0, 1764756249000,
  1764756249000, NULL, NULL, 'A01', '2', '0004', 'dapi', NULL, NULL, NULL, NULL, NULL, NULL,
  NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, NULL, 0, NULL, NULL);
INSERT INTO objects (frame_id, result, label, area_px, area_um2, centroid_x, centroid_y,
        bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
        max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px, eccentricity,
        solidity, channels)
VALUES
 (1, 'raw', 1, 20, NULL, 3.5, 4.25, 1, 2, 6, 7, 500.5, 10010.0, 900, 16.0, 0.98, 5.1, 5.0, 0.2, 1.0, NULL),
 (1, 'raw', 2, 21, NULL, 13.5, 4.25, 11, 2, 16, 7, 510.5, 10720.5, 901, 16.5, 0.97, 5.2, 5.0, 0.27, 1.0, NULL),
 (2, 'raw', 1, 30, 12.675, 10.1, 20.2, 7, 17, 14, 24, 1500.125, 45003.75, 2100, 19.3137084989848, 1.0117, 6.3, 6.1, 0.25, 0.96, '[1500.125,88.5]'),
 (2, 'raw', 2, 31, 13.0975, 30.9, 40.1, 27, 37, 34, 44, 1499.0, 46469.0, 2000, 20.0, 0.97, 6.4, 6.2, 0.248, 0.95, '[1499.0,87.25]'),
 (3, 'raw', 1, 400, NULL, 32.0, 24.0, 10, 10, 54, 38, 60.0, 24000.0, 80, 120.0, 0.35, 40.0, 14.0, 0.94, 0.6, NULL),
 (3, 'raw', 2, 25, NULL, 5.0, 5.0, 2, 2, 8, 8, 41.0, 1025.0, 45, 18.0, 0.97, 5.7, 5.5, 0.26, 1.0, NULL),
 (3, 'raw', 3, 22, NULL, 60.0, 40.0, 57, 37, 63, 43, 42.0, 924.0, 44, 17.0, 0.96, 5.4, 5.2, 0.27, 1.0, NULL),
 (3, 'recount', 1, 380, NULL, 32.5, 24.5, 11, 11, 53, 37, 61.0, 23180.0, 80, 118.0, 0.34, 39.0, 13.5, 0.94, 0.61, NULL);
INSERT INTO flags (frame_id, flag, value, limit_value, message)
VALUES (3, 'low_separability', 0.41, 0.5, 'separability 0.41 is below 0.5; the threshold is doubtful'),
       (3, 'uneven_illumination', 0.35, 0.25, 'illumination changes by 35 %, above 25 %'),
       (2, 'low_separability', 0.93, 0.95, 'a message, with a comma');
INSERT INTO alerts (run_id, opened_at_ms, condition, message, frame_id, delivered_at_ms,
        closed_at_ms, closed_message, file)
VALUES (2, 1764756246950, 'drift:background_level', 'background drifting down at B12 site 1', 3,
        1764756247001, 1764756249500, 'back within limits for 3 frames', NULL),
       (2, 1764756250000, 'stalled', 'no frame for 30 min', NULL, NULL, NULL, NULL, NULL),
       (1, 1764669846500, 'run_complete', 'run 1 ended', NULL, NULL, NULL, NULL, NULL);
"#,
        )
        .unwrap();
}

fn export(args: &[&str]) -> Output {
    Command::new(BIN).arg("export").args(args).output().unwrap()
}

fn ok(out: &Output) {
    assert!(
        out.status.success(),
        "{}\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
}

/// Exports every table of the last run of `db` into `dir` as
/// `<table>.<format>` for each of `formats`, and the first run's frames as
/// `frames_run1.csv`.
fn export_all(dir: &Path, db: &Path, formats: &[&str]) {
    let db_arg = db.to_str().unwrap();
    for table in ["frames", "objects", "alerts", "flags"] {
        for format in formats {
            let file = dir.join(format!("{table}.{format}"));
            let out = export(&[
                "--db",
                db_arg,
                "--table",
                table,
                "--format",
                format,
                "-o",
                file.to_str().unwrap(),
            ]);
            ok(&out);
            assert!(
                String::from_utf8_lossy(&out.stderr).contains("of run 2 written"),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
            assert!(!dir.join(format!("{table}.{format}.partial")).exists());
        }
    }
    let run1 = dir.join("frames_run1.csv");
    ok(&export(&[
        "--db",
        db_arg,
        "--run",
        "1",
        "--table",
        "frames",
        "-o",
        run1.to_str().unwrap(),
    ]));
}

#[test]
fn every_table_reads_back_in_pandas_and_pyarrow_equal_to_the_database() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("fw.db");
    small_database(&db);
    export_all(dir.path(), &db, &["csv", "parquet"]);
    // pandas, pyarrow and DuckDB against Python's sqlite3 (fails on any mismatch).
    common::run_reference_script("check_export.py", dir.path());

    // Without -o, CSV goes to standard output, the same bytes as the file.
    let out = export(&["--db", db.to_str().unwrap(), "--table", "objects"]);
    ok(&out);
    assert_eq!(
        out.stdout,
        std::fs::read(dir.path().join("objects.csv")).unwrap()
    );
}

#[test]
fn every_csv_table_reads_back_in_base_r_equal_to_the_database() {
    // Base R (Debian's r-base-core; no R packages needed) is installed by
    // .ci/run, which sets FRAMEWARDEN_REQUIRE_R=1 so that a missing Rscript
    // fails there; a bare machine skips with the reason.
    let rscript = Command::new("Rscript").arg("--version").output();
    if !rscript.is_ok_and(|o| o.status.success()) {
        let required = std::env::var("FRAMEWARDEN_REQUIRE_R").is_ok_and(|v| v == "1");
        assert!(
            !required,
            "FRAMEWARDEN_REQUIRE_R=1 but Rscript does not run: apt-get install r-base-core"
        );
        eprintln!(
            "SKIPPED the R check: Rscript does not run (apt-get install r-base-core; \
             FRAMEWARDEN_REQUIRE_R=1 makes this a failure)"
        );
        return;
    }
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("fw.db");
    small_database(&db);
    export_all(dir.path(), &db, &["csv"]);
    // R's read.csv writes what it read in a canonical form
    // (tests/reference/read_export.R), compared with Python's sqlite3.
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/read_export.R");
    let out = Command::new("Rscript")
        .arg(&script)
        .arg(dir.path())
        .output()
        .unwrap();
    ok(&out);
    common::run_reference_script("check_export_r.py", dir.path());
}

#[test]
fn bad_input_gives_a_clear_error_naming_the_file() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("fw.db");
    let db_arg = db.to_str().unwrap();
    let stderr = |out: &Output| String::from_utf8_lossy(&out.stderr).into_owned();

    let out = export(&["--db", db_arg, "--table", "frames"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        stderr(&out).contains(&format!("no database at {db_arg}")),
        "{}",
        stderr(&out)
    );

    framewarden::store::open_for_writing(&db).unwrap();
    let out = export(&["--db", db_arg, "--table", "frames"]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        stderr(&out).contains(&format!("{db_arg} has no run recorded yet")),
        "{}",
        stderr(&out)
    );

    small_database(&db);
    let target = dir.path().join("out.csv");
    let out = export(&[
        "--db",
        db_arg,
        "--run",
        "7",
        "--table",
        "frames",
        "-o",
        target.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        stderr(&out).contains(&format!("{db_arg} has no run 7")),
        "{}",
        stderr(&out)
    );
    assert!(!target.exists(), "nothing is written for a missing run");

    let out = export(&["--db", db_arg, "--table", "frames", "--format", "parquet"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(stderr(&out).contains("pass -o FILE"), "{}", stderr(&out));

    // An unknown name: the option, the name and the choices.
    for (args, choices) in [
        (
            ["--table", "cells", "--format", "csv"],
            "invalid value 'cells' for '--table <TABLE>'\n  [possible values: frames, objects, alerts, flags]",
        ),
        (
            ["--table", "frames", "--format", "xlsx"],
            "invalid value 'xlsx' for '--format <FORMAT>'\n  [possible values: csv, parquet]",
        ),
    ] {
        let mut all = vec!["--db", db_arg];
        all.extend(args);
        let out = export(&all);
        assert_eq!(out.status.code(), Some(2));
        assert!(stderr(&out).contains(choices), "{}", stderr(&out));
    }

    let unwritable = dir.path().join("no-such-folder").join("frames.csv");
    let out = export(&[
        "--db",
        db_arg,
        "--table",
        "frames",
        "-o",
        unwritable.to_str().unwrap(),
    ]);
    assert_eq!(out.status.code(), Some(1));
    assert!(
        stderr(&out).contains(&format!("cannot write {}", unwritable.display())),
        "{}",
        stderr(&out)
    );
}
