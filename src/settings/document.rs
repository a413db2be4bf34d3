//! The configuration file's shape: every section and key as written in TOML,
//! read with unknown keys refused and written back with every default filled
//! in (a run's stored settings).
//!
//! Defaults are not written here: each section's default is the section
//! written back from the owning layer's default parameters, so a default is
//! defined once. Checking values is [`crate::settings::validate`]'s.

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

use crate::analysis::{Background, Method, SegmentParams, Split};
use crate::decode::DecodeLimits;
use crate::pipeline::{Calibration, CalibrationPreference};
use crate::qc::params::{AlertSettings, CommandSink, QualitySettings, WebhookSink};
use crate::settings::report::ReportSettings;
use crate::store::StoreSettings;
use crate::watch::{WatchMode, WatchSettings};

/// A flat-field frame's file and, once read, the hash of its content.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FrameFile {
    /// The file, as resolved against the configuration's folder.
    pub path: PathBuf,
    /// `xxh3-128:<hex>` of the file's bytes: checked when set in the
    /// configuration (a run's stored settings), recorded when the file is read.
    pub hash: Option<String>,
}

/// The flat-field correction's frames.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FlatFieldFiles {
    /// The flat (bright, even) frame.
    pub flat: FrameFile,
    /// The dark frame (camera offset), when given.
    pub dark: Option<FrameFile>,
}

/// The whole file.
#[derive(Debug, Default, Deserialize, Serialize)]
#[serde(deny_unknown_fields)]
pub struct Document {
    /// `[segment]`
    #[serde(default)]
    pub segment: SegmentSection,
    /// `[measure]`
    #[serde(default)]
    pub measure: MeasureSection,
    /// `[calibration]`
    #[serde(default)]
    pub calibration: CalibrationSection,
    /// `[limits]`
    #[serde(default)]
    pub limits: LimitsSection,
    /// `[watch]`
    #[serde(default)]
    pub watch: WatchSection,
    /// `[store]`
    #[serde(default)]
    pub store: StoreSection,
    /// `[quality]`
    #[serde(default)]
    pub quality: QualitySection,
    /// `[alerts]`
    #[serde(default)]
    pub alerts: AlertsSection,
    /// `[report]`
    #[serde(default)]
    pub report: ReportSection,
}

/// `[segment]`: thresholding and object filters.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct SegmentSection {
    pub page: usize,
    pub method: String,
    pub fixed_level: u32,
    pub classes: usize,
    pub boundary: usize,
    pub smooth_sigma_px: f64,
    pub background: String,
    pub rolling_ball_radius_px: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flat_frame: Option<PathBuf>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flat_frame_hash: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dark_frame: Option<PathBuf>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub dark_frame_hash: Option<String>,
    pub fill_holes: bool,
    pub connectivity: u8,
    pub split: String,
    pub split_min_depth_px: f64,
    pub split_min_separation_px: f64,
    pub min_area_px: u64,
    pub max_area_px: u64,
    pub min_area_um2: f64,
    pub max_area_um2: f64,
    pub exclude_border: bool,
}

/// The rolling-ball radius written when the background is not rolling-ball.
const DEFAULT_ROLLING_BALL_RADIUS_PX: f64 = 50.0;

impl SegmentSection {
    /// The section that validates to `p` (with `files` for a flat-field).
    pub fn from_params(p: &SegmentParams, files: Option<&FlatFieldFiles>) -> SegmentSection {
        let (fixed_level, classes, boundary) = match p.method {
            Method::Fixed(level) => (u32::from(level), 3, 1),
            Method::MultiOtsu { classes, boundary } => (0, classes, boundary),
            _ => (0, 3, 1),
        };
        let (background, rolling_ball_radius_px) = match &p.background {
            Background::None => ("none", DEFAULT_ROLLING_BALL_RADIUS_PX),
            Background::RollingBall { radius_px } => ("rolling-ball", *radius_px),
            Background::FlatField(_) => ("flat-field", DEFAULT_ROLLING_BALL_RADIUS_PX),
        };
        let (split_min_depth_px, split_min_separation_px) = match p.split {
            Split::None => (
                Split::DEFAULT_MIN_DEPTH_PX,
                Split::DEFAULT_MIN_SEPARATION_PX,
            ),
            Split::Distance {
                min_depth_px,
                min_separation_px,
            } => (min_depth_px, min_separation_px),
        };
        let flat = files.map(|f| &f.flat);
        let dark = files.and_then(|f| f.dark.as_ref());
        SegmentSection {
            page: p.page,
            method: p.method.name().into(),
            fixed_level,
            classes,
            boundary,
            smooth_sigma_px: p.smooth_sigma_px,
            background: background.into(),
            rolling_ball_radius_px,
            flat_frame: flat.map(|f| f.path.clone()),
            flat_frame_hash: flat.and_then(|f| f.hash.clone()),
            dark_frame: dark.map(|f| f.path.clone()),
            dark_frame_hash: dark.and_then(|f| f.hash.clone()),
            fill_holes: p.fill_holes,
            connectivity: p.connectivity.neighbours(),
            split: p.split.name().into(),
            split_min_depth_px,
            split_min_separation_px,
            min_area_px: p.filter.min_area_px,
            max_area_px: p.filter.max_area_px,
            min_area_um2: p.filter.min_area_um2,
            max_area_um2: p.filter.max_area_um2,
            exclude_border: p.filter.exclude_border,
        }
    }
}

