//! Global thresholds computed from the full integer histogram.
//!
//! Convention: a threshold `t` is an integer level and foreground is
//! `pixel > t`. 16-bit data keeps all 65,536 levels; nothing is re-binned,
//! except multi-level Otsu over very wide ranges (see [`multi_otsu`]).

use crate::frame::Frame;

/// Pixel counts per integer level.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Histogram {
    /// `counts[v]` = number of pixels with value `v`; length 256 or 65,536.
    pub counts: Vec<u64>,
    /// Number of pixels counted (the sum of `counts`).
    pub total: u64,
}

impl Histogram {
    /// Histogram of a whole frame (one pass).
    pub fn of(frame: &Frame) -> Self {
        Self::from_samples(frame.levels(), &frame.pixels)
    }

    /// Histogram of samples known to be below `levels`.
    ///
    /// # Panics
    /// Panics when a sample is `>= levels`; frames guarantee this by construction.
    pub fn from_samples(levels: usize, samples: &[u16]) -> Self {
        // Four interleaved tables keep consecutive equal samples from
        // serialising on one counter (common practice for fast histograms).
        let mut tables = vec![0u32; levels * 4];
        let mut counts = vec![0u64; levels];
        for block in samples.chunks(1 << 30) {
            let mut quads = block.chunks_exact(4);
            for q in &mut quads {
                tables[usize::from(q[0])] += 1;
                tables[levels + usize::from(q[1])] += 1;
                tables[2 * levels + usize::from(q[2])] += 1;
                tables[3 * levels + usize::from(q[3])] += 1;
            }
            for &s in quads.remainder() {
                tables[usize::from(s)] += 1;
            }
            for (v, c) in counts.iter_mut().enumerate() {
                *c += u64::from(tables[v])
                    + u64::from(tables[levels + v])
                    + u64::from(tables[2 * levels + v])
                    + u64::from(tables[3 * levels + v]);
            }
            tables.iter_mut().for_each(|t| *t = 0);
        }
        Self {
            total: samples.len() as u64,
            counts,
        }
    }

    /// Lowest and highest occupied levels, `None` for an empty histogram.
    pub fn range(&self) -> Option<(usize, usize)> {
        let lo = self.counts.iter().position(|&c| c > 0)?;
        let hi = self.counts.iter().rposition(|&c| c > 0)?;
        Some((lo, hi))
    }

    /// Median level of the pixels with value `<= upto` (numpy convention: mean
    /// of the two middle values for an even count). `None` when there are none.
    pub fn median_upto(&self, upto: usize) -> Option<f64> {
        let counts = &self.counts[..=upto.min(self.counts.len() - 1)];
        let n: u64 = counts.iter().sum();
        if n == 0 {
            return None;
        }
        // 0-based ranks of the two middle elements.
        let (r1, r2) = ((n - 1) / 2, n / 2);
        let (mut v1, mut seen) = (None, 0u64);
        for (v, &c) in counts.iter().enumerate() {
            seen += c;
            if v1.is_none() && seen > r1 {
                v1 = Some(v);
            }
            if seen > r2 {
                return Some((v1.unwrap_or(v) + v) as f64 / 2.0);
            }
        }
        None
    }
}

/// Otsu's threshold (Otsu 1979, "A threshold selection method from gray-level
/// histograms", IEEE Trans. SMC 9(1)): the level `t` maximising the
/// between-class variance of {v <= t} and {v > t}. Ties go to the lowest level.
/// A histogram with a single occupied level returns that level.
///
/// ```
/// use framewarden::{frame::Frame, analysis::threshold::{Histogram, otsu}};
/// // Two populations, 10 and 200: any t in 10..200 separates them; the first
/// // maximum is t = 10, and foreground is `pixel > 10`.
/// let f = Frame::from_rows_u8(&[&[10, 10, 200], &[10, 200, 200]]);
/// assert_eq!(otsu(&Histogram::of(&f)), 10);
/// ```
pub fn otsu(hist: &Histogram) -> u16 {
    otsu_with_variance(hist).0
}

