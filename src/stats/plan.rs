//! Planning (DESIGN 4.7): how many queries fit within a tolerance, and how many rows `K`
//! queries need, with exactly the interval method, reference score and accounting the
//! accountant uses (one pool, every answer costing its rule's worst case).
//!
//! Query `j + 1` (0-based `j` answers before it) gets level
//! `ln(1/delta) + ln(1/s(i)) + W(j)`, `W(j)` the rule's worst-case code of `j` answers
//! ([`Rule::worst_case_nats`]), `i` its last schedule share; it fits while the half-width at
//! the reference score is at most the tolerance. For `best-of` a query is a batch of `B`
//! models that takes `B` shares. For `sealed` (one round released as the last event) the code
//! is 0, so the count is the non-adaptive one and can exceed `u64`: counts are f64.
//!
//! Plans use the accounting of the current core ([`crate::stats::CORE`]) and the current
//! codes ([`crate::stats::codes::CODE`]), as new holdouts do:
//! the tolerance is judged on the interval that will be reported (for grid rules the widest
//! cell, which is about half a grid step wider than the one-count interval), and a best-of
//! batch is reported at the mean of its shares; worst-case codes are the current codes' (for
//! `rounded`, `ln(2(M+1))` per answer after a team's first, one `ln 2` above the uniform
//! code, so worst-case counts are a little lower than with the uniform code; for `ladder`,
//! many new bests must be small drops, so long ladders fit more).
//! [`queries_that_fit_core`] plans with a given core and the uniform codes (version 1); with
//! core 1 that is the accounting DESIGN 4.5's table follows (the one-count interval, the
//! smallest share). [`queries_that_fit_with`] takes both versions.
//! Planning reads binary losses from the method: `exact` is a 0-1 loss; with `kl` or
//! `hoeffding` cells are taken as mean ranges, which are never narrower than a 0-1 loss's
//! count ranges, so such a plan never promises more than the daemon answers.
//!
//! ```
//! use holdout_ledger::stats::plan::{PlanSpec, queries_that_fit, queries_that_fit_core};
//! use holdout_ledger::stats::interval::Method;
//! // DESIGN 4.5: Hoeffding, n = 10,000, delta = 0.05, series, tolerance 0.05, rounded 0.01: 10
//! // with the one-count interval (core 1); the reported cell interval is 0.005 wider, so
//! // fewer fit under core 2.
//! let spec = PlanSpec { rows: 10_000, delta: 0.05, tolerance: 0.05,
//!     schedule: "series".parse().unwrap(), method: Method::Hoeffding, batch: 1,
//!     class_counts: None };
//! let rule = "rounded:0.01".parse().unwrap();
//! assert_eq!(queries_that_fit_core(&spec, &rule, 0.5, 1), 10.0);
//! assert!(queries_that_fit(&spec, &rule, 0.5) < 10.0);
//! ```

use serde::{Deserialize, Serialize};

use super::accounting::{count_fitting, ln_inv_mean_share};
use super::codes::{Code, composition_nats};
use super::interval::{Method, Rounding, reference_half_width};
use super::rules::{Past, Rule};
use super::schedule::Schedule;

/// Everything a plan depends on besides the rule.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PlanSpec {
    /// Rows `n`.
    pub rows: u64,
    /// Total budget.
    pub delta: f64,
    /// Widest acceptable half-width.
    pub tolerance: f64,
    /// Schedule of the pool.
    pub schedule: Schedule,
    /// Interval method (exact for 0-1 loss).
    pub method: Method,
    /// Models per `best-of` batch.
    pub batch: u32,
    /// Declared classes `C` of a target whose metric needs the class counts (per-class and
    /// balanced error, AUC): their release, `ln C(n + C - 1, C - 1)` nats
    /// ([`composition_nats`]), enters the transcript before the first answer, so every planned
    /// level pays for it (DESIGN 4.8). `None` (the default) for metrics that need no counts.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub class_counts: Option<u32>,
}

impl PlanSpec {
    /// The nats the release of the class counts adds to every level (0 without one).
    pub fn counts_nats(&self) -> f64 {
        self.class_counts
            .map_or(0.0, |c| composition_nats(self.rows, c))
    }
}

/// One row of a plan table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PlanRow {
    /// The rule.
    pub rule: String,
    /// Queries that fit, worst case (reference score 1/2). Written to JSON as a whole number
    /// while it is one exactly (below 2^53), as a float beyond.
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "count_json")]
    pub queries: Option<f64>,
    /// Queries that fit at the stated expected error (JSON as `queries`).
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "count_json")]
    pub queries_expected: Option<f64>,
    /// Rows needed for the requested number of queries (`None` past 2^62).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub rows: Option<u64>,
}

/// A count of queries as JSON: a whole number below 2^53 (where every whole number is an exact
/// float), the float itself beyond (counts like 1.8e109 are real figures, not sentinels).
fn count_json<S: serde::Serializer>(q: &Option<f64>, s: S) -> Result<S::Ok, S::Error> {
    const EXACT: f64 = 9_007_199_254_740_992.0; // 2^53
    match *q {
        Some(q) if q.fract() == 0.0 && (0.0..EXACT).contains(&q) => s.serialize_u64(q as u64),
        Some(q) => s.serialize_f64(q),
        None => s.serialize_none(),
    }
}

