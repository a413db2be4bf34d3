//! The single writer: one thread owns the write connection and records frames in
//! batched IMMEDIATE transactions, fed by a bounded channel.
//!
//! Every write is idempotent on the frame identity (file, size and mtime; file
//! and page for a stack's page, see [`FrameKey`]), so a
//! crash and restart redoes at most the frames in flight and never duplicates a
//! row.
//!
//! Results are recorded in acquisition order ([`ACQUISITION_ORDER_SQL`]):
//! workers finish in any order, so a result whose position (well, site,
//! channel) still has an earlier frame in flight (queued before it in this
//! session) is held in memory and
//! recorded, with its judgement, once that frame is finished. A held result
//! that never gets recorded (a stop) leaves its row queued, and the next start
//! redoes it. Deciding *what* to record is the watcher's job, and judging a recorded
//! frame is the [`FrameObserver`]'s (quality control implements it); this file
//! only records and calls the observer inside its transaction.

use std::path::PathBuf;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, Sender};
use rusqlite::types::Value;
use rusqlite::{params, Connection, OptionalExtension, Transaction, TransactionBehavior};

use crate::analysis::ObjectMeasures;
use crate::encode::LabelRuns;
use crate::naming::NameParts;
use crate::pipeline::FileAnalysis;
use crate::store::health::{is_out_of_space, DatabaseFault, DatabaseHealth};
use crate::store::label_images::LabelImageWriter;
use crate::store::{now_ms, FrameKey, COUNTED_SQL, FRAME_KEY_SQL};
use crate::text::{shown, Repeats};

/// Why the writer could not start.
#[derive(Debug, thiserror::Error)]
pub enum WriterError {
    /// Choosing or continuing the run failed.
    #[error(transparent)]
    Sqlite(#[from] rusqlite::Error),
    /// The writer thread could not be started.
    #[error("cannot start the store writer thread: {0}")]
    Thread(std::io::Error),
}

/// Judges what the writer records, inside the writer's transaction, so that a
/// frame and its judgement commit together or not at all.
///
/// The writer calls [`begin`](FrameObserver::begin) before each transaction
/// and exactly one of [`committed`](FrameObserver::committed) or
/// [`rolled_back`](FrameObserver::rolled_back) after it; an observer keeps
/// what it learnt during a transaction only once it commits.
pub trait FrameObserver: Send {
    /// A transaction is about to start.
    fn begin(&mut self);
    /// Frame `frame_id` was just recorded as done with `analysis`; when
    /// `supersedes`, it is a new version with other pixels of a frame already
    /// recorded (the same file, or the same position and time point), whose
    /// row is now marked superseded. A version with the same pixels as the
    /// one recorded is not passed on at all. Returns whether the frame got at
    /// least one flag (what `label_images = "flagged"` keeps an image for).
    ///
    /// # Errors
    /// SQLite errors (the transaction is rolled back and retried).
    fn frame_done(
        &mut self,
        tx: &Transaction<'_>,
        frame_id: i64,
        analysis: &FileAnalysis,
        supersedes: bool,
    ) -> rusqlite::Result<bool>;
    /// The frame `key` was just recorded as failed.
    ///
    /// # Errors
    /// SQLite errors (the transaction is rolled back and retried).
    fn frame_failed(&mut self, tx: &Transaction<'_>, key: &FrameKey) -> rusqlite::Result<()>;
    /// The transaction committed.
    fn committed(&mut self);
    /// The transaction failed and was rolled back.
    fn rolled_back(&mut self);
    /// Periodic checks that need no frame, outside any transaction: the
    /// writer calls this on a clock, busy or idle, also while a commit waits
    /// to be tried again.
    ///
    /// # Errors
    /// SQLite errors (the writer logs them and calls again on its clock).
    fn tick(&mut self, conn: &Connection) -> rusqlite::Result<()>;
    /// A commit failed for lack of space on the database's volume (`cause`
    /// says how), or, with `None`, one succeeded again after such failures.
    /// Called outside any transaction, once per change.
    fn out_of_space(&mut self, conn: &Connection, cause: Option<&str>);
    /// The database cannot be used any more (damaged, deleted or replaced):
    /// the writer stops without writing anything more into it, so nothing
    /// about it can be stored; called once, before [`FrameObserver::close`].
    fn database_failed(&mut self, fault: &DatabaseFault);
    /// The writer is ending: finish what is queued, recording in `conn`
    /// (outside any transaction) what needs recording; `None` after
    /// [`FrameObserver::database_failed`], when nothing can be recorded.
    fn close(self: Box<Self>, conn: Option<&Connection>);
}

/// One thing to record.
#[derive(Debug)]
pub enum StoreOp {
    /// A file judged completely written and handed to a worker.
    Queued {
        /// The file version.
        key: FrameKey,
        /// When the file was first seen (ms since the Unix epoch).
        detected_at_ms: i64,
        /// When it was judged completely written (ms since the Unix epoch).
        ready_at_ms: i64,
        /// The parts of its name (well, site, time point, channel) the pattern found.
        names: NameParts,
    },
    /// A worker is about to analyze a queued frame: from now until its
    /// outcome, an unclean stop counts as an interruption of this frame
    /// ([`crate::store::settle_interrupted`]).
    InHand {
        /// The file version.
        key: FrameKey,
        /// Told once the mark is committed; dropped unsent when the writer
        /// gives up on the batch.
        committed: Sender<()>,
    },
    /// A worker put a queued frame back (read short, or changed while read)
    /// for the scheduler to look at again: it is no longer in hand.
    Released {
        /// The file version.
        key: FrameKey,
    },
    /// The analysis of a queued frame.
    Done {
        /// The file version.
        key: FrameKey,
        /// Analysis attempts it took, this one included.
        attempts: u32,
        /// The result (and recount) to record.
        analysis: Box<FileAnalysis>,
        /// The label image of the count used (the recount's where there is
        /// one) when label images are on; encoded
        /// and written once the row commits, if the frame's image is kept.
        label_image: Option<LabelRuns>,
    },
    /// A queued frame that produced no result, with the reason.
    Failed {
        /// The file version.
        key: FrameKey,
        /// Analysis attempts made, the last one included.
        attempts: u32,
        /// Why it failed, stored as the row's error.
        reason: String,
    },
    /// A queued frame whose file changed or went away before it was analyzed;
    /// its new version (if any) is recorded under its own identity.
    Withdrawn {
        /// The file version whose queued row is removed.
        key: FrameKey,
    },
}

impl StoreOp {
    /// The identity this op finishes, if it takes a frame out of the pipeline.
    fn finished_key(&self) -> Option<&FrameKey> {
        match self {
            StoreOp::Queued { .. } | StoreOp::InHand { .. } | StoreOp::Released { .. } => None,
            StoreOp::Done { key, .. }
            | StoreOp::Failed { key, .. }
            | StoreOp::Withdrawn { key } => Some(key),
        }
    }

