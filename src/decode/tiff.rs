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

use super::layout::{type_size, Layout};
use super::limits::{
    check_page, check_size, check_streams_inside, read_up_to, tiff_error, DecodeError, DecodeLimits,
};
use super::metadata::{tiff_pixel_size, PixelSizeSource};
use super::tiled_lzw::read_tiled_lzw;
use crate::frame::Frame;

/// The frames read, one per page asked, in the order asked, and the pixel size
/// the file's first page states.
pub(super) type TiffPages = (Vec<Frame>, Option<(f64, PixelSizeSource)>);

/// Most bytes a metadata value (the OME-XML description) may take: real
/// descriptions of large plates are a few megabytes.
const METADATA_BUDGET: u64 = 16 << 20;

/// Reads the listed pages of a TIFF or BigTIFF file of `len` bytes, each
/// within `limits`.
pub(super) fn read_tiff<R: Read + Seek>(
    mut reader: R,
    len: u64,
    path: &Path,
    pages: &[usize],
    limits: &DecodeLimits,
) -> Result<TiffPages, DecodeError> {
    let err = |e| tiff_error(path, e);
    let io = |source| DecodeError::Open {
        path: path.into(),
        source,
    };
    check_first_directory(&mut reader, len, path)?;
    reader.rewind().map_err(io)?;
    // The `tiff` crate allocates a text value (the OME-XML description) at its
    // declared length, bounded only by its decoding-buffer limit: a damaged
    // count in a small file would take up to `max_decoded_bytes`. Metadata is
    // therefore read by a decoder whose buffers are capped by the file's size
    // (a value cannot be longer than the file) and `METADATA_BUDGET`.
    let pixel_size = {
        let mut meta_limits = tiff::decoder::Limits::default();
        meta_limits.decoding_buffer_size = usize::try_from(len.min(METADATA_BUDGET)).unwrap_or(0);
        let mut meta = Decoder::new(&mut reader)
            .map_err(err)?
            .with_limits(meta_limits);
        tiff_pixel_size(&mut meta)
    };
    reader.rewind().map_err(io)?;
    let mut tiff_limits = tiff::decoder::Limits::default();
    tiff_limits.decoding_buffer_size =
        usize::try_from(limits.max_decoded_bytes).unwrap_or(usize::MAX);
    let mut decoder = Decoder::new(reader).map_err(err)?.with_limits(tiff_limits);
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

/// Refuses a first directory that declares a value longer than the file.
///
/// The `tiff` crate reads the first directory when its decoder is made, before
/// limits can be given, and reserves room for each value at its declared count
/// (up to 256 MiB): a damaged count in a small file would take that much. A
/// value of `count` items of `size` bytes must fit in the file, so this checks
/// `count × size ≤ len` for every entry first (leaving the reader anywhere) (layout: TIFF 6.0 section 2;
/// BigTIFF: 8-byte counts and offsets, 20-byte entries).
fn check_first_directory<R: Read + Seek>(
    reader: &mut R,
    len: u64,
    path: &Path,
) -> Result<(), DecodeError> {
    let corrupt = |detail: String| DecodeError::Corrupt {
        path: path.into(),
        detail,
    };
    let mut head = [0u8; 16];
    let n = read_up_to(reader, &mut head).map_err(|source| DecodeError::Open {
        path: path.into(),
        source,
    })?;
    let Some(layout) = Layout::of(&head[..n]) else {
        return Ok(()); // the crate reports what is wrong with the header
    };
    // Too short to hold a header: the crate reports it (truncated).
    if n < layout.header_len() {
        return Ok(());
    }
    let offset = layout.uint(&head[layout.header_len() - layout.offset_len()..layout.header_len()]);
    let (count_len, entry_len) = (layout.count_len(), layout.entry_len());
    let io = |source| DecodeError::Open {
        path: path.into(),
        source,
    };
    // No file reaches 2^63 bytes (a seek there fails with "Invalid argument").
    const NO_FILE_REACHES: u64 = i64::MAX as u64;
    if offset > NO_FILE_REACHES {
        return Err(corrupt(format!(
            "the first directory is said to start at byte {offset}, beyond any possible file size"
        )));
    }
    reader.seek(std::io::SeekFrom::Start(offset)).map_err(io)?;
    let mut count = [0u8; 8];
    if read_up_to(reader, &mut count[..count_len]).map_err(io)? < count_len {
        return Ok(()); // the crate reports the directory as truncated
    }
    let entries = layout.uint(&count[..count_len]);
    let mut entry = [0u8; 20];
    for i in 0..entries.min(len / entry_len as u64) {
        if read_up_to(reader, &mut entry[..entry_len]).map_err(io)? < entry_len {
            break;
        }
        let (tag, kind, values, field) = layout.entry(&entry[..entry_len]);
        let Some(size) = type_size(kind) else {
            continue; // unknown types are skipped by the crate
        };
        let bytes = values.saturating_mul(size);
        if bytes > len {
            return Err(corrupt(format!(
                "directory entry {i} (tag {tag}) declares {values} values, more than the file's {len} bytes hold"
            )));
        }
        // A value longer than the entry's value field lies elsewhere, at the
        // offset the field gives (only a BigTIFF's 8-byte offset can point
        // past 2^63).
        let at = layout.uint(field);
        if bytes > field.len() as u64 && at.saturating_add(bytes) > NO_FILE_REACHES {
            return Err(corrupt(format!(
                "directory entry {i} (tag {tag}) says its values lie at byte {at}, beyond any possible file size"
            )));
        }
    }
    Ok(())
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
