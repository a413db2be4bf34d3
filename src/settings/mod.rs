//! The configuration file: TOML in, one validated [`Settings`] value out, and
//! back: a run stores the settings in force as TOML that loads into the same
//! settings.
//!
//! [`parse`] checks text without touching the disk; [`load`] reads the file and
//! then the flat-field frames it names (with the configured `[limits]`).
//! Unknown keys are rejected with the file, line and a hint. Each layer owns
//! its parameter types and their defaults; this module only builds them
//! ([`validate`]) and writes them back ([`document`]).

pub mod document;
pub mod report;
pub mod validate;

pub use report::ReportSettings;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use crate::analysis::correct::FlatField;
use crate::analysis::Background;
use crate::decode::{self, DecodeError};
use crate::pipeline::PipelineParams;
use crate::qc::params::{AlertSettings, QualitySettings};
use crate::qc::sinks::{CaFile, SinkError};
use crate::settings::document::{
    AlertsSection, CalibrationSection, Document, FlatFieldFiles, FrameFile, LimitsSection,
    MeasureSection, QualitySection, ReportSection, SegmentSection, StoreSection, WatchSection,
};
use crate::settings::validate::ValueError;
use crate::store::StoreSettings;
use crate::watch::WatchSettings;

/// Errors from reading or validating a configuration file.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    /// The file could not be read.
    #[error("cannot read config {path}: {source}")]
    Read {
        /// The configuration file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// Not TOML, or a key that is not accepted.
    #[error("{path}:{line}:{column}: {message}{hint}")]
    Syntax {
        /// The configuration file.
        path: PathBuf,
        /// 1-based line of the error.
        line: usize,
        /// 1-based column of the error.
        column: usize,
        /// The parser's message.
        message: String,
        /// What to do, when there is something to say.
        hint: String,
    },
    /// A value out of range or values that do not fit together.
    #[error("{path}: {source}")]
    Invalid {
        /// The configuration file.
        path: PathBuf,
        /// The value and what is expected.
        source: ValueError,
    },
    /// A flat-field frame could not be read.
    #[error("{path}: flat-field frame: {source}")]
    Frame {
        /// The configuration file.
        path: PathBuf,
        /// The decoder's error, naming the frame's file.
        source: DecodeError,
    },
    /// The flat-field frames do not make a correction.
    #[error("{path}: flat-field: {message}")]
    FlatField {
        /// The configuration file.
        path: PathBuf,
        /// Why.
        message: String,
    },
    /// The webhook's CA file cannot be used.
    #[error("{path}: alerts.webhook_ca_file = {source}")]
    CaFile {
        /// The configuration file.
        path: PathBuf,
        /// What is wrong with the CA file (it names the file).
        source: SinkError,
    },
    /// A flat-field frame is not the one the settings were stored with.
    #[error("{path}: {frame} has changed since these settings were stored (content hash {found}, stored {stored}); restore the file or remove the hash to use it as it is now")]
    FrameChanged {
        /// The configuration (or "stored settings of run N").
        path: PathBuf,
        /// The frame's file.
        frame: PathBuf,
        /// The hash now.
        found: String,
        /// The hash stored.
        stored: String,
    },
}

/// The whole validated configuration.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Settings {
    /// `[segment]`, `[measure]`, `[calibration]`, `[limits]` and the recount of
    /// `[quality]`: everything one file's analysis needs.
    pub pipeline: PipelineParams,
    /// `[watch]`: folders, readiness and the worker pool of the watch service.
    pub watch: WatchSettings,
    /// `[store]`: the SQLite database.
    pub store: StoreSettings,
    /// `[quality]`: frame flag limits, drift charts, run alerts.
    pub quality: QualitySettings,
    /// `[alerts]`: where alerts are sent.
    pub alerts: AlertSettings,
    /// `[report]`: the HTML report `watch` keeps up to date.
    pub report: ReportSettings,
    /// The flat-field frames' files and content hashes, when
    /// `segment.background = "flat-field"` (the frames themselves are in
    /// `pipeline.segment.background`).
    pub flat_field: Option<FlatFieldFiles>,
}

/// Validated settings whose files (flat-field frames, the webhook's CA file)
/// are not read yet: [`Parsed::read_files`] reads them.
#[derive(Debug)]
pub struct Parsed {
    settings: Settings,
    path: PathBuf,
}

