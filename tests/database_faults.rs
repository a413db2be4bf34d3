//! The database in trouble while the real binary records into it: its
//! volume full (a real tmpfs filled to the last byte), its file damaged
//! (pages overwritten with garbage), deleted or replaced (`rename`). Each
//! reaches a real file sink and a real command sink; a full volume is waited
//! out with nothing lost, a damaged, deleted or replaced file stops the
//! service with exit code 1 and a message naming the file and the cause.
//! The free-space check runs on a clock while frames keep coming.

// Shared with the watch tests; not every helper is used here.
#[allow(dead_code)]
mod watch_support;

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use watch_support::{tiff_bytes, Bench};

const LONG: Duration = Duration::from_secs(120);

/// A bench whose alerts go to a file sink and to a command sink
/// (`sh -c 'cat >> FILE'`: each event's JSON, from stdin, lands as a line).
fn bench_with_sinks(quality: &str) -> Bench {
    let bench = Bench::new("");
    let (file, command) = sink_files(&bench);
    let text = std::fs::read_to_string(&bench.config).unwrap();
    std::fs::write(
        &bench.config,
        format!(
            "{text}\n[quality]\n{quality}\n[alerts]\nfile = {}\ncommand = [\"/bin/sh\", \"-c\", \"cat >> '{}'\"]\n",
            toml_string(&file),
            command.display()
        ),
    )
    .unwrap();
    bench
}

/// `path` as a TOML basic string (quotes and backslashes escaped).
fn toml_string(path: &Path) -> String {
    toml::Value::String(path.to_string_lossy().into_owned()).to_string()
}

/// Makes `bench` record into the database `db` instead of `fw.db` beside
/// its config (before the first start).
fn database_at(bench: &mut Bench, db: &Path) {
    let text = std::fs::read_to_string(&bench.config).unwrap();
    let moved = text.replace(
        "database = \"fw.db\"",
        &format!("database = {}", toml_string(db)),
    );
    assert_ne!(moved, text, "the config names fw.db");
    std::fs::write(&bench.config, moved).unwrap();
    bench.db = db.to_path_buf();
}

/// Where the file sink and the command sink of [`bench_with_sinks`] write.
fn sink_files(bench: &Bench) -> (PathBuf, PathBuf) {
    (
        bench.dir.path().join("alerts.jsonl"),
        bench.dir.path().join("command-alerts.jsonl"),
    )
}

/// The events a sink wrote, one JSON object a line.
fn events(path: &Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(path)
        .unwrap_or_default()
        .lines()
        .filter_map(|l| serde_json::from_str(l).ok())
        .collect()
}

/// Whether both sinks received an event of `condition` in `state`.
fn both_sinks_got(bench: &Bench, condition: &str, state: &str) -> bool {
    let (file, command) = sink_files(bench);
    [file, command].iter().all(|sink| {
        events(sink)
            .iter()
            .any(|e| e["condition"] == condition && e["state"] == state)
    })
}

/// Waits until both sinks have an event of `condition` in `state`.
fn wait_for_alert(bench: &Bench, condition: &str, state: &str, limit: Duration) {
    let start = Instant::now();
    while !both_sinks_got(bench, condition, state) {
        assert!(
            start.elapsed() < limit,
            "no {state} {condition} in both sinks within {limit:?}; file sink: {:?}; logs:\n{}",
            events(&sink_files(bench).0),
            bench.logs()
        );
        std::thread::sleep(Duration::from_millis(100));
    }
}

/// Writes frame `i` (a small synthetic TIFF) into the acquisition folder.
fn put(bench: &Bench, i: u64) {
    let (bytes, _) = tiff_bytes(i + 1, 96, 6);
    bench.write(&format!("f{i:03}.tif"), &bytes);
}

/// A tmpfs of `size` mounted at `dir` for the guard's life (tests run as
/// root); unmounted when dropped.
struct Tmpfs {
    dir: PathBuf,
}

impl Tmpfs {
    fn mount(dir: &Path, size: &str) -> Tmpfs {
        std::fs::create_dir_all(dir).unwrap();
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "cannot mount a tmpfs at {} (this test needs root): {}",
            dir.display(),
            String::from_utf8_lossy(&out.stderr)
        );
        Tmpfs {
            dir: dir.to_path_buf(),
        }
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        // Lazy: the service may still hold files open if the test failed.
        let _ = Command::new("umount").arg("-l").arg(&self.dir).status();
    }
}

