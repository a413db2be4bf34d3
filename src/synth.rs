//! Synthetic microscope frames with known ground truth.
//!
//! A seeded, deterministic generator of greyscale frames holding well-separated
//! bright discs and ellipses (optionally ring-shaped, optionally clipped at full
//! scale) on a background with Gaussian noise, an illumination gradient, a lamp
//! brightness factor and optical blur. It feeds the ground-truth tests, the
//! benchmarks and the demo data; it knows nothing about analysis.
//!
//! Image model, in this order: an ideal scene (background level, objects at
//! their own level) is blurred by a Gaussian of `blur_sigma_px`, multiplied by
//! the illumination field and the lamp factor, Gaussian noise is added, and the
//! result is scaled to the bit depth, rounded and clipped to `0..=max`.

use std::fs::File;
use std::io::BufWriter;
use std::path::Path;

use tiff::encoder::{colortype, TiffEncoder};

use crate::frame::Frame;

/// Everything that describes one synthetic scene.
///
/// Levels and the noise sigma are fractions of full scale (255 or 65,535), so
/// the same spec renders comparably at 8 and 16 bits. The object layout depends
/// only on `seed`, the size, the radius and shape ranges, `min_gap_px`,
/// `hole_fraction` and `saturated_fraction`: the first `n` objects are the same
/// whatever `object_count` is, so a growing count adds objects to a fixed
/// layout. Lamp, gradient, blur and noise never move objects, so they can vary
/// frame by frame over one layout (see [`layout`] and [`render`]).
#[derive(Debug, Clone, PartialEq)]
pub struct SceneSpec {
    /// Frame width in pixels.
    pub width: usize,
    /// Frame height in pixels.
    pub height: usize,
    /// 8 or 16.
    pub bit_depth: u8,
    /// Number of objects to place.
    pub object_count: usize,
    /// Range of the semi-major axis, in pixels (`min <= max`, `min >= 1`).
    pub radius_px: (f64, f64),
    /// Largest ratio of semi-major to semi-minor axis (1 = discs only).
    pub elongation_max: f64,
    /// Background level, fraction of full scale.
    pub background_level: f64,
    /// Mean object level, fraction of full scale.
    pub object_level: f64,
    /// Relative spread of object levels: each object gets
    /// `object_level * (1 ± object_level_spread)`, uniformly.
    pub object_level_spread: f64,
    /// Standard deviation of the additive Gaussian noise, fraction of full scale.
    pub noise_sigma: f64,
    /// Relative brightness change of the illumination across the field:
    /// a linear ramp from `1 - g/2` to `1 + g/2`, so (max - min) / mean = g.
    pub gradient: f64,
    /// Direction of increasing illumination, radians (0 = towards +x).
    pub gradient_angle_rad: f64,
    /// Overall brightness multiplier (1 = nominal, below 1 = a dimming lamp).
    pub lamp: f64,
    /// Sigma of the Gaussian blur (defocus) in pixels; 0 = sharp.
    pub blur_sigma_px: f64,
    /// Share of objects drawn as rings (a hole of [`HOLE_RATIO`] of the axes),
    /// among those thick enough to keep a closed ring.
    pub hole_fraction: f64,
    /// Share of objects drawn at 1.5 × full scale, so they clip at the top of
    /// the bit depth.
    pub saturated_fraction: f64,
    /// Smallest clear distance between objects, and between objects and the
    /// border, in pixels (at least 2, so counts are unambiguous under
    /// 8-connectivity).
    pub min_gap_px: f64,
    /// Seed of the layout, and of the noise when rendered by [`generate`].
    pub seed: u64,
}

impl Default for SceneSpec {
    fn default() -> Self {
        Self {
            width: 512,
            height: 512,
            bit_depth: 16,
            object_count: 40,
            radius_px: (6.0, 14.0),
            elongation_max: 1.6,
            background_level: 0.1,
            object_level: 0.5,
            object_level_spread: 0.2,
            noise_sigma: 0.01,
            gradient: 0.0,
            gradient_angle_rad: 0.0,
            lamp: 1.0,
            blur_sigma_px: 0.0,
            hole_fraction: 0.0,
            saturated_fraction: 0.0,
            min_gap_px: 3.0,
            seed: 1,
        }
    }
}

/// Hole axes as a fraction of the object's axes, for ring-shaped objects.
pub const HOLE_RATIO: f64 = 0.45;

