//! The `[report]` settings: where `watch` keeps the run's HTML report and how
//! often it rewrites it. Owned here because the report itself
//! ([`crate::html_report`]) sits above the settings that load a run.

use std::path::PathBuf;
use std::time::Duration;

/// Validated `[report]` settings.
#[derive(Debug, Clone, PartialEq)]
pub struct ReportSettings {
    /// The HTML file `watch` rewrites during the run and at its end; `None`
    /// (the default) writes none.
    pub path: Option<PathBuf>,
    /// Time between two rewrites during the run.
    pub every: Duration,
}

impl Default for ReportSettings {
    fn default() -> Self {
        ReportSettings {
            path: None,
            every: Duration::from_secs(15 * 60),
        }
    }
}
