//! Anchoring: the daemon's own Ed25519 key and signed checkpoints of a chain head.
//!
//! A checkpoint says "chain NAME had entry SEQ with hash H at time T", signed by the daemon.
//! Kept outside the daemon, it makes a rebuilt or truncated chain detectable: the audit checks
//! that the exported chain still has entry SEQ with hash H. A checkpoint of a holdout
//! (format `/2`) also signs the identity chain's head read at the same moment, so the users and
//! teams the holdout's entries name are anchored with them.

use std::path::Path;

use ed25519_dalek::{Signature, Signer, SigningKey, VerifyingKey};
use rusqlite::{Connection, OptionalExtension, params};
use serde::{Deserialize, Serialize};

use super::note::{self, Note};
use crate::error::{Error, Result};
use crate::ledger::{self, merkle, merkle::Hash};

/// Version tag of the checkpoints this binary writes for a holdout: the holdout's head and the
/// identity chain's head, both in the signed text.
pub const CHECKPOINT_FORMAT: &str = "holdout-ledger-checkpoint/2";

/// Version tag of a checkpoint of one chain head only: written by 0.1.0, for the identity
/// chain itself (`@users`), and for callers who may not learn the identity chain's head.
/// Such files still verify.
pub const CHECKPOINT_FORMAT_V1: &str = "holdout-ledger-checkpoint/1";

/// A signed checkpoint of a chain head, as written to a file.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Checkpoint {
    /// [`CHECKPOINT_FORMAT`] or [`CHECKPOINT_FORMAT_V1`].
    pub format: String,
    /// Chain (holdout) name.
    pub holdout: String,
    /// Number of the head entry.
    pub seq: u64,
    /// Hex hash of the head entry.
    pub head_hash: String,
    /// Format `/2`: number of the identity chain's head entry at the same moment.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub users_seq: Option<u64>,
    /// Format `/2`: hex hash of that entry.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub users_head_hash: Option<String>,
    /// Time of signing, RFC 3339 UTC.
    pub at: String,
    /// Hex Ed25519 public key of the daemon.
    pub public_key: String,
    /// Hex Ed25519 signature over [`Checkpoint::signed_text`].
    pub signature: String,
}

/// The head of a chain: its last entry's number and hash.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Head {
    /// Entry number.
    pub seq: u64,
    /// Hex hash.
    pub hash: String,
}

impl Checkpoint {
    /// The exact bytes signed: the format tag and each field on its own line. `/1`:
    /// `FORMAT\nHOLDOUT\nSEQ\nHEAD_HASH\nAT\n`; `/2` adds `USERS_SEQ\nUSERS_HEAD_HASH\n`
    /// before `AT`. A field the format does not sign must be absent (an unsigned field would
    /// be taken for a signed one), and one it signs must be present.
    pub fn signed_text(&self) -> std::result::Result<String, String> {
        let (holdout, seq, head, at) = (&self.holdout, self.seq, &self.head_hash, &self.at);
        match (self.format.as_str(), self.users_seq, &self.users_head_hash) {
            (CHECKPOINT_FORMAT_V1, None, None) => Ok(format!(
                "{CHECKPOINT_FORMAT_V1}\n{holdout}\n{seq}\n{head}\n{at}\n"
            )),
            (CHECKPOINT_FORMAT_V1, ..) => Err(format!(
                "a {CHECKPOINT_FORMAT_V1} checkpoint signs no identity head, but this one has \
                 users_seq or users_head_hash"
            )),
            (CHECKPOINT_FORMAT, Some(users_seq), Some(users_head)) => Ok(format!(
                "{CHECKPOINT_FORMAT}\n{holdout}\n{seq}\n{head}\n{users_seq}\n{users_head}\n{at}\n"
            )),
            (CHECKPOINT_FORMAT, ..) => Err(format!(
                "a {CHECKPOINT_FORMAT} checkpoint must carry users_seq and users_head_hash"
            )),
            (other, ..) => Err(format!(
                "format is {other:?}, this binary reads {CHECKPOINT_FORMAT_V1} and \
                 {CHECKPOINT_FORMAT}"
            )),
        }
    }

