//! Splitting touching objects: marker-controlled watershed (Beucher & Meyer
//! 1993) of the distance map, restricted to each object.
//!
//! For each labelled object, the Euclidean distance of its pixels to the
//! nearest pixel outside it ([`crate::analysis::distance`]) rises towards the
//! middle of every round part. Markers are the maxima of that distance whose
//! dynamic (Soille's h-maxima: how far the distance must drop on the way to a
//! higher maximum) is at least `min_depth_px`. An object with one marker is
//! left exactly as labelled; one with several is flooded from its markers by
//! priority-queue flooding (Meyer 1991; Vincent & Soille 1991) in order of
//! decreasing distance.
//!
//! Choices, all exact integer arithmetic on squared distances:
//! - Distances: pixels outside the frame are not background (as in
//!   `scipy.ndimage.distance_transform_edt`), so an object cut by the frame's
//!   edge is treated as going on beyond it.
//! - A marker is one pixel: the first, in raster order, of the highest
//!   plateau of its basin. A maximum makes a marker of its own when, where
//!   its basin meets a basin with a higher top, it is at least
//!   `min_depth_px` above the meeting level (its dynamic) *and* at least
//!   `min_separation_px` from that higher top (Euclidean, pixel centres).
//!   The depth alone cannot tell a shallow neck between two nuclei from the
//!   pixel grid's bumps along one elongated or rough object; those bumps lie
//!   close together, so the separation rejects them and lets the depth be
//!   small (see `Split::DEFAULT_MIN_DEPTH_PX` and `benches/README.md`).
//! - Flooding pops the highest level first; among equal levels the pixel
//!   queued first (FIFO, markers queued in raster order). A pixel is queued at
//!   the lower of its own distance and the level of the pixel that queues it:
//!   the flood never climbs back up (Meyer's flooding; a pixel above the
//!   current level is not taken ahead of the others at that level). A pixel
//!   takes the label of the neighbour that queued it, i.e. the first basin to
//!   reach it. No watershed line is left: every object pixel belongs to
//!   exactly one piece, so the objects' union and total area are unchanged.
//! - Neighbours follow the labelling connectivity; each piece is connected.
//!
//! Measuring the pieces is [`crate::analysis::measure`]'s, choosing whether to
//! split at all is the caller's ([`crate::analysis::segment`]).

use std::cmp::Reverse;
use std::collections::BinaryHeap;

use crate::analysis::distance::{squared_edt_into, Scratch};
use crate::analysis::label::{Components, Run};
use crate::analysis::params::Connectivity;

const UNSET: u32 = u32::MAX;

/// Index offsets of a pixel's neighbours in an image `stride` pixels wide:
/// edge neighbours (up, left, right, down), then corners under 8-connectivity.
/// Used on padded images, whose border is never mask, so a mask pixel's
/// neighbours are always inside.
fn offsets(stride: usize, connectivity: Connectivity) -> Vec<isize> {
    let s = stride as isize;
    let mut o = vec![-s, -1, 1, s];
    if connectivity == Connectivity::Eight {
        o.extend([-s - 1, -s + 1, s - 1, s + 1]);
    }
    o
}

/// `values` of a `width × height` image inside a border of `fill`, one pixel
/// wide: `(width + 2) × (height + 2)`.
fn padded<T: Copy>(values: &[T], width: usize, height: usize, fill: T) -> Vec<T> {
    let pw = width + 2;
    let mut out = vec![fill; pw * (height + 2)];
    for y in 0..height {
        out[(y + 1) * pw + 1..(y + 1) * pw + 1 + width]
            .copy_from_slice(&values[y * width..(y + 1) * width]);
    }
    out
}

/// The unpadded index of padded index `i` (a pixel inside the border).
fn unpadded(i: usize, width: usize) -> usize {
    let pw = width + 2;
    (i / pw - 1) * width + (i % pw - 1)
}

fn find(parent: &mut [u32], mut i: u32) -> u32 {
    while parent[i as usize] != i {
        let p = parent[i as usize];
        parent[i as usize] = parent[p as usize];
        i = p;
    }
    i
}

