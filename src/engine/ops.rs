//! Operations the engine records: a copy of the database (`backup` entries).

use super::{BackupRecord, Engine};
use crate::auth::rfc3339;
use crate::error::{Error, Result};
use crate::ledger;

/// Who is named in a backup entry when no user took it (offline, or before a migration).
pub const LOCAL_OPERATOR: &str = "(local file access)";

impl Engine {
    /// Records, in one write, a `backup` entry in every holdout's chain (withdrawn and closed
    /// ones included: the copy holds their labels too); returns how many chains and the entries'
    /// time. Call it just
    /// before taking the copy, so the copy holds the entries.
    pub fn record_backup(
        &mut self,
        by: &str,
        roles: &str,
        how: &str,
        file: &str,
    ) -> Result<(usize, String)> {
        let record = BackupRecord {
            by: by.to_string(),
            roles: roles.to_string(),
            how: how.to_string(),
            file: file.to_string(),
            at: rfc3339(self.now()),
        };
        let body = serde_json::to_value(&record)
            .map_err(|e| Error::Internal(format!("backup encoding: {e}")))?;
        let chains: Vec<String> = {
            let conn = self.store().conn();
            let mut stmt =
                conn.prepare("SELECT DISTINCT chain FROM ledger WHERE chain != ?1 ORDER BY chain")?;
            let rows = stmt.query_map([ledger::USERS_CHAIN], |r| r.get::<_, String>(0))?;
            rows.collect::<std::result::Result<_, _>>()?
        };
        self.write(|engine| {
            for chain in &chains {
                engine.append(chain, ledger::Kind::Backup, &body, None)?;
            }
            Ok(chains.len())
        })
        .map(|n| (n, record.at.clone()))
    }
}

impl Engine {
    /// Records the copy the store made before migrating the database at open (if it did): a
    /// `backup` entry in every holdout's chain, by [`LOCAL_OPERATOR`]. The copy itself predates
    /// the entries (it is of the old schema); the entries say it was made and where.
    pub fn record_migration_backup(&mut self) -> Result<()> {
        let Some(m) = self.store().migration_backup().cloned() else {
            return Ok(());
        };
        let how = format!(
            "automatic, before migration from schema {} to {} (at {})",
            m.from, m.to, m.at
        );
        self.record_backup(LOCAL_OPERATOR, "", &how, &m.path.display().to_string())?;
        Ok(())
    }
}
