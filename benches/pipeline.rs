//! Speed of the full per-frame pipeline (decode + Otsu + fill + label +
//! measure + frame QC) on 2048 × 2048 16-bit frames, side by side in one run
//! with the same pipeline on scikit-image/SciPy and on OpenCV
//! (`benches/reference_pipelines.py`). Prints ms/frame, the ratios against the
//! targets and a per-stage breakdown of ours. Timings are reported, never
//! asserted; see `benches/README.md`.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use framewarden::analysis::{
    dim_objects, label, measure, quality, split, threshold, Connectivity, ObjectFilter, Split,
};
use framewarden::decode::{self, DecodeLimits};
use framewarden::pipeline::analyze_file;
use framewarden::pipeline::PipelineParams;
use framewarden::synth::{self, SceneSpec};

/// Where the reference tests keep their Python venv (they create it; this bench
/// only uses it).
#[path = "../tests/common/venv.rs"]
mod venv;

/// Targets: our time at most 1/4 of OpenCV's and 1/25 of scikit-image's.
const TARGET_VS_OPENCV: f64 = 4.0;
const TARGET_VS_SKIMAGE: f64 = 25.0;
/// Target: splitting touching objects at most doubles our pipeline's time.
const TARGET_SPLIT_COST: f64 = 2.0;

/// The system allocator counting live and peak heap bytes, so the bench can
/// report how many frame-sized buffers one analysis holds at once.
#[path = "../tests/common/counting_alloc.rs"]
mod counting_alloc;
use counting_alloc::{peak_heap_during, CountingAlloc};

#[global_allocator]
static ALLOC: CountingAlloc = CountingAlloc;

const USAGE: &str = "cargo bench --bench pipeline -- [--frames N] [--reps N] [--size PX] [--no-reference] [--keep DIR]";

struct Options {
    frames: usize,
    reps: usize,
    size: usize,
    reference: bool,
    keep: Option<PathBuf>,
}

fn parse_args() -> Options {
    let mut o = Options {
        frames: 3,
        reps: 3,
        size: 2048,
        reference: true,
        keep: None,
    };
    let mut args = std::env::args().skip(1);
    while let Some(a) = args.next() {
        let mut number = |name: &str| -> usize {
            args.next()
                .and_then(|v| v.parse().ok())
                .filter(|&n| n > 0)
                .unwrap_or_else(|| {
                    eprintln!("{name} needs a positive number\nusage: {USAGE}");
                    std::process::exit(2)
                })
        };
        match a.as_str() {
            "--frames" => o.frames = number("--frames"),
            "--reps" => o.reps = number("--reps"),
            "--size" => o.size = number("--size"),
            "--no-reference" => o.reference = false,
            "--keep" => o.keep = args.next().map(PathBuf::from),
            // cargo passes `--bench` to harness-less benches.
            "--bench" => {}
            other => {
                eprintln!("unknown argument {other}\nusage: {USAGE}");
                std::process::exit(2)
            }
        }
    }
    o
}

/// A plausible overnight frame: ~600 cells of varied size and shape, some
/// ring-shaped, a few saturated, mild blur, noise and a gentle gradient.
fn scene(size: usize, seed: u64) -> SceneSpec {
    let scale = size as f64 / 2048.0;
    SceneSpec {
        width: size,
        height: size,
        bit_depth: 16,
        object_count: ((600.0 * scale * scale) as usize).max(1),
        radius_px: (6.0, 20.0),
        elongation_max: 1.8,
        background_level: 0.08,
        object_level: 0.35,
        object_level_spread: 0.3,
        noise_sigma: 0.01,
        gradient: 0.15,
        gradient_angle_rad: seed as f64,
        blur_sigma_px: 1.0,
        hole_fraction: 0.2,
        saturated_fraction: 0.01,
        min_gap_px: 4.0,
        seed,
        ..SceneSpec::default()
    }
}

/// What every pipeline reports per frame, for the same-work check.
#[derive(Debug, Clone, PartialEq)]
struct Summary {
    object_count: u64,
    threshold: u64,
    background_level: f64,
    saturation_fraction: f64,
    focus: f64,
    illumination_change: f64,
}

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    let n = v.len();
    if n == 0 {
        f64::NAN
    } else if n % 2 == 1 {
        v[n / 2]
    } else {
        (v[n / 2 - 1] + v[n / 2]) / 2.0
    }
}

fn ms(t: Instant) -> f64 {
    t.elapsed().as_secs_f64() * 1e3
}

/// The pipeline's defaults without the split: the same steps as the
/// reference pipelines (which do not split).
fn unsplit_params() -> PipelineParams {
    let mut params = PipelineParams::default();
    params.segment.split = Split::None;
    params
}

/// The pipeline's parameters with splitting on at its default depth and
/// separation.
fn split_params() -> PipelineParams {
    let mut params = PipelineParams::default();
    params.segment.split = Split::Distance {
        min_depth_px: Split::DEFAULT_MIN_DEPTH_PX,
        min_separation_px: Split::DEFAULT_MIN_SEPARATION_PX,
    };
    params
}

