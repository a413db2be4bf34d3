//! The watch service end to end: the real binary on temp folders with real TIFF
//! files, real inotify events, and the real SQLite file read back.
//!
//! Each test states a promise of `framewarden watch` (exactly once, never early,
//! nothing lost) and checks it on the rows; no test asserts a time.

#[allow(dead_code)]
mod watch_support;

use std::collections::HashMap;
use std::io::Write;
use std::process::Command;
use std::time::{Duration, Instant};

use watch_support::{tiff_bytes, wait_for, Bench, BIN};

const LONG: Duration = Duration::from_secs(120);

/// Every path appears in exactly one row, and that row is done.
fn assert_each_done_once(rows: &[watch_support::Row], expected: usize) {
    let mut per_path: HashMap<&str, usize> = HashMap::new();
    for r in rows {
        *per_path.entry(r.path.as_str()).or_default() += 1;
        assert_eq!(r.status, "done", "{r:?}");
    }
    assert_eq!(per_path.len(), expected, "distinct files");
    assert!(
        per_path.values().all(|&n| n == 1),
        "a file recorded twice: {per_path:?}"
    );
}

#[test]
fn a_file_written_in_slow_chunks_is_analyzed_once_and_complete() {
    let mut bench = Bench::new("");
    bench.start();
    let (bytes, truth) = tiff_bytes(11, 192, 9);
    let path = bench.acq.join("B02_t0001.tif");
    let mut file = std::fs::File::create(&path).unwrap();
    // Pauses both shorter and longer than the settle time: the long ones make
    // the file look complete by size and mtime, so only the full decode (a short
    // read means "not yet") keeps it from being analyzed early.
    let chunks: Vec<&[u8]> = bytes.chunks(bytes.len() / 6 + 1).collect();
    for (i, chunk) in chunks.iter().enumerate() {
        file.write_all(chunk).unwrap();
        file.flush().unwrap();
        std::thread::sleep(Duration::from_millis(if i % 2 == 0 { 120 } else { 450 }));
    }
    drop(file);
    let rows = bench.wait_finished(1, LONG);
    assert_each_done_once(&rows, 1);
    assert_eq!(
        rows[0].size_bytes as usize,
        bytes.len(),
        "analyzed only when complete"
    );
    assert_eq!(rows[0].object_count, Some(truth as i64));
    assert_eq!(rows[0].version, 1);
}

#[test]
fn temporary_name_then_rename_gives_one_row_under_the_final_name() {
    let mut bench = Bench::new("");
    bench.start();
    let (bytes, truth) = tiff_bytes(12, 128, 5);
    for i in 0..5 {
        let tmp = bench.acq.join(format!("C03_t{i:04}.tif.part"));
        let mut file = std::fs::File::create(&tmp).unwrap();
        for chunk in bytes.chunks(bytes.len() / 3 + 1) {
            file.write_all(chunk).unwrap();
            std::thread::sleep(Duration::from_millis(30));
        }
        drop(file);
        std::fs::rename(&tmp, bench.acq.join(format!("C03_t{i:04}.tif"))).unwrap();
    }
    let rows = bench.wait_finished(5, LONG);
    assert_each_done_once(&rows, 5);
    assert!(
        rows.iter().all(|r| r.path.ends_with(".tif")),
        "temporary names are never recorded: {rows:?}"
    );
    assert!(rows.iter().all(|r| r.object_count == Some(truth as i64)));
}

