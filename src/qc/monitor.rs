//! The run monitor: the memory of a run. It keeps, per position (well, site,
//! channel), the baseline of the first frames, the drift charts and the recent
//! counts; it turns each frame into flags, and the run's state into alert
//! episodes.
//!
//! Pure and clock-free: times come in with each call, so a synthetic night runs
//! in-process in milliseconds. Storing and delivering are the caller's.

use std::collections::{BTreeMap, VecDeque};

use crate::qc::alerts::{AlertBook, AlertEvent, AlertState};
use crate::qc::drift::{median, Chart, Signal, Step};
use crate::qc::flags::{frame_flags, num, FrameFlag, PositionContext};
use crate::qc::metrics::{Direction, FrameMetrics, Metric};
use crate::qc::params::QualitySettings;

/// Condition of a stalled acquisition.
pub const STALLED: &str = "stalled";
/// Condition of too many failed frames.
pub const FAILURE_RATE: &str = "failure_rate";
/// Notice that the run has recorded every expected frame.
pub const RUN_COMPLETE: &str = "run_complete";

/// The alert condition of a drift on `metric`.
pub fn drift_condition(metric: Metric) -> String {
    format!("drift:{}", metric.as_str())
}

/// What one frame produced: its flags and any alert events.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Verdict {
    /// The frame's flags, each with its evidence; empty for a clean frame.
    pub flags: Vec<FrameFlag>,
    /// Alert events the frame caused: episodes opened or closed, notices.
    pub events: Vec<AlertEvent>,
}

#[derive(Debug, Clone, Default)]
struct PositionState {
    /// The first frames, until the baseline is complete.
    baseline: Vec<FrameMetrics>,
    /// One chart per [`Metric::ALL`] entry, once the baseline is complete.
    charts: Vec<Chart>,
    baseline_focus: Option<f64>,
    usual_count: Option<f64>,
    recent_counts: VecDeque<f64>,
}

impl PositionState {
    /// What a frame at this position is judged against.
    fn context(&mut self, count_window: usize) -> PositionContext {
        PositionContext {
            baseline_focus: self.baseline_focus,
            usual_count: self.usual_count,
            recent_median_count: (self.recent_counts.len() >= count_window)
                .then(|| median(self.recent_counts.make_contiguous()))
                .flatten(),
        }
    }
}

/// The quality memory of one run.
#[derive(Debug, Clone)]
pub struct RunMonitor {
    settings: QualitySettings,
    positions: BTreeMap<String, PositionState>,
    book: AlertBook,
    last_frame_at_ms: Option<i64>,
    /// Recent outcomes, `true` for a failure.
    outcomes: VecDeque<bool>,
    /// Frames recorded so far (done or failed), and of them flagged or failed.
    recorded: u64,
    flagged: u64,
    failed: u64,
}

impl RunMonitor {
    /// A monitor for a new run: no positions, no open episodes, nothing recorded.
    pub fn new(settings: QualitySettings) -> RunMonitor {
        RunMonitor {
            settings,
            positions: BTreeMap::new(),
            book: AlertBook::default(),
            last_frame_at_ms: None,
            outcomes: VecDeque::new(),
            recorded: 0,
            flagged: 0,
            failed: 0,
        }
    }

    /// Judges one analyzed frame at `position` (empty when the run has no
    /// positions) and updates the run's charts.
    pub fn observe(&mut self, position: &str, file: &str, at_ms: i64, m: &FrameMetrics) -> Verdict {
        let limits = &self.settings.flags;
        let params = &self.settings.charts;
        let state = self.positions.entry(position.to_string()).or_default();
        let flags = frame_flags(m, limits, &state.context(limits.count_window));
        state.recent_counts.push_back(m.object_count as f64);
        while state.recent_counts.len() > limits.count_window {
            state.recent_counts.pop_front();
        }
        let mut changed: Vec<(Metric, Step)> = Vec::new();
        if state.charts.is_empty() {
            state.baseline.push(*m);
            if state.baseline.len() >= params.baseline_frames {
                let values = |metric: Metric| -> Vec<f64> {
                    state.baseline.iter().map(|b| metric.value(b)).collect()
                };
                state.charts = Metric::ALL
                    .iter()
                    .map(|&metric| Chart::from_baseline(params, metric, &values(metric)))
                    .collect();
                state.baseline_focus = median(&values(Metric::Focus));
                state.usual_count = median(&values(Metric::ObjectCount));
                state.baseline.clear();
            }
        } else {
            for (chart, metric) in state.charts.iter_mut().zip(Metric::ALL) {
                let step = chart.update(metric.value(m));
                if step.signal != Signal::Quiet && params.charted.contains(&metric) {
                    changed.push((metric, step));
                }
            }
        }
        let mut events = Vec::new();
        for (metric, step) in changed {
            let holds = self.in_drift(metric);
            let chart = &self.positions[position].charts[metric_index(metric)];
            let value = metric.value(m);
            let event = self
                .book
                .set(&drift_condition(metric), holds, at_ms, Some(file), || {
                    drift_message(metric, position, value, chart, &step)
                });
            events.extend(event);
        }
        self.last_frame_at_ms = Some(at_ms);
        events.extend(self.book.set(STALLED, false, at_ms, Some(file), || {
            format!("frames arrive again ({file})")
        }));
        events.extend(self.record_outcome(false, at_ms, file));
        self.flagged += u64::from(!flags.is_empty());
        events.extend(self.count_recorded(at_ms, file));
        Verdict { flags, events }
    }

