//! Our own reader for tiled, LZW-compressed TIFF pages (unsigned 8/16-bit grey,
//! one sample per pixel, predictor 1 or 2), which the `tiff` crate's LZW reader
//! refuses when a writer ends a tile without an end-of-information code.
//!
//! What this file leaves to others: every other layout and sample type, and
//! turning what it returns into a frame (`tiff.rs`); the error type and the
//! tile-size check it makes before allocating (`limits.rs`).

use std::io::{Read, Seek};
use std::path::Path;

use tiff::decoder::{Decoder, DecodingResult};
use tiff::tags::Tag;

use super::limits::{check_tile_size, DecodeError};

/// Tiled LZW pages are decoded here rather than by the `tiff` crate, whose LZW
/// reader rejects tiles that common writers end without an end-of-information
/// code (an open upstream issue). Returns `None` for every other layout.
/// Handles unsigned 8/16-bit grey, one sample per pixel, predictor 1 or 2.
/// `offsets` and `counts` are the page's tile offsets and byte counts.
pub(super) fn read_tiled_lzw<R: Read + Seek>(
    decoder: &mut Decoder<R>,
    (offsets, counts): (&[u64], &[u64]),
    path: &Path,
    width: u32,
    height: u32,
    bits: u8,
) -> Result<Option<DecodingResult>, DecodeError> {
    let tag = |decoder: &mut Decoder<R>, t: Tag| decoder.find_tag_unsigned::<u32>(t).ok().flatten();
    let (Some(5), Some(tile_w), Some(tile_h)) = (
        tag(decoder, Tag::Compression),
        tag(decoder, Tag::TileWidth),
        tag(decoder, Tag::TileLength),
    ) else {
        return Ok(None);
    };
    let sample_format = tag(decoder, Tag::SampleFormat).unwrap_or(1);
    let samples = tag(decoder, Tag::SamplesPerPixel).unwrap_or(1);
    if sample_format != 1 || samples != 1 || !(bits == 8 || bits == 16) {
        return Ok(None);
    }
    let corrupt = |detail: String| DecodeError::Corrupt {
        path: path.into(),
        detail,
    };
    let predictor = tag(decoder, Tag::Predictor).unwrap_or(1);
    if predictor != 1 && predictor != 2 {
        return Err(DecodeError::Unsupported {
            path: path.into(),
            detail: format!("TIFF predictor {predictor} with integer samples"),
        });
    }
    check_tile_size(path, tile_w, tile_h, width, height, bits)?;
    let (across, down) = (
        width.div_ceil(tile_w) as usize,
        height.div_ceil(tile_h) as usize,
    );
    if offsets.len() != across * down || counts.len() != offsets.len() {
        return Err(corrupt(format!(
            "{} tile offsets for {across} x {down} tiles",
            offsets.len()
        )));
    }
    let big_endian = decoder.byte_order() == tiff::tags::ByteOrder::BigEndian;
    let bps = usize::from(bits / 8);
    let (tw, th, w) = (tile_w as usize, tile_h as usize, width as usize);
    let tile_bytes = tw * th * bps;
    let mut out = vec![0u16; w * height as usize];
    let mut raw = Vec::new();
    let mut plain = vec![0u8; tile_bytes];
    for (i, (&offset, &count)) in offsets.iter().zip(counts).enumerate() {
        // LZW never expands data by more than ~1.4x; a larger count is damage.
        if count > (tile_bytes as u64) * 2 + 1024 {
            return Err(corrupt(format!(
                "tile {i} declares {count} compressed bytes"
            )));
        }
        let reader = decoder.inner();
        reader
            .seek(std::io::SeekFrom::Start(offset))
            .map_err(|source| DecodeError::Open {
                path: path.into(),
                source,
            })?;
        raw.resize(count as usize, 0);
        reader
            .read_exact(&mut raw)
            .map_err(|e| DecodeError::Truncated {
                path: path.into(),
                detail: format!("tile {i}: {e}"),
            })?;
        let mut lzw = weezl::decode::Decoder::with_tiff_size_switch(weezl::BitOrder::Msb, 8);
        let (mut consumed, mut written) = (0, 0);
        while written < tile_bytes {
            let r = lzw.decode_bytes(&raw[consumed..], &mut plain[written..]);
            consumed += r.consumed_in;
            written += r.consumed_out;
            match r.status {
                Ok(weezl::LzwStatus::Ok) => {}
                // Input exhausted or end code: whatever is missing stays short.
                Ok(weezl::LzwStatus::NoProgress) | Ok(weezl::LzwStatus::Done) => break,
                Err(e) => return Err(corrupt(format!("tile {i}: LZW data: {e}"))),
            }
        }
        if written < tile_bytes {
            return Err(DecodeError::Truncated {
                path: path.into(),
                detail: format!("tile {i} holds {written} of {tile_bytes} bytes"),
            });
        }
        let (tx, ty) = ((i % across) * tw, (i / across) * th);
        for row in 0..th {
            let y = ty + row;
            if y >= height as usize {
                break;
            }
            let src = &plain[row * tw * bps..(row + 1) * tw * bps];
            let mut acc: u16 = 0;
            for col in 0..tw {
                let v = if bps == 1 {
                    u16::from(src[col])
                } else if big_endian {
                    u16::from_be_bytes([src[2 * col], src[2 * col + 1]])
                } else {
                    u16::from_le_bytes([src[2 * col], src[2 * col + 1]])
                };
                // Predictor 2: horizontal differencing within the tile row, modulo the sample size.
                acc = if predictor == 2 {
                    acc.wrapping_add(v)
                } else {
                    v
                };
                if bps == 1 {
                    acc &= 0xFF;
                }
                let x = tx + col;
                if x < w {
                    out[y * w + x] = acc;
                }
            }
        }
    }
    Ok(Some(if bps == 1 {
        DecodingResult::U8(out.into_iter().map(|v| v as u8).collect())
    } else {
        DecodingResult::U16(out)
    }))
}