/// Thinnest ring wall (along the minor axis, px) for which a hole is drawn, so
/// the hole stays closed under 4-connected background.
const MIN_RING_WALL_PX: f64 = 2.5;

/// Placement attempts per object before giving up.
const MAX_ATTEMPTS: usize = 20_000;

/// One object of the ground truth.
#[derive(Debug, Clone, PartialEq)]
pub struct TruthObject {
    /// Centre of the drawn ellipse (pixel coordinates, x = column).
    pub centre_x: f64,
    /// Centre of the drawn ellipse, y (row).
    pub centre_y: f64,
    /// Semi-major axis in pixels.
    pub semi_major_px: f64,
    /// Semi-minor axis in pixels (at least 1).
    pub semi_minor_px: f64,
    /// Orientation of the major axis, radians from +x towards +y.
    pub angle_rad: f64,
    /// Level before illumination and lamp, fraction of full scale.
    pub level: f64,
    /// Whether the object is drawn as a ring, its hole left at background level.
    pub has_hole: bool,
    /// Pixels of the filled object (hole included), as rasterised.
    pub area_px: u64,
    /// Pixels of the hole (0 without one).
    pub hole_px: u64,
    /// Centroid of the filled object's pixels.
    pub centroid_x: f64,
    /// Centroid of the filled object's pixels, y (row).
    pub centroid_y: f64,
}

/// A rendered frame and the truth it was drawn from.
#[derive(Debug, Clone)]
pub struct Scene {
    /// The rendered frame.
    pub frame: Frame,
    /// The objects drawn in it, in placement order.
    pub objects: Vec<TruthObject>,
}

impl Scene {
    /// Number of objects in the frame: the count a correct segmentation finds.
    pub fn object_count(&self) -> usize {
        self.objects.len()
    }
}

/// Errors from an impossible scene description.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum SynthError {
    /// A spec value is out of range; the message names it.
    #[error("scene spec: {0}")]
    Invalid(String),
    /// The objects did not all fit with the required gaps.
    #[error("placed only {placed} of {requested} objects in {width} x {height}: use fewer or smaller objects")]
    NoRoom {
        /// Objects placed before giving up.
        placed: usize,
        /// Objects asked for (`object_count`).
        requested: usize,
        /// Frame width in pixels.
        width: usize,
        /// Frame height in pixels.
        height: usize,
    },
}

/// Draws a layout and renders it: [`layout`] then [`render`] with `spec.seed`.
///
/// # Errors
/// [`SynthError`] for an invalid spec or when the objects do not fit.
pub fn generate(spec: &SceneSpec) -> Result<Scene, SynthError> {
    let objects = layout(spec)?;
    let frame = render(spec, &objects, spec.seed)?;
    Ok(Scene { frame, objects })
}