    /// Judges a new version, with other pixels, of a frame already observed
    /// at `position`: its flags against the position's baseline and recent
    /// counts, without learning from it. The charts, the baseline and the
    /// counts keep each frame once (the version they saw first), and the run
    /// counts it once.
    pub fn judge_again(&mut self, position: &str, m: &FrameMetrics) -> Vec<FrameFlag> {
        let limits = &self.settings.flags;
        let ctx = match self.positions.get_mut(position) {
            Some(state) => state.context(limits.count_window),
            None => PositionState::default().context(limits.count_window),
        };
        frame_flags(m, limits, &ctx)
    }

    /// True once the run has recorded `expected_frames` frames.
    pub fn is_complete(&self) -> bool {
        self.settings
            .expected_frames
            .is_some_and(|n| self.recorded >= n)
    }

    /// Counts a recorded frame; the notice when it is the last one expected.
    fn count_recorded(&mut self, at_ms: i64, file: &str) -> Option<AlertEvent> {
        self.recorded += 1;
        (self.settings.expected_frames == Some(self.recorded)).then(|| AlertEvent {
            condition: RUN_COMPLETE.into(),
            state: AlertState::Notice,
            at_ms,
            file: Some(file.into()),
            message: format!(
                "the acquisition is complete: all {} expected frames recorded ({} flagged, {} failed); no stall alert from now on",
                self.recorded, self.flagged, self.failed
            ),
        })
    }

    /// Records a frame that produced no result (its flag is the error row's
    /// reason, see [`crate::qc::flags::failure_flag`]): the failure rate.
    pub fn observe_failure(&mut self, file: &str, at_ms: i64) -> Vec<AlertEvent> {
        self.last_frame_at_ms = Some(at_ms);
        let mut events: Vec<AlertEvent> = self
            .book
            .set(STALLED, false, at_ms, Some(file), || {
                format!("frames arrive again ({file})")
            })
            .into_iter()
            .collect();
        events.extend(self.record_outcome(true, at_ms, file));
        self.failed += 1;
        events.extend(self.count_recorded(at_ms, file));
        events
    }

    /// Checks for a stall: no frame for longer than `stall_after` since the last
    /// one. Before the first frame, and once every expected frame is recorded,
    /// the run is not active and nothing is raised.
    pub fn check_stall(&mut self, now_ms: i64) -> Option<AlertEvent> {
        if self.is_complete() {
            return None;
        }
        let last = self.last_frame_at_ms?;
        let limit_ms = i64::try_from(self.settings.stall_after.as_millis()).unwrap_or(i64::MAX);
        let idle_ms = now_ms - last;
        self.book.set(STALLED, idle_ms > limit_ms, now_ms, None, || {
            format!(
                "no new frame for {} (limit {}): the acquisition may have stopped, crashed or filled its disk",
                minutes(idle_ms),
                minutes(limit_ms)
            )
        })
    }

    /// Checks the free space of one volume (`name` says which, e.g. its path).
    pub fn check_free_space(
        &mut self,
        name: &str,
        free_bytes: u64,
        now_ms: i64,
    ) -> Option<AlertEvent> {
        let limit = self.settings.min_free_space_bytes;
        let condition = format!("low_disk_space:{name}");
        self.book.set(&condition, free_bytes < limit, now_ms, None, || {
            if free_bytes < limit {
                format!(
                    "only {} MiB free on {name} (limit {} MiB): new frames or results will soon fail to be written",
                    free_bytes >> 20,
                    limit >> 20
                )
            } else {
                format!("{} MiB free again on {name}", free_bytes >> 20)
            }
        })
    }

