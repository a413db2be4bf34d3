//! `framewarden demo`: replays an invented overnight acquisition into a folder
//! of its own while the real watch service records it, then tells what the
//! night held and what framewarden caught, in a few lines.
//!
//! The scenario (a dose series of an invented compound, a well that loses
//! focus, a stretch of uneven illumination, a dimming lamp, a botched file) is
//! data in `demo-data/plate-timelapse.toml`; frames come from [`crate::synth`].
//! Watching, analysis and storage are the ordinary service's: nothing is
//! special-cased here. The folder is kept: [`DemoPaths`] says what is in it.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use serde::Deserialize;

use crate::daemon::{Service, WatchError, WatchOptions};
use crate::html_report::ReportError;
use crate::qc::report::AlertRow;
use crate::settings::Settings;
use crate::status;
use crate::store::{self, StoreError, COUNT_USED_SQL};
use crate::synth::{self, SceneSpec};

/// The built-in scenario.
pub const DEFAULT_SCENARIO: &str = include_str!("../demo-data/plate-timelapse.toml");

/// An invented acquisition to replay (see `demo-data/plate-timelapse.toml`).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    /// Name of the invented compound of the dose series.
    pub compound: String,
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
    /// Mean brightness of the objects, fraction of full scale.
    pub object_level: f64,
    /// Relative spread of object brightness: each object gets
    /// `object_level * (1 ± object_level_spread)`, uniformly.
    pub object_level_spread: f64,
    /// The dose series: which wells got which dose, and how their counts change.
    #[serde(rename = "treatment")]
    pub treatments: Vec<Treatment>,
    /// One well out of focus for a stretch of time points; `None` = always sharp.
    pub defocus: Option<Defocus>,
    /// Every well unevenly lit for a stretch; `None` = always even.
    pub uneven: Option<Uneven>,
    /// The lamp dimming late in the run; `None` = steady.
    pub lamp: Option<LampDimming>,
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

/// One dose of the series and the wells that received it.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Treatment {
    /// The dose as shown (e.g. `vehicle`, `3 uM`).
    pub dose: String,
    /// Wells with this dose (e.g. `A01`).
    pub wells: Vec<String>,
    /// Factor by which the wells' object count changes per time point (above 1
    /// the cells multiply, below 1 they die).
    pub growth_per_step: f64,
}

/// A well whose frames are blurred for time points `from..=to`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Defocus {
    /// The well.
    pub well: String,
    /// First blurred time point.
    pub from: usize,
    /// Last blurred time point.
    pub to: usize,
    /// Sigma of the Gaussian blur, in pixels.
    pub blur_sigma_px: f64,
}

/// An illumination gradient over every well for time points `from..=to`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Uneven {
    /// First unevenly lit time point.
    pub from: usize,
    /// Last unevenly lit time point.
    pub to: usize,
    /// (max − min) / mean of the illumination across the frame.
    pub gradient: f64,
}

/// The lamp dims from time point `from`, reaching `end` at the last one.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LampDimming {
    /// First dimmer time point.
    pub from: usize,
    /// Brightness at the last time point (1 = nominal).
    pub end: f64,
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
    /// The database could not be read for the summary.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The report could not be written.
    #[error(transparent)]
    Report(#[from] ReportError),
}

