//! The remedy for uneven illumination: a frame whose fitted background changes
//! too much across the field is segmented a second time after subtracting a
//! rolling-ball background (Sternberg 1983), and both results are kept.
//!
//! Pure: a first result and its parameters in, the second segmentation's
//! parameters out (or none). Running it ([`crate::pipeline`]), deciding which
//! count is used and saying so in the frame's flags are left to the callers.

use crate::analysis::params::{Background, SegmentParams};
use crate::analysis::quality::is_uneven;
use crate::analysis::result::FrameResult;

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
    /// The parameters of the second segmentation, when `first` is unevenly lit
    /// and `params` did not already subtract a rolling-ball background: the
    /// same parameters with a rolling-ball background of `radius_px`.
    pub fn flattened(&self, params: &SegmentParams, first: &FrameResult) -> Option<SegmentParams> {
        if !is_uneven(first.illumination_change, self.max_illumination_change)
            || matches!(params.background, Background::RollingBall { .. })
        {
            return None;
        }
        Some(SegmentParams {
            background: Background::RollingBall {
                radius_px: self.radius_px,
            },
            ..params.clone()
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analysis::analyze_frame;
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
        let flat = RECOUNT
            .flattened(&params, &first)
            .expect("unevenly lit, so recounted");
        let second = analyze_frame(&scene.frame, &[], &flat, None).unwrap();
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
        assert_eq!(RECOUNT.flattened(&params, &first), None);
        let uneven = FrameResult {
            illumination_change: 0.9,
            ..first
        };
        let rolling = SegmentParams {
            background: Background::RollingBall { radius_px: 20.0 },
            ..params.clone()
        };
        assert_eq!(RECOUNT.flattened(&rolling, &uneven), None);
        assert_eq!(
            RECOUNT.flattened(&params, &uneven).map(|p| p.background),
            Some(Background::RollingBall { radius_px: 30.0 })
        );
    }
}
