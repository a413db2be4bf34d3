//! Objects a threshold leaves out (`analysis::dim_objects`) against their
//! definition written on numpy and scikit-image
//! (tests/reference/make_dim_reference.py: Otsu's levels from the integer
//! histogram, `skimage.measure.label` and `regionprops`), and the
//! `dim_objects_missed` flag on the real binary: raised on a real field of
//! nuclei (mahotas's demo image, MIT) and on dim and bright discs, not on
//! bright discs alone or on a gradient, and gone once a threshold reaches the
//! dim population.

mod common;

use std::path::Path;
use std::process::Command;

use framewarden::analysis::dim_objects::dim_objects;
use framewarden::analysis::threshold::{otsu, Histogram};
use framewarden::analysis::{Connectivity, ObjectFilter};
use framewarden::decode::{read_page, DecodeLimits};
use serde::Deserialize;
use serde_json::Value;

#[derive(Deserialize)]
struct Case {
    name: String,
    file: String,
    threshold: u16,
    level: Option<u16>,
    dim_objects: usize,
}

fn cases(dir: &Path) -> Vec<Case> {
    common::run_reference_script("make_dim_reference.py", dir);
    let text = std::fs::read_to_string(dir.join("dim_references.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

/// `framewarden analyze --json` on `file` with `config`: each frame's flag names
/// and its `dim_objects` and `object_count`.
fn analyze(file: &Path, config: &Path) -> (Vec<String>, u64, u64) {
    let out = Command::new(env!("CARGO_BIN_EXE_framewarden"))
        .args(["analyze", "--json", "--config"])
        .arg(config)
        .arg(file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: Value = serde_json::from_slice(&out.stdout).unwrap();
    let flags = v["flags"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["flag"].as_str().unwrap().to_string())
        .collect();
    let n = |k: &str| v[k].as_u64().unwrap();
    (flags, n("dim_objects"), n("object_count"))
}

#[test]
fn dim_objects_match_the_scikit_image_definition_and_flag_only_two_populations() {
    let dir = tempfile::tempdir().unwrap();
    let cases = cases(dir.path());
    assert_eq!(cases.len(), 4);
    let otsu_toml = dir.path().join("otsu.toml");
    std::fs::write(&otsu_toml, "[segment]\nmethod = \"otsu\"\n").unwrap();
    let li_toml = dir.path().join("li.toml");
    std::fs::write(&li_toml, "[segment]\nmethod = \"li\"\n").unwrap();
    let mut failures = Vec::new();
    for c in &cases {
        let path = dir.path().join(&c.file);
        let frame = read_page(&path, 0, &DecodeLimits::default()).unwrap();
        let hist = Histogram::of(&frame);
        let t = otsu(&hist);
        let found = dim_objects(
            &frame.pixels,
            frame.width,
            frame.height,
            &hist,
            t,
            Connectivity::Eight,
            &ObjectFilter::default(),
            None,
        );
        let got = (t, found.map(|d| d.level), found.map_or(0, |d| d.count));
        if got != (c.threshold, c.level, c.dim_objects) {
            failures.push(format!(
                "{}: (threshold, level, dim objects) {got:?}, scikit-image {:?}",
                c.name,
                (c.threshold, c.level, c.dim_objects)
            ));
        }
        // On the real binary with Otsu: flagged exactly where a second
        // population hides below the threshold.
        let (flags, dim, _) = analyze(&path, &otsu_toml);
        let flagged = flags.iter().any(|f| f == "dim_objects_missed");
        let expected = matches!(c.name.as_str(), "real_field" | "dim_and_bright");
        if flagged != expected || dim as usize != c.dim_objects {
            failures.push(format!(
                "{}: analyze gives flags {flags:?} with {dim} dim objects",
                c.name
            ));
        }
    }
    // Li's threshold reaches the dim discs: every disc counted, no flag.
    let (flags, dim, count) = analyze(&dir.path().join("dim_and_bright.tif"), &li_toml);
    if flags.iter().any(|f| f == "dim_objects_missed") || dim != 0 || count != 60 {
        failures.push(format!(
            "dim_and_bright with li: flags {flags:?}, {count} objects, {dim} dim"
        ));
    }
    common::check(failures, "dim objects against scikit-image");
}
