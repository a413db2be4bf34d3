//! From "something happened to this path" to "this exact version is complete: analyze
//! it". Owns the pending map, applies the readiness rule, and feeds the bounded
//! work queue; also the scanner that lists folders for catch-up and rescans.
//!
//! File events are hints only; the rule is: size and mtime unchanged over at least
//! two looks and the settle time. Decoding in full (the last part of the rule) is
//! the worker's; a short read comes back here as [`SchedMsg::Retry`].
//!
//! With `[watch] stacks`, a TIFF file is a stack: each look reads on from
//! the last complete page ([`StackCursor`]) and queues every page completed
//! since, each as its own frame (file + page), with no settle time: a page is
//! complete by its own bytes, not by the file standing still.
//!
//! Files that are due together (a catch-up scan, a burst, the rest of a full
//! queue) are looked at and queued in acquisition order: by the time point the
//! file-name pattern names, then by modification time, then by name. A scan
//! hands over everything it found at once, so that a whole backlog is due
//! together.

use std::collections::{HashMap, HashSet, VecDeque};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use crossbeam_channel::{Receiver, RecvTimeoutError, Sender};
use notify::event::{CreateKind, EventKind, ModifyKind};
use rusqlite::Connection;

use crate::decode::{StackCursor, StackPage};
use crate::naming::NameParts;
use crate::store::health::DatabaseHealth;
use crate::store::writer::StoreOp;
use crate::store::{lookup, now_ms, FrameKey, FrameStatus};
use crate::text::{shown, shown_path, Repeats};
use crate::watch::params::WatchSettings;
use crate::watch::queue::{Job, Progress};

/// Messages to the scheduler thread.
#[derive(Debug)]
pub enum SchedMsg {
    /// A raw file event (or watcher error) from notify's thread.
    Event(notify::Result<notify::Event>),
    /// Files the scanner found unrecorded (or left queued by an earlier process).
    Found(Vec<PathBuf>),
    /// A worker read the file short (or saw it change): look again after a backoff.
    Retry {
        /// The file.
        path: PathBuf,
        /// The version the worker tried (its row stays `queued`).
        previous: FrameKey,
        /// Analysis attempts made so far; the backoff doubles with each.
        attempts: u32,
        /// When the file was first seen (ms since the Unix epoch).
        detected_at_ms: i64,
    },
    /// Frames whose final row is committed: they leave the in-flight set.
    Committed(Vec<FrameKey>),
    /// Stop the scheduler loop.
    Stop,
}

/// A file being watched until it is complete.
#[derive(Debug)]
struct Candidate {
    detected_at_ms: i64,
    /// Size and mtime at the last look.
    last: Option<(u64, i64)>,
    /// When size or mtime last changed (or the first look).
    changed_at: Instant,
    looks: u32,
    due: Instant,
    attempts: u32,
    /// The identity a worker already tried (its row is `queued`).
    previous: Option<FrameKey>,
    /// The time point the file-name pattern names, as a number.
    time_point: Option<i64>,
}

impl Candidate {
    /// Where the file stands in acquisition order, as far as known: time
    /// point, then modification time at the last look (the name breaks ties).
    fn order(&self) -> (i64, i64) {
        (
            self.time_point.unwrap_or(-1),
            self.last.map_or(i64::MIN, |(_, mtime_ns)| mtime_ns),
        )
    }
}

/// A stack being read as it grows.
#[derive(Debug)]
struct Stack {
    /// Where the last look stopped.
    cursor: StackCursor,
    /// Pages found complete but not handed over yet (the queue was full).
    waiting: VecDeque<StackPage>,
}

/// Shortest pause between two looks at the same file.
const MIN_LOOK_GAP: Duration = Duration::from_millis(25);