    /// The identity of a frame's outcome (done or failed): what may have to
    /// wait for earlier frames.
    fn outcome_key(&self) -> Option<&FrameKey> {
        match self {
            StoreOp::Done { key, .. } | StoreOp::Failed { key, .. } => Some(key),
            StoreOp::Queued { .. }
            | StoreOp::Withdrawn { .. }
            | StoreOp::InHand { .. }
            | StoreOp::Released { .. } => None,
        }
    }
}

/// How the writer picks the run that new frames belong to.
#[derive(Debug, Clone)]
pub struct RunPolicy {
    /// The watched folders; a run continues only with the same folders.
    pub folders: Vec<PathBuf>,
    /// The settings in force as TOML, stored with a new run.
    pub settings_toml: String,
    /// Start a new run even when the last one could be continued.
    pub force_new: bool,
    /// A frame detected after this long without frames starts a new run.
    pub idle_gap_ms: i64,
}

/// Called after each commit with the identities that left the pipeline.
pub type CommitHook = Box<dyn FnMut(&[FrameKey]) + Send>;

/// Handle on the writer thread. Dropping every [`StoreOp`] sender ends it:
/// it commits what is left, marks the run ended, and returns.
pub struct Writer {
    thread: JoinHandle<()>,
    /// The run new frames are recorded in (a later one after an idle gap).
    pub run_id: i64,
}

/// The run the writer starts in: continued or new, chosen by [`open_run`].
#[derive(Debug, Clone, Copy)]
pub struct Run {
    /// The run's row id.
    pub id: i64,
    last_frame_at_ms: i64,
}

/// How the writer is fed and how it reports.
pub struct WriterSetup {
    /// Operations waiting before senders block.
    pub capacity: usize,
    /// Most operations committed in one transaction.
    pub max_batch: usize,
    /// Called after each commit with the identities that left the pipeline.
    pub on_commit: CommitHook,
    /// Judges each recorded frame inside the transaction; `None` = off.
    pub observer: Option<Box<dyn FrameObserver>>,
    /// Writes the kept label images after each commit; `None` = off.
    pub label_images: Option<LabelImageWriter>,
    /// The database's file and faults, shared with the service's other
    /// connections; checked on the writer's clock.
    pub health: Arc<DatabaseHealth>,
}

impl Writer {
    /// Starts the writer thread recording into `run` (from [`open_run`]).
    ///
    /// # Errors
    /// [`WriterError::Thread`] when the thread cannot start.
    pub fn start(
        conn: Connection,
        policy: RunPolicy,
        run: Run,
        setup: WriterSetup,
    ) -> Result<(Writer, Sender<StoreOp>), WriterError> {
        let (ops_tx, ops_rx) = crossbeam_channel::bounded(setup.capacity.max(1));
        let mut state = WriterState {
            conn,
            policy,
            run,
            on_commit: setup.on_commit,
            max_batch: setup.max_batch.max(1),
            observer: setup.observer,
            label_images: setup.label_images,
            held: Vec::new(),
            session_started_ms: now_ms(),
            health: setup.health,
            out_of_space: false,
            next_check: Instant::now(),
            next_tick: Instant::now() + OBSERVER_TICK,
            repeats: Repeats::default(),
        };
        let run_id = state.run.id;
        let thread = std::thread::Builder::new()
            .name("store-writer".into())
            .spawn(move || state.run_loop(&ops_rx))
            .map_err(WriterError::Thread)?;
        Ok((Writer { thread, run_id }, ops_tx))
    }

    /// True once the thread has ended: before every sender is dropped, only
    /// by a database fault ([`DatabaseHealth::fault`] says which) or a panic.
    pub fn is_finished(&self) -> bool {
        self.thread.is_finished()
    }

    /// Waits for the thread to flush and end (after all senders are dropped).
    pub fn join(self) {
        if self.thread.join().is_err() {
            tracing::error!("the store writer thread panicked");
        }
    }
}

struct WriterState {
    conn: Connection,
    policy: RunPolicy,
    run: Run,
    on_commit: CommitHook,
    max_batch: usize,
    observer: Option<Box<dyn FrameObserver>>,
    label_images: Option<LabelImageWriter>,
    /// Outcomes waiting for an earlier frame of their position (acquisition order).
    held: Vec<StoreOp>,
    /// Rows queued from this moment on are this session's: only they are
    /// waited for (a row an earlier process left queued may never come back).
    session_started_ms: i64,
    health: Arc<DatabaseHealth>,
    /// Whether the last commit failed for lack of space.
    out_of_space: bool,
    /// When the database's file is looked at next.
    next_check: Instant,
    /// When the observer's periodic checks run next.
    next_tick: Instant,
    /// The writer's repeated warnings (retries), limited.
    repeats: Repeats,
}

/// A recorded frame whose label image is kept: its op's place in the batch
/// and its row id.
type KeptImage = (usize, i64);

/// What one commit leaves: the places in the batch of the outcomes still
/// waiting for earlier frames, and the frames whose label image is kept.
#[derive(Default)]
struct Committed {
    /// False when the batch was given up.
    done: bool,
    waiting: Vec<usize>,
    kept: Vec<KeptImage>,
}

/// How often the writer lets the observer check for a stall and free space,
/// busy or idle.
const OBSERVER_TICK: Duration = Duration::from_secs(5);

/// How often the writer looks at its database file (deleted or replaced).
const HEALTH_CHECK: Duration = Duration::from_secs(1);

impl WriterState {
    fn run_loop(&mut self, ops_rx: &Receiver<StoreOp>) {
        // Group commit: block for one op, then take whatever else is already
        // waiting. Under load batches grow; when quiet a frame commits at once,
        // so batching never adds latency.
        loop {
            if self.on_clock().is_some() {
                break;
            }
            let wait = self
                .next_check
                .min(self.next_tick)
                .saturating_duration_since(Instant::now());
            let first = match ops_rx.recv_timeout(wait) {
                Ok(op) => op,
                Err(crossbeam_channel::RecvTimeoutError::Timeout) => continue,
                Err(crossbeam_channel::RecvTimeoutError::Disconnected) => break,
            };
            // Held outcomes first: they are older than anything new.
            let mut batch = std::mem::take(&mut self.held);
            let fresh = batch.len();
            batch.push(first);
            while batch.len() - fresh < self.max_batch {
                match ops_rx.try_recv() {
                    Ok(op) => batch.push(op),
                    Err(_) => break,
                }
            }
            let Committed {
                done,
                waiting,
                kept,
            } = self.commit_with_retry(&batch);
            if self.health.fault().is_some() {
                // Nothing of this batch is recorded; its frames are redone
                // at the next start.
                break;
            }
            if done {
                for op in &batch {
                    if let StoreOp::InHand { committed, .. } = op {
                        // The worker may have stopped waiting (shutdown).
                        let _ = committed.send(());
                    }
                }
            }
            if let Some(images) = &self.label_images {
                for (i, frame_id) in kept {
                    if let StoreOp::Done {
                        key, label_image, ..
                    } = &mut batch[i]
                    {
                        if let Some(runs) = label_image.take() {
                            images.write(frame_id, &key.path, runs);
                        }
                    }
                }
            }
            let mut finished: Vec<FrameKey> = Vec::new();
            for (i, op) in batch.into_iter().enumerate() {
                if waiting.contains(&i) {
                    self.held.push(op);
                } else if let Some(key) = op.finished_key() {
                    finished.push(key.clone());
                }
            }
            (self.on_commit)(&finished);
        }
        if let Some(fault) = self.health.fault() {
            self.stop_on(&fault);
            return;
        }
        if !self.held.is_empty() {
            tracing::info!(
                "{} results waiting for earlier frames stay queued; the next start redoes them",
                self.held.len()
            );
        }
        let ended = self.conn.execute(
            "UPDATE runs SET ended_at_ms = ?1 WHERE id = ?2",
            params![now_ms(), self.run.id],
        );
        if let Err(e) = ended {
            tracing::error!("cannot mark run {} ended: {e}", self.run.id);
        }
        if let Some(observer) = self.observer.take() {
            observer.close(Some(&self.conn));
        }
        // Everything into the database file and the log emptied, so that a
        // reader who cannot write the folder finds a database complete on its
        // own (see `store::open_read_only`).
        let checkpoint = self
            .conn
            .query_row("PRAGMA wal_checkpoint(TRUNCATE)", [], |r| {
                r.get::<_, i64>(0)
            });
        match checkpoint {
            Ok(0) => {}
            Ok(_) => tracing::warn!("the final checkpoint was blocked by a reader; the log stays"),
            Err(e) => tracing::warn!("the final checkpoint failed: {e}"),
        }
        if let Some(images) = self.label_images.take() {
            images.finish();
        }
    }

