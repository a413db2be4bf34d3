//! Whether the database the service records into can still be written: the
//! file at its path is still the one the service opened (not deleted, moved
//! away or replaced), and SQLite has found no damage in it.
//!
//! Every connection of the service reports its errors here
//! ([`DatabaseHealth::report`]); the writer checks the file's identity on a
//! clock ([`DatabaseHealth::check`]). A fault is final: the writer stops
//! without writing anything more, and the service stops with the fault as its
//! error, so that nothing goes into a damaged file or a file nobody will
//! read. A full volume is no fault: it clears when space is freed
//! ([`is_out_of_space`]).

use std::path::{Path, PathBuf};
use std::sync::Mutex;

use rusqlite::ErrorCode;

/// What makes a database unusable while the service runs.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum DatabaseFault {
    /// SQLite found the file damaged (`SQLITE_CORRUPT`) or not a database
    /// any more (`SQLITE_NOTADB`).
    #[error("the database {} is damaged ({cause}); the service stopped so that nothing more is written into it: move it aside and start again (a new database; the frames are analyzed again), or restore a copy", .db.display())]
    Damaged {
        /// The database.
        db: PathBuf,
        /// SQLite's error.
        cause: String,
    },
    /// No file at the database's path any more (deleted or moved away).
    #[error("the database {} was deleted or moved away while the service ran; the service stopped: what it recorded went with that file; start again to record into a new database (the frames are analyzed again)", .db.display())]
    Removed {
        /// The database.
        db: PathBuf,
    },
    /// Another file is at the database's path now.
    #[error("the database {} was replaced by another file while the service ran; the service stopped without writing into either: start again to record into the file now at that path", .db.display())]
    Replaced {
        /// The database.
        db: PathBuf,
    },
}

impl DatabaseFault {
    /// The alert condition that announces the fault: `database_damaged`,
    /// `database_removed` or `database_replaced`.
    pub fn condition(&self) -> &'static str {
        match self {
            DatabaseFault::Damaged { .. } => "database_damaged",
            DatabaseFault::Removed { .. } => "database_removed",
            DatabaseFault::Replaced { .. } => "database_replaced",
        }
    }
}

/// The identity of a file: device and inode on Unix. Read with `stat`,
/// never by opening the file: closing another descriptor of a SQLite file
/// would drop the process's locks on it.
#[cfg(unix)]
fn identity(path: &Path) -> std::io::Result<Option<(u64, u64)>> {
    use std::os::unix::fs::MetadataExt;
    std::fs::metadata(path).map(|m| Some((m.dev(), m.ino())))
}

/// Elsewhere only whether the file is there (Windows does not let an open
/// database be deleted or replaced).
#[cfg(not(unix))]
fn identity(path: &Path) -> std::io::Result<Option<(u64, u64)>> {
    std::fs::metadata(path).map(|_| None)
}

/// The service's view of its database: the file it opened and the first
/// fault found, if any. Shared by every thread that uses the database.
#[derive(Debug)]
pub struct DatabaseHealth {
    db: PathBuf,
    /// The file's identity when the service opened it.
    opened: Option<(u64, u64)>,
    fault: Mutex<Option<DatabaseFault>>,
}

impl DatabaseHealth {
    /// Takes the identity of the database file `db`, just opened.
    pub fn new(db: &Path) -> DatabaseHealth {
        DatabaseHealth {
            db: db.to_path_buf(),
            opened: identity(db).ok().flatten(),
            fault: Mutex::new(None),
        }
    }

    /// The database's path.
    pub fn database(&self) -> &Path {
        &self.db
    }

    /// The fault found so far, if any.
    pub fn fault(&self) -> Option<DatabaseFault> {
        self.fault.lock().ok().and_then(|f| f.clone())
    }

