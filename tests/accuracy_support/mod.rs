//! Shared by `tests/accuracy.rs` and `benches/accuracy.rs`: object matching
//! at IoU thresholds, synthetic crowded scenes with exact truth, and our
//! pipeline as a label image.
//!
//! Matching follows the nucleus-segmentation literature (e.g. Caicedo et al.
//! 2019, Nature Methods 16:1247): a predicted and a true object match at
//! threshold `t` when their IoU ≥ `t`, each object matching at most one other.
//! For `t ≥ 0.5` the pairing is unique: an object that overlaps two others
//! with IoU ≥ 0.5 each must contain both exactly (IoU = 0.5 on the nose), and
//! those two then have no other candidate, so every maximal one-to-one
//! assignment has the same size and greedy by descending IoU is one.
//! F1 = 2TP / (2TP + FP + FN). `benches/accuracy_reference.py` implements the
//! same matching in Python; the bench and the test check that both agree.

#![allow(dead_code)] // each of the test and the bench uses a part

use std::path::{Path, PathBuf};

use framewarden::analysis::{segment_frame, SegmentParams};
use framewarden::frame::Frame;

/// IoU thresholds 0.50, 0.55, …, 0.95.
pub const THRESHOLDS: [f64; 10] = [0.5, 0.55, 0.6, 0.65, 0.7, 0.75, 0.8, 0.85, 0.9, 0.95];

/// The outcome of matching one label image against the truth.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Scores {
    /// Objects in the truth.
    pub truth: usize,
    /// Objects predicted.
    pub predicted: usize,
    /// Matched pairs at each of [`THRESHOLDS`].
    pub tp: [usize; 10],
}

impl Scores {
    pub fn precision(&self, i: usize) -> f64 {
        ratio(self.tp[i], self.predicted)
    }

    pub fn recall(&self, i: usize) -> f64 {
        ratio(self.tp[i], self.truth)
    }

    /// 2TP / (2TP + FP + FN) = 2TP / (predicted + truth); 1 when both are empty.
    pub fn f1(&self, i: usize) -> f64 {
        if self.truth + self.predicted == 0 {
            return 1.0;
        }
        2.0 * self.tp[i] as f64 / (self.truth + self.predicted) as f64
    }

    /// F1 averaged over the ten thresholds.
    pub fn mean_f1(&self) -> f64 {
        (0..THRESHOLDS.len()).map(|i| self.f1(i)).sum::<f64>() / THRESHOLDS.len() as f64
    }
}

fn ratio(a: usize, b: usize) -> f64 {
    if b == 0 {
        0.0
    } else {
        a as f64 / b as f64
    }
}

/// Matches `pred` against `truth` (label images of one size, 0 = background;
/// labels need not be consecutive) at every threshold of [`THRESHOLDS`].
pub fn score(truth: &[u32], pred: &[u32]) -> Scores {
    assert_eq!(truth.len(), pred.len(), "label images of different sizes");
    let n = |l: &[u32]| {
        let max = l.iter().copied().max().unwrap_or(0) as usize;
        let mut area = vec![0u64; max + 1];
        for &v in l {
            area[v as usize] += 1;
        }
        area
    };
    let (area_t, area_p) = (n(truth), n(pred));
    let count = |a: &[u64]| a.iter().skip(1).filter(|&&x| x > 0).count();
    // Overlapping pixels as (truth, prediction) keys, counted by sorting.
    let mut keys: Vec<u64> = truth
        .iter()
        .zip(pred)
        .filter(|(&t, &p)| t > 0 && p > 0)
        .map(|(&t, &p)| (u64::from(t) << 32) | u64::from(p))
        .collect();
    keys.sort_unstable();
    let mut pairs: Vec<(f64, u32, u32)> = Vec::new();
    for run in keys.chunk_by(|a, b| a == b) {
        let (t, p) = ((run[0] >> 32) as u32, run[0] as u32);
        let inter = run.len() as f64;
        let union = (area_t[t as usize] + area_p[p as usize]) as f64 - inter;
        pairs.push((inter / union, t, p));
    }
    // Descending IoU, ties by (truth, prediction) label, as the Python side.
    pairs.sort_by(|a, b| b.0.total_cmp(&a.0).then((a.1, a.2).cmp(&(b.1, b.2))));
    let mut tp = [0usize; 10];
    for (slot, &th) in tp.iter_mut().zip(&THRESHOLDS) {
        let mut used_t = vec![false; area_t.len()];
        let mut used_p = vec![false; area_p.len()];
        for &(iou, t, p) in &pairs {
            if iou < th - 1e-12 {
                break;
            }
            if used_t[t as usize] || used_p[p as usize] {
                continue;
            }
            used_t[t as usize] = true;
            used_p[p as usize] = true;
            *slot += 1;
        }
    }
    Scores {
        truth: count(&area_t),
        predicted: count(&area_p),
        tp,
    }
}

