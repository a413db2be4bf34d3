//! Thumbnails of frames: the pixels contrast-stretched between two
//! percentiles, shrunk by a whole factor, with object outlines drawn over
//! them from a label image at the thumbnail's scale; encoded as PNG.
//!
//! The bottom of [`crate::html_report`]: pure apart from reading a label
//! image file.

use std::io::Cursor;
use std::path::Path;

use image::{ImageFormat, RgbImage};

use crate::frame::Frame;

/// Longest side of a thumbnail, in pixels.
pub const THUMB_MAX_PX: usize = 240;

/// The contrast stretch: these percentiles of the frame's pixels map to black
/// and white.
pub const STRETCH_PERCENTILES: (f64, f64) = (0.5, 99.5);

/// Colour of the outlines: orange of the Okabe & Ito (2008) colour-blind-safe
/// palette. Never a grey, so no stretched pixel has it.
pub const OUTLINE_RGB: [u8; 3] = [230, 159, 0];

/// The whole factor a frame of `width` × `height` is shrunk by so that its
/// longest side is at most [`THUMB_MAX_PX`]; the thumbnail is
/// ⌈width / f⌉ × ⌈height / f⌉ and its pixel (x, y) stands for the source
/// block starting at (x·f, y·f).
pub fn shrink_factor(width: usize, height: usize) -> usize {
    width.max(height).div_ceil(THUMB_MAX_PX).max(1)
}

/// The pixel levels at the [`STRETCH_PERCENTILES`] of `frame` (nearest rank
/// on the histogram), low below high.
pub fn stretch_levels(frame: &Frame) -> (u16, u16) {
    let mut hist = vec![0u64; 65_536];
    for &p in &frame.pixels {
        hist[usize::from(p)] += 1;
    }
    let n = frame.pixels.len() as f64;
    let level_at = |pct: f64| -> u16 {
        let rank = (pct * n / 100.0 - 1e-9).ceil().max(1.0) as u64;
        let mut seen = 0;
        for (level, &c) in hist.iter().enumerate() {
            seen += c;
            if seen >= rank {
                return level as u16;
            }
        }
        u16::MAX
    };
    let lo = level_at(STRETCH_PERCENTILES.0);
    let hi = level_at(STRETCH_PERCENTILES.1).max(lo.saturating_add(1));
    (lo, hi)
}

/// Border pixels of a label image (`width` × `height`, row by row): a pixel
/// of an object with a 4-neighbour inside the image of another label. The
/// same rule as `skimage.segmentation.find_boundaries(mode="inner")`.
pub fn borders(labels: &[u32], width: usize, height: usize) -> Vec<bool> {
    let mut out = vec![false; labels.len()];
    for y in 0..height {
        for x in 0..width {
            let i = y * width + x;
            let l = labels[i];
            if l == 0 {
                continue;
            }
            let differs = (x > 0 && labels[i - 1] != l)
                || (x + 1 < width && labels[i + 1] != l)
                || (y > 0 && labels[i - width] != l)
                || (y + 1 < height && labels[i + width] != l);
            out[i] = differs;
        }
    }
    out
}

/// Every `f`-th label of every `f`-th row, starting at 0 (nearest-neighbour
/// shrinking, `labels[::f, ::f]` in numpy): the label image at the
/// thumbnail's scale, with its width and height.
pub fn shrink_labels(
    labels: &[u32],
    width: usize,
    height: usize,
    f: usize,
) -> (Vec<u32>, usize, usize) {
    let (tw, th) = (width.div_ceil(f), height.div_ceil(f));
    let mut out = Vec::with_capacity(tw * th);
    for ty in 0..th {
        for tx in 0..tw {
            out.push(labels[ty * f * width + tx * f]);
        }
    }
    (out, tw, th)
}

/// A thumbnail of `frame`: each pixel the mean of its source block,
/// stretched linearly between the [`stretch_levels`] to black and white, and
/// the borders of `labels` (the frame's label image, when known) at the
/// thumbnail's scale in [`OUTLINE_RGB`].
pub fn thumbnail(frame: &Frame, labels: Option<&[u32]>) -> RgbImage {
    let (w, h) = (frame.width, frame.height);
    let f = shrink_factor(w, h);
    let (tw, th) = (w.div_ceil(f), h.div_ceil(f));
    let (lo, hi) = stretch_levels(frame);
    let span = f64::from(hi - lo);
    let mut img = RgbImage::new(tw as u32, th as u32);
    for ty in 0..th {
        for tx in 0..tw {
            let (mut sum, mut n) = (0u64, 0u64);
            for y in ty * f..((ty + 1) * f).min(h) {
                for x in tx * f..((tx + 1) * f).min(w) {
                    sum += u64::from(frame.pixels[y * w + x]);
                    n += 1;
                }
            }
            let mean = sum as f64 / n.max(1) as f64;
            let v = ((mean - f64::from(lo)) / span * 255.0)
                .round()
                .clamp(0.0, 255.0) as u8;
            img.put_pixel(tx as u32, ty as u32, image::Rgb([v, v, v]));
        }
    }
    if let Some(labels) = labels.filter(|l| l.len() == w * h) {
        let (small, sw, sh) = shrink_labels(labels, w, h, f);
        for (i, &b) in borders(&small, sw, sh).iter().enumerate() {
            if b {
                img.put_pixel((i % sw) as u32, (i / sw) as u32, image::Rgb(OUTLINE_RGB));
            }
        }
    }
    img
}

