//! Checks the analysis engine against outside references.
//!
//! `tests/reference/make_reference.py` writes TIFF files with tifffile (several
//! encodings) and computes, with scikit-image, SciPy, OpenCV and numpy, what the
//! engine should find in them. This test decodes each file with our decoder,
//! runs our thresholds and `analyze_frame`, and compares value by value. Every
//! comparison names its outside source; `tests/reference/README.md` explains the
//! tolerances. The scripts run in the venv `tests/common` builds from
//! `tests/reference/requirements.txt` (or under `FRAMEWARDEN_PYTHON`); when
//! that cannot be set up the test fails, it never skips.

use std::path::Path;
use std::sync::OnceLock;

mod common;

use common::check;

use framewarden::analysis::threshold::{li, multi_otsu, otsu, separability, triangle, Histogram};
use framewarden::analysis::{analyze_frame, FrameResult};
use framewarden::analysis::{Connectivity, ObjectFilter, SegmentParams, Split};
use framewarden::decode::{read_page, DecodeLimits};
use framewarden::frame::Frame;
use serde::Deserialize;

/// Relative tolerance for floating-point measures (moments, means, lengths);
/// both sides compute the same formulas in f64, so 1e-6 leaves room only for
/// summation order.
const REL_TOL: f64 = 1e-6;
/// Relative tolerance for Otsu's separability, an exact rational on the
/// reference side.
const SEPARABILITY_REL_TOL: f64 = 1e-9;

#[derive(Debug, Deserialize)]
struct References {
    versions: serde_json::Value,
    images: Vec<ImageRef>,
}

#[derive(Debug, Deserialize)]
struct ImageRef {
    file: String,
    page: usize,
    encoding: String,
    width: usize,
    height: usize,
    bit_depth: u8,
    pixel_sum: u64,
    pixel_weighted_sum: u64,
    otsu: u16,
    otsu_opencv: Option<u16>,
    triangle: u16,
    li: f64,
    multi_otsu_3: Option<Vec<u16>>,
    multi_otsu_3_best_pairs: Option<Vec<Vec<u16>>>,
    separability: f64,
    segmentation: SegmentationRef,
}

#[derive(Debug, Deserialize)]
struct SegmentationRef {
    threshold: u16,
    connectivity8: LabelRef,
    connectivity4: LabelRef,
}

#[derive(Debug, Deserialize)]
struct LabelRef {
    count: usize,
    objects: Vec<ObjectRef>,
}

#[derive(Debug, Deserialize)]
struct ObjectRef {
    label: u32,
    area: u64,
    centroid_row: f64,
    centroid_col: f64,
    /// skimage order: min_row, min_col, max_row, max_col (max exclusive).
    bbox: [u32; 4],
    intensity_mean: f64,
    intensity_max: f64,
    intensity_sum: f64,
    perimeter: f64,
    major_axis_length: f64,
    minor_axis_length: f64,
    eccentricity: f64,
    solidity: f64,
}

/// One page of one reference file, decoded by our decoder.
struct Case {
    reference: ImageRef,
    frame: Result<Frame, String>,
}

impl Case {
    fn name(&self) -> String {
        format!(
            "{} page {} ({})",
            self.reference.file, self.reference.page, self.reference.encoding
        )
    }
}

struct Fixture {
    cases: Vec<Case>,
}

/// Generates the references once per test binary, decodes every page, and
/// removes the temporary folder again.
fn fixture() -> &'static Fixture {
    static FIXTURE: OnceLock<Fixture> = OnceLock::new();
    FIXTURE.get_or_init(|| {
        let dir = tempfile::tempdir().expect("create a temporary folder");
        run_generator(dir.path());
        let json_path = dir.path().join("references.json");
        let text = std::fs::read_to_string(&json_path)
            .unwrap_or_else(|e| panic!("read {}: {e}", json_path.display()));
        let refs: References =
            serde_json::from_str(&text).expect("references.json has the expected shape");
        eprintln!("reference versions: {}", refs.versions);
        assert!(
            refs.images.len() >= 20,
            "generator wrote only {} pages",
            refs.images.len()
        );
        let limits = DecodeLimits::default();
        let cases = refs
            .images
            .into_iter()
            .map(|reference| {
                let path = dir.path().join(&reference.file);
                let frame = read_page(&path, reference.page, &limits).map_err(|e| e.to_string());
                Case { reference, frame }
            })
            .collect();
        Fixture { cases }
    })
}

