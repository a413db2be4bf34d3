//! Quality control of a run: per-frame flags with their evidence, drift charts
//! over the night, alert episodes and the sinks that deliver them.
//!
//! Files from the bottom up: [`metrics`] (what is measured), [`params`] (limits
//! and defaults), [`flags`], [`drift`], [`alerts`], [`monitor`] (the run's
//! memory), [`sinks`] (delivery), [`recorder`] (the store's observer: storing
//! judgements in the writer's transaction) and [`report`] (reading them back).
//! The judging parts are pure and clock-free. No file imports one above it.

pub mod alerts;
pub mod drift;
pub mod flags;
pub mod metrics;
pub mod monitor;
pub mod params;
pub mod recorder;
pub mod report;
pub mod sinks;
