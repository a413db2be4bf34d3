//! Checks the engine against outside references on the cases beyond the main
//! reference set (`tests/reference.rs`, which covers the thresholds, the
//! decoder and the default fill-and-label chain).
//!
//! `tests/reference/make_edge_reference.py` writes TIFF files with tifffile and
//! `edge_references.json` with what SciPy, scikit-image and OpenCV find in them:
//! - settings cases: hole filling off and on, 4 and 8 connectivity on masks made
//!   to stress them, area limits, border removal, multi-Otsu with a class
//!   boundary, intensities on a second page; each with a config fragment that
//!   our own parser reads;
//! - histogram cases: 16-bit images with wide dense or wide sparse histograms,
//!   and the Otsu, triangle, Li and three-class multi-Otsu answers on them.
//!
//! The script runs in the venv `tests/common` builds from
//! `tests/reference/requirements.txt` (or under `FRAMEWARDEN_PYTHON`); when
//! that cannot be set up these tests fail, they never skip.

use std::path::Path;
use std::sync::OnceLock;

mod common;

use common::check;

use framewarden::analysis::{analyze_frame, FrameResult};
use framewarden::analysis::{SegmentParams, Split};
use framewarden::decode::{read_page, DecodeLimits};
use framewarden::frame::Frame;
use framewarden::settings;
use serde::Deserialize;
use serde_json::Value;

/// Relative tolerance for floating-point measures: both sides evaluate the same
/// formulas in f64 (regionprops' moments, means and perimeter weights), so this
/// leaves room only for summation order.
const REL_TOL: f64 = 1e-6;
/// Relative tolerance for Otsu's separability against its exact value.
const SEPARABILITY_REL_TOL: f64 = 1e-9;

#[derive(Debug, Deserialize)]
struct Document {
    settings_cases: Vec<SettingsCase>,
    histogram_cases: Vec<HistogramCase>,
}

#[derive(Debug, Deserialize)]
struct SettingsCase {
    file: String,
    /// A `[segment]` (and `[measure]`) config fragment, in our own config format.
    config: String,
    threshold: u16,
    threshold_source: String,
    object_count: usize,
    foreground_px: u64,
    /// In our field names; every key present is compared.
    objects: Vec<serde_json::Map<String, Value>>,
    source: String,
}

/// `[lowest, highest)` levels that split the image's pixels like the reference
/// threshold; `None` is below every pixel / above every pixel.
type Partition = [Option<u16>; 2];

#[derive(Debug, Deserialize)]
struct HistogramCase {
    file: String,
    distinct_levels: usize,
    otsu: OtsuRef,
    triangle: ThresholdRef,
    li: ThresholdRef,
    multi_otsu_3: Option<MultiOtsuRef>,
}

#[derive(Debug, Deserialize)]
struct OtsuRef {
    partition: Partition,
    separability: f64,
    source: String,
    skimage_threshold_otsu: u16,
    skimage_same_partition: bool,
}

#[derive(Debug, Deserialize)]
struct ThresholdRef {
    partition: Partition,
    source: String,
}

#[derive(Debug, Deserialize)]
struct MultiOtsuRef {
    /// Every optimal (t1, t2), as partitions: several only on exact ties.
    partitions: Vec<[Partition; 2]>,
    source: String,
}

/// The reference document and every frame it names, decoded by our decoder;
/// the generator runs once per test binary and its folder is removed again.
struct Fixture {
    doc: Document,
    settings: Vec<SettingsInput>,
    histogram_frames: Vec<Frame>,
}

/// One settings case ready to analyze: its parsed settings, the segmented page
/// and the extra pages listed in `[measure]`.
struct SettingsInput {
    segment: SegmentParams,
    frame: Frame,
    extra: Vec<(usize, Frame)>,
}

fn fixture() -> &'static Fixture {
    static FIXTURE: OnceLock<Fixture> = OnceLock::new();
    FIXTURE.get_or_init(|| {
        let dir = tempfile::tempdir().expect("create a temporary folder");
        let doc = run_generator(dir.path());
        let limits = DecodeLimits::default();
        let decode = |file: &str, page: usize| {
            read_page(&dir.path().join(file), page, &limits)
                .unwrap_or_else(|e| panic!("{file} page {page}: decode: {e}"))
        };
        let settings = doc
            .settings_cases
            .iter()
            .enumerate()
            .map(|(i, case)| {
                let path = dir.path().join(format!("case{i}.toml"));
                let parsed = settings::from_text(&case.config, &path).unwrap_or_else(|e| {
                    panic!("case {i}: our config parser refused the fragment: {e}")
                });
                // The references label without splitting touching objects
                // (the split has its own reference check, reference_split.rs).
                let segment = SegmentParams {
                    split: Split::None,
                    ..parsed.pipeline.segment
                };
                let frame = decode(&case.file, segment.page);
                let extra = segment
                    .measure_pages
                    .iter()
                    .map(|&p| (p, decode(&case.file, p)))
                    .collect();
                SettingsInput {
                    segment,
                    frame,
                    extra,
                }
            })
            .collect();
        let histogram_frames = doc
            .histogram_cases
            .iter()
            .map(|case| decode(&case.file, 0))
            .collect();
        Fixture {
            doc,
            settings,
            histogram_frames,
        }
    })
}

