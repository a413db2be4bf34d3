//! Property tests of the analysis core's invariants on random small masks:
//! filling never removes foreground, counts do not change under transposition
//! and flips, runs stay inside the frame, and the area measured equals the
//! pixels labelled.

use framewarden::analysis::label::label;
use framewarden::analysis::{analyze_frame, FrameResult};
use framewarden::analysis::{Connectivity, Method, SegmentParams};
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

fn settings(connectivity: Connectivity, fill_holes: bool) -> SegmentParams {
    SegmentParams {
        method: Method::Fixed(100),
        connectivity,
        fill_holes,
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
