//! Statistics and accounting core: pure functions, no I/O, no clock, no randomness.
//!
//! | concept | module |
//! |---|---|
//! | `ln I_x(a, b)` in log space and its inversion | [`beta`] |
//! | one-query intervals (Clopper-Pearson, KL, Hoeffding) | [`interval`] (KL inversion in `kl`) |
//! | how the budget is split over queries and analysts | [`schedule`] |
//! | answer rules, their symbols and codes | [`rules`] |
//! | cheaper codes by version (relative rounded cells, ladder drops) | [`codes`] |
//! | a holdout's policy and the guarantee sentence | [`policy`] |
//! | the accountant the daemon and the audit share | [`accounting`] |
//! | paired comparison of two models | [`paired`] |
//! | planning: queries that fit, rows needed | [`plan`] |
//! | fair service: which policies serve T teams M answers each | [`fair`] |

pub mod accounting;
pub mod beta;
pub mod classes;
pub mod codes;
pub mod fair;
pub mod interval;
mod kl;
pub mod paired;
pub mod plan;
pub mod policy;
pub mod rules;
pub mod schedule;

/// Version of the accounting core, recorded in every holdout's genesis entry so that an audit
/// can tell which rules produced a ledger. Bump it whenever any number this module computes
/// for the same inputs could change.
pub const CORE_VERSION: &str = "4";

/// [`CORE_VERSION`] as a number, as new policies record it (`Policy::core_version`).
pub const CORE: u32 = 4;

/// Every core version this binary replays. Version 1 is the 0.1.0 release's numbers: kept so
/// that its ledgers still replay bit for bit; version 2 rounds every limit outward and judges
/// the tolerance on the reported interval; version 3 searches each Clopper-Pearson root from a
/// guess; version 4 finds it by Newton from that guess and leaves the last digits to the
/// outward certification (see `interval::Rounding`).
pub const KNOWN_CORES: [u32; 4] = [1, 2, 3, 4];
