//! The source of file events: the operating system's (inotify on Linux) or a
//! poll watcher, both handing raw events to the scheduler without blocking.

use crossbeam_channel::Sender;
use notify::Watcher;

use crate::watch::params::{WatchMode, WatchSettings};
use crate::watch::scheduler::SchedMsg;

/// Why watching could not start.
#[derive(Debug, thiserror::Error)]
#[error("cannot watch {folder}: {source}")]
pub struct WatcherError {
    /// The folder (or `folders` when the watcher itself could not start).
    pub folder: String,
    /// The cause.
    pub source: notify::Error,
}

/// Starts watching `watch.folders` recursively; events go to `sched_tx`.
/// Falls back to polling when native events cannot be set up. Returns the
/// watcher (watching stops when it is dropped) and the mode in use.
///
/// # Errors
/// [`WatcherError`] when not even polling can start.
pub fn start_watcher(
    watch: &WatchSettings,
    sched_tx: &Sender<SchedMsg>,
) -> Result<(Box<dyn Watcher + Send>, &'static str), WatcherError> {
    let handler = |tx: Sender<SchedMsg>| {
        // Runs on notify's thread: never block, just hand over.
        move |res: notify::Result<notify::Event>| {
            let _ = tx.send(SchedMsg::Event(res));
        }
    };
    if watch.mode == WatchMode::Native {
        let native =
            notify::RecommendedWatcher::new(handler(sched_tx.clone()), notify::Config::default())
                .and_then(|mut w| {
                    for folder in &watch.folders {
                        w.watch(folder, notify::RecursiveMode::Recursive)?;
                    }
                    Ok(w)
                });
        match native {
            Ok(w) => return Ok((Box::new(w), "native")),
            Err(e) => tracing::warn!(
                "native file events unavailable ({e}); falling back to polling every {} ms",
                watch.poll_interval.as_millis()
            ),
        }
    }
    let config = notify::Config::default().with_poll_interval(watch.poll_interval);
    let mut poll =
        notify::PollWatcher::new(handler(sched_tx.clone()), config).map_err(|source| {
            WatcherError {
                folder: "folders".into(),
                source,
            }
        })?;
    for folder in &watch.folders {
        poll.watch(folder, notify::RecursiveMode::Recursive)
            .map_err(|source| WatcherError {
                folder: folder.display().to_string(),
                source,
            })?;
    }
    Ok((Box::new(poll), "poll"))
}