    /// The writer's clock, busy or idle: the database's file every
    /// [`HEALTH_CHECK`], the observer's periodic checks every
    /// [`OBSERVER_TICK`]. Returns the fault that ends the writer, if any
    /// (found here or by another connection).
    fn on_clock(&mut self) -> Option<DatabaseFault> {
        let now = Instant::now();
        if now >= self.next_check {
            self.next_check = now + HEALTH_CHECK;
            if let Some(fault) = self.health.check() {
                return Some(fault);
            }
        }
        if now >= self.next_tick {
            self.next_tick = now + OBSERVER_TICK;
            if let Some(observer) = self.observer.as_mut() {
                if let Err(e) = observer.tick(&self.conn) {
                    self.repeats
                        .error("observer tick", format_args!("quality control: {e}"));
                }
            }
        }
        self.health.fault()
    }

    /// Waits `pause` before a commit is tried again, keeping the clock;
    /// returns early with a fault.
    fn wait_to_retry(&mut self, pause: Duration) -> Option<DatabaseFault> {
        let until = Instant::now() + pause;
        loop {
            if let Some(fault) = self.on_clock() {
                return Some(fault);
            }
            let now = Instant::now();
            if now >= until {
                return None;
            }
            let next = self.next_check.min(self.next_tick).min(until);
            std::thread::sleep(next.saturating_duration_since(now));
        }
    }

    /// Ends the writer on a fault: nothing more is written into the
    /// database (not even the run's end), the observer announces the fault,
    /// and the kept label images already queued are written.
    fn stop_on(&mut self, fault: &DatabaseFault) {
        tracing::error!("{fault}");
        if let Some(mut observer) = self.observer.take() {
            observer.database_failed(fault);
            observer.close(None);
        }
        if let Some(images) = self.label_images.take() {
            images.finish();
        }
    }

    /// Commits `batch`, retrying: for as long as it takes while the database
    /// is busy, locked, full or failing I/O (conditions that clear: another
    /// program's transaction ends, space is freed), so nothing is dropped and
    /// the bounded channel holds the pipeline back meanwhile; up to
    /// `GIVE_UP_AFTER` attempts for any other error. A damaged database is
    /// not retried: it is a fault ([`DatabaseHealth::report`]), and so is a
    /// fault found on the clock while waiting to retry. A commit that fails
    /// for lack of space, and the first that succeeds after, are told to the
    /// observer. Returns the positions in `batch` of the outcomes still
    /// waiting for earlier frames.
    fn commit_with_retry(&mut self, batch: &[StoreOp]) -> Committed {
        const GIVE_UP_AFTER: u32 = 5;
        let mut attempt = 0u32;
        loop {
            attempt += 1;
            if let Some(observer) = self.observer.as_mut() {
                observer.begin();
            }
            let result = self.commit(batch);
            if let Some(observer) = self.observer.as_mut() {
                match result {
                    Ok(_) => observer.committed(),
                    Err(_) => observer.rolled_back(),
                }
            }
            match result {
                Ok(committed) => {
                    if std::mem::take(&mut self.out_of_space) {
                        if let Some(observer) = self.observer.as_mut() {
                            observer.out_of_space(&self.conn, None);
                        }
                    }
                    return committed;
                }
                Err(e) if self.health.report(&e) => return Committed::default(),
                Err(e) if attempt < GIVE_UP_AFTER || clears_by_itself(&e) => {
                    if is_out_of_space(&e, self.health.database()) && !self.out_of_space {
                        self.out_of_space = true;
                        if let Some(observer) = self.observer.as_mut() {
                            observer.out_of_space(&self.conn, Some(&e.to_string()));
                        }
                    }
                    self.repeats.warn(
                        "commit failed",
                        format_args!(
                            "store: commit of {} ops failed ({e}); retrying (attempt {attempt})",
                            batch.len()
                        ),
                    );
                    let pause = Duration::from_millis(200 * u64::from(attempt.min(25)));
                    if self.wait_to_retry(pause).is_some() {
                        return Committed::default();
                    }
                }
                Err(e) => {
                    // Nothing is lost for good: the frames stay unrecorded or
                    // queued, and the next start's catch-up scan redoes them.
                    self.repeats.error(
                        "batch given up",
                        format_args!("store: giving up on a batch of {} ops: {e}", batch.len()),
                    );
                    return Committed::default();
                }
            }
        }
    }