    /// Marks a stored, still open alert open again after a restart, so its
    /// recovery is noticed and it is not raised twice.
    pub fn restore_open(&mut self, condition: &str, opened_at_ms: i64) {
        self.book.restore(condition, opened_at_ms);
    }

    /// True when any position's chart of `metric` is in a declared drift.
    fn in_drift(&self, metric: Metric) -> bool {
        self.positions
            .values()
            .filter_map(|p| p.charts.get(metric_index(metric)))
            .filter_map(|c| c.drift())
            .any(|direction| metric.harms(direction))
    }

    fn record_outcome(&mut self, failed: bool, at_ms: i64, file: &str) -> Option<AlertEvent> {
        let window = self.settings.failure_window;
        self.outcomes.push_back(failed);
        while self.outcomes.len() > window {
            self.outcomes.pop_front();
        }
        let n = self.outcomes.len();
        let failures = self.outcomes.iter().filter(|&&f| f).count();
        let share = failures as f64 / n as f64;
        let limit = self.settings.max_failure_fraction;
        // A share of a handful of frames means little: judge from 10 outcomes on
        // (or the whole window, if smaller).
        let holds = n >= window.min(10) && share > limit;
        self.book.set(FAILURE_RATE, holds, at_ms, Some(file), || {
            format!(
                "{failures} of the last {n} frames failed ({:.0}%, limit {:.0}%)",
                100.0 * share,
                100.0 * limit
            )
        })
    }
}

fn metric_index(metric: Metric) -> usize {
    Metric::ALL
        .iter()
        .position(|&m| m == metric)
        .unwrap_or_else(|| unreachable!("every metric is in Metric::ALL"))
}

fn drift_message(metric: Metric, position: &str, value: f64, chart: &Chart, step: &Step) -> String {
    let at = if position.is_empty() {
        String::new()
    } else {
        format!(" at {position}")
    };
    match step.signal {
        Signal::Declared(dir) => format!(
            "{} drifting {}{at}: {} against a baseline of {} ± {} (EWMA {:+.2} σ, limit ±{:.2}; CUSUM up {:.1}, down {:.1}, limit {:.1})",
            metric.describe(),
            if dir == Direction::Up { "up" } else { "down" },
            num(value),
            num(chart.mean),
            num(chart.sigma),
            step.ewma,
            step.ewma_limit,
            step.cusum_up,
            step.cusum_down,
            chart.decision_interval(),
        ),
        _ => format!(
            "{} back in control{at} and everywhere else: {} against a baseline of {}",
            metric.describe(),
            num(value),
            num(chart.mean)
        ),
    }
}

