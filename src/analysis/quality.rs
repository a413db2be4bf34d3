//! Per-frame quality measures: background level, saturation, focus and the
//! fitted illumination field. Turning them into flags is left to the quality
//! control of the run.
//!
//! The pass over the rows is built twice, for the baseline CPU and with AVX2,
//! and chosen once per frame; the choice is left to [`crate::analysis::simd`].

use crate::analysis::simd::multiversion;
use crate::analysis::threshold::Histogram;
use crate::frame::Frame;

/// Whether an illumination change is beyond its limit: the uneven-illumination
/// flag and the trigger of the recount both ask this.
pub fn is_uneven(illumination_change: f64, max_illumination_change: f64) -> bool {
    illumination_change > max_illumination_change
}

/// The quality measures of one frame, as [`assess`] computes them.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FrameQuality {
    /// Median raw intensity of the pixels the threshold calls background
    /// (`segmented <= t`); 0 when there are none.
    pub background_level: f64,
    /// Fraction (0..1) of raw pixels at the top of the bit depth (255 or 65535).
    pub saturation_fraction: f64,
    /// Sharpness of the objects' edges, independent of the lamp's brightness:
    /// see [`focus`]. 0 without objects or contrast.
    pub focus: f64,
    /// (max − min) / mean of the surface fitted to the blocks' background means (see
    /// [`illumination`]); 0 for an even field, a dark background or too few
    /// background blocks.
    pub illumination_change: f64,
}

/// Grid of blocks for the illumination fit (per side, at most).
const GRID: usize = 16;

/// Measures `raw`; `segmented` is the frame the threshold `t` applies to
/// (`None` when it is `raw` itself), so background pixels are `segmented <= t`.
pub fn assess(
    raw: &Frame,
    raw_hist: &Histogram,
    segmented: Option<&Frame>,
    t: u16,
) -> FrameQuality {
    let n = raw.len().max(1) as f64;
    let saturation_fraction = raw_hist.counts[usize::from(raw.max_value())] as f64 / n;
    let (w, h) = (raw.width, raw.height);
    let (gx, gy) = (GRID.min(w).max(1), GRID.min(h).max(1));
    let RowSums {
        block_sum,
        block_n,
        bg_hist,
    } = row_sums(raw, segmented, t, gx, gy);
    let background_level = match bg_hist {
        Some(counts) => {
            let top = counts.len() - 1;
            Histogram {
                total: counts.iter().sum(),
                counts,
            }
            .median_upto(top)
        }
        None => raw_hist.median_upto(usize::from(t)),
    }
    .unwrap_or(0.0);
    let illumination_change = illumination(&block_sum, &block_n, gx, gy, w * h / (gx * gy));
    let focus = focus(raw, background_level);
    FrameQuality {
        background_level,
        saturation_fraction,
        focus,
        illumination_change,
    }
}

/// What [`assess`] gathers in its one pass over the rows.
#[derive(Debug, PartialEq)]
struct RowSums {
    /// Sum of the background's raw values in each of `gx × gy` blocks, row-major.
    block_sum: Vec<u64>,
    /// Number of background pixels in each block.
    block_n: Vec<u64>,
    /// Histogram of the background's raw values, when segmentation ran on a
    /// corrected frame (otherwise the raw histogram below `t` is it).
    bg_hist: Option<Vec<u64>>,
}

