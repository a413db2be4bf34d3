//! Growing stacks (`[watch] stacks = true`) on the real binary: three stacks
//! written page by page by tifffile (a classic TIFF and a BigTIFF grown with
//! `append=True`, an OME-TIFF kept open by its writer) while the service is
//! killed with SIGKILL twice: once while the pages arrive, once while the
//! stacks are half written (the writer holds until the test lets it go). At
//! the end every page of every stack is exactly one row, done, counted once,
//! its time point the page, with the disc count skimage.measure.label gives
//! for that page (the writer script checks it). No time is asserted.

#[allow(dead_code)]
mod common;
// Shared with the watch tests; not every helper is used here.
#[allow(dead_code)]
mod watch_support;

use std::collections::HashMap;
use std::path::PathBuf;
use std::process::Command;
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};
use watch_support::{wait_for, Bench};

/// Pages per stack, and the page the writer holds at for the second kill.
const PAGES: usize = 30;
const HOLD_AT: usize = 18;
const STACKS: usize = 3;

/// One frame row of a stack's page.
#[derive(Debug)]
struct PageRow {
    file: String,
    page: Option<i64>,
    status: String,
    object_count: Option<i64>,
    time_point_index: Option<i64>,
    counted: bool,
}

fn page_rows(bench: &Bench) -> Vec<PageRow> {
    if !bench.db.exists() {
        return Vec::new();
    }
    let conn = Connection::open_with_flags(&bench.db, OpenFlags::SQLITE_OPEN_READ_ONLY).unwrap();
    conn.busy_timeout(Duration::from_secs(10)).unwrap();
    let Ok(mut stmt) = conn.prepare(
        "SELECT file, page, status, object_count, time_point_index,
                superseded_by IS NULL AND same_pixels_as IS NULL
         FROM frames ORDER BY id",
    ) else {
        return Vec::new(); // schema not created yet
    };
    stmt.query_map([], |r| {
        Ok(PageRow {
            file: r.get(0)?,
            page: r.get(1)?,
            status: r.get(2)?,
            object_count: r.get(3)?,
            time_point_index: r.get(4)?,
            counted: r.get(5)?,
        })
    })
    .unwrap()
    .collect::<Result<_, _>>()
    .unwrap()
}

fn done(bench: &Bench) -> usize {
    page_rows(bench)
        .iter()
        .filter(|r| r.status == "done")
        .count()
}

#[test]
fn growing_stacks_killed_twice_mid_way_end_with_every_page_recorded_once() {
    let mut bench = Bench::new("stacks = true\nworkers = 2");
    bench.start();
    let counts_path = bench.dir.path().join("counts.json");
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/write_stacks.py");
    let mut writer = Command::new(common::reference_python())
        .arg(&script)
        .arg(&bench.acq)
        .arg(&counts_path)
        .arg(PAGES.to_string())
        .arg("100")
        .arg(HOLD_AT.to_string())
        .spawn()
        .expect("the stack writer starts");

    // First kill while pages arrive.
    wait_for("a few pages recorded", Duration::from_secs(120), || {
        done(&bench) >= 2 * STACKS
    });
    bench.kill_hard();
    bench.start();
    // Second kill once the writer holds half-way: the stacks are surely
    // unfinished; the writer goes on while the service is down.
    wait_for(
        "the pages before the writer's hold recorded",
        Duration::from_secs(120),
        || done(&bench) >= HOLD_AT * STACKS,
    );
    bench.kill_hard();
    std::fs::write(counts_path.with_file_name("counts.json.go"), b"").unwrap();
    bench.start();
    let status = writer.wait().unwrap();
    assert!(status.success(), "the stack writer failed: {status}");

    wait_for("every page recorded", Duration::from_secs(120), || {
        let rows = page_rows(&bench);
        rows.iter().filter(|r| r.status != "queued").count() >= PAGES * STACKS
            && rows.iter().all(|r| r.status != "queued")
    });
    let rows = page_rows(&bench);
    let counts: HashMap<String, Vec<i64>> =
        serde_json::from_str(&std::fs::read_to_string(&counts_path).unwrap()).unwrap();
    let mut seen: HashMap<(String, i64), usize> = HashMap::new();
    let mut failures = Vec::new();
    for r in &rows {
        let name = PathBuf::from(&r.file)
            .file_name()
            .unwrap()
            .to_string_lossy()
            .into_owned();
        let Some(page) = r.page else {
            failures.push(format!("{name}: a row without a page: {r:?}"));
            continue;
        };
        *seen.entry((name.clone(), page)).or_default() += 1;
        let expected = counts[&name][page as usize];
        if r.status != "done" || !r.counted || r.object_count != Some(expected) {
            failures.push(format!(
                "{name} page {page}: expected done, counted, {expected} objects; got {r:?}"
            ));
        }
        if r.time_point_index != Some(page) {
            failures.push(format!(
                "{name} page {page}: time point {:?}",
                r.time_point_index
            ));
        }
    }
    for name in counts.keys() {
        for page in 0..PAGES as i64 {
            match seen.get(&(name.clone(), page)) {
                Some(1) => {}
                n => failures.push(format!("{name} page {page}: {n:?} rows, expected 1")),
            }
        }
    }
    common::check(failures, "pages of growing stacks after two kills");
    assert_eq!(rows.len(), PAGES * STACKS, "no other rows: {rows:?}");
}
