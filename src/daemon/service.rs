//! The watch service as a whole: folders in, one row per file version out,
//! exactly once.
//!
//! Wiring only: the watcher feeds the scheduler ([`crate::watch`]), which
//! decides readiness and fills a bounded queue; a pool of workers runs the
//! same pipeline as `analyze`; one writer thread records results
//! ([`crate::store`]) and lets quality control ([`crate::qc`]) judge each frame
//! in its transaction. Signals, systemd readiness and the watchdog are the
//! process's: a [`Service`] runs until its owner calls [`Service::stop`].

use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::Duration;

use crossbeam_channel::Sender;

use crate::daemon::worker::Worker;
use crate::qc::recorder::{QcError, QcRecorder, QcSetup};
use crate::settings::Settings;
use crate::store::health::{DatabaseFault, DatabaseHealth};
use crate::store::label_images::LabelImageWriter;
use crate::store::writer::{open_run, RunPolicy, StoreOp, Writer, WriterError, WriterSetup};
use crate::store::{self, FrameKey, LabelImages, StoreError};
use crate::text::{shown, shown_path, Repeats};
use crate::watch::scheduler::{scan_loop, SchedMsg, Scheduler};
use crate::watch::watcher::{start_watcher, WatcherError, Watching};
use crate::watch::{Job, Progress};

/// Per-start choices that are not configuration.
#[derive(Debug, Clone, Default)]
pub struct WatchOptions {
    /// Start a new run even if the last one could be continued.
    pub new_run: bool,
}

/// What a finished `watch` reports.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct WatchSummary {
    /// The run recorded into (the last one, after an idle gap).
    pub run_id: i64,
    /// Frames analyzed this session.
    pub done: u64,
    /// Frames recorded as failed this session.
    pub failed: u64,
    /// False when shutdown hit its time bound; the frames still in flight stay
    /// queued and are redone at the next start.
    pub clean: bool,
}

