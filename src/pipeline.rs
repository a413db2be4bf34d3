//! One file in, one result out: decode the configured pages, settle the pixel
//! size, run the pure analysis. Used by `analyze`, the watch service and the
//! benches alike.

use std::path::Path;

use crate::analysis::{analyze_frame, AnalysisError, FrameResult};
use crate::decode::{self, DecodeError, PixelSizeSource};
use crate::settings::{CalibrationPreference, Settings};

/// A file's analysis with where its calibration came from.
#[derive(Debug, Clone)]
pub struct FileAnalysis {
    pub result: FrameResult,
    /// The frame segmented again after flattening its background, when it was
    /// flagged for uneven illumination and `[quality] on_uneven_illumination =
    /// "flatten"` (see [`crate::qc::remedy`]).
    pub flattened: Option<FrameResult>,
    pub pixel_size_source: Option<PixelSizeSource>,
}

/// Why a file produced no result. The message names the file.
#[derive(Debug, thiserror::Error)]
pub enum FileError {
    #[error(transparent)]
    Decode(#[from] DecodeError),
    #[error("{path}: {source}")]
    Analysis { path: String, source: AnalysisError },
}

impl FileError {
    /// True when the file looks incomplete (still being written).
    pub fn is_incomplete(&self) -> bool {
        matches!(self, FileError::Decode(e) if e.is_incomplete())
    }
}

/// Decodes and analyses one file.
///
/// # Errors
/// [`FileError`] naming the file and the cause.
pub fn analyze_file(path: &Path, settings: &Settings) -> Result<FileAnalysis, FileError> {
    let seg = &settings.segment;
    let pages: Vec<usize> = std::iter::once(seg.page)
        .chain(seg.measure_pages.iter().copied())
        .collect();
    let decoded = decode::read_pages(path, &pages, &settings.limits)?;
    let calibration = &settings.calibration;
    let configured = (calibration.pixel_size_um > 0.0)
        .then_some((calibration.pixel_size_um, PixelSizeSource::Config));
    let pixel_size = match calibration.prefer {
        CalibrationPreference::Config => configured,
        CalibrationPreference::File => decoded.pixel_size.or(configured),
    };
    let extra: Vec<(usize, &crate::frame::Frame)> = seg
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
    let result =
        analyze_frame(&decoded.frames[0], &extra, seg, pixel_size_um).map_err(analysis_error)?;
    let flattened = crate::qc::remedy::flattened(
        &decoded.frames[0],
        &extra,
        seg,
        &settings.quality,
        &result,
        pixel_size_um,
    )
    .map_err(analysis_error)?;
    Ok(FileAnalysis {
        result,
        flattened,
        pixel_size_source: pixel_size.map(|p| p.1),
    })
}
