//! Format-3 checkpoints and Merkle proofs in the audit: a signed note checked against the tree
//! rebuilt from an export (root at that size), and the offline checks of a receipt with an
//! inclusion proof, or of two checkpoints with a consistency proof, with nothing else.

use ed25519_dalek::VerifyingKey;

use super::export::Export;
use super::note::{self, Note};
use crate::ledger::{self, Entry, merkle};

/// The tree over a chain's entries as exported, or why it cannot be built.
fn tree_of(entries: &[Entry]) -> Result<merkle::Tree, String> {
    let mut tree = merkle::Tree::default();
    for e in entries {
        tree.push(
            &merkle::leaf_input(&e.hash)
                .map_err(|_| format!("entry {} has a hash that is not 32 hex bytes", e.seq))?,
        );
    }
    Ok(tree)
}

/// What is wrong with a format-3 checkpoint (note text) as an anchor of this export, as
/// (chain, field, problem); empty when its signature verifies with `key`, it is a checkpoint of
/// the export's holdout or identity chain, that chain has at least its size of entries, and
/// the root of the tree of the first SIZE entries is its root (and likewise for the identity
/// chain's tree it signs). Also returns the note when it parsed and verified.
pub fn note_problems(
    export: &Export,
    text: &str,
    key: Option<&VerifyingKey>,
) -> (Option<Note>, Vec<(String, &'static str, String)>) {
    let holdout = export.header.holdout.as_str();
    let mut out = Vec::new();
    let Some(key) = key else {
        out.push((
            holdout.to_string(),
            "signature",
            "a format-3 checkpoint names no key: give the daemon's --public-key (the verifier \
             key `holdout checkpoint` and `holdout prove` print)"
                .to_string(),
        ));
        return (None, out);
    };
    let note = match Note::verify(text, key) {
        Ok(n) => n,
        Err(why) => {
            out.push((holdout.to_string(), "signature", why));
            return (None, out);
        }
    };
    let mut check = |chain: &str, entries: &[Entry], size: u64, root: &merkle::Hash| {
        if size > entries.len() as u64 {
            out.push((
                chain.to_string(),
                "size",
                format!(
                    "the checkpoint signs a tree of {size} entries but the chain has {}: \
                     truncated",
                    entries.len()
                ),
            ));
            return;
        }
        match tree_of(&entries[..size as usize]) {
            Err(why) => out.push((chain.to_string(), "root", why)),
            Ok(t) if t.root() != *root => out.push((
                chain.to_string(),
                "root",
                format!(
                    "the tree of the chain's first {size} entries has root {}, the checkpoint \
                     signed {}: the chain was rebuilt or changed",
                    hex::encode(t.root()),
                    hex::encode(root)
                ),
            )),
            Ok(_) => {}
        }
    };
    if note.chain == holdout {
        check(holdout, &export.entries, note.size, &note.root);
        if let Some((n, r)) = &note.users {
            check(ledger::USERS_CHAIN, &export.users, *n, r);
        }
    } else if note.chain == ledger::USERS_CHAIN {
        check(ledger::USERS_CHAIN, &export.users, note.size, &note.root);
    } else {
        out.push((
            holdout.to_string(),
            "holdout",
            format!("checkpoint of {}, export of {holdout}", note.chain),
        ));
    }
    (Some(note), out)
}

/// Verifies a receipt's entry with an inclusion proof and a format-3 checkpoint signed by
/// `key`, with nothing else: the checkpoint's signature, that it is of the receipt's holdout,
/// and that the proof leads from the receipt's entry hash to the checkpoint's root. Returns the
/// checkpoint and the proof, or why it fails.
pub fn verify_receipt(
    holdout: &str,
    entry_hash: &str,
    proof_text: &str,
    checkpoint_text: &str,
    key: &VerifyingKey,
) -> Result<(Note, merkle::InclusionProof), String> {
    let cp = Note::verify(checkpoint_text, key).map_err(|why| format!("checkpoint: {why}"))?;
    if cp.chain != holdout {
        return Err(format!(
            "checkpoint: a checkpoint of {}, the receipt is of {holdout}",
            cp.chain
        ));
    }
    let proof: merkle::InclusionProof = serde_json::from_str(proof_text)
        .map_err(|e| format!("proof: not an inclusion proof: {e}"))?;
    proof
        .verify(&entry_hash.to_ascii_lowercase(), cp.size, &cp.root)
        .map_err(|why| format!("proof: {why}"))?;
    Ok((cp, proof))
}

/// Verifies that checkpoint `new` extends checkpoint `old` (both format 3, signed by `key`,
/// of one chain) with a consistency proof, with nothing else. Returns both, or why it fails.
pub fn verify_extension(
    proof_text: &str,
    old_text: &str,
    new_text: &str,
    key: &VerifyingKey,
) -> Result<(Note, Note), String> {
    let old = Note::verify(old_text, key).map_err(|why| format!("older checkpoint: {why}"))?;
    let new = Note::verify(new_text, key).map_err(|why| format!("newer checkpoint: {why}"))?;
    if old.chain != new.chain {
        return Err(format!(
            "the checkpoints are of {} and {}, not of one chain",
            old.chain, new.chain
        ));
    }
    let proof: merkle::ConsistencyProof = serde_json::from_str(proof_text)
        .map_err(|e| format!("proof: not a consistency proof: {e}"))?;
    proof
        .verify(old.size, &old.root, new.size, &new.root)
        .map_err(|why| format!("proof: {why}"))?;
    Ok((old, new))
}

/// Reads a public key (verifier key string or 64 hex digits) given on the command line.
pub fn public_key(text: &str) -> Result<VerifyingKey, String> {
    note::parse_public_key(text)
}
