//! Checks the splitting of touching objects against outside references.
//!
//! `tests/reference/make_split_reference.py` writes binary masks (random,
//! smoothed-noise blobs, clusters of overlapping discs and ellipses, objects
//! cut by the frame's edge) with SciPy's exact Euclidean distance transform.
//! This test computes ours on each and our markers (h-maxima of the distance),
//! hands the markers back to the script, which floods with scikit-image's
//! watershed from the same markers on the same mask, and compares label by
//! label. Python and the packages in `tests/reference/requirements.txt` are
//! required: a missing one fails the test, it never skips.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;
use std::sync::OnceLock;

mod common;

use common::check;

use framewarden::analysis::distance::squared_edt;
use framewarden::analysis::label::label;
use framewarden::analysis::split::{markers, split, watershed};
use framewarden::analysis::{Connectivity, Split};
use serde::{Deserialize, Serialize};

/// Smallest share of all masks' pixels on which our watershed and
/// scikit-image's must give the same label (the 99.5 % the issue asks for).
/// Both flood by decreasing distance from the same markers and label a pixel
/// when it is first queued; they can differ only where equal distances are
/// queued in a different order (our FIFO, and our flood not climbing back
/// above the level that queued a pixel, against the reference heap's order
/// among equal keys).
const MIN_AGREEMENT: f64 = 0.995;

/// Smallest share for any one mask. The random masks (pixels set with
/// probability 0.95) are nearly all ties; at the default depth of 0.6 px
/// their many small pieces put up to 15 of about 2,900 pixels on the other
/// side of a tie (0.9948).
const MIN_AGREEMENT_PER_MASK: f64 = 0.99;

/// Marker rules (depth, separation; pixels) the markers are found with: the
/// defaults, and a depth-only rule that gives more markers, so more
/// boundaries are compared.
const RULES: [(f64, f64); 2] = [
    (
        Split::DEFAULT_MIN_DEPTH_PX,
        Split::DEFAULT_MIN_SEPARATION_PX,
    ),
    (1.0, 0.0),
];

#[derive(Debug, Deserialize)]
struct Masks {
    versions: serde_json::Value,
    cases: Vec<MaskCase>,
}

#[derive(Debug, Deserialize)]
struct MaskCase {
    name: String,
    width: usize,
    height: usize,
    mask: Vec<u8>,
    edt_sq: Vec<u64>,
    source: String,
}

#[derive(Debug, Serialize)]
struct MarkerDoc {
    cases: Vec<MarkerCase>,
}

#[derive(Debug, Serialize)]
struct MarkerCase {
    name: String,
    connectivity: u8,
    markers: Vec<u32>,
}

#[derive(Debug, Deserialize)]
struct Watersheds {
    source: String,
    cases: Vec<WatershedCase>,
}

#[derive(Debug, Deserialize)]
struct WatershedCase {
    name: String,
    connectivity: u8,
    labels: Vec<u32>,
}

/// One flooding to compare: a mask, a connectivity and a marker rule.
struct Flooding {
    case: usize,
    connectivity: Connectivity,
    depth: f64,
    separation: f64,
    markers: Vec<u32>,
    reference: Vec<u32>,
}

struct Fixture {
    masks: Masks,
    floodings: Vec<Flooding>,
    source: String,
}

fn bools(c: &MaskCase) -> Vec<bool> {
    c.mask.iter().map(|&v| v != 0).collect()
}

/// Runs both steps of the script once per test binary.
fn fixture() -> &'static Fixture {
    static FIXTURE: OnceLock<Fixture> = OnceLock::new();
    FIXTURE.get_or_init(|| {
        let dir = tempfile::tempdir().expect("create a temporary folder");
        common::run_reference_script("make_split_reference.py", dir.path());
        let masks: Masks = read_json(&dir.path().join("masks.json"));
        eprintln!("reference versions: {}", masks.versions);
        assert!(masks.cases.len() >= 15, "only {} masks", masks.cases.len());
        // Our markers for every mask, connectivity and depth; the depth is
        // folded into the name so the script can echo it back.
        let mut floodings = Vec::new();
        let mut doc = MarkerDoc { cases: Vec::new() };
        for (i, c) in masks.cases.iter().enumerate() {
            let mask = bools(c);
            let d = squared_edt(&mask, c.width, c.height);
            for conn in [Connectivity::Four, Connectivity::Eight] {
                for (depth, separation) in RULES {
                    let m = markers(&d, &mask, c.width, c.height, conn, depth, separation);
                    doc.cases.push(MarkerCase {
                        name: c.name.clone(),
                        connectivity: conn.neighbours(),
                        markers: m.clone(),
                    });
                    floodings.push(Flooding {
                        case: i,
                        connectivity: conn,
                        depth,
                        separation,
                        markers: m,
                        reference: Vec::new(),
                    });
                }
            }
        }
        let text = serde_json::to_string(&doc).expect("markers serialise");
        std::fs::write(dir.path().join("markers.json"), text).expect("write markers.json");
        common::run_reference_script("make_split_reference.py", dir.path());
        let ws: Watersheds = read_json(&dir.path().join("watershed.json"));
        assert_eq!(
            ws.cases.len(),
            floodings.len(),
            "one watershed per marker set"
        );
        for (f, w) in floodings.iter_mut().zip(ws.cases) {
            let c = &masks.cases[f.case];
            assert_eq!(
                (w.name.as_str(), w.connectivity),
                (c.name.as_str(), f.connectivity.neighbours())
            );
            f.reference = w.labels;
        }
        Fixture {
            masks,
            floodings,
            source: ws.source,
        }
    })
}

