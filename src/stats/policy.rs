//! A holdout's policy: budget, schedule, answer rule, tolerance, sharing assumption, targets.
//! Fixed when the holdout is created, without looking at the labels, and written to the
//! ledger (DESIGN 4.2 rule 3).
//!
//! ```
//! use holdout_ledger::stats::policy::Policy;
//! let p: Policy = serde_json::from_str(r#"{
//!     "delta": 0.05, "schedule": "series", "rule": "rounded:0.01", "tolerance": 0.05,
//!     "rows": 10000, "targets": [{"name": "label", "binary": true, "method": "exact"}]
//! }"#).unwrap();
//! p.validate().unwrap();
//! assert!(holdout_ledger::stats::policy::guarantee_text(&p).contains("1 - 0.05"));
//! ```

use serde::{Deserialize, Serialize};

use super::interval::Method;
use super::rules::Rule;
use super::schedule::{Schedule, Shares};

/// Whether analysts see each other's answers (DESIGN 4.3, sharing assumption).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Sharing {
    /// All analysts may see all answers: one transcript for the holdout.
    #[default]
    Shared,
    /// Each analyst only ever sees their own answers: one transcript and one share per analyst.
    Isolated,
}

/// The public score at which the tolerance is judged before scoring (DESIGN 4.2 rule 2).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ToleranceReference {
    /// The widest case, a score of 1/2.
    #[default]
    WorstCase,
    /// The analyst's last released score on the target (1/2 before any); the actual interval
    /// may then come out somewhat wider than the tolerance.
    LastReleased,
}

/// One label column of the holdout.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct TargetPolicy {
    /// Target name.
    pub name: String,
    /// True for 0-1 loss (outcomes are error counts), false for a bounded loss in [0, 1].
    pub binary: bool,
    /// Interval method; `exact` only for binary targets.
    pub method: Method,
    /// The number of classes whose counts a query of this target needs (per-class and
    /// balanced error, AUC): the counts are then released once, as a coded symbol of their
    /// own, before the first such answer (DESIGN 4.8, [`super::codes::composition_nats`]).
    /// `None` (and absent from the recorded policy) for metrics that need no counts.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub class_counts: Option<u32>,
}

/// The accounting policy of one holdout.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Policy {
    /// Total failure probability for every interval the holdout ever reports.
    pub delta: f64,
    /// Split of a pool's budget over its queries.
    pub schedule: Schedule,
    /// The answer rule.
    pub rule: Rule,
    /// Widest half-width still worth answering.
    pub tolerance: f64,
    /// Where the tolerance is judged.
    #[serde(default)]
    pub tolerance_reference: ToleranceReference,
    /// Sharing assumption.
    #[serde(default)]
    pub sharing: Sharing,
    /// Per-analyst shares of delta.
    #[serde(default)]
    pub shares: Shares,
    /// Rows `n` of the holdout.
    pub rows: u64,
    /// Targets (label columns), all on the same rows and the same budget.
    pub targets: Vec<TargetPolicy>,
    /// Version of the accounting core whose numbers this holdout uses (see
    /// [`super::CORE_VERSION`]). A policy recorded before the field existed is version 1, and
    /// replays with version 1's numbers, so every older ledger still replays bit for bit.
    #[serde(default = "legacy_core")]
    pub core_version: u32,
    /// Version of the answer codes this holdout charges ([`super::codes`]; new holdouts record
    /// [`super::codes::CODE`]). A policy recorded before the field existed is version 1 (the
    /// uniform codes), so every older ledger replays and audits with its own codes.
    #[serde(default = "legacy_code")]
    pub code_version: u32,
}

fn legacy_core() -> u32 {
    1
}

fn legacy_code() -> u32 {
    1
}

/// A policy that cannot be used, naming the offending field.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("policy field '{field}': {message}")]
pub struct PolicyError {
    /// The field.
    pub field: &'static str,
    /// What is wrong.
    pub message: String,
}

