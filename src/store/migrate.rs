//! Schema migrations: `migrations/NNNN_name.sql`, embedded at compile time, applied in order,
//! each in its own transaction, with the version tracked in `PRAGMA user_version`.

use rusqlite::Connection;

use crate::error::{Error, Result};

/// The embedded migrations, in order. Migration `i` (0-based) brings the schema to version `i+1`.
pub const MIGRATIONS: &[(&str, &str)] = &[
    (
        "0001_initial",
        include_str!("../../migrations/0001_initial.sql"),
    ),
    (
        "0002_signing_key",
        include_str!("../../migrations/0002_signing_key.sql"),
    ),
    (
        "0003_sealed_entries",
        include_str!("../../migrations/0003_sealed_entries.sql"),
    ),
    (
        "0004_families",
        include_str!("../../migrations/0004_families.sql"),
    ),
    (
        "0005_row_blobs",
        include_str!("../../migrations/0005_row_blobs.sql"),
    ),
    (
        "0006_withdrawals",
        include_str!("../../migrations/0006_withdrawals.sql"),
    ),
    (
        "0007_retention",
        include_str!("../../migrations/0007_retention.sql"),
    ),
    (
        "0008_merkle",
        include_str!("../../migrations/0008_merkle.sql"),
    ),
];

/// The schema version this binary writes.
pub fn latest_version() -> u32 {
    MIGRATIONS.len() as u32
}

/// The schema version of an open database.
pub fn current_version(conn: &Connection) -> Result<u32> {
    Ok(conn.query_row("PRAGMA user_version", [], |row| row.get::<_, u32>(0))?)
}

/// Brings the database to the latest version. Refuses a database written by a newer binary,
/// since this one cannot know what its tables mean.
pub fn migrate(conn: &mut Connection) -> Result<u32> {
    let from = current_version(conn)?;
    let latest = latest_version();
    if from > latest {
        return Err(Error::SchemaTooNew {
            found: from,
            supported: latest,
        });
    }
    for (index, (name, sql)) in MIGRATIONS.iter().enumerate().skip(from as usize) {
        let version = index as u32 + 1;
        let tx = conn.transaction()?;
        tx.execute_batch(sql).map_err(|e| Error::Migration {
            name: (*name).to_string(),
            detail: e.to_string(),
        })?;
        // Trees need SHA-256, which SQL lacks: built here, in the migration's transaction.
        if *name == "0008_merkle" {
            crate::ledger::merkle::build_all(&tx).map_err(|e| Error::Migration {
                name: (*name).to_string(),
                detail: e.to_string(),
            })?;
        }
        tx.pragma_update(None, "user_version", version)?;
        tx.commit()?;
        tracing::info!(migration = name, version, "applied migration");
    }
    Ok(latest)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fresh_database_reaches_latest_version() -> Result<()> {
        let mut conn = Connection::open_in_memory()?;
        assert_eq!(current_version(&conn)?, 0);
        assert_eq!(migrate(&mut conn)?, latest_version());
        assert_eq!(current_version(&conn)?, latest_version());
        // The tables of the latest schema exist.
        let tables: i64 = conn.query_row(
            "SELECT count(*) FROM sqlite_master WHERE type = 'table' AND name IN
             ('holdouts', 'holdout_rows', 'sealed_labels', 'ledger', 'users', 'tokens',
              'request_keys', 'answered_digests', 'signing_key', 'holdout_ids')",
            [],
            |r| r.get(0),
        )?;
        assert_eq!(tables, 10);
        // Migrating again is a no-op.
        assert_eq!(migrate(&mut conn)?, latest_version());
        Ok(())
    }

    #[test]
    fn newer_database_is_refused() -> Result<()> {
        let mut conn = Connection::open_in_memory()?;
        conn.pragma_update(None, "user_version", latest_version() + 1)?;
        let err = migrate(&mut conn).unwrap_err();
        assert!(matches!(err, Error::SchemaTooNew { .. }));
        assert!(err.to_string().contains("newer"), "{err}");
        Ok(())
    }

    #[test]
    fn ledger_rejects_update_and_delete() -> Result<()> {
        let mut conn = Connection::open_in_memory()?;
        migrate(&mut conn)?;
        conn.execute(
            "INSERT INTO ledger (chain, seq, kind, body, salt, prev_hash, hash)
             VALUES ('h', 0, 'genesis', '{}', '00', '00', '11')",
            [],
        )?;
        assert!(conn.execute("UPDATE ledger SET body = 'x'", []).is_err());
        assert!(conn.execute("DELETE FROM ledger", []).is_err());
        Ok(())
    }

    /// A ledger written before trees existed (schema 7, encoding /1) gets its trees from
    /// migration 0008, keeps /1 for the chains it has, and new chains take /2.
    #[test]
    fn migration_0008_builds_trees_and_keeps_old_encodings() -> Result<()> {
        use crate::ledger::{self, Encoding, merkle};
        let mut conn = Connection::open_in_memory()?;
        for (_, sql) in &MIGRATIONS[..7] {
            conn.execute_batch(sql)?;
        }
        conn.pragma_update(None, "user_version", 7)?;
        let mut prev = ledger::ZERO_HASH.to_string();
        for seq in 0..11u64 {
            let body = format!("{{\"i\":{seq}}}");
            let hash = ledger::entry_hash_v1(&prev, seq, "answer", "00", &body);
            conn.execute(
                "INSERT INTO ledger (chain, seq, kind, body, salt, prev_hash, hash)
                 VALUES ('old', ?1, 'answer', ?2, '00', ?3, ?4)",
                rusqlite::params![seq as i64, body, prev, hash],
            )?;
            prev = hash;
        }
        migrate(&mut conn)?;
        let tx = conn.transaction()?;
        ledger::append(
            &tx,
            "old",
            ledger::Kind::Answer,
            &serde_json::json!({"i": 11}),
        )?;
        ledger::append(
            &tx,
            "new",
            ledger::Kind::Answer,
            &serde_json::json!({"i": 0}),
        )?;
        tx.commit()?;
        let old = ledger::read_chain(&conn, "old")?;
        assert_eq!(old.len(), 12);
        assert_eq!(Encoding::of_chain(&old), Encoding::V1);
        assert!(ledger::verify_chain(&old).is_empty());
        let new = ledger::read_chain(&conn, "new")?;
        assert_eq!(Encoding::of_chain(&new), Encoding::V2);
        assert!(ledger::verify_chain(&new).is_empty());
        let leaves: Vec<merkle::Hash> = old
            .iter()
            .map(|e| merkle::leaf_input(&e.hash))
            .collect::<Result<_>>()?;
        let stored = merkle::Stored::new(&conn, "old");
        for n in 1..=12 {
            assert_eq!(
                merkle::root(&stored, n)?,
                merkle::Tree::new(leaves[..n as usize].iter().copied()).root()
            );
        }
        assert_eq!(merkle::size(&conn, "old")?, 12);
        assert!(conn.execute("DELETE FROM merkle_nodes", []).is_err());
        Ok(())
    }
}
