//! Property tests of the analysis core's invariants on random small masks:
//! filling never removes foreground, counts do not change under transposition
//! and flips, runs stay inside the frame, the area measured equals the
//! pixels labelled, and splitting touching objects keeps every object pixel
//! while giving at most one piece per marker.

use framewarden::analysis::distance::squared_edt;
use framewarden::analysis::label::{label, Components};
use framewarden::analysis::split::{markers, split};
use framewarden::analysis::{analyze_frame, FrameResult};
use framewarden::analysis::{Connectivity, Method, SegmentParams, Split};
use framewarden::frame::Frame;
use proptest::prelude::*;

/// Random binary-ish 8-bit frames: 0 or 200 per pixel, density varying.
fn frames() -> impl Strategy<Value = Frame> {
    (1usize..24, 1usize..24, 0u32..100).prop_flat_map(|(w, h, density)| {
        proptest::collection::vec(0u32..100, w * h).prop_map(move |v| Frame {
            width: w,
            height: h,
            bit_depth: 8,
            pixels: v
                .into_iter()
                .map(|r| if r < density { 200 } else { 0 })
                .collect(),
        })
    })
}

/// Unions of a few random discs: overlapping, touching and cut by the edge.
fn disc_frames() -> impl Strategy<Value = Frame> {
    (8usize..40, 8usize..40).prop_flat_map(|(w, h)| {
        proptest::collection::vec((0..w as i64, 0..h as i64, 1i64..9), 1..7).prop_map(
            move |discs| Frame {
                width: w,
                height: h,
                bit_depth: 8,
                pixels: (0..w * h)
                    .map(|i| {
                        let (x, y) = ((i % w) as i64, (i / w) as i64);
                        let inside = discs
                            .iter()
                            .any(|&(cx, cy, r)| (x - cx).pow(2) + (y - cy).pow(2) <= r * r);
                        if inside {
                            200
                        } else {
                            0
                        }
                    })
                    .collect(),
            },
        )
    })
}

/// How many times each pixel is covered by the runs, and whether every
/// component number below `count` is used.
fn coverage(c: &Components, w: usize, h: usize) -> (Vec<u8>, bool) {
    let mut seen = vec![0u8; w * h];
    let mut used = vec![false; c.count];
    for (r, &k) in c.runs.iter().zip(&c.component) {
        for x in r.x0..r.x1 {
            seen[r.y as usize * w + x as usize] += 1;
        }
        if let Some(u) = used.get_mut(k as usize) {
            *u = true;
        }
    }
    let all_used = used.iter().all(|&u| u) && c.component.iter().all(|&k| (k as usize) < c.count);
    (seen, all_used)
}

fn transform(f: &Frame, map: impl Fn(usize, usize) -> (usize, usize), w: usize, h: usize) -> Frame {
    let mut pixels = vec![0u16; w * h];
    for y in 0..f.height {
        for x in 0..f.width {
            let (nx, ny) = map(x, y);
            pixels[ny * w + nx] = f.pixels[y * f.width + x];
        }
    }
    Frame {
        width: w,
        height: h,
        bit_depth: f.bit_depth,
        pixels,
    }
}

/// Labelling as it is, without the split: the watershed breaks ties between
/// equal basins in scan order, which a transposition changes (its own
/// properties are tested below).
fn settings(connectivity: Connectivity, fill_holes: bool) -> SegmentParams {
    SegmentParams {
        method: Method::Fixed(100),
        connectivity,
        fill_holes,
        split: Split::None,
        ..SegmentParams::default()
    }
}

fn run(f: &Frame, s: &SegmentParams) -> FrameResult {
    analyze_frame(f, &[], s, None).expect("sizes match")
}

