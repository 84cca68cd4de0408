//! The accountant's public data: requests, outcomes, charges, answers, refusals, status.

use serde::{Deserialize, Serialize};

use crate::stats::interval::Interval;
use crate::stats::policy::PolicyError;
use crate::stats::rules::Symbol;

/// A request to answer `models` predictions of one analyst on one target.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct QueryRequest {
    /// The accounting identity (a team is one analyst).
    pub analyst: String,
    /// Index of the target in the policy.
    pub target: usize,
    /// Number of models; more than 1 only for `best-of`.
    pub models: u32,
}

/// The exact loss of one model: what the scorer measured.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Outcome {
    /// 0-1 loss: number of errors among the rows.
    Errors(u64),
    /// Bounded loss: sum over rows of the loss in [0, 1].
    LossSum(f64),
}

/// Why a query is refused; decided from public facts only.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, thiserror::Error)]
#[serde(tag = "reason", rename_all = "snake_case")]
pub enum Refusal {
    /// The schedule has no share left (`even:K` after K queries of the pool).
    #[error("the schedule is exhausted after {answered} queries")]
    ScheduleExhausted {
        /// Queries already funded by the pool.
        answered: u64,
    },
    /// The next interval would be wider than the tolerance at the public reference score.
    #[error("the next half-width {half_width:.4} would exceed the tolerance {tolerance}")]
    ToleranceExceeded {
        /// Half-width the query would get at the reference score.
        half_width: f64,
        /// The policy's tolerance.
        tolerance: f64,
    },
    /// The analyst has no share of delta (not on the roster and no reserve).
    #[error("analyst '{analyst}' has no share of this holdout's budget")]
    NoShare {
        /// The analyst.
        analyst: String,
    },
    /// The request does not fit the policy.
    #[error("bad request: {0}")]
    BadRequest(String),
}

/// Misuse of the accountant by its caller (not something an analyst causes).
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum AccountingError {
    /// The charge was quoted for another state or another request.
    #[error("stale or mismatched charge: quote again")]
    StaleCharge,
    /// Outcomes do not fit the request or the target.
    #[error("bad outcome: {0}")]
    BadOutcome(String),
    /// The call does not fit the policy's rule.
    #[error("{0}")]
    WrongRule(&'static str),
    /// An invalid policy.
    #[error(transparent)]
    Policy(#[from] PolicyError),
}

/// What a query will be charged; returned by [`Accountant::quote`](super::Accountant::quote).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Charge {
    /// Accountant state this charge was quoted at (a later call makes it stale).
    pub sequence: u64,
    /// The request quoted.
    pub request: QueryRequest,
    /// Schedule index of the (first) share: global with one pool, else the analyst's own.
    pub query_number: u64,
    /// Shares of the schedule taken (the batch size; 1 otherwise).
    pub shares: u32,
    /// `delta_i` of the share the reported interval uses (the smallest of a batch).
    pub delta_i: f64,
    /// `ln(1/delta_i)`.
    pub ln_inv_delta_i: f64,
    /// `ln(1/d_i) = ln(1/delta_i) + L_{i-1}`: the level of the reported interval.
    pub level_nats: f64,
    /// Transcript cost `L_{i-1}` the level includes (with the code of class counts the query
    /// releases first, where they are due).
    pub transcript_nats: f64,
    /// Sum of `delta_i` over the shares taken: what the budget is charged.
    pub delta_charged: f64,
    /// Half-width at the public reference score, compared with the tolerance.
    pub reference_half_width: f64,
}

/// A release of class counts ([`Accountant::release_counts`](super::Accountant::release_counts)).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct CountsRelease {
    /// `-ln p(counts)`, added to the transcript: `ln C(n + C - 1, C - 1)`.
    pub code_nats: f64,
    /// Transcript cost `L` after the release.
    pub transcript_nats: f64,
}

/// What an answer reports (DESIGN 4.4).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Answer {
    /// The released symbol.
    pub symbol: Symbol,
    /// The released grid value, where the symbol carries one.
    pub released_score: Option<f64>,
    /// The interval, computed from the symbol only.
    pub interval: Interval,
    /// A plain sentence saying what the symbol certifies.
    pub statement: String,
    /// Schedule index of the (first) share.
    pub query_number: u64,
    /// `delta_i` of the interval.
    pub delta_i: f64,
    /// `ln(1/d_i)` of the interval.
    pub level_nats: f64,
    /// `-ln p(symbol | past)` added to the transcript.
    pub code_nats: f64,
    /// Budget the pool has used (sum of `delta_i`).
    pub spent: f64,
    /// Budget the pool has left.
    pub remaining: f64,
    /// Transcript cost `L` after this answer.
    pub transcript_nats: f64,
    /// Worst-case half-width of this analyst's next query on this target.
    pub next_half_width: f64,
    /// How many more queries fit within the tolerance if every later answer costs the worst case.
    pub queries_left: u64,
}

/// Budget status of a pool (DESIGN 4.4).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Status {
    /// The analyst asked about (`None`: the whole holdout, organizer view).
    pub analyst: Option<String>,
    /// The pool's budget (`delta` or the analyst's share `delta_a`; 0 if none yet).
    pub budget: f64,
    /// Used.
    pub spent: f64,
    /// Left.
    pub remaining: f64,
    /// Transcript cost `L` the next query pays.
    pub transcript_nats: f64,
    /// Answers released in the transcript.
    pub answers: u64,
    /// Schedule index of the next query.
    pub next_query_number: u64,
    /// `ln(1/d)` of the next query, if the schedule has a share left.
    pub next_level_nats: Option<f64>,
    /// Per target: worst-case half-width of the next query and queries left.
    pub targets: Vec<TargetStatus>,
}

/// Per-target part of a [`Status`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TargetStatus {
    /// Target name.
    pub name: String,
    /// Half-width of the next query at the reference score (`None` when exhausted).
    pub next_half_width: Option<f64>,
    /// Queries that still fit within the tolerance, every answer costing the worst case.
    pub queries_left: u64,
}

/// Receipt of a sealed submission: its share is taken, its answer waits for the close.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SealedReceipt {
    /// Position in the round (0-based); outcomes at the close come in this order.
    pub ticket: usize,
    /// The charge taken.
    pub charge: Charge,
}

/// Threshold by cutoff (core 2): the decision boundary for one target at one level, computed
/// from the public level alone; an answer is then one comparison (DESIGN 4.8).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Cutoff {
    /// 0-1 loss: pass iff the error count is at most this (`-1`: nothing passes).
    Errors(i64),
    /// Bounded loss: pass iff the mean loss is at most this (`-inf`: nothing passes).
    Mean(f64),
}

impl Cutoff {
    /// Whether an outcome passes: one comparison, whatever the outcome.
    pub fn passes(&self, outcome: &Outcome, rows: u64) -> bool {
        match (*self, *outcome) {
            (Cutoff::Errors(c), Outcome::Errors(k)) => i128::from(k) <= i128::from(c),
            (Cutoff::Mean(m), Outcome::LossSum(s)) => s / rows as f64 <= m,
            _ => false,
        }
    }
}
