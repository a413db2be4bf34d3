//! `framewarden demo`: replays an invented overnight acquisition into a temporary
//! folder while the real watch service records it, then prints the status.
//!
//! The scenario (wells, time points, dimming lamp, the botched file) is data in
//! `demo-data/plate-timelapse.toml`; frames come from [`crate::synth`]. Watching,
//! analysis and storage are the ordinary service's: nothing is special-cased here.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use serde::Deserialize;

use crate::daemon::{Service, WatchError, WatchOptions};
use crate::settings::Settings;
use crate::status::{self, StatusReport};
use crate::synth::{self, SceneSpec};

/// The built-in scenario.
pub const DEFAULT_SCENARIO: &str = include_str!("../demo-data/plate-timelapse.toml");

/// An invented acquisition to replay (see `demo-data/plate-timelapse.toml`).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    /// Wells imaged at every time point (e.g. `A01`); must not be empty.
    pub wells: Vec<String>,
    /// Channel name written into every file name.
    pub channel: String,
    /// Number of time points (at least 1).
    pub time_points: usize,
    /// Time from the start of one time point to the next, in ms.
    pub interval_ms: u64,
    /// Width and height of every frame, in pixels.
    pub size_px: usize,
    /// Bits per sample of the frames: 8 or 16.
    pub bit_depth: u8,
    /// Objects per well at time point 0.
    pub start_objects: usize,
    /// Factor by which each well's object count grows per time point.
    pub growth_per_step: f64,
    /// Time point from which the lamp dims and the illumination gradient grows,
    /// reaching `lamp_end` and `gradient_end` at the last time point.
    pub decline_from: usize,
    /// Lamp brightness at the last time point (1 = nominal).
    pub lamp_end: f64,
    /// Illumination gradient at the last time point: (max − min) / mean across the
    /// frame.
    pub gradient_end: f64,
    /// Pieces each file is written in, with pauses between them (at least 1).
    pub chunks: usize,
    /// Pause after each piece, in ms.
    pub chunk_pause_ms: u64,
    /// Every n-th file is written under a temporary name and renamed when
    /// complete; 0 = never.
    pub temp_name_every: usize,
    /// Suffix of the temporary name (e.g. `.part`).
    pub temp_suffix: String,
    /// One file cut off half-way, never finished; `None` = every file is whole.
    pub corrupt: Option<CorruptFile>,
}

/// The file of a scenario that is written truncated.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CorruptFile {
    /// Its well.
    pub well: String,
    /// Its time point.
    pub time_point: usize,
}

