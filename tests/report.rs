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

use std::collections::BTreeMap;
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
    /// The flagged frame whose label image was moved aside (so its picture is
    /// segmented again), one whose count used is the recount's and differs
    /// from the first result's, with where its image now is.
    resegmented: (i64, PathBuf),
}

/// `framewarden report --db DB -o OUT`, which must succeed.
fn write_report(db: &Path, out: &Path) {
    run_ok(
        Command::new(BIN)
            .arg("report")
            .arg("--db")
            .arg(db)
            .arg("-o")
            .arg(out),
    );
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
/// frames, but one recounted frame's (re-segmented for its picture).
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
        // `label_images = "flagged"`); one of a frame whose count is the
        // recount's is moved aside, so that its picture's outlines come from
        // segmenting the file again.
        let conn = rusqlite::Connection::open(&db).unwrap();
        let flagged: Vec<(i64, bool)> = conn
            .prepare(
                "SELECT id, COALESCE(count_source = 'recount' AND recount_object_count != object_count, 0)
                   FROM frames WHERE EXISTS (SELECT 1 FROM flags WHERE frame_id = frames.id)
                  ORDER BY id",
            )
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .unwrap()
            .map(Result::unwrap)
            .collect();
        let recounted = flagged
            .iter()
            .find(|f| f.1)
            .expect("the demo recounts a flagged frame to another count")
            .0;
        let mut label_images: Vec<(i64, PathBuf)> = flagged
            .iter()
            .map(|&(id, _)| (id, framewarden::store::label_image_path(&db, id)))
            .filter(|(_, p)| p.exists())
            .collect();
        assert!(
            label_images.len() >= 2,
            "the demo flags frames and keeps their label images"
        );
        let at = label_images.iter().position(|f| f.0 == recounted).unwrap();
        let (_, image) = label_images.remove(at);
        let aside = dir.path().join("moved-aside.tif");
        std::fs::rename(image, &aside).unwrap();
        let report = dir.path().join("report.html");
        write_report(&db, &report);
        Run {
            _dir: dir,
            db,
            report,
            label_images,
            resegmented: (recounted, aside),
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

/// The objects rows of a frame's result whose count is used: label -> area.
fn counted_objects(db: &Path, frame_id: i64) -> BTreeMap<String, i64> {
    let conn = rusqlite::Connection::open(db).unwrap();
    let mut stmt = conn
        .prepare(
            "SELECT o.label, o.area_px FROM objects o JOIN frames f ON f.id = o.frame_id
              WHERE f.id = ?1 AND o.result = COALESCE(f.count_source, 'raw')",
        )
        .unwrap();
    let rows = stmt
        .query_map([frame_id], |r| {
            Ok((r.get::<_, i64>(0)?.to_string(), r.get(1)?))
        })
        .unwrap()
        .map(Result::unwrap)
        .collect();
    rows
}

#[test]
fn outlines_lie_on_the_object_borders_of_the_label_image() {
    let run = run();
    let html = std::fs::read_to_string(&run.report).unwrap();
    // The frames with a label image use it; the others (the one moved aside
    // and the unflagged frames shown for comparison) are segmented again from
    // their files with the run's stored settings, and the page says so.
    assert_eq!(
        html.matches("data-outlines=\"label-image\"").count(),
        run.label_images.len()
    );
    let recounted = run.resegmented.0;
    let tag = html
        .split("<img ")
        .find(|t| t.starts_with(&format!("class=\"overlay\" data-frame-id=\"{recounted}\"")))
        .expect("the recounted frame has a picture");
    assert!(tag.contains("data-outlines=\"resegmented\""), "{tag:.200}");
    assert!(
        html.contains("outlines from segmenting the file again with the run&#39;s stored settings")
    );
    // Every picture with a label image, and the re-segmented one against the
    // image the service kept for it.
    let images: serde_json::Map<String, Value> = run
        .label_images
        .iter()
        .chain(std::iter::once(&run.resegmented))
        .map(|(id, p)| (id.to_string(), json!(p)))
        .collect();
    let result = script(
        "report_overlay.py",
        json!({"report": run.report, "label_images": images}),
    );
    let checked = result["checked"].as_array().unwrap();
    assert_eq!(checked.len(), images.len(), "{result}");
    assert!(
        checked
            .iter()
            .all(|c| c["outline_px"].as_u64().unwrap() > 20),
        "{result}"
    );
    let mut mismatches: Vec<String> = result["mismatches"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m.as_str().unwrap().to_string())
        .collect();
    // Each label image holds the objects counted (the recount's where it
    // ran): its labels and their pixel counts are those objects rows.
    for c in checked {
        let id: i64 = c["frame"].as_str().unwrap().parse().unwrap();
        let areas: BTreeMap<String, i64> = serde_json::from_value(c["areas"].clone()).unwrap();
        let rows = counted_objects(&run.db, id);
        if areas != rows {
            mismatches.push(format!(
                "frame {id}: {} labels in its image, {} objects counted",
                areas.len(),
                rows.len()
            ));
        }
    }
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
    write_report(&db, &report);
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
    bench.stop();
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

/// The x coordinates of the count line (the blue polyline) in the count plot
/// of `position`.
fn count_line_x(html: &str, position: &str) -> Vec<f64> {
    let figure = html
        .split("<figure class=\"position\"")
        .find(|f| f.starts_with(&format!(" data-position=\"{position}\"")))
        .unwrap_or_else(|| panic!("no count plot for {position}"));
    let line = figure
        .split("<polyline")
        .find(|l| l.contains("stroke=\"#0072B2\""))
        .expect("a count line");
    let points = line
        .split("points=\"")
        .nth(1)
        .and_then(|p| p.split('"').next())
        .expect("the line's points");
    points
        .split_whitespace()
        .map(|xy| xy.split(',').next().unwrap().parse().unwrap())
        .collect()
}

#[test]
fn a_run_recorded_after_the_fact_plots_at_acquisition_times() {
    // Five time points acquired hours ago, unevenly spaced (minutes after the
    // first), copied in with their modification times kept, then watched: all
    // are recorded within seconds of each other.
    let minutes = [0u64, 10, 20, 60, 120];
    let mut bench = watch_support::Bench::new(
        "name_pattern = '^(?P<well>[A-Z]\\d{2})_t(?P<time_point>\\d+)\\.tif$'\n",
    );
    let first = std::time::SystemTime::now() - Duration::from_secs(6 * 3600);
    for (t, &m) in minutes.iter().enumerate() {
        let (bytes, _) = watch_support::tiff_bytes(70 + t as u64, 96, 6);
        let path = bench.write(&format!("A01_t{t:04}.tif"), &bytes);
        std::fs::File::options()
            .write(true)
            .open(&path)
            .unwrap()
            .set_modified(first + Duration::from_secs(m * 60))
            .unwrap();
    }
    bench.start();
    bench.wait_finished(minutes.len(), Duration::from_secs(120));
    bench.stop();
    let report = bench.dir.path().join("report.html");
    write_report(&bench.db, &report);
    let html = std::fs::read_to_string(&report).unwrap();

    // The line's points are where the mtimes put them: the same fractions
    // of the first-to-last span (pixels are whole numbers: within 1.5 px).
    let x = count_line_x(&html, "A01");
    assert_eq!(x.len(), minutes.len(), "{x:?}");
    let span = x[x.len() - 1] - x[0];
    assert!(span > 100.0, "the points spread over the plot: {x:?}");
    for (xi, &m) in x.iter().zip(&minutes) {
        let expected = x[0] + span * m as f64 / 120.0;
        assert!(
            (xi - expected).abs() <= 1.5,
            "x {x:?} against minutes {minutes:?}: {xi} where {expected} was expected"
        );
    }
    // The page says which time the axes show.
    assert!(html.contains("The plots' time axes are acquisition times"));
}