/// Our pipeline's label image: the shipped analysis itself
/// ([`framewarden::analysis::segment_frame`]), labels numbered as its objects.
pub fn our_labels(frame: &Frame, params: &SegmentParams) -> Vec<u32> {
    segment_frame(frame, &[], params, None)
        .expect("the frame analyzes")
        .labels
}

/// One image to score: the frame, its exact truth, a name.
pub struct Case {
    pub name: String,
    pub frame: Frame,
    pub truth: Vec<u32>,
}

/// A synthetic scene of discs and ellipses that may touch and overlap.
#[derive(Debug, Clone)]
pub struct Crowd {
    pub name: &'static str,
    pub size: usize,
    /// Objects tried; placement stops early when no more fit.
    pub count: usize,
    /// Semi-major axis range, px.
    pub radius_px: (f64, f64),
    /// Largest semi-major / semi-minor ratio (1 = discs).
    pub elongation_max: f64,
    /// Closest allowed centre distance as a fraction of the two semi-major
    /// axes' sum: 1 + gap keeps objects apart, below 1 lets them overlap by
    /// up to `1 - factor` of that sum.
    pub min_distance_factor: f64,
    /// Extra clear pixels between bounding circles (for separated scenes).
    pub gap_px: f64,
    /// Object level range, fraction of full scale (uniform).
    pub level: (f64, f64),
    pub background: f64,
    pub noise_sigma: f64,
    pub blur_sigma_px: f64,
    /// How much dimmer an object's rim is than its centre (0 = flat): the
    /// level falls as `1 - dome × q`, `q` the normalised radius squared, so
    /// touching objects meet along a dim seam, as stained nuclei do.
    pub dome: f64,
    /// Relative amplitude of a smooth multiplicative texture inside objects
    /// (chromatin-like; white noise blurred at 2 px, unit spread; 0 = none).
    pub texture: f64,
    pub seed: u64,
}

/// The synthetic scenes of the benchmark and the test: separated objects,
/// touching discs, crowded overlapping ellipses, and dim next to bright.
pub fn crowds() -> Vec<Crowd> {
    let base = Crowd {
        name: "",
        size: 512,
        count: 0,
        radius_px: (8.0, 12.0),
        elongation_max: 1.0,
        min_distance_factor: 1.0,
        gap_px: 0.0,
        level: (0.3, 0.6),
        background: 0.08,
        noise_sigma: 0.01,
        blur_sigma_px: 1.0,
        dome: 0.0,
        texture: 0.0,
        seed: 1,
    };
    vec![
        Crowd {
            name: "synth: separate",
            count: 80,
            radius_px: (6.0, 12.0),
            elongation_max: 1.5,
            gap_px: 3.0,
            seed: 11,
            ..base.clone()
        },
        Crowd {
            name: "synth: touching discs",
            count: 400,
            min_distance_factor: 0.85,
            seed: 12,
            ..base.clone()
        },
        Crowd {
            name: "synth: crowded ellipses",
            count: 600,
            radius_px: (7.0, 13.0),
            elongation_max: 1.7,
            min_distance_factor: 0.75,
            noise_sigma: 0.015,
            blur_sigma_px: 1.5,
            seed: 13,
            ..base.clone()
        },
        Crowd {
            name: "synth: dim and bright",
            count: 200,
            radius_px: (6.0, 12.0),
            elongation_max: 1.4,
            min_distance_factor: 0.9,
            level: (0.12, 0.7),
            background: 0.06,
            seed: 14,
            ..base.clone()
        },
        Crowd {
            name: "synth: textured nuclei",
            count: 350,
            radius_px: (7.0, 14.0),
            elongation_max: 1.6,
            min_distance_factor: 0.8,
            level: (0.25, 0.6),
            noise_sigma: 0.02,
            blur_sigma_px: 1.2,
            dome: 0.45,
            texture: 0.15,
            seed: 15,
            ..base
        },
    ]
}

