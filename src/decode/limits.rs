//! The bottom of the decoder: the caps ([`DecodeLimits`]), the error every
//! reader returns ([`DecodeError`]), and the size checks made before a pixel or
//! tile buffer is allocated. The mapping of the `tiff` crate's errors lives here
//! too, because both TIFF readers (`tiff.rs` and `tiled_lzw.rs`) need it.
//!
//! What this file leaves to others: opening and reading files, and deciding
//! when each check applies (the readers above it).

use std::io::Read;
use std::path::{Path, PathBuf};

/// Caps applied before any pixel buffer is allocated.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DecodeLimits {
    /// Largest accepted width × height of one page.
    pub max_pixels: u64,
    /// Largest accepted decoded size of one page, in bytes.
    pub max_decoded_bytes: u64,
    /// Most pages walked in a multi-page file.
    pub max_pages: usize,
}

impl Default for DecodeLimits {
    fn default() -> Self {
        Self {
            max_pixels: 100_000_000,
            max_decoded_bytes: 1 << 30,
            max_pages: 10_000,
        }
    }
}

/// Why a file could not be read. Every variant names the file.
#[derive(Debug, thiserror::Error)]
pub enum DecodeError {
    /// The file could not be opened, read or repositioned (an I/O error other
    /// than a short read).
    #[error("{path}: cannot open: {source}")]
    Open {
        /// The file.
        path: PathBuf,
        /// The operating system's error.
        source: std::io::Error,
    },
    /// The file has no bytes (yet).
    #[error("{path}: file is empty")]
    Empty {
        /// The file.
        path: PathBuf,
    },
    /// The file ends before its data does: truncated, or still being written.
    #[error("{path}: file ends early (truncated or still being written): {detail}")]
    Truncated {
        /// The file.
        path: PathBuf,
        /// What was cut short.
        detail: String,
    },
    /// The file starts with neither a TIFF (or BigTIFF) nor a PNG signature.
    #[error("{path}: not a TIFF or PNG file (unrecognised signature)")]
    UnknownFormat {
        /// The file.
        path: PathBuf,
    },
    /// A well-formed file uses something this decoder does not read (colour,
    /// an unusual bit depth or sample format, a TIFF feature).
    #[error("{path}: {detail}")]
    Unsupported {
        /// The file.
        path: PathBuf,
        /// What is not supported and, where there is one, what to do instead.
        detail: String,
    },
    /// A page, a tile or a page number exceeds [`DecodeLimits`] (checked before
    /// allocating), or the decoder's own buffer limit was reached.
    #[error("{path}: frame too large: {detail}")]
    TooLarge {
        /// The file.
        path: PathBuf,
        /// The size found and the limit it exceeds.
        detail: String,
    },
    /// A page beyond the file's last was asked for.
    #[error("{path}: page {page} requested but the file has {pages} page(s)")]
    NoSuchPage {
        /// The file.
        path: PathBuf,
        /// The page asked for, counted from 0.
        page: usize,
        /// How many pages the file has (counted up to `max_pages`).
        pages: usize,
    },
    /// The image data is malformed: the decoder rejected it, its sizes disagree,
    /// or the decoder panicked on it.
    #[error("{path}: corrupt image data: {detail}")]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What was wrong.
        detail: String,
    },
}

impl DecodeError {
    /// True when the file looks incomplete (a short read), so a writer may still
    /// be busy with it: worth retrying later.
    pub fn is_incomplete(&self) -> bool {
        matches!(
            self,
            DecodeError::Empty { .. } | DecodeError::Truncated { .. }
        )
    }
}

/// The `tiff` crate's error as a [`DecodeError`] naming `path`: a short read is
/// [`DecodeError::Truncated`] (worth retrying), the crate's buffer limit is
/// [`DecodeError::TooLarge`].
pub(super) fn tiff_error(path: &Path, e: tiff::TiffError) -> DecodeError {
    use tiff::TiffError as E;
    let path = path.to_path_buf();
    match e {
        E::IoError(io) if io.kind() == std::io::ErrorKind::UnexpectedEof => {
            DecodeError::Truncated {
                path,
                detail: io.to_string(),
            }
        }
        E::UnsupportedError(u) => DecodeError::Unsupported {
            path,
            detail: format!("unsupported TIFF feature: {u}"),
        },
        E::LimitsExceeded => DecodeError::TooLarge {
            path,
            detail: "decoder buffer limit exceeded".into(),
        },
        other => DecodeError::Corrupt {
            path,
            detail: other.to_string(),
        },
    }
}

/// Refuses a page of `width` × `height` samples of `bytes_per_sample` bytes
/// that is empty or beyond `limits`, before its buffer is allocated.
pub(super) fn check_size(
    path: &Path,
    width: u64,
    height: u64,
    bytes_per_sample: u64,
    limits: &DecodeLimits,
) -> Result<(), DecodeError> {
    let pixels = width.saturating_mul(height);
    if width == 0 || height == 0 {
        return Err(DecodeError::Corrupt {
            path: path.into(),
            detail: format!("zero-sized frame {width} x {height}"),
        });
    }
    if pixels > limits.max_pixels {
        return Err(DecodeError::TooLarge {
            path: path.into(),
            detail: format!(
                "{width} x {height} = {pixels} pixels exceeds limits.max_pixels = {}",
                limits.max_pixels
            ),
        });
    }
    let bytes = pixels.saturating_mul(bytes_per_sample);
    if bytes > limits.max_decoded_bytes {
        return Err(DecodeError::TooLarge {
            path: path.into(),
            detail: format!(
                "{bytes} decoded bytes exceeds limits.max_decoded_mib = {}",
                limits.max_decoded_bytes >> 20
            ),
        });
    }
    Ok(())
}

