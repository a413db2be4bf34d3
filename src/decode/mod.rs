//! Reading image files into [`Frame`]s, with size limits and the pixel size.
//!
//! TIFF (strips or tiles; none/LZW/Deflate/PackBits, with or without predictor;
//! multi-page; BigTIFF) is read with the `tiff` crate directly, PNG with `image`.
//! Sample conversions: 8- and 16-bit unsigned are kept as they are; signed
//! 8/16-bit are shifted by +128/+32768 into the unsigned range; 32-bit float is
//! mapped linearly from its finite [min, max] onto 0..=65535 (16-bit). Colour and
//! other sample types are refused with a clear error. What this file leaves to
//! others: deciding which pages to analyse (the settings) and what they mean.

use std::fs::File;
use std::io::{BufReader, Read, Seek};
use std::path::{Path, PathBuf};

use serde::Serialize;
use tiff::decoder::{Decoder, DecodingResult};
use tiff::tags::Tag;
use tiff::ColorType;

use crate::frame::Frame;

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
    #[error("{path}: cannot open: {source}")]
    Open {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: file is empty")]
    Empty { path: PathBuf },
    #[error("{path}: file ends early (truncated or still being written): {detail}")]
    Truncated { path: PathBuf, detail: String },
    #[error("{path}: not a TIFF or PNG file (unrecognised signature)")]
    UnknownFormat { path: PathBuf },
    #[error("{path}: {detail}")]
    Unsupported { path: PathBuf, detail: String },
    #[error("{path}: frame too large: {detail}")]
    TooLarge { path: PathBuf, detail: String },
    #[error("{path}: page {page} requested but the file has {pages} page(s)")]
    NoSuchPage {
        path: PathBuf,
        page: usize,
        pages: usize,
    },
    #[error("{path}: corrupt image data: {detail}")]
    Corrupt { path: PathBuf, detail: String },
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

/// Where a pixel size came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum PixelSizeSource {
    OmeXml,
    ResolutionTags,
    Config,
}

impl PixelSizeSource {
    pub fn as_str(self) -> &'static str {
        match self {
            PixelSizeSource::OmeXml => "ome-xml",
            PixelSizeSource::ResolutionTags => "resolution-tags",
            PixelSizeSource::Config => "config",
        }
    }
}

/// The pages asked for, in the order asked, and the file's own pixel size.
#[derive(Debug, Clone)]
pub struct Decoded {
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
        Kind::Tiff => read_tiff(reader, path, pages, limits),
        Kind::Png => read_png(reader, path, pages, limits),
    }));
    result.unwrap_or_else(|_| {
        Err(DecodeError::Corrupt {
            path: path.into(),
            detail: "the decoder failed on malformed data".into(),
        })
    })
}

enum Kind {
    Tiff,
    Png,
}

fn read_up_to(r: &mut impl Read, buf: &mut [u8]) -> std::io::Result<usize> {
    let mut filled = 0;
    while filled < buf.len() {
        match r.read(&mut buf[filled..])? {
            0 => break,
            k => filled += k,
        }
    }
    Ok(filled)
}

