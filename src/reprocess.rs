//! `framewarden reprocess`: analyses a recorded run's frames again, from the
//! files still on disk, with the run's stored settings changed by the
//! `[segment]`, `[measure]` and `[quality]` keys of a `--with` file, and
//! records the results as a new analysis of the same run (the run's earlier
//! analyses stay as they are; see [`crate::store::analyses`]).
//!
//! The frames are read by `analyze`'s pool ([`crate::analyze::in_order`]) and
//! judged, in acquisition order, by a fresh quality monitor as the watch
//! service judges them ([`RunMonitor::judge`]). A reprocess sends no alert;
//! the alerts that would have opened are only listed in its comparison.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt::Write as _;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};

use rusqlite::{params, params_from_iter, Connection, OptionalExtension};

use crate::analyze::in_order;
use crate::pipeline::{analyze_file, analyze_stack_page, FileAnalysis};
use crate::qc::alerts::{AlertEvent, AlertState};
use crate::qc::monitor::RunMonitor;
use crate::settings::{ConfigError, Settings};
use crate::store::writer::{
    insert_objects, result_placeholders, result_values, ObjectsOf, RESULT_COLUMNS,
};
use crate::store::{
    self, now_ms, FrameKey, StoreError, ACQUISITION_ORDER_SQL, COUNTED_SQL, COUNT_USED_SQL,
    POSITION_SQL,
};
use crate::text::shown;

/// The sections a `--with` file may change: how a frame is analysed and
/// judged. Everything else (folders, names, the store, alerts) is the run's.
pub const CHANGEABLE: [&str; 3] = ["segment", "measure", "quality"];

/// Frames recorded per transaction, so that a service recording into the
/// same database is never kept waiting long.
const FRAMES_PER_COMMIT: usize = 100;

/// Why a reprocess could not be done.
#[derive(Debug, thiserror::Error)]
pub enum ReprocessError {
    /// The database could not be opened or read.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The database has no run yet.
    #[error("{0} has no run yet: nothing to reprocess")]
    Empty(PathBuf),
    /// The run's settings were recorded before they could be loaded back.
    #[error("run {0}'s settings were recorded by a framewarden older than schema 6 (a listing, not TOML): it cannot be reprocessed")]
    Listing(i64),
    /// The `--with` file cannot be read or changes what a reprocess keeps.
    #[error("{path}: {message}")]
    With {
        /// The `--with` file.
        path: PathBuf,
        /// What is wrong, naming the key.
        message: String,
    },
    /// The run's settings, changed by `--with`, are not valid.
    #[error(transparent)]
    Settings(#[from] ConfigError),
}

impl ReprocessError {
    /// True for errors in what the user asked (exit code 2).
    pub fn is_usage(&self) -> bool {
        matches!(
            self,
            ReprocessError::With { .. } | ReprocessError::Settings(_)
        )
    }
}

/// What to reprocess.
#[derive(Debug, Clone)]
pub struct Request {
    /// The database.
    pub db: PathBuf,
    /// The run (by default the last one).
    pub run: Option<i64>,
    /// Partial TOML whose `[segment]`, `[measure]` and `[quality]` keys
    /// replace the run's.
    pub with: Option<PathBuf>,
    /// Analysis threads.
    pub workers: usize,
}

/// One position's change from the run's first analysis to the new one.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct PositionChange {
    /// The position (well, site, channel; empty when the run names none).
    pub position: String,
    /// Frames done in both analyses.
    pub frames: u64,
    /// Their objects (count used) in the first analysis.
    pub before: i64,
    /// Their objects (count used) in the new analysis.
    pub after: i64,
    /// Flags the new analysis gives that the first did not, by flag, counted
    /// over frames.
    pub gained: BTreeMap<String, u64>,
    /// Flags the first analysis gave that the new one does not.
    pub lost: BTreeMap<String, u64>,
}

/// What a reprocess did, and how it compares with the run's first analysis.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Comparison {
    /// The run.
    pub run_id: i64,
    /// The new analysis's number.
    pub analysis: i64,
    /// Frames analysed again.
    pub reread: u64,
    /// Per position, in order.
    pub positions: Vec<PositionChange>,
    /// Frames that could not be re-read: file and cause.
    pub not_reread: Vec<(String, String)>,
    /// Alerts that would have opened (condition and message); none was sent.
    pub would_open: Vec<(String, String)>,
}

