//! Quality control inside the single writer: after each frame is recorded, the
//! run monitor judges it in the same transaction; flags and alert episodes become
//! rows, and alert events go to the log and the sinks.
//!
//! The writer ([`crate::store::writer`]) calls in through its
//! [`FrameObserver`] trait, which [`QcRecorder`] implements; the judging is
//! [`crate::qc::monitor`]'s, the delivery [`crate::qc::sinks`]'s. A restart
//! mid-run rebuilds the monitor from the run's rows, so baselines survive it.

use std::path::PathBuf;

use rusqlite::{params, Connection, OptionalExtension, Transaction};

use crate::analysis::Method;
use crate::pipeline::FileAnalysis;
use crate::qc::alerts::{AlertEvent, AlertState};
use crate::qc::metrics::FrameMetrics;
use crate::qc::monitor::RunMonitor;
use crate::qc::params::{AlertSettings, QualitySettings};
use crate::qc::sinks::{AlertDispatcher, Outcome, SinkError};
use crate::store::health::DatabaseFault;
use crate::store::writer::FrameObserver;
use crate::store::{now_ms, FrameKey, ACQUISITION_ORDER_SQL, FRAME_KEY_SQL, POSITION_SQL};
use crate::text::{shown, shown_path, Repeats};

/// Why quality control could not start.
#[derive(Debug, thiserror::Error)]
pub enum QcError {
    /// Reading the run's recorded frames failed.
    #[error(transparent)]
    Sqlite(#[from] rusqlite::Error),
    /// An alert sink could not be started.
    #[error("cannot start an alert sink: {0}")]
    Sinks(SinkError),
}

/// Condition of a service restart in the middle of a run.
pub const SERVICE_RESTARTED: &str = "service_restarted";

/// What quality control of a run needs.
#[derive(Debug, Clone)]
pub struct QcSetup {
    /// Flag limits, chart parameters and run checks.
    pub quality: QualitySettings,
    /// Where alerts go.
    pub alerts: AlertSettings,
    /// Folders whose volumes' free space is watched (watched folders, database folder).
    pub volumes: Vec<PathBuf>,
    /// The database (named in the alerts about it).
    pub database: PathBuf,
}

/// The monitor of the writer's current run, and the sinks.
pub struct QcRecorder {
    setup: QcSetup,
    run_id: i64,
    monitor: RunMonitor,
    dispatcher: AlertDispatcher,
    /// Events stored in the writer's open transaction, each with its
    /// deliveries' rows (sink, id), announced (logged and sent to the sinks)
    /// only once it commits.
    pending: Vec<(AlertEvent, Vec<(&'static str, i64)>)>,
    /// The per-frame log lines of the open transaction, logged once it commits.
    pending_lines: Vec<FrameLine>,
    /// The state before the open transaction, restored if it rolls back, so a
    /// retried batch is judged once.
    checkpoint: Option<(i64, RunMonitor)>,
    /// Events raised outside a transaction and announced, not stored yet (the
    /// database's volume was full): stored, in order, at the next try, their
    /// deliveries as made.
    unstored: Vec<AlertEvent>,
    /// Delivery outcomes not recorded yet (the database's volume was full).
    unrecorded: Vec<Outcome>,
    /// Repeated warnings (alerts that cannot be stored yet), limited.
    repeats: Repeats,
}

/// One frame's log line: what was recorded and how it was judged.
struct FrameLine {
    file: String,
    objects: usize,
    threshold: f64,
    flags: String,
    latency_ms: i64,
}

impl QcRecorder {
    /// Starts the sinks and rebuilds the monitor of `run_id` from its rows; a run
    /// that already has frames and is not complete was interrupted, which
    /// raises a restart notice.
    ///
    /// # Errors
    /// [`QcError`]: SQLite errors, or a sink thread that cannot start.
    pub fn start(conn: &Connection, run_id: i64, setup: QcSetup) -> Result<QcRecorder, QcError> {
        let dispatcher = AlertDispatcher::start(&setup.alerts).map_err(QcError::Sinks)?;
        resend_unfinished(conn, &dispatcher)?;
        let mut recorder = QcRecorder {
            monitor: new_monitor(&setup),
            setup,
            run_id,
            dispatcher,
            pending: Vec::new(),
            pending_lines: Vec::new(),
            checkpoint: None,
            unstored: Vec::new(),
            unrecorded: Vec::new(),
            repeats: Repeats::default(),
        };
        let replayed = recorder.replay(conn)?;
        recorder.close_earlier_runs(conn)?;
        if replayed > 0 && recorder.monitor.is_complete() {
            tracing::info!(
                "run {run_id} is complete ({replayed} frames recorded); frames that still come are added to it"
            );
        } else if replayed > 0 {
            let event = AlertEvent::notice(
                SERVICE_RESTARTED,
                now_ms(),
                None,
                format!(
                    "framewarden restarted in the middle of run {run_id} ({replayed} frames already recorded); frames in flight are redone"
                ),
            );
            recorder.store_event(conn, &event, None)?;
        }
        // Outside a transaction: stored at once, so announced at once.
        recorder.announce_pending();
        Ok(recorder)
    }
}

impl FrameObserver for QcRecorder {
    fn begin(&mut self) {
        self.checkpoint = Some((self.run_id, self.monitor.clone()));
    }

    /// Judges a frame just recorded as done (`frame_id`) in the writer's
    /// transaction. Flags and charts use the first result, so the run's
    /// metrics stay comparable; a recount is stored beside it and becomes the
    /// frame's count. A version that supersedes one already judged gets its
    /// flags but changes no chart (see [`RunMonitor::judge_again`]).
    fn frame_done(
        &mut self,
        tx: &Transaction<'_>,
        frame_id: i64,
        analysis: &FileAnalysis,
        supersedes: bool,
    ) -> rusqlite::Result<bool> {
        let (run_id, file, position, latency_ms) = frame_row(tx, frame_id)?;
        self.switch_run(tx, run_id)?;
        let at_ms = now_ms();
        let result = &analysis.result;
        let verdict = self
            .monitor
            .judge(&position, &file, at_ms, analysis, supersedes);
        tx.prepare_cached("DELETE FROM flags WHERE frame_id = ?1")?
            .execute([frame_id])?;
        let mut insert = tx.prepare_cached(
            "INSERT INTO flags (frame_id, flag, value, limit_value, message) VALUES (?1, ?2, ?3, ?4, ?5)",
        )?;
        for f in &verdict.flags {
            insert.execute(params![
                frame_id,
                f.kind.as_str(),
                f.value,
                f.limit,
                f.message
            ])?;
        }
        for event in &verdict.events {
            self.store_event(tx, event, Some(frame_id))?;
        }
        let flags: Vec<&str> = verdict.flags.iter().map(|f| f.kind.as_str()).collect();
        self.pending_lines.push(FrameLine {
            file,
            objects: analysis.count_used(),
            threshold: result.threshold,
            flags: flags.join(","),
            latency_ms: latency_ms.unwrap_or(0),
        });
        Ok(!flags.is_empty())
    }

    /// Counts a frame recorded as failed towards the failure rate.
    fn frame_failed(&mut self, tx: &Transaction<'_>, key: &FrameKey) -> rusqlite::Result<()> {
        let row: Option<(i64, i64)> = tx
            .prepare_cached(&format!(
                "SELECT id, run_id FROM frames WHERE {FRAME_KEY_SQL}"
            ))?
            .query_row(key.sql_params(), |r| Ok((r.get(0)?, r.get(1)?)))
            .optional()?;
        let Some((frame_id, run_id)) = row else {
            return Ok(());
        };
        self.switch_run(tx, run_id)?;
        for event in self.monitor.observe_failure(&key.path, now_ms()) {
            self.store_event(tx, &event, Some(frame_id))?;
        }
        Ok(())
    }

    /// The writer's transaction committed: log each frame it recorded (one line
    /// per frame at info level) and announce the alerts it stored.
    fn committed(&mut self) {
        self.checkpoint = None;
        self.announce_pending();
    }

    /// The writer's transaction failed: forget its events and judgements.
    fn rolled_back(&mut self) {
        self.pending.clear();
        self.pending_lines.clear();
        if let Some((run_id, monitor)) = self.checkpoint.take() {
            self.run_id = run_id;
            self.monitor = monitor;
        }
    }

    /// Periodic checks that need no frame: the stall, and free space on the
    /// watched and database volumes.
    fn tick(&mut self, conn: &Connection) -> rusqlite::Result<()> {
        let recorded = self.record_outcomes(conn);
        let now = now_ms();
        let mut events: Vec<AlertEvent> = self.monitor.check_stall(now).into_iter().collect();
        for volume in &self.setup.volumes {
            if let Ok(free) = fs4::available_space(volume) {
                let name = volume.display().to_string();
                events.extend(self.monitor.check_free_space(&name, free, now));
            }
        }
        self.record_now(conn, events);
        recorded
    }

    /// Writes to the database fail for lack of space, or succeed again: the
    /// `database_full` episode.
    fn out_of_space(&mut self, conn: &Connection, cause: Option<&str>) {
        let db = shown_path(&self.setup.database);
        let event = self.monitor.set_database_full(&db, cause, now_ms());
        self.record_now(conn, event.into_iter().collect());
    }

    /// Announces the fault (log and sinks) as a notice; it cannot be stored.
    fn database_failed(&mut self, fault: &DatabaseFault) {
        let event = AlertEvent::notice(fault.condition(), now_ms(), None, fault.to_string());
        self.announce(&event, None);
    }

    /// Gives the sinks a short grace to deliver what is queued, cuts short
    /// the rest (left unfinished for the next start), and records the
    /// outcomes, unless the database has failed (`None`): nothing is
    /// written into it then.
    fn close(self: Box<Self>, conn: Option<&Connection>) {
        let QcRecorder {
            dispatcher,
            mut unrecorded,
            ..
        } = *self;
        unrecorded.extend(dispatcher.close());
        if let Some(conn) = conn {
            if let Err(e) = finish_deliveries(conn, &unrecorded) {
                tracing::error!(
                    "alert deliveries not recorded as made (sent again at the next start): {e}"
                );
            }
        }
    }
}

impl QcRecorder {
    /// Records the outcomes of the deliveries finished since the last call.
    /// Those that cannot be recorded now (the database's volume is full) are
    /// kept and recorded at the next call, so a delivery made is not sent
    /// again at the next start.
    fn record_outcomes(&mut self, conn: &Connection) -> rusqlite::Result<()> {
        self.unrecorded.extend(self.dispatcher.outcomes());
        finish_deliveries(conn, &self.unrecorded)?;
        self.unrecorded.clear();
        Ok(())
    }

    /// Stores `events`, raised outside a transaction, each with its
    /// deliveries' rows, and announces them. One that cannot be stored now
    /// (the database's volume is full) is announced all the same, its
    /// deliveries untracked; it is kept, with those after it, and stored at
    /// a later call, in order, so a recovery never comes before the opening
    /// it closes. Its delivery rows are then stored finished: the sinks had
    /// the event when it was raised, so it is never sent twice, and it is
    /// never lost while the service runs.
    fn record_now(&mut self, conn: &Connection, events: Vec<AlertEvent>) {
        let mut stored = 0;
        for event in &self.unstored {
            if let Err(e) = self.store_alone(conn, event, true) {
                self.warn_unstored(event, &e);
                break;
            }
            stored += 1;
        }
        self.unstored.drain(..stored);
        for event in events {
            if self.unstored.is_empty() {
                match self.store_alone(conn, &event, false) {
                    Ok(deliveries) => {
                        self.announce(&event, Some(&deliveries));
                        continue;
                    }
                    Err(e) => self.warn_unstored(&event, &e),
                }
            }
            self.announce(&event, None);
            self.unstored.push(event);
        }
    }

    /// Stores `event` of the current run outside the writer's transaction,
    /// with its deliveries' rows (finished already when `sent`), all or
    /// nothing: a failed try leaves no half-stored alert to be stored again.
    fn store_alone(
        &self,
        conn: &Connection,
        event: &AlertEvent,
        sent: bool,
    ) -> rusqlite::Result<Vec<(&'static str, i64)>> {
        conn.execute_batch("SAVEPOINT record_now")?;
        let stored = store_rows(conn, self.run_id, event, None)
            .and_then(|alert_id| self.store_deliveries(conn, alert_id, event, sent))
            .and_then(|deliveries| {
                conn.execute_batch("RELEASE record_now")?;
                Ok(deliveries)
            });
        if stored.is_err() && !conn.is_autocommit() {
            // Best effort: the error already says what went wrong.
            let _ = conn.execute_batch("ROLLBACK TO record_now; RELEASE record_now");
        }
        stored
    }

    /// Stores one row per configured sink for `event` (alert row
    /// `alert_id`), finished already when `sent`. Returns each sink with its
    /// row.
    fn store_deliveries(
        &self,
        conn: &Connection,
        alert_id: Option<i64>,
        event: &AlertEvent,
        sent: bool,
    ) -> rusqlite::Result<Vec<(&'static str, i64)>> {
        let json = crate::qc::sinks::to_json(event);
        let now = now_ms();
        let mut insert = conn.prepare_cached(
            "INSERT INTO alert_deliveries (alert_id, sink, event, queued_at_ms, finished_at_ms)
             VALUES (?1, ?2, ?3, ?4, ?5)",
        )?;
        let mut deliveries = Vec::new();
        for sink in self.dispatcher.sink_names() {
            insert.execute(params![alert_id, sink, json, now, sent.then_some(now)])?;
            deliveries.push((sink, conn.last_insert_rowid()));
        }
        Ok(deliveries)
    }

    /// An alert that cannot be stored yet (logged limited).
    fn warn_unstored(&self, event: &AlertEvent, e: &rusqlite::Error) {
        self.repeats.warn(
            "alert not stored",
            format_args!(
                "alert {} not stored yet ({e}); it is stored at the next check",
                shown(&event.condition)
            ),
        );
    }

    /// Logs the recorded frames' lines and announces the stored alerts.
    fn announce_pending(&mut self) {
        for line in self.pending_lines.drain(..) {
            tracing::info!(
                file = %shown(&line.file),
                objects = line.objects,
                threshold = line.threshold,
                flags = %line.flags,
                latency_ms = line.latency_ms,
                "frame"
            );
        }
        for (event, deliveries) in std::mem::take(&mut self.pending) {
            self.announce(&event, Some(&deliveries));
        }
    }

    /// A new run (after an idle gap) starts with a fresh memory; the run
    /// before it is over, and its open alerts close.
    fn switch_run(&mut self, conn: &Connection, run_id: i64) -> rusqlite::Result<()> {
        if run_id != self.run_id {
            self.run_id = run_id;
            self.monitor = new_monitor(&self.setup);
            self.close_earlier_runs(conn)?;
        }
        Ok(())
    }

    /// Closes the alerts still open in runs before the current one (a run
    /// that another has followed is over), each with a final message; they
    /// are announced with the rest.
    fn close_earlier_runs(&mut self, conn: &Connection) -> rusqlite::Result<()> {
        let open: Vec<(i64, String, i64, String)> = conn
            .prepare_cached(&format!(
                "SELECT run_id, condition, opened_at_ms, {POSITIONS_JSON_SQL}
                 FROM alerts WHERE run_id < ?1 AND closed_at_ms IS NULL ORDER BY opened_at_ms, id"
            ))?
            .query_map([self.run_id], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
            })?
            .collect::<Result<_, _>>()?;
        let at_ms = now_ms();
        for (run_id, condition, opened_at_ms, positions) in open {
            let event = AlertEvent {
                message: format!(
                    "run {run_id} is over (run {} has started) with {condition} still open; the alert closes with its run, not recovered",
                    self.run_id
                ),
                condition,
                state: AlertState::Closed,
                at_ms,
                opened_at_ms,
                file: None,
                positions: serde_json::from_str(&positions).unwrap_or_default(),
                evidence: None,
            };
            self.store_event_of(conn, run_id, &event, None)?;
        }
        Ok(())
    }

    /// Stores one event in `conn` (the writer's transaction, or outside one):
    /// an opening or a notice is a new row; an update rewrites the open
    /// alert's sentence; a recovery or a run's end closes it. Each position an
    /// event brings in is stored with its evidence. The event is announced
    /// once stored and committed.
    fn store_event(
        &mut self,
        conn: &Connection,
        event: &AlertEvent,
        frame_id: Option<i64>,
    ) -> rusqlite::Result<()> {
        self.store_event_of(conn, self.run_id, event, frame_id)
    }

    /// [`QcRecorder::store_event`] for an alert of `run_id`.
    fn store_event_of(
        &mut self,
        conn: &Connection,
        run_id: i64,
        event: &AlertEvent,
        frame_id: Option<i64>,
    ) -> rusqlite::Result<()> {
        let alert_id = store_rows(conn, run_id, event, frame_id)?;
        let deliveries = self.store_deliveries(conn, alert_id, event, false)?;
        self.pending.push((event.clone(), deliveries));
        Ok(())
    }

    /// Logs `event` and hands it to the sinks: as the deliveries of the
    /// given rows, or, with `None` (it is not stored), untracked to every sink.
    fn announce(&self, event: &AlertEvent, deliveries: Option<&[(&'static str, i64)]>) {
        match event.state {
            AlertState::Opened => tracing::warn!(
                condition = %shown(&event.condition),
                file = %shown(event.file.as_deref().unwrap_or("")),
                "alert: {}",
                shown(&event.message)
            ),
            AlertState::Updated => tracing::warn!(
                condition = %shown(&event.condition),
                file = %shown(event.file.as_deref().unwrap_or("")),
                "alert grows: {}",
                shown(&event.message)
            ),
            AlertState::Recovered => tracing::info!(
                condition = %shown(&event.condition),
                "recovered: {}",
                shown(&event.message)
            ),
            AlertState::Closed => tracing::info!(
                condition = %shown(&event.condition),
                "closed with the run: {}",
                shown(&event.message)
            ),
            AlertState::Notice => tracing::info!(
                condition = %shown(&event.condition),
                "notice: {}",
                shown(&event.message)
            ),
        }
        match deliveries {
            Some(deliveries) => {
                for (sink, id) in deliveries {
                    self.dispatcher.send_to(sink, Some(*id), event);
                }
            }
            None => self.dispatcher.send(event),
        }
    }

    /// Feeds the run's recorded frames to a fresh monitor, in acquisition
    /// order and each frame once (the version first judged), discarding the
    /// events (they are already stored), then puts back the stored open
    /// alerts, each drift alert with the positions it names. Returns the
    /// number of frames replayed.
    fn replay(&mut self, conn: &Connection) -> rusqlite::Result<usize> {
        let mut stmt = conn.prepare(&format!(
            "SELECT file, {POSITION_SQL}, analyzed_at_ms, status,
                    method, threshold, separability, object_count, foreground_fraction,
                    background_level, saturation_fraction, focus, illumination_change, bimodality,
                    merged_fraction, dim_objects, dim_level
             FROM frames WHERE run_id = ?1 AND status IN ('done', 'failed') AND same_pixels_as IS NULL
               AND NOT EXISTS (SELECT 1 FROM frames AS earlier WHERE earlier.superseded_by = frames.id)
             ORDER BY {ACQUISITION_ORDER_SQL}"
        ))?;
        let mut rows = stmt.query([self.run_id])?;
        let mut n = 0;
        while let Some(r) = rows.next()? {
            let path: String = r.get(0)?;
            let at_ms: i64 = r.get::<_, Option<i64>>(2)?.unwrap_or(0);
            if r.get::<_, String>(3)? == "failed" {
                self.monitor.observe_failure(&path, at_ms);
            } else {
                let method: String = r.get::<_, Option<String>>(4)?.unwrap_or_default();
                let num = |i: usize| -> rusqlite::Result<f64> {
                    Ok(r.get::<_, Option<f64>>(i)?.unwrap_or(0.0))
                };
                let m = FrameMetrics {
                    otsu_based: Method::is_otsu_based(&method),
                    threshold: num(5)?,
                    separability: num(6)?,
                    // Rows from before schema 3 have none: unknown, never flags.
                    bimodality: r.get::<_, Option<f64>>(13)?.unwrap_or(f64::NAN),
                    // Rows from before schema 6 have none: unknown, never flags.
                    merged_fraction: r.get::<_, Option<f64>>(14)?.unwrap_or(f64::NAN),
                    // Rows from before schema 9 have none: none found, never flags.
                    dim_objects: r.get::<_, Option<i64>>(15)?.unwrap_or(0).max(0) as usize,
                    dim_level: r.get(16)?,
                    object_count: r.get::<_, Option<i64>>(7)?.unwrap_or(0).max(0) as usize,
                    foreground_fraction: num(8)?,
                    background_level: num(9)?,
                    saturation_fraction: num(10)?,
                    focus: num(11)?,
                    illumination_change: num(12)?,
                };
                let position: String = r.get(1)?;
                self.monitor.observe(&position, &path, at_ms, &m);
            }
            n += 1;
        }
        self.monitor.forget_episodes();
        let mut open = conn.prepare(&format!(
            "SELECT condition, opened_at_ms, {POSITIONS_JSON_SQL}
             FROM alerts WHERE run_id = ?1 AND closed_at_ms IS NULL ORDER BY opened_at_ms, id"
        ))?;
        let rows = open.query_map([self.run_id], |r| {
            Ok((r.get::<_, String>(0)?, r.get(1)?, r.get::<_, String>(2)?))
        })?;
        for row in rows {
            let (condition, at, positions): (String, i64, String) = row?;
            let positions: Vec<String> = serde_json::from_str(&positions).unwrap_or_default();
            self.monitor.restore_open(&condition, at, &positions);
        }
        Ok(n)
    }
}

/// Hands the deliveries that an earlier process left unfinished (cut short by
/// its shutdown, still queued, or killed) to their sinks again, oldest first;
/// those of a sink no longer configured are finished with that reason.
fn resend_unfinished(conn: &Connection, dispatcher: &AlertDispatcher) -> rusqlite::Result<()> {
    let unfinished: Vec<(i64, String, String)> = conn
        .prepare(
            "SELECT id, sink, event FROM alert_deliveries WHERE finished_at_ms IS NULL ORDER BY id",
        )?
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))?
        .collect::<Result<_, _>>()?;
    if unfinished.is_empty() {
        return Ok(());
    }
    let configured = dispatcher.sink_names();
    let mut sent = 0;
    for (id, sink, json) in unfinished {
        let reason = if !configured.contains(&sink.as_str()) {
            format!("the {sink} sink is no longer configured")
        } else {
            match serde_json::from_str::<AlertEvent>(&json) {
                Ok(event) => {
                    dispatcher.send_to(&sink, Some(id), &event);
                    sent += 1;
                    continue;
                }
                Err(e) => format!("the stored event cannot be read: {e}"),
            }
        };
        tracing::warn!("alert delivery {id} dropped: {reason}");
        finish_deliveries(
            conn,
            &[Outcome {
                id,
                result: Err(reason),
            }],
        )?;
    }
    if sent > 0 {
        tracing::info!("{sent} alert deliveries not made before the last stop are sent now");
    }
    Ok(())
}

/// Marks deliveries finished: made, or given up with the reason.
fn finish_deliveries(conn: &Connection, outcomes: &[Outcome]) -> rusqlite::Result<()> {
    let mut update = conn.prepare_cached(
        "UPDATE alert_deliveries SET finished_at_ms = ?2, error = ?3 WHERE id = ?1",
    )?;
    for o in outcomes {
        update.execute(params![o.id, now_ms(), o.result.as_ref().err()])?;
    }
    Ok(())
}

/// Stores one event of run `run_id` in `conn`: an opening or a notice is a
/// new row; an update rewrites the open alert's sentence; a recovery or a
/// run's end closes it. Each position an event brings in is stored with its
/// evidence. Returns the alert's row (`None` when the episode is not open).
fn store_rows(
    conn: &Connection,
    run_id: i64,
    event: &AlertEvent,
    frame_id: Option<i64>,
) -> rusqlite::Result<Option<i64>> {
    // The open episode the event is about: its condition and opening.
    const EPISODE: &str =
        "run_id = ?1 AND condition = ?2 AND opened_at_ms = ?3 AND closed_at_ms IS NULL";
    let alert_id: Option<i64> = match event.state {
        AlertState::Opened | AlertState::Notice => {
            // A notice is an episode closed as it opens.
            let notice = event.state == AlertState::Notice;
            conn.prepare_cached(
                "INSERT INTO alerts (run_id, opened_at_ms, condition, message, frame_id, file, closed_at_ms, closed_state)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
            )?
            .execute(params![
                run_id,
                event.at_ms,
                event.condition,
                event.message,
                frame_id,
                event.file,
                notice.then_some(event.at_ms),
                notice.then_some(AlertState::Notice.as_str())
            ])?;
            Some(conn.last_insert_rowid())
        }
        AlertState::Updated => conn
            .prepare_cached(&format!(
                "UPDATE alerts SET message = ?4 WHERE {EPISODE} RETURNING id"
            ))?
            .query_row(
                params![run_id, event.condition, event.opened_at_ms, event.message],
                |r| r.get(0),
            )
            .optional()?,
        AlertState::Recovered | AlertState::Closed => conn
            .prepare_cached(&format!(
                "UPDATE alerts SET closed_at_ms = ?4, closed_message = ?5, closed_state = ?6 WHERE {EPISODE} RETURNING id"
            ))?
            .query_row(
                params![
                    run_id,
                    event.condition,
                    event.opened_at_ms,
                    event.at_ms,
                    event.message,
                    event.state.as_str()
                ],
                |r| r.get(0),
            )
            .optional()?,
    };
    if let (Some(alert_id), Some(evidence), true) = (
        alert_id,
        &event.evidence,
        matches!(
            event.state,
            AlertState::Opened | AlertState::Notice | AlertState::Updated
        ),
    ) {
        conn.prepare_cached(
            "INSERT OR REPLACE INTO alert_positions (alert_id, position, joined_at_ms, frame_id, message)
             VALUES (?1, ?2, ?3, ?4, ?5)",
        )?
        .execute(params![
            alert_id,
            evidence.position,
            event.at_ms,
            frame_id,
            evidence.message
        ])?;
    }
    Ok(alert_id)
}

/// SQL for the positions an alert row names, as a JSON array in order.
pub const POSITIONS_JSON_SQL: &str = "(SELECT json_group_array(position) FROM
    (SELECT position FROM alert_positions WHERE alert_id = alerts.id ORDER BY position))";

/// A monitor for a new run with the setup's limits and group window.
fn new_monitor(setup: &QcSetup) -> RunMonitor {
    RunMonitor::new(setup.quality.clone()).with_group_window(setup.alerts.group_window)
}

/// The run, file, position and latency (ready to recorded, ms) of a frame row.
fn frame_row(
    conn: &Connection,
    frame_id: i64,
) -> rusqlite::Result<(i64, String, String, Option<i64>)> {
    conn.prepare_cached(&format!(
        "SELECT run_id, file, {POSITION_SQL}, latency_ms FROM frames WHERE id = ?1"
    ))?
    .query_row([frame_id], |r| {
        Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Judges the failed frames inside a transaction, as the writer does.
    fn judge<'c>(
        recorder: &mut QcRecorder,
        conn: &'c mut Connection,
        keys: &[FrameKey],
    ) -> Transaction<'c> {
        let tx = conn.transaction().unwrap();
        for k in keys {
            recorder.frame_failed(&tx, k).unwrap();
        }
        tx
    }

    /// A batch the writer has to retry is judged once: the first, rolled-back
    /// attempt neither stores nor announces its alert, the committed retry does
    /// both, exactly once (real SQLite, real JSON-lines sink).
    #[test]
    fn a_rolled_back_batch_is_judged_once_and_announced_after_commit() {
        let dir = tempfile::tempdir().unwrap();
        let setup = QcSetup {
            quality: QualitySettings {
                failure_window: 4,
                max_failure_fraction: 0.2,
                ..QualitySettings::default()
            },
            alerts: AlertSettings {
                file: Some(dir.path().join("alerts.jsonl")),
                ..AlertSettings::default()
            },
            volumes: Vec::new(),
            database: dir.path().join("fw.db"),
        };
        let mut conn = crate::store::open_for_writing(&dir.path().join("fw.db")).unwrap();
        conn.execute(
            "INSERT INTO runs (id, folders, started_at_ms, last_frame_at_ms, settings) VALUES (1, '[]', 0, 0, '{}')",
            [],
        )
        .unwrap();
        let mut recorder = QcRecorder::start(&conn, 1, setup).unwrap();
        let keys: Vec<FrameKey> = (0..4)
            .map(|i| FrameKey {
                path: format!("/acq/f{i}.tif"),
                size_bytes: 10,
                mtime_ns: i,
                page: None,
            })
            .collect();
        for k in &keys {
            conn.execute(
                "INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status, error, detected_at_ms, ready_at_ms)
                 VALUES (1, ?1, ?2, ?3, 1, 'failed', 'bad', 0, 0)",
                params![k.path, k.size_bytes as i64, k.mtime_ns],
            )
            .unwrap();
        }
        recorder.begin();
        drop(judge(&mut recorder, &mut conn, &keys)); // the commit failed: rolled back
        recorder.rolled_back();
        recorder.begin();
        judge(&mut recorder, &mut conn, &keys).commit().unwrap();
        recorder.committed();
        Box::new(recorder).close(Some(&conn));
        let stored: i64 = conn
            .query_row(
                "SELECT COUNT(*) FROM alerts WHERE condition = 'failure_rate'",
                [],
                |r| r.get(0),
            )
            .unwrap();
        assert_eq!(stored, 1, "the retried batch opens the alert once");
        let lines = std::fs::read_to_string(dir.path().join("alerts.jsonl")).unwrap();
        assert_eq!(
            lines.lines().filter(|l| l.contains("failure_rate")).count(),
            1,
            "{lines}"
        );
    }

    /// A run that another has followed is over: its alerts still open close
    /// when the service starts in the later run, with a final message, the
    /// positions they named, and a line to the sinks; the later run's own
    /// open alert stays open (real SQLite, real JSON-lines sink).
    #[test]
    fn the_open_alerts_of_an_earlier_run_close_with_it() {
        let dir = tempfile::tempdir().unwrap();
        let setup = QcSetup {
            quality: QualitySettings::default(),
            alerts: AlertSettings {
                file: Some(dir.path().join("alerts.jsonl")),
                ..AlertSettings::default()
            },
            volumes: Vec::new(),
            database: dir.path().join("fw.db"),
        };
        let conn = crate::store::open_for_writing(&dir.path().join("fw.db")).unwrap();
        conn.execute_batch(
            "INSERT INTO runs (id, folders, started_at_ms, last_frame_at_ms, settings) VALUES
                 (1, '[]', 0, 0, ''), (2, '[]', 9, 9, '');
             INSERT INTO alerts (id, run_id, opened_at_ms, condition, message) VALUES
                 (1, 1, 5, 'drift:focus', 'focus drifting down'),
                 (2, 2, 10, 'stalled', 'no new frame');
             INSERT INTO alert_positions (alert_id, position, joined_at_ms, message) VALUES
                 (1, 'B02', 6, 'b'), (1, 'A01', 5, 'a');",
        )
        .unwrap();
        let recorder = QcRecorder::start(&conn, 2, setup).unwrap();
        Box::new(recorder).close(Some(&conn));
        let rows: Vec<(i64, Option<String>, Option<String>)> = conn
            .prepare("SELECT run_id, closed_state, closed_message FROM alerts ORDER BY id")
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        assert_eq!(rows[0].1.as_deref(), Some("closed"));
        assert_eq!(
            rows[0].2.as_deref(),
            Some("run 1 is over (run 2 has started) with drift:focus still open; the alert closes with its run, not recovered")
        );
        assert_eq!(
            rows[1],
            (2, None, None),
            "the current run's alert stays open"
        );
        let lines = std::fs::read_to_string(dir.path().join("alerts.jsonl")).unwrap();
        let sent: Vec<serde_json::Value> = lines
            .lines()
            .map(|l| serde_json::from_str(l).unwrap())
            .collect();
        assert_eq!(sent.len(), 1, "{lines}");
        assert_eq!(sent[0]["state"], "closed");
        assert_eq!(sent[0]["opened_at_ms"], 5);
        assert_eq!(sent[0]["positions"], serde_json::json!(["A01", "B02"]));
    }
}
