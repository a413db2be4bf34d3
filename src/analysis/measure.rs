//! Per-object measurements from labelled runs: area, centroid, bounding box,
//! intensities on the raw frame and extra pages, perimeter, and the
//! moment-based ellipse. Sums come from runs in closed form where possible, so
//! only intensity and perimeter touch pixels.

use crate::analysis::label::{Components, Run};
use crate::analysis::params::ObjectFilter;
use crate::analysis::result::{ChannelIntensity, ObjectMeasures};
use crate::frame::Frame;

#[derive(Debug, Clone, Default)]
struct Sums {
    n: u64,
    sx: u64,
    sy: u64,
    sxx: u64,
    syy: u64,
    sxy: u64,
    intensity: u64,
    max: u16,
    x_min: u32,
    y_min: u32,
    x_max: u32,
    y_max: u32,
}

/// Sum of squares 0² + 1² + ... + (n-1)².
fn square_sum_below(n: u64) -> u64 {
    if n == 0 {
        0
    } else {
        (n - 1) * n * (2 * n - 1) / 6
    }
}

/// Measures every component of `comps` on `raw`, drops those the filter
/// rejects, and numbers the rest 1.. in raster order of their first pixel.
///
/// `extra` pages must have the frame's size (checked by the caller).
pub fn measure(
    raw: &Frame,
    extra: &[(usize, &Frame)],
    comps: &Components,
    filter: &ObjectFilter,
    pixel_size_um: Option<f64>,
) -> Vec<ObjectMeasures> {
    let (w, h) = (raw.width, raw.height);
    let mut sums = vec![
        Sums {
            x_min: u32::MAX,
            y_min: u32::MAX,
            ..Sums::default()
        };
        comps.count
    ];
    for (run, &k) in comps.runs.iter().zip(&comps.component) {
        let s = &mut sums[k as usize];
        let (x0, x1, y) = (u64::from(run.x0), u64::from(run.x1), u64::from(run.y));
        let len = x1 - x0;
        let sx = (x0 + x1 - 1) * len / 2;
        s.n += len;
        s.sx += sx;
        s.sy += y * len;
        s.sxx += square_sum_below(x1) - square_sum_below(x0);
        s.syy += y * y * len;
        s.sxy += y * sx;
        let row = &raw.row(run.y as usize)[run.x0 as usize..run.x1 as usize];
        s.intensity += row.iter().map(|&v| u64::from(v)).sum::<u64>();
        s.max = s.max.max(row.iter().copied().max().unwrap_or(0));
        s.x_min = s.x_min.min(run.x0);
        s.x_max = s.x_max.max(run.x1);
        s.y_min = s.y_min.min(run.y);
        s.y_max = s.y_max.max(run.y + 1);
    }
    let area_um2 = |n: u64| pixel_size_um.map(|p| n as f64 * p * p);
    let keep: Vec<bool> = sums
        .iter()
        .map(|s| {
            let touches =
                s.x_min == 0 || s.y_min == 0 || s.x_max as usize == w || s.y_max as usize == h;
            let um2_ok = area_um2(s.n).is_none_or(|a| {
                a >= filter.min_area_um2 && (filter.max_area_um2 == 0.0 || a <= filter.max_area_um2)
            });
            s.n >= filter.min_area_px
                && (filter.max_area_px == 0 || s.n <= filter.max_area_px)
                && um2_ok
                && !(filter.exclude_border && touches)
        })
        .collect();
    // Final labels, 1-based, in component (raster) order.
    let mut final_label = vec![0u32; comps.count];
    let mut next = 0;
    for (k, &kept) in keep.iter().enumerate() {
        if kept {
            next += 1;
            final_label[k] = next;
        }
    }
    let kept_count = next as usize;
    // Runs grouped by component (counting sort), so each object is visited alone.
    let mut first = vec![0usize; comps.count + 1];
    for &k in &comps.component {
        first[k as usize + 1] += 1;
    }
    for k in 0..comps.count {
        first[k + 1] += first[k];
    }
    let mut fill = first.clone();
    let mut order = vec![0u32; comps.runs.len()];
    for (i, &k) in comps.component.iter().enumerate() {
        order[fill[k as usize]] = i as u32;
        fill[k as usize] += 1;
    }
    let mut perimeter = vec![0f64; kept_count + 1];
    let mut channel_sums = vec![vec![(0u64, 0u16); extra.len()]; kept_count + 1];
    let mut mask = ObjectMask::default();
    for (k, s) in sums.iter().enumerate() {
        let l = final_label[k] as usize;
        if l == 0 {
            continue;
        }
        let runs = order[first[k]..first[k + 1]]
            .iter()
            .map(|&i| comps.runs[i as usize]);
        mask.reset(s.x_min, s.y_min, s.x_max, s.y_max, runs.clone());
        perimeter[l] = mask.perimeter(runs.clone());
        for run in runs {
            for (slot, (_, page)) in channel_sums[l].iter_mut().zip(extra) {
                let row = &page.row(run.y as usize)[run.x0 as usize..run.x1 as usize];
                slot.0 += row.iter().map(|&v| u64::from(v)).sum::<u64>();
                slot.1 = slot.1.max(row.iter().copied().max().unwrap_or(0));
            }
        }
    }
    sums.iter()
        .zip(&final_label)
        .filter(|(_, &l)| l != 0)
        .map(|(s, &l)| {
            let n = s.n as f64;
            let (major, minor, ecc) = ellipse(s);
            let p = perimeter[l as usize];
            ObjectMeasures {
                label: l,
                area_px: s.n,
                area_um2: area_um2(s.n),
                centroid_x: s.sx as f64 / n,
                centroid_y: s.sy as f64 / n,
                bbox: [s.x_min, s.y_min, s.x_max, s.y_max],
                mean_intensity: s.intensity as f64 / n,
                integrated_intensity: s.intensity as f64,
                max_intensity: f64::from(s.max),
                perimeter_px: p,
                circularity: if p > 0.0 {
                    4.0 * std::f64::consts::PI * n / (p * p)
                } else {
                    0.0
                },
                major_axis_px: major,
                minor_axis_px: minor,
                eccentricity: ecc,
                channels: extra
                    .iter()
                    .zip(&channel_sums[l as usize])
                    .map(|(&(page, _), &(sum, max))| ChannelIntensity {
                        page,
                        mean_intensity: sum as f64 / n,
                        integrated_intensity: sum as f64,
                        max_intensity: f64::from(max),
                    })
                    .collect(),
            }
        })
        .collect()
}