impl Scenario {
    /// Parses a scenario description and checks that its parts fit together.
    ///
    /// # Errors
    /// [`DemoError::Scenario`] for bad TOML or values.
    pub fn parse(text: &str) -> Result<Scenario, DemoError> {
        let s: Scenario = toml::from_str(text).map_err(|e| DemoError::Scenario(e.to_string()))?;
        let bad = |m: String| Err(DemoError::Scenario(m));
        let wells = s.wells();
        if wells.is_empty() || s.time_points == 0 || s.chunks == 0 {
            return bad("treatment wells, time_points and chunks must not be empty or 0".into());
        }
        if wells.windows(2).any(|p| p[0].0 == p[1].0) {
            return bad("a well is listed under more than one treatment".into());
        }
        if let Some(t) = s
            .treatments
            .iter()
            .find(|t| !(t.growth_per_step > 0.0 && t.growth_per_step.is_finite()))
        {
            return bad(format!(
                "treatment {}: growth_per_step must be above 0",
                t.dose
            ));
        }
        let last = s.time_points - 1;
        let stretch_ok = |from: usize, to: usize| from <= to && to <= last;
        let known = |well: &str| wells.iter().any(|w| w.0 == well);
        if let Some(d) = &s.defocus {
            if !known(&d.well) || !stretch_ok(d.from, d.to) {
                return bad(format!(
                    "defocus: well {} must be a treated well and {}..={} within the time points",
                    d.well, d.from, d.to
                ));
            }
        }
        if let Some(u) = &s.uneven {
            if !stretch_ok(u.from, u.to) {
                return bad(format!(
                    "uneven: {}..={} is not within the time points",
                    u.from, u.to
                ));
            }
        }
        if let Some(l) = &s.lamp {
            if l.from > last || !(l.end > 0.0 && l.end <= 1.0) {
                return bad("lamp: from must be a time point and end in (0, 1]".into());
            }
        }
        if let Some(c) = &s.corrupt {
            if !known(&c.well) || c.time_point > last {
                return bad(format!(
                    "corrupt: {} t{} is not a frame of the run",
                    c.well, c.time_point
                ));
            }
        }
        Ok(s)
    }

    /// Every well with its treatment, in plate order (`A01`, `A02`, … `B01`):
    /// the order the instrument visits them at each time point.
    pub fn wells(&self) -> Vec<(&str, &Treatment)> {
        let mut wells: Vec<(&str, &Treatment)> = self
            .treatments
            .iter()
            .flat_map(|t| t.wells.iter().map(move |w| (w.as_str(), t)))
            .collect();
        wells.sort_by_key(|w| w.0);
        wells
    }

    /// File name of one well's frame at time point `t`:
    /// `<well>_t<tttt>_<channel>.tif`.
    pub fn file_name(&self, well: &str, t: usize) -> String {
        format!("{well}_t{t:04}_{}.tif", self.channel)
    }

    /// The synthetic scene of the `well_index`-th well of [`Scenario::wells`] at
    /// time point `t`: its cells multiply or die by its dose; the defocus, the
    /// uneven illumination and the dimming lamp apply within their stretches.
    pub fn scene(&self, well_index: usize, t: usize) -> SceneSpec {
        let (well, treatment) = self.wells()[well_index];
        let objects =
            (self.start_objects as f64 * treatment.growth_per_step.powi(t as i32)).round() as usize;
        let blur = self
            .defocus
            .as_ref()
            .filter(|d| d.well == well && (d.from..=d.to).contains(&t))
            .map_or(0.0, |d| d.blur_sigma_px);
        let gradient = self
            .uneven
            .as_ref()
            .filter(|u| (u.from..=u.to).contains(&t))
            .map_or(0.0, |u| u.gradient);
        // Dimmer at every time point from `from` on, down to `end` at the last.
        let lamp = self.lamp.as_ref().filter(|l| t >= l.from).map_or(1.0, |l| {
            let late = (t + 1 - l.from) as f64 / (self.time_points - l.from) as f64;
            1.0 - late * (1.0 - l.end)
        });
        SceneSpec {
            width: self.size_px,
            height: self.size_px,
            bit_depth: self.bit_depth,
            object_count: objects,
            radius_px: (4.0, 8.0),
            object_level: self.object_level,
            object_level_spread: self.object_level_spread,
            lamp,
            gradient,
            gradient_angle_rad: 0.6,
            blur_sigma_px: blur,
            // One seed per well: the same cells all night, more or fewer of
            // them as they divide or die (layouts are prefix-stable).
            seed: well_index as u64 + 1,
            ..SceneSpec::default()
        }
    }
}

/// Where a demo keeps everything: the folder and what the demo writes in it.
/// The folder is kept after the demo, so every path stays valid; the summary
/// ends by listing them ([`run`]).
#[derive(Debug, Clone, PartialEq)]
pub struct DemoPaths {
    /// The demo's own folder.
    pub folder: PathBuf,
    /// The watched folder the frames are written into.
    pub acquisition: PathBuf,
    /// The run's database.
    pub database: PathBuf,
    /// The service's log, one line per frame.
    pub log: PathBuf,
    /// The alerts, one JSON document per line.
    pub alerts: PathBuf,
    /// The morning report of the run (HTML).
    pub report: PathBuf,
}