/// A frame row to analyse again, in acquisition order.
struct Recorded {
    id: i64,
    key: FrameKey,
    position: String,
    at_ms: i64,
}

/// Analyses run `request.run` of `request.db` again and records it as a new
/// analysis; returns the comparison with the run's first analysis.
///
/// # Errors
/// [`ReprocessError`]. A frame that cannot be read is no error: it is
/// recorded as failed in the new analysis and named in the comparison.
pub fn reprocess(request: &Request) -> Result<Comparison, ReprocessError> {
    let db = &request.db;
    let sqlite = |source| StoreError::Sqlite {
        path: db.clone(),
        source,
    };
    // Checked read-only first: a missing file is named, not created.
    drop(store::open_read_only(db)?);
    let mut conn = store::open_for_writing(db)?;
    let (run_id, stored, format) = conn
        .query_row(
            "SELECT id, settings, settings_format FROM runs WHERE ?1 IS NULL OR id = ?1
             ORDER BY id DESC LIMIT 1",
            [request.run],
            |r| {
                Ok((
                    r.get::<_, i64>(0)?,
                    r.get::<_, String>(1)?,
                    r.get::<_, String>(2)?,
                ))
            },
        )
        .optional()
        .map_err(sqlite)?
        .ok_or_else(|| match request.run {
            Some(run) => ReprocessError::Store(StoreError::NoRun {
                path: db.clone(),
                run,
            }),
            None => ReprocessError::Empty(db.clone()),
        })?;
    if format != "toml" {
        return Err(ReprocessError::Listing(run_id));
    }
    let settings = changed_settings(&stored, request.with.as_deref(), run_id)?;
    let frames = recorded_frames(&conn, run_id).map_err(sqlite)?;
    let (analysis_id, number) = begin_analysis(&mut conn, run_id, &settings).map_err(sqlite)?;

    let mut monitor =
        RunMonitor::new(settings.quality.clone()).with_group_window(settings.alerts.group_window);
    let mut would_open = Vec::new();
    let progress = Progress::new(frames.len() as u64);
    conn.execute_batch("BEGIN IMMEDIATE").map_err(sqlite)?;
    in_order(
        frames.len(),
        request.workers,
        |i| reread(&frames[i].key, &settings),
        |i, outcome| -> rusqlite::Result<()> {
            let frame = &frames[i];
            match &outcome {
                Ok(analysis) => {
                    let verdict = monitor.judge(
                        &frame.position,
                        &frame.key.path,
                        frame.at_ms,
                        analysis,
                        false,
                    );
                    record_done(&conn, analysis_id, frame.id, analysis)?;
                    let mut insert = conn.prepare_cached(
                        "INSERT INTO analysis_flags (analysis_id, frame_id, flag, value, limit_value, message)
                         VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
                    )?;
                    for f in &verdict.flags {
                        insert.execute(params![
                            analysis_id,
                            frame.id,
                            f.kind.as_str(),
                            f.value,
                            f.limit,
                            f.message
                        ])?;
                    }
                    would_open.extend(openings(verdict.events));
                }
                Err(cause) => {
                    would_open.extend(openings(
                        monitor.observe_failure(&frame.key.path, frame.at_ms),
                    ));
                    conn.prepare_cached(
                        "INSERT INTO analysis_frames (analysis_id, frame_id, status, error, analyzed_at_ms)
                         VALUES (?1, ?2, 'failed', ?3, ?4)",
                    )?
                    .execute(params![analysis_id, frame.id, cause, now_ms()])?;
                }
            }
            progress.advance();
            if (i + 1) % FRAMES_PER_COMMIT == 0 {
                conn.execute_batch("COMMIT; BEGIN IMMEDIATE")?;
            }
            Ok(())
        },
    )
    .map_err(sqlite)?;
    conn.execute(
        "UPDATE analyses SET finished_at_ms = ?2 WHERE id = ?1",
        params![analysis_id, now_ms()],
    )
    .map_err(sqlite)?;
    conn.execute_batch("COMMIT").map_err(sqlite)?;
    progress.finish();
    drop(conn);
    let mut comparison = compare(db, run_id, number)?;
    comparison.would_open = would_open;
    Ok(comparison)
}

