//! PNG files through the `image` crate: 8- or 16-bit greyscale, one page. A
//! PNG counts as complete only when it ends with its IEND chunk, so a file a
//! writer is still busy with is reported as truncated (worth retrying).
//!
//! What this file leaves to others: the limits and the error type
//! (`limits.rs`), and recognising the file as a PNG and containing the
//! decoder's panics (`mod.rs`). No pixel size is read from a PNG.

use std::io::{BufRead, Read, Seek};
use std::path::Path;

use super::limits::{check_size, DecodeError, DecodeLimits};
use crate::frame::Frame;

/// Most bytes the PNG decoder may allocate for itself (not counting the frame):
/// ample for row buffers of any frame within the pixel limits and for real
/// metadata chunks (ICC profiles are kilobytes to a few megabytes).
const PNG_DECODER_BUDGET: u64 = 16 << 20;

/// Reads a PNG file, which has only page 0, once for each page asked (each must
/// be 0), after checking that it is complete.
pub(super) fn read_png<R: Read + Seek + BufRead>(
    mut reader: R,
    path: &Path,
    pages: &[usize],
    limits: &DecodeLimits,
) -> Result<Vec<Frame>, DecodeError> {
    use image::ImageDecoder;
    // A PNG is complete only when it ends with the IEND chunk; the pixel data can
    // decode before that, so check the end explicitly (a writer may still be busy).
    const IEND: [u8; 12] = [0, 0, 0, 0, b'I', b'E', b'N', b'D', 0xAE, 0x42, 0x60, 0x82];
    let mut tail = [0u8; 12];
    let io = |source| DecodeError::Open {
        path: path.into(),
        source,
    };
    let complete = reader.seek(std::io::SeekFrom::End(-12)).is_ok()
        && reader.read_exact(&mut tail).is_ok()
        && tail == IEND;
    if !complete {
        return Err(DecodeError::Truncated {
            path: path.into(),
            detail: "PNG has no end chunk".into(),
        });
    }
    reader.rewind().map_err(io)?;
    if let Some(&page) = pages.iter().find(|&&p| p != 0) {
        return Err(DecodeError::NoSuchPage {
            path: path.into(),
            page,
            pages: 1,
        });
    }
    let image_err = |e: image::ImageError| match e {
        image::ImageError::IoError(io) if io.kind() == std::io::ErrorKind::UnexpectedEof => {
            DecodeError::Truncated {
                path: path.into(),
                detail: io.to_string(),
            }
        }
        image::ImageError::Unsupported(u) => DecodeError::Unsupported {
            path: path.into(),
            detail: u.to_string(),
        },
        image::ImageError::Limits(l) => DecodeError::TooLarge {
            path: path.into(),
            detail: l.to_string(),
        },
        other => DecodeError::Corrupt {
            path: path.into(),
            detail: other.to_string(),
        },
    };
    // The decoder's own allocations (row buffers, and chunks it inflates such as
    // an ICC profile) are capped: a few kilobytes of compressed chunk can
    // otherwise inflate to gigabytes. The frame's buffer is ours, sized by
    // `check_size` below.
    let mut decoder_limits = image::Limits::default();
    decoder_limits.max_alloc = Some(PNG_DECODER_BUDGET);
    let decoder =
        image::codecs::png::PngDecoder::with_limits(reader, decoder_limits).map_err(image_err)?;
    let (w, h) = decoder.dimensions();
    let colour = decoder.color_type();
    let bits = match colour {
        image::ColorType::L8 => 8u8,
        image::ColorType::L16 => 16,
        other => {
            return Err(DecodeError::Unsupported {
                path: path.into(),
                detail: format!(
                    "PNG colour type {other:?} is not greyscale (8 or 16-bit grey is supported)"
                ),
            })
        }
    };
    check_size(
        path,
        u64::from(w),
        u64::from(h),
        u64::from(bits / 8),
        limits,
    )?;
    let mut buf = vec![0u8; decoder.total_bytes() as usize];
    decoder.read_image(&mut buf).map_err(image_err)?;
    let pixels: Vec<u16> = if bits == 8 {
        buf.into_iter().map(u16::from).collect()
    } else {
        // `image` hands 16-bit samples over in native byte order.
        buf.chunks_exact(2)
            .map(|c| u16::from_ne_bytes([c[0], c[1]]))
            .collect()
    };
    let frame = Frame::new(w as usize, h as usize, bits, pixels).map_err(|detail| {
        DecodeError::Corrupt {
            path: path.into(),
            detail,
        }
    })?;
    Ok(vec![frame; pages.len()])
}
