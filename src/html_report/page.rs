//! The report page: one self-contained HTML file (styles inline, plots as
//! inline SVG, pictures as PNG data URIs, nothing fetched), written
//! atomically so a browser on another PC never opens half a file.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

use base64::Engine as _;
use rusqlite::{Connection, OptionalExtension};

use crate::decode;
use crate::html_report::data::{self, Episode, FrameRow, RunData};
use crate::html_report::plots::{self, CountPoint, TimeAxis};
use crate::html_report::thumbs::{self, STRETCH_PERCENTILES};
use crate::pipeline::analyze_file_with_labels;
use crate::qc::metrics::Metric;
use crate::qc::monitor::drift_condition;
use crate::settings::Settings;
use crate::status::{self, StatusReport};
use crate::store::{self, StoreError};

/// Flagged frames shown with pictures; the rest are listed.
pub const MAX_PICTURED: usize = 48;

/// Positions that left control drawn one by one per metric; the rest are
/// counted (the overview plot shows them all).
pub const MAX_MULTIPLES: usize = 24;

/// Why the report could not be made.
#[derive(Debug, thiserror::Error)]
pub enum ReportError {
    /// The database could not be read.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The database has no run yet.
    #[error("{0} has no run yet: nothing to report")]
    NoRun(PathBuf),
    /// A plot could not be drawn.
    #[error("cannot draw a plot: {0}")]
    Plot(String),
    /// The report file could not be written.
    #[error("cannot write the report {path}: {source}")]
    Write {
        /// The report file.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
}

/// What was written.
#[derive(Debug, Clone, PartialEq)]
pub struct Written {
    /// The run reported.
    pub run_id: i64,
    /// The report's size in bytes.
    pub bytes: usize,
}

/// Writes the report of run `run` (the last one by default) of `db`, as
/// analysis `analysis` gave it (the newest by default), to `out`:
/// first to a temporary file beside it, then renamed over it.
///
/// # Errors
/// [`ReportError`].
pub fn write(
    db: &Path,
    run: Option<i64>,
    analysis: Option<i64>,
    out: &Path,
) -> Result<Written, ReportError> {
    let (run_id, html) = render(db, run, analysis)?;
    let failed = |source| ReportError::Write {
        path: out.to_path_buf(),
        source,
    };
    if let Some(folder) = out.parent().filter(|p| !p.as_os_str().is_empty()) {
        std::fs::create_dir_all(folder).map_err(failed)?;
    }
    let mut temp = out.as_os_str().to_owned();
    temp.push(format!(".{}.partial", std::process::id()));
    let temp = PathBuf::from(temp);
    std::fs::write(&temp, html.as_bytes()).map_err(failed)?;
    std::fs::rename(&temp, out).map_err(|e| {
        let _ = std::fs::remove_file(&temp);
        failed(e)
    })?;
    Ok(Written {
        run_id,
        bytes: html.len(),
    })
}

/// The run row's own values.
struct RunRow {
    id: i64,
    started_ms: i64,
    ended_ms: Option<i64>,
    settings: String,
    settings_format: String,
}

/// The report of run `run` (the last one by default) as analysis `analysis`
/// gave it (the newest by default) as HTML, with the run's number.
///
/// # Errors
/// [`ReportError`].
pub fn render(
    db: &Path,
    run: Option<i64>,
    analysis: Option<i64>,
) -> Result<(i64, String), ReportError> {
    let status = status::read(db, 0, run, analysis)?;
    let Some(info) = &status.run else {
        return Err(ReportError::NoRun(db.to_path_buf()));
    };
    let sqlite = |source| StoreError::Sqlite {
        path: db.to_path_buf(),
        source,
    };
    let (row, data) = store::read_run(db, Some(info.id), Some(info.analysis), |tx, _| {
        let row = run_row(tx, info.id, info.analysis).map_err(sqlite)?;
        let data = data::read(tx, info.id).map_err(sqlite)?;
        Ok::<_, StoreError>((row, data))
    })?;
    let Some(row) = row else {
        return Err(ReportError::NoRun(db.to_path_buf()));
    };
    let settings = (row.settings_format == "toml")
        .then(|| Settings::from_toml(&row.settings, &format!("run {} settings", row.id)));
    let html = Page {
        db,
        label_images: info.analysis == 1,
        status: &status,
        run: &row,
        data: &data,
        settings: settings.as_ref(),
    }
    .html()
    .map_err(ReportError::Plot)?;
    Ok((row.id, html))
}

/// The run's row, with the settings of its analysis `analysis` (a
/// reprocess's own; the run's for the watch service's).
fn run_row(conn: &Connection, id: i64, analysis: i64) -> rusqlite::Result<Option<RunRow>> {
    let row = conn
        .query_row(
            "SELECT id, started_at_ms, ended_at_ms, settings, settings_format FROM runs WHERE id = ?1",
            [id],
            |r| {
                Ok(RunRow {
                    id: r.get(0)?,
                    started_ms: r.get(1)?,
                    ended_ms: r.get(2)?,
                    settings: r.get(3)?,
                    settings_format: r.get(4)?,
                })
            },
        )
        .optional()?;
    if analysis == 1 {
        return Ok(row);
    }
    let settings: String = conn.query_row(
        "SELECT settings FROM analyses WHERE run_id = ?1 AND number = ?2",
        [id, analysis],
        |r| r.get(0),
    )?;
    Ok(row.map(|row| RunRow {
        settings,
        settings_format: "toml".into(),
        ..row
    }))
}

/// Text made safe inside HTML elements and attribute values.
fn esc(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// What a picture's outlines show: the objects counted, as the label images
/// hold them.
const COUNTED: &str = "the objects counted: the recount's where it ran";

/// A time in the computer's time zone with its UTC offset.
fn local(ms: i64) -> String {
    crate::text::shown_time_ms(ms, &jiff::tz::TimeZone::system())
}

/// A well name as (row, column), e.g. `B07` -> (1, 7).
fn plate_cell(well: &str) -> Option<(usize, usize)> {
    let letters: String = well.chars().take_while(char::is_ascii_alphabetic).collect();
    let digits = &well[letters.len()..];
    if letters.len() != 1 || digits.is_empty() || !digits.chars().all(|c| c.is_ascii_digit()) {
        return None;
    }
    let row = usize::from(letters.to_ascii_uppercase().as_bytes()[0] - b'A');
    Some((row, digits.parse().ok()?))
}

const STYLE: &str = "
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:0 auto;max-width:1600px;padding:0 1.2em 3em;color:#111;line-height:1.4}
h1{margin:.6em 0 .1em}h2{border-bottom:2px solid #0072b2;padding-bottom:.15em;margin-top:1.8em}
.note{color:#444;font-size:.92em}
dl.summary{display:grid;grid-template-columns:max-content auto;gap:.2em 1.2em;margin:.6em 0}
dl.summary dt{font-weight:600}dl.summary dd{margin:0}
.plate{display:grid;gap:4px;overflow-x:auto}
.plate .head{font-weight:600;text-align:center;align-self:center}
.cell{border:1px solid #ddd;border-radius:4px;padding:2px;min-width:0}
.cell.empty{background:#f4f4f4}
.cell svg,.list svg{width:100%;height:auto;display:block}
.cell .name{font-size:.75em;font-weight:600;text-align:center;white-space:nowrap;overflow:hidden;text-overflow:ellipsis}
.list{display:grid;grid-template-columns:repeat(auto-fill,minmax(220px,1fr));gap:6px}
svg{max-width:100%;height:auto}
.multiples{display:grid;grid-template-columns:repeat(auto-fill,minmax(370px,1fr));gap:6px}
table{border-collapse:collapse;font-size:.92em}td,th{border:1px solid #ccc;padding:.25em .5em;vertical-align:top;text-align:left}
.pair{display:flex;gap:1em;flex-wrap:wrap;border:1px solid #ddd;border-radius:4px;padding:.6em;margin:.8em 0}
.pair figure{margin:0;width:322px}.pair figcaption{font-size:.85em}.pair img{image-rendering:pixelated;width:320px;height:auto;border:1px solid #999}
.pair .flags{flex:1;min-width:280px}
.key span{display:inline-block;width:1em;height:.8em;margin:0 .3em 0 .8em;vertical-align:middle}
pre{background:#f6f6f6;padding:.6em;overflow-x:auto;font-size:.85em}
code{overflow-wrap:anywhere}
";

struct Page<'a> {
    db: &'a Path,
    /// Whether the frames' label images (the watch service's segmentation)
    /// outline the pictures: not for a reprocess's analysis.
    label_images: bool,
    status: &'a StatusReport,
    run: &'a RunRow,
    data: &'a RunData,
    settings: Option<&'a Result<Settings, crate::settings::ConfigError>>,
}

/// A picture of one frame, or why there is none.
struct Picture {
    png: Option<(Vec<u8>, usize)>,
    /// Where the outlines come from, or why there are none.
    source: String,
    /// `label-image`, `resegmented` or `none`.
    kind: &'static str,
}

impl Page<'_> {
    fn settings(&self) -> Option<&Settings> {
        self.settings.and_then(|s| s.as_ref().ok())
    }

    /// The plots' time axis, in acquisition time: from the run's start (or
    /// the first acquisition, when earlier: a run recorded after the fact) to
    /// the last acquisition or alert.
    fn axis(&self) -> TimeAxis {
        let acquired = || self.data.frames.iter().map(|f| f.acquired_ms);
        let start = acquired()
            .chain([self.run.started_ms])
            .min()
            .unwrap_or(self.run.started_ms);
        let last = acquired()
            .chain(self.data.episodes.iter().map(|e| e.opened_acquired_ms))
            .max()
            .unwrap_or(start);
        TimeAxis::new(start, last)
    }

    fn html(&self) -> Result<String, String> {
        let mut h = String::with_capacity(1 << 20);
        let title = format!("framewarden report, run {}", self.run.id);
        let _ = write!(
            h,
            "<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
             <meta name=\"viewport\" content=\"width=device-width,initial-scale=1\">\
             <title>{}</title><style>{STYLE}</style></head><body>\n<h1>{}</h1>\n",
            esc(&title),
            esc(&title)
        );
        let _ = writeln!(
            h,
            "<p class=\"note\">Written {} by framewarden {} from <code>{}</code>. Times are local, with their offset from UTC. \
             The plots' time axes are acquisition times \
             (when each file was first written), so a run recorded after the fact plots as it was acquired.</p>",
            local(store::now_ms()),
            env!("CARGO_PKG_VERSION"),
            esc(&self.db.display().to_string())
        );
        self.summary(&mut h);
        let axis = self.axis();
        self.positions(&mut h, &axis)?;
        self.quality(&mut h, &axis)?;
        self.alerts(&mut h, &axis)?;
        self.flagged(&mut h);
        self.failures(&mut h);
        h.push_str("</body></html>\n");
        Ok(h)
    }

    fn summary(&self, h: &mut String) {
        let s = self.status;
        let flagged = self
            .data
            .frames
            .iter()
            .filter(|f| !f.flags.is_empty())
            .count();
        h.push_str("<section id=\"run\"><h2>The run</h2><dl class=\"summary\">\n");
        let mut item = |label: &str, key: &str, value: String| {
            let _ = writeln!(h, "<dt>{label}</dt><dd data-key=\"{key}\">{value}</dd>");
        };
        let folders = s
            .run
            .as_ref()
            .map(|r| {
                r.folders
                    .iter()
                    .map(|f| format!("<code>{}</code>", esc(f)))
                    .collect::<Vec<_>>()
                    .join(", ")
            })
            .unwrap_or_default();
        item("folders", "folders", folders);
        if let Some(r) = &s.run {
            let whose = if r.analysis == 1 {
                "the watch service's"
            } else {
                "a reprocess"
            };
            item(
                "analysis",
                "analysis",
                format!("analysis {} of {} ({whose})", r.analysis, r.analyses),
            );
        }
        item("started", "started", local(self.run.started_ms));
        item(
            "ended",
            "ended",
            self.run
                .ended_ms
                .map_or_else(|| "still being watched".into(), local),
        );
        item("frames seen", "frames_seen", s.frames_seen.to_string());
        item("frames done", "frames_done", s.frames_done.to_string());
        item(
            "frames queued",
            "frames_queued",
            s.frames_queued.to_string(),
        );
        item(
            "frames failed",
            "frames_failed",
            s.frames_failed.to_string(),
        );
        item("frames flagged", "frames_flagged", flagged.to_string());
        item(
            "objects (count used, done frames)",
            "objects_total",
            s.objects_total.to_string(),
        );
        item(
            "frame rate",
            "frames_per_minute",
            s.frames_per_minute
                .map_or_else(|| "not known yet".into(), |r| format!("{r:.2} frames/min")),
        );
        item(
            "framewarden version",
            "version",
            env!("CARGO_PKG_VERSION").into(),
        );
        h.push_str("</dl>\n");
        let note = match self.settings {
            Some(Ok(_)) => String::new(),
            Some(Err(e)) => format!(
                " (they do not load: {}; frames are not re-segmented)",
                esc(&e.to_string())
            ),
            None => " (recorded by an older framewarden as a listing; frames are not re-segmented)"
                .into(),
        };
        let _ = writeln!(
            h,
            "<details><summary>settings used{note}</summary><pre>{}</pre></details></section>",
            esc(&self.run.settings)
        );
    }

    fn positions(&self, h: &mut String, axis: &TimeAxis) -> Result<(), String> {
        let mut by_position: BTreeMap<&str, Vec<&FrameRow>> = BTreeMap::new();
        for f in &self.data.frames {
            by_position.entry(&f.position).or_default().push(f);
        }
        let y_max = self
            .data
            .frames
            .iter()
            .filter_map(|f| f.count)
            .max()
            .unwrap_or(1)
            .max(1) as f64
            * 1.08;
        h.push_str("<section id=\"positions\"><h2>Counts per position</h2>\n<p class=\"note key\">Objects counted (the recount where the uneven-illumination remedy ran) against the time each file was acquired; the same scale on every plot.\
            <span style=\"background:#0072b2\"></span>count<span style=\"background:#e69f00;border-radius:50%\"></span>flagged frame<span style=\"background:#d55e00\"></span>failed frame (× on the time axis)</p>\n");
        let mut plots: BTreeMap<&str, String> = BTreeMap::new();
        for (position, frames) in &by_position {
            let points: Vec<CountPoint> = frames
                .iter()
                .map(|f| CountPoint {
                    acquired_ms: f.acquired_ms,
                    count: f.count,
                    flagged: !f.flags.is_empty(),
                })
                .collect();
            let svg = plots::count_plot(&points, axis, y_max)?;
            plots.insert(
                position,
                format!(
                    "<figure class=\"position\" data-position=\"{p}\" style=\"margin:0\"><div class=\"name\">{p}</div>{svg}</figure>",
                    p = esc(position)
                ),
            );
        }
        let wells: Option<BTreeMap<&str, (usize, usize)>> = by_position
            .values()
            .map(|frames| {
                let well = frames[0].well.as_deref()?;
                plate_cell(well).map(|c| (well, c))
            })
            .collect();
        match wells.filter(|w| !w.is_empty()) {
            Some(wells) => {
                let rows = wells.values().map(|c| c.0).max().unwrap_or(0) + 1;
                let cols = wells.values().map(|c| c.1).max().unwrap_or(1);
                let _ = writeln!(
                    h,
                    "<div class=\"plate\" style=\"grid-template-columns:2em repeat({cols},minmax(108px,1fr))\"><div></div>"
                );
                for c in 1..=cols {
                    let _ = write!(h, "<div class=\"head\">{c}</div>");
                }
                for r in 0..rows {
                    let letter = char::from(b'A' + r as u8);
                    let _ = write!(h, "<div class=\"head\">{letter}</div>");
                    for c in 1..=cols {
                        let inside: Vec<&String> = by_position
                            .iter()
                            .filter(|(_, frames)| {
                                frames[0].well.as_deref().and_then(plate_cell) == Some((r, c))
                            })
                            .filter_map(|(p, _)| plots.get(p))
                            .collect();
                        if inside.is_empty() {
                            h.push_str("<div class=\"cell empty\"></div>");
                        } else {
                            h.push_str("<div class=\"cell\">");
                            for p in inside {
                                h.push_str(p);
                            }
                            h.push_str("</div>");
                        }
                    }
                    h.push('\n');
                }
                h.push_str("</div>\n");
            }
            None => {
                h.push_str("<div class=\"list\">\n");
                for p in plots.values() {
                    let _ = writeln!(h, "<div class=\"cell\">{p}</div>");
                }
                h.push_str("</div>\n");
            }
        }
        h.push_str("</section>\n");
        Ok(())
    }

    fn drift_episodes(&self, metric: Metric) -> Vec<&Episode> {
        let condition = drift_condition(metric);
        self.data
            .episodes
            .iter()
            .filter(|e| e.condition == condition)
            .collect()
    }

    fn quality(&self, h: &mut String, axis: &TimeAxis) -> Result<(), String> {
        let defaults;
        let quality = match self.settings() {
            Some(s) => &s.quality,
            None => {
                defaults = crate::qc::params::QualitySettings::default();
                &defaults
            }
        };
        let params = &quality.charts;
        let _ = writeln!(
            h,
            "<section id=\"quality\"><h2>The night's quality</h2>\n<p class=\"note key\">Each position's drift chart, replayed from the stored frames as the service drew it: \
             a baseline from its first {} frames, then an EWMA (λ = {}, limits ±{}σ of the statistic) and a CUSUM (k = {}, h = {}). \
             <span style=\"background:#cc79a7;opacity:.5\"></span>alert episode<span style=\"background:#56b4e9\"></span>control limits (dashed)\
             <span style=\"background:#000\"></span>baseline<span style=\"background:#009e73\"></span>EWMA<span style=\"background:#d55e00\"></span>frames while the position drifts</p>",
            params.baseline_frames, params.ewma_lambda, params.ewma_width, params.cusum_k, params.cusum_h
        );
        for metric in Metric::ALL
            .into_iter()
            .filter(|m| params.charted.contains(m))
        {
            let traces = data::replay(&self.data.frames, metric, params);
            let episodes = self.drift_episodes(metric);
            let drifting: Vec<&data::Trace> = traces.iter().filter(|t| t.drifted).collect();
            let _ = writeln!(
                h,
                "<h3 id=\"metric-{name}\">{desc} <small>({name}, {unit})</small></h3>\n<p class=\"note\">{n} alert episode(s); {d} of {t} positions left control{list}.</p>",
                name = metric.as_str(),
                desc = esc(metric.describe()),
                unit = unit(metric),
                n = episodes.len(),
                d = drifting.len(),
                t = traces.len(),
                list = if drifting.is_empty() {
                    String::new()
                } else {
                    let names: Vec<&str> = drifting
                        .iter()
                        .take(MAX_MULTIPLES)
                        .map(|t| t.position.as_str())
                        .collect();
                    let more = drifting.len().saturating_sub(MAX_MULTIPLES);
                    let more = if more > 0 {
                        format!(" and {more} more")
                    } else {
                        String::new()
                    };
                    format!(" ({}{more})", esc(&names.join(", ")))
                }
            );
            h.push_str(&plots::metric_overview(&traces, &episodes, axis)?);
            if !drifting.is_empty() {
                let _ = writeln!(
                    h,
                    "<details open><summary>the positions that left control, in {}</summary>",
                    unit(metric)
                );
                if drifting.len() > MAX_MULTIPLES {
                    let _ = writeln!(
                        h,
                        "<p class=\"note\">The first {MAX_MULTIPLES} of {} are shown.</p>",
                        drifting.len()
                    );
                }
                h.push_str("<div class=\"multiples\">");
                for t in drifting.iter().take(MAX_MULTIPLES) {
                    h.push_str(&plots::metric_position(
                        t,
                        &format!("{} [{}]", metric.as_str(), unit(metric)),
                        &episodes,
                        axis,
                    )?);
                }
                h.push_str("</div></details>\n");
            }
        }
        h.push_str("</section>\n");
        Ok(())
    }

    fn alerts(&self, h: &mut String, axis: &TimeAxis) -> Result<(), String> {
        h.push_str("<section id=\"alerts\"><h2>Alerts</h2>\n");
        if self.data.episodes.is_empty() {
            h.push_str("<p>No alert during this run.</p></section>\n");
            return Ok(());
        }
        h.push_str("<p class=\"note key\"><span style=\"background:#cc79a7\"></span>closed episode<span style=\"background:#d55e00\"></span>still open at the end</p>\n");
        h.push_str(&plots::alert_timeline(&self.data.episodes, axis)?);
        h.push_str("<table><thead><tr><th>condition</th><th>opened</th><th>closed</th><th>frame</th><th>evidence</th></tr></thead><tbody>\n");
        for e in &self.data.episodes {
            let closed = e.closed_ms.map_or_else(|| "open".into(), local);
            let recovered = e
                .closed_message
                .as_deref()
                .map(|m| format!("<br><i>recovered:</i> {}", esc(m)))
                .unwrap_or_default();
            let _ = writeln!(
                h,
                "<tr><td>{}</td><td>{}</td><td>{}</td><td><code>{}</code></td><td>{}{recovered}</td></tr>",
                esc(&e.condition),
                local(e.opened_ms),
                closed,
                esc(&e.file.as_deref().map(file_name).unwrap_or_default()),
                esc(&e.message)
            );
        }
        h.push_str("</tbody></table></section>\n");
        Ok(())
    }

    /// The frame's picture with the outlines of its objects: from its label
    /// image when one was kept, else from segmenting the file again with the
    /// run's stored settings.
    fn picture(&self, frame: &FrameRow) -> Picture {
        let path = Path::new(&frame.file);
        let none = |source: String| Picture {
            png: None,
            source,
            kind: "none",
        };
        if !path.exists() {
            return none("the file is gone: no picture".into());
        }
        let Some(settings) = self.settings() else {
            return none("the run's settings cannot be loaded: no picture".into());
        };
        let page = settings.pipeline.segment.page;
        let pixels = match decode::read_page(path, page, &settings.pipeline.limits) {
            Ok(f) => f,
            Err(e) => return none(format!("the file cannot be read now: {e}")),
        };
        let label_path = store::label_image_path(self.db, frame.id);
        let kept = if self.label_images {
            thumbs::read_label_image(&label_path)
        } else {
            Err("a reprocess keeps no label images".into())
        };
        let (labels, source, kind) = match kept {
            Ok((labels, w, h)) if w == pixels.width && h == pixels.height => (
                Some(labels),
                format!(
                    "outlines from the label image {} ({COUNTED})",
                    label_path.display()
                ),
                "label-image",
            ),
            _ => match analyze_file_with_labels(path, &settings.pipeline) {
                Ok((_, labels)) => (
                    Some(labels),
                    format!("no label image kept: outlines from segmenting the file again with the run's stored settings ({COUNTED})"),
                    "resegmented",
                ),
                Err(e) => (None, format!("no outlines: {e}"), "none"),
            },
        };
        let shrink = thumbs::shrink_factor(pixels.width, pixels.height);
        let img = thumbs::thumbnail(&pixels, labels.as_deref());
        Picture {
            png: Some((thumbs::png(&img), shrink)),
            source,
            kind,
        }
    }

    fn figure(&self, h: &mut String, frame: &FrameRow, caption: &str, class: &str) {
        let pic = self.picture(frame);
        let _ = write!(h, "<figure>");
        if let Some((png, shrink)) = &pic.png {
            let _ = write!(
                h,
                "<img class=\"{class}\" data-frame-id=\"{}\" data-shrink=\"{shrink}\" data-outlines=\"{}\" alt=\"{}\" src=\"data:image/png;base64,{}\">",
                frame.id,
                pic.kind,
                esc(&file_name(&frame.file)),
                base64::engine::general_purpose::STANDARD.encode(png)
            );
        }
        let _ = write!(
            h,
            "<figcaption><b>{caption}</b> <code>{}</code><br><small>acquired {}; {}</small></figcaption></figure>",
            esc(&file_name(&frame.file)),
            local(frame.acquired_ms),
            esc(&pic.source)
        );
    }

    fn flagged(&self, h: &mut String) {
        let flagged: Vec<&FrameRow> = self
            .data
            .frames
            .iter()
            .filter(|f| !f.flags.is_empty())
            .collect();
        let _ = writeln!(
            h,
            "<section id=\"flagged\"><h2>Flagged frames</h2>\n<p class=\"note\">{} frame(s) carry quality flags. Pictures are shrunk to at most {} px, \
             their contrast stretched linearly between the {}th and {}th percentiles of the frame's pixels; object outlines in orange. \
             Beside each, the nearest unflagged frame of the same position.{}</p>",
            flagged.len(),
            thumbs::THUMB_MAX_PX,
            STRETCH_PERCENTILES.0,
            STRETCH_PERCENTILES.1,
            if flagged.len() > MAX_PICTURED {
                format!(" The first {MAX_PICTURED} are shown with pictures, the others listed below them.")
            } else {
                String::new()
            }
        );
        for f in flagged.iter().take(MAX_PICTURED) {
            let _ = write!(h, "<div class=\"pair flagged\" data-frame-id=\"{}\">", f.id);
            self.figure(h, f, "flagged", "overlay");
            let good = self
                .data
                .frames
                .iter()
                .filter(|g| g.position == f.position && g.status == "done" && g.flags.is_empty())
                .min_by_key(|g| (g.acquired_ms - f.acquired_ms).abs());
            match good {
                Some(g) => self.figure(h, g, "good frame of the same position", "comparison"),
                None => h.push_str("<p>No unflagged frame of this position to compare with.</p>"),
            }
            let _ = write!(
                h,
                "<div class=\"flags\"><p>position <b>{}</b>, count {}</p><ul>",
                esc(&f.position),
                f.count.map_or_else(|| "none".into(), |c| c.to_string())
            );
            for (flag, message) in &f.flags {
                let _ = write!(h, "<li><b>{}</b>: {}</li>", esc(flag), esc(message));
            }
            h.push_str("</ul></div></div>\n");
        }
        if flagged.len() > MAX_PICTURED {
            h.push_str("<table><thead><tr><th>file</th><th>flags</th></tr></thead><tbody>\n");
            for f in &flagged[MAX_PICTURED..] {
                let names: Vec<&str> = f.flags.iter().map(|(n, _)| n.as_str()).collect();
                let _ = writeln!(
                    h,
                    "<tr><td><code>{}</code></td><td>{}</td></tr>",
                    esc(&f.file),
                    esc(&names.join(", "))
                );
            }
            h.push_str("</tbody></table>\n");
        }
        h.push_str("</section>\n");
    }

    fn failures(&self, h: &mut String) {
        let failed: Vec<&FrameRow> = self
            .data
            .frames
            .iter()
            .filter(|f| f.status == "failed")
            .collect();
        let _ = writeln!(h, "<section id=\"failures\"><h2>Failed frames</h2>");
        if failed.is_empty() {
            h.push_str("<p>No frame failed.</p></section>\n");
            return;
        }
        h.push_str("<table><thead><tr><th>file</th><th>position</th><th>recorded</th><th>reason</th></tr></thead><tbody>\n");
        for f in failed {
            let _ = writeln!(
                h,
                "<tr class=\"failure\"><td><code>{}</code></td><td>{}</td><td>{}</td><td>{}</td></tr>",
                esc(&f.file),
                esc(&f.position),
                local(f.at_ms),
                esc(f.error.as_deref().unwrap_or("no reason recorded"))
            );
        }
        h.push_str("</tbody></table></section>\n");
    }
}

/// The last part of a path, for captions.
fn file_name(file: &str) -> String {
    Path::new(file)
        .file_name()
        .map_or_else(|| file.to_string(), |n| n.to_string_lossy().into_owned())
}

/// The unit a metric is stored in.
fn unit(metric: Metric) -> &'static str {
    match metric {
        Metric::BackgroundLevel | Metric::Threshold => "grey levels",
        Metric::IlluminationChange | Metric::Separability => "fraction",
        Metric::Focus => "contrast² per boundary px",
        Metric::ObjectCount => "objects",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn html_text_is_escaped() {
        assert_eq!(
            esc("<a href=\"x\">&'"),
            "&lt;a href=&quot;x&quot;&gt;&amp;&#39;"
        );
    }

    #[test]
    fn wells_name_plate_cells() {
        assert_eq!(plate_cell("A01"), Some((0, 1)));
        assert_eq!(plate_cell("h12"), Some((7, 12)));
        assert_eq!(plate_cell("AB1"), None);
        assert_eq!(plate_cell("A"), None);
    }
}