#[test]
fn a_watched_folder_deleted_and_made_again_is_watched_again() {
    // The rescan is an hour away: only events set up again on the new folder
    // can bring the file written into it.
    let mut bench = Bench::new("rescan_interval_s = 3600");
    bench.start();
    let (bytes, truth) = tiff_bytes(15, 96, 4);
    bench.write("E05_t0001.tif", &bytes);
    bench.wait_finished(1, LONG);
    std::fs::remove_dir_all(&bench.acq).unwrap();
    wait_for("the folder's loss to be logged", LONG, || {
        bench.logs().contains("has gone; watching for its return")
    });
    std::fs::create_dir(&bench.acq).unwrap();
    wait_for("the folder's return to be logged", LONG, || {
        bench
            .logs()
            .contains("is back; its events are set up again")
    });
    bench.write("E05_t0002.tif", &bytes);
    let rows = bench.wait_finished(2, Duration::from_secs(30));
    let new = rows
        .iter()
        .find(|r| r.path.ends_with("E05_t0002.tif"))
        .unwrap();
    assert_eq!(new.status, "done", "{new:?}");
    assert_eq!(new.object_count, Some(truth as i64));
    bench.signal("TERM");
    assert_eq!(bench.wait_exit(LONG), Some(0));
}

#[test]
fn a_burst_of_a_thousand_files_is_recorded_once_each() {
    let mut bench = Bench::new("queue_capacity = 16");
    bench.start();
    let (bytes, _) = tiff_bytes(13, 32, 1);
    for i in 0..1000 {
        bench.write(&format!("D04_t{i:04}.tif"), &bytes);
    }
    let rows = bench.wait_finished(1000, LONG);
    assert_each_done_once(&rows, 1000);
}

#[test]
fn kill_nine_mid_run_then_restart_records_every_file_exactly_once() {
    let mut bench = Bench::new("");
    bench.start();
    let (bytes, _) = tiff_bytes(14, 96, 4);
    for i in 0..150 {
        bench.write(&format!("E05_t{i:04}.tif"), &bytes);
    }
    // Kill while frames are in flight: some rows done, some maybe queued.
    wait_for("some frames recorded", LONG, || {
        bench.rows().iter().any(|r| r.status == "done")
    });
    bench.kill_hard();
    // Files written while the service is down are found by the catch-up scan.
    for i in 150..200 {
        bench.write(&format!("E05_t{i:04}.tif"), &bytes);
    }
    bench.start();
    let rows = bench.wait_finished(200, LONG);
    assert_each_done_once(&rows, 200);
    // The restart continued the same run.
    let conn = rusqlite::Connection::open(&bench.db).unwrap();
    let runs: i64 = conn
        .query_row("SELECT count(*) FROM runs", [], |r| r.get(0))
        .unwrap();
    assert_eq!(runs, 1);
}

#[test]
fn status_polled_while_watch_ingests_never_fails() {
    let mut bench = Bench::new("");
    bench.start();
    let (bytes, _) = tiff_bytes(15, 64, 3);
    let writer = {
        let acq = bench.acq.clone();
        std::thread::spawn(move || {
            for i in 0..400 {
                std::fs::write(acq.join(format!("F06_t{i:04}.tif")), &bytes).unwrap();
                if i % 50 == 0 {
                    std::thread::sleep(Duration::from_millis(100));
                }
            }
        })
    };
    let mut polls = 0;
    let mut done = 0;
    while done < 400 {
        let out = Command::new(BIN)
            .args(["status", "--json", "--db"])
            .arg(&bench.db)
            .output()
            .unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(out.status.success(), "status failed: {stderr}");
        assert!(!stderr.contains("locked"), "{stderr}");
        let doc: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
        for key in [
            "frames_seen",
            "frames_done",
            "frames_queued",
            "frames_failed",
            "objects_total",
            "objects_size_filtered",
            "last_frame_at",
        ] {
            assert!(doc.get(key).is_some(), "missing {key} in {doc}");
        }
        assert!(doc["frames"].is_array());
        done = doc["frames_done"].as_u64().unwrap();
        polls += 1;
        assert!(
            polls < 5000,
            "ingest did not finish; logs:\n{}",
            bench.logs()
        );
    }
    writer.join().unwrap();
    assert!(polls > 1, "status was polled while ingesting");
    let doc: serde_json::Value = serde_json::from_slice(
        &Command::new(BIN)
            .args(["status", "--json", "--db"])
            .arg(&bench.db)
            .output()
            .unwrap()
            .stdout,
    )
    .unwrap();
    assert_eq!(doc["frames_seen"], 400);
    assert_eq!(doc["frames_queued"], 0);
    let recent = &doc["frames"][0];
    for key in ["file", "object_count", "threshold", "status", "error"] {
        assert!(recent.get(key).is_some(), "missing {key} in {recent}");
    }
}