    /// The identity chain's head this checkpoint signs (format `/2`), if any.
    pub fn users_head(&self) -> Option<Head> {
        match (self.users_seq, &self.users_head_hash) {
            (Some(seq), Some(hash)) => Some(Head {
                seq,
                hash: hash.clone(),
            }),
            _ => None,
        }
    }

    /// Checks the signature against the key the checkpoint names. Returns why it fails.
    pub fn verify_signature(&self) -> std::result::Result<(), String> {
        let text = self.signed_text()?;
        let key: [u8; 32] = hex::decode(&self.public_key)
            .ok()
            .and_then(|b| b.try_into().ok())
            .ok_or("public_key is not 32 hex bytes")?;
        let key = VerifyingKey::from_bytes(&key).map_err(|e| format!("public_key: {e}"))?;
        let sig: [u8; 64] = hex::decode(&self.signature)
            .ok()
            .and_then(|b| b.try_into().ok())
            .ok_or("signature is not 64 hex bytes")?;
        key.verify_strict(text.as_bytes(), &Signature::from_bytes(&sig))
            .map_err(|_| "the signature does not match the checkpoint's fields".to_string())
    }

    /// Reads a checkpoint file; errors name the file.
    pub fn read(path: &Path) -> Result<Checkpoint> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| Error::invalid(path.display().to_string(), format!("cannot read: {e}")))?;
        serde_json::from_str(&text).map_err(|e| {
            Error::invalid(
                path.display().to_string(),
                format!("not a checkpoint file: {e}"),
            )
        })
    }
}

/// The daemon's signing key, created from operating-system randomness on first use and kept
/// in the `signing_key` table (see `migrations/0002_signing_key.sql` for why there).
pub fn signing_key(conn: &Connection) -> Result<SigningKey> {
    let stored: Option<String> = conn
        .query_row("SELECT secret_hex FROM signing_key WHERE id = 1", [], |r| {
            r.get(0)
        })
        .optional()?;
    if let Some(hex_secret) = stored {
        let bytes: [u8; 32] = hex::decode(hex_secret)
            .ok()
            .and_then(|b| b.try_into().ok())
            .ok_or_else(|| Error::Internal("the stored signing key is malformed".into()))?;
        return Ok(SigningKey::from_bytes(&bytes));
    }
    let mut secret = [0u8; 32];
    getrandom::fill(&mut secret).map_err(|e| Error::Internal(format!("no randomness: {e}")))?;
    let key = SigningKey::from_bytes(&secret);
    // INSERT OR IGNORE: if another process created one meanwhile, theirs wins and is re-read.
    conn.execute(
        "INSERT OR IGNORE INTO signing_key (id, secret_hex, public_hex, created_at)
         VALUES (1, ?1, ?2, ?3)",
        params![
            hex::encode(secret),
            hex::encode(key.verifying_key().to_bytes()),
            crate::auth::rfc3339(chrono::Utc::now())
        ],
    )?;
    let again: String =
        conn.query_row("SELECT secret_hex FROM signing_key WHERE id = 1", [], |r| {
            r.get(0)
        })?;
    if again != hex::encode(secret) {
        return signing_key(conn);
    }
    Ok(key)
}

fn head_of(conn: &Connection, chain: &str) -> Result<Option<Head>> {
    Ok(ledger::head(conn, chain)?.map(|(seq, hash)| Head { seq, hash }))
}

/// Starts a read transaction on `conn` unless it is inside one already (then its snapshot is
/// the caller's), so heads read until it ends are the heads of one moment.
fn snapshot(conn: &Connection) -> Result<Option<rusqlite::Transaction<'_>>> {
    Ok(if conn.is_autocommit() {
        Some(conn.unchecked_transaction()?)
    } else {
        None
    })
}

