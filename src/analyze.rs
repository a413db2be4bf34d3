//! The one-shot `analyze` command: files and folders in, a table or JSON lines
//! out, one line per frame, in the order the paths were given.

use std::collections::BTreeMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

use serde::Serialize;

use crate::analysis::FrameResult;
use crate::encode::write_label_image;
use crate::pipeline::{analyze_file, analyze_file_with_labels, FileAnalysis};
use crate::qc::flags::{explain_recount, frame_flags, PositionContext};
use crate::qc::metrics::FrameMetrics;
use crate::qc::report::FlagRow;
use crate::settings::Settings;
use crate::text::shown;

/// File name endings taken from folders (explicit file arguments are always tried).
pub const IMAGE_EXTENSIONS: [&str; 3] = ["tif", "tiff", "png"];

/// True when `path` ends in one of [`IMAGE_EXTENSIONS`] (any case).
pub fn is_image_name(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| IMAGE_EXTENSIONS.iter().any(|x| e.eq_ignore_ascii_case(x)))
}

/// Expands folders (recursively, sorted) into image files; files pass through.
///
/// # Errors
/// A message naming a path that does not exist or a folder that cannot be read.
pub fn expand_paths(paths: &[PathBuf]) -> Result<Vec<PathBuf>, String> {
    let mut out = Vec::new();
    for p in paths {
        let meta = std::fs::metadata(p).map_err(|e| format!("{}: {e}", p.display()))?;
        if meta.is_dir() {
            collect_dir(p, &mut out)?;
        } else {
            out.push(p.clone());
        }
    }
    Ok(out)
}

fn collect_dir(dir: &Path, out: &mut Vec<PathBuf>) -> Result<(), String> {
    let mut entries: Vec<PathBuf> = std::fs::read_dir(dir)
        .map_err(|e| format!("{}: {e}", dir.display()))?
        .filter_map(|e| e.ok().map(|e| e.path()))
        .collect();
    entries.sort();
    for p in entries {
        if p.is_dir() {
            collect_dir(&p, out)?;
        } else if is_image_name(&p) {
            out.push(p);
        }
    }
    Ok(())
}

/// One JSON line: the file, its pixel-size source, its flags, every frame
/// measure, and the recount (null unless the frame was flagged for uneven
/// illumination and `[quality] on_uneven_illumination = "flatten"`).
#[derive(Serialize)]
struct JsonLine<'a> {
    file: String,
    pixel_size_source: Option<&'static str>,
    flags: Vec<FlagRow>,
    #[serde(flatten)]
    result: &'a FrameResult,
    recount: Option<&'a FrameResult>,
    /// The label image written for this frame (with `--labels`).
    #[serde(skip_serializing_if = "Option::is_none")]
    labels: Option<String>,
}

/// One file's outcome: its analysis and the label image written for it, or
/// the error (naming the file) that stopped either.
type Outcome = Result<(FileAnalysis, Option<PathBuf>), String>;

/// Where each file's label image goes in `dir`: `<file stem>.labels.tif`,
/// with `-2`, `-3`, … added when two inputs share a stem.
pub fn label_paths(files: &[PathBuf], dir: &Path) -> Vec<PathBuf> {
    let mut used: BTreeMap<String, usize> = BTreeMap::new();
    files
        .iter()
        .map(|f| {
            let stem = f
                .file_stem()
                .map_or_else(|| "frame".into(), |s| s.to_string_lossy().into_owned());
            let n = used.entry(stem.clone()).or_insert(0);
            *n += 1;
            let name = if *n == 1 {
                format!("{stem}.labels.tif")
            } else {
                format!("{stem}-{n}.labels.tif")
            };
            dir.join(name)
        })
        .collect()
}

/// Analyzes one file, writing its label image to `labels` when given.
fn analyze_one(path: &Path, settings: &Settings, labels: Option<&Path>) -> Outcome {
    let Some(out) = labels else {
        return analyze_file(path, &settings.pipeline)
            .map(|a| (a, None))
            .map_err(|e| e.to_string());
    };
    let (analysis, image) =
        analyze_file_with_labels(path, &settings.pipeline).map_err(|e| e.to_string())?;
    let r = &analysis.result;
    write_label_image(out, r.width, r.height, &image).map_err(|e| e.to_string())?;
    Ok((analysis, Some(out.to_path_buf())))
}

#[derive(Serialize)]
struct JsonError {
    file: String,
    error: String,
}

