//! Decoding against files written by outside libraries: tifffile (BigTIFF,
//! signed and float samples, OME-XML and resolution-tag pixel sizes, multi-page
//! big-endian PackBits) and Pillow (8- and 16-bit PNG). The expected pixels come
//! from the writing library's own arrays, after the conversion README.md
//! documents; the expected pixel sizes are the ones the files were written with.

mod common;

use framewarden::decode::{read_pages, DecodeLimits};
use serde::Deserialize;

#[derive(Deserialize)]
struct Case {
    name: String,
    file: String,
    width: usize,
    height: usize,
    bit_depth: u8,
    page: usize,
    pixel_size_um: Option<f64>,
    pixel_size_source: Option<String>,
}

#[test]
fn every_format_decodes_to_the_writers_pixels_and_pixel_size() {
    let dir = tempfile::tempdir().unwrap();
    common::run_reference_script("make_format_cases.py", dir.path());
    let cases: Vec<Case> =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("cases.json")).unwrap())
            .unwrap();
    assert_eq!(cases.len(), 10, "the script writes ten cases");
    let mut failures = Vec::new();
    for c in &cases {
        let path = dir.path().join(&c.file);
        let decoded = match read_pages(&path, &[c.page], &DecodeLimits::default()) {
            Ok(d) => d,
            Err(e) => {
                failures.push(format!("{}: {e}", c.name));
                continue;
            }
        };
        let f = &decoded.frames[0];
        let bytes = std::fs::read(dir.path().join(format!("{}.expected.bin", c.name))).unwrap();
        let want: Vec<u16> = bytes
            .chunks_exact(2)
            .map(|b| u16::from_le_bytes([b[0], b[1]]))
            .collect();
        if (f.width, f.height, f.bit_depth) != (c.width, c.height, c.bit_depth) {
            failures.push(format!(
                "{}: {}x{} {}-bit, expected {}x{} {}-bit",
                c.name, f.width, f.height, f.bit_depth, c.width, c.height, c.bit_depth
            ));
        } else if f.pixels != want {
            let first = f
                .pixels
                .iter()
                .zip(&want)
                .position(|(a, b)| a != b)
                .unwrap_or(0);
            failures.push(format!(
                "{}: pixel {first} is {} not {}",
                c.name, f.pixels[first], want[first]
            ));
        }
        let got = decoded
            .pixel_size
            .map(|(um, src)| (um, src.as_str().to_string()));
        let want = c.pixel_size_um.zip(c.pixel_size_source.clone());
        let same = match (&got, &want) {
            (Some((a, s)), Some((b, t))) => (a - b).abs() < 1e-9 && s == t,
            (None, None) => true,
            _ => false,
        };
        if !same {
            failures.push(format!("{}: pixel size {got:?}, expected {want:?}", c.name));
        }
    }
    common::check(failures, "decoding against tifffile and Pillow");
}

/// A page whose last strip or tile is missing its final bytes is incomplete
/// (worth retrying), never analysed early: tifffile writes each file with its
/// compressed data at the end (the script checks that), and cutting 1 or 2
/// bytes leaves what a reader sees while the writer pauses before the end.
#[test]
fn a_page_missing_its_last_compressed_bytes_is_incomplete() {
    let dir = tempfile::tempdir().unwrap();
    common::run_reference_script("make_short_streams.py", dir.path());
    let names: Vec<String> =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("names.json")).unwrap())
            .unwrap();
    assert_eq!(names.len(), 4, "LZW and Deflate, strips and tiles");
    let mut failures = Vec::new();
    for name in &names {
        let whole = std::fs::read(dir.path().join(format!("{name}.tif"))).unwrap();
        let path = dir.path().join(format!("{name}.tif"));
        if let Err(e) = read_pages(&path, &[0], &DecodeLimits::default()) {
            failures.push(format!("{name}: whole file: {e}"));
        }
        for cut in [1, 2] {
            let short = dir.path().join(format!("{name}_short{cut}.tif"));
            std::fs::write(&short, &whole[..whole.len() - cut]).unwrap();
            match read_pages(&short, &[0], &DecodeLimits::default()) {
                Ok(_) => failures.push(format!("{name} without its last {cut} bytes decoded")),
                Err(e) if !e.is_incomplete() => {
                    failures.push(format!("{name} short by {cut}: not incomplete: {e}"))
                }
                Err(_) => {}
            }
        }
    }
    common::check(failures, "pages missing their last bytes");
}