/// Otsu's level and the between-class variance there (as a fraction of N²).
fn otsu_with_variance(hist: &Histogram) -> (u16, f64) {
    let Some((lo, hi)) = hist.range() else {
        return (0, 0.0);
    };
    if lo == hi {
        return (lo as u16, 0.0);
    }
    let n = hist.total as f64;
    let total_sum: f64 = hist.counts[lo..=hi]
        .iter()
        .enumerate()
        .map(|(i, &c)| (lo + i) as f64 * c as f64)
        .sum();
    let (mut w0, mut s0) = (0u64, 0.0f64);
    let (mut best_t, mut best) = (lo, -1.0f64);
    for t in lo..hi {
        let c = hist.counts[t];
        w0 += c;
        s0 += t as f64 * c as f64;
        if c == 0 {
            continue; // same split as the last occupied level: never a new maximum
        }
        let w1 = hist.total - w0;
        let (m0, m1) = (s0 / w0 as f64, (total_sum - s0) / w1 as f64);
        let between = (w0 as f64) * (w1 as f64) * (m0 - m1) * (m0 - m1);
        if between > best {
            best = between;
            best_t = t;
        }
    }
    (best_t as u16, best / (n * n))
}

/// Otsu's separability η = σ_B² / σ_T² at Otsu's threshold (Otsu 1979, eq. 12):
/// 1 for two pure levels, near 0 for a unimodal histogram; 0 for a constant frame.
pub fn separability(hist: &Histogram) -> f64 {
    otsu_split(hist).1
}

/// Otsu's level and its separability η from one pass over the histogram.
pub fn otsu_split(hist: &Histogram) -> (u16, f64) {
    let (level, between) = otsu_with_variance(hist);
    let Some((lo, hi)) = hist.range() else {
        return (level, 0.0);
    };
    let n = hist.total as f64;
    let (mut s, mut s2) = (0.0f64, 0.0f64);
    for (v, &c) in hist.counts.iter().enumerate().take(hi + 1).skip(lo) {
        let (v, c) = (v as f64, c as f64);
        s += v * c;
        s2 += v * v * c;
    }
    let mean = s / n;
    let total_var = s2 / n - mean * mean;
    let eta = if lo < hi && total_var > 0.0 {
        (between / total_var).clamp(0.0, 1.0)
    } else {
        0.0
    };
    (level, eta)
}

/// Sarle's bimodality coefficient of the histogram, as defined (with its
/// finite-sample correction and the 5/9 benchmark) by Pfister, Schwarz,
/// Janczyk, Dale & Freeman 2013, "Good things peak in pairs: a note on the
/// bimodality coefficient", Frontiers in Psychology 4:700:
/// `BC = (G1² + 1) / (G2 + 3 (n−1)² / ((n−2)(n−3)))` with the sample skewness
/// `G1` and sample excess kurtosis `G2` (bias-corrected). A uniform histogram
/// gives 5/9 ≈ 0.555; values above suggest two modes (or a strong skew), a
/// normal histogram gives 1/3. 0 when undefined (fewer than 4 pixels, or a
/// constant frame).
pub fn bimodality(hist: &Histogram) -> f64 {
    let Some((lo, hi)) = hist.range() else {
        return 0.0;
    };
    let n = hist.total as f64;
    if lo == hi || hist.total < 4 {
        return 0.0;
    }
    let levels = || hist.counts.iter().enumerate().take(hi + 1).skip(lo);
    let mean = levels().map(|(v, &c)| v as f64 * c as f64).sum::<f64>() / n;
    let (mut m2, mut m3, mut m4) = (0.0f64, 0.0f64, 0.0f64);
    for (v, &c) in levels() {
        let d = v as f64 - mean;
        let (d2, c) = (d * d, c as f64);
        m2 += c * d2;
        m3 += c * d2 * d;
        m4 += c * d2 * d2;
    }
    let (m2, m3, m4) = (m2 / n, m3 / n, m4 / n);
    // Population skewness and excess kurtosis, then the usual small-sample
    // corrections (the estimators of scipy.stats.skew/kurtosis with bias=False).
    let g1 = m3 / m2.powf(1.5);
    let g2 = m4 / (m2 * m2) - 3.0;
    let skew = g1 * (n * (n - 1.0)).sqrt() / (n - 2.0);
    let kurt = ((n + 1.0) * g2 + 6.0) * (n - 1.0) / ((n - 2.0) * (n - 3.0));
    let bc = (skew * skew + 1.0) / (kurt + 3.0 * (n - 1.0).powi(2) / ((n - 2.0) * (n - 3.0)));
    if bc.is_finite() {
        bc
    } else {
        0.0
    }
}