impl DemoPaths {
    /// The paths inside `folder`.
    pub fn new(folder: &Path) -> DemoPaths {
        DemoPaths {
            folder: folder.to_path_buf(),
            acquisition: folder.join("acquisition"),
            database: folder.join("framewarden.db"),
            log: folder.join("framewarden.log"),
            alerts: folder.join("alerts.jsonl"),
            report: folder.join("report.html"),
        }
    }
}

/// Replays `scenario` into `paths.acquisition` while the watch service records
/// it into `paths.database`, then writes the short summary to `out`: the
/// counts per dose, the flags and alerts with the wells and time points they
/// concern, and where everything is.
///
/// # Errors
/// [`DemoError`] for folder, scenario, service start-up or database problems.
pub fn run(scenario: &Scenario, paths: &DemoPaths, out: &mut dyn Write) -> Result<(), DemoError> {
    let io = |path: &Path| {
        let path = path.to_path_buf();
        move |source| DemoError::Io { path, source }
    };
    let acq = &paths.acquisition;
    let staging = paths.folder.join("instrument-buffer");
    std::fs::create_dir_all(acq).map_err(io(acq))?;
    std::fs::create_dir_all(&staging).map_err(io(&staging))?;
    // The first four time points make each well's baseline. Two metrics are
    // charted, each the sign of one trouble of the night: the background level
    // (the lamp) and the illumination change (the lid). The counts change on
    // purpose (that is the experiment) and a blurred frame is judged against its
    // well's baseline focus by the out_of_focus flag, so counts, focus, threshold
    // and separability (which blur and dimming move too) stay off the charts.
    // The run completes with its last frame: alerts still open then are closed
    // with a final message, as at the end of a real plate run.
    let expected_frames = scenario.wells().len() * scenario.time_points;
    let config = demo_config(acq, &paths.database, &paths.alerts, expected_frames);
    let settings: Settings = crate::settings::from_text(&config, &paths.folder.join("demo.toml"))
        .map_err(|e| DemoError::Scenario(format!("demo settings: {e}")))?;
    let service = Service::start(&settings, &WatchOptions { new_run: true })?;
    let wells = scenario.wells();
    let _ = writeln!(
        out,
        "framewarden demo: an invented night, {} wells x {} time points, {} in a dose series\n  \
         (compound invented, frames drawn from fixed seeds) written into {}",
        wells.len(),
        scenario.time_points,
        scenario.compound,
        acq.display()
    );
    let started = Instant::now();
    let mut written = 0usize;
    for t in 0..scenario.time_points {
        let step_start = Instant::now();
        for (w, (well, _)) in wells.iter().enumerate() {
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
                .map_err(io(acq))?;
            written += 1;
        }
        let interval = Duration::from_millis(scenario.interval_ms);
        std::thread::sleep(interval.saturating_sub(step_start.elapsed()));
    }
    std::fs::remove_dir(&staging).map_err(io(&staging))?;
    // Wait until every written file has its row (done or failed).
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        let report = status::read(&paths.database, 0, None, None)?;
        if report.frames_seen as usize >= written && report.frames_queued == 0
            || Instant::now() > deadline
        {
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let summary = service.stop();
    let _ = writeln!(
        out,
        "recorded {} frames ({} done, {} failed) in {:.0} s\n",
        summary.done + summary.failed,
        summary.done,
        summary.failed,
        started.elapsed().as_secs_f64()
    );
    let night = Night::read(&paths.database, summary.run_id)?;
    let _ = write!(out, "{}", night.render(scenario));
    crate::html_report::write(&paths.database, Some(summary.run_id), None, &paths.report)?;
    let _ = write!(out, "{}", where_things_are(paths));
    Ok(())
}

/// What the demo's folder holds, for the end of the summary.
fn where_things_are(paths: &DemoPaths) -> String {
    let db = paths.database.display();
    format!(
        "\nkept (delete it when done): {}\n  \
         frames    {}\n  \
         database  {db}   (framewarden status --db {db})\n  \
         log       {}   (one line per frame)\n  \
         alerts    {}\n  \
         report    {}   (open it in a browser: counts, charts, flagged frames)\n",
        paths.folder.display(),
        paths.acquisition.display(),
        paths.log.display(),
        paths.alerts.display(),
        paths.report.display()
    )
}

/// One recorded frame of the demo, as the summary needs it.
struct FrameRow {
    file: String,
    well: String,
    time_point: usize,
    /// The first segmentation's count; `None` for a failed file.
    raw: Option<i64>,
    /// The count used (the recount where it ran).
    used: Option<i64>,
    /// The recount's count, where the remedy ran.
    recount: Option<i64>,
    flags: Vec<String>,
    error: Option<String>,
}

/// The recorded night: every frame and alert episode of the run.
struct Night {
    frames: Vec<FrameRow>,
    alerts: Vec<AlertRow>,
}

impl Night {
    fn read(db: &Path, run_id: i64) -> Result<Night, StoreError> {
        let conn = store::open_read_only(db)?;
        let sqlite = |source| StoreError::Sqlite {
            path: db.to_path_buf(),
            source,
        };
        let mut stmt = conn
            .prepare(&format!(
                "SELECT file, well, CAST(time_point AS INTEGER), object_count, {COUNT_USED_SQL},
                        recount_object_count,
                        (SELECT group_concat(flag, ' ') FROM flags WHERE frame_id = frames.id),
                        error
                 FROM frames WHERE run_id = ?1 AND well IS NOT NULL AND time_point IS NOT NULL
                 ORDER BY well, CAST(time_point AS INTEGER)"
            ))
            .map_err(sqlite)?;
        let frames = stmt
            .query_map([run_id], |r| {
                let flags: Option<String> = r.get(6)?;
                Ok(FrameRow {
                    file: r.get(0)?,
                    well: r.get(1)?,
                    time_point: r.get::<_, i64>(2)?.max(0) as usize,
                    raw: r.get(3)?,
                    used: r.get(4)?,
                    recount: r.get(5)?,
                    flags: flags
                        .map(|f| f.split(' ').map(str::to_string).collect())
                        .unwrap_or_default(),
                    error: r.get(7)?,
                })
            })
            .and_then(|rows| rows.collect::<Result<Vec<_>, _>>())
            .map_err(sqlite)?;
        let alerts = crate::qc::report::alerts(&conn, run_id).map_err(sqlite)?;
        Ok(Night { frames, alerts })
    }

    /// The summary: counts per dose, then each flag, the recounts, the
    /// failures and the alerts with the wells and time points they concern.
    fn render(&self, s: &Scenario) -> String {
        let mut out = String::from("count used per well, first -> last time point:\n");
        for t in &s.treatments {
            let mut line = format!("  {:<10}", t.dose);
            for well in &t.wells {
                let counts: Vec<i64> = self
                    .frames
                    .iter()
                    .filter(|f| f.well == *well)
                    .filter_map(|f| f.used)
                    .collect();
                if let (Some(first), Some(last)) = (counts.first(), counts.last()) {
                    line.push_str(&format!("  {well} {first:>3} -> {last:<3}"));
                }
            }
            out.push_str(line.trim_end());
            out.push('\n');
        }
        let all_wells: Vec<&str> = s.wells().iter().map(|w| w.0).collect();
        let mut by_flag: BTreeMap<&str, Vec<&FrameRow>> = BTreeMap::new();
        for f in &self.frames {
            for flag in &f.flags {
                by_flag.entry(flag).or_default().push(f);
            }
        }
        out.push_str("\nflagged frames:\n");
        if by_flag.is_empty() {
            out.push_str("  none\n");
        }
        for (flag, frames) in &by_flag {
            out.push_str(&format!(
                "  {flag:<20} {:>3}  {}\n",
                frames.len(),
                places(frames, &all_wells)
            ));
        }
        let recounted: Vec<&FrameRow> =
            self.frames.iter().filter(|f| f.recount.is_some()).collect();
        let changed: Vec<&FrameRow> = recounted
            .iter()
            .copied()
            .filter(|f| f.recount != f.raw)
            .collect();
        if !recounted.is_empty() {
            let examples: Vec<String> = changed
                .iter()
                .take(3)
                .map(|f| {
                    format!(
                        "{} t{}: {} -> {} ({} drawn)",
                        f.well,
                        f.time_point,
                        f.raw.unwrap_or(0),
                        f.used.unwrap_or(0),
                        s.wells()
                            .iter()
                            .position(|w| w.0 == f.well)
                            .map_or(0, |w| s.scene(w, f.time_point).object_count)
                    )
                })
                .collect();
            out.push_str(&format!(
                "  recounted after flattening: {} frames, {} with another count{}{}\n",
                recounted.len(),
                changed.len(),
                if examples.is_empty() { "" } else { ", e.g. " },
                examples.join(", ")
            ));
        }
        for f in self.frames.iter().filter(|f| f.error.is_some()) {
            out.push_str(&format!(
                "  failed               {} t{}: {}\n",
                f.well,
                f.time_point,
                f.error.as_deref().unwrap_or_default()
            ));
        }
        out.push_str("\nalerts:\n");
        if self.alerts.is_empty() {
            out.push_str("  none\n");
        }
        for a in self.alerts.iter().take(MAX_ALERTS_SHOWN) {
            let at = a
                .frame
                .as_deref()
                .and_then(|file| self.frames.iter().find(|f| f.file == file))
                .map_or(String::new(), |f| {
                    format!(" at {} t{}", f.well, f.time_point)
                });
            let state = if a.closed_at.is_some() {
                "closed"
            } else {
                "OPEN"
            };
            out.push_str(&format!("  [{state}] {}{at}: {}\n", a.condition, a.message));
        }
        if self.alerts.len() > MAX_ALERTS_SHOWN {
            out.push_str(&format!(
                "  … and {} more (framewarden status)\n",
                self.alerts.len() - MAX_ALERTS_SHOWN
            ));
        }
        out
    }
}

/// Alert episodes listed in the summary; `status` shows them all.
const MAX_ALERTS_SHOWN: usize = 6;

/// Where frames lie, compactly: wells sharing the same time points are listed
/// together (`every well` when all share them), each time point run as a
/// range: `A02 t6-t8`, `every well t9-t10`.
fn places(frames: &[&FrameRow], all_wells: &[&str]) -> String {
    let mut times: BTreeMap<&str, Vec<usize>> = BTreeMap::new();
    for f in frames {
        times.entry(&f.well).or_default().push(f.time_point);
    }
    let mut groups: Vec<(Vec<&str>, Vec<usize>)> = Vec::new();
    for (well, tps) in times {
        match groups.iter_mut().find(|g| g.1 == tps) {
            Some(g) => g.0.push(well),
            None => groups.push((vec![well], tps)),
        }
    }
    groups
        .iter()
        .map(|(wells, tps)| {
            let who = if wells.len() == all_wells.len() && all_wells.len() > 1 {
                "every well".to_string()
            } else {
                wells.join(" ")
            };
            format!("{who} {}", ranges(tps))
        })
        .collect::<Vec<_>>()
        .join("; ")
}

/// Sorted time points as runs: `[6, 7, 8, 11]` -> `t6-t8 t11`.
fn ranges(tps: &[usize]) -> String {
    let mut runs: Vec<(usize, usize)> = Vec::new();
    for &t in tps {
        match runs.last_mut() {
            Some(run) if run.1 + 1 == t => run.1 = t,
            _ => runs.push((t, t)),
        }
    }
    runs.iter()
        .map(|&(a, b)| {
            if a == b {
                format!("t{a}")
            } else {
                format!("t{a}-t{b}")
            }
        })
        .collect::<Vec<_>>()
        .join(" ")
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

/// The demo's settings as TOML, the run complete at `expected_frames`. Paths
/// are written as escaped TOML strings: Windows paths are full of backslashes.
fn demo_config(acq: &Path, db: &Path, alerts: &Path, expected_frames: usize) -> String {
    let quoted = |p: &Path| toml::Value::String(p.display().to_string()).to_string();
    format!(
        "[watch]\nfolders = [{}]\nsettle_ms = 300\nretry_limit = 3\nretry_backoff_ms = 200\n\
         name_pattern = '^(?P<well>[A-P]\\d{{2}})_t(?P<time_point>\\d+)_(?P<channel>[^.]+)\\.tif$'\n\
         [store]\ndatabase = {}\n\
         [quality]\nbaseline_frames = 4\nexpected_frames = {expected_frames}\n\
         on_uneven_illumination = \"flatten\"\n\
         charted_metrics = [\"background_level\", \"illumination_change\"]\n\
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
        let text = demo_config(&acq, &db, &alerts, 128);
        let settings = crate::settings::parse(&text, &dir.join("demo.toml"))
            .unwrap()
            .read_files()
            .unwrap();
        assert_eq!(settings.quality.expected_frames, Some(128));
        assert_eq!(settings.watch.folders, vec![acq]);
        assert_eq!(settings.store.database, db);
        assert_eq!(settings.alerts.file, Some(alerts));
    }

    #[test]
    fn the_built_in_scenario_tells_its_story_frame_by_frame() {
        let s = Scenario::parse(DEFAULT_SCENARIO).unwrap();
        let wells = s.wells();
        let index = |name: &str| wells.iter().position(|w| w.0 == name).unwrap();
        let last = s.time_points - 1;
        // The vehicle grows, the highest dose dies back.
        let (vehicle, high) = (index("A01"), index("A04"));
        assert!(s.scene(vehicle, last).object_count > s.scene(vehicle, 0).object_count);
        assert!(s.scene(high, last).object_count < s.scene(high, 0).object_count);
        // Blur only in the defocused well's stretch.
        let d = s.defocus.clone().unwrap();
        for (w, (name, _)) in wells.iter().enumerate() {
            for t in 0..s.time_points {
                let blurred = *name == d.well && (d.from..=d.to).contains(&t);
                assert_eq!(s.scene(w, t).blur_sigma_px > 0.0, blurred, "{name} t{t}");
            }
        }
        // Uneven light only in its stretch; the lamp dims from its first time
        // point on, to its end value at the last one.
        let (u, l) = (s.uneven.clone().unwrap(), s.lamp.clone().unwrap());
        assert_eq!(s.scene(0, u.from).gradient, u.gradient);
        assert_eq!(s.scene(0, u.to + 1).gradient, 0.0);
        assert_eq!(s.scene(0, l.from - 1).lamp, 1.0);
        assert!(s.scene(0, l.from).lamp < 1.0);
        assert!((s.scene(0, last).lamp - l.end).abs() < 1e-12);
        assert_eq!(s.file_name("B03", 6), "B03_t0006_nuclei.tif");
    }

    #[test]
    fn scenarios_that_do_not_fit_together_are_refused() {
        let refused = |from: &str, to: &str| {
            assert!(DEFAULT_SCENARIO.contains(from), "{from}");
            match Scenario::parse(&DEFAULT_SCENARIO.replace(from, to)) {
                Err(DemoError::Scenario(m)) => m,
                other => panic!("{to}: {other:?}"),
            }
        };
        assert!(refused("well = \"A02\"", "well = \"H12\"").starts_with("defocus: well H12"));
        assert!(refused("to = 10", "to = 99").starts_with("defocus:"));
        assert!(refused("to = 6", "to = 4").starts_with("uneven: 5..=4"));
        assert!(refused("[\"A02\", \"B02\"]", "[\"A01\"]").contains("more than one treatment"));
        assert!(refused("end = 0.5", "end = 0.0").starts_with("lamp:"));
        assert!(refused("time_point = 7", "time_point = 16").starts_with("corrupt: B03 t16"));
    }

    #[test]
    fn flagged_frames_are_told_by_well_and_time_point_runs() {
        let row = |well: &str, time_point: usize| FrameRow {
            file: String::new(),
            well: well.into(),
            time_point,
            raw: None,
            used: None,
            recount: None,
            flags: Vec::new(),
            error: None,
        };
        let rows = [row("A02", 6), row("A02", 7), row("A02", 8), row("A02", 11)];
        let refs: Vec<&FrameRow> = rows.iter().collect();
        assert_eq!(places(&refs, &["A01", "A02"]), "A02 t6-t8 t11");
        let rows = [
            row("A01", 9),
            row("A02", 9),
            row("A01", 10),
            row("A02", 10),
            row("B01", 3),
        ];
        let refs: Vec<&FrameRow> = rows.iter().collect();
        assert_eq!(places(&refs, &["A01", "A02"]), "every well t9-t10; B01 t3");
        assert_eq!(places(&refs[..4], &["A01", "A02", "B01"]), "A01 A02 t9-t10");
    }
}
