//! Drift charts: a baseline from the first frames of a position, then an EWMA
//! chart (Roberts 1959) and a two-sided tabular CUSUM (Page 1954) on each charted
//! metric, standardised against that baseline.
//!
//! Pure and clock-free: one value in, one chart step out. Which positions exist,
//! and turning declared drifts into alerts, is [`crate::qc::monitor`]'s job.

use crate::qc::metrics::{Direction, Metric};
use crate::qc::params::ChartParams;

/// What one frame did to a chart.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Signal {
    /// Nothing changed.
    Quiet,
    /// The chart left control: a drift is declared.
    Declared(Direction),
    /// A declared drift is over: `recover_frames` frames in a row were in control.
    Recovered,
}

/// One step of a chart, with its statistics (for messages and tests).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Step {
    /// Standardised, clipped value: (x − μ₀) / σ₀.
    pub z: f64,
    /// The EWMA statistic after this value, in σ₀ units.
    pub ewma: f64,
    /// Current EWMA control limit (in σ₀ units).
    pub ewma_limit: f64,
    /// Upper CUSUM sum C⁺ after this value, in σ₀ units (capped at 2h).
    pub cusum_up: f64,
    /// Lower CUSUM sum C⁻ after this value, in σ₀ units (capped at 2h).
    pub cusum_down: f64,
    /// What this value did to the chart.
    pub signal: Signal,
}

/// EWMA and CUSUM charts of one metric at one position, against a fixed baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct Chart {
    params: ChartParams,
    /// Baseline mean μ₀, in the metric's own unit.
    pub mean: f64,
    /// Baseline sigma after the floor.
    pub sigma: f64,
    ewma: f64,
    /// Frames charted so far (the EWMA limit widens towards its asymptote).
    frames: u32,
    cusum_up: f64,
    cusum_down: f64,
    drift: Option<Direction>,
    calm_frames: usize,
}

impl Chart {
    /// A chart centred on `mean` with standard deviation `sigma` (floor applied by the caller).
    pub fn new(params: &ChartParams, mean: f64, sigma: f64) -> Chart {
        Chart {
            params: params.clone(),
            mean,
            sigma,
            ewma: 0.0,
            frames: 0,
            cusum_up: 0.0,
            cusum_down: 0.0,
            drift: None,
            calm_frames: 0,
        }
    }

    /// A chart for `metric` from its baseline values (mean and sample standard
    /// deviation, floored by [`Metric::sigma_floor`]).
    pub fn from_baseline(params: &ChartParams, metric: Metric, values: &[f64]) -> Chart {
        let (mean, sd) = mean_sd(values);
        Chart::new(params, mean, sd.max(metric.sigma_floor(mean)))
    }

    /// The drift declared and not yet recovered; `None` while in control.
    pub fn drift(&self) -> Option<Direction> {
        self.drift
    }

    /// The CUSUM decision interval h, in σ₀ units.
    pub fn decision_interval(&self) -> f64 {
        self.params.cusum_h
    }

    /// Charts one value.
    ///
    /// EWMA (Roberts 1959): zₜ = λ·xₜ + (1 − λ)·zₜ₋₁, z₀ = 0 on standardised
    /// values, out of control when |zₜ| > L·√(λ/(2−λ)·(1 − (1−λ)^{2t})), the
    /// exact variance for a start at the target (Lucas & Saccucci 1990, eq. 2).
    /// CUSUM (Page 1954, tabular form): C⁺ₜ = max(0, C⁺ₜ₋₁ + xₜ − k),
    /// C⁻ₜ = max(0, C⁻ₜ₋₁ − xₜ − k), out of control when either exceeds h.
    /// Both sums are capped at 2h so a long drift leaves a bounded memory and its
    /// end shows within about h/k frames.
    pub fn update(&mut self, x: f64) -> Step {
        let p = &self.params;
        let clip = p.outlier_clip;
        let z = ((x - self.mean) / self.sigma).clamp(-clip, clip);
        let z = if z.is_nan() { 0.0 } else { z };
        self.frames = self.frames.saturating_add(1);
        let lambda = p.ewma_lambda;
        self.ewma = lambda * z + (1.0 - lambda) * self.ewma;
        let decay = (1.0 - lambda).powi(2 * self.frames.min(10_000) as i32);
        let ewma_limit = p.ewma_width * (lambda / (2.0 - lambda) * (1.0 - decay)).sqrt();
        let cap = 2.0 * p.cusum_h;
        self.cusum_up = (self.cusum_up + z - p.cusum_k).clamp(0.0, cap);
        self.cusum_down = (self.cusum_down - z - p.cusum_k).clamp(0.0, cap);
        let ewma_out = self.ewma.abs() > ewma_limit;
        let cusum_out = self.cusum_up > p.cusum_h || self.cusum_down > p.cusum_h;
        let signal = match self.drift {
            None if ewma_out || cusum_out => {
                let up = if ewma_out {
                    self.ewma > 0.0
                } else {
                    self.cusum_up > p.cusum_h
                };
                let dir = if up { Direction::Up } else { Direction::Down };
                self.drift = Some(dir);
                self.calm_frames = 0;
                Signal::Declared(dir)
            }
            None => Signal::Quiet,
            Some(_) if ewma_out || cusum_out => {
                self.calm_frames = 0;
                Signal::Quiet
            }
            Some(_) => {
                self.calm_frames += 1;
                if self.calm_frames >= p.recover_frames {
                    self.drift = None;
                    self.cusum_up = 0.0;
                    self.cusum_down = 0.0;
                    Signal::Recovered
                } else {
                    Signal::Quiet
                }
            }
        };
        Step {
            z,
            ewma: self.ewma,
            ewma_limit,
            cusum_up: self.cusum_up,
            cusum_down: self.cusum_down,
            signal,
        }
    }
}