fn half_width_fits(spec: &PlanSpec, rule: &Rule, reference: f64, level: f64, core: u32) -> bool {
    if core >= 2 {
        // The worst case (reference 1/2) is the widest cell; another reference is the cell
        // holding that expected error, as the daemon's `last-released` reference does.
        let reference = (reference != 0.5).then_some(reference);
        let h = rule.reported_half_width(
            spec.rows,
            spec.method == Method::Exact,
            spec.method,
            reference,
            level,
            Rounding::for_core(core),
        );
        return h <= spec.tolerance;
    }
    reference_half_width(spec.method, spec.rows, reference, level, rule.sides())
        .is_ok_and(|h| h <= spec.tolerance)
}

fn models(rule: &Rule, spec: &PlanSpec) -> u64 {
    if matches!(rule, Rule::BestOf(_)) {
        u64::from(spec.batch.max(1))
    } else {
        1
    }
}

/// Queries (batches, for best-of) that fit, at reference score `reference` (1/2: worst case),
/// with the current core's accounting and the current codes.
pub fn queries_that_fit(spec: &PlanSpec, rule: &Rule, reference: f64) -> f64 {
    queries_that_fit_with(spec, rule, reference, super::CORE, super::codes::CODE)
}

/// [`queries_that_fit`] with the accounting of core version `core` (1: the tolerance judged on
/// the one-count interval and a batch reported at its smallest share) and the uniform codes
/// (code version 1).
pub fn queries_that_fit_core(spec: &PlanSpec, rule: &Rule, reference: f64, core: u32) -> f64 {
    queries_that_fit_with(spec, rule, reference, core, 1)
}

/// [`queries_that_fit`] with core version `core` and code version `code`.
pub fn queries_that_fit_with(
    spec: &PlanSpec,
    rule: &Rule,
    reference: f64,
    core: u32,
    code: u32,
) -> f64 {
    let code = Code::for_version(code);
    // The class counts' release (if any) is coded once, before the first answer: it lengthens
    // the transcript every level is taken on, like a fixed part of `ln(1/delta)`.
    let ln_inv_delta = -spec.delta.ln() + spec.counts_nats();
    let b = models(rule, spec);
    let mut past = Past::start(rule, spec.rows);
    past.models = b as u32;
    let count = count_fitting(
        |j| {
            let frac = if core >= 2 && b > 1 {
                ln_inv_mean_share(&spec.schedule, j.checked_mul(b)?.checked_add(1)?, b)?
            } else {
                spec.schedule
                    .ln_inv_fraction(j.checked_add(1)?.checked_mul(b)?)?
            };
            Some(ln_inv_delta + frac + code.worst_case_nats(rule, spec.rows, &past, j))
        },
        |level| half_width_fits(spec, rule, reference, level, core),
    );
    if count < u64::MAX / 4 {
        return count as f64;
    }
    // Code-free and open-ended: invert the series schedule in f64.
    let max_level = max_fitting_level_core(spec, rule, reference, core);
    let y = max_level - ln_inv_delta;
    // Largest i with i (i + 1) <= e^y.
    let i = (0.5 * y).exp() - 0.5;
    i.floor().max(count as f64)
}

/// The largest level (nats) whose half-width at `reference` is within the tolerance (current
/// core).
pub fn max_fitting_level(spec: &PlanSpec, rule: &Rule, reference: f64) -> f64 {
    max_fitting_level_core(spec, rule, reference, super::CORE)
}

fn max_fitting_level_core(spec: &PlanSpec, rule: &Rule, reference: f64, core: u32) -> f64 {
    let fits = |l: f64| half_width_fits(spec, rule, reference, l, core);
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    while fits(hi) {
        lo = hi;
        hi *= 2.0;
        if hi > 1e300 {
            return f64::INFINITY;
        }
    }
    for _ in 0..200 {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        if fits(mid) { lo = mid } else { hi = mid }
    }
    lo
}

/// The smallest `n` for which at least `queries` queries fit (worst case); `None` past 2^62.
pub fn rows_needed(spec: &PlanSpec, rule: &Rule, queries: u64) -> Option<u64> {
    let fits = |n: u64| {
        let s = PlanSpec {
            rows: n,
            ..spec.clone()
        };
        queries_that_fit(&s, rule, 0.5) >= queries as f64
    };
    let (mut lo, mut hi) = (0u64, 1u64); // !fits(lo) (n = 0 answers nothing), fits(hi) sought
    while !fits(hi) {
        lo = hi;
        hi = hi.checked_mul(2).filter(|h| *h <= 1 << 62)?;
    }
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if fits(mid) { hi = mid } else { lo = mid }
    }
    Some(hi)
}

/// A side-by-side table: queries that fit per rule (and at the expected error when given).
pub fn plan_table(spec: &PlanSpec, rules: &[Rule], expected_error: Option<f64>) -> Vec<PlanRow> {
    rules
        .iter()
        .map(|r| PlanRow {
            rule: r.to_string(),
            queries: Some(queries_that_fit(spec, r, 0.5)),
            queries_expected: expected_error.map(|p| queries_that_fit(spec, r, p)),
            rows: None,
        })
        .collect()
}

/// A table of rows needed per rule for `queries` queries.
pub fn rows_table(spec: &PlanSpec, rules: &[Rule], queries: u64) -> Vec<PlanRow> {
    rules
        .iter()
        .map(|r| PlanRow {
            rule: r.to_string(),
            queries: None,
            queries_expected: None,
            rows: rows_needed(spec, r, queries),
        })
        .collect()
}