/// Major and minor axis lengths (4√λ of the covariance eigenvalues) and
/// eccentricity √(1 − λ₂/λ₁) of the ellipse with the object's second central
/// moments (common practice; the definitions of `skimage.measure.regionprops`).
fn ellipse(s: &Sums) -> (f64, f64, f64) {
    let n = i128::from(s.n);
    let (sx, sy) = (i128::from(s.sx), i128::from(s.sy));
    // Exact integer central moments times n², then divided once.
    let n2 = (n * n) as f64;
    let cxx = (n * i128::from(s.sxx) - sx * sx) as f64 / n2;
    let cyy = (n * i128::from(s.syy) - sy * sy) as f64 / n2;
    let cxy = (n * i128::from(s.sxy) - sx * sy) as f64 / n2;
    let half_trace = (cxx + cyy) / 2.0;
    let root = (((cxx - cyy) / 2.0).powi(2) + cxy * cxy).sqrt();
    let (l1, l2) = ((half_trace + root).max(0.0), (half_trace - root).max(0.0));
    let ecc = if l1 > 0.0 {
        (1.0 - l2 / l1).max(0.0).sqrt()
    } else {
        0.0
    };
    (4.0 * l1.sqrt(), 4.0 * l2.sqrt(), ecc)
}

/// One object's pixels in a zero-padded box around its bounding box, reused
/// from object to object so no frame-sized label image is needed.
#[derive(Default)]
struct ObjectMask {
    x0: usize,
    y0: usize,
    stride: usize,
    cells: Vec<u8>,
}

/// Padding around the bounding box: neighbours of neighbours stay inside.
const PAD: usize = 2;

impl ObjectMask {
    fn reset(
        &mut self,
        x_min: u32,
        y_min: u32,
        x_max: u32,
        y_max: u32,
        runs: impl Iterator<Item = Run>,
    ) {
        self.x0 = x_min as usize;
        self.y0 = y_min as usize;
        self.stride = (x_max - x_min) as usize + 2 * PAD;
        let rows = (y_max - y_min) as usize + 2 * PAD;
        self.cells.clear();
        self.cells.resize(self.stride * rows, 0);
        for r in runs {
            let at = self.index(r.x0 as usize, r.y as usize);
            self.cells[at..at + (r.x1 - r.x0) as usize].fill(1);
        }
    }

    /// Cell index of frame pixel (x, y).
    fn index(&self, x: usize, y: usize) -> usize {
        (y - self.y0 + PAD) * self.stride + (x - self.x0 + PAD)
    }

    /// Object pixel with a 4-neighbour outside the object.
    fn border(&self, i: usize) -> bool {
        let c = &self.cells;
        c[i] == 1 && (c[i - 1] & c[i + 1] & c[i - self.stride] & c[i + self.stride]) == 0
    }