fn run_generator(out: &Path) -> Document {
    common::run_reference_script("make_edge_reference.py", out);
    let json = out.join("edge_references.json");
    let text =
        std::fs::read_to_string(&json).unwrap_or_else(|e| panic!("read {}: {e}", json.display()));
    serde_json::from_str(&text).expect("edge_references.json has the expected shape")
}

/// Compares one reference value with ours: integers exactly, other numbers
/// within [`REL_TOL`] (absolute below 1), arrays and objects element-wise.
fn compare(path: &str, got: Option<&Value>, want: &Value, failures: &mut Vec<String>) {
    let Some(got) = got else {
        failures.push(format!("{path}: missing in our result, reference {want}"));
        return;
    };
    match (got, want) {
        (Value::Array(g), Value::Array(w)) if g.len() == w.len() => {
            for (i, (g, w)) in g.iter().zip(w).enumerate() {
                compare(&format!("{path}[{i}]"), Some(g), w, failures);
            }
        }
        (Value::Object(g), Value::Object(w)) => {
            for (key, w) in w {
                compare(&format!("{path}.{key}"), g.get(key), w, failures);
            }
        }
        (Value::Number(g), Value::Number(w)) if w.is_u64() => {
            // Counts, labels, bounding boxes, pixel values: exact, whichever way
            // our side serialises them (u64 or a whole f64).
            if g.as_f64() != w.as_f64() {
                failures.push(format!("{path}: {g}, reference {w} (exact)"));
            }
        }
        (Value::Number(g), Value::Number(w)) => {
            let (g, w) = (
                g.as_f64().unwrap_or(f64::NAN),
                w.as_f64().unwrap_or(f64::NAN),
            );
            // Written so that a NaN on our side is a mismatch.
            let within = (g - w).abs() <= REL_TOL * w.abs().max(1.0);
            if !within {
                failures.push(format!("{path}: {g}, reference {w}"));
            }
        }
        _ => failures.push(format!("{path}: {got}, reference {want}")),
    }
}

#[test]
fn segmentation_settings_match_scipy_skimage_and_opencv() {
    let fx = fixture();
    assert!(
        fx.doc.settings_cases.len() >= 15,
        "generator wrote only {} settings cases",
        fx.doc.settings_cases.len()
    );
    let mut failures = Vec::new();
    let mut objects_compared = 0;
    for (i, (case, input)) in fx.doc.settings_cases.iter().zip(&fx.settings).enumerate() {
        let name = format!(
            "case {i} ({}; {})",
            case.file,
            case.config.replace('\n', " ")
        );
        let extra: Vec<_> = input.extra.iter().map(|(p, f)| (*p, f)).collect();
        let result = analyze_frame(&input.frame, &extra, &input.segment, None)
            .unwrap_or_else(|e| panic!("{name}: {e}"));

        // Threshold: a fixed level, or skimage.filters.threshold_multiotsu's
        // threshold at the configured class boundary (named in the case).
        if result.threshold != f64::from(case.threshold) {
            failures.push(format!(
                "{name}: threshold {}, reference {} ({})",
                result.threshold, case.threshold, case.threshold_source
            ));
        }
        // Count and covered area after fill, label and filters: the chain in
        // `case.source` (scipy.ndimage.binary_fill_holes, skimage.measure.label
        // agreeing with scipy.ndimage.label and cv2.connectedComponentsWithStats,
        // skimage.segmentation.clear_border, numpy area limits).
        let covered: u64 = result.objects.iter().map(|o| o.area_px).sum();
        if (result.object_count, result.objects.len(), covered)
            != (case.object_count, case.object_count, case.foreground_px)
        {
            failures.push(format!(
                "{name}: (count, listed, covered px) ({}, {}, {covered}), reference ({}, {}, {}) from {}",
                result.object_count,
                result.objects.len(),
                case.object_count,
                case.object_count,
                case.foreground_px,
                case.source
            ));
            continue;
        }
        // Per object, in raster order of first pixels (skimage relabel_sequential):
        // skimage.measure.regionprops label, area, centroid, bbox, intensity
        // mean / max, numpy sum of the object's pixels, perimeter, axis lengths,
        // eccentricity, 4πA/P² from its area and perimeter, and the same
        // intensities on each extra page (regionprops with that page as
        // intensity image).
        for (got, want) in result.objects.iter().zip(&case.objects) {
            objects_compared += 1;
            let got = serde_json::to_value(got).expect("object measures serialise");
            let label = want.get("label").map_or_else(String::new, Value::to_string);
            compare(
                &format!("{name} object {label}"),
                Some(&got),
                &Value::Object(want.clone()),
                &mut failures,
            );
        }
    }
    assert!(
        objects_compared >= 1000,
        "only {objects_compared} objects compared"
    );
    check(failures, "settings against scipy / scikit-image");
}

