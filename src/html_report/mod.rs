//! `framewarden report`: one self-contained HTML page of a run for the
//! morning: the run's numbers, every position's count over time (laid out as
//! the plate when file names give wells), the drift charts with their alert
//! episodes, the alert timeline, and each flagged frame's picture with its
//! objects' outlines beside a good frame of the same position.
//!
//! `thumbs` (pictures and outlines) is the bottom, then `data` (reading the
//! store, replaying the charts), `plots` (SVG) and `page` (the HTML).

pub mod data;
pub mod page;
pub mod plots;
pub mod thumbs;

pub use page::{render, write, ReportError, Written};
