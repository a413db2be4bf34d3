//! The SQLite store: one file, WAL mode, a versioned schema with migrations, and
//! the identity of a frame (path + size + mtime, or path + page for a page of
//! a growing stack).
//!
//! Writing belongs to the single writer thread in [`writer`]; reading for `status`
//! lives in [`crate::status`] and for `export` in [`crate::export`], both through
//! [`read_run`]. This file only opens connections, migrates, and
//! answers the watcher's "is this version of this file already recorded?".

pub mod analyses;
pub mod health;
pub mod label_images;
pub mod writer;

use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime, UNIX_EPOCH};

use rusqlite::{params, Connection, OpenFlags, OptionalExtension};

/// `PRAGMA application_id` of a framewarden database ("FWD1"): tells our files
/// apart from any other SQLite file.
pub const APPLICATION_ID: i32 = 0x4657_4431;

/// Schema migrations, in order; `PRAGMA user_version` counts the applied ones.
/// Append only: a released migration is never edited.
const MIGRATIONS: &[&str] = &[
    include_str!("schema_v1.sql"),
    include_str!("schema_v2.sql"),
    include_str!("schema_v3.sql"),
    include_str!("schema_v4.sql"),
    include_str!("schema_v5.sql"),
    include_str!("schema_v6.sql"),
    include_str!("schema_v7.sql"),
    include_str!("schema_v8.sql"),
    include_str!("schema_v9.sql"),
];

/// The schema version this build writes and reads.
pub const SCHEMA_VERSION: i32 = MIGRATIONS.len() as i32;

/// SQL for a frame row's position, the unit that has its own baseline and
/// charts: the well, the site and the channel, each when the file-name pattern
/// names it (empty when it names none). Channels are kept apart because they
/// differ in everything the charts follow (brightness, counts, detail).
pub const POSITION_SQL: &str = "TRIM(COALESCE(well, '') \
     || CASE WHEN site IS NULL THEN '' ELSE ' site ' || site END \
     || CASE WHEN channel IS NULL THEN '' ELSE ' channel ' || channel END)";

/// SQL for the count used of a frame row: the recount where the
/// uneven-illumination remedy ran, otherwise the first result's.
pub const COUNT_USED_SQL: &str = "COALESCE(recount_object_count, object_count)";

/// SQL ordering a run's frame rows in acquisition order: by the time point
/// the file-name pattern names, then by when the file was first written
/// (`acquired_ns`: the modification time of its first version), then by name.
/// Every per-position sequence (status, the quality monitor) follows it, never
/// the order rows were written in.
pub const ACQUISITION_ORDER_SQL: &str = "COALESCE(time_point_index, -1), acquired_ns, file, id";

/// SQL true for a frame row that counts in summaries: not replaced by a
/// later version with other pixels, and not a re-save of an earlier version's
/// pixels. Each frame of a run counts once.
pub const COUNTED_SQL: &str = "superseded_by IS NULL AND same_pixels_as IS NULL";

/// SQL selecting exactly one version of a file: bind [`FrameKey::sql_params`]
/// as `?1`, `?2`, `?3`.
pub const FRAME_KEY_SQL: &str = "file = ?1 AND size_bytes = ?2 AND mtime_ns = ?3";

/// SQL for an `*_at_ms` column as RFC 3339 UTC text (millisecond precision).
pub fn iso_time_sql(column: &str) -> String {
    format!("strftime('%Y-%m-%dT%H:%M:%fZ', {column} / 1000.0, 'unixepoch')")
}

/// The `[store]` settings: where the database is, how much one
/// transaction records, and which frames get a label image.
#[derive(Debug, Clone, PartialEq)]
pub struct StoreSettings {
    /// The SQLite file.
    pub database: PathBuf,
    /// Most operations committed in one transaction.
    pub batch_max: usize,
    /// Which analyzed frames get a label image (see [`label_image_path`]).
    pub label_images: LabelImages,
}

impl Default for StoreSettings {
    fn default() -> Self {
        StoreSettings {
            database: PathBuf::from("framewarden.db"),
            batch_max: 500,
            label_images: LabelImages::Flagged,
        }
    }
}

/// Which analyzed frames the watch service writes a label image for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LabelImages {
    /// None: no folder is made.
    None,
    /// Frames that got at least one flag: the ones a person looks at.
    Flagged,
    /// Every analyzed frame.
    All,
}

impl LabelImages {
    /// The name written in the configuration: `none`, `flagged` or `all`.
    pub fn name(self) -> &'static str {
        match self {
            LabelImages::None => "none",
            LabelImages::Flagged => "flagged",
            LabelImages::All => "all",
        }
    }

    /// The choice named `name` (as [`LabelImages::name`] writes it).
    pub fn parse(name: &str) -> Option<LabelImages> {
        [LabelImages::None, LabelImages::Flagged, LabelImages::All]
            .into_iter()
            .find(|l| l.name() == name)
    }
}

/// The label image of frame `frame_id` (the `frames.id` of its row) recorded
/// in the database `db`: `frame-<id>.tif` in the folder `<database file
/// stem>-labels` beside the database. Whatever path names the database (a
/// symbolic link, a relative path), the folder is the one beside the file
/// itself, so every command finds the images the service wrote. The folder
/// holds nothing but these images: deleting it loses nothing else.
pub fn label_image_path(db: &Path, frame_id: i64) -> PathBuf {
    label_folder(db).join(format!("frame-{frame_id}.tif"))
}

/// The folder [`label_image_path`] puts a database's label images in.
pub(crate) fn label_folder(db: &Path) -> PathBuf {
    let real = real_file(db);
    let stem = real.file_stem().map_or_else(
        || "framewarden".into(),
        |s| s.to_string_lossy().into_owned(),
    );
    real.with_file_name(format!("{stem}-labels"))
}