/// Errors that stop the service from starting.
#[derive(Debug, thiserror::Error)]
pub enum WatchError {
    /// Nothing to watch (a configuration error).
    #[error("no folders to watch: set [watch] folders in the config or pass --folder")]
    NoFolders,
    /// A configured folder is missing (a configuration error).
    #[error("watched folder {0} does not exist or is not a folder")]
    MissingFolder(PathBuf),
    /// The database could not be opened, claimed or read.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Quality control could not start.
    #[error("{db}: quality control: {source}")]
    Qc {
        /// The database.
        db: PathBuf,
        /// The cause.
        source: QcError,
    },
    /// The store writer could not start.
    #[error("{db}: {source}")]
    Writer {
        /// The database.
        db: PathBuf,
        /// The cause.
        source: WriterError,
    },
    /// Watching could not start.
    #[error(transparent)]
    Watcher(#[from] WatcherError),
    /// One of the service's threads ended while it ran (a panic); the service
    /// stopped so that its supervisor can start it again.
    #[error("the {0} thread ended unexpectedly; the service stopped (frames in hand stay queued and are redone at the next start)")]
    ThreadEnded(&'static str),
    /// The database was found damaged, deleted or replaced while the
    /// service ran; the service stopped (the fault says what to do).
    #[error(transparent)]
    Database(DatabaseFault),
    /// A thread or the signal handling could not start.
    #[error("cannot start {what}: {source}")]
    Start {
        /// What could not start.
        what: String,
        /// The cause.
        source: std::io::Error,
    },
}

impl WatchError {
    /// True for errors in what the user asked for (usage or configuration),
    /// which exit with code 2; others exit with 1.
    pub fn is_usage(&self) -> bool {
        matches!(self, WatchError::NoFolders | WatchError::MissingFolder(_))
    }
}

/// The running service's threads and channels.
pub struct Service {
    /// Held for its `Drop`, which stops watching.
    watcher: Watching,
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
    /// The thread rewriting the HTML report, and the sender whose drop stops it.
    reporter: Option<(Sender<()>, JoinHandle<()>)>,
    /// Where the report goes, and the database it reads.
    report: Option<(PathBuf, PathBuf)>,
    /// The database's file and the faults found in it.
    health: Arc<DatabaseHealth>,
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
        // One service per database: a second one would analyze every file
        // again and judge the run with half its memory.
        let claim = store::claim_writer(db)?;
        let mut conn = store::open_for_writing(db)?;
        // The file just opened: if another takes its path, the service stops.
        let health = Arc::new(DatabaseHealth::new(db));
        let sqlite = |source| StoreError::Sqlite {
            path: db.clone(),
            source,
        };
        for key in store::settle_interrupted(&mut conn).map_err(sqlite)? {
            tracing::warn!(
                file = %shown(&key.path),
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
        // The run's stored settings are those in force: the folders as watched.
        let in_force = Settings {
            watch: watch.clone(),
            ..settings.clone()
        };
        let policy = RunPolicy {
            folders: watch.folders.clone(),
            settings_toml: in_force.to_toml(),
            force_new: options.new_run,
            idle_gap_ms: i64::try_from(watch.new_run_after_idle.as_millis()).unwrap_or(i64::MAX),
        };
        let run = open_run(&mut conn, &policy).map_err(sqlite)?;
        let recorder = QcRecorder::start(&conn, run.id, qc_setup(&in_force)).map_err(|source| {
            WatchError::Qc {
                db: db.clone(),
                source,
            }
        })?;
        let setup = WriterSetup {
            capacity: watch.queue_capacity * 4,
            max_batch: settings.store.batch_max,
            on_commit: Box::new(move |keys| {
                if !keys.is_empty() {
                    // The scheduler may already have stopped at shutdown.
                    let _ = commit_tx.send(SchedMsg::Committed(keys.to_vec()));
                }
            }),
            observer: Some(Box::new(recorder)),
            label_images: LabelImageWriter::start(db, settings.store.label_images).map_err(
                |source| WatchError::Start {
                    what: "the label image thread".into(),
                    source,
                },
            )?,
            health: Arc::clone(&health),
        };
        let (writer, store_tx) =
            Writer::start(conn, policy, run, setup).map_err(|source| WatchError::Writer {
                db: db.clone(),
                source,
            })?;
        release_stale(&stale, &store_tx);

        let (work_tx, work_rx) = crossbeam_channel::bounded::<Job>(watch.queue_capacity);
        let pipeline = Arc::new(settings.pipeline.clone());
        let mut workers = Vec::with_capacity(watch.workers);
        for i in 0..watch.workers {
            let worker = Worker {
                pipeline: Arc::clone(&pipeline),
                label_images: settings.store.label_images != LabelImages::None,
                retry_limit: watch.retry_limit,
                work_rx: work_rx.clone(),
                store_tx: store_tx.clone(),
                sched_tx: sched_tx.clone(),
                stopping: Arc::clone(&stopping),
                progress: Arc::clone(&progress),
                repeats: Repeats::default(),
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
            let health = Arc::clone(&health);
            spawn("scanner", move || {
                scan_loop(&scan_rx, &reader, &health, &watch, &sched_tx, &stopping)
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
            health: Arc::clone(&health),
            progress: Arc::clone(&progress),
            repeats: Repeats::default(),
            max_pages: settings.pipeline.limits.max_pages,
        };
        let scheduler = spawn("scheduler", move || sched.run())?;
        let run_id = writer.run_id;
        let report = settings.report.path.clone().map(|path| (path, db.clone()));
        let reporter = match &report {
            Some((path, db)) => {
                let (stop_tx, stop_rx) = crossbeam_channel::bounded::<()>(0);
                let (path, db, every) = (path.clone(), db.clone(), settings.report.every);
                let handle = spawn("report", move || {
                    // Rewritten every `every` until the service stops (the sender drops).
                    while let Err(crossbeam_channel::RecvTimeoutError::Timeout) =
                        stop_rx.recv_timeout(every)
                    {
                        write_report(&db, run_id, &path);
                    }
                })?;
                Some((stop_tx, handle))
            }
            None => None,
        };
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
            reporter,
            report,
            health,
        })
    }

    /// The shared counters (for the watchdog and summaries).
    pub fn progress(&self) -> Arc<Progress> {
        Arc::clone(&self.progress)
    }

    /// Why the service cannot go on, if it cannot: a fault of its database
    /// (damaged, deleted or replaced: the writer stops on it), or the first
    /// of its threads found ended (each ends only when told to stop, so an
    /// ended one has panicked). The service must then stop with this error,
    /// so that a supervisor (systemd) starts it again rather than leaving a
    /// process that records nothing.
    pub fn trouble(&self) -> Option<WatchError> {
        if let Some(fault) = self.health.fault() {
            return Some(WatchError::Database(fault));
        }
        let ended = if self.scheduler.is_finished() {
            "scheduler"
        } else if self.scanner.is_finished() {
            "scanner"
        } else if self.workers.iter().any(JoinHandle::is_finished) {
            "worker"
        } else if self.writer.is_finished() {
            "store writer"
        } else {
            return None;
        };
        Some(WatchError::ThreadEnded(ended))
    }

    /// The run being recorded into.
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
        if let Some((stop_tx, handle)) = self.reporter {
            drop(stop_tx);
            join("report", handle);
        }
        // The run's last word: the report with every frame recorded.
        if let Some((path, db)) = &self.report {
            write_report(db, run_id, path);
        }
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

/// Rewrites the HTML report of run `run_id` (atomically: a temporary file
/// renamed over it); a failure is logged and the service goes on.
fn write_report(db: &Path, run_id: i64, path: &Path) {
    match crate::html_report::write(db, Some(run_id), Some(1), path) {
        Ok(w) => tracing::info!(
            "report of run {run_id} written to {} ({} kB)",
            shown_path(path),
            w.bytes.div_ceil(1000)
        ),
        Err(e) => tracing::warn!("report not written: {}", shown(&e.to_string())),
    }
}

/// Outcomes for rows an earlier process left queued whose file is gone or changed.
fn release_stale(stale: &[FrameKey], store_tx: &Sender<StoreOp>) {
    for key in stale {
        let op = match FrameKey::of(std::path::Path::new(&key.path)) {
            Ok(now) if key.still_matches(&now) => continue,
            Ok(_) => StoreOp::Withdrawn { key: key.clone() },
            Err(_) => StoreOp::Failed {
                key: key.clone(),
                attempts: 0,
                reason: "the file went away before it was analyzed".into(),
            },
        };
        let _ = store_tx.send(op);
    }
}

/// What quality control of a run watches: its limits, its sinks, and the free
/// space of the watched folders' and the database's volumes.
fn qc_setup(settings: &Settings) -> QcSetup {
    let database_folder = settings
        .store
        .database
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .map_or_else(|| PathBuf::from("."), Path::to_path_buf);
    let mut volumes = settings.watch.folders.clone();
    volumes.push(database_folder);
    QcSetup {
        quality: settings.quality.clone(),
        alerts: settings.alerts.clone(),
        volumes,
        database: settings.store.database.clone(),
    }
}

fn spawn(name: &str, f: impl FnOnce() + Send + 'static) -> Result<JoinHandle<()>, WatchError> {
    std::thread::Builder::new()
        .name(name.into())
        .spawn(f)
        .map_err(|source| WatchError::Start {
            what: format!("thread {name}"),
            source,
        })
}

fn join(name: &str, handle: JoinHandle<()>) {
    if handle.join().is_err() {
        tracing::error!("the {name} thread panicked");
    }
}