/// The alerts among `events` that open: (condition, message).
fn openings(events: Vec<AlertEvent>) -> impl Iterator<Item = (String, String)> {
    events
        .into_iter()
        .filter(|e| e.state == AlertState::Opened)
        .map(|e| (e.condition, e.message))
}

/// The run's stored settings with the `--with` file's `[segment]`,
/// `[measure]` and `[quality]` keys put in (key by key, tables merged); any
/// other key is refused, by name.
fn changed_settings(
    stored: &str,
    with: Option<&Path>,
    run_id: i64,
) -> Result<Settings, ReprocessError> {
    let Some(path) = with else {
        return Ok(Settings::from_toml(
            stored,
            &format!("run {run_id} settings"),
        )?);
    };
    let refuse = |message: String| ReprocessError::With {
        path: path.to_path_buf(),
        message,
    };
    let text = std::fs::read_to_string(path).map_err(|e| refuse(e.to_string()))?;
    let changes: toml::Table = text
        .parse()
        .map_err(|e: toml::de::Error| refuse(e.to_string()))?;
    let mut settings: toml::Table = stored
        .parse()
        .map_err(|e: toml::de::Error| refuse(format!("run {run_id}'s stored settings: {e}")))?;
    for (section, value) in changes {
        let keys = match value {
            toml::Value::Table(keys) if CHANGEABLE.contains(&section.as_str()) => keys,
            toml::Value::Table(keys) => {
                let key = keys
                    .keys()
                    .next()
                    .map_or_else(|| section.clone(), |k| format!("{section}.{k}"));
                return Err(refuse(format!(
                    "`{key}` cannot be changed by a reprocess: only [segment], [measure] and [quality] keys can (the rest is the run's)"
                )));
            }
            _ => {
                return Err(refuse(format!(
                    "`{section}` cannot be changed by a reprocess: only keys in [segment], [measure] and [quality] can"
                )))
            }
        };
        let into = settings
            .entry(section)
            .or_insert_with(|| toml::Value::Table(toml::Table::new()));
        merge(into, toml::Value::Table(keys));
    }
    Ok(Settings::from_toml(
        &toml::to_string(&settings).unwrap_or_default(),
        &format!("run {run_id} settings changed by {}", path.display()),
    )?)
}

/// Puts `change` into `into`: tables key by key, anything else replaced.
fn merge(into: &mut toml::Value, change: toml::Value) {
    match (into, change) {
        (toml::Value::Table(into), toml::Value::Table(change)) => {
            for (k, v) in change {
                match into.get_mut(&k) {
                    Some(old) => merge(old, v),
                    None => {
                        into.insert(k, v);
                    }
                }
            }
        }
        (into, change) => *into = change,
    }
}

/// The run's frames that count (done or failed, each frame once), in
/// acquisition order.
fn recorded_frames(conn: &Connection, run_id: i64) -> rusqlite::Result<Vec<Recorded>> {
    conn.prepare(&format!(
        "SELECT id, file, size_bytes, mtime_ns, {POSITION_SQL}, COALESCE(analyzed_at_ms, ready_at_ms), page
         FROM frames WHERE run_id = ?1 AND status IN ('done', 'failed') AND {COUNTED_SQL}
         ORDER BY {ACQUISITION_ORDER_SQL}"
    ))?
    .query_map([run_id], |r| {
        Ok(Recorded {
            id: r.get(0)?,
            key: FrameKey {
                path: r.get(1)?,
                size_bytes: r.get::<_, i64>(2)? as u64,
                mtime_ns: r.get(3)?,
                page: r.get::<_, Option<i64>>(6)?.map(|p| p as usize),
            },
            position: r.get(4)?,
            at_ms: r.get(5)?,
        })
    })?
    .collect()
}

