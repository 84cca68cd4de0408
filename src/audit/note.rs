//! Checkpoint format 3: a signed note of a chain's Merkle tree (modelled on the C2SP
//! signed-note checkpoint; the exact text is in DEVELOPERS.md, "Checkpoint format 3").
//!
//! ```text
//! holdout-ledger/CHAIN
//! SIZE
//! BASE64(root)
//! time 2026-12-03T20:00:00Z
//! users USERS_SIZE BASE64(users root)      (holdout chains, for callers who may see it)
//!
//! — holdout-ledger BASE64(keyid[4] || Ed25519 signature[64])
//! ```
//!
//! The signature is over the body: every line up to and including the newline of the last
//! body line. keyid = SHA-256(KEYNAME || 0x0A || 0x01 || public key)[..4]. The verifier key
//! string is `KEYNAME+HEX8(keyid)+BASE64(0x01 || public key)`.

use base64::Engine as _;
use base64::engine::general_purpose::STANDARD as B64;
use ed25519_dalek::{Signature, Signer, SigningKey, VerifyingKey};
use sha2::{Digest, Sha256};

use crate::ledger::merkle::Hash;

/// The key name of every note this daemon signs.
pub const KEY_NAME: &str = "holdout-ledger";

/// Prefix of a note's origin line.
pub const ORIGIN_PREFIX: &str = "holdout-ledger/";

/// The signed content of a format-3 checkpoint.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Note {
    /// Chain: a holdout name or `@users`.
    pub chain: String,
    /// Tree size (number of entries).
    pub size: u64,
    /// Root hash of the tree of that size.
    pub root: Hash,
    /// Time of signing, RFC 3339 UTC (`2026-12-03T20:00:00Z`).
    pub time: String,
    /// The identity chain's tree (size, root) read at the same moment, when signed.
    pub users: Option<(u64, Hash)>,
}

/// The 4-byte key id of a public key.
pub fn key_id(key: &VerifyingKey) -> [u8; 4] {
    let mut h = Sha256::new();
    h.update(KEY_NAME.as_bytes());
    h.update([0x0a, 0x01]);
    h.update(key.to_bytes());
    let d = h.finalize();
    [d[0], d[1], d[2], d[3]]
}

/// The verifier key string of a public key: `holdout-ledger+HEX8+BASE64(0x01 || key)`.
pub fn verifier_key(key: &VerifyingKey) -> String {
    let mut raw = vec![0x01];
    raw.extend_from_slice(&key.to_bytes());
    format!(
        "{KEY_NAME}+{}+{}",
        hex::encode(key_id(key)),
        B64.encode(raw)
    )
}

/// Reads a public key given as a verifier key string or as 64 hex digits (the older form).
pub fn parse_public_key(text: &str) -> Result<VerifyingKey, String> {
    let text = text.trim();
    let bytes: [u8; 32] = if let Some((name, rest)) = text.split_once('+') {
        let (id, b64) = rest
            .split_once('+')
            .ok_or("a verifier key is NAME+KEYID+BASE64")?;
        if name != KEY_NAME {
            return Err(format!("the verifier key names {name:?}, not {KEY_NAME}"));
        }
        let raw = B64
            .decode(b64)
            .map_err(|e| format!("verifier key: not base64: {e}"))?;
        if raw.len() != 33 || raw[0] != 0x01 {
            return Err("verifier key: not 0x01 followed by a 32-byte Ed25519 key".into());
        }
        let key: [u8; 32] = raw[1..].try_into().expect("33 - 1 bytes");
        let vk = VerifyingKey::from_bytes(&key).map_err(|e| format!("verifier key: {e}"))?;
        if hex::encode(key_id(&vk)) != id {
            return Err(format!(
                "verifier key: key id {id} is not the key's ({})",
                hex::encode(key_id(&vk))
            ));
        }
        key
    } else {
        hex::decode(text)
            .ok()
            .and_then(|b| b.try_into().ok())
            .ok_or("a public key is a verifier key string or 64 hex digits")?
    };
    VerifyingKey::from_bytes(&bytes).map_err(|e| format!("public key: {e}"))
}

