//! The pixel size a TIFF file states about itself, and where it came from:
//! OME-XML `PhysicalSizeX` in the ImageDescription tag first, then the
//! resolution tags (screen defaults such as 72 dpi are not a calibration).
//!
//! What this file leaves to others: opening the file and choosing its directory
//! (the TIFF reader asks before it seeks to any page, so the first page's tags
//! are read), and choosing between the file's size and the configured one (the
//! pipeline).

use std::io::{Read, Seek};

use serde::Serialize;
use tiff::decoder::Decoder;
use tiff::tags::Tag;

/// Where a pixel size came from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum PixelSizeSource {
    /// The OME-XML `PhysicalSizeX` in the file's ImageDescription.
    OmeXml,
    /// The file's TIFF XResolution and ResolutionUnit tags.
    ResolutionTags,
    /// The configured pixel size, not the file.
    Config,
}

impl PixelSizeSource {
    /// The name used in output and in the database: `ome-xml`,
    /// `resolution-tags` or `config` (the same as the serialised form).
    pub fn as_str(self) -> &'static str {
        match self {
            PixelSizeSource::OmeXml => "ome-xml",
            PixelSizeSource::ResolutionTags => "resolution-tags",
            PixelSizeSource::Config => "config",
        }
    }
}

/// Pixel size in µm from the decoder's current directory: OME-XML first, then
/// the resolution tags; `None` when neither gives a usable size.
pub(super) fn tiff_pixel_size<R: Read + Seek>(
    decoder: &mut Decoder<R>,
) -> Option<(f64, PixelSizeSource)> {
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
}
