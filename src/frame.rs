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