    /// Looks at the file at the database's path: gone or another file is a
    /// fault. Returns the fault found now or before.
    pub fn check(&self) -> Option<DatabaseFault> {
        if let Some(fault) = self.fault() {
            return Some(fault);
        }
        let db = self.db.clone();
        match identity(&self.db) {
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                self.set(DatabaseFault::Removed { db })
            }
            Ok(now) if now != self.opened => self.set(DatabaseFault::Replaced { db }),
            // Cannot be looked at now (permissions): nothing to conclude.
            Ok(_) | Err(_) => None,
        }
    }

    /// Takes note of an error from any of the service's connections: a
    /// damaged database is a fault. Returns whether `e` was one.
    pub fn report(&self, e: &rusqlite::Error) -> bool {
        if !matches!(
            e.sqlite_error_code(),
            Some(ErrorCode::DatabaseCorrupt | ErrorCode::NotADatabase)
        ) {
            return false;
        }
        self.set(DatabaseFault::Damaged {
            db: self.db.clone(),
            cause: e.to_string(),
        });
        true
    }

    /// Keeps `fault` unless one was found before; returns the one kept.
    fn set(&self, fault: DatabaseFault) -> Option<DatabaseFault> {
        let mut kept = self.fault.lock().ok()?;
        Some(kept.get_or_insert(fault).clone())
    }
}

/// Whether `e` is a write that failed for lack of space: SQLite's
/// `SQLITE_FULL`, or an I/O error while the volume of `db` has no space left
/// at all (a write of the shared-memory or log file that ran out of room).
pub fn is_out_of_space(e: &rusqlite::Error, db: &Path) -> bool {
    match e.sqlite_error_code() {
        Some(ErrorCode::DiskFull) => true,
        Some(ErrorCode::SystemIoFailure) => {
            let folder = db
                .parent()
                .filter(|p| !p.as_os_str().is_empty())
                .unwrap_or(Path::new("."));
            fs4::available_space(folder).is_ok_and(|free| free == 0)
        }
        _ => false,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn error(code: i32) -> rusqlite::Error {
        rusqlite::Error::SqliteFailure(rusqlite::ffi::Error::new(code), None)
    }

    /// Moving the file away is a removal, another file at the path a
    /// replacement; the first fault found stays (real files).
    #[test]
    fn a_removed_or_replaced_file_is_a_fault_and_the_first_one_stays() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        std::fs::write(&db, b"x").unwrap();
        let health = DatabaseHealth::new(&db);
        assert_eq!(health.check(), None, "the file opened");
        std::fs::rename(&db, dir.path().join("aside.db")).unwrap();
        assert_eq!(
            health.check(),
            Some(DatabaseFault::Removed { db: db.clone() })
        );
        std::fs::write(&db, b"y").unwrap();
        assert_eq!(
            health.check(),
            Some(DatabaseFault::Removed { db: db.clone() }),
            "the first fault is the one kept"
        );
        let later = DatabaseHealth::new(&db);
        std::fs::rename(dir.path().join("aside.db"), &db).unwrap();
        assert_eq!(later.check(), Some(DatabaseFault::Replaced { db }));
    }

    /// Only SQLite's damage codes are faults (codes from sqlite3.h:
    /// SQLITE_CORRUPT 11, SQLITE_NOTADB 26, SQLITE_BUSY 5, SQLITE_FULL 13).
    #[test]
    fn damage_codes_are_faults_and_others_are_not() {
        let dir = tempfile::tempdir().unwrap();
        let db = dir.path().join("fw.db");
        for code in [5, 13] {
            let health = DatabaseHealth::new(&db);
            assert!(!health.report(&error(code)), "code {code}");
            assert_eq!(health.fault(), None);
        }
        for code in [11, 26] {
            let health = DatabaseHealth::new(&db);
            assert!(health.report(&error(code)), "code {code}");
            assert_eq!(health.fault().unwrap().condition(), "database_damaged");
        }
        assert!(is_out_of_space(&error(13), &db));
        assert!(!is_out_of_space(&error(5), &db));
    }
}