/// Errors opening or using the database, with what to do about them.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// There is no database file at this path.
    #[error("no database at {0}: start `framewarden watch` first, or pass --db FILE")]
    Missing(PathBuf),
    /// The file is not a framewarden database (another SQLite file, or not SQLite).
    #[error("{0} is not a framewarden database (wrong or missing application id); pass the file `framewarden watch` writes")]
    Foreign(PathBuf),
    /// The database was written by a newer framewarden.
    #[error("{path} has schema version {found}, newer than this framewarden understands ({SCHEMA_VERSION}); upgrade framewarden")]
    TooNew {
        /// The database.
        path: PathBuf,
        /// Its schema version (`PRAGMA user_version`), above [`SCHEMA_VERSION`].
        found: i32,
    },
    /// SQLite failed on the database.
    #[error("{path}: {source}")]
    Sqlite {
        /// The database.
        path: PathBuf,
        /// The cause.
        source: rusqlite::Error,
    },
    /// The folder for the database or its lock could not be created.
    #[error("cannot create the database folder {path}: {source}")]
    Folder {
        /// The folder.
        path: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
    /// The database has no run with the number asked for.
    #[error("{path} has no run {run} (`framewarden status` without --run shows the last one)")]
    NoRun {
        /// The database.
        path: PathBuf,
        /// The run number asked for.
        run: i64,
    },
    /// The run has no analysis with the number asked for.
    #[error("run {run} of {path} has no analysis {analysis} (it has {count}: 1 is the watch service's, each reprocess adds one)")]
    NoAnalysis {
        /// The database.
        path: PathBuf,
        /// The run.
        run: i64,
        /// The analysis number asked for.
        analysis: i64,
        /// How many analyses the run has.
        count: i64,
    },
    /// Another process holds the writer's lock on the database.
    #[error("another framewarden watch is recording into {db} (it holds {lock}); one service per database")]
    InUse {
        /// The database.
        db: PathBuf,
        /// The lock file the other process holds (`<database>.lock`).
        lock: PathBuf,
    },
    /// The writer's lock file could not be created or locked.
    #[error("cannot take the writer's lock {lock}: {source}")]
    Lock {
        /// The lock file (`<database>.lock`).
        lock: PathBuf,
        /// The cause.
        source: std::io::Error,
    },
}

impl StoreError {
    fn sqlite(path: &Path) -> impl FnOnce(rusqlite::Error) -> StoreError + '_ {
        move |source| StoreError::Sqlite {
            path: path.to_path_buf(),
            source,
        }
    }
}

/// The identity of one version of one file: a rewrite changes size or mtime and
/// so makes a new frame; an unchanged file keeps its identity.
///
/// A page of a stack (`[watch] stacks`) is identified by its file and page:
/// its `size_bytes` is the end of the bytes the page needs
/// ([`crate::decode::StackPage::end`]) and its `mtime_ns` is 0, both fixed
/// once the page is written, so the file growing leaves its pages' identities
/// alone and [`FRAME_KEY_SQL`] finds a page like any other frame.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct FrameKey {
    /// The path as text (lossy for non-UTF-8 names).
    pub path: String,
    /// File size in bytes (for a stack's page, the end of its bytes).
    pub size_bytes: u64,
    /// Modification time in nanoseconds since the Unix epoch (0 for a
    /// stack's page).
    pub mtime_ns: i64,
    /// The page of a stack, from 0; `None` for a whole file.
    pub page: Option<usize>,
}

impl FrameKey {
    /// The identity of `path` as it is on disk now.
    ///
    /// # Errors
    /// The I/O error of `metadata` (missing file, no permission).
    pub fn of(path: &Path) -> std::io::Result<FrameKey> {
        let meta = std::fs::metadata(path)?;
        Ok(FrameKey::from_metadata(path, &meta))
    }

    /// The identity of `path` from metadata already read.
    pub fn from_metadata(path: &Path, meta: &std::fs::Metadata) -> FrameKey {
        let mtime_ns = meta.modified().ok().map_or(0, |t| {
            t.duration_since(UNIX_EPOCH)
                .map_or(0, |d| i64::try_from(d.as_nanos()).unwrap_or(i64::MAX))
        });
        FrameKey {
            path: path.to_string_lossy().into_owned(),
            size_bytes: meta.len(),
            mtime_ns,
            page: None,
        }
    }

    /// The identity of page `page` of the stack at `path`.
    pub fn of_page(path: &Path, page: &crate::decode::StackPage) -> FrameKey {
        FrameKey {
            path: path.to_string_lossy().into_owned(),
            size_bytes: page.end,
            mtime_ns: 0,
            page: Some(page.index),
        }
    }

    /// Whether this version is still on disk, given the file's identity now
    /// (from [`FrameKey::of`]): a whole file unchanged; a stack's page still
    /// inside the file (a stack grows, its pages stay).
    pub fn still_matches(&self, now: &FrameKey) -> bool {
        match self.page {
            None => self == now,
            Some(_) => now.path == self.path && now.size_bytes >= self.size_bytes,
        }
    }

    /// The three values [`FRAME_KEY_SQL`] binds, in its order.
    pub fn sql_params(&self) -> (&str, i64, i64) {
        (&self.path, self.size_bytes as i64, self.mtime_ns)
    }
}

/// Where a recorded frame stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FrameStatus {
    /// Judged complete and handed to a worker; not finished yet (redone after a crash).
    Queued,
    /// Analyzed; its measures and objects are recorded.
    Done,
    /// No result; the row's error says why.
    Failed,
}