/// The markers of a `width × height` image: a label image, 0 off the markers
/// and `1..=k` on the `k` marker pixels in raster order.
///
/// `sq` holds squared distances ([`crate::analysis::distance::squared_edt`]),
/// `mask` the object pixels. A marker is the top of a maximum of the distance
/// whose dynamic is at least `min_depth_px` (distances in pixels, not
/// squared) and whose top lies at least `min_separation_px` from the top of
/// the higher maximum its basin meets; every connected part of the mask gets
/// the marker of its highest maximum. `min_depth_px` should be positive: at 0
/// every pixel is a maximum of dynamic 0. Inputs of mismatched lengths give
/// an empty vector.
///
/// The dynamic is found by flooding down from the top (pixels by decreasing
/// distance, equal distances in raster order) with a union-find: where two
/// basins meet, the one with the lower top (the later one on a tie) ends, and
/// its dynamic is its top minus the meeting level.
///
/// ```
/// use framewarden::analysis::{distance::squared_edt, split::markers, Connectivity};
/// // Two 3 x 3 squares joined by a one-pixel neck on the middle row: each
/// // square's centre is 2 away from the background (squared 4); the neck is 1
/// // (squared 1). Dynamic of the second centre: 2 - 1 = 1 pixel.
/// let rows = [".........", ".###.###.", ".#######.", ".###.###.", "........."];
/// let mask: Vec<bool> = rows.iter().flat_map(|r| r.bytes().map(|b| b == b'#')).collect();
/// let d = squared_edt(&mask, 9, 5);
/// let m = markers(&d, &mask, 9, 5, Connectivity::Eight, 1.0, 0.0);
/// assert_eq!((m[2 * 9 + 2], m[2 * 9 + 6]), (1, 2));
/// assert_eq!(markers(&d, &mask, 9, 5, Connectivity::Eight, 1.5, 0.0).iter().max(), Some(&1));
/// // The centres are 4 px apart: a separation of 4 keeps both, 4.5 one.
/// assert_eq!(markers(&d, &mask, 9, 5, Connectivity::Eight, 1.0, 4.0).iter().max(), Some(&2));
/// assert_eq!(markers(&d, &mask, 9, 5, Connectivity::Eight, 1.0, 4.5).iter().max(), Some(&1));
/// ```
pub fn markers(
    sq: &[u32],
    mask: &[bool],
    width: usize,
    height: usize,
    connectivity: Connectivity,
    min_depth_px: f64,
    min_separation_px: f64,
) -> Vec<u32> {
    let n = width.saturating_mul(height);
    if sq.len() != n || mask.len() != n {
        return Vec::new();
    }
    let mut out = vec![0u32; n];
    let mut work = Work::default();
    let (psq, pmask) = (
        padded(sq, width, height, 0),
        padded(mask, width, height, false),
    );
    let offsets = offsets(width + 2, connectivity);
    let rule = MarkerRule {
        min_depth_px,
        min_separation_px,
        stride: width + 2,
    };
    let peaks = marker_pixels(&psq, &pmask, &offsets, &rule, false, &mut work);
    for (k, &p) in peaks.iter().enumerate() {
        out[unpadded(p as usize, width)] = k as u32 + 1;
    }
    out
}

/// Buffers reused from one object to the next.
#[derive(Default)]
struct Work {
    order: Vec<u32>,
    counts: Vec<u32>,
    parent: Vec<u32>,
    peak: Vec<u32>,
    peaks: Vec<u32>,
    heap: BinaryHeap<(u32, Reverse<u64>, u32)>,
}

/// The mask's pixels into `work.order` by decreasing distance, equal
/// distances in raster order: a counting sort when the distances are small
/// beside the pixel count (always, for objects), else a comparison sort.
fn sort_by_decreasing_distance(sq: &[u32], mask: &[bool], work: &mut Work) {
    work.order.clear();
    let (mut count, mut max) = (0usize, 0u32);
    for (&d, &m) in sq.iter().zip(mask) {
        if m {
            count += 1;
            max = max.max(d);
        }
    }
    if (max as usize) > 4 * count + 1024 {
        let mut keys: Vec<u64> = (0..sq.len())
            .filter(|&i| mask[i])
            .map(|i| (u64::from(!sq[i]) << 32) | i as u64)
            .collect();
        keys.sort_unstable();
        work.order
            .extend(keys.iter().map(|&k| (k & 0xffff_ffff) as u32));
        return;
    }
    // Bucket `max - d` holds distance d; starts are prefix sums.
    let starts = &mut work.counts;
    starts.clear();
    starts.resize(max as usize + 2, 0);
    for (&d, &m) in sq.iter().zip(mask) {
        if m {
            starts[(max - d) as usize + 1] += 1;
        }
    }
    for b in 1..starts.len() {
        starts[b] += starts[b - 1];
    }
    work.order.resize(count, 0);
    for (i, (&d, &m)) in sq.iter().zip(mask).enumerate() {
        if m {
            let slot = &mut starts[(max - d) as usize];
            work.order[*slot as usize] = i as u32;
            *slot += 1;
        }
    }
}

