//! `framewarden report` on a run recorded by the real binary (a short
//! `demo`): the outlines in its pictures are the object borders of the
//! frame's label image at the picture's scale (scikit-image's
//! `find_boundaries` as the outside reference), and the page opens in a real
//! browser (the Debian Chromium, driven by playwright) with the network cut
//! off: no errors, the numbers of `status --json`, a plot per position and an
//! overlay per flagged frame.

mod common;
#[allow(dead_code)]
mod watch_support;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;
use std::time::Duration;

use serde_json::{json, Value};

const BIN: &str = env!("CARGO_BIN_EXE_framewarden");

/// A recorded run and its report.
struct Run {
    _dir: tempfile::TempDir,
    db: PathBuf,
    report: PathBuf,
    /// Frame id -> its label image (flagged frames, but one).
    label_images: Vec<(i64, PathBuf)>,
}

fn run_ok(cmd: &mut Command) -> String {
    let out = cmd.output().expect("the framewarden binary starts");
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        out.status.success(),
        "{cmd:?}: {}\n{stdout}\n{}",
        out.status,
        String::from_utf8_lossy(&out.stderr)
    );
    stdout
}

/// The built-in demo, faster (time points 0.1 s apart), recorded into
/// a temporary folder with the label images the service keeps for flagged
/// frames, but one (re-segmented for its picture).
fn run() -> &'static Run {
    static RUN: OnceLock<Run> = OnceLock::new();
    RUN.get_or_init(|| {
        let dir = tempfile::tempdir().unwrap();
        let scenario = std::fs::read_to_string(
            Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/plate-timelapse.toml"),
        )
        .unwrap()
        .replace("interval_ms = 300", "interval_ms = 100");
        let scenario_file = dir.path().join("scenario.toml");
        std::fs::write(&scenario_file, scenario).unwrap();
        let stdout = run_ok(
            Command::new(BIN)
                .args(["demo", "--scenario"])
                .arg(&scenario_file)
                .env("TMPDIR", dir.path()),
        );
        let kept = stdout
            .lines()
            .find_map(|l| l.strip_prefix("kept (delete it when done): "))
            .unwrap_or_else(|| panic!("no kept folder:\n{stdout}"));
        let db = PathBuf::from(kept).join("framewarden.db");
        // The service wrote a label image for each flagged frame (the default
        // `label_images = "flagged"`); one is removed, so that its picture's
        // outlines come from segmenting the file again.
        let conn = rusqlite::Connection::open(&db).unwrap();
        let flagged: Vec<i64> = conn
            .prepare("SELECT id FROM frames WHERE EXISTS (SELECT 1 FROM flags WHERE frame_id = frames.id) ORDER BY id")
            .unwrap()
            .query_map([], |r| r.get(0))
            .unwrap()
            .map(Result::unwrap)
            .collect();
        let mut label_images: Vec<(i64, PathBuf)> = flagged
            .iter()
            .map(|&id| (id, framewarden::store::label_image_path(&db, id)))
            .filter(|(_, p)| p.exists())
            .collect();
        assert!(label_images.len() >= 2, "the demo flags frames and keeps their label images");
        let (_, removed) = label_images.pop().unwrap();
        std::fs::remove_file(removed).unwrap();
        let report = dir.path().join("report.html");
        run_ok(Command::new(BIN).arg("report").arg("--db").arg(&db).arg("-o").arg(&report));
        Run {
            _dir: dir,
            db,
            report,
            label_images,
        }
    })
}

/// Runs a script of tests/reference with `input` and returns its result.
fn script(name: &str, input: Value) -> Value {
    let out = tempfile::tempdir().unwrap();
    std::fs::write(out.path().join("input.json"), input.to_string()).unwrap();
    common::run_reference_script(name, out.path());
    serde_json::from_str(&std::fs::read_to_string(out.path().join("result.json")).unwrap()).unwrap()
}

#[test]
fn outlines_lie_on_the_object_borders_of_the_label_image() {
    let run = run();
    let html = std::fs::read_to_string(&run.report).unwrap();
    // The frames with a label image use it; the others (the removed one and
    // the unflagged frames shown for comparison) are segmented again from
    // their files with the run's stored settings, and the page says so.
    assert_eq!(
        html.matches("data-outlines=\"label-image\"").count(),
        run.label_images.len()
    );
    assert!(html.contains("data-outlines=\"resegmented\""));
    assert!(
        html.contains("outlines from segmenting the file again with the run&#39;s stored settings")
    );
    let images: serde_json::Map<String, Value> = run
        .label_images
        .iter()
        .map(|(id, p)| (id.to_string(), json!(p)))
        .collect();
    let result = script(
        "report_overlay.py",
        json!({"report": run.report, "label_images": images}),
    );
    let checked = result["checked"].as_array().unwrap();
    assert_eq!(checked.len(), run.label_images.len(), "{result}");
    assert!(
        checked
            .iter()
            .all(|c| c["outline_px"].as_u64().unwrap() > 20),
        "{result}"
    );
    let mismatches: Vec<String> = result["mismatches"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m.as_str().unwrap().to_string())
        .collect();
    common::check(
        mismatches,
        "outline pixels against the label image's borders",
    );
}

