//! Run-based connected-component labelling with hole filling.
//!
//! Each row is cut into maximal runs of foreground (`pixel > t`) and, when holes
//! are filled, background. Runs are joined with a union-find: foreground under the
//! chosen connectivity, background under the complementary one. Background
//! components that do not touch the frame border are holes; each is merged with
//! every foreground component it touches, which is exactly "fill holes, then
//! label" (holes = background regions not connected to the border under the
//! complementary connectivity). Components are numbered in raster order of their
//! first pixel. Measurements are left to [`crate::analysis::measure`].
//!
//! The first pass over the pixels (cutting rows into runs and joining them with
//! the row above) is built twice, for the baseline CPU and with AVX2, and
//! chosen once per frame; the choice is left to [`crate::analysis::simd`].

use crate::analysis::params::Connectivity;
use crate::analysis::simd::multiversion;

/// A horizontal run `[x0, x1)` on row `y`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Run {
    /// Row (0-based).
    pub y: u32,
    /// First column of the run (inclusive).
    pub x0: u32,
    /// Column after the run's last pixel (exclusive).
    pub x1: u32,
}

/// The labelled components of one mask, as runs.
#[derive(Debug, Clone, Default)]
pub struct Components {
    /// Runs of every component (foreground and filled holes), raster order.
    pub runs: Vec<Run>,
    /// Component index (0-based, raster order of first pixel) of each run.
    pub component: Vec<u32>,
    /// Number of components.
    pub count: usize,
}

impl Components {
    /// The components as a `width × height` label image in raster order:
    /// kept components (those for which `keep(index)` is true, `index` being
    /// the 0-based component number) are numbered `1..=n` in the order of
    /// their first pixel, everything else is 0.
    ///
    /// With `keep` testing the same area (and border) rule, the numbers are
    /// the `label`s that [`crate::analysis::measure::measure`] gives.
    pub fn label_image(
        &self,
        width: usize,
        height: usize,
        keep: impl Fn(usize) -> bool,
    ) -> Vec<u32> {
        let mut number = vec![0u32; self.count];
        let mut next = 0;
        for (k, n) in number.iter_mut().enumerate() {
            if keep(k) {
                next += 1;
                *n = next;
            }
        }
        let mut image = vec![0u32; width * height];
        for (run, &k) in self.runs.iter().zip(&self.component) {
            let l = number[k as usize];
            if l != 0 {
                let row = run.y as usize * width;
                image[row + run.x0 as usize..row + run.x1 as usize].fill(l);
            }
        }
        image
    }

    /// Pixels of each component, indexed by component number.
    pub fn areas(&self) -> Vec<u64> {
        let mut a = vec![0u64; self.count];
        for (r, &k) in self.runs.iter().zip(&self.component) {
            a[k as usize] += u64::from(r.x1 - r.x0);
        }
        a
    }
}

#[derive(Debug, PartialEq)]
struct UnionFind {
    parent: Vec<u32>,
}

impl UnionFind {
    fn find(&mut self, mut i: u32) -> u32 {
        while self.parent[i as usize] != i {
            let p = self.parent[i as usize];
            self.parent[i as usize] = self.parent[p as usize];
            i = p;
        }
        i
    }

    fn union(&mut self, a: u32, b: u32) {
        let (ra, rb) = (self.find(a), self.find(b));
        // The smaller index (earlier in raster order) becomes the root.
        match ra.cmp(&rb) {
            std::cmp::Ordering::Less => self.parent[rb as usize] = ra,
            std::cmp::Ordering::Greater => self.parent[ra as usize] = rb,
            std::cmp::Ordering::Equal => {}
        }
    }
}