/// The scheduler thread's state: what it reads from and feeds.
pub struct Scheduler {
    /// The readiness rule's timings and the file filter.
    pub watch: WatchSettings,
    /// Events, scan results, retries and commits.
    pub inbox: Receiver<SchedMsg>,
    /// The bounded queue to the workers.
    pub work_tx: Sender<Job>,
    /// Rows for files judged complete (`queued`).
    pub store_tx: Sender<StoreOp>,
    /// Folders to (re)scan.
    pub scan_tx: Sender<PathBuf>,
    /// A read-only connection for "is this version already recorded?".
    pub reader: Connection,
    /// Where the reader's errors that mean a damaged database go.
    pub health: Arc<DatabaseHealth>,
    /// Shared counters.
    pub progress: Arc<Progress>,
    /// The scheduler's repeated warnings, limited.
    pub repeats: Repeats,
    /// Most pages read of one stack (`[limits] max_pages`).
    pub max_pages: usize,
}

impl Scheduler {
    /// The scheduler loop; returns on [`SchedMsg::Stop`] or when every sender is gone.
    pub fn run(self) {
        let mut pending: HashMap<PathBuf, Candidate> = HashMap::new();
        let mut in_flight: HashSet<FrameKey> = HashSet::new();
        let mut stacks: HashMap<PathBuf, Stack> = HashMap::new();
        let mut next_rescan = Instant::now() + self.watch.rescan_interval;
        loop {
            let now = Instant::now();
            let next_due = pending
                .values()
                .map(|c| c.due)
                .min()
                .unwrap_or(now + Duration::from_secs(1));
            let wait = next_due
                .min(next_rescan)
                .saturating_duration_since(now)
                .min(Duration::from_secs(1));
            match self.inbox.recv_timeout(wait) {
                Ok(SchedMsg::Stop) | Err(RecvTimeoutError::Disconnected) => break,
                Ok(SchedMsg::Event(Ok(event))) => self.on_event(&event, &mut pending),
                Ok(SchedMsg::Event(Err(e))) => {
                    self.repeats.warn(
                        "watcher error",
                        format_args!("watcher error ({e}); rescanning"),
                    );
                    self.rescan_all();
                }
                Ok(SchedMsg::Found(paths)) => {
                    // One moment for the whole list: its files are due together.
                    let now = Instant::now();
                    for path in paths {
                        self.hint(&mut pending, path, now);
                    }
                }
                Ok(SchedMsg::Retry {
                    path,
                    previous,
                    attempts,
                    detected_at_ms,
                }) => {
                    in_flight.remove(&previous);
                    let backoff = self.watch.retry_backoff
                        * 2u32.saturating_pow(attempts.saturating_sub(1).min(10));
                    let now = Instant::now();
                    let time_point = self.time_point(&path);
                    pending.insert(
                        path,
                        Candidate {
                            detected_at_ms,
                            last: None,
                            changed_at: now,
                            looks: 0,
                            due: now + backoff,
                            attempts,
                            previous: Some(previous),
                            time_point,
                        },
                    );
                }
                Ok(SchedMsg::Committed(keys)) => {
                    for key in keys {
                        in_flight.remove(&key);
                    }
                }
                Err(RecvTimeoutError::Timeout) => {}
            }
            let now = Instant::now();
            if now >= next_rescan {
                self.rescan_all();
                next_rescan = now + self.watch.rescan_interval;
            }
            let mut due: Vec<(i64, i64, PathBuf)> = pending
                .iter()
                .filter(|(_, c)| c.due <= now)
                .map(|(p, c)| {
                    let (time_point, mtime_ns) = c.order();
                    (time_point, mtime_ns, p.clone())
                })
                .collect();
            // Acquisition order: the earliest frame takes the queue's room first.
            due.sort_unstable();
            for (_, _, path) in due {
                if let Some(mut c) = pending.remove(&path) {
                    let look = if self.watch.stacks {
                        self.look_stack(&path, &mut c, &mut in_flight, &mut stacks, now)
                    } else {
                        None
                    };
                    let look =
                        look.unwrap_or_else(|| self.look(&path, &mut c, &mut in_flight, now));
                    if look == Look::Again {
                        pending.insert(path, c);
                    }
                }
            }
        }
        tracing::debug!("scheduler stopped with {} files pending", pending.len());
    }