    /// Perimeter with the weights of `skimage.measure.perimeter`
    /// (4-neighbourhood): border pixels are object pixels with a 4-neighbour
    /// outside the object (the frame edge counts as outside); each is classified
    /// by which of its 8 neighbours are border pixels too (code = 1 + 2·edge
    /// neighbours + 10·corner neighbours) and weighted 1 (straight), √2
    /// (diagonal) or (1+√2)/2 (corner).
    fn perimeter(&self, runs: impl Iterator<Item = Run>) -> f64 {
        let s = self.stride;
        let mut total = 0.0;
        for r in runs {
            let start = self.index(r.x0 as usize, r.y as usize);
            for i in start..start + (r.x1 - r.x0) as usize {
                if !self.border(i) {
                    continue;
                }
                let b = |j: usize| usize::from(self.border(j));
                let edges = b(i - 1) + b(i + 1) + b(i - s) + b(i + s);
                let corners = b(i - s - 1) + b(i - s + 1) + b(i + s - 1) + b(i + s + 1);
                total += match 1 + 2 * edges + 10 * corners {
                    5 | 7 | 15 | 17 | 25 | 27 => 1.0,
                    21 | 33 => std::f64::consts::SQRT_2,
                    13 | 23 => (1.0 + std::f64::consts::SQRT_2) / 2.0,
                    _ => 0.0,
                };
            }
        }
        total
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::label::label;
    use crate::analysis::params::Connectivity;

    fn objects(rows: &[&str], filter: ObjectFilter) -> Vec<ObjectMeasures> {
        let w = rows[0].len();
        let px: Vec<u16> = rows
            .iter()
            .flat_map(|r| r.bytes().map(|b| if b == b'#' { 100 } else { 0 }))
            .collect();
        let frame = Frame {
            width: w,
            height: rows.len(),
            bit_depth: 8,
            pixels: px,
        };
        let c = label(&frame.pixels, w, rows.len(), 0, Connectivity::Eight, true);
        measure(&frame, &[], &c, &filter, Some(0.5))
    }

    const ALL: ObjectFilter = ObjectFilter {
        min_area_px: 0,
        max_area_px: 0,
        min_area_um2: 0.0,
        max_area_um2: 0.0,
        exclude_border: false,
    };

    #[test]
    fn a_3x2_rectangle_by_hand() {
        // Pixels x 1..=3, y 1..=2: area 6, centroid (2, 1.5), bbox [1,1,4,3].
        // Central moments: var x = 2/3, var y = 1/4, cov 0 -> major 4√(2/3), minor 4·½ = 2.
        let o = &objects(&[".....", ".###.", ".###.", "....."], ALL)[0];
        assert_eq!((o.area_px, o.bbox), (6, [1, 1, 4, 3]));
        assert_eq!((o.centroid_x, o.centroid_y), (2.0, 1.5));
        assert!((o.major_axis_px - 4.0 * (2.0f64 / 3.0).sqrt()).abs() < 1e-12);
        assert!((o.minor_axis_px - 2.0).abs() < 1e-12);
        assert!((o.eccentricity - (1.0f64 - 0.25 / (2.0 / 3.0)).sqrt()).abs() < 1e-12);
        assert_eq!(
            (o.mean_intensity, o.integrated_intensity, o.max_intensity),
            (100.0, 600.0, 100.0)
        );
        assert_eq!(o.area_um2, Some(1.5));
        // Every pixel is a border pixel. Corners (1,1): edge nbrs (2,1),(1,2) and corner
        // nbr (2,2) -> 1+4+10 = 15 -> 1. Middles (2,1): edge nbrs (1,1),(3,1),(2,2) and
        // corner nbrs (1,2),(3,2) -> 1+6+20 = 27 -> 1. Six pixels -> perimeter 6.
        assert!((o.perimeter_px - 6.0).abs() < 1e-12);
    }

    #[test]
    fn diagonal_line_uses_sqrt2_weights() {
        // Three pixels on a diagonal: ends have code 1+10 = 11 (weight 0),
        // the middle 1+20 = 21 (√2). Perimeter √2.
        let o = &objects(&["#..", ".#.", "..#"], ALL)[0];
        assert!((o.perimeter_px - std::f64::consts::SQRT_2).abs() < 1e-12);
        assert!(
            (o.eccentricity - 1.0).abs() < 1e-12,
            "a line is a degenerate ellipse"
        );
    }

    #[test]
    fn filters_renumber_in_raster_order() {
        let rows = ["##....#", "##.....", ".....##", "#....##"];
        assert_eq!(objects(&rows, ALL).len(), 4);
        let big = objects(
            &rows,
            ObjectFilter {
                min_area_px: 2,
                ..ALL
            },
        );
        assert_eq!(
            big.iter().map(|o| (o.label, o.area_px)).collect::<Vec<_>>(),
            vec![(1, 4), (2, 4)]
        );
        let inner = objects(
            &["......", ".##...", ".##..#", "......"],
            ObjectFilter {
                exclude_border: true,
                ..ALL
            },
        );
        assert_eq!(inner.len(), 1);
        // Pixel size 0.5 µm -> 4 px = 1 µm².
        let um = objects(
            &rows,
            ObjectFilter {
                min_area_um2: 0.5,
                max_area_um2: 0.9,
                ..ALL
            },
        );
        assert!(um.is_empty());
    }
}
