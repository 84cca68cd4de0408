//! The audit: ledger exports, signed checkpoints of chain heads, and the offline check that
//! re-verifies an export and replays it with the daemon's own accounting core.
//!
//! | concept | module |
//! |---|---|
//! | the export file (JSON Lines, versioned header) | [`export`] |
//! | the daemon's key, signed checkpoints | [`anchor`] |
//! | checkpoint format 3 (signed note of a chain's Merkle tree), verifier keys | [`note`] |
//! | format-3 checkpoints against an export; offline receipt and consistency checks | [`proofs`] |
//! | prediction digests shared with the daemon | `digest` ([`predictions_digest`]) |
//! | chain, genesis, checkpoint, receipt and label checks; the report | `check` ([`audit`]) |
//! | every entry's user and team against the identity chain | `identity` |
//! | replay of every answer and refusal | `replay` ([`QuerySummary`]) |
//! | `--find`, re-scoring, what-if replays | [`trace`] |
//! | certificates of one answer from an export and a checkpoint | [`certify`] |
//! | families: shares of one total delta, checked across exports | [`family`] |

pub mod anchor;
pub mod certify;
mod check;
mod digest;
pub mod export;
pub mod family;
mod identity;
pub mod kept;
pub mod note;
pub mod proofs;
mod replay;
mod retention;
pub mod trace;

use serde::Serialize;

pub use check::{
    AuditOptions, LabelColumns, Receipt, Released, Report, audit, checkpoint_problems,
    genesis_policy as check_genesis, labels_digest,
};
pub use digest::predictions_digest;
pub use replay::QuerySummary;
pub use retention::RetentionReport;

/// One discrepancy, named by chain, entry number and field.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Finding {
    /// Chain (holdout name or `@users`).
    pub chain: String,
    /// Entry number, when the finding is about one entry.
    pub entry: Option<u64>,
    /// Field (or check) concerned.
    pub field: String,
    /// What is wrong.
    pub problem: String,
}

impl std::fmt::Display for Finding {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.entry {
            Some(n) => write!(
                f,
                "{} entry {n}, {}: {}",
                self.chain, self.field, self.problem
            ),
            None => write!(f, "{}, {}: {}", self.chain, self.field, self.problem),
        }
    }
}

/// What an offline audit cannot establish, printed with every report.
pub const CANNOT_CHECK: &[&str] = &[
    "that the holdout's rows were drawn i.i.d. from the population the guarantee speaks of",
    "that labels or exact scores did not leak outside the tool (copies of the database, backups, \
     people who read exact scores and then chose models)",
    "drift: whether the population has changed since the holdout was drawn",
    "entries appended after the newest checkpoint or receipt you hold (the chain is only \
     anchored up to them)",
    "that the predictions were produced without access to the holdout's inputs, for the \
     true-risk reading",
];
