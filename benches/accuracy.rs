//! Accuracy of the segmentation against exact or annotated truth: per image,
//! the true and found object counts, precision, recall and F1 at IoU ≥ 0.5,
//! and F1 averaged over IoU 0.5, 0.55, …, 0.95, for
//!
//! - ours with the shipped defaults (`Settings::default()`), and with one
//!   thing changed: no size filter, no split, the split's depth or
//!   separation;
//! - scikit-image + SciPy: Otsu, fill holes, the same size filter; and the
//!   same followed by the usual split (distance transform, peak_local_max
//!   markers, watershed), from `benches/accuracy_reference.py`.
//!
//! The images are synthetic crowds with exact truth
//! (`tests/accuracy_support`). All pipelines are
//! scored by the Python script's one implementation of the matching; the
//! Rust implementation scores the same label images and the bench fails if
//! the two disagree. See `benches/README.md`.

#[path = "../tests/accuracy_support/mod.rs"]
mod accuracy_support;

use std::path::{Path, PathBuf};
use std::process::Command;

use accuracy_support::{
    crowds, label_frame, our_labels, python, reference_script, render_crowd, score, Case, Crowd,
    Scores,
};
use framewarden::analysis::{SegmentParams, Split};
use framewarden::decode::{self, DecodeLimits};
use framewarden::settings::Settings;
use framewarden::synth::write_tiff;

/// The reference pipelines of `benches/accuracy_reference.py`, in table order.
const REFERENCE: [&str; 2] = ["skimage-otsu+fill+size", "skimage+split"];

const USAGE: &str = "cargo bench --bench accuracy -- [--min-area PX] [--min-distance PX] \
     [--seeds K] [--keep DIR]";

struct Options {
    min_area: u64,
    min_distance: u64,
    /// Scenes drawn per kind (seeds `seed`, `seed + SEED_STEP`, ...).
    seeds: u64,
    keep: Option<PathBuf>,
}

/// The seed step between the variants of one kind of scene.
const SEED_STEP: u64 = 7919;

fn parse_args() -> Options {
    let mut o = Options {
        // Below the smallest annotated nucleus of the real image (25 px) and
        // far above noise specks (1-3 px); F1 is flat from 10 to 30 px there.
        min_area: 20,
        // About half the radius of a typical nucleus at these scales
        // (10-12 px); see benches/README.md for the sensitivity.
        min_distance: 7,
        seeds: 1,
        keep: None,
    };
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut number = |name: &str| -> u64 {
            args.next()
                .and_then(|v| v.parse().ok())
                .filter(|&n| n > 0)
                .unwrap_or_else(|| {
                    eprintln!("{name} needs a positive number\nusage: {USAGE}");
                    std::process::exit(2)
                })
        };
        match a.as_str() {
            "--min-area" => o.min_area = number("--min-area"),
            "--min-distance" => o.min_distance = number("--min-distance"),
            "--seeds" => o.seeds = number("--seeds"),
            "--keep" => o.keep = args.next().map(PathBuf::from),
            "--bench" => {}
            other => {
                eprintln!("unknown argument {other}\nusage: {USAGE}");
                std::process::exit(2)
            }
        }
    }
    o
}

fn fail(msg: impl std::fmt::Display) -> ! {
    eprintln!("accuracy bench: {msg}");
    std::process::exit(1)
}

fn scores_of(v: &serde_json::Value) -> Scores {
    let n = |k: &str| v[k].as_u64().unwrap_or_else(|| fail(format!("no {k}"))) as usize;
    let mut tp = [0; 10];
    for (i, slot) in tp.iter_mut().enumerate() {
        *slot = v["tp"][i].as_u64().unwrap_or_else(|| fail("no tp")) as usize;
    }
    Scores {
        truth: n("truth"),
        predicted: n("predicted"),
        tp,
    }
}

