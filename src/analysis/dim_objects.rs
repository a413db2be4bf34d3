//! Objects the threshold leaves out: a second population of objects in the
//! pixels a global threshold calls background.
//!
//! A two-class threshold such as Otsu's assumes one object population. When a
//! frame holds objects of two distinct brightnesses (dim and bright nuclei,
//! cells in different phases, a dim stain beside a bright one), Otsu's level
//! can fall between the dim and the bright objects, and the dim ones are
//! counted as background. This file looks for them:
//!
//! 1. The background class (levels `0..=t`) is split again at its own Otsu
//!    level `t₂`. Its two parts must be far apart for a distinct population to
//!    hide there: the upper part's mean must lie at least [`MIN_CONTRAST`]
//!    standard deviations of the lower part above the lower part's mean. One
//!    normal population split at its Otsu level gives 2.65 of them, a uniform
//!    one (a smooth gradient) √12 ≈ 3.46 (derived in the tests).
//! 2. The pixels `> t₂` are labelled (no hole filling). A component that holds
//!    no pixel above `t` and that the object filter would keep is a dim object.
//!    Components that reach above `t` are the counted objects with their
//!    blurred rims, which is why step 1 alone does not decide.
//!
//! The cost is one histogram pass over `0..=t` on every frame, and one more
//! labelling of the frame only when step 1 finds a distinct second population.

use crate::analysis::label::{self, Components};
use crate::analysis::params::{Connectivity, ObjectFilter};
use crate::analysis::threshold::{self, Histogram};

/// The smallest separation, in standard deviations of the darker part, between
/// the two parts of the background class for them to count as two populations:
/// above what one population of a common shape gives when split (normal 2.65,
/// uniform 3.46).
pub const MIN_CONTRAST: f64 = 4.0;

/// Dim objects found below a frame's threshold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DimObjects {
    /// The level that separates them from the background (foreground of this
    /// second look is `pixel > level`).
    pub level: u16,
    /// How many components above `level` hold no pixel above the frame's
    /// threshold and pass the object filter.
    pub count: usize,
}

/// Looks for dim objects below threshold `t` in `pixels` (`width × height`,
/// the segmented image whose histogram is `hist`). `None` when the background
/// class holds no distinct second population.
///
/// ```
/// use framewarden::analysis::{dim_objects::dim_objects, threshold::Histogram, Connectivity, ObjectFilter};
/// // Background 10, a dim object (3 px at 60) and a bright one (2 px at 200);
/// // the threshold 60 leaves the dim one out.
/// let px: Vec<u16> = vec![
///     10, 60, 60, 10, 10, 10,
///     10, 60, 10, 10, 200, 10,
///     10, 10, 10, 10, 200, 10,
/// ];
/// let hist = Histogram::from_samples(256, &px);
/// let found = dim_objects(&px, 6, 3, &hist, 60, Connectivity::Eight, &ObjectFilter::KEEP_ALL, None);
/// let found = found.unwrap();
/// assert_eq!((found.level, found.count), (10, 1));
/// ```
#[allow(clippy::too_many_arguments)]
pub fn dim_objects(
    pixels: &[u16],
    width: usize,
    height: usize,
    hist: &Histogram,
    t: u16,
    connectivity: Connectivity,
    filter: &ObjectFilter,
    pixel_size_um: Option<f64>,
) -> Option<DimObjects> {
    let level = second_population(hist, t)?;
    let comps = label::label(pixels, width, height, level, connectivity, false);
    let count = count_dim(pixels, width, height, &comps, t, filter, pixel_size_um);
    Some(DimObjects { level, count })
}

/// The Otsu level of the background class `0..=t` when its two parts are at
/// least [`MIN_CONTRAST`] apart, else `None`.
pub fn second_population(hist: &Histogram, t: u16) -> Option<u16> {
    let top = usize::from(t).min(hist.counts.len().saturating_sub(1));
    let counts = hist.counts.get(..=top)?.to_vec();
    let below = Histogram {
        total: counts.iter().sum(),
        counts,
    };
    let (lo, hi) = below.range()?;
    if lo == hi {
        return None;
    }
    let level = threshold::otsu(&below);
    // Mean and variance of one part.
    let moments = |range: std::ops::RangeInclusive<usize>| {
        let (mut n, mut s, mut s2) = (0.0f64, 0.0f64, 0.0f64);
        for v in range {
            let (x, c) = (v as f64, below.counts[v] as f64);
            n += c;
            s += x * c;
            s2 += x * x * c;
        }
        let mean = s / n;
        (mean, (s2 / n - mean * mean).max(0.0))
    };
    let (dark_mean, dark_var) = moments(lo..=usize::from(level));
    let (light_mean, _) = moments(usize::from(level) + 1..=hi);
    // Sheppard's correction adds back the 1/12 level² that rounding to whole
    // levels hides, so a background a level or two wide is not a spike.
    let apart = light_mean - dark_mean >= MIN_CONTRAST * (dark_var + 1.0 / 12.0).sqrt();
    apart.then_some(level)
}

