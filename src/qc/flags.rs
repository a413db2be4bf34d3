//! Per-frame flags: pure judgements of one frame's measures against fixed
//! limits and against what the run already knows about the frame's position.
//!
//! Every flag carries its evidence: the measured value, the limit it crossed and
//! a plain sentence. Keeping the run's memory (baselines, recent counts) is
//! [`crate::qc::monitor`]'s job; this file only judges.

use serde::Serialize;

use crate::analysis::quality::is_uneven;
use crate::analysis::FrameResult;
use crate::qc::metrics::FrameMetrics;
use crate::qc::params::FlagLimits;

/// What can be wrong with one frame.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FlagKind {
    /// Otsu's separability is below `min_separability`: a global threshold is doubtful.
    LowSeparability,
    /// Sarle's bimodality coefficient is below `min_bimodality`: the frame may hold
    /// no distinct objects.
    UnimodalHistogram,
    /// Objects cover less than `min_foreground_fraction` of the frame under an
    /// Otsu-based threshold, which is unreliable for so small a class.
    SmallForeground,
    /// The illumination change is above `max_illumination_change`.
    UnevenIllumination,
    /// Many objects look like touching ones merged into one.
    MergedObjects,
    /// More than `max_dim_object_share` of the objects lie below the threshold
    /// as a second, dimmer population: the frame holds objects of several
    /// intensities.
    DimObjectsMissed,
    /// More than `max_saturation_fraction` of the pixels are at the top of the bit
    /// depth.
    Saturated,
    /// Focus is below `min_focus_ratio` times the position's baseline focus.
    OutOfFocus,
    /// No objects where the position's baseline frames usually have at least
    /// `min_usual_count`.
    EmptyFrame,
    /// The count changed by more than `max_count_jump` (relative) against the
    /// median of the position's recent frames.
    CountJump,
    /// The file could not be decoded or analyzed (the error row's reason).
    Failed,
}

impl FlagKind {
    /// The flag's name in the database (`flags.flag`), JSON and messages, e.g.
    /// `low_separability`.
    pub fn as_str(self) -> &'static str {
        match self {
            FlagKind::LowSeparability => "low_separability",
            FlagKind::UnimodalHistogram => "unimodal_histogram",
            FlagKind::SmallForeground => "small_foreground",
            FlagKind::UnevenIllumination => "uneven_illumination",
            FlagKind::MergedObjects => "merged_objects",
            FlagKind::DimObjectsMissed => "dim_objects_missed",
            FlagKind::Saturated => "saturated",
            FlagKind::OutOfFocus => "out_of_focus",
            FlagKind::EmptyFrame => "empty_frame",
            FlagKind::CountJump => "count_jump",
            FlagKind::Failed => "failed",
        }
    }
}

/// One flag with its evidence. `value` and `limit` are `None` only for a failure.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FrameFlag {
    /// Which flag.
    pub kind: FlagKind,
    /// The frame's value that crossed the limit (for `count_jump` the relative
    /// change); `None` for a failure.
    pub value: Option<f64>,
    /// The limit it crossed (for `out_of_focus` the baseline focus times the
    /// ratio, for `empty_frame` the usual count); `None` for a failure.
    pub limit: Option<f64>,
    /// A sentence for a person: the value, the limit and what it means.
    pub message: String,
}

/// What the run knows about the frame's position before this frame.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct PositionContext {
    /// Median focus of the position's baseline frames, once the baseline is complete.
    pub baseline_focus: Option<f64>,
    /// Median count of the position's baseline frames, once complete.
    pub usual_count: Option<f64>,
    /// Median count of the last `count_window` frames there, once that many exist.
    pub recent_median_count: Option<f64>,
}

/// The dim-objects flag needs at least this many dim objects: one or two
/// specks of debris below the threshold say nothing about the sample. Our
/// judgement.
pub const MIN_DIM_OBJECTS: usize = 3;