/// Sharpness of the frame, independent of the lamp's brightness, the camera's
/// offset and its noise, and of how the frame was segmented: the energy of
/// the Laplacian of the binomially smoothed frame, above its share of the
/// noise, per unit of signal energy above the background,
///
/// ```text
/// focus = (var(L) - v·Σk_L²) / (mean((B - b)²) - v·Σk_B²)
/// ```
///
/// - `B`: the frame smoothed by the 3 × 3 binomial kernel `k_B = [1 2 1]ᵀ[1 2 1] / 16`
///   (a Gaussian of σ ≈ 0.7 px), over the frame less a 1-pixel border;
/// - `L`: the 4-neighbour Laplacian of `B` (kernel `k_L`, 5 × 5), less a 2-pixel
///   border: the variance-of-Laplacian focus measure (Pech-Pacheco et al.
///   2000, "Diatom autofocusing in brightfield microscopy: a comparative
///   study", ICPR) on a lightly smoothed frame, so the noise's share is small;
/// - `v`: the noise variance per pixel by Immerkær's estimator (1996, "Fast
///   noise variance estimation", Computer Vision and Image Understanding
///   64:300–302): the variance of the frame filtered by
///   `[1 −2 1; −2 4 −2; 1 −2 1]`, over 36 (the kernel's energy), which smooth
///   structure hardly reaches; white noise of variance `v` adds `v·Σk²` to the
///   energy behind any kernel `k`, which is subtracted;
/// - `b`: the background level.
///
/// The normalisation is ours. A dimmer lamp scales `L` and `B - b` alike, and
/// the noise terms remove what shot noise adds, so the ratio stays; a blur
/// of σ px removes the fine structure `L` sees (a Gaussian blur of σ = 2 px
/// takes a real field of nuclei to about a third of its value, σ = 3 px to a
/// sixth; tests/focus.rs). 0 for frames under 5 × 5 or without signal above
/// the noise. Units: 1/px⁴.
fn focus(raw: &Frame, background_level: f64) -> f64 {
    let e = focus_energies(raw);
    if e.l_n == 0 || e.b_n == 0 || e.n_n == 0 {
        return 0.0;
    }
    let mean_var = |sum: f64, sq: f64, n: u64| {
        let (mean, n) = (sum / n as f64, n as f64);
        (sq / n - mean * mean).max(0.0)
    };
    // The sums are of 16 × B and 16 × L (integer kernels).
    let var_l = mean_var(e.l_sum, e.l_sq, e.l_n) / 256.0;
    let noise = mean_var(e.n_sum, e.n_sq, e.n_n) / 36.0;
    let n = e.b_n as f64;
    let b = background_level;
    let signal = e.b_sq / (256.0 * n) - 2.0 * b * e.b_sum / (16.0 * n) + b * b;
    let top = var_l - noise * LOG_KERNEL_ENERGY;
    let bottom = signal - noise * BINOMIAL_KERNEL_ENERGY;
    if top <= 0.0 || bottom <= 0.0 {
        0.0
    } else {
        top / bottom
    }
}

/// Σk² of the 3 × 3 binomial kernel `[1 2 1]ᵀ[1 2 1] / 16`: (6/16)².
const BINOMIAL_KERNEL_ENERGY: f64 = 0.140625;

/// Σk² of the 4-neighbour Laplacian of that kernel (5 × 5, entries in
/// sixteenths): its rows are `[0 1 2 1 0]`, `[1 0 −2 0 1]`, `[2 −2 −8 −2 2]`,
/// `[1 0 −2 0 1]`, `[0 1 2 1 0]`, so Σk² = (6 + 6 + 80 + 6 + 6) / 256 =
/// 104 / 256 (checked against `scipy.signal.convolve2d` of the two kernels).
const LOG_KERNEL_ENERGY: f64 = 104.0 / 256.0;

/// The sums behind [`focus`]: of `16·B` and its square (`b_*`), of `16·L` and
/// its square (`l_*`), and of the noise filter's output and its square (`n_*`).
#[derive(Debug, Default, PartialEq)]
struct FocusEnergies {
    b_sum: f64,
    b_sq: f64,
    b_n: u64,
    l_sum: f64,
    l_sq: f64,
    l_n: u64,
    n_sum: f64,
    n_sq: f64,
    n_n: u64,
}