fn bad(field: &'static str, message: impl Into<String>) -> PolicyError {
    PolicyError {
        field,
        message: message.into(),
    }
}

impl Policy {
    /// Checks every field; the error names the field.
    pub fn validate(&self) -> Result<(), PolicyError> {
        if !super::KNOWN_CORES.contains(&self.core_version) {
            return Err(bad(
                "core_version",
                format!(
                    "{} is not a core this binary can replay (it knows {:?})",
                    self.core_version,
                    super::KNOWN_CORES
                ),
            ));
        }
        if !super::codes::KNOWN_CODES.contains(&self.code_version) {
            return Err(bad(
                "code_version",
                format!(
                    "{} is not a code version this binary can replay (it knows {:?})",
                    self.code_version,
                    super::codes::KNOWN_CODES
                ),
            ));
        }
        if !(self.delta > 0.0 && self.delta < 1.0) {
            return Err(bad(
                "delta",
                format!(
                    "must lie in (0, 1) (a failure probability such as 0.05), got {}",
                    self.delta
                ),
            ));
        }
        if !(self.tolerance > 0.0 && self.tolerance <= 1.0) {
            return Err(bad(
                "tolerance",
                format!("must lie in (0, 1], got {}", self.tolerance),
            ));
        }
        if self.rows == 0 {
            return Err(bad("rows", "a holdout needs at least one row"));
        }
        if self.targets.is_empty() {
            return Err(bad("targets", "at least one target is needed"));
        }
        for (i, t) in self.targets.iter().enumerate() {
            if t.name.trim().is_empty() {
                return Err(bad("targets", format!("target {i} has an empty name")));
            }
            if self.targets[..i].iter().any(|u| u.name == t.name) {
                return Err(bad(
                    "targets",
                    format!("target '{}' is listed twice", t.name),
                ));
            }
            if t.class_counts.is_some_and(|c| c < 2) {
                return Err(bad(
                    "targets",
                    format!(
                        "target '{}': class counts need at least two classes",
                        t.name
                    ),
                ));
            }
            if t.method == Method::Exact && !t.binary {
                return Err(bad(
                    "targets",
                    format!(
                        "target '{}': method 'exact' (Clopper-Pearson) needs a 0-1 loss; use kl",
                        t.name
                    ),
                ));
            }
        }
        self.shares.validate().map_err(|e| bad("shares", e.0))?;
        if self.sharing == Sharing::Isolated && self.shares == Shares::None {
            return Err(bad(
                "shares",
                "isolated sharing needs per-analyst shares (roster or on-arrival)",
            ));
        }
        Ok(())
    }
}

/// The guarantee of DESIGN 4.4 with its assumptions, stated at the committed total delta.
pub fn guarantee_text(policy: &Policy) -> String {
    let sharing = match policy.sharing {
        Sharing::Shared => {
            "sharing 'shared': analysts may see each other's answers; the guarantee covers that"
        }
        Sharing::Isolated => {
            "sharing 'isolated': each analyst (team) only ever sees their own answers; several \
             accounts of one person, or teams exchanging answers, void the guarantee"
        }
    };
    format!(
        "With probability at least 1 - {delta} over the draw of this holdout's labels, every \
         interval this holdout reports, now or later, contains the mean loss that its predictions \
         would have on fresh labels for the same inputs; for a model fixed without access to this \
         holdout's inputs, that is its true risk.\n\
         Assumptions: rows drawn independently (i.i.d. for the true-risk reading); submissions \
         chosen without access to the labels except through released answers; {sharing}; the \
         loss as defined by each target's metric (clipped, floored, rescaled into [0, 1]); answer \
         rule '{rule}', schedule '{schedule}'.\n\
         For high-stakes uses (health, credit, safety), follow your domain's regulations and \
         qualified review: a passed threshold is a statistical statement, not a certification.",
        delta = policy.delta,
        rule = policy.rule,
        schedule = policy.schedule,
    )
}