/// Why the demo could not run.
#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    /// The scenario (or the demo's own settings) is invalid, or a frame could not
    /// be drawn; the message says why.
    #[error("scenario: {0}")]
    Scenario(String),
    /// A folder or file of the demo could not be created or written.
    #[error("demo folder {path}: {source}")]
    Io {
        /// The folder or file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The watch service did not start.
    #[error(transparent)]
    Watch(#[from] WatchError),
    /// The database could not be read for the status.
    #[error(transparent)]
    Store(#[from] crate::store::StoreError),
}

impl Scenario {
    /// Parses a scenario description.
    ///
    /// # Errors
    /// [`DemoError::Scenario`] for bad TOML or values.
    pub fn parse(text: &str) -> Result<Scenario, DemoError> {
        let s: Scenario = toml::from_str(text).map_err(|e| DemoError::Scenario(e.to_string()))?;
        if s.wells.is_empty() || s.time_points == 0 || s.chunks == 0 {
            return Err(DemoError::Scenario(
                "wells, time_points and chunks must not be empty or 0".into(),
            ));
        }
        Ok(s)
    }

    /// File name of one well's frame at time point `t`:
    /// `<well>_t<tttt>_<channel>.tif`.
    pub fn file_name(&self, well: &str, t: usize) -> String {
        format!("{well}_t{t:04}_{}.tif", self.channel)
    }

    /// The synthetic scene of one well at one time point: cells multiply; late
    /// in the run the lamp dims and a gradient grows.
    pub fn scene(&self, well_index: usize, t: usize) -> SceneSpec {
        let late = if t >= self.decline_from && self.time_points > self.decline_from + 1 {
            (t - self.decline_from) as f64 / (self.time_points - 1 - self.decline_from) as f64
        } else {
            0.0
        };
        let objects =
            (self.start_objects as f64 * self.growth_per_step.powi(t as i32)).round() as usize;
        SceneSpec {
            width: self.size_px,
            height: self.size_px,
            bit_depth: self.bit_depth,
            object_count: objects,
            radius_px: (4.0, 8.0),
            lamp: 1.0 - late * (1.0 - self.lamp_end),
            gradient: late * self.gradient_end,
            gradient_angle_rad: 0.6,
            // One seed per well: the same cells all night, more of them as they divide.
            seed: well_index as u64 + 1,
            ..SceneSpec::default()
        }
    }
}

/// Replays `scenario` into `workdir/acquisition` while the watch service records
/// it into `workdir/framewarden.db`; returns the final status.
///
/// # Errors
/// [`DemoError`] for folder, scenario or service start-up problems.
pub fn run(
    scenario: &Scenario,
    workdir: &Path,
    out: &mut dyn Write,
) -> Result<StatusReport, DemoError> {
    let io = |path: &Path| {
        let path = path.to_path_buf();
        move |source| DemoError::Io { path, source }
    };
    let acq = workdir.join("acquisition");
    let staging = workdir.join("instrument-buffer");
    std::fs::create_dir_all(&acq).map_err(io(&acq))?;
    std::fs::create_dir_all(&staging).map_err(io(&staging))?;
    let db = workdir.join("framewarden.db");
    // Twelve time points per well: the first four make each well's baseline, so
    // the late-run dimming and gradient are charted (and alerted) against them.
    // The cells divide through the run, which raises counts and image detail on
    // purpose: like a user of a growing culture, the demo leaves object_count and
    // focus out of the alerting charts.
    let config = demo_config(&acq, &db, &workdir.join("alerts.jsonl"));
    let settings: Settings = crate::settings::from_text(&config, &workdir.join("demo.toml"))
        .map_err(|e| DemoError::Scenario(format!("demo settings: {e}")))?;
    let service = Service::start(&settings, &WatchOptions { new_run: true })?;
    let _ = writeln!(
        out,
        "demo: replaying {} wells x {} time points into {}",
        scenario.wells.len(),
        scenario.time_points,
        acq.display()
    );
    let started = Instant::now();
    let mut written = 0usize;
    for t in 0..scenario.time_points {
        let step_start = Instant::now();
        for (w, well) in scenario.wells.iter().enumerate() {
            let name = scenario.file_name(well, t);
            let scene = synth::generate(&scenario.scene(w, t))
                .map_err(|e| DemoError::Scenario(e.to_string()))?;
            let staged = staging.join(&name);
            synth::write_tiff(&staged, &scene.frame).map_err(io(&staged))?;
            let mut bytes = std::fs::read(&staged).map_err(io(&staged))?;
            std::fs::remove_file(&staged).map_err(io(&staged))?;
            if scenario
                .corrupt
                .as_ref()
                .is_some_and(|c| c.well == *well && c.time_point == t)
            {
                bytes.truncate(bytes.len() / 2);
            }
            let through_temp =
                scenario.temp_name_every > 0 && written.is_multiple_of(scenario.temp_name_every);
            write_like_an_instrument(scenario, &acq.join(&name), &bytes, through_temp)
                .map_err(io(&acq))?;
            written += 1;
        }
        let _ = writeln!(
            out,
            "  time point {t:>2}: {} frames written",
            scenario.wells.len()
        );
        let interval = Duration::from_millis(scenario.interval_ms);
        std::thread::sleep(interval.saturating_sub(step_start.elapsed()));
    }
    // Wait until every written file has its row (done or failed).
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        let report = status::read(&db, 0, None)?;
        if report.frames_seen as usize >= written && report.frames_queued == 0
            || Instant::now() > deadline
        {
            break;
        }
        std::thread::sleep(Duration::from_millis(200));
    }
    let summary = service.stop();
    let _ = writeln!(
        out,
        "demo: {} frames recorded ({} done, {} failed) in {:.0} s\n",
        summary.done + summary.failed,
        summary.done,
        summary.failed,
        started.elapsed().as_secs_f64()
    );
    let report = status::read(&db, 8, None)?;
    let _ = write!(
        out,
        "{}",
        status::render(&report, &jiff::tz::TimeZone::system())
    );
    let _ = writeln!(out, "\nevery result is in {}", db.display());
    Ok(report)
}

/// Chunks with pauses, optionally under a temporary name renamed at the end.
fn write_like_an_instrument(
    s: &Scenario,
    path: &Path,
    bytes: &[u8],
    through_temp: bool,
) -> std::io::Result<()> {
    let target = if through_temp {
        let mut name = path.as_os_str().to_owned();
        name.push(&s.temp_suffix);
        PathBuf::from(name)
    } else {
        path.to_path_buf()
    };
    let mut file = std::fs::File::create(&target)?;
    for chunk in bytes.chunks(bytes.len().div_ceil(s.chunks).max(1)) {
        file.write_all(chunk)?;
        file.flush()?;
        std::thread::sleep(Duration::from_millis(s.chunk_pause_ms));
    }
    drop(file);
    if through_temp {
        std::fs::rename(&target, path)?;
    }
    Ok(())
}

/// A new, empty folder `framewarden-demo-<pid>[-n]` under `parent`: never one
/// left by an earlier demo (`--keep`, or a process id used again).
///
/// # Errors
/// A message naming the folder when none can be created.
pub fn fresh_folder(parent: &Path) -> Result<PathBuf, String> {
    let stem = format!("framewarden-demo-{}", std::process::id());
    let mut last_error = String::new();
    for n in 1..=100 {
        let dir = parent.join(if n == 1 {
            stem.clone()
        } else {
            format!("{stem}-{n}")
        });
        match std::fs::create_dir(&dir) {
            Ok(()) => return Ok(dir),
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => {
                last_error = format!("{} exists", dir.display());
            }
            Err(e) => return Err(format!("{}: {e}", dir.display())),
        }
    }
    Err(format!(
        "no free demo folder under {}: {last_error}",
        parent.display()
    ))
}

/// The demo's settings as TOML. Paths are written as escaped TOML strings:
/// Windows paths are full of backslashes.
fn demo_config(acq: &Path, db: &Path, alerts: &Path) -> String {
    let quoted = |p: &Path| toml::Value::String(p.display().to_string()).to_string();
    format!(
        "[watch]\nfolders = [{}]\nsettle_ms = 300\nretry_limit = 3\nretry_backoff_ms = 200\n\
         name_pattern = '^(?P<well>[A-P]\\d{{2}})_t(?P<time_point>\\d+)_(?P<channel>[^.]+)\\.tif$'\n\
         [store]\ndatabase = {}\n\
         [quality]\nbaseline_frames = 4\non_uneven_illumination = \"flatten\"\n\
         charted_metrics = [\"background_level\", \"illumination_change\", \"threshold\", \"separability\"]\n\
         [alerts]\nfile = {}\n",
        quoted(acq),
        quoted(db),
        quoted(alerts)
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_demo_gets_a_folder_of_its_own() {
        let parent = tempfile::tempdir().unwrap();
        let first = fresh_folder(parent.path()).unwrap();
        std::fs::write(first.join("left-over.tif"), b"x").unwrap();
        let second = fresh_folder(parent.path()).unwrap();
        assert_ne!(first, second);
        assert_eq!(std::fs::read_dir(&second).unwrap().count(), 0);
    }

    #[test]
    fn demo_settings_keep_paths_with_backslashes_and_quotes() {
        let dir = Path::new("/tmp/night \\ \"run\" 'A'");
        let (acq, db, alerts) = (dir.join("acq"), dir.join("fw.db"), dir.join("a.jsonl"));
        let text = demo_config(&acq, &db, &alerts);
        let settings = crate::settings::parse(&text, &dir.join("demo.toml"))
            .unwrap()
            .read_files()
            .unwrap();
        assert_eq!(settings.watch.folders, vec![acq]);
        assert_eq!(settings.store.database, db);
        assert_eq!(settings.alerts.file, Some(alerts));
    }

    #[test]
    fn the_built_in_scenario_parses_and_declines_late() {
        let s = Scenario::parse(DEFAULT_SCENARIO).unwrap();
        let early = s.scene(0, 0);
        let last = s.scene(0, s.time_points - 1);
        assert_eq!((early.lamp, early.gradient), (1.0, 0.0));
        assert!(
            (last.lamp - s.lamp_end).abs() < 1e-9 && (last.gradient - s.gradient_end).abs() < 1e-9
        );
        assert!(last.object_count > early.object_count, "cells multiply");
        assert_eq!(s.file_name("B03", 6), "B03_t0006_nuclei.tif");
    }
}
