//! Quality control of a run: per-frame flags with their evidence, drift charts
//! over the night, alert episodes and the sinks that deliver them.
//!
//! The judging parts ([`flags`], [`drift`], [`alerts`], [`monitor`]) are pure and
//! clock-free; storing lives in [`record`], delivering in [`sinks`].

pub mod alerts;
pub mod config;
pub mod drift;
pub mod flags;
pub mod monitor;
pub mod record;
pub mod remedy;
pub mod report;
pub mod sinks;