#[test]
fn sigterm_exits_zero_and_loses_nothing() {
    let mut bench = Bench::new("");
    bench.start();
    let (bytes, _) = tiff_bytes(16, 128, 6);
    for i in 0..120 {
        bench.write(&format!("G07_t{i:04}.tif"), &bytes);
    }
    wait_for("some frames recorded", LONG, || {
        bench.rows().iter().any(|r| r.status == "done")
    });
    bench.signal("TERM");
    assert_eq!(
        bench.wait_exit(Duration::from_secs(60)),
        Some(0),
        "logs:\n{}",
        bench.logs()
    );
    // Whatever was in flight is either recorded or released (left queued):
    // the next start finishes exactly those, nothing twice.
    let after_stop = bench.rows();
    assert!(
        after_stop
            .iter()
            .all(|r| r.status == "done" || r.status == "queued"),
        "{after_stop:?}"
    );
    bench.start();
    let rows = bench.wait_finished(120, LONG);
    assert_each_done_once(&rows, 120);
    bench.signal("INT");
    assert_eq!(bench.wait_exit(Duration::from_secs(60)), Some(0));
}

#[test]
fn corrupt_and_truncated_files_get_error_rows_and_the_service_goes_on() {
    let mut bench = Bench::new("retry_limit = 2");
    bench.start();
    let (bytes, truth) = tiff_bytes(17, 128, 7);
    bench.write(
        "H08_t0001_garbage.tif",
        b"this is not an image, just bytes that say so",
    );
    bench.write("H08_t0002_truncated.tif", &bytes[..bytes.len() / 2]);
    bench.write("H08_t0004_good.tif", &bytes);
    let rows = bench.wait_finished(3, LONG);
    let by_name = |needle: &str| {
        rows.iter()
            .find(|r| r.path.contains(needle))
            .unwrap_or_else(|| panic!("{needle}: {rows:?}"))
    };
    for bad in ["garbage", "truncated"] {
        let r = by_name(bad);
        assert_eq!(r.status, "failed", "{r:?}");
        assert!(r.error.as_deref().is_some_and(|e| !e.is_empty()), "{r:?}");
    }
    assert!(
        by_name("truncated")
            .error
            .as_deref()
            .unwrap()
            .contains("incomplete"),
        "{rows:?}"
    );
    assert!(
        by_name("truncated").attempts > 1,
        "a short read is retried before it is an error"
    );
    let good = by_name("good");
    assert_eq!(
        (good.status.as_str(), good.object_count),
        ("done", Some(truth as i64))
    );
    // The failures are in `status` with their reasons.
    let out = Command::new(BIN)
        .args(["status", "--db"])
        .arg(&bench.db)
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("failures:") && text.contains("garbage"),
        "{text}"
    );
}

#[test]
fn a_rewritten_file_is_a_new_version_and_an_unchanged_one_is_never_redone() {
    let mut bench = Bench::new("");
    bench.start();
    let (first, _) = tiff_bytes(18, 96, 3);
    let (second, truth2) = tiff_bytes(19, 128, 5);
    let path = bench.write("J09_t0001.tif", &first);
    bench.wait_finished(1, LONG);
    bench.stop();
    // Unchanged across a restart: the catch-up scan skips it.
    bench.start();
    std::fs::write(&path, &second).unwrap();
    let rows = bench.wait_finished(2, LONG);
    assert_eq!(rows.len(), 2, "{rows:?}");
    assert_eq!(
        rows.iter().map(|r| r.version).collect::<Vec<_>>(),
        vec![1, 2]
    );
    assert_eq!(rows[1].object_count, Some(truth2 as i64));
}

