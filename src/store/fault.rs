//! Why a write failed, told apart: a full disk, a read-only file, a file
//! deleted under the server, corruption, an I/O error, a lock held by
//! another process. Each has its own message (with the path) and status.

use std::path::Path;

/// Why the database would not take a write, as far as SQLite says.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum StorageFault {
    /// SQLITE_FULL: the disk or the file system quota has no room.
    Full,
    /// SQLITE_READONLY: permissions or a read-only mount.
    ReadOnly,
    /// The file is gone or was replaced since the server opened it.
    Missing,
    /// SQLITE_CORRUPT / SQLITE_NOTADB.
    Corrupt,
    /// SQLITE_IOERR and I/O errors below sqlx.
    Io,
    /// SQLITE_BUSY / SQLITE_LOCKED: another process holds the database.
    Busy,
}

impl StorageFault {
    /// The message a client and the log see.
    pub fn describe(self, path: &Path, detail: &str) -> String {
        let path = path.display();
        let what = match self {
            StorageFault::Full => format!(
                "database {path} is full (no room on its disk or quota): free space; the server takes writes again by itself"
            ),
            StorageFault::ReadOnly => format!(
                "database {path} is read-only (file permissions or a read-only mount): make it writable"
            ),
            StorageFault::Missing => format!(
                "database file {path} was deleted or replaced while the server ran: writes are refused rather than acknowledged into a file that is gone; restart the server"
            ),
            StorageFault::Corrupt => format!(
                "database {path} reports corruption: stop the server and check the file (sqlite3 {path} 'PRAGMA integrity_check')"
            ),
            StorageFault::Io => format!("database {path}: disk I/O error"),
            StorageFault::Busy => {
                format!("database {path} is locked by another process")
            }
        };
        let detail = if detail.is_empty() {
            String::new()
        } else {
            format!(" ({detail})")
        };
        format!("{what}; nothing of this request was stored{detail}")
    }

    /// A short name for metrics and logs.
    pub fn name(self) -> &'static str {
        match self {
            StorageFault::Full => "full",
            StorageFault::ReadOnly => "read_only",
            StorageFault::Missing => "missing",
            StorageFault::Corrupt => "corrupt",
            StorageFault::Io => "io",
            StorageFault::Busy => "busy",
        }
    }
}

/// The fault behind a sqlx error, if it is one of the storage kind (a
/// constraint or a malformed statement is not: those are bugs or input).
pub(crate) fn of_sqlx(e: &sqlx::Error, engine: super::Engine) -> Option<StorageFault> {
    match e {
        sqlx::Error::Database(db) => match engine {
            super::Engine::Sqlite => of_sqlite_code(db.code()?.parse().ok()?),
            super::Engine::Postgres => of_sqlstate(&db.code()?),
        },
        sqlx::Error::Io(_) | sqlx::Error::PoolTimedOut | sqlx::Error::PoolClosed => {
            Some(StorageFault::Io)
        }
        _ => None,
    }
}

fn of_sqlite_code(code: i64) -> Option<StorageFault> {
    // Extended result codes keep the primary code in the low byte
    // (https://www.sqlite.org/rescode.html).
    match code & 0xff {
        13 => Some(StorageFault::Full),
        8 => Some(StorageFault::ReadOnly),
        11 | 26 => Some(StorageFault::Corrupt),
        10 => Some(StorageFault::Io),
        14 => Some(StorageFault::Missing),
        5 | 6 => Some(StorageFault::Busy),
        _ => None,
    }
}

/// PostgreSQL's SQLSTATE classes (PostgreSQL 15 manual, appendix A).
fn of_sqlstate(state: &str) -> Option<StorageFault> {
    match state {
        "25006" => Some(StorageFault::ReadOnly),
        "XX001" | "XX002" => Some(StorageFault::Corrupt),
        "40001" | "40P01" | "55P03" => Some(StorageFault::Busy),
        s if s.starts_with("53") => Some(StorageFault::Full),
        s if s.starts_with("58") || s.starts_with("08") || s.starts_with("57P") => {
            Some(StorageFault::Io)
        }
        _ => None,
    }
}