/// Labels the foreground `pixels > threshold` of a `width × height` image.
///
/// Under [`Connectivity::Eight`] diagonal neighbours join. With `fill_holes`,
/// enclosed background is added to the component that encloses it.
///
/// ```
/// use framewarden::analysis::{label::label, Connectivity};
/// // A ring with a hole, and a diagonal pair: 8-connected, filled.
/// let img: Vec<u16> = vec![
///     9, 9, 9, 0, 0, 0,
///     9, 0, 9, 0, 0, 9,
///     9, 9, 9, 0, 9, 0,
/// ];
/// let c = label(&img, 6, 3, 0, Connectivity::Eight, true);
/// assert_eq!(c.count, 2); // the ring (9 px once filled) and the diagonal pair
/// let area0: u32 = c.runs.iter().zip(&c.component).filter(|(_, &k)| k == 0).map(|(r, _)| r.x1 - r.x0).sum();
/// assert_eq!(area0, 9);
/// // 4-connected: the pair splits in two.
/// assert_eq!(label(&img, 6, 3, 0, Connectivity::Four, true).count, 3);
/// ```
pub fn label(
    pixels: &[u16],
    width: usize,
    height: usize,
    threshold: u16,
    connectivity: Connectivity,
    fill_holes: bool,
) -> Components {
    debug_assert_eq!(pixels.len(), width * height);
    let Scan {
        runs,
        mut is_fg,
        mut uf,
        contacts,
    } = scan(
        pixels,
        width,
        height,
        threshold,
        connectivity == Connectivity::Eight,
        fill_holes,
    );

    if fill_holes {
        // Background components touching the border are "outside"; the rest are holes.
        let mut outside = vec![false; runs.len()];
        for (id, r) in runs.iter().enumerate() {
            if !is_fg[id]
                && (r.y == 0 || r.y as usize == height - 1 || r.x0 == 0 || r.x1 as usize == width)
            {
                let root = uf.find(id as u32);
                outside[root as usize] = true;
            }
        }
        let is_outside = |uf: &mut UnionFind, id: u32| outside[uf.find(id) as usize];
        let holes: Vec<(u32, u32)> = contacts
            .into_iter()
            .filter(|&(_, bg)| !is_outside(&mut uf, bg))
            .collect();
        // Decide "outside" before any merge, then merge each hole with its surroundings.
        let hole_runs: Vec<bool> = (0..runs.len() as u32)
            .map(|id| !is_fg[id as usize] && !is_outside(&mut uf, id))
            .collect();
        for (fg, bg) in holes {
            uf.union(fg, bg);
        }
        for (id, hole) in hole_runs.into_iter().enumerate() {
            is_fg[id] = is_fg[id] || hole;
        }
    }

    // Number components in raster order of their first run and keep only
    // foreground (and filled-hole) runs.
    let mut number = vec![u32::MAX; runs.len()];
    let mut out = Components::default();
    for (id, run) in runs.iter().enumerate() {
        if !is_fg[id] {
            continue;
        }
        let root = uf.find(id as u32) as usize;
        if number[root] == u32::MAX {
            number[root] = out.count as u32;
            out.count += 1;
        }
        out.runs.push(*run);
        out.component.push(number[root]);
    }
    out
}

/// What the first pass of [`label`] leaves: every kept run, its kind, the
/// union-find after joining runs along and across rows, and the
/// (foreground, background) pairs of runs that touch 4-wise.
#[derive(Debug, PartialEq)]
struct Scan {
    runs: Vec<Run>,
    is_fg: Vec<bool>,
    uf: UnionFind,
    contacts: Vec<(u32, u32)>,
}

multiversion! {
    /// The first pass of [`label`]: cuts each row into maximal runs of
    /// foreground (`> threshold`) and, with `fill_holes`, background, and joins
    /// each run with the runs of the row above it touches (foreground 8-wise
    /// when `fg8`, background the other way).
    fn scan(
        pixels: &[u16],
        width: usize,
        height: usize,
        threshold: u16,
        fg8: bool,
        fill_holes: bool,
    ) -> Scan {
        // Background uses the complementary connectivity.
        let bg8 = !fg8;
        let mut runs: Vec<Run> = Vec::new();
        let mut is_fg: Vec<bool> = Vec::new();
        let mut uf = UnionFind { parent: Vec::new() };
        // (foreground run, background run) pairs that touch 4-wise.
        let mut contacts: Vec<(u32, u32)> = Vec::new();
        let mut prev = 0..0usize;
        for y in 0..height {
            let row = &pixels[y * width..(y + 1) * width];
            let start = runs.len();
            let mut x = 0;
            while x < width {
                let fg = row[x] > threshold;
                let x0 = x;
                x = run_end(row, x, threshold, fg);
                if fg || fill_holes {
                    let id = runs.len() as u32;
                    runs.push(Run {
                        y: y as u32,
                        x0: x0 as u32,
                        x1: x as u32,
                    });
                    is_fg.push(fg);
                    uf.parent.push(id);
                    // Horizontal neighbours alternate kinds when both kinds are kept.
                    if fill_holes && id as usize > start {
                        let left = id - 1;
                        contacts.push(if fg { (id, left) } else { (left, id) });
                    }
                }
            }
            let cur = start..runs.len();
            // Join with the previous row: two pointers over runs sorted by x0.
            let mut i = prev.start;
            for j in cur.clone() {
                let b = runs[j];
                // Runs of the previous row that end more than one pixel left of b
                // cannot touch b or any later run of this row.
                while i < prev.end && runs[i].x1 < b.x0 {
                    i += 1;
                }
                let mut k = i;
                while k < prev.end && runs[k].x0 <= b.x1 {
                    let a = runs[k];
                    let overlap4 = a.x0 < b.x1 && b.x0 < a.x1;
                    match (is_fg[k], is_fg[j]) {
                        (true, true) if overlap4 || fg8 => uf.union(k as u32, j as u32),
                        (false, false) if overlap4 || bg8 => uf.union(k as u32, j as u32),
                        (true, false) if overlap4 => contacts.push((k as u32, j as u32)),
                        (false, true) if overlap4 => contacts.push((j as u32, k as u32)),
                        _ => {}
                    }
                    k += 1;
                }
            }
            prev = cur;
        }
        Scan {
            runs,
            is_fg,
            uf,
            contacts,
        }
    }
}

