//! The README's main command, `framewarden demo`, run as a user runs it: the
//! real binary replays the built-in acquisition into a temporary folder while
//! its watch service records it, then prints the status. About 30 s.

use std::process::Command;

#[test]
fn the_demo_records_every_frame_and_explains_its_alerts() {
    let out = Command::new(env!("CARGO_BIN_EXE_framewarden"))
        .arg("demo")
        .output()
        .expect("the framewarden binary starts");
    let stdout = String::from_utf8(out.stdout).unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{stdout}\n{stderr}");
    let has = |needle: &str| {
        assert!(
            stdout.contains(needle),
            "{needle:?} missing from the demo's output:\n{stdout}"
        );
    };
    // 8 wells x 12 time points; one file is cut off half-way and stays so.
    has("frames: 96 seen, 95 done, 0 queued, 1 failed");
    has("B03_t0006_nuclei.tif: still incomplete after");
    // The dimming lamp and the growing gradient raise drift alerts, one per
    // cause naming the wells it reached, each with its evidence; the run
    // completes with the lamp still dim, which closes them with a final message.
    has("] drift:background_level since");
    has("background level (lamp brightness) drifting down at ");
    has("] drift:illumination_change since");
    has("CUSUM");
    has("closed with the run: the run is complete with background level (lamp brightness) still drifting at ");
    has("alerts (0 open):");
    // The late frames are flagged for uneven illumination and recounted flat.
    has("uneven_illumination: uneven illumination: the background changes by");
    has("the count is taken from the recount");
    // The per-well summary: every well's cells divide through the run, and
    // the cut-off file is B03's.
    has("per position:");
    for well in ["A01", "A02", "A03", "A04", "B01", "B02", "B03", "B04"] {
        let line = stdout
            .lines()
            .find(|l| l.trim_start().starts_with(well))
            .unwrap_or_else(|| panic!("no {well} line:\n{stdout}"));
        // position (well and channel), done, failed, flagged, first, "->", last, (min-max)
        let words: Vec<&str> = line.split_whitespace().rev().collect();
        let failed = if well == "B03" { "1" } else { "0" };
        assert_eq!(words[5], failed, "{line}");
        let (first, last): (u32, u32) = (words[3].parse().unwrap(), words[1].parse().unwrap());
        assert!(last > first, "{line}");
    }
    // Nothing is left behind without --keep.
    let acquisition = stdout
        .lines()
        .find_map(|l| l.split(" time points into ").nth(1))
        .unwrap_or_else(|| panic!("no folder named:\n{stdout}"));
    let folder = std::path::Path::new(acquisition).parent().unwrap();
    assert!(!folder.exists(), "{} left behind", folder.display());
}
