//! Optional corrections before thresholding: Gaussian smoothing, rolling-ball
//! background subtraction and flat-field correction. Each returns a new frame
//! of the same size and bit depth; measurements are still taken on the raw frame.

use crate::frame::Frame;

/// Gaussian smoothing with standard deviation `sigma_px`, separable, kernel
/// radius `round(4 σ)` and mirror boundaries (`d c b a | a b c d`), the
/// conventions of `scipy.ndimage.gaussian_filter` (truncate = 4, mode "reflect").
/// Results are rounded to the nearest level.
pub fn gaussian(frame: &Frame, sigma_px: f64) -> Frame {
    if sigma_px.is_nan() || sigma_px <= 0.0 || frame.is_empty() {
        return frame.clone();
    }
    let radius = (4.0 * sigma_px + 0.5) as usize;
    let mut kernel: Vec<f32> = (0..=2 * radius)
        .map(|i| {
            let d = i as f64 - radius as f64;
            (-0.5 * d * d / (sigma_px * sigma_px)).exp() as f32
        })
        .collect();
    let sum: f32 = kernel.iter().sum();
    kernel.iter_mut().for_each(|k| *k /= sum);
    let (w, h) = (frame.width, frame.height);
    let mirror = |i: isize, n: usize| -> usize {
        let n = n as isize;
        let period = 2 * n;
        let m = i.rem_euclid(period);
        (if m < n { m } else { period - 1 - m }) as usize
    };
    // Horizontal pass into f32, then vertical pass into the output.
    let mut tmp = vec![0f32; w * h];
    let mut line = vec![0f32; w + 2 * radius];
    for y in 0..h {
        let row = frame.row(y);
        for (i, l) in line.iter_mut().enumerate() {
            *l = f32::from(row[mirror(i as isize - radius as isize, w)]);
        }
        for x in 0..w {
            tmp[y * w + x] = kernel
                .iter()
                .zip(&line[x..x + 2 * radius + 1])
                .map(|(k, v)| k * v)
                .sum();
        }
    }
    let max = f32::from(frame.max_value());
    let mut out = vec![0u16; w * h];
    let mut acc = vec![0f32; w];
    for y in 0..h {
        acc.iter_mut().for_each(|a| *a = 0.0);
        for (i, k) in kernel.iter().enumerate() {
            let src = mirror(y as isize + i as isize - radius as isize, h);
            for (a, v) in acc.iter_mut().zip(&tmp[src * w..(src + 1) * w]) {
                *a += k * v;
            }
        }
        for (o, a) in out[y * w..(y + 1) * w].iter_mut().zip(&acc) {
            *o = a.round().clamp(0.0, max) as u16;
        }
    }
    Frame {
        width: w,
        height: h,
        bit_depth: frame.bit_depth,
        pixels: out,
    }
}

/// Rolling-ball background subtraction (Sternberg 1983, "Biomedical image
/// processing", IEEE Computer 16(1)): the background is the grey-level opening
/// of the frame by a ball of radius `radius_px` (in pixels, with intensity
/// scaled so the ball's height equals its radius), and the result is
/// `frame - background`, floored at 0.
///
/// For large radii the opening is computed on a frame shrunk by block minima
/// (shrink factor `ceil(radius / 10)`) and the background is interpolated back
/// bilinearly; this is the usual speed-up and keeps the ball at ≥ 10 px.
/// Offsets beyond the frame are ignored, so within about `radius / √2` of an
/// edge that a steep slope runs into, part of the slope remains.
///
/// Checked against SciPy's grey erosion and dilation by the same non-flat ball
/// in tests/quality_reference.rs: equal up to radius 10, within 1% of the
/// background's range on average when shrunk.
pub fn rolling_ball(frame: &Frame, radius_px: f64) -> Frame {
    let background = rolling_ball_background(frame, radius_px);
    let pixels = frame
        .pixels
        .iter()
        .zip(&background)
        .map(|(&v, &b)| v.saturating_sub(b))
        .collect();
    Frame {
        pixels,
        ..frame.clone()
    }
}

