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
/// (`None` when it is `raw` itself), so background pixels are `segmented <= t`;
/// `boundary_px` is the summed perimeter of the kept objects (for [`focus`]).
pub fn assess(
    raw: &Frame,
    raw_hist: &Histogram,
    segmented: Option<&Frame>,
    t: u16,
    boundary_px: f64,
) -> FrameQuality {
    let n = raw.len().max(1) as f64;
    let saturation_fraction = raw_hist.counts[usize::from(raw.max_value())] as f64 / n;
    let (w, h) = (raw.width, raw.height);
    let (gx, gy) = (GRID.min(w).max(1), GRID.min(h).max(1));
    let sums = row_sums(raw, segmented, t, gx, gy);
    let RowSums {
        block_sum,
        block_n,
        bg_hist,
        ..
    } = &sums;
    let background_level = match &bg_hist {
        Some(counts) => Histogram {
            total: counts.iter().sum(),
            counts: counts.clone(),
        }
        .median_upto(counts.len() - 1),
        None => raw_hist.median_upto(usize::from(t)),
    }
    .unwrap_or(0.0);
    let illumination_change = illumination(block_sum, block_n, gx, gy, w * h / (gx * gy));
    // Mean raw value of the pixels that are not background.
    let bg_n: u64 = block_n.iter().sum();
    let bg_sum: u64 = block_sum.iter().sum();
    let all_sum: u64 = (raw_hist.counts.iter().enumerate())
        .map(|(v, &c)| v as u64 * c)
        .sum();
    let fg_n = raw.len() as u64 - bg_n.min(raw.len() as u64);
    let contrast = if fg_n > 0 {
        (all_sum - bg_sum.min(all_sum)) as f64 / fg_n as f64 - background_level
    } else {
        0.0
    };
    let focus = focus(&sums, w, h, contrast, boundary_px);
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
    /// Sum of the 4-neighbour Laplacian over the interior.
    lap_sum: i128,
    /// Sum of its squares.
    lap_sq: u128,
    /// The same two sums over the interior's background pixels only.
    lap_bg_sum: i128,
    /// Sum of the background's squared Laplacian.
    lap_bg_sq: u128,
    /// Interior background pixels.
    lap_bg_n: u64,
}

/// Sharpness of the objects' edges: the energy of the 4-neighbour Laplacian
/// (its variance over the frame, the focus measure of Pech-Pacheco et al.
/// 2000, "Diatom autofocusing in brightfield microscopy: a comparative
/// study", ICPR) above the noise floor measured on the background's own
/// pixels, per pixel of object boundary, in units of the object-background
/// contrast squared. The normalisation is ours: a dimmer lamp scales the
/// Laplacian and the contrast alike, so the ratio stays (noise aside, which
/// the floor removes); more or fewer objects change the boundary length and
/// the energy alike. For an edge blurred by a Gaussian of σ pixels the value
/// falls roughly as 1/σ³. 0 without objects, boundary or contrast.
fn focus(sums: &RowSums, w: usize, h: usize, contrast: f64, boundary_px: f64) -> f64 {
    let variance = |sum: i128, sq: u128, n: f64| {
        if n > 0.0 {
            let mean = sum as f64 / n;
            (sq as f64 / n - mean * mean).max(0.0)
        } else {
            0.0
        }
    };
    let interior = (w.saturating_sub(2) * h.saturating_sub(2)) as f64;
    if interior == 0.0 || boundary_px <= 0.0 || contrast <= 0.0 {
        return 0.0;
    }
    let all = variance(sums.lap_sum, sums.lap_sq, interior);
    let noise = variance(sums.lap_bg_sum, sums.lap_bg_sq, sums.lap_bg_n as f64);
    (all - noise).max(0.0) * interior / (boundary_px * contrast * contrast)
}