impl FrameStatus {
    /// The name stored in the `frames.status` column: `queued`, `done` or `failed`.
    pub fn as_str(self) -> &'static str {
        match self {
            FrameStatus::Queued => "queued",
            FrameStatus::Done => "done",
            FrameStatus::Failed => "failed",
        }
    }

    fn parse(s: &str) -> Option<FrameStatus> {
        match s {
            "queued" => Some(FrameStatus::Queued),
            "done" => Some(FrameStatus::Done),
            "failed" => Some(FrameStatus::Failed),
            _ => None,
        }
    }
}

/// Milliseconds since the Unix epoch, the unit of every `*_at_ms` column.
pub fn now_ms() -> i64 {
    SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .map_or(0, |d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
}

/// Creates the folder a database (or its lock) lives in.
fn create_folder_of(path: &Path) -> Result<(), StoreError> {
    match path.parent().filter(|p| !p.as_os_str().is_empty()) {
        Some(folder) => std::fs::create_dir_all(folder).map_err(|source| StoreError::Folder {
            path: folder.to_path_buf(),
            source,
        }),
        None => Ok(()),
    }
}

/// The claim of the one service that records into a database: an exclusive
/// lock on `<database>.lock`, held while the value lives and released by the
/// system if the process dies. `status` needs none.
#[derive(Debug)]
pub struct WriterClaim {
    _file: std::fs::File,
}

/// Claims `db` for this process's writer.
///
/// # Errors
/// [`StoreError::InUse`] while another process holds the claim,
/// [`StoreError::Lock`] or [`StoreError::Folder`] when the lock file cannot be
/// made.
pub fn claim_writer(db: &Path) -> Result<WriterClaim, StoreError> {
    create_folder_of(db)?;
    // One lock per database file, whatever path names it: `link.db -> fw.db`
    // and `./fw.db` take the lock of the same file.
    let real = real_file(db);
    let mut name = real.as_os_str().to_owned();
    name.push(".lock");
    let lock = PathBuf::from(name);
    let file = std::fs::OpenOptions::new()
        .create(true)
        .truncate(false)
        .write(true)
        .open(&lock)
        .map_err(|source| StoreError::Lock {
            lock: lock.clone(),
            source,
        })?;
    match file.try_lock() {
        Ok(()) => Ok(WriterClaim { _file: file }),
        Err(std::fs::TryLockError::WouldBlock) => Err(StoreError::InUse {
            db: db.to_path_buf(),
            lock,
        }),
        Err(std::fs::TryLockError::Error(source)) => Err(StoreError::Lock { lock, source }),
    }
}

/// The file `path` names once symbolic links are followed (also to a file
/// that does not exist yet) and its folder is made canonical; `path` itself
/// when that cannot be worked out.
fn real_file(path: &Path) -> PathBuf {
    let mut p = path.to_path_buf();
    // A chain of links longer than the system's own limit (40 on Linux) is
    // left as it is.
    for _ in 0..40 {
        match std::fs::symlink_metadata(&p) {
            Ok(m) if m.file_type().is_symlink() => match std::fs::read_link(&p) {
                Ok(target) => p = p.parent().unwrap_or(Path::new("")).join(target),
                Err(_) => break,
            },
            _ => break,
        }
    }
    let folder = p.parent().filter(|f| !f.as_os_str().is_empty());
    match (
        folder.map_or_else(|| dunce::canonicalize("."), dunce::canonicalize),
        p.file_name(),
    ) {
        (Ok(folder), Some(name)) => folder.join(name),
        _ => path.to_path_buf(),
    }
}

/// Opens (creating if needed) the database for writing and migrates it.
///
/// # Errors
/// [`StoreError::Foreign`] for a SQLite file of another program,
/// [`StoreError::TooNew`] for a newer schema, SQLite errors otherwise.
pub fn open_for_writing(path: &Path) -> Result<Connection, StoreError> {
    create_folder_of(path)?;
    let mut conn = Connection::open(path).map_err(StoreError::sqlite(path))?;
    conn.busy_timeout(Duration::from_secs(10))
        .map_err(StoreError::sqlite(path))?;
    // WAL: readers (status, the watcher's look-ups) never block the writer.
    // synchronous=NORMAL stays consistent; the last commits may be lost on power
    // loss, which the idempotent, re-runnable recording absorbs.
    conn.pragma_update(None, "journal_mode", "WAL")
        .map_err(StoreError::sqlite(path))?;
    conn.pragma_update(None, "synchronous", "NORMAL")
        .map_err(StoreError::sqlite(path))?;
    conn.pragma_update(None, "foreign_keys", "ON")
        .map_err(StoreError::sqlite(path))?;
    migrate(&mut conn, path)?;
    Ok(conn)
}

/// Opens an existing database read-only, checking it is ours and not newer.
///
/// A database in WAL mode is read through a shared-memory file beside it
/// (`-shm`), which SQLite creates on first read. In a folder the reader cannot
/// write (another user's, the service's own under systemd) that fails; a
/// database stopped cleanly has no write-ahead log left to read, so it is then
/// opened as immutable (SQLite's `immutable=1` URI parameter: no locks, no
/// shared memory). With a log still there (a service running or killed) the
/// error stands, since an immutable open would not see the log's frames.
///
/// # Errors
/// [`StoreError::Missing`], [`StoreError::Foreign`], [`StoreError::TooNew`].
pub fn open_read_only(path: &Path) -> Result<Connection, StoreError> {
    if !path.is_file() {
        return Err(StoreError::Missing(path.to_path_buf()));
    }
    let flags = OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX;
    let conn = Connection::open_with_flags(path, flags).map_err(StoreError::sqlite(path))?;
    match check_ours(&conn, path) {
        Err(StoreError::Sqlite { source, .. })
            if cannot_share_memory(&source) && !has_write_ahead_log(path) =>
        {
            let conn = Connection::open_with_flags(
                immutable_uri(path),
                flags | OpenFlags::SQLITE_OPEN_URI,
            )
            .map_err(StoreError::sqlite(path))?;
            check_ours(&conn, path)?;
            Ok(conn)
        }
        checked => checked.map(|()| conn),
    }
}

/// The errors SQLite gives when it cannot create or write a WAL database's
/// shared-memory file.
fn cannot_share_memory(e: &rusqlite::Error) -> bool {
    matches!(
        e.sqlite_error_code(),
        Some(rusqlite::ErrorCode::CannotOpen | rusqlite::ErrorCode::ReadOnly)
    )
}

/// True when `<db>-wal` holds frames not yet copied into the database.
fn has_write_ahead_log(db: &Path) -> bool {
    let mut wal = db.as_os_str().to_owned();
    wal.push("-wal");
    std::fs::metadata(PathBuf::from(wal)).is_ok_and(|m| m.len() > 0)
}

/// `file:<absolute path>?immutable=1`, the path percent-encoded as SQLite's
/// URI filenames require.
fn immutable_uri(db: &Path) -> String {
    let absolute = std::path::absolute(db).unwrap_or_else(|_| db.to_path_buf());
    let text = absolute.to_string_lossy().replace('\\', "/");
    let mut uri = String::from("file:");
    if !text.starts_with('/') {
        uri.push('/');
    }
    for b in text.bytes() {
        if b.is_ascii_alphanumeric() || b"/-._~:".contains(&b) {
            uri.push(char::from(b));
        } else {
            uri.push_str(&format!("%{b:02X}"));
        }
    }
    uri.push_str("?immutable=1");
    uri
}

/// Checks that `conn` reads a framewarden database this build understands.
fn check_ours(conn: &Connection, path: &Path) -> Result<(), StoreError> {
    conn.busy_timeout(Duration::from_secs(10))
        .map_err(StoreError::sqlite(path))?;
    let app_id = application_id(conn, path)?;
    if app_id != APPLICATION_ID {
        return Err(StoreError::Foreign(path.to_path_buf()));
    }
    let version: i32 = conn
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(StoreError::sqlite(path))?;
    if version > SCHEMA_VERSION {
        return Err(StoreError::TooNew {
            path: path.to_path_buf(),
            found: version,
        });
    }
    Ok(())
}

/// Reads run `run` (by default the current or last one) of the database at
/// `db`, as analysis `analysis` gave it (by default the newest), in one
/// read-only snapshot: opens it with [`open_read_only`], picks the run and
/// the analysis, lays the analysis under the usual table names
/// ([`analyses::present`]) and calls `read` with the snapshot and what it
/// shows (`None` when the database has no run yet and none was asked for).
/// The readers (`status`, `export`, the report) share it, so they open, check
/// and pick runs alike; a running `watch` is never disturbed (WAL: readers do
/// not block the writer).
///
/// # Errors
/// [`open_read_only`]'s errors, [`StoreError::NoRun`] for a run number the
/// database does not have, [`StoreError::NoAnalysis`] for an analysis number
/// the run does not have, and whatever `read` returns.
pub fn read_run<T, E: From<StoreError>>(
    db: &Path,
    run: Option<i64>,
    analysis: Option<i64>,
    read: impl FnOnce(&Connection, Option<analyses::Shown>) -> Result<T, E>,
) -> Result<T, E> {
    let mut conn = open_read_only(db)?;
    let tx = conn.transaction().map_err(StoreError::sqlite(db))?;
    let run_id: Option<i64> = tx
        .query_row(
            "SELECT id FROM runs WHERE ?1 IS NULL OR id = ?1 ORDER BY id DESC LIMIT 1",
            [run],
            |r| r.get(0),
        )
        .optional()
        .map_err(StoreError::sqlite(db))?;
    if let (Some(run), None) = (run, run_id) {
        return Err(StoreError::NoRun {
            path: db.to_path_buf(),
            run,
        }
        .into());
    }
    let shown = match run_id {
        None => None,
        Some(run_id) => {
            let picked = analyses::pick(&tx, run_id, analysis).map_err(StoreError::sqlite(db))?;
            let Some((id, number, count)) = picked else {
                let count = analyses::pick(&tx, run_id, None)
                    .map_err(StoreError::sqlite(db))?
                    .map_or(1, |p| p.2);
                return Err(StoreError::NoAnalysis {
                    path: db.to_path_buf(),
                    run: run_id,
                    analysis: analysis.unwrap_or(1),
                    count,
                }
                .into());
            };
            analyses::present(&tx, id, number).map_err(StoreError::sqlite(db))?;
            Some(analyses::Shown {
                run_id,
                analysis: number,
                analyses: count,
            })
        }
    };
    let out = read(&tx, shown)?;
    tx.finish().map_err(StoreError::sqlite(db))?;
    Ok(out)
}

/// The file's `application_id`; a file that is not SQLite at all is foreign.
fn application_id(conn: &Connection, path: &Path) -> Result<i32, StoreError> {
    conn.pragma_query_value(None, "application_id", |r| r.get(0))
        .map_err(|e| match e {
            rusqlite::Error::SqliteFailure(f, _) if f.code == rusqlite::ErrorCode::NotADatabase => {
                StoreError::Foreign(path.to_path_buf())
            }
            other => StoreError::Sqlite {
                path: path.to_path_buf(),
                source: other,
            },
        })
}

fn migrate(conn: &mut Connection, path: &Path) -> Result<(), StoreError> {
    let tx = conn
        .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)
        .map_err(StoreError::sqlite(path))?;
    let app_id = application_id(&tx, path)?;
    let version: i32 = tx
        .pragma_query_value(None, "user_version", |r| r.get(0))
        .map_err(StoreError::sqlite(path))?;
    let tables: i64 = tx
        .query_row("SELECT count(*) FROM sqlite_master", [], |r| r.get(0))
        .map_err(StoreError::sqlite(path))?;
    if app_id != APPLICATION_ID && (app_id != 0 || tables > 0) {
        return Err(StoreError::Foreign(path.to_path_buf()));
    }
    if version > SCHEMA_VERSION {
        return Err(StoreError::TooNew {
            path: path.to_path_buf(),
            found: version,
        });
    }
    for (i, sql) in MIGRATIONS
        .iter()
        .enumerate()
        .skip(usize::try_from(version).unwrap_or(0))
    {
        tx.execute_batch(sql).map_err(StoreError::sqlite(path))?;
        if i + 1 == 6 {
            shorten_listings(&tx).map_err(StoreError::sqlite(path))?;
        }
        tx.pragma_update(None, "user_version", i as i32 + 1)
            .map_err(StoreError::sqlite(path))?;
    }
    tx.pragma_update(None, "application_id", APPLICATION_ID)
        .map_err(StoreError::sqlite(path))?;
    tx.commit().map_err(StoreError::sqlite(path))
}

