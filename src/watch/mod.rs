//! The watch service: folders in, one row per file version out, exactly once.
//!
//! Wiring only: notify (or polling) feeds the [`scheduler`], which decides
//! readiness and fills a bounded queue; a pool of workers runs the same pure
//! pipeline as `analyze`; one writer thread records results ([`crate::store`]).
//! Signals, systemd readiness and the watchdog are the caller's
//! ([`crate::service`], [`crate::demo`]): a [`Service`] runs until its owner
//! calls [`Service::stop`].

pub mod config;
mod scheduler;

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, Sender};
use notify::Watcher;

use self::config::WatchMode;
use self::scheduler::{SchedMsg, Scheduler};
use crate::pipeline::analyze_file;
use crate::settings::Settings;
use crate::store::writer::{RunPolicy, StoreOp, Writer};
use crate::store::{self, FrameKey, StoreError};

/// One complete file version for a worker.
#[derive(Debug)]
pub struct Job {
    pub path: PathBuf,
    pub key: FrameKey,
    pub detected_at_ms: i64,
    /// When the readiness rule was met.
    pub ready_at: Instant,
    /// Analysis attempts made before this one.
    pub attempts: u32,
}

/// Counters shared with the watchdog and the final summary.
#[derive(Debug, Default)]
pub struct Progress {
    /// Jobs handed to the queue.
    pub enqueued: AtomicU64,
    /// Jobs that left a worker (recorded, or sent back for another look).
    pub finished: AtomicU64,
    pub done: AtomicU64,
    pub failed: AtomicU64,
}

impl Progress {
    /// Jobs queued or being analysed right now.
    pub fn outstanding(&self) -> u64 {
        self.enqueued
            .load(Ordering::Relaxed)
            .saturating_sub(self.finished.load(Ordering::Relaxed))
    }
}

/// Per-start choices that are not configuration.
#[derive(Debug, Clone, Default)]
pub struct WatchOptions {
    /// Start a new run even if the last one could be continued.
    pub new_run: bool,
}

/// What a finished `watch` reports.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct WatchSummary {
    pub run_id: i64,
    pub done: u64,
    pub failed: u64,
    /// False when shutdown hit its time bound; the frames still in flight stay
    /// queued and are redone at the next start.
    pub clean: bool,
}

