//! `[limits]` bound memory, not just pixels: files that once took one worker to
//! gigabytes stay within the bound README.md states for one worker,
//! `48 bytes x pixels + 48 MiB` (16 MiB of it for the PNG decoder's own
//! allocations, the rest for the program itself). Peak memory is
//! the child's `ru_maxrss` (getrusage(2)), read by a small Python wrapper.

mod common;

use std::path::Path;
use std::process::Command;

/// The stated bound, in bytes, for a frame of `pixels` pixels.
fn bound(pixels: u64) -> u64 {
    48 * pixels + (48 << 20)
}

/// Runs `framewarden analyze FILE` and returns (exit status, peak RSS bytes).
fn analyze_peak(file: &Path) -> (i32, u64) {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/make_memory_cases.py");
    let out = Command::new(common::reference_python())
        .arg(script)
        .arg("--peak")
        .arg(env!("CARGO_BIN_EXE_framewarden"))
        .arg("analyze")
        .arg(file)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    (
        v["status"].as_i64().unwrap() as i32,
        v["peak_kib"].as_u64().unwrap() * 1024,
    )
}

#[test]
fn hostile_files_stay_within_the_stated_bound() {
    let dir = tempfile::tempdir().unwrap();
    common::run_reference_script("make_memory_cases.py", dir.path());
    let side: u64 = 2000;
    let mut failures = Vec::new();
    // A 64 x 64 PNG whose ICC profile inflates to 1 GiB: before the decoder's
    // allocations were capped it peaked above 1 GiB.
    // 2000^2 dots: 1,000,000 separate objects, over the default max_objects.
    // Uniform noise: the costliest frame per pixel measured.
    for (file, pixels) in [
        ("inflating_icc.png", 64 * 64),
        ("dots.tif", side * side),
        ("noise.tif", side * side),
    ] {
        let (status, peak) = analyze_peak(&dir.path().join(file));
        eprintln!("{file}: exit {status}, peak {} MiB", peak >> 20);
        if peak > bound(pixels) {
            failures.push(format!(
                "{file}: peak {} MiB above the bound {} MiB",
                peak >> 20,
                bound(pixels) >> 20
            ));
        }
    }
    common::check(failures, "peak memory of one analysis");
}

#[test]
fn a_frame_with_more_objects_than_the_limit_is_refused_with_the_reason() {
    let dir = tempfile::tempdir().unwrap();
    common::run_reference_script("make_memory_cases.py", dir.path());
    let out = Command::new(env!("CARGO_BIN_EXE_framewarden"))
        .arg("analyze")
        .arg(dir.path().join("dots.tif"))
        .output()
        .unwrap();
    let text =
        String::from_utf8_lossy(&out.stdout).to_string() + &String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{text}");
    // 2000^2 / 4 = 1,000,000 isolated dots (hand count: every other row and column).
    assert!(
        text.contains("1000000 components above the threshold") && text.contains("max_objects"),
        "{text}"
    );
}