fn run_generator(out: &Path) {
    common::run_reference_script("make_reference.py", out);
}

/// The frames that decoded; decoding failures are reported by their own test.
fn decoded() -> impl Iterator<Item = (&'static Case, &'static Frame)> {
    fixture()
        .cases
        .iter()
        .filter_map(|c| c.frame.as_ref().ok().map(|f| (c, f)))
}

fn close(got: f64, want: f64, rel: f64) -> bool {
    (got - want).abs() <= rel * want.abs().max(1.0)
}

#[test]
fn decoder_reads_every_page_like_tifffile() {
    let mut failures = Vec::new();
    for case in &fixture().cases {
        let r = &case.reference;
        let frame = match &case.frame {
            Ok(f) => f,
            Err(e) => {
                failures.push(format!("{}: decode error: {e}", case.name()));
                continue;
            }
        };
        // tifffile.TiffFile(...).pages[i].asarray(): shape, dtype and pixel checksums.
        let sum: u64 = frame.pixels.iter().map(|&v| u64::from(v)).sum();
        let weighted: u64 = frame
            .pixels
            .iter()
            .zip(1u64..)
            .map(|(&v, i)| u64::from(v) * i)
            .sum();
        let got = (frame.width, frame.height, frame.bit_depth, sum, weighted);
        let want = (
            r.width,
            r.height,
            r.bit_depth,
            r.pixel_sum,
            r.pixel_weighted_sum,
        );
        if got != want {
            failures.push(format!(
                "{}: (width, height, bit depth, sum, weighted sum) got {got:?}, tifffile {want:?}",
                case.name()
            ));
        }
    }
    check(failures, "decoding against tifffile");
}

#[test]
fn otsu_matches_skimage_and_opencv() {
    let mut failures = Vec::new();
    for (case, frame) in decoded() {
        let r = &case.reference;
        let got = otsu(&Histogram::of(frame));
        // skimage.filters.threshold_otsu: integer images get one bin per level,
        // and the returned bin centre t puts level t in the lower class, so
        // foreground = pixel > t exactly as ours: no offset.
        if got != r.otsu {
            failures.push(format!(
                "{}: otsu {got}, skimage threshold_otsu {}",
                case.name(),
                r.otsu
            ));
        }
        // cv2.threshold(THRESH_BINARY | THRESH_OTSU) returns t with dst = src > t.
        if let Some(cv) = r.otsu_opencv {
            if got != cv {
                failures.push(format!(
                    "{}: otsu {got}, OpenCV cv2.threshold(THRESH_OTSU) {cv}",
                    case.name()
                ));
            }
        }
    }
    check(failures, "Otsu threshold");
}

#[test]
fn triangle_matches_skimage() {
    let mut failures = Vec::new();
    for (case, frame) in decoded() {
        let got = triangle(&Histogram::of(frame));
        // skimage.filters.threshold_triangle (integer histogram, one bin per level).
        if got != case.reference.triangle {
            failures.push(format!(
                "{}: triangle {got}, skimage threshold_triangle {}",
                case.name(),
                case.reference.triangle
            ));
        }
    }
    check(failures, "triangle threshold");
}

#[test]
fn li_matches_skimage() {
    let mut failures = Vec::new();
    let mut worst = 0.0f64;
    for (case, frame) in decoded() {
        let hist = Histogram::of(frame);
        let got = li(&hist);
        // skimage.filters.threshold_li returns a float t_f with foreground =
        // image > t_f. On integer pixels that is the same split as the integer
        // level floor(t_f). We accept floor(t_f), or any level that splits this
        // image's pixels the same way (no pixel value lies between the two).
        let want_f = case.reference.li;
        let want = want_f.floor();
        let same_split = frame.pixels.iter().filter(|&&v| v > got).count()
            == frame
                .pixels
                .iter()
                .filter(|&&v| f64::from(v) > want_f)
                .count();
        worst = worst.max((f64::from(got) - want_f).abs());
        if f64::from(got) != want && !same_split {
            failures.push(format!(
                "{}: li {got}, skimage threshold_li {want_f} (integer equivalent {want})",
                case.name()
            ));
        }
    }
    eprintln!("Li: largest |ours - skimage| = {worst} grey levels");
    check(failures, "Li threshold");
}