/// Components of `comps` with no pixel above `t` that `filter` keeps.
fn count_dim(
    pixels: &[u16],
    width: usize,
    height: usize,
    comps: &Components,
    t: u16,
    filter: &ObjectFilter,
    pixel_size_um: Option<f64>,
) -> usize {
    #[derive(Clone, Copy)]
    struct Seen {
        area: u64,
        bright: bool,
        touches: bool,
    }
    let mut seen = vec![
        Seen {
            area: 0,
            bright: false,
            touches: false,
        };
        comps.count
    ];
    for (run, &k) in comps.runs.iter().zip(&comps.component) {
        let s = &mut seen[k as usize];
        let (y, x0, x1) = (run.y as usize, run.x0 as usize, run.x1 as usize);
        s.area += (x1 - x0) as u64;
        s.bright = s.bright
            || pixels[y * width + x0..y * width + x1]
                .iter()
                .any(|&v| v > t);
        s.touches = s.touches || y == 0 || y + 1 == height || x0 == 0 || x1 == width;
    }
    seen.iter()
        .filter(|s| !s.bright && filter.keeps(s.area, s.touches, pixel_size_um))
        .count()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn hist(levels: &[(u16, u64)]) -> Histogram {
        let mut counts = vec![0u64; 256];
        for &(v, c) in levels {
            counts[usize::from(v)] += c;
        }
        Histogram {
            total: counts.iter().sum(),
            counts,
        }
    }

    /// The two reference separations in the module's doc, derived: a normal
    /// population split at its mean (its Otsu level, by symmetry) has half
    /// means ±σ√(2/π) and half standard deviation σ√(1 − 2/π), so the upper
    /// half lies 2√(2/π)/√(1 − 2/π) = 2.65 lower-half deviations above the
    /// lower; a uniform one on [0, w] split at w/2 has half means w/4 apart…
    /// 3w/4 − w/4 = w/2 over the half's deviation (w/2)/√12: √12 = 3.46.
    #[test]
    fn one_population_of_a_common_shape_is_not_two() {
        let normal =
            2.0 * (2.0 / std::f64::consts::PI).sqrt() / (1.0 - 2.0 / std::f64::consts::PI).sqrt();
        assert!((normal - 2.65).abs() < 0.01);
        assert!(12f64.sqrt() < MIN_CONTRAST && normal < MIN_CONTRAST);
        // A uniform background over 20..=120 under a threshold of 200.
        let flat: Vec<(u16, u64)> = (20..=120).map(|v| (v, 50)).collect();
        assert_eq!(second_population(&hist(&flat), 200), None);
        // A normal background, mean 60 and σ 8 levels, as a histogram.
        let normal: Vec<(u16, u64)> = (20..=100u16)
            .map(|v| {
                let z = (f64::from(v) - 60.0) / 8.0;
                (v, (1e6 * (-z * z / 2.0).exp()).round() as u64)
            })
            .collect();
        assert_eq!(second_population(&hist(&normal), 200), None);
    }

    #[test]
    fn two_separate_levels_under_the_threshold_are_two_populations() {
        // Background 10 ± 2, dim objects at 50 ± 1, bright ones at 200.
        let background = [(8, 50), (9, 100), (10, 200), (11, 100), (12, 50)];
        let h = hist(&[&background[..], &[(49, 10), (50, 30), (51, 10), (200, 20)]].concat());
        let level = second_population(&h, 100).unwrap();
        assert!((11..49).contains(&level), "level {level}");
        // The dim objects above the threshold are not looked at, and the
        // background alone is one population (split at 9 or 10 by symmetry,
        // its parts lie 3.45 or 2.43 deviations apart).
        assert_eq!(second_population(&h, 30), None);
    }

    #[test]
    fn rims_of_counted_objects_are_not_dim_objects() {
        // A bright object (200) with a rim at 60, and a separate dim one at 60.
        let px: Vec<u16> = vec![
            10, 10, 10, 10, 10, 10, 10, 10, //
            10, 60, 60, 60, 10, 10, 10, 10, //
            10, 60, 200, 60, 10, 60, 60, 10, //
            10, 60, 60, 60, 10, 60, 60, 10, //
            10, 10, 10, 10, 10, 10, 10, 10, //
        ];
        let h = Histogram::from_samples(256, &px);
        let keep_all = ObjectFilter::KEEP_ALL;
        let found = dim_objects(&px, 8, 5, &h, 60, Connectivity::Eight, &keep_all, None).unwrap();
        assert_eq!((found.level, found.count), (10, 1));
        // The filter applies as to counted objects: the dim one has 4 px.
        let five = ObjectFilter {
            min_area_px: 5,
            ..ObjectFilter::KEEP_ALL
        };
        let found = dim_objects(&px, 8, 5, &h, 60, Connectivity::Eight, &five, None).unwrap();
        assert_eq!(found.count, 0);
    }
}