multiversion! {
    /// One pass over the rows for [`focus`]. Each row's horizontal `[1 2 1]`
    /// and `[1 −2 1]` are made once, into rings of three rows; the vertical
    /// halves of `16·B` and of the noise filter, and the Laplacian of `16·B`
    /// (the last three rows of it kept), are slice-wise sums, so the loops
    /// vectorise.
    fn focus_energies(raw: &Frame) -> FocusEnergies {
        let (w, h) = (raw.width, raw.height);
        let mut e = FocusEnergies::default();
        if w < 5 || h < 5 {
            return e;
        }
        // Columns 1..w-1 of each row, at index x - 1; rings indexed by y % 3.
        let n = w - 2;
        let ring = || [vec![0i32; n], vec![0i32; n], vec![0i32; n]];
        let (mut flat, mut curve, mut smooth) = (ring(), ring(), ring());
        let mut values = vec![0i32; n];
        let horizontal = |row: &[u16], flat: &mut [i32], curve: &mut [i32]| {
            for ((f, c), x) in flat.iter_mut().zip(curve.iter_mut()).zip(row.windows(3)) {
                let (l, m, r) = (i32::from(x[0]), i32::from(x[1]), i32::from(x[2]));
                *f = l + 2 * m + r;
                *c = l - 2 * m + r;
            }
        };
        for y in 0..2 {
            horizontal(raw.row(y), &mut flat[y], &mut curve[y]);
        }
        for y in 1..h - 1 {
            let (above, here, below) = ((y - 1) % 3, y % 3, (y + 1) % 3);
            horizontal(raw.row(y + 1), &mut flat[below], &mut curve[below]);
            for (((b, u), m), d) in smooth[here].iter_mut().zip(&flat[above]).zip(&flat[here]).zip(&flat[below]) {
                *b = u + 2 * m + d;
            }
            add_row(&smooth[here], &mut e.b_sum, &mut e.b_sq, &mut e.b_n);
            for (((v, u), m), d) in values.iter_mut().zip(&curve[above]).zip(&curve[here]).zip(&curve[below]) {
                *v = u - 2 * m + d;
            }
            add_row(&values, &mut e.n_sum, &mut e.n_sq, &mut e.n_n);
            // The Laplacian of row y - 1 of B, for x in 2..w-2.
            if y >= 3 {
                let (up, mid, down) = (&smooth[(y - 2) % 3], &smooth[(y - 1) % 3], &smooth[here]);
                let lap = &mut values[..n - 2];
                for (((v, m), u), d) in lap.iter_mut().zip(mid.windows(3)).zip(&up[1..]).zip(&down[1..]) {
                    *v = u + d + m[0] + m[2] - 4 * m[1];
                }
                add_row(lap, &mut e.l_sum, &mut e.l_sq, &mut e.l_n);
            }
        }
        e
    }
}

/// Adds `values`' sum, sum of squares and count to the running totals,
/// exactly per chunk: 4096 squares of values under 2^24 stay within i64.
/// Always inlined, like [`masked_sum`].
#[inline(always)]
fn add_row(values: &[i32], sum: &mut f64, squares: &mut f64, count: &mut u64) {
    for chunk in values.chunks(4096) {
        let (mut s, mut q) = (0i64, 0i64);
        for &v in chunk {
            s += i64::from(v);
            q += i64::from(v) * i64::from(v);
        }
        *sum += s as f64;
        *squares += q as f64;
    }
    *count += values.len() as u64;
}

multiversion! {
    /// The pass over the rows behind [`assess`]: background sums per block of
    /// a `gx × gy` grid, and the background histogram when `segmented` is
    /// given. Background is `segmented <= t` (`raw` when `segmented` is
    /// `None`).
    fn row_sums(raw: &Frame, segmented: Option<&Frame>, t: u16, gx: usize, gy: usize) -> RowSums {
        let (w, h) = (raw.width, raw.height);
        let mut block_sum = vec![0u64; gx * gy];
        let mut block_n = vec![0u64; gx * gy];
        let mut bg_hist = segmented.map(|_| vec![0u64; raw.levels()]);
        // Column span of each block, so the inner loops run over contiguous slices.
        let col_start: Vec<usize> = (0..=gx).map(|b| b * w / gx).collect();
        for y in 0..h {
            let row = raw.row(y);
            let seg_row = segmented.map_or(row, |s| s.row(y));
            let by = y * gy / h;
            for b in 0..gx {
                let (x0, x1) = (col_start[b], col_start[b + 1]);
                let (sum, n) = masked_sum(&row[x0..x1], &seg_row[x0..x1], t);
                block_sum[by * gx + b] += sum;
                block_n[by * gx + b] += n;
            }
            if let Some(hist) = bg_hist.as_mut() {
                for (&v, &sv) in row.iter().zip(seg_row) {
                    if sv <= t {
                        hist[usize::from(v)] += 1;
                    }
                }
            }
        }
        RowSums {
            block_sum,
            block_n,
            bg_hist,
        }
    }
}

/// Sum and count of `values` where `seg <= t` (the background's share of a
/// block row). Always inlined, so [`row_sums`]'s AVX2 build has an AVX2 copy.
#[inline(always)]
fn masked_sum(values: &[u16], seg: &[u16], t: u16) -> (u64, u64) {
    let (mut sum, mut n) = (0u64, 0u64);
    // 4096 samples of at most 65535 fit a u32 sum; narrow lanes vectorise better.
    for (cv, cs) in values.chunks(4096).zip(seg.chunks(4096)) {
        let (mut s32, mut n32) = (0u32, 0u32);
        for (&v, &sv) in cv.iter().zip(cs) {
            let m = u32::from(sv <= t);
            s32 += u32::from(v) & 0u32.wrapping_sub(m);
            n32 += m;
        }
        sum += u64::from(s32);
        n += u64::from(n32);
    }
    (sum, n)
}

