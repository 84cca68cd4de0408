//! Copies of the whole database: written through SQLite's online backup API (a consistent
//! snapshot, WAL content included, while the daemon keeps writing), checked after writing, and
//! restored only when the copy passes the same checks and would not overwrite a newer ledger.
//!
//! A copy holds the labels, the salts and the exact scores in clear, like the database itself:
//! it is created readable by its owner only.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};

use super::migrate::latest_version;
use crate::error::{Error, Result};
use crate::ledger;

/// What the checks of a copy found: it is a sound SQLite file of a schema this binary knows,
/// and every chain in it verifies.
#[derive(Debug, Clone, PartialEq)]
pub struct Verified {
    /// `PRAGMA user_version` of the copy.
    pub schema_version: u32,
    /// Each chain's head: name -> (entry number, hash).
    pub heads: BTreeMap<String, (u64, String)>,
    /// Entries over every chain.
    pub entries: u64,
    /// Size of the file, bytes.
    pub bytes: u64,
}

impl Verified {
    /// Holdout chains (every chain but the identity chain).
    pub fn holdouts(&self) -> usize {
        self.heads
            .keys()
            .filter(|c| c.as_str() != ledger::USERS_CHAIN)
            .count()
    }
}

fn bad(path: &Path, why: impl Into<String>) -> Error {
    Error::invalid(path.display().to_string(), why)
}

/// Copies the database `src` is connected to into a new file `out` (refused if it exists),
/// in one step of the backup API (one read transaction: a consistent snapshot; in WAL mode
/// writers go on meanwhile), then checks the copy ([`verify`]). The copy is written beside
/// `out` under a temporary name and renamed only once it has passed, so `out` is never a
/// partial copy. The copy is a single file (rollback journal, not WAL).
pub fn copy_to(src: &Connection, out: &Path) -> Result<Verified> {
    if out.exists() {
        return Err(Error::AlreadyExists(format!(
            "{} exists; a backup never overwrites a file",
            out.display()
        )));
    }
    let partial = partial_name(out);
    let _ = std::fs::remove_file(&partial);
    create_owner_only(&partial)?;
    let result = (|| {
        {
            let mut dst = Connection::open(&partial)?;
            {
                let backup = rusqlite::backup::Backup::new(src, &mut dst)?;
                let mut tries = 0u32;
                loop {
                    // -1: every page in one step, inside one read transaction of the source.
                    match backup.step(-1)? {
                        rusqlite::backup::StepResult::Done => break,
                        rusqlite::backup::StepResult::More => {}
                        _ => {
                            tries += 1;
                            if tries > 600 {
                                return Err(Error::Internal(
                                    "the database stayed locked for a minute; backup abandoned"
                                        .into(),
                                ));
                            }
                            std::thread::sleep(Duration::from_millis(100));
                        }
                    }
                }
            }
            // A copy of a WAL database is marked WAL too; make it one self-contained file.
            dst.pragma_update(None, "journal_mode", "DELETE")?;
        }
        verify(&partial)
    })();
    match result {
        Ok(v) => {
            std::fs::rename(&partial, out)?;
            Ok(v)
        }
        Err(e) => {
            let _ = std::fs::remove_file(&partial);
            Err(e)
        }
    }
}

/// Copies the database file at `db` (opened read-only, not migrated) into `out`: the copy
/// made before a migration, and by tools that must not change the file.
pub fn copy_file(db: &Path, out: &Path) -> Result<Verified> {
    let src = Connection::open_with_flags(db, OpenFlags::SQLITE_OPEN_READ_ONLY)?;
    src.busy_timeout(Duration::from_secs(10))?;
    copy_to(&src, out)
}

