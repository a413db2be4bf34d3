//! Reading image files into [`Frame`]s, with size limits and the pixel size.
//!
//! TIFF (strips or tiles; none/LZW/Deflate/PackBits, with or without predictor;
//! multi-page; BigTIFF) is read with the `tiff` crate directly, PNG with `image`.
//! Sample conversions: 8- and 16-bit unsigned are kept as they are; signed
//! 8/16-bit are shifted by +128/+32768 into the unsigned range; 32-bit float is
//! mapped linearly from its finite [min, max] onto 0..=65535 (16-bit). Colour and
//! other sample types are refused with a clear error. What this module leaves to
//! others: deciding which pages to analyze (the settings) and what they mean.
//!
//! This file is the facade: [`read_page`] and [`read_pages`] open the file,
//! recognise its kind by its signature, hand it to a reader and contain the
//! decoder's panics. The files below it, each using only those further down
//! (none uses this file):
//!
//! - `tiff.rs`: TIFF and BigTIFF pages through the `tiff` crate, and the sample
//!   conversions;
//! - `png.rs`: PNG files through `image`;
//! - `tiled_lzw.rs`: our own reader for tiled LZW pages (used by `tiff.rs`);
//! - `stack.rs`: [`StackCursor`], the complete pages of a multi-page file
//!   still being written, read on from the last one found;
//! - `metadata.rs`: [`PixelSizeSource`] and the pixel size from OME-XML or the
//!   resolution tags;
//! - `layout.rs`: byte order and field widths of TIFF and BigTIFF;
//! - `limits.rs`: [`DecodeLimits`], [`DecodeError`] and the size checks made
//!   before allocating.

mod layout;
mod limits;
mod metadata;
mod png;
mod stack;
mod tiff;
mod tiled_lzw;

use std::fs::File;
use std::io::{BufReader, Seek};
use std::path::Path;

use self::limits::read_up_to;
pub use self::limits::{DecodeError, DecodeLimits};
pub use self::metadata::PixelSizeSource;
use self::png::read_png;
pub use self::stack::{StackCursor, StackPage};
use self::tiff::read_tiff;
use crate::frame::Frame;

/// The pages asked for, in the order asked, and the file's own pixel size.
#[derive(Debug, Clone)]
pub struct Decoded {
    /// One frame per page asked, in the order asked (a page asked twice is
    /// there twice).
    pub frames: Vec<Frame>,
    /// Pixel size in µm from the file's metadata, with its source.
    pub pixel_size: Option<(f64, PixelSizeSource)>,
}

/// Reads one page of a file.
///
/// # Errors
/// [`DecodeError`] naming the file and the cause.
pub fn read_page(path: &Path, page: usize, limits: &DecodeLimits) -> Result<Frame, DecodeError> {
    let mut decoded = read_pages(path, &[page], limits)?;
    // read_pages returns exactly one frame per requested page.
    Ok(decoded.frames.swap_remove(0))
}

/// Reads the listed pages of a file (PNG has only page 0).
///
/// # Errors
/// [`DecodeError`] naming the file and the cause. A panic inside the decoder
/// (a known upstream hazard on some malformed files) is contained and reported
/// as [`DecodeError::Corrupt`].
pub fn read_pages(
    path: &Path,
    pages: &[usize],
    limits: &DecodeLimits,
) -> Result<Decoded, DecodeError> {
    let file = File::open(path).map_err(|source| DecodeError::Open {
        path: path.into(),
        source,
    })?;
    let len = file
        .metadata()
        .map_err(|source| DecodeError::Open {
            path: path.into(),
            source,
        })?
        .len();
    if len == 0 {
        return Err(DecodeError::Empty { path: path.into() });
    }
    let mut reader = BufReader::with_capacity(1 << 16, file);
    let mut magic = [0u8; 8];
    let n = read_up_to(&mut reader, &mut magic).map_err(|source| DecodeError::Open {
        path: path.into(),
        source,
    })?;
    reader.rewind().map_err(|source| DecodeError::Open {
        path: path.into(),
        source,
    })?;
    let kind = match &magic[..n] {
        [b'I', b'I', 42, 0, ..]
        | [b'M', b'M', 0, 42, ..]
        | [b'I', b'I', 43, 0, ..]
        | [b'M', b'M', 0, 43, ..] => Kind::Tiff,
        [0x89, b'P', b'N', b'G', ..] => Kind::Png,
        _ if n < 8 => {
            return Err(DecodeError::Truncated {
                path: path.into(),
                detail: format!("only {n} bytes"),
            })
        }
        _ => return Err(DecodeError::UnknownFormat { path: path.into() }),
    };
    let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| match kind {
        Kind::Tiff => read_tiff(reader, len, path, pages, limits)
            .map(|(frames, pixel_size)| Decoded { frames, pixel_size }),
        Kind::Png => read_png(reader, path, pages, limits).map(|frames| Decoded {
            frames,
            pixel_size: None,
        }),
    }));
    result.unwrap_or_else(|_| {
        Err(DecodeError::Corrupt {
            path: path.into(),
            detail: "the decoder failed on malformed data".into(),
        })
    })
}

/// The file kind its first bytes announce.
enum Kind {
    Tiff,
    Png,
}
