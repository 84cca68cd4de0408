//! The hash-chained ledger: canonical encoding of entries, salts, hashes, appending inside a
//! caller's transaction, and chain verification.
//!
//! An entry's hash is SHA-256 over `ENCODING`, the previous hash, the entry's number, kind, salt
//! and canonical JSON body, each on its own line. The body is JSON with keys sorted (serde_json's
//! default map) and floats in shortest round-trip form, so the same entry always hashes the same
//! bytes. Every entry carries 16 random bytes of salt: exact scores have only n+1 possible values,
//! and without the salt a published hash would let anyone test guesses (DESIGN 4.2 rule 6).

use rusqlite::{Connection, OptionalExtension, params};
use serde::{Deserialize, Serialize};
use serde_json::Value;
use sha2::{Digest, Sha256};

use crate::error::{Error, Result};

/// Version of the canonical encoding; recorded in every genesis entry.
pub const ENCODING: &str = "holdout-ledger-entry/1";

/// Hash that precedes the first entry of a chain.
pub const ZERO_HASH: &str = "0000000000000000000000000000000000000000000000000000000000000000";

/// Name of the chain that records identity events (users, tokens).
pub const USERS_CHAIN: &str = "@users";

/// The kind of a ledger entry. Entries store and export their kind as text; this enum is the
/// only place that text is matched ([`Kind::parse`]) or written ([`Kind::as_str`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Kind {
    /// First entry of a holdout's chain: the policy and the labels' digests.
    Genesis,
    /// A charged, released answer.
    Answer,
    /// A refusal, decided from public facts before scoring.
    Refusal,
    /// A sealed entry of a final round (charged on arrival, answered at the close).
    Sealed,
    /// The close of a sealed round: every entry answered, the ranking and comparisons.
    Round,
    /// The close of an open holdout.
    Close,
    /// A read of exact scores (history with exact losses, an export).
    Read,
    /// A free adoption of another team's answer for the same file (core 2 ladder).
    Adopt,
    /// A request to withdraw a holdout that has released nothing (one of the two roles).
    WithdrawRequest,
    /// The completed withdrawal of a holdout that released nothing: its rows and labels are
    /// free for a new holdout; nothing but reads may follow it.
    Withdraw,
    /// A copy of the whole database was taken (online or offline, or automatically before a
    /// schema migration); recorded in every holdout's chain before the copy is made, so the copy
    /// holds its own entry. It moves no accounting state.
    Backup,
    /// Kept prediction files were dropped once older than the holdout's retention (it names
    /// their entries). Moves no accounting state.
    PredictionsDropped,
    /// The custodian shredded a closed holdout's labels (and its kept prediction files); the
    /// labels digest stays in the genesis entry. Moves no accounting state.
    LabelsShredded,
    /// The release of a target's class counts: a coded, charged symbol of its own, made once
    /// per transcript before the first answer that needs them (DESIGN 4.8).
    ClassCounts,
    /// Identity chain: a user was added (with roles and team).
    UserAdded,
    /// Identity chain: a user and its tokens were revoked.
    UserRevoked,
    /// Identity chain: a user's tokens were replaced.
    TokenRotated,
}

impl Kind {
    /// Every kind, in a fixed order (reports list counts in this order).
    pub const ALL: [Kind; 17] = [
        Kind::Genesis,
        Kind::Answer,
        Kind::Refusal,
        Kind::Sealed,
        Kind::Round,
        Kind::Close,
        Kind::Read,
        Kind::Adopt,
        Kind::WithdrawRequest,
        Kind::Withdraw,
        Kind::Backup,
        Kind::PredictionsDropped,
        Kind::LabelsShredded,
        Kind::ClassCounts,
        Kind::UserAdded,
        Kind::UserRevoked,
        Kind::TokenRotated,
    ];

