//! What the analysis of one frame produces: the frame's measures, each
//! object's measures, and why a readable frame could not be analyzed.
//!
//! Plain data, serialisable as it is shown in JSON. Computing it is
//! [`crate::analysis::segment`]'s; storing and judging it belong to others.

use serde::Serialize;

/// Everything measured on one frame.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FrameResult {
    pub width: usize,
    pub height: usize,
    pub bit_depth: u8,
    /// Threshold method that produced `threshold` (`otsu`, `triangle`, ...).
    pub method: String,
    /// Foreground is `pixel > threshold` on the (corrected) segmented image.
    pub threshold: f64,
    /// Otsu's separability η = σ_B² / σ_T² at Otsu's threshold (Otsu 1979),
    /// reported whatever the method. 0 for a constant frame.
    pub separability: f64,
    /// Sarle's bimodality coefficient of the segmented image's histogram
    /// (5/9 for a flat histogram, higher for two modes); see
    /// [`crate::analysis::threshold::bimodality`].
    pub bimodality: f64,
    pub object_count: usize,
    /// Fraction of the frame covered by kept objects (after fill and filters).
    pub foreground_fraction: f64,
    /// Median raw intensity of the pixels the threshold calls background.
    pub background_level: f64,
    /// Fraction of raw pixels at the top of the bit depth (255 or 65535).
    pub saturation_fraction: f64,
    /// Variance of the 4-neighbour Laplacian of the raw frame (interior pixels).
    pub focus: f64,
    /// Relative brightness change of the fitted background field across the
    /// frame: (max - min) / mean of the fitted surface; 0 for a flat field.
    pub illumination_change: f64,
    /// Pixel size used for µm² areas, when known.
    pub pixel_size_um: Option<f64>,
    pub objects: Vec<ObjectMeasures>,
}

/// Measurements of one labelled object.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ObjectMeasures {
    /// 1-based, in raster order of each object's first pixel.
    pub label: u32,
    pub area_px: u64,
    pub area_um2: Option<f64>,
    pub centroid_x: f64,
    pub centroid_y: f64,
    /// `[x_min, y_min, x_max, y_max]`, max exclusive.
    pub bbox: [u32; 4],
    pub mean_intensity: f64,
    pub integrated_intensity: f64,
    pub max_intensity: f64,
    pub perimeter_px: f64,
    pub circularity: f64,
    pub major_axis_px: f64,
    pub minor_axis_px: f64,
    pub eccentricity: f64,
    /// The same intensity measures on each extra page listed in the config,
    /// in config order, measured inside this object.
    pub channels: Vec<ChannelIntensity>,
}

#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ChannelIntensity {
    pub page: usize,
    pub mean_intensity: f64,
    pub integrated_intensity: f64,
    pub max_intensity: f64,
}

/// Why a frame could not be analyzed (the frame itself was readable).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AnalysisError {
    #[error("page {page} is {got_w}x{got_h} but the segmented page is {want_w}x{want_h}")]
    PageSize {
        page: usize,
        got_w: usize,
        got_h: usize,
        want_w: usize,
        want_h: usize,
    },
    #[error("flat-field correction: {0}")]
    FlatField(String),
}