/// Whether `t` splits the pixels as the reference partition does.
fn in_partition(t: f64, [lo, hi]: Partition) -> bool {
    lo.is_none_or(|lo| t >= f64::from(lo)) && hi.is_none_or(|hi| t < f64::from(hi))
}

/// `[lo, hi)`, with `-` for an open end.
fn show(partitions: &[Partition]) -> String {
    let end = |v: Option<u16>| v.map_or_else(|| "-".to_string(), |v| v.to_string());
    let shown: Vec<_> = partitions
        .iter()
        .map(|[lo, hi]| format!("[{}, {})", end(*lo), end(*hi)))
        .collect();
    shown.join(" ")
}

/// Runs the full analysis with only the threshold method set.
fn analyze_with(frame: &Frame, method: &str) -> FrameResult {
    let text = format!("[segment]\n{method}\n");
    let settings = settings::from_text(&text, Path::new("method.toml"))
        .unwrap_or_else(|e| panic!("{text}: {e}"));
    analyze_frame(frame, &[], &settings.pipeline.segment, None)
        .expect("analysis of a decoded frame")
}

#[test]
fn thresholds_on_wide_16_bit_histograms_match_references() {
    let fx = fixture();
    let cases = &fx.doc.histogram_cases;
    assert!(
        cases.len() >= 5,
        "generator wrote only {} histogram cases",
        cases.len()
    );
    // The set must hold both kinds: wide and dense, and sparse.
    assert!(cases.iter().any(|c| c.distinct_levels > 20_000));
    assert!(cases.iter().any(|c| c.distinct_levels < 10));
    let mut failures = Vec::new();
    let mut multi_compared = 0;
    for (case, frame) in cases.iter().zip(&fx.histogram_frames) {
        let name = &case.file;

        // Otsu: the exact optimum of Otsu's criterion (Python integers over all
        // occupied levels). skimage.filters.threshold_otsu is shown beside it; it
        // falls off the optimum by a float32 near-tie on dense 16-bit pictures.
        let otsu = analyze_with(frame, "method = \"otsu\"");
        let r = &case.otsu;
        if !in_partition(otsu.threshold, r.partition) {
            failures.push(format!(
                "{name}: otsu {}, exact optimum {} ({}); skimage threshold_otsu {} (same split: {})",
                otsu.threshold,
                show(&[r.partition]),
                r.source,
                r.skimage_threshold_otsu,
                r.skimage_same_partition
            ));
        }
        // Separability η = σ_B²/σ_T² at that optimum, exact (Otsu 1979).
        let within =
            (otsu.separability - r.separability).abs() <= SEPARABILITY_REL_TOL * r.separability;
        if !within {
            failures.push(format!(
                "{name}: separability {}, exact {}",
                otsu.separability, r.separability
            ));
        }

        // skimage.filters.threshold_triangle and threshold_li, full integer histogram.
        for (method, r) in [("triangle", &case.triangle), ("li", &case.li)] {
            let got = analyze_with(frame, &format!("method = \"{method}\""));
            if !in_partition(got.threshold, r.partition) {
                failures.push(format!(
                    "{name}: {method} {}, {} splits at {}",
                    got.threshold,
                    r.source,
                    show(&[r.partition])
                ));
            }
        }

        // Three-class multi-Otsu: make_reference.multi_otsu_3_exhaustive (and
        // skimage.filters.threshold_multiotsu where its table fits).
        if let Some(r) = &case.multi_otsu_3 {
            multi_compared += 1;
            let t = [1, 2].map(|boundary| {
                analyze_with(
                    frame,
                    &format!("method = \"multi-otsu\"\nclasses = 3\nboundary = {boundary}"),
                )
                .threshold
            });
            let matches = r
                .partitions
                .iter()
                .any(|[p1, p2]| in_partition(t[0], *p1) && in_partition(t[1], *p2));
            if !matches {
                failures.push(format!(
                    "{name}: multi-Otsu {t:?}, {}: {}",
                    r.source,
                    r.partitions
                        .iter()
                        .map(|pair| show(pair))
                        .collect::<Vec<_>>()
                        .join(" or ")
                ));
            }
        }
    }
    assert!(
        multi_compared >= 3,
        "only {multi_compared} multi-Otsu references"
    );
    check(failures, "thresholds on wide 16-bit histograms");
}