    /// The kind's text, as stored, hashed and exported.
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Genesis => "genesis",
            Kind::Answer => "answer",
            Kind::Refusal => "refusal",
            Kind::Sealed => "sealed",
            Kind::Round => "round",
            Kind::Close => "close",
            Kind::Read => "read",
            Kind::Adopt => "adopt",
            Kind::WithdrawRequest => "withdraw-request",
            Kind::Withdraw => "withdraw",
            Kind::Backup => "backup",
            Kind::PredictionsDropped => "predictions-dropped",
            Kind::LabelsShredded => "labels-shredded",
            Kind::ClassCounts => "class-counts",
            Kind::UserAdded => "user-added",
            Kind::UserRevoked => "user-revoked",
            Kind::TokenRotated => "token-rotated",
        }
    }

    /// The kind a stored text names, if any.
    pub fn parse(text: &str) -> Option<Kind> {
        Kind::ALL.into_iter().find(|k| k.as_str() == text)
    }

    /// Whether entries of this kind belong to the identity chain.
    pub fn is_identity(self) -> bool {
        matches!(
            self,
            Kind::UserAdded | Kind::UserRevoked | Kind::TokenRotated
        )
    }
}

impl std::fmt::Display for Kind {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// One ledger entry as stored and exported.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Entry {
    /// Chain name (the holdout name, or [`USERS_CHAIN`]).
    pub chain: String,
    /// Position in the chain, from 0.
    pub seq: u64,
    /// Kind, as text (see [`Kind`]; [`Entry::kind`] parses it).
    pub kind: String,
    /// Canonical JSON body.
    pub body: String,
    /// Hex salt.
    pub salt: String,
    /// Hex hash of the previous entry.
    pub prev_hash: String,
    /// Hex hash of this entry.
    pub hash: String,
}

impl Entry {
    /// The entry's kind, or `None` when the text names no kind this binary knows.
    pub fn kind(&self) -> Option<Kind> {
        Kind::parse(&self.kind)
    }
}

/// Canonical JSON of a value (sorted keys, no whitespace).
pub fn canonical_json(value: &Value) -> String {
    // serde_json's Map is a BTreeMap unless `preserve_order` is enabled (it is not here), so
    // keys come out sorted at every depth.
    serde_json::to_string(value).expect("a serde_json::Value always serialises")
}

/// The hash of an entry given its fields.
pub fn entry_hash(prev_hash: &str, seq: u64, kind: &str, salt: &str, body: &str) -> String {
    let mut h = Sha256::new();
    for part in [ENCODING, prev_hash, &seq.to_string(), kind, salt, body] {
        h.update(part.as_bytes());
        h.update(b"\n");
    }
    hex::encode(h.finalize())
}

/// Fresh random salt, hex.
pub fn fresh_salt() -> Result<String> {
    let mut bytes = [0u8; 16];
    getrandom::fill(&mut bytes).map_err(|e| Error::Internal(format!("no randomness: {e}")))?;
    Ok(hex::encode(bytes))
}

/// The head (last entry) of a chain, if any.
pub fn head(tx: &Connection, chain: &str) -> Result<Option<(u64, String)>> {
    Ok(tx
        .query_row(
            "SELECT seq, hash FROM ledger WHERE chain = ?1 ORDER BY seq DESC LIMIT 1",
            [chain],
            |r| Ok((r.get::<_, i64>(0)? as u64, r.get::<_, String>(1)?)),
        )
        .optional()?)
}

/// Appends an entry to `chain` inside the caller's open transaction and returns it; durable
/// only when the caller commits. Only the engine's one write path (`Engine::append`, inside
/// `Engine::begin_write` ... `end_write`) calls this.
pub(crate) fn append(tx: &Connection, chain: &str, kind: Kind, body: &Value) -> Result<Entry> {
    let kind = kind.as_str();
    let (seq, prev_hash) = match head(tx, chain)? {
        Some((seq, hash)) => (seq + 1, hash),
        None => (0, ZERO_HASH.to_string()),
    };
    let salt = fresh_salt()?;
    let body = canonical_json(body);
    let hash = entry_hash(&prev_hash, seq, kind, &salt, &body);
    tx.execute(
        "INSERT INTO ledger (chain, seq, kind, body, salt, prev_hash, hash)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        params![chain, seq as i64, kind, body, salt, prev_hash, hash],
    )?;
    Ok(Entry {
        chain: chain.to_string(),
        seq,
        kind: kind.to_string(),
        body,
        salt,
        prev_hash,
        hash,
    })
}