fn minutes(ms: i64) -> String {
    if ms < 120_000 {
        format!("{} s", ms / 1000)
    } else {
        format!("{} min", ms / 60_000)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::qc::alerts::AlertState;

    fn frame() -> FrameMetrics {
        FrameMetrics::passing_example()
    }

    /// A count that doubles after the baseline opens a count drift, unless
    /// `object_count` is left out of the charted metrics.
    #[test]
    fn only_charted_metrics_raise_drift_alerts() {
        let drifts = |settings: QualitySettings| -> Vec<String> {
            let mut m = RunMonitor::new(settings);
            let mut events = Vec::new();
            for i in 0..20 {
                events.extend(m.observe("A01", "base", i, &frame()).events);
            }
            let grown = FrameMetrics {
                object_count: 80,
                ..frame()
            };
            for i in 20..40 {
                events.extend(m.observe("A01", "grown", i, &grown).events);
            }
            events.into_iter().map(|e| e.condition).collect()
        };
        let all = drifts(QualitySettings::default());
        assert!(all.contains(&"drift:object_count".to_string()), "{all:?}");
        let mut without = QualitySettings::default();
        without.charts.charted.retain(|&m| m != Metric::ObjectCount);
        let some = drifts(without);
        assert!(!some.iter().any(|c| c == "drift:object_count"), "{some:?}");
    }

    #[test]
    fn failure_rate_limit_on_both_sides_one_episode() {
        // Window 50, limit 20%: 10 failures in 50 is at the limit, 11 beyond.
        let mut m = RunMonitor::new(QualitySettings::default());
        let mut events = Vec::new();
        for i in 0..40 {
            events.extend(m.observe("", &format!("ok{i}"), i, &frame()).events);
        }
        for i in 40..50 {
            events.extend(m.observe_failure(&format!("bad{i}"), i));
        }
        assert!(events.is_empty(), "10 of 50 is not above 20%: {events:?}");
        let opened = m.observe_failure("bad50", 50);
        assert_eq!(opened.len(), 1);
        assert_eq!(
            (opened[0].condition.as_str(), opened[0].state),
            (FAILURE_RATE, AlertState::Opened)
        );
        assert!(
            opened[0].message.starts_with("11 of the last 50"),
            "{}",
            opened[0].message
        );
        // Good frames push the failures out of the window: one recovery.
        let recovered: Vec<AlertEvent> = (51..120)
            .flat_map(|i| m.observe("", "ok", i, &frame()).events)
            .collect();
        assert_eq!(recovered.len(), 1, "{recovered:?}");
        assert_eq!(recovered[0].state, AlertState::Recovered);
    }

    #[test]
    fn free_space_limit_on_both_sides() {
        let mut m = RunMonitor::new(QualitySettings::default());
        let limit = QualitySettings::default().min_free_space_bytes;
        assert_eq!(m.check_free_space("/data", limit, 0), None, "at the limit");
        let low = m.check_free_space("/data", limit - 1, 1).unwrap();
        assert_eq!(
            (low.condition.as_str(), low.state),
            ("low_disk_space:/data", AlertState::Opened)
        );
        assert_eq!(
            m.check_free_space("/data", limit - 1, 2),
            None,
            "still the same episode"
        );
        let back = m.check_free_space("/data", limit, 3).unwrap();
        assert_eq!(back.state, AlertState::Recovered);
    }

    #[test]
    fn no_stall_before_the_first_frame_and_the_limit_on_both_sides() {
        let mut m = RunMonitor::new(QualitySettings::default());
        let limit_ms = QualitySettings::default().stall_after.as_millis() as i64;
        assert_eq!(
            m.check_stall(10 * limit_ms),
            None,
            "no frame yet: not active"
        );
        m.observe("", "a.tif", 0, &frame());
        assert_eq!(m.check_stall(limit_ms), None, "exactly at the limit");
        assert_eq!(
            m.check_stall(limit_ms + 1).map(|e| e.state),
            Some(AlertState::Opened)
        );
    }

    #[test]
    fn a_run_with_every_expected_frame_is_complete_and_never_stalls() {
        let settings = QualitySettings {
            expected_frames: Some(3),
            ..QualitySettings::default()
        };
        let limit_ms = settings.stall_after.as_millis() as i64;
        let mut m = RunMonitor::new(settings);
        let notices = |events: &[AlertEvent]| -> Vec<String> {
            events
                .iter()
                .filter(|e| e.state == AlertState::Notice)
                .map(|e| format!("{} {}", e.condition, e.message))
                .collect()
        };
        assert!(notices(&m.observe("", "a.tif", 0, &frame()).events).is_empty());
        assert!(notices(&m.observe_failure("b.tif", 1)).is_empty());
        // Two of three: still active, so a gap is a stall.
        assert!(!m.is_complete());
        let stall = m.check_stall(1 + limit_ms + 1).expect("a stall");
        assert_eq!(stall.state, AlertState::Opened);
        // The third frame ends the stall and completes the run, once.
        let events = m.observe("", "c.tif", 2 * limit_ms, &frame()).events;
        assert!(events
            .iter()
            .any(|e| e.condition == STALLED && e.state == AlertState::Recovered));
        assert_eq!(
            notices(&events),
            ["run_complete the acquisition is complete: all 3 expected frames recorded (0 flagged, 1 failed); no stall alert from now on"]
        );
        assert!(m.is_complete());
        assert_eq!(m.check_stall(100 * limit_ms), None);
        // A frame beyond the expected number: no second notice.
        assert!(notices(&m.observe("", "d.tif", 3 * limit_ms, &frame()).events).is_empty());
    }

    #[test]
    fn without_an_expected_count_the_run_never_completes() {
        let mut m = RunMonitor::new(QualitySettings::default());
        for i in 0..10 {
            m.observe("", &format!("{i}.tif"), i, &frame());
        }
        assert!(!m.is_complete());
    }
}