/// The one marker of a connected mask when no second one can exist, found
/// without sorting; `None` when there may be more (then the full search runs).
///
/// Every object pixel is at least 1 from the background, so a maximum below
/// the global one with top `t` has dynamic at most `sqrt(t) - 1`: only tops
/// `t >= (1 + min_depth_px)²` can be markers, and each such maximum has a
/// pixel at least as high as all its neighbours. With no such pixel below
/// the global top and the global top one connected plateau, the only marker
/// is that plateau's first pixel, as the full search would find.
fn single_marker(sq: &[u32], mask: &[bool], offsets: &[isize], min_depth_px: f64) -> Option<u32> {
    let top = sq
        .iter()
        .zip(mask)
        .filter(|(_, &m)| m)
        .map(|(&d, _)| d)
        .max()?;
    // Rounded down (and a hair lower), so a top that might qualify is kept.
    let need = ((1.0 + min_depth_px.max(0.0)).powi(2) * (1.0 - 1e-12)).floor();
    let need = if need >= f64::from(u32::MAX) {
        u32::MAX
    } else {
        need as u32
    };
    if has_high_local_maximum(sq, mask, offsets, need, top) {
        return None;
    }
    let mut plateau: Vec<u32> = Vec::new();
    for (i, (&d, &m)) in sq.iter().zip(mask).enumerate() {
        if m && d == top {
            if plateau.len() == 64 {
                return None;
            }
            plateau.push(i as u32);
        }
    }
    // The plateau is connected: grow it from its first pixel.
    let mut reached = vec![false; plateau.len()];
    reached[0] = true;
    let mut stack = vec![0usize];
    while let Some(j) = stack.pop() {
        for &o in offsets {
            let q = (plateau[j] as isize + o) as u32;
            if let Ok(k) = plateau.binary_search(&q) {
                if !reached[k] {
                    reached[k] = true;
                    stack.push(k);
                }
            }
        }
    }
    reached.iter().all(|&r| r).then_some(plateau[0])
}

/// True when some mask pixel below the top but at least `need` is at least
/// as high as all its mask neighbours (a possible second marker).
fn has_high_local_maximum(
    sq: &[u32],
    mask: &[bool],
    offsets: &[isize],
    need: u32,
    top: u32,
) -> bool {
    (0..sq.len()).any(|i| {
        let d = sq[i];
        mask[i]
            && d >= need
            && d < top
            && offsets.iter().all(|&o| {
                let q = (i as isize + o) as usize;
                !mask[q] || sq[q] <= d
            })
    })
}

/// What makes a maximum a marker of its own, for images `stride` pixels wide.
struct MarkerRule {
    min_depth_px: f64,
    min_separation_px: f64,
    stride: usize,
}

impl MarkerRule {
    /// True when the top `lower` (squared distance `sq[lower]`), whose basin
    /// meets the basin of the higher top `higher` at squared distance
    /// `level`, is a marker.
    fn keeps(&self, sq: &[u32], lower: u32, higher: u32, level: u32) -> bool {
        let depth = f64::from(sq[lower as usize]).sqrt() - f64::from(level).sqrt();
        let at = |i: u32| {
            (
                (i as usize / self.stride) as f64,
                (i as usize % self.stride) as f64,
            )
        };
        let ((y0, x0), (y1, x1)) = (at(lower), at(higher));
        depth >= self.min_depth_px && (y0 - y1).hypot(x0 - x1) >= self.min_separation_px
    }
}

/// The marker pixels of [`markers`], in raster order.
/// `sq` and `mask` are padded (the border is not mask); `offsets` from
/// [`offsets`] for their stride. Indices returned are padded ones.
///
/// `connected` says the mask is one connected object, which allows the
/// shortcut of [`single_marker`] (the separation only ever removes markers,
/// so one marker by depth alone is one marker).
fn marker_pixels(
    sq: &[u32],
    mask: &[bool],
    offsets: &[isize],
    rule: &MarkerRule,
    connected: bool,
    work: &mut Work,
) -> Vec<u32> {
    if connected {
        if let Some(p) = single_marker(sq, mask, offsets, rule.min_depth_px) {
            return vec![p];
        }
    }
    let n = sq.len();
    sort_by_decreasing_distance(sq, mask, work);
    work.parent.clear();
    work.parent.resize(n, UNSET);
    work.peak.clear();
    work.peak.resize(n, UNSET);
    work.peaks.clear();
    for k in 0..work.order.len() {
        let p = work.order[k];
        work.parent[p as usize] = p;
        work.peak[p as usize] = p;
        let level = sq[p as usize];
        let (parent, peak, peaks) = (&mut work.parent, &mut work.peak, &mut work.peaks);
        // The root of p's basin; p alone until it meets a neighbour.
        let mut rp = p;
        for &o in offsets {
            let q = (p as isize + o) as usize;
            if parent[q] == UNSET {
                continue;
            }
            let rq = find(parent, q as u32);
            if rq == rp {
                continue;
            }
            if rp == p {
                // p alone joins the basin: its own top is p, which the
                // basin's top (reached earlier) beats; its dynamic is 0.
                parent[p as usize] = rq;
                rp = rq;
                continue;
            }
            let (tp, tq) = (peak[rp as usize], peak[rq as usize]);
            // The higher top survives; on equal tops the one reached first
            // (earlier in the order: smaller index) does.
            let p_wins = (Reverse(sq[tp as usize]), tp) < (Reverse(sq[tq as usize]), tq);
            let (win, lose) = if p_wins { (rp, rq) } else { (rq, rp) };
            let top = peak[lose as usize];
            if rule.keeps(sq, top, peak[win as usize], level) {
                peaks.push(top);
            }
            parent[lose as usize] = win;
            rp = win;
        }
    }
    // Each connected part's last basin has no higher maximum: always a marker.
    for k in 0..work.order.len() {
        let p = work.order[k];
        if work.parent[p as usize] == p {
            work.peaks.push(work.peak[p as usize]);
        }
    }
    let mut peaks = std::mem::take(&mut work.peaks);
    peaks.sort_unstable();
    peaks
}