/// Judges one frame. A flag is raised only when a value is strictly beyond its
/// limit, so a value exactly at the limit passes.
pub fn frame_flags(m: &FrameMetrics, limits: &FlagLimits, ctx: &PositionContext) -> Vec<FrameFlag> {
    let mut flags = Vec::new();
    let mut flag = |kind, value: f64, limit: f64, message: String| {
        flags.push(FrameFlag {
            kind,
            value: Some(value),
            limit: Some(limit),
            message,
        });
    };
    if m.separability < limits.min_separability {
        flag(
            FlagKind::LowSeparability,
            m.separability,
            limits.min_separability,
            format!(
                "histogram not bimodal enough for a global threshold: Otsu separability {:.2} is below {:.2}",
                m.separability, limits.min_separability
            ),
        );
    }
    if m.bimodality < limits.min_bimodality {
        flag(
            FlagKind::UnimodalHistogram,
            m.bimodality,
            limits.min_bimodality,
            format!(
                "histogram looks unimodal: bimodality coefficient {:.2} is below {:.2} (a flat histogram scores 0.56, pure noise 0.33); the frame may hold no distinct objects",
                m.bimodality, limits.min_bimodality
            ),
        );
    }
    if m.otsu_based && m.object_count > 0 && m.foreground_fraction < limits.min_foreground_fraction
    {
        flag(
            FlagKind::SmallForeground,
            m.foreground_fraction,
            limits.min_foreground_fraction,
            format!(
                "objects cover only {:.2}% of the frame (limit {:.2}%): Otsu's threshold is unreliable for so small a class; consider method = \"triangle\" or \"li\"",
                100.0 * m.foreground_fraction,
                100.0 * limits.min_foreground_fraction
            ),
        );
    }
    if is_uneven(m.illumination_change, limits.max_illumination_change) {
        flag(
            FlagKind::UnevenIllumination,
            m.illumination_change,
            limits.max_illumination_change,
            format!(
                "uneven illumination: the background changes by {:.0}% across the frame (limit {:.0}%)",
                100.0 * m.illumination_change,
                100.0 * limits.max_illumination_change
            ),
        );
    }
    if m.object_count >= limits.min_objects_for_merged
        && m.merged_fraction > limits.max_merged_fraction
    {
        flag(
            FlagKind::MergedObjects,
            m.merged_fraction,
            limits.max_merged_fraction,
            format!(
                "{:.0}% of the objects look like touching objects merged into one (solidity below {:.2} and more than {:.1} times the median area; limit {:.0}%): the count is likely too low; consider [segment] split = \"distance\"",
                100.0 * m.merged_fraction,
                crate::analysis::measure::MERGED_MAX_SOLIDITY,
                crate::analysis::measure::MERGED_MIN_AREA_RATIO,
                100.0 * limits.max_merged_fraction
            ),
        );
    }
    let all = m.object_count + m.dim_objects;
    let dim_share = if all == 0 {
        0.0
    } else {
        m.dim_objects as f64 / all as f64
    };
    if let Some(level) = m
        .dim_level
        .filter(|_| m.dim_objects >= MIN_DIM_OBJECTS && dim_share > limits.max_dim_object_share)
    {
        flag(
            FlagKind::DimObjectsMissed,
            dim_share,
            limits.max_dim_object_share,
            format!(
                "{} dim objects lie below the threshold {} against {} counted above it ({:.0}% of all, limit {:.0}%; they stand out from the background above {}): the frame holds objects of several intensities and the threshold keeps only the brighter; consider method = \"li\", or method = \"multi-otsu\" with classes = 3 and boundary = 1",
                m.dim_objects,
                num(m.threshold),
                m.object_count,
                100.0 * dim_share,
                100.0 * limits.max_dim_object_share,
                num(level),
            ),
        );
    }
    if m.saturation_fraction > limits.max_saturation_fraction {
        flag(
            FlagKind::Saturated,
            m.saturation_fraction,
            limits.max_saturation_fraction,
            format!(
                "{:.2}% of the pixels are saturated (limit {:.2}%): intensities of bright objects are cut off",
                100.0 * m.saturation_fraction,
                100.0 * limits.max_saturation_fraction
            ),
        );
    }
    // Focus needs objects to measure (an empty frame has its own flag).
    if let Some(base) = ctx
        .baseline_focus
        .filter(|&b| b > 0.0 && m.object_count > 0)
    {
        let limit = base * limits.min_focus_ratio;
        if m.focus < limit {
            flag(
                FlagKind::OutOfFocus,
                m.focus,
                limit,
                format!(
                    "out of focus: sharpness {} is {:.0}% of this position's baseline {} (limit {:.0}%)",
                    num(m.focus),
                    100.0 * m.focus / base,
                    num(base),
                    100.0 * limits.min_focus_ratio
                ),
            );
        }
    }
    let usual = ctx
        .usual_count
        .filter(|&u| u >= limits.min_usual_count && u > 0.0);
    if let (Some(usual), 0) = (usual, m.object_count) {
        flag(
            FlagKind::EmptyFrame,
            0.0,
            usual,
            format!("empty frame: no objects where this position usually has {usual:.0}"),
        );
    }
    if let Some(median) = ctx
        .recent_median_count
        .filter(|&c| c >= limits.min_usual_count && c > 0.0)
    {
        let jump = (m.object_count as f64 - median).abs() / median;
        if m.object_count > 0 && jump > limits.max_count_jump {
            flag(
                FlagKind::CountJump,
                jump,
                limits.max_count_jump,
                format!(
                    "count jumped to {} against a median of {median:.0} over the last {} frames here ({:.0}% change, limit {:.0}%)",
                    m.object_count,
                    limits.count_window,
                    100.0 * jump,
                    100.0 * limits.max_count_jump
                ),
            );
        }
    }
    flags
}