    fn rescan_all(&self) {
        for folder in &self.watch.folders {
            // The scanner ends only at shutdown; a failed send then is harmless.
            let _ = self.scan_tx.send(folder.clone());
        }
    }

    fn on_event(&self, event: &notify::Event, pending: &mut HashMap<PathBuf, Candidate>) {
        if event.need_rescan() {
            tracing::info!("the event queue overflowed; rescanning");
            self.rescan_all();
        }
        let may_be_folder = matches!(
            event.kind,
            EventKind::Create(CreateKind::Folder | CreateKind::Any)
                | EventKind::Modify(ModifyKind::Name(_))
        );
        match event.kind {
            EventKind::Remove(_) | EventKind::Access(notify::event::AccessKind::Open(_)) => {}
            _ => {
                let now = Instant::now();
                for path in &event.paths {
                    if may_be_folder && path.is_dir() {
                        // Files written before the new folder's watch existed
                        // produce no event: list the folder ourselves.
                        let _ = self.scan_tx.send(path.clone());
                    } else if self.watch.filter.accepts(path) {
                        self.hint(pending, path.clone(), now);
                    }
                }
            }
        }
    }

    /// One look at a pending file that may be a stack: queues the pages
    /// completed since the last look. `None` when it is not a TIFF file (or
    /// is gone): the whole-file rule applies.
    fn look_stack(
        &self,
        path: &Path,
        c: &mut Candidate,
        in_flight: &mut HashSet<FrameKey>,
        stacks: &mut HashMap<PathBuf, Stack>,
        now: Instant,
    ) -> Option<Look> {
        let stack = match stacks.entry(path.to_path_buf()) {
            std::collections::hash_map::Entry::Occupied(e) => e.into_mut(),
            std::collections::hash_map::Entry::Vacant(e) => match StackCursor::open(path) {
                Ok(Some(cursor)) => e.insert(Stack {
                    cursor,
                    waiting: VecDeque::new(),
                }),
                Ok(None) => return None,
                Err(err) if err.is_incomplete() => {
                    c.due = now + self.watch.settle.max(MIN_LOOK_GAP);
                    return Some(Look::Again);
                }
                Err(_) if !path.exists() => return None,
                Err(err) => return Some(self.unreadable(path, c, &err.to_string(), now)),
            },
        };
        match stack.cursor.advance(path, self.max_pages) {
            Ok(pages) => stack.waiting.extend(pages),
            Err(err) => {
                // Rewritten, damaged or gone: forget where it was; the next
                // look (an event, a rescan) reads it from its first page.
                tracing::warn!(
                    "{}; the stack will be read again from its first page",
                    shown(&err.to_string())
                );
                stacks.remove(path);
                return Some(Look::Drop);
            }
        }
        while let Some(page) = stack.waiting.front() {
            let key = FrameKey::of_page(path, page);
            if in_flight.contains(&key) {
                stack.waiting.pop_front();
                continue;
            }
            let Ok(recorded) = self.recorded(path, &key, c, now) else {
                return Some(Look::Again);
            };
            if !matches!(recorded, Some(FrameStatus::Done | FrameStatus::Failed)) {
                if self.work_tx.is_full() {
                    c.due = now + MIN_LOOK_GAP;
                    return Some(Look::Again);
                }
                let names = self
                    .watch
                    .name_pattern
                    .parts(path)
                    .of_page(path, page.index);
                self.enqueue(path, key, names, recorded.is_none(), c, in_flight);
            }
            stack.waiting.pop_front();
        }
        Some(Look::Drop)
    }

