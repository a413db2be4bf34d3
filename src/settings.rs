//! The configuration file: raw TOML in, one validated [`Settings`] value out.
//!
//! [`parse`] turns text into settings and [`load`] adds the file; nothing else in
//! the program reads raw configuration. Unknown keys are rejected with the file,
//! line and a hint naming the keys that are accepted there.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use serde::Deserialize;

use crate::analysis::correct::FlatField;
use crate::decode::{self, DecodeLimits};

/// Errors from reading or validating a configuration file.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("cannot read config {path}: {source}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}:{line}:{column}: {message}{hint}")]
    Syntax {
        path: PathBuf,
        line: usize,
        column: usize,
        message: String,
        hint: String,
    },
    #[error("{path}: {message}")]
    Invalid { path: PathBuf, message: String },
}

/// Threshold method and its parameters.
#[derive(Debug, Clone, PartialEq)]
pub enum Method {
    Otsu,
    Triangle,
    Li,
    /// Multi-level Otsu with `classes` classes; foreground is above threshold
    /// number `boundary` (1-based, `1..classes`).
    MultiOtsu {
        classes: usize,
        boundary: usize,
    },
    Fixed(u16),
}

impl Method {
    pub fn name(&self) -> &'static str {
        match self {
            Method::Otsu => "otsu",
            Method::Triangle => "triangle",
            Method::Li => "li",
            Method::MultiOtsu { .. } => "multi-otsu",
            Method::Fixed(_) => "fixed",
        }
    }
}

/// Background correction applied before thresholding.
#[derive(Debug, Clone)]
pub enum Background {
    None,
    /// Rolling-ball background (Sternberg 1983) of this radius, subtracted.
    RollingBall {
        radius_px: f64,
    },
    /// Flat-field correction with user-supplied flat (and optional dark) frames.
    FlatField(Arc<FlatField>),
}

/// Validated segmentation settings: everything [`crate::analysis::analyze_frame`] needs.
#[derive(Debug, Clone)]
pub struct SegmentSettings {
    pub page: usize,
    pub method: Method,
    pub smooth_sigma_px: f64,
    pub background: Background,
    pub fill_holes: bool,
    /// 4 or 8.
    pub connectivity: u8,
    pub min_area_px: u64,
    /// 0 = no limit.
    pub max_area_px: u64,
    /// Area limits in µm², applied when the pixel size is known. 0 = off.
    pub min_area_um2: f64,
    pub max_area_um2: f64,
    pub exclude_border: bool,
    /// Other pages whose intensities are measured inside the objects.
    pub measure_pages: Vec<usize>,
}

impl Default for SegmentSettings {
    fn default() -> Self {
        Self {
            page: 0,
            method: Method::Otsu,
            smooth_sigma_px: 0.0,
            background: Background::None,
            fill_holes: true,
            connectivity: 8,
            min_area_px: 0,
            max_area_px: 0,
            min_area_um2: 0.0,
            max_area_um2: 0.0,
            exclude_border: false,
            measure_pages: Vec::new(),
        }
    }
}

/// Which source wins for the pixel size.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum CalibrationPreference {
    /// File metadata first (OME-XML, then resolution tags), config as fallback.
    File,
    /// The configured size always.
    Config,
}

#[derive(Debug, Clone)]
pub struct Calibration {
    /// 0 = none configured.
    pub pixel_size_um: f64,
    pub prefer: CalibrationPreference,
}

