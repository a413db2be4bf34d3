//! The single writer: one thread owns the write connection and records frames in
//! batched IMMEDIATE transactions, fed by a bounded channel.
//!
//! Every write is idempotent on the frame identity (file + size + mtime), so a
//! crash and restart redoes at most the frames in flight and never duplicates a
//! row. Deciding *what* to record is the watcher's job, and judging a recorded
//! frame is the [`FrameObserver`]'s (quality control implements it); this file
//! only records and calls the observer inside its transaction.

use std::path::PathBuf;
use std::thread::JoinHandle;
use std::time::Duration;

use crossbeam_channel::{Receiver, Sender};
use rusqlite::{params, Connection, OptionalExtension, Transaction, TransactionBehavior};

use crate::analysis::ObjectMeasures;
use crate::naming::NameParts;
use crate::pipeline::FileAnalysis;
use crate::store::{now_ms, FrameKey, FRAME_KEY_SQL};
use crate::text::shown;

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
    /// Frame `frame_id` was just recorded as done with `analysis`.
    ///
    /// # Errors
    /// SQLite errors (the transaction is rolled back and retried).
    fn frame_done(
        &mut self,
        tx: &Transaction<'_>,
        frame_id: i64,
        analysis: &FileAnalysis,
    ) -> rusqlite::Result<()>;
    /// The frame `key` was just recorded as failed.
    ///
    /// # Errors
    /// SQLite errors (the transaction is rolled back and retried).
    fn frame_failed(&mut self, tx: &Transaction<'_>, key: &FrameKey) -> rusqlite::Result<()>;
    /// The transaction committed.
    fn committed(&mut self);
    /// The transaction failed and was rolled back.
    fn rolled_back(&mut self);
    /// Periodic checks that need no frame, outside any transaction (the
    /// writer calls this while idle).
    ///
    /// # Errors
    /// SQLite errors.
    fn tick(&mut self, conn: &Connection) -> rusqlite::Result<()>;
    /// The writer is ending: finish what is queued.
    fn close(self: Box<Self>);
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
        };
        let run_id = state.run.id;
        let thread = std::thread::Builder::new()
            .name("store-writer".into())
            .spawn(move || state.run_loop(&ops_rx))
            .map_err(WriterError::Thread)?;
        Ok((Writer { thread, run_id }, ops_tx))
    }

    /// True once the thread has ended: before every sender is dropped, only
    /// by a panic.
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
}

/// How often the writer, when idle, lets the observer check for a stall.
const OBSERVER_TICK: Duration = Duration::from_secs(5);

impl WriterState {
    fn run_loop(&mut self, ops_rx: &Receiver<StoreOp>) {
        // Group commit: block for one op, then take whatever else is already
        // waiting. Under load batches grow; when quiet a frame commits at once,
        // so batching never adds latency.
        loop {
            let first = match ops_rx.recv_timeout(OBSERVER_TICK) {
                Ok(op) => op,
                Err(crossbeam_channel::RecvTimeoutError::Timeout) => {
                    if let Some(observer) = self.observer.as_mut() {
                        if let Err(e) = observer.tick(&self.conn) {
                            tracing::error!("quality control: {e}");
                        }
                    }
                    continue;
                }
                Err(crossbeam_channel::RecvTimeoutError::Disconnected) => break,
            };
            let mut batch = vec![first];
            while batch.len() < self.max_batch {
                match ops_rx.try_recv() {
                    Ok(op) => batch.push(op),
                    Err(_) => break,
                }
            }
            if self.commit_with_retry(&batch) {
                for op in &batch {
                    if let StoreOp::InHand { committed, .. } = op {
                        // The worker may have stopped waiting (shutdown).
                        let _ = committed.send(());
                    }
                }
            }
            let finished: Vec<FrameKey> = batch
                .iter()
                .filter_map(StoreOp::finished_key)
                .cloned()
                .collect();
            (self.on_commit)(&finished);
        }
        let ended = self.conn.execute(
            "UPDATE runs SET ended_at_ms = ?1 WHERE id = ?2",
            params![now_ms(), self.run.id],
        );
        if let Err(e) = ended {
            tracing::error!("cannot mark run {} ended: {e}", self.run.id);
        }
        if let Some(observer) = self.observer.take() {
            observer.close();
        }
    }

