//! The `[quality]` and `[alerts]` sections of the configuration: raw TOML shapes
//! and their validated forms.
//!
//! [`crate::settings`] owns the file as a whole and calls [`validate`]; the
//! reasons behind each default are written beside the key in
//! `config/framewarden.toml`.

use std::path::{Path, PathBuf};
use std::time::Duration;

use serde::Deserialize;

use crate::qc::drift::Metric;
use crate::qc::sinks::{CaFile, WebhookUrl};

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawQuality {
    min_separability: f64,
    min_bimodality: f64,
    min_foreground_fraction: f64,
    max_illumination_change: f64,
    max_saturation_fraction: f64,
    min_focus_ratio: f64,
    min_usual_count: f64,
    count_window: usize,
    max_count_jump: f64,
    baseline_frames: usize,
    ewma_lambda: f64,
    ewma_width: f64,
    cusum_k: f64,
    cusum_h: f64,
    outlier_clip: f64,
    recover_frames: usize,
    charted_metrics: Vec<String>,
    on_uneven_illumination: String,
    flatten_radius_px: f64,
    stall_after_s: u64,
    expected_frames: u64,
    min_free_space_mib: u64,
    failure_window: usize,
    max_failure_fraction: f64,
}

impl Default for RawQuality {
    fn default() -> Self {
        Self {
            min_separability: 0.6,
            min_bimodality: 5.0 / 9.0,
            min_foreground_fraction: 0.005,
            max_illumination_change: 0.25,
            max_saturation_fraction: 0.001,
            min_focus_ratio: 0.5,
            min_usual_count: 5.0,
            count_window: 5,
            max_count_jump: 0.5,
            baseline_frames: 20,
            ewma_lambda: 0.2,
            ewma_width: 3.0,
            cusum_k: 0.5,
            cusum_h: 5.0,
            outlier_clip: 4.0,
            recover_frames: 5,
            charted_metrics: Metric::ALL.iter().map(|m| m.as_str().to_string()).collect(),
            on_uneven_illumination: "keep".into(),
            flatten_radius_px: 50.0,
            stall_after_s: 900,
            expected_frames: 0,
            min_free_space_mib: 2048,
            failure_window: 50,
            max_failure_fraction: 0.2,
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawAlerts {
    command: Vec<String>,
    command_timeout_s: u64,
    webhook_url: String,
    webhook_timeout_s: u64,
    webhook_retries: u32,
    webhook_backoff_s: u64,
    webhook_ca_file: Option<PathBuf>,
    file: Option<PathBuf>,
}

impl Default for RawAlerts {
    fn default() -> Self {
        Self {
            command: Vec::new(),
            command_timeout_s: 30,
            webhook_url: String::new(),
            webhook_timeout_s: 10,
            webhook_retries: 3,
            webhook_backoff_s: 2,
            webhook_ca_file: None,
            file: None,
        }
    }
}

/// Limits of the per-frame flags. A flag is raised only strictly beyond its limit.
#[derive(Debug, Clone, PartialEq)]
pub struct FlagLimits {
    pub min_separability: f64,
    /// Sarle's bimodality coefficient below this: the histogram looks unimodal.
    pub min_bimodality: f64,
    pub min_foreground_fraction: f64,
    pub max_illumination_change: f64,
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
    /// CUSUM reference value and decision interval, in baseline sigmas (Page 1954).
    pub cusum_k: f64,
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

/// What to do with a frame flagged for uneven illumination.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum UnevenRemedy {
    /// Keep the single result.
    Keep,
    /// Also segment it after subtracting a rolling-ball background of this radius.
    Flatten { radius_px: f64 },
}

/// Validated `[quality]` settings.
#[derive(Debug, Clone, PartialEq)]
pub struct QualitySettings {
    pub flags: FlagLimits,
    pub charts: ChartParams,
    pub on_uneven_illumination: UnevenRemedy,
    /// No new frame for this long while the run is active opens a stall alert.
    pub stall_after: Duration,
    /// Frames the acquisition writes, when known: once the run has recorded
    /// this many it is complete (a notice says so) and no longer stalls.
    pub expected_frames: Option<u64>,
    /// Free space below this on the watched or database volume opens an alert.
    pub min_free_space_bytes: u64,
    /// Recent outcomes whose failure share is watched.
    pub failure_window: usize,
    pub max_failure_fraction: f64,
}

/// Validated `[alerts]` settings: every sink is optional.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct AlertSettings {
    /// Program and arguments, run directly (never through a shell).
    pub command: Option<CommandSink>,
    pub webhook: Option<WebhookSink>,
    /// Append-only JSON-lines file.
    pub file: Option<PathBuf>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct CommandSink {
    pub program: String,
    pub args: Vec<String>,
    pub timeout: Duration,
}

#[derive(Debug, Clone, PartialEq)]
pub struct WebhookSink {
    /// `http://host[:port]/path` or `https://...`.
    pub url: WebhookUrl,
    /// Extra trusted CA certificates (PEM) for an https webhook, e.g. an
    /// in-house server's own CA; the bundled public roots are always trusted.
    pub ca_file: Option<CaFile>,
    pub timeout: Duration,
    /// Further attempts after a failed first one.
    pub retries: u32,
    /// Delay before the first retry; doubles with each further one.
    pub backoff: Duration,
}

impl Default for QualitySettings {
    fn default() -> Self {
        // The defaults are valid by construction (tested below).
        validate(RawQuality::default(), RawAlerts::default(), Path::new("."))
            .map(|(q, _)| q)
            .unwrap_or_else(|e| unreachable!("default [quality] settings are invalid: {e}"))
    }
}

/// Checks the raw sections; a relative alert file is anchored at `base`.
///
/// # Errors
/// A message naming the key and what is expected.
pub fn validate(
    q: RawQuality,
    a: RawAlerts,
    base: &Path,
) -> Result<(QualitySettings, AlertSettings), String> {
    let fraction = |key: &str, v: f64| {
        if (0.0..=1.0).contains(&v) {
            Ok(v)
        } else {
            Err(format!("quality.{key} = {v} (expected 0 to 1)"))
        }
    };
    let positive = |key: &str, v: f64| {
        if v > 0.0 && v.is_finite() {
            Ok(v)
        } else {
            Err(format!("quality.{key} = {v} (expected a positive number)"))
        }
    };
    fraction("min_separability", q.min_separability)?;
    fraction("min_bimodality", q.min_bimodality)?;
    fraction("min_foreground_fraction", q.min_foreground_fraction)?;
    fraction("max_saturation_fraction", q.max_saturation_fraction)?;
    fraction("min_focus_ratio", q.min_focus_ratio)?;
    fraction("max_failure_fraction", q.max_failure_fraction)?;
    positive("max_illumination_change", q.max_illumination_change)?;
    positive("max_count_jump", q.max_count_jump)?;
    positive("ewma_width", q.ewma_width)?;
    positive("cusum_h", q.cusum_h)?;
    positive("outlier_clip", q.outlier_clip)?;
    if !(q.min_usual_count >= 0.0 && q.min_usual_count.is_finite()) {
        return Err(format!(
            "quality.min_usual_count = {} (expected 0 or more)",
            q.min_usual_count
        ));
    }
    if !(q.ewma_lambda > 0.0 && q.ewma_lambda <= 1.0) {
        return Err(format!(
            "quality.ewma_lambda = {} (expected above 0, at most 1)",
            q.ewma_lambda
        ));
    }
    if !(q.cusum_k >= 0.0 && q.cusum_k.is_finite()) {
        return Err(format!(
            "quality.cusum_k = {} (expected 0 or more)",
            q.cusum_k
        ));
    }
    for (key, v) in [
        ("count_window", q.count_window),
        ("baseline_frames", q.baseline_frames),
        ("recover_frames", q.recover_frames),
        ("failure_window", q.failure_window),
    ] {
        if v == 0 {
            return Err(format!("quality.{key} must be positive"));
        }
    }
    if q.baseline_frames < 2 {
        return Err(
            "quality.baseline_frames must be at least 2 (a spread needs two frames)".into(),
        );
    }
    if q.stall_after_s == 0 {
        return Err("quality.stall_after_s must be positive".into());
    }
    let on_uneven_illumination = match q.on_uneven_illumination.as_str() {
        "keep" => UnevenRemedy::Keep,
        "flatten" => {
            if !(q.flatten_radius_px >= 1.0 && q.flatten_radius_px <= 1000.0) {
                return Err(format!(
                    "quality.flatten_radius_px = {} (expected 1 to 1000)",
                    q.flatten_radius_px
                ));
            }
            UnevenRemedy::Flatten {
                radius_px: q.flatten_radius_px,
            }
        }
        other => {
            return Err(format!(
                "quality.on_uneven_illumination = \"{other}\" (expected keep or flatten)"
            ))
        }
    };
    let charted = q
        .charted_metrics
        .iter()
        .map(|name| {
            Metric::ALL.into_iter().find(|m| m.as_str() == name).ok_or_else(|| {
                let known: Vec<&str> = Metric::ALL.iter().map(|m| m.as_str()).collect();
                format!(
                    "quality.charted_metrics: \"{name}\" is not a charted metric (expected any of {})",
                    known.join(", ")
                )
            })
        })
        .collect::<Result<Vec<Metric>, String>>()?;
    let quality = QualitySettings {
        flags: FlagLimits {
            min_separability: q.min_separability,
            min_bimodality: q.min_bimodality,
            min_foreground_fraction: q.min_foreground_fraction,
            max_illumination_change: q.max_illumination_change,
            max_saturation_fraction: q.max_saturation_fraction,
            min_focus_ratio: q.min_focus_ratio,
            min_usual_count: q.min_usual_count,
            count_window: q.count_window,
            max_count_jump: q.max_count_jump,
        },
        charts: ChartParams {
            baseline_frames: q.baseline_frames,
            ewma_lambda: q.ewma_lambda,
            ewma_width: q.ewma_width,
            cusum_k: q.cusum_k,
            cusum_h: q.cusum_h,
            outlier_clip: q.outlier_clip,
            recover_frames: q.recover_frames,
            charted,
        },
        on_uneven_illumination,
        stall_after: Duration::from_secs(q.stall_after_s),
        expected_frames: (q.expected_frames > 0).then_some(q.expected_frames),
        min_free_space_bytes: q.min_free_space_mib << 20,
        failure_window: q.failure_window,
        max_failure_fraction: q.max_failure_fraction,
    };
    let command = match a.command.split_first() {
        None => None,
        Some((program, _)) if program.is_empty() => {
            return Err("alerts.command: the first element (the program) is empty".into())
        }
        Some((program, args)) => Some(CommandSink {
            program: program.clone(),
            args: args.to_vec(),
            timeout: Duration::from_secs(a.command_timeout_s.max(1)),
        }),
    };
    let webhook = if a.webhook_url.is_empty() {
        None
    } else {
        let url: WebhookUrl = a
            .webhook_url
            .parse()
            .map_err(|e| format!("alerts.webhook_url = {e}"))?;
        if a.webhook_timeout_s == 0 || a.webhook_retries > 10 {
            return Err(
                "alerts.webhook_timeout_s must be positive and webhook_retries at most 10".into(),
            );
        }
        let ca_file = a
            .webhook_ca_file
            .map(|f| CaFile::load(&base.join(f)))
            .transpose()
            .map_err(|e| format!("alerts.webhook_ca_file = {e}"))?;
        Some(WebhookSink {
            url,
            timeout: Duration::from_secs(a.webhook_timeout_s),
            retries: a.webhook_retries,
            backoff: Duration::from_secs(a.webhook_backoff_s),
            ca_file,
        })
    };
    let alerts = AlertSettings {
        command,
        webhook,
        file: a.file.map(|f| base.join(f)),
    };
    Ok((quality, alerts))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid_and_send_nowhere() {
        let (q, a) = validate(RawQuality::default(), RawAlerts::default(), Path::new(".")).unwrap();
        assert_eq!(q, QualitySettings::default());
        assert_eq!(q.on_uneven_illumination, UnevenRemedy::Keep);
        assert_eq!(a, AlertSettings::default());
    }

    #[test]
    fn sinks_are_parsed() {
        let raw = RawAlerts {
            command: vec!["/usr/bin/notify-lab".into(), "--night".into()],
            webhook_url: "http://127.0.0.1:9/hook".into(),
            file: Some("alerts.jsonl".into()),
            ..RawAlerts::default()
        };
        let (_, a) = validate(RawQuality::default(), raw, Path::new("/etc/fw")).unwrap();
        let c = a.command.unwrap();
        assert_eq!(
            (c.program.as_str(), c.args.len()),
            ("/usr/bin/notify-lab", 1)
        );
        assert_eq!(a.webhook.unwrap().retries, 3);
        assert_eq!(a.file.unwrap(), Path::new("/etc/fw/alerts.jsonl"));
    }

    #[test]
    fn bad_values_name_their_key() {
        for (q, a, needle) in [
            (
                RawQuality {
                    charted_metrics: vec!["brightness".into()],
                    ..RawQuality::default()
                },
                RawAlerts::default(),
                "quality.charted_metrics: \"brightness\"",
            ),
            (
                RawQuality {
                    min_separability: 1.5,
                    ..RawQuality::default()
                },
                RawAlerts::default(),
                "quality.min_separability",
            ),
            (
                RawQuality {
                    ewma_lambda: 0.0,
                    ..RawQuality::default()
                },
                RawAlerts::default(),
                "quality.ewma_lambda",
            ),
            (
                RawQuality {
                    on_uneven_illumination: "smooth".into(),
                    ..RawQuality::default()
                },
                RawAlerts::default(),
                "on_uneven_illumination",
            ),
            (
                RawQuality::default(),
                RawAlerts {
                    webhook_url: "ftp://example.org/x".into(),
                    ..RawAlerts::default()
                },
                "alerts.webhook_url",
            ),
            (
                RawQuality::default(),
                RawAlerts {
                    command: vec![String::new()],
                    ..RawAlerts::default()
                },
                "alerts.command",
            ),
        ] {
            let err = validate(q, a, Path::new(".")).unwrap_err();
            assert!(err.contains(needle), "{err}");
        }
    }
}