/// Runs recorded before schema 6 stored their settings as a debug listing, in
/// which a flat-field meant every gain and dark pixel (a 512 × 512 frame: 14
/// MB per run). Each run of four or more numbers in a list becomes one
/// `… N numbers …` mark: what a person can read of the listing stays.
fn shorten_listings(tx: &rusqlite::Transaction<'_>) -> rusqlite::Result<()> {
    let numbers = regex::Regex::new(r"(?:-?[0-9][0-9.e+-]*,\s*){4,}-?[0-9][0-9.e+-]*")
        .expect("a valid pattern");
    let rows: Vec<(i64, String)> = tx
        .prepare("SELECT id, settings FROM runs WHERE settings_format = 'listing'")?
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?
        .collect::<rusqlite::Result<_>>()?;
    for (id, text) in rows {
        let short = numbers.replace_all(&text, |c: &regex::Captures<'_>| {
            format!("… {} numbers …", c[0].split(',').count())
        });
        if short != text {
            tx.execute(
                "UPDATE runs SET settings = ?1 WHERE id = ?2",
                params![short.as_ref(), id],
            )?;
        }
    }
    Ok(())
}

/// The recorded status of exactly this version of a file, if any.
///
/// # Errors
/// SQLite errors.
pub fn lookup(conn: &Connection, key: &FrameKey) -> rusqlite::Result<Option<FrameStatus>> {
    let mut stmt =
        conn.prepare_cached(&format!("SELECT status FROM frames WHERE {FRAME_KEY_SQL}"))?;
    let status: Option<String> = stmt.query_row(key.sql_params(), |r| r.get(0)).optional()?;
    Ok(status.as_deref().and_then(FrameStatus::parse))
}

