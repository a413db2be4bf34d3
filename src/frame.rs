//! In-memory greyscale frames: the one pixel type the analysis core sees.
//!
//! Decoding (see [`crate::decode`]) turns every supported file into [`Frame`]s;
//! everything downstream works on `u16` samples with a known bit depth.

/// One greyscale image plane, row-major, `u16` samples.
///
/// 8-bit data is stored widened to `u16` with `bit_depth == 8`, so histograms
/// keep 256 levels; 16-bit data keeps all 65,536 levels.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Frame {
    /// Width in pixels (samples per row).
    pub width: usize,
    /// Height in pixels (number of rows).
    pub height: usize,
    /// Significant bits per sample: 8 or 16.
    pub bit_depth: u8,
    /// Samples, row by row: `width * height` of them, each at most [`Frame::max_value`].
    pub pixels: Vec<u16>,
}

impl Frame {
    /// Builds a frame, checking that the buffer matches the dimensions.
    ///
    /// # Errors
    /// Returns a message when `pixels.len() != width * height`, when a sample
    /// exceeds the bit depth, or when the bit depth is not 8 or 16.
    pub fn new(
        width: usize,
        height: usize,
        bit_depth: u8,
        pixels: Vec<u16>,
    ) -> Result<Self, String> {
        if bit_depth != 8 && bit_depth != 16 {
            return Err(format!("bit depth {bit_depth} is not supported (8 or 16)"));
        }
        if width.checked_mul(height) != Some(pixels.len()) {
            return Err(format!(
                "pixel buffer holds {} samples, expected {width} x {height}",
                pixels.len()
            ));
        }
        if bit_depth == 8 && pixels.iter().any(|&p| p > 255) {
            return Err("8-bit frame holds a sample above 255".to_string());
        }
        Ok(Self {
            width,
            height,
            bit_depth,
            pixels,
        })
    }

    /// A frame from 8-bit rows given as literals (handy in tests and docs).
    ///
    /// # Panics
    /// Panics when the rows are ragged; meant for literal test images only.
    pub fn from_rows_u8(rows: &[&[u8]]) -> Self {
        let height = rows.len();
        let width = rows.first().map_or(0, |r| r.len());
        assert!(
            rows.iter().all(|r| r.len() == width),
            "ragged literal image"
        );
        let pixels = rows
            .iter()
            .flat_map(|r| r.iter().map(|&v| u16::from(v)))
            .collect();
        Self {
            width,
            height,
            bit_depth: 8,
            pixels,
        }
    }

    /// Largest value a sample can take at this bit depth.
    pub fn max_value(&self) -> u16 {
        if self.bit_depth == 8 {
            255
        } else {
            u16::MAX
        }
    }

    /// Number of histogram levels at this bit depth (256 or 65,536).
    pub fn levels(&self) -> usize {
        usize::from(self.max_value()) + 1
    }

    /// Number of pixels (`width * height`).
    pub fn len(&self) -> usize {
        self.pixels.len()
    }

    /// True when the frame has no pixels.
    pub fn is_empty(&self) -> bool {
        self.pixels.is_empty()
    }

    /// One row of samples.
    pub fn row(&self, y: usize) -> &[u16] {
        &self.pixels[y * self.width..(y + 1) * self.width]
    }
}

/// A fast non-cryptographic hash (xxh3, 64 bits) of decoded pixels: the
/// dimensions, bit depth and samples of each frame in order. Two versions of a
/// file with equal hashes hold the same image, whatever their bytes on disk
/// (compression, metadata, a new modification time).
pub fn content_hash(frames: &[Frame]) -> u64 {
    let mut hasher = xxhash_rust::xxh3::Xxh3::new();
    let mut bytes = vec![0u8; 2 * 4096];
    for f in frames {
        hasher.update(&(f.width as u64).to_le_bytes());
        hasher.update(&(f.height as u64).to_le_bytes());
        hasher.update(&[f.bit_depth]);
        for chunk in f.pixels.chunks(4096) {
            let out = &mut bytes[..2 * chunk.len()];
            for (d, s) in out.chunks_exact_mut(2).zip(chunk) {
                d.copy_from_slice(&s.to_le_bytes());
            }
            hasher.update(out);
        }
    }
    hasher.digest()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_content_hash_follows_the_pixels_not_the_buffer() {
        let a = Frame::from_rows_u8(&[&[1, 2, 3], &[4, 5, 6]]);
        let same = Frame::new(3, 2, 8, vec![1, 2, 3, 4, 5, 6]).unwrap();
        assert_eq!(
            content_hash(std::slice::from_ref(&a)),
            content_hash(&[same])
        );
        // One sample changed, the same samples in another shape, or at
        // another bit depth: another image.
        let one_off = Frame::from_rows_u8(&[&[1, 2, 3], &[4, 5, 7]]);
        let reshaped = Frame::from_rows_u8(&[&[1, 2], &[3, 4], &[5, 6]]);
        let deeper = Frame::new(3, 2, 16, vec![1, 2, 3, 4, 5, 6]).unwrap();
        for other in [one_off, reshaped, deeper] {
            assert_ne!(
                content_hash(std::slice::from_ref(&a)),
                content_hash(&[other])
            );
        }
        // Pages count in order.
        let b = Frame::from_rows_u8(&[&[9]]);
        assert_ne!(content_hash(&[a.clone(), b.clone()]), content_hash(&[b, a]));
    }
}
