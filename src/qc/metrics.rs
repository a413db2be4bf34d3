//! What quality control measures on a frame: the per-frame metrics that
//! flags judge, and the subset that drift charts follow.
//!
//! The bottom of [`crate::qc`]: flags, charts and the monitor all read a frame
//! through [`FrameMetrics`] and name a charted quantity by [`Metric`]. Judging
//! is left to them.

use serde::Serialize;

use crate::analysis::{FrameResult, Method};

/// The per-frame measures quality control looks at (a [`FrameResult`] without
/// its objects, or a stored frame row).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FrameMetrics {
    /// True when the threshold came from Otsu's criterion (otsu, multi-otsu).
    pub otsu_based: bool,
    /// Threshold level used (foreground is `pixel > threshold`).
    pub threshold: f64,
    /// Otsu's separability η at Otsu's level, 0..1.
    pub separability: f64,
    /// Sarle's bimodality coefficient; NaN when unknown (never flags).
    pub bimodality: f64,
    /// Objects found (the first segmentation's count, not the recount's).
    pub object_count: usize,
    /// Share of objects that look merged; NaN when unknown (never flags).
    pub merged_fraction: f64,
    /// Objects left out below the threshold (a second, dimmer population).
    pub dim_objects: usize,
    /// The level that separates them from the background, when there is one.
    pub dim_level: Option<f64>,
    /// Fraction (0..1) of the frame covered by kept objects.
    pub foreground_fraction: f64,
    /// Median raw intensity of the background pixels.
    pub background_level: f64,
    /// Fraction (0..1) of pixels at the top of the bit depth.
    pub saturation_fraction: f64,
    /// Sharpness, independent of brightness (larger is sharper; see
    /// [`crate::analysis::quality`]).
    pub focus: f64,
    /// (max − min) / mean of the fitted background surface; 0 for an even field.
    pub illumination_change: f64,
}

impl From<&FrameResult> for FrameMetrics {
    fn from(r: &FrameResult) -> Self {
        FrameMetrics {
            otsu_based: Method::is_otsu_based(&r.method),
            threshold: r.threshold,
            separability: r.separability,
            bimodality: r.bimodality,
            object_count: r.object_count,
            merged_fraction: r.merged_fraction,
            dim_objects: r.dim_objects,
            dim_level: r.dim_level,
            foreground_fraction: r.foreground_fraction,
            background_level: r.background_level,
            saturation_fraction: r.saturation_fraction,
            focus: r.focus,
            illumination_change: r.illumination_change,
        }
    }
}

/// The per-frame metrics that reveal drift over a run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Metric {
    /// Lamp dimming or brightening.
    BackgroundLevel,
    /// A growing illumination gradient.
    IlluminationChange,
    /// A moving threshold: brightness or the objects' share of the field changed.
    Threshold,
    /// Objects and background becoming harder to tell apart.
    Separability,
    /// Focus loss.
    Focus,
    /// Count collapse (or an unexpected surge).
    ObjectCount,
}

impl Metric {
    /// Every metric, in a fixed order (a position keeps its charts in this order).
    pub const ALL: [Metric; 6] = [
        Metric::BackgroundLevel,
        Metric::IlluminationChange,
        Metric::Threshold,
        Metric::Separability,
        Metric::Focus,
        Metric::ObjectCount,
    ];

    /// The metric's name in settings (`charted_metrics`), alert conditions
    /// (`drift:<name>`) and JSON.
    pub fn as_str(self) -> &'static str {
        match self {
            Metric::BackgroundLevel => "background_level",
            Metric::IlluminationChange => "illumination_change",
            Metric::Threshold => "threshold",
            Metric::Separability => "separability",
            Metric::Focus => "focus",
            Metric::ObjectCount => "object_count",
        }
    }

    /// Whether a drift of this metric in `direction` is trouble worth an
    /// alert. Focus only downward: a growing culture or a cleaner field makes
    /// frames sharper, which never needs anyone at night. Every other metric
    /// both ways (a brightening lamp or a count surge also needs a look).
    pub fn harms(self, direction: Direction) -> bool {
        !(self == Metric::Focus && direction == Direction::Up)
    }

    /// Plain words for messages.
    pub fn describe(self) -> &'static str {
        match self {
            Metric::BackgroundLevel => "background level (lamp brightness)",
            Metric::IlluminationChange => "illumination unevenness",
            Metric::Threshold => "threshold",
            Metric::Separability => "histogram separability",
            Metric::Focus => "focus (sharpness)",
            Metric::ObjectCount => "object count",
        }
    }

    /// This metric's value on one frame.
    pub fn value(self, m: &FrameMetrics) -> f64 {
        match self {
            Metric::BackgroundLevel => m.background_level,
            Metric::IlluminationChange => m.illumination_change,
            Metric::Threshold => m.threshold,
            Metric::Separability => m.separability,
            Metric::Focus => m.focus,
            Metric::ObjectCount => m.object_count as f64,
        }
    }

    /// The smallest baseline sigma a chart uses. A baseline of near-identical
    /// frames has a tiny spread, and charting against it would call any change
    /// worth nothing a drift; the floor is the scale of change worth an alert at
    /// night (our judgement, documented here, not a published value):
    /// - background level: 2% of the baseline mean;
    /// - threshold: 5% of the mean, since Otsu's threshold also moves with the
    ///   share of the field the objects cover, field by field;
    /// - focus, whose value depends on the content of each field: 10% of the mean;
    /// - count: √mean, the spread of Poisson counting (common practice);
    /// - separability and illumination change, already fractions: 0.02 absolute.
    pub fn sigma_floor(self, mean: f64) -> f64 {
        match self {
            Metric::BackgroundLevel => 0.02 * mean.abs(),
            Metric::Threshold => 0.05 * mean.abs(),
            Metric::Focus => 0.1 * mean.abs(),
            Metric::ObjectCount => mean.abs().sqrt().max(1.0),
            Metric::Separability | Metric::IlluminationChange => 0.02,
        }
        .max(f64::MIN_POSITIVE)
    }
}

/// Direction of a declared drift.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Direction {
    /// The metric rose above its baseline (JSON `up`).
    Up,
    /// The metric fell below its baseline (JSON `down`).
    Down,
}

#[cfg(test)]
impl FrameMetrics {
    /// A frame that passes every check with the default limits (for tests).
    pub(crate) fn passing_example() -> Self {
        FrameMetrics {
            otsu_based: true,
            threshold: 8000.0,
            separability: 0.9,
            bimodality: 0.9,
            object_count: 40,
            merged_fraction: 0.0,
            dim_objects: 0,
            dim_level: None,
            foreground_fraction: 0.05,
            background_level: 6500.0,
            saturation_fraction: 0.0,
            focus: 1.0e7,
            illumination_change: 0.02,
        }
    }
}