    /// Commits `batch`, retrying: for as long as it takes while the database
    /// is busy, locked, full or failing I/O (conditions that clear: another
    /// program's transaction ends, space is freed), so nothing is dropped and
    /// the bounded channel holds the pipeline back meanwhile; up to
    /// `GIVE_UP_AFTER` attempts for any other error. True once committed.
    fn commit_with_retry(&mut self, batch: &[StoreOp]) -> bool {
        const GIVE_UP_AFTER: u32 = 5;
        for attempt in 1u32.. {
            if let Some(observer) = self.observer.as_mut() {
                observer.begin();
            }
            let result = self.commit(batch);
            if let Some(observer) = self.observer.as_mut() {
                match result {
                    Ok(()) => observer.committed(),
                    Err(_) => observer.rolled_back(),
                }
            }
            match result {
                Ok(()) => return true,
                Err(e) if attempt < GIVE_UP_AFTER || clears_by_itself(&e) => {
                    tracing::warn!(
                        "store: commit of {} ops failed ({e}); retrying (attempt {attempt})",
                        batch.len()
                    );
                    std::thread::sleep(Duration::from_millis(200 * u64::from(attempt.min(25))));
                }
                Err(e) => {
                    // Nothing is lost for good: the frames stay unrecorded or
                    // queued, and the next start's catch-up scan redoes them.
                    tracing::error!("store: giving up on a batch of {} ops: {e}", batch.len());
                    return false;
                }
            }
        }
        false
    }

    fn commit(&mut self, batch: &[StoreOp]) -> rusqlite::Result<()> {
        let tx = self
            .conn
            .transaction_with_behavior(TransactionBehavior::Immediate)?;
        let mut run = self.run;
        for op in batch {
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
                StoreOp::InHand { key, .. } => set_in_hand(&tx, key, true)?,
                StoreOp::Released { key } => set_in_hand(&tx, key, false)?,
                StoreOp::Done {
                    key,
                    attempts,
                    analysis,
                } => {
                    let frame_id = record_done(&tx, key, *attempts, analysis)?;
                    if let (Some(observer), Some(id)) = (self.observer.as_mut(), frame_id) {
                        observer.frame_done(&tx, id, analysis)?;
                    }
                }
                StoreOp::Failed {
                    key,
                    attempts,
                    reason,
                } => {
                    if record_failed(&tx, key, *attempts, reason)? {
                        if let Some(observer) = self.observer.as_mut() {
                            observer.frame_failed(&tx, key)?;
                        }
                    }
                }
                StoreOp::Withdrawn { key } => {
                    tx.prepare_cached(&format!(
                        "DELETE FROM frames WHERE {FRAME_KEY_SQL} AND status = 'queued'"
                    ))?
                    .execute(key.sql_params())?;
                }
            }
        }
        tx.execute(
            "UPDATE runs SET last_frame_at_ms = ?1, ended_at_ms = NULL WHERE id = ?2",
            params![run.last_frame_at_ms, run.id],
        )?;
        tx.commit()?;
        self.run = run;
        Ok(())
    }
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
    // sighting of the same version, leaves the existing row alone.
    tx.prepare_cached(
        "INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status, detected_at_ms, ready_at_ms,
                             well, site, time_point, channel, name_parts)
         VALUES (?1, ?2, ?3, ?4, (SELECT COALESCE(MAX(version), 0) + 1 FROM frames WHERE file = ?2),
                 'queued', ?5, ?6, ?7, ?8, ?9, ?10, ?11)
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
    ])?;
    Ok(())
}

/// Marks a queued frame as in a worker's hand, or no longer.
fn set_in_hand(tx: &Transaction<'_>, key: &FrameKey, in_hand: bool) -> rusqlite::Result<()> {
    tx.prepare_cached(&format!(
        "UPDATE frames SET in_hand = ?4 WHERE {FRAME_KEY_SQL} AND status = 'queued'"
    ))?
    .execute(params![
        key.path,
        key.size_bytes as i64,
        key.mtime_ns,
        in_hand
    ])?;
    Ok(())
}