impl Default for SegmentSection {
    fn default() -> Self {
        SegmentSection::from_params(&SegmentParams::default(), None)
    }
}

/// `[measure]`: extra pages measured inside the objects.
#[derive(Debug, Default, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
pub struct MeasureSection {
    /// Pages whose intensities are measured inside the objects.
    pub pages: Vec<usize>,
}

/// `[calibration]`: the pixel size.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct CalibrationSection {
    pub pixel_size_um: f64,
    pub prefer: CalibrationPreference,
}

impl From<&Calibration> for CalibrationSection {
    fn from(c: &Calibration) -> Self {
        CalibrationSection {
            pixel_size_um: c.pixel_size_um,
            prefer: c.prefer,
        }
    }
}

impl Default for CalibrationSection {
    fn default() -> Self {
        CalibrationSection::from(&Calibration::default())
    }
}

/// `[limits]`: caps checked before decoding allocates.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct LimitsSection {
    pub max_pixels: u64,
    pub max_decoded_mib: u64,
    pub max_pages: usize,
    pub max_objects: usize,
}

impl LimitsSection {
    /// The section for the decoder's limits and the per-frame object limit.
    pub fn of(l: &DecodeLimits, max_objects: usize) -> Self {
        LimitsSection {
            max_pixels: l.max_pixels,
            max_decoded_mib: l.max_decoded_bytes >> 20,
            max_pages: l.max_pages,
            max_objects,
        }
    }
}

impl Default for LimitsSection {
    fn default() -> Self {
        LimitsSection::of(&DecodeLimits::default(), SegmentParams::DEFAULT_MAX_OBJECTS)
    }
}

/// `[watch]`: folders, readiness and the worker pool.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct WatchSection {
    pub folders: Vec<PathBuf>,
    pub include: Vec<String>,
    pub exclude: Vec<String>,
    pub temporary: Vec<String>,
    pub settle_ms: u64,
    pub mode: String,
    pub poll_interval_ms: u64,
    pub rescan_interval_s: u64,
    pub workers: usize,
    pub queue_capacity: usize,
    pub retry_limit: u32,
    pub retry_backoff_ms: u64,
    pub shutdown_timeout_s: u64,
    pub new_run_after_idle_min: u64,
    pub name_pattern: String,
    pub stacks: bool,
}

impl From<&WatchSettings> for WatchSection {
    fn from(w: &WatchSettings) -> Self {
        WatchSection {
            folders: w.folders.clone(),
            include: w.filter.include().to_vec(),
            exclude: w.filter.exclude().to_vec(),
            temporary: w.filter.temporary().to_vec(),
            settle_ms: millis(w.settle),
            mode: match w.mode {
                WatchMode::Native => "native",
                WatchMode::Poll => "poll",
            }
            .into(),
            poll_interval_ms: millis(w.poll_interval),
            rescan_interval_s: w.rescan_interval.as_secs(),
            workers: w.workers,
            queue_capacity: w.queue_capacity,
            retry_limit: w.retry_limit,
            retry_backoff_ms: millis(w.retry_backoff),
            shutdown_timeout_s: w.shutdown_timeout.as_secs(),
            new_run_after_idle_min: w.new_run_after_idle.as_secs() / 60,
            name_pattern: w.name_pattern.as_str().into(),
            stacks: w.stacks,
        }
    }
}

impl Default for WatchSection {
    fn default() -> Self {
        let mut section = WatchSection::from(&WatchSettings::default());
        // 0 = one per core, decided when the settings are validated.
        section.workers = 0;
        section
    }
}

fn millis(d: std::time::Duration) -> u64 {
    u64::try_from(d.as_millis()).unwrap_or(u64::MAX)
}

/// `[store]`: the database and the label images.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct StoreSection {
    pub database: PathBuf,
    pub batch_max: usize,
    pub label_images: String,
}

impl From<&StoreSettings> for StoreSection {
    fn from(s: &StoreSettings) -> Self {
        StoreSection {
            database: s.database.clone(),
            batch_max: s.batch_max,
            label_images: s.label_images.name().into(),
        }
    }
}

impl Default for StoreSection {
    fn default() -> Self {
        StoreSection::from(&StoreSettings::default())
    }
}

/// `[report]`: the HTML report `watch` keeps up to date.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct ReportSection {
    /// "" for none.
    pub path: PathBuf,
    pub every_min: u64,
}

impl From<&ReportSettings> for ReportSection {
    fn from(r: &ReportSettings) -> Self {
        ReportSection {
            path: r.path.clone().unwrap_or_default(),
            every_min: r.every.as_secs() / 60,
        }
    }
}

