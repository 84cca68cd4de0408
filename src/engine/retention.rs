//! What the daemon keeps of prediction files and labels, and for how long.
//!
//! Retention of prediction files is declared per holdout at creation and stated in its genesis
//! entry (`retention`): `digests` (the default: only the digest of each submitted file is kept)
//! or `kept` for N days (the parsed predictions, compressed, in `kept_predictions`, keyed by the
//! answer or sealed entry that scored them). [`Engine::drop_expired_predictions`] deletes those
//! older than N days by the engine's clock and records each sweep as a `predictions-dropped`
//! entry naming the entries whose files went, so that an export and an audit can tell a file
//! dropped on time from one that is missing. A genesis without `retention` (every holdout
//! created before it existed) reads as `digests`.
//!
//! [`Engine::shred_labels`]: the custodian of a closed holdout deletes its labels from the
//! store (with the per-row losses of its sealed entries, which the labels determine), recorded
//! as a `labels-shredded` entry. The genesis entry keeps the labels' digest, so the chain still
//! audits and a copy of the labels can be checked against it. Kept prediction files stay until
//! their retention ends: they are the analysts' predictions, hold nothing of the labels, and
//! are what lets the custodian's copy of the labels re-score every answer after the shred.
//! The store runs with `secure_delete` on, so deleted pages are overwritten with zeros and a
//! backup taken afterwards holds none of it.

use chrono::{DateTime, Utc};
use rusqlite::params;
use serde::Serialize;
use serde_json::{Value, json};

use super::replay::{DropRecord, ShredRecord};
use super::{Engine, Loaded};
use crate::audit::kept::{self, KeptFile};
use crate::auth::{Caller, Role, rfc3339};
use crate::error::{Error, Result};
use crate::ledger::Kind;
use crate::metric::Predictions;

/// Longest retention accepted, days (about a hundred years).
pub const MAX_KEEP_DAYS: u32 = 36_500;

/// What a holdout keeps of each submitted prediction file.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Retention {
    /// Only the digest (in the ledger entry).
    #[default]
    Digests,
    /// The parsed predictions too, compressed, for this many days after the entry.
    Keep {
        /// Days, from 1 to [`MAX_KEEP_DAYS`].
        days: u32,
    },
}

impl Retention {
    /// The retention asked for at creation: 0 days is digests only.
    pub fn from_days(days: u32) -> Result<Retention> {
        match days {
            0 => Ok(Retention::Digests),
            d if d <= MAX_KEEP_DAYS => Ok(Retention::Keep { days: d }),
            d => Err(Error::invalid(
                "keep_predictions",
                format!("{d} days is more than the {MAX_KEEP_DAYS} accepted"),
            )),
        }
    }

    /// Days kept, if files are kept.
    pub fn days(self) -> Option<u32> {
        match self {
            Retention::Digests => None,
            Retention::Keep { days } => Some(days),
        }
    }

    /// The genesis entry's `retention` field.
    pub fn to_genesis(self) -> Value {
        match self {
            Retention::Digests => json!({"predictions": "digests"}),
            Retention::Keep { days } => json!({"predictions": "kept", "days": days}),
        }
    }

    /// The retention a genesis body declares (none: `digests`, as before the field existed).
    pub fn from_genesis(genesis: &Value) -> std::result::Result<Retention, String> {
        let r = &genesis["retention"];
        if r.is_null() {
            return Ok(Retention::Digests);
        }
        match (r["predictions"].as_str(), r["days"].as_u64()) {
            (Some("digests"), None) => Ok(Retention::Digests),
            (Some("kept"), Some(d)) if (1..=u64::from(MAX_KEEP_DAYS)).contains(&d) => {
                Ok(Retention::Keep { days: d as u32 })
            }
            _ => Err(format!("unreadable retention {r}")),
        }
    }

    /// In words.
    pub fn describe(self) -> String {
        match self {
            Retention::Digests => "digests only".into(),
            Retention::Keep { days } => {
                format!("files kept {days} day{}", if days == 1 { "" } else { "s" })
            }
        }
    }
}

/// What a shred did.
#[derive(Debug, Clone, Serialize)]
pub struct Shredded {
    /// Holdout.
    pub holdout: String,
    /// Label targets deleted.
    pub targets: usize,
    /// The `labels-shredded` entry.
    pub entry: u64,
    /// One plain sentence.
    pub message: String,
}

impl Engine {
    /// Keeps a submission's parsed predictions under entry `seq`, when the holdout keeps files.
    /// Call inside the write that appends the entry.
    pub(crate) fn keep_predictions(
        &mut self,
        loaded: &Loaded,
        seq: u64,
        target: &str,
        digest: &str,
        at: &str,
        preds: &[Predictions],
    ) -> Result<()> {
        if loaded.keep_days.is_none() {
            return Ok(());
        }
        self.store.conn().execute(
            "INSERT INTO kept_predictions (holdout_id, seq, digest, target, at, data)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6)",
            params![
                loaded.id,
                seq as i64,
                digest,
                target,
                at,
                kept::encode(preds)
            ],
        )?;
        Ok(())
    }