/// Places `spec.object_count` non-touching objects, away from the border.
///
/// # Errors
/// [`SynthError`] for an invalid spec or when the objects do not fit.
pub fn layout(spec: &SceneSpec) -> Result<Vec<TruthObject>, SynthError> {
    validate(spec)?;
    let mut rng = SplitMix64::new(spec.seed);
    let (r_min, r_max) = spec.radius_px;
    let gap = spec.min_gap_px;
    let mut objects: Vec<TruthObject> = Vec::with_capacity(spec.object_count);
    for _ in 0..spec.object_count {
        // A fixed number of draws per object keeps layouts prefix-stable.
        let a = r_min + (r_max - r_min) * rng.next_f64();
        let b = (a / (1.0 + (spec.elongation_max - 1.0) * rng.next_f64())).max(1.0);
        let angle = std::f64::consts::PI * rng.next_f64();
        let level =
            spec.object_level * (1.0 + spec.object_level_spread * (2.0 * rng.next_f64() - 1.0));
        let saturated = rng.next_f64() < spec.saturated_fraction;
        let hole =
            rng.next_f64() < spec.hole_fraction && b * (1.0 - HOLE_RATIO) >= MIN_RING_WALL_PX;
        let mut placed = false;
        for _ in 0..MAX_ATTEMPTS {
            let lo_x = a + gap;
            let hi_x = spec.width as f64 - 1.0 - a - gap;
            let lo_y = a + gap;
            let hi_y = spec.height as f64 - 1.0 - a - gap;
            let cx = lo_x + (hi_x - lo_x) * rng.next_f64();
            let cy = lo_y + (hi_y - lo_y) * rng.next_f64();
            if hi_x < lo_x || hi_y < lo_y {
                break;
            }
            // Bounding circles at least `gap + 1` apart: no two pixels of different
            // objects are closer than `gap + 1`, so at least `gap` clear pixels lie
            // between them on any line.
            let clear = objects.iter().all(|o| {
                let d2 = (o.centre_x - cx).powi(2) + (o.centre_y - cy).powi(2);
                let need = o.semi_major_px + a + gap + 1.0;
                d2 >= need * need
            });
            if clear {
                let mut obj = TruthObject {
                    centre_x: cx,
                    centre_y: cy,
                    semi_major_px: a,
                    semi_minor_px: b,
                    angle_rad: angle,
                    level: if saturated { 1.5 } else { level },
                    has_hole: hole,
                    area_px: 0,
                    hole_px: 0,
                    centroid_x: 0.0,
                    centroid_y: 0.0,
                };
                let (mut n, mut holes, mut sx, mut sy) = (0u64, 0u64, 0.0, 0.0);
                for_each_pixel(&obj, |x, y, in_hole| {
                    n += 1;
                    holes += u64::from(in_hole);
                    sx += x as f64;
                    sy += y as f64;
                });
                obj.area_px = n;
                obj.hole_px = holes;
                obj.centroid_x = sx / n as f64;
                obj.centroid_y = sy / n as f64;
                objects.push(obj);
                placed = true;
                break;
            }
        }
        if !placed {
            return Err(SynthError::NoRoom {
                placed: objects.len(),
                requested: spec.object_count,
                width: spec.width,
                height: spec.height,
            });
        }
    }
    Ok(objects)
}

/// Renders `objects` with the spec's levels, illumination, lamp, blur and
/// noise; `noise_seed` picks the noise realisation.
///
/// # Errors
/// [`SynthError::Invalid`] for an invalid spec.
pub fn render(
    spec: &SceneSpec,
    objects: &[TruthObject],
    noise_seed: u64,
) -> Result<Frame, SynthError> {
    validate(spec)?;
    let (w, h) = (spec.width, spec.height);
    let mut ideal = vec![spec.background_level as f32; w * h];
    for o in objects {
        let level = o.level as f32;
        for_each_pixel(o, |x, y, in_hole| {
            if !in_hole && x < w && y < h {
                ideal[y * w + x] = level;
            }
        });
    }
    if spec.blur_sigma_px > 0.0 {
        gaussian_blur_mut(&mut ideal, w, h, spec.blur_sigma_px);
    }

    let full = if spec.bit_depth == 8 {
        255.0f32
    } else {
        65535.0f32
    };
    // Illumination: 1 + g * (t - 1/2), t the position along the gradient
    // direction scaled to 0..1 over the frame's corners.
    let (cos, sin) = (spec.gradient_angle_rad.cos(), spec.gradient_angle_rad.sin());
    let corners = [
        (0.0, 0.0),
        ((w - 1) as f64, 0.0),
        (0.0, (h - 1) as f64),
        ((w - 1) as f64, (h - 1) as f64),
    ];
    let proj = |x: f64, y: f64| x * cos + y * sin;
    let t_min = corners
        .iter()
        .map(|&(x, y)| proj(x, y))
        .fold(f64::INFINITY, f64::min);
    let t_max = corners
        .iter()
        .map(|&(x, y)| proj(x, y))
        .fold(f64::NEG_INFINITY, f64::max);
    let span = if t_max > t_min { t_max - t_min } else { 1.0 };
    let gain_x = (spec.lamp * spec.gradient * cos / span) as f32 * full;
    let noise = (spec.noise_sigma as f32) * full;
    let mut gauss = GaussianPairs::new(SplitMix64::new(noise_seed ^ 0x6e6f_6973_655f_7631));
    let mut pixels = vec![0u16; w * h];
    for y in 0..h {
        let row_gain =
            spec.lamp * (1.0 + spec.gradient * ((proj(0.0, y as f64) - t_min) / span - 0.5));
        let mut gain = row_gain as f32 * full;
        let src = &ideal[y * w..(y + 1) * w];
        let dst = &mut pixels[y * w..(y + 1) * w];
        for (d, &v) in dst.iter_mut().zip(src) {
            let value = v * gain + noise * gauss.next();
            // `as` saturates: negatives become 0, values above full scale clip.
            *d = (value + 0.5).min(full) as u16;
            gain += gain_x;
        }
    }
    Ok(Frame {
        width: w,
        height: h,
        bit_depth: spec.bit_depth,
        pixels,
    })
}