    /// One look at a pending file; `Again` keeps it pending.
    fn look(
        &self,
        path: &Path,
        c: &mut Candidate,
        in_flight: &mut HashSet<FrameKey>,
        now: Instant,
    ) -> Look {
        let meta = match std::fs::metadata(path) {
            Ok(m) if m.is_file() => m,
            Ok(_) => return Look::Drop,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                // Renamed away or deleted: if a worker already tried it, its row
                // gets the reason; otherwise it was never a frame of ours.
                if let Some(previous) = c.previous.take() {
                    self.send_store(StoreOp::Failed {
                        key: previous,
                        attempts: c.attempts,
                        reason: "the file went away before it could be read completely".into(),
                    });
                }
                return Look::Drop;
            }
            Err(e) => return self.unreadable(path, c, &e.to_string(), now),
        };
        let key = FrameKey::from_metadata(path, &meta);
        let signature = (key.size_bytes, key.mtime_ns);
        if c.last != Some(signature) {
            c.last = Some(signature);
            c.changed_at = now;
            c.looks = 1;
            c.due = now + self.watch.settle.max(MIN_LOOK_GAP);
            return Look::Again;
        }
        c.looks += 1;
        let settled_at = c.changed_at + self.watch.settle;
        if c.looks < 2 || now < settled_at {
            c.due = settled_at.max(now + MIN_LOOK_GAP);
            return Look::Again;
        }
        // Complete by size and mtime: is this exact version already handled?
        if in_flight.contains(&key) {
            return Look::Drop;
        }
        let Ok(recorded) = self.recorded(path, &key, c, now) else {
            return Look::Again;
        };
        if let Some(previous) = c.previous.take().filter(|p| *p != key) {
            // The file changed since a worker read it short: that version never
            // existed complete. The new one gets its own row.
            self.send_store(StoreOp::Withdrawn { key: previous });
            c.attempts = 0;
        }
        if matches!(recorded, Some(FrameStatus::Done | FrameStatus::Failed)) {
            return Look::Drop;
        }
        if self.work_tx.is_full() {
            // Backpressure: keep the file pending and look again shortly.
            c.due = now + MIN_LOOK_GAP;
            return Look::Again;
        }
        let names = self.watch.name_pattern.parts(path);
        self.enqueue(path, key, names, recorded.is_none(), c, in_flight);
        Look::Drop
    }

    /// What the store holds for `key`; on a failed look-up, `Err` with the
    /// candidate due again shortly (the error reported to the database's
    /// health, since a damaged database stops the service, and logged).
    fn recorded(
        &self,
        path: &Path,
        key: &FrameKey,
        c: &mut Candidate,
        now: Instant,
    ) -> Result<Option<FrameStatus>, ()> {
        lookup(&self.reader, key).map_err(|e| {
            self.health.report(&e);
            self.repeats.warn(
                "store look-up failed",
                format_args!(
                    "store look-up for {} failed ({e}); trying again",
                    shown_path(path)
                ),
            );
            c.due = now + Duration::from_millis(500);
        })
    }

    /// Hands a complete frame to the workers (the queue has room), after
    /// its `queued` row when it has none yet (`unrecorded`).
    fn enqueue(
        &self,
        path: &Path,
        key: FrameKey,
        names: NameParts,
        unrecorded: bool,
        c: &Candidate,
        in_flight: &mut HashSet<FrameKey>,
    ) {
        // Outstanding from here on: the store send below blocks while the
        // writer is stuck and its queue full, and the watchdog must then see
        // work waiting rather than an idle pipeline.
        self.progress.enqueued.fetch_add(1, Ordering::Relaxed);
        if unrecorded {
            // Ordered before the job itself, so the row exists when its result arrives.
            self.send_store(StoreOp::Queued {
                key: key.clone(),
                detected_at_ms: c.detected_at_ms,
                ready_at_ms: now_ms(),
                names,
            });
        }
        let job = Job {
            path: path.to_path_buf(),
            key: key.clone(),
            detected_at_ms: c.detected_at_ms,
            attempts: c.attempts,
        };
        // Only this thread sends, so a queue that was not full has room; it
        // fails only once the workers are gone (shutdown).
        if self.work_tx.try_send(job).is_ok() {
            in_flight.insert(key);
        } else {
            self.progress.enqueued.fetch_sub(1, Ordering::Relaxed);
        }
    }

    /// A file that exists but cannot be inspected: keep trying with backoff, and
    /// record it as failed once the retry limit is reached.
    fn unreadable(&self, path: &Path, c: &mut Candidate, reason: &str, now: Instant) -> Look {
        c.attempts += 1;
        if c.attempts <= self.watch.retry_limit {
            c.due = now + self.watch.retry_backoff * 2u32.saturating_pow(c.attempts.min(10));
            return Look::Again;
        }
        let key = FrameKey {
            path: path.to_string_lossy().into_owned(),
            size_bytes: 0,
            mtime_ns: 0,
            page: None,
        };
        let at = now_ms();
        self.send_store(StoreOp::Queued {
            key: key.clone(),
            detected_at_ms: c.detected_at_ms,
            ready_at_ms: at,
            names: self.watch.name_pattern.parts(path),
        });
        self.send_store(StoreOp::Failed {
            key,
            attempts: c.attempts,
            reason: format!(
                "cannot inspect the file after {} attempts: {reason}",
                c.attempts
            ),
        });
        Look::Drop
    }

    /// Something may have happened to `path`: look at it soon.
    fn hint(&self, pending: &mut HashMap<PathBuf, Candidate>, path: PathBuf, now: Instant) {
        if let Some(c) = pending.get_mut(&path) {
            c.due = c.due.min(now + MIN_LOOK_GAP);
            return;
        }
        let time_point = self.time_point(&path);
        pending.insert(
            path,
            Candidate {
                detected_at_ms: now_ms(),
                last: None,
                changed_at: now,
                looks: 0,
                due: now,
                attempts: 0,
                previous: None,
                time_point,
            },
        );
    }

    /// The time point `path`'s name gives, as a number.
    fn time_point(&self, path: &Path) -> Option<i64> {
        self.watch.name_pattern.parts(path).time_point_index()
    }

    fn send_store(&self, op: StoreOp) {
        if self.store_tx.send(op).is_err() {
            self.repeats.error(
                "store writer stopped",
                "the store writer has stopped; a record was not written",
            );
        }
    }
}

