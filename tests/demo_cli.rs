//! The README's main command, `framewarden demo`, run as a user runs it: the
//! real binary replays the built-in night while its watch service records it,
//! then prints a short summary and keeps its folder. The demo runs once (a few
//! seconds); each test checks one part of the story in the database the demo
//! kept, read with SQLite, against the scenario built into the binary
//! (`demo-data/plate-timelapse.toml`) and the counts the generator drew.

use std::collections::BTreeSet;
use std::path::PathBuf;
use std::process::Command;
use std::sync::OnceLock;

use framewarden::demo::{Scenario, DEFAULT_SCENARIO};
use rusqlite::{Connection, OpenFlags};

struct DemoRun {
    stdout: String,
    stderr: String,
    folder: PathBuf,
}

/// Runs the demo once for every test of this file. Its folder goes under a
/// temporary directory of this test target (emptied first), through `TMPDIR`,
/// which the binary's `std::env::temp_dir` follows.
fn demo() -> &'static DemoRun {
    static RUN: OnceLock<DemoRun> = OnceLock::new();
    RUN.get_or_init(|| {
        let tmp = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("demo-cli");
        let _ = std::fs::remove_dir_all(&tmp);
        std::fs::create_dir_all(&tmp).unwrap();
        let out = Command::new(env!("CARGO_BIN_EXE_framewarden"))
            .arg("demo")
            .env("TMPDIR", &tmp)
            .output()
            .expect("the framewarden binary starts");
        let stdout = String::from_utf8(out.stdout).unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
        assert!(out.status.success(), "{stdout}\n{stderr}");
        let folder = stdout
            .lines()
            .find_map(|l| l.strip_prefix("kept (delete it when done): "))
            .map(PathBuf::from)
            .unwrap_or_else(|| panic!("the demo does not say where its folder is:\n{stdout}"));
        assert!(folder.starts_with(&tmp), "{}", folder.display());
        DemoRun {
            stdout,
            stderr,
            folder,
        }
    })
}

fn scenario() -> Scenario {
    Scenario::parse(DEFAULT_SCENARIO).unwrap()
}

/// One frame row of the kept database.
#[derive(Debug)]
struct Row {
    well: String,
    time_point: usize,
    status: String,
    raw: Option<i64>,
    recount: Option<i64>,
    /// The count used: the recount where the remedy ran, else the raw count.
    used: Option<i64>,
    flags: BTreeSet<String>,
    error: Option<String>,
}

