//! What the report shows, read from the store in one snapshot: the run's
//! frames in acquisition order with their position and measures, the alert
//! episodes, and the flags of each frame; and the drift charts replayed over
//! the frames as the run monitor drew them.
//!
//! The plots' time axis is acquisition time (when each file was first
//! written), not recording time: a run recorded after the fact (files copied
//! in with their modification times kept) plots as it was acquired. Alert
//! episodes, stamped when recorded, are placed on that axis through the frames
//! recorded by then.

use std::collections::BTreeMap;

use rusqlite::Connection;

use crate::qc::drift::Chart;
use crate::qc::metrics::Metric;
use crate::qc::params::ChartParams;
use crate::store::{ACQUISITION_ORDER_SQL, COUNT_USED_SQL, POSITION_SQL};

/// One recorded frame of the run.
#[derive(Debug, Clone, PartialEq)]
pub struct FrameRow {
    /// Row id (names its label image).
    pub id: i64,
    /// The frame's file.
    pub file: String,
    /// Well, site and channel as [`POSITION_SQL`] joins them.
    pub position: String,
    /// The well, when the file-name pattern names one.
    pub well: Option<String>,
    /// `done` or `failed` (queued rows are left out).
    pub status: String,
    /// Why it failed.
    pub error: Option<String>,
    /// When its outcome was recorded (ms since the Unix epoch).
    pub at_ms: i64,
    /// When its file was acquired: the modification time of the file's first
    /// version (`frames.acquired_ns`), in ms since the Unix epoch; when that
    /// is unknown, when it was recorded.
    pub acquired_ms: i64,
    /// The count used; `None` for a failure.
    pub count: Option<i64>,
    /// The charted metrics' values, in [`Metric::ALL`] order (NaN when unknown).
    pub metrics: [f64; 6],
    /// The frame's flags: name and sentence.
    pub flags: Vec<(String, String)>,
}

/// One alert episode or notice.
#[derive(Debug, Clone, PartialEq)]
pub struct Episode {
    /// Its condition (`drift:focus`, `stalled`, ...).
    pub condition: String,
    /// Opened (ms since the Unix epoch).
    pub opened_ms: i64,
    /// Closed; `None` while open.
    pub closed_ms: Option<i64>,
    /// The frame that triggered it.
    pub file: Option<String>,
    /// The sentence written when it opened.
    pub message: String,
    /// What ended it.
    pub closed_message: Option<String>,
    /// Where it opened on the acquisition time axis: the acquisition time of
    /// the frame that opened it, else of the last frame recorded by then.
    pub opened_acquired_ms: i64,
    /// Where it closed on the acquisition time axis (as `opened_acquired_ms`).
    pub closed_acquired_ms: Option<i64>,
}

/// The run's frames (done and failed, in acquisition order) and alert episodes.
#[derive(Debug, Clone, PartialEq)]
pub struct RunData {
    /// Frames in acquisition order ([`ACQUISITION_ORDER_SQL`]), the order the
    /// monitor charts them in.
    pub frames: Vec<FrameRow>,
    /// Alert episodes, oldest first.
    pub episodes: Vec<Episode>,
}