#[derive(Debug, PartialEq, Eq)]
enum Look {
    Again,
    Drop,
}

/// The scanner thread: lists a folder tree (catch-up, rescans, new subfolders)
/// and reports the files whose current version is not recorded as finished,
/// all in one list, so that the scheduler can queue a backlog in acquisition
/// order.
pub fn scan_loop(
    requests: &Receiver<PathBuf>,
    reader: &Connection,
    health: &DatabaseHealth,
    watch: &WatchSettings,
    sched_tx: &Sender<SchedMsg>,
    stopping: &AtomicBool,
) {
    while let Ok(root) = requests.recv() {
        let mut found = Vec::new();
        let mut listed = 0usize;
        for entry in walkdir::WalkDir::new(&root)
            .follow_links(false)
            .into_iter()
            .filter_map(Result::ok)
        {
            if stopping.load(Ordering::Relaxed) {
                return;
            }
            if !entry.file_type().is_file() || !watch.filter.accepts(entry.path()) {
                continue;
            }
            listed += 1;
            let Ok(meta) = entry.metadata() else { continue };
            let key = FrameKey::from_metadata(entry.path(), &meta);
            match lookup(reader, &key) {
                Ok(Some(FrameStatus::Done | FrameStatus::Failed)) => {}
                // Unrecorded, queued by an earlier process, or a look-up error:
                // hand it over; the scheduler checks again before queueing.
                Ok(_) => found.push(entry.into_path()),
                Err(e) => {
                    // A damaged database stops the service (the writer sees it).
                    health.report(&e);
                    found.push(entry.into_path());
                }
            }
        }
        tracing::debug!(
            "scanned {}: {listed} frame files, {} to look at",
            shown_path(&root),
            found.len()
        );
        if !found.is_empty() && sched_tx.send(SchedMsg::Found(found)).is_err() {
            return;
        }
    }
}