/// Writes one frame as an uncompressed greyscale TIFF (8 or 16-bit).
///
/// # Errors
/// File creation and encoder errors, as [`std::io::Error`].
pub fn write_tiff(path: &Path, frame: &Frame) -> std::io::Result<()> {
    write_tiff_pages(path, &[frame])
}

/// Writes frames as the pages of one uncompressed greyscale TIFF, in order.
///
/// # Errors
/// File creation and encoder errors, as [`std::io::Error`]; a frame whose
/// dimensions do not fit TIFF's 32-bit fields is refused.
pub fn write_tiff_pages(path: &Path, frames: &[&Frame]) -> std::io::Result<()> {
    let file = BufWriter::new(File::create(path)?);
    let mut encoder = TiffEncoder::new(file).map_err(std::io::Error::other)?;
    for frame in frames {
        let too_big =
            || std::io::Error::new(std::io::ErrorKind::InvalidInput, "frame too large for TIFF");
        let w = u32::try_from(frame.width).map_err(|_| too_big())?;
        let h = u32::try_from(frame.height).map_err(|_| too_big())?;
        if frame.bit_depth == 8 {
            // Samples of an 8-bit frame are at most 255 (a `Frame` invariant),
            // so the narrowing keeps every value.
            let bytes: Vec<u8> = frame.pixels.iter().map(|&p| p as u8).collect();
            encoder.write_image::<colortype::Gray8>(w, h, &bytes)
        } else {
            encoder.write_image::<colortype::Gray16>(w, h, &frame.pixels)
        }
        .map_err(std::io::Error::other)?;
    }
    Ok(())
}

fn validate(spec: &SceneSpec) -> Result<(), SynthError> {
    let bad = |m: &str| Err(SynthError::Invalid(m.to_string()));
    if spec.bit_depth != 8 && spec.bit_depth != 16 {
        return bad("bit_depth must be 8 or 16");
    }
    if spec.width < 1 || spec.height < 1 || spec.width.checked_mul(spec.height).is_none() {
        return bad("width and height must be positive");
    }
    let (r_min, r_max) = spec.radius_px;
    if !(r_min >= 1.0 && r_max >= r_min && r_max.is_finite()) {
        return bad("radius_px must satisfy 1 <= min <= max");
    }
    if !(spec.elongation_max >= 1.0 && spec.elongation_max.is_finite()) {
        return bad("elongation_max must be at least 1");
    }
    if !(spec.min_gap_px >= 2.0 && spec.min_gap_px.is_finite()) {
        return bad("min_gap_px must be at least 2");
    }
    let finite = [
        spec.background_level,
        spec.object_level,
        spec.object_level_spread,
        spec.noise_sigma,
        spec.gradient,
        spec.gradient_angle_rad,
        spec.lamp,
        spec.blur_sigma_px,
        spec.hole_fraction,
        spec.saturated_fraction,
    ];
    if finite.iter().any(|v| !v.is_finite()) {
        return bad("levels, noise, gradient, lamp and blur must be finite");
    }
    if spec.noise_sigma < 0.0
        || spec.lamp < 0.0
        || spec.blur_sigma_px < 0.0
        || spec.blur_sigma_px > 50.0
    {
        return bad("noise_sigma and lamp must not be negative; blur_sigma_px is 0 to 50");
    }
    if !(0.0..2.0).contains(&spec.gradient) {
        return bad("gradient must be in 0..2 (a relative change across the field)");
    }
    Ok(())
}