    /// Deletes every kept prediction file older than its holdout's retention by the engine's
    /// clock, recording one `predictions-dropped` entry per holdout that lost any, in one
    /// write. Returns (holdout, files dropped) for each.
    pub fn drop_expired_predictions(&mut self) -> Result<Vec<(String, usize)>> {
        let now = self.now();
        let rows: Vec<(String, i64, u32, i64, String)> = {
            let conn = self.store.conn();
            let mut stmt = conn.prepare(
                "SELECT h.name, h.id, h.keep_predictions_days, k.seq, k.at
                 FROM kept_predictions k JOIN holdouts h ON h.id = k.holdout_id
                 WHERE h.keep_predictions_days IS NOT NULL
                 ORDER BY h.name, k.seq",
            )?;
            let q = stmt.query_map([], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?, r.get(4)?))
            })?;
            q.collect::<std::result::Result<_, _>>()?
        };
        // (name, id, days, seqs), holdouts in name order.
        let mut due: Vec<(String, i64, u32, Vec<u64>)> = Vec::new();
        for (name, id, days, seq, at) in rows {
            let Ok(at) = DateTime::parse_from_rfc3339(&at) else {
                continue;
            };
            if now < at.with_timezone(&Utc) + chrono::Duration::days(i64::from(days)) {
                continue;
            }
            match due.last_mut() {
                Some((n, _, _, seqs)) if *n == name => seqs.push(seq as u64),
                _ => due.push((name, id, days, vec![seq as u64])),
            }
        }
        if due.is_empty() {
            return Ok(Vec::new());
        }
        let at = rfc3339(now);
        self.write(|engine| {
            let mut done = Vec::new();
            for (name, id, days, seqs) in &due {
                for s in seqs {
                    engine.store.conn().execute(
                        "DELETE FROM kept_predictions WHERE holdout_id = ?1 AND seq = ?2",
                        params![id, *s as i64],
                    )?;
                }
                let body = serde_json::to_value(DropRecord {
                    entries: seqs.clone(),
                    days: *days,
                    at: at.clone(),
                })
                .map_err(|e| Error::Internal(format!("drop encoding: {e}")))?;
                engine.append(name, Kind::PredictionsDropped, &body, None)?;
                done.push((name.clone(), seqs.len()));
            }
            Ok(done)
        })
    }

    /// Shreds a closed holdout's labels (custodian only): see the module documentation.
    ///
    /// # Errors
    /// `PermissionDenied` without the custodian role; `NotFound`; `FailedPrecondition`
    /// (nothing changed) while the holdout is open or once its labels are shredded.
    pub fn shred_labels(&mut self, caller: &Caller, name: &str, reason: &str) -> Result<Shredded> {
        caller.require("shredding a holdout's labels", &[Role::Custodian])?;
        let loaded = self.loaded(name)?;
        // A sealed round past its deadline closes first (it needs the labels to answer).
        self.settle(&loaded)?;
        let at = rfc3339(self.now());
        let roles = caller
            .roles
            .iter()
            .map(|r| r.as_str())
            .collect::<Vec<_>>()
            .join(",");
        let done = self.write(|engine| {
            let conn = engine.store.conn();
            let (closed, shredded, digest): (Option<String>, Option<String>, String) = conn
                .query_row(
                    "SELECT closed_at, shredded_at, labels_digest FROM holdouts WHERE id = ?1",
                    [loaded.id],
                    |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
                )?;
            if let Some(s) = shredded {
                return Err(Error::FailedPrecondition(format!(
                    "the labels of holdout {name} were already shredded at {s}"
                )));
            }
            if closed.is_none() {
                return Err(Error::FailedPrecondition(format!(
                    "holdout {name} is open: its labels score every answer until it closes; \
                     nothing was shredded. Close it first (`holdout close {name}`)"
                )));
            }
            // A withdrawn holdout's stored digest is renamed `withdrawn:ID:DIGEST`.
            let digest = digest.rsplit(':').next().unwrap_or_default().to_string();
            let targets = conn.execute(
                "DELETE FROM sealed_labels WHERE holdout_id = ?1",
                [loaded.id],
            )?;
            // Per-row losses of sealed entries follow from the labels and the predictions.
            conn.execute(
                "UPDATE sealed_entries SET losses = X'' WHERE holdout_id = ?1",
                [loaded.id],
            )?;
            conn.execute(
                "UPDATE holdouts SET shredded_at = ?2 WHERE id = ?1",
                params![loaded.id, at],
            )?;
            let body = serde_json::to_value(ShredRecord {
                by: caller.name.clone(),
                roles: roles.clone(),
                labels_sha256: digest,
                reason: reason.to_string(),
                at: at.clone(),
            })
            .map_err(|e| Error::Internal(format!("shred encoding: {e}")))?;
            let entry = engine.append(name, Kind::LabelsShredded, &body, None)?;
            Ok(Shredded {
                holdout: name.to_string(),
                targets,
                entry: entry.seq,
                message: format!(
                    "the labels of {name} ({targets} target{}) were deleted from the store \
                     (entry {}); the genesis entry keeps their digest. Re-scoring now needs \
                     your own copy of the labels (`holdout audit EXPORT --labels FILE`)",
                    if targets == 1 { "" } else { "s" },
                    entry.seq
                ),
            })
        })?;
        // The labels held in memory go too.
        self.holdouts.remove(name);
        tracing::info!(holdout = %name, by = %caller.name, "labels shredded");
        Ok(done)
    }
}

/// The kept prediction files of a holdout still in the store, in entry order.
pub fn kept_files(conn: &rusqlite::Connection, holdout: &str) -> Result<Vec<KeptFile>> {
    let mut stmt = conn.prepare(
        "SELECT k.seq, k.target, k.digest, k.at, k.data
         FROM kept_predictions k JOIN holdouts h ON h.id = k.holdout_id
         WHERE h.name = ?1 ORDER BY k.seq",
    )?;
    let q = stmt.query_map([holdout], |r| {
        Ok(KeptFile {
            entry: r.get::<_, i64>(0)? as u64,
            target: r.get(1)?,
            digest: r.get(2)?,
            at: r.get(3)?,
            data: r.get(4)?,
        })
    })?;
    Ok(q.collect::<std::result::Result<_, _>>()?)
}