/// Returns the frame's id, or `None` when there was no unfinished row to complete.
fn record_done(
    tx: &Transaction<'_>,
    key: &FrameKey,
    attempts: u32,
    analysis: &FileAnalysis,
) -> rusqlite::Result<Option<i64>> {
    let r = &analysis.result;
    let now = now_ms();
    let frame_id: Option<i64> = tx
        .prepare_cached(&format!(
            "UPDATE frames SET status = 'done', in_hand = 0, error = NULL, attempts = ?4, analyzed_at_ms = ?5,
                 latency_ms = MAX(0, ?5 - ready_at_ms),
                 width = ?6, height = ?7, bit_depth = ?8, method = ?9, threshold = ?10, separability = ?11,
                 object_count = ?12, foreground_fraction = ?13, background_level = ?14,
                 saturation_fraction = ?15, focus = ?16, illumination_change = ?17,
                 pixel_size_um = ?18, pixel_size_source = ?19, bimodality = ?20, size_filtered = ?21,
                 merged_fraction = ?22
             WHERE {FRAME_KEY_SQL} AND status <> 'done'
             RETURNING id"
        ))?
        .query_row(
            params![
                key.path,
                key.size_bytes as i64,
                key.mtime_ns,
                attempts,
                now,
                r.width as i64,
                r.height as i64,
                r.bit_depth,
                r.method,
                r.threshold,
                r.separability,
                r.object_count as i64,
                r.foreground_fraction,
                r.background_level,
                r.saturation_fraction,
                r.focus,
                r.illumination_change,
                r.pixel_size_um,
                analysis.pixel_size_source.map(|s| s.as_str()),
                r.bimodality,
                r.size_filtered as i64,
                r.merged_fraction,
            ],
            |row| row.get(0),
        )
        .optional()?;
    let Some(frame_id) = frame_id else {
        tracing::warn!(
            "store: {} has no queued row to complete; skipped",
            shown(&key.path)
        );
        return Ok(None);
    };
    tx.prepare_cached("DELETE FROM objects WHERE frame_id = ?1")?
        .execute([frame_id])?;
    insert_objects(tx, frame_id, "raw", &r.objects)?;
    if let Some(recount) = &analysis.recount {
        insert_objects(tx, frame_id, "recount", &recount.objects)?;
    }
    Ok(Some(frame_id))
}

/// Objects per INSERT statement: a multi-row statement costs far less per row
/// than one statement per object (hundreds of objects per frame).
const OBJECTS_PER_INSERT: usize = 32;

fn insert_objects(
    tx: &Transaction<'_>,
    frame_id: i64,
    result: &str,
    objects: &[ObjectMeasures],
) -> rusqlite::Result<()> {
    use rusqlite::types::Value;
    for chunk in objects.chunks(OBJECTS_PER_INSERT) {
        let row = "(?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)";
        let sql = format!(
            "INSERT INTO objects (frame_id, result, label, area_px, area_um2, centroid_x, centroid_y,
                 bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
                 max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px, eccentricity,
                 solidity, channels)
             VALUES {}",
            vec![row; chunk.len()].join(", ")
        );
        let mut values: Vec<Value> = Vec::with_capacity(chunk.len() * 21);
        for o in chunk {
            let channels = (!o.channels.is_empty())
                .then(|| serde_json::to_string(&o.channels).unwrap_or_default());
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
                foreground_fraction: 0.25,
                background_level: 1.0,
                saturation_fraction: 0.0,
                focus: 2.0,
                illumination_change: 0.0,
                pixel_size_um: None,
                objects,
            },
            pixel_size_source: None,
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
        let setup = WriterSetup {
            capacity,
            max_batch: capacity,
            on_commit,
            observer: None,
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
        })
        .unwrap();
        // A repeated completion (e.g. redone after a crash) neither duplicates
        // the frame nor its objects.
        tx.send(StoreOp::Done {
            key: a.clone(),
            attempts: 1,
            analysis: analysis(3),
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
}