/// Fills the volume of `dir` to the last byte with one file; returns it.
fn fill(dir: &Path) -> PathBuf {
    let path = dir.join("filler");
    let mut file = std::fs::File::create(&path).unwrap();
    let chunk = vec![0u8; 4096];
    loop {
        match file.write(&chunk) {
            Ok(0) => break,
            Ok(_) => {}
            Err(e) if e.raw_os_error() == Some(28) => break, // ENOSPC
            Err(e) => panic!("filling {}: {e}", path.display()),
        }
    }
    // A last partial block, byte by byte.
    while file.write(&[0]).is_ok_and(|n| n == 1) {}
    assert_eq!(fs4::available_space(dir).unwrap(), 0, "the volume is full");
    path
}

/// One frame about every 0.8 s, so the writer is never idle for its 5 s
/// tick: the free-space check must still run, on its own clock. The limit
/// is above any disk (about 10^12 MiB).
#[test]
fn the_free_space_check_runs_while_frames_keep_coming() {
    let mut bench = bench_with_sinks("min_free_space_mib = 1000000000");
    bench.start();
    let watched = format!("low_disk_space:{}", bench.acq.display());
    let mut written = 0;
    while !both_sinks_got(&bench, &watched, "opened") {
        assert!(
            written < 25,
            "no {watched} alert while a frame came every 0.8 s for {written} frames; logs:\n{}",
            bench.logs()
        );
        put(&bench, written);
        written += 1;
        std::thread::sleep(Duration::from_millis(800));
    }
    bench.wait_finished(written as usize, LONG);
    bench.stop();
}