/// Reads the heads of `chain` and of the identity chain in one read transaction (when the
/// connection is not already inside one), so both are the heads of the same moment.
fn heads(conn: &Connection, chain: &str) -> Result<(Option<Head>, Option<Head>)> {
    let tx = snapshot(conn)?;
    let out = (head_of(conn, chain)?, head_of(conn, ledger::USERS_CHAIN)?);
    if let Some(tx) = tx {
        tx.commit()?;
    }
    Ok(out)
}

/// Signs a checkpoint of `holdout`'s current head and, for a holdout, of the identity chain's
/// head at the same moment (format `/2`). A checkpoint of the identity chain itself, or of a
/// holdout in a database without identity events, signs the one head (format `/1`).
pub fn checkpoint(conn: &Connection, holdout: &str, at: &str) -> Result<Checkpoint> {
    let key = signing_key(conn)?;
    let (head, users) = heads(conn, holdout)?;
    let head = head.ok_or_else(|| Error::not_found("holdout", holdout))?;
    let users = users.filter(|_| holdout != ledger::USERS_CHAIN);
    Ok(sign(&key, holdout, &head, users.as_ref(), at))
}

/// Signs a checkpoint of `holdout`'s current head alone (format `/1`), for callers who may
/// not learn the identity chain's head (its number counts every user and token event).
pub fn checkpoint_without_identity(
    conn: &Connection,
    holdout: &str,
    at: &str,
) -> Result<Checkpoint> {
    let key = signing_key(conn)?;
    let head = head_of(conn, holdout)?.ok_or_else(|| Error::not_found("holdout", holdout))?;
    Ok(sign(&key, holdout, &head, None, at))
}

/// Signs the given head with `key`, with the identity chain's head when given (format `/2`).
pub fn sign(
    key: &SigningKey,
    holdout: &str,
    head: &Head,
    users: Option<&Head>,
    at: &str,
) -> Checkpoint {
    let mut cp = Checkpoint {
        format: match users {
            Some(_) => CHECKPOINT_FORMAT,
            None => CHECKPOINT_FORMAT_V1,
        }
        .to_string(),
        holdout: holdout.to_string(),
        seq: head.seq,
        head_hash: head.hash.clone(),
        users_seq: users.map(|u| u.seq),
        users_head_hash: users.map(|u| u.hash.clone()),
        at: at.to_string(),
        public_key: hex::encode(key.verifying_key().to_bytes()),
        signature: String::new(),
    };
    let text = cp
        .signed_text()
        .expect("the format matches the identity fields it was built with");
    cp.signature = hex::encode(key.sign(text.as_bytes()).to_bytes());
    cp
}

/// The tree of `chain` now: (size, root); size 0 and the empty root for a chain with no entry.
pub fn tree_head(conn: &Connection, chain: &str) -> Result<(u64, Hash)> {
    match ledger::head(conn, chain)? {
        None => Ok((0, merkle::empty_root())),
        Some((seq, _)) => {
            let size = seq + 1;
            Ok((size, merkle::root(&merkle::Stored::new(conn, chain), size)?))
        }
    }
}

/// A format-3 checkpoint (signed note) of `chain`'s tree and, when `with_users` and `chain` is
/// a holdout, of the identity chain's tree read in the same read transaction. Returns the
/// note and its signed text.
pub fn note_checkpoint(
    conn: &Connection,
    chain: &str,
    at: &str,
    with_users: bool,
) -> Result<(Note, String)> {
    let key = signing_key(conn)?;
    let tx = snapshot(conn)?;
    let (size, root) = tree_head(conn, chain)?;
    let users = if with_users && chain != ledger::USERS_CHAIN {
        Some(tree_head(conn, ledger::USERS_CHAIN)?)
    } else {
        None
    };
    if let Some(tx) = tx {
        tx.commit()?;
    }
    if size == 0 {
        return Err(Error::not_found("holdout", chain));
    }
    let note = Note {
        chain: chain.to_string(),
        size,
        root,
        time: at.to_string(),
        users,
    };
    let text = note.sign(&key);
    Ok((note, text))
}

