//! Bad input never panics, hangs or allocates without bound: empty, truncated,
//! garbage, hostile headers and random corruption of real TIFF and PNG files
//! (written by the `tiff` and `image` crates' encoders) all give a clear error
//! that names the file.

use std::path::{Path, PathBuf};

use framewarden::decode::{read_page, DecodeError, DecodeLimits};
use proptest::prelude::*;

fn write(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, bytes).unwrap();
    p
}

/// A valid 16-bit TIFF of `w × h` with an LZW-compressed strip layout.
fn valid_tiff(w: u32, h: u32) -> Vec<u8> {
    use tiff::encoder::{colortype::Gray16, Compression, TiffEncoder};
    let mut buf = std::io::Cursor::new(Vec::new());
    let data: Vec<u16> = (0..w * h).map(|i| (i * 37 % 4000) as u16).collect();
    let mut enc = TiffEncoder::new(&mut buf)
        .unwrap()
        .with_compression(Compression::Lzw);
    enc.write_image::<Gray16>(w, h, &data).unwrap();
    buf.into_inner()
}

fn valid_png(w: u32, h: u32) -> Vec<u8> {
    let img = image::GrayImage::from_fn(w, h, |x, y| image::Luma([(x * 7 + y) as u8]));
    let mut buf = std::io::Cursor::new(Vec::new());
    img.write_to(&mut buf, image::ImageFormat::Png).unwrap();
    buf.into_inner()
}

/// A little-endian TIFF header with one IFD of `(tag, type, count, value)`
/// entries (type 3 = SHORT, 4 = LONG) and no pixel data.
fn tiff_header(entries: &[(u16, u16, u32, u32)]) -> Vec<u8> {
    let mut b = b"II*\0".to_vec();
    b.extend_from_slice(&8u32.to_le_bytes());
    b.extend_from_slice(&(entries.len() as u16).to_le_bytes());
    for &(tag, typ, count, value) in entries {
        b.extend_from_slice(&tag.to_le_bytes());
        b.extend_from_slice(&typ.to_le_bytes());
        b.extend_from_slice(&count.to_le_bytes());
        if typ == 3 {
            b.extend_from_slice(&(value as u16).to_le_bytes());
            b.extend_from_slice(&[0, 0]);
        } else {
            b.extend_from_slice(&value.to_le_bytes());
        }
    }
    b.extend_from_slice(&0u32.to_le_bytes());
    b
}

/// A little-endian TIFF header plus one IFD declaring `w × h` 16-bit grey with a
/// single strip at offset 8 of `strip_bytes` bytes, and no pixel data behind it.
fn hostile_header(w: u32, h: u32, strip_bytes: u32) -> Vec<u8> {
    let entries: [(u16, u16, u32, u32); 8] = [
        (256, 4, 1, w),           // ImageWidth
        (257, 4, 1, h),           // ImageLength
        (258, 3, 1, 16),          // BitsPerSample
        (259, 3, 1, 1),           // Compression: none
        (262, 3, 1, 1),           // Photometric: min-is-black
        (273, 4, 1, 8),           // StripOffsets
        (278, 4, 1, h),           // RowsPerStrip
        (279, 4, 1, strip_bytes), // StripByteCounts
    ];
    tiff_header(&entries)
}

/// A little-endian tiled LZW TIFF header: a `w × h` 16-bit frame declared with
/// `tile × tile` tiles (one tile, no data behind it).
fn hostile_tiled_header(w: u32, h: u32, tile: u32) -> Vec<u8> {
    let entries: [(u16, u16, u32, u32); 9] = [
        (256, 4, 1, w),    // ImageWidth
        (257, 4, 1, h),    // ImageLength
        (258, 3, 1, 16),   // BitsPerSample
        (259, 3, 1, 5),    // Compression: LZW
        (262, 3, 1, 1),    // Photometric: min-is-black
        (322, 4, 1, tile), // TileWidth
        (323, 4, 1, tile), // TileLength
        (324, 4, 1, 8),    // TileOffsets
        (325, 4, 1, 16),   // TileByteCounts
    ];
    tiff_header(&entries)
}

