//! The `framewarden` binary: parses flags, sets up logging, calls the library.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

use framewarden::settings::{self, Settings};

#[derive(Parser)]
#[command(
    name = "framewarden",
    version,
    about = "Watches a microscope acquisition overnight: segments, counts and quality-checks every frame"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Analyze image files or folders once and print one line per frame.
    Analyze {
        /// Configuration file (defaults apply without one).
        #[arg(long)]
        config: Option<PathBuf>,
        /// One JSON object per frame per line instead of a table.
        #[arg(long)]
        json: bool,
        /// Worker threads (default: one per core).
        #[arg(long)]
        workers: Option<usize>,
        /// Write each frame's label image into this folder (created if needed):
        /// <file stem>.labels.tif, 16-bit LZW TIFF (32-bit past 65,535 objects),
        /// pixel value = the object's label as in the output, 0 = background.
        #[arg(long, value_name = "DIR")]
        labels: Option<PathBuf>,
        /// Files or folders (folders are searched recursively for .tif/.tiff/.png).
        #[arg(required = true)]
        paths: Vec<PathBuf>,
    },
    /// Watch folders and record every completely written frame (runs in the foreground).
    Watch {
        /// Configuration file ([watch] folders, [store] database, analysis settings).
        #[arg(long)]
        config: Option<PathBuf>,
        /// Folder to watch (repeatable); replaces [watch] folders.
        #[arg(long = "folder")]
        folders: Vec<PathBuf>,
        /// Database file; replaces [store] database.
        #[arg(long)]
        db: Option<PathBuf>,
        /// Start a new run even if the last one could be continued.
        #[arg(long)]
        new_run: bool,
    },
    /// Show the current (or last) run of a database, read-only.
    Status {
        /// Configuration file whose [store] database to read.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Database file (overrides the config).
        #[arg(long)]
        db: Option<PathBuf>,
        /// One JSON document instead of text.
        #[arg(long)]
        json: bool,
        /// How many recent frames and failures to list.
        #[arg(long, default_value_t = 10)]
        recent: usize,
        /// Show this run (by number) instead of the current or last one.
        #[arg(long)]
        run: Option<i64>,
        /// Show this analysis of the run (1 = the watch service's; each
        /// reprocess adds one) instead of the newest.
        #[arg(long)]
        analysis: Option<i64>,
        /// Show times in UTC instead of local time (--json is always UTC).
        #[arg(long)]
        utc: bool,
    },
    /// Write one table of a run (frames, objects, alerts or flags) as CSV or
    /// Parquet, one row per item, read-only.
    Export {
        /// Configuration file whose [store] database to read.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Database file (overrides the config).
        #[arg(long)]
        db: Option<PathBuf>,
        /// Export this run (by number) instead of the current or last one.
        #[arg(long)]
        run: Option<i64>,
        /// Export this analysis of the run (1 = the watch service's; each
        /// reprocess adds one) instead of the newest.
        #[arg(long)]
        analysis: Option<i64>,
        /// Which table.
        #[arg(long, value_enum)]
        table: framewarden::export::Table,
        /// The file format (Parquet needs -o).
        #[arg(long, value_enum, default_value = "csv")]
        format: framewarden::export::Format,
        /// Output file (default: standard output, CSV only).
        #[arg(short = 'o', long = "output", value_name = "FILE")]
        output: Option<PathBuf>,
    },
    /// Write one self-contained HTML report of a run (opens offline in any browser).
    Report {
        /// Configuration file whose [store] database to read.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Database file (overrides the config).
        #[arg(long)]
        db: Option<PathBuf>,
        /// Report this run (by number) instead of the current or last one.
        #[arg(long)]
        run: Option<i64>,
        /// Report this analysis of the run (1 = the watch service's; each
        /// reprocess adds one) instead of the newest.
        #[arg(long)]
        analysis: Option<i64>,
        /// The HTML file to write (default: framewarden-report.html).
        #[arg(
            short = 'o',
            long = "output",
            default_value = "framewarden-report.html"
        )]
        output: PathBuf,
    },
    /// Analyse a recorded run's frames again (the files still on disk) with
    /// the run's settings, changed by --with, and record the result as a new
    /// analysis of the run; prints how it compares with the first. Sends no alert.
    Reprocess {
        /// Configuration file whose [store] database to use.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Database file (overrides the config).
        #[arg(long)]
        db: Option<PathBuf>,
        /// Reprocess this run (by number) instead of the last one.
        #[arg(long)]
        run: Option<i64>,
        /// A TOML file whose [segment], [measure] and [quality] keys replace
        /// the run's (any other key is refused).
        #[arg(long = "with", value_name = "FILE")]
        with: Option<PathBuf>,
        /// Worker threads (default: one per core).
        #[arg(long)]
        workers: Option<usize>,
    },
    /// Replay an invented overnight plate time-lapse into a new folder while the
    /// watch service records it, then tell what happened (a few seconds). The
    /// folder (frames, database, log) is kept; the summary names it.
    Demo {
        /// Scenario file (default: the built-in demo-data/plate-timelapse.toml).
        #[arg(long)]
        scenario: Option<PathBuf>,
    },
}