impl Parsed {
    /// Checks that the webhook's CA file holds usable certificates, reads the
    /// flat-field frames (with the configured `[limits]`), checks their content
    /// hashes where the settings give one, and records the hashes.
    ///
    /// # Errors
    /// [`ConfigError::CaFile`], [`ConfigError::Frame`],
    /// [`ConfigError::FlatField`] or [`ConfigError::FrameChanged`].
    pub fn read_files(self) -> Result<Settings, ConfigError> {
        let Parsed { mut settings, path } = self;
        if let Some(ca) = settings
            .alerts
            .webhook
            .as_ref()
            .and_then(|w| w.ca_file.as_deref())
        {
            CaFile::load(ca).map_err(|source| ConfigError::CaFile {
                path: path.clone(),
                source,
            })?;
        }
        let Some(files) = settings.flat_field.as_mut() else {
            return Ok(settings);
        };
        let limits = &settings.pipeline.limits;
        let mut read = |file: &mut FrameFile| -> Result<crate::frame::Frame, ConfigError> {
            let bytes = std::fs::read(&file.path).map_err(|source| ConfigError::Frame {
                path: path.clone(),
                source: DecodeError::Open {
                    path: file.path.clone(),
                    source,
                },
            })?;
            let found = content_hash(&bytes);
            if let Some(stored) = &file.hash {
                if *stored != found {
                    return Err(ConfigError::FrameChanged {
                        path: path.clone(),
                        frame: file.path.clone(),
                        found,
                        stored: stored.clone(),
                    });
                }
            }
            file.hash = Some(found);
            decode::read_page(&file.path, 0, limits).map_err(|source| ConfigError::Frame {
                path: path.clone(),
                source,
            })
        };
        let flat = read(&mut files.flat)?;
        let dark = files.dark.as_mut().map(&mut read).transpose()?;
        let ff =
            FlatField::new(&flat, dark.as_ref()).map_err(|message| ConfigError::FlatField {
                path: path.clone(),
                message,
            })?;
        settings.pipeline.segment.background = Background::FlatField(Arc::new(ff));
        Ok(settings)
    }
}

/// The content hash of a flat-field frame's file: `xxh3-128:` and 32 hex digits.
pub fn content_hash(bytes: &[u8]) -> String {
    format!("xxh3-128:{:032x}", xxhash_rust::xxh3::xxh3_128(bytes))
}

impl Settings {
    /// The settings as a configuration file, every key written (defaults
    /// filled in), flat-field frames by path and content hash: what a run
    /// stores, and what [`Settings::from_toml`] loads back into equal settings.
    pub fn to_toml(&self) -> String {
        let p = &self.pipeline;
        let document = Document {
            segment: SegmentSection::from_params(&p.segment, self.flat_field.as_ref()),
            measure: MeasureSection {
                pages: p.segment.measure_pages.clone(),
            },
            calibration: CalibrationSection::from(&p.calibration),
            limits: LimitsSection::of(&p.limits, p.segment.max_objects),
            watch: WatchSection::from(&self.watch),
            store: StoreSection::from(&self.store),
            quality: QualitySection::from_settings(&self.quality, p.recount.map(|r| r.radius_px)),
            alerts: AlertsSection::from(&self.alerts),
            report: ReportSection::from(&self.report),
        };
        // Plain data with finite numbers: serialising cannot fail.
        toml::to_string(&document)
            .unwrap_or_else(|e| format!("# the settings could not be written: {e}\n"))
    }

    /// Loads settings written by [`Settings::to_toml`] (a run's stored
    /// settings); `name` says where they come from in messages. Paths in such
    /// text are complete, so nothing is anchored anywhere.
    ///
    /// # Errors
    /// [`ConfigError`] as for [`load`].
    pub fn from_toml(text: &str, name: &str) -> Result<Settings, ConfigError> {
        parse_anchored(text, Path::new(name), Path::new(""))?.read_files()
    }
}

/// Reads and validates a configuration file, then reads the files it names
/// (flat-field frames, the webhook's CA file). Relative paths in it are anchored at its folder.
///
/// # Errors
/// [`ConfigError`] naming the file, and the line for syntax and key errors.
pub fn load(path: &Path) -> Result<Settings, ConfigError> {
    let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    from_text(&text, path)
}