fn assert_names_file(e: &DecodeError, p: &Path) {
    let msg = e.to_string();
    assert!(
        msg.contains(&p.display().to_string()),
        "error does not name the file: {msg}"
    );
}

#[test]
fn empty_file_is_reported_as_empty() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(dir.path(), "empty.tif", b"");
    let e = read_page(&p, 0, &DecodeLimits::default()).unwrap_err();
    assert!(
        matches!(e, DecodeError::Empty { .. }) && e.is_incomplete(),
        "{e}"
    );
    assert_names_file(&e, &p);
}

#[test]
fn garbage_is_an_unknown_format() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "notes.tif",
        b"this is a text file, not an image\n",
    );
    let e = read_page(&p, 0, &DecodeLimits::default()).unwrap_err();
    assert!(matches!(e, DecodeError::UnknownFormat { .. }), "{e}");
    assert_names_file(&e, &p);
}

#[test]
fn every_truncation_of_a_real_tiff_and_png_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    for (name, bytes) in [("t.tif", valid_tiff(40, 30)), ("t.png", valid_png(40, 30))] {
        let whole = write(dir.path(), name, &bytes);
        assert!(
            read_page(&whole, 0, &DecodeLimits::default()).is_ok(),
            "{name} must decode whole"
        );
        for cut in (0..bytes.len()).step_by(7) {
            let p = write(dir.path(), &format!("cut_{cut}_{name}"), &bytes[..cut]);
            match read_page(&p, 0, &DecodeLimits::default()) {
                Err(e) => assert_names_file(&e, &p),
                Ok(_) => panic!("{name} cut at {cut} of {} decoded", bytes.len()),
            }
        }
    }
}

#[test]
fn huge_declared_size_is_refused_before_allocation() {
    let dir = tempfile::tempdir().unwrap();
    // 200,000 × 200,000 16-bit = 80 GB declared, in a file of a hundred bytes.
    let p = write(
        dir.path(),
        "huge.tif",
        &hostile_header(200_000, 200_000, u32::MAX),
    );
    let e = read_page(&p, 0, &DecodeLimits::default()).unwrap_err();
    assert!(matches!(e, DecodeError::TooLarge { .. }), "{e}");
    assert!(e.to_string().contains("max_pixels"), "{e}");
    // Within the pixel cap but over the byte cap.
    let limits = DecodeLimits {
        max_decoded_bytes: 1 << 20,
        ..DecodeLimits::default()
    };
    let p = write(
        dir.path(),
        "big.tif",
        &hostile_header(4096, 4096, 4096 * 4096 * 2),
    );
    let e = read_page(&p, 0, &limits).unwrap_err();
    assert!(e.to_string().contains("max_decoded_mib"), "{e}");
    // Declared within limits but the data is missing: truncated.
    let p = write(
        dir.path(),
        "short.tif",
        &hostile_header(64, 64, 64 * 64 * 2),
    );
    assert!(read_page(&p, 0, &DecodeLimits::default())
        .unwrap_err()
        .is_incomplete());
}

#[test]
fn huge_tiles_on_a_small_frame_are_refused_before_allocation() {
    let dir = tempfile::tempdir().unwrap();
    // A 16 × 16 frame in one 65536 × 65536 tile: an 8 GiB tile buffer, declared.
    let p = write(
        dir.path(),
        "tiles.tif",
        &hostile_tiled_header(16, 16, 65536),
    );
    let e = read_page(&p, 0, &DecodeLimits::default()).unwrap_err();
    assert!(matches!(e, DecodeError::TooLarge { .. }), "{e}");
    assert_names_file(&e, &p);
}