#[test]
fn status_explains_a_missing_or_foreign_database() {
    let dir = tempfile::tempdir().unwrap();
    let missing = dir.path().join("nowhere.db");
    let out = Command::new(BIN)
        .args(["status", "--db"])
        .arg(&missing)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        stderr.contains("no database at") && !stderr.contains("panicked"),
        "{stderr}"
    );

    let foreign = dir.path().join("other.db");
    rusqlite::Connection::open(&foreign)
        .unwrap()
        .execute_batch("CREATE TABLE t(x)")
        .unwrap();
    let out = Command::new(BIN)
        .args(["status", "--json", "--db"])
        .arg(&foreign)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        stderr.contains("not a framewarden database") && !stderr.contains("panicked"),
        "{stderr}"
    );
}

#[test]
fn tells_systemd_it_is_ready_feeds_the_watchdog_and_says_stopping() {
    use std::os::unix::net::UnixDatagram;
    let mut bench = Bench::new("");
    let socket_path = bench.dir.path().join("notify.sock");
    let socket = UnixDatagram::bind(&socket_path).unwrap();
    socket
        .set_read_timeout(Some(Duration::from_secs(30)))
        .unwrap();
    bench.start_with_env(&[
        ("NOTIFY_SOCKET", socket_path.to_str().unwrap()),
        ("WATCHDOG_USEC", "200000"),
    ]);
    let mut seen = Vec::new();
    let mut buf = [0u8; 512];
    let mut receive_until = |needle: &str, seen: &mut Vec<String>| {
        while !seen.iter().any(|m| m.contains(needle)) {
            let n = socket
                .recv(&mut buf)
                .unwrap_or_else(|e| panic!("no {needle} from the service ({e}); got {seen:?}"));
            seen.push(String::from_utf8_lossy(&buf[..n]).into_owned());
        }
    };
    receive_until("READY=1", &mut seen);
    // Idle (nothing outstanding) counts as healthy: the watchdog is fed.
    receive_until("WATCHDOG=1", &mut seen);
    bench.signal("TERM");
    receive_until("STOPPING=1", &mut seen);
    assert_eq!(bench.wait_exit(Duration::from_secs(60)), Some(0));
}

#[test]
fn a_stuck_writer_starves_the_watchdog_and_nothing_is_lost_once_it_moves() {
    use std::os::unix::net::UnixDatagram;
    // A tiny queue, so that a writer that cannot commit soon holds up the
    // scheduler and the worker as well.
    let mut bench = Bench::new("queue_capacity = 1\nworkers = 1\nsettle_ms = 100");
    let socket_path = bench.dir.path().join("notify.sock");
    let socket = UnixDatagram::bind(&socket_path).unwrap();
    bench.start_with_env(&[
        ("NOTIFY_SOCKET", socket_path.to_str().unwrap()),
        ("WATCHDOG_USEC", "200000"),
    ]);
    let mut buf = [0u8; 512];
    // Messages that arrive within `window`.
    let mut messages = |window: Duration| -> Vec<String> {
        let end = Instant::now() + window;
        let mut got = Vec::new();
        while let Some(left) = end.checked_duration_since(Instant::now()) {
            socket
                .set_read_timeout(Some(left.max(Duration::from_millis(1))))
                .unwrap();
            match socket.recv(&mut buf) {
                Ok(n) => got.push(String::from_utf8_lossy(&buf[..n]).into_owned()),
                Err(_) => break,
            }
        }
        got
    };
    let fed = |m: &[String]| m.iter().any(|m| m.contains("WATCHDOG=1"));
    assert!(fed(&messages(Duration::from_secs(5))), "fed while idle");

    // Another connection takes the write lock: the writer waits on it (its
    // busy timeout is 10 s) exactly as a stuck writer would.
    let locker = rusqlite::Connection::open(&bench.db).unwrap();
    locker.busy_timeout(Duration::from_secs(10)).unwrap();
    locker.execute_batch("BEGIN IMMEDIATE").unwrap();
    let (bytes, truth) = tiff_bytes(31, 96, 3);
    for i in 0..12 {
        bench.write(&format!("M01_t{i:04}.tif"), &bytes);
    }
    wait_for("the watchdog to go hungry", LONG, || {
        bench.logs().contains("with work outstanding")
    });
    // Once the queues are full nothing moves (a hungry look may also come a
    // little earlier, from a slow moment): after a second, no feed at all.
    std::thread::sleep(Duration::from_secs(1));
    messages(Duration::from_millis(200));
    let starved = messages(Duration::from_millis(1500));
    assert!(!fed(&starved), "fed while stuck: {starved:?}");

    locker.execute_batch("ROLLBACK").unwrap();
    drop(locker);
    let rows = bench.wait_finished(12, LONG);
    assert_each_done_once(&rows, 12);
    assert!(rows.iter().all(|r| r.object_count == Some(truth as i64)));
    assert!(
        fed(&messages(Duration::from_secs(5))),
        "fed again once the pipeline moves"
    );
    bench.stop();
}