multiversion! {
    /// The pass over the rows behind [`assess`]: background sums per block of
    /// a `gx × gy` grid, the background histogram when `segmented` is given,
    /// and the Laplacian's sums. Background is `segmented <= t` (`raw` when
    /// `segmented` is `None`).
    fn row_sums(raw: &Frame, segmented: Option<&Frame>, t: u16, gx: usize, gy: usize) -> RowSums {
        let (w, h) = (raw.width, raw.height);
        let mut block_sum = vec![0u64; gx * gy];
        let mut block_n = vec![0u64; gx * gy];
        let mut bg_hist = segmented.map(|_| vec![0u64; raw.levels()]);
        let (mut lap_sum, mut lap_sq) = (0i128, 0u128);
        let (mut lap_bg_sum, mut lap_bg_sq, mut lap_bg_n) = (0i128, 0u128, 0u64);
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
            if y >= 1 && y + 1 < h && w >= 3 {
                let (up, down) = (raw.row(y - 1), raw.row(y + 1));
                let l = laplacian_sums(up, row, down, seg_row, t);
                lap_sum += i128::from(l.sum);
                lap_sq += u128::from(l.sq);
                lap_bg_sum += i128::from(l.bg_sum);
                lap_bg_sq += u128::from(l.bg_sq);
                lap_bg_n += l.bg_n;
            }
        }
        RowSums {
            block_sum,
            block_n,
            bg_hist,
            lap_sum,
            lap_sq,
            lap_bg_sum,
            lap_bg_sq,
            lap_bg_n,
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

/// The Laplacian's sums over one row's interior, all pixels and background
/// pixels (`seg <= t`) apart.
struct LaplacianSums {
    sum: i64,
    sq: u64,
    bg_sum: i64,
    bg_sq: u64,
    bg_n: u64,
}

/// Sum and sum of squares of the 4-neighbour Laplacian over the interior of
/// one row (`up` and `down` are the rows above and below; at least 3 wide),
/// and the same over its background pixels (`seg <= t`). Always inlined, like
/// [`masked_sum`].
#[inline(always)]
fn laplacian_sums(up: &[u16], row: &[u16], down: &[u16], seg: &[u16], t: u16) -> LaplacianSums {
    let w = row.len();
    let mut l = LaplacianSums {
        sum: 0,
        sq: 0,
        bg_sum: 0,
        bg_sq: 0,
        bg_n: 0,
    };
    // |lap| <= 4 * 65535, so i32 holds it and its square fits u64.
    for x in 1..w - 1 {
        let lap =
            i32::from(up[x]) + i32::from(down[x]) + i32::from(row[x - 1]) + i32::from(row[x + 1])
                - 4 * i32::from(row[x]);
        let sq = (i64::from(lap) * i64::from(lap)) as u64;
        let bg = i64::from(seg[x] <= t);
        l.sum += i64::from(lap);
        l.sq += sq;
        l.bg_sum += i64::from(lap) * bg;
        l.bg_sq += sq * bg as u64;
        l.bg_n += bg as u64;
    }
    l
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
        let q = assess(&f, &Histogram::of(&f), None, 1000, 0.0);
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
        let q = assess(&f, &Histogram::of(&f), None, u16::MAX, 0.0);
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
        // A 4x3 frame, rows [2 2 2 2], [2 10 2 2], [2 2 2 2], threshold 5: one
        // object pixel (value 10) and background 2 (median), contrast 10 - 2 = 8.
        // Interior pixels (1,1) and (2,1): lap(1,1) = 4·2 - 4·10 = -32,
        // lap(2,1) = (2 + 2 + 10 + 2) - 4·2 = 8; mean -12, variance
        // ((-20)² + 20²) / 2 = 400 over 2 pixels. The background's interior
        // pixel (2,1) alone has variance 0 (the noise floor). With a boundary of
        // 4 px: focus = (400 - 0) · 2 / (4 · 8²) = 3.125.
        let f = Frame {
            width: 4,
            height: 3,
            bit_depth: 8,
            pixels: vec![2, 2, 2, 2, 2, 10, 2, 2, 2, 2, 2, 2],
        };
        let focus = |boundary| assess(&f, &Histogram::of(&f), None, 5, boundary).focus;
        assert_eq!(focus(4.0), 3.125);
        // The same frame with the lamp at half and an offset of 7: unchanged.
        let dim = Frame {
            pixels: f.pixels.iter().map(|&v| v / 2 + 7).collect(),
            ..f.clone()
        };
        assert_eq!(
            assess(&dim, &Histogram::of(&dim), None, 9, 4.0).focus,
            3.125
        );
        // No objects, no boundary: 0.
        assert_eq!(focus(0.0), 0.0);
    }

    #[test]
    fn saturation_and_background_median() {
        let f = Frame::from_rows_u8(&[&[255, 10, 12], &[14, 200, 255]]);
        let q = assess(&f, &Histogram::of(&f), None, 100, 0.0);
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
            let (w, h) = (raw.width, raw.height);
            let (mut lap_sum, mut lap_sq) = (0i128, 0u128);
            let (mut bg_sum, mut bg_sq, mut bg_n) = (0i128, 0u128, 0u64);
            for y in 1..h.saturating_sub(1) {
                for x in 1..w.saturating_sub(1) {
                    let p = |x: usize, y: usize| i128::from(raw.pixels[y * w + x]);
                    let lap = p(x, y - 1) + p(x, y + 1) + p(x - 1, y) + p(x + 1, y) - 4 * p(x, y);
                    lap_sum += lap;
                    lap_sq += (lap * lap) as u128;
                    if segmented.pixels[y * w + x] <= t {
                        bg_sum += lap;
                        bg_sq += (lap * lap) as u128;
                        bg_n += 1;
                    }
                }
            }
            prop_assert_eq!((s.lap_sum, s.lap_sq), (lap_sum, lap_sq));
            prop_assert_eq!((s.lap_bg_sum, s.lap_bg_sq, s.lap_bg_n), (bg_sum, bg_sq, bg_n));
        }
    }
}
