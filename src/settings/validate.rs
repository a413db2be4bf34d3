//! From the file's shape to each layer's parameter types: every value checked
//! against the range its layer expects, with a message naming the key.
//!
//! Pure: no file is read here (flat-field frames are read by
//! [`crate::settings::load`] after validation).

use std::path::Path;
use std::time::Duration;

use crate::analysis::{
    Background, Connectivity, Method, ObjectFilter, Recount, SegmentParams, Split,
};
use crate::decode::DecodeLimits;
use crate::naming::NamePattern;
use crate::pipeline::{Calibration, CalibrationPreference};
use crate::qc::metrics::Metric;
use crate::qc::params::{
    AlertSettings, ChartParams, CommandSink, FlagLimits, QualitySettings, WebhookSink, WebhookUrl,
};
use crate::settings::document::{
    AlertsSection, CalibrationSection, FlatFieldFiles, FrameFile, LimitsSection, QualitySection,
    ReportSection, SegmentSection, StoreSection, WatchSection,
};
use crate::settings::report::ReportSettings;
use crate::store::{LabelImages, StoreSettings};
use crate::watch::{default_workers, BadPattern, PathFilter, WatchMode, WatchSettings};

/// A value the configuration does not accept, named by its key.
#[derive(Debug, thiserror::Error)]
pub enum ValueError {
    /// A number outside its range, or a word outside its choices.
    #[error("{key} = {value} (expected {expected})")]
    Range {
        /// `section.key`
        key: &'static str,
        /// The value as written.
        value: String,
        /// What is accepted.
        expected: String,
    },
    /// Values that do not fit together, or a missing companion key.
    #[error("{0}")]
    Combination(String),
    /// A file-name glob that does not compile.
    #[error(transparent)]
    Pattern(#[from] BadPattern),
}

/// `Ok(v)` when `ok(v)`, else a [`ValueError::Range`] for `key`: the one
/// range check of the configuration.
fn check<T: std::fmt::Display + Copy>(
    key: &'static str,
    v: T,
    ok: impl Fn(T) -> bool,
    expected: &str,
) -> Result<T, ValueError> {
    if ok(v) {
        Ok(v)
    } else {
        Err(ValueError::Range {
            key,
            value: v.to_string(),
            expected: expected.into(),
        })
    }
}

/// A word outside its choices.
fn choice(key: &'static str, value: &str, expected: &str) -> ValueError {
    ValueError::Range {
        key,
        value: format!("\"{value}\""),
        expected: expected.into(),
    }
}

fn fraction(key: &'static str, v: f64) -> Result<f64, ValueError> {
    check(key, v, |v| (0.0..=1.0).contains(&v), "0 to 1")
}

fn positive_f64(key: &'static str, v: f64) -> Result<f64, ValueError> {
    check(key, v, |v| v > 0.0 && v.is_finite(), "a positive number")
}

/// `Ok(v)` when `lo <= v <= hi`: a count or a duration with a range the
/// service can honour (a value past it would overflow a clock or an
/// allocation), with the range in the message.
fn within<T: std::fmt::Display + Copy + PartialOrd>(
    key: &'static str,
    v: T,
    lo: T,
    hi: T,
) -> Result<T, ValueError> {
    check(key, v, |v| v >= lo && v <= hi, &format!("{lo} to {hi}"))
}

/// `[segment]` and `[measure]`, with the flat-field frames' files (read later);
/// `max_objects` comes from `[limits]` (see [`limits`]).
pub fn segment(
    s: SegmentSection,
    measure_pages: Vec<usize>,
    max_objects: usize,
    base: &Path,
) -> Result<(SegmentParams, Option<FlatFieldFiles>), ValueError> {
    let method = match s.method.as_str() {
        "otsu" => Method::Otsu,
        "triangle" => Method::Triangle,
        "li" => Method::Li,
        "multi-otsu" => {
            let classes = check(
                "segment.classes",
                s.classes,
                |c| (2..=5).contains(&c),
                "2 to 5",
            )?;
            let boundary = check(
                "segment.boundary",
                s.boundary,
                |b| b >= 1 && b < classes,
                &format!("1 to {} for {classes} classes", classes - 1),
            )?;
            Method::MultiOtsu { classes, boundary }
        }
        "fixed" => {
            let level = check(
                "segment.fixed_level",
                s.fixed_level,
                |l| l <= 65535,
                "0 to 65535",
            )?;
            Method::Fixed(u16::try_from(level).unwrap_or(u16::MAX))
        }
        other => {
            return Err(choice(
                "segment.method",
                other,
                "otsu, triangle, li, multi-otsu or fixed",
            ))
        }
    };
    let smooth_sigma_px = check(
        "segment.smooth_sigma_px",
        s.smooth_sigma_px,
        |v| (0.0..=50.0).contains(&v),
        "0 to 50; 0 = off",
    )?;
    let frame_file = |path: &Path, hash: Option<String>| FrameFile {
        path: base.join(path),
        hash,
    };
    let (background, files) = match s.background.as_str() {
        "none" => (Background::None, None),
        "rolling-ball" => {
            let radius_px = check(
                "segment.rolling_ball_radius_px",
                s.rolling_ball_radius_px,
                |r| (1.0..=1000.0).contains(&r),
                "1 to 1000",
            )?;
            (Background::RollingBall { radius_px }, None)
        }
        "flat-field" => {
            let flat = s.flat_frame.as_deref().ok_or_else(|| {
                ValueError::Combination(
                    "segment.background = \"flat-field\" needs segment.flat_frame".into(),
                )
            })?;
            let files = FlatFieldFiles {
                flat: frame_file(flat, s.flat_frame_hash),
                dark: s
                    .dark_frame
                    .as_deref()
                    .map(|d| frame_file(d, s.dark_frame_hash)),
            };
            // The frames are read once validation is over (`load`).
            (Background::None, Some(files))
        }
        other => {
            return Err(choice(
                "segment.background",
                other,
                "none, rolling-ball or flat-field",
            ))
        }
    };
    let connectivity = Connectivity::from_neighbours(s.connectivity).ok_or(ValueError::Range {
        key: "segment.connectivity",
        value: s.connectivity.to_string(),
        expected: "4 or 8".into(),
    })?;
    let split = match s.split.as_str() {
        "none" => Split::None,
        "distance" => Split::Distance {
            min_depth_px: check(
                "segment.split_min_depth_px",
                s.split_min_depth_px,
                |v| v > 0.0 && v <= 1000.0,
                "above 0, up to 1000",
            )?,
            min_separation_px: check(
                "segment.split_min_separation_px",
                s.split_min_separation_px,
                |v| (0.0..=10_000.0).contains(&v),
                "0 to 10000",
            )?,
        },
        other => return Err(choice("segment.split", other, "none or distance")),
    };
    if s.max_area_px != 0 && s.max_area_px < s.min_area_px {
        return Err(ValueError::Combination(format!(
            "segment.max_area_px = {} is below min_area_px = {}",
            s.max_area_px, s.min_area_px
        )));
    }
    let area = |key, v| {
        check(
            key,
            v,
            |v: f64| v >= 0.0 && v.is_finite(),
            "0 (off) or more",
        )
    };
    let filter = ObjectFilter {
        min_area_px: s.min_area_px,
        max_area_px: s.max_area_px,
        min_area_um2: area("segment.min_area_um2", s.min_area_um2)?,
        max_area_um2: area("segment.max_area_um2", s.max_area_um2)?,
        exclude_border: s.exclude_border,
    };
    if measure_pages.contains(&s.page) {
        return Err(ValueError::Combination(format!(
            "measure.pages lists page {} which is the segmented page itself",
            s.page
        )));
    }
    let params = SegmentParams {
        page: s.page,
        method,
        smooth_sigma_px,
        background,
        fill_holes: s.fill_holes,
        connectivity,
        split,
        filter,
        measure_pages,
        max_objects,
    };
    Ok((params, files))
}

/// `[calibration]`
pub fn calibration(c: CalibrationSection) -> Result<Calibration, ValueError> {
    let pixel_size_um = check(
        "calibration.pixel_size_um",
        c.pixel_size_um,
        |v| v >= 0.0 && v.is_finite(),
        "0 (none) or positive",
    )?;
    if c.prefer == CalibrationPreference::Config && pixel_size_um == 0.0 {
        return Err(ValueError::Combination(
            "calibration.prefer = \"config\" needs calibration.pixel_size_um".into(),
        ));
    }
    Ok(Calibration {
        pixel_size_um,
        prefer: c.prefer,
    })
}

/// `[limits]`: the decoder's limits and the most objects one frame may hold.
pub fn limits(l: LimitsSection) -> Result<(DecodeLimits, usize), ValueError> {
    let decode = DecodeLimits {
        max_pixels: within("limits.max_pixels", l.max_pixels, 1, 1 << 32)?,
        max_decoded_bytes: within("limits.max_decoded_mib", l.max_decoded_mib, 1, 1 << 16)? << 20,
        max_pages: within("limits.max_pages", l.max_pages, 1, 1_000_000)?,
    };
    Ok((
        decode,
        within("limits.max_objects", l.max_objects, 1, 10_000_000)?,
    ))
}

/// `[watch]`; relative folders are anchored at `base`.
pub fn watch(w: WatchSection, base: &Path) -> Result<WatchSettings, ValueError> {
    let mode = match w.mode.as_str() {
        "native" => WatchMode::Native,
        "poll" => WatchMode::Poll,
        other => return Err(choice("watch.mode", other, "native or poll")),
    };
    let name_pattern = NamePattern::new(&w.name_pattern).map_err(|e| {
        ValueError::Combination(format!(
            "watch.name_pattern is not a valid regular expression: {e}"
        ))
    })?;
    Ok(WatchSettings {
        folders: w.folders.iter().map(|f| base.join(f)).collect(),
        filter: PathFilter::new(w.include, w.exclude, w.temporary)?,
        settle: Duration::from_millis(check(
            "watch.settle_ms",
            w.settle_ms,
            |v| v <= 600_000,
            "at most 600000",
        )?),
        mode,
        poll_interval: Duration::from_millis(within(
            "watch.poll_interval_ms",
            w.poll_interval_ms,
            1,
            3_600_000,
        )?),
        rescan_interval: Duration::from_secs(within(
            "watch.rescan_interval_s",
            w.rescan_interval_s,
            1,
            86_400,
        )?),
        workers: match within("watch.workers", w.workers, 0, 256)? {
            0 => default_workers(),
            n => n,
        },
        queue_capacity: within("watch.queue_capacity", w.queue_capacity, 1, 1_000_000)?,
        retry_limit: check("watch.retry_limit", w.retry_limit, |v| v <= 30, "0 to 30")?,
        retry_backoff: Duration::from_millis(within(
            "watch.retry_backoff_ms",
            w.retry_backoff_ms,
            1,
            600_000,
        )?),
        shutdown_timeout: Duration::from_secs(within(
            "watch.shutdown_timeout_s",
            w.shutdown_timeout_s,
            1,
            3_600,
        )?),
        new_run_after_idle: Duration::from_secs(
            within(
                "watch.new_run_after_idle_min",
                w.new_run_after_idle_min,
                1,
                10_080,
            )? * 60,
        ),
        name_pattern,
        stacks: w.stacks,
    })
}

/// `[store]`; a relative database path is anchored at `base`.
pub fn store(s: StoreSection, base: &Path) -> Result<StoreSettings, ValueError> {
    let label_images = LabelImages::parse(&s.label_images).ok_or_else(|| {
        choice(
            "store.label_images",
            &s.label_images,
            "none, flagged or all",
        )
    })?;
    Ok(StoreSettings {
        database: base.join(s.database),
        batch_max: within("store.batch_max", s.batch_max, 1, 100_000)?,
        label_images,
    })
}

/// `[report]`; a relative path is anchored at `base`.
pub fn report(r: ReportSection, base: &Path) -> Result<ReportSettings, ValueError> {
    Ok(ReportSettings {
        path: (!r.path.as_os_str().is_empty()).then(|| base.join(r.path)),
        every: Duration::from_secs(within("report.every_min", r.every_min, 1, 1_440)? * 60),
    })
}

/// `[quality]`, and the recount it switches on.
pub fn quality(q: QualitySection) -> Result<(QualitySettings, Option<Recount>), ValueError> {
    let flags = FlagLimits {
        min_separability: fraction("quality.min_separability", q.min_separability)?,
        min_bimodality: fraction("quality.min_bimodality", q.min_bimodality)?,
        min_foreground_fraction: fraction(
            "quality.min_foreground_fraction",
            q.min_foreground_fraction,
        )?,
        max_illumination_change: positive_f64(
            "quality.max_illumination_change",
            q.max_illumination_change,
        )?,
        max_saturation_fraction: fraction(
            "quality.max_saturation_fraction",
            q.max_saturation_fraction,
        )?,
        min_focus_ratio: fraction("quality.min_focus_ratio", q.min_focus_ratio)?,
        min_usual_count: check(
            "quality.min_usual_count",
            q.min_usual_count,
            |v| v >= 0.0 && v.is_finite(),
            "0 or more",
        )?,
        count_window: within("quality.count_window", q.count_window, 1, 100_000)?,
        max_count_jump: positive_f64("quality.max_count_jump", q.max_count_jump)?,
        max_merged_fraction: fraction("quality.max_merged_fraction", q.max_merged_fraction)?,
        min_objects_for_merged: q.min_objects_for_merged,
        max_dim_object_share: fraction("quality.max_dim_object_share", q.max_dim_object_share)?,
    };
    let charted = q
        .charted_metrics
        .iter()
        .map(|name| {
            Metric::ALL
                .into_iter()
                .find(|m| m.as_str() == name)
                .ok_or_else(|| {
                    let known: Vec<&str> = Metric::ALL.iter().map(|m| m.as_str()).collect();
                    ValueError::Combination(format!(
                        "quality.charted_metrics: \"{name}\" is not a charted metric (expected any of {})",
                        known.join(", ")
                    ))
                })
        })
        .collect::<Result<Vec<Metric>, ValueError>>()?;
    let charts = ChartParams {
        baseline_frames: check(
            "quality.baseline_frames",
            q.baseline_frames,
            |v| (2..=100_000).contains(&v),
            "2 to 100000 (a spread needs two frames)",
        )?,
        ewma_lambda: check(
            "quality.ewma_lambda",
            q.ewma_lambda,
            |v| v > 0.0 && v <= 1.0,
            "above 0, at most 1",
        )?,
        ewma_width: positive_f64("quality.ewma_width", q.ewma_width)?,
        cusum_k: check(
            "quality.cusum_k",
            q.cusum_k,
            |v| v >= 0.0 && v.is_finite(),
            "0 or more",
        )?,
        cusum_h: positive_f64("quality.cusum_h", q.cusum_h)?,
        outlier_clip: positive_f64("quality.outlier_clip", q.outlier_clip)?,
        recover_frames: within("quality.recover_frames", q.recover_frames, 1, 100_000)?,
        charted,
    };
    let recount = match q.on_uneven_illumination.as_str() {
        "keep" => None,
        "flatten" => Some(Recount {
            max_illumination_change: flags.max_illumination_change,
            radius_px: check(
                "quality.flatten_radius_px",
                q.flatten_radius_px,
                |r| (1.0..=1000.0).contains(&r),
                "1 to 1000",
            )?,
        }),
        other => {
            return Err(choice(
                "quality.on_uneven_illumination",
                other,
                "keep or flatten",
            ))
        }
    };
    let quality = QualitySettings {
        flags,
        charts,
        stall_after: Duration::from_secs(within(
            "quality.stall_after_s",
            q.stall_after_s,
            1,
            604_800,
        )?),
        expected_frames: (q.expected_frames > 0).then_some(q.expected_frames),
        min_free_space_bytes: within(
            "quality.min_free_space_mib",
            q.min_free_space_mib,
            0,
            1 << 30,
        )? << 20,
        failure_window: within("quality.failure_window", q.failure_window, 1, 100_000)?,
        max_failure_fraction: fraction("quality.max_failure_fraction", q.max_failure_fraction)?,
    };
    Ok((quality, recount))
}

/// `[alerts]`; relative files are anchored at `base`.
pub fn alerts(a: AlertsSection, base: &Path) -> Result<AlertSettings, ValueError> {
    let command = match a.command.split_first() {
        None => None,
        Some((program, _)) if program.is_empty() => {
            return Err(ValueError::Combination(
                "alerts.command: the first element (the program) is empty".into(),
            ))
        }
        Some((program, args)) => Some(CommandSink {
            program: program.clone(),
            args: args.to_vec(),
            timeout: Duration::from_secs(within(
                "alerts.command_timeout_s",
                a.command_timeout_s,
                1,
                3_600,
            )?),
        }),
    };
    let webhook = if a.webhook_url.is_empty() {
        None
    } else {
        let url: WebhookUrl = a
            .webhook_url
            .parse()
            .map_err(|e| ValueError::Combination(format!("alerts.webhook_url = {e}")))?;
        Some(WebhookSink {
            url,
            timeout: Duration::from_secs(within(
                "alerts.webhook_timeout_s",
                a.webhook_timeout_s,
                1,
                600,
            )?),
            retries: check(
                "alerts.webhook_retries",
                a.webhook_retries,
                |r| r <= 10,
                "0 to 10",
            )?,
            backoff: Duration::from_secs(within(
                "alerts.webhook_backoff_s",
                a.webhook_backoff_s,
                0,
                3_600,
            )?),
            ca_file: a.webhook_ca_file.map(|f| base.join(f)),
        })
    };
    Ok(AlertSettings {
        group_window: Duration::from_secs(
            within("alerts.group_window_min", a.group_window_min, 1, 1_440)? * 60,
        ),
        command,
        webhook,
        file: a.file.map(|f| base.join(f)),
    })
}
