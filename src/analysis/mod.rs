//! The pure analysis core: `(frame pixels, settings) -> FrameResult`.
//!
//! No I/O, no clock, no global state. Decoding lives in [`crate::decode`], the
//! file-level glue in [`crate::pipeline`]. The daemon, `analyze` and the benches
//! all call [`analyze_frame`].

pub mod correct;
pub mod label;
pub mod measure;
pub mod quality;
mod simd;
pub mod threshold;

use serde::Serialize;

use crate::frame::Frame;
use crate::settings::{Background, Method, SegmentSettings};

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
    /// (5/9 for a flat histogram, higher for two modes); see [`threshold::bimodality`].
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

/// Intensity measures of one object on one page.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Intensity {
    pub mean: f64,
    pub integrated: f64,
    pub max: f64,
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

/// Why a frame could not be analysed (the frame itself was readable).
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

/// Runs the whole per-frame analysis: correct, threshold, fill, label, measure,
/// and the frame's quality measures.
///
/// `extra_pages` are `(page number, frame)` pairs whose intensities are measured
/// inside the objects; `pixel_size_um` enables µm² areas and filters.
///
/// ```
/// use framewarden::{frame::Frame, analysis::analyze_frame, settings::SegmentSettings};
/// // Two bright squares on a dark background (x = column, y = row, 0-based).
/// let f = Frame::from_rows_u8(&[
///     &[10, 10, 10, 10, 10, 10],
///     &[10, 200, 200, 10, 10, 10],
///     &[10, 200, 200, 10, 150, 10],
///     &[10, 10, 10, 10, 10, 10],
/// ]);
/// let r = analyze_frame(&f, &[], &SegmentSettings::default(), None).unwrap();
/// assert_eq!(r.threshold, 10.0); // Otsu; foreground is pixel > 10
/// assert_eq!(r.object_count, 2);
/// assert_eq!((r.objects[0].centroid_x, r.objects[0].centroid_y), (1.5, 1.5));
/// ```
///
/// # Errors
/// [`AnalysisError`] when an extra page or the flat-field frames do not match
/// the frame's size.
pub fn analyze_frame(
    frame: &Frame,
    extra_pages: &[(usize, &Frame)],
    settings: &SegmentSettings,
    pixel_size_um: Option<f64>,
) -> Result<FrameResult, AnalysisError> {
    for &(page, f) in extra_pages {
        if (f.width, f.height) != (frame.width, frame.height) {
            return Err(AnalysisError::PageSize {
                page,
                got_w: f.width,
                got_h: f.height,
                want_w: frame.width,
                want_h: frame.height,
            });
        }
    }
    let corrected = correct_frame(frame, settings)?;
    let segmented = corrected.as_ref().unwrap_or(frame);
    let raw_hist = threshold::Histogram::of(frame);
    let seg_hist = if corrected.is_some() {
        threshold::Histogram::of(segmented)
    } else {
        raw_hist.clone()
    };
    // Otsu's separability is reported whatever the method.
    let (otsu_level, separability) = threshold::otsu_split(&seg_hist);
    let t = match &settings.method {
        Method::Otsu => otsu_level,
        Method::Triangle => threshold::triangle(&seg_hist),
        Method::Li => threshold::li(&seg_hist),
        Method::MultiOtsu { classes, boundary } => {
            threshold::multi_otsu(&seg_hist, *classes)[boundary - 1]
        }
        Method::Fixed(level) => *level,
    };
    let components = label::label(
        &segmented.pixels,
        frame.width,
        frame.height,
        t,
        settings.connectivity,
        settings.fill_holes,
    );
    let filter = measure::ObjectFilter {
        min_area_px: settings.min_area_px,
        max_area_px: settings.max_area_px,
        min_area_um2: settings.min_area_um2,
        max_area_um2: settings.max_area_um2,
        exclude_border: settings.exclude_border,
    };
    let objects = measure::measure(frame, extra_pages, &components, &filter, pixel_size_um);
    let q = quality::assess(frame, &raw_hist, corrected.as_ref(), t);
    let kept_area: u64 = objects.iter().map(|o| o.area_px).sum();
    Ok(FrameResult {
        width: frame.width,
        height: frame.height,
        bit_depth: frame.bit_depth,
        method: settings.method.name().to_string(),
        threshold: f64::from(t),
        separability,
        bimodality: threshold::bimodality(&seg_hist),
        object_count: objects.len(),
        foreground_fraction: kept_area as f64 / frame.len().max(1) as f64,
        background_level: q.background_level,
        saturation_fraction: q.saturation_fraction,
        focus: q.focus,
        illumination_change: q.illumination_change,
        pixel_size_um,
        objects,
    })
}

/// Flat-field, then smoothing, then rolling-ball; `None` when nothing applies.
fn correct_frame(
    frame: &Frame,
    settings: &SegmentSettings,
) -> Result<Option<Frame>, AnalysisError> {
    let mut current: Option<Frame> = None;
    if let Background::FlatField(ff) = &settings.background {
        current = Some(ff.apply(frame).map_err(AnalysisError::FlatField)?);
    }
    if settings.smooth_sigma_px > 0.0 {
        current = Some(correct::gaussian(
            current.as_ref().unwrap_or(frame),
            settings.smooth_sigma_px,
        ));
    }
    if let Background::RollingBall { radius_px } = settings.background {
        current = Some(correct::rolling_ball(
            current.as_ref().unwrap_or(frame),
            radius_px,
        ));
    }
    Ok(current)
}