/// Calls `f(x, y, in_hole)` for every pixel of the filled ellipse: pixel
/// centres at integer coordinates inside or on the boundary.
fn for_each_pixel(o: &TruthObject, mut f: impl FnMut(usize, usize, bool)) {
    let (cos, sin) = (o.angle_rad.cos(), o.angle_rad.sin());
    let (ia2, ib2) = (
        1.0 / (o.semi_major_px * o.semi_major_px),
        1.0 / (o.semi_minor_px * o.semi_minor_px),
    );
    let hole_scale = 1.0 / (HOLE_RATIO * HOLE_RATIO);
    let r = o.semi_major_px;
    // Layout keeps the centre at least `r + gap` from the border, so these are
    // non-negative; the clamp only guards hand-made truth objects.
    let x0 = (o.centre_x - r).floor().max(0.0) as usize;
    let x1 = (o.centre_x + r).ceil().max(0.0) as usize;
    let y0 = (o.centre_y - r).floor().max(0.0) as usize;
    let y1 = (o.centre_y + r).ceil().max(0.0) as usize;
    for y in y0..=y1 {
        let dy = y as f64 - o.centre_y;
        for x in x0..=x1 {
            let dx = x as f64 - o.centre_x;
            let u = dx * cos + dy * sin;
            let v = -dx * sin + dy * cos;
            let q = u * u * ia2 + v * v * ib2;
            if q <= 1.0 {
                f(x, y, o.has_hole && q * hole_scale <= 1.0);
            }
        }
    }
}

/// Separable Gaussian blur in place, kernel truncated at 3 sigma, edges
/// replicated.
fn gaussian_blur_mut(img: &mut [f32], w: usize, h: usize, sigma: f64) {
    let radius = (3.0 * sigma).ceil() as usize;
    let mut kernel: Vec<f32> = (0..=2 * radius)
        .map(|i| (-((i as f64 - radius as f64).powi(2)) / (2.0 * sigma * sigma)).exp() as f32)
        .collect();
    let sum: f32 = kernel.iter().sum();
    kernel.iter_mut().for_each(|k| *k /= sum);

    // Rows: pad each row with replicated edges, then convolve.
    let mut padded = vec![0f32; w + 2 * radius];
    for row in img.chunks_exact_mut(w) {
        padded[..radius].fill(row[0]);
        padded[radius..radius + w].copy_from_slice(row);
        padded[radius + w..].fill(row[w - 1]);
        for (x, out) in row.iter_mut().enumerate() {
            *out = kernel.iter().zip(&padded[x..]).map(|(k, v)| k * v).sum();
        }
    }
    // Columns: accumulate whole rows, so memory is walked row by row.
    let src = img.to_vec();
    for y in 0..h {
        let out = &mut img[y * w..(y + 1) * w];
        out.fill(0.0);
        for (i, &k) in kernel.iter().enumerate() {
            let sy = (y + i).saturating_sub(radius).min(h - 1);
            for (o, &v) in out.iter_mut().zip(&src[sy * w..(sy + 1) * w]) {
                *o += k * v;
            }
        }
    }
}

/// SplitMix64 (Steele, Lea & Flood 2014, "Fast splittable pseudorandom number
/// generators"): tiny, fast and good enough for test scenes, and for the
/// fixed-seed schedules of the fault tests.
#[derive(Debug, Clone)]
pub struct SplitMix64(u64);

impl SplitMix64 {
    /// The generator started from `seed`; the same seed gives the same sequence.
    pub fn new(seed: u64) -> Self {
        Self(seed)
    }

    /// The next 64 random bits.
    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// Uniform in `[0, 1)` with 53 random bits.
    pub fn next_f64(&mut self) -> f64 {
        (self.next_u64() >> 11) as f64 * (1.0 / (1u64 << 53) as f64)
    }
}

/// Standard normal samples by the Box–Muller transform (Box & Muller 1958),
/// two per pair of uniforms.
struct GaussianPairs {
    rng: SplitMix64,
    spare: Option<f32>,
}

impl GaussianPairs {
    fn new(rng: SplitMix64) -> Self {
        Self { rng, spare: None }
    }

