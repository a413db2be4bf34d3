//! The remedy for uneven illumination: a frame flagged for it is segmented a
//! second time after subtracting a rolling-ball background (Sternberg 1983), and
//! both results are kept.
//!
//! Pure: pixels and settings in, a second result out. Deciding where the count
//! comes from and storing both is [`crate::qc::record`]'s; the first analysis is
//! the engine's as usual.

use crate::analysis::{analyze_frame, AnalysisError, FrameResult};
use crate::frame::Frame;
use crate::qc::config::{QualitySettings, UnevenRemedy};
use crate::qc::flags::{is_uneven, num, FlagKind, FrameFlag};
use crate::settings::{Background, SegmentSettings};

/// The flattened second result, when the remedy is on, the first result is
/// flagged for uneven illumination and the segmentation did not already
/// subtract a rolling-ball background.
///
/// # Errors
/// The engine's [`AnalysisError`] (the same inputs as the first analysis).
pub fn flattened(
    frame: &Frame,
    extra_pages: &[(usize, &Frame)],
    segment: &SegmentSettings,
    quality: &QualitySettings,
    first: &FrameResult,
    pixel_size_um: Option<f64>,
) -> Result<Option<FrameResult>, AnalysisError> {
    let UnevenRemedy::Flatten { radius_px } = quality.on_uneven_illumination else {
        return Ok(None);
    };
    if !is_uneven(first.illumination_change, &quality.flags)
        || matches!(segment.background, Background::RollingBall { .. })
    {
        return Ok(None);
    }
    let flat = SegmentSettings {
        background: Background::RollingBall { radius_px },
        ..segment.clone()
    };
    analyze_frame(frame, extra_pages, &flat, pixel_size_um).map(Some)
}

/// Adds the flattened recount to the uneven-illumination flag's sentence, so
/// whoever reads the flag learns both counts and which one is used.
pub fn explain_recount(flags: &mut [FrameFlag], first: &FrameResult, flat: &FrameResult) {
    for f in flags
        .iter_mut()
        .filter(|f| f.kind == FlagKind::UnevenIllumination)
    {
        f.message.push_str(&format!(
            "; segmented again after flattening the background: {} objects (threshold {}) against {} without; the count is taken from the flattened result",
            flat.object_count,
            num(flat.threshold),
            first.object_count
        ));
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::qc::config::QualitySettings;
    use crate::synth::{self, SceneSpec};

    fn flatten_on() -> QualitySettings {
        QualitySettings {
            on_uneven_illumination: UnevenRemedy::Flatten { radius_px: 30.0 },
            ..QualitySettings::default()
        }
    }

    #[test]
    fn a_steep_gradient_is_flattened_and_counts_better() {
        // Dim objects on a background that doubles across the field: a global
        // threshold merges the bright side of the background with the objects.
        let spec = SceneSpec {
            width: 256,
            height: 256,
            object_count: 20,
            radius_px: (4.0, 7.0),
            object_level: 0.25,
            gradient: 0.9,
            ..SceneSpec::default()
        };
        let scene = synth::generate(&spec).unwrap();
        let seg = SegmentSettings::default();
        let first = analyze_frame(&scene.frame, &[], &seg, None).unwrap();
        assert!(
            first.illumination_change > 0.25,
            "{}",
            first.illumination_change
        );
        let second = flattened(&scene.frame, &[], &seg, &flatten_on(), &first, None)
            .unwrap()
            .expect("flagged, so flattened");
        let truth = scene.object_count() as i64;
        let error = |r: &FrameResult| (r.object_count as i64 - truth).abs();
        assert!(
            error(&second) < error(&first),
            "truth {truth}: first {}, flattened {}",
            first.object_count,
            second.object_count
        );
    }

    #[test]
    fn even_frames_and_the_keep_setting_get_no_second_result() {
        let scene = synth::generate(&SceneSpec {
            width: 128,
            height: 128,
            object_count: 8,
            radius_px: (4.0, 7.0),
            ..SceneSpec::default()
        })
        .unwrap();
        let seg = SegmentSettings::default();
        let first = analyze_frame(&scene.frame, &[], &seg, None).unwrap();
        let none = flattened(&scene.frame, &[], &seg, &flatten_on(), &first, None).unwrap();
        assert_eq!(none, None);
        let uneven = FrameResult {
            illumination_change: 0.9,
            ..first
        };
        let keep = QualitySettings::default();
        assert_eq!(
            flattened(&scene.frame, &[], &seg, &keep, &uneven, None).unwrap(),
            None
        );
    }
}
