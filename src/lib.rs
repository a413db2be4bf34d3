//! framewarden: watches a microscope acquisition overnight, segments and
//! measures every frame, and keeps the results in one SQLite file.
//!
//! The modules, from the bottom up; each imports only modules listed before it
//! (`tests/layers.rs` checks this, and that no file inside a module imports one
//! above it):
//!
//! | layer | modules |
//! |---|---|
//! | text from outside, made safe to show | [`text`] |
//! | pixels | [`frame`], [`synth`] |
//! | reading, writing and analysing one frame | [`decode`], [`encode`], [`analysis`] (pure) |
//! | one file | [`naming`], [`pipeline`] |
//! | recording | [`store`] (owns the observer trait quality control implements) |
//! | judging | [`qc`] |
//! | watching | [`watch`] |
//! | configuration | [`settings`] (builds every layer's parameters) |
//! | reading a run back | [`status`], [`export`], then [`html_report`] (which uses `status`) |
//! | commands | [`daemon`] (rewrites the report during a run), [`analyze`], [`reprocess`] (uses `analyze`'s pool), [`demo`] |

pub mod text;

pub mod frame;
pub mod synth;

pub mod analysis;
pub mod decode;
pub mod encode;

pub mod naming;
pub mod pipeline;

pub mod store;

pub mod qc;

pub mod watch;

pub mod settings;

pub mod status;

pub mod export;
pub mod html_report;

pub mod analyze;
pub mod daemon;
pub mod demo;
pub mod reprocess;