/// The background surface alone (same size as `frame`).
pub fn rolling_ball_background(frame: &Frame, radius_px: f64) -> Vec<u16> {
    let (w, h) = (frame.width, frame.height);
    let shrink = ((radius_px / 10.0).ceil() as usize).max(1);
    let (sw, sh) = (w.div_ceil(shrink), h.div_ceil(shrink));
    let mut small = vec![f32::MAX; sw * sh];
    for y in 0..h {
        for (x, &v) in frame.row(y).iter().enumerate() {
            let s = &mut small[(y / shrink) * sw + x / shrink];
            *s = s.min(f32::from(v));
        }
    }
    let r = radius_px / shrink as f64;
    let reach = r.floor() as isize;
    // Ball offsets (dx, dy, height below the apex), intensity in pixel units.
    let ball: Vec<(isize, isize, f32)> = (-reach..=reach)
        .flat_map(|dy| (-reach..=reach).map(move |dx| (dx, dy)))
        .filter_map(|(dx, dy)| {
            let d2 = (dx * dx + dy * dy) as f64;
            (d2 <= r * r).then(|| (dx, dy, (r - (r * r - d2).sqrt()) as f32 * shrink as f32))
        })
        .collect();
    let eroded = grey_pass(&small, sw, sh, &ball, true);
    let opened = grey_pass(&eroded, sw, sh, &ball, false);
    if shrink == 1 {
        return opened
            .iter()
            .map(|&v| v.round().clamp(0.0, 65535.0) as u16)
            .collect();
    }
    // Bilinear interpolation from block centres back to full size.
    let mut out = vec![0u16; w * h];
    for y in 0..h {
        let fy = ((y as f64 + 0.5) / shrink as f64 - 0.5).clamp(0.0, (sh - 1) as f64);
        let (y0, ty) = (fy.floor() as usize, fy.fract() as f32);
        let y1 = (y0 + 1).min(sh - 1);
        for x in 0..w {
            let fx = ((x as f64 + 0.5) / shrink as f64 - 0.5).clamp(0.0, (sw - 1) as f64);
            let (x0, tx) = (fx.floor() as usize, fx.fract() as f32);
            let x1 = (x0 + 1).min(sw - 1);
            let top = opened[y0 * sw + x0] * (1.0 - tx) + opened[y0 * sw + x1] * tx;
            let bottom = opened[y1 * sw + x0] * (1.0 - tx) + opened[y1 * sw + x1] * tx;
            let v = (top * (1.0 - ty) + bottom * ty).min(f32::from(frame.pixels[y * w + x]));
            out[y * w + x] = v.round().clamp(0.0, 65535.0) as u16;
        }
    }
    out
}

/// Grey erosion (`min(v - height)`) or dilation (`max(v + height)`) by the ball,
/// ignoring offsets that fall outside the frame.
fn grey_pass(
    src: &[f32],
    w: usize,
    h: usize,
    ball: &[(isize, isize, f32)],
    erode: bool,
) -> Vec<f32> {
    let mut out = vec![0f32; w * h];
    for y in 0..h as isize {
        for x in 0..w as isize {
            let mut acc = if erode { f32::MAX } else { f32::MIN };
            for &(dx, dy, dz) in ball {
                let (nx, ny) = (x + dx, y + dy);
                if nx < 0 || ny < 0 || nx >= w as isize || ny >= h as isize {
                    continue;
                }
                let v = src[ny as usize * w + nx as usize];
                acc = if erode {
                    acc.min(v + dz)
                } else {
                    acc.max(v - dz)
                };
            }
            out[y as usize * w + x as usize] = acc;
        }
    }
    out
}

/// Gain map for flat-field correction:
/// `corrected = (raw - dark) / (flat - dark) × mean(flat - dark)`.
#[derive(Clone, PartialEq)]
pub struct FlatField {
    /// Width in pixels of the flat frame (frames corrected must match it).
    pub width: usize,
    /// Height in pixels of the flat frame (frames corrected must match it).
    pub height: usize,
    dark: Vec<u16>,
    /// `mean(flat - dark) / (flat - dark)` per pixel (0 where flat <= dark).
    gain: Vec<f32>,
}

/// The size only: the per-pixel maps are too long to print.
impl std::fmt::Debug for FlatField {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FlatField")
            .field("width", &self.width)
            .field("height", &self.height)
            .finish_non_exhaustive()
    }
}

impl FlatField {
    /// # Errors
    /// A message when the frames differ in size or the flat frame is not
    /// brighter than the dark frame anywhere.
    pub fn new(flat: &Frame, dark: Option<&Frame>) -> Result<Self, String> {
        if let Some(d) = dark {
            if (d.width, d.height) != (flat.width, flat.height) {
                return Err(format!(
                    "dark frame is {}x{} but flat frame is {}x{}",
                    d.width, d.height, flat.width, flat.height
                ));
            }
        }
        let dark: Vec<u16> = dark.map_or_else(|| vec![0; flat.len()], |d| d.pixels.clone());
        let diff: Vec<f64> = flat
            .pixels
            .iter()
            .zip(&dark)
            .map(|(&f, &d)| f64::from(f) - f64::from(d))
            .collect();
        let mean = diff.iter().sum::<f64>() / diff.len().max(1) as f64;
        if mean.is_nan() || mean <= 0.0 {
            return Err("flat frame is not brighter than the dark frame".into());
        }
        let gain = diff
            .iter()
            .map(|&d| if d > 0.0 { (mean / d) as f32 } else { 0.0 })
            .collect();
        Ok(Self {
            width: flat.width,
            height: flat.height,
            dark,
            gain,
        })
    }