struct Ellipse {
    cx: f64,
    cy: f64,
    a: f64,
    b: f64,
    cos: f64,
    sin: f64,
    level: f64,
}

impl Ellipse {
    /// (u/a)² + (v/b)² at pixel centre (x, y): ≤ 1 inside.
    fn q(&self, x: f64, y: f64) -> f64 {
        let (dx, dy) = (x - self.cx, y - self.cy);
        let u = dx * self.cos + dy * self.sin;
        let v = -dx * self.sin + dy * self.cos;
        (u / self.a).powi(2) + (v / self.b).powi(2)
    }
}

/// SplitMix64: a small seeded generator, so scenes are the same everywhere.
struct Rng(u64);

impl Rng {
    fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    fn unit(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 / (1u64 << 53) as f64
    }

    fn normal(&mut self) -> f64 {
        let u = self.unit().max(1e-300);
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * self.unit()).cos()
    }
}

/// Draws a crowd and its exact truth. A pixel (sampled at its centre) belongs
/// to the objects whose ellipse contains it; where ellipses overlap it goes to
/// the one whose normalised radius `(u/a)² + (v/b)²` is smallest (for two
/// equal discs, the perpendicular bisector). The ideal image has each owned
/// pixel at its owner's level; it is blurred, noised and quantised to 16 bits.
pub fn render_crowd(c: &Crowd) -> Case {
    let mut rng = Rng(c.seed);
    let s = c.size as f64;
    let mut objects: Vec<Ellipse> = Vec::new();
    for _ in 0..c.count {
        let a = c.radius_px.0 + (c.radius_px.1 - c.radius_px.0) * rng.unit();
        let b = a / (1.0 + (c.elongation_max - 1.0) * rng.unit());
        let angle = std::f64::consts::PI * rng.unit();
        let level = c.level.0 + (c.level.1 - c.level.0) * rng.unit();
        // Centres keep the whole ellipse 2 px inside the frame.
        let margin = a + 2.0;
        let placed = (0..200).find_map(|_| {
            let cx = margin + (s - 1.0 - 2.0 * margin) * rng.unit();
            let cy = margin + (s - 1.0 - 2.0 * margin) * rng.unit();
            let clear = objects.iter().all(|o| {
                let need = c.min_distance_factor * (o.a + a) + c.gap_px;
                (o.cx - cx).hypot(o.cy - cy) >= need
            });
            clear.then_some((cx, cy))
        });
        if let Some((cx, cy)) = placed {
            objects.push(Ellipse {
                cx,
                cy,
                a,
                b,
                cos: angle.cos(),
                sin: angle.sin(),
                level,
            });
        }
    }
    let n = c.size;
    let mut owner_q = vec![f64::INFINITY; n * n];
    let mut truth = vec![0u32; n * n];
    for (k, o) in objects.iter().enumerate() {
        let (x0, x1) = ((o.cx - o.a).floor() as usize, (o.cx + o.a).ceil() as usize);
        let (y0, y1) = ((o.cy - o.a).floor() as usize, (o.cy + o.a).ceil() as usize);
        for y in y0..=y1.min(n - 1) {
            for x in x0..=x1.min(n - 1) {
                let q = o.q(x as f64, y as f64);
                let i = y * n + x;
                if q <= 1.0 && q < owner_q[i] {
                    owner_q[i] = q;
                    truth[i] = k as u32 + 1;
                }
            }
        }
    }
    // Every object keeps pixels: the distance rule leaves each centre its own.
    let mut kept = vec![false; objects.len() + 1];
    for &l in &truth {
        kept[l as usize] = true;
    }
    assert!(
        kept[1..].iter().all(|&k| k),
        "{}: an object was hidden",
        c.name
    );
    let mut texture = vec![0.0; n * n];
    if c.texture > 0.0 {
        let mut t = Rng(c.seed ^ 0x0074_6578_7475);
        texture.iter_mut().for_each(|v| *v = t.normal());
        blur(&mut texture, n, 2.0);
        let spread = (texture.iter().map(|v| v * v).sum::<f64>() / (n * n) as f64).sqrt();
        texture.iter_mut().for_each(|v| *v *= c.texture / spread);
    }
    let mut ideal: Vec<f64> = truth
        .iter()
        .zip(&owner_q)
        .zip(&texture)
        .map(|((&l, &q), &t)| {
            if l == 0 {
                c.background
            } else {
                let level = objects[l as usize - 1].level * (1.0 - c.dome * q);
                c.background.max(level * (1.0 + t))
            }
        })
        .collect();
    if c.blur_sigma_px > 0.0 {
        blur(&mut ideal, n, c.blur_sigma_px);
    }
    let mut noise = Rng(c.seed ^ 0x006e_6f69_7365);
    let pixels = ideal
        .iter()
        .map(|&v| ((v + c.noise_sigma * noise.normal()) * 65535.0 + 0.5).clamp(0.0, 65535.0) as u16)
        .collect();
    Case {
        name: c.name.to_string(),
        frame: Frame {
            width: n,
            height: n,
            bit_depth: 16,
            pixels,
        },
        truth,
    }
}

