//! One analysis thread: takes a complete file version from the queue, runs the
//! pipeline on it (a panic is contained and recorded as a failure), and sends
//! the outcome to the store, or back to the scheduler when the file read short
//! or changed while it was read.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use crossbeam_channel::{Receiver, Sender};

use crate::encode::LabelRuns;
use crate::pipeline::{
    analyze_file, analyze_file_with_labels, FileAnalysis, FileError, PipelineParams,
};
use crate::store::writer::StoreOp;
use crate::store::FrameKey;
use crate::text::{shown, shown_path, Repeats};
use crate::watch::scheduler::SchedMsg;
use crate::watch::{Job, Progress};

/// A file that a worker read short (or saw change) and that should be looked at again.
fn retry_or_fail(job: &Job, limit: u32, reason: String) -> Next {
    let attempts = job.attempts + 1;
    if attempts <= limit {
        Next::Retry(SchedMsg::Retry {
            path: job.path.clone(),
            previous: job.key.clone(),
            attempts,
            detected_at_ms: job.detected_at_ms,
        })
    } else {
        Next::Record(StoreOp::Failed {
            key: job.key.clone(),
            attempts,
            reason: format!("still incomplete after {attempts} attempts: {reason}"),
        })
    }
}

/// Where a job goes after a worker is done with it.
enum Next {
    Retry(SchedMsg),
    Record(StoreOp),
}

pub(crate) struct Worker {
    pub(crate) pipeline: Arc<PipelineParams>,
    /// Whether each frame's label image is made (kept or not after its flags).
    pub(crate) label_images: bool,
    pub(crate) retry_limit: u32,
    pub(crate) work_rx: Receiver<Job>,
    pub(crate) store_tx: Sender<StoreOp>,
    pub(crate) sched_tx: Sender<SchedMsg>,
    pub(crate) stopping: Arc<AtomicBool>,
    pub(crate) progress: Arc<Progress>,
    /// This worker's repeated errors, limited.
    pub(crate) repeats: Repeats,
}

impl Worker {
    pub(crate) fn run(self) {
        while let Ok(job) = self.work_rx.recv() {
            if self.stopping.load(Ordering::SeqCst) {
                // Released: the row stays queued; the next start redoes it.
                break;
            }
            self.mark_in_hand(&job.key);
            let outcome = catch_unwind(AssertUnwindSafe(|| self.analyze(&job.path)));
            let unchanged = FrameKey::of(&job.path).is_ok_and(|k| k == job.key);
            let limit = self.retry_limit;
            let next = match outcome {
                Ok(Ok(_)) | Ok(Err(_)) if !unchanged => {
                    retry_or_fail(&job, limit, "the file changed while it was read".into())
                }
                Ok(Ok((analysis, label_image))) => {
                    // The frame's log line is written once its row commits (qc::record).
                    self.progress.done.fetch_add(1, Ordering::Relaxed);
                    Next::Record(StoreOp::Done {
                        key: job.key.clone(),
                        attempts: job.attempts + 1,
                        analysis: Box::new(analysis),
                        label_image,
                    })
                }
                Ok(Err(e)) if e.is_incomplete() => {
                    retry_or_fail(&job, limit, without_path(&e.to_string(), &job.key.path))
                }
                Ok(Err(e)) => Next::Record(StoreOp::Failed {
                    key: job.key.clone(),
                    attempts: job.attempts + 1,
                    reason: without_path(&e.to_string(), &job.key.path),
                }),
                Err(panic) => {
                    let what = panic
                        .downcast_ref::<&str>()
                        .map(|s| (*s).to_string())
                        .or_else(|| panic.downcast_ref::<String>().cloned())
                        .unwrap_or_default();
                    Next::Record(StoreOp::Failed {
                        key: job.key.clone(),
                        attempts: job.attempts + 1,
                        reason: format!("the analysis crashed on this file: {what}"),
                    })
                }
            };
            match next {
                Next::Retry(retry) => {
                    let _ = self.store_tx.send(StoreOp::Released {
                        key: job.key.clone(),
                    });
                    tracing::debug!(
                        "{} not complete yet; will look again",
                        shown_path(&job.path)
                    );
                    let _ = self.sched_tx.send(retry);
                }
                Next::Record(op) => {
                    if let StoreOp::Failed { reason, .. } = &op {
                        tracing::warn!(file = %shown_path(&job.path), "failed: {}", shown(reason));
                        self.progress.failed.fetch_add(1, Ordering::Relaxed);
                    }
                    if self.store_tx.send(op).is_err() {
                        self.repeats.error(
                            "store writer stopped",
                            format_args!(
                                "the store writer has stopped; {} not recorded",
                                shown_path(&job.path)
                            ),
                        );
                    }
                }
            }
            self.progress.finished.fetch_add(1, Ordering::Relaxed);
        }
    }

    /// The file's analysis and, when label images are on, the label image of
    /// its count used (the recount's where there is one) as runs (encoded later, only if kept). Labels that do not
    /// fit the frame are logged and left out; the frame is still recorded.
    fn analyze(&self, path: &Path) -> Result<(FileAnalysis, Option<LabelRuns>), FileError> {
        if !self.label_images {
            return analyze_file(path, &self.pipeline).map(|a| (a, None));
        }
        let (analysis, labels) = analyze_file_with_labels(path, &self.pipeline)?;
        let r = &analysis.result;
        let image = LabelRuns::new(r.width, r.height, &labels)
            .map_err(|e| {
                self.repeats.error(
                    "no label image",
                    format_args!("{}: no label image: {e}", shown_path(path)),
                );
            })
            .ok();
        Ok((analysis, image))
    }
}

impl Worker {
    /// Records that this frame is being analyzed, and waits until that is
    /// committed: a file that takes the whole process down at once is still
    /// counted against, so it cannot stop the run by being retried at every
    /// restart. Frames that only wait in the queue are never counted.
    fn mark_in_hand(&self, key: &FrameKey) {
        let (committed, on_commit) = crossbeam_channel::bounded(1);
        let op = StoreOp::InHand {
            key: key.clone(),
            committed,
        };
        if self.store_tx.send(op).is_ok() {
            // An error means the writer gave the batch up or stopped: the
            // analysis goes on, its outcome is recorded as usual.
            let _ = on_commit.recv();
        }
    }
}

/// The row already names the file: drop a leading "<path>: " from a message.
fn without_path(message: &str, path: &str) -> String {
    message
        .strip_prefix(path)
        .and_then(|m| m.strip_prefix(": "))
        .unwrap_or(message)
        .to_string()
}