    /// Applies the correction.
    ///
    /// # Errors
    /// A message when the frame's size differs from the flat frame's.
    pub fn apply(&self, frame: &Frame) -> Result<Frame, String> {
        if (frame.width, frame.height) != (self.width, self.height) {
            return Err(format!(
                "frame is {}x{} but the flat-field frames are {}x{}",
                frame.width, frame.height, self.width, self.height
            ));
        }
        let max = f32::from(frame.max_value());
        let pixels = frame
            .pixels
            .iter()
            .zip(&self.dark)
            .zip(&self.gain)
            .map(|((&v, &d), &g)| {
                ((f32::from(v) - f32::from(d)) * g).round().clamp(0.0, max) as u16
            })
            .collect();
        Ok(Frame {
            pixels,
            ..frame.clone()
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gaussian_keeps_a_constant_frame_and_the_total_of_an_impulse() {
        let flat = Frame {
            width: 7,
            height: 5,
            bit_depth: 8,
            pixels: vec![40; 35],
        };
        assert_eq!(gaussian(&flat, 1.3), flat);
        // An impulse of 16000 in a 16-bit frame: the sum is preserved up to rounding,
        // and the centre weight for σ=1 is 1/(2π) ≈ 0.159 of the mass (2-D Gaussian).
        let mut px = vec![0u16; 21 * 21];
        px[10 * 21 + 10] = 16000;
        let f = Frame {
            width: 21,
            height: 21,
            bit_depth: 16,
            pixels: px,
        };
        let g = gaussian(&f, 1.0);
        let total: u64 = g.pixels.iter().map(|&v| u64::from(v)).sum();
        assert!((total as i64 - 16000).abs() < 60, "{total}");
        let centre = f64::from(g.pixels[10 * 21 + 10]) / 16000.0;
        assert!(
            (centre - 1.0 / (2.0 * std::f64::consts::PI)).abs() < 0.002,
            "{centre}"
        );
    }

    #[test]
    fn rolling_ball_removes_a_narrow_spot_and_keeps_a_gentle_ramp() {
        // A linear ramp (slope 1 level per px) is open under a ball of radius 20:
        // the ball touches it tangentially everywhere, so the opening returns the
        // ramp and the corrected frame is ~0 (up to rounding of the discrete ball).
        let (w, h) = (40, 30);
        let ramp: Vec<u16> = (0..w * h).map(|i| 100 + (i % w) as u16).collect();
        let mut spot = ramp.clone();
        spot[15 * w + 20] += 500; // a 1-px bright object on top
        let f = Frame {
            width: w,
            height: h,
            bit_depth: 16,
            pixels: spot,
        };
        let out = rolling_ball(&f, 20.0);
        let spot_left = out.pixels[15 * w + 20];
        assert!(
            (499..=501).contains(&spot_left),
            "spot kept above the background: {spot_left}"
        );
        // Away from the frame's left and right edges the ramp is gone. Within r/√2 ≈ 14 px
        // of them the ball's tangent point would lie outside the frame (a known edge
        // effect of the method), so the middle columns are checked.
        let residual = (0..w * h)
            .filter(|&i| (14..=25).contains(&(i % w)) && i != 15 * w + 20)
            .map(|i| out.pixels[i])
            .max();
        assert!(residual <= Some(1), "ramp removed, residual {residual:?}");
    }

    #[test]
    fn flat_field_by_hand() {
        // flat - dark = [100, 200] (mean 150), raw - dark = [50, 100]:
        // corrected = [50*150/100, 100*150/200] = [75, 75]: the vignetting is gone.
        let flat = Frame {
            width: 2,
            height: 1,
            bit_depth: 16,
            pixels: vec![110, 210],
        };
        let dark = Frame {
            width: 2,
            height: 1,
            bit_depth: 16,
            pixels: vec![10, 10],
        };
        let raw = Frame {
            width: 2,
            height: 1,
            bit_depth: 16,
            pixels: vec![60, 110],
        };
        let ff = FlatField::new(&flat, Some(&dark)).unwrap();
        assert_eq!(ff.apply(&raw).unwrap().pixels, vec![75, 75]);
        assert!(ff
            .apply(&Frame {
                width: 1,
                height: 1,
                bit_depth: 16,
                pixels: vec![0]
            })
            .is_err());
    }
}
