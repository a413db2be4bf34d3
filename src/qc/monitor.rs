//! The run monitor: the memory of a run. It keeps, per position (well, site,
//! channel), the baseline of the first frames, the drift charts and the recent
//! counts; it turns each frame into flags, and the run's state into alert
//! episodes.
//!
//! Pure and clock-free: times come in with each call, so a synthetic night runs
//! in-process in milliseconds. Storing and delivering are the caller's.

use std::collections::{BTreeMap, VecDeque};
use std::time::Duration;

use crate::pipeline::FileAnalysis;
use crate::qc::alerts::{
    list_positions, AlertBook, AlertEvent, AlertState, Entry, Exit, Group, GroupBook,
    PositionEvidence,
};
use crate::qc::drift::{median, Chart, Signal, Step};
use crate::qc::flags::{explain_recount, frame_flags, num, FrameFlag, PositionContext};
use crate::qc::metrics::{Direction, FrameMetrics, Metric};
use crate::qc::params::{AlertSettings, QualitySettings};

/// Condition of a stalled acquisition.
pub const STALLED: &str = "stalled";
/// Condition of too many failed frames.
pub const FAILURE_RATE: &str = "failure_rate";
/// Notice that the run has recorded every expected frame.
pub const RUN_COMPLETE: &str = "run_complete";
/// Condition of writes to the database failing for lack of space.
pub const DATABASE_FULL: &str = "database_full";

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
    /// Episodes of the whole run (stall, failure rate, free space).
    book: AlertBook,
    /// Drift episodes, each naming the positions that share it.
    groups: GroupBook,
    last_frame_at_ms: Option<i64>,
    /// Recent outcomes, `true` for a failure.
    outcomes: VecDeque<bool>,
    /// Frames recorded so far (done or failed), and of them flagged or failed.
    recorded: u64,
    flagged: u64,
    failed: u64,
}

impl RunMonitor {
    /// A monitor for a new run: no positions, no open episodes, nothing recorded;
    /// drifts are grouped over [`AlertSettings::DEFAULT_GROUP_WINDOW`].
    pub fn new(settings: QualitySettings) -> RunMonitor {
        RunMonitor {
            settings,
            positions: BTreeMap::new(),
            book: AlertBook::default(),
            groups: GroupBook::new(millis(AlertSettings::DEFAULT_GROUP_WINDOW)),
            last_frame_at_ms: None,
            outcomes: VecDeque::new(),
            recorded: 0,
            flagged: 0,
            failed: 0,
        }
    }