/// Adds the recount to the uneven-illumination flag's sentence, so whoever
/// reads the flag learns both counts and which one is used.
pub fn explain_recount(flags: &mut [FrameFlag], first: &FrameResult, recount: &FrameResult) {
    for f in flags
        .iter_mut()
        .filter(|f| f.kind == FlagKind::UnevenIllumination)
    {
        f.message.push_str(&format!(
            "; segmented again after flattening the background: {} objects (threshold {}) against {} without; the count is taken from the recount",
            recount.object_count,
            num(recount.threshold),
            first.object_count
        ));
    }
}

/// A number for a sentence: about four significant digits, no exponent for
/// everyday magnitudes.
pub fn num(x: f64) -> String {
    let a = x.abs();
    if a >= 1.0e6 || (a > 0.0 && a < 1.0e-3) {
        format!("{x:.3e}")
    } else if a >= 100.0 {
        format!("{x:.0}")
    } else if a >= 1.0 {
        format!("{x:.2}")
    } else {
        format!("{x:.3}")
    }
}

/// The flag of a frame that produced no result.
pub fn failure_flag(reason: &str) -> FrameFlag {
    FrameFlag {
        kind: FlagKind::Failed,
        value: None,
        limit: None,
        message: format!("not analyzed: {reason}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::qc::params::QualitySettings;

    fn good() -> FrameMetrics {
        FrameMetrics::passing_example()
    }

    fn context() -> PositionContext {
        PositionContext {
            baseline_focus: Some(1.0e7),
            usual_count: Some(40.0),
            recent_median_count: Some(40.0),
        }
    }

    fn kinds(m: &FrameMetrics, ctx: &PositionContext) -> Vec<FlagKind> {
        let limits = QualitySettings::default().flags;
        frame_flags(m, &limits, ctx)
            .iter()
            .map(|f| f.kind)
            .collect()
    }

    /// Each limit tested on both sides: a hair inside passes, a hair beyond
    /// flags, with the value and the limit as evidence.
    #[test]
    fn every_limit_is_tested_on_both_sides() {
        let l = QualitySettings::default().flags;
        let ctx = context();
        let eps = 1e-9;
        type Set = fn(&mut FrameMetrics, f64);
        let cases: [(FlagKind, f64, f64, Set); 7] = [
            (
                FlagKind::LowSeparability,
                l.min_separability,
                -eps,
                |m, v| m.separability = v,
            ),
            (
                FlagKind::UnimodalHistogram,
                l.min_bimodality,
                -eps,
                |m, v| m.bimodality = v,
            ),
            (
                FlagKind::SmallForeground,
                l.min_foreground_fraction,
                -eps,
                |m, v| m.foreground_fraction = v,
            ),
            (
                FlagKind::UnevenIllumination,
                l.max_illumination_change,
                eps,
                |m, v| m.illumination_change = v,
            ),
            (
                FlagKind::MergedObjects,
                l.max_merged_fraction,
                eps,
                |m, v| m.merged_fraction = v,
            ),
            (
                FlagKind::Saturated,
                l.max_saturation_fraction,
                eps,
                |m, v| m.saturation_fraction = v,
            ),
            (
                FlagKind::OutOfFocus,
                1.0e7 * l.min_focus_ratio,
                -1.0,
                |m, v| m.focus = v,
            ),
        ];
        for (kind, limit, beyond, set) in cases {
            let mut at = good();
            set(&mut at, limit);
            assert_eq!(kinds(&at, &ctx), vec![], "{kind:?} at its limit");
            let mut past = good();
            set(&mut past, limit + beyond);
            let flags = frame_flags(&past, &l, &ctx);
            assert_eq!(flags.len(), 1, "{kind:?} beyond: {flags:?}");
            assert_eq!(flags[0].kind, kind);
            assert_eq!(flags[0].value, Some(limit + beyond));
            assert!((flags[0].limit.unwrap() - limit).abs() < 1e-12);
        }
    }

    /// The dim-objects share is a ratio of counts, so its two sides are
    /// counts: with 40 counted and the 10% limit, 4 dim objects are 4/44 =
    /// 9.1% (passes) and 5 are 5/45 = 11.1% (flags); fewer than
    /// MIN_DIM_OBJECTS never flag, nor does a frame with no second population.
    #[test]
    fn dim_objects_flag_past_their_share_and_name_the_remedies() {
        let l = QualitySettings::default().flags;
        assert_eq!(l.max_dim_object_share, 0.1);
        let ctx = context();
        let with = |dim: usize, level: Option<f64>| FrameMetrics {
            dim_objects: dim,
            dim_level: level,
            ..good()
        };
        assert_eq!(kinds(&with(4, Some(900.0)), &ctx), vec![]);
        let flags = frame_flags(&with(5, Some(900.0)), &l, &ctx);
        assert_eq!(flags.len(), 1, "{flags:?}");
        assert_eq!(flags[0].kind, FlagKind::DimObjectsMissed);
        assert_eq!(flags[0].value, Some(5.0 / 45.0));
        assert_eq!(flags[0].limit, Some(0.1));
        assert!(flags[0]
            .message
            .starts_with("5 dim objects lie below the threshold 8000 against 40 counted"));
        assert!(
            flags[0].message.contains("method = \"li\""),
            "{}",
            flags[0].message
        );
        assert_eq!(kinds(&with(5, None), &ctx), vec![]);
        let few = FrameMetrics {
            object_count: 1,
            ..with(MIN_DIM_OBJECTS - 1, Some(900.0))
        };
        assert_eq!(kinds(&few, &PositionContext::default()), vec![]);
        let three = FrameMetrics {
            object_count: 1,
            ..with(MIN_DIM_OBJECTS, Some(900.0))
        };
        assert_eq!(
            kinds(&three, &PositionContext::default()),
            vec![FlagKind::DimObjectsMissed]
        );
    }

    #[test]
    fn small_foreground_names_the_alternatives_and_only_for_otsu() {
        let l = QualitySettings::default().flags;
        let m = FrameMetrics {
            foreground_fraction: 0.001,
            ..good()
        };
        let flags = frame_flags(&m, &l, &context());
        assert!(flags[0].message.contains("triangle") && flags[0].message.contains("li"));
        let triangle = FrameMetrics {
            otsu_based: false,
            ..m
        };
        assert_eq!(kinds(&triangle, &context()), vec![]);
    }

    #[test]
    fn empty_frame_needs_a_usual_count_of_at_least_the_limit() {
        let l = QualitySettings::default().flags;
        let empty = FrameMetrics {
            object_count: 0,
            foreground_fraction: 0.0,
            ..good()
        };
        let with_usual = |u: f64| PositionContext {
            usual_count: Some(u),
            recent_median_count: None,
            ..context()
        };
        assert_eq!(
            kinds(&empty, &with_usual(l.min_usual_count)),
            vec![FlagKind::EmptyFrame]
        );
        assert_eq!(kinds(&empty, &with_usual(l.min_usual_count - 0.5)), vec![]);
        // No baseline yet: nothing to compare with.
        assert_eq!(kinds(&empty, &PositionContext::default()), vec![]);
    }

    #[test]
    fn count_jump_against_the_recent_median_on_both_sides() {
        let l = QualitySettings::default().flags; // max_count_jump 0.5
        let ctx = context(); // median 40
        let at = FrameMetrics {
            object_count: 60, // |60 - 40| / 40 = 0.5: at the limit
            ..good()
        };
        assert_eq!(kinds(&at, &ctx), vec![]);
        let up = FrameMetrics {
            object_count: 61,
            ..good()
        };
        let flags = frame_flags(&up, &l, &ctx);
        assert_eq!(flags[0].kind, FlagKind::CountJump);
        assert_eq!(flags[0].value, Some(21.0 / 40.0));
        let down = FrameMetrics {
            object_count: 19,
            ..good()
        };
        assert_eq!(kinds(&down, &ctx), vec![FlagKind::CountJump]);
    }

    #[test]
    fn failures_are_flags_without_numbers() {
        let f = failure_flag("truncated TIFF strip");
        assert_eq!((f.kind.as_str(), f.value, f.limit), ("failed", None, None));
        assert!(f.message.contains("truncated"));
    }
}
