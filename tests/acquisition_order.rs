//! Real acquisitions on the real binary: a night recorded live and the same
//! files watched after the fact give the same per-position summaries, flags
//! and alerts (acquisition order, not the order workers finish in); a
//! re-saved file is counted once, and a rewritten one supersedes the frame it
//! replaces; `status` reads a stopped database in a folder it cannot write.

// Shared with the watch tests; not every helper is used here.
#[allow(dead_code)]
mod watch_support;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use framewarden::synth::{self, SceneSpec};
use watch_support::{Bench, BIN};

const LONG: Duration = Duration::from_secs(180);

const PATTERN: &str = "name_pattern = '^(?P<well>[A-Z]\\d{2})_t(?P<time_point>\\d+)\\.tif$'\n";

fn scene(seed: u64, lamp: f64) -> SceneSpec {
    SceneSpec {
        width: 160,
        height: 160,
        object_count: 10 + (seed % 7) as usize,
        radius_px: (4.0, 7.0),
        lamp,
        seed,
        ..SceneSpec::default()
    }
}

/// Writes one synthetic frame into `folder` (whole, by rename from `staging`).
fn put(staging: &Path, folder: &Path, name: &str, spec: &SceneSpec) {
    let frame = synth::generate(spec).unwrap().frame;
    let staged = staging.join(format!("{name}.staged"));
    synth::write_tiff(&staged, &frame).unwrap();
    std::fs::rename(&staged, folder.join(name)).unwrap();
}

fn status_json(config: &Path) -> serde_json::Value {
    let out = Command::new(BIN)
        .args(["status", "--json", "--recent", "1000", "--config"])
        .arg(config)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

/// What must not depend on when the files were seen: the counts, the
/// per-position summaries, the flags of each file and the alerts, with times
/// left out and the folder's own path taken out of every text.
fn meaning(status: &serde_json::Value, folder: &Path) -> serde_json::Value {
    let folder = format!("{}/", folder.display());
    let strip = |v: &serde_json::Value| -> serde_json::Value {
        serde_json::from_str(&v.to_string().replace(&folder, "")).unwrap()
    };
    let mut alerts: Vec<serde_json::Value> = status["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| {
            // One alert per cause names every position it holds at. Which
            // position of a time point opened it (and which one its message
            // calls the newest) follows the order files of one time point were
            // written in, which acquisition order does not fix across
            // positions: compare the opening time point and the positions.
            let frame = strip(&a["frame"]).as_str().unwrap_or_default().to_string();
            let time_point = frame
                .split_once('_')
                .map_or(frame.clone(), |(_, t)| t.to_string());
            let mut positions: Vec<String> = a["positions"]
                .as_array()
                .map(|p| p.iter().map(|v| v.to_string()).collect())
                .unwrap_or_default();
            positions.sort();
            serde_json::json!({
                "condition": a["condition"],
                "open": a["closed_at"].is_null(),
                "opened_at_time_point": time_point,
                "positions": positions,
            })
        })
        .collect();
    alerts.sort_by_key(|a| a.to_string());
    let mut flagged: Vec<serde_json::Value> = status["flagged_frames"]
        .as_array()
        .unwrap()
        .iter()
        .map(strip)
        .collect();
    flagged.sort_by_key(|f| f["file"].to_string());
    serde_json::json!({
        "frames_seen": status["frames_seen"],
        "frames_done": status["frames_done"],
        "frames_failed": status["frames_failed"],
        "objects_total": status["objects_total"],
        "positions": status["positions"],
        "flag_counts": status["flag_counts"],
        "flagged_frames": flagged,
        "alerts": alerts,
    })
}