fn read_json<T: for<'de> Deserialize<'de>>(path: &Path) -> T {
    let text =
        std::fs::read_to_string(path).unwrap_or_else(|e| panic!("read {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

#[test]
fn squared_distances_equal_scipy_exactly() {
    let mut failures = Vec::new();
    let mut pixels = 0;
    for c in &fixture().masks.cases {
        let got = squared_edt(&bools(c), c.width, c.height);
        pixels += got.len();
        let wrong: Vec<String> = got
            .iter()
            .zip(&c.edt_sq)
            .enumerate()
            .filter(|(_, (&g, &w))| u64::from(g) != w)
            .take(5)
            .map(|(i, (g, w))| format!("({}, {}): {g} vs {w}", i % c.width, i / c.width))
            .collect();
        if got.len() != c.edt_sq.len() || !wrong.is_empty() {
            failures.push(format!(
                "{}: {} against {}",
                c.name,
                wrong.join(", "),
                c.source
            ));
        }
    }
    eprintln!(
        "{pixels} pixels of {} masks compared",
        fixture().masks.cases.len()
    );
    check(
        failures,
        "squared EDT against scipy.ndimage.distance_transform_edt",
    );
}

#[test]
fn watershed_from_the_same_markers_agrees_with_skimage() {
    let fx = fixture();
    let mut failures = Vec::new();
    let (mut worst, mut total, mut same) = (1.0f64, 0usize, 0usize);
    let mut split_regions = 0;
    for f in &fx.floodings {
        let c = &fx.masks.cases[f.case];
        let mask = bools(c);
        let d = squared_edt(&mask, c.width, c.height);
        let ours = watershed(&d, &mask, &f.markers, c.width, c.height, f.connectivity);
        let in_mask = mask.iter().filter(|&&m| m).count();
        let agree = ours
            .iter()
            .zip(&f.reference)
            .zip(&mask)
            .filter(|((a, b), &m)| m && a == b)
            .count();
        let regions = |l: &[u32]| l.iter().filter(|&&v| v != 0).collect::<BTreeSet<_>>().len();
        let share = agree as f64 / in_mask.max(1) as f64;
        worst = worst.min(share);
        total += in_mask;
        same += agree;
        let n_markers = f.markers.iter().filter(|&&v| v != 0).count();
        split_regions += n_markers;
        let who = format!(
            "{} ({}-connected, depth {}, separation {})",
            c.name,
            f.connectivity.neighbours(),
            f.depth,
            f.separation
        );
        if share < MIN_AGREEMENT_PER_MASK {
            failures.push(format!(
                "{who}: {share:.5} of mask pixels agree with {}",
                fx.source
            ));
        }
        if regions(&ours) != regions(&f.reference) || regions(&ours) != n_markers {
            failures.push(format!(
                "{who}: {} regions, skimage {}, markers {n_markers}",
                regions(&ours),
                regions(&f.reference)
            ));
        }
    }
    let overall = same as f64 / total.max(1) as f64;
    eprintln!(
        "watershed: {} floodings, {split_regions} regions, {same} of {total} mask pixels agree ({overall:.5}); worst mask {worst:.5}",
        fx.floodings.len(),
    );
    if overall < MIN_AGREEMENT {
        failures.push(format!(
            "{overall:.5} of all mask pixels agree with {}",
            fx.source
        ));
    }
    check(failures, "watershed against skimage.segmentation.watershed");
}

#[test]
fn splitting_objects_one_by_one_equals_the_whole_frame_flooding() {
    // Our own two paths: split() works per object on a widened bounding box;
    // the whole-frame markers and flooding (compared with skimage above) must
    // give the same pieces, label for label up to numbering.
    let fx = fixture();
    let mut failures = Vec::new();
    let mut pieces = 0;
    for f in &fx.floodings {
        let c = &fx.masks.cases[f.case];
        let mask = bools(c);
        let d = squared_edt(&mask, c.width, c.height);
        let whole = watershed(&d, &mask, &f.markers, c.width, c.height, f.connectivity);
        let pixels: Vec<u16> = c.mask.iter().map(|&v| u16::from(v)).collect();
        let comps = label(&pixels, c.width, c.height, 0, f.connectivity, false);
        let parts = split(
            comps,
            c.width,
            c.height,
            f.connectivity,
            f.depth,
            f.separation,
        );
        pieces += parts.count;
        // Piece k must be exactly one whole-frame label, and no two pieces
        // the same label.
        let mut seen: BTreeMap<u32, u32> = BTreeMap::new();
        let mut covered = 0;
        let mut bad = 0;
        for (r, &k) in parts.runs.iter().zip(&parts.component) {
            for x in r.x0..r.x1 {
                let l = whole[r.y as usize * c.width + x as usize];
                covered += 1;
                if *seen.entry(k).or_insert(l) != l {
                    bad += 1;
                }
            }
        }
        let distinct: BTreeSet<u32> = seen.values().copied().collect();
        let in_mask = mask.iter().filter(|&&m| m).count();
        if bad > 0 || distinct.len() != parts.count || covered != in_mask {
            failures.push(format!(
                "{} ({}-connected, depth {}, separation {}): {bad} pixels differ, {} pieces for {} labels, {covered} of {in_mask} pixels",
                c.name,
                f.connectivity.neighbours(),
                f.depth,
                f.separation,
                parts.count,
                distinct.len()
            ));
        }
    }
    eprintln!("{pieces} pieces compared");
    check(failures, "split() against the whole-frame watershed");
}