impl Note {
    /// The signed body text.
    pub fn body(&self) -> String {
        let mut s = format!(
            "{ORIGIN_PREFIX}{}\n{}\n{}\ntime {}\n",
            self.chain,
            self.size,
            B64.encode(self.root),
            self.time
        );
        if let Some((n, r)) = &self.users {
            s.push_str(&format!("users {n} {}\n", B64.encode(r)));
        }
        s
    }

    /// The whole note, signed with `key`.
    pub fn sign(&self, key: &SigningKey) -> String {
        let body = self.body();
        let sig = key.sign(body.as_bytes());
        let mut blob = key_id(&key.verifying_key()).to_vec();
        blob.extend_from_slice(&sig.to_bytes());
        format!("{body}\n\u{2014} {KEY_NAME} {}\n", B64.encode(blob))
    }

    /// Parses a note's body (no signature check).
    fn parse_body(body: &str) -> Result<Note, String> {
        let lines: Vec<&str> = body
            .strip_suffix('\n')
            .ok_or("the note body does not end with a newline")?
            .split('\n')
            .collect();
        if !(4..=5).contains(&lines.len()) {
            return Err(format!(
                "the note body has {} lines; a checkpoint has 4 or 5",
                lines.len()
            ));
        }
        let chain = lines[0]
            .strip_prefix(ORIGIN_PREFIX)
            .filter(|c| !c.is_empty())
            .ok_or_else(|| format!("the origin line is not {ORIGIN_PREFIX}CHAIN"))?;
        let size = decimal(lines[1]).ok_or("the tree size is not a decimal number")?;
        let root = hash64(lines[2]).ok_or("the root is not 32 bytes in base64")?;
        let time = lines[3]
            .strip_prefix("time ")
            .filter(|t| chrono::DateTime::parse_from_rfc3339(t).is_ok() && t.ends_with('Z'))
            .ok_or("the time line is not `time RFC3339-UTC`")?;
        let users = match lines.get(4) {
            None => None,
            Some(line) => {
                let mut parts = line.split(' ');
                let ok = (|| {
                    if parts.next()? != "users" {
                        return None;
                    }
                    let n = decimal(parts.next()?)?;
                    let r = hash64(parts.next()?)?;
                    parts.next().is_none().then_some((n, r))
                })();
                Some(ok.ok_or("the fifth line is not `users SIZE BASE64(root)`")?)
            }
        };
        if chain == crate::ledger::USERS_CHAIN && users.is_some() {
            return Err("a checkpoint of the identity chain has no users line".into());
        }
        Ok(Note {
            chain: chain.to_string(),
            size,
            root,
            time: time.to_string(),
            users,
        })
    }

    /// Parses a signed note and checks its signature by `key`. Returns why it fails.
    pub fn verify(text: &str, key: &VerifyingKey) -> Result<Note, String> {
        let (body, sigs) = text
            .find("\n\n")
            .map(|i| (&text[..i + 1], &text[i + 2..]))
            .ok_or("no blank line ends the note body: not a signed note")?;
        let note = Note::parse_body(body)?;
        let want = key_id(key);
        let mut names = Vec::new();
        for line in sigs.split_terminator('\n') {
            let rest = line
                .strip_prefix("\u{2014} ")
                .ok_or("a signature line does not start with an em dash and a space")?;
            let (name, b64) = rest
                .split_once(' ')
                .ok_or("a signature line is `— NAME BASE64`")?;
            names.push(name.to_string());
            let blob = B64
                .decode(b64)
                .map_err(|e| format!("the signature of {name} is not base64: {e}"))?;
            if name != KEY_NAME || blob.len() != 68 || blob[..4] != want {
                continue;
            }
            let sig = Signature::from_bytes(&blob[4..].try_into().expect("64 bytes"));
            return key
                .verify_strict(body.as_bytes(), &sig)
                .map(|()| note)
                .map_err(|_| "the signature does not match the checkpoint's text".to_string());
        }
        if !sigs.ends_with('\n') || sigs.is_empty() {
            return Err("the note has no signature line".into());
        }
        Err(format!(
            "no signature by the given key (key id {}); signatures by {}",
            hex::encode(want),
            names.join(", ")
        ))
    }
}

fn decimal(s: &str) -> Option<u64> {
    let ok =
        !s.is_empty() && s.bytes().all(|b| b.is_ascii_digit()) && (s == "0" || !s.starts_with('0'));
    ok.then(|| s.parse().ok()).flatten()
}

