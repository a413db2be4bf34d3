//! Watching folders: from "something happened to this path" to "this exact
//! version of this file is completely written: analyze it".
//!
//! Files from the bottom up: [`params`] (the service's own settings),
//! [`queue`] (what goes to the workers), [`scheduler`] (the readiness rule,
//! the pending map and the catch-up scanner) and [`watcher`] (the source of
//! events). Analyzing, recording and stopping are the daemon's
//! ([`crate::daemon`]). No file imports one above it.

pub mod params;
pub mod queue;
pub mod scheduler;
pub mod watcher;

pub use params::{default_workers, BadPattern, PathFilter, WatchMode, WatchSettings};
pub use queue::{Job, Progress};
