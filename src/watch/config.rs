//! The `[watch]` and `[store]` sections of the configuration: raw TOML shapes and
//! their validated forms (compiled patterns, checked ranges).
//!
//! [`crate::settings`] owns the file as a whole and calls [`validate`]; the watch
//! service and the store only ever see the validated values.

use std::path::{Path, PathBuf};
use std::time::Duration;

use globset::{Glob, GlobSet, GlobSetBuilder};
use regex::Regex;
use serde::Deserialize;

use crate::store::writer::NameParts;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawWatch {
    folders: Vec<PathBuf>,
    include: Vec<String>,
    exclude: Vec<String>,
    temporary: Vec<String>,
    settle_ms: u64,
    mode: String,
    poll_interval_ms: u64,
    rescan_interval_s: u64,
    workers: usize,
    queue_capacity: usize,
    retry_limit: u32,
    retry_backoff_ms: u64,
    shutdown_timeout_s: u64,
    new_run_after_idle_min: u64,
    name_pattern: String,
}

impl Default for RawWatch {
    fn default() -> Self {
        Self {
            folders: Vec::new(),
            include: vec!["*.tif".into(), "*.tiff".into(), "*.png".into()],
            exclude: Vec::new(),
            temporary: vec![
                "*.tmp".into(),
                "*.part".into(),
                "*.partial".into(),
                "~*".into(),
                ".*".into(),
            ],
            settle_ms: 500,
            mode: "native".into(),
            poll_interval_ms: 1000,
            rescan_interval_s: 120,
            workers: 0,
            queue_capacity: 64,
            retry_limit: 6,
            retry_backoff_ms: 500,
            shutdown_timeout_s: 10,
            new_run_after_idle_min: 120,
            name_pattern: String::new(),
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct RawStore {
    database: PathBuf,
    batch_max: usize,
}

impl Default for RawStore {
    fn default() -> Self {
        Self {
            database: PathBuf::from("framewarden.db"),
            batch_max: 500,
        }
    }
}

/// How changes are noticed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WatchMode {
    /// The operating system's file events (inotify on Linux); falls back to
    /// polling when they cannot be set up.
    Native,
    /// Stat the tree every interval: for network shares, which deliver no events.
    Poll,
}

/// Which files are frames: included by name, not excluded, not a temporary name.
#[derive(Debug, Clone)]
pub struct PathFilter {
    include: GlobSet,
    exclude: GlobSet,
    temporary: GlobSet,
}

impl PathFilter {
    /// True for a file the service should analyse. `include` and `temporary`
    /// match the file name; `exclude` matches the file name or the whole path.
    pub fn accepts(&self, path: &Path) -> bool {
        let Some(name) = path.file_name() else {
            return false;
        };
        self.include.is_match(name)
            && !self.temporary.is_match(name)
            && !self.exclude.is_match(name)
            && !self.exclude.is_match(path)
    }
}

/// The file-name pattern: a regular expression with named groups; `well`, `site`,
/// `time_point` and `channel` get their own columns, every group is kept.
#[derive(Debug, Clone, Default)]
pub struct NamePattern(Option<Regex>);

impl NamePattern {
    /// The named parts of `path`'s file name (all empty when there is no pattern
    /// or the name does not match).
    pub fn parts(&self, path: &Path) -> NameParts {
        let mut parts = NameParts::default();
        let (Some(re), Some(name)) = (&self.0, path.file_name().and_then(|n| n.to_str())) else {
            return parts;
        };
        let Some(caps) = re.captures(name) else {
            return parts;
        };
        for group in re.capture_names().flatten() {
            if let Some(m) = caps.name(group) {
                parts.all.insert(group.to_string(), m.as_str().to_string());
            }
        }
        parts.well = parts.all.get("well").cloned();
        parts.site = parts.all.get("site").cloned();
        parts.time_point = parts.all.get("time_point").cloned();
        parts.channel = parts.all.get("channel").cloned();
        parts
    }
}

/// Validated `[watch]` settings.
#[derive(Debug, Clone)]
pub struct WatchSettings {
    pub folders: Vec<PathBuf>,
    pub filter: PathFilter,
    pub settle: Duration,
    pub mode: WatchMode,
    pub poll_interval: Duration,
    pub rescan_interval: Duration,
    /// Analysis threads (the configured value, or one per core for 0).
    pub workers: usize,
    pub queue_capacity: usize,
    /// Looks at a file that still reads short before it is recorded as failed.
    pub retry_limit: u32,
    /// First retry delay; doubles per attempt.
    pub retry_backoff: Duration,
    pub shutdown_timeout: Duration,
    pub new_run_after_idle: Duration,
    pub name_pattern: NamePattern,
}

/// Validated `[store]` settings.
#[derive(Debug, Clone)]
pub struct StoreSettings {
    pub database: PathBuf,
    /// Most operations committed in one transaction.
    pub batch_max: usize,
}

impl Default for WatchSettings {
    fn default() -> Self {
        // The defaults are valid by construction (tested below).
        validate(RawWatch::default(), RawStore::default(), Path::new("."))
            .map(|(w, _)| w)
            .unwrap_or_else(|e| unreachable!("default [watch] settings are invalid: {e}"))
    }
}

impl Default for StoreSettings {
    fn default() -> Self {
        let raw = RawStore::default();
        Self {
            database: raw.database,
            batch_max: raw.batch_max,
        }
    }
}

fn glob_set(key: &str, patterns: &[String]) -> Result<GlobSet, String> {
    let mut builder = GlobSetBuilder::new();
    for p in patterns {
        builder.add(Glob::new(p).map_err(|e| format!("watch.{key}: pattern \"{p}\": {e}"))?);
    }
    builder.build().map_err(|e| format!("watch.{key}: {e}"))
}

/// Checks the raw sections; relative folders and database paths are anchored at
/// `base` (the config file's folder).
///
/// # Errors
/// A message naming the key and what is expected.
pub fn validate(
    w: RawWatch,
    s: RawStore,
    base: &Path,
) -> Result<(WatchSettings, StoreSettings), String> {
    let mode = match w.mode.as_str() {
        "native" => WatchMode::Native,
        "poll" => WatchMode::Poll,
        other => {
            return Err(format!(
                "watch.mode = \"{other}\" (expected native or poll)"
            ))
        }
    };
    let positive = |key: &str, v: u64| {
        if v == 0 {
            Err(format!("watch.{key} must be positive"))
        } else {
            Ok(v)
        }
    };
    positive("poll_interval_ms", w.poll_interval_ms)?;
    positive("rescan_interval_s", w.rescan_interval_s)?;
    positive("queue_capacity", w.queue_capacity as u64)?;
    positive("retry_backoff_ms", w.retry_backoff_ms)?;
    positive("shutdown_timeout_s", w.shutdown_timeout_s)?;
    positive("new_run_after_idle_min", w.new_run_after_idle_min)?;
    if w.settle_ms > 600_000 {
        return Err(format!(
            "watch.settle_ms = {} (expected at most 600000)",
            w.settle_ms
        ));
    }
    if w.retry_limit > 30 {
        return Err(format!(
            "watch.retry_limit = {} (expected 0 to 30)",
            w.retry_limit
        ));
    }
    if s.batch_max == 0 {
        return Err("store.batch_max must be positive".into());
    }
    let name_pattern = if w.name_pattern.is_empty() {
        NamePattern(None)
    } else {
        NamePattern(Some(Regex::new(&w.name_pattern).map_err(|e| {
            format!("watch.name_pattern is not a valid regular expression: {e}")
        })?))
    };
    let workers = if w.workers == 0 {
        std::thread::available_parallelism().map_or(1, |n| n.get())
    } else {
        w.workers
    };
    let watch = WatchSettings {
        folders: w.folders.iter().map(|f| base.join(f)).collect(),
        filter: PathFilter {
            include: glob_set("include", &w.include)?,
            exclude: glob_set("exclude", &w.exclude)?,
            temporary: glob_set("temporary", &w.temporary)?,
        },
        settle: Duration::from_millis(w.settle_ms),
        mode,
        poll_interval: Duration::from_millis(w.poll_interval_ms),
        rescan_interval: Duration::from_secs(w.rescan_interval_s),
        workers,
        queue_capacity: w.queue_capacity,
        retry_limit: w.retry_limit,
        retry_backoff: Duration::from_millis(w.retry_backoff_ms),
        shutdown_timeout: Duration::from_secs(w.shutdown_timeout_s),
        new_run_after_idle: Duration::from_secs(w.new_run_after_idle_min * 60),
        name_pattern,
    };
    let store = StoreSettings {
        database: base.join(s.database),
        batch_max: s.batch_max,
    };
    Ok((watch, store))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_are_valid_and_filter_temporary_names() {
        let w = WatchSettings::default();
        assert_eq!(w.mode, WatchMode::Native);
        assert!(w.workers >= 1);
        assert!(w.filter.accepts(Path::new("/acq/B03_t001.tif")));
        assert!(!w.filter.accepts(Path::new("/acq/B03_t001.tif.part")));
        assert!(!w.filter.accepts(Path::new("/acq/.B03_t001.tif")));
        assert!(!w.filter.accepts(Path::new("/acq/notes.txt")));
    }

    #[test]
    fn name_parts_go_to_their_columns() {
        let raw = RawWatch {
            name_pattern:
                r"^(?P<well>[A-H]\d{2})_s(?P<site>\d+)_t(?P<time_point>\d+)_(?P<channel>\w+?)\.tif$"
                    .into(),
            ..RawWatch::default()
        };
        let (w, _) = validate(raw, RawStore::default(), Path::new("/etc")).unwrap();
        let p = w
            .name_pattern
            .parts(Path::new("/acq/C07_s2_t0013_nuclei.tif"));
        assert_eq!(p.well.as_deref(), Some("C07"));
        assert_eq!(p.site.as_deref(), Some("2"));
        assert_eq!(p.time_point.as_deref(), Some("0013"));
        assert_eq!(p.channel.as_deref(), Some("nuclei"));
        assert_eq!(p.all.len(), 4);
        assert_eq!(
            w.name_pattern.parts(Path::new("/acq/other.tif")),
            NameParts::default()
        );
    }

    #[test]
    fn bad_values_name_their_key() {
        for (raw, needle) in [
            (
                RawWatch {
                    mode: "inotify".into(),
                    ..RawWatch::default()
                },
                "watch.mode",
            ),
            (
                RawWatch {
                    include: vec!["[".into()],
                    ..RawWatch::default()
                },
                "watch.include",
            ),
            (
                RawWatch {
                    name_pattern: "(".into(),
                    ..RawWatch::default()
                },
                "watch.name_pattern",
            ),
            (
                RawWatch {
                    queue_capacity: 0,
                    ..RawWatch::default()
                },
                "watch.queue_capacity",
            ),
        ] {
            let err = validate(raw, RawStore::default(), Path::new(".")).unwrap_err();
            assert!(err.contains(needle), "{err}");
        }
    }
}
