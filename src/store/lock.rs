//! One server per database file: an exclusive lock on `<db>.lock`, held
//! for the life of the store. SQLite would let a second process write the
//! same file, but each server keeps live state (alert ids, resume points,
//! estimators) that only it can keep in step with the file.

use super::StoreError;
use std::fs::File;
use std::io::{Read, Seek, Write};
use std::path::{Path, PathBuf};
use std::sync::Mutex;

#[derive(Debug)]
pub(crate) struct DbLock {
    path: PathBuf,
    file: Mutex<Option<File>>,
}

/// The lock beside the file itself, not beside the path's text: through
/// a symlink, a `..` or a second spelling, two servers must meet at one
/// lock. A database not yet created is resolved through its directory.
fn lock_path(db: &Path) -> PathBuf {
    let real = std::fs::canonicalize(db).unwrap_or_else(|_| match (db.parent(), db.file_name()) {
        (Some(dir), Some(name)) => {
            let dir = if dir.as_os_str().is_empty() {
                Path::new(".")
            } else {
                dir
            };
            std::fs::canonicalize(dir).map_or_else(|_| db.to_path_buf(), |d| d.join(name))
        }
        _ => db.to_path_buf(),
    });
    let mut name = real.into_os_string();
    name.push(".lock");
    PathBuf::from(name)
}

impl DbLock {
    pub(crate) fn acquire(db: &Path) -> Result<DbLock, StoreError> {
        let path = lock_path(db);
        let mut file = File::options()
            .read(true)
            .write(true)
            .create(true)
            .truncate(false)
            .open(&path)
            .map_err(|e| StoreError::Open {
                path: db.to_path_buf(),
                reason: format!("lock file {}: {e}", path.display()),
            })?;
        if let Err(e) = file.try_lock() {
            let mut holder = String::new();
            let _ = file.read_to_string(&mut holder);
            let holder = match e {
                std::fs::TryLockError::WouldBlock => holder.trim().replace('\n', ", "),
                std::fs::TryLockError::Error(e) => format!("lock failed: {e}"),
            };
            return Err(StoreError::InUse {
                path: db.to_path_buf(),
                lock: path,
                holder: if holder.is_empty() {
                    "holder unknown".into()
                } else {
                    holder
                },
            });
        }
        let lock = DbLock {
            path,
            file: Mutex::new(Some(file)),
        };
        lock.note("");
        Ok(lock)
    }

    /// Rewrites the holder line: pid, and the address once known.
    pub(crate) fn note(&self, listen: &str) {
        let mut guard = self.file.lock().expect("lock file mutex poisoned");
        let Some(file) = guard.as_mut() else { return };
        let mut text = format!("pid {}", std::process::id());
        if !listen.is_empty() {
            text.push_str(&format!("\nlistening on {listen}"));
        }
        let written = file
            .set_len(0)
            .and_then(|_| file.rewind())
            .and_then(|_| file.write_all(text.as_bytes()));
        if let Err(e) = written {
            tracing::warn!(lock = %self.path.display(), error = %e, "could not note the holder in the lock file");
        }
    }

    /// Drops the lock (closing the file releases it).
    pub(crate) fn release(&self) {
        self.file.lock().expect("lock file mutex poisoned").take();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_file_reached_through_a_symlink_or_a_second_spelling_is_one_lock() {
        let dir = tempfile::tempdir().unwrap();
        let real = dir.path().join("rig.db");
        std::fs::write(&real, b"").unwrap();
        let link = dir.path().join("link.db");
        std::os::unix::fs::symlink(&real, &link).unwrap();
        let first = DbLock::acquire(&real).unwrap();
        for other in [link.clone(), dir.path().join(".").join("rig.db")] {
            match DbLock::acquire(&other) {
                Err(StoreError::InUse { holder, .. }) => {
                    assert!(holder.contains(&format!("pid {}", std::process::id())))
                }
                other => panic!("second lock through another path: {other:?}"),
            }
        }
        first.release();
        // A database not created yet is keyed by its real directory.
        let missing = dir.path().join("new.db");
        let a = DbLock::acquire(&missing).unwrap();
        let linked_dir = dir.path().join("dirlink");
        std::os::unix::fs::symlink(dir.path(), &linked_dir).unwrap();
        assert!(matches!(
            DbLock::acquire(&linked_dir.join("new.db")),
            Err(StoreError::InUse { .. })
        ));
        a.release();
    }
}