/// Checks a copy: SQLite's `integrity_check` says ok, the schema version is one this binary
/// knows (1 to the latest), and every chain in the ledger verifies (hashes, links, numbering).
///
/// # Failure
/// `InvalidArgument` naming the file and what failed.
pub fn verify(path: &Path) -> Result<Verified> {
    let bytes = std::fs::metadata(path)
        .map_err(|e| bad(path, format!("cannot read: {e}")))?
        .len();
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(|e| bad(path, format!("cannot open: {e}")))?;
    let check: std::result::Result<Vec<String>, rusqlite::Error> = (|| {
        let mut stmt = conn.prepare("PRAGMA integrity_check")?;
        let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
        rows.collect()
    })();
    match check {
        Ok(lines) if lines.len() == 1 && lines[0] == "ok" => {}
        Ok(lines) => {
            return Err(bad(
                path,
                format!(
                    "fails SQLite's integrity check: {}",
                    lines.into_iter().take(3).collect::<Vec<_>>().join("; ")
                ),
            ));
        }
        Err(e) => return Err(bad(path, format!("not a readable SQLite database: {e}"))),
    }
    let schema_version =
        super::current_version(&conn).map_err(|e| bad(path, format!("no schema version: {e}")))?;
    if schema_version == 0 || schema_version > latest_version() {
        return Err(bad(
            path,
            format!(
                "schema version {schema_version} is not one this binary knows (1 to {})",
                latest_version()
            ),
        ));
    }
    let chains: Vec<String> = (|| {
        let mut stmt = conn.prepare("SELECT DISTINCT chain FROM ledger ORDER BY chain")?;
        let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
        rows.collect::<std::result::Result<Vec<String>, rusqlite::Error>>()
    })()
    .map_err(|e| bad(path, format!("no readable ledger: {e}")))?;
    let mut heads = BTreeMap::new();
    let mut entries = 0u64;
    for chain in chains {
        let list = ledger::read_chain(&conn, &chain)
            .map_err(|e| bad(path, format!("chain {chain} unreadable: {e}")))?;
        let faults = ledger::verify_chain(&list);
        if let Some(f) = faults.first() {
            return Err(bad(
                path,
                format!(
                    "chain {chain} does not verify ({} fault(s)); first: {f:?}",
                    faults.len()
                ),
            ));
        }
        entries += list.len() as u64;
        if let Some(last) = list.last() {
            heads.insert(chain, (last.seq, last.hash.clone()));
        }
    }
    Ok(Verified {
        schema_version,
        heads,
        entries,
        bytes,
    })
}

/// What a restore did.
#[derive(Debug, Clone, PartialEq)]
pub struct Restored {
    /// The checks of the copy.
    pub verified: Verified,
    /// Whether a database was replaced (else a new file was written).
    pub replaced: bool,
}

/// Restores the copy `from` to `db`. The copy must pass [`verify`]; an existing `db` is
/// replaced only when every one of its chains is a prefix of the copy's (same hash at its
/// head), so a restore never drops an entry the database holds. Stop the daemon first: the
/// file is replaced under its path (written beside it, then renamed; stale `-wal` and `-shm`
/// files removed).
///
/// # Failure
/// `InvalidArgument` for a copy that fails its checks; `FailedPrecondition` for a database
/// that holds entries the copy lacks, or that is of a newer schema.
pub fn restore(from: &Path, db: &Path) -> Result<Restored> {
    let verified = verify(from)?;
    let replaced = db.exists();
    if replaced {
        let current = verify(db).map_err(|e| {
            Error::FailedPrecondition(format!(
                "{} exists and cannot be checked ({e}); move it away to restore over it",
                db.display()
            ))
        })?;
        if current.schema_version > verified.schema_version {
            return Err(Error::FailedPrecondition(format!(
                "{} is of schema version {}, newer than the copy's {}: refusing to overwrite it",
                db.display(),
                current.schema_version,
                verified.schema_version
            )));
        }
        let conn = Connection::open_with_flags(
            from,
            OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )?;
        for (chain, (seq, hash)) in &current.heads {
            let same = match verified.heads.get(chain) {
                Some((copy_seq, _)) if copy_seq >= seq => conn
                    .query_row(
                        "SELECT hash FROM ledger WHERE chain = ?1 AND seq = ?2",
                        rusqlite::params![chain, *seq as i64],
                        |r| r.get::<_, String>(0),
                    )
                    .map(|h| &h == hash)
                    .unwrap_or(false),
                _ => false,
            };
            if !same {
                let copy = verified
                    .heads
                    .get(chain)
                    .map(|(s, _)| format!("ends at entry {s}"))
                    .unwrap_or_else(|| "does not hold it".into());
                return Err(Error::FailedPrecondition(format!(
                    "{} is newer than the copy or differs from it: its chain {chain} ends at \
                     entry {seq}, the copy's {copy}; refusing to overwrite a ledger with \
                     entries the copy lacks",
                    db.display()
                )));
            }
        }
    }
    let partial = partial_name(db);
    let _ = std::fs::remove_file(&partial);
    let _ = std::fs::remove_file(side(&partial, "-journal"));
    let result = copy_file(from, &partial);
    match result {
        Ok(_) => {
            for suffix in ["-wal", "-shm"] {
                let f = side(db, suffix);
                if f.exists() {
                    std::fs::remove_file(&f)?;
                }
            }
            std::fs::rename(&partial, db)?;
            Ok(Restored { verified, replaced })
        }
        Err(e) => {
            let _ = std::fs::remove_file(&partial);
            Err(e)
        }
    }
}

