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