/// Reads run `run_id`'s frames and alert episodes.
///
/// # Errors
/// SQLite errors.
pub fn read(conn: &Connection, run_id: i64) -> rusqlite::Result<RunData> {
    let mut stmt = conn.prepare(&format!(
        "SELECT id, file, {POSITION_SQL}, well, status, error, COALESCE(analyzed_at_ms, 0),
                COALESCE(acquired_ns / 1000000, analyzed_at_ms, 0),
                CASE WHEN status = 'done' THEN {COUNT_USED_SQL} END,
                background_level, illumination_change, threshold, separability, focus, object_count
         FROM frames WHERE run_id = ?1 AND status IN ('done', 'failed') ORDER BY {ACQUISITION_ORDER_SQL}"
    ))?;
    let mut frames: Vec<FrameRow> = stmt
        .query_map([run_id], |r| {
            let num = |i: usize| -> rusqlite::Result<f64> {
                Ok(r.get::<_, Option<f64>>(i)?.unwrap_or(f64::NAN))
            };
            Ok(FrameRow {
                id: r.get(0)?,
                file: r.get(1)?,
                position: r.get(2)?,
                well: r.get(3)?,
                status: r.get(4)?,
                error: r.get(5)?,
                at_ms: r.get(6)?,
                acquired_ms: r.get(7)?,
                count: r.get(8)?,
                metrics: [num(9)?, num(10)?, num(11)?, num(12)?, num(13)?, num(14)?],
                flags: Vec::new(),
            })
        })?
        .collect::<Result<_, _>>()?;
    let mut flags_stmt = conn.prepare(
        "SELECT flags.frame_id, flag, message FROM flags JOIN frames ON frames.id = flags.frame_id
         WHERE frames.run_id = ?1 ORDER BY flags.id",
    )?;
    let mut by_id: BTreeMap<i64, Vec<(String, String)>> = BTreeMap::new();
    for row in flags_stmt.query_map([run_id], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))? {
        let (id, flag, message): (i64, String, String) = row?;
        by_id.entry(id).or_default().push((flag, message));
    }
    for f in &mut frames {
        if let Some(flags) = by_id.remove(&f.id) {
            f.flags = flags;
        }
    }
    let mut alerts = conn.prepare(
        "SELECT condition, opened_at_ms, closed_at_ms,
                COALESCE(file, (SELECT file FROM frames WHERE id = alerts.frame_id)), message, closed_message,
                (SELECT acquired_ns / 1000000 FROM frames WHERE id = alerts.frame_id)
         FROM alerts WHERE run_id = ?1 ORDER BY opened_at_ms, id",
    )?;
    let recorded = RecordedToAcquired::new(&frames);
    let episodes = alerts
        .query_map([run_id], |r| {
            let opened_ms = r.get(1)?;
            let closed_ms: Option<i64> = r.get(2)?;
            let frame_acquired: Option<i64> = r.get(6)?;
            Ok(Episode {
                condition: r.get(0)?,
                opened_ms,
                closed_ms,
                file: r.get(3)?,
                message: r.get(4)?,
                closed_message: r.get(5)?,
                opened_acquired_ms: frame_acquired.unwrap_or_else(|| recorded.at(opened_ms)),
                closed_acquired_ms: closed_ms.map(|c| recorded.at(c)),
            })
        })?
        .collect::<Result<_, _>>()?;
    Ok(RunData { frames, episodes })
}

/// Recording times to acquisition times, through the frames: a moment of
/// recording is placed at the acquisition time of the last frame recorded by
/// then (the first frame's when none was).
struct RecordedToAcquired {
    /// (recorded, acquired), by recording time.
    frames: Vec<(i64, i64)>,
}

impl RecordedToAcquired {
    fn new(frames: &[FrameRow]) -> RecordedToAcquired {
        let mut frames: Vec<(i64, i64)> = frames.iter().map(|f| (f.at_ms, f.acquired_ms)).collect();
        frames.sort_unstable();
        RecordedToAcquired { frames }
    }

    fn at(&self, recorded_ms: i64) -> i64 {
        let by_then = self.frames.partition_point(|f| f.0 <= recorded_ms);
        self.frames
            .get(by_then.saturating_sub(1))
            .map_or(recorded_ms, |f| f.1)
    }
}

/// One charted frame of one position.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TracePoint {
    /// When its file was acquired ([`FrameRow::acquired_ms`]).
    pub acquired_ms: i64,
    /// The metric's value.
    pub value: f64,
    /// The EWMA statistic after it, in baseline sigmas; `None` while the
    /// baseline is being collected.
    pub ewma: Option<f64>,
    /// The EWMA control limit at this frame, in baseline sigmas.
    pub limit: Option<f64>,
    /// True while the position's chart is in a declared drift.
    pub in_drift: bool,
}

/// A metric's trace at one position, with its baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct Trace {
    /// The position.
    pub position: String,
    /// Every done frame's value, in acquisition order.
    pub points: Vec<TracePoint>,
    /// Baseline mean and sigma (after the floor), once the baseline is complete.
    pub baseline: Option<(f64, f64)>,
    /// True when the chart declared a drift that harms (see [`Metric::harms`]).
    pub drifted: bool,
}

