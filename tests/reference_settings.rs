//! Checks the segmentation settings beyond the defaults against outside references.
//!
//! `tests/reference/make_settings_reference.py` writes TIFF files with tifffile
//! and, for each case, a `[segment]`/`[measure]` config fragment and the objects
//! that SciPy (`binary_fill_holes`, `label`) and scikit-image (`label`,
//! `clear_border`, `relabel_sequential`, `regionprops`, `threshold_multiotsu`)
//! find with those settings: hole filling off and on, 4 and 8 connectivity on
//! masks made to stress them, area limits, border removal, multi-Otsu with a
//! class boundary, and intensities on a second page. This test parses the
//! fragment with our config parser, decodes with our decoder, runs
//! `analyze_frame` and compares field by field. The defaults, the thresholds and
//! the decoder are checked in `tests/reference.rs`. Python and the packages in
//! `tests/reference/requirements.txt` are required: a missing one fails the test.

use std::path::{Path, PathBuf};
use std::process::Command;

use framewarden::analysis::analyze_frame;
use framewarden::decode::{read_page, DecodeLimits};
use framewarden::settings;
use serde::Deserialize;
use serde_json::Value;

/// Relative tolerance for floating-point measures: both sides evaluate the same
/// formulas in f64 (regionprops' moments, means and perimeter weights), so this
/// leaves room only for summation order.
const REL_TOL: f64 = 1e-6;

#[derive(Debug, Deserialize)]
struct Document {
    cases: Vec<Case>,
}

#[derive(Debug, Deserialize)]
struct Case {
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

fn run_generator(out: &Path) -> Document {
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/reference/make_settings_reference.py");
    let hint = "the reference test needs python3 with the packages pinned in \
                tests/reference/requirements.txt (python3 -m pip install -r \
                tests/reference/requirements.txt)";
    let output = Command::new("python3")
        .arg(&script)
        .arg(out)
        .output()
        .unwrap_or_else(|e| panic!("cannot run python3 ({e}): {hint}"));
    assert!(
        output.status.success(),
        "{} failed ({}):\n{}\n{hint}",
        script.display(),
        output.status,
        String::from_utf8_lossy(&output.stderr)
    );
    let json = out.join("settings_references.json");
    let text =
        std::fs::read_to_string(&json).unwrap_or_else(|e| panic!("read {}: {e}", json.display()));
    serde_json::from_str(&text).expect("settings_references.json has the expected shape")
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
fn segmentation_settings_match_scipy_and_skimage() {
    let dir = tempfile::tempdir().expect("create a temporary folder");
    let doc = run_generator(dir.path());
    assert!(
        doc.cases.len() >= 15,
        "generator wrote only {} cases",
        doc.cases.len()
    );
    let limits = DecodeLimits::default();
    let mut failures = Vec::new();
    let mut objects_compared = 0;
    for (i, case) in doc.cases.iter().enumerate() {
        let name = format!(
            "case {i} ({}; {})",
            case.file,
            case.config.replace('\n', " ")
        );
        let config_path = dir.path().join(format!("case{i}.toml"));
        let settings = settings::parse(&case.config, &config_path)
            .unwrap_or_else(|e| panic!("{name}: our config parser refused the fragment: {e}"));
        let seg = &settings.segment;
        let path = dir.path().join(&case.file);
        let decode = |page: usize| {
            read_page(&path, page, &limits)
                .unwrap_or_else(|e| panic!("{name}: decode page {page}: {e}"))
        };
        let frame = decode(seg.page);
        let extra: Vec<_> = seg.measure_pages.iter().map(|&p| (p, decode(p))).collect();
        let extra_refs: Vec<_> = extra.iter().map(|(p, f)| (*p, f)).collect();
        let result =
            analyze_frame(&frame, &extra_refs, seg, None).unwrap_or_else(|e| panic!("{name}: {e}"));

        // Threshold: a fixed level, or skimage.filters.threshold_multiotsu's
        // threshold at the configured class boundary (named in the case).
        if result.threshold != f64::from(case.threshold) {
            failures.push(format!(
                "{name}: threshold {}, reference {} ({})",
                result.threshold, case.threshold, case.threshold_source
            ));
        }
        // Count and covered area after fill, label and filters: the chain in
        // `case.source` (scipy.ndimage.binary_fill_holes, skimage.measure.label,
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
    assert!(
        failures.is_empty(),
        "{} mismatch(es) against scipy / scikit-image:\n{}",
        failures.len(),
        failures.join("\n")
    );
}