/// Three wells, twelve time points; the lamp fades from the sixth time point
/// on, so the baseline (the first four frames of each well) is bright only
/// when frames are taken in acquisition order.
#[test]
fn a_night_recorded_live_and_watched_after_the_fact_means_the_same() {
    let config = format!(
        "{PATTERN}[quality]\nbaseline_frames = 4\nrecover_frames = 3\n[alerts]\nfile = \"alerts.jsonl\"\n"
    );
    let wells = ["A01", "A02", "B01"];
    let time_points = 12;
    let mut live = Bench::new(&config);
    live.start();
    for t in 0..time_points {
        let lamp = if t < 6 {
            1.0
        } else {
            1.0 - 0.09 * (t - 5) as f64
        };
        for (w, well) in wells.iter().enumerate() {
            let spec = scene((t * 10 + w + 1) as u64, lamp);
            put(
                live.dir.path(),
                &live.acq,
                &format!("{well}_t{t:04}.tif"),
                &spec,
            );
            std::thread::sleep(Duration::from_millis(40));
        }
    }
    let n = wells.len() * time_points;
    live.wait_finished(n, LONG);
    let recorded_live = status_json(&live.config);

    // The same files, copied in after the night in scrambled order, with
    // their modification times kept (as `cp -p` or rsync do).
    let mut later = Bench::new(&config);
    let mut names: Vec<PathBuf> = std::fs::read_dir(&live.acq)
        .unwrap()
        .map(|e| e.unwrap().path())
        .collect();
    names.sort();
    names.reverse();
    for from in &names {
        let to = later.acq.join(from.file_name().unwrap());
        std::fs::copy(from, &to).unwrap();
        let mtime = std::fs::metadata(from).unwrap().modified().unwrap();
        std::fs::File::options()
            .write(true)
            .open(&to)
            .unwrap()
            .set_modified(mtime)
            .unwrap();
    }
    later.start();
    later.wait_finished(n, LONG);
    let recorded_later = status_json(&later.config);

    let live_meaning = meaning(&recorded_live, &live.acq);
    let later_meaning = meaning(&recorded_later, &later.acq);
    assert_eq!(live_meaning["frames_seen"], n, "{live_meaning:#}");
    assert_eq!(
        live_meaning["positions"].as_array().unwrap().len(),
        wells.len()
    );
    // First and last are the first and last time points, whatever order
    // the rows were written in.
    let rows = later.rows();
    let count_of = |name: &str| -> serde_json::Value {
        let row = rows.iter().find(|r| r.path.ends_with(name)).unwrap();
        row.object_count.into()
    };
    for p in live_meaning["positions"].as_array().unwrap() {
        let well = p["position"].as_str().unwrap();
        assert_eq!(
            p["first_count"],
            count_of(&format!("{well}_t0000.tif")),
            "{p}"
        );
        assert_eq!(
            p["last_count"],
            count_of(&format!("{well}_t0011.tif")),
            "{p}"
        );
    }
    assert!(
        !live_meaning["alerts"].as_array().unwrap().is_empty(),
        "the fading lamp raises an alert: {live_meaning:#}"
    );
    assert_eq!(
        live_meaning, later_meaning,
        "live:\n{live_meaning:#}\nafter the fact:\n{later_meaning:#}"
    );
}

/// One row of the frames table: how it is counted.
fn versions(db: &Path) -> Vec<(String, i64, Option<i64>, Option<i64>)> {
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    let mut stmt = conn
        .prepare(
            "SELECT file, version, same_pixels_as IS NOT NULL, superseded_by IS NOT NULL
             FROM frames ORDER BY id",
        )
        .unwrap();
    let rows = stmt
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    rows
}