/// Analyzes `files` with `workers` threads and writes one line per file to
/// `out`, in input order; with `labels`, each file's label image goes into
/// that folder (see [`label_paths`]). Returns the number of files that failed.
///
/// # Errors
/// Only an error writing to `out`.
pub fn run(
    files: &[PathBuf],
    settings: &Settings,
    json: bool,
    workers: usize,
    labels: Option<&Path>,
    out: &mut dyn Write,
) -> std::io::Result<usize> {
    let label_files = labels.map(|dir| label_paths(files, dir));
    if !json {
        writeln!(out, "{}", table_header())?;
    }
    let mut failed = 0;
    in_order(
        files.len(),
        workers,
        |i| {
            analyze_one(
                &files[i],
                settings,
                label_files.as_deref().map(|l| l[i].as_path()),
            )
        },
        |i, result| {
            let file = files[i].display().to_string();
            if result.is_err() {
                failed += 1;
            }
            let flags = result
                .as_ref()
                .map_or_else(|_| Vec::new(), |(a, _)| flags_of(a, settings));
            let line = if json {
                json_line(file, &result, flags)
            } else {
                table_line(&file, &result, &flags)
            };
            writeln!(out, "{line}")
        },
    )?;
    Ok(failed)
}

/// Runs `job(0)` … `job(n - 1)` on `workers` threads (each takes the next
/// index when it is free) and hands each result to `each` on the calling
/// thread in index order, as soon as it and all before it are finished. At
/// most `2 × workers` finished results wait. The pool of `analyze` and
/// `reprocess`.
///
/// # Errors
/// The first error `each` returns; the workers then stop taking jobs.
pub fn in_order<T: Send, E>(
    n: usize,
    workers: usize,
    job: impl Fn(usize) -> T + Sync,
    mut each: impl FnMut(usize, T) -> Result<(), E>,
) -> Result<(), E> {
    let next = AtomicUsize::new(0);
    let workers = workers.max(1);
    let (tx, rx) = std::sync::mpsc::sync_channel::<(usize, T)>(workers * 2);
    std::thread::scope(|scope| {
        for _ in 0..workers {
            let tx = tx.clone();
            let (next, job) = (&next, &job);
            scope.spawn(move || loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                if i >= n || tx.send((i, job(i))).is_err() {
                    break;
                }
            });
        }
        drop(tx);
        let mut pending = BTreeMap::new();
        let mut handed = 0;
        for (i, result) in rx {
            pending.insert(i, result);
            while let Some(result) = pending.remove(&handed) {
                handed += 1;
                if let Err(e) = each(handed - 1, result) {
                    // Receiving no more makes every worker's next send fail.
                    next.store(n, Ordering::Relaxed);
                    return Err(e);
                }
            }
        }
        Ok(())
    })
}

/// The flags a single frame earns on its own, with the `[quality]` limits: those
/// that need the run's history (focus against a baseline, count jumps, empty
/// frames) belong to `watch`.
fn flags_of(a: &FileAnalysis, settings: &Settings) -> Vec<FlagRow> {
    let metrics = FrameMetrics::from(&a.result);
    let mut flags = frame_flags(
        &metrics,
        &settings.quality.flags,
        &PositionContext::default(),
    );
    if let Some(recount) = &a.recount {
        explain_recount(&mut flags, &a.result, recount);
    }
    flags.into_iter().map(FlagRow::from).collect()
}

fn json_line(file: String, result: &Outcome, flags: Vec<FlagRow>) -> String {
    // Serialising plain data with finite floats cannot fail.
    match result {
        Ok((a, labels)) => serde_json::to_string(&JsonLine {
            file,
            pixel_size_source: a.pixel_size_source.map(|s| s.as_str()),
            flags,
            result: &a.result,
            recount: a.recount.as_ref(),
            labels: labels.as_ref().map(|p| p.display().to_string()),
        }),
        Err(e) => serde_json::to_string(&JsonError {
            file,
            error: e.clone(),
        }),
    }
    .unwrap_or_else(|e| format!("{{\"error\":\"cannot serialise result: {e}\"}}"))
}

fn table_header() -> String {
    format!(
        "{:<40} {:>7} {:>9} {:>6} {:>7} {:>10} {:>6} {:>10} {:>7}  flags",
        "file", "objects", "threshold", "eta", "fg %", "background", "sat %", "focus", "illum %"
    )
}

fn table_line(file: &str, result: &Outcome, flags: &[FlagRow]) -> String {
    let file = shown(file);
    let name = if file.chars().count() > 40 {
        let tail: String = file
            .chars()
            .rev()
            .take(39)
            .collect::<Vec<_>>()
            .into_iter()
            .rev()
            .collect();
        format!("…{tail}")
    } else {
        file.to_string()
    };
    match result {
        Ok((a, _)) => {
            let r = &a.result;
            // The count used: the recount's when there is one (marked *).
            let mark = if a.recount.is_some() { "*" } else { "" };
            let objects = format!("{}{mark}", a.count_used());
            format!(
                "{:<40} {:>7} {:>9} {:>6.3} {:>7.2} {:>10.1} {:>6.2} {:>10.4} {:>7.1}  {}",
                name,
                objects,
                r.threshold,
                r.separability,
                100.0 * r.foreground_fraction,
                r.background_level,
                100.0 * r.saturation_fraction,
                r.focus,
                100.0 * r.illumination_change,
                flags
                    .iter()
                    .map(|f| f.flag.as_str())
                    .collect::<Vec<_>>()
                    .join(",")
            )
        }
        Err(e) => format!("{name:<40} error: {}", shown(e)),
    }
}