/// Floods the mask of a `width × height` image from labelled markers, by
/// decreasing squared distance `sq`, and returns the label image: every mask
/// pixel reachable from a marker takes its marker's label, others stay 0.
///
/// Markers off the mask are ignored. A pixel is queued at the lower of its
/// own distance and the level of the pixel that queues it; the highest level
/// pops first, ties first-in first-out with markers queued in raster order. A
/// pixel takes the label of the neighbour that queued it, so no watershed line
/// is left. Inputs of mismatched lengths give
/// an empty vector.
///
/// ```
/// use framewarden::analysis::{split::watershed, Connectivity};
/// // One row, markers at both ends (squared distances 1). The flood does
/// // not climb back: pixels 1 (squared 2) and 2 (squared 3) are queued at
/// // level 1, the level of the pixel queueing them, so all pop in queue
/// // order: the left marker (queues pixel 1), the right marker (queues
/// // pixel 3), pixel 1 (queues pixel 2), pixel 3 (nothing left to take).
/// let sq = [1, 2, 3, 1, 1];
/// let mask = [true; 5];
/// let labels = watershed(&sq, &mask, &[1, 0, 0, 0, 2], 5, 1, Connectivity::Four);
/// assert_eq!(labels, vec![1, 1, 1, 2, 2]);
/// ```
pub fn watershed(
    sq: &[u32],
    mask: &[bool],
    markers: &[u32],
    width: usize,
    height: usize,
    connectivity: Connectivity,
) -> Vec<u32> {
    let n = width.saturating_mul(height);
    if sq.len() != n || mask.len() != n || markers.len() != n {
        return Vec::new();
    }
    let masked: Vec<u32> = markers
        .iter()
        .zip(mask)
        .map(|(&m, &inside)| if inside { m } else { 0 })
        .collect();
    let mut labels = padded(&masked, width, height, 0);
    let (psq, pmask) = (
        padded(sq, width, height, 0),
        padded(mask, width, height, false),
    );
    let mut heap = BinaryHeap::new();
    flood(
        &psq,
        &pmask,
        &mut labels,
        &offsets(width + 2, connectivity),
        &mut heap,
    );
    (0..n)
        .map(|i| labels[(i / width + 1) * (width + 2) + i % width + 1])
        .collect()
}

/// The flooding of [`watershed`] on `labels` (markers in, labels out).
/// Padded inputs, as for [`marker_pixels`].
fn flood(
    sq: &[u32],
    mask: &[bool],
    labels: &mut [u32],
    offsets: &[isize],
    heap: &mut BinaryHeap<(u32, Reverse<u64>, u32)>,
) {
    heap.clear();
    let mut age = 0u64;
    for (i, &l) in labels.iter().enumerate() {
        if l != 0 {
            heap.push((sq[i], Reverse(age), i as u32));
            age += 1;
        }
    }
    while let Some((level, _, p)) = heap.pop() {
        let label = labels[p as usize];
        for &o in offsets {
            let q = (p as isize + o) as usize;
            if mask[q] && labels[q] == 0 {
                labels[q] = label;
                // The flood does not climb back: a pixel above the current
                // level waits at that level.
                heap.push((sq[q].min(level), Reverse(age), q as u32));
                age += 1;
            }
        }
    }
}