/// Errors that stop the service from starting.
#[derive(Debug, thiserror::Error)]
pub enum WatchError {
    #[error("no folders to watch: set [watch] folders in the config or pass --folder")]
    NoFolders,
    #[error("watched folder {0} does not exist or is not a folder")]
    MissingFolder(PathBuf),
    #[error(transparent)]
    Store(#[from] StoreError),
    #[error("cannot start: {0}")]
    Start(String),
}

/// The running service's threads and channels.
pub struct Service {
    /// Held for its `Drop`, which stops watching.
    watcher: Box<dyn Watcher + Send>,
    sched_tx: Sender<SchedMsg>,
    scheduler: JoinHandle<()>,
    scanner: JoinHandle<()>,
    workers: Vec<JoinHandle<()>>,
    writer: Writer,
    stopping: Arc<AtomicBool>,
    progress: Arc<Progress>,
    shutdown_timeout: Duration,
    /// The database's one writer is this service; released once the writer
    /// has finished.
    claim: store::WriterClaim,
}

impl Service {
    /// Opens the store, starts writer, workers, scheduler and scanner, queues the
    /// catch-up scan, and starts watching.
    ///
    /// # Errors
    /// [`WatchError`] for a bad folder, database or thread start.
    pub fn start(settings: &Settings, options: &WatchOptions) -> Result<Service, WatchError> {
        let mut watch = settings.watch.clone();
        if watch.folders.is_empty() {
            return Err(WatchError::NoFolders);
        }
        // One spelling per file: events, scans and the identity in the store all
        // use canonical paths, so `acq/a.tif` and `/data/acq/a.tif` never make two rows.
        watch.folders = watch
            .folders
            .iter()
            // dunce: the plain `C:\...` form on Windows, not `\\?\C:\...`.
            .map(|f| match dunce::canonicalize(f) {
                Ok(c) if c.is_dir() => Ok(c),
                _ => Err(WatchError::MissingFolder(f.clone())),
            })
            .collect::<Result<_, _>>()?;
        let db = &settings.store.database;
        // One service per database: a second one would analyse every file
        // again and judge the run with half its memory.
        let claim = store::claim_writer(db)?;
        let mut conn = store::open_for_writing(db)?;
        let sqlite = |source| StoreError::Sqlite {
            path: db.clone(),
            source,
        };
        for key in store::settle_interrupted(&mut conn).map_err(sqlite)? {
            tracing::warn!(
                file = %key.path,
                "failed: interrupted {} times in hand; left out so the run goes on",
                store::MAX_INTERRUPTIONS
            );
        }
        // Rows left queued by an earlier process: redone by the catch-up scan if
        // the file is unchanged; otherwise they get their outcome now.
        let stale = store::queued_frames(&conn).map_err(sqlite)?;
        let progress = Arc::new(Progress::default());
        let stopping = Arc::new(AtomicBool::new(false));
        let (sched_tx, sched_rx) = crossbeam_channel::unbounded();
        let commit_tx = sched_tx.clone();
        let policy = RunPolicy {
            folders: watch.folders.clone(),
            settings: format!("{settings:#?}"),
            force_new: options.new_run,
            idle_gap_ms: i64::try_from(watch.new_run_after_idle.as_millis()).unwrap_or(i64::MAX),
            qc: Some(crate::qc::record::QcSetup::from_settings(settings)),
        };
        let (writer, store_tx) = Writer::start(
            conn,
            policy,
            watch.queue_capacity * 4,
            settings.store.batch_max,
            Box::new(move |keys| {
                if !keys.is_empty() {
                    // The scheduler may already have stopped at shutdown.
                    let _ = commit_tx.send(SchedMsg::Committed(keys.to_vec()));
                }
            }),
        )
        .map_err(|source| StoreError::Sqlite {
            path: db.clone(),
            source,
        })?;
        release_stale(&stale, &store_tx);

        let (work_tx, work_rx) = crossbeam_channel::bounded::<Job>(watch.queue_capacity);
        let settings_arc = Arc::new(settings.clone());
        let mut workers = Vec::with_capacity(watch.workers);
        for i in 0..watch.workers {
            let worker = Worker {
                settings: Arc::clone(&settings_arc),
                work_rx: work_rx.clone(),
                store_tx: store_tx.clone(),
                sched_tx: sched_tx.clone(),
                stopping: Arc::clone(&stopping),
                progress: Arc::clone(&progress),
            };
            workers.push(spawn(&format!("worker-{i}"), move || worker.run())?);
        }
        drop(work_rx);

        let (scan_tx, scan_rx) = crossbeam_channel::unbounded::<PathBuf>();
        let scanner = {
            let reader = store::open_read_only(db)?;
            let watch = watch.clone();
            let sched_tx = sched_tx.clone();
            let stopping = Arc::clone(&stopping);
            spawn("scanner", move || {
                scheduler::scan_loop(&scan_rx, &reader, &watch, &sched_tx, &stopping)
            })?
        };
        // Catch-up: everything already in the folders that is not recorded as finished.
        for folder in &watch.folders {
            let _ = scan_tx.send(folder.clone());
        }
        let (watcher, mode) = start_watcher(&watch, &sched_tx)?;
        let sched = Scheduler {
            watch: watch.clone(),
            inbox: sched_rx,
            work_tx,
            store_tx,
            scan_tx,
            reader: store::open_read_only(db)?,
            progress: Arc::clone(&progress),
        };
        let scheduler = spawn("scheduler", move || sched.run())?;
        tracing::info!(
            "watching {} ({} mode, settle {} ms, {} workers), database {}",
            watch
                .folders
                .iter()
                .map(|f| f.display().to_string())
                .collect::<Vec<_>>()
                .join(", "),
            mode,
            watch.settle.as_millis(),
            watch.workers,
            db.display()
        );
        Ok(Service {
            watcher,
            sched_tx,
            scheduler,
            scanner,
            workers,
            writer,
            stopping,
            progress,
            shutdown_timeout: watch.shutdown_timeout,
            claim,
        })
    }