/// Triangle method (Zack, Rogers & Latt 1977, "Automatic measurement of sister
/// chromatid exchange frequency", J. Histochem. Cytochem. 25(7)): the level of
/// greatest distance from the line joining the histogram peak to the far end of
/// the longer tail. Computed over the occupied range as in common practice.
pub fn triangle(hist: &Histogram) -> u16 {
    let Some((lo, hi)) = hist.range() else {
        return 0;
    };
    if lo == hi {
        return lo as u16;
    }
    let h = &hist.counts[lo..=hi];
    let nbins = h.len();
    // First maximum, as numpy's argmax.
    let mut peak = 0;
    for (i, &c) in h.iter().enumerate() {
        if c > h[peak] {
            peak = i;
        }
    }
    let (low, high) = (0usize, nbins - 1);
    // Walk along the longer side; mirror the histogram when that is the right side.
    let flip = peak - low < high - peak;
    let at = |i: usize| if flip { h[nbins - 1 - i] } else { h[i] };
    let (low, peak_i) = if flip {
        (nbins - 1 - high, nbins - 1 - peak)
    } else {
        (low, peak)
    };
    let width = (peak_i - low) as f64;
    let peak_height = h[peak] as f64;
    let norm = (peak_height * peak_height + width * width).sqrt();
    let (ph, wd) = (peak_height / norm, width / norm);
    let mut best_i = 0usize;
    let mut best = f64::NEG_INFINITY;
    for x in 0..(peak_i - low) {
        let length = ph * x as f64 - wd * at(x + low) as f64;
        if length > best {
            best = length;
            best_i = x;
        }
    }
    let mut level = best_i + low;
    if flip {
        level = nbins - 1 - level;
    }
    (lo + level) as u16
}

/// Li's minimum cross-entropy threshold (Li & Lee 1993, "Minimum cross entropy
/// thresholding", Pattern Recognition 26(4)), by the iteration of Li & Tam 1998
/// ("An iterative algorithm for minimum cross entropy thresholding", Pattern
/// Recognition Letters 18(8)), started at the mean and stopped when a step is
/// below half a grey level. The real-valued optimum `t*` is returned as the
/// integer level `floor(t*)`, which gives the same mask (`pixel > t*`).
pub fn li(hist: &Histogram) -> u16 {
    let Some((lo, hi)) = hist.range() else {
        return 0;
    };
    if lo == hi {
        return lo as u16;
    }
    // Work on values shifted by the minimum, as the iteration's logarithms need
    // positive means (common practice, and what keeps it well defined at 0).
    let levels = hi - lo + 1;
    let mut cum_n = vec![0u64; levels + 1];
    let mut cum_s = vec![0f64; levels + 1];
    for i in 0..levels {
        let c = hist.counts[lo + i];
        cum_n[i + 1] = cum_n[i] + c;
        cum_s[i + 1] = cum_s[i] + i as f64 * c as f64;
    }
    let (n, s) = (cum_n[levels], cum_s[levels]);
    let tolerance = 0.5;
    let mut t_next = s / n as f64;
    let mut t_curr = -2.0 * tolerance;
    while (t_next - t_curr).abs() > tolerance {
        t_curr = t_next;
        // Background = shifted values <= t_curr: indices 0..=floor(t_curr).
        let k = (t_curr.floor() as usize + 1).min(levels);
        let (nb, sb) = (cum_n[k], cum_s[k]);
        let (nf, sf) = (n - nb, s - sb);
        if nb == 0 || nf == 0 {
            break;
        }
        let mean_back = sb / nb as f64;
        let mean_fore = sf / nf as f64;
        if mean_back == 0.0 {
            break;
        }
        t_next = (mean_back - mean_fore) / (mean_back.ln() - mean_fore.ln());
    }
    (lo as f64 + t_next).floor().clamp(0.0, 65535.0) as u16
}