/// What `rpc Prove` returns: a format-3 checkpoint of the newest tree and proofs against it.
#[derive(Debug, Clone)]
pub struct Proofs {
    /// The signed note.
    pub checkpoint: String,
    /// Inclusion proof of the entry asked for.
    pub inclusion: Option<merkle::InclusionProof>,
    /// Consistency proof from the size asked for.
    pub consistency: Option<merkle::ConsistencyProof>,
    /// The daemon's verifier key string.
    pub verifier_key: String,
}

/// Proofs against the newest tree of `chain`, all read in one read transaction: an inclusion
/// proof of the entry with hash `entry_hash` (which must be in `chain`), and a consistency
/// proof from the tree of `first_size` entries (when > 0).
pub fn prove(
    conn: &Connection,
    chain: &str,
    entry_hash: Option<&str>,
    first_size: u64,
    at: &str,
    with_users: bool,
) -> Result<Proofs> {
    let tx = snapshot(conn)?;
    let (note, text) = note_checkpoint(conn, chain, at, with_users)?;
    let nodes = merkle::Stored::new(conn, chain);
    let inclusion = match entry_hash {
        None => None,
        Some(h) => {
            let h = h.trim().to_ascii_lowercase();
            merkle::leaf_input(&h)?;
            let seq: Option<i64> = conn
                .query_row(
                    "SELECT seq FROM ledger WHERE hash = ?1 AND chain = ?2",
                    params![h, chain],
                    |r| r.get(0),
                )
                .optional()?;
            let seq = seq.ok_or_else(|| {
                Error::not_found("entry", format!("with hash {h} in the ledger of {chain}"))
            })? as u64;
            Some(merkle::InclusionProof {
                leaf_index: seq,
                tree_size: note.size,
                inclusion_path: merkle::encode_path(&merkle::inclusion_proof(
                    &nodes, seq, note.size,
                )?),
            })
        }
    };
    let consistency = match first_size {
        0 => None,
        m => Some(merkle::ConsistencyProof {
            first_size: m,
            second_size: note.size,
            consistency_path: merkle::encode_path(&merkle::consistency_proof(
                &nodes, m, note.size,
            )?),
        }),
    };
    let verifier_key = verifier_key(conn)?;
    if let Some(tx) = tx {
        tx.commit()?;
    }
    Ok(Proofs {
        checkpoint: text,
        inclusion,
        consistency,
        verifier_key,
    })
}

/// A checkpoint's time: RFC 3339 UTC to the second (`2026-12-03T20:00:00Z`).
pub fn note_time(t: chrono::DateTime<chrono::Utc>) -> String {
    t.to_rfc3339_opts(chrono::SecondsFormat::Secs, true)
}

/// The daemon's verifier key string (checkpoint format 3).
pub fn verifier_key(conn: &Connection) -> Result<String> {
    Ok(note::verifier_key(&signing_key(conn)?.verifying_key()))
}

/// Names of every holdout with a chain.
pub fn holdout_names(conn: &Connection) -> Result<Vec<String>> {
    let mut stmt = conn.prepare("SELECT name FROM holdouts ORDER BY name")?;
    let names = stmt
        .query_map([], |r| r.get::<_, String>(0))?
        .collect::<std::result::Result<_, _>>()?;
    Ok(names)
}

/// Writes a checkpoint as pretty JSON, owner-readable, replacing nothing that exists.
pub fn write(path: &Path, cp: &Checkpoint) -> Result<()> {
    let text = serde_json::to_string_pretty(cp)
        .map_err(|e| Error::Internal(format!("checkpoint encoding: {e}")))?;
    std::fs::write(path, text + "\n")
        .map_err(|e| Error::invalid(path.display().to_string(), format!("cannot write: {e}")))
}