/// Clears what an earlier reprocess of the run left unfinished (stopped
/// before its end), then records the new analysis: `(analyses.id, number)`.
fn begin_analysis(
    conn: &mut Connection,
    run_id: i64,
    settings: &Settings,
) -> rusqlite::Result<(i64, i64)> {
    let tx = conn.transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
    const UNFINISHED: &str = "SELECT id FROM analyses WHERE run_id = ?1 AND finished_at_ms IS NULL";
    for table in ["analysis_flags", "analysis_objects", "analysis_frames"] {
        tx.execute(
            &format!("DELETE FROM {table} WHERE analysis_id IN ({UNFINISHED})"),
            [run_id],
        )?;
    }
    tx.execute(
        "DELETE FROM analyses WHERE run_id = ?1 AND finished_at_ms IS NULL",
        [run_id],
    )?;
    let number: i64 = tx.query_row(
        "SELECT COALESCE(MAX(number), 1) + 1 FROM analyses WHERE run_id = ?1",
        [run_id],
        |r| r.get(0),
    )?;
    tx.execute(
        "INSERT INTO analyses (run_id, number, created_at_ms, settings, source)
         VALUES (?1, ?2, ?3, ?4, 'reprocess')",
        params![run_id, number, now_ms(), settings.to_toml()],
    )?;
    let id = tx.last_insert_rowid();
    tx.commit()?;
    Ok((id, number))
}

/// One recorded frame analysed again, when its file is still the version
/// that was recorded (for a stack's page: the file still holds the page's
/// bytes, since a stack only grows); otherwise why not.
fn reread(key: &FrameKey, settings: &Settings) -> Result<FileAnalysis, String> {
    let path = Path::new(&key.path);
    if let Some(page) = key.page {
        let len = std::fs::metadata(path)
            .map_err(|e| format!("cannot be read: {e}"))?
            .len();
        if len < key.size_bytes {
            return Err(
                "shorter than when its page was recorded: not the stack the run analysed".into(),
            );
        }
        return analyze_stack_page(path, page, &settings.pipeline, false)
            .map(|(analysis, _)| analysis)
            .map_err(|e| e.to_string());
    }
    let now = FrameKey::of(path).map_err(|e| format!("cannot be read: {e}"))?;
    if now != *key {
        return Err(
            "changed since it was recorded (other size or modification time): not the frame the run analysed"
                .into(),
        );
    }
    analyze_file(path, &settings.pipeline).map_err(|e| e.to_string())
}

/// Records a frame's new result and its objects.
fn record_done(
    conn: &Connection,
    analysis_id: i64,
    frame_id: i64,
    analysis: &FileAnalysis,
) -> rusqlite::Result<()> {
    let mut values = vec![
        rusqlite::types::Value::Integer(analysis_id),
        rusqlite::types::Value::Integer(frame_id),
        rusqlite::types::Value::Integer(now_ms()),
    ];
    values.extend(result_values(analysis));
    conn.prepare_cached(&format!(
        "INSERT INTO analysis_frames (analysis_id, frame_id, status, analyzed_at_ms, {RESULT_COLUMNS})
         VALUES (?1, ?2, 'done', ?3, {})",
        result_placeholders(4)
    ))?
    .execute(params_from_iter(values))?;
    let of = ObjectsOf::Analysis(analysis_id);
    insert_objects(conn, of, frame_id, "raw", &analysis.result.objects)?;
    if let Some(recount) = &analysis.recount {
        insert_objects(conn, of, frame_id, "recount", &recount.objects)?;
    }
    Ok(())
}

/// One frame as one analysis recorded it.
#[derive(Debug, Default)]
struct Side {
    position: String,
    done: bool,
    count: i64,
    flags: BTreeSet<String>,
}

/// The frames analysis `analysis` of run `run_id` holds, read as every
/// reader reads an analysis ([`store::read_run`]), keyed by frame row;
/// only rows in `only` when given.
fn sides(
    db: &Path,
    run_id: i64,
    analysis: i64,
    only: Option<i64>,
) -> Result<BTreeMap<i64, Side>, StoreError> {
    store::read_run(db, Some(run_id), Some(analysis), |conn, _| {
        let read = || -> rusqlite::Result<BTreeMap<i64, Side>> {
            let mut out = BTreeMap::new();
            let mut stmt = conn.prepare(&format!(
                "SELECT id, {POSITION_SQL}, status = 'done', COALESCE({COUNT_USED_SQL}, 0),
                        (SELECT json_group_array(flag) FROM flags WHERE frame_id = frames.id)
                 FROM frames WHERE run_id = ?1 AND {COUNTED_SQL}
                   AND (?2 IS NULL OR id IN (SELECT frame_id FROM main.analysis_frames WHERE analysis_id = ?2))"
            ))?;
            let mut rows = stmt.query(params![run_id, only])?;
            while let Some(r) = rows.next()? {
                let flags: String = r.get(4)?;
                out.insert(
                    r.get(0)?,
                    Side {
                        position: r.get(1)?,
                        done: r.get(2)?,
                        count: r.get(3)?,
                        flags: serde_json::from_str(&flags).unwrap_or_default(),
                    },
                );
            }
            Ok(out)
        };
        read().map_err(|source| StoreError::Sqlite {
            path: db.to_path_buf(),
            source,
        })
    })
}