/// Unclean stops a frame may be caught in before it is recorded as failed.
pub const MAX_INTERRUPTIONS: i64 = 3;

/// At start, after an unclean stop (the last run was never marked ended: a
/// crash, a kill, a hang ended by the watchdog), counts one interruption for
/// every frame a worker had in hand (`in_hand`, set before its analysis
/// begins), and records as failed those interrupted [`MAX_INTERRUPTIONS`]
/// times: a file that crashes or hangs the analysis must not stop the run by
/// being retried at every restart. Frames only waiting in the queue are not
/// counted. After any stop, clean or not, no frame is in hand any more.
/// Returns the frames recorded as failed.
///
/// # Errors
/// SQLite errors.
pub fn settle_interrupted(conn: &mut Connection) -> rusqlite::Result<Vec<FrameKey>> {
    let tx = conn.transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
    let unclean: bool = tx
        .query_row(
            "SELECT ended_at_ms IS NULL FROM runs ORDER BY id DESC LIMIT 1",
            [],
            |r| r.get(0),
        )
        .optional()?
        .unwrap_or(false);
    let mut given_up = Vec::new();
    if unclean {
        tx.execute(
            "UPDATE frames SET interruptions = interruptions + 1
             WHERE status = 'queued' AND in_hand = 1",
            [],
        )?;
        given_up = tx
            .prepare(
                "UPDATE frames SET status = 'failed', analyzed_at_ms = ?1,
                     latency_ms = MAX(0, ?1 - ready_at_ms),
                     error = 'the analysis was interrupted ' || interruptions || ' times (the service stopped uncleanly while this file was being analyzed: a crash, a kill, or a hang ended by the watchdog); recorded as failed so the run goes on; check the file with framewarden analyze'
                 WHERE status = 'queued' AND in_hand = 1 AND interruptions >= ?2
                 RETURNING file, size_bytes, mtime_ns, page",
            )?
            .query_map(params![now_ms(), MAX_INTERRUPTIONS], frame_key)?
            .collect::<rusqlite::Result<Vec<_>>>()?;
    }
    tx.execute("UPDATE frames SET in_hand = 0 WHERE in_hand = 1", [])?;
    tx.commit()?;
    Ok(given_up)
}

/// Every frame left `queued` (in flight when the last process stopped).
///
/// # Errors
/// SQLite errors.
pub fn queued_frames(conn: &Connection) -> rusqlite::Result<Vec<FrameKey>> {
    let mut stmt = conn.prepare(
        "SELECT file, size_bytes, mtime_ns, page FROM frames WHERE status = 'queued' ORDER BY id",
    )?;
    let rows = stmt.query_map([], frame_key)?;
    rows.collect()
}