#[test]
fn a_missing_frame_file_is_said_and_the_report_still_written() {
    let run = run();
    let dir = tempfile::tempdir().unwrap();
    // A copy of the database whose frames' files are gone.
    let db = dir.path().join("copy.db");
    let conn = rusqlite::Connection::open(&run.db).unwrap();
    conn.execute("VACUUM INTO ?1", [db.to_str().unwrap()])
        .unwrap();
    drop(conn);
    let conn = rusqlite::Connection::open(&db).unwrap();
    conn.execute("UPDATE frames SET file = file || '.gone'", [])
        .unwrap();
    drop(conn);
    let report = dir.path().join("r.html");
    run_ok(
        Command::new(BIN)
            .arg("report")
            .arg("--db")
            .arg(&db)
            .arg("-o")
            .arg(&report),
    );
    let html = std::fs::read_to_string(&report).unwrap();
    assert!(html.contains("the file is gone: no picture"));
    assert!(!html.contains("data:image/png"));
}

/// The browser to drive: the Debian package's.
const CHROMIUM: &str = "/usr/bin/chromium";

#[test]
fn the_report_opens_offline_in_chromium_with_the_status_numbers() {
    if !Path::new(CHROMIUM).exists() {
        let required = std::env::var("FRAMEWARDEN_REQUIRE_BROWSER").is_ok_and(|v| v == "1");
        assert!(
            !required,
            "FRAMEWARDEN_REQUIRE_BROWSER=1 but {CHROMIUM} is missing: apt-get install chromium"
        );
        eprintln!(
            "SKIPPED the browser check: {CHROMIUM} is missing (apt-get install chromium; \
             FRAMEWARDEN_REQUIRE_BROWSER=1 makes this a failure)"
        );
        return;
    }
    let run = run();
    let status: Value = serde_json::from_str(&run_ok(
        Command::new(BIN)
            .arg("status")
            .arg("--json")
            .arg("--db")
            .arg(&run.db),
    ))
    .unwrap();
    let screenshot = Path::new(env!("CARGO_TARGET_TMPDIR")).join("report-browser.png");
    let profile = tempfile::tempdir().unwrap();
    let result = script(
        "report_browser.py",
        json!({"report": run.report, "chromium": CHROMIUM, "screenshot": screenshot,
               "profile": profile.path()}),
    );
    eprintln!("screenshot of the report: {}", screenshot.display());
    for key in [
        "console_errors",
        "page_errors",
        "failed_requests",
        "blocked_requests",
    ] {
        assert_eq!(result[key], json!([]), "{key}: {result}");
    }
    let summary = &result["summary"];
    for key in [
        "frames_seen",
        "frames_done",
        "frames_queued",
        "frames_failed",
        "objects_total",
    ] {
        assert_eq!(
            summary[key],
            json!(status[key].to_string()),
            "{key}: {summary}"
        );
    }
    let rate = format!(
        "{:.2} frames/min",
        status["frames_per_minute"].as_f64().unwrap()
    );
    assert_eq!(summary["frames_per_minute"], json!(rate));
    let flagged: u64 = status["positions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["frames_flagged"].as_u64().unwrap())
        .sum();
    assert!(flagged > 0);
    assert_eq!(summary["frames_flagged"], json!(flagged.to_string()));
    let mut positions: Vec<&str> = status["positions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p["position"].as_str().unwrap())
        .collect();
    positions.sort_unstable();
    let mut plotted: Vec<&str> = result["positions_with_plot"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p.as_str().unwrap())
        .collect();
    plotted.sort_unstable();
    assert_eq!(plotted, positions);
    assert_eq!(result["flagged"].as_array().unwrap().len() as u64, flagged);
    assert_eq!(result["overlays_loaded"], result["flagged"]);
    assert!(std::fs::metadata(&screenshot).unwrap().len() > 10_000);
}

#[test]
fn watch_rewrites_the_report_every_interval_and_when_it_stops() {
    let mut bench =
        watch_support::Bench::new("[report]\npath = \"night/report.html\"\nevery_min = 1\n");
    bench.start();
    for i in 0..3 {
        let (bytes, _) = watch_support::tiff_bytes(i, 96, 6);
        bench.write(&format!("f{i}.tif"), &bytes);
    }
    bench.wait_finished(3, Duration::from_secs(60));
    let report = bench.dir.path().join("night/report.html");
    assert!(
        !report.exists(),
        "written before the first interval or the end"
    );
    // The first rewrite, a minute after the start (the shortest interval).
    watch_support::wait_for("the first report", Duration::from_secs(120), || {
        report.exists()
    });
    assert!(std::fs::read_to_string(&report)
        .unwrap()
        .contains("<dd data-key=\"ended\">still being watched</dd>"));
    bench.signal("TERM");
    assert_eq!(bench.wait_exit(Duration::from_secs(60)), Some(0));
    let html = std::fs::read_to_string(&report)
        .unwrap_or_else(|e| panic!("{}: {e}\n{}", report.display(), bench.logs()));
    assert!(
        html.contains("<dd data-key=\"frames_done\">3</dd>"),
        "{html}"
    );
    assert!(html.ends_with("</html>\n"));
    // The last one knows the run has ended.
    assert!(!html.contains("still being watched"));
    // Only the report itself: the temporary file was renamed over it.
    let names: Vec<_> = std::fs::read_dir(report.parent().unwrap())
        .unwrap()
        .map(|e| e.unwrap().file_name())
        .collect();
    assert_eq!(names, vec![std::ffi::OsString::from("report.html")]);
    assert!(bench.logs().contains("report of run 1 written to"));
}