/// Compares analysis `number` of run `run_id` with the run's first, per
/// position, over the frames the new analysis re-read.
fn compare(db: &Path, run_id: i64, number: i64) -> Result<Comparison, StoreError> {
    let analysis_id: i64 = store::read_run(db, Some(run_id), Some(number), |conn, _| {
        conn.query_row(
            "SELECT id FROM analyses WHERE run_id = ?1 AND number = ?2",
            [run_id, number],
            |r| r.get(0),
        )
        .map_err(|source| StoreError::Sqlite {
            path: db.to_path_buf(),
            source,
        })
    })?;
    let after = sides(db, run_id, number, None)?;
    let before = sides(db, run_id, 1, Some(analysis_id))?;
    let mut positions: BTreeMap<String, PositionChange> = BTreeMap::new();
    let mut not_reread = Vec::new();
    let mut reread = 0;
    let failures = failures(db, run_id, number)?;
    for (id, new) in &after {
        let Some(old) = before.get(id) else { continue };
        let p = positions
            .entry(new.position.clone())
            .or_insert_with(|| PositionChange {
                position: new.position.clone(),
                frames: 0,
                before: 0,
                after: 0,
                gained: BTreeMap::new(),
                lost: BTreeMap::new(),
            });
        if !new.done {
            if let Some(f) = failures.get(id) {
                not_reread.push(f.clone());
            }
            continue;
        }
        reread += 1;
        if !old.done {
            continue;
        }
        p.frames += 1;
        p.before += old.count;
        p.after += new.count;
        for f in new.flags.difference(&old.flags) {
            *p.gained.entry(f.clone()).or_default() += 1;
        }
        for f in old.flags.difference(&new.flags) {
            *p.lost.entry(f.clone()).or_default() += 1;
        }
    }
    Ok(Comparison {
        run_id,
        analysis: number,
        reread,
        positions: positions.into_values().collect(),
        not_reread,
        would_open: Vec::new(),
    })
}

/// The file and error of each frame analysis `number` could not re-read.
fn failures(
    db: &Path,
    run_id: i64,
    number: i64,
) -> Result<BTreeMap<i64, (String, String)>, StoreError> {
    store::read_run(db, Some(run_id), Some(number), |conn, _| {
        let read = || -> rusqlite::Result<BTreeMap<i64, (String, String)>> {
            conn.prepare(
                "SELECT id, file, COALESCE(error, '') FROM frames WHERE run_id = ?1 AND status = 'failed'",
            )?
            .query_map([run_id], |r| Ok((r.get(0)?, (r.get(1)?, r.get(2)?))))?
            .collect()
        };
        read().map_err(|source| StoreError::Sqlite {
            path: db.to_path_buf(),
            source,
        })
    })
}

/// The comparison as text: a line per position, then the frames that could
/// not be re-read and the alerts that would have opened.
pub fn render(c: &Comparison) -> String {
    let mut out = String::new();
    let _ = writeln!(
        out,
        "run {}: analysis {} recorded; {} frames re-read, {} could not be",
        c.run_id,
        c.analysis,
        c.reread,
        c.not_reread.len()
    );
    let name = |p: &str| {
        if p.is_empty() {
            "(the run)".to_string()
        } else {
            shown(p).to_string()
        }
    };
    let width = c
        .positions
        .iter()
        .map(|p| name(&p.position).chars().count())
        .max()
        .unwrap_or(0)
        .max(8);
    let flags = |m: &BTreeMap<String, u64>| {
        if m.is_empty() {
            "-".to_string()
        } else {
            m.iter()
                .map(|(f, n)| format!("{f} {n}"))
                .collect::<Vec<_>>()
                .join(", ")
        }
    };
    let _ = writeln!(
        out,
        "{:<width$} {:>6}  objects before -> after  flags gained; flags lost",
        "position", "frames"
    );
    for p in &c.positions {
        let _ = writeln!(
            out,
            "{:<width$} {:>6}  {:>7} -> {:<7}         gained: {}; lost: {}",
            name(&p.position),
            p.frames,
            p.before,
            p.after,
            flags(&p.gained),
            flags(&p.lost)
        );
    }
    if !c.not_reread.is_empty() {
        let _ = writeln!(out, "not re-read ({}):", c.not_reread.len());
        for (file, cause) in &c.not_reread {
            // A decoding error names the file already.
            let cause = cause.strip_prefix(&format!("{file}: ")).unwrap_or(cause);
            let _ = writeln!(out, "  {}: {}", shown(file), shown(cause));
        }
    }
    if !c.would_open.is_empty() {
        let _ = writeln!(
            out,
            "alerts that would have opened (a reprocess sends none): {}",
            c.would_open.len()
        );
        for (condition, message) in &c.would_open {
            let _ = writeln!(out, "  {}: {}", shown(condition), shown(message));
        }
    }
    out
}