/// The [`FrameKey`] of a row selected as `file, size_bytes, mtime_ns, page`.
fn frame_key(r: &rusqlite::Row<'_>) -> rusqlite::Result<FrameKey> {
    Ok(FrameKey {
        path: r.get(0)?,
        size_bytes: r.get::<_, i64>(1)? as u64,
        mtime_ns: r.get(2)?,
        page: r.get::<_, Option<i64>>(3)?.map(|p| p as usize),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    #[cfg(unix)]
    fn a_label_image_is_found_by_frame_id_whatever_path_names_the_database() {
        let dir = tempfile::tempdir().unwrap();
        let real = dir.path().canonicalize().unwrap();
        std::fs::create_dir(real.join("data")).unwrap();
        std::fs::write(real.join("data/night.db"), b"").unwrap();
        std::os::unix::fs::symlink("data/night.db", real.join("link.db")).unwrap();
        let expected = real.join("data/night-labels/frame-42.tif");
        for db in [real.join("data/night.db"), real.join("link.db")] {
            assert_eq!(label_image_path(&db, 42), expected, "{}", db.display());
        }
        assert_eq!(
            label_image_path(&real.join("data/results"), 7),
            real.join("data/results-labels/frame-7.tif"),
            "a database without an extension"
        );
    }

    #[test]
    fn an_older_database_is_migrated_forward_keeping_its_rows() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        {
            // A database written by a version-1 framewarden: one run, one
            // frame with one object.
            let conn = Connection::open(&db).unwrap();
            conn.execute_batch(MIGRATIONS[0]).unwrap();
            conn.pragma_update(None, "user_version", 1).unwrap();
            conn.pragma_update(None, "application_id", APPLICATION_ID)
                .unwrap();
            conn.execute_batch(
                "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings)
                     VALUES ('[]', 1, 1, 'Settings { gain: [0.5, 0.25, 1.0, 2.0, 0.75], page: 0 }');
                 INSERT INTO frames (run_id, path, size_bytes, mtime_ns, version, status, detected_at_ms, ready_at_ms)
                     VALUES (1, '/acq/a.tif', 10, 1, 1, 'done', 1, 1);
                 INSERT INTO objects VALUES (1, 7, 12, NULL, 1.5, 2.5, 0, 0, 4, 4, 9.0, 108.0, 11.0,
                                             12.0, 0.9, 4.0, 3.5, 0.5, NULL);",
            )
            .unwrap();
        }
        drop(open_for_writing(&db).unwrap());
        let conn = open_read_only(&db).unwrap();
        let v: i32 = conn
            .pragma_query_value(None, "user_version", |r| r.get(0))
            .unwrap();
        assert_eq!(v, SCHEMA_VERSION);
        let runs: i64 = conn
            .query_row("SELECT count(*) FROM runs", [], |r| r.get(0))
            .unwrap();
        assert_eq!(runs, 1);
        // Columns of later versions exist (v2: remedy, v3: bimodality, v5:
        // interruptions, v7: in hand; 0 for the old rows).
        let (interruptions, in_hand): (i64, i64) = conn
            .query_row(
                "SELECT count_source IS NULL AND bimodality IS NULL, interruptions, in_hand FROM frames",
                [],
                |r| Ok((r.get(1)?, r.get(2)?)),
            )
            .unwrap();
        assert_eq!((interruptions, in_hand), (0, 0));
        // v4: the old objects are the raw result's, every measure kept.
        let object: (i64, String, i64, i64, f64, Option<String>) = conn
            .query_row(
                "SELECT frame_id, result, label, area_px, eccentricity, channels FROM objects",
                [],
                |r| {
                    Ok((
                        r.get(0)?,
                        r.get(1)?,
                        r.get(2)?,
                        r.get(3)?,
                        r.get(4)?,
                        r.get(5)?,
                    ))
                },
            )
            .unwrap();
        assert_eq!(object, (1, "raw".into(), 7, 12, 0.5, None));
        // v6: one name each (frames.file), and the old debug listing kept,
        // marked as such, with its long number lists shortened.
        let file: String = conn
            .query_row("SELECT file FROM frames", [], |r| r.get(0))
            .unwrap();
        assert_eq!(file, "/acq/a.tif");
        let (settings, format): (String, String) = conn
            .query_row("SELECT settings, settings_format FROM runs", [], |r| {
                Ok((r.get(0)?, r.get(1)?))
            })
            .unwrap();
        assert_eq!(
            (settings.as_str(), format.as_str()),
            ("Settings { gain: [… 5 numbers …], page: 0 }", "listing")
        );
    }

    #[test]
    fn a_recount_recorded_before_v6_keeps_its_objects_under_the_new_name() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        {
            let mut conn = Connection::open(&db).unwrap();
            let tx = conn.transaction().unwrap();
            for sql in &MIGRATIONS[..5] {
                tx.execute_batch(sql).unwrap();
            }
            tx.pragma_update(None, "user_version", 5).unwrap();
            tx.pragma_update(None, "application_id", APPLICATION_ID)
                .unwrap();
            tx.execute_batch(
                "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings) VALUES ('[]', 1, 1, '');
                 INSERT INTO frames (run_id, path, size_bytes, mtime_ns, version, status, detected_at_ms,
                                     ready_at_ms, object_count, flat_object_count, flat_threshold, count_source)
                     VALUES (1, '/acq/a.tif', 10, 1, 1, 'done', 1, 1, 2, 3, 40.0, 'flattened');
                 INSERT INTO objects (frame_id, result, label, area_px, centroid_x, centroid_y, bbox_x_min,
                                      bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
                                      max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px,
                                      eccentricity)
                     VALUES (1, 'flattened', 1, 4, 1, 1, 0, 0, 2, 2, 9, 36, 9, 8, 0.8, 2, 2, 0);
                 INSERT INTO flags (frame_id, kind, value, limit_value, message)
                     VALUES (1, 'uneven_illumination', 0.4, 0.25, 'uneven');
                 INSERT INTO alerts (run_id, raised_at_ms, kind, message) VALUES (1, 5, 'stalled', 'quiet');",
            )
            .unwrap();
            tx.commit().unwrap();
        }
        drop(open_for_writing(&db).unwrap());
        let conn = open_read_only(&db).unwrap();
        let frame: (String, i64, f64, String) = conn
            .query_row(
                &format!(
                    "SELECT file, {COUNT_USED_SQL}, recount_threshold, count_source FROM frames"
                ),
                [],
                |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)),
            )
            .unwrap();
        assert_eq!(frame, ("/acq/a.tif".into(), 3, 40.0, "recount".into()));
        let result: String = conn
            .query_row("SELECT result FROM objects", [], |r| r.get(0))
            .unwrap();
        assert_eq!(result, "recount");
        let flag: String = conn
            .query_row("SELECT flag FROM flags", [], |r| r.get(0))
            .unwrap();
        assert_eq!(flag, "uneven_illumination");
        let alert: (String, i64) = conn
            .query_row("SELECT condition, opened_at_ms FROM alerts", [], |r| {
                Ok((r.get(0)?, r.get(1)?))
            })
            .unwrap();
        assert_eq!(alert, ("stalled".into(), 5));
    }

    #[test]
    fn a_frame_in_hand_at_three_unclean_stops_is_failed_and_waiting_frames_never_count() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let mut conn = open_for_writing(&db).unwrap();
        conn.execute_batch(
            "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings) VALUES ('[]', 1, 1, '{}');
             INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status, detected_at_ms, ready_at_ms)
                 VALUES (1, '/acq/poison.tif', 10, 1, 1, 'queued', 1, 1),
                        (1, '/acq/waiting.tif', 10, 1, 1, 'queued', 1, 1),
                        (1, '/acq/done.tif', 10, 1, 1, 'done', 1, 1);",
        )
        .unwrap();
        let state = |conn: &Connection, file: &str| -> (String, i64, Option<String>) {
            conn.query_row(
                "SELECT status, interruptions, error FROM frames WHERE file = ?1",
                [file],
                |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
            )
            .unwrap()
        };
        // What a worker's mark does (the writer's `InHand`): only the poison
        // file is taken again after each restart.
        let take = |conn: &Connection| {
            conn.execute(
                "UPDATE frames SET in_hand = 1 WHERE file = '/acq/poison.tif'",
                [],
            )
            .unwrap();
        };
        // The run was never marked ended: two unclean stops, still queued.
        for n in 1..MAX_INTERRUPTIONS {
            take(&conn);
            assert!(settle_interrupted(&mut conn).unwrap().is_empty());
            assert_eq!(state(&conn, "/acq/poison.tif"), ("queued".into(), n, None));
        }
        // Not taken since the last start: an unclean stop does not count.
        assert!(settle_interrupted(&mut conn).unwrap().is_empty());
        assert_eq!(state(&conn, "/acq/poison.tif").1, MAX_INTERRUPTIONS - 1);
        // A clean stop with the frame in hand counts nothing either.
        take(&conn);
        conn.execute("UPDATE runs SET ended_at_ms = 5", []).unwrap();
        assert!(settle_interrupted(&mut conn).unwrap().is_empty());
        assert_eq!(state(&conn, "/acq/poison.tif").1, MAX_INTERRUPTIONS - 1);
        // The third unclean stop in hand: failed, with the reason.
        take(&conn);
        conn.execute("UPDATE runs SET ended_at_ms = NULL", [])
            .unwrap();
        let given_up = settle_interrupted(&mut conn).unwrap();
        assert_eq!(given_up.len(), 1);
        assert_eq!(given_up[0].path, "/acq/poison.tif");
        let (status, n, error) = state(&conn, "/acq/poison.tif");
        assert_eq!((status.as_str(), n), ("failed", MAX_INTERRUPTIONS));
        assert!(error.unwrap().contains("interrupted 3 times"));
        // The frame that only waited in the queue through all five stops: untouched.
        assert_eq!(state(&conn, "/acq/waiting.tif"), ("queued".into(), 0, None));
        assert_eq!(state(&conn, "/acq/done.tif").0, "done");
        let in_hand: i64 = conn
            .query_row("SELECT count(*) FROM frames WHERE in_hand = 1", [], |r| {
                r.get(0)
            })
            .unwrap();
        assert_eq!(in_hand, 0, "after a start no frame is in hand");
    }

    #[test]
    fn migrates_once_and_marks_the_file_as_ours() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("sub/fw.db");
        drop(open_for_writing(&db).unwrap());
        // A second open finds the schema current and applies nothing twice.
        drop(open_for_writing(&db).unwrap());
        let conn = open_read_only(&db).unwrap();
        let v: i32 = conn
            .pragma_query_value(None, "user_version", |r| r.get(0))
            .unwrap();
        assert_eq!(v, SCHEMA_VERSION);
        let mode: String = conn
            .pragma_query_value(None, "journal_mode", |r| r.get(0))
            .unwrap();
        assert_eq!(mode, "wal");
    }

    #[test]
    fn foreign_and_missing_files_are_named() {
        let dir = tempfile::tempdir().unwrap();
        let missing = dir.path().join("none.db");
        assert!(matches!(
            open_read_only(&missing),
            Err(StoreError::Missing(_))
        ));

        let other = dir.path().join("other.db");
        Connection::open(&other)
            .unwrap()
            .execute_batch("CREATE TABLE t(x)")
            .unwrap();
        assert!(matches!(
            open_read_only(&other),
            Err(StoreError::Foreign(_))
        ));
        assert!(matches!(
            open_for_writing(&other),
            Err(StoreError::Foreign(_))
        ));

        let text = dir.path().join("notes.db");
        std::fs::write(&text, "this is not a database at all, just some text....").unwrap();
        assert!(matches!(open_read_only(&text), Err(StoreError::Foreign(_))));
    }

    #[test]
    fn newer_schema_is_refused() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        let conn = open_for_writing(&db).unwrap();
        conn.pragma_update(None, "user_version", SCHEMA_VERSION + 1)
            .unwrap();
        drop(conn);
        assert!(matches!(
            open_read_only(&db),
            Err(StoreError::TooNew { .. })
        ));
        assert!(matches!(
            open_for_writing(&db),
            Err(StoreError::TooNew { .. })
        ));
    }

    #[test]
    fn the_immutable_uri_escapes_what_a_uri_reserves() {
        // RFC 3986 percent-encoding, as SQLite's URI filenames take it.
        assert_eq!(
            immutable_uri(Path::new("/var/lib/fw/run 1#?%.db")),
            "file:/var/lib/fw/run%201%23%3F%25.db?immutable=1"
        );
    }

    #[test]
    fn v8_makes_the_recorded_results_analysis_1_of_their_run() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        {
            let mut conn = Connection::open(&db).unwrap();
            let tx = conn.transaction().unwrap();
            for sql in &MIGRATIONS[..7] {
                tx.execute_batch(sql).unwrap();
            }
            tx.pragma_update(None, "user_version", 7).unwrap();
            tx.pragma_update(None, "application_id", APPLICATION_ID)
                .unwrap();
            tx.execute_batch(
                "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings) VALUES ('[]', 5, 5, 'a'), ('[]', 9, 9, 'b');",
            )
            .unwrap();
            tx.commit().unwrap();
        }
        let shown = |analysis: Option<i64>| {
            read_run(&db, None, analysis, |_, shown| Ok::<_, StoreError>(shown))
        };
        let only_the_first = analyses::Shown {
            run_id: 2,
            analysis: 1,
            analyses: 1,
        };
        // Read as it is (no migration: a reader never writes): the watch
        // service's results are analysis 1 of 1, and there is no other.
        assert_eq!(shown(None).unwrap(), Some(only_the_first));
        assert!(matches!(
            shown(Some(2)),
            Err(StoreError::NoAnalysis {
                analysis: 2,
                count: 1,
                ..
            })
        ));
        let conn = open_for_writing(&db).unwrap();
        let rows = |conn: &Connection| -> Vec<(i64, i64, String, String, i64)> {
            conn.prepare(
                "SELECT run_id, number, settings, source, finished_at_ms FROM analyses ORDER BY run_id",
            )
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?)))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap()
        };
        assert_eq!(
            rows(&conn),
            [
                (1, 1, "a".into(), "watch".into(), 5),
                (2, 1, "b".into(), "watch".into(), 9)
            ]
        );
        assert_eq!(shown(None).unwrap(), Some(only_the_first));
        // A run started later has its analysis 1 from the start.
        conn.execute(
            "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings) VALUES ('[]', 12, 12, 'c')",
            [],
        )
        .unwrap();
        assert_eq!(rows(&conn)[2], (3, 1, "c".into(), "watch".into(), 12));
    }

    #[test]
    fn v7_places_older_rows_in_acquisition_order() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        {
            let mut conn = Connection::open(&db).unwrap();
            let tx = conn.transaction().unwrap();
            for sql in &MIGRATIONS[..6] {
                tx.execute_batch(sql).unwrap();
            }
            tx.pragma_update(None, "user_version", 6).unwrap();
            tx.pragma_update(None, "application_id", APPLICATION_ID)
                .unwrap();
            tx.execute_batch(
                "INSERT INTO runs (folders, started_at_ms, last_frame_at_ms, settings) VALUES ('[]', 1, 1, '');
                 INSERT INTO frames (run_id, file, size_bytes, mtime_ns, version, status, detected_at_ms,
                                     ready_at_ms, time_point)
                     VALUES (1, '/acq/a.tif', 10, 30, 1, 'done', 1, 1, '0013'),
                            (1, '/acq/b.tif', 10, 20, 1, 'done', 1, 1, 't7'),
                            (1, '/acq/c.tif', 10, 10, 1, 'done', 1, 1, NULL);",
            )
            .unwrap();
            tx.commit().unwrap();
        }
        drop(open_for_writing(&db).unwrap());
        let conn = open_read_only(&db).unwrap();
        let rows: Vec<(String, Option<i64>, i64)> = conn
            .prepare(&format!(
                "SELECT file, time_point_index, acquired_ns FROM frames ORDER BY {ACQUISITION_ORDER_SQL}"
            ))
            .unwrap()
            .query_map([], |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)))
            .unwrap()
            .collect::<Result<_, _>>()
            .unwrap();
        // The same numbers as `NameParts::time_point_index` gives.
        assert_eq!(
            rows,
            [
                ("/acq/c.tif".into(), None, 10),
                ("/acq/b.tif".into(), Some(7), 20),
                ("/acq/a.tif".into(), Some(13), 30)
            ]
        );
    }
}