/// Reads a whole chain in order.
pub fn read_chain(conn: &Connection, chain: &str) -> Result<Vec<Entry>> {
    let mut stmt = conn.prepare_cached(
        "SELECT seq, kind, body, salt, prev_hash, hash FROM ledger WHERE chain = ?1 ORDER BY seq",
    )?;
    let rows = stmt.query_map([chain], |r| {
        Ok(Entry {
            chain: chain.to_string(),
            seq: r.get::<_, i64>(0)? as u64,
            kind: r.get(1)?,
            body: r.get(2)?,
            salt: r.get(3)?,
            prev_hash: r.get(4)?,
            hash: r.get(5)?,
        })
    })?;
    Ok(rows.collect::<std::result::Result<_, _>>()?)
}

/// The entries of a chain after entry `after` (all but the genesis for `after = 0`), in
/// order.
pub fn read_chain_after(conn: &Connection, chain: &str, after: u64) -> Result<Vec<Entry>> {
    let mut stmt = conn.prepare_cached(
        "SELECT seq, kind, body, salt, prev_hash, hash FROM ledger
         WHERE chain = ?1 AND seq > ?2 ORDER BY seq",
    )?;
    let rows = stmt.query_map(rusqlite::params![chain, after as i64], |r| {
        Ok(Entry {
            chain: chain.to_string(),
            seq: r.get::<_, i64>(0)? as u64,
            kind: r.get(1)?,
            body: r.get(2)?,
            salt: r.get(3)?,
            prev_hash: r.get(4)?,
            hash: r.get(5)?,
        })
    })?;
    Ok(rows.collect::<std::result::Result<_, _>>()?)
}

/// One problem found in a chain.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ChainFault {
    /// Entry number where it was found (its position in the list given).
    pub seq: u64,
    /// What is wrong.
    pub problem: String,
}

/// Verifies links and hashes of a chain; returns every fault found (empty when intact).
pub fn verify_chain(entries: &[Entry]) -> Vec<ChainFault> {
    let mut faults = Vec::new();
    let mut prev = ZERO_HASH.to_string();
    for (pos, e) in entries.iter().enumerate() {
        let pos = pos as u64;
        if e.seq != pos {
            faults.push(ChainFault {
                seq: pos,
                problem: format!("entry number is {} where {pos} was expected", e.seq),
            });
        }
        if e.prev_hash != prev {
            faults.push(ChainFault {
                seq: pos,
                problem: "prev_hash does not match the previous entry's hash".into(),
            });
        }
        let recomputed = entry_hash(&e.prev_hash, e.seq, &e.kind, &e.salt, &e.body);
        if recomputed != e.hash {
            faults.push(ChainFault {
                seq: pos,
                problem: "hash does not match the entry's contents".into(),
            });
        }
        prev = e.hash.clone();
    }
    faults
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::Store;
    use serde_json::json;

    fn chain_of(n: usize) -> Result<Vec<Entry>> {
        let mut store = Store::open_in_memory()?;
        let tx = store.conn().transaction()?;
        for i in 0..n {
            append(
                &tx,
                "h",
                if i == 0 { Kind::Genesis } else { Kind::Answer },
                &json!({"i": i, "score": 0.25}),
            )?;
        }
        tx.commit()?;
        read_chain(store.conn(), "h")
    }

    #[test]
    fn intact_chain_verifies() -> Result<()> {
        let entries = chain_of(5)?;
        assert_eq!(entries.len(), 5);
        assert!(verify_chain(&entries).is_empty());
        Ok(())
    }

    #[test]
    fn every_kind_of_tampering_is_detected() -> Result<()> {
        let entries = chain_of(5)?;
        let mut changed = entries.clone();
        changed[2].body = changed[2].body.replace("0.25", "0.24");
        assert_eq!(verify_chain(&changed)[0].seq, 2);

        let mut deleted = entries.clone();
        deleted.remove(2);
        assert!(!verify_chain(&deleted).is_empty());

        let mut swapped = entries.clone();
        swapped.swap(1, 3);
        assert!(!verify_chain(&swapped).is_empty());
        Ok(())
    }

    #[test]
    fn canonical_json_sorts_keys() {
        let v = json!({"b": 1, "a": {"d": 2.5, "c": null}});
        assert_eq!(canonical_json(&v), r#"{"a":{"c":null,"d":2.5},"b":1}"#);
    }

    #[test]
    fn salts_differ() -> Result<()> {
        assert_ne!(fresh_salt()?, fresh_salt()?);
        Ok(())
    }
}