/// `touch` on the first time point (a backup tool, a viewer that saves
/// again) makes a new version with the same pixels: recorded, not counted
/// again, and the last frame stays the last time point. A rewrite with other
/// pixels supersedes the earlier frame: one superseded row, counted once.
#[test]
fn a_resaved_file_counts_once_and_a_rewritten_one_supersedes() {
    let mut bench = Bench::new(PATTERN);
    bench.start();
    let spec = |t: u64| scene(t + 1, 1.0);
    for t in 0..4u64 {
        put(
            bench.dir.path(),
            &bench.acq,
            &format!("A01_t{t:04}.tif"),
            &spec(t),
        );
        bench.wait_finished(t as usize + 1, LONG);
    }
    let before = status_json(&bench.config);
    let position = |s: &serde_json::Value| s["positions"][0].clone();
    assert_eq!(before["frames_seen"], 4, "{before:#}");

    // A new modification time, the same bytes.
    std::thread::sleep(Duration::from_millis(20));
    let first = bench.acq.join("A01_t0000.tif");
    let now = std::time::SystemTime::now();
    std::fs::File::options()
        .write(true)
        .open(&first)
        .unwrap()
        .set_modified(now)
        .unwrap();
    bench.wait_finished(5, LONG);
    let touched = status_json(&bench.config);
    assert_eq!(touched["frames_seen"], 4, "{touched:#}");
    assert_eq!(touched["frames_done"], 4, "{touched:#}");
    assert_eq!(touched["objects_total"], before["objects_total"]);
    assert_eq!(position(&touched), position(&before), "{touched:#}");
    let rows = versions(&bench.db);
    assert_eq!(rows.len(), 5);
    assert_eq!(
        rows[4],
        (first.display().to_string(), 2, Some(1), Some(0)),
        "the touched version is recorded as the same pixels: {rows:?}"
    );

    // Other pixels under the second time point's name.
    let second = "A01_t0001.tif";
    let replacement = scene(77, 1.0);
    put(bench.dir.path(), &bench.acq, second, &replacement);
    bench.wait_finished(6, LONG);
    let rewritten = status_json(&bench.config);
    assert_eq!(rewritten["frames_seen"], 4, "{rewritten:#}");
    assert_eq!(rewritten["frames_done"], 4, "{rewritten:#}");
    let rows = versions(&bench.db);
    let superseded: Vec<_> = rows.iter().filter(|r| r.3 == Some(1)).collect();
    assert_eq!(superseded.len(), 1, "{rows:?}");
    assert!(superseded[0].0.ends_with(second) && superseded[0].1 == 1);
    // Counted once: the new count replaces the old one in the total.
    let counts = bench.rows();
    let count = |version: i64| -> i64 {
        counts
            .iter()
            .find(|r| r.path.ends_with(second) && r.version == version)
            .unwrap()
            .object_count
            .unwrap()
    };
    let total = |s: &serde_json::Value| s["objects_total"].as_i64().unwrap();
    assert_eq!(total(&rewritten), total(&before) - count(1) + count(2));
    let p = position(&rewritten);
    assert_eq!(p["frames_done"], 4);
    assert_eq!(
        (p["first_count"].clone(), p["last_count"].clone()),
        (
            position(&before)["first_count"].clone(),
            position(&before)["last_count"].clone()
        )
    );
}

/// The uid of this process, from `id -u`.
fn uid() -> u32 {
    let out = Command::new("id").arg("-u").output().unwrap();
    String::from_utf8_lossy(&out.stdout).trim().parse().unwrap()
}

/// Another user reading a cleanly stopped database in a folder they cannot
/// write (the service's folder under systemd) gets the status. As root, where
/// permissions are not enforced, `status` runs as `nobody` through `setpriv`.
#[test]
fn status_reads_a_stopped_database_in_a_folder_it_cannot_write() {
    let mut bench = Bench::new(PATTERN);
    bench.start();
    put(
        bench.dir.path(),
        &bench.acq,
        "A01_t0000.tif",
        &scene(5, 1.0),
    );
    bench.wait_finished(1, LONG);
    bench.signal("TERM");
    assert_eq!(bench.wait_exit(LONG), Some(0), "{}", bench.logs());

    // A clean stop leaves the database complete on its own: no log to replay.
    let wal = bench.dir.path().join("fw.db-wal");
    assert!(
        std::fs::metadata(&wal).map_or(true, |m| m.len() == 0),
        "a clean stop left a write-ahead log"
    );

    // The database in a folder readable and searchable by all, writable by none.
    let folder = bench.dir.path().join("ro");
    std::fs::create_dir(&folder).unwrap();
    std::fs::rename(&bench.db, folder.join("fw.db")).unwrap();
    use std::os::unix::fs::PermissionsExt;
    let mode = |p: &Path, m: u32| {
        std::fs::set_permissions(p, std::fs::Permissions::from_mode(m)).unwrap();
    };
    mode(bench.dir.path(), 0o755);
    mode(&folder.join("fw.db"), 0o644);
    mode(&folder, 0o555);
    let db = folder.join("fw.db");
    let mut status = if uid() == 0 {
        let which = Command::new("setpriv").arg("--version").output();
        if which.is_err() {
            mode(&folder, 0o755);
            eprintln!(
                "skipped: running as root and `setpriv` is not available to run as another user"
            );
            return;
        }
        let mut c = Command::new("setpriv");
        c.args([
            "--reuid=nobody",
            "--regid=nogroup",
            "--clear-groups",
            "--",
            BIN,
        ]);
        c
    } else {
        Command::new(BIN)
    };
    let out = status
        .args(["status", "--json", "--db"])
        .arg(&db)
        .output()
        .unwrap();
    mode(&folder, 0o755);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let report: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(report["frames_done"], 1, "{report:#}");
    // Nothing was left behind in the folder.
    let mut left: Vec<String> = std::fs::read_dir(&folder)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    left.sort();
    assert_eq!(left, ["fw.db"]);
}
