//! The pure analysis core: `(frame pixels, parameters) -> FrameResult`.
//!
//! No I/O, no clock, no global state. Decoding lives in [`crate::decode`], the
//! file-level glue in [`crate::pipeline`]. The daemon, `analyze` and the benches
//! all call [`analyze_frame`].
//!
//! Files from the bottom up: [`params`] (the core's own parameter types),
//! [`result`], [`threshold`], [`correct`], [`label`], [`distance`] (the
//! Euclidean distance transform), [`split`] (touching objects cut apart),
//! [`measure`], [`dim_objects`] (objects a threshold leaves out), [`quality`], [`segment`] (the whole frame) and [`recount`]
//! (the second segmentation of an unevenly lit frame). No file imports one above it.

pub mod correct;
pub mod dim_objects;
pub mod distance;
pub mod label;
pub mod measure;
pub mod params;
pub mod quality;
pub mod recount;
pub mod result;
pub mod segment;
mod simd;
pub mod split;
pub mod threshold;

pub use params::{Background, Connectivity, Method, ObjectFilter, SegmentParams, Split};
pub use recount::Recount;
pub use result::{AnalysisError, ChannelIntensity, FrameResult, ObjectMeasures};
pub use segment::{analyze_frame, segment_frame, Segmented};
