//! Shared helpers for the watch integration tests: real TIFF files, the real
//! binary on a temp folder, and read-only looks at the real database.
//!
//! The tests themselves (what is checked) live in `tests/watch_service.rs`.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use framewarden::synth::{self, SceneSpec};
use rusqlite::{Connection, OpenFlags};

/// The binary under test.
pub const BIN: &str = env!("CARGO_BIN_EXE_framewarden");

/// A complete TIFF file's bytes and the number of objects drawn in it.
pub fn tiff_bytes(seed: u64, size: usize, objects: usize) -> (Vec<u8>, usize) {
    let spec = SceneSpec {
        width: size,
        height: size,
        object_count: objects,
        radius_px: (3.0, 6.0),
        seed,
        ..SceneSpec::default()
    };
    let scene = synth::generate(&spec).expect("a scene that fits");
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("f.tif");
    synth::write_tiff(&path, &scene.frame).unwrap();
    (std::fs::read(&path).unwrap(), scene.object_count())
}

/// A temp acquisition folder, its config, and (when started) a running `watch`.
pub struct Bench {
    pub dir: tempfile::TempDir,
    pub acq: PathBuf,
    pub db: PathBuf,
    pub config: PathBuf,
    pub child: Option<Child>,
    starts: usize,
}

impl Bench {
    /// Writes a config with a short settle time and quick retries.
    pub fn new(extra_watch: &str) -> Bench {
        Bench::with_config(extra_watch, "")
    }

    /// [`Bench::new`] with `after_store` appended to the config's `[store]`
    /// section: more `[store]` keys, then any other sections.
    pub fn with_config(extra_watch: &str, after_store: &str) -> Bench {
        let dir = tempfile::tempdir().unwrap();
        let acq = dir.path().join("acq");
        std::fs::create_dir(&acq).unwrap();
        let config = dir.path().join("framewarden.toml");
        // Short settle and quick retries, unless the test sets its own.
        let mut watch = String::from("folders = [\"acq\"]\n");
        for (key, value) in [
            ("settle_ms", "300"),
            ("retry_limit", "4"),
            ("retry_backoff_ms", "100"),
        ] {
            if !extra_watch.contains(key) {
                watch.push_str(&format!("{key} = {value}\n"));
            }
        }
        std::fs::write(
            &config,
            format!(
                "[watch]\n{watch}{extra_watch}\n[store]\ndatabase = \"fw.db\"\n{after_store}\n"
            ),
        )
        .unwrap();
        // The service canonicalises folders; keep the same spelling here.
        let acq = acq.canonicalize().unwrap();
        let db = dir.path().join("fw.db");
        Bench {
            dir,
            acq,
            db,
            config,
            child: None,
            starts: 0,
        }
    }

    /// Starts `framewarden watch` with stderr logged to a file.
    pub fn start(&mut self) {
        self.start_with_env(&[]);
    }

    /// [`Bench::start`] with extra environment variables.
    pub fn start_with_env(&mut self, env: &[(&str, &str)]) {
        assert!(self.child.is_none(), "already running");
        self.starts += 1;
        let log = std::fs::File::create(self.dir.path().join(format!("watch-{}.log", self.starts)))
            .unwrap();
        let child = Command::new(BIN)
            .args(["watch", "--config"])
            .arg(&self.config)
            .env("RUST_LOG", "info")
            .envs(env.iter().copied())
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("the framewarden binary starts");
        self.child = Some(child);
        // Ready when this start has logged that it is watching: the store is
        // migrated, the signal handlers and the watcher are in place.
        let log = self.dir.path().join(format!("watch-{}.log", self.starts));
        wait_for(
            "the service to start watching",
            Duration::from_secs(30),
            || {
                let exited = self.child.as_mut().and_then(|c| c.try_wait().unwrap());
                assert!(
                    exited.is_none(),
                    "watch exited at start ({exited:?}); logs:\n{}",
                    self.logs()
                );
                std::fs::read_to_string(&log).is_ok_and(|text| text.contains(" watching "))
            },
        );
    }

    /// Sends a signal by name (`TERM`, `INT`, `KILL`) with the system's `kill`.
    pub fn signal(&self, name: &str) {
        let pid = self.child.as_ref().expect("running").id();
        let ok = Command::new("kill")
            .arg(format!("-{name}"))
            .arg(pid.to_string())
            .status()
            .unwrap()
            .success();
        assert!(ok, "kill -{name} {pid}");
    }