/// (device, inode) of a file, where the platform has them.
pub(crate) fn file_identity(path: &Path) -> Option<(u64, u64)> {
    #[cfg(unix)]
    {
        use std::os::unix::fs::MetadataExt;
        std::fs::metadata(path).ok().map(|m| (m.dev(), m.ino()))
    }
    #[cfg(not(unix))]
    {
        let _ = path;
        None
    }
}

/// Fails with `Missing` when the file at `path` is not the one opened.
pub(crate) fn check_identity(path: &Path, opened: Option<(u64, u64)>) -> Result<(), StorageFault> {
    match (opened, file_identity(path)) {
        (Some(was), Some(now)) if was != now => Err(StorageFault::Missing),
        (Some(_), None) => Err(StorageFault::Missing),
        _ => Ok(()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use sqlx::sqlite::SqliteConnectOptions;
    use sqlx::{ConnectOptions, Connection};

    async fn insert_error(options: SqliteConnectOptions, setup: &[&'static str]) -> sqlx::Error {
        let mut conn = options.connect().await.unwrap();
        for statement in setup {
            sqlx::query(*statement).execute(&mut conn).await.unwrap();
        }
        for i in 0..100_000 {
            if let Err(e) = sqlx::query("INSERT INTO t (v) VALUES (?)")
                .bind(format!("{i:0>200}"))
                .execute(&mut conn)
                .await
            {
                let _ = conn.close().await;
                return e;
            }
        }
        panic!("no insert failed");
    }

    #[tokio::test]
    async fn sqlite_errors_sort_into_their_faults() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("f.db");
        let create = SqliteConnectOptions::new()
            .filename(&path)
            .create_if_missing(true);
        // SQLite's own quota stands in for a full disk (max_page_count).
        let full = insert_error(
            create.clone(),
            &["CREATE TABLE t (v TEXT)", "PRAGMA max_page_count = 8"],
        )
        .await;
        assert_eq!(
            of_sqlx(&full, crate::store::Engine::Sqlite),
            Some(StorageFault::Full),
            "{full}"
        );
        let read_only = insert_error(create.read_only(true), &[]).await;
        assert_eq!(
            of_sqlx(&read_only, crate::store::Engine::Sqlite),
            Some(StorageFault::ReadOnly),
            "{read_only}"
        );
        // A constraint is the caller's problem, not the storage's.
        let mut conn = SqliteConnectOptions::new()
            .filename(&path)
            .connect()
            .await
            .unwrap();
        sqlx::query("CREATE TABLE u (k INTEGER PRIMARY KEY)")
            .execute(&mut conn)
            .await
            .unwrap();
        sqlx::query("INSERT INTO u VALUES (1)")
            .execute(&mut conn)
            .await
            .unwrap();
        let dup = sqlx::query("INSERT INTO u VALUES (1)")
            .execute(&mut conn)
            .await
            .unwrap_err();
        assert_eq!(of_sqlx(&dup, crate::store::Engine::Sqlite), None, "{dup}");
    }

    #[test]
    fn a_replaced_file_is_missing() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("f.db");
        std::fs::write(&path, b"x").unwrap();
        // Held open, as SQLite holds the database: its inode cannot be
        // handed to a new file.
        let _held = std::fs::File::open(&path).unwrap();
        let opened = file_identity(&path);
        assert_eq!(check_identity(&path, opened), Ok(()));
        std::fs::remove_file(&path).unwrap();
        assert_eq!(check_identity(&path, opened), Err(StorageFault::Missing));
        std::fs::write(&path, b"y").unwrap();
        assert_eq!(check_identity(&path, opened), Err(StorageFault::Missing));
    }

    #[test]
    fn messages_name_the_path() {
        let m = StorageFault::Full.describe(Path::new("/data/lab.db"), "code 13");
        assert!(
            m.contains("/data/lab.db") && m.contains("full") && m.contains("code 13"),
            "{m}"
        );
    }
}