    fn commit(&mut self, batch: &[StoreOp]) -> rusqlite::Result<Committed> {
        let tx = self
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)?;
        let mut run = self.run;
        let session = self.session_started_ms;
        let observer = &mut self.observer;
        let images = self.label_images.as_ref();
        let mut done = Committed {
            done: true,
            ..Committed::default()
        };
        for (i, op) in batch.iter().enumerate() {
            if let Some(key) = op.outcome_key() {
                if waits_for_earlier(&tx, key, session)? {
                    // Its analysis is over (a stop now is not its doing); only
                    // its recording waits for earlier frames.
                    set_in_hand(&tx, key, false)?;
                    done.waiting.push(i);
                    continue;
                }
            }
            match op {
                StoreOp::Queued {
                    key,
                    detected_at_ms,
                    ready_at_ms,
                    names,
                } => {
                    if *detected_at_ms - run.last_frame_at_ms > self.policy.idle_gap_ms {
                        run = start_run(&tx, &self.policy, *detected_at_ms)?;
                        tracing::info!("no frames for a while: started run {}", run.id);
                    }
                    run.last_frame_at_ms = run.last_frame_at_ms.max(*detected_at_ms);
                    insert_queued(&tx, run.id, key, *detected_at_ms, *ready_at_ms, names)?;
                }
                StoreOp::Withdrawn { key } => {
                    tx.prepare_cached(&format!(
                        "DELETE FROM frames WHERE {FRAME_KEY_SQL} AND status = 'queued'"
                    ))?
                    .execute(key.sql_params())?;
                }
                StoreOp::InHand { key, .. } => set_in_hand(&tx, key, true)?,
                StoreOp::Released { key } => set_in_hand(&tx, key, false)?,
                StoreOp::Done { .. } | StoreOp::Failed { .. } => {
                    let recorded = record_outcome(&tx, op, observer.as_deref_mut())?;
                    done.kept
                        .extend(kept_image(op, recorded, images).map(|id| (i, id)));
                }
            }
            // What this op finished may free held outcomes: before anything later.
            if !done.waiting.is_empty() && op.finished_key().is_some() {
                release_waiting(&tx, batch, &mut done, session, observer, images)?;
            }
        }
        tx.execute(
            "UPDATE runs SET last_frame_at_ms = ?1, ended_at_ms = NULL WHERE id = ?2",
            params![run.last_frame_at_ms, run.id],
        )?;
        tx.commit()?;
        self.run = run;
        Ok(done)
    }
}

/// Records the held outcomes (positions in `batch`) that no longer wait,
/// until none moves; the others stay in `waiting`.
fn release_waiting(
    tx: &Transaction<'_>,
    batch: &[StoreOp],
    done: &mut Committed,
    session_started_ms: i64,
    observer: &mut Option<Box<dyn FrameObserver>>,
    images: Option<&LabelImageWriter>,
) -> rusqlite::Result<()> {
    loop {
        let before = done.waiting.len();
        let mut still = Vec::with_capacity(before);
        for &i in &done.waiting {
            let Some(key) = batch[i].outcome_key() else {
                continue;
            };
            if waits_for_earlier(tx, key, session_started_ms)? {
                still.push(i);
            } else {
                let recorded = record_outcome(tx, &batch[i], observer.as_deref_mut())?;
                done.kept
                    .extend(kept_image(&batch[i], recorded, images).map(|id| (i, id)));
            }
        }
        done.waiting = still;
        if done.waiting.len() == before {
            return Ok(());
        }
    }
}

/// The row id of a frame just recorded whose label image is kept: it carries
/// one, and the writer keeps images for every frame or for flagged ones and
/// this one was flagged.
fn kept_image(
    op: &StoreOp,
    recorded: Option<(i64, bool)>,
    images: Option<&LabelImageWriter>,
) -> Option<i64> {
    let (id, flagged) = recorded?;
    let carries = matches!(
        op,
        StoreOp::Done {
            label_image: Some(_),
            ..
        }
    );
    (carries && images?.keeps(flagged)).then_some(id)
}

/// Records a frame's outcome and lets the observer judge it. Returns the row
/// id of a frame recorded as done and judged, with whether it got a flag.
fn record_outcome(
    tx: &Transaction<'_>,
    op: &StoreOp,
    observer: Option<&mut (dyn FrameObserver + 'static)>,
) -> rusqlite::Result<Option<(i64, bool)>> {
    match op {
        StoreOp::Done {
            key,
            attempts,
            analysis,
            ..
        } => match record_done(tx, key, *attempts, analysis)? {
            Some((_, Version::SamePixels(earlier))) => tracing::info!(
                file = %shown(&key.path),
                "unchanged: a new version with the pixels of frame {earlier}; counted once"
            ),
            Some((id, version)) => {
                let flagged = match observer {
                    Some(observer) => {
                        observer.frame_done(tx, id, analysis, version == Version::Supersedes)?
                    }
                    None => false,
                };
                return Ok(Some((id, flagged)));
            }
            None => {}
        },
        StoreOp::Failed {
            key,
            attempts,
            reason,
        } => {
            if record_failed(tx, key, *attempts, reason)? {
                if let Some(observer) = observer {
                    observer.frame_failed(tx, key)?;
                }
            }
        }
        StoreOp::Queued { .. }
        | StoreOp::Withdrawn { .. }
        | StoreOp::InHand { .. }
        | StoreOp::Released { .. } => {}
    }
    Ok(None)
}

/// True while frame `key`'s position (well, site and channel) in its run has
/// a frame earlier in acquisition order that this session queued before it
/// and that is not finished yet. Per position, as the charts and baselines
/// are: a file another position is still retrying holds nobody else back.
fn waits_for_earlier(
    tx: &Transaction<'_>,
    key: &FrameKey,
    session_started_ms: i64,
) -> rusqlite::Result<bool> {
    let order =
        |t: &str| format!("(COALESCE({t}.time_point_index, -1), {t}.acquired_ns, {t}.file)");
    tx.prepare_cached(&format!(
        "SELECT EXISTS (SELECT 1 FROM frames AS f JOIN frames AS e ON e.run_id = f.run_id
             WHERE f.file = ?1 AND f.size_bytes = ?2 AND f.mtime_ns = ?3
               AND e.status = 'queued' AND e.id < f.id AND e.ready_at_ms >= ?4
               AND e.well IS f.well AND e.site IS f.site AND e.channel IS f.channel
               AND {} < {})",
        order("e"),
        order("f")
    ))?
    .query_row(
        params![
            key.path,
            key.size_bytes as i64,
            key.mtime_ns,
            session_started_ms
        ],
        |r| r.get(0),
    )
}

/// A done frame compared with the version of it already recorded.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Version {
    /// No earlier version in the run.
    First,
    /// Other pixels than the earlier version, which it supersedes.
    Supersedes,
    /// The pixels of the frame with this id: recorded, not counted again.
    SamePixels(i64),
}

/// SQLite errors that go away without anything changing in framewarden.
fn clears_by_itself(e: &rusqlite::Error) -> bool {
    use rusqlite::ErrorCode::{DatabaseBusy, DatabaseLocked, DiskFull, SystemIoFailure};
    matches!(
        e.sqlite_error_code(),
        Some(DatabaseBusy | DatabaseLocked | DiskFull | SystemIoFailure)
    )
}

/// Continues the last run when it watched the same folders and saw a frame
/// within the idle gap (a restart mid-acquisition); starts a new one otherwise.
///
/// # Errors
/// SQLite errors.
pub fn open_run(conn: &mut Connection, policy: &RunPolicy) -> rusqlite::Result<Run> {
    let tx = conn.transaction_with_behavior(TransactionBehavior::Immediate)?;
    let now = now_ms();
    let last: Option<(i64, String, i64)> = tx
        .query_row(
            "SELECT id, folders, last_frame_at_ms FROM runs ORDER BY id DESC LIMIT 1",
            [],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .optional()?;
    let run = match last {
        Some((id, folders, last_frame_at_ms))
            if !policy.force_new
                && folders == folders_json(policy)
                && now - last_frame_at_ms <= policy.idle_gap_ms =>
        {
            tx.execute("UPDATE runs SET ended_at_ms = NULL WHERE id = ?1", [id])?;
            tracing::info!("continuing run {id}");
            Run {
                id,
                last_frame_at_ms,
            }
        }
        _ => {
            let run = start_run(&tx, policy, now)?;
            tracing::info!("started run {}", run.id);
            run
        }
    };
    tx.commit()?;
    Ok(run)
}

fn folders_json(policy: &RunPolicy) -> String {
    let folders: Vec<String> = policy
        .folders
        .iter()
        .map(|f| f.to_string_lossy().into_owned())
        .collect();
    serde_json::Value::from(folders).to_string()
}

fn start_run(tx: &Transaction<'_>, policy: &RunPolicy, at_ms: i64) -> rusqlite::Result<Run> {
    tx.execute(
        "UPDATE runs SET ended_at_ms = ?1 WHERE ended_at_ms IS NULL",
        [at_ms],
    )?;
    tx.execute(
        "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings, settings_format)
         VALUES (?1, ?2, ?2, ?3, 'toml')",
        params![folders_json(policy), at_ms, policy.settings_toml],
    )?;
    Ok(Run {
        id: tx.last_insert_rowid(),
        last_frame_at_ms: at_ms,
    })
}

fn insert_queued(
    tx: &Transaction<'_>,
    run_id: i64,
    key: &FrameKey,
    detected_at_ms: i64,
    ready_at_ms: i64,
    names: &NameParts,
) -> rusqlite::Result<()> {
    let name_parts =
        (!names.all.is_empty()).then(|| serde_json::to_string(&names.all).unwrap_or_default());
    // DO NOTHING on a known identity: re-queueing after a restart, or a second
    // sighting of the same version, leaves the existing row alone. A new
    // version of a file (of a stack's page) keeps the acquisition time of the
    // run's first one.
    tx.prepare_cached(
        "INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status, detected_at_ms, ready_at_ms,
                             well, site, time_point, channel, name_parts, time_point_index, acquired_ns, page)
         VALUES (?1, ?2, ?3, ?4, (SELECT COALESCE(MAX(version), 0) + 1 FROM frames WHERE file = ?2 AND page IS ?13),
                 'queued', ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12,
                 COALESCE((SELECT MIN(acquired_ns) FROM frames WHERE file = ?2 AND page IS ?13 AND run_id = ?1), ?4),
                 ?13)
         ON CONFLICT (file, size_bytes, mtime_ns) DO NOTHING",
    )?
    .execute(params![
        run_id,
        key.path,
        key.size_bytes as i64,
        key.mtime_ns,
        detected_at_ms,
        ready_at_ms,
        names.well,
        names.site,
        names.time_point,
        names.channel,
        name_parts,
        names.time_point_index(),
        key.page.map(|p| p as i64),
    ])?;
    Ok(())
}