fn time_ours(files: &[PathBuf], reps: usize, params: &PipelineParams) -> (f64, Vec<Summary>) {
    let run =
        |f: &Path| analyze_file(f, params).unwrap_or_else(|e| panic!("bench frame failed: {e}"));
    run(&files[0]); // warm-up
    let mut times = Vec::new();
    let mut summaries = Vec::new();
    for _ in 0..reps {
        summaries.clear();
        for f in files {
            let t0 = Instant::now();
            let r = run(f).result;
            times.push(ms(t0));
            summaries.push(Summary {
                object_count: r.object_count as u64,
                threshold: r.threshold as u64,
                background_level: r.background_level,
                saturation_fraction: r.saturation_fraction,
                focus: r.focus,
                illumination_change: r.illumination_change,
            });
        }
    }
    (median(times), summaries)
}

const STAGES: [&str; 8] = [
    "decode",
    "histogram",
    "Otsu + separability",
    "label + fill",
    "measure",
    "frame QC",
    "split (when on)",
    "dim objects",
];

/// Median ms of each stage, called one by one through the public modules the
/// pipeline is built from.
fn time_stages(files: &[PathBuf], reps: usize) -> [f64; 8] {
    let limits = DecodeLimits::default();
    let filter = ObjectFilter::default();
    let mut times: [Vec<f64>; 8] = Default::default();
    for _ in 0..reps {
        for f in files {
            let t = Instant::now();
            let frame = decode::read_page(f, 0, &limits)
                .unwrap_or_else(|e| panic!("bench frame failed: {e}"));
            times[0].push(ms(t));
            let t = Instant::now();
            let hist = threshold::Histogram::of(&frame);
            times[1].push(ms(t));
            let t = Instant::now();
            let level = threshold::otsu(&hist);
            std::hint::black_box(threshold::separability(&hist));
            times[2].push(ms(t));
            let t = Instant::now();
            let comps = label::label(
                &frame.pixels,
                frame.width,
                frame.height,
                level,
                Connectivity::Eight,
                true,
            );
            times[3].push(ms(t));
            let copy = comps.clone();
            let t = Instant::now();
            std::hint::black_box(split::split(
                copy,
                frame.width,
                frame.height,
                Connectivity::Eight,
                Split::DEFAULT_MIN_DEPTH_PX,
                Split::DEFAULT_MIN_SEPARATION_PX,
            ));
            times[6].push(ms(t));
            let t = Instant::now();
            std::hint::black_box(measure::measure(&frame, &[], &comps, &filter, None));
            times[4].push(ms(t));
            let t = Instant::now();
            std::hint::black_box(quality::assess(&frame, &hist, None, level));
            times[5].push(ms(t));
            let t = Instant::now();
            std::hint::black_box(dim_objects::dim_objects(
                &frame.pixels,
                frame.width,
                frame.height,
                &hist,
                level,
                Connectivity::Eight,
                &filter,
                None,
            ));
            times[7].push(ms(t));
        }
    }
    times.map(median)
}

/// The interpreter for the reference pipelines: `FRAMEWARDEN_PYTHON` when set,
/// else the reference tests' venv when it exists, else `python3` from PATH
/// (after saying how to get the venv).
fn reference_python() -> PathBuf {
    if let Some(python) = venv::python_override() {
        return python;
    }
    let python = venv::venv_python(&venv::venv_dir());
    if python.exists() {
        return python;
    }
    eprintln!(
        "no Python reference venv at {}: `cargo test --release --test reference` creates it \
         (or set {} to an interpreter with the packages of tests/reference/requirements.txt); \
         trying python3 from PATH",
        venv::venv_dir().display(),
        venv::PYTHON_OVERRIDE
    );
    PathBuf::from("python3")
}

/// Runs the Python reference pipelines; `None` (with the reason printed) when
/// they cannot run here.
fn time_reference(files: &[PathBuf], reps: usize) -> Option<serde_json::Value> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/reference_pipelines.py");
    let python = reference_python();
    let out = Command::new(&python)
        .arg(&script)
        .args(["--json", "--reps", &reps.to_string()])
        .args(files)
        .output();
    match out {
        Ok(out) if out.status.success() => match serde_json::from_slice(&out.stdout) {
            Ok(v) => Some(v),
            Err(e) => {
                eprintln!("reference pipelines printed no JSON ({e})");
                None
            }
        },
        Ok(out) => {
            eprintln!(
                "reference pipelines failed under {}:\n{}",
                python.display(),
                String::from_utf8_lossy(&out.stderr)
            );
            None
        }
        Err(e) => {
            eprintln!(
                "cannot start {}: {e} (set {})",
                python.display(),
                venv::PYTHON_OVERRIDE
            );
            None
        }
    }
}

