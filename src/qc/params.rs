//! Quality control's own parameter types: flag limits, chart parameters, run
//! checks, and where alerts go.
//!
//! The defaults live here, once; the configuration module builds these values
//! from the file (and writes them back for a run's stored settings), and the
//! reasons behind each default are written beside its key in
//! `config/framewarden.toml`.

use std::path::PathBuf;
use std::time::Duration;

use crate::qc::metrics::Metric;

/// Limits of the per-frame flags. A flag is raised only strictly beyond its limit.
#[derive(Debug, Clone, PartialEq)]
pub struct FlagLimits {
    /// Otsu's separability η below this (0..1): the histogram is not bimodal enough
    /// for a global threshold.
    pub min_separability: f64,
    /// Sarle's bimodality coefficient below this: the histogram looks unimodal.
    pub min_bimodality: f64,
    /// Objects covering less than this fraction (0..1) of the frame are flagged when
    /// the threshold is Otsu-based and at least one object was found.
    pub min_foreground_fraction: f64,
    /// Illumination change ((max − min) / mean of the fitted background) above this
    /// is uneven; it also triggers the recount when that is on.
    pub max_illumination_change: f64,
    /// Share (0..1) of saturated pixels above which a frame is flagged.
    pub max_saturation_fraction: f64,
    /// Focus below this share of the position's baseline focus is flagged.
    pub min_focus_ratio: f64,
    /// Empty-frame and count-jump flags apply only where the usual count is at
    /// least this (relative changes of tiny counts mean nothing).
    pub min_usual_count: f64,
    /// Recent frames of the same position whose median count is compared.
    pub count_window: usize,
    /// Largest relative change of the count against that median.
    pub max_count_jump: f64,
}

/// Parameters of the drift charts (see [`crate::qc::drift`]).
#[derive(Debug, Clone, PartialEq)]
pub struct ChartParams {
    /// Frames per position that make its baseline.
    pub baseline_frames: usize,
    /// EWMA weight of the newest frame (Roberts 1959).
    pub ewma_lambda: f64,
    /// EWMA control-limit width in standard deviations of the statistic.
    pub ewma_width: f64,
    /// CUSUM reference value (allowance) k, in baseline sigmas (Page 1954):
    /// subtracted from each standardised value before it adds to a sum.
    pub cusum_k: f64,
    /// CUSUM decision interval h, in baseline sigmas: a drift is declared when
    /// either sum exceeds it.
    pub cusum_h: f64,
    /// Standardised values are clipped to ±this before charting, so one wild
    /// frame cannot declare a drift on its own.
    pub outlier_clip: f64,
    /// Consecutive in-control frames that end a drift.
    pub recover_frames: usize,
    /// Metrics whose drift raises alerts (all by default; a proliferating
    /// culture, for example, drops `object_count`).
    pub charted: Vec<Metric>,
}

/// Validated `[quality]` settings.
#[derive(Debug, Clone, PartialEq)]
pub struct QualitySettings {
    /// Limits of the per-frame flags.
    pub flags: FlagLimits,
    /// Baselines and drift charts.
    pub charts: ChartParams,
    /// No new frame for this long while the run is active opens a stall alert.
    pub stall_after: Duration,
    /// Frames the acquisition writes, when known: once the run has recorded
    /// this many it is complete (a notice says so) and no longer stalls.
    pub expected_frames: Option<u64>,
    /// Free space below this on the watched or database volume opens an alert.
    pub min_free_space_bytes: u64,
    /// Recent outcomes whose failure share is watched.
    pub failure_window: usize,
    /// Share (0..1) of failed frames among those recent outcomes above which a
    /// failure-rate alert opens (judged once 10 outcomes, or the whole window if
    /// smaller, are known).
    pub max_failure_fraction: f64,
}

/// Validated `[alerts]` settings: every sink is optional.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct AlertSettings {
    /// Program and arguments, run directly (never through a shell).
    pub command: Option<CommandSink>,
    /// HTTP(S) POST of each alert's JSON to a URL.
    pub webhook: Option<WebhookSink>,
    /// Append-only JSON-lines file.
    pub file: Option<PathBuf>,
}

/// A program run for each alert, with the alert's JSON on its stdin and its
/// fields in `FRAMEWARDEN_ALERT_*` environment variables.
#[derive(Debug, Clone, PartialEq)]
pub struct CommandSink {
    /// Program to run: a path, or a name looked up in `PATH`.
    pub program: String,
    /// Fixed arguments, passed as they are.
    pub args: Vec<String>,
    /// Time the program may run before it is killed and the delivery counts as
    /// failed.
    pub timeout: Duration,
}

/// An HTTP(S) endpoint that receives each alert's JSON by POST.
#[derive(Debug, Clone, PartialEq)]
pub struct WebhookSink {
    /// `http://host[:port]/path` or `https://...`.
    pub url: String,
    /// Extra trusted CA certificates (PEM) for an https webhook, e.g. an
    /// in-house server's own CA; the bundled public roots are always trusted.
    pub ca_file: Option<PathBuf>,
    /// Time allowed, per attempt, to connect and for each read and write.
    pub timeout: Duration,
    /// Further attempts after a failed first one.
    pub retries: u32,
    /// Delay before the first retry; doubles with each further one.
    pub backoff: Duration,
}

impl Default for QualitySettings {
    fn default() -> Self {
        QualitySettings {
            flags: FlagLimits {
                min_separability: 0.6,
                min_bimodality: 5.0 / 9.0,
                min_foreground_fraction: 0.005,
                max_illumination_change: 0.25,
                max_saturation_fraction: 0.001,
                min_focus_ratio: 0.5,
                min_usual_count: 5.0,
                count_window: 5,
                max_count_jump: 0.5,
            },
            charts: ChartParams {
                baseline_frames: 20,
                ewma_lambda: 0.2,
                ewma_width: 3.0,
                cusum_k: 0.5,
                cusum_h: 5.0,
                outlier_clip: 4.0,
                recover_frames: 5,
                charted: Metric::ALL.to_vec(),
            },
            stall_after: Duration::from_secs(900),
            expected_frames: None,
            min_free_space_bytes: 2048 << 20,
            failure_window: 50,
            max_failure_fraction: 0.2,
        }
    }
}

impl Default for CommandSink {
    fn default() -> Self {
        CommandSink {
            program: String::new(),
            args: Vec::new(),
            timeout: Duration::from_secs(30),
        }
    }
}

impl Default for WebhookSink {
    fn default() -> Self {
        WebhookSink {
            url: String::new(),
            ca_file: None,
            timeout: Duration::from_secs(10),
            retries: 3,
            backoff: Duration::from_secs(2),
        }
    }
}
