//! The remedy for uneven illumination: a frame whose fitted background changes
//! too much across the field is segmented a second time after subtracting a
//! rolling-ball background (Sternberg 1983), and both results are kept.
//!
//! Pure: pixels and parameters in, a second result out. Deciding which count is
//! used, and saying so in the frame's flags, is left to the callers.

use crate::analysis::params::{Background, SegmentParams};
use crate::analysis::quality::is_uneven;
use crate::analysis::result::{AnalysisError, FrameResult};
use crate::analysis::segment::analyze_frame;
use crate::frame::Frame;

/// When and how to recount: frames whose illumination change is beyond
/// `max_illumination_change` are segmented again after subtracting a
/// rolling-ball background of `radius_px`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Recount {
    /// The uneven-illumination limit (the same as the frame flag's).
    pub max_illumination_change: f64,
    /// Rolling-ball radius in pixels.
    pub radius_px: f64,
}

impl Recount {
    /// The recounted second result, when `first` is unevenly lit and the
    /// segmentation did not already subtract a rolling-ball background.
    ///
    /// # Errors
    /// The engine's [`AnalysisError`] (the same inputs as the first analysis).
    pub fn run(
        &self,
        frame: &Frame,
        extra_pages: &[(usize, &Frame)],
        params: &SegmentParams,
        first: &FrameResult,
        pixel_size_um: Option<f64>,
    ) -> Result<Option<FrameResult>, AnalysisError> {
        if !is_uneven(first.illumination_change, self.max_illumination_change)
            || matches!(params.background, Background::RollingBall { .. })
        {
            return Ok(None);
        }
        let flattened = SegmentParams {
            background: Background::RollingBall {
                radius_px: self.radius_px,
            },
            ..params.clone()
        };
        analyze_frame(frame, extra_pages, &flattened, pixel_size_um).map(Some)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::synth::{self, SceneSpec};

    const RECOUNT: Recount = Recount {
        max_illumination_change: 0.25,
        radius_px: 30.0,
    };

    #[test]
    fn a_steep_gradient_is_recounted_and_counts_better() {
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
        // Every component counts: the remedy, not the size filter, must fix it.
        let params = SegmentParams {
            filter: crate::analysis::ObjectFilter::KEEP_ALL,
            ..SegmentParams::default()
        };
        let first = analyze_frame(&scene.frame, &[], &params, None).unwrap();
        assert!(
            first.illumination_change > 0.25,
            "{}",
            first.illumination_change
        );
        let second = RECOUNT
            .run(&scene.frame, &[], &params, &first, None)
            .unwrap()
            .expect("unevenly lit, so recounted");
        let truth = scene.object_count() as i64;
        let error = |r: &FrameResult| (r.object_count as i64 - truth).abs();
        assert!(
            error(&second) < error(&first),
            "truth {truth}: first {}, recount {}",
            first.object_count,
            second.object_count
        );
    }

    #[test]
    fn even_frames_and_rolling_ball_segmentations_get_no_second_result() {
        let scene = synth::generate(&SceneSpec {
            width: 128,
            height: 128,
            object_count: 8,
            radius_px: (4.0, 7.0),
            ..SceneSpec::default()
        })
        .unwrap();
        let params = SegmentParams::default();
        let first = analyze_frame(&scene.frame, &[], &params, None).unwrap();
        assert_eq!(
            RECOUNT
                .run(&scene.frame, &[], &params, &first, None)
                .unwrap(),
            None
        );
        let uneven = FrameResult {
            illumination_change: 0.9,
            ..first
        };
        let rolling = SegmentParams {
            background: Background::RollingBall { radius_px: 20.0 },
            ..params
        };
        assert_eq!(
            RECOUNT
                .run(&scene.frame, &[], &rolling, &uneven, None)
                .unwrap(),
            None
        );
    }
}
