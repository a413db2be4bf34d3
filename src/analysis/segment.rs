//! The pure per-frame analysis: `(frame pixels, parameters) -> FrameResult`.
//!
//! Correct, threshold, label (with hole filling), split touching objects when
//! asked, measure, and the frame's quality measures, in that order. No I/O, no clock, no global state;
//! decoding and the file are [`crate::pipeline`]'s.

use crate::analysis::params::{Background, Method, SegmentParams, Split};
use crate::analysis::result::{AnalysisError, FrameResult};
use crate::analysis::{correct, dim_objects, label, measure, quality, split, threshold};
use crate::frame::Frame;

/// Runs the whole per-frame analysis: correct, threshold, fill, label, split
/// (when [`SegmentParams::split`] asks), measure, and the frame's quality
/// measures.
///
/// `extra_pages` are `(page number, frame)` pairs whose intensities are measured
/// inside the objects; `pixel_size_um` enables µm² areas and filters.
///
/// ```
/// use framewarden::{frame::Frame, analysis::{analyze_frame, ObjectFilter, SegmentParams}};
/// // Two bright squares on a dark background (x = column, y = row, 0-based),
/// // too small for the default size filter, so it is off here.
/// let keep_all = SegmentParams { filter: ObjectFilter::KEEP_ALL, ..SegmentParams::default() };
/// let f = Frame::from_rows_u8(&[
///     &[10, 10, 10, 10, 10, 10],
///     &[10, 200, 200, 10, 10, 10],
///     &[10, 200, 200, 10, 150, 10],
///     &[10, 10, 10, 10, 10, 10],
/// ]);
/// let r = analyze_frame(&f, &[], &keep_all, None).unwrap();
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
    params: &SegmentParams,
    pixel_size_um: Option<f64>,
) -> Result<FrameResult, AnalysisError> {
    run(frame, extra_pages, params, pixel_size_um, false).map(|(result, _)| result)
}

/// A frame's analysis with its label image.
#[derive(Debug, Clone, PartialEq)]
pub struct Segmented {
    /// The same result as [`analyze_frame`]'s.
    pub result: FrameResult,
    /// One value per pixel, row by row: the label of the object the pixel
    /// belongs to (as in `result.objects`), 0 for background.
    pub labels: Vec<u32>,
}

/// [`analyze_frame`], and the label image of the objects it kept.
///
/// ```
/// use framewarden::{frame::Frame, analysis::{segment_frame, ObjectFilter, SegmentParams}};
/// let f = Frame::from_rows_u8(&[&[0, 9, 0, 9], &[0, 9, 0, 0]]);
/// let keep_all = SegmentParams { filter: ObjectFilter::KEEP_ALL, ..SegmentParams::default() };
/// let s = segment_frame(&f, &[], &keep_all, None).unwrap();
/// assert_eq!(s.labels, vec![0, 1, 0, 2, 0, 1, 0, 0]);
/// ```
///
/// # Errors
/// As [`analyze_frame`].
pub fn segment_frame(
    frame: &Frame,
    extra_pages: &[(usize, &Frame)],
    params: &SegmentParams,
    pixel_size_um: Option<f64>,
) -> Result<Segmented, AnalysisError> {
    run(frame, extra_pages, params, pixel_size_um, true).map(|(result, labels)| Segmented {
        result,
        labels: labels.unwrap_or_default(),
    })
}

fn run(
    frame: &Frame,
    extra_pages: &[(usize, &Frame)],
    params: &SegmentParams,
    pixel_size_um: Option<f64>,
    want_labels: bool,
) -> Result<(FrameResult, Option<Vec<u32>>), AnalysisError> {
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
    let corrected = correct_frame(frame, params)?;
    let segmented = corrected.as_ref().unwrap_or(frame);
    let raw_hist = threshold::Histogram::of(frame);
    let seg_hist = if corrected.is_some() {
        threshold::Histogram::of(segmented)
    } else {
        raw_hist.clone()
    };
    // Otsu's separability is reported whatever the method.
    let (otsu_level, separability) = threshold::otsu_split(&seg_hist);
    let t = match &params.method {
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
        params.connectivity,
        params.fill_holes,
    );
    let too_many = |found: usize| AnalysisError::TooManyObjects {
        found,
        limit: params.max_objects,
    };
    if components.count > params.max_objects {
        return Err(too_many(components.count));
    }
    let components = match params.split {
        Split::None => components,
        Split::Distance {
            min_depth_px,
            min_separation_px,
        } => split::split(
            components,
            frame.width,
            frame.height,
            params.connectivity,
            min_depth_px,
            min_separation_px,
        ),
    };
    if components.count > params.max_objects {
        return Err(too_many(components.count));
    }
    let measure::Measured {
        objects,
        size_filtered,
        component_labels,
    } = measure::measure(
        frame,
        extra_pages,
        &components,
        &params.filter,
        pixel_size_um,
    );
    let labels = want_labels
        .then(|| components.label_image(frame.width, frame.height, |k| component_labels[k] != 0));
    let q = quality::assess(frame, &raw_hist, corrected.as_ref(), t);
    let dim = dim_objects::dim_objects(
        &segmented.pixels,
        frame.width,
        frame.height,
        &seg_hist,
        t,
        params.connectivity,
        &params.filter,
        pixel_size_um,
    );
    let kept_area: u64 = objects.iter().map(|o| o.area_px).sum();
    let result = FrameResult {
        width: frame.width,
        height: frame.height,
        bit_depth: frame.bit_depth,
        method: params.method.name().to_string(),
        threshold: f64::from(t),
        separability,
        bimodality: threshold::bimodality(&seg_hist),
        object_count: objects.len(),
        size_filtered,
        merged_fraction: measure::merged_fraction(&objects),
        dim_objects: dim.map_or(0, |d| d.count),
        dim_level: dim.map(|d| f64::from(d.level)),
        foreground_fraction: kept_area as f64 / frame.len().max(1) as f64,
        background_level: q.background_level,
        saturation_fraction: q.saturation_fraction,
        focus: q.focus,
        illumination_change: q.illumination_change,
        pixel_size_um,
        objects,
    };
    Ok((result, labels))
}

/// Flat-field, then smoothing, then rolling-ball; `None` when nothing applies.
fn correct_frame(frame: &Frame, params: &SegmentParams) -> Result<Option<Frame>, AnalysisError> {
    let mut current: Option<Frame> = None;
    if let Background::FlatField(ff) = &params.background {
        current = Some(ff.apply(frame).map_err(AnalysisError::FlatField)?);
    }
    if params.smooth_sigma_px > 0.0 {
        current = Some(correct::gaussian(
            current.as_ref().unwrap_or(frame),
            params.smooth_sigma_px,
        ));
    }
    if let Background::RollingBall { radius_px } = params.background {
        current = Some(correct::rolling_ball(
            current.as_ref().unwrap_or(frame),
            radius_px,
        ));
    }
    Ok(current)
}
