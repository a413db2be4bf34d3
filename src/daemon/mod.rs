//! The daemon: the watch service wired from the layers below it, and the
//! process around it.
//!
//! Files from the bottom up: `worker` (one analysis thread), [`service`]
//! (watcher, scheduler, workers, writer and quality control started and
//! stopped in order) and [`process`] (signals, systemd readiness, the
//! watchdog). No file imports one above it.

pub mod process;
pub mod service;
mod worker;

pub use service::{Service, WatchError, WatchOptions, WatchSummary};
