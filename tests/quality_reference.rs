//! Corrections and frame-quality measures against SciPy and numpy (see
//! tests/reference/make_quality_reference.py for each reference's definition):
//! Gaussian smoothing vs `scipy.ndimage.gaussian_filter`, focus vs
//! `scipy.ndimage.convolve` and `laplace` with numpy's variance, background level vs `numpy.median`, saturation vs
//! `numpy.mean`, the illumination surface vs `numpy.linalg.lstsq`, flat-field vs
//! the formula in float64, Sarle's bimodality coefficient vs `scipy.stats`, the
//! rolling-ball background vs SciPy's grey erosion and dilation by the
//! non-flat ball (exact up to radius 10, bounded beyond where we shrink).

mod common;

use std::path::Path;

use framewarden::analysis::correct::{gaussian, rolling_ball_background, FlatField};
use framewarden::analysis::quality::assess;
use framewarden::analysis::threshold::{bimodality, otsu, Histogram};
use framewarden::decode::{read_page, DecodeLimits};
use serde::Deserialize;

#[derive(Deserialize)]
struct FlatRef {
    flat: String,
    dark: String,
}

#[derive(Deserialize)]
struct Case {
    name: String,
    file: String,
    sigma: f64,
    ball_radius: f64,
    threshold: u16,
    focus: f64,
    background_level: f64,
    saturation_fraction: f64,
    illumination_change: f64,
    bimodality: f64,
    flat: Option<FlatRef>,
}

fn read_bin(path: &Path) -> Vec<u16> {
    std::fs::read(path)
        .unwrap()
        .chunks_exact(2)
        .map(|b| u16::from_le_bytes([b[0], b[1]]))
        .collect()
}

fn max_abs_diff(a: &[u16], b: &[u16]) -> u16 {
    a.iter()
        .zip(b)
        .map(|(&x, &y)| x.abs_diff(y))
        .max()
        .unwrap_or(0)
}

#[test]
fn corrections_and_quality_match_scipy_and_numpy() {
    let dir = tempfile::tempdir().unwrap();
    common::run_reference_script("make_quality_reference.py", dir.path());
    let text = std::fs::read_to_string(dir.path().join("quality_references.json")).unwrap();
    let cases: Vec<Case> = serde_json::from_str(&text).unwrap();
    assert_eq!(cases.len(), 4);
    let limits = DecodeLimits::default();
    let mut failures = Vec::new();
    let rel = |a: f64, b: f64| (a - b).abs() / b.abs().max(1e-300);
    for c in &cases {
        let frame = read_page(&dir.path().join(&c.file), 0, &limits).unwrap();
        let hist = Histogram::of(&frame);
        // The same threshold as skimage.filters.threshold_otsu (checked in tests/reference.rs).
        if otsu(&hist) != c.threshold {
            failures.push(format!(
                "{}: Otsu {} vs {}",
                c.name,
                otsu(&hist),
                c.threshold
            ));
        }
        // f32 arithmetic here vs float64 in SciPy: rounding may differ by one level.
        let smoothed = gaussian(&frame, c.sigma);
        let want = read_bin(&dir.path().join(format!("q_{}.gauss.bin", c.name)));
        let d = max_abs_diff(&smoothed.pixels, &want);
        if d > 1 {
            failures.push(format!("{}: gaussian differs by up to {d} levels", c.name));
        }
        let background = rolling_ball_background(&frame, c.ball_radius);
        let want = read_bin(&dir.path().join(format!("q_{}.rball.bin", c.name)));
        let worst = max_abs_diff(&background, &want);
        if c.ball_radius <= 10.0 {
            // The exact opening (no shrinking up to radius 10): f32 here,
            // float64 in SciPy, so rounding may differ by one level.
            if worst > 1 {
                failures.push(format!(
                    "{}: rolling-ball background (radius {}) differs by up to {worst} levels",
                    c.name, c.ball_radius
                ));
            }
        } else {
            // Shrunk by block minima and interpolated back (documented in
            // correct.rs): an approximation of the exact opening. Bounds set
            // from the measured 0.5% (mean) and 7.7% (worst pixel) of the
            // background's range on plate16, radius 30.
            let mean = background
                .iter()
                .zip(&want)
                .map(|(&a, &b)| f64::from(a.abs_diff(b)))
                .sum::<f64>()
                / want.len() as f64;
            let range = f64::from(want.iter().max().unwrap() - want.iter().min().unwrap());
            if mean > 0.01 * range || f64::from(worst) > 0.10 * range {
                failures.push(format!(
                    "{}: shrunk rolling-ball background (radius {}) off by {mean:.1} levels on average, {worst} at worst, range {range}",
                    c.name, c.ball_radius
                ));
            }
        }
        // Sarle's coefficient from scipy.stats' bias-corrected skewness and kurtosis.
        let bc = bimodality(&hist);
        if rel(bc, c.bimodality) > 1e-9 {
            failures.push(format!("{}: bimodality {bc} vs {}", c.name, c.bimodality));
        }
        let q = assess(&frame, &hist, None, c.threshold);
        // Integer kernels and f64 sums here, float64 convolutions in numpy:
        // agreement to 1e-9 relative.
        if rel(q.focus, c.focus) > 1e-9 {
            failures.push(format!("{}: focus {} vs {}", c.name, q.focus, c.focus));
        }
        if q.background_level != c.background_level {
            failures.push(format!(
                "{}: background {} vs {}",
                c.name, q.background_level, c.background_level
            ));
        }
        if rel(q.saturation_fraction, c.saturation_fraction) > 1e-12 && c.saturation_fraction > 0.0
        {
            failures.push(format!(
                "{}: saturation {} vs {}",
                c.name, q.saturation_fraction, c.saturation_fraction
            ));
        }
        // Normal equations here, an orthogonal solver in numpy: 1e-6 relative.
        if (q.illumination_change - c.illumination_change).abs()
            > 1e-6 * c.illumination_change.max(1e-3)
        {
            failures.push(format!(
                "{}: illumination {} vs {}",
                c.name, q.illumination_change, c.illumination_change
            ));
        }
        if let Some(f) = &c.flat {
            let flat = read_page(&dir.path().join(&f.flat), 0, &limits).unwrap();
            let dark = read_page(&dir.path().join(&f.dark), 0, &limits).unwrap();
            let corrected = FlatField::new(&flat, Some(&dark))
                .unwrap()
                .apply(&frame)
                .unwrap();
            let want = read_bin(&dir.path().join(format!("q_{}.flat.bin", c.name)));
            let d = max_abs_diff(&corrected.pixels, &want);
            if d > 1 {
                failures.push(format!(
                    "{}: flat-field differs by up to {d} levels",
                    c.name
                ));
            }
        }
    }
    common::check(failures, "corrections and quality against SciPy and numpy");
}