/// The whole validated configuration.
#[derive(Debug, Clone)]
pub struct Settings {
    pub segment: SegmentSettings,
    pub calibration: Calibration,
    pub limits: DecodeLimits,
    /// `[watch]`: folders, readiness and the worker pool of the watch service.
    pub watch: crate::watch::config::WatchSettings,
    /// `[store]`: the SQLite database.
    pub store: crate::watch::config::StoreSettings,
    /// `[quality]`: frame flag limits, drift charts, run alerts.
    pub quality: crate::qc::config::QualitySettings,
    /// `[alerts]`: where alerts are sent.
    pub alerts: crate::qc::config::AlertSettings,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            segment: SegmentSettings::default(),
            calibration: Calibration {
                pixel_size_um: 0.0,
                prefer: CalibrationPreference::File,
            },
            limits: DecodeLimits::default(),
            watch: crate::watch::config::WatchSettings::default(),
            store: crate::watch::config::StoreSettings::default(),
            quality: crate::qc::config::QualitySettings::default(),
            alerts: crate::qc::config::AlertSettings::default(),
        }
    }
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawConfig {
    #[serde(default)]
    segment: RawSegment,
    #[serde(default)]
    measure: RawMeasure,
    #[serde(default)]
    calibration: RawCalibration,
    #[serde(default)]
    limits: RawLimits,
    #[serde(default)]
    watch: crate::watch::config::RawWatch,
    #[serde(default)]
    store: crate::watch::config::RawStore,
    #[serde(default)]
    quality: crate::qc::config::RawQuality,
    #[serde(default)]
    alerts: crate::qc::config::RawAlerts,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawSegment {
    page: usize,
    method: String,
    fixed_level: u32,
    classes: usize,
    boundary: usize,
    smooth_sigma_px: f64,
    background: String,
    rolling_ball_radius_px: f64,
    flat_frame: Option<PathBuf>,
    dark_frame: Option<PathBuf>,
    fill_holes: bool,
    connectivity: u8,
    min_area_px: u64,
    max_area_px: u64,
    min_area_um2: f64,
    max_area_um2: f64,
    exclude_border: bool,
}

impl Default for RawSegment {
    fn default() -> Self {
        Self {
            page: 0,
            method: "otsu".into(),
            fixed_level: 0,
            classes: 3,
            boundary: 1,
            smooth_sigma_px: 0.0,
            background: "none".into(),
            rolling_ball_radius_px: 50.0,
            flat_frame: None,
            dark_frame: None,
            fill_holes: true,
            connectivity: 8,
            min_area_px: 0,
            max_area_px: 0,
            min_area_um2: 0.0,
            max_area_um2: 0.0,
            exclude_border: false,
        }
    }
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawMeasure {
    pages: Vec<usize>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawCalibration {
    pixel_size_um: f64,
    prefer: CalibrationPreference,
}

impl Default for RawCalibration {
    fn default() -> Self {
        Self {
            pixel_size_um: 0.0,
            prefer: CalibrationPreference::File,
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawLimits {
    max_pixels: u64,
    max_decoded_mib: u64,
    max_pages: usize,
}

impl Default for RawLimits {
    fn default() -> Self {
        let d = DecodeLimits::default();
        Self {
            max_pixels: d.max_pixels,
            max_decoded_mib: d.max_decoded_bytes >> 20,
            max_pages: d.max_pages,
        }
    }
}

/// Reads and validates a configuration file.
///
/// # Errors
/// [`ConfigError`] naming the file, and the line for syntax and key errors.
pub fn load(path: &Path) -> Result<Settings, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    parse(&text, path)
}

/// Parses configuration text; `path` names it in messages and anchors relative
/// paths (flat and dark frames) to its folder.
///
/// # Errors
/// [`ConfigError::Syntax`] for TOML errors and unknown keys (with line, column and
/// a hint), [`ConfigError::Invalid`] for values out of range.
pub fn parse(text: &str, path: &Path) -> Result<Settings, ConfigError> {
    let raw: RawConfig = toml::from_str(text).map_err(|e| syntax_error(text, path, &e))?;
    let invalid = |message: String| ConfigError::Invalid {
        path: path.to_path_buf(),
        message,
    };
    let base = path.parent().unwrap_or(Path::new("."));
    let s = raw.segment;

    let method = match s.method.as_str() {
        "otsu" => Method::Otsu,
        "triangle" => Method::Triangle,
        "li" => Method::Li,
        "multi-otsu" => {
            if !(2..=5).contains(&s.classes) {
                return Err(invalid(format!(
                    "segment.classes = {} (expected 2 to 5)",
                    s.classes
                )));
            }
            if s.boundary == 0 || s.boundary >= s.classes {
                return Err(invalid(format!(
                    "segment.boundary = {} (expected 1 to {} for {} classes)",
                    s.boundary,
                    s.classes - 1,
                    s.classes
                )));
            }
            Method::MultiOtsu {
                classes: s.classes,
                boundary: s.boundary,
            }
        }
        "fixed" => Method::Fixed(u16::try_from(s.fixed_level).map_err(|_| {
            invalid(format!(
                "segment.fixed_level = {} (expected 0 to 65535)",
                s.fixed_level
            ))
        })?),
        other => {
            return Err(invalid(format!(
                "segment.method = \"{other}\" (expected otsu, triangle, li, multi-otsu or fixed)"
            )))
        }
    };
    if !(s.smooth_sigma_px >= 0.0 && s.smooth_sigma_px <= 50.0) {
        return Err(invalid(format!(
            "segment.smooth_sigma_px = {} (expected 0 to 50; 0 = off)",
            s.smooth_sigma_px
        )));
    }
    let background = match s.background.as_str() {
        "none" => Background::None,
        "rolling-ball" => {
            if !(s.rolling_ball_radius_px >= 1.0 && s.rolling_ball_radius_px <= 1000.0) {
                return Err(invalid(format!(
                    "segment.rolling_ball_radius_px = {} (expected 1 to 1000)",
                    s.rolling_ball_radius_px
                )));
            }
            Background::RollingBall {
                radius_px: s.rolling_ball_radius_px,
            }
        }
        "flat-field" => {
            let flat_path = s.flat_frame.as_ref().ok_or_else(|| {
                invalid("segment.background = \"flat-field\" needs segment.flat_frame".into())
            })?;
            let limits = DecodeLimits::default();
            let read = |p: &PathBuf| {
                let p = base.join(p);
                decode::read_page(&p, 0, &limits).map_err(|e| invalid(e.to_string()))
            };
            let flat = read(flat_path)?;
            let dark = s.dark_frame.as_ref().map(read).transpose()?;
            let ff = FlatField::new(&flat, dark.as_ref())
                .map_err(|m| invalid(format!("flat-field: {m}")))?;
            Background::FlatField(Arc::new(ff))
        }
        other => {
            return Err(invalid(format!(
                "segment.background = \"{other}\" (expected none, rolling-ball or flat-field)"
            )))
        }
    };
    if s.connectivity != 4 && s.connectivity != 8 {
        return Err(invalid(format!(
            "segment.connectivity = {} (expected 4 or 8)",
            s.connectivity
        )));
    }
    if s.max_area_px != 0 && s.max_area_px < s.min_area_px {
        return Err(invalid(format!(
            "segment.max_area_px = {} is below min_area_px = {}",
            s.max_area_px, s.min_area_px
        )));
    }
    if s.min_area_um2 < 0.0 || s.max_area_um2 < 0.0 {
        return Err(invalid(
            "segment.min_area_um2 and max_area_um2 must not be negative".into(),
        ));
    }
    if raw.measure.pages.contains(&s.page) {
        return Err(invalid(format!(
            "measure.pages lists page {} which is the segmented page itself",
            s.page
        )));
    }
    if !(raw.calibration.pixel_size_um >= 0.0 && raw.calibration.pixel_size_um.is_finite()) {
        return Err(invalid(
            "calibration.pixel_size_um must be 0 (none) or positive".into(),
        ));
    }
    if raw.calibration.prefer == CalibrationPreference::Config
        && raw.calibration.pixel_size_um == 0.0
    {
        return Err(invalid(
            "calibration.prefer = \"config\" needs calibration.pixel_size_um".into(),
        ));
    }
    let l = raw.limits;
    if l.max_pixels == 0 || l.max_decoded_mib == 0 || l.max_pages == 0 {
        return Err(invalid("limits.* must be positive".into()));
    }
    let (watch, store) =
        crate::watch::config::validate(raw.watch, raw.store, base).map_err(invalid)?;
    let (quality, alerts) =
        crate::qc::config::validate(raw.quality, raw.alerts, base).map_err(invalid)?;
    Ok(Settings {
        segment: SegmentSettings {
            page: s.page,
            method,
            smooth_sigma_px: s.smooth_sigma_px,
            background,
            fill_holes: s.fill_holes,
            connectivity: s.connectivity,
            min_area_px: s.min_area_px,
            max_area_px: s.max_area_px,
            min_area_um2: s.min_area_um2,
            max_area_um2: s.max_area_um2,
            exclude_border: s.exclude_border,
            measure_pages: raw.measure.pages,
        },
        calibration: Calibration {
            pixel_size_um: raw.calibration.pixel_size_um,
            prefer: raw.calibration.prefer,
        },
        limits: DecodeLimits {
            max_pixels: l.max_pixels,
            max_decoded_bytes: l.max_decoded_mib << 20,
            max_pages: l.max_pages,
        },
        watch,
        store,
        quality,
        alerts,
    })
}

fn syntax_error(text: &str, path: &Path, e: &toml::de::Error) -> ConfigError {
    let (line, column) = e.span().map_or((0, 0), |span| {
        let before = &text[..span.start.min(text.len())];
        let line = before.matches('\n').count() + 1;
        let column = before.len() - before.rfind('\n').map_or(0, |i| i + 1) + 1;
        (line, column)
    });
    let message = e.message().to_string();
    let hint = if message.starts_with("unknown field") {
        "\n  hint: every accepted key is listed, with its meaning, in config/framewarden.toml"
            .to_string()
    } else {
        String::new()
    };
    ConfigError::Syntax {
        path: path.to_path_buf(),
        line,
        column,
        message,
        hint,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_from_empty_text() {
        let s = parse("", Path::new("x.toml")).unwrap();
        assert_eq!(s.segment.method, Method::Otsu);
        assert_eq!(s.segment.connectivity, 8);
        assert!(s.segment.fill_holes);
    }

    #[test]
    fn issue_keys_are_accepted() {
        let text = r#"
[segment]
page = 1
method = "fixed"
fixed_level = 300
smooth_sigma_px = 1.5
background = "none"
fill_holes = false
connectivity = 4
min_area_px = 5
max_area_px = 100
exclude_border = true
"#;
        let s = parse(text, Path::new("x.toml")).unwrap();
        assert_eq!(s.segment.method, Method::Fixed(300));
        assert_eq!(s.segment.page, 1);
        assert_eq!(s.segment.connectivity, 4);
        assert!(s.segment.exclude_border && !s.segment.fill_holes);
    }

    #[test]
    fn unknown_key_names_file_line_and_hint() {
        let text = "[segment]\nmethod = \"otsu\"\nthreshhold = 3\n";
        let err = parse(text, Path::new("conf.toml")).unwrap_err().to_string();
        assert!(err.starts_with("conf.toml:3:"), "{err}");
        assert!(err.contains("unknown field `threshhold`"), "{err}");
        assert!(err.contains("hint"), "{err}");
    }

    #[test]
    fn bad_values_are_explained() {
        for (text, needle) in [
            ("[segment]\nmethod = \"median\"", "expected otsu"),
            ("[segment]\nconnectivity = 6", "expected 4 or 8"),
            (
                "[segment]\nmethod = \"multi-otsu\"\nclasses = 3\nboundary = 3",
                "segment.boundary",
            ),
            ("[segment]\nbackground = \"flat-field\"", "flat_frame"),
            (
                "[segment]\nmin_area_px = 10\nmax_area_px = 5",
                "max_area_px",
            ),
        ] {
            let err = parse(text, Path::new("c.toml")).unwrap_err().to_string();
            assert!(err.contains(needle), "{text}: {err}");
        }
    }
}

#[cfg(test)]
mod example_config {
    /// The shipped example documents every key with its default: it must parse,
    /// and parse to the same settings as an empty file.
    #[test]
    fn example_config_parses_to_the_defaults() {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/framewarden.toml");
        let example = super::load(&path).unwrap();
        let empty = super::parse("", &path).unwrap();
        assert_eq!(
            format!("{:?}", example.segment),
            format!("{:?}", empty.segment)
        );
        // The raw defaults and the validated defaults are written twice; keep them equal.
        assert_eq!(
            format!("{:?}", empty.segment),
            format!("{:?}", super::SegmentSettings::default())
        );
        assert_eq!(
            format!("{:?}", example.calibration),
            format!("{:?}", empty.calibration)
        );
        assert_eq!(example.limits, empty.limits);
        assert_eq!(example.quality, empty.quality);
        assert_eq!(example.alerts, empty.alerts);
    }
}