/// Progress on standard error: a bar on a terminal, else a line at every
/// tenth of the frames.
enum Progress {
    Bar(indicatif::ProgressBar),
    Lines {
        total: u64,
        done: std::cell::Cell<u64>,
    },
}

impl Progress {
    fn new(total: u64) -> Progress {
        if std::io::stderr().is_terminal() {
            let bar = indicatif::ProgressBar::new(total);
            bar.set_style(
                indicatif::ProgressStyle::with_template(
                    "{bar:40} {pos}/{len} frames, {per_sec}, {eta} left",
                )
                .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
            );
            Progress::Bar(bar)
        } else {
            Progress::Lines {
                total,
                done: std::cell::Cell::new(0),
            }
        }
    }

    fn advance(&self) {
        match self {
            Progress::Bar(bar) => bar.inc(1),
            Progress::Lines { total, done } => {
                let n = done.get() + 1;
                done.set(n);
                if n * 10 / total.max(&1) > (n - 1) * 10 / total.max(&1) {
                    eprintln!("reprocess: {n} of {total} frames");
                }
            }
        }
    }

    fn finish(&self) {
        if let Progress::Bar(bar) = self {
            bar.finish_and_clear();
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::ObjectFilter;

    /// `changed_settings` with a `--with` file holding `text`.
    fn with(text: &str) -> Result<Settings, ReprocessError> {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("with.toml");
        std::fs::write(&path, text).unwrap();
        changed_settings(&Settings::default().to_toml(), Some(&path), 4)
    }

    #[test]
    fn with_changes_only_its_own_keys_and_keeps_the_rest_of_the_run() {
        let changed =
            with("[segment]\nmin_area_px = 80\n[quality]\nbaseline_frames = 7\n").unwrap();
        let text = changed.to_toml();
        assert!(text.contains("min_area_px = 80"), "{text}");
        assert!(text.contains("baseline_frames = 7"), "{text}");
        // Every other key is the run's: putting the two changed keys back
        // gives the stored settings.
        let back = text
            .replace(
                "min_area_px = 80",
                &format!("min_area_px = {}", ObjectFilter::DEFAULT_MIN_AREA_PX),
            )
            .replace(
                "baseline_frames = 7",
                &format!(
                    "baseline_frames = {}",
                    Settings::default().quality.charts.baseline_frames
                ),
            );
        assert_eq!(
            Settings::from_toml(&back, "back").unwrap(),
            Settings::default()
        );
    }

    #[test]
    fn with_refuses_keys_outside_segment_measure_and_quality_by_name() {
        for (text, key) in [
            ("[store]\nbatch_max = 3\n", "`store.batch_max`"),
            ("workers = 3\n", "`workers`"),
            (
                "[segment]\nmin_area_px = 80\n[watch]\nsettle_ms = 5\n",
                "`watch.settle_ms`",
            ),
        ] {
            let e = with(text).unwrap_err();
            assert!(e.is_usage() && e.to_string().contains(key), "{text}: {e}");
            assert!(e.to_string().contains("with.toml"), "{e}");
        }
        // A misspelt key inside [segment] is named by the settings' own check.
        let e = with("[segment]\nmin_area = 80\n").unwrap_err();
        assert!(e.is_usage() && e.to_string().contains("min_area"), "{e}");
    }
}