/// Multi-level Otsu (Liao, Chen & Chung 2001, "A fast algorithm for multilevel
/// thresholding", J. Inf. Sci. Eng. 17): the `classes - 1` levels that maximise
/// the between-class variance, found exactly by dynamic programming over the
/// occupied range when it spans at most 4,096 levels. Wider 16-bit ranges are
/// searched on bins of several levels first and each threshold then refined at
/// full resolution within one bin either side.
pub fn multi_otsu(hist: &Histogram, classes: usize) -> Vec<u16> {
    let k = classes.saturating_sub(1).max(1);
    let Some((lo, hi)) = hist.range() else {
        return vec![0; k];
    };
    let span = hi - lo + 1;
    if span <= k {
        // Fewer occupied levels than thresholds: cut after each level.
        return (0..k).map(|i| (lo + i.min(span - 1)) as u16).collect();
    }
    const EXACT_LEVELS: usize = 4096;
    let bin = span.div_ceil(EXACT_LEVELS);
    let coarse: Vec<(f64, f64)> = (0..span.div_ceil(bin))
        .map(|b| {
            let (start, end) = (lo + b * bin, (lo + (b + 1) * bin).min(hi + 1));
            (start..end).fold((0.0, 0.0), |(n, s), v| {
                let c = hist.counts[v] as f64;
                (n + c, s + c * v as f64)
            })
        })
        .collect();
    let cuts = best_cuts(&coarse, k);
    // Bin b's last level is lo + (b + 1) * bin - 1.
    let mut levels: Vec<usize> = cuts
        .iter()
        .map(|&b| (lo + (b + 1) * bin - 1).min(hi))
        .collect();
    if bin > 1 {
        for _ in 0..2 {
            for i in 0..k {
                let lower = if i == 0 { lo } else { levels[i - 1] + 1 };
                let upper = if i + 1 == k {
                    hi - 1
                } else {
                    levels[i + 1] - 1
                };
                let from = levels[i].saturating_sub(bin).max(lower);
                let to = (levels[i] + bin).min(upper);
                let mut best = (f64::NEG_INFINITY, levels[i]);
                for cand in from..=to {
                    levels[i] = cand;
                    let score = class_score(hist, lo, hi, &levels);
                    if score > best.0 {
                        best = (score, cand);
                    }
                }
                levels[i] = best.1;
            }
        }
    }
    levels.into_iter().map(|v| v as u16).collect()
}

/// Σ over classes of S²/N (between-class variance up to constants) at full
/// resolution for the given cut levels (class i ends at `levels[i]`).
fn class_score(hist: &Histogram, lo: usize, hi: usize, levels: &[usize]) -> f64 {
    let mut score = 0.0;
    let mut start = lo;
    for &end in levels.iter().chain(std::iter::once(&hi)) {
        let (mut n, mut s) = (0.0, 0.0);
        for v in start..=end {
            let c = hist.counts[v] as f64;
            n += c;
            s += c * v as f64;
        }
        if n > 0.0 {
            score += s * s / n;
        }
        start = end + 1;
    }
    score
}