fn main() {
    let o = parse_args();
    let tmp = tempfile::tempdir().unwrap_or_else(|e| fail(e));
    let root: PathBuf = o.keep.clone().unwrap_or_else(|| tmp.path().to_path_buf());

    let defaults = Settings::default().pipeline.segment;
    let mut unfiltered = defaults.clone();
    unfiltered.filter.min_area_px = 0;
    let split = |min_depth_px: f64, min_separation_px: f64| SegmentParams {
        split: Split::Distance {
            min_depth_px,
            min_separation_px,
        },
        ..defaults.clone()
    };
    let (depth, separation) = (
        Split::DEFAULT_MIN_DEPTH_PX,
        Split::DEFAULT_MIN_SEPARATION_PX,
    );
    let ours = [
        ("ours, defaults".to_string(), defaults.clone()),
        ("ours, no size filter".to_string(), unfiltered),
        (
            "ours, no split".to_string(),
            SegmentParams {
                split: Split::None,
                ..defaults.clone()
            },
        ),
        (
            format!("ours, depth {depth} px, no separation"),
            split(depth, 0.0),
        ),
        (
            format!("ours, depth 1 px, separation {separation} px"),
            split(1.0, separation),
        ),
        (
            format!("ours, depth {depth} px, separation 7 px"),
            split(depth, 7.0),
        ),
    ];

    let cases: Vec<Case> = crowds()
        .into_iter()
        .flat_map(|c| {
            (0..o.seeds).map(move |k| {
                let mut case = render_crowd(&Crowd {
                    seed: c.seed + k * SEED_STEP,
                    ..c.clone()
                });
                if k > 0 {
                    case.name = format!("{} #{}", case.name, k + 1);
                }
                case
            })
        })
        .collect();

    // Write every image, truth and our label images; score ours in Rust.
    let mut manifest = Vec::new();
    let mut rust_scores: Vec<Vec<(String, Scores)>> = Vec::new();
    for (i, case) in cases.iter().enumerate() {
        let (w, h) = (case.frame.width, case.frame.height);
        let dir = root.join(format!("case{i}"));
        std::fs::create_dir_all(&dir).unwrap_or_else(|e| fail(e));
        let write = |name: &str, f: &framewarden::frame::Frame| -> PathBuf {
            let p = dir.join(name);
            write_tiff(&p, f).unwrap_or_else(|e| fail(e));
            p
        };
        let image = write("image.tif", &case.frame);
        let truth = write("truth.tif", &label_frame(&case.truth, w, h));
        let mut mine = serde_json::Map::new();
        let mut scored = Vec::new();
        for (j, (name, params)) in ours.iter().enumerate() {
            let labels = our_labels(&case.frame, params);
            let p = write(&format!("ours{j}.tif"), &label_frame(&labels, w, h));
            mine.insert(name.clone(), p.to_string_lossy().into());
            scored.push((name.clone(), score(&case.truth, &labels)));
        }
        rust_scores.push(scored);
        manifest.push(serde_json::json!({
            "name": case.name,
            "image": image,
            "truth": truth,
            "ours": mine,
            "out_dir": dir,
        }));
    }
    let manifest_path = root.join("manifest.json");
    let body = serde_json::json!({
        "min_area_px": o.min_area,
        "min_distance": o.min_distance,
        "cases": manifest,
    });
    std::fs::write(&manifest_path, body.to_string()).unwrap_or_else(|e| fail(e));

    let out = Command::new(python())
        .arg(reference_script())
        .arg("run")
        .arg(&manifest_path)
        .output()
        .unwrap_or_else(|e| {
            fail(format!(
                "cannot run {} ({e}); set FRAMEWARDEN_PYTHON",
                python()
            ))
        });
    if !out.status.success() {
        fail(format!(
            "{} failed: {}\n(needs numpy, scipy, scikit-image, tifffile: \
             python3 -m pip install -r tests/reference/requirements.txt)",
            reference_script().display(),
            String::from_utf8_lossy(&out.stderr)
        ));
    }
    let answer: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap_or_else(|e| fail(e));

    println!(
        "min area {} px for the size-filtered pipelines; peak_local_max min_distance {} px\n",
        o.min_area, o.min_distance
    );
    println!("| image | pipeline | truth | found | precision@0.5 | recall@0.5 | F1@0.5 | F1 mean 0.5:0.95 |");
    println!("|---|---|---:|---:|---:|---:|---:|---:|");
    let mut agreed = 0;
    for (i, case) in answer["cases"]
        .as_array()
        .unwrap_or_else(|| fail("no cases"))
        .iter()
        .enumerate()
    {
        let name = case["name"].as_str().unwrap_or("?");
        let py = case["scores"]
            .as_object()
            .unwrap_or_else(|| fail("no scores"));
        // Rust scores of the same label images: ours from memory, the
        // reference's from the TIFFs the script wrote.
        let mut rust = rust_scores[i].clone();
        for ref_name in REFERENCE {
            let path = case["written"][ref_name]
                .as_str()
                .unwrap_or_else(|| fail(format!("no {ref_name} label image")));
            let f = decode::read_page(Path::new(path), 0, &DecodeLimits::default())
                .unwrap_or_else(|e| fail(e));
            let labels: Vec<u32> = f.pixels.iter().map(|&v| u32::from(v)).collect();
            rust.push((ref_name.to_string(), score(&cases[i].truth, &labels)));
        }
        for (pipeline, rs) in &rust {
            let s = scores_of(&py[pipeline]);
            if s != *rs {
                fail(format!(
                    "{name} / {pipeline}: Python scores {s:?}, Rust scores {rs:?}"
                ));
            }
            agreed += 1;
            println!(
                "| {name} | {pipeline} | {} | {} | {:.3} | {:.3} | {:.3} | {:.3} |",
                s.truth,
                s.predicted,
                s.precision(0),
                s.recall(0),
                s.f1(0),
                s.mean_f1()
            );
        }
    }
    println!(
        "\nRust and Python matching agree on all {agreed} label images (TP at every threshold)."
    );
    if let Some(k) = &o.keep {
        println!("images, truths and label images kept in {}", k.display());
    }
}