/// Refuses a page number at or beyond `limits.max_pages`, before the file's
/// page chain is walked to it.
pub(super) fn check_page(
    path: &Path,
    page: usize,
    limits: &DecodeLimits,
) -> Result<(), DecodeError> {
    if page >= limits.max_pages {
        return Err(DecodeError::TooLarge {
            path: path.into(),
            detail: format!(
                "page {page} is beyond limits.max_pages = {}",
                limits.max_pages
            ),
        });
    }
    Ok(())
}

/// Refuses a declared tile size of `tile_w` × `tile_h` samples of `bits` bits
/// that is empty, beyond 65536 on a side, or out of proportion to its
/// `width` × `height` frame.
pub(super) fn check_tile_size(
    path: &Path,
    tile_w: u32,
    tile_h: u32,
    width: u32,
    height: u32,
    bits: u8,
) -> Result<(), DecodeError> {
    if tile_w == 0 || tile_h == 0 || tile_w > 1 << 16 || tile_h > 1 << 16 {
        return Err(DecodeError::Corrupt {
            path: path.into(),
            detail: format!("tile size {tile_w} x {tile_h}"),
        });
    }
    // A tile buffer is allocated before any data is read: keep it in proportion
    // to the frame (at most 4x its size, or 16 MiB for small frames).
    let tile_bytes_declared = u64::from(tile_w) * u64::from(tile_h) * u64::from(bits / 8);
    let frame_bytes = u64::from(width) * u64::from(height) * u64::from(bits / 8);
    if tile_bytes_declared > frame_bytes.max(1 << 22) * 4 {
        return Err(DecodeError::TooLarge {
            path: path.into(),
            detail: format!("{tile_w} x {tile_h} tiles for a {width} x {height} frame"),
        });
    }
    Ok(())
}

/// Refuses a page whose compressed or raw data, as its directory declares it
/// (`offsets` and `counts`, one pair per strip or tile), does not lie wholly
/// inside the file's `len` bytes. A writer that has not yet written a stream's
/// last bytes leaves exactly this: a page that may decode (a decoder can stop
/// before the end-of-stream code) but is not complete, so it is reported as
/// [`DecodeError::Truncated`], worth retrying.
pub(super) fn check_streams_inside(
    path: &Path,
    what: &str,
    offsets: &[u64],
    counts: &[u64],
    len: u64,
) -> Result<(), DecodeError> {
    if offsets.len() != counts.len() {
        return Err(DecodeError::Corrupt {
            path: path.into(),
            detail: format!(
                "{} {what} offsets but {} byte counts",
                offsets.len(),
                counts.len()
            ),
        });
    }
    for (i, (&offset, &count)) in offsets.iter().zip(counts).enumerate() {
        let Some(end) = offset.checked_add(count) else {
            return Err(DecodeError::Corrupt {
                path: path.into(),
                detail: format!(
                    "{what} {i} starts at byte {offset} with {count} bytes, past any file size"
                ),
            });
        };
        if end > len {
            return Err(DecodeError::Truncated {
                path: path.into(),
                detail: format!("{what} {i} ends at byte {end} but the file has {len} bytes"),
            });
        }
    }
    Ok(())
}

/// Reads until `buf` is full or the input ends; returns the bytes read.
pub(super) fn read_up_to(r: &mut impl Read, buf: &mut [u8]) -> std::io::Result<usize> {
    let mut filled = 0;
    while filled < buf.len() {
        match r.read(&mut buf[filled..])? {
            0 => break,
            k => filled += k,
        }
    }
    Ok(filled)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_are_refused_before_allocation() {
        let p = Path::new("f.tif");
        let limits = DecodeLimits {
            max_pixels: 100,
            max_decoded_bytes: 150,
            max_pages: 2,
        };
        assert!(check_size(p, 10, 10, 1, &limits).is_ok());
        assert!(matches!(
            check_size(p, 0, 10, 1, &limits),
            Err(DecodeError::Corrupt { .. })
        ));
        assert!(matches!(
            check_size(p, 11, 10, 1, &limits),
            Err(DecodeError::TooLarge { .. })
        ));
        assert!(matches!(
            check_size(p, 10, 10, 2, &limits),
            Err(DecodeError::TooLarge { .. })
        ));
        assert!(check_page(p, 1, &limits).is_ok());
        assert!(matches!(
            check_page(p, 2, &limits),
            Err(DecodeError::TooLarge { .. })
        ));
        assert!(check_tile_size(p, 256, 256, 100, 100, 16).is_ok());
        assert!(matches!(
            check_tile_size(p, 0, 256, 100, 100, 16),
            Err(DecodeError::Corrupt { .. })
        ));
        assert!(matches!(
            check_tile_size(p, 1 << 16, 1 << 16, 100, 100, 16),
            Err(DecodeError::TooLarge { .. })
        ));
    }

    #[test]
    fn streams_must_lie_inside_the_file() {
        let p = Path::new("t.tif");
        // Two strips: bytes 8..108 and 108..208 (hand-derived ends 108 and 208).
        assert!(check_streams_inside(p, "strip", &[8, 108], &[100, 100], 208).is_ok());
        // One byte short: the second strip's last byte is missing.
        assert!(matches!(
            check_streams_inside(p, "strip", &[8, 108], &[100, 100], 207),
            Err(DecodeError::Truncated { .. })
        ));
        assert!(matches!(
            check_streams_inside(p, "tile", &[u64::MAX], &[2], 10),
            Err(DecodeError::Corrupt { .. })
        ));
        assert!(matches!(
            check_streams_inside(p, "tile", &[8], &[], 10),
            Err(DecodeError::Corrupt { .. })
        ));
    }
}
