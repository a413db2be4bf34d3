//! Quality control end to end on the real binary: `framewarden watch` records a
//! small night with a dimming lamp, an unevenly lit frame and a broken file;
//! `framewarden status --json` shows the alert (opened, then recovered), the
//! flags with their evidence (and the flattening remedy) and the failure; the
//! alert file sink gets the events; a restart mid-run is itself an alert; a
//! volume below the free-space limit opens an alert.

// Shared with the watch tests; not every helper is used here.
#[allow(dead_code)]
mod watch_support;

use std::process::Command;
use std::time::Duration;

use framewarden::synth::{self, SceneSpec};
use watch_support::{Bench, BIN};

const LONG: Duration = Duration::from_secs(120);

/// Writes one synthetic frame into the acquisition folder (whole, by rename).
fn put(bench: &Bench, name: &str, spec: SceneSpec) {
    let frame = synth::generate(&spec).unwrap().frame;
    let staged = bench.dir.path().join(format!("{name}.staged"));
    synth::write_tiff(&staged, &frame).unwrap();
    std::fs::rename(&staged, bench.acq.join(name)).unwrap();
}

fn scene(seed: u64, lamp: f64, gradient: f64) -> SceneSpec {
    SceneSpec {
        width: 160,
        height: 160,
        object_count: 14,
        radius_px: (4.0, 7.0),
        lamp,
        gradient,
        seed,
        ..SceneSpec::default()
    }
}

fn status_json(bench: &Bench) -> serde_json::Value {
    let out = Command::new(BIN)
        .args(["status", "--json", "--recent", "50", "--config"])
        .arg(&bench.config)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

fn alerts_of<'a>(status: &'a serde_json::Value, condition: &str) -> Vec<&'a serde_json::Value> {
    status["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| a["condition"] == condition)
        .collect()
}

/// Frames go in one by one, each waited for, so the run sees them in order.
fn feed(bench: &Bench, names_specs: &[(String, SceneSpec)], done_before: usize) {
    for (i, (name, spec)) in names_specs.iter().enumerate() {
        put(bench, name, spec.clone());
        bench.wait_finished(done_before + i + 1, LONG);
    }
}