/// The drift charts of `metric` at every position, replayed over the done
/// frames in acquisition order (as [`read`] gives them) exactly as the run monitor builds them: a
/// baseline from the first `baseline_frames` frames, then one chart step per
/// frame ([`Chart::from_baseline`], [`Chart::update`]).
pub fn replay(frames: &[FrameRow], metric: Metric, params: &ChartParams) -> Vec<Trace> {
    let index = Metric::ALL.iter().position(|&m| m == metric).unwrap_or(0);
    struct State {
        trace: Trace,
        baseline: Vec<f64>,
        chart: Option<Chart>,
    }
    let mut states: BTreeMap<&str, State> = BTreeMap::new();
    for f in frames.iter().filter(|f| f.status == "done") {
        let value = f.metrics[index];
        let s = states.entry(&f.position).or_insert_with(|| State {
            trace: Trace {
                position: f.position.clone(),
                points: Vec::new(),
                baseline: None,
                drifted: false,
            },
            baseline: Vec::new(),
            chart: None,
        });
        let mut point = TracePoint {
            acquired_ms: f.acquired_ms,
            value,
            ewma: None,
            limit: None,
            in_drift: false,
        };
        match &mut s.chart {
            None => {
                // The monitor charts stored values with unknown ones read as 0.
                s.baseline.push(if value.is_nan() { 0.0 } else { value });
                if s.baseline.len() >= params.baseline_frames {
                    let chart = Chart::from_baseline(params, metric, &s.baseline);
                    s.trace.baseline = Some((chart.mean, chart.sigma));
                    s.chart = Some(chart);
                }
            }
            Some(chart) => {
                let step = chart.update(if value.is_nan() { 0.0 } else { value });
                point.ewma = Some(step.ewma);
                point.limit = Some(step.ewma_limit);
                let drift = chart.drift();
                point.in_drift = drift.is_some_and(|d| metric.harms(d));
                s.trace.drifted |= point.in_drift;
            }
        }
        s.trace.points.push(point);
    }
    states.into_values().map(|s| s.trace).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::qc::params::QualitySettings;

    fn frame(position: &str, at_ms: i64, count: f64) -> FrameRow {
        FrameRow {
            id: at_ms,
            file: format!("{position}-{at_ms}.tif"),
            position: position.into(),
            well: None,
            status: "done".into(),
            error: None,
            at_ms,
            acquired_ms: at_ms,
            count: Some(count as i64),
            metrics: [0.0, 0.0, 0.0, 0.0, 0.0, count],
            flags: Vec::new(),
        }
    }

    #[test]
    fn replay_builds_the_baseline_then_charts_each_position_alone() {
        let params = QualitySettings::default().charts;
        let n = params.baseline_frames;
        let mut frames = Vec::new();
        for i in 0..(n + 30) as i64 {
            frames.push(frame("A01", i, 100.0));
            // B01 collapses once its baseline is in.
            frames.push(frame("B01", i, if i < n as i64 { 100.0 } else { 10.0 }));
        }
        let traces = replay(&frames, Metric::ObjectCount, &params);
        assert_eq!(traces.len(), 2);
        let (a, b) = (&traces[0], &traces[1]);
        assert_eq!(a.position, "A01");
        // Mean 100, sigma floored at sqrt(100) = 10 (Metric::sigma_floor).
        assert_eq!(a.baseline, Some((100.0, 10.0)));
        assert!(a.points[..n].iter().all(|p| p.ewma.is_none()));
        assert!(!a.drifted && b.drifted);
        // z = (10 - 100) / 10 = -9, clipped; the EWMA's first step is λ·z.
        let first = b.points[n].ewma.unwrap();
        assert!((first - params.ewma_lambda * -params.outlier_clip).abs() < 1e-12);
    }

    #[test]
    fn a_recording_time_is_placed_at_the_last_frame_recorded_by_then() {
        // Recorded at 100, 200, 300 ms; acquired at 10, 20, 30 ms.
        let frames: Vec<FrameRow> = [(300, 30), (100, 10), (200, 20)]
            .iter()
            .map(|&(recorded, acquired)| FrameRow {
                acquired_ms: acquired,
                ..frame("A01", recorded, 1.0)
            })
            .collect();
        let map = RecordedToAcquired::new(&frames);
        assert_eq!(
            [50, 100, 199, 200, 250, 300, 1000].map(|t| map.at(t)),
            [10, 10, 10, 20, 20, 30, 30]
        );
        assert_eq!(RecordedToAcquired::new(&[]).at(77), 77);
    }
}
