//! One file in, one result out: decode the configured pages, settle the pixel
//! size, run the pure analysis (and the recount of an unevenly lit frame).
//! Used by `analyze`, the watch service and the benches alike.
//!
//! What is left to others: choosing the files (the watcher, `analyze`),
//! judging and storing the result (quality control, the store).

use std::path::Path;

use serde::Deserialize;

use crate::analysis::{segment_frame, AnalysisError, FrameResult, Recount, SegmentParams};
use crate::decode::{self, DecodeError, DecodeLimits, PixelSizeSource};
use crate::frame::Frame;

/// Which source wins for the pixel size.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize, serde::Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum CalibrationPreference {
    /// File metadata first (OME-XML, then resolution tags), config as fallback.
    File,
    /// The configured size always.
    Config,
}

/// The configured pixel size and which source wins.
#[derive(Debug, Clone, PartialEq)]
pub struct Calibration {
    /// Pixel size in µm; 0 = none configured.
    pub pixel_size_um: f64,
    /// Whether the file's own pixel size wins over the configured one.
    pub prefer: CalibrationPreference,
}

impl Default for Calibration {
    fn default() -> Self {
        Calibration {
            pixel_size_um: 0.0,
            prefer: CalibrationPreference::File,
        }
    }
}

/// Everything [`analyze_file`] needs.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct PipelineParams {
    /// Segmentation and measurement.
    pub segment: SegmentParams,
    /// The pixel size for µm² measures.
    pub calibration: Calibration,
    /// Caps checked before decoding allocates.
    pub limits: DecodeLimits,
    /// Segment unevenly lit frames a second time after flattening; `None` = off.
    pub recount: Option<Recount>,
}

/// A file's analysis with where its calibration came from.
#[derive(Debug, Clone)]
pub struct FileAnalysis {
    /// The segmentation as configured.
    pub result: FrameResult,
    /// The frame segmented again after flattening its background, when it
    /// was unevenly lit and the recount is on (see [`crate::analysis::recount`]).
    pub recount: Option<FrameResult>,
    /// Where the pixel size came from, when there is one.
    pub pixel_size_source: Option<PixelSizeSource>,
    /// [`crate::frame::content_hash`] of the pages analyzed: a re-saved file
    /// with the same pixels has the same hash.
    pub pixel_hash: u64,
}

impl FileAnalysis {
    /// The count used: the recount's where there is one, else the first result's.
    pub fn count_used(&self) -> usize {
        self.recount.as_ref().unwrap_or(&self.result).object_count
    }
}

/// Why a file produced no result. The message names the file.
#[derive(Debug, thiserror::Error)]
pub enum FileError {
    /// The file could not be read.
    #[error(transparent)]
    Decode(#[from] DecodeError),
    /// The file was read but its pages could not be analyzed together.
    #[error("{path}: {source}")]
    Analysis {
        /// The file.
        path: String,
        /// The cause.
        source: AnalysisError,
    },
}

impl FileError {
    /// True when the file looks incomplete (still being written).
    pub fn is_incomplete(&self) -> bool {
        matches!(self, FileError::Decode(e) if e.is_incomplete())
    }
}

/// Decodes and analyzes one file.
///
/// # Errors
/// [`FileError`] naming the file and the cause.
pub fn analyze_file(path: &Path, params: &PipelineParams) -> Result<FileAnalysis, FileError> {
    run(path, params, false).map(|(analysis, _)| analysis)
}

/// [`analyze_file`], and the label image of the result whose count is used
/// ([`FileAnalysis::count_used`]): the recount's where there is one, else the
/// first result's. One value per pixel, row by row: the object's label as in
/// that result's `objects`, 0 for background.
///
/// # Errors
/// As [`analyze_file`].
pub fn analyze_file_with_labels(
    path: &Path,
    params: &PipelineParams,
) -> Result<(FileAnalysis, Vec<u32>), FileError> {
    run(path, params, true).map(|(analysis, labels)| (analysis, labels.unwrap_or_default()))
}

fn run(
    path: &Path,
    params: &PipelineParams,
    want_labels: bool,
) -> Result<(FileAnalysis, Option<Vec<u32>>), FileError> {
    let seg = &params.segment;
    let pages: Vec<usize> = std::iter::once(seg.page)
        .chain(seg.measure_pages.iter().copied())
        .collect();
    let decoded = decode::read_pages(path, &pages, &params.limits)?;
    let calibration = &params.calibration;
    let configured = (calibration.pixel_size_um > 0.0)
        .then_some((calibration.pixel_size_um, PixelSizeSource::Config));
    let pixel_size = match calibration.prefer {
        CalibrationPreference::Config => configured,
        CalibrationPreference::File => decoded.pixel_size.or(configured),
    };
    let extra: Vec<(usize, &Frame)> = seg
        .measure_pages
        .iter()
        .copied()
        .zip(decoded.frames.iter().skip(1))
        .collect();
    let analysis_error = |source| FileError::Analysis {
        path: path.display().to_string(),
        source,
    };
    let pixel_size_um = pixel_size.map(|p| p.0);
    let frame = &decoded.frames[0];
    let segment = |seg: &SegmentParams| {
        if want_labels {
            segment_frame(frame, &extra, seg, pixel_size_um).map(|s| (s.result, Some(s.labels)))
        } else {
            crate::analysis::analyze_frame(frame, &extra, seg, pixel_size_um).map(|r| (r, None))
        }
        .map_err(analysis_error)
    };
    let (result, first_labels) = segment(seg)?;
    let flattened = params
        .recount
        .as_ref()
        .and_then(|recount| recount.flattened(seg, &result));
    // The labels kept are those of the count used.
    let (recount, labels) = match flattened {
        Some(flat) => {
            let (second, labels) = segment(&flat)?;
            (Some(second), labels)
        }
        None => (None, first_labels),
    };
    let analysis = FileAnalysis {
        result,
        recount,
        pixel_size_source: pixel_size.map(|p| p.1),
        pixel_hash: crate::frame::content_hash(&decoded.frames),
    };
    Ok((analysis, labels))
}