/// Fits `z = a + b·u + c·v + d·u² + e·v² + f·u·v` (u, v in [-1, 1] across the
/// frame) to the mean background of each block that is at least a quarter
/// background, by least squares, and returns (max − min) / mean of the fitted
/// surface over the frame. Falls back to a plane with fewer than 12 usable
/// blocks, and to 0 with fewer than 3.
pub fn illumination(
    block_sum: &[u64],
    block_n: &[u64],
    gx: usize,
    gy: usize,
    block_px: usize,
) -> f64 {
    let coord = |i: usize, g: usize| {
        if g > 1 {
            2.0 * i as f64 / (g - 1) as f64 - 1.0
        } else {
            0.0
        }
    };
    let points: Vec<(f64, f64, f64)> = (0..gx * gy)
        .filter(|&b| block_n[b] > 0 && block_n[b] * 4 >= block_px as u64)
        .map(|b| {
            (
                coord(b % gx, gx),
                coord(b / gx, gy),
                block_sum[b] as f64 / block_n[b] as f64,
            )
        })
        .collect();
    let terms: usize = match points.len() {
        0..=2 => return 0.0,
        3..=11 => 3,
        _ => 6,
    };
    let basis = |u: f64, v: f64| [1.0, u, v, u * u, v * v, u * v];
    let mut ata = [[0.0f64; 6]; 6];
    let mut atb = [0.0f64; 6];
    for &(u, v, z) in &points {
        let phi = basis(u, v);
        for i in 0..terms {
            atb[i] += phi[i] * z;
            for j in 0..terms {
                ata[i][j] += phi[i] * phi[j];
            }
        }
    }
    let Some(coef) = solve(&mut ata, &mut atb, terms) else {
        return 0.0;
    };
    let steps = 32;
    let (mut lo, mut hi, mut sum) = (f64::INFINITY, f64::NEG_INFINITY, 0.0);
    for i in 0..=steps {
        for j in 0..=steps {
            let (u, v) = (coord(i, steps + 1), coord(j, steps + 1));
            let phi = basis(u, v);
            let z: f64 = (0..terms).map(|k| coef[k] * phi[k]).sum();
            lo = lo.min(z);
            hi = hi.max(z);
            sum += z;
        }
    }
    let mean = sum / ((steps + 1) * (steps + 1)) as f64;
    // A dark background (mean under one grey level) has no meaningful relative change.
    if mean < 1.0 {
        return 0.0;
    }
    (hi - lo) / mean
}