    /// The same monitor with drifts that open within `window` of an episode's
    /// opening grouped into it (`[alerts] group_window_min`).
    pub fn with_group_window(mut self, window: Duration) -> RunMonitor {
        self.groups = GroupBook::new(millis(window));
        self
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
            events.extend(self.drift_step(position, file, at_ms, metric, metric.value(m), &step));
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

    /// Judges one recorded file's analysis at `position`, as the service
    /// records it: a first version is observed ([`RunMonitor::observe`]), a
    /// version that supersedes one already judged is judged again without
    /// charting ([`RunMonitor::judge_again`]). Flags and charts use the first
    /// result, so the run's metrics stay comparable; where a recount ran, the
    /// flags say so ([`explain_recount`]).
    pub fn judge(
        &mut self,
        position: &str,
        file: &str,
        at_ms: i64,
        analysis: &FileAnalysis,
        supersedes: bool,
    ) -> Verdict {
        let metrics = FrameMetrics::from(&analysis.result);
        let mut verdict = if supersedes {
            Verdict {
                flags: self.judge_again(position, &metrics),
                events: Vec::new(),
            }
        } else {
            self.observe(position, file, at_ms, &metrics)
        };
        if let Some(recount) = &analysis.recount {
            explain_recount(&mut verdict.flags, &analysis.result, recount);
        }
        verdict
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

    /// Counts a recorded frame. When it is the last one expected, the run is
    /// complete: every open episode closes with a final message, then the
    /// notice says so.
    fn count_recorded(&mut self, at_ms: i64, file: &str) -> Vec<AlertEvent> {
        self.recorded += 1;
        if self.settings.expected_frames != Some(self.recorded) {
            return Vec::new();
        }
        let mut events = self.close_open_episodes(at_ms, file);
        events.push(AlertEvent::notice(
            RUN_COMPLETE,
            at_ms,
            Some(file),
            format!(
                "the acquisition is complete: all {} expected frames recorded ({} flagged, {} failed); no stall alert from now on",
                self.recorded, self.flagged, self.failed
            ),
        ));
        events
    }

    /// The run is over: every open episode closes, not recovered, each with a
    /// sentence saying what still held.
    fn close_open_episodes(&mut self, at_ms: i64, file: &str) -> Vec<AlertEvent> {
        let total = self.named_positions();
        let mut events: Vec<AlertEvent> = self
            .groups
            .close_all()
            .into_iter()
            .map(|group| {
                let holding = named(group.holding());
                let what = metric_of(&group.condition)
                    .map_or_else(|| group.condition.clone(), |m| m.describe().to_string());
                let message = format!(
                    "the run is complete with {what} still drifting{}; the alert closes with the run, not recovered",
                    at_positions(&holding, total)
                );
                group_event(&group, AlertState::Closed, at_ms, Some(file), message, None)
            })
            .collect();
        for (condition, opened_at_ms) in self.book.close_all() {
            let message = format!(
                "the run is complete with {condition} still open; the alert closes with the run, not recovered"
            );
            events.push(AlertEvent {
                condition,
                state: AlertState::Closed,
                at_ms,
                opened_at_ms,
                file: Some(file.to_string()),
                positions: Vec::new(),
                evidence: None,
                message,
            });
        }
        events
    }

    /// Turns one chart step of `metric` at `position` into the drift
    /// episodes' events: a position whose chart declares a harmful drift opens
    /// an episode or joins one (an update); one whose chart recovers leaves it,
    /// and the last to leave closes it.
    fn drift_step(
        &mut self,
        position: &str,
        file: &str,
        at_ms: i64,
        metric: Metric,
        value: f64,
        step: &Step,
    ) -> Option<AlertEvent> {
        let condition = drift_condition(metric);
        let total = self.named_positions();
        let chart = &self.positions[position].charts[metric_index(metric)];
        let evidence = PositionEvidence {
            position: position.to_string(),
            message: chart_evidence(value, chart, step),
        };
        match step.signal {
            Signal::Declared(direction) if metric.harms(direction) => {
                let (entry, group) = self.groups.enter(&condition, position, at_ms);
                let state = match entry {
                    Entry::Opened => AlertState::Opened,
                    Entry::Joined => AlertState::Updated,
                    Entry::Returned | Entry::Unchanged => return None,
                };
                let word = if direction == Direction::Up {
                    "up"
                } else {
                    "down"
                };
                let names = named(group.positions());
                let message = format!(
                    "{} drifting {word}{}{}",
                    metric.describe(),
                    at_positions(&names, total),
                    newest(&names, &evidence)
                );
                Some(group_event(
                    group,
                    state,
                    at_ms,
                    Some(file),
                    message,
                    Some(evidence),
                ))
            }
            Signal::Recovered => match self.groups.leave(&condition, position) {
                Exit::AllRecovered(group) => {
                    let names = named(group.positions());
                    let message = if names.is_empty() {
                        format!(
                            "{} back in control: {}",
                            metric.describe(),
                            evidence.message
                        )
                    } else {
                        format!(
                            "{} back in control at every position this alert named ({}); the last, {}",
                            metric.describe(),
                            list_positions(&names),
                            evidence.sentence()
                        )
                    };
                    Some(group_event(
                        &group,
                        AlertState::Recovered,
                        at_ms,
                        Some(file),
                        message,
                        Some(evidence),
                    ))
                }
                Exit::Recovered | Exit::Unchanged => None,
            },
            Signal::Declared(_) | Signal::Quiet => None,
        }
    }

    /// Positions with a name seen so far (a run whose files name no position
    /// has one, unnamed).
    fn named_positions(&self) -> usize {
        self.positions.keys().filter(|p| !p.is_empty()).count()
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
        let limit_ms = millis(self.settings.stall_after);
        let idle_ms = now_ms - last;
        self.book.set(STALLED, idle_ms > limit_ms, now_ms, None, || {
            format!(
                "no new frame for {} (limit {}): the acquisition may have stopped, crashed or filled its disk",
                minutes(idle_ms),
                minutes(limit_ms)
            )
        })
    }

    /// Checks the free space of one volume (`name` says which, e.g. its path);
    /// once the run is complete it writes nothing more, and nothing is raised.
    pub fn check_free_space(
        &mut self,
        name: &str,
        free_bytes: u64,
        now_ms: i64,
    ) -> Option<AlertEvent> {
        if self.is_complete() {
            return None;
        }
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

    /// Whether writes to the database `db` fail for lack of space (`cause`
    /// says how) or succeed again (`None`): one episode from the first
    /// failed write to the first that succeeds. Raised whether or not the run
    /// is complete: results wait in memory until then.
    pub fn set_database_full(
        &mut self,
        db: &str,
        cause: Option<&str>,
        now_ms: i64,
    ) -> Option<AlertEvent> {
        self.book
            .set(DATABASE_FULL, cause.is_some(), now_ms, None, || match cause {
                Some(cause) => format!(
                    "cannot write to the database {db} ({cause}): its volume is full; results wait (nothing is lost) and are recorded once space is freed"
                ),
                None => format!("the database {db} is written again"),
            })
    }

    /// Forgets the open episodes (after a replay, whose events are discarded:
    /// the stored alerts are the truth, put back with [`RunMonitor::restore_open`]).
    pub fn forget_episodes(&mut self) {
        self.book.close_all();
        self.groups.close_all();
    }

    /// Marks a stored, still open alert open again after a restart, so its
    /// updates and recovery are noticed and it is not raised twice. A drift
    /// alert gets back the positions it names (every position in the drift
    /// when it names none); the drift still holds at those whose chart is
    /// still in a harmful drift.
    pub fn restore_open(&mut self, condition: &str, opened_at_ms: i64, positions: &[String]) {
        let Some(metric) = metric_of(condition) else {
            self.book.restore(condition, opened_at_ms);
            return;
        };
        let holds = |p: &str| {
            self.positions
                .get(p)
                .and_then(|s| s.charts.get(metric_index(metric)))
                .and_then(Chart::drift)
                .is_some_and(|direction| metric.harms(direction))
        };
        let members = if positions.is_empty() {
            // Stored before alerts named positions (schema 6), or in a run
            // whose files name none: every position where the drift holds.
            self.positions
                .keys()
                .filter(|p| holds(p))
                .map(|p| (p.clone(), true))
                .collect()
        } else {
            positions.iter().map(|p| (p.clone(), holds(p))).collect()
        };
        self.groups.restore(Group {
            condition: condition.to_string(),
            opened_at_ms,
            members,
        });
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

/// The metric whose drift is `condition`, if it is a drift.
fn metric_of(condition: &str) -> Option<Metric> {
    Metric::ALL
        .iter()
        .copied()
        .find(|&m| drift_condition(m) == condition)
}

/// The names among `positions` (the unnamed position of a run whose files name
/// none is left out).
fn named(positions: Vec<String>) -> Vec<String> {
    positions.into_iter().filter(|p| !p.is_empty()).collect()
}

/// Where a drift holds, for a sentence: " at A01" in a run of one position,
/// " at A01 (1 of 16 positions)", " at 14 of 16 positions: A01, A02, …",
/// " at all 16 positions: …"; nothing when no position is named.
fn at_positions(names: &[String], total: usize) -> String {
    let total = total.max(names.len());
    match names {
        [] => String::new(),
        [one] if total == 1 => format!(" at {one}"),
        [one] => format!(" at {one} (1 of {total} positions)"),
        _ if names.len() == total => {
            format!(" at all {total} positions: {}", list_positions(names))
        }
        _ => format!(
            " at {} of {total} positions: {}",
            names.len(),
            list_positions(names)
        ),
    }
}

/// The evidence of the position that opened or joined an episode, after the
/// list of positions: ": <evidence>" when it is the only one named (or none
/// is), else "; newest, A03: <evidence>".
fn newest(names: &[String], evidence: &PositionEvidence) -> String {
    if names.len() <= 1 {
        format!(": {}", evidence.message)
    } else {
        format!("; newest, {}", evidence.sentence())
    }
}

/// One event of a drift episode: its positions, and the evidence of the
/// position that caused it.
fn group_event(
    group: &Group,
    state: AlertState,
    at_ms: i64,
    file: Option<&str>,
    message: String,
    evidence: Option<PositionEvidence>,
) -> AlertEvent {
    AlertEvent {
        condition: group.condition.clone(),
        state,
        at_ms,
        opened_at_ms: group.opened_at_ms,
        file: file.map(str::to_string),
        positions: named(group.positions()),
        evidence: evidence.filter(|e| !e.position.is_empty()),
        message,
    }
}

/// A chart's evidence at one frame: the value against the baseline, and the
/// statistics behind a declared drift.
fn chart_evidence(value: f64, chart: &Chart, step: &Step) -> String {
    match step.signal {
        Signal::Declared(_) => format!(
            "{} against a baseline of {} ± {} (EWMA {:+.2} σ, limit ±{:.2}; CUSUM up {:.1}, down {:.1}, limit {:.1})",
            num(value),
            num(chart.mean),
            num(chart.sigma),
            step.ewma,
            step.ewma_limit,
            step.cusum_up,
            step.cusum_down,
            chart.decision_interval(),
        ),
        _ => format!("{} against a baseline of {}", num(value), num(chart.mean)),
    }
}

fn millis(d: Duration) -> i64 {
    i64::try_from(d.as_millis()).unwrap_or(i64::MAX)
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

    /// A run with a 4-frame baseline, grouped over `window_ms`.
    fn grouping(window_ms: u64, expected_frames: Option<u64>) -> RunMonitor {
        let mut settings = QualitySettings {
            expected_frames,
            ..QualitySettings::default()
        };
        settings.charts.baseline_frames = 4;
        RunMonitor::new(settings).with_group_window(Duration::from_millis(window_ms))
    }

    /// The lamp at half power: background 3250 against a baseline of 6500 with
    /// its 2% floor (σ 130) is −25 σ, clipped to −4: the EWMA moves to −0.8 on
    /// the first such frame, beyond its first limit of 3·√(0.2/1.8·(1 − 0.8²))
    /// = 0.6, so the drift is declared at once.
    fn dim() -> FrameMetrics {
        FrameMetrics {
            background_level: 3250.0,
            ..frame()
        }
    }

    /// (state, positions) of each drift event.
    fn drift_events(events: &[AlertEvent]) -> Vec<(AlertState, Vec<String>)> {
        events
            .iter()
            .filter(|e| e.condition == "drift:background_level")
            .map(|e| (e.state, e.positions.clone()))
            .collect()
    }

    fn names(v: &[&str]) -> Vec<String> {
        v.iter().map(|s| s.to_string()).collect()
    }

    const WELLS: [&str; 4] = ["A01", "A02", "B01", "B02"];

    /// Four wells, baseline at t = 0..3; the lamp dims for every well at once
    /// (t = 4..6): one alert opened at the first well, grown by an update per
    /// further well, naming them all; it recovers once, when the last well
    /// has (recover_frames = 5 calm frames each), not before.
    #[test]
    fn every_well_dimming_together_is_one_alert_that_grows_then_recovers_once() {
        let mut m = grouping(60_000, None);
        let mut events = Vec::new();
        let mut at = 0;
        let mut time_point = |m: &mut RunMonitor, metrics: &dyn Fn(&str) -> FrameMetrics| {
            let mut out = Vec::new();
            for well in WELLS {
                at += 10;
                out.extend(
                    m.observe(well, &format!("{well}.tif"), at, &metrics(well))
                        .events,
                );
            }
            out
        };
        for _ in 0..4 {
            events.extend(time_point(&mut m, &|_| frame()));
        }
        assert!(events.is_empty(), "{events:?}");
        for _ in 0..3 {
            events.extend(time_point(&mut m, &|_| dim()));
        }
        assert_eq!(
            drift_events(&events),
            [
                (AlertState::Opened, names(&["A01"])),
                (AlertState::Updated, names(&["A01", "A02"])),
                (AlertState::Updated, names(&["A01", "A02", "B01"])),
                (AlertState::Updated, names(&["A01", "A02", "B01", "B02"])),
            ]
        );
        let opened_at = events[0].opened_at_ms;
        assert!(events.iter().all(|e| e.opened_at_ms == opened_at));
        assert_eq!(
            events[0].message.split(':').next().unwrap(),
            "background level (lamp brightness) drifting down at A01 (1 of 4 positions)"
        );
        let last = &events[3];
        assert!(
            last.message.starts_with(
                "background level (lamp brightness) drifting down at all 4 positions: A01, A02, B01, B02; newest, B02: 3250 against a baseline of 6500"
            ),
            "{}",
            last.message
        );
        assert_eq!(last.evidence.as_ref().unwrap().position, "B02");
        // The lamp is fixed for A01 only: no recovery while the others drift.
        events.clear();
        for _ in 0..20 {
            events.extend(time_point(&mut m, &|w| {
                if w == "A01" {
                    frame()
                } else {
                    dim()
                }
            }));
        }
        assert!(drift_events(&events).is_empty(), "{events:?}");
        // Then for all: one recovery, naming every position.
        for _ in 0..25 {
            events.extend(time_point(&mut m, &|_| frame()));
        }
        let recovered = drift_events(&events);
        assert_eq!(recovered, [(AlertState::Recovered, names(&WELLS))]);
        assert!(
            events[0].message.contains(
                "back in control at every position this alert named (A01, A02, B01, B02)"
            ),
            "{}",
            events[0].message
        );
        assert_eq!(events[0].opened_at_ms, opened_at);
    }

    /// Window 25 ms, a frame every 10 ms: A01 opens at 50 and A02 joins at
    /// 60 and B01 at 70 (20 ms after the opening); B02 drifts at 80, 30 ms
    /// after: a cause of its own, a second alert.
    #[test]
    fn a_drift_past_the_window_is_an_alert_of_its_own() {
        let mut m = grouping(25, None);
        let mut events = Vec::new();
        let mut at = 10;
        for t in 0..6 {
            for well in WELLS {
                let metrics = if t >= 4 { dim() } else { frame() };
                events.extend(m.observe(well, "f.tif", at, &metrics).events);
                at += 10;
            }
        }
        // Baseline frames 10..160; the lamp dims from 170 on.
        let opened: Vec<(AlertState, Vec<String>, i64)> = events
            .iter()
            .map(|e| (e.state, e.positions.clone(), e.opened_at_ms))
            .collect();
        assert_eq!(
            opened,
            [
                (AlertState::Opened, names(&["A01"]), 170),
                (AlertState::Updated, names(&["A01", "A02"]), 170),
                (AlertState::Updated, names(&["A01", "A02", "B01"]), 170),
                (AlertState::Opened, names(&["B02"]), 200),
            ]
        );
    }

    /// Thirteen expected frames: six time points at two wells (baseline 4,
    /// the lamp dim from the fifth), then a failed last frame completes the
    /// run still dim. The open alerts close with a final message (the drift's
    /// names where it still holds) before the notice.
    #[test]
    fn a_complete_run_closes_its_open_alerts_with_a_final_message() {
        let mut m = grouping(60_000, Some(13));
        let mut events = Vec::new();
        for i in 0..6 {
            for well in ["A01", "A02"] {
                let metrics = if i >= 4 { dim() } else { frame() };
                events.extend(m.observe(well, "f.tif", i, &metrics).events);
            }
        }
        // A stall opened before the end closes with the last frame.
        events.extend(m.check_stall(i64::MAX / 2));
        let states: Vec<(&str, AlertState)> = events
            .iter()
            .map(|e| (e.condition.as_str(), e.state))
            .collect();
        assert_eq!(
            states,
            [
                ("drift:background_level", AlertState::Opened),
                ("drift:background_level", AlertState::Updated),
                (STALLED, AlertState::Opened),
            ]
        );
        let end = m.observe_failure("last.tif", i64::MAX / 2 + 1);
        let states: Vec<(&str, AlertState)> = end
            .iter()
            .map(|e| (e.condition.as_str(), e.state))
            .collect();
        assert_eq!(
            states,
            [
                (STALLED, AlertState::Recovered),
                ("drift:background_level", AlertState::Closed),
                (RUN_COMPLETE, AlertState::Notice),
            ],
            "{end:#?}"
        );
        assert_eq!(
            end[1].message,
            "the run is complete with background level (lamp brightness) still drifting at all 2 positions: A01, A02; the alert closes with the run, not recovered"
        );
        assert_eq!(end[1].positions, names(&["A01", "A02"]));
        // Nothing is left open: no stall and no free-space alert from now on.
        assert_eq!(m.check_free_space("/data", 0, i64::MAX / 2 + 2), None);
    }

    /// After a restart the monitor replays the frames, forgets the replayed
    /// episodes and gets the stored ones back: a third well that drifts joins
    /// the stored alert (an update), not a new one.
    #[test]
    fn a_restored_alert_keeps_its_positions_and_grows() {
        let mut m = grouping(60_000, None);
        for i in 0..6 {
            for well in ["A01", "A02", "B01"] {
                let metrics = if i >= 4 && well != "B01" {
                    dim()
                } else {
                    frame()
                };
                m.observe(well, "f.tif", i, &metrics);
            }
        }
        m.forget_episodes();
        m.restore_open("drift:background_level", 4, &names(&["A01", "A02"]));
        // B01 has charted two frames: its EWMA limit has widened to 0.86, so
        // the second dim frame declares the drift.
        let grown: Vec<AlertEvent> = (7..9)
            .flat_map(|at| m.observe("B01", "b.tif", at, &dim()).events)
            .collect();
        assert_eq!(
            drift_events(&grown),
            [(AlertState::Updated, names(&["A01", "A02", "B01"]))]
        );
        assert_eq!(grown[0].opened_at_ms, 4);
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

    /// Failed writes open one episode, however many fail; the first write
    /// that succeeds closes it; the sentences name the database.
    #[test]
    fn failed_writes_for_lack_of_space_are_one_episode() {
        let mut m = RunMonitor::new(QualitySettings::default());
        assert_eq!(m.set_database_full("/d/fw.db", None, 0), None, "never full");
        let full = m
            .set_database_full("/d/fw.db", Some("database or disk is full"), 1)
            .unwrap();
        assert_eq!(
            (full.condition.as_str(), full.state),
            (DATABASE_FULL, AlertState::Opened)
        );
        assert!(full.message.contains("/d/fw.db (database or disk is full)"));
        assert_eq!(m.set_database_full("/d/fw.db", Some("again"), 2), None);
        let back = m.set_database_full("/d/fw.db", None, 3).unwrap();
        assert_eq!((back.state, back.opened_at_ms), (AlertState::Recovered, 1));
        assert_eq!(back.message, "the database /d/fw.db is written again");
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