#[test]
fn status_shows_a_drift_alert_its_recovery_the_flags_and_failures() {
    let mut bench = Bench::new(concat!(
        "name_pattern = '^(?P<well>[A-Z]\\d{2})_t(?P<time_point>\\d+)\\.tif$'\n",
        "[quality]\nbaseline_frames = 4\nrecover_frames = 3\non_uneven_illumination = \"flatten\"\n",
        "[alerts]\nfile = \"alerts.jsonl\"\n",
    ));
    bench.start();
    let frame = |t: usize, lamp: f64| (format!("A01_t{t:04}.tif"), scene(t as u64 + 1, lamp, 0.0));
    // Baseline, then the lamp at half power.
    let mut night: Vec<(String, SceneSpec)> = (0..6).map(|t| frame(t, 1.0)).collect();
    night.extend((6..10).map(|t| frame(t, 0.5)));
    feed(&bench, &night, 0);
    // An unevenly lit frame in another well, and a file cut short.
    put(&bench, "B01_t0000.tif", scene(99, 1.0, 0.6));
    let (bytes, _) = watch_support::tiff_bytes(5, 96, 4);
    bench.write("C01_t0000.tif", &bytes[..bytes.len() / 2]);
    bench.wait_finished(12, LONG);

    let status = status_json(&bench);
    let drift = alerts_of(&status, "drift:background_level");
    assert_eq!(drift.len(), 1, "{status:#}");
    let a = drift[0];
    assert!(a["closed_at"].is_null(), "{a}");
    assert!(a["opened_at"].as_str().unwrap().ends_with('Z'));
    let trigger = a["frame"].as_str().unwrap();
    assert!(
        [
            "A01_t0006.tif",
            "A01_t0007.tif",
            "A01_t0008.tif",
            "A01_t0009.tif"
        ]
        .iter()
        .any(|f| trigger.ends_with(f)),
        "{trigger}"
    );
    assert!(
        a["message"].as_str().unwrap().contains("drifting down"),
        "{a}"
    );

    let flagged = status["flagged_frames"].as_array().unwrap();
    let flags_of = |suffix: &str| -> Vec<serde_json::Value> {
        flagged
            .iter()
            .find(|f| f["file"].as_str().unwrap().ends_with(suffix))
            .unwrap_or_else(|| panic!("{suffix} not flagged: {status:#}"))["flags"]
            .as_array()
            .unwrap()
            .clone()
    };
    let uneven = flags_of("B01_t0000.tif");
    let u = uneven
        .iter()
        .find(|f| f["flag"] == "uneven_illumination")
        .unwrap();
    assert!(
        u["value"].as_f64().unwrap() > u["limit"].as_f64().unwrap(),
        "{u}"
    );
    let sentence = u["message"].as_str().unwrap();
    assert!(sentence.contains("uneven illumination"), "{sentence}");
    // The remedy ran: both results kept, the sentence says which count is used.
    assert!(
        sentence.contains("the count is taken from the recount"),
        "{sentence}"
    );
    // Both results' objects are stored; the count used is the recount's.
    let conn = rusqlite::Connection::open_with_flags(
        &bench.db,
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap();
    let (raw, recount, raw_count, recount_count, source): (i64, i64, i64, i64, String) = conn
        .query_row(
            "SELECT (SELECT count(*) FROM objects WHERE frame_id = f.id AND result = 'raw'),
                    (SELECT count(*) FROM objects WHERE frame_id = f.id AND result = 'recount'),
                    object_count, recount_object_count, count_source
             FROM frames f WHERE file LIKE '%B01_t0000.tif'",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?)),
        )
        .unwrap();
    assert_eq!((raw, recount), (raw_count, recount_count));
    assert!(recount > 0);
    assert_eq!(source, "recount");
    drop(conn);
    let listed = status["frames"]
        .as_array()
        .unwrap()
        .iter()
        .find(|f| f["file"].as_str().unwrap().ends_with("B01_t0000.tif"))
        .unwrap_or_else(|| panic!("B01 among the recent frames: {status:#}"));
    assert_eq!(
        listed["object_count"].as_i64(),
        Some(recount_count),
        "{listed}"
    );
    let failed = flags_of("C01_t0000.tif");
    assert_eq!(failed[0]["flag"], "failed");
    assert!(failed[0]["value"].is_null() && failed[0]["limit"].is_null());

    // The lamp is replaced: the drift recovers, once (within h/k + recover_frames
    // = 13 frames: the CUSUM memory is capped at 2h).
    let after: Vec<(String, SceneSpec)> = (10..30).map(|t| frame(t, 1.0)).collect();
    feed(&bench, &after, 12);
    let status = status_json(&bench);
    let drift = alerts_of(&status, "drift:background_level");
    assert_eq!(drift.len(), 1, "{status:#}");
    assert!(drift[0]["closed_at"].is_string(), "{status:#}");

    // The morning summary: frames per flag over the whole run, and per well.
    let count_of = |flag: &str| {
        status["flag_counts"]
            .as_array()
            .unwrap()
            .iter()
            .find(|c| c["flag"] == flag)
            .map_or(0, |c| c["frames"].as_u64().unwrap())
    };
    assert!(count_of("uneven_illumination") >= 1, "{status:#}");
    assert_eq!(count_of("failed"), 1, "{status:#}");
    let positions = status["positions"].as_array().unwrap();
    let wells: Vec<&str> = positions
        .iter()
        .map(|p| p["position"].as_str().unwrap())
        .collect();
    assert_eq!(wells, ["A01", "B01", "C01"], "{status:#}");
    let (a01, b01, c01) = (&positions[0], &positions[1], &positions[2]);
    assert_eq!(
        (a01["frames_done"].as_u64(), a01["frames_failed"].as_u64()),
        (Some(30), Some(0))
    );
    assert!(a01["min_count"].as_i64() <= a01["max_count"].as_i64());
    assert_eq!(b01["frames_flagged"].as_u64(), Some(1), "{b01}");
    assert_eq!(b01["last_count"].as_i64(), Some(recount_count), "{b01}");
    assert_eq!(
        (c01["frames_done"].as_u64(), c01["frames_failed"].as_u64()),
        (Some(0), Some(1))
    );
    assert!(c01["first_count"].is_null());

    // The text view explains it in sentences.
    let text = Command::new(BIN)
        .args(["status", "--config"])
        .arg(&bench.config)
        .output()
        .unwrap();
    let text = String::from_utf8(text.stdout).unwrap();
    assert!(text.contains("drift:background_level"), "{text}");
    assert!(text.contains("flags over the run (frames):"), "{text}");
    assert!(text.contains("per position:"), "{text}");
    assert!(text.contains("uneven illumination"), "{text}");

    // The file sink got the opening and the recovery, in that order.
    let lines: Vec<serde_json::Value> =
        std::fs::read_to_string(bench.dir.path().join("alerts.jsonl"))
            .unwrap()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .filter(|v: &serde_json::Value| v["condition"] == "drift:background_level")
            .collect();
    let states: Vec<&str> = lines.iter().map(|v| v["state"].as_str().unwrap()).collect();
    assert_eq!(states, ["opened", "recovered"]);

    // A restart in the middle of the run is an alert of its own, and the
    // rebuilt monitor does not raise the old drift again.
    bench.stop();
    bench.start();
    feed(&bench, &[frame(30, 1.0)], 32);
    let status = status_json(&bench);
    assert_eq!(
        alerts_of(&status, "service_restarted").len(),
        1,
        "{status:#}"
    );
    assert_eq!(alerts_of(&status, "drift:background_level").len(), 1);
    bench.stop();
}

#[test]
fn low_free_space_on_a_watched_volume_raises_an_alert() {
    // A limit no disk meets (about 10^12 MiB): the idle writer's periodic check
    // must open one alert per watched volume and say how much is free.
    let mut bench = Bench::new("[quality]\nmin_free_space_mib = 1000000000\n");
    bench.start();
    let mut status = serde_json::Value::Null;
    for _ in 0..300 {
        status = status_json(&bench);
        let low = status["alerts"].as_array().unwrap().iter().any(|a| {
            a["condition"]
                .as_str()
                .unwrap()
                .starts_with("low_disk_space:")
        });
        if low {
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let low: Vec<&serde_json::Value> = status["alerts"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|a| {
            a["condition"]
                .as_str()
                .unwrap()
                .starts_with("low_disk_space:")
        })
        .collect();
    assert!(!low.is_empty(), "{status:#}");
    let watched = format!("low_disk_space:{}", bench.acq.display());
    assert!(
        low.iter().any(|a| a["condition"] == watched.as_str()),
        "{status:#}"
    );
    assert!(low[0]["closed_at"].is_null());
    assert!(low[0]["message"].as_str().unwrap().contains("MiB free"));
    bench.stop();
}

#[test]
fn channels_of_one_well_are_judged_apart() {
    // Two channels per time point at one well: a bright one with many objects
    // and a dim one with few. Each is steady; only mixing them would look
    // like jumps in count, background and threshold.
    let mut bench = Bench::new(concat!(
        "name_pattern = '^(?P<well>[A-Z]\\d{2})_t(?P<time_point>\\d+)_(?P<channel>[a-z]+)\\.tif$'\n",
        "[quality]\nbaseline_frames = 4\n",
    ));
    bench.start();
    let mut night = Vec::new();
    for t in 0..16u64 {
        night.push((format!("A01_t{t:04}_bright.tif"), scene(t + 1, 1.0, 0.0)));
        let dim = SceneSpec {
            object_count: 6,
            lamp: 0.5,
            ..scene(t + 101, 1.0, 0.0)
        };
        night.push((format!("A01_t{t:04}_dim.tif"), dim));
    }
    feed(&bench, &night, 0);
    let status = status_json(&bench);
    assert_eq!(status["alerts"], serde_json::json!([]), "{status:#}");
    assert_eq!(status["flag_counts"], serde_json::json!([]), "{status:#}");
    let positions: Vec<(&str, u64)> = status["positions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| {
            (
                p["position"].as_str().unwrap(),
                p["frames_done"].as_u64().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        positions,
        [("A01 channel bright", 16), ("A01 channel dim", 16)]
    );
    bench.stop();
}

#[test]
fn a_run_with_every_expected_frame_is_complete_and_its_end_is_no_stall() {
    // Two services side by side, stall limit 1 s: one knows the run has three
    // frames, the other does not.
    let quality = "[quality]\nstall_after_s = 1\n";
    let mut knows = Bench::new(&format!(
        "{quality}expected_frames = 3\n[alerts]\nfile = \"alerts.jsonl\"\n"
    ));
    let mut guesses = Bench::new(quality);
    for bench in [&mut knows, &mut guesses] {
        bench.start();
        let night: Vec<(String, SceneSpec)> = (0..3u64)
            .map(|t| (format!("A01_t{t:04}.tif"), scene(t + 1, 1.0, 0.0)))
            .collect();
        feed(bench, &night, 0);
    }
    // The one that does not know calls the quiet after its last frame a stall
    // (at its next idle check, within a few seconds).
    watch_support::wait_for("the stall alert", LONG, || {
        !alerts_of(&status_json(&guesses), "stalled").is_empty()
    });
    // The other has had at least one idle check since (one every 5 s).
    std::thread::sleep(Duration::from_secs(6));
    let status = status_json(&knows);
    assert!(alerts_of(&status, "stalled").is_empty(), "{status:#}");
    let complete = alerts_of(&status, "run_complete");
    assert_eq!(complete.len(), 1, "{status:#}");
    assert!(
        complete[0]["closed_at"].is_string(),
        "a notice closes as it opens"
    );
    assert!(
        complete[0]["message"]
            .as_str()
            .unwrap()
            .contains("all 3 expected frames recorded (0 flagged, 0 failed)"),
        "{status:#}"
    );
    let sent: Vec<serde_json::Value> =
        std::fs::read_to_string(knows.dir.path().join("alerts.jsonl"))
            .unwrap()
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
    assert!(
        sent.iter()
            .any(|e| e["condition"] == "run_complete" && e["state"] == "notice"),
        "{sent:?}"
    );
    for bench in [&mut knows, &mut guesses] {
        bench.stop();
    }
}

/// The events a command sink received: the program is `sh -c 'cat >> FILE'`,
/// so each event's JSON (stdin) lands as one line.
fn command_sink_events(path: &std::path::Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(path)
        .unwrap_or_default()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

#[test]
fn every_well_dimming_together_is_one_alert_closed_by_the_complete_run() {
    // Six wells, four baseline time points, then the lamp at half power for
    // every well until the run's 48 expected frames are in. Alerts go to a
    // real command sink run by the service.
    const WELLS: [&str; 6] = ["A01", "A02", "A03", "B01", "B02", "B03"];
    let received = tempfile::tempdir().unwrap();
    let events_file = received.path().join("events.jsonl");
    let mut bench = Bench::new(&format!(
        "name_pattern = '^(?P<well>[A-Z]\\d{{2}})_t(?P<time_point>\\d+)\\.tif$'\n\
         [quality]\nbaseline_frames = 4\nexpected_frames = 48\n\
         [alerts]\ncommand = [\"/bin/sh\", \"-c\", \"cat >> '{}'\"]\n",
        events_file.display()
    ));
    bench.start();
    for t in 0..8u64 {
        let lamp = if t < 4 { 1.0 } else { 0.5 };
        for (w, well) in WELLS.iter().enumerate() {
            put(
                &bench,
                &format!("{well}_t{t:04}.tif"),
                scene(t * 10 + w as u64 + 1, lamp, 0.0),
            );
        }
        bench.wait_finished(WELLS.len() * (t as usize + 1), LONG);
    }
    let wells: Vec<&str> = WELLS.to_vec();
    let status = status_json(&bench);
    let drift = alerts_of(&status, "drift:background_level");
    assert_eq!(drift.len(), 1, "one cause, one alert: {status:#}");
    let a = drift[0];
    assert_eq!(a["positions"], serde_json::json!(wells), "{a:#}");
    assert!(
        a["message"]
            .as_str()
            .unwrap()
            .contains("drifting down at all 6 positions: A01, A02, A03, B01, B02, B03"),
        "{a:#}"
    );
    // The run completed with the lamp still dim: the alert is closed, not
    // recovered, and says so.
    assert!(a["closed_at"].is_string(), "{a:#}");
    assert_eq!(a["closed_state"], "closed", "{a:#}");
    assert!(
        a["closed_message"]
            .as_str()
            .unwrap()
            .contains("the alert closes with the run, not recovered"),
        "{a:#}"
    );
    assert_eq!(alerts_of(&status, "run_complete").len(), 1, "{status:#}");
    // Each position's evidence is kept.
    let conn = rusqlite::Connection::open_with_flags(
        &bench.db,
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap();
    let evidence: Vec<(String, String)> = conn
        .prepare(
            "SELECT position, p.message FROM alert_positions p JOIN alerts ON alerts.id = p.alert_id
             WHERE condition = 'drift:background_level' ORDER BY position",
        )
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    drop(conn);
    assert_eq!(
        evidence.iter().map(|(p, _)| p.as_str()).collect::<Vec<_>>(),
        wells
    );
    assert!(
        evidence
            .iter()
            .all(|(_, m)| m.contains("against a baseline of")),
        "{evidence:?}"
    );
    // The text view names the positions and how the alert ended.
    let text = Command::new(BIN)
        .args(["status", "--config"])
        .arg(&bench.config)
        .output()
        .unwrap();
    let text = String::from_utf8(text.stdout).unwrap();
    assert!(
        text.contains("at all 6 positions: A01, A02, A03, B01, B02, B03"),
        "{text}"
    );
    assert!(text.contains("closed with the run: "), "{text}");

    // The sink got one opening, an update per further well (not new alerts)
    // and the final message, all about the same alert; then the notice.
    let mut sent = Vec::new();
    watch_support::wait_for("the command sink's deliveries", LONG, || {
        sent = command_sink_events(&events_file);
        sent.iter().any(|e| e["condition"] == "run_complete")
    });
    let drift: Vec<&serde_json::Value> = sent
        .iter()
        .filter(|e| e["condition"] == "drift:background_level")
        .collect();
    let states: Vec<&str> = drift.iter().map(|e| e["state"].as_str().unwrap()).collect();
    assert_eq!(
        states,
        ["opened", "updated", "updated", "updated", "updated", "updated", "closed"],
        "{sent:#?}"
    );
    assert!(
        drift
            .iter()
            .all(|e| e["opened_at_ms"] == drift[0]["opened_at_ms"]),
        "{drift:#?}"
    );
    assert_eq!(drift[0]["positions"].as_array().unwrap().len(), 1);
    assert_eq!(drift[6]["positions"], serde_json::json!(wells));
    let joined: Vec<&str> = drift[..6]
        .iter()
        .map(|e| e["evidence"]["position"].as_str().unwrap())
        .collect();
    let mut joined_sorted = joined.clone();
    joined_sorted.sort_unstable();
    assert_eq!(joined_sorted, wells, "each well joined once: {joined:?}");

    // A restart after the complete run is no restart in the middle of it.
    bench.stop();
    bench.start();
    bench.stop();
    let status = status_json(&bench);
    assert!(
        alerts_of(&status, "service_restarted").is_empty(),
        "{status:#}"
    );
    assert!(
        !command_sink_events(&events_file)
            .iter()
            .any(|e| e["condition"] == "service_restarted"),
        "no restart notice sent"
    );
    assert!(
        bench
            .logs()
            .contains("run 1 is complete (48 frames recorded)"),
        "{}",
        bench.logs()
    );
}
