//! `framewarden status` shows times in the local zone with its UTC offset
//! (the zone the child process's `TZ` names, read through `jiff`), `--utc` in
//! UTC, and `--json` keeps RFC 3339 UTC text. The expected local times were
//! derived with Python's `zoneinfo` (IANA database): 1764669845250 ms is
//! 2025-12-02 10:04:05.250 UTC, 15:34:05 in Kolkata (+05:30, no daylight
//! saving), 05:04:05 in New York (-05:00 in December).

use std::path::Path;
use std::process::Command;

const BIN: &str = env!("CARGO_BIN_EXE_framewarden");

fn database(db: &Path) {
    framewarden::store::open_for_writing(db)
        .unwrap()
        .execute_batch(
            "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings, ended_at_ms)
                 VALUES ('[\"/acq/night\"]', 1764669845250, 1764669845250, '', 1764673445000);
             INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status,
                                 detected_at_ms, ready_at_ms, analyzed_at_ms, object_count)
                 VALUES (1, '/acq/night/a.tif', 10, 1, 1, 'done', 1764669845250,
                         1764669845250, 1764669900000, 7);
             INSERT INTO alerts (run_id, opened_at_ms, condition, message, closed_at_ms)
                 VALUES (1, 1764669901000, 'stalled', 'no frame for 30 min', 1764670801000);",
        )
        .unwrap();
}

fn status(db: &Path, tz: &str, extra: &[&str]) -> String {
    let out = Command::new(BIN)
        .args(["status", "--db"])
        .arg(db)
        .args(extra)
        .env("TZ", tz)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

#[test]
fn status_shows_local_times_with_their_offset_and_utc_on_request() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("fw.db");
    database(&db);

    let kolkata = status(&db, "Asia/Kolkata", &[]);
    for line in [
        "(started 2025-12-02 15:34:05 +05:30, ended 2025-12-02 16:34:05 +05:30)",
        "last frame: 2025-12-02 15:35:00 +05:30",
        "[closed 2025-12-02 15:50:01 +05:30] stalled since 2025-12-02 15:35:01 +05:30",
    ] {
        assert!(kolkata.contains(line), "{line:?} not in\n{kolkata}");
    }
    let new_york = status(&db, "America/New_York", &[]);
    assert!(
        new_york.contains("(started 2025-12-02 05:04:05 -05:00, ended 2025-12-02 06:04:05 -05:00)"),
        "{new_york}"
    );
    for tz in ["Asia/Kolkata", "America/New_York"] {
        let utc = status(&db, tz, &["--utc"]);
        assert!(
            utc.contains("(started 2025-12-02 10:04:05 +00:00, ended 2025-12-02 11:04:05 +00:00)"),
            "{utc}"
        );
        let json: serde_json::Value = serde_json::from_str(&status(&db, tz, &["--json"])).unwrap();
        assert_eq!(json["run"]["started_at"], "2025-12-02T10:04:05.250Z");
        assert_eq!(json["alerts"][0]["opened_at"], "2025-12-02T10:05:01.000Z");
    }
}