fn reference_summaries(v: &serde_json::Value) -> Vec<Summary> {
    let num = |f: &serde_json::Value, k: &str| f[k].as_f64().unwrap_or(f64::NAN);
    v["frames"]
        .as_array()
        .map(|frames| {
            frames
                .iter()
                .map(|f| Summary {
                    object_count: f["object_count"].as_u64().unwrap_or(u64::MAX),
                    threshold: f["threshold"].as_u64().unwrap_or(u64::MAX),
                    background_level: num(f, "background_level"),
                    saturation_fraction: num(f, "saturation_fraction"),
                    focus: num(f, "focus"),
                    illumination_change: num(f, "illumination_change"),
                })
                .collect()
        })
        .unwrap_or_default()
}

fn main() {
    let opts = parse_args();
    let tmp = tempfile::tempdir().expect("a temporary folder for the bench frames");
    let dir = opts
        .keep
        .clone()
        .unwrap_or_else(|| tmp.path().to_path_buf());
    std::fs::create_dir_all(&dir).expect("the bench frame folder can be created");

    let t = Instant::now();
    let mut files = Vec::new();
    let mut truth = Vec::new();
    for seed in 1..=opts.frames as u64 {
        let s = synth::generate(&scene(opts.size, seed)).expect("the bench scene fits its frame");
        let path = dir.join(format!("bench-{seed:02}.tif"));
        synth::write_tiff(&path, &s.frame).expect("the bench frame can be written");
        truth.push(s.object_count());
        files.push(path);
    }
    println!(
        "{} frames of {}x{} 16-bit, uncompressed TIFF in {} (synth + write {:.0} ms/frame), {} reps, one thread",
        opts.frames,
        opts.size,
        opts.size,
        dir.display(),
        ms(t) / opts.frames as f64,
        opts.reps
    );

    let (ours_ms, ours) = time_ours(&files, opts.reps, &unsplit_params());
    let (split_ms, split_summaries) = time_ours(&files, opts.reps, &split_params());
    let params = PipelineParams::default();
    let (_, peak) = peak_heap_during(|| analyze_file(&files[0], &params));
    let frame_bytes = (opts.size * opts.size * 2) as f64;
    let stages = time_stages(&files, opts.reps);
    let reference = if opts.reference {
        time_reference(&files, opts.reps)
    } else {
        None
    };

    println!(
        "\nmedian ms/frame (full pipeline: decode + Otsu + fill + label + measure + dim objects + frame QC)"
    );
    println!("  framewarden   {ours_ms:9.1}");
    println!(
        "  + split       {split_ms:9.1}   split on/off = {:.2}   target ≤ {TARGET_SPLIT_COST:.0}: {}",
        split_ms / ours_ms,
        if split_ms <= TARGET_SPLIT_COST * ours_ms {
            "met"
        } else {
            "NOT met"
        }
    );
    let mut rows = vec![("framewarden", ours.clone()), ("+ split", split_summaries)];
    if let Some(v) = &reference {
        for (name, key, target) in [
            ("OpenCV", "opencv", TARGET_VS_OPENCV),
            ("scikit-image", "skimage", TARGET_VS_SKIMAGE),
        ] {
            let their_ms = v[key]["ms_per_frame"].as_f64().unwrap_or(f64::NAN);
            let speedup = their_ms / ours_ms;
            println!(
                "  {name:13} {their_ms:9.1}   ours/{name} = 1/{speedup:.1}   target ≤ 1/{target:.0}: {}",
                if speedup >= target { "met" } else { "NOT met" }
            );
            rows.push((name, reference_summaries(&v[key])));
        }
        let cv_ms = v["opencv"]["ms_per_frame"].as_f64().unwrap_or(f64::NAN);
        let cv_split_ms = v["opencv_split"]["ms_per_frame"]
            .as_f64()
            .unwrap_or(f64::NAN);
        println!(
            "  OpenCV+split  {cv_split_ms:9.1}   split on/off = {:.2}   ours+split/OpenCV+split = 1/{:.1}",
            cv_split_ms / cv_ms,
            cv_split_ms / split_ms
        );
        rows.push(("OpenCV+split", reference_summaries(&v["opencv_split"])));
    }

    println!(
        "\npeak heap in one analyze_file: {:.1} MiB = {:.2} frame-sized buffers (16-bit, {:.1} MiB each)",
        peak as f64 / 1048576.0,
        peak as f64 / frame_bytes,
        frame_bytes / 1048576.0
    );

    println!(
        "\nour stages, median ms/frame (sum {:.1})",
        stages.iter().sum::<f64>()
    );
    for (name, t) in STAGES.iter().zip(stages) {
        println!("  {name:20} {t:8.1}");
    }

    println!("\nsame work? per frame: objects (truth), threshold, background, saturation, focus, illumination");
    for (i, t) in truth.iter().enumerate() {
        println!("  frame {} (truth {t} objects)", i + 1);
        for (name, summaries) in &rows {
            if let Some(s) = summaries.get(i) {
                let flag = if s.object_count == *t as u64 {
                    ""
                } else {
                    "  <- count differs from truth"
                };
                println!(
                    "    {name:13} {:5} {:6} {:9.1} {:.2e} {:12.4e} {:.4}{flag}",
                    s.object_count,
                    s.threshold,
                    s.background_level,
                    s.saturation_fraction,
                    s.focus,
                    s.illumination_change
                );
            }
        }
    }
}
