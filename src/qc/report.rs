//! The quality part of `framewarden status`: the run's alert episodes and its
//! flagged frames (failures included), read from the store and rendered.
//!
//! [`crate::status`] owns the read transaction and the rest of the report; this
//! file only adds its two lists.

use std::fmt::Write as _;

use rusqlite::{params, Connection};
use serde::Serialize;

use crate::qc::alerts::LISTED;
use crate::qc::flags::{failure_flag, FrameFlag};
use crate::qc::recorder::POSITIONS_JSON_SQL;
use crate::store::{iso_time_sql, COUNTED_SQL};
use crate::text::{shown, shown_time};

/// One alert episode.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct AlertRow {
    /// What was wrong, or the notice: `drift:<metric>`, `stalled`,
    /// `low_disk_space:<volume>`, `failure_rate`, `service_restarted`, `run_complete`.
    pub condition: String,
    /// UTC, RFC 3339.
    pub opened_at: String,
    /// `None` while the condition holds.
    pub closed_at: Option<String>,
    /// The file that triggered it, when a frame did.
    pub frame: Option<String>,
    /// The sentence written when the episode opened (for a drift alert that
    /// grew, when the last position joined).
    pub message: String,
    /// The positions a drift alert names, in order; empty for a condition of
    /// the whole run.
    pub positions: Vec<String>,
    /// How it ended: `recovered`, `closed` (with its run, still holding) or
    /// `notice`; `None` while open (and for episodes closed before schema 7).
    pub closed_state: Option<String>,
    /// What ended it.
    pub closed_message: Option<String>,
}

/// One flag with its evidence, as shown.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FlagRow {
    /// The flag's name (e.g. `low_separability`, `failed`).
    pub flag: String,
    /// The frame's value that crossed the limit; `None` for a failure.
    pub value: Option<f64>,
    /// The limit it crossed; `None` for a failure.
    pub limit: Option<f64>,
    /// A sentence for a person: the value, the limit and what it means (for a
    /// failure, the reason).
    pub message: String,
}

impl From<FrameFlag> for FlagRow {
    fn from(f: FrameFlag) -> Self {
        FlagRow {
            flag: f.kind.as_str().to_string(),
            value: f.value,
            limit: f.limit,
            message: f.message,
        }
    }
}

/// One frame with quality flags or a failure, and its flags.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FlaggedFrame {
    /// The frame's file.
    pub file: String,
    /// Its flags, in the order they were raised; a failure adds a `failed` flag
    /// last.
    pub flags: Vec<FlagRow>,
}

/// Every alert episode of the run: open ones first, then the newest.
///
/// # Errors
/// SQLite errors.
pub fn alerts(conn: &Connection, run_id: i64) -> rusqlite::Result<Vec<AlertRow>> {
    let mut stmt = conn.prepare(&format!(
        "SELECT condition, {}, {}, COALESCE(file, (SELECT file FROM frames WHERE id = alerts.frame_id)),
                message, closed_message, closed_state, {POSITIONS_JSON_SQL}
         FROM alerts WHERE run_id = ?1
         ORDER BY closed_at_ms IS NOT NULL, opened_at_ms DESC, id DESC",
        iso_time_sql("opened_at_ms"),
        iso_time_sql("closed_at_ms")
    ))?;
    let rows = stmt.query_map([run_id], |r| {
        Ok(AlertRow {
            condition: r.get(0)?,
            opened_at: r.get(1)?,
            closed_at: r.get(2)?,
            frame: r.get(3)?,
            message: r.get(4)?,
            positions: serde_json::from_str(&r.get::<_, String>(7)?).unwrap_or_default(),
            closed_state: r.get(6)?,
            closed_message: r.get(5)?,
        })
    })?;
    rows.collect()
}

/// How many frames of the run carry one flag (failures count as `failed`).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FlagCount {
    /// The flag's name (`failed` for frames that produced no result).
    pub flag: String,
    /// Frames of the run carrying it.
    pub frames: u64,
}