/// Separable Gaussian blur of a square image, truncated at 3σ, edges replicated.
fn blur(img: &mut [f64], n: usize, sigma: f64) {
    let r = (3.0 * sigma).ceil() as isize;
    let mut k: Vec<f64> = (-r..=r)
        .map(|i| (-((i * i) as f64) / (2.0 * sigma * sigma)).exp())
        .collect();
    let sum: f64 = k.iter().sum();
    k.iter_mut().for_each(|v| *v /= sum);
    let clamp = |i: isize| i.clamp(0, n as isize - 1) as usize;
    let mut tmp = vec![0.0; n * n];
    for y in 0..n {
        for x in 0..n {
            tmp[y * n + x] = (-r..=r)
                .map(|d| k[(d + r) as usize] * img[y * n + clamp(x as isize + d)])
                .sum();
        }
    }
    for y in 0..n {
        for x in 0..n {
            img[y * n + x] = (-r..=r)
                .map(|d| k[(d + r) as usize] * tmp[clamp(y as isize + d) * n + x])
                .sum();
        }
    }
}

// The bench includes this file without `tests/common`; a test binary has
// both, so the venv's location is compiled twice there (same code).
#[allow(clippy::duplicate_mod)]
#[path = "../common/venv.rs"]
mod venv;

/// The Python interpreter: `FRAMEWARDEN_PYTHON`, else the reference venv's
/// (the tests create it first with `common::reference_python`), else
/// `python3` (the bench, before any test made the venv).
pub fn python() -> String {
    venv::python_override()
        .or_else(|| {
            let p = venv::venv_python(&venv::venv_dir());
            p.exists().then_some(p)
        })
        .unwrap_or_else(|| "python3".into())
        .display()
        .to_string()
}

pub fn reference_script() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("benches/accuracy_reference.py")
}

/// A label image as a 16-bit frame, for writing as TIFF.
pub fn label_frame(labels: &[u32], width: usize, height: usize) -> Frame {
    Frame {
        width,
        height,
        bit_depth: 16,
        pixels: labels
            .iter()
            .map(|&l| u16::try_from(l).expect("at most 65535 labels"))
            .collect(),
    }
}