#[test]
fn a_stop_held_up_by_a_locked_database_keeps_its_bound_and_a_restart_loses_nothing() {
    let mut bench =
        Bench::new("queue_capacity = 1\nworkers = 1\nsettle_ms = 100\nshutdown_timeout_s = 2");
    bench.start();
    // Another connection holds the write lock through the stop.
    let locker = rusqlite::Connection::open(&bench.db).unwrap();
    locker.busy_timeout(Duration::from_secs(10)).unwrap();
    locker.execute_batch("BEGIN IMMEDIATE").unwrap();
    let (bytes, truth) = tiff_bytes(32, 96, 3);
    for i in 0..8 {
        bench.write(&format!("N01_t{i:04}.tif"), &bytes);
    }
    // Settled (100 ms), analyzed, and stuck at the store.
    std::thread::sleep(Duration::from_millis(1500));
    let asked = Instant::now();
    bench.signal("TERM");
    // The writer cannot finish; the stop gives up at its 2 s bound instead of
    // waiting for it (its busy timeout alone is 10 s).
    assert_eq!(bench.wait_exit(Duration::from_secs(60)), Some(0));
    let took = asked.elapsed();
    assert!(took < Duration::from_secs(8), "stopped after {took:?}");
    assert!(
        bench.logs().contains("shutdown exceeded 2 s"),
        "{}",
        bench.logs()
    );
    locker.execute_batch("ROLLBACK").unwrap();
    drop(locker);
    // The next start's catch-up redoes whatever was not committed: each file once.
    bench.start();
    let rows = bench.wait_finished(8, LONG);
    assert_each_done_once(&rows, 8);
    assert!(rows.iter().all(|r| r.object_count == Some(truth as i64)));
    bench.stop();
}