/// Splits every object of `components` (a `width × height` frame) that holds
/// two or more markers ([`markers`]: dynamic at least `min_depth_px`, at least
/// `min_separation_px` from the higher top) into one piece per marker, and numbers all objects again in raster order of their first
/// pixel. Objects with one marker keep their runs unchanged; when none splits
/// the input comes back as it was.
///
/// Each object is transformed on its bounding box widened by one pixel,
/// where every pixel inside the frame and not in the object is background:
/// the same distances as the whole frame's mask would give (the nearest
/// pixel outside the object is always background of the frame's mask, and
/// never beyond the widened box).
pub fn split(
    components: Components,
    width: usize,
    height: usize,
    connectivity: Connectivity,
    min_depth_px: f64,
    min_separation_px: f64,
) -> Components {
    let count = components.count;
    if count == 0 || width == 0 || height == 0 {
        return components;
    }
    // Runs grouped by component (counting sort).
    let mut first = vec![0usize; count + 1];
    for &k in &components.component {
        first[(k as usize).min(count - 1) + 1] += 1;
    }
    for k in 0..count {
        first[k + 1] += first[k];
    }
    let mut fill = first.clone();
    let mut order = vec![0u32; components.runs.len()];
    for (i, &k) in components.component.iter().enumerate() {
        let k = (k as usize).min(count - 1);
        order[fill[k]] = i as u32;
        fill[k] += 1;
    }

    let mut scratch = Scratch::default();
    let mut work = Work::default();
    let (mut mask, mut edt_mask) = (Vec::new(), Vec::new());
    let (mut sq, mut labels) = (Vec::new(), Vec::new());
    // The pieces of split objects: (object, piece runs with piece numbers).
    let mut pieces: Vec<(usize, Vec<(Run, u32)>)> = Vec::new();
    for k in 0..count {
        let runs = order[first[k]..first[k + 1]]
            .iter()
            .map(|&i| components.runs[i as usize]);
        let Some((x0, y0, x1, y1)) = runs.clone().fold(None, |b, r| {
            let (x0, y0, x1, y1) = b.unwrap_or((r.x0, r.y, r.x1, r.y + 1));
            Some((x0.min(r.x0), y0.min(r.y), x1.max(r.x1), y1.max(r.y + 1)))
        }) else {
            continue;
        };
        // No two pixels of an object whose box diagonal is shorter than the
        // separation are that far apart: one marker, nothing to transform.
        let diagonal = f64::from(x1 - x0 - 1).hypot(f64::from(y1 - y0 - 1));
        if diagonal < min_separation_px {
            continue;
        }
        // The box widened by one pixel on every side (`px = x - x0 + 1`);
        // the widening is background inside the frame and, for the distance
        // only, not background outside it. The flooding's mask is the
        // object, never on the box's border.
        let (bw, bh) = ((x1 - x0) as usize + 2, (y1 - y0) as usize + 2);
        mask.clear();
        mask.resize(bw * bh, false);
        for r in runs {
            let row = (r.y - y0 + 1) as usize * bw;
            mask[row + (r.x0 - x0 + 1) as usize..row + (r.x1 - x0 + 1) as usize].fill(true);
        }
        edt_mask.clear();
        edt_mask.extend_from_slice(&mask);
        for y in 0..bh {
            if x0 == 0 {
                edt_mask[y * bw] = true;
            }
            if x1 as usize >= width {
                edt_mask[y * bw + bw - 1] = true;
            }
        }
        if y0 == 0 {
            edt_mask[..bw].fill(true);
        }
        if y1 as usize >= height {
            edt_mask[(bh - 1) * bw..].fill(true);
        }
        sq.clear();
        sq.resize(bw * bh, 0);
        squared_edt_into(&edt_mask, bw, bh, &mut sq, &mut scratch);
        let offsets = offsets(bw, connectivity);
        let rule = MarkerRule {
            min_depth_px,
            min_separation_px,
            stride: bw,
        };
        let peaks = marker_pixels(&sq, &mask, &offsets, &rule, true, &mut work);
        if peaks.len() < 2 {
            continue;
        }
        labels.clear();
        labels.resize(bw * bh, 0);
        for (j, &p) in peaks.iter().enumerate() {
            labels[p as usize] = j as u32 + 1;
        }
        flood(&sq, &mask, &mut labels, &offsets, &mut work.heap);
        // The pieces' runs, row by row; a run ends where the label changes.
        let mut piece_runs = Vec::new();
        for y in 1..bh - 1 {
            let row = &labels[y * bw..(y + 1) * bw];
            let mut x = 1;
            while x < bw - 1 {
                let l = row[x];
                let start = x;
                while x < bw - 1 && row[x] == l {
                    x += 1;
                }
                if l != 0 {
                    let run = Run {
                        y: y0 + y as u32 - 1,
                        x0: x0 + start as u32 - 1,
                        x1: x0 + x as u32 - 1,
                    };
                    piece_runs.push((run, l - 1));
                }
            }
        }
        pieces.push((k, piece_runs));
    }
    if pieces.is_empty() {
        return components;
    }
    renumber(components, pieces)
}

