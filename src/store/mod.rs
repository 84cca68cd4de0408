//! The SQLite store: opening a database (WAL, busy timeout, foreign keys) and migrations.
//!
//! The database holds the labels in clear, so a new file is created readable by its owner only.

pub mod backup;
mod migrate;

use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::Connection;

use crate::error::{Error, Result};

pub use migrate::{MIGRATIONS, current_version, latest_version, migrate};

/// An open, migrated database.
#[derive(Debug)]
pub struct Store {
    conn: Connection,
    migration_backup: Option<MigrationBackup>,
}

/// The copy [`Store::open`] made before migrating an existing database to a newer schema.
#[derive(Debug, Clone, PartialEq)]
pub struct MigrationBackup {
    /// The copy (beside the database).
    pub path: PathBuf,
    /// Schema version before.
    pub from: u32,
    /// Schema version after.
    pub to: u32,
    /// When the copy was made, RFC 3339 UTC.
    pub at: String,
}

impl Store {
    /// Opens (creating if needed) and migrates the database at `path`. An existing database
    /// of an older schema is first copied beside itself
    /// ([`backup::migration_backup_name`]) and the copy checked; the migration runs only once
    /// the copy has passed ([`Store::migration_backup`] names it).
    ///
    /// # Failure
    /// Fails when the file cannot be opened, the copy before a migration fails, a migration
    /// fails, or the file was written by a newer binary.
    pub fn open(path: &Path) -> Result<Store> {
        let existed = path.exists();
        let conn = Connection::open(path)?;
        if !existed {
            restrict_permissions(path)?;
        }
        let mut migration_backup = None;
        if existed {
            let from = current_version(&conn)?;
            let to = latest_version();
            if from > 0 && from < to {
                let at = crate::auth::rfc3339(chrono::Utc::now());
                let copy = backup::migration_backup_name(path, from, to, &at);
                backup::copy_to(&conn, &copy).map_err(|e| Error::Migration {
                    name: format!("backup before migrating schema {from} to {to}"),
                    detail: e.to_string(),
                })?;
                tracing::info!(copy = %copy.display(), from, to, "backed up before migrating");
                migration_backup = Some(MigrationBackup {
                    path: copy,
                    from,
                    to,
                    at,
                });
            }
        }
        let mut store = Store::setup(conn)?;
        store.migration_backup = migration_backup;
        Ok(store)
    }

    /// The copy made before this open migrated the database, if it did.
    pub fn migration_backup(&self) -> Option<&MigrationBackup> {
        self.migration_backup.as_ref()
    }

    /// An in-memory database, for tests.
    pub fn open_in_memory() -> Result<Store> {
        Store::setup(Connection::open_in_memory()?)
    }

    fn setup(mut conn: Connection) -> Result<Store> {
        // WAL lets readers (backups, audits of a live file) run beside the writer; the busy
        // timeout lets a second process wait for the write lock instead of failing at once.
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(None, "synchronous", "FULL")?;
        conn.pragma_update(None, "foreign_keys", "ON")?;
        // Deleted content (shredded labels, dropped prediction files) is overwritten with
        // zeros, so copies taken afterwards do not hold it in free pages.
        conn.pragma_update(None, "secure_delete", "ON")?;
        conn.busy_timeout(Duration::from_secs(10))?;
        migrate(&mut conn)?;
        Ok(Store {
            conn,
            migration_backup: None,
        })
    }

    /// A second, read-only connection to the same file, for reads that must not wait behind
    /// the writer (WAL readers see every committed transaction and never block on a commit in
    /// progress); `None` for an in-memory database or when the file cannot be opened again.
    pub fn reader(&self) -> Option<Connection> {
        let path = self.conn.path().filter(|p| !p.is_empty())?;
        let flags =
            rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY | rusqlite::OpenFlags::SQLITE_OPEN_NO_MUTEX;
        let conn = Connection::open_with_flags(path, flags).ok()?;
        conn.busy_timeout(Duration::from_secs(10)).ok()?;
        Some(conn)
    }

    /// The connection, for the modules that read and write tables.
    pub fn conn(&mut self) -> &mut Connection {
        &mut self.conn
    }
}

#[cfg(unix)]
fn restrict_permissions(path: &Path) -> Result<()> {
    use std::os::unix::fs::PermissionsExt;
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(0o600))?;
    Ok(())
}

#[cfg(not(unix))]
fn restrict_permissions(_path: &Path) -> Result<()> {
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn open_creates_owner_only_file_in_wal_mode() -> Result<()> {
        let dir = tempfile::tempdir()?;
        let path = dir.path().join("h.db");
        let mut store = Store::open(&path)?;
        let mode: String = store
            .conn()
            .query_row("PRAGMA journal_mode", [], |r| r.get(0))?;
        assert_eq!(mode, "wal");
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let perms = std::fs::metadata(&path)?.permissions().mode() & 0o777;
            assert_eq!(perms, 0o600);
        }
        Ok(())
    }
}