/// A little-endian BigTIFF (version 43, 8-byte offsets, 20-byte entries:
/// the BigTIFF layout) of one 32 × 32 8-bit page in four 16 × 16 tiles; the
/// tile offsets array (four LONG8 values, out of line) lies at `offsets_at`
/// (`None`: where it really is) and the first directory at `directory_at`.
fn big_tiled(offsets_at: Option<u64>, directory_at: u64) -> Vec<u8> {
    const ENTRIES: u64 = 10;
    let end = 16 + 8 + ENTRIES * 20 + 8;
    let (offsets, counts, pixels) = (end, end + 32, end + 64);
    let entries: [(u16, u16, u64, u64); ENTRIES as usize] = [
        (256, 4, 1, 32),
        (257, 4, 1, 32),
        (258, 3, 1, 8),
        (259, 3, 1, 1),
        (262, 3, 1, 1),
        (277, 3, 1, 1),
        (322, 4, 1, 16),
        (323, 4, 1, 16),
        (324, 16, 4, offsets_at.unwrap_or(offsets)),
        (325, 16, 4, counts),
    ];
    let mut b = b"II".to_vec();
    for v in [43u16, 8, 0] {
        b.extend_from_slice(&v.to_le_bytes());
    }
    b.extend_from_slice(&directory_at.to_le_bytes());
    b.extend_from_slice(&ENTRIES.to_le_bytes());
    for (tag, typ, count, value) in entries {
        b.extend_from_slice(&tag.to_le_bytes());
        b.extend_from_slice(&typ.to_le_bytes());
        b.extend_from_slice(&count.to_le_bytes());
        b.extend_from_slice(&value.to_le_bytes());
    }
    b.extend_from_slice(&0u64.to_le_bytes());
    for i in 0..4 {
        b.extend_from_slice(&(pixels + 256 * i).to_le_bytes());
    }
    for _ in 0..4 {
        b.extend_from_slice(&256u64.to_le_bytes());
    }
    b.extend_from_slice(&[0u8; 1024]);
    b
}

#[test]
fn offsets_beyond_any_file_size_are_named_as_such() {
    let dir = tempfile::tempdir().unwrap();
    // The layout is right: the valid file reads.
    let ok = write(dir.path(), "ok.tif", &big_tiled(None, 16));
    let frame = read_page(&ok, 0, &DecodeLimits::default()).unwrap();
    assert_eq!((frame.width, frame.height), (32, 32));
    // The tile offsets array, then the first directory, at 2^63 + 16.
    for (name, bytes, says) in [
        (
            "offsets.tif",
            big_tiled(Some((1 << 63) + 16), 16),
            "directory entry 8 (tag 324) says its values lie at byte 9223372036854775824, beyond any possible file size",
        ),
        (
            "directory.tif",
            big_tiled(None, (1 << 63) + 16),
            "the first directory is said to start at byte 9223372036854775824, beyond any possible file size",
        ),
    ] {
        let p = write(dir.path(), name, &bytes);
        let e = read_page(&p, 0, &DecodeLimits::default()).unwrap_err();
        assert!(matches!(e, DecodeError::Corrupt { .. }), "{e}");
        assert!(e.to_string().contains(says), "{e}");
        assert_names_file(&e, &p);
    }
}

#[test]
fn a_missing_page_names_the_page_count() {
    let dir = tempfile::tempdir().unwrap();
    let p = write(dir.path(), "one.tif", &valid_tiff(8, 8));
    let e = read_page(&p, 3, &DecodeLimits::default()).unwrap_err();
    assert!(
        e.to_string()
            .contains("page 3 requested but the file has 1 page"),
        "{e}"
    );
}

#[test]
fn colour_is_refused_with_a_reason() {
    let dir = tempfile::tempdir().unwrap();
    let img = image::RgbImage::from_fn(8, 8, |x, _| image::Rgb([x as u8, 0, 0]));
    let p = dir.path().join("rgb.png");
    img.save(&p).unwrap();
    let e = read_page(&p, 0, &DecodeLimits::default()).unwrap_err();
    assert!(e.to_string().contains("not greyscale"), "{e}");
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 300, ..ProptestConfig::default() })]

    /// Random byte corruption of a real TIFF never panics or hangs: it decodes
    /// or gives an error naming the file.
    #[test]
    fn corrupted_tiff_never_panics(flips in proptest::collection::vec((0usize..4096, any::<u8>()), 1..8)) {
        let mut bytes = valid_tiff(32, 24);
        for (at, value) in flips {
            let i = at % bytes.len();
            bytes[i] = value;
        }
        let dir = tempfile::tempdir().unwrap();
        let p = write(dir.path(), "fuzz.tif", &bytes);
        if let Err(e) = read_page(&p, 0, &DecodeLimits { max_pixels: 1 << 22, ..DecodeLimits::default() }) {
            assert_names_file(&e, &p);
        }
    }
}