/// The components with the split objects' runs replaced by their pieces',
/// runs in raster order and components numbered by their first pixel.
fn renumber(components: Components, pieces: Vec<(usize, Vec<(Run, u32)>)>) -> Components {
    let mut is_split = vec![false; components.count];
    for (k, _) in &pieces {
        is_split[*k] = true;
    }
    // Provisional ids: untouched objects keep theirs, pieces come after.
    let mut runs: Vec<(Run, u32)> = components
        .runs
        .iter()
        .zip(&components.component)
        .filter(|(_, &k)| !is_split.get(k as usize).copied().unwrap_or(false))
        .map(|(&r, &k)| (r, k))
        .collect();
    let mut next = components.count as u32;
    for (_, piece_runs) in pieces {
        let n = piece_runs.iter().map(|&(_, l)| l + 1).max().unwrap_or(0);
        runs.extend(piece_runs.into_iter().map(|(r, l)| (r, next + l)));
        next += n;
    }
    runs.sort_unstable_by_key(|&(r, _)| (r.y, r.x0));
    // Numbers in order of first appearance in raster order.
    let mut number = vec![UNSET; next as usize];
    let mut out = Components {
        runs: Vec::with_capacity(runs.len()),
        component: Vec::with_capacity(runs.len()),
        count: 0,
    };
    for (r, id) in runs {
        let slot = &mut number[id as usize];
        if *slot == UNSET {
            *slot = out.count as u32;
            out.count += 1;
        }
        out.runs.push(r);
        out.component.push(*slot);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::distance::squared_edt;
    use crate::analysis::label::label;

    fn image(rows: &[&str]) -> (Vec<u16>, usize, usize) {
        let w = rows[0].len();
        let px = rows
            .iter()
            .flat_map(|r| r.bytes().map(|b| u16::from(b == b'#')))
            .collect();
        (px, w, rows.len())
    }

    fn areas(c: &Components) -> Vec<u32> {
        let mut a = vec![0; c.count];
        for (r, &k) in c.runs.iter().zip(&c.component) {
            a[k as usize] += r.x1 - r.x0;
        }
        a
    }

    fn split_rows(rows: &[&str], conn: Connectivity, fill: bool, depth: f64) -> Components {
        let (px, w, h) = image(rows);
        split(label(&px, w, h, 0, conn, fill), w, h, conn, depth, 0.0)
    }

    /// Two 5 x 5 squares side by side, joined on their middle row by a
    /// two-pixel neck (columns 6 and 7), in a frame with a background ring.
    const TWO_SQUARES: [&str; 7] = [
        "..............",
        ".#####..#####.",
        ".#####..#####.",
        ".############.",
        ".#####..#####.",
        ".#####..#####.",
        "..............",
    ];

    #[test]
    fn two_squares_joined_by_a_neck_split_in_two() {
        // Each square's centre (3,3) and (10,3) is 3 from the background ring
        // (squared 9); the neck pixels (6,3) and (7,3) have background right
        // above and below: squared 1. Dynamic of the later centre: 3 - 1 = 2.
        // Flooding from the centres meets in the neck: (6,3) is reached from
        // the left square, (7,3) from the right (each is next to its own
        // square's edge pixel, distance 1, which pops before either neck
        // pixel is queued by the other side). Areas 25 + 1 and 25 + 1.
        for conn in [Connectivity::Four, Connectivity::Eight] {
            let c = split_rows(&TWO_SQUARES, conn, true, 2.0);
            assert_eq!(c.count, 2, "{conn:?}");
            assert_eq!(areas(&c), vec![26, 26], "{conn:?}");
            // Dynamic 2 < 2.5: no split.
            assert_eq!(split_rows(&TWO_SQUARES, conn, true, 2.5).count, 1);
        }
    }

    #[test]
    fn a_disc_stays_whole() {
        // A disc of radius 4 around (5,5): x² + y² <= 16, 9 + 2·7 + 2·7 + 2·5
        // + 2·1 = 49 pixels. The centre's nearest background pixel is
        // (1,4)-like at squared 4² + 1² = 17 (closer than (5,0) at 25). Its
        // 4-neighbours are at most 16 (e.g. (6,5) to (10,5)... to (9,4):
        // 3² + 1² = 10): one maximum, so one marker at any depth.
        let rows: Vec<String> = (0..11)
            .map(|y: i32| {
                (0..11)
                    .map(|x: i32| {
                        if (x - 5).pow(2) + (y - 5).pow(2) <= 16 {
                            '#'
                        } else {
                            '.'
                        }
                    })
                    .collect()
            })
            .collect();
        let rows: Vec<&str> = rows.iter().map(String::as_str).collect();
        let (px, w, h) = image(&rows);
        let mask: Vec<bool> = px.iter().map(|&p| p > 0).collect();
        let d = squared_edt(&mask, w, h);
        assert_eq!(d[5 * 11 + 5], 17);
        assert!(d[5 * 11 + 6] < 17 && d[4 * 11 + 5] < 17);
        for depth in [0.25, 1.0, 2.0] {
            let c = split_rows(&rows, Connectivity::Eight, true, depth);
            assert_eq!((c.count, areas(&c)), (1, vec![49]), "depth {depth}");
        }
    }

    #[test]
    fn a_dumbbell_splits_at_its_bar() {
        // Two 7 x 7 squares (columns 1-7 and 12-18, rows 1-7) joined on row 4
        // by a bar of 4 pixels (columns 8-11). The centres (4,4) and (15,4)
        // are 4 from the background (squared 16); the bar's pixels have
        // background right above: 1. Dynamic 4 - 1 = 3 >= 2: two pieces.
        // The squares' pixels next to the bar, (7,4) and (12,4), are squared
        // 2 ((8,3) is background) and pop before any pixel at 1, queueing
        // (8,4) left and (11,4) right; at level 1 those pop in that order
        // before (9,4) and (10,4), which they queue: 2 bar pixels each.
        let rows = [
            ".....................",
            ".#######....#######..",
            ".#######....#######..",
            ".#######....#######..",
            ".##################..",
            ".#######....#######..",
            ".#######....#######..",
            ".#######....#######..",
            ".....................",
        ];
        for conn in [Connectivity::Four, Connectivity::Eight] {
            let c = split_rows(&rows, conn, true, 2.0);
            assert_eq!((c.count, areas(&c)), (2, vec![51, 51]), "{conn:?}");
            // Dynamic 3 < 3.5: one object.
            assert_eq!(split_rows(&rows, conn, true, 3.5).count, 1);
        }
    }

    #[test]
    fn maxima_closer_than_the_separation_stay_one_object() {
        // The dumbbell above: its centres (4,4) and (15,4) are 11 px apart
        // (dynamic 3). At a separation of 11 it still splits; at 11.5 the
        // right square's maximum is too near the left one's and joins it.
        // TWO_SQUARES: centres (3,3) and (10,3), 7 px apart (dynamic 2).
        let dumbbell = [
            ".....................",
            ".#######....#######..",
            ".#######....#######..",
            ".#######....#######..",
            ".##################..",
            ".#######....#######..",
            ".#######....#######..",
            ".#######....#######..",
            ".....................",
        ];
        for (rows, apart) in [(&dumbbell[..], 11.0), (&TWO_SQUARES[..], 7.0)] {
            for conn in [Connectivity::Four, Connectivity::Eight] {
                let (px, w, h) = image(rows);
                let at = |sep: f64| split(label(&px, w, h, 0, conn, true), w, h, conn, 2.0, sep);
                assert_eq!(at(apart).count, 2, "{conn:?} at {apart}");
                assert_eq!(at(apart + 0.5).count, 1, "{conn:?} at {apart} + 0.5");
            }
        }
    }

    #[test]
    fn an_object_with_a_hole_splits_only_when_the_hole_is_kept() {
        // A 13 x 5 rectangle (columns 1-13, rows 1-5) with a one-pixel hole
        // at its centre (7,3).
        // Filled: the middle row is 3 from the top and bottom background
        // (squared 9) from (3,3) to (11,3), one plateau: one object, 65 px.
        // Kept (fill off): the hole is background, so (5,3) is 2 from it (4)
        // and the plateau at 9 breaks into (3,3)-(4,3) and (10,3)-(11,3).
        // Every path between them crosses column 7 (rows 1, 2, 4, 5), each
        // pixel there 1 from the hole or the outside: saddle 1, dynamic
        // 3 - 1 = 2. Two pieces of 64 px in all; each keeps its own half (30
        // px: columns 1-6 or 8-13), column 7's four pixels go to either.
        let rows = [
            "...............",
            ".#############.",
            ".#############.",
            ".######.######.",
            ".#############.",
            ".#############.",
            "...............",
        ];
        for conn in [Connectivity::Four, Connectivity::Eight] {
            let on = split_rows(&rows, conn, true, 2.0);
            assert_eq!((on.count, areas(&on)), (1, vec![65]), "{conn:?}");
            let off = split_rows(&rows, conn, false, 2.0);
            let a = areas(&off);
            assert_eq!((off.count, a.iter().sum::<u32>()), (2, 64), "{conn:?}");
            assert!(a[0] >= 30 && a[1] >= 30, "{a:?}");
            for r in off.runs.iter().zip(&off.component) {
                let (run, &k) = r;
                // Columns 1-6 are the first piece's, 8-13 the second's.
                assert!(k == 0 || run.x0 >= 7, "{run:?}");
                assert!(k == 1 || run.x1 <= 8, "{run:?}");
            }
        }
    }

    #[test]
    fn pieces_and_other_objects_are_numbered_by_first_pixel() {
        // A dot at (14,1) was numbered after the joined squares (first pixel
        // (1,1)); the right piece's first pixel (8,1) comes before it.
        let rows = [
            "...............",
            ".#####..#####.#",
            ".#####..#####..",
            ".############..",
            ".#####..#####..",
            ".#####..#####..",
            "...............",
        ];
        let c = split_rows(&rows, Connectivity::Eight, true, 2.0);
        assert_eq!(c.count, 3);
        assert_eq!(areas(&c), vec![26, 26, 1]);
        // Runs stay in raster order.
        assert!(c
            .runs
            .windows(2)
            .all(|w| (w[0].y, w[0].x0) < (w[1].y, w[1].x0)));
    }

    #[test]
    fn whole_frame_and_per_object_agree() {
        // The per-object crops give the same pieces as the whole frame's
        // markers and flooding.
        let (px, w, h) = image(&TWO_SQUARES);
        let mask: Vec<bool> = px.iter().map(|&p| p > 0).collect();
        let d = squared_edt(&mask, w, h);
        let m = markers(&d, &mask, w, h, Connectivity::Eight, 2.0, 0.0);
        let l = watershed(&d, &mask, &m, w, h, Connectivity::Eight);
        let c = split_rows(&TWO_SQUARES, Connectivity::Eight, true, 2.0);
        for (r, &k) in c.runs.iter().zip(&c.component) {
            for x in r.x0..r.x1 {
                assert_eq!(l[r.y as usize * w + x as usize], k + 1);
            }
        }
    }

    /// Pixels of filled ellipses `(cx, cy, a, b, angle)` in a `w × h` frame.
    fn ellipses(w: usize, h: usize, shapes: &[(f64, f64, f64, f64, f64)]) -> Vec<u16> {
        (0..w * h)
            .map(|i| {
                let (x, y) = ((i % w) as f64, (i / w) as f64);
                u16::from(shapes.iter().any(|&(cx, cy, a, b, t)| {
                    let (u, v) = (x - cx, y - cy);
                    let (p, q) = (u * t.cos() + v * t.sin(), -u * t.sin() + v * t.cos());
                    (p / a).powi(2) + (q / b).powi(2) <= 1.0
                }))
            })
            .collect()
    }

    #[test]
    fn the_default_rule_splits_half_overlapping_discs_and_keeps_ellipses() {
        // Discs of radius r with centres 1.5 r apart (overlap r/2) meet in a
        // neck of half-width sqrt(r² - (0.75 r)²) = 0.66 r: dynamic about
        // 0.34 r, at least 3.4 px for r >= 10, above the default 0.6 px; the
        // centres are 15 px or more apart, above the default 10 px.
        use crate::analysis::params::Split;
        let (depth, sep) = (
            Split::DEFAULT_MIN_DEPTH_PX,
            Split::DEFAULT_MIN_SEPARATION_PX,
        );
        for r in [10.0, 15.0, 20.0] {
            let (w, h) = (80, 60);
            let px = ellipses(
                w,
                h,
                &[(20.0, 30.0, r, r, 0.0), (20.0 + 1.5 * r, 30.3, r, r, 0.0)],
            );
            for conn in [Connectivity::Four, Connectivity::Eight] {
                let c = split(label(&px, w, h, 0, conn, true), w, h, conn, depth, sep);
                assert_eq!(c.count, 2, "r {r} {conn:?}");
            }
        }
        // A single disc or ellipse (up to 2:1) has one maximum of its
        // distance; the pixel grid's bumps on an ellipse's ridge are either
        // shallower than 0.6 px or nearer than 10 px to the top: one object.
        for (a, b) in [
            (10.0, 10.0),
            (12.0, 8.0),
            (16.0, 8.0),
            (20.0, 10.0),
            (12.0, 6.0),
        ] {
            for angle in [0.0, 0.3, 0.8, 1.4] {
                let (w, h) = (70, 70);
                let px = ellipses(w, h, &[(35.0, 35.0, a, b, angle)]);
                for conn in [Connectivity::Four, Connectivity::Eight] {
                    let c = split(label(&px, w, h, 0, conn, true), w, h, conn, depth, sep);
                    assert_eq!(c.count, 1, "{a} x {b} at {angle} {conn:?}");
                }
            }
        }
    }

    #[test]
    fn the_flood_does_not_climb_back() {
        // One row, markers at both ends on squared distance 1, a ridge of 9
        // between them. The left marker pops first (FIFO) and queues pixel 1
        // at min(9, 1) = 1, behind the right marker already queued at 1; the
        // right marker then queues pixel 2 at 1, and pixel 1's pop finds
        // pixel 2 taken: [1, 1, 2, 2]. Queued at their own 9, pixel 1 would
        // pop first and the left basin would take the whole ridge.
        let labels = watershed(
            &[1, 9, 9, 1],
            &[true; 4],
            &[1, 0, 0, 2],
            4,
            1,
            Connectivity::Four,
        );
        assert_eq!(labels, vec![1, 1, 2, 2]);
    }

    #[test]
    fn mismatched_inputs_give_nothing() {
        assert!(markers(&[1, 2], &[true], 2, 1, Connectivity::Four, 1.0, 0.0).is_empty());
        assert!(watershed(&[1], &[true], &[1, 2], 1, 1, Connectivity::Four).is_empty());
        let empty = split(Components::default(), 0, 0, Connectivity::Four, 1.0, 0.0);
        assert_eq!(empty.count, 0);
    }
}