/// `img` as PNG bytes.
pub fn png(img: &RgbImage) -> Vec<u8> {
    let mut out = Cursor::new(Vec::new());
    // Writing an RGB image into memory cannot fail.
    let _ = img.write_to(&mut out, ImageFormat::Png);
    out.into_inner()
}

/// Reads a label image written by framewarden (16- or 32-bit greyscale
/// TIFF): its labels row by row, width and height.
///
/// # Errors
/// A sentence naming the file and the cause.
pub fn read_label_image(path: &Path) -> Result<(Vec<u32>, usize, usize), String> {
    let fail = |e: &dyn std::fmt::Display| format!("{}: {e}", path.display());
    let file = std::fs::File::open(path).map_err(|e| fail(&e))?;
    let mut decoder =
        tiff::decoder::Decoder::new(std::io::BufReader::new(file)).map_err(|e| fail(&e))?;
    let (w, h) = decoder.dimensions().map_err(|e| fail(&e))?;
    let labels: Vec<u32> = match decoder.read_image().map_err(|e| fail(&e))? {
        tiff::decoder::DecodingResult::U8(v) => v.into_iter().map(u32::from).collect(),
        tiff::decoder::DecodingResult::U16(v) => v.into_iter().map(u32::from).collect(),
        tiff::decoder::DecodingResult::U32(v) => v,
        _ => return Err(fail(&"not an 8-, 16- or 32-bit label image")),
    };
    let (w, h) = (w as usize, h as usize);
    if labels.len() != w * h {
        return Err(fail(&format!(
            "{} values for {w} x {h} pixels",
            labels.len()
        )));
    }
    Ok((labels, w, h))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn borders_are_object_pixels_touching_another_label() {
        // 0 0 0 0
        // 0 1 1 0      every pixel of object 1 touches background: all border;
        // 0 1 1 2      the lone 2 touches 1 (left) and 0 (up): border.
        let labels = [0, 0, 0, 0, 0, 1, 1, 0, 0, 1, 1, 2];
        let b = borders(&labels, 4, 3);
        let expected = [0, 0, 0, 0, 0, 1, 1, 0, 0, 1, 1, 1].map(|v| v == 1);
        assert_eq!(b, expected);
        // A 3x3 object: its centre touches only itself; the image edge is no border.
        let full = [1u32; 9];
        assert!(borders(&full, 3, 3).iter().all(|&b| !b));
        let mut block = [1u32; 25];
        block[0] = 0;
        assert_eq!(borders(&block, 5, 5).iter().filter(|&&b| b).count(), 2);
    }

    #[test]
    fn shrinking_takes_every_fth_label_like_numpy_slicing() {
        // labels[::2, ::2] of a 3x3 image: rows 0 and 2, columns 0 and 2.
        let labels = [1, 2, 3, 4, 5, 6, 7, 8, 9];
        assert_eq!(shrink_labels(&labels, 3, 3, 2), (vec![1, 3, 7, 9], 2, 2));
        assert_eq!(shrink_factor(240, 100), 1);
        assert_eq!(shrink_factor(241, 100), 2);
        assert_eq!(shrink_factor(384, 384), 2);
    }

    #[test]
    fn stretch_levels_are_nearest_rank_percentiles() {
        // 200 pixels 0..=199: the 0.5th percentile has rank ceil(1) = 1 -> 0,
        // the 99.5th rank ceil(199) = 199 -> 198 (nearest rank, Hyndman & Fan 1996 type 1).
        let pixels: Vec<u16> = (0..200).collect();
        let frame = Frame::new(20, 10, 16, pixels).unwrap();
        assert_eq!(stretch_levels(&frame), (0, 198));
        let flat = Frame::new(2, 2, 16, vec![7; 4]).unwrap();
        assert_eq!(stretch_levels(&flat), (7, 8));
    }

    #[test]
    fn outlines_are_drawn_over_the_stretched_pixels() {
        let pixels: Vec<u16> = (0..16).map(|i| if i == 5 { 1000 } else { 10 }).collect();
        let frame = Frame::new(4, 4, 16, pixels).unwrap();
        let mut labels = vec![0u32; 16];
        labels[5] = 1;
        let img = thumbnail(&frame, Some(&labels));
        assert_eq!(img.get_pixel(1, 1).0, OUTLINE_RGB);
        assert_eq!(img.get_pixel(0, 0).0, [0, 0, 0]);
        let plain = thumbnail(&frame, None);
        assert_eq!(plain.get_pixel(1, 1).0, [255, 255, 255]);
    }
}