    pub fn progress(&self) -> Arc<Progress> {
        Arc::clone(&self.progress)
    }

    pub fn run_id(&self) -> i64 {
        self.writer.run_id
    }

    /// Stops in order: stop watching, stop queueing, let workers finish the frame
    /// in hand (queued jobs are released: their rows stay `queued` and the next
    /// start redoes them), then flush the writer. Blocking.
    pub fn stop(self) -> WatchSummary {
        let run_id = self.writer.run_id;
        drop(self.watcher);
        self.stopping.store(true, Ordering::SeqCst);
        let _ = self.sched_tx.send(SchedMsg::Stop);
        drop(self.sched_tx);
        join("scheduler", self.scheduler);
        join("scanner", self.scanner);
        for w in self.workers {
            join("worker", w);
        }
        self.writer.join();
        drop(self.claim);
        WatchSummary {
            run_id,
            done: self.progress.done.load(Ordering::Relaxed),
            failed: self.progress.failed.load(Ordering::Relaxed),
            clean: true,
        }
    }

    /// [`Service::stop`] within the configured time bound.
    pub async fn stop_within_bound(self) -> WatchSummary {
        let bound = self.shutdown_timeout;
        let progress = self.progress();
        let run_id = self.run_id();
        match tokio::time::timeout(bound, tokio::task::spawn_blocking(move || self.stop())).await {
            Ok(Ok(summary)) => summary,
            _ => {
                tracing::warn!(
                    "shutdown exceeded {} s; frames still in flight stay queued and are redone at the next start",
                    bound.as_secs()
                );
                WatchSummary {
                    run_id,
                    done: progress.done.load(Ordering::Relaxed),
                    failed: progress.failed.load(Ordering::Relaxed),
                    clean: false,
                }
            }
        }
    }
}

/// A file that a worker read short (or saw change) and that should be looked at again.
fn retry_or_fail(job: &Job, limit: u32, reason: String) -> Next {
    let attempts = job.attempts + 1;
    if attempts <= limit {
        Next::Retry(SchedMsg::Retry {
            path: job.path.clone(),
            previous: job.key.clone(),
            attempts,
            detected_at_ms: job.detected_at_ms,
        })
    } else {
        Next::Record(StoreOp::Failed {
            key: job.key.clone(),
            attempts,
            reason: format!("still incomplete after {attempts} attempts: {reason}"),
        })
    }
}

/// Where a job goes after a worker is done with it.
enum Next {
    Retry(SchedMsg),
    Record(StoreOp),
}

struct Worker {
    settings: Arc<Settings>,
    work_rx: Receiver<Job>,
    store_tx: Sender<StoreOp>,
    sched_tx: Sender<SchedMsg>,
    stopping: Arc<AtomicBool>,
    progress: Arc<Progress>,
}

impl Worker {
    fn run(self) {
        while let Ok(job) = self.work_rx.recv() {
            if self.stopping.load(Ordering::SeqCst) {
                // Released: the row stays queued; the next start redoes it.
                break;
            }
            let outcome =
                catch_unwind(AssertUnwindSafe(|| analyze_file(&job.path, &self.settings)));
            let unchanged = FrameKey::of(&job.path).is_ok_and(|k| k == job.key);
            let limit = self.settings.watch.retry_limit;
            let next = match outcome {
                Ok(Ok(_)) | Ok(Err(_)) if !unchanged => {
                    retry_or_fail(&job, limit, "the file changed while it was read".into())
                }
                Ok(Ok(analysis)) => {
                    // The frame's log line is written once its row commits (qc::record).
                    self.progress.done.fetch_add(1, Ordering::Relaxed);
                    Next::Record(StoreOp::Done {
                        key: job.key.clone(),
                        attempts: job.attempts + 1,
                        analysis: Box::new(analysis),
                    })
                }
                Ok(Err(e)) if e.is_incomplete() => {
                    retry_or_fail(&job, limit, without_path(&e.to_string(), &job.key.path))
                }
                Ok(Err(e)) => Next::Record(StoreOp::Failed {
                    key: job.key.clone(),
                    attempts: job.attempts + 1,
                    reason: without_path(&e.to_string(), &job.key.path),
                }),
                Err(panic) => {
                    let what = panic
                        .downcast_ref::<&str>()
                        .map(|s| (*s).to_string())
                        .or_else(|| panic.downcast_ref::<String>().cloned())
                        .unwrap_or_default();
                    Next::Record(StoreOp::Failed {
                        key: job.key.clone(),
                        attempts: job.attempts + 1,
                        reason: format!("the analysis crashed on this file: {what}"),
                    })
                }
            };
            match next {
                Next::Retry(retry) => {
                    tracing::debug!("{} not complete yet; will look again", job.path.display());
                    let _ = self.sched_tx.send(retry);
                }
                Next::Record(op) => {
                    if let StoreOp::Failed { reason, .. } = &op {
                        tracing::warn!(file = %job.path.display(), "failed: {reason}");
                        self.progress.failed.fetch_add(1, Ordering::Relaxed);
                    }
                    if self.store_tx.send(op).is_err() {
                        tracing::error!(
                            "the store writer has stopped; {} not recorded",
                            job.path.display()
                        );
                    }
                }
            }
            self.progress.finished.fetch_add(1, Ordering::Relaxed);
        }
    }
}

/// The row already names the file: drop a leading "<path>: " from a message.
fn without_path(message: &str, path: &str) -> String {
    message
        .strip_prefix(path)
        .and_then(|m| m.strip_prefix(": "))
        .unwrap_or(message)
        .to_string()
}

/// Outcomes for rows an earlier process left queued whose file is gone or changed.
fn release_stale(stale: &[FrameKey], store_tx: &Sender<StoreOp>) {
    for key in stale {
        let op = match FrameKey::of(std::path::Path::new(&key.path)) {
            Ok(now) if now == *key => continue,
            Ok(_) => StoreOp::Withdrawn { key: key.clone() },
            Err(_) => StoreOp::Failed {
                key: key.clone(),
                attempts: 0,
                reason: "the file went away before it was analysed".into(),
            },
        };
        let _ = store_tx.send(op);
    }
}

fn start_watcher(
    watch: &config::WatchSettings,
    sched_tx: &Sender<SchedMsg>,
) -> Result<(Box<dyn Watcher + Send>, &'static str), WatchError> {
    let handler = |tx: Sender<SchedMsg>| {
        // Runs on notify's thread: never block, just hand over.
        move |res: notify::Result<notify::Event>| {
            let _ = tx.send(SchedMsg::Event(res));
        }
    };
    if watch.mode == WatchMode::Native {
        let native =
            notify::RecommendedWatcher::new(handler(sched_tx.clone()), notify::Config::default())
                .and_then(|mut w| {
                    for folder in &watch.folders {
                        w.watch(folder, notify::RecursiveMode::Recursive)?;
                    }
                    Ok(w)
                });
        match native {
            Ok(w) => return Ok((Box::new(w), "native")),
            Err(e) => tracing::warn!(
                "native file events unavailable ({e}); falling back to polling every {} ms",
                watch.poll_interval.as_millis()
            ),
        }
    }
    let config = notify::Config::default().with_poll_interval(watch.poll_interval);
    let mut poll = notify::PollWatcher::new(handler(sched_tx.clone()), config)
        .map_err(|e| WatchError::Start(e.to_string()))?;
    for folder in &watch.folders {
        poll.watch(folder, notify::RecursiveMode::Recursive)
            .map_err(|e| WatchError::Start(format!("{}: {e}", folder.display())))?;
    }
    Ok((Box::new(poll), "poll"))
}

fn spawn(name: &str, f: impl FnOnce() + Send + 'static) -> Result<JoinHandle<()>, WatchError> {
    std::thread::Builder::new()
        .name(name.into())
        .spawn(f)
        .map_err(|e| WatchError::Start(format!("thread {name}: {e}")))
}

fn join(name: &str, handle: JoinHandle<()>) {
    if handle.join().is_err() {
        tracing::error!("the {name} thread panicked");
    }
}