/// Dynamic programme over bins `(count, sum)`: the `k` cut bins (class i ends
/// at bin `cuts[i]`) maximising Σ S²/N; ties keep the lowest cuts.
#[allow(clippy::needless_range_loop)] // indices run across several tables at once
fn best_cuts(bins: &[(f64, f64)], k: usize) -> Vec<usize> {
    let m = bins.len();
    let mut cn = vec![0.0; m + 1];
    let mut cs = vec![0.0; m + 1];
    for (i, &(n, s)) in bins.iter().enumerate() {
        cn[i + 1] = cn[i] + n;
        cs[i + 1] = cs[i] + s;
    }
    // Score of the class made of bins a..b (exclusive end).
    let seg = |a: usize, b: usize| {
        let n = cn[b] - cn[a];
        if n > 0.0 {
            let s = cs[b] - cs[a];
            s * s / n
        } else {
            0.0
        }
    };
    // best[j][e]: best score splitting bins 0..e into j+1 classes; from[j][e]: start of the last class.
    let mut best = vec![vec![f64::NEG_INFINITY; m + 1]; k + 1];
    let mut from = vec![vec![0usize; m + 1]; k + 1];
    for e in 1..=m {
        best[0][e] = seg(0, e);
    }
    for j in 1..=k {
        for e in (j + 1)..=m {
            let mut top = (f64::NEG_INFINITY, j);
            for a in j..e {
                let v = best[j - 1][a] + seg(a, e);
                if v > top.0 {
                    top = (v, a);
                }
            }
            best[j][e] = top.0;
            from[j][e] = top.1;
        }
    }
    let mut cuts = vec![0; k];
    let mut e = m;
    for j in (1..=k).rev() {
        let a = from[j][e];
        cuts[j - 1] = a - 1;
        e = a;
    }
    cuts
}

#[cfg(test)]
mod tests {
    use super::*;

    fn hist8(values: &[(u16, u64)]) -> Histogram {
        let mut counts = vec![0u64; 256];
        for &(v, c) in values {
            counts[usize::from(v)] += c;
        }
        Histogram {
            total: counts.iter().sum(),
            counts,
        }
    }

    #[test]
    fn histogram_counts_every_sample() {
        let f = Frame::from_rows_u8(&[&[0, 1, 1, 255, 7], &[7, 7, 7, 0, 1]]);
        let h = Histogram::of(&f);
        assert_eq!(
            (
                h.counts[0],
                h.counts[1],
                h.counts[7],
                h.counts[255],
                h.total
            ),
            (2, 3, 4, 1, 10)
        );
    }

    #[test]
    fn otsu_by_hand() {
        // Hand-derived: counts {2: 4, 3: 2, 9: 2}. Splits: t=2 -> w0=4,m0=2; w1=4,m1=6:
        // 4*4*16 = 256. t=3 -> w0=6,m0=7/3; w1=2,m1=9: 6*2*(20/3)^2 = 533.3. Best t = 3.
        assert_eq!(otsu(&hist8(&[(2, 4), (3, 2), (9, 2)])), 3);
        // Single level: that level.
        assert_eq!(otsu(&hist8(&[(42, 9)])), 42);
    }

    #[test]
    fn separability_by_hand() {
        // Two pure levels: all variance is between-class, η = 1 (Otsu 1979, eq. 12).
        assert!((separability(&hist8(&[(10, 5), (90, 3)])) - 1.0).abs() < 1e-12);
        // {0:1, 1:1, 2:1}: σ_T² = 2/3; best split t=0 (first of two equal maxima):
        // w0=1/3,w1=2/3,m0=0,m1=1.5 -> σ_B² = 2/9*2.25 = 0.5; η = 0.75.
        assert!((separability(&hist8(&[(0, 1), (1, 1), (2, 1)])) - 0.75).abs() < 1e-12);
        assert_eq!(separability(&hist8(&[(5, 3)])), 0.0);
    }

