//! Writing label images: one value per pixel, the label of the object it
//! belongs to (as in the JSON and the database), 0 for background, as an
//! LZW-compressed greyscale TIFF that any image program opens.
//!
//! 16-bit while the labels fit (up to 65,535 objects), 32-bit beyond. Making
//! the labels is the analysis's ([`crate::analysis::segment_frame`]); naming
//! the files is the caller's.

use std::fs::File;
use std::io::BufWriter;
use std::path::Path;

use tiff::encoder::{colortype, Compression, TiffEncoder};

/// Why a label image could not be written. Names the file.
#[derive(Debug, thiserror::Error)]
pub enum EncodeError {
    /// The file could not be created or written.
    #[error("{path}: cannot write the label image: {source}")]
    Io {
        /// The label image's file.
        path: String,
        /// The cause.
        source: std::io::Error,
    },
    /// The TIFF encoder refused the image.
    #[error("{path}: cannot encode the label image: {source}")]
    Tiff {
        /// The label image's file.
        path: String,
        /// The encoder's reason.
        source: tiff::TiffError,
    },
    /// `labels` does not hold `width × height` values.
    #[error("{path}: {got} labels for a {width} x {height} frame")]
    Size {
        /// The label image's file.
        path: String,
        /// Values given.
        got: usize,
        /// Frame width in pixels.
        width: usize,
        /// Frame height in pixels.
        height: usize,
    },
}

/// Writes `labels` (row by row, `width × height` values) to `path`: 16-bit
/// when the largest label is at most 65,535, else 32-bit; LZW-compressed.
///
/// # Errors
/// [`EncodeError`] naming the file.
pub fn write_label_image(
    path: &Path,
    width: usize,
    height: usize,
    labels: &[u32],
) -> Result<(), EncodeError> {
    let name = || path.display().to_string();
    if labels.len() != width * height {
        return Err(EncodeError::Size {
            path: name(),
            got: labels.len(),
            width,
            height,
        });
    }
    let size = |v: usize| {
        u32::try_from(v).map_err(|_| EncodeError::Size {
            path: name(),
            got: labels.len(),
            width,
            height,
        })
    };
    let (w, h) = (size(width)?, size(height)?);
    let file = File::create(path).map_err(|source| EncodeError::Io {
        path: name(),
        source,
    })?;
    let tiff_error = |source| EncodeError::Tiff {
        path: name(),
        source,
    };
    let mut encoder = TiffEncoder::new(BufWriter::new(file))
        .map_err(tiff_error)?
        .with_compression(Compression::Lzw);
    if labels.iter().all(|&l| l <= u32::from(u16::MAX)) {
        let narrow: Vec<u16> = labels.iter().map(|&l| l as u16).collect();
        encoder.write_image::<colortype::Gray16>(w, h, &narrow)
    } else {
        encoder.write_image::<colortype::Gray32>(w, h, labels)
    }
    .map_err(tiff_error)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_read_back_as_written_in_16_and_32_bits() {
        let dir = tempfile::tempdir().unwrap();
        for (name, top) in [("small.tif", 3u32), ("wide.tif", 70_000)] {
            let labels = vec![0, 1, 1, 0, 2, top];
            let path = dir.path().join(name);
            write_label_image(&path, 3, 2, &labels).unwrap();
            let mut decoder = tiff::decoder::Decoder::new(File::open(&path).unwrap()).unwrap();
            let back: Vec<u32> = match decoder.read_image().unwrap() {
                tiff::decoder::DecodingResult::U16(v) => v.into_iter().map(u32::from).collect(),
                tiff::decoder::DecodingResult::U32(v) => v,
                other => panic!("{name}: unexpected samples {other:?}"),
            };
            assert_eq!(back, labels, "{name}");
            let compression = decoder.get_tag_u32(tiff::tags::Tag::Compression).unwrap();
            assert_eq!(compression, 5, "{name}: LZW is compression 5 (TIFF 6.0)");
        }
        let err = write_label_image(&dir.path().join("x.tif"), 2, 2, &[1]).unwrap_err();
        assert!(
            err.to_string().contains("1 labels for a 2 x 2 frame"),
            "{err}"
        );
    }
}
