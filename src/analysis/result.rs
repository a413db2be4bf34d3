//! What the analysis of one frame produces: the frame's measures, each
//! object's measures, and why a readable frame could not be analyzed.
//!
//! Plain data, serialisable as it is shown in JSON. Computing it is
//! [`crate::analysis::segment`]'s; storing and judging it belong to others.

use serde::Serialize;

/// Everything measured on one frame.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FrameResult {
    /// Frame width in pixels.
    pub width: usize,
    /// Frame height in pixels.
    pub height: usize,
    /// Significant bits per sample of the frame: 8 or 16.
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
    /// Number of objects kept by the object filters (`objects.len()`).
    pub object_count: usize,
    /// Components the size limits (`min_area_px`, `max_area_px`, and the µm²
    /// limits when the pixel size is known) removed: nothing vanishes silently.
    pub size_filtered: usize,
    /// Share of the objects that look like several touching ones merged
    /// (low solidity, large area; see [`crate::analysis::measure::merged_fraction`]).
    pub merged_fraction: f64,
    /// Objects the threshold leaves out: components above [`Self::dim_level`]
    /// with no pixel above the threshold that the object filter would keep
    /// (see [`crate::analysis::dim_objects`]); 0 when there is no `dim_level`.
    pub dim_objects: usize,
    /// The level separating a second, dimmer population from the background
    /// below the threshold, when the background class holds one.
    pub dim_level: Option<f64>,
    /// Fraction of the frame covered by kept objects (after fill and filters).
    pub foreground_fraction: f64,
    /// Median raw intensity of the pixels the threshold calls background.
    pub background_level: f64,
    /// Fraction of raw pixels at the top of the bit depth (255 or 65535).
    pub saturation_fraction: f64,
    /// Sharpness of the raw frame, independent of its brightness: see
    /// [`crate::analysis::quality`] (the published measure it follows is named there).
    pub focus: f64,
    /// Relative brightness change of the fitted background field across the
    /// frame: (max - min) / mean of the fitted surface; 0 for a flat field.
    pub illumination_change: f64,
    /// Pixel size used for µm² areas, when known.
    pub pixel_size_um: Option<f64>,
    /// The kept objects, in label order.
    pub objects: Vec<ObjectMeasures>,
}

/// Measurements of one labelled object.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ObjectMeasures {
    /// 1-based, in raster order of each object's first pixel.
    pub label: u32,
    /// Object area in pixels, filled holes included when hole filling is on.
    pub area_px: u64,
    /// Area in µm² (`area_px` × pixel size²); `None` when the pixel size is unknown.
    pub area_um2: Option<f64>,
    /// Mean column of the object's pixels (px, 0-based, pixel centres at integers).
    pub centroid_x: f64,
    /// Mean row of the object's pixels (px, 0-based, pixel centres at integers).
    pub centroid_y: f64,
    /// `[x_min, y_min, x_max, y_max]`, max exclusive.
    pub bbox: [u32; 4],
    /// Mean raw intensity of the object's pixels on the segmented page (before any
    /// correction).
    pub mean_intensity: f64,
    /// Sum of the raw intensities of the object's pixels.
    pub integrated_intensity: f64,
    /// Highest raw intensity among the object's pixels.
    pub max_intensity: f64,
    /// Perimeter in pixels with the weights of `skimage.measure.perimeter`
    /// (4-neighbourhood): each border pixel counts 1, √2 or (1+√2)/2 by the shape
    /// of the border around it.
    pub perimeter_px: f64,
    /// 4πA/P² from `area_px` and `perimeter_px`: about 1 for a disc, lower for
    /// elongated or ragged shapes; 0 when the perimeter is 0. Not capped: objects
    /// of a few pixels can exceed 1.
    pub circularity: f64,
    /// Major axis length (px) of the ellipse with the object's second central
    /// moments: 4√λ₁, λ₁ the larger eigenvalue of the pixel coordinates' covariance.
    pub major_axis_px: f64,
    /// Minor axis length (px) of the same ellipse: 4√λ₂, λ₂ the smaller eigenvalue.
    pub minor_axis_px: f64,
    /// Eccentricity √(1 − λ₂/λ₁) of the same ellipse: 0 for a circle (and for a
    /// single pixel), 1 for a straight line one pixel wide.
    pub eccentricity: f64,
    /// Area / area of the convex hull (pixels whose centre is inside the
    /// hull), 1 for a convex object; as `skimage.measure.regionprops`'
    /// `solidity`. Low for objects with dents, such as touching nuclei.
    pub solidity: f64,
    /// The same intensity measures on each extra page listed in the config,
    /// in config order, measured inside this object.
    pub channels: Vec<ChannelIntensity>,
}

/// Intensity measures of one extra page inside one object.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ChannelIntensity {
    /// Page of the file these were measured on (0-based, as listed in
    /// `[measure] pages`).
    pub page: usize,
    /// Mean intensity of that page over the object's pixels.
    pub mean_intensity: f64,
    /// Sum of that page's intensities over the object's pixels.
    pub integrated_intensity: f64,
    /// Highest intensity of that page among the object's pixels.
    pub max_intensity: f64,
}

/// Why a frame could not be analyzed (the frame itself was readable).
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum AnalysisError {
    /// An extra page's size differs from the segmented page's.
    #[error("page {page} is {got_w}x{got_h} but the segmented page is {want_w}x{want_h}")]
    PageSize {
        /// The extra page (0-based).
        page: usize,
        /// Its width in pixels.
        got_w: usize,
        /// Its height in pixels.
        got_h: usize,
        /// The segmented page's width in pixels.
        want_w: usize,
        /// The segmented page's height in pixels.
        want_h: usize,
    },
    /// The flat-field correction could not be applied to the frame (its size differs
    /// from the flat frame's); the message says how.
    #[error("flat-field correction: {0}")]
    FlatField(String),
    /// More components than [`crate::analysis::SegmentParams::max_objects`]:
    /// the threshold found noise or a pattern, not countable objects.
    #[error("{found} components above the threshold, more than the limit of {limit} ([limits] max_objects): the threshold separates noise or a fine pattern, not countable objects; no objects are recorded for this frame")]
    TooManyObjects {
        /// Components found (at least; counting may stop early).
        found: usize,
        /// The limit.
        limit: usize,
    },
}
