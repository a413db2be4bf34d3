//! TIFF and BigTIFF pages through the `tiff` crate: strips or tiles;
//! none/LZW/Deflate/PackBits, with or without predictor; multi-page.
//! Sample conversions: 8- and 16-bit unsigned are kept as they are; signed
//! 8/16-bit are shifted by +128/+32768 into the unsigned range; 32-bit float is
//! mapped linearly from its finite [min, max] onto 0..=65535 (16-bit). Colour and
//! other sample types are refused with a clear error.
//!
//! What this file leaves to others: tiled LZW pages (`tiled_lzw.rs`), the pixel
//! size (`metadata.rs`), the limits and the error type (`limits.rs`), and
//! recognising the file as a TIFF and containing the decoder's panics (`mod.rs`).

use std::io::{Read, Seek};
use std::path::Path;

use tiff::decoder::{Decoder, DecodingResult};
use tiff::tags::Tag;
use tiff::ColorType;

use super::limits::{
    check_page, check_size, check_streams_inside, tiff_error, DecodeError, DecodeLimits,
};
use super::metadata::{tiff_pixel_size, PixelSizeSource};
use super::tiled_lzw::read_tiled_lzw;
use crate::frame::Frame;

/// The frames read, one per page asked, in the order asked, and the pixel size
/// the file's first page states.
pub(super) type TiffPages = (Vec<Frame>, Option<(f64, PixelSizeSource)>);

/// Reads the listed pages of a TIFF or BigTIFF file of `len` bytes, each
/// within `limits`.
pub(super) fn read_tiff<R: Read + Seek>(
    reader: R,
    len: u64,
    path: &Path,
    pages: &[usize],
    limits: &DecodeLimits,
) -> Result<TiffPages, DecodeError> {
    let err = |e| tiff_error(path, e);
    let mut tiff_limits = tiff::decoder::Limits::default();
    tiff_limits.decoding_buffer_size =
        usize::try_from(limits.max_decoded_bytes).unwrap_or(usize::MAX);
    let mut decoder = Decoder::new(reader).map_err(err)?.with_limits(tiff_limits);
    let pixel_size = tiff_pixel_size(&mut decoder);
    let mut frames = Vec::with_capacity(pages.len());
    for &page in pages {
        check_page(path, page, limits)?;
        if let Err(e) = decoder.seek_to_image(page) {
            return Err(match e {
                tiff::TiffError::FormatError(tiff::TiffFormatError::ImageFileDirectoryNotFound) => {
                    DecodeError::NoSuchPage {
                        path: path.into(),
                        page,
                        pages: count_pages(&mut decoder, limits),
                    }
                }
                other => err(other),
            });
        }
        frames.push(read_tiff_page(&mut decoder, len, path, limits)?);
    }
    Ok((frames, pixel_size))
}

/// How many pages the file has, counted up to `limits.max_pages`.
fn count_pages<R: Read + Seek>(decoder: &mut Decoder<R>, limits: &DecodeLimits) -> usize {
    let mut n = 0;
    while n < limits.max_pages && decoder.seek_to_image(n).is_ok() {
        n += 1;
    }
    n
}

/// Reads the page the decoder is on as a greyscale frame, once every strip or
/// tile it declares lies inside the file's `len` bytes.
fn read_tiff_page<R: Read + Seek>(
    decoder: &mut Decoder<R>,
    len: u64,
    path: &Path,
    limits: &DecodeLimits,
) -> Result<Frame, DecodeError> {
    let err = |e| tiff_error(path, e);
    let (w, h) = decoder.dimensions().map_err(err)?;
    let bits = match decoder.colortype().map_err(err)? {
        ColorType::Gray(b) => b,
        other => {
            return Err(DecodeError::Unsupported {
                path: path.into(),
                detail: format!(
                    "colour type {other:?} is not greyscale; save one channel per page (greyscale) instead"
                ),
            })
        }
    };
    if ![8, 16, 32].contains(&bits) {
        return Err(DecodeError::Unsupported {
            path: path.into(),
            detail: format!("{bits}-bit samples (supported: 8, 16, 32-bit float)"),
        });
    }
    check_size(
        path,
        u64::from(w),
        u64::from(h),
        u64::from(bits / 8),
        limits,
    )?;
    let tiled = decoder.find_tag(Tag::TileOffsets).map_err(err)?.is_some();
    let (what, offsets, counts) = if tiled {
        ("tile", Tag::TileOffsets, Tag::TileByteCounts)
    } else {
        ("strip", Tag::StripOffsets, Tag::StripByteCounts)
    };
    let offsets = decoder.get_tag_u64_vec(offsets).map_err(err)?;
    let counts = decoder.get_tag_u64_vec(counts).map_err(err)?;
    check_streams_inside(path, what, &offsets, &counts, len)?;
    let data = match read_tiled_lzw(decoder, (&offsets, &counts), path, w, h, bits)? {
        Some(data) => data,
        None => decoder.read_image().map_err(err)?,
    };
    let (width, height) = (w as usize, h as usize);
    let n = width * height;
    let short = |got: usize| {
        DecodeError::Corrupt {
        path: path.into(),
        detail: format!("decoded {got} samples, expected {width} x {height} = {n} (separate planes are not supported)"),
    }
    };
    let (bit_depth, pixels): (u8, Vec<u16>) = match data {
        DecodingResult::U8(v) => (8, v.into_iter().map(u16::from).collect()),
        DecodingResult::U16(v) => (16, v),
        DecodingResult::I8(v) => (
            8,
            v.into_iter().map(|s| (i16::from(s) + 128) as u16).collect(),
        ),
        DecodingResult::I16(v) => (
            16,
            v.into_iter()
                .map(|s| (i32::from(s) + 32768) as u16)
                .collect(),
        ),
        DecodingResult::F32(v) => (16, float_to_u16(&v)),
        _ => {
            return Err(DecodeError::Unsupported {
                path: path.into(),
                detail: format!(
                "{bits}-bit sample format (supported: unsigned/signed 8 and 16-bit, 32-bit float)"
            ),
            })
        }
    };
    if pixels.len() != n {
        return Err(short(pixels.len()));
    }
    Ok(Frame {
        width,
        height,
        bit_depth,
        pixels,
    })
}

/// Maps finite float samples linearly from [min, max] onto 0..=65535; NaN and
/// infinities become 0. A constant frame maps to 0.
fn float_to_u16(v: &[f32]) -> Vec<u16> {
    let (lo, hi) = v
        .iter()
        .filter(|x| x.is_finite())
        .fold((f32::INFINITY, f32::NEG_INFINITY), |(lo, hi), &x| {
            (lo.min(x), hi.max(x))
        });
    let span = f64::from(hi) - f64::from(lo);
    if span.is_nan() || span <= 0.0 {
        return vec![0; v.len()];
    }
    let scale = 65535.0 / span;
    v.iter()
        .map(|&x| {
            if x.is_finite() {
                ((f64::from(x) - f64::from(lo)) * scale).round() as u16
            } else {
                0
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn float_mapping_spans_the_16_bit_range() {
        assert_eq!(
            float_to_u16(&[-1.0, 0.0, 1.0, f32::NAN]),
            vec![0, 32768, 65535, 0]
        );
        assert_eq!(float_to_u16(&[2.0, 2.0]), vec![0, 0]);
    }
}