/// Marks a queued frame as in a worker's hand, or no longer.
fn set_in_hand(tx: &Transaction<'_>, key: &FrameKey, in_hand: bool) -> rusqlite::Result<()> {
    let (path, size, mtime) = key.sql_params();
    tx.prepare_cached(&format!(
        "UPDATE frames SET in_hand = ?4 WHERE {FRAME_KEY_SQL} AND status = 'queued'"
    ))?
    .execute(params![path, size, mtime, in_hand])?;
    Ok(())
}

/// The columns of a frame's result that an analysis fills (in `frames` for
/// the watch service's analysis, in `analysis_frames` for a reprocess), in
/// the order of [`result_values`].
pub const RESULT_COLUMNS: &str = "width, height, bit_depth, method, threshold, separability, \
     object_count, foreground_fraction, background_level, saturation_fraction, focus, \
     illumination_change, pixel_size_um, pixel_size_source, bimodality, size_filtered, \
     merged_fraction, pixel_hash, recount_threshold, recount_object_count, count_source, \
     dim_objects, dim_level";

/// The values of [`RESULT_COLUMNS`] for one file's analysis; the recount's
/// threshold, count and `count_source = 'recount'` where it ran, else NULL.
pub fn result_values(analysis: &FileAnalysis) -> Vec<Value> {
    let r = &analysis.result;
    let real = Value::Real;
    let int = |n: usize| Value::Integer(n as i64);
    let recount = analysis.recount.as_ref();
    vec![
        int(r.width),
        int(r.height),
        Value::Integer(i64::from(r.bit_depth)),
        Value::Text(r.method.clone()),
        real(r.threshold),
        real(r.separability),
        int(r.object_count),
        real(r.foreground_fraction),
        real(r.background_level),
        real(r.saturation_fraction),
        real(r.focus),
        real(r.illumination_change),
        r.pixel_size_um.map_or(Value::Null, real),
        analysis
            .pixel_size_source
            .map_or(Value::Null, |s| Value::Text(s.as_str().into())),
        real(r.bimodality),
        int(r.size_filtered),
        real(r.merged_fraction),
        Value::Integer(analysis.pixel_hash as i64),
        recount.map_or(Value::Null, |c| real(c.threshold)),
        recount.map_or(Value::Null, |c| int(c.object_count)),
        recount.map_or(Value::Null, |_| Value::Text("recount".into())),
        int(r.dim_objects),
        r.dim_level.map_or(Value::Null, real),
    ]
}

/// `?first, ?first+1, …`: one numbered placeholder per [`RESULT_COLUMNS`] entry.
pub fn result_placeholders(first: usize) -> String {
    let n = RESULT_COLUMNS.split(',').count();
    (first..first + n)
        .map(|i| format!("?{i}"))
        .collect::<Vec<_>>()
        .join(", ")
}

/// Returns the frame's id and how it stands to an earlier version, or `None`
/// when there was no unfinished row to complete.
fn record_done(
    tx: &Transaction<'_>,
    key: &FrameKey,
    attempts: u32,
    analysis: &FileAnalysis,
) -> rusqlite::Result<Option<(i64, Version)>> {
    let r = &analysis.result;
    let now = now_ms();
    let mut values = vec![
        Value::Text(key.path.clone()),
        Value::Integer(key.size_bytes as i64),
        Value::Integer(key.mtime_ns),
        Value::Integer(i64::from(attempts)),
        Value::Integer(now),
    ];
    values.extend(result_values(analysis));
    let frame_id: Option<(i64, i64, Position)> = tx
        .prepare_cached(&format!(
            "UPDATE frames SET status = 'done', in_hand = 0, error = NULL, attempts = ?4, analyzed_at_ms = ?5,
                 latency_ms = MAX(0, ?5 - ready_at_ms), ({RESULT_COLUMNS}) = ({})
             WHERE {FRAME_KEY_SQL} AND status <> 'done'
             RETURNING id, run_id, time_point, well, site, channel",
            result_placeholders(6)
        ))?
        .query_row(rusqlite::params_from_iter(values), |row| {
            Ok((
                row.get(0)?,
                row.get(1)?,
                Position {
                    time_point: row.get(2)?,
                    well: row.get(3)?,
                    site: row.get(4)?,
                    channel: row.get(5)?,
                },
            ))
        })
        .optional()?;
    let Some((frame_id, run_id, position)) = frame_id else {
        tracing::warn!(
            "store: {} has no queued row to complete; skipped",
            shown(&key.path)
        );
        return Ok(None);
    };
    let version = compare_with_earlier(tx, frame_id, run_id, key, &position, analysis.pixel_hash)?;
    tx.prepare_cached("DELETE FROM objects WHERE frame_id = ?1")?
        .execute([frame_id])?;
    if !matches!(version, Version::SamePixels(_)) {
        insert_objects(tx, ObjectsOf::Watch, frame_id, "raw", &r.objects)?;
        if let Some(recount) = &analysis.recount {
            insert_objects(tx, ObjectsOf::Watch, frame_id, "recount", &recount.objects)?;
        }
    }
    Ok(Some((frame_id, version)))
}

/// A frame row's place: the parts of its name that make its position
/// ([`crate::store::POSITION_SQL`]) and its time point.
struct Position {
    time_point: Option<String>,
    well: Option<String>,
    site: Option<String>,
    channel: Option<String>,
}

/// Finds the version of frame `frame_id` already counted in the run (the same
/// file (and page, for a stack's page), or the same position and time point
/// when the pattern names one) and
/// marks whichever row no longer counts: this one when its pixels are the
/// same, the earlier one when they differ.
fn compare_with_earlier(
    tx: &Transaction<'_>,
    frame_id: i64,
    run_id: i64,
    key: &FrameKey,
    at: &Position,
    pixel_hash: u64,
) -> rusqlite::Result<Version> {
    // Two indexed look-ups (by file; by well and time point), not one scan.
    let earlier: Option<(i64, Option<i64>, String)> = tx
        .prepare_cached(&format!(
            "SELECT id, pixel_hash, status FROM frames
             WHERE id IN (SELECT id FROM frames WHERE file = ?3 AND page IS ?8
                          UNION ALL
                          SELECT id FROM frames WHERE ?4 IS NOT NULL AND well IS ?5 AND time_point = ?4
                                                  AND site IS ?6 AND channel IS ?7)
               AND run_id = ?1 AND id <> ?2 AND status IN ('done', 'failed') AND {COUNTED_SQL}
             ORDER BY id DESC LIMIT 1"
        ))?
        .query_row(
            params![
                run_id,
                frame_id,
                key.path,
                at.time_point,
                at.well,
                at.site,
                at.channel,
                key.page.map(|p| p as i64)
            ],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .optional()?;
    let Some((earlier, earlier_hash, status)) = earlier else {
        return Ok(Version::First);
    };
    if status == "done" && earlier_hash == Some(pixel_hash as i64) {
        tx.prepare_cached("UPDATE frames SET same_pixels_as = ?2 WHERE id = ?1")?
            .execute([frame_id, earlier])?;
        Ok(Version::SamePixels(earlier))
    } else {
        tx.prepare_cached("UPDATE frames SET superseded_by = ?2 WHERE id = ?1")?
            .execute([earlier, frame_id])?;
        Ok(Version::Supersedes)
    }
}

/// Objects per INSERT statement: a multi-row statement costs far less per row
/// than one statement per object (hundreds of objects per frame).
const OBJECTS_PER_INSERT: usize = 32;

/// Which analysis objects are recorded for: the watch service's own (table
/// `objects`) or a reprocess's (`analysis_objects`, by `analyses.id`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ObjectsOf {
    /// The watch service's analysis: `objects`.
    Watch,
    /// The analysis with this `analyses.id`: `analysis_objects`.
    Analysis(i64),
}

