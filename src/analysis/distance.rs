//! Exact Euclidean distance transform of a binary mask (Felzenszwalb &
//! Huttenlocher 2012, "Distance transforms of sampled functions"): for every
//! pixel, the squared distance to the nearest background pixel, as an integer.
//!
//! Two 1-D passes, both linear in the number of pixels: down the columns the
//! distance to the nearest background pixel of the column (two sweeps), then
//! along each row the lower envelope of the parabolas `g(q)² + (x - q)²`.
//!
//! Pixels outside the given rectangle are **not** background: only the mask's
//! own `false` pixels count, as in `scipy.ndimage.distance_transform_edt`. An
//! object cut by the frame's edge therefore keeps its largest distances at the
//! edge, as if it went on beyond it. What the distances are used for (the
//! splitting of touching objects) is [`crate::analysis::split`]'s.

/// The value of a pixel with no background pixel anywhere in its rectangle,
/// and the cap of distances too large for `u32` (beyond 46,340 pixels).
pub const NO_BACKGROUND: u32 = u32::MAX;

const INF: u64 = u64::MAX;
/// A column with no background pixel (saturating additions keep it).
const COL_INF: u32 = u32::MAX;

/// Squared Euclidean distance from each pixel of a `width × height` mask
/// (row-major, `true` = object) to the nearest `false` pixel; 0 on background.
///
/// Pixels outside the rectangle are not background. When the mask has no
/// background pixel at all every value is [`NO_BACKGROUND`]. A `mask` whose
/// length is not `width × height` gives an empty vector.
///
/// ```
/// use framewarden::analysis::distance::squared_edt;
/// // A 3 x 5 block in a 5 x 7 frame with a background ring: the centre is
/// // 2 rows from the top and bottom background, so 2² = 4.
/// let mut mask = vec![false; 7 * 5];
/// for y in 1..4 {
///     for x in 1..6 {
///         mask[y * 7 + x] = true;
///     }
/// }
/// let d = squared_edt(&mask, 7, 5);
/// assert_eq!(&d[2 * 7..3 * 7], &[0, 1, 4, 4, 4, 1, 0]);
/// ```
pub fn squared_edt(mask: &[bool], width: usize, height: usize) -> Vec<u32> {
    if mask.len() != width.saturating_mul(height) {
        return Vec::new();
    }
    let mut out = vec![0u32; mask.len()];
    let mut scratch = Scratch::default();
    squared_edt_into(mask, width, height, &mut out, &mut scratch);
    out
}

/// Reusable buffers of [`squared_edt_into`], so a caller transforming many
/// small crops allocates once.
#[derive(Debug, Default)]
pub struct Scratch {
    /// Column distances (not squared) per pixel, [`COL_INF`] for none.
    column: Vec<u32>,
    /// One row of squared column distances.
    row: Vec<u64>,
    /// Sites of the lower envelope.
    sites: Vec<usize>,
    /// Where each envelope site starts being the lowest, as a fraction.
    starts: Vec<(i64, i64)>,
}

/// [`squared_edt`] into `out` (of length `width × height`, like `mask`),
/// with buffers kept in `scratch`. Mismatched lengths leave `out` untouched.
pub fn squared_edt_into(
    mask: &[bool],
    width: usize,
    height: usize,
    out: &mut [u32],
    scratch: &mut Scratch,
) {
    let n = width.saturating_mul(height);
    if mask.len() != n || out.len() != n || n == 0 {
        return;
    }
    // Pass 1, down the columns: distance (in rows) to the nearest background
    // pixel of the same column, INF when the column has none. Row by row, so
    // memory is read in order.
    let col = &mut scratch.column;
    col.clear();
    col.resize(n, COL_INF);
    for (x, c) in col[..width].iter_mut().enumerate() {
        *c = if mask[x] { COL_INF } else { 0 };
    }
    for i in width..n {
        col[i] = if mask[i] {
            col[i - width].saturating_add(1)
        } else {
            0
        };
    }
    for i in (0..n - width).rev() {
        col[i] = col[i].min(col[i + width].saturating_add(1));
    }
    // Pass 2, along the rows: d(x) = min over q of g(q)² + (x - q)².
    scratch.row.resize(width, INF);
    scratch.sites.resize(width, 0);
    scratch.starts.resize(width, (0, 1));
    for y in 0..height {
        let cells = &col[y * width..(y + 1) * width];
        for (f, &g) in scratch.row.iter_mut().zip(cells) {
            *f = if g == COL_INF {
                INF
            } else {
                u64::from(g) * u64::from(g)
            };
        }
        lower_envelope(
            &scratch.row,
            &mut out[y * width..(y + 1) * width],
            &mut scratch.sites,
            &mut scratch.starts,
        );
    }
}

/// `a <= b` for fractions with positive denominators, by cross-multiplying
/// (in 128 bits only when 64 would overflow).
#[inline]
fn at_or_below(a: (i64, i64), b: (i64, i64)) -> bool {
    match (a.0.checked_mul(b.1), b.0.checked_mul(a.1)) {
        (Some(l), Some(r)) => l <= r,
        _ => i128::from(a.0) * i128::from(b.1) <= i128::from(b.0) * i128::from(a.1),
    }
}