/// First index at or after `from` whose state (`> threshold`) differs from
/// `fg`, or `row.len()`. Whole blocks of one state are skipped with a
/// vectorised min/max, which is most of a sparse frame. Always inlined, so
/// [`scan`]'s AVX2 build has an AVX2 copy.
#[inline(always)]
fn run_end(row: &[u16], from: usize, threshold: u16, fg: bool) -> usize {
    const BLOCK: usize = 32;
    let mut x = from;
    while x + BLOCK <= row.len() {
        let block = &row[x..x + BLOCK];
        let uniform = if fg {
            block.iter().fold(u16::MAX, |m, &v| m.min(v)) > threshold
        } else {
            block.iter().fold(0, |m, &v| m.max(v)) <= threshold
        };
        if !uniform {
            break;
        }
        x += BLOCK;
    }
    while x < row.len() && (row[x] > threshold) == fg {
        x += 1;
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::simd::{report_no_avx2, test_inputs};
    use proptest::prelude::*;

    fn areas(c: &Components) -> Vec<u32> {
        let mut a = vec![0; c.count];
        for (r, &k) in c.runs.iter().zip(&c.component) {
            a[k as usize] += r.x1 - r.x0;
        }
        a
    }

    fn img(rows: &[&str]) -> (Vec<u16>, usize, usize) {
        let w = rows[0].len();
        let px = rows
            .iter()
            .flat_map(|r| r.bytes().map(|b| u16::from(b == b'#')))
            .collect();
        (px, w, rows.len())
    }

    #[test]
    fn diagonal_joins_only_under_8_connectivity() {
        let (px, w, h) = img(&["#..", ".#.", "..#"]);
        assert_eq!(label(&px, w, h, 0, Connectivity::Eight, false).count, 1);
        assert_eq!(label(&px, w, h, 0, Connectivity::Four, false).count, 3);
    }

    #[test]
    fn numbering_follows_the_first_pixel_in_raster_order() {
        // The U's first pixel (0,0) precedes the dot (3,0); its arms meet on row 2.
        let (px, w, h) = img(&["#.#.#", "#.#..", "###.."]);
        let c = label(&px, w, h, 0, Connectivity::Eight, false);
        assert_eq!(c.count, 2);
        assert_eq!(areas(&c), vec![7, 1]);
    }

    #[test]
    fn holes_are_filled_and_border_background_is_not() {
        // A closed ring (hole of 1 px) and an open ring (its gap reaches the border).
        let (px, w, h) = img(&["###.###", "#.#.#..", "###.###"]);
        let c = label(&px, w, h, 0, Connectivity::Eight, true);
        assert_eq!(areas(&c), vec![9, 7]);
        assert_eq!(
            areas(&label(&px, w, h, 0, Connectivity::Eight, false)),
            vec![8, 7]
        );
    }

    #[test]
    fn a_hole_leaking_diagonally_is_a_hole_for_8_connected_objects_only() {
        // The centre's only exit is a diagonal gap: a hole when background is
        // 4-connected (objects 8-connected), not a hole the other way round.
        let (px, w, h) = img(&["####.", "#..#.", "#.#..", "###.."]);
        assert_eq!(
            areas(&label(&px, w, h, 0, Connectivity::Eight, true)),
            vec![14]
        );
        let four = label(&px, w, h, 0, Connectivity::Four, true);
        assert_eq!(areas(&four).iter().sum::<u32>(), 11);
    }

    #[test]
    fn an_object_inside_a_hole_merges_with_its_ring() {
        let (px, w, h) = img(&["#####", "#...#", "#.#.#", "#...#", "#####"]);
        let c = label(&px, w, h, 0, Connectivity::Eight, true);
        assert_eq!(areas(&c), vec![25]);
        assert_eq!(label(&px, w, h, 0, Connectivity::Eight, false).count, 2);
    }

    #[test]
    fn label_image_numbers_kept_components_in_raster_order() {
        // Components in raster order of their first pixel: 0 = the U (7 px,
        // first pixel (0,0)), 1 = the dot at (4,0) (1 px), 2 = the bar in
        // column 4, rows 2-3 (2 px). Keeping areas >= 2 drops the dot.
        let (px, w, h) = img(&["#.#.#", "#.#..", "###.#", "....#"]);
        let c = label(&px, w, h, 0, Connectivity::Four, false);
        assert_eq!(c.areas(), vec![7, 1, 2]);
        let area = c.areas();
        #[rustfmt::skip]
        let want: Vec<u32> = vec![
            1, 0, 1, 0, 0,
            1, 0, 1, 0, 0,
            1, 1, 1, 0, 2,
            0, 0, 0, 0, 2,
        ];
        assert_eq!(c.label_image(w, h, |k| area[k] >= 2), want);
        // Keeping all: the dot is 2 and the bar 3.
        let all = c.label_image(w, h, |_| true);
        assert_eq!((all[4], all[14], all[19]), (2, 3, 3));
        // Keeping none: all background.
        assert!(c.label_image(w, h, |_| false).iter().all(|&l| l == 0));
    }

    #[test]
    fn threshold_is_strictly_greater() {
        let px = vec![5u16, 6, 5, 6];
        assert_eq!(
            areas(&label(&px, 4, 1, 5, Connectivity::Eight, false)),
            vec![1, 1]
        );
        assert_eq!(label(&px, 4, 1, 6, Connectivity::Eight, false).count, 0);
    }

    /// `(width, height, threshold, pixels)` with rows of every awkward length
    /// and values on both sides of the threshold and right at it.
    fn images() -> impl Strategy<Value = (usize, usize, u16, Vec<u16>)> {
        (test_inputs::lengths(), 0usize..6, test_inputs::thresholds()).prop_flat_map(|(w, h, t)| {
            (
                Just(w),
                Just(h),
                Just(t),
                test_inputs::pixels_near(t, w * h),
            )
        })
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 500, ..ProptestConfig::default() })]

        #[test]
        fn scan_avx2_build_matches_the_portable_one(
            (w, h, t, px) in images(),
            fg8 in any::<bool>(),
            fill_holes in any::<bool>(),
        ) {
            let portable = scan::portable(&px, w, h, t, fg8, fill_holes);
            match scan::avx2(&px, w, h, t, fg8, fill_holes) {
                Some(avx2) => prop_assert_eq!(avx2, portable),
                None => report_no_avx2("label::scan"),
            }
        }

        #[test]
        fn scan_cuts_the_runs_a_pixel_by_pixel_walk_cuts((w, h, t, px) in images(), fill_holes in any::<bool>()) {
            let mut expected = Vec::new();
            for (y, row) in px.chunks_exact(w.max(1)).take(h).enumerate() {
                let mut x0 = 0;
                for x in 1..=w {
                    if x == w || (row[x] > t) != (row[x0] > t) {
                        if fill_holes || row[x0] > t {
                            expected.push((Run { y: y as u32, x0: x0 as u32, x1: x as u32 }, row[x0] > t));
                        }
                        x0 = x;
                    }
                }
            }
            let s = scan(&px, w, h, t, true, fill_holes);
            let got: Vec<(Run, bool)> = s.runs.into_iter().zip(s.is_fg).collect();
            prop_assert_eq!(got, expected);
        }
    }
}