/// Records `objects` of `frame_id`'s result `result` (`raw` or `recount`).
///
/// # Errors
/// SQLite errors.
pub fn insert_objects(
    tx: &Connection,
    of: ObjectsOf,
    frame_id: i64,
    result: &str,
    objects: &[ObjectMeasures],
) -> rusqlite::Result<()> {
    let (table, first, first_value) = match of {
        ObjectsOf::Watch => ("objects", "", None),
        ObjectsOf::Analysis(id) => ("analysis_objects", "analysis_id, ", Some(id)),
    };
    let width = 21 + usize::from(first_value.is_some());
    for chunk in objects.chunks(OBJECTS_PER_INSERT) {
        let row = format!("({})", vec!["?"; width].join(", "));
        let sql = format!(
            "INSERT INTO {table} ({first}frame_id, result, label, area_px, area_um2, centroid_x, centroid_y,
                 bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
                 max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px, eccentricity,
                 solidity, channels)
             VALUES {}",
            vec![row.as_str(); chunk.len()].join(", ")
        );
        let mut values: Vec<Value> = Vec::with_capacity(chunk.len() * width);
        for o in chunk {
            let channels = (!o.channels.is_empty())
                .then(|| serde_json::to_string(&o.channels).unwrap_or_default());
            values.extend(first_value.map(Value::Integer));
            values.extend([
                Value::Integer(frame_id),
                Value::Text(result.to_owned()),
                Value::Integer(i64::from(o.label)),
                Value::Integer(o.area_px as i64),
                o.area_um2.map_or(Value::Null, Value::Real),
                Value::Real(o.centroid_x),
                Value::Real(o.centroid_y),
                Value::Integer(i64::from(o.bbox[0])),
                Value::Integer(i64::from(o.bbox[1])),
                Value::Integer(i64::from(o.bbox[2])),
                Value::Integer(i64::from(o.bbox[3])),
                Value::Real(o.mean_intensity),
                Value::Real(o.integrated_intensity),
                Value::Real(o.max_intensity),
                Value::Real(o.perimeter_px),
                Value::Real(o.circularity),
                Value::Real(o.major_axis_px),
                Value::Real(o.minor_axis_px),
                Value::Real(o.eccentricity),
                Value::Real(o.solidity),
                channels.map_or(Value::Null, Value::Text),
            ]);
        }
        // Two statement shapes in practice (full chunks and the remainder), both cached.
        tx.prepare_cached(&sql)?
            .execute(rusqlite::params_from_iter(values))?;
    }
    Ok(())
}