#[test]
fn a_second_service_on_the_same_database_is_refused() {
    let mut bench = Bench::new("");
    bench.start();
    let second = Command::new(BIN)
        .args(["watch", "--config"])
        .arg(&bench.config)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&second.stderr);
    assert_eq!(second.status.code(), Some(1), "{stderr}");
    assert!(
        stderr.contains("another framewarden watch is recording into")
            && stderr.contains("fw.db")
            && !stderr.contains("panicked"),
        "{stderr}"
    );
    // The same file by another name (a symbolic link, a path through a
    // linked folder) is the same database: refused too.
    let link = bench.dir.path().join("link.db");
    std::os::unix::fs::symlink(&bench.db, &link).unwrap();
    let linked_folder = bench.dir.path().join("linked");
    std::os::unix::fs::symlink(bench.dir.path(), &linked_folder).unwrap();
    for other in [link, linked_folder.join("fw.db")] {
        let mut child = Command::new(BIN)
            .args(["watch", "--config"])
            .arg(&bench.config)
            .arg("--db")
            .arg(&other)
            .stderr(std::process::Stdio::piped())
            .spawn()
            .unwrap();
        // A service that was not refused keeps running: stop it and fail.
        let deadline = std::time::Instant::now() + Duration::from_secs(20);
        while child.try_wait().unwrap().is_none() {
            if std::time::Instant::now() > deadline {
                child.kill().unwrap();
                child.wait().unwrap();
                panic!(
                    "{}: a second service started on the same database",
                    other.display()
                );
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        let by_link = child.wait_with_output().unwrap();
        let stderr = String::from_utf8_lossy(&by_link.stderr);
        assert_eq!(
            by_link.status.code(),
            Some(1),
            "{}: {stderr}",
            other.display()
        );
        assert!(
            stderr.contains("another framewarden watch is recording into"),
            "{}: {stderr}",
            other.display()
        );
    }
    // The first one is undisturbed and, once stopped, frees the database.
    let (bytes, truth) = tiff_bytes(33, 96, 3);
    bench.write("P01_t0000.tif", &bytes);
    let rows = bench.wait_finished(1, LONG);
    assert_eq!(rows[0].object_count, Some(truth as i64));
    bench.stop();
    bench.start();
    bench.stop();
}

#[test]
fn a_folder_moved_in_with_files_already_inside_is_scanned() {
    // No periodic rescan within the test: only the folder's own event can find them.
    let mut bench = Bench::new("rescan_interval_s = 3600");
    bench.start();
    let (bytes, _) = tiff_bytes(20, 64, 2);
    // Prepared outside the watched tree, then moved in whole: its files get no
    // events of their own, only the folder does.
    let outside = bench.dir.path().join("plate-2");
    std::fs::create_dir_all(outside.join("site-1")).unwrap();
    for i in 0..6 {
        std::fs::write(
            outside.join("site-1").join(format!("K10_t{i:04}.tif")),
            &bytes,
        )
        .unwrap();
    }
    std::fs::rename(&outside, bench.acq.join("plate-2")).unwrap();
    let rows = bench.wait_finished(6, LONG);
    assert_each_done_once(&rows, 6);
    assert!(
        rows.iter().all(|r| r.path.contains("/plate-2/site-1/")),
        "{rows:?}"
    );
}

#[test]
fn poll_mode_records_files_like_native_mode() {
    let mut bench = Bench::new("mode = \"poll\"\npoll_interval_ms = 200");
    bench.start();
    let (bytes, truth) = tiff_bytes(21, 96, 4);
    for i in 0..8 {
        let path = bench.acq.join(format!("L11_t{i:04}.tif"));
        let mut file = std::fs::File::create(&path).unwrap();
        for chunk in bytes.chunks(bytes.len() / 2 + 1) {
            file.write_all(chunk).unwrap();
            std::thread::sleep(Duration::from_millis(50));
        }
    }
    let rows = bench.wait_finished(8, LONG);
    assert_each_done_once(&rows, 8);
    assert!(rows
        .iter()
        .all(|r| r.object_count == Some(truth as i64) && r.size_bytes as usize == bytes.len()));
    assert!(
        bench.logs().contains("poll mode"),
        "the mode is logged:\n{}",
        bench.logs()
    );
}

#[test]
fn control_characters_in_file_names_are_escaped_in_the_log() {
    let mut bench = Bench::new("");
    bench.start();
    let (bytes, _) = tiff_bytes(34, 96, 3);
    bench.write("P02\n\u{1b}[31mred.tif", &bytes);
    bench.wait_finished(1, LONG);
    bench.stop();
    let logs = bench.logs();
    assert!(!logs.contains('\u{1b}'), "{logs:?}");
    // The frame's log line names the file, escaped, on one line.
    assert!(
        logs.lines()
            .any(|l| l.contains("P02\\n\\u{1b}[31mred.tif") && l.contains("frame")),
        "{logs}"
    );
}