fn tiff_error(path: &Path, e: tiff::TiffError) -> DecodeError {
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

fn check_size(
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

fn read_tiff<R: Read + Seek>(
    reader: R,
    path: &Path,
    pages: &[usize],
    limits: &DecodeLimits,
) -> Result<Decoded, DecodeError> {
    let err = |e| tiff_error(path, e);
    let mut tiff_limits = tiff::decoder::Limits::default();
    tiff_limits.decoding_buffer_size =
        usize::try_from(limits.max_decoded_bytes).unwrap_or(usize::MAX);
    let mut decoder = Decoder::new(reader).map_err(err)?.with_limits(tiff_limits);
    let pixel_size = tiff_pixel_size(&mut decoder);
    let mut frames = Vec::with_capacity(pages.len());
    for &page in pages {
        if page >= limits.max_pages {
            return Err(DecodeError::TooLarge {
                path: path.into(),
                detail: format!(
                    "page {page} is beyond limits.max_pages = {}",
                    limits.max_pages
                ),
            });
        }
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
        frames.push(read_tiff_page(&mut decoder, path, limits)?);
    }
    Ok(Decoded { frames, pixel_size })
}

fn count_pages<R: Read + Seek>(decoder: &mut Decoder<R>, limits: &DecodeLimits) -> usize {
    let mut n = 0;
    while n < limits.max_pages && decoder.seek_to_image(n).is_ok() {
        n += 1;
    }
    n
}

fn read_tiff_page<R: Read + Seek>(
    decoder: &mut Decoder<R>,
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
    let data = match read_tiled_lzw(decoder, path, w, h, bits)? {
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

fn tiff_pixel_size<R: Read + Seek>(decoder: &mut Decoder<R>) -> Option<(f64, PixelSizeSource)> {
    if let Ok(Some(desc)) = decoder.find_tag(Tag::ImageDescription) {
        if let Ok(text) = desc.into_string() {
            if let Some(um) = ome_pixel_size_um(&text) {
                return Some((um, PixelSizeSource::OmeXml));
            }
        }
    }
    let x_res = match decoder.find_tag(Tag::XResolution).ok().flatten()? {
        tiff::decoder::ifd::Value::Rational(n, d) if d != 0 => f64::from(n) / f64::from(d),
        tiff::decoder::ifd::Value::Float(v) => f64::from(v),
        tiff::decoder::ifd::Value::Double(v) => v,
        _ => return None,
    };
    // ResolutionUnit: 1 = none, 2 = inch (the TIFF 6.0 default), 3 = centimetre.
    let unit = decoder
        .find_tag_unsigned::<u16>(Tag::ResolutionUnit)
        .ok()
        .flatten()
        .unwrap_or(2);
    let um_per_unit = match unit {
        2 => 25_400.0,
        3 => 10_000.0,
        _ => return None,
    };
    // Writers put 72 or 96 pixels per inch (screen defaults) when they know
    // nothing; those are not a calibration.
    if !(x_res > 0.0 && x_res.is_finite())
        || (unit == 2 && (x_res == 72.0 || x_res == 96.0 || x_res == 1.0))
    {
        return None;
    }
    Some((um_per_unit / x_res, PixelSizeSource::ResolutionTags))
}

/// Pixel size along x in µm from OME-XML (`Pixels` element, `PhysicalSizeX`
/// with `PhysicalSizeXUnit`, µm when absent, per the OME schema).
fn ome_pixel_size_um(xml: &str) -> Option<f64> {
    if !xml.contains("<OME") {
        return None;
    }
    let start = xml.find("<Pixels ").or_else(|| xml.find(":Pixels "))?;
    let element = &xml[start..start + xml[start..].find('>')?];
    let value: f64 = xml_attribute(element, "PhysicalSizeX")?.parse().ok()?;
    let factor = match xml_attribute(element, "PhysicalSizeXUnit").as_deref() {
        None | Some("µm") | Some("um") | Some("\u{3bc}m") => 1.0,
        Some("nm") => 1e-3,
        Some("mm") => 1e3,
        Some("cm") => 1e4,
        Some("m") => 1e6,
        Some(_) => return None,
    };
    let um = value * factor;
    (um > 0.0 && um.is_finite()).then_some(um)
}

fn xml_attribute(element: &str, name: &str) -> Option<String> {
    let mut rest = element;
    while let Some(i) = rest.find(name) {
        let before_ok = i == 0 || rest.as_bytes()[i - 1].is_ascii_whitespace();
        let after = rest[i + name.len()..].trim_start();
        if before_ok {
            if let Some(after_eq) = after.strip_prefix('=') {
                let after_eq = after_eq.trim_start();
                let quote = after_eq.chars().next()?;
                if quote == '"' || quote == '\'' {
                    let body = &after_eq[1..];
                    return Some(body[..body.find(quote)?].to_string());
                }
            }
        }
        rest = &rest[i + name.len()..];
    }
    None
}

fn read_png<R: Read + Seek + std::io::BufRead>(
    mut reader: R,
    path: &Path,
    pages: &[usize],
    limits: &DecodeLimits,
) -> Result<Decoded, DecodeError> {
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
    let decoder = image::codecs::png::PngDecoder::new(reader).map_err(image_err)?;
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
    Ok(Decoded {
        frames: vec![frame; pages.len()],
        pixel_size: None,
    })
}

/// Tiled LZW pages are decoded here rather than by the `tiff` crate, whose LZW
/// reader rejects tiles that common writers end without an end-of-information
/// code (an open upstream issue). Returns `None` for every other layout.
/// Handles unsigned 8/16-bit grey, one sample per pixel, predictor 1 or 2.
fn read_tiled_lzw<R: Read + Seek>(
    decoder: &mut Decoder<R>,
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
    if tile_w == 0 || tile_h == 0 || tile_w > 1 << 16 || tile_h > 1 << 16 {
        return Err(corrupt(format!("tile size {tile_w} x {tile_h}")));
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
    let offsets = decoder
        .get_tag_u64_vec(Tag::TileOffsets)
        .map_err(|e| tiff_error(path, e))?;
    let counts = decoder
        .get_tag_u64_vec(Tag::TileByteCounts)
        .map_err(|e| tiff_error(path, e))?;
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
    for (i, (&offset, &count)) in offsets.iter().zip(&counts).enumerate() {
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ome_pixel_size_in_micrometres_and_other_units() {
        let xml = r#"<?xml version="1.0"?><OME xmlns="x"><Image ID="Image:0"><Pixels ID="Pixels:0" PhysicalSizeX="0.65" PhysicalSizeY="0.65" Type="uint16"/></Image></OME>"#;
        assert_eq!(ome_pixel_size_um(xml), Some(0.65));
        let nm = xml.replace(
            "PhysicalSizeX=\"0.65\"",
            "PhysicalSizeX=\"325\" PhysicalSizeXUnit=\"nm\"",
        );
        assert!((ome_pixel_size_um(&nm).unwrap() - 0.325).abs() < 1e-12);
        assert_eq!(
            ome_pixel_size_um("<Pixels PhysicalSizeX=\"1\"/>"),
            None,
            "not OME"
        );
    }

    #[test]
    fn float_mapping_spans_the_16_bit_range() {
        assert_eq!(
            float_to_u16(&[-1.0, 0.0, 1.0, f32::NAN]),
            vec![0, 32768, 65535, 0]
        );
        assert_eq!(float_to_u16(&[2.0, 2.0]), vec![0, 0]);
    }
}