/// Exit code for usage and configuration errors.
const USAGE: u8 = 2;
/// Exit code for everything else that went wrong.
const FAILURE: u8 = 1;

fn main() -> ExitCode {
    let cli = Cli::parse();
    if !matches!(cli.command, Command::Demo { .. }) {
        // The demo logs into the folder it creates first.
        init_logging(std::io::stderr, std::io::stderr().is_terminal());
    }
    match cli.command {
        Command::Watch {
            config,
            folders,
            db,
            new_run,
        } => {
            let mut settings = match load_settings(config.as_deref()) {
                Ok(s) => s,
                Err(code) => return code,
            };
            if !folders.is_empty() {
                settings.watch.folders = folders;
            }
            if let Some(db) = db {
                settings.store.database = db;
            }
            let options = framewarden::daemon::WatchOptions { new_run };
            match framewarden::daemon::process::watch_until_signal(&settings, &options) {
                Ok(_) => ExitCode::SUCCESS,
                Err(e) => {
                    eprintln!("framewarden watch: {e}");
                    ExitCode::from(if e.is_usage() { USAGE } else { FAILURE })
                }
            }
        }
        Command::Demo { scenario } => demo(scenario.as_deref()),
        Command::Status {
            config,
            db,
            json,
            recent,
            run,
            analysis,
            utc,
        } => {
            let settings = match load_settings(config.as_deref()) {
                Ok(s) => s,
                Err(code) => return code,
            };
            let db = db.unwrap_or(settings.store.database);
            match framewarden::status::read(&db, recent, run, analysis) {
                Ok(report) if json => {
                    println!(
                        "{}",
                        serde_json::to_string_pretty(&report).unwrap_or_default()
                    );
                    ExitCode::SUCCESS
                }
                Ok(report) => {
                    let zone = if utc {
                        jiff::tz::TimeZone::UTC
                    } else {
                        jiff::tz::TimeZone::system()
                    };
                    print!("{}", framewarden::status::render(&report, &zone));
                    ExitCode::SUCCESS
                }
                Err(e) => {
                    eprintln!("framewarden status: {e}");
                    ExitCode::from(FAILURE)
                }
            }
        }
        Command::Export {
            config,
            db,
            run,
            analysis,
            table,
            format,
            output,
        } => {
            let settings = match load_settings(config.as_deref()) {
                Ok(s) => s,
                Err(code) => return code,
            };
            let db = db.unwrap_or(settings.store.database);
            match framewarden::export::export(&db, run, analysis, table, format, output.as_deref())
            {
                Ok(done) => {
                    if let Some(path) = &output {
                        eprintln!(
                            "framewarden export: {} rows of run {} written to {}",
                            done.rows,
                            done.run,
                            framewarden::text::shown_path(path)
                        );
                    }
                    ExitCode::SUCCESS
                }
                Err(e @ framewarden::export::ExportError::ParquetNeedsFile) => {
                    eprintln!("framewarden export: {e}");
                    ExitCode::from(USAGE)
                }
                Err(e) => {
                    eprintln!("framewarden export: {e}");
                    ExitCode::from(FAILURE)
                }
            }
        }
        Command::Report {
            config,
            db,
            run,
            analysis,
            output,
        } => {
            let settings = match load_settings(config.as_deref()) {
                Ok(s) => s,
                Err(code) => return code,
            };
            let db = db.unwrap_or(settings.store.database);
            match framewarden::html_report::write(&db, run, analysis, &output) {
                Ok(w) => {
                    println!(
                        "wrote the report of run {} to {} ({} kB)",
                        w.run_id,
                        output.display(),
                        w.bytes.div_ceil(1000)
                    );
                    ExitCode::SUCCESS
                }
                Err(e) => {
                    eprintln!("framewarden report: {e}");
                    ExitCode::from(FAILURE)
                }
            }
        }
        Command::Reprocess {
            config,
            db,
            run,
            with,
            workers,
        } => {
            let settings = match load_settings(config.as_deref()) {
                Ok(s) => s,
                Err(code) => return code,
            };
            let request = framewarden::reprocess::Request {
                db: db.unwrap_or(settings.store.database),
                run,
                with,
                workers: workers
                    .unwrap_or_else(framewarden::watch::default_workers)
                    .max(1),
            };
            match framewarden::reprocess::reprocess(&request) {
                Ok(comparison) => {
                    print!("{}", framewarden::reprocess::render(&comparison));
                    ExitCode::SUCCESS
                }
                Err(e) => {
                    eprintln!("framewarden reprocess: {e}");
                    ExitCode::from(if e.is_usage() { USAGE } else { FAILURE })
                }
            }
        }
        Command::Analyze {
            config,
            json,
            workers,
            labels,
            paths,
        } => {
            let settings = match load_settings(config.as_deref()) {
                Ok(s) => s,
                Err(code) => return code,
            };
            let files = match framewarden::analyze::expand_paths(&paths) {
                Ok(f) => f,
                Err(e) => {
                    eprintln!("framewarden analyze: {e}");
                    return ExitCode::from(USAGE);
                }
            };
            let workers = workers
                .unwrap_or_else(framewarden::watch::default_workers)
                .max(1);
            if let Some(dir) = &labels {
                if let Err(e) = std::fs::create_dir_all(dir) {
                    eprintln!(
                        "framewarden analyze: cannot create the label folder {}: {e}",
                        dir.display()
                    );
                    return ExitCode::from(FAILURE);
                }
            }
            let mut out = std::io::stdout().lock();
            match framewarden::analyze::run(
                &files,
                &settings,
                json,
                workers,
                labels.as_deref(),
                &mut out,
            ) {
                Ok(0) => ExitCode::SUCCESS,
                Ok(_) => ExitCode::from(FAILURE),
                Err(e) => {
                    eprintln!("framewarden analyze: cannot write output: {e}");
                    ExitCode::from(FAILURE)
                }
            }
        }
    }
}

