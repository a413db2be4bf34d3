//! The source of file events: the operating system's (inotify on Linux) or a
//! poll watcher, both handing raw events to the scheduler without blocking.
//!
//! A watched folder that is deleted takes its events with it. A thread looks
//! at each watched folder every [`ROOT_CHECK`]: when one has gone it says so,
//! and when it is back (a new folder under the same name) its events are set
//! up again and it is listed, as a new subfolder is.

use std::path::{Path, PathBuf};
use std::thread::JoinHandle;
use std::time::Duration;

use crossbeam_channel::{RecvTimeoutError, Sender};
use notify::event::{CreateKind, EventKind};
use notify::Watcher;

use crate::text::shown_path;

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

/// How often the watched folders are looked at for a deletion or a return.
pub const ROOT_CHECK: Duration = Duration::from_secs(1);

/// The running watcher and the thread that re-arms it for a watched folder
/// that comes back. Watching stops when it is dropped.
pub struct Watching {
    stop: Option<Sender<()>>,
    thread: Option<JoinHandle<()>>,
}

impl Drop for Watching {
    fn drop(&mut self) {
        drop(self.stop.take());
        if let Some(thread) = self.thread.take() {
            if thread.join().is_err() {
                tracing::error!("the watched folders' thread panicked");
            }
        }
    }
}

/// What tells one folder from another of the same name: device and inode.
#[cfg(unix)]
fn identity(path: &Path) -> Option<(u64, u64)> {
    use std::os::unix::fs::MetadataExt;
    std::fs::metadata(path)
        .ok()
        .filter(std::fs::Metadata::is_dir)
        .map(|m| (m.dev(), m.ino()))
}

/// Elsewhere only whether the folder is there.
#[cfg(not(unix))]
fn identity(path: &Path) -> Option<(u64, u64)> {
    path.is_dir().then_some((0, 0))
}

/// Every [`ROOT_CHECK`] until `stop`'s sender drops: a watched folder that
/// has gone is logged; one that is back (or was replaced) is watched again
/// and announced to the scheduler as a new folder, which lists it.
fn keep_roots_watched(
    mut watcher: Box<dyn Watcher + Send>,
    folders: Vec<PathBuf>,
    stop: &crossbeam_channel::Receiver<()>,
    sched_tx: &Sender<SchedMsg>,
) {
    let mut known: Vec<Option<(u64, u64)>> = folders.iter().map(|f| identity(f)).collect();
    while let Err(RecvTimeoutError::Timeout) = stop.recv_timeout(ROOT_CHECK) {
        for (folder, known) in folders.iter().zip(known.iter_mut()) {
            let now = identity(folder);
            if now == *known {
                continue;
            }
            match now {
                None => tracing::warn!(
                    "watched folder {} has gone; watching for its return",
                    shown_path(folder)
                ),
                Some(_) => {
                    // The old watch died with the old folder.
                    let _ = watcher.unwatch(folder);
                    if let Err(e) = watcher.watch(folder, notify::RecursiveMode::Recursive) {
                        tracing::warn!(
                            "watched folder {} is back but cannot be watched yet ({e}); trying again",
                            shown_path(folder)
                        );
                        continue;
                    }
                    tracing::info!(
                        "watched folder {} is back; its events are set up again",
                        shown_path(folder)
                    );
                    let event = notify::Event::new(EventKind::Create(CreateKind::Folder))
                        .add_path(folder.clone());
                    let _ = sched_tx.send(SchedMsg::Event(Ok(event)));
                }
            }
            *known = now;
        }
    }
}

/// Starts watching `watch.folders` recursively; events go to `sched_tx`.
/// Falls back to polling when native events cannot be set up. Returns the
/// watcher (watching stops when it is dropped) and the mode in use.
///
/// # Errors
/// [`WatcherError`] when not even polling can start, or the folders'
/// thread cannot be started.
pub fn start_watcher(
    watch: &WatchSettings,
    sched_tx: &Sender<SchedMsg>,
) -> Result<(Watching, &'static str), WatcherError> {
    let (watcher, mode) = arm(watch, sched_tx)?;
    let (stop_tx, stop_rx) = crossbeam_channel::bounded(0);
    let (folders, sched_tx) = (watch.folders.clone(), sched_tx.clone());
    let thread = std::thread::Builder::new()
        .name("watched-folders".into())
        .spawn(move || keep_roots_watched(watcher, folders, &stop_rx, &sched_tx))
        .map_err(|e| WatcherError {
            folder: "folders".into(),
            source: notify::Error::io(e),
        })?;
    Ok((
        Watching {
            stop: Some(stop_tx),
            thread: Some(thread),
        },
        mode,
    ))
}

/// The notify watcher on every folder: native events, or polling.
fn arm(
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