    /// Waits for the process to exit and returns its exit code.
    pub fn wait_exit(&mut self, limit: Duration) -> Option<i32> {
        let mut child = self.child.take().expect("running");
        let start = Instant::now();
        loop {
            if let Some(status) = child.try_wait().unwrap() {
                return status.code();
            }
            if start.elapsed() > limit {
                let _ = child.kill();
                let _ = child.wait();
                panic!(
                    "watch did not exit within {limit:?}; logs:\n{}",
                    self.logs()
                );
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    }

    /// SIGTERM, and the clean exit (code 0) within a minute that a stop must
    /// give; the logs when it does not.
    pub fn stop(&mut self) {
        self.signal("TERM");
        assert_eq!(
            self.wait_exit(Duration::from_secs(60)),
            Some(0),
            "{}",
            self.logs()
        );
    }

    /// SIGKILL: no chance to flush anything.
    pub fn kill_hard(&mut self) {
        let mut child = self.child.take().expect("running");
        child.kill().unwrap();
        child.wait().unwrap();
    }

    pub fn logs(&self) -> String {
        (1..=self.starts)
            .map(|i| {
                std::fs::read_to_string(self.dir.path().join(format!("watch-{i}.log")))
                    .unwrap_or_default()
            })
            .collect::<Vec<_>>()
            .join("\n---- restart ----\n")
    }

    /// Writes a whole file at once.
    pub fn write(&self, name: &str, bytes: &[u8]) -> PathBuf {
        let path = self.acq.join(name);
        std::fs::write(&path, bytes).unwrap();
        path
    }

    /// All frame rows, read-only.
    pub fn rows(&self) -> Vec<Row> {
        rows(&self.db)
    }

    /// Waits until `n` rows are finished (done or failed) and none is queued.
    pub fn wait_finished(&self, n: usize, limit: Duration) -> Vec<Row> {
        let mut last = Vec::new();
        let start = Instant::now();
        while start.elapsed() < limit {
            last = self.rows();
            let finished = last.iter().filter(|r| r.status != "queued").count();
            if finished >= n && finished == last.len() {
                return last;
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        panic!(
            "expected {n} finished rows within {limit:?}, have {} rows ({} finished); logs:\n{}",
            last.len(),
            last.iter().filter(|r| r.status != "queued").count(),
            self.logs()
        );
    }
}

impl Drop for Bench {
    fn drop(&mut self) {
        if let Some(mut child) = self.child.take() {
            let _ = child.kill();
            let _ = child.wait();
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct Row {
    pub path: String,
    pub size_bytes: i64,
    pub version: i64,
    pub status: String,
    pub error: Option<String>,
    pub object_count: Option<i64>,
    pub attempts: i64,
}

pub fn rows(db: &Path) -> Vec<Row> {
    if !db.exists() {
        return Vec::new();
    }
    let conn = Connection::open_with_flags(db, OpenFlags::SQLITE_OPEN_READ_ONLY).unwrap();
    conn.busy_timeout(Duration::from_secs(10)).unwrap();
    let Ok(mut stmt) =
        conn.prepare("SELECT file, size_bytes, version, status, error, object_count, attempts FROM frames ORDER BY id")
    else {
        return Vec::new(); // schema not created yet
    };
    stmt.query_map([], |r| {
        Ok(Row {
            path: r.get(0)?,
            size_bytes: r.get(1)?,
            version: r.get(2)?,
            status: r.get(3)?,
            error: r.get(4)?,
            object_count: r.get(5)?,
            attempts: r.get(6)?,
        })
    })
    .unwrap()
    .collect::<Result<_, _>>()
    .unwrap()
}

/// Polls `cond` until it holds; panics (naming `what`) after `limit` so a broken
/// service fails the test instead of hanging it.
pub fn wait_for(what: &str, limit: Duration, mut cond: impl FnMut() -> bool) {
    let start = Instant::now();
    while !cond() {
        assert!(start.elapsed() < limit, "timed out waiting for {what}");
        std::thread::sleep(Duration::from_millis(50));
    }
}

/// Whether process `pid` still runs (a zombie waiting for its parent to
/// collect it runs no more), read from procfs.
#[cfg(target_os = "linux")]
pub fn process_runs(pid: u32) -> bool {
    match std::fs::read_to_string(format!("/proc/{pid}/stat")) {
        // The state follows the command name in parentheses.
        Ok(stat) => stat
            .rsplit_once(") ")
            .is_some_and(|(_, rest)| !rest.starts_with('Z')),
        Err(_) => false,
    }
}
