//! `framewarden status`: a read-only look at the current (or last) run.
//!
//! Opens the database read-only in one short read transaction, so a running
//! `watch` is never disturbed (WAL: readers do not block the writer). Opening and
//! checking the file is [`crate::store`]'s; this file only queries and renders.

use std::fmt::Write as _;
use std::path::Path;

use jiff::tz::TimeZone;
use rusqlite::{params, Connection};
use serde::Serialize;

use crate::store::analyses::Shown;
use crate::store::{
    self, iso_time_sql, now_ms, StoreError, ACQUISITION_ORDER_SQL, COUNTED_SQL, COUNT_USED_SQL,
    POSITION_SQL,
};
use crate::text::{shown, shown_time};

/// Everything `status` shows; `--json` prints it as one document.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct StatusReport {
    /// Path of the database read.
    pub database: String,
    /// The current or last run; `None` before the first frame was ever seen.
    pub run: Option<RunInfo>,
    /// Frames recorded in this run (any status), each once: a re-saved file
    /// with the same pixels is not counted again, and a new version with other
    /// pixels replaces the one it supersedes.
    pub frames_seen: u64,
    /// Files of this run analyzed with a result.
    pub frames_done: u64,
    /// Complete files queued for analysis or being analyzed.
    pub frames_queued: u64,
    /// Files of this run recorded as failed (no result: unreadable, still
    /// incomplete after the retries, or interrupted too often).
    pub frames_failed: u64,
    /// Objects in done frames (the flattened count where the remedy ran).
    pub objects_total: u64,
    /// Components the size limits removed in done frames (not in the total).
    pub objects_size_filtered: u64,
    /// Done frames per minute between the first and the last analysis of the run.
    pub frames_per_minute: Option<f64>,
    /// When the last frame was recorded (UTC, RFC 3339).
    pub last_frame_at: Option<String>,
    /// Seconds from `last_frame_at` to the moment the status was read.
    pub last_frame_age_s: Option<f64>,
    /// The most recent frames, newest first.
    pub frames: Vec<RecentFrame>,
    /// The most recent failures, newest first.
    pub failures: Vec<RecentFrame>,
    /// The run's alert episodes, open ones first.
    pub alerts: Vec<crate::qc::report::AlertRow>,
    /// Frames per flag over the whole run, most frequent first.
    pub flag_counts: Vec<crate::qc::report::FlagCount>,
    /// The most recent frames with quality flags or a failure, newest first.
    pub flagged_frames: Vec<crate::qc::report::FlaggedFrame>,
    /// One line per position (well, site, channel) when the file-name pattern
    /// names any of them; empty otherwise.
    pub positions: Vec<PositionSummary>,
}

/// A position's frames and counts over the run.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct PositionSummary {
    /// Well, site and channel, whichever the file-name pattern names (e.g.
    /// `A01 site 2 channel dapi`); see [`crate::store::POSITION_SQL`].
    pub position: String,
    /// Files of the position analyzed with a result.
    pub frames_done: u64,
    /// Files of the position recorded as failed.
    pub frames_failed: u64,
    /// Done frames with at least one quality flag.
    pub frames_flagged: u64,
    /// Count used (the recount where the uneven-illumination remedy ran) of the
    /// position's first done frame, in acquisition order.
    pub first_count: Option<i64>,
    /// Count used of the position's last done frame, in acquisition order.
    pub last_count: Option<i64>,
    /// Smallest count used among the position's done frames.
    pub min_count: Option<i64>,
    /// Largest count used among the position's done frames.
    pub max_count: Option<i64>,
}

/// One run: an acquisition being watched (a restart of the service continues
/// it).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct RunInfo {
    /// Run number, as `status --run N` takes it.
    pub id: i64,
    /// The watched folders.
    pub folders: Vec<String>,
    /// When the run started (UTC, RFC 3339).
    pub started_at: String,
    /// `None` while the run is being watched.
    pub ended_at: Option<String>,
    /// The analysis shown, as `status --analysis K` takes it: 1 is the
    /// watch service's, each `reprocess` adds the next.
    pub analysis: i64,
    /// How many analyses the run has.
    pub analyses: i64,
}