#[test]
fn multi_otsu_matches_skimage_and_exhaustive_search() {
    let mut failures = Vec::new();
    let (mut compared, mut compared_skimage) = (0, 0);
    for (case, frame) in decoded() {
        let r = &case.reference;
        // Null for frames with fewer than 3 grey levels (skimage raises).
        let Some(best_pairs) = &r.multi_otsu_3_best_pairs else {
            continue;
        };
        compared += 1;
        let got = multi_otsu(&Histogram::of(frame), 3);
        // numpy exhaustive search over all pairs of occupied levels; several
        // pairs only where the histogram makes them tie exactly.
        if !best_pairs.contains(&got) {
            failures.push(format!(
                "{}: multi-Otsu {got:?}, numpy exhaustive search {best_pairs:?}",
                case.name()
            ));
        }
        // skimage.filters.threshold_multiotsu(classes=3) where its lookup table
        // fits (see make_reference.py); exact unless the optimum is a tie.
        if let Some(want) = &r.multi_otsu_3 {
            compared_skimage += 1;
            if best_pairs.len() == 1 && &got != want {
                failures.push(format!(
                    "{}: multi-Otsu {got:?}, skimage threshold_multiotsu {want:?}",
                    case.name()
                ));
            }
        }
    }
    assert!(
        compared >= 15 && compared_skimage >= 10,
        "only {compared} / {compared_skimage} multi-Otsu references"
    );
    check(failures, "multi-Otsu thresholds");
}

#[test]
fn separability_matches_exact_value() {
    let mut failures = Vec::new();
    let mut worst = 0.0f64;
    for (case, frame) in decoded() {
        let r = &case.reference;
        // Ours is taken at our own Otsu level, checked in its own test.
        let got = separability(&Histogram::of(frame));
        // Otsu (1979) η = σ_B²/σ_T² at skimage's Otsu level, computed exactly
        // with Python integers (fractions.Fraction) from numpy.bincount.
        let dev = (got - r.separability).abs() / r.separability.abs().max(f64::MIN_POSITIVE);
        worst = worst.max(if got == r.separability { 0.0 } else { dev });
        let within = (got - r.separability).abs() <= SEPARABILITY_REL_TOL * r.separability.abs();
        if !within {
            failures.push(format!(
                "{}: separability {got}, exact {}",
                case.name(),
                r.separability
            ));
        }
    }
    eprintln!("separability: largest relative deviation {worst:e}");
    check(failures, "separability");
}

#[test]
fn segmentation_8_connected_matches_scipy_and_skimage() {
    // Every component, as skimage labels them (no size filter, no split).
    let settings = SegmentParams {
        filter: ObjectFilter::KEEP_ALL,
        split: Split::None,
        ..SegmentParams::default()
    };
    assert_eq!(
        settings.connectivity,
        Connectivity::Eight,
        "default settings are 8-connected"
    );
    compare_segmentation(&settings, |s| &s.connectivity8);
}

#[test]
fn segmentation_4_connected_matches_scipy_and_skimage() {
    let settings = SegmentParams {
        connectivity: Connectivity::Four,
        filter: ObjectFilter::KEEP_ALL,
        split: Split::None,
        ..SegmentParams::default()
    };
    compare_segmentation(&settings, |s| &s.connectivity4);
}

