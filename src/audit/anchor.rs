//! Anchoring: the daemon's own Ed25519 key and signed checkpoints of a chain head.
//!
//! A checkpoint says "chain NAME had entry SEQ with hash H at time T", signed by the daemon.
//! Kept outside the daemon, it makes a rebuilt or truncated chain detectable: the audit checks
//! that the exported chain still has entry SEQ with hash H.

use std::path::Path;

use ed25519_dalek::{Signature, Signer, SigningKey, VerifyingKey};
use rusqlite::{Connection, OptionalExtension, params};
use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::ledger;

/// Version tag of a checkpoint file and of the signed text.
pub const CHECKPOINT_FORMAT: &str = "holdout-ledger-checkpoint/1";

/// A signed checkpoint of a chain head, as written to a file.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Checkpoint {
    /// Always [`CHECKPOINT_FORMAT`].
    pub format: String,
    /// Chain (holdout) name.
    pub holdout: String,
    /// Number of the head entry.
    pub seq: u64,
    /// Hex hash of the head entry.
    pub head_hash: String,
    /// Time of signing, RFC 3339 UTC.
    pub at: String,
    /// Hex Ed25519 public key of the daemon.
    pub public_key: String,
    /// Hex Ed25519 signature over [`Checkpoint::signed_text`].
    pub signature: String,
}

impl Checkpoint {
    /// The exact bytes signed: the format tag and each field on its own line.
    pub fn signed_text(holdout: &str, seq: u64, head_hash: &str, at: &str) -> String {
        format!("{CHECKPOINT_FORMAT}\n{holdout}\n{seq}\n{head_hash}\n{at}\n")
    }

    /// Checks the signature against the key the checkpoint names. Returns why it fails.
    pub fn verify_signature(&self) -> std::result::Result<(), String> {
        if self.format != CHECKPOINT_FORMAT {
            return Err(format!(
                "format is {:?}, this binary reads {CHECKPOINT_FORMAT}",
                self.format
            ));
        }
        let key: [u8; 32] = hex::decode(&self.public_key)
            .ok()
            .and_then(|b| b.try_into().ok())
            .ok_or("public_key is not 32 hex bytes")?;
        let key = VerifyingKey::from_bytes(&key).map_err(|e| format!("public_key: {e}"))?;
        let sig: [u8; 64] = hex::decode(&self.signature)
            .ok()
            .and_then(|b| b.try_into().ok())
            .ok_or("signature is not 64 hex bytes")?;
        let text = Checkpoint::signed_text(&self.holdout, self.seq, &self.head_hash, &self.at);
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

/// Signs a checkpoint of `holdout`'s current head.
pub fn checkpoint(conn: &Connection, holdout: &str, at: &str) -> Result<Checkpoint> {
    let (seq, head_hash) =
        ledger::head(conn, holdout)?.ok_or_else(|| Error::not_found("holdout", holdout))?;
    let key = signing_key(conn)?;
    Ok(sign(&key, holdout, seq, &head_hash, at))
}

/// Signs the given head with `key`.
pub fn sign(key: &SigningKey, holdout: &str, seq: u64, head_hash: &str, at: &str) -> Checkpoint {
    let text = Checkpoint::signed_text(holdout, seq, head_hash, at);
    Checkpoint {
        format: CHECKPOINT_FORMAT.to_string(),
        holdout: holdout.to_string(),
        seq,
        head_hash: head_hash.to_string(),
        at: at.to_string(),
        public_key: hex::encode(key.verifying_key().to_bytes()),
        signature: hex::encode(key.sign(text.as_bytes()).to_bytes()),
    }
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

/// Signs the head of every holdout, and of the identity chain (`@users-SEQ`), into `dir` as
/// `NAME-SEQ.checkpoint.json`, skipping heads
/// already written; returns the files written. The daemon calls this periodically
/// (`serve --checkpoint-dir`), so the operator can ship the files elsewhere.
pub fn checkpoint_all(conn: &Connection, dir: &Path, at: &str) -> Result<Vec<std::path::PathBuf>> {
    let key = signing_key(conn)?;
    let mut written = Vec::new();
    let mut names = holdout_names(conn)?;
    names.push(ledger::USERS_CHAIN.to_string());
    for name in names {
        let Some((seq, head_hash)) = ledger::head(conn, &name)? else {
            continue;
        };
        let path = dir.join(format!("{name}-{seq}.checkpoint.json"));
        if path.exists() {
            continue;
        }
        write(&path, &sign(&key, &name, seq, &head_hash, at))?;
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
        let cp = sign(&a, "h", 3, &"ab".repeat(32), "2026-01-01T00:00:00Z");
        assert_eq!(cp.verify_signature(), Ok(()));
        let mut forged = cp.clone();
        forged.seq = 2;
        assert!(forged.verify_signature().is_err());
        let mut other_hash = cp;
        other_hash.head_hash = "cd".repeat(32);
        assert!(other_hash.verify_signature().is_err());
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
