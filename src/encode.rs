//! Writing label images: one value per pixel, the label of the object it
//! belongs to (as in the JSON and the database), 0 for background, as an
//! LZW-compressed greyscale TIFF that any image program opens.
//!
//! 16-bit while the labels fit (up to 65,535 objects), 32-bit beyond. Making
//! the labels is the analysis's ([`crate::analysis::segment_frame`]); naming
//! the files is the caller's. Holding ([`LabelRuns`]), encoding
//! ([`encode_label_image`]) and writing ([`write_label_file`]) are apart: the
//! watch service holds each frame's labels as runs, compactly, until its row
//! and flags are committed, and encodes only the images it keeps.

use std::io::{Cursor, Write};
use std::path::{Path, PathBuf};

use tiff::encoder::{colortype, Compression, TiffEncoder};

/// Why a label image could not be made or written.
#[derive(Debug, thiserror::Error)]
pub enum EncodeError {
    /// The TIFF encoder refused the image.
    #[error("cannot encode the label image: {0}")]
    Tiff(#[from] tiff::TiffError),
    /// `labels` does not hold `width × height` values.
    #[error("{got} labels for a {width} x {height} frame")]
    Size {
        /// Values given.
        got: usize,
        /// Frame width in pixels.
        width: usize,
        /// Frame height in pixels.
        height: usize,
    },
    /// The file could not be created, written or renamed into place.
    #[error("cannot write the label image: {0}")]
    Io(#[from] std::io::Error),
}

/// A label image file that could not be written: the file and the cause.
#[derive(Debug, thiserror::Error)]
#[error("{path}: {source}")]
pub struct LabelFileError {
    /// The label image's file.
    pub path: String,
    /// The cause.
    pub source: EncodeError,
}

/// A label image held as runs of equal values, row after row: a frame's
/// labels in far less memory (two numbers per run of background or object
/// along a row) until they are encoded.
#[derive(Debug, Clone, PartialEq)]
pub struct LabelRuns {
    width: usize,
    height: usize,
    /// (label, length) in raster order; lengths sum to `width × height`.
    runs: Vec<(u32, u32)>,
}

impl LabelRuns {
    /// The runs of `labels` (row by row, `width × height` values).
    ///
    /// # Errors
    /// [`EncodeError::Size`] when the labels do not fill the frame.
    pub fn new(width: usize, height: usize, labels: &[u32]) -> Result<LabelRuns, EncodeError> {
        if labels.len() != width * height {
            return Err(EncodeError::Size {
                got: labels.len(),
                width,
                height,
            });
        }
        let mut runs: Vec<(u32, u32)> = Vec::new();
        for &l in labels {
            match runs.last_mut() {
                Some((value, length)) if *value == l && *length < u32::MAX => *length += 1,
                _ => runs.push((l, 1)),
            }
        }
        Ok(LabelRuns {
            width,
            height,
            runs,
        })
    }

    /// The labels again, row by row.
    pub fn labels(&self) -> Vec<u32> {
        let mut labels = Vec::with_capacity(self.width * self.height);
        for &(value, length) in &self.runs {
            labels.resize(labels.len() + length as usize, value);
        }
        labels
    }

    /// [`encode_label_image`] of these labels.
    ///
    /// # Errors
    /// As [`encode_label_image`].
    pub fn encode(&self) -> Result<Vec<u8>, EncodeError> {
        encode_label_image(self.width, self.height, &self.labels())
    }
}

/// The TIFF file of `labels` (row by row, `width × height` values), in
/// memory: 16-bit when the largest label is at most 65,535, else 32-bit;
/// LZW-compressed.
///
/// # Errors
/// [`EncodeError::Size`] when the labels do not fill the frame,
/// [`EncodeError::Tiff`] when the encoder refuses it.
pub fn encode_label_image(
    width: usize,
    height: usize,
    labels: &[u32],
) -> Result<Vec<u8>, EncodeError> {
    let size_error = || EncodeError::Size {
        got: labels.len(),
        width,
        height,
    };
    if labels.len() != width * height {
        return Err(size_error());
    }
    let w = u32::try_from(width).map_err(|_| size_error())?;
    let h = u32::try_from(height).map_err(|_| size_error())?;
    let mut out = Cursor::new(Vec::new());
    let mut encoder = TiffEncoder::new(&mut out)?.with_compression(Compression::Lzw);
    if labels.iter().all(|&l| l <= u32::from(u16::MAX)) {
        let narrow: Vec<u16> = labels.iter().map(|&l| l as u16).collect();
        encoder.write_image::<colortype::Gray16>(w, h, &narrow)?;
    } else {
        encoder.write_image::<colortype::Gray32>(w, h, labels)?;
    }
    Ok(out.into_inner())
}

/// Writes an encoded label image to `path` whole or not at all: into
/// `<name>.partial` beside it, flushed to disk, then renamed over `path`. A
/// crash leaves at most a `.partial` file, never a cut-short image under the
/// final name.
///
/// # Errors
/// [`LabelFileError`] naming `path`.
pub fn write_label_file(path: &Path, bytes: &[u8]) -> Result<(), LabelFileError> {
    let partial = partial_name(path);
    let write = || -> std::io::Result<()> {
        let mut file = std::fs::File::create(&partial)?;
        file.write_all(bytes)?;
        file.sync_all()?;
        std::fs::rename(&partial, path)
    };
    write().map_err(|e| {
        let _ = std::fs::remove_file(&partial);
        LabelFileError {
            path: path.display().to_string(),
            source: e.into(),
        }
    })
}

/// Where [`write_label_file`] writes before the rename.
fn partial_name(path: &Path) -> PathBuf {
    let mut name = path.as_os_str().to_owned();
    name.push(PARTIAL_SUFFIX);
    PathBuf::from(name)
}

/// The ending of a label image still being written (see [`write_label_file`]).
pub const PARTIAL_SUFFIX: &str = ".partial";

/// [`encode_label_image`] then [`write_label_file`].
///
/// # Errors
/// [`LabelFileError`] naming `path`.
pub fn write_label_image(
    path: &Path,
    width: usize,
    height: usize,
    labels: &[u32],
) -> Result<(), LabelFileError> {
    let bytes = encode_label_image(width, height, labels).map_err(|source| LabelFileError {
        path: path.display().to_string(),
        source,
    })?;
    write_label_file(path, &bytes)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::fs::File;

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
            assert!(!partial_name(&path).exists(), "{name}: renamed into place");
        }
        let err = write_label_image(&dir.path().join("x.tif"), 2, 2, &[1]).unwrap_err();
        assert!(
            err.to_string()
                .ends_with("x.tif: 1 labels for a 2 x 2 frame"),
            "{err}"
        );
    }

    #[test]
    fn runs_hold_the_labels_and_encode_like_them() {
        // Two rows of 4: runs continue across the row end.
        let labels = [0, 0, 5, 5, 5, 0, 0, 0];
        let runs = LabelRuns::new(4, 2, &labels).unwrap();
        assert_eq!(runs.runs, vec![(0, 2), (5, 3), (0, 3)]);
        assert_eq!(runs.labels(), labels);
        assert_eq!(
            runs.encode().unwrap(),
            encode_label_image(4, 2, &labels).unwrap()
        );
        let err = LabelRuns::new(3, 3, &labels).unwrap_err().to_string();
        assert_eq!(err, "8 labels for a 3 x 3 frame");
    }

    #[test]
    fn a_file_that_cannot_be_written_is_named_and_leaves_nothing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("no-such-folder").join("frame-1.tif");
        let bytes = encode_label_image(1, 1, &[1]).unwrap();
        let err = write_label_file(&path, &bytes).unwrap_err().to_string();
        assert!(
            err.contains("frame-1.tif: cannot write the label image"),
            "{err}"
        );
        assert!(!path.exists() && !partial_name(&path).exists());
    }
}