/// The database's volume (a 4 MiB tmpfs) filled to its last byte while the
/// service records: the failed writes open a `database_full` alert and the
/// volume's free-space check a `low_disk_space` one, though neither can be
/// stored yet; both reach the sinks. Once space is freed every frame is
/// recorded once, the alert recovers, and both alerts are stored.
#[test]
fn a_full_database_volume_is_announced_waited_out_and_nothing_is_lost() {
    let mut bench = bench_with_sinks("min_free_space_mib = 1");
    let volume = Tmpfs::mount(&bench.dir.path().join("dbvol"), "4m");
    database_at(&mut bench, &volume.dir.join("fw.db"));
    bench.start();
    for i in 0..2 {
        put(&bench, i);
    }
    bench.wait_finished(2, LONG);
    let filler = fill(&volume.dir);
    for i in 2..6 {
        put(&bench, i);
    }
    // The volume's free-space check, then the failed writes: neither alert
    // can be stored now, both are announced.
    let low = format!("low_disk_space:{}", volume.dir.display());
    wait_for_alert(&bench, &low, "opened", Duration::from_secs(60));
    wait_for_alert(&bench, "database_full", "opened", Duration::from_secs(30));
    let opened = events(&sink_files(&bench).0)
        .into_iter()
        .find(|e| e["condition"] == "database_full")
        .unwrap();
    let message = opened["message"].as_str().unwrap();
    assert!(
        message.contains(&bench.db.display().to_string()) && message.contains("full"),
        "{message}"
    );
    assert!(
        bench.rows().iter().filter(|r| r.status == "done").count() <= 2,
        "nothing is written while the volume is full"
    );
    std::fs::remove_file(filler).unwrap();
    let rows = bench.wait_finished(6, LONG);
    assert_eq!(rows.len(), 6, "one row per frame: {rows:?}");
    assert!(rows.iter().all(|r| r.status == "done"), "{rows:?}");
    wait_for_alert(
        &bench,
        "database_full",
        "recovered",
        Duration::from_secs(30),
    );
    // Stored once the volume had room again, in order: opened, then recovered.
    let conn = rusqlite::Connection::open_with_flags(
        &bench.db,
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap();
    let stored: Vec<(String, Option<String>)> = conn
        .prepare("SELECT condition, closed_state FROM alerts ORDER BY id")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    assert!(
        stored.contains(&("database_full".into(), Some("recovered".into()))),
        "{stored:?}"
    );
    assert!(stored.iter().any(|(c, _)| *c == low), "{stored:?}");
    drop(conn);
    bench.stop();
    // Sent while the volume was full, the opening's deliveries (one per sink:
    // file and command) were stored finished with it, so the next start
    // sends nothing again; every other delivery was recorded as made.
    let conn = rusqlite::Connection::open_with_flags(
        &bench.db,
        rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY,
    )
    .unwrap();
    let count = |sql: &str| -> i64 { conn.query_row(sql, [], |r| r.get(0)).unwrap() };
    assert_eq!(
        count(
            "SELECT COUNT(*) FROM alert_deliveries JOIN alerts ON alerts.id = alert_id
             WHERE condition = 'database_full' AND json_extract(event, '$.state') = 'opened'"
        ),
        2
    );
    assert_eq!(
        count("SELECT COUNT(*) FROM alert_deliveries WHERE finished_at_ms IS NULL OR error IS NOT NULL"),
        0
    );
}

/// Counts the log's warning and error lines.
fn loud_lines(bench: &Bench) -> usize {
    bench
        .logs()
        .lines()
        .filter(|l| l.contains(" WARN ") || l.contains("ERROR"))
        .count()
}

/// Asserts the service stopped with exit code 1, its last words naming the
/// database and `cause`, and the sinks got the `condition` notice.
fn assert_stopped_on(bench: &mut Bench, condition: &str, cause: &str) {
    let code = bench.wait_exit(Duration::from_secs(60));
    let logs = bench.logs();
    assert_eq!(code, Some(1), "{logs}");
    let db = bench.db.display().to_string();
    let last = logs.lines().last().unwrap_or_default();
    assert!(
        last.starts_with("framewarden watch: ") && last.contains(&db) && last.contains(cause),
        "the exit message names the database and the cause: {last}"
    );
    assert!(
        both_sinks_got(bench, condition, "notice"),
        "{:?}",
        events(&sink_files(bench).0)
    );
}

/// Pages 2 onwards of the database file overwritten with garbage while the
/// service runs (after a checkpoint, so the file holds every page): the
/// next look-up or write finds it damaged; the service raises
/// `database_damaged` and stops, without a flood of warnings.
#[test]
fn a_damaged_database_stops_the_service_with_an_alert() {
    let mut bench = bench_with_sinks("");
    bench.start();
    for i in 0..3 {
        put(&bench, i);
    }
    bench.wait_finished(3, LONG);
    let page_size = {
        let conn = rusqlite::Connection::open(&bench.db).unwrap();
        conn.busy_timeout(Duration::from_secs(10)).unwrap();
        let busy: i64 = conn
            .query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |r| r.get(0))
            .unwrap();
        assert_eq!(busy, 0, "the checkpoint ran");
        let size: i64 = conn
            .query_row("PRAGMA page_size", [], |r| r.get(0))
            .unwrap();
        u64::try_from(size).unwrap()
    };
    let len = std::fs::metadata(&bench.db).unwrap().len();
    assert!(
        len > 2 * page_size,
        "a database of several pages ({len} bytes)"
    );
    // Garbage from a fixed-seed xorshift, written in place (same inode).
    let mut state = 0x9E37_79B9_7F4A_7C15u64;
    let garbage: Vec<u8> = (page_size..len)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state as u8
        })
        .collect();
    {
        use std::io::{Seek, SeekFrom};
        let mut file = std::fs::OpenOptions::new()
            .write(true)
            .open(&bench.db)
            .unwrap();
        file.seek(SeekFrom::Start(page_size)).unwrap();
        file.write_all(&garbage).unwrap();
        file.sync_all().unwrap();
    }
    for i in 3..8 {
        put(&bench, i);
    }
    assert_stopped_on(&mut bench, "database_damaged", "is damaged");
    let loud = loud_lines(&bench);
    assert!(
        loud <= 12,
        "{loud} warning and error lines; logs:\n{}",
        bench.logs()
    );
}

/// The database file moved away while the service runs: it stops with
/// `database_removed`.
#[test]
fn a_deleted_database_stops_the_service_with_an_alert() {
    let mut bench = bench_with_sinks("");
    bench.start();
    put(&bench, 0);
    bench.wait_finished(1, LONG);
    std::fs::rename(&bench.db, bench.dir.path().join("aside.db")).unwrap();
    assert_stopped_on(&mut bench, "database_removed", "deleted or moved away");
}

/// Another file renamed over the database while the service runs: it
/// stops with `database_replaced`, writing into neither.
#[test]
fn a_replaced_database_stops_the_service_with_an_alert() {
    let mut bench = bench_with_sinks("");
    bench.start();
    put(&bench, 0);
    bench.wait_finished(1, LONG);
    let copy = bench.dir.path().join("copy.db");
    std::fs::copy(&bench.db, &copy).unwrap();
    std::fs::rename(&copy, &bench.db).unwrap();
    let before = std::fs::read(&bench.db).unwrap();
    assert_stopped_on(&mut bench, "database_replaced", "replaced by another file");
    assert_eq!(
        std::fs::read(&bench.db).unwrap(),
        before,
        "the file now at the path is left as it was"
    );
}