    fn next(&mut self) -> f32 {
        if let Some(z) = self.spare.take() {
            return z;
        }
        let bits = self.rng.next_u64();
        // Two 32-bit uniforms from one draw; u1 in (0, 1] keeps ln finite.
        let u1 = ((bits >> 32) as f32 + 1.0) * (1.0 / 4_294_967_296.0);
        let u2 = (bits & 0xffff_ffff) as f32 * (1.0 / 4_294_967_296.0);
        let r = (-2.0 * u1.ln()).sqrt();
        let (s, c) = (std::f32::consts::TAU * u2).sin_cos();
        self.spare = Some(r * s);
        r * c
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn tiny() -> SceneSpec {
        SceneSpec {
            width: 64,
            height: 48,
            bit_depth: 8,
            object_count: 5,
            radius_px: (3.0, 6.0),
            noise_sigma: 0.0,
            ..SceneSpec::default()
        }
    }

    #[test]
    fn same_seed_same_frame_other_seed_other_frame() {
        let a = generate(&tiny()).unwrap();
        let b = generate(&tiny()).unwrap();
        assert_eq!(a.frame, b.frame);
        assert_eq!(a.objects, b.objects);
        let c = generate(&SceneSpec { seed: 2, ..tiny() }).unwrap();
        assert_ne!(a.frame, c.frame);
    }

    #[test]
    fn noiseless_frame_has_exactly_two_levels_and_truth_areas() {
        let spec = tiny();
        let s = generate(&spec).unwrap();
        let bg = (0.1f32 * 255.0 + 0.5) as u16;
        let fg_pixels = s.frame.pixels.iter().filter(|&&p| p != bg).count() as u64;
        let truth: u64 = s.objects.iter().map(|o| o.area_px - o.hole_px).sum();
        assert_eq!(fg_pixels, truth);
        assert_eq!(s.object_count(), 5);
    }

    #[test]
    fn a_single_disc_is_drawn_where_the_truth_says() {
        // One disc of radius 2 at the centre of a 9 x 9 frame: the 13 pixel
        // centres within distance 2 of (4, 4).
        let spec = SceneSpec {
            width: 9,
            height: 9,
            bit_depth: 8,
            noise_sigma: 0.0,
            ..SceneSpec::default()
        };
        let disc = TruthObject {
            centre_x: 4.0,
            centre_y: 4.0,
            semi_major_px: 2.0,
            semi_minor_px: 2.0,
            angle_rad: 0.0,
            level: 0.8,
            has_hole: false,
            area_px: 13,
            hole_px: 0,
            centroid_x: 4.0,
            centroid_y: 4.0,
        };
        let f = render(&spec, &[disc], 0).unwrap();
        let hi = (0.8f32 * 255.0 + 0.5) as u16;
        let lit: Vec<(usize, usize)> = (0..81)
            .filter(|&i| f.pixels[i] == hi)
            .map(|i| (i % 9, i / 9))
            .collect();
        assert_eq!(lit.len(), 13);
        assert!(lit.contains(&(4, 2)) && lit.contains(&(6, 4)) && !lit.contains(&(6, 5)));
    }

    #[test]
    fn objects_keep_their_gap_and_stay_off_the_border() {
        let spec = SceneSpec {
            width: 200,
            height: 150,
            object_count: 60,
            radius_px: (3.0, 8.0),
            ..tiny()
        };
        let objects = layout(&spec).unwrap();
        let mut owner = vec![usize::MAX; 200 * 150];
        for (i, o) in objects.iter().enumerate() {
            for_each_pixel(o, |x, y, _| owner[y * 200 + x] = i);
        }
        for y in 0..150 {
            for x in 0..200 {
                let i = owner[y * 200 + x];
                if i == usize::MAX {
                    continue;
                }
                assert!(
                    (3..197).contains(&x) && (3..147).contains(&y),
                    "object pixel too near the border"
                );
                // No pixel of another object within Chebyshev distance 2.
                for yy in y.saturating_sub(2)..=(y + 2).min(149) {
                    for xx in x.saturating_sub(2)..=(x + 2).min(199) {
                        let j = owner[yy * 200 + xx];
                        assert!(
                            j == usize::MAX || j == i,
                            "objects {i} and {j} nearly touch"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn layouts_are_prefix_stable_as_counts_grow() {
        let few = layout(&SceneSpec {
            object_count: 4,
            ..tiny()
        })
        .unwrap();
        let more = layout(&SceneSpec {
            object_count: 7,
            ..tiny()
        })
        .unwrap();
        assert_eq!(few[..], more[..4]);
    }

    #[test]
    fn rings_have_holes_inside() {
        let spec = SceneSpec {
            radius_px: (8.0, 9.0),
            elongation_max: 1.0,
            hole_fraction: 1.0,
            object_count: 3,
            ..tiny()
        };
        let s = generate(&spec).unwrap();
        let bg = (0.1f32 * 255.0 + 0.5) as u16;
        for o in &s.objects {
            assert!(o.has_hole && o.hole_px > 0 && o.hole_px < o.area_px);
            let centre =
                s.frame.pixels[o.centre_y.round() as usize * 64 + o.centre_x.round() as usize];
            assert_eq!(centre, bg);
        }
    }

    #[test]
    fn lamp_gradient_and_saturation_scale_as_specified() {
        let flat = SceneSpec {
            object_count: 0,
            width: 101,
            height: 3,
            bit_depth: 16,
            ..tiny()
        };
        let dim = render(
            &SceneSpec {
                lamp: 0.5,
                ..flat.clone()
            },
            &[],
            0,
        )
        .unwrap();
        assert_eq!(dim.pixels[0], (0.05f32 * 65535.0 + 0.5) as u16);
        let ramp = render(
            &SceneSpec {
                gradient: 0.4,
                ..flat.clone()
            },
            &[],
            0,
        )
        .unwrap();
        let (left, right) = (f64::from(ramp.pixels[0]), f64::from(ramp.pixels[100]));
        assert!(
            (left / 6553.5 - 0.8).abs() < 1e-3 && (right / 6553.5 - 1.2).abs() < 1e-3,
            "{left} {right}"
        );
        let hot = SceneSpec {
            saturated_fraction: 1.0,
            object_count: 2,
            ..tiny()
        };
        let s = generate(&hot).unwrap();
        let top = s.frame.pixels.iter().filter(|&&p| p == 255).count() as u64;
        assert_eq!(top, s.objects.iter().map(|o| o.area_px).sum::<u64>());
    }

    #[test]
    fn blur_keeps_the_mean_and_noise_has_the_set_sigma() {
        let spec = SceneSpec {
            width: 128,
            height: 128,
            noise_sigma: 0.0,
            ..tiny()
        };
        let sharp = generate(&spec).unwrap().frame;
        let soft = generate(&SceneSpec {
            blur_sigma_px: 1.5,
            ..spec.clone()
        })
        .unwrap()
        .frame;
        let mean = |f: &Frame| f.pixels.iter().map(|&p| f64::from(p)).sum::<f64>() / f.len() as f64;
        assert!((mean(&sharp) - mean(&soft)).abs() < 0.5);
        assert!(soft
            .pixels
            .iter()
            .any(|&p| p != sharp.pixels[0] && p != *sharp.pixels.iter().max().unwrap()));

        let noisy = SceneSpec {
            object_count: 0,
            bit_depth: 16,
            noise_sigma: 0.01,
            ..spec
        };
        let f = generate(&noisy).unwrap().frame;
        let m = mean(&f);
        let sd = (f
            .pixels
            .iter()
            .map(|&p| (f64::from(p) - m).powi(2))
            .sum::<f64>()
            / f.len() as f64)
            .sqrt();
        assert!(
            (m / 6553.5 - 1.0).abs() < 0.01 && (sd / 655.35 - 1.0).abs() < 0.05,
            "{m} {sd}"
        );
    }

    #[test]
    fn impossible_specs_are_refused() {
        assert!(matches!(
            generate(&SceneSpec {
                bit_depth: 12,
                ..tiny()
            }),
            Err(SynthError::Invalid(_))
        ));
        assert!(matches!(
            generate(&SceneSpec {
                min_gap_px: 1.0,
                ..tiny()
            }),
            Err(SynthError::Invalid(_))
        ));
        let crowded = SceneSpec {
            object_count: 500,
            ..tiny()
        };
        assert!(matches!(
            generate(&crowded),
            Err(SynthError::NoRoom { requested: 500, .. })
        ));
    }

    #[test]
    fn tiff_round_trip_8_and_16_bit_with_pages() {
        let dir = tempfile::tempdir().unwrap();
        let a = generate(&tiny()).unwrap().frame;
        let b = generate(&SceneSpec {
            bit_depth: 16,
            seed: 9,
            ..tiny()
        })
        .unwrap()
        .frame;
        let path = dir.path().join("pages.tif");
        write_tiff_pages(&path, &[&a, &b]).unwrap();
        let mut dec = tiff::decoder::Decoder::new(File::open(&path).unwrap()).unwrap();
        match dec.read_image().unwrap() {
            tiff::decoder::DecodingResult::U8(v) => {
                assert!(v.iter().map(|&p| u16::from(p)).eq(a.pixels.iter().copied()))
            }
            other => panic!("page 0 decoded as {other:?}"),
        }
        dec.next_image().unwrap();
        match dec.read_image().unwrap() {
            tiff::decoder::DecodingResult::U16(v) => assert_eq!(v, b.pixels),
            other => panic!("page 1 decoded as {other:?}"),
        }
        assert!(!dec.more_images());
    }
}