/// One recorded version of a file, as `status` lists it.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct RecentFrame {
    /// The file's path.
    pub file: String,
    /// 1 for the first version of this path, +1 for each rewrite of it.
    pub version: i64,
    /// `queued`, `done` or `failed`.
    pub status: String,
    /// The count used: the flattened recount where the uneven-illumination
    /// remedy ran, otherwise the first result's.
    pub object_count: Option<i64>,
    /// The first result's threshold (a flattened recount thresholds other pixels).
    pub threshold: Option<f64>,
    /// Why the file failed; `None` unless `status` is `failed`.
    pub error: Option<String>,
    /// When the result or failure was recorded (UTC, RFC 3339); `None` while
    /// queued.
    pub analyzed_at: Option<String>,
    /// Time from the file being judged complete to its result or failure being
    /// recorded, in ms; `None` while queued.
    pub latency_ms: Option<i64>,
}

/// Reads the status of run `run` (by default the current or last one), with up
/// to `recent` recent frames.
///
/// # Errors
/// [`StoreError`] for a missing, foreign or unreadable database, or a run
/// number it does not have.
pub fn read(
    db: &Path,
    recent: usize,
    run: Option<i64>,
    analysis: Option<i64>,
) -> Result<StatusReport, StoreError> {
    // One snapshot for every query, kept short so the WAL can be checkpointed.
    store::read_run(db, run, analysis, |conn, picked| {
        query(conn, db, recent, picked).map_err(|source| StoreError::Sqlite {
            path: db.to_path_buf(),
            source,
        })
    })
}

fn query(
    conn: &Connection,
    db: &Path,
    recent: usize,
    picked: Option<Shown>,
) -> rusqlite::Result<StatusReport> {
    let mut report = StatusReport {
        database: db.display().to_string(),
        run: None,
        frames_seen: 0,
        frames_done: 0,
        frames_queued: 0,
        frames_failed: 0,
        objects_total: 0,
        objects_size_filtered: 0,
        frames_per_minute: None,
        last_frame_at: None,
        last_frame_age_s: None,
        frames: Vec::new(),
        failures: Vec::new(),
        alerts: Vec::new(),
        flag_counts: Vec::new(),
        flagged_frames: Vec::new(),
        positions: Vec::new(),
    };
    let Some(picked) = picked else {
        return Ok(report);
    };
    let run_id = picked.run_id;
    let run = conn.query_row(
        &format!(
            "SELECT id, folders, {}, {} FROM runs WHERE id = ?1",
            iso_time_sql("started_at_ms"),
            iso_time_sql("ended_at_ms"),
        ),
        [run_id],
        |r| {
            let folders: String = r.get(1)?;
            Ok(RunInfo {
                id: r.get(0)?,
                folders: serde_json::from_str(&folders).unwrap_or_default(),
                started_at: r.get(2)?,
                ended_at: r.get(3)?,
                analysis: picked.analysis,
                analyses: picked.analyses,
            })
        },
    )?;
    report.run = Some(run);

    let (seen, done, queued, failed, objects, filtered, first_ms, last_ms): (i64, i64, i64, i64, i64, i64, Option<i64>, Option<i64>) =
        conn.query_row(
            &format!(
                "SELECT count(*), total(status = 'done'), total(status = 'queued'), total(status = 'failed'),
                        total(CASE WHEN status = 'done' THEN {COUNT_USED_SQL} END),
                        total(CASE WHEN status = 'done' THEN size_filtered END),
                        min(CASE WHEN status = 'done' THEN analyzed_at_ms END), max(analyzed_at_ms)
                 FROM frames WHERE run_id = ?1 AND {COUNTED_SQL}"
            ),
            [run_id],
            |r| {
                let n = |i: usize| r.get::<_, f64>(i).map(|v| v as i64);
                Ok((r.get(0)?, n(1)?, n(2)?, n(3)?, n(4)?, n(5)?, r.get(6)?, r.get(7)?))
            },
        )?;
    report.frames_seen = seen as u64;
    report.frames_done = done as u64;
    report.frames_queued = queued as u64;
    report.frames_failed = failed as u64;
    report.objects_total = objects as u64;
    report.objects_size_filtered = filtered as u64;
    if let Some(last) = last_ms {
        report.last_frame_at =
            conn.query_row(&format!("SELECT {}", iso_time_sql("?1")), [last], |r| {
                r.get(0)
            })?;
        report.last_frame_age_s = Some((now_ms() - last).max(0) as f64 / 1000.0);
        if let Some(first) = first_ms.filter(|&f| last > f && done > 1) {
            report.frames_per_minute = Some((done - 1) as f64 * 60_000.0 / (last - first) as f64);
        }
    }
    let recent_sql = format!(
        "SELECT file, version, status, {COUNT_USED_SQL}, threshold, error, {}, latency_ms
         FROM frames WHERE run_id = ?1 AND (?2 = 0 OR status = 'failed') ORDER BY id DESC LIMIT ?3",
        iso_time_sql("analyzed_at_ms")
    );
    let mut stmt = conn.prepare(&recent_sql)?;
    let mut recent_of = |failed_only: bool| -> rusqlite::Result<Vec<RecentFrame>> {
        stmt.query_map(params![run_id, failed_only, recent as i64], |r| {
            Ok(RecentFrame {
                file: r.get(0)?,
                version: r.get(1)?,
                status: r.get(2)?,
                object_count: r.get(3)?,
                threshold: r.get(4)?,
                error: r.get(5)?,
                analyzed_at: r.get(6)?,
                latency_ms: r.get(7)?,
            })
        })?
        .collect()
    };
    report.frames = recent_of(false)?;
    report.failures = recent_of(true)?;
    report.alerts = crate::qc::report::alerts(conn, run_id)?;
    report.flag_counts = crate::qc::report::flag_counts(conn, run_id)?;
    report.flagged_frames = crate::qc::report::flagged_frames(conn, run_id, recent)?;
    report.positions = positions(conn, run_id)?;
    Ok(report)
}