fn load_settings(path: Option<&std::path::Path>) -> Result<Settings, ExitCode> {
    match path {
        None => Ok(Settings::default()),
        Some(p) => settings::load(p).map_err(|e| {
            eprintln!("framewarden: {e}");
            ExitCode::from(USAGE)
        }),
    }
}

/// Log lines (level from `RUST_LOG`, default `info`) to `writer`.
fn init_logging<W>(writer: W, ansi: bool)
where
    W: for<'w> tracing_subscriber::fmt::MakeWriter<'w> + Send + Sync + 'static,
{
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| "info".into()),
        )
        .with_writer(writer)
        .with_ansi(ansi)
        .init();
}

/// `demo`: a new folder, the service's log in it, the replay, the summary.
fn demo(scenario: Option<&std::path::Path>) -> ExitCode {
    use framewarden::demo::{self, DemoPaths, Scenario};
    let text = match scenario {
        None => demo::DEFAULT_SCENARIO.to_string(),
        Some(p) => match std::fs::read_to_string(p) {
            Ok(t) => t,
            Err(e) => {
                eprintln!("framewarden demo: cannot read {}: {e}", p.display());
                return ExitCode::from(USAGE);
            }
        },
    };
    let scenario = match Scenario::parse(&text) {
        Ok(s) => s,
        Err(e) => {
            eprintln!("framewarden demo: {e}");
            return ExitCode::from(USAGE);
        }
    };
    let paths = match demo::fresh_folder(&std::env::temp_dir()) {
        Ok(dir) => DemoPaths::new(&dir),
        Err(e) => {
            eprintln!("framewarden demo: {e}");
            return ExitCode::from(FAILURE);
        }
    };
    match std::fs::File::create(&paths.log) {
        Ok(file) => init_logging(std::sync::Mutex::new(file), false),
        Err(e) => {
            eprintln!("framewarden demo: {}: {e}", paths.log.display());
            return ExitCode::from(FAILURE);
        }
    }
    match demo::run(&scenario, &paths, &mut std::io::stdout().lock()) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!(
                "framewarden demo: {e} (the folder is kept: {})",
                paths.folder.display()
            );
            ExitCode::from(FAILURE)
        }
    }
}
