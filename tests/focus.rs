//! The focus measure follows focus, not brightness: a truly blurred frame
//! (Gaussian σ ≥ 2 px) is flagged `out_of_focus` against its position's
//! baseline, and the same sharp field with the lamp at 50% is not (the
//! background and lamp checks catch that instead). Scenes carry shot noise and
//! a camera offset, as a camera's frames do: synthetic scenes, and a real
//! fluorescence field of nuclei dimmed and blurred by SciPy.

// Shared by the test binaries; each uses only part of it.
#[allow(dead_code)]
mod common;

use framewarden::analysis::{analyze_frame, SegmentParams};
use framewarden::decode::{self, DecodeLimits};
use framewarden::frame::Frame;
use framewarden::qc::flags::{frame_flags, FlagKind, PositionContext};
use framewarden::qc::metrics::FrameMetrics;
use framewarden::qc::params::QualitySettings;
use framewarden::synth::{self, SceneSpec};

/// Seeded xorshift with Box-Muller: standard normal numbers.
struct Normal(u64);

impl Normal {
    fn uniform(&mut self) -> f64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        ((self.0 >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    }

    fn next(&mut self) -> f64 {
        let (u, v) = (self.uniform(), self.uniform());
        (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
    }
}

/// Shot noise: a value of `v` ADU holds `v / gain` photoelectrons, whose
/// Poisson spread (√n, normal approximation) is added back in ADU; plus a
/// camera offset of `offset` ADU that no lamp changes.
fn camera(expected: &[f64], gain: f64, offset: f64, seed: u64) -> Vec<u16> {
    let mut normal = Normal(seed | 1);
    expected
        .iter()
        .map(|&v| {
            let electrons = v.max(0.0) / gain;
            let noisy = gain * (electrons + electrons.sqrt() * normal.next()) + offset;
            noisy.round().clamp(0.0, 65535.0) as u16
        })
        .collect()
}

fn frame(pixels: Vec<u16>, width: usize, height: usize) -> Frame {
    Frame {
        width,
        height,
        bit_depth: 16,
        pixels,
    }
}

/// Focus of a frame by the shipped defaults.
fn focus(f: &Frame) -> FrameMetrics {
    FrameMetrics::from(&analyze_frame(f, &[], &SegmentParams::default(), None).unwrap())
}

/// The flags a frame earns against a position whose baseline focus is `base`.
fn out_of_focus(m: &FrameMetrics, base: f64) -> bool {
    let ctx = PositionContext {
        baseline_focus: Some(base),
        ..PositionContext::default()
    };
    frame_flags(m, &QualitySettings::default().flags, &ctx)
        .iter()
        .any(|f| f.kind == FlagKind::OutOfFocus)
}

/// One scene's noiseless light, scaled by `lamp` and blurred by `blur` px.
fn light(spec: &SceneSpec, lamp: f64, blur: f64) -> Vec<f64> {
    let scene = synth::generate(&SceneSpec {
        lamp,
        blur_sigma_px: blur,
        noise_sigma: 0.0,
        ..spec.clone()
    })
    .unwrap();
    scene.frame.pixels.iter().map(|&v| f64::from(v)).collect()
}

#[test]
fn blur_is_flagged_and_a_dimmer_lamp_is_not_on_synthetic_scenes() {
    let spec = SceneSpec {
        width: 512,
        height: 512,
        object_count: 60,
        radius_px: (6.0, 11.0),
        background_level: 0.03,
        object_level: 0.25,
        seed: 11,
        ..SceneSpec::default()
    };
    let (w, h) = (spec.width, spec.height);
    // Baseline: four sharp frames of the same field, fresh noise each.
    let sharp = light(&spec, 1.0, 0.0);
    let base: Vec<f64> = (0..4)
        .map(|i| focus(&frame(camera(&sharp, 2.0, 100.0, 40 + i), w, h)).focus)
        .collect();
    let base = base.iter().sum::<f64>() / base.len() as f64;
    assert!(base > 0.0);
    for (what, lamp, blur, flagged) in [
        ("sharp, lamp at 50%", 0.5, 0.0, false),
        ("sharp, lamp at 30%", 0.3, 0.0, false),
        ("blurred σ = 2 px", 1.0, 2.0, true),
        ("blurred σ = 3 px", 1.0, 3.0, true),
        ("blurred σ = 2 px, lamp at 50%", 0.5, 2.0, true),
    ] {
        let m = focus(&frame(
            camera(&light(&spec, lamp, blur), 2.0, 100.0, 7),
            w,
            h,
        ));
        eprintln!(
            "{what}: focus {:.4} = {:.0}% of the baseline {base:.4}",
            m.focus,
            100.0 * m.focus / base
        );
        assert_eq!(
            out_of_focus(&m, base),
            flagged,
            "{what}: {} against {base}",
            m.focus
        );
    }
}

#[test]
fn blur_is_flagged_and_a_dimmer_lamp_is_not_on_a_real_image() {
    // A real fluorescence field of cell nuclei (mahotas's demo image, MIT;
    // see tests/reference/make_real_focus_frames.py), dimmed and blurred by
    // SciPy and given camera noise by numpy, written by tifffile.
    let dir = tempfile::tempdir().unwrap();
    common::run_reference_script("make_real_focus_frames.py", dir.path());
    let read = |name: &str| {
        let path = dir.path().join(format!("{name}.tif"));
        focus(&decode::read_page(&path, 0, &DecodeLimits::default()).unwrap())
    };
    let base: Vec<f64> = (1..=4)
        .map(|i| read(&format!("baseline{i}")).focus)
        .collect();
    let base = base.iter().sum::<f64>() / base.len() as f64;
    assert!(base > 0.0);
    for (name, flagged) in [
        ("lamp50", false),
        ("lamp30", false),
        ("blur2", true),
        ("blur3", true),
        ("blur2_lamp50", true),
    ] {
        let m = read(name);
        eprintln!(
            "real field, {name}: focus {:.4} = {:.0}% of the baseline {base:.4}",
            m.focus,
            100.0 * m.focus / base
        );
        assert_eq!(
            out_of_focus(&m, base),
            flagged,
            "{name}: {} against {base}",
            m.focus
        );
    }
}