/// Per-position summaries, folded from the run's counted rows in acquisition
/// order.
fn positions(conn: &Connection, run_id: i64) -> rusqlite::Result<Vec<PositionSummary>> {
    let mut stmt = conn.prepare(&format!(
        "SELECT {POSITION_SQL} AS position, status, {COUNT_USED_SQL},
                EXISTS (SELECT 1 FROM flags WHERE frame_id = frames.id)
         FROM frames WHERE run_id = ?1 AND {POSITION_SQL} <> '' AND {COUNTED_SQL}
         ORDER BY position, {ACQUISITION_ORDER_SQL}"
    ))?;
    let mut rows = stmt.query([run_id])?;
    let mut out: Vec<PositionSummary> = Vec::new();
    while let Some(r) = rows.next()? {
        let position: String = r.get(0)?;
        if out.last().is_none_or(|p| p.position != position) {
            out.push(PositionSummary {
                position,
                frames_done: 0,
                frames_failed: 0,
                frames_flagged: 0,
                first_count: None,
                last_count: None,
                min_count: None,
                max_count: None,
            });
        }
        let p = out.last_mut().expect("pushed above");
        let status: String = r.get(1)?;
        match status.as_str() {
            "done" => {
                p.frames_done += 1;
                p.frames_flagged += u64::from(r.get::<_, bool>(3)?);
                if let Some(count) = r.get::<_, Option<i64>>(2)? {
                    p.first_count.get_or_insert(count);
                    p.last_count = Some(count);
                    p.min_count = Some(p.min_count.map_or(count, |m| m.min(count)));
                    p.max_count = Some(p.max_count.map_or(count, |m| m.max(count)));
                }
            }
            "failed" => p.frames_failed += 1,
            _ => {}
        }
    }
    Ok(out)
}

