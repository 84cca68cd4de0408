//! holdout-ledger: a daemon that keeps a shared holdout set's labels sealed, scores submitted
//! predictions itself, and charges every answer against a union-bound confidence budget, so the
//! numbers it reports stay trustworthy under adaptive reuse.
//!
//! The parts, from the inside out:
//!
//! - [`stats`]: the pure statistics and accounting core (intervals, schedules, answer rules and
//!   their codes, the accountant, paired comparisons, planning). No I/O; the daemon and the
//!   offline audit call the same functions.
//! - [`metric`]: per-row losses, label domains, scoring.
//! - [`ledger`]: the hash-chained, salted ledger entries.
//! - [`auth`]: users, roles, hashed bearer tokens.
//! - [`store`]: SQLite (WAL, migrations) and the thread that owns the connection.
//! - [`engine`]: the daemon's operations on the store (create, submit, status...), each one
//!   transaction.
//! - [`service`]: the gRPC services, converting `proto` types at the edge.
//! - [`server`]: serving on a bound listener until a shutdown future completes.
//! - [`web`]: the opt-in read-only web view (`serve --web`), on its own listener.
//! - [`audit`]: ledger exports, signed checkpoints, and the offline audit that re-verifies and
//!   replays them with the same accounting core.
//! - [`cli`]: the `holdout` command line; [`config`]: `serve --config` files and precedence.
#![deny(missing_docs)]
#![warn(unreachable_pub, rustdoc::broken_intra_doc_links)]

pub mod alerts;
pub mod audit;
pub mod auth;
pub mod cli;
pub mod config;
pub mod engine;
pub mod error;
pub mod files;
pub mod ledger;
pub mod metric;
pub mod proto;
pub mod report;
pub mod server;
pub mod service;
pub mod stats;
pub mod store;
pub mod web;