/// Gaussian elimination with partial pivoting on the leading `n × n` system.
fn solve(a: &mut [[f64; 6]; 6], b: &mut [f64; 6], n: usize) -> Option<[f64; 6]> {
    for col in 0..n {
        let pivot = (col..n).max_by(|&i, &j| a[i][col].abs().total_cmp(&a[j][col].abs()))?;
        if a[pivot][col].abs() < 1e-12 {
            return None;
        }
        a.swap(col, pivot);
        b.swap(col, pivot);
        for row in col + 1..n {
            let f = a[row][col] / a[col][col];
            let pivot_row = a[col];
            for (x, p) in a[row][col..n].iter_mut().zip(&pivot_row[col..n]) {
                *x -= f * p;
            }
            b[row] -= f * b[col];
        }
    }
    let mut x = [0.0f64; 6];
    for row in (0..n).rev() {
        let s: f64 = (row + 1..n).map(|k| a[row][k] * x[k]).sum();
        x[row] = (b[row] - s) / a[row][row];
    }
    Some(x)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::simd::{report_no_avx2, test_inputs};
    use proptest::prelude::*;

    fn frame16(w: usize, h: usize, f: impl Fn(usize, usize) -> u16) -> Frame {
        Frame {
            width: w,
            height: h,
            bit_depth: 16,
            pixels: (0..w * h).map(|i| f(i % w, i / w)).collect(),
        }
    }

    #[test]
    fn flat_frame_has_no_illumination_change_and_no_focus() {
        let f = frame16(64, 48, |_, _| 1000);
        let q = assess(&f, &Histogram::of(&f), None, 1000);
        assert_eq!(
            (q.focus, q.background_level, q.saturation_fraction),
            (0.0, 1000.0, 0.0)
        );
        assert!(q.illumination_change.abs() < 1e-12);
    }

    #[test]
    fn linear_ramp_is_fitted_exactly() {
        // Background rises from 1000 to 1000 + 63·10 = 1630 across x. The fitted
        // surface is the ramp sampled at block means: per block of 4 columns the
        // mean is 1000 + 10·(4i + 1.5), from 1015 to 1615; the surface spans exactly
        // that, mean 1315: change = 600 / 1315.
        let f = frame16(64, 64, |x, _| 1000 + 10 * x as u16);
        let q = assess(&f, &Histogram::of(&f), None, u16::MAX);
        assert!(
            (q.illumination_change - 600.0 / 1315.0).abs() < 1e-9,
            "{}",
            q.illumination_change
        );
        // Laplacian of a linear ramp is 0 everywhere inside.
        assert_eq!(q.focus, 0.0);
    }

    #[test]
    fn focus_by_hand() {
        // A vertical step edge, 8 x 6, 8-bit: every row 0 0 0 0 16 16 16 16.
        // Columns are constant, so the vertical [1 2 1] sums to 4 and the
        // vertical [1 -2 1] to 0: the noise filter gives 0 everywhere (v = 0).
        // 16·B on x = 1..=6: 4 × (horizontal [1 2 1]) = 0 0 64 192 256 256,
        // on 4 rows. 16·L on x = 2..=5 (2 rows), horizontal second
        // difference: 64 64 -64 -64: mean 0, var(L) = 64² / 256 = 16. The
        // background (t = 8) has median 0; mean(B²) = (4² + 12² + 16² + 16²)
        // / 6 = 112. Focus = 16 / 112 = 1/7.
        let row = [0u8, 0, 0, 0, 16, 16, 16, 16];
        let f = Frame::from_rows_u8(&[&row[..]; 6]);
        let focus = |f: &Frame, t| assess(f, &Histogram::of(f), None, t).focus;
        assert!((focus(&f, 8) - 1.0 / 7.0).abs() < 1e-15, "{}", focus(&f, 8));
        // The lamp at half and an offset of 7: the same (background 7).
        let dim = Frame {
            pixels: f.pixels.iter().map(|&v| v / 2 + 7).collect(),
            ..f.clone()
        };
        assert!((focus(&dim, 10) - 1.0 / 7.0).abs() < 1e-15);
        // A single bright pixel is what noise looks like to Immerkær's
        // filter (centre 4, edges -2, corners 1, against the binomial's 4, 2,
        // 1): its whole energy is taken as noise, and nothing is left.
        let mut dot = Frame::from_rows_u8(&[&[0u8; 7][..]; 7]);
        dot.pixels[3 * 7 + 3] = 16;
        assert_eq!(focus(&dot, 8), 0.0);
        // Under 5 x 5: 0.
        assert_eq!(focus(&Frame::from_rows_u8(&[&row[..4]; 4]), 8), 0.0);
    }

    #[test]
    fn saturation_and_background_median() {
        let f = Frame::from_rows_u8(&[&[255, 10, 12], &[14, 200, 255]]);
        let q = assess(&f, &Histogram::of(&f), None, 100);
        assert!((q.saturation_fraction - 2.0 / 6.0).abs() < 1e-12);
        assert_eq!(q.background_level, 12.0); // median of 10, 12, 14
    }

    /// `(raw, segmented, t)`: 16-bit frames whose blocks (a sixteenth of a wide
    /// row) take every awkward length, up to past the 4096-sample chunks of
    /// [`masked_sum`], with values on both sides of `t` and right at it.
    fn frames() -> impl Strategy<Value = (Frame, Option<Frame>, u16)> {
        let widths = prop_oneof![
            test_inputs::lengths(),
            test_inputs::lengths().prop_map(|n| n * GRID),
            Just(4097 * GRID + 5),
        ];
        let heights = prop::sample::select(vec![0usize, 1, 2, 3, 4, 17, 33]);
        (widths, heights, test_inputs::thresholds()).prop_flat_map(|(w, h, t)| {
            // Wide frames keep a few rows, so a case stays under a million pixels.
            let h = if w > 5000 { h.min(4) } else { h };
            let n = w * h;
            (
                test_inputs::pixels_near(t, n),
                prop::option::of(test_inputs::pixels_near(t, n)),
            )
                .prop_map(move |(raw, seg)| {
                    let frame = |pixels| Frame {
                        width: w,
                        height: h,
                        bit_depth: 16,
                        pixels,
                    };
                    (frame(raw), seg.map(frame), t)
                })
        })
    }

    fn grid(f: &Frame) -> (usize, usize) {
        (GRID.min(f.width).max(1), GRID.min(f.height).max(1))
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 300, ..ProptestConfig::default() })]

        #[test]
        fn row_sums_avx2_build_matches_the_portable_one((raw, seg, t) in frames()) {
            let (gx, gy) = grid(&raw);
            let portable = row_sums::portable(&raw, seg.as_ref(), t, gx, gy);
            match row_sums::avx2(&raw, seg.as_ref(), t, gx, gy) {
                Some(avx2) => prop_assert_eq!(avx2, portable),
                None => report_no_avx2("quality::row_sums"),
            }
        }

        #[test]
        fn row_sums_add_up_to_a_pixel_by_pixel_count((raw, seg, t) in frames()) {
            let (gx, gy) = grid(&raw);
            let s = row_sums(&raw, seg.as_ref(), t, gx, gy);
            let segmented = seg.as_ref().unwrap_or(&raw);
            let background = raw.pixels.iter().zip(&segmented.pixels).filter(|&(_, &sv)| sv <= t);
            let (sum, n) = background.fold((0u64, 0u64), |(s, n), (&v, _)| (s + u64::from(v), n + 1));
            prop_assert_eq!(s.block_sum.iter().sum::<u64>(), sum);
            prop_assert_eq!(s.block_n.iter().sum::<u64>(), n);
            if let Some(hist) = &s.bg_hist {
                prop_assert_eq!(hist.iter().sum::<u64>(), n);
            }
        }

        #[test]
        fn focus_energies_avx2_build_matches_the_portable_one((raw, _seg, _t) in frames()) {
            let portable = focus_energies::portable(&raw);
            match focus_energies::avx2(&raw) {
                Some(avx2) => prop_assert_eq!(avx2, portable),
                None => report_no_avx2("quality::focus_energies"),
            }
        }

        #[test]
        fn focus_energies_equal_a_pixel_by_pixel_convolution((raw, _seg, _t) in frames()) {
            // 16·B, 16·L and the noise filter straight from their kernels,
            // summed exactly in i128.
            let (w, h) = (raw.width, raw.height);
            let e = focus_energies(&raw);
            if w < 5 || h < 5 {
                prop_assert_eq!(e, FocusEnergies::default());
                return Ok(());
            }
            let p = |x: usize, y: usize| i128::from(raw.pixels[y * w + x]);
            let binomial = |x: usize, y: usize| {
                let mut v = 0;
                for (dy, wy) in [1, 2, 1].into_iter().enumerate() {
                    for (dx, wx) in [1, 2, 1].into_iter().enumerate() {
                        v += wy * wx * p(x + dx - 1, y + dy - 1);
                    }
                }
                v
            };
            let noise = |x: usize, y: usize| {
                let mut v = 0;
                for (dy, wy) in [1, -2, 1].into_iter().enumerate() {
                    for (dx, wx) in [1, -2, 1].into_iter().enumerate() {
                        v += wy * wx * p(x + dx - 1, y + dy - 1);
                    }
                }
                v
            };
            let (mut b, mut n, mut l) = ([0i128; 2], [0i128; 2], [0i128; 2]);
            for y in 1..h - 1 {
                for x in 1..w - 1 {
                    let (bv, nv) = (binomial(x, y), noise(x, y));
                    b = [b[0] + bv, b[1] + bv * bv];
                    n = [n[0] + nv, n[1] + nv * nv];
                    if (2..w - 2).contains(&x) && (2..h - 2).contains(&y) {
                        let lv = binomial(x - 1, y) + binomial(x + 1, y) + binomial(x, y - 1)
                            + binomial(x, y + 1) - 4 * bv;
                        l = [l[0] + lv, l[1] + lv * lv];
                    }
                }
            }
            let close = |a: f64, b: i128| (a - b as f64).abs() <= 1e-12 * (b as f64).abs();
            prop_assert!(close(e.b_sum, b[0]) && close(e.b_sq, b[1]), "{e:?} {b:?}");
            prop_assert!(close(e.n_sum, n[0]) && close(e.n_sq, n[1]), "{e:?} {n:?}");
            prop_assert!(close(e.l_sum, l[0]) && close(e.l_sq, l[1]), "{e:?} {l:?}");
            let inner = ((w - 2) * (h - 2)) as u64;
            prop_assert_eq!((e.b_n, e.n_n, e.l_n), (inner, inner, ((w - 4) * (h - 4)) as u64));
        }
    }
}