fn db() -> Connection {
    Connection::open_with_flags(
        demo().folder.join("framewarden.db"),
        OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap()
}

fn frames() -> Vec<Row> {
    let conn = db();
    let mut stmt = conn
        .prepare(
            "SELECT well, time_point, status, object_count, recount_object_count, count_source,
                    (SELECT group_concat(flag, ' ') FROM flags WHERE frame_id = frames.id), error
             FROM frames ORDER BY well, time_point",
        )
        .unwrap();
    stmt.query_map([], |r| {
        let t: String = r.get(1)?;
        let (raw, recount): (Option<i64>, Option<i64>) = (r.get(3)?, r.get(4)?);
        let source: Option<String> = r.get(5)?;
        let flags: Option<String> = r.get(6)?;
        Ok(Row {
            well: r.get(0)?,
            time_point: t.parse().unwrap(),
            status: r.get(2)?,
            raw,
            recount,
            used: if source.as_deref() == Some("recount") {
                recount
            } else {
                raw
            },
            flags: flags
                .unwrap_or_default()
                .split_whitespace()
                .map(str::to_string)
                .collect(),
            error: r.get(7)?,
        })
    })
    .unwrap()
    .collect::<Result<_, _>>()
    .unwrap()
}

/// The count the generator drew for one well at one time point: the truth.
fn drawn(s: &Scenario, well: &str, t: usize) -> i64 {
    let index = s.wells().iter().position(|w| w.0 == well).unwrap();
    s.scene(index, t).object_count as i64
}

#[test]
fn the_summary_is_short_and_says_where_everything_is() {
    let run = demo();
    let lines = run.stdout.lines().count();
    assert!(lines < 40, "{lines} lines:\n{}", run.stdout);
    // The per-frame log went into the kept folder, not to the terminal.
    let log = std::fs::read_to_string(run.folder.join("framewarden.log")).unwrap();
    let s = scenario();
    let frame_lines = log.lines().filter(|l| l.contains(" frame file=")).count();
    assert_eq!(frame_lines, s.wells().len() * s.time_points - 1, "{log}");
    assert!(!run.stdout.contains("frame file=") && !run.stderr.contains("frame file="));
    for kept in ["acquisition", "framewarden.db", "framewarden.log"] {
        let path = run.folder.join(kept);
        assert!(path.exists(), "{} missing", path.display());
        assert!(run.stdout.contains(&path.display().to_string()), "{kept}");
    }
}

#[test]
fn counts_diverge_by_dose() {
    let s = scenario();
    let rows = frames();
    let first_last = |well: &str| {
        let used: Vec<i64> = rows
            .iter()
            .filter(|r| r.well == well)
            .filter_map(|r| r.used)
            .collect();
        (used[0], *used.last().unwrap())
    };
    for t in &s.treatments {
        for well in &t.wells {
            let (first, last) = first_last(well);
            match t.growth_per_step {
                g if g > 1.0 => assert!(last > first, "{} {well}: {first} -> {last}", t.dose),
                g if g < 1.0 => assert!(last < first, "{} {well}: {first} -> {last}", t.dose),
                _ => assert!((last - first).abs() <= 1, "{} {well}", t.dose),
            }
        }
    }
    // The lowest-growth dose ends with a fraction of the vehicle's cells.
    let by_growth = |pick: fn(f64, f64) -> bool| {
        s.treatments
            .iter()
            .reduce(|a, b| {
                if pick(b.growth_per_step, a.growth_per_step) {
                    b
                } else {
                    a
                }
            })
            .unwrap()
    };
    let (grown, killed) = (by_growth(|b, a| b > a), by_growth(|b, a| b < a));
    for g in &grown.wells {
        for k in &killed.wells {
            let (g_last, k_last) = (first_last(g).1, first_last(k).1);
            assert!(g_last > 4 * k_last, "{g} ends {g_last}, {k} ends {k_last}");
        }
    }
}

#[test]
fn only_the_defocused_stretch_is_flagged_out_of_focus() {
    let s = scenario();
    let d = s.defocus.clone().unwrap();
    let flagged: BTreeSet<(String, usize)> = frames()
        .into_iter()
        .filter(|r| r.flags.contains("out_of_focus"))
        .map(|r| (r.well, r.time_point))
        .collect();
    let expected: BTreeSet<(String, usize)> =
        (d.from..=d.to).map(|t| (d.well.clone(), t)).collect();
    assert_eq!(flagged, expected);
}

#[test]
fn the_dimming_lamp_raises_the_background_condition_within_its_stretch() {
    let lamp = scenario().lamp.unwrap();
    let conn = db();
    let opened: Vec<(String, String)> = conn
        .prepare(
            "SELECT frames.time_point, alerts.message FROM alerts JOIN frames ON frames.id = alerts.frame_id
             WHERE alerts.condition = 'drift:background_level' ORDER BY alerts.opened_at_ms",
        )
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    assert_eq!(opened.len(), 1, "{opened:?}");
    let t: usize = opened[0].0.parse().unwrap();
    assert!(
        t >= lamp.from,
        "opened at t{t}, before the lamp dims at t{}",
        lamp.from
    );
    assert!(opened[0].1.contains("drifting down"), "{}", opened[0].1);
    assert!(demo().stdout.contains("drift:background_level"));
}

#[test]
fn the_recount_of_unevenly_lit_frames_changes_the_count_towards_the_truth() {
    let s = scenario();
    let u = s.uneven.clone().unwrap();
    let rows = frames();
    let recounted: Vec<&Row> = rows.iter().filter(|r| r.recount.is_some()).collect();
    let changed: Vec<&&Row> = recounted
        .iter()
        .filter(|r| r.used == r.recount && r.recount != r.raw)
        .collect();
    assert!(!changed.is_empty(), "{recounted:?}");
    let stretch: BTreeSet<(String, usize)> = rows
        .iter()
        .filter(|r| r.status == "done" && (u.from..=u.to).contains(&r.time_point))
        .map(|r| (r.well.clone(), r.time_point))
        .collect();
    let got: BTreeSet<(String, usize)> = recounted
        .iter()
        .map(|r| (r.well.clone(), r.time_point))
        .collect();
    assert_eq!(got, stretch, "recounted exactly the unevenly lit frames");
    // Flattening finds the faint nuclei on the dim side: over the stretch the
    // recount is nearer the drawn counts than the first segmentation.
    let miss = |count: fn(&Row) -> Option<i64>| -> i64 {
        recounted
            .iter()
            .map(|r| (count(r).unwrap() - drawn(&s, &r.well, r.time_point)).abs())
            .sum()
    };
    let (raw_miss, recount_miss) = (miss(|r| r.raw), miss(|r| r.recount));
    assert!(recount_miss < raw_miss, "{recount_miss} vs {raw_miss}");
}

#[test]
fn the_cut_off_file_fails_with_its_reason() {
    let s = scenario();
    let c = s.corrupt.clone().unwrap();
    let rows = frames();
    assert_eq!(rows.len(), s.wells().len() * s.time_points);
    let failed: Vec<&Row> = rows.iter().filter(|r| r.status == "failed").collect();
    assert_eq!(failed.len(), 1, "{failed:?}");
    assert_eq!(
        (failed[0].well.as_str(), failed[0].time_point),
        (c.well.as_str(), c.time_point)
    );
    assert!(failed[0]
        .error
        .as_deref()
        .is_some_and(|e| e.contains("still incomplete")));
}