/// The report as text for a terminal, its times shown in `zone` with the UTC
/// offset (`TimeZone::system()` for local time, `TimeZone::UTC`).
pub fn render(report: &StatusReport, zone: &TimeZone) -> String {
    let time = |t: &str| shown_time(t, zone);
    let mut out = String::new();
    let Some(run) = &report.run else {
        let _ = writeln!(
            out,
            "{}: no run recorded yet (no frame seen)",
            report.database
        );
        return out;
    };
    let state = run.ended_at.as_ref().map_or_else(
        || "being watched".to_string(),
        |e| format!("ended {}", time(e)),
    );
    let _ = writeln!(
        out,
        "run {} on {} (started {}, {state})",
        run.id,
        run.folders.join(", "),
        time(&run.started_at)
    );
    let _ = writeln!(
        out,
        "analysis {} of {} ({}; --analysis N shows another)",
        run.analysis,
        run.analyses,
        if run.analysis == 1 {
            "the watch service's"
        } else {
            "a reprocess"
        }
    );
    let _ = writeln!(
        out,
        "frames: {} seen, {} done, {} queued, {} failed; {} objects ({} more removed by the size filter)",
        report.frames_seen,
        report.frames_done,
        report.frames_queued,
        report.frames_failed,
        report.objects_total,
        report.objects_size_filtered
    );
    if let Some(rate) = report.frames_per_minute {
        let _ = writeln!(out, "rate: {rate:.1} frames/min");
    }
    if let (Some(at), Some(age)) = (&report.last_frame_at, report.last_frame_age_s) {
        let _ = writeln!(out, "last frame: {} ({} ago)", time(at), human_age(age));
    }
    if !report.frames.is_empty() {
        let _ = writeln!(out, "\nrecent frames:");
        let _ = writeln!(
            out,
            "  {:<8} {:>7} {:>10}  file",
            "status", "objects", "threshold"
        );
        for f in &report.frames {
            let count = f.object_count.map_or_else(|| "-".into(), |c| c.to_string());
            let threshold = f
                .threshold
                .map_or_else(|| "-".into(), |t| format!("{t:.1}"));
            let _ = writeln!(
                out,
                "  {:<8} {count:>7} {threshold:>10}  {}",
                f.status,
                shown(&f.file)
            );
        }
    }
    if !report.failures.is_empty() {
        let _ = writeln!(out, "\nfailures:");
        for f in &report.failures {
            let _ = writeln!(
                out,
                "  {}: {}",
                shown(&f.file),
                shown(f.error.as_deref().unwrap_or("(no reason recorded)"))
            );
        }
    }
    if !report.positions.is_empty() {
        let _ = writeln!(out, "\nper position:");
        let width = report
            .positions
            .iter()
            .map(|p| p.position.chars().count())
            .max()
            .unwrap_or(0)
            .max("position".len());
        let _ = writeln!(
            out,
            "  {:<width$} {:>5} {:>6} {:>7}  objects first -> last (min-max)",
            "position", "done", "failed", "flagged"
        );
        let count = |c: Option<i64>| c.map_or_else(|| "-".into(), |c| c.to_string());
        for p in &report.positions {
            let _ = writeln!(
                out,
                "  {:<width$} {:>5} {:>6} {:>7}  {} -> {} ({}-{})",
                p.position,
                p.frames_done,
                p.frames_failed,
                p.frames_flagged,
                count(p.first_count),
                count(p.last_count),
                count(p.min_count),
                count(p.max_count)
            );
        }
    }
    crate::qc::report::render(
        &report.alerts,
        &report.flag_counts,
        &report.flagged_frames,
        zone,
        &mut out,
    );
    out
}

fn human_age(seconds: f64) -> String {
    match seconds {
        s if s < 90.0 => format!("{s:.0} s"),
        s if s < 5400.0 => format!("{:.0} min", s / 60.0),
        s => format!("{:.1} h", s / 3600.0),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn empty_database_has_no_run_and_says_so() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        drop(store::open_for_writing(&db).unwrap());
        let report = read(&db, 5, None, None).unwrap();
        assert_eq!(report.run, None);
        assert_eq!(report.frames_seen, 0);
        assert!(render(&report, &TimeZone::UTC).contains("no run recorded yet"));
    }

    #[test]
    fn an_earlier_run_is_shown_on_request_and_a_missing_one_named() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        store::open_for_writing(&db)
            .unwrap()
            .execute_batch(
                "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings, ended_at_ms)
                     VALUES ('[\"/acq/monday\"]', 1000, 1000, '{}', 2000),
                            ('[\"/acq/tuesday\"]', 3000, 3000, '{}', NULL);
                 INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status,
                                     detected_at_ms, ready_at_ms, analyzed_at_ms, object_count)
                     VALUES (1, '/acq/monday/a.tif', 10, 1, 1, 'done', 1000, 1000, 1500, 7),
                            (1, '/acq/monday/b.tif', 10, 1, 1, 'done', 1000, 1000, 1600, 9),
                            (2, '/acq/tuesday/a.tif', 10, 1, 1, 'queued', 3000, 3000, NULL, NULL);",
            )
            .unwrap();
        let last = read(&db, 5, None, None).unwrap();
        assert_eq!(last.run.as_ref().map(|r| r.id), Some(2));
        assert_eq!((last.frames_seen, last.frames_queued), (1, 1));
        let monday = read(&db, 5, Some(1), None).unwrap();
        let run = monday.run.as_ref().unwrap();
        assert_eq!(
            (run.id, run.folders.as_slice()),
            (1, ["/acq/monday".to_string()].as_slice())
        );
        assert_eq!((monday.frames_done, monday.objects_total), (2, 16));
        assert!(run.ended_at.is_some());
        let err = read(&db, 5, Some(9), None).unwrap_err().to_string();
        assert!(err.contains("has no run 9"), "{err}");
    }

    #[test]
    fn ages_read_naturally() {
        assert_eq!(human_age(12.0), "12 s");
        assert_eq!(human_age(600.0), "10 min");
        assert_eq!(human_age(7200.0), "2.0 h");
    }
}
