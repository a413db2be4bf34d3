//! `framewarden reprocess` on the real binary: `watch` records a small night
//! of two wells (synthetic frames of known objects), then the night is
//! analysed again with a size filter and with another threshold method. The
//! comparison it prints is checked against Python's sqlite3 reading the
//! database's tables directly (tests/reference/check_reprocess.py); the
//! watch service's analysis stays byte for byte; `status`, `export` and
//! `report` show analysis 1 or the newest; a deleted frame is named as not
//! re-read; a `--with` key outside [segment]/[measure]/[quality] is refused.

#[allow(dead_code)]
mod common;
// Shared with the watch tests; not every helper is used here.
#[allow(dead_code)]
mod watch_support;

use std::collections::BTreeMap;
use std::path::Path;
use std::process::{Command, Output};
use std::time::Duration;

use framewarden::synth::{self, SceneSpec};
use rusqlite::{Connection, OpenFlags};
use watch_support::{Bench, BIN};

const LONG: Duration = Duration::from_secs(120);

fn run(bench: &Bench, args: &[&str]) -> Output {
    Command::new(BIN)
        .args(args)
        .arg("--config")
        .arg(&bench.config)
        .output()
        .unwrap()
}

fn ok(out: Output) -> String {
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

fn status_json(bench: &Bench, extra: &[&str]) -> serde_json::Value {
    let mut args = vec!["status", "--json"];
    args.extend(extra);
    serde_json::from_str(&ok(run(bench, &args))).unwrap()
}

/// Every row of the watch service's tables, as text: what must not change.
fn watch_tables(db: &Path) -> String {
    let conn = Connection::open_with_flags(db, OpenFlags::SQLITE_OPEN_READ_ONLY).unwrap();
    let mut out = String::new();
    for table in [
        "runs",
        "frames",
        "objects",
        "flags",
        "alerts",
        "alert_positions",
    ] {
        let mut stmt = conn
            .prepare(&format!("SELECT * FROM {table} ORDER BY 1, 2, 3"))
            .unwrap();
        let n = stmt.column_count();
        let mut rows = stmt.query([]).unwrap();
        while let Some(r) = rows.next().unwrap() {
            let values: Vec<String> = (0..n)
                .map(|i| format!("{:?}", r.get::<_, rusqlite::types::Value>(i).unwrap()))
                .collect();
            out.push_str(&format!("{table}: {}\n", values.join(" | ")));
        }
    }
    out
}

/// One position's line of the comparison: frames, before, after, gained, lost.
type Line = (u64, i64, i64, BTreeMap<String, u64>, BTreeMap<String, u64>);

/// The comparison's position lines, parsed back.
fn position_lines(text: &str, positions: &[&str]) -> BTreeMap<String, Line> {
    let flags = |s: &str| -> BTreeMap<String, u64> {
        if s.trim() == "-" {
            return BTreeMap::new();
        }
        s.split(", ")
            .map(|f| {
                let (name, n) = f.trim().rsplit_once(' ').unwrap();
                (name.to_string(), n.parse().unwrap())
            })
            .collect()
    };
    let mut out = BTreeMap::new();
    for line in text.lines() {
        let Some(p) = positions
            .iter()
            .find(|p| line.starts_with(&format!("{p} ")))
        else {
            continue;
        };
        let words: Vec<&str> = line[p.len()..].split_whitespace().collect();
        assert_eq!(words[2], "->", "{line}");
        let (_, tail) = line.split_once("gained: ").unwrap();
        let (gained, lost) = tail.split_once("; lost: ").unwrap();
        out.insert(
            p.to_string(),
            (
                words[0].parse().unwrap(),
                words[1].parse().unwrap(),
                words[3].parse().unwrap(),
                flags(gained),
                flags(lost),
            ),
        );
    }
    out
}

/// What Python's sqlite3 says the comparison of analysis `number` must be.
fn expected(bench: &Bench, number: i64) -> serde_json::Value {
    let dir = bench.dir.path();
    std::fs::write(dir.join("analysis.txt"), number.to_string()).unwrap();
    common::run_reference_script("check_reprocess.py", dir);
    serde_json::from_str(&std::fs::read_to_string(dir.join("expected.json")).unwrap()).unwrap()
}

fn check_against_python(bench: &Bench, text: &str, number: i64, positions: &[&str]) {
    let want = expected(bench, number);
    let got = position_lines(text, positions);
    for p in positions {
        let w = &want["positions"][*p];
        let (frames, before, after, gained, lost) = &got[*p];
        let map = |v: &serde_json::Value| -> BTreeMap<String, u64> {
            v.as_object()
                .unwrap()
                .iter()
                .map(|(k, n)| (k.clone(), n.as_u64().unwrap()))
                .collect()
        };
        assert_eq!(
            (*frames, *before, *after, gained.clone(), lost.clone()),
            (
                w["frames"].as_u64().unwrap(),
                w["before"].as_i64().unwrap(),
                w["after"].as_i64().unwrap(),
                map(&w["gained"]),
                map(&w["lost"])
            ),
            "position {p}: the printed comparison against Python's sqlite3\n{text}"
        );
    }
    assert!(
        text.contains(&format!("{} frames re-read", want["reread"])),
        "{text}"
    );
}

#[test]
fn a_night_is_reprocessed_as_new_analyses_and_the_original_stays() {
    let mut bench = Bench::new(concat!(
        "name_pattern = '^(?P<well>[A-Z]\\d{2})_t(?P<time_point>\\d+)\\.tif$'\n",
        "[quality]\nbaseline_frames = 3\n",
    ));
    bench.start();
    let wells = ["A01", "B01"];
    let mut n = 0;
    for t in 0..5u64 {
        for (w, well) in wells.iter().enumerate() {
            // Objects of radius 3 to 9 px (areas about 28 to 250 px).
            let spec = SceneSpec {
                width: 160,
                height: 160,
                object_count: 12 + 2 * w,
                radius_px: (3.0, 9.0),
                seed: 10 * t + w as u64 + 1,
                ..SceneSpec::default()
            };
            let frame = synth::generate(&spec).unwrap().frame;
            let staged = bench.dir.path().join("staged.tif");
            synth::write_tiff(&staged, &frame).unwrap();
            std::fs::rename(&staged, bench.acq.join(format!("{well}_t{t:04}.tif"))).unwrap();
            n += 1;
            bench.wait_finished(n, LONG);
        }
    }
    bench.signal("TERM");
    assert_eq!(bench.wait_exit(LONG), Some(0));
    let original = watch_tables(&bench.db);
    let first = status_json(&bench, &[]);
    assert_eq!(
        (&first["run"]["analysis"], &first["run"]["analyses"]),
        (&1.into(), &1.into())
    );

    // A key outside [segment]/[measure]/[quality] is refused by name, and
    // nothing is recorded.
    let bad = bench.dir.path().join("bad.toml");
    std::fs::write(
        &bad,
        "[segment]\nmin_area_px = 80\n[watch]\nsettle_ms = 5\n",
    )
    .unwrap();
    let out = run(&bench, &["reprocess", "--with", bad.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(
        err.contains("`watch.settle_ms`") && err.contains("bad.toml"),
        "{err}"
    );
    // An unknown key inside [segment] is named too.
    std::fs::write(&bad, "[segment]\nmin_area = 80\n").unwrap();
    let out = run(&bench, &["reprocess", "--with", bad.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("min_area"), "{err}");
    assert_eq!(status_json(&bench, &[])["run"]["analyses"], 1);

    // The last frame of B01 is gone by the morning.
    let gone = bench.acq.join("B01_t0004.tif");
    std::fs::remove_file(&gone).unwrap();
    let with = bench.dir.path().join("bigger.toml");
    std::fs::write(&with, "[segment]\nmin_area_px = 80\n").unwrap();
    let text = ok(run(
        &bench,
        &["reprocess", "--with", with.to_str().unwrap()],
    ));
    assert!(text.contains("analysis 2 recorded"), "{text}");
    check_against_python(&bench, &text, 2, &wells);
    assert!(
        text.contains("not re-read (1):")
            && text.contains(&format!("{}: cannot be read:", gone.display())),
        "{text}"
    );
    let got = position_lines(&text, &wells);
    assert!(
        wells.iter().all(|w| got[*w].2 < got[*w].1),
        "a larger minimum area leaves fewer objects: {text}"
    );
    assert_eq!(
        watch_tables(&bench.db),
        original,
        "the watch service's analysis is untouched"
    );

    // status: the newest by default, analysis 1 on request, and says which.
    let newest = status_json(&bench, &[]);
    assert_eq!(
        (&newest["run"]["analysis"], &newest["run"]["analyses"]),
        (&2.into(), &2.into())
    );
    let want = expected(&bench, 2);
    let after_total: i64 = wells
        .iter()
        .map(|w| want["positions"][*w]["after"].as_i64().unwrap())
        .sum();
    assert_eq!(newest["objects_total"], after_total);
    assert_eq!(
        (&newest["frames_done"], &newest["frames_failed"]),
        (&9.into(), &1.into())
    );
    let one = status_json(&bench, &["--analysis", "1"]);
    assert_eq!(one["run"]["analysis"], 1);
    assert_eq!(one["objects_total"], first["objects_total"]);
    assert_eq!(one["positions"], first["positions"]);
    assert_ne!(one["objects_total"], newest["objects_total"]);
    let shown = ok(run(&bench, &["status"]));
    assert!(shown.contains("analysis 2 of 2 (a reprocess"), "{shown}");
    let out = run(&bench, &["status", "--analysis", "7"]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        !out.status.success() && err.contains("no analysis 7"),
        "{err}"
    );

    // export: the objects of the analysis asked for.
    let csv = ok(run(
        &bench,
        &["export", "--table", "objects", "--analysis", "2"],
    ));
    assert_eq!(
        csv.lines().count() as u64 - 1,
        want["objects_after"].as_u64().unwrap()
    );
    let csv = ok(run(
        &bench,
        &["export", "--table", "frames", "--analysis", "1"],
    ));
    assert_eq!(csv.lines().count() - 1, 10);

    // report: the newest analysis's numbers.
    let page = bench.dir.path().join("report.html");
    ok(run(&bench, &["report", "-o", page.to_str().unwrap()]));
    let html = std::fs::read_to_string(&page).unwrap();
    assert!(
        html.contains("analysis 2 of 2"),
        "the report says which analysis"
    );

    // Another threshold method: analysis 3, compared with the first again.
    std::fs::write(&with, "[segment]\nmethod = \"triangle\"\n").unwrap();
    let text = ok(run(
        &bench,
        &["reprocess", "--with", with.to_str().unwrap()],
    ));
    assert!(text.contains("analysis 3 recorded"), "{text}");
    check_against_python(&bench, &text, 3, &wells);
    assert_eq!(status_json(&bench, &[])["run"]["analysis"], 3);
    assert_eq!(watch_tables(&bench.db), original);
}