/// `out[x] = min over q of f[q] + (x - q)²` (INF entries are no sites),
/// saturated to `u32`; [`NO_BACKGROUND`] everywhere when every `f` is INF.
///
/// The envelope is kept as sites `v[0..=k]`: site `v[j]` is lowest from the
/// crossing `z[j]` with the site before it on. Two parabolas from sites
/// `p < q` cross at `s = ((f[q] + q²) - (f[p] + p²)) / (2(q - p))`, kept as
/// the fraction (numerator, denominator > 0) and compared by
/// cross-multiplying: exact integer arithmetic, so ties cannot be misjudged,
/// and no division.
fn lower_envelope(f: &[u64], out: &mut [u32], v: &mut [usize], z: &mut [(i64, i64)]) {
    // z[j] <= x, for the fraction z[j] = (num, den), den > 0.
    let at_or_before = |z: (i64, i64), x: i64| z.0 <= x * z.1;
    let mut k: usize = 0; // number of sites in the envelope
    for (q, &fq) in f.iter().enumerate() {
        if fq == INF {
            continue;
        }
        let (qi, fqi) = (q as i64, fq as i64);
        loop {
            if k == 0 {
                v[0] = q;
                z[0] = (i64::MIN, 1);
                k = 1;
                break;
            }
            let p = v[k - 1];
            let (pi, fpi) = (p as i64, f[p] as i64);
            let s = ((fqi + qi * qi) - (fpi + pi * pi), 2 * (qi - pi));
            let zk = z[k - 1];
            // s <= z[k-1]: q is as low as p wherever p was lowest.
            if k > 1 && at_or_below(s, zk) {
                k -= 1;
                continue;
            }
            v[k] = q;
            z[k] = s;
            k += 1;
            break;
        }
    }
    if k == 0 {
        out.fill(NO_BACKGROUND);
        return;
    }
    let mut j = 0;
    for (x, o) in out.iter_mut().enumerate() {
        let xi = x as i64;
        while j + 1 < k && at_or_before(z[j + 1], xi) {
            j += 1;
        }
        let dx = xi - v[j] as i64;
        let d = f[v[j]] + (dx * dx) as u64;
        *o = u32::try_from(d).unwrap_or(NO_BACKGROUND);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn mask(rows: &[&str]) -> (Vec<bool>, usize, usize) {
        let w = rows[0].len();
        let m = rows
            .iter()
            .flat_map(|r| r.bytes().map(|b| b == b'#'))
            .collect();
        (m, w, rows.len())
    }

    /// Brute force: min over every background pixel of the squared distance.
    fn brute(m: &[bool], w: usize, h: usize) -> Vec<u32> {
        let bg: Vec<(i64, i64)> = (0..w * h)
            .filter(|&i| !m[i])
            .map(|i| ((i % w) as i64, (i / w) as i64))
            .collect();
        (0..w * h)
            .map(|i| {
                let (x, y) = ((i % w) as i64, (i / w) as i64);
                bg.iter()
                    .map(|&(bx, by)| ((bx - x).pow(2) + (by - y).pow(2)) as u32)
                    .min()
                    .unwrap_or(NO_BACKGROUND)
            })
            .collect()
    }

    #[test]
    fn a_single_background_pixel_gives_squared_distances_to_it() {
        // Background only at (x=1, y=0) of a 4 x 3 frame: d² = (x-1)² + y².
        let (m, w, h) = mask(&["#.##", "####", "####"]);
        let d = squared_edt(&m, w, h);
        assert_eq!(d, vec![1, 0, 1, 4, 2, 1, 2, 5, 5, 4, 5, 8]);
    }

    #[test]
    fn outside_the_frame_is_not_background() {
        // A full row with background only on the right: d² = (3 - x)², so the
        // left edge is 3² = 9 away, not 1 (the outside does not count).
        let (m, w, h) = mask(&["###."]);
        assert_eq!(squared_edt(&m, w, h), vec![9, 4, 1, 0]);
    }

    #[test]
    fn a_plus_shaped_hole_and_diagonals() {
        // 5 x 5 of object with background at the centre (2,2): the corners are
        // 2² + 2² = 8 away, edge midpoints 2² = 4, diagonal neighbours 2.
        let (m, w, h) = mask(&["#####", "#####", "##.##", "#####", "#####"]);
        let d = squared_edt(&m, w, h);
        assert_eq!(
            d,
            vec![8, 5, 4, 5, 8, 5, 2, 1, 2, 5, 4, 1, 0, 1, 4, 5, 2, 1, 2, 5, 8, 5, 4, 5, 8]
        );
    }

    #[test]
    fn no_background_at_all() {
        let (m, w, h) = mask(&["##", "##"]);
        assert_eq!(squared_edt(&m, w, h), vec![NO_BACKGROUND; 4]);
        assert!(squared_edt(&m, 3, 3).is_empty());
        assert!(squared_edt(&[], 0, 0).is_empty());
    }

    #[test]
    fn matches_brute_force_on_pseudo_random_masks() {
        // A fixed linear congruential sequence: masks of several densities.
        let mut s: u64 = 12345;
        for case in 0..60 {
            let (w, h) = (1 + case % 13, 1 + (case * 7) % 11);
            let density = 40 + (case % 6) as u64 * 10;
            let m: Vec<bool> = (0..w * h)
                .map(|_| {
                    s = s
                        .wrapping_mul(6364136223846793005)
                        .wrapping_add(1442695040888963407);
                    (s >> 33) % 100 < density
                })
                .collect();
            assert_eq!(squared_edt(&m, w, h), brute(&m, w, h), "case {case}");
        }
    }
}