fn areas_sorted(r: &FrameResult) -> Vec<u64> {
    let mut a: Vec<u64> = r.objects.iter().map(|o| o.area_px).collect();
    a.sort_unstable();
    a
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 400, ..ProptestConfig::default() })]

    #[test]
    fn filling_never_removes_foreground(f in frames(), conn in prop_oneof![Just(Connectivity::Four), Just(Connectivity::Eight)]) {
        let plain = label(&f.pixels, f.width, f.height, 100, conn, false);
        let filled = label(&f.pixels, f.width, f.height, 100, conn, true);
        let mut covered = vec![false; f.len()];
        for r in &filled.runs {
            for x in r.x0..r.x1 {
                covered[r.y as usize * f.width + x as usize] = true;
            }
        }
        for r in &plain.runs {
            for x in r.x0..r.x1 {
                prop_assert!(covered[r.y as usize * f.width + x as usize]);
            }
        }
        // Filling can only merge objects, never split them.
        prop_assert!(filled.count <= plain.count);
    }

    #[test]
    fn runs_stay_in_bounds_and_cover_the_foreground_once(f in frames(), conn in prop_oneof![Just(Connectivity::Four), Just(Connectivity::Eight)]) {
        let c = label(&f.pixels, f.width, f.height, 100, conn, false);
        let mut seen = vec![0u8; f.len()];
        for (r, &k) in c.runs.iter().zip(&c.component) {
            prop_assert!(r.x0 < r.x1 && (r.x1 as usize) <= f.width && (r.y as usize) < f.height);
            prop_assert!((k as usize) < c.count);
            for x in r.x0..r.x1 {
                seen[r.y as usize * f.width + x as usize] += 1;
            }
        }
        for (i, &p) in f.pixels.iter().enumerate() {
            prop_assert_eq!(seen[i], u8::from(p > 100));
        }
    }

    #[test]
    fn counts_and_areas_are_invariant_under_transposition_and_flips(
        f in frames(),
        conn in prop_oneof![Just(Connectivity::Four), Just(Connectivity::Eight)],
        fill in any::<bool>(),
    ) {
        let s = settings(conn, fill);
        let base = run(&f, &s);
        let (w, h) = (f.width, f.height);
        let variants = [
            transform(&f, |x, y| (y, x), h, w),
            transform(&f, |x, y| (w - 1 - x, y), w, h),
            transform(&f, |x, y| (x, h - 1 - y), w, h),
        ];
        for v in &variants {
            let r = run(v, &s);
            prop_assert_eq!(r.object_count, base.object_count);
            prop_assert_eq!(areas_sorted(&r), areas_sorted(&base));
            // Perimeter weights are symmetric under these maps too.
            let mut p0: Vec<i64> = base.objects.iter().map(|o| (o.perimeter_px * 1e6).round() as i64).collect();
            let mut p1: Vec<i64> = r.objects.iter().map(|o| (o.perimeter_px * 1e6).round() as i64).collect();
            p0.sort_unstable();
            p1.sort_unstable();
            prop_assert_eq!(p0, p1);
        }
    }

    #[test]
    fn objects_are_inside_their_boxes_and_labels_are_consecutive(f in frames()) {
        let r = run(&f, &settings(Connectivity::Eight, true));
        for (i, o) in r.objects.iter().enumerate() {
            prop_assert_eq!(o.label as usize, i + 1);
            let [x0, y0, x1, y1] = o.bbox;
            prop_assert!(x0 < x1 && y0 < y1 && x1 as usize <= f.width && y1 as usize <= f.height);
            prop_assert!(o.area_px <= u64::from((x1 - x0) * (y1 - y0)));
            prop_assert!(o.centroid_x >= f64::from(x0) && o.centroid_x <= f64::from(x1 - 1));
            prop_assert!(o.centroid_y >= f64::from(y0) && o.centroid_y <= f64::from(y1 - 1));
            prop_assert!(o.minor_axis_px <= o.major_axis_px + 1e-9);
            prop_assert!((0.0..=1.0 + 1e-12).contains(&o.eccentricity));
        }
        let total: u64 = r.objects.iter().map(|o| o.area_px).sum();
        prop_assert!((r.foreground_fraction - total as f64 / f.len() as f64).abs() < 1e-12);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 300, ..ProptestConfig::default() })]

    #[test]
    fn splitting_keeps_every_pixel_and_gives_at_most_one_piece_per_marker(
        f in prop_oneof![frames(), disc_frames()],
        conn in prop_oneof![Just(Connectivity::Four), Just(Connectivity::Eight)],
        fill in any::<bool>(),
        depth in prop_oneof![Just(0.5), Just(1.0), Just(2.0), Just(4.0)],
        separation in prop_oneof![Just(0.0), Just(3.0), Just(10.0)],
    ) {
        let (w, h) = (f.width, f.height);
        let labelled = label(&f.pixels, w, h, 100, conn, fill);
        let (before, _) = coverage(&labelled, w, h);
        let mask: Vec<bool> = before.iter().map(|&n| n > 0).collect();
        let d = squared_edt(&mask, w, h);
        let n_markers = markers(&d, &mask, w, h, conn, depth, separation).iter().filter(|&&m| m > 0).count();
        let count_before = labelled.count;
        let parts = split(labelled, w, h, conn, depth, separation);
        let (after, all_used) = coverage(&parts, w, h);
        // The union of object pixels is unchanged, each pixel in one piece.
        prop_assert_eq!(&after, &before);
        prop_assert!(after.iter().all(|&n| n <= 1));
        prop_assert!(all_used);
        // Never fewer objects than labelled, never more than markers.
        prop_assert!(parts.count >= count_before);
        prop_assert!(parts.count <= n_markers);
        // In fact equal: each object's markers on its own are the whole
        // mask's markers inside it, and each marker grows one piece.
        prop_assert_eq!(parts.count, n_markers);
        // Runs in raster order, numbered by first pixel.
        prop_assert!(parts.runs.windows(2).all(|r| (r[0].y, r[0].x0) < (r[1].y, r[1].x0)));
        let mut next = 0;
        for &k in &parts.component {
            prop_assert!(k <= next);
            if k == next {
                next += 1;
            }
        }
    }
}
