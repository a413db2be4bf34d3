//! framewarden: watches a microscope acquisition overnight, segments and
//! measures every frame, and keeps the results in one SQLite file.
//!
//! The analysis core ([`analysis`]) is pure; decoding ([`decode`]), the file
//! pipeline ([`pipeline`]) and the command line live at the edges.

pub mod analysis;
pub mod analyze;
pub mod decode;
pub mod demo;
pub mod frame;
pub mod pipeline;
pub mod qc;
pub mod service;
pub mod settings;
pub mod status;
pub mod store;
pub mod synth;
pub mod watch;
