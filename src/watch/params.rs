//! The watch service's own parameter types: folders, which files are frames,
//! the readiness rule's timings, the worker pool and the file-name pattern.
//!
//! The defaults live here, once; the configuration module builds these values
//! from `[watch]` and writes them back for a run's stored settings.

use std::path::{Path, PathBuf};
use std::time::Duration;

use globset::{Glob, GlobSet, GlobSetBuilder};

use crate::naming::NamePattern;

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
    /// The three pattern lists as written, in order: include, exclude, temporary.
    patterns: [Vec<String>; 3],
    include: GlobSet,
    exclude: GlobSet,
    temporary: GlobSet,
}

impl PartialEq for PathFilter {
    fn eq(&self, other: &Self) -> bool {
        self.patterns == other.patterns
    }
}

/// A file-name pattern that does not compile, with the list it is in.
#[derive(Debug, thiserror::Error)]
#[error("watch.{list}: pattern \"{pattern}\": {source}")]
pub struct BadPattern {
    /// `include`, `exclude` or `temporary`.
    pub list: &'static str,
    /// The pattern as written.
    pub pattern: String,
    /// The glob compiler's reason.
    pub source: globset::Error,
}

impl PathFilter {
    /// Compiles the three lists of glob patterns.
    ///
    /// # Errors
    /// [`BadPattern`] naming the list and the pattern.
    pub fn new(
        include: Vec<String>,
        exclude: Vec<String>,
        temporary: Vec<String>,
    ) -> Result<PathFilter, BadPattern> {
        Ok(PathFilter {
            include: glob_set("include", &include)?,
            exclude: glob_set("exclude", &exclude)?,
            temporary: glob_set("temporary", &temporary)?,
            patterns: [include, exclude, temporary],
        })
    }

    /// The patterns that include a file by name.
    pub fn include(&self) -> &[String] {
        &self.patterns[0]
    }

    /// The patterns that exclude a file by name or path.
    pub fn exclude(&self) -> &[String] {
        &self.patterns[1]
    }

    /// The names of files still being written (never analyzed).
    pub fn temporary(&self) -> &[String] {
        &self.patterns[2]
    }

    /// True for a file the service should analyze. `include` and `temporary`
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

/// Validated `[watch]` settings.
#[derive(Debug, Clone, PartialEq)]
pub struct WatchSettings {
    /// The folders watched (recursively).
    pub folders: Vec<PathBuf>,
    /// Which files are frames.
    pub filter: PathFilter,
    /// How long size and mtime must stay unchanged before a file is complete.
    pub settle: Duration,
    /// File events or polling.
    pub mode: WatchMode,
    /// Polling interval (poll mode, and the fallback).
    pub poll_interval: Duration,
    /// Full rescans of the folders, whatever the events say.
    pub rescan_interval: Duration,
    /// Analysis threads.
    pub workers: usize,
    /// Complete files waiting for a worker before the scheduler holds back.
    pub queue_capacity: usize,
    /// Looks at a file that still reads short before it is recorded as failed.
    pub retry_limit: u32,
    /// First retry delay; doubles per attempt.
    pub retry_backoff: Duration,
    /// The bound on a clean stop.
    pub shutdown_timeout: Duration,
    /// A frame after this long without frames starts a new run.
    pub new_run_after_idle: Duration,
    /// Picks well, site, time point and channel out of file names.
    pub name_pattern: NamePattern,
    /// Each page of a multi-page TIFF is a frame of its own (a stack with a
    /// page per time point), analyzed as soon as it is written, rather than
    /// one frame whose pages are channels.
    pub stacks: bool,
}

/// One analysis thread per core (at least one): the worker count when none
/// is configured.
pub fn default_workers() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

impl Default for WatchSettings {
    fn default() -> Self {
        let filter = PathFilter::new(
            vec!["*.tif".into(), "*.tiff".into(), "*.png".into()],
            Vec::new(),
            ["*.tmp", "*.part", "*.partial", "~*", ".*"]
                .map(String::from)
                .to_vec(),
        )
        .unwrap_or_else(|e| unreachable!("default [watch] patterns are invalid: {e}"));
        WatchSettings {
            folders: Vec::new(),
            filter,
            settle: Duration::from_millis(500),
            mode: WatchMode::Native,
            poll_interval: Duration::from_millis(1000),
            rescan_interval: Duration::from_secs(120),
            workers: default_workers(),
            queue_capacity: 64,
            retry_limit: 6,
            retry_backoff: Duration::from_millis(500),
            shutdown_timeout: Duration::from_secs(10),
            new_run_after_idle: Duration::from_secs(120 * 60),
            name_pattern: NamePattern::default(),
            stacks: false,
        }
    }
}

fn glob_set(list: &'static str, patterns: &[String]) -> Result<GlobSet, BadPattern> {
    let mut builder = GlobSetBuilder::new();
    for p in patterns {
        builder.add(Glob::new(p).map_err(|source| BadPattern {
            list,
            pattern: p.clone(),
            source,
        })?);
    }
    builder.build().map_err(|source| BadPattern {
        list,
        pattern: patterns.join(", "),
        source,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_filter_temporary_names() {
        let w = WatchSettings::default();
        assert_eq!(w.mode, WatchMode::Native);
        assert!(w.workers >= 1);
        assert!(w.filter.accepts(Path::new("/acq/B03_t001.tif")));
        assert!(!w.filter.accepts(Path::new("/acq/B03_t001.tif.part")));
        assert!(!w.filter.accepts(Path::new("/acq/.B03_t001.tif")));
        assert!(!w.filter.accepts(Path::new("/acq/notes.txt")));
    }

    #[test]
    fn a_bad_pattern_names_its_list() {
        let err = PathFilter::new(vec!["[".into()], vec![], vec![]).unwrap_err();
        assert!(
            err.to_string().starts_with("watch.include: pattern \"[\""),
            "{err}"
        );
    }
}
