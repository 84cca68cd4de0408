//! The audit: ledger exports, signed checkpoints of chain heads, and the offline check that
//! re-verifies an export and replays it with the daemon's own accounting core.

mod digest;

pub use digest::predictions_digest;