/// [`parse`], then [`Parsed::read_files`]: settings from text, with the
/// files it names read.
///
/// # Errors
/// [`ConfigError`] as for [`load`].
pub fn from_text(text: &str, path: &Path) -> Result<Settings, ConfigError> {
    parse(text, path)?.read_files()
}

/// Parses and validates configuration text without reading anything else;
/// `path` names it in messages and anchors relative paths to its folder
/// (made absolute against the current folder).
///
/// # Errors
/// [`ConfigError::Syntax`] for TOML errors and unknown keys (with line, column
/// and a hint), [`ConfigError::Invalid`] for values out of range.
pub fn parse(text: &str, path: &Path) -> Result<Parsed, ConfigError> {
    let folder = path.parent().unwrap_or(Path::new(""));
    let base = std::path::absolute(folder).unwrap_or_else(|_| folder.to_path_buf());
    parse_anchored(text, path, &base)
}

fn parse_anchored(text: &str, path: &Path, base: &Path) -> Result<Parsed, ConfigError> {
    let document: Document = toml::from_str(text).map_err(|e| syntax_error(text, path, &e))?;
    let invalid = |source| ConfigError::Invalid {
        path: path.to_path_buf(),
        source,
    };
    let (limits, max_objects) = validate::limits(document.limits).map_err(invalid)?;
    let (segment, flat_field) =
        validate::segment(document.segment, document.measure.pages, max_objects, base)
            .map_err(invalid)?;
    let (quality, recount) = validate::quality(document.quality).map_err(invalid)?;
    let settings = Settings {
        pipeline: PipelineParams {
            segment,
            calibration: validate::calibration(document.calibration).map_err(invalid)?,
            limits,
            recount,
        },
        watch: validate::watch(document.watch, base).map_err(invalid)?,
        store: validate::store(document.store, base).map_err(invalid)?,
        quality,
        alerts: validate::alerts(document.alerts, base).map_err(invalid)?,
        report: validate::report(document.report, base).map_err(invalid)?,
        flat_field,
    };
    Ok(Parsed {
        settings,
        path: path.to_path_buf(),
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
    use crate::analysis::{Connectivity, Method};

    #[test]
    fn defaults_from_empty_text() {
        let s = from_text("", Path::new("x.toml")).unwrap();
        assert_eq!(s.pipeline.segment.method, Method::Otsu);
        assert_eq!(s.pipeline.segment.connectivity, Connectivity::Eight);
        assert!(s.pipeline.segment.fill_holes);
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
        let s = from_text(text, Path::new("x.toml"))
            .unwrap()
            .pipeline
            .segment;
        assert_eq!(s.method, Method::Fixed(300));
        assert_eq!(s.page, 1);
        assert_eq!(s.connectivity, Connectivity::Four);
        assert!(s.filter.exclude_border && !s.fill_holes);
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
                "[segment]\nsplit = \"watershed\"",
                "expected none or distance",
            ),
            (
                "[segment]\nsplit = \"distance\"\nsplit_min_depth_px = 0.0",
                "segment.split_min_depth_px = 0",
            ),
            (
                "[segment]\nsplit = \"distance\"\nsplit_min_separation_px = -1.0",
                "segment.split_min_separation_px = -1",
            ),
            (
                "[segment]\nmethod = \"multi-otsu\"\nclasses = 3\nboundary = 3",
                "segment.boundary",
            ),
            ("[segment]\nbackground = \"flat-field\"", "flat_frame"),
            (
                "[segment]\nmin_area_px = 10\nmax_area_px = 5",
                "max_area_px",
            ),
            (
                "[quality]\ncharted_metrics = [\"brightness\"]",
                "quality.charted_metrics: \"brightness\"",
            ),
            (
                "[quality]\nmin_separability = 1.5",
                "quality.min_separability = 1.5 (expected 0 to 1)",
            ),
            ("[quality]\newma_lambda = 0.0", "quality.ewma_lambda"),
            (
                "[quality]\non_uneven_illumination = \"smooth\"",
                "on_uneven_illumination",
            ),
            (
                "[alerts]\nwebhook_url = \"ftp://example.org/x\"",
                "alerts.webhook_url",
            ),
            ("[alerts]\ncommand = [\"\"]", "alerts.command"),
            ("[watch]\nmode = \"inotify\"", "watch.mode"),
            ("[watch]\ninclude = [\"[\"]", "watch.include"),
            ("[watch]\nname_pattern = \"(\"", "watch.name_pattern"),
            ("[watch]\nqueue_capacity = 0", "watch.queue_capacity"),
            (
                "[store]\nlabel_images = \"some\"",
                "store.label_images = \"some\" (expected none, flagged or all)",
            ),
            ("[limits]\nmax_pages = 0", "limits.max_pages"),
            // Values that once overflowed an allocation, a clock or a shift in
            // a thread of the running service (each refused at load now).
            ("[watch]\nworkers = 100000", "watch.workers"),
            (
                "[watch]\nqueue_capacity = 4611686018427387904",
                "watch.queue_capacity",
            ),
            (
                "[watch]\nrescan_interval_s = 9223372036854775807",
                "watch.rescan_interval_s",
            ),
            (
                "[watch]\npoll_interval_ms = 9223372036854775807",
                "watch.poll_interval_ms",
            ),
            (
                "[watch]\nnew_run_after_idle_min = 9223372036854775807",
                "watch.new_run_after_idle_min",
            ),
            (
                "[alerts]\ncommand = [\"true\"]\ncommand_timeout_s = 9223372036854775807",
                "alerts.command_timeout_s",
            ),
            (
                "[alerts]\ncommand = [\"true\"]\ncommand_timeout_s = 0",
                "alerts.command_timeout_s",
            ),
            (
                "[limits]\nmax_decoded_mib = 17592186044416",
                "limits.max_decoded_mib",
            ),
            (
                "[quality]\nmin_free_space_mib = 9223372036854775807",
                "quality.min_free_space_mib",
            ),
            (
                "[quality]\nbaseline_frames = 1000000000",
                "quality.baseline_frames",
            ),
        ] {
            let err = parse(text, Path::new("c.toml")).unwrap_err().to_string();
            assert!(err.contains(needle), "{text}: {err}");
        }
    }

    #[test]
    fn parsing_reads_no_frame_and_loading_names_the_missing_one() {
        let text = "[segment]\nbackground = \"flat-field\"\nflat_frame = \"no-such-flat.tif\"\n";
        // Pure: the missing file is not noticed until the frames are read.
        let parsed = parse(text, Path::new("/nowhere/c.toml")).unwrap();
        let err = parsed.read_files().unwrap_err().to_string();
        assert!(err.contains("/nowhere/no-such-flat.tif"), "{err}");
    }

    /// Every key differs from its default, so a key the snapshot forgot to
    /// write (or wrote wrong) loads back as a different value.
    const EVERYTHING_SET: &str = r#"
[segment]
page = 1
method = "multi-otsu"
classes = 4
boundary = 2
smooth_sigma_px = 1.5
background = "rolling-ball"
rolling_ball_radius_px = 35.0
fill_holes = false
connectivity = 4
split = "distance"
split_min_depth_px = 3.5
split_min_separation_px = 6.5
min_area_px = 12
max_area_px = 5000
min_area_um2 = 3.5
max_area_um2 = 900.0
exclude_border = true
[measure]
pages = [0, 2]
[calibration]
pixel_size_um = 0.325
prefer = "config"
[limits]
max_pixels = 50000000
max_decoded_mib = 512
max_pages = 99
[watch]
folders = ["night/plate-7", "/data/elsewhere"]
include = ["*.tif"]
exclude = ["*/thumbs/*"]
temporary = ["*.writing"]
settle_ms = 750
mode = "poll"
poll_interval_ms = 2500
rescan_interval_s = 60
workers = 3
queue_capacity = 16
retry_limit = 4
retry_backoff_ms = 250
shutdown_timeout_s = 20
new_run_after_idle_min = 45
name_pattern = '^(?P<well>[A-P]\d{2})_t(?P<time_point>\d+)_(?P<channel>[^.]+)\.tif$'
stacks = true
[store]
database = "results/night.db"
batch_max = 100
label_images = "all"
[quality]
min_separability = 0.55
min_bimodality = 0.5
min_foreground_fraction = 0.01
max_illumination_change = 0.3
max_saturation_fraction = 0.002
min_focus_ratio = 0.4
min_usual_count = 8.0
count_window = 7
max_count_jump = 0.6
max_merged_fraction = 0.2
min_objects_for_merged = 25
max_dim_object_share = 0.3
baseline_frames = 12
ewma_lambda = 0.3
ewma_width = 2.8
cusum_k = 0.6
cusum_h = 4.5
outlier_clip = 3.5
recover_frames = 4
charted_metrics = ["background_level", "focus"]
on_uneven_illumination = "flatten"
flatten_radius_px = 40.0
stall_after_s = 600
expected_frames = 960
min_free_space_mib = 4096
failure_window = 40
max_failure_fraction = 0.25
[alerts]
group_window_min = 45
command = ["/usr/local/bin/page-the-lab", "--urgent"]
command_timeout_s = 12
webhook_url = "https://alerts.example.org/hook"
webhook_timeout_s = 7
webhook_retries = 5
webhook_backoff_s = 3
webhook_ca_file = "lab-ca.pem"
file = "alerts.jsonl"
[report]
path = "results/night.html"
every_min = 5
"#;

    #[test]
    fn the_stored_settings_load_back_equal() {
        let dir = tempfile::tempdir().unwrap();
        let ca = rcgen::generate_simple_self_signed(vec!["localhost".into()]).unwrap();
        std::fs::write(dir.path().join("lab-ca.pem"), ca.cert.pem()).unwrap();
        let path = &dir.path().join("night.toml");
        for text in ["", EVERYTHING_SET] {
            let settings = from_text(text, path).unwrap();
            let stored = settings.to_toml();
            let back = Settings::from_toml(&stored, "stored settings").unwrap();
            assert_eq!(back, settings, "{stored}");
            // Written twice, the same text: nothing depends on where it was read.
            assert_eq!(back.to_toml(), stored);
        }
        let everything = from_text(EVERYTHING_SET, path).unwrap();
        assert_ne!(everything, from_text("", path).unwrap());
        assert_eq!(
            everything.store.database,
            dir.path().join("results/night.db")
        );
    }

    #[test]
    fn a_flat_field_is_stored_by_path_and_hash_and_a_changed_frame_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        // A 1024 x 1024 16-bit flat frame (2 MiB of pixels) and a dark frame.
        let flat = crate::frame::Frame {
            width: 1024,
            height: 1024,
            bit_depth: 16,
            pixels: (0..1024 * 1024).map(|i| 3000 + (i % 1024) as u16).collect(),
        };
        let dark = crate::frame::Frame {
            pixels: vec![100; 1024 * 1024],
            ..flat.clone()
        };
        crate::synth::write_tiff(&dir.path().join("flat.tif"), &flat).unwrap();
        crate::synth::write_tiff(&dir.path().join("dark.tif"), &dark).unwrap();
        let text = "[segment]\nbackground = \"flat-field\"\nflat_frame = \"flat.tif\"\ndark_frame = \"dark.tif\"\n";
        let settings = from_text(text, &dir.path().join("c.toml")).unwrap();
        assert!(matches!(
            settings.pipeline.segment.background,
            Background::FlatField(_)
        ));
        let stored = settings.to_toml();
        assert!(stored.len() < 20_000, "{} bytes", stored.len());
        assert!(stored.contains("flat_frame_hash = \"xxh3-128:"), "{stored}");
        assert!(stored.contains("dark.tif"), "{stored}");
        let back = Settings::from_toml(&stored, "stored settings").unwrap();
        assert_eq!(back, settings);
        // The flat frame changes after the run: its stored settings say so.
        let brighter = crate::frame::Frame {
            pixels: flat.pixels.iter().map(|p| p + 1).collect(),
            ..flat
        };
        crate::synth::write_tiff(&dir.path().join("flat.tif"), &brighter).unwrap();
        let err = Settings::from_toml(&stored, "stored settings")
            .unwrap_err()
            .to_string();
        assert!(err.contains("flat.tif has changed"), "{err}");
    }
}

#[cfg(test)]
mod example_config {
    use super::*;

    /// The shipped example documents every key with its default: it must
    /// parse, and parse to the same settings as an empty file.
    #[test]
    fn example_config_parses_to_the_defaults() {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("config/framewarden.toml");
        let example = load(&path).unwrap();
        let empty = from_text("", &path).unwrap();
        assert_eq!(example, empty);
        // And an empty file gives each layer's own defaults.
        let defaults = Settings {
            watch: WatchSettings {
                folders: Vec::new(),
                ..WatchSettings::default()
            },
            store: StoreSettings {
                database: path.parent().unwrap().join("framewarden.db"),
                ..StoreSettings::default()
            },
            ..Settings::default()
        };
        assert_eq!(empty, defaults);
    }
}
