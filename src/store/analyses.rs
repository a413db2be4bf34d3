//! Analyses of a run: the watch service's own results (analysis 1, in
//! `frames`, `objects`, `flags`, `alerts`) and those of each `reprocess`
//! (2, 3, …, in `analysis_frames`, `analysis_objects`, `analysis_flags`,
//! keyed by the frame rows they re-read; schema v8).
//!
//! Readers see any analysis under the usual table names: [`present`] lays
//! temporary views named `frames`, `objects`, `flags`, `alerts` and
//! `alert_positions` over analysis K on the reader's own connection (SQLite
//! looks in the temporary schema first), so every query of `status`,
//! `export` and the report reads analysis K unchanged.

use rusqlite::{Connection, OptionalExtension};

/// The analysis a reader shows.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Shown {
    /// The run (`runs.id`).
    pub run_id: i64,
    /// The analysis's number within the run (1 = the watch service's).
    pub analysis: i64,
    /// How many analyses the run has.
    pub analyses: i64,
}

/// The finished analysis of `run_id` numbered `number` (the newest when `None`):
/// `(analyses.id, number, how many)`, or `None` when there is no such number.
/// A database from before schema 8 (read without migrating) has only the
/// watch service's: `(0, 1, 1)`.
///
/// # Errors
/// SQLite errors.
pub fn pick(
    conn: &Connection,
    run_id: i64,
    number: Option<i64>,
) -> rusqlite::Result<Option<(i64, i64, i64)>> {
    let has_table: bool = conn.query_row(
        "SELECT count(*) > 0 FROM sqlite_master WHERE type = 'table' AND name = 'analyses'",
        [],
        |r| r.get(0),
    )?;
    if !has_table {
        return Ok((number.unwrap_or(1) == 1).then_some((0, 1, 1)));
    }
    let count: i64 = conn.query_row(
        "SELECT count(*) FROM analyses WHERE run_id = ?1 AND finished_at_ms IS NOT NULL",
        [run_id],
        |r| r.get(0),
    )?;
    conn.query_row(
        "SELECT id, number FROM analyses
         WHERE run_id = ?1 AND (?2 IS NULL OR number = ?2) AND finished_at_ms IS NOT NULL
         ORDER BY number DESC LIMIT 1",
        rusqlite::params![run_id, number],
        |r| Ok((r.get(0)?, r.get(1)?, count.max(1))),
    )
    .optional()
}

/// Makes the analysis `analysis_id` (numbered `number`) what the usual table
/// names read on `conn`. Number 1 is the tables themselves: nothing to do. For
/// a reprocess: `frames` is the run's frame rows that analysis re-read, each
/// with its identity, name parts and times from the row and its result
/// (status, error, measures, counts) from `analysis_frames`; `objects` and `flags` are that
/// analysis's; a reprocess sends and records no alert, so `alerts` and
/// `alert_positions` are empty. The views take their columns from the tables
/// they stand for, so a column added to `frames` later is carried through.
///
/// # Errors
/// SQLite errors.
pub fn present(conn: &Connection, analysis_id: i64, number: i64) -> rusqlite::Result<()> {
    if number == 1 {
        return Ok(());
    }
    let result_columns = columns(conn, "analysis_frames")?;
    let frames = columns(conn, "frames")?
        .into_iter()
        .map(|c| {
            // The frame's own times stay (a run's plots and rates are the
            // night's, not the morning's).
            let from = if c != "frame_id" && c != "analyzed_at_ms" && result_columns.contains(&c) {
                "r"
            } else {
                "f"
            };
            format!("{from}.\"{c}\"")
        })
        .collect::<Vec<_>>()
        .join(", ");
    let same = |table: &str, filter: &str| -> rusqlite::Result<String> {
        let cols = columns(conn, table)?
            .iter()
            .map(|c| format!("\"{c}\""))
            .collect::<Vec<_>>()
            .join(", ");
        Ok(format!("SELECT {cols} FROM {filter}"))
    };
    let views = [
        (
            "frames",
            format!(
                "SELECT {frames} FROM main.frames f JOIN main.analysis_frames r
                 ON r.frame_id = f.id AND r.analysis_id = {analysis_id}"
            ),
        ),
        (
            "objects",
            same(
                "objects",
                &format!("main.analysis_objects WHERE analysis_id = {analysis_id}"),
            )?,
        ),
        (
            "flags",
            same(
                "flags",
                &format!("main.analysis_flags WHERE analysis_id = {analysis_id}"),
            )?,
        ),
        ("alerts", same("alerts", "main.alerts WHERE 0")?),
        (
            "alert_positions",
            same("alert_positions", "main.alert_positions WHERE 0")?,
        ),
    ];
    for (name, select) in views {
        conn.execute_batch(&format!(
            "DROP VIEW IF EXISTS temp.{name}; CREATE TEMP VIEW {name} AS {select};"
        ))?;
    }
    Ok(())
}

/// The column names of the main schema's `table`, in order.
fn columns(conn: &Connection, table: &str) -> rusqlite::Result<Vec<String>> {
    conn.prepare(&format!(
        "SELECT name FROM pragma_table_info('{table}', 'main')"
    ))?
    .query_map([], |r| r.get(0))?
    .collect()
}