impl Default for ReportSection {
    fn default() -> Self {
        ReportSection::from(&ReportSettings::default())
    }
}

/// `[quality]`: frame flag limits, drift charts, run checks, the recount.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct QualitySection {
    pub min_separability: f64,
    pub min_bimodality: f64,
    pub min_foreground_fraction: f64,
    pub max_illumination_change: f64,
    pub max_saturation_fraction: f64,
    pub min_focus_ratio: f64,
    pub min_usual_count: f64,
    pub count_window: usize,
    pub max_count_jump: f64,
    pub max_merged_fraction: f64,
    pub min_objects_for_merged: usize,
    pub max_dim_object_share: f64,
    pub baseline_frames: usize,
    pub ewma_lambda: f64,
    pub ewma_width: f64,
    pub cusum_k: f64,
    pub cusum_h: f64,
    pub outlier_clip: f64,
    pub recover_frames: usize,
    pub charted_metrics: Vec<String>,
    pub on_uneven_illumination: String,
    pub flatten_radius_px: f64,
    pub stall_after_s: u64,
    pub expected_frames: u64,
    pub min_free_space_mib: u64,
    pub failure_window: usize,
    pub max_failure_fraction: f64,
}

impl QualitySection {
    /// The section that validates to `q` and the recount's radius (`None` = off).
    pub fn from_settings(q: &QualitySettings, recount_radius_px: Option<f64>) -> QualitySection {
        let (f, c) = (&q.flags, &q.charts);
        QualitySection {
            min_separability: f.min_separability,
            min_bimodality: f.min_bimodality,
            min_foreground_fraction: f.min_foreground_fraction,
            max_illumination_change: f.max_illumination_change,
            max_saturation_fraction: f.max_saturation_fraction,
            min_focus_ratio: f.min_focus_ratio,
            min_usual_count: f.min_usual_count,
            count_window: f.count_window,
            max_count_jump: f.max_count_jump,
            max_merged_fraction: f.max_merged_fraction,
            min_objects_for_merged: f.min_objects_for_merged,
            max_dim_object_share: f.max_dim_object_share,
            baseline_frames: c.baseline_frames,
            ewma_lambda: c.ewma_lambda,
            ewma_width: c.ewma_width,
            cusum_k: c.cusum_k,
            cusum_h: c.cusum_h,
            outlier_clip: c.outlier_clip,
            recover_frames: c.recover_frames,
            charted_metrics: c.charted.iter().map(|m| m.as_str().into()).collect(),
            on_uneven_illumination: if recount_radius_px.is_some() {
                "flatten"
            } else {
                "keep"
            }
            .into(),
            flatten_radius_px: recount_radius_px.unwrap_or(DEFAULT_ROLLING_BALL_RADIUS_PX),
            stall_after_s: q.stall_after.as_secs(),
            expected_frames: q.expected_frames.unwrap_or(0),
            min_free_space_mib: q.min_free_space_bytes >> 20,
            failure_window: q.failure_window,
            max_failure_fraction: q.max_failure_fraction,
        }
    }
}

impl Default for QualitySection {
    fn default() -> Self {
        QualitySection::from_settings(&QualitySettings::default(), None)
    }
}

/// `[alerts]`: where alerts go.
#[derive(Debug, Deserialize, Serialize)]
#[serde(deny_unknown_fields, default)]
#[allow(missing_docs)] // each key is documented in config/framewarden.toml
pub struct AlertsSection {
    pub group_window_min: u64,
    pub command: Vec<String>,
    pub command_timeout_s: u64,
    pub webhook_url: String,
    pub webhook_timeout_s: u64,
    pub webhook_retries: u32,
    pub webhook_backoff_s: u64,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub webhook_ca_file: Option<PathBuf>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub file: Option<PathBuf>,
}

impl From<&AlertSettings> for AlertsSection {
    fn from(a: &AlertSettings) -> Self {
        let w = a.webhook.as_ref();
        AlertsSection {
            group_window_min: a.group_window.as_secs() / 60,
            command: a
                .command
                .iter()
                .flat_map(|c| std::iter::once(c.program.clone()).chain(c.args.iter().cloned()))
                .collect(),
            command_timeout_s: a
                .command
                .as_ref()
                .map_or(CommandSink::DEFAULT_TIMEOUT, |c| c.timeout)
                .as_secs(),
            webhook_url: w.map(|w| w.url.to_string()).unwrap_or_default(),
            webhook_timeout_s: w
                .map_or(WebhookSink::DEFAULT_TIMEOUT, |w| w.timeout)
                .as_secs(),
            webhook_retries: w.map_or(WebhookSink::DEFAULT_RETRIES, |w| w.retries),
            webhook_backoff_s: w
                .map_or(WebhookSink::DEFAULT_BACKOFF, |w| w.backoff)
                .as_secs(),
            webhook_ca_file: w.and_then(|w| w.ca_file.clone()),
            file: a.file.clone(),
        }
    }
}

impl Default for AlertsSection {
    fn default() -> Self {
        AlertsSection::from(&AlertSettings::default())
    }
}
