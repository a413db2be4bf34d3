//! What passes from the scheduler to the workers: one complete file version
//! (a [`Job`]) and the shared [`Progress`] counters.
//!
//! Deciding readiness is the scheduler's, analyzing the daemon's workers'.

use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};

use crate::store::FrameKey;

/// One complete file version for a worker.
#[derive(Debug)]
pub struct Job {
    /// The file as the watcher names it.
    pub path: PathBuf,
    /// The version judged complete.
    pub key: FrameKey,
    /// When the file was first seen.
    pub detected_at_ms: i64,
    /// Analysis attempts made before this one.
    pub attempts: u32,
}

/// Counters shared with the watchdog and the final summary.
#[derive(Debug, Default)]
pub struct Progress {
    /// Jobs handed to the queue.
    pub enqueued: AtomicU64,
    /// Jobs that left a worker (recorded, or sent back for another look).
    pub finished: AtomicU64,
    /// Frames analyzed this session.
    pub done: AtomicU64,
    /// Frames recorded as failed this session.
    pub failed: AtomicU64,
}

impl Progress {
    /// Jobs queued or being analyzed right now.
    pub fn outstanding(&self) -> u64 {
        self.enqueued
            .load(Ordering::Relaxed)
            .saturating_sub(self.finished.load(Ordering::Relaxed))
    }
}