/// Frames per flag over the whole run, most frequent first: the morning's
/// summary, where [`flagged_frames`] lists only the newest.
///
/// # Errors
/// SQLite errors.
pub fn flag_counts(conn: &Connection, run_id: i64) -> rusqlite::Result<Vec<FlagCount>> {
    let mut stmt = conn.prepare(&format!(
        "SELECT flag, count(DISTINCT frame_id) FROM flags JOIN frames ON frames.id = flags.frame_id
         WHERE frames.run_id = ?1 AND {COUNTED_SQL} GROUP BY flag
         UNION ALL
         SELECT 'failed', count(*) FROM frames WHERE run_id = ?1 AND status = 'failed' AND {COUNTED_SQL}
         HAVING count(*) > 0
         ORDER BY 2 DESC, 1"
    ))?;
    let rows = stmt.query_map([run_id], |r| {
        Ok(FlagCount {
            flag: r.get(0)?,
            frames: r.get::<_, i64>(1)? as u64,
        })
    })?;
    rows.collect()
}

/// The `limit` newest frames of the run with flags or a failure, with their flags.
///
/// # Errors
/// SQLite errors.
pub fn flagged_frames(
    conn: &Connection,
    run_id: i64,
    limit: usize,
) -> rusqlite::Result<Vec<FlaggedFrame>> {
    let mut frames_stmt = conn.prepare(&format!(
        "SELECT id, file, status, error FROM frames
         WHERE run_id = ?1 AND {COUNTED_SQL}
           AND (status = 'failed' OR EXISTS (SELECT 1 FROM flags WHERE frame_id = frames.id))
         ORDER BY id DESC LIMIT ?2"
    ))?;
    let mut flags_stmt = conn.prepare(
        "SELECT flag, value, limit_value, message FROM flags WHERE frame_id = ?1 ORDER BY id",
    )?;
    let frames: Vec<(i64, String, String, Option<String>)> = frames_stmt
        .query_map(params![run_id, limit as i64], |r| {
            Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
        })?
        .collect::<Result<_, _>>()?;
    let mut out = Vec::with_capacity(frames.len());
    for (id, file, status, error) in frames {
        let mut flags: Vec<FlagRow> = flags_stmt
            .query_map([id], |r| {
                Ok(FlagRow {
                    flag: r.get(0)?,
                    value: r.get(1)?,
                    limit: r.get(2)?,
                    message: r.get(3)?,
                })
            })?
            .collect::<Result<_, _>>()?;
        if status == "failed" {
            flags.push(failure_flag(error.as_deref().unwrap_or("no reason recorded")).into());
        }
        out.push(FlaggedFrame { file, flags });
    }
    Ok(out)
}

/// The lists as text for a terminal, times shown in `zone`.
pub fn render(
    alerts: &[AlertRow],
    counts: &[FlagCount],
    flagged: &[FlaggedFrame],
    zone: &jiff::tz::TimeZone,
    out: &mut String,
) {
    if !alerts.is_empty() {
        let open = alerts.iter().filter(|a| a.closed_at.is_none()).count();
        let _ = writeln!(out, "\nalerts ({open} open):");
        for a in alerts {
            let state = a.closed_at.as_ref().map_or_else(
                || "OPEN".to_string(),
                |c| format!("closed {}", shown_time(c, zone)),
            );
            let _ = writeln!(
                out,
                "  [{state}] {} since {}: {}",
                shown(&a.condition),
                shown_time(&a.opened_at, zone),
                shown(&a.message)
            );
            // The message names up to LISTED positions; a longer list in full here.
            if a.positions.len() > LISTED {
                let names: Vec<String> = a.positions.iter().map(|p| shown(p).to_string()).collect();
                let _ = writeln!(
                    out,
                    "      positions ({}): {}",
                    names.len(),
                    names.join(", ")
                );
            }
            if let Some(m) = &a.closed_message {
                let how = match a.closed_state.as_deref() {
                    Some("closed") => "closed with the run",
                    _ => "recovered",
                };
                let _ = writeln!(out, "      {how}: {}", shown(m));
            }
        }
    }
    if !counts.is_empty() {
        let _ = writeln!(out, "\nflags over the run (frames):");
        for c in counts {
            let _ = writeln!(out, "  {:<24} {:>7}", c.flag, c.frames);
        }
    }
    if !flagged.is_empty() {
        let _ = writeln!(out, "\nflagged frames (newest {}):", flagged.len());
        for f in flagged {
            let _ = writeln!(out, "  {}", shown(&f.file));
            for flag in &f.flags {
                let _ = writeln!(out, "    {}: {}", flag.flag, shown(&flag.message));
            }
        }
    }
}