/// Returns whether a row was marked failed.
fn record_failed(
    tx: &Transaction<'_>,
    key: &FrameKey,
    attempts: u32,
    reason: &str,
) -> rusqlite::Result<bool> {
    let changed = tx
        .prepare_cached(&format!(
            "UPDATE frames SET status = 'failed', in_hand = 0, error = ?4, attempts = ?5, analyzed_at_ms = ?6,
             latency_ms = MAX(0, ?6 - ready_at_ms)
             WHERE {FRAME_KEY_SQL} AND status <> 'done'"
        ))?
        .execute(params![
            key.path,
            key.size_bytes as i64,
            key.mtime_ns,
            reason,
            attempts,
            now_ms()
        ])?;
    Ok(changed > 0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::FrameResult;
    use crate::store::{lookup, open_for_writing, queued_frames, FrameStatus};
    use std::sync::{Arc, Mutex};

    fn key(path: &str, size: u64) -> FrameKey {
        FrameKey {
            path: path.into(),
            size_bytes: size,
            mtime_ns: 7,
            page: None,
        }
    }

    fn queued(k: &FrameKey) -> StoreOp {
        StoreOp::Queued {
            key: k.clone(),
            detected_at_ms: now_ms(),
            ready_at_ms: now_ms(),
            names: NameParts::default(),
        }
    }

    fn analysis(objects: usize) -> Box<FileAnalysis> {
        let object = crate::analysis::ObjectMeasures {
            label: 1,
            area_px: 4,
            area_um2: None,
            centroid_x: 1.0,
            centroid_y: 1.0,
            bbox: [0, 0, 2, 2],
            mean_intensity: 9.0,
            integrated_intensity: 36.0,
            max_intensity: 9.0,
            perimeter_px: 8.0,
            circularity: 0.8,
            major_axis_px: 2.0,
            minor_axis_px: 2.0,
            eccentricity: 0.0,
            solidity: 1.0,
            channels: vec![],
        };
        let objects: Vec<_> = (0..objects)
            .map(|i| crate::analysis::ObjectMeasures {
                label: i as u32 + 1,
                ..object.clone()
            })
            .collect();
        let pixel_hash = objects.len() as u64;
        Box::new(FileAnalysis {
            result: FrameResult {
                width: 4,
                height: 4,
                bit_depth: 8,
                method: "otsu".into(),
                threshold: 3.0,
                separability: 0.9,
                bimodality: 0.8,
                object_count: objects.len(),
                size_filtered: 0,
                merged_fraction: 0.0,
                dim_objects: 0,
                dim_level: None,
                foreground_fraction: 0.25,
                background_level: 1.0,
                saturation_fraction: 0.0,
                focus: 2.0,
                illumination_change: 0.0,
                pixel_size_um: None,
                objects,
            },
            pixel_size_source: None,
            pixel_hash,
            recount: None,
        })
    }

    fn policy(force_new: bool) -> RunPolicy {
        RunPolicy {
            folders: vec!["/acq".into()],
            settings_toml: "s".into(),
            force_new,
            idle_gap_ms: 3_600_000,
        }
    }

    /// Opens the run and starts a writer without an observer.
    fn start(
        mut conn: Connection,
        policy: RunPolicy,
        capacity: usize,
        on_commit: CommitHook,
    ) -> (Writer, Sender<StoreOp>) {
        let run = open_run(&mut conn, &policy).unwrap();
        let db = std::path::PathBuf::from(conn.path().unwrap());
        let setup = WriterSetup {
            capacity,
            max_batch: capacity,
            on_commit,
            observer: None,
            label_images: None,
            health: Arc::new(DatabaseHealth::new(&db)),
        };
        Writer::start(conn, policy, run, setup).unwrap()
    }

    #[test]
    fn a_frame_is_in_hand_from_its_committed_mark_until_released_or_finished() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let (writer, tx) = start(
            open_for_writing(&db).unwrap(),
            policy(false),
            16,
            Box::new(|_| {}),
        );
        let reader = crate::store::open_read_only(&db).unwrap();
        let in_hand = |k: &FrameKey| -> i64 {
            reader
                .query_row(
                    &format!("SELECT in_hand FROM frames WHERE {FRAME_KEY_SQL}"),
                    k.sql_params(),
                    |r| r.get(0),
                )
                .unwrap()
        };
        let (a, b, waiting) = (
            key("/acq/a.tif", 10),
            key("/acq/b.tif", 10),
            key("/acq/w.tif", 10),
        );
        for k in [&a, &b, &waiting] {
            tx.send(queued(k)).unwrap();
        }
        for k in [&a, &b] {
            let (committed, on_commit) = crossbeam_channel::bounded(1);
            tx.send(StoreOp::InHand {
                key: k.clone(),
                committed,
            })
            .unwrap();
            // Told only once the mark is stored: it is there when the answer comes.
            on_commit.recv().unwrap();
            assert_eq!(in_hand(k), 1);
        }
        assert_eq!(in_hand(&waiting), 0, "a frame only waiting is not in hand");
        tx.send(StoreOp::Released { key: a.clone() }).unwrap();
        tx.send(StoreOp::Done {
            key: b.clone(),
            attempts: 1,
            analysis: analysis(1),
            label_image: None,
        })
        .unwrap();
        drop(tx);
        writer.join();
        assert_eq!((in_hand(&a), in_hand(&b)), (0, 0));
    }

    #[test]
    fn records_are_idempotent_and_finished_keys_are_reported() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let seen = Arc::new(Mutex::new(Vec::new()));
        let hook_seen = Arc::clone(&seen);
        let (writer, tx) = start(
            open_for_writing(&db).unwrap(),
            policy(false),
            16,
            Box::new(move |keys| hook_seen.lock().unwrap().extend_from_slice(keys)),
        );
        let a = key("/acq/a.tif", 10);
        let b = key("/acq/b.tif", 10);
        let c = key("/acq/c.tif", 10);
        for op in [queued(&a), queued(&a), queued(&b), queued(&c)] {
            tx.send(op).unwrap();
        }
        tx.send(StoreOp::Done {
            key: a.clone(),
            attempts: 1,
            analysis: analysis(3),
            label_image: None,
        })
        .unwrap();
        // A repeated completion (e.g. redone after a crash) neither duplicates
        // the frame nor its objects.
        tx.send(StoreOp::Done {
            key: a.clone(),
            attempts: 1,
            analysis: analysis(3),
            label_image: None,
        })
        .unwrap();
        tx.send(StoreOp::Failed {
            key: b.clone(),
            attempts: 2,
            reason: "not a TIFF".into(),
        })
        .unwrap();
        tx.send(StoreOp::Withdrawn { key: c.clone() }).unwrap();
        drop(tx);
        writer.join();

        let conn = open_for_writing(&db).unwrap();
        assert_eq!(lookup(&conn, &a).unwrap(), Some(FrameStatus::Done));
        assert_eq!(lookup(&conn, &b).unwrap(), Some(FrameStatus::Failed));
        assert_eq!(lookup(&conn, &c).unwrap(), None);
        let frames: i64 = conn
            .query_row("SELECT count(*) FROM frames", [], |r| r.get(0))
            .unwrap();
        let objects: i64 = conn
            .query_row("SELECT count(*) FROM objects", [], |r| r.get(0))
            .unwrap();
        assert_eq!((frames, objects), (2, 3));
        let ended: Option<i64> = conn
            .query_row("SELECT ended_at_ms FROM runs", [], |r| r.get(0))
            .unwrap();
        assert!(ended.is_some());
        let reported = seen.lock().unwrap().clone();
        assert_eq!(reported, vec![a.clone(), a, b, c]);
    }

    #[test]
    fn label_images_are_written_for_recorded_rows_under_their_ids() {
        use crate::store::label_images::LabelImageWriter;
        use crate::store::{label_image_path, LabelImages};
        let dir = tempfile::tempdir().unwrap();
        for keep in [LabelImages::All, LabelImages::Flagged] {
            let db = dir.path().join(format!("{}.db", keep.name()));
            let mut conn = open_for_writing(&db).unwrap();
            let policy = policy(false);
            let run = open_run(&mut conn, &policy).unwrap();
            let setup = WriterSetup {
                capacity: 8,
                max_batch: 8,
                on_commit: Box::new(|_| {}),
                // Without an observer no frame is flagged.
                observer: None,
                label_images: LabelImageWriter::start(&db, keep).unwrap(),
                health: Arc::new(DatabaseHealth::new(&db)),
            };
            let (w, tx) = Writer::start(conn, policy, run, setup).unwrap();
            let a = key("/acq/a.tif", 10);
            let done = |k: &FrameKey, labels: &[u32]| StoreOp::Done {
                key: k.clone(),
                attempts: 1,
                analysis: analysis(1),
                label_image: Some(LabelRuns::new(2, 1, labels).unwrap()),
            };
            tx.send(queued(&a)).unwrap();
            tx.send(done(&a, &[0, 1])).unwrap();
            // Done again (redone after a crash): the row is not completed
            // again, so its image is not replaced.
            tx.send(done(&a, &[1, 1])).unwrap();
            // No queued row to complete: no row, no image.
            tx.send(done(&key("/acq/b.tif", 10), &[1, 0])).unwrap();
            drop(tx);
            w.join();
            let id: i64 = open_for_writing(&db)
                .unwrap()
                .query_row("SELECT id FROM frames", [], |r| r.get(0))
                .unwrap();
            let path = label_image_path(&db, id);
            let folder = path.parent().unwrap();
            if keep == LabelImages::Flagged {
                assert!(!folder.exists(), "nothing flagged, no folder");
                continue;
            }
            let limits = crate::decode::DecodeLimits::default();
            let image = crate::decode::read_page(&path, 0, &limits).unwrap();
            assert_eq!(image.pixels, vec![0, 1]);
            assert_eq!(std::fs::read_dir(folder).unwrap().count(), 1);
        }
    }

    #[test]
    fn both_results_of_a_flattened_frame_keep_their_objects() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let (w, tx) = start(
            open_for_writing(&db).unwrap(),
            policy(false),
            4,
            Box::new(|_| {}),
        );
        let a = key("/acq/a.tif", 10);
        let mut two_results = analysis(3);
        two_results.recount = Some(analysis(5).result);
        tx.send(queued(&a)).unwrap();
        for _ in 0..2 {
            // Done twice (redone after a crash): still one set of each.
            tx.send(StoreOp::Done {
                key: a.clone(),
                attempts: 1,
                analysis: two_results.clone(),
                label_image: None,
            })
            .unwrap();
        }
        drop(tx);
        w.join();
        let conn = open_for_writing(&db).unwrap();
        let per_result: Vec<(String, i64)> = conn
            .prepare("SELECT result, count(*) FROM objects GROUP BY result ORDER BY result")
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        assert_eq!(per_result, vec![("raw".into(), 3), ("recount".into(), 5)]);
    }

    #[test]
    fn a_batch_waits_out_a_long_lock_and_is_recorded() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let conn = open_for_writing(&db).unwrap();
        // A short busy timeout, so that the lock below outlasts what five
        // attempts would wait (5 x 50 ms + 200 + 400 + 600 + 800 ms).
        conn.busy_timeout(Duration::from_millis(50)).unwrap();
        let (w, tx) = start(conn, policy(false), 4, Box::new(|_| {}));
        let locker = open_for_writing(&db).unwrap();
        locker.execute_batch("BEGIN IMMEDIATE").unwrap();
        let a = key("/acq/a.tif", 10);
        tx.send(queued(&a)).unwrap();
        tx.send(StoreOp::Done {
            key: a.clone(),
            attempts: 1,
            analysis: analysis(2),
            label_image: None,
        })
        .unwrap();
        std::thread::sleep(Duration::from_millis(3500));
        locker.execute_batch("ROLLBACK").unwrap();
        drop(tx);
        w.join();
        assert_eq!(lookup(&locker, &a).unwrap(), Some(FrameStatus::Done));
    }

    #[test]
    fn a_rewrite_is_a_new_version_and_restarts_continue_the_run() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let first = key("/acq/a.tif", 10);
        let second = key("/acq/a.tif", 20);
        let (w, tx) = start(
            open_for_writing(&db).unwrap(),
            policy(false),
            4,
            Box::new(|_| {}),
        );
        let run1 = w.run_id;
        tx.send(queued(&first)).unwrap();
        drop(tx);
        w.join();
        let (w, tx) = start(
            open_for_writing(&db).unwrap(),
            policy(false),
            4,
            Box::new(|_| {}),
        );
        assert_eq!(w.run_id, run1, "a restart continues the run");
        tx.send(queued(&second)).unwrap();
        drop(tx);
        w.join();
        let conn = open_for_writing(&db).unwrap();
        let versions: Vec<i64> = conn
            .prepare("SELECT version FROM frames ORDER BY version")
            .unwrap()
            .query_map([], |r| r.get(0))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        assert_eq!(versions, vec![1, 2]);
        assert_eq!(queued_frames(&conn).unwrap().len(), 2);
        drop(conn);
        let (w, tx) = start(
            open_for_writing(&db).unwrap(),
            policy(true),
            4,
            Box::new(|_| {}),
        );
        assert_ne!(w.run_id, run1, "a new run on request");
        drop(tx);
        w.join();
    }

    /// The files judged, in order, and whether each superseded a frame.
    type JudgedLog = Arc<Mutex<Vec<(String, bool)>>>;

    /// Records which frames the observer was asked to judge, in order.
    struct Judged(JudgedLog);

    impl FrameObserver for Judged {
        fn begin(&mut self) {}
        fn frame_done(
            &mut self,
            tx: &Transaction<'_>,
            frame_id: i64,
            _analysis: &FileAnalysis,
            supersedes: bool,
        ) -> rusqlite::Result<bool> {
            let file: String =
                tx.query_row("SELECT file FROM frames WHERE id = ?1", [frame_id], |r| {
                    r.get(0)
                })?;
            self.0.lock().unwrap().push((file, supersedes));
            Ok(false)
        }
        fn frame_failed(&mut self, _: &Transaction<'_>, key: &FrameKey) -> rusqlite::Result<()> {
            self.0.lock().unwrap().push((key.path.clone(), false));
            Ok(())
        }
        fn committed(&mut self) {}
        fn rolled_back(&mut self) {}
        fn tick(&mut self, _: &Connection) -> rusqlite::Result<()> {
            Ok(())
        }
        fn out_of_space(&mut self, _: &Connection, _: Option<&str>) {}
        fn database_failed(&mut self, _: &DatabaseFault) {}
        fn close(self: Box<Self>, _: Option<&Connection>) {}
    }

    fn start_judged(db: &std::path::Path) -> (Writer, Sender<StoreOp>, JudgedLog) {
        let mut conn = open_for_writing(db).unwrap();
        let run = open_run(&mut conn, &policy(false)).unwrap();
        let judged = Arc::new(Mutex::new(Vec::new()));
        let setup = WriterSetup {
            capacity: 16,
            max_batch: 16,
            on_commit: Box::new(|_| {}),
            observer: Some(Box::new(Judged(Arc::clone(&judged)))),
            label_images: None,
            health: Arc::new(DatabaseHealth::new(db)),
        };
        let (w, tx) = Writer::start(conn, policy(false), run, setup).unwrap();
        (w, tx, judged)
    }

    fn queued_at(k: &FrameKey, time_point: &str) -> StoreOp {
        StoreOp::Queued {
            key: k.clone(),
            detected_at_ms: now_ms(),
            ready_at_ms: now_ms(),
            names: NameParts {
                well: Some("A01".into()),
                time_point: Some(time_point.into()),
                ..NameParts::default()
            },
        }
    }

    fn done(k: &FrameKey, analysis: Box<FileAnalysis>) -> StoreOp {
        StoreOp::Done {
            key: k.clone(),
            attempts: 1,
            analysis,
            label_image: None,
        }
    }

    /// Workers finish in any order; the observer judges in acquisition order:
    /// time point 2's result waits (its row stays queued) until time point 1's
    /// is in, and a file that shows up later never holds an earlier one back.
    #[test]
    fn results_are_judged_in_acquisition_order_whatever_order_they_finish_in() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let (w, tx, judged) = start_judged(&db);
        // Names in the opposite order to the time points: the time point rules.
        let t1 = key("/acq/z_t1.tif", 10);
        let t2 = key("/acq/y_t2.tif", 10);
        let t0 = key("/acq/x_t0.tif", 10);
        tx.send(queued_at(&t1, "t1")).unwrap();
        tx.send(queued_at(&t2, "t2")).unwrap();
        tx.send(done(&t2, analysis(2))).unwrap();
        // Give the writer time to commit (and hold) time point 2 on its own.
        std::thread::sleep(Duration::from_millis(300));
        let reader = open_for_writing(&db).unwrap();
        assert_eq!(lookup(&reader, &t2).unwrap(), Some(FrameStatus::Queued));
        assert!(judged.lock().unwrap().is_empty());
        tx.send(done(&t1, analysis(1))).unwrap();
        // Queued after the others, earlier in time: not waited for by them,
        // and judged when it comes.
        tx.send(queued_at(&t0, "t0")).unwrap();
        tx.send(done(&t0, analysis(3))).unwrap();
        drop(tx);
        w.join();
        let order: Vec<String> = judged.lock().unwrap().iter().map(|j| j.0.clone()).collect();
        assert_eq!(order, [t1.path.clone(), t2.path.clone(), t0.path.clone()]);
        assert_eq!(lookup(&reader, &t2).unwrap(), Some(FrameStatus::Done));
    }

    /// A new version with the same pixels is recorded and not judged or
    /// counted; one with other pixels supersedes the counted version.
    #[test]
    fn a_new_version_with_the_same_pixels_counts_once_and_other_pixels_supersede() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let (w, tx, judged) = start_judged(&db);
        let v1 = key("/acq/a_t1.tif", 10);
        let touched = FrameKey {
            mtime_ns: 8,
            ..v1.clone()
        };
        let rewritten = key("/acq/a_t1.tif", 12);
        for (k, objects) in [(&v1, 2), (&touched, 2), (&rewritten, 5)] {
            tx.send(queued_at(k, "1")).unwrap();
            // The test's analyses hash as their object count.
            tx.send(done(k, analysis(objects))).unwrap();
        }
        drop(tx);
        w.join();
        assert_eq!(
            *judged.lock().unwrap(),
            [(v1.path.clone(), false), (v1.path.clone(), true)]
        );
        let conn = open_for_writing(&db).unwrap();
        let rows: Vec<(i64, Option<i64>, Option<i64>, i64)> = conn
            .prepare(
                "SELECT id, same_pixels_as, superseded_by,
                        (SELECT count(*) FROM objects WHERE frame_id = frames.id)
                 FROM frames ORDER BY id",
            )
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        assert_eq!(
            rows,
            [
                (1, None, Some(3), 2),
                (2, Some(1), None, 0),
                (3, None, None, 5)
            ]
        );
        let counted: i64 = conn
            .query_row(
                &format!("SELECT count(*) FROM frames WHERE {COUNTED_SQL}"),
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert_eq!(counted, 1);
    }
}