/// Signs the head of every holdout (with the identity chain's head, format `/2`), and of the
/// identity chain itself (`@users-SEQ`, format `/1`), into `dir` as `NAME-SEQ.checkpoint.json`,
/// and the tree of each in format 3 (with the identity chain's tree for holdouts) as
/// `tree-NAME-SIZE.checkpoint`, skipping those already written; returns the files written. Every head is read in one read
/// transaction, so the files of one call describe one moment. The daemon calls this
/// periodically (`serve --checkpoint-dir`), so the operator can ship the files elsewhere.
pub fn checkpoint_all(conn: &Connection, dir: &Path, at: &str) -> Result<Vec<std::path::PathBuf>> {
    let key = signing_key(conn)?;
    let tx = snapshot(conn)?;
    let users = head_of(conn, ledger::USERS_CHAIN)?;
    let mut signed = Vec::new();
    for name in holdout_names(conn)? {
        if let Some(h) = head_of(conn, &name)? {
            signed.push(sign(&key, &name, &h, users.as_ref(), at));
        }
    }
    if let Some(u) = &users {
        signed.push(sign(&key, ledger::USERS_CHAIN, u, None, at));
    }
    // Format 3, read in the same read transaction.
    let time = chrono::DateTime::parse_from_rfc3339(at)
        .map(|t| note_time(t.with_timezone(&chrono::Utc)))
        .map_err(|e| Error::Internal(format!("checkpoint time {at:?}: {e}")))?;
    let mut notes = Vec::new();
    for cp in &signed {
        let (note, text) = note_checkpoint(conn, &cp.holdout, &time, true)?;
        notes.push((
            format!("tree-{}-{}.checkpoint", note.chain, note.size),
            text,
        ));
    }
    if let Some(tx) = tx {
        tx.commit()?;
    }
    let mut written = Vec::new();
    for cp in signed {
        let path = dir.join(format!("{}-{}.checkpoint.json", cp.holdout, cp.seq));
        if path.exists() {
            continue;
        }
        write(&path, &cp)?;
        written.push(path);
    }
    for (name, text) in notes {
        let path = dir.join(name);
        if path.exists() {
            continue;
        }
        std::fs::write(&path, text).map_err(|e| {
            Error::invalid(path.display().to_string(), format!("cannot write: {e}"))
        })?;
        written.push(path);
    }
    Ok(written)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::store::Store;

    #[test]
    fn key_is_created_once_and_signatures_verify() -> Result<()> {
        let mut store = Store::open_in_memory()?;
        let a = signing_key(store.conn())?;
        let b = signing_key(store.conn())?;
        assert_eq!(a.to_bytes(), b.to_bytes());
        let head = Head {
            seq: 3,
            hash: "ab".repeat(32),
        };
        let cp = sign(&a, "h", &head, None, "2026-01-01T00:00:00Z");
        assert_eq!(cp.format, CHECKPOINT_FORMAT_V1);
        assert_eq!(cp.verify_signature(), Ok(()));
        let mut forged = cp.clone();
        forged.seq = 2;
        assert!(forged.verify_signature().is_err());
        let mut other_hash = cp.clone();
        other_hash.head_hash = "cd".repeat(32);
        assert!(other_hash.verify_signature().is_err());
        // Identity fields added to a /1 checkpoint are not signed: refused, not ignored.
        let mut unsigned = cp;
        unsigned.users_seq = Some(0);
        unsigned.users_head_hash = Some("ef".repeat(32));
        assert!(
            unsigned
                .verify_signature()
                .unwrap_err()
                .contains("signs no identity")
        );
        Ok(())
    }

    #[test]
    fn a_v2_checkpoint_signs_both_heads() -> Result<()> {
        let mut store = Store::open_in_memory()?;
        let key = signing_key(store.conn())?;
        let head = Head {
            seq: 3,
            hash: "ab".repeat(32),
        };
        let users = Head {
            seq: 7,
            hash: "cd".repeat(32),
        };
        let cp = sign(&key, "h", &head, Some(&users), "2026-01-01T00:00:00Z");
        assert_eq!(cp.format, CHECKPOINT_FORMAT);
        assert_eq!(
            cp.signed_text().unwrap(),
            format!(
                "holdout-ledger-checkpoint/2\nh\n3\n{}\n7\n{}\n2026-01-01T00:00:00Z\n",
                head.hash, users.hash
            )
        );
        assert_eq!(cp.verify_signature(), Ok(()));
        assert_eq!(cp.users_head(), Some(users));
        let mut moved = cp.clone();
        moved.users_seq = Some(6);
        assert!(moved.verify_signature().is_err());
        let mut rehashed = cp.clone();
        rehashed.users_head_hash = Some("ee".repeat(32));
        assert!(rehashed.verify_signature().is_err());
        // Dropping the identity head does not turn it into a valid /1 checkpoint.
        let mut stripped = cp.clone();
        stripped.users_seq = None;
        stripped.users_head_hash = None;
        assert!(stripped.verify_signature().is_err());
        stripped.format = CHECKPOINT_FORMAT_V1.into();
        assert!(stripped.verify_signature().is_err());
        // The identity fields round-trip through the file format.
        let text = serde_json::to_string(&cp).unwrap();
        assert!(text.contains("\"users_seq\":7"), "{text}");
        assert_eq!(serde_json::from_str::<Checkpoint>(&text).unwrap(), cp);
        Ok(())
    }

    #[test]
    fn a_holdout_checkpoint_signs_the_identity_head_of_the_same_moment() -> Result<()> {
        use serde_json::json;
        let mut engine = crate::engine::Engine::new(
            Store::open_in_memory()?,
            std::sync::Arc::new(crate::engine::SystemClock),
        );
        engine.write(|e| e.append("h", ledger::Kind::Genesis, &json!({"i": 0}), None))?;
        let store = engine.store();
        // No identity event yet: nothing to anchor but the holdout.
        let cp = checkpoint(store.conn(), "h", "2026-01-01T00:00:00Z")?;
        assert_eq!(cp.format, CHECKPOINT_FORMAT_V1);
        engine.write(|w| {
            crate::auth::add_user(
                w,
                "ana",
                &[crate::auth::Role::Analyst],
                Some("blue"),
                "root",
                chrono::Utc::now(),
            )
        })?;
        let store = engine.store();
        let users = ledger::read_chain(store.conn(), ledger::USERS_CHAIN)?;
        let cp = checkpoint(store.conn(), "h", "2026-01-01T00:00:00Z")?;
        assert_eq!(cp.format, CHECKPOINT_FORMAT);
        assert_eq!(cp.users_seq, Some(0));
        assert_eq!(cp.users_head_hash.as_deref(), Some(users[0].hash.as_str()));
        assert_eq!(cp.verify_signature(), Ok(()));
        // The identity chain's own checkpoint, and one without identity, sign one head.
        let own = checkpoint(store.conn(), ledger::USERS_CHAIN, "2026-01-01T00:00:00Z")?;
        assert_eq!(
            (own.format.as_str(), own.users_seq),
            (CHECKPOINT_FORMAT_V1, None)
        );
        let bare = checkpoint_without_identity(store.conn(), "h", "2026-01-01T00:00:00Z")?;
        assert_eq!(
            (bare.format.as_str(), bare.users_seq),
            (CHECKPOINT_FORMAT_V1, None)
        );
        assert_eq!(bare.verify_signature(), Ok(()));
        Ok(())
    }

    /// RFC 8032 section 7.1, TEST 2 (one-byte message 0x72): the key pair and signature, so
    /// the library's Ed25519 is the standard one and not merely self-consistent.
    #[test]
    fn rfc8032_test_vector_2() {
        let secret: [u8; 32] =
            hex::decode("4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb")
                .unwrap()
                .try_into()
                .unwrap();
        let key = SigningKey::from_bytes(&secret);
        assert_eq!(
            hex::encode(key.verifying_key().to_bytes()),
            "3d4017c3e843895a92b70aa74d1b7ebc9c982ccf2ec4968cc0cd55f12af4660c"
        );
        assert_eq!(
            hex::encode(key.sign(&[0x72]).to_bytes()),
            "92a009a9f0d4cab8720e820b5f642540a2b27b5416503f8fb3762223ebdb69da\
             085ac1e43e15996e458f3613d0f11d8c387b2eaeb4302aeeb00d291612bb0c00"
        );
    }
}