/// Mean and sample standard deviation (n − 1), by Welford's update (Welford 1962).
pub fn mean_sd(values: &[f64]) -> (f64, f64) {
    let (mut n, mut mean, mut m2) = (0.0, 0.0, 0.0);
    for &x in values {
        n += 1.0;
        let d = x - mean;
        mean += d / n;
        m2 += d * (x - mean);
    }
    let sd = if n > 1.0 {
        (m2 / (n - 1.0)).sqrt()
    } else {
        0.0
    };
    (mean, sd)
}

/// Median of a slice (mean of the middle two for an even count); `None` when empty.
pub fn median(values: &[f64]) -> Option<f64> {
    let mut v: Vec<f64> = values.iter().copied().filter(|x| !x.is_nan()).collect();
    if v.is_empty() {
        return None;
    }
    v.sort_by(f64::total_cmp);
    let n = v.len();
    Some(if n % 2 == 1 {
        v[n / 2]
    } else {
        (v[n / 2 - 1] + v[n / 2]) / 2.0
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::qc::params::QualitySettings;

    fn params() -> ChartParams {
        QualitySettings::default().charts
    }

    #[test]
    fn ewma_recursion_and_limit_match_roberts_by_hand() {
        // Roberts (1959): z1 = λ x1 with z0 = 0; λ = 0.2, x = 1 -> 0.2; x = 2 -> 0.2·2 + 0.8·0.2 = 0.56.
        // Limit at t = 1: 3·√(0.2/1.8·(1 − 0.8²)) = 3·√(0.04) = 0.6 (Lucas & Saccucci 1990).
        let mut c = Chart::new(&params(), 10.0, 2.0);
        let s1 = c.update(12.0); // z = 1
        assert!((s1.ewma - 0.2).abs() < 1e-12);
        assert!((s1.ewma_limit - 0.6).abs() < 1e-12);
        let s2 = c.update(14.0); // z = 2
        assert!((s2.ewma - 0.56).abs() < 1e-12);
        // Asymptotic limit 3·√(λ/(2−λ)) = 3·√(1/9) = 1.
        for _ in 0..200 {
            c.update(10.0);
        }
        assert!((c.update(10.0).ewma_limit - 1.0).abs() < 1e-9);
    }

    #[test]
    fn cusum_matches_page_tabular_form_by_hand() {
        // Page (1954), tabular CUSUM with k = 0.5: z = 1.5, 1.5, -3 ->
        // C+ = 1.0, 2.0, 0.0 (max(0, 2 - 3 - 0.5)); C- = 0, 0, 2.5.
        let mut c = Chart::new(&params(), 0.0, 1.0);
        let a = c.update(1.5);
        let b = c.update(1.5);
        let d = c.update(-3.0);
        assert_eq!((a.cusum_up, b.cusum_up, d.cusum_up), (1.0, 2.0, 0.0));
        assert_eq!((a.cusum_down, b.cusum_down, d.cusum_down), (0.0, 0.0, 2.5));
    }

    #[test]
    fn one_wild_frame_declares_nothing_two_do() {
        let mut c = Chart::new(&params(), 100.0, 1.0);
        for _ in 0..30 {
            assert_eq!(c.update(100.0).signal, Signal::Quiet);
        }
        // Clipped to 4σ: EWMA 0.8 < 1, CUSUM 3.5 < 5.
        assert_eq!(c.update(1.0e6).signal, Signal::Quiet);
        for _ in 0..10 {
            assert_eq!(c.update(100.0).signal, Signal::Quiet);
        }
        c.update(1.0e6);
        assert_eq!(c.update(1.0e6).signal, Signal::Declared(Direction::Up));
    }

    #[test]
    fn a_small_persistent_shift_is_caught_by_cusum_and_recovers_once() {
        // 0.8σ: the EWMA settles at 0.8 inside its limit of 1; the CUSUM gains
        // 0.3 per frame and crosses h = 5 on the 17th frame.
        let mut c = Chart::new(&params(), 0.0, 1.0);
        let mut declared_at = None;
        for i in 1..=40 {
            if let Signal::Declared(d) = c.update(0.8).signal {
                assert_eq!(d, Direction::Up);
                assert!(declared_at.is_none(), "declared twice");
                declared_at = Some(i);
            }
        }
        assert_eq!(declared_at, Some(17));
        let signals: Vec<Signal> = (0..40).map(|_| c.update(0.0).signal).collect();
        let recovered = signals.iter().filter(|s| **s == Signal::Recovered).count();
        assert_eq!(recovered, 1);
        assert!(signals.iter().all(|s| !matches!(s, Signal::Declared(_))));
    }

    #[test]
    fn welford_and_median_by_hand() {
        let (m, sd) = mean_sd(&[2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0]);
        // Mean 5, sum of squares 32, sample variance 32/7.
        assert!((m - 5.0).abs() < 1e-12 && (sd - (32.0f64 / 7.0).sqrt()).abs() < 1e-12);
        assert_eq!(median(&[3.0, 1.0, 2.0]), Some(2.0));
        assert_eq!(median(&[4.0, 1.0, 2.0, 3.0]), Some(2.5));
        assert_eq!(median(&[]), None);
    }

    #[test]
    fn sigma_floors_keep_flat_baselines_sane() {
        let c = Chart::from_baseline(&params(), Metric::BackgroundLevel, &[1000.0; 20]);
        assert_eq!((c.mean, c.sigma), (1000.0, 20.0));
        let n = Chart::from_baseline(&params(), Metric::ObjectCount, &[36.0; 20]);
        assert_eq!(n.sigma, 6.0);
    }
}