fn hash64(s: &str) -> Option<Hash> {
    B64.decode(s).ok()?.try_into().ok()
}

/// Whether a checkpoint file's text is a signed note (format 3) rather than an older JSON
/// checkpoint (`/1`, `/2`), which starts with `{`.
pub fn is_note(text: &str) -> bool {
    !text.trim_start().starts_with('{')
}

#[cfg(test)]
mod tests {
    use super::*;

    fn key() -> SigningKey {
        SigningKey::from_bytes(&[7u8; 32])
    }

    fn note() -> Note {
        Note {
            chain: "final".into(),
            size: 12,
            root: [3u8; 32],
            time: "2026-12-03T20:00:00Z".into(),
            users: Some((4, [5u8; 32])),
        }
    }

    #[test]
    fn a_note_has_the_agreed_text_and_verifies() {
        let k = key();
        let text = note().sign(&k);
        let root = B64.encode([3u8; 32]);
        let users = B64.encode([5u8; 32]);
        let body = format!(
            "holdout-ledger/final\n12\n{root}\ntime 2026-12-03T20:00:00Z\nusers 4 {users}\n"
        );
        assert!(text.starts_with(&format!("{body}\n\u{2014} holdout-ledger ")));
        // The signature line's blob: key id then the Ed25519 signature over the body alone.
        let b64 = text.lines().last().unwrap().rsplit(' ').next().unwrap();
        let blob = B64.decode(b64).unwrap();
        assert_eq!(blob[..4], key_id(&k.verifying_key()));
        let sig = Signature::from_bytes(&blob[4..].try_into().unwrap());
        assert!(
            k.verifying_key()
                .verify_strict(body.as_bytes(), &sig)
                .is_ok()
        );
        assert_eq!(Note::verify(&text, &k.verifying_key()), Ok(note()));
    }

    #[test]
    fn the_key_id_is_the_first_four_bytes_of_the_agreed_hash() {
        let k = key().verifying_key();
        let mut input = b"holdout-ledger\n\x01".to_vec();
        input.extend_from_slice(&k.to_bytes());
        assert_eq!(key_id(&k), Sha256::digest(&input)[..4]);
        let vkey = verifier_key(&k);
        assert!(vkey.starts_with(&format!("holdout-ledger+{}+", hex::encode(key_id(&k)))));
        assert_eq!(parse_public_key(&vkey), Ok(k));
        assert_eq!(parse_public_key(&hex::encode(k.to_bytes())), Ok(k));
        // A key id that does not match its key, or another key name, is refused.
        let bad_id = format!(
            "holdout-ledger+00000000+{}",
            vkey.rsplit('+').next().unwrap()
        );
        assert!(parse_public_key(&bad_id).is_err());
        assert!(parse_public_key(&vkey.replacen("holdout-ledger", "other", 1)).is_err());
    }

    #[test]
    fn any_change_to_a_note_fails() {
        let k = key();
        let text = note().sign(&k);
        let vk = k.verifying_key();
        // Every single byte of the body changed fails (signature or parse).
        let body_len = text.find("\n\n").unwrap() + 1;
        for i in 0..body_len {
            let mut b = text.clone().into_bytes();
            b[i] ^= 0x01;
            if let Ok(t) = String::from_utf8(b) {
                assert!(Note::verify(&t, &vk).is_err(), "byte {i} changed verified");
            }
        }
        // Another key's signature, a stripped signature, a stripped users line.
        let other = SigningKey::from_bytes(&[8u8; 32]);
        assert!(Note::verify(&note().sign(&other), &vk).is_err());
        assert!(Note::verify(&text[..body_len + 1], &vk).is_err());
        let stripped = text.replacen(&text[text.find("users").unwrap()..body_len], "", 1);
        assert!(Note::verify(&stripped, &vk).is_err());
        // The identity chain's own note has no users line, and one with it is refused.
        let users_note = Note {
            chain: "@users".into(),
            users: None,
            ..note()
        };
        assert!(Note::verify(&users_note.sign(&k), &vk).is_ok());
        let bad = Note {
            chain: "@users".into(),
            ..note()
        };
        assert!(Note::verify(&bad.sign(&k), &vk).is_err());
    }
}