fn compare_segmentation(settings: &SegmentParams, pick: fn(&SegmentationRef) -> &LabelRef) {
    let mut failures = Vec::new();
    let mut objects = 0;
    // Largest relative deviation seen per field, printed for the record.
    let mut worst: Vec<(&str, f64)> = Vec::new();
    for (case, frame) in decoded() {
        let seg = &case.reference.segmentation;
        let want = pick(seg);
        let name = case.name();
        let result: FrameResult = match analyze_frame(frame, &[], settings, None) {
            Ok(r) => r,
            Err(e) => {
                failures.push(format!("{name}: analysis error: {e}"));
                continue;
            }
        };
        // Threshold: skimage.filters.threshold_otsu (see otsu test).
        if result.threshold != f64::from(seg.threshold) {
            failures.push(format!(
                "{name}: threshold {}, skimage {}",
                result.threshold, seg.threshold
            ));
        }
        // The frame's separability: exact rational at skimage's Otsu level.
        let want_eta = case.reference.separability;
        if (result.separability - want_eta).abs() > SEPARABILITY_REL_TOL * want_eta.abs() {
            failures.push(format!(
                "{name}: frame separability {}, exact {want_eta}",
                result.separability
            ));
        }
        // Count: scipy.ndimage.binary_fill_holes + skimage.measure.label.
        if result.object_count != want.count || result.objects.len() != want.count {
            failures.push(format!(
                "{name}: object count {} ({} listed), scipy fill + skimage label {}",
                result.object_count,
                result.objects.len(),
                want.count
            ));
            continue;
        }
        for (got, want) in result.objects.iter().zip(&want.objects) {
            objects += 1;
            let who = format!("{name} object {}", want.label);
            // skimage.measure.label numbers in raster order of first pixels;
            // skimage.measure.regionprops area and bbox are exact integers.
            let want_bbox = [want.bbox[1], want.bbox[0], want.bbox[3], want.bbox[2]];
            if (got.label, got.area_px, got.bbox) != (want.label, want.area, want_bbox) {
                failures.push(format!(
                    "{who}: (label, area, bbox [x0,y0,x1,y1]) got {:?}, skimage regionprops {:?}",
                    (got.label, got.area_px, got.bbox),
                    (want.label, want.area, want_bbox)
                ));
                continue;
            }
            // skimage.measure.regionprops: centroid, intensity_mean, intensity_max,
            // perimeter (4-neighbourhood weights), axis_major_length,
            // axis_minor_length, eccentricity; numpy sum of the object's pixels.
            let pairs = [
                ("centroid_x", got.centroid_x, want.centroid_col),
                ("centroid_y", got.centroid_y, want.centroid_row),
                ("mean_intensity", got.mean_intensity, want.intensity_mean),
                ("max_intensity", got.max_intensity, want.intensity_max),
                (
                    "integrated_intensity",
                    got.integrated_intensity,
                    want.intensity_sum,
                ),
                ("perimeter_px", got.perimeter_px, want.perimeter),
                ("major_axis_px", got.major_axis_px, want.major_axis_length),
                ("minor_axis_px", got.minor_axis_px, want.minor_axis_length),
                ("eccentricity", got.eccentricity, want.eccentricity),
            ];
            // skimage.measure.regionprops solidity (area / convex_area, the
            // hull from skimage.morphology.convex_hull_image): within 2%.
            let (g, w) = (got.solidity, want.solidity);
            let dev = (g - w).abs() / w.abs().max(1e-9);
            match worst.iter_mut().find(|(f, _)| *f == "solidity") {
                Some((_, d)) => *d = d.max(dev),
                None => worst.push(("solidity", dev)),
            }
            if dev > 0.02 {
                failures.push(format!("{who}: solidity {g}, skimage regionprops {w}"));
            }
            for (field, g, w) in pairs {
                let dev = (g - w).abs() / w.abs().max(1.0);
                match worst.iter_mut().find(|(f, _)| *f == field) {
                    Some((_, d)) => *d = d.max(dev),
                    None => worst.push((field, dev)),
                }
                if !close(g, w, REL_TOL) {
                    failures.push(format!("{who}: {field} {g}, skimage regionprops {w}"));
                }
            }
        }
    }
    eprintln!(
        "{objects} objects compared (connectivity {}); largest relative deviations:",
        settings.connectivity.neighbours()
    );
    for (field, dev) in &worst {
        eprintln!("  {field}: {dev:e}");
    }
    assert!(objects >= 100, "only {objects} objects compared");
    check(failures, "segmentation and measures");
}