    #[test]
    fn bimodality_by_hand() {
        // Two equal spikes {0 x2, 10 x2}: n = 4, mean 5, m2 = 25, m3 = 0, m4 = 625:
        // G1 = 0; g2 = 625/625 - 3 = -2 -> G2 = ((5)(-2) + 6)(3)/((2)(1)) = -6;
        // denominator -6 + 3·9/2 = 7.5 -> BC = 1/7.5 = 0.1333 (tiny n: the corrections dominate).
        assert!((bimodality(&hist8(&[(0, 2), (10, 2)])) - 1.0 / 7.5).abs() < 1e-12);
        // For large n two equal spikes approach BC = 1 (G1 = 0, G2 -> -2: 1/(−2+3)).
        let bc = bimodality(&hist8(&[(20, 50_000), (200, 50_000)]));
        assert!((bc - 1.0).abs() < 1e-3, "{bc}");
        // A flat (uniform) histogram approaches 5/9 (G2 -> -1.2: 1/1.8).
        let flat: Vec<(u16, u64)> = (0..256).map(|v| (v as u16, 1000)).collect();
        assert!((bimodality(&hist8(&flat)) - 5.0 / 9.0).abs() < 1e-3);
        assert_eq!(bimodality(&hist8(&[(7, 100)])), 0.0);
    }

    #[test]
    fn triangle_by_hand() {
        // Peak 100 at level 0, tail to level 4: [100, 50, 10, 5, 1]. Longer side is the
        // right, so the histogram is mirrored: [1, 5, 10, 50, 100], peak at 4, width 4.
        // Distances ∝ 100x - 4y over x = 0..3: 0-4, 100-20, 200-40, 300-200 -> max at x=2,
        // mirrored back: level 4 - 2 = 2.
        assert_eq!(
            triangle(&hist8(&[(0, 100), (1, 50), (2, 10), (3, 5), (4, 1)])),
            2
        );
    }

    #[test]
    fn li_by_hand() {
        // Values {1 x2, 9 x2}, shifted by min 1: {0, 0, 8, 8}; start at mean 4.
        // back mean 0 -> the iteration stops (log of 0); threshold = 4 + 1 = 5.
        assert_eq!(li(&hist8(&[(1, 2), (9, 2)])), 5);
        // {10 x3, 20 x1}: shifted {0,0,0,10}, mean 2.5 -> back mean 0 -> stop: 2.5+10 -> 12.
        assert_eq!(li(&hist8(&[(10, 3), (20, 1)])), 12);
        // {2 x1, 4 x1, 8 x1}: shifted {0, 2, 6}, mean 8/3: back {0,2} mean 1, fore 6:
        // t = (1-6)/(ln1-ln6) = 2.7906; same split again -> converged; floor(2.79+2) = 4.
        assert_eq!(li(&hist8(&[(2, 1), (4, 1), (8, 1)])), 4);
    }

    #[test]
    fn multi_otsu_three_pure_levels() {
        // Three pure populations: the cuts fall after the first and second.
        assert_eq!(
            multi_otsu(&hist8(&[(10, 5), (100, 5), (200, 5)]), 3),
            vec![10, 100]
        );
    }

    #[test]
    fn multi_otsu_two_classes_equals_otsu() {
        let h = hist8(&[(3, 7), (4, 9), (10, 2), (30, 11), (31, 4), (200, 3)]);
        assert_eq!(multi_otsu(&h, 2), vec![otsu(&h)]);
    }

    #[test]
    fn multi_otsu_wide_16_bit_range_is_refined() {
        let mut counts = vec![0u64; 65536];
        for (v, c) in [
            (100usize, 50u64),
            (101, 40),
            (20_000, 30),
            (20_003, 30),
            (60_000, 20),
        ] {
            counts[v] = c;
        }
        let h = Histogram {
            total: counts.iter().sum(),
            counts,
        };
        assert_eq!(multi_otsu(&h, 3), vec![101, 20_003]);
    }

    #[test]
    fn median_upto_follows_numpy() {
        let h = hist8(&[(1, 1), (3, 1), (8, 1), (9, 1), (200, 5)]);
        assert_eq!(h.median_upto(9), Some(5.5)); // numpy.median([1,3,8,9]) = 5.5
        assert_eq!(h.median_upto(8), Some(3.0));
        assert_eq!(h.median_upto(0), None);
    }
}