/// `PATH` + `suffix` (SQLite's side files).
fn side(path: &Path, suffix: &str) -> PathBuf {
    let mut s = path.as_os_str().to_owned();
    s.push(suffix);
    PathBuf::from(s)
}

fn partial_name(out: &Path) -> PathBuf {
    side(out, ".partial")
}

/// Creates an empty file readable by its owner only (fails if it exists).
fn create_owner_only(path: &Path) -> Result<()> {
    let mut opts = std::fs::OpenOptions::new();
    opts.write(true).create_new(true);
    #[cfg(unix)]
    {
        use std::os::unix::fs::OpenOptionsExt;
        opts.mode(0o600);
    }
    opts.open(path)?;
    Ok(())
}

/// The name of the automatic copy made before migrating `db` from schema `from`:
/// `DB.before-schema-TO.from-FROM.TIME.backup`, beside the database.
pub fn migration_backup_name(db: &Path, from: u32, to: u32, at: &str) -> PathBuf {
    let stamp: String = at.chars().filter(|c| c.is_ascii_alphanumeric()).collect();
    side(
        db,
        &format!(".before-schema-{to}.from-{from}.{stamp}.backup"),
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::Store;

    fn sample(dir: &Path) -> PathBuf {
        let path = dir.join("h.db");
        let mut store = Store::open(&path).unwrap();
        let conn = store.conn();
        let tx = conn.transaction().unwrap();
        for i in 0..3 {
            ledger::append(&tx, "h", ledger::Kind::Read, &serde_json::json!({ "i": i })).unwrap();
        }
        tx.commit().unwrap();
        path
    }

    #[test]
    fn copy_verifies_and_restores_and_refuses_damage() -> Result<()> {
        let dir = tempfile::tempdir()?;
        let db = sample(dir.path());
        let out = dir.path().join("b.db");
        let v = copy_file(&db, &out)?;
        assert_eq!(v.entries, 3);
        assert_eq!(v.heads["h"].0, 2);
        assert_eq!(v.schema_version, latest_version());
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(&out)?.permissions().mode() & 0o777;
            assert_eq!(mode, 0o600);
        }
        // Never over an existing file.
        assert!(matches!(copy_file(&db, &out), Err(Error::AlreadyExists(_))));
        // Same ledger: restoring over it is allowed.
        let r = restore(&out, &db)?;
        assert!(r.replaced);
        // A database with an entry the copy lacks is not overwritten.
        {
            let mut store = Store::open(&db)?;
            let tx = store.conn().transaction()?;
            ledger::append(&tx, "h", ledger::Kind::Read, &serde_json::json!({ "i": 9 }))?;
            tx.commit()?;
        }
        let err = restore(&out, &db).unwrap_err();
        assert!(matches!(err, Error::FailedPrecondition(_)), "{err}");
        assert!(err.to_string().contains("chain h ends at entry 3"), "{err}");
        // A truncated copy is refused.
        let bytes = std::fs::read(&out)?;
        let cut = dir.path().join("cut.db");
        std::fs::write(&cut, &bytes[..bytes.len() / 2])?;
        let fresh = dir.path().join("fresh.db");
        assert!(matches!(
            restore(&cut, &fresh),
            Err(Error::InvalidArgument { .. })
        ));
        assert!(!fresh.exists());
        // A fresh path gets the copy.
        let r = restore(&out, &fresh)?;
        assert!(!r.replaced);
        assert_eq!(verify(&fresh)?.heads, v.heads);
        Ok(())
    }
}
