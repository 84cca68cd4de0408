//! holdout-ledger
#![deny(missing_docs)]
pub mod stats;
