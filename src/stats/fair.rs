//! Fair service planning: which policies serve `T` teams `M` answers each within a tolerance,
//! and how many rows each would need.
//!
//! A policy here is an answer rule, a schedule and a way of splitting delta among teams
//! (`none`: one pool; `roster`: equal shares for the `T` declared teams, no reserve;
//! `on-arrival`: the `k`-th team gets `delta / (k (k+1))`), under a sharing assumption
//! (`shared`: one transcript; `isolated`: one per team, only with per-team shares). The teams
//! take turns (round robin: every team's first answer, then every team's second...), which is
//! the order that serves everyone best under one pool, and every answer costs its rule's
//! worst-case code, as in [`super::plan`]. Team `a`'s `j`-th answer (1-based) then gets level
//!
//! `ln(1/delta) + ln(1/w_a) + ln(1/s(i)) + L`
//!
//! with `w_a` the team's share of delta (1 under `none`), `s(i)` the schedule's share of the
//! pool's `i`-th query (`i = j` for a team's own pool, the global count under `none`), and `L`
//! the transcript before it: under `shared` the sum over teams of each team's worst-case code
//! of its answers so far (a bound on the shared transcript whether the rule codes per team or
//! across teams), under `isolated` the team's own. The answer fits while the half-width at the
//! reference score is within the tolerance; the level at which it stops fitting is found once
//! per row count ([`super::plan::max_fitting_level`]), so a plan is cheap.
//!
//! `served` is the number of answers every team is sure to get: the rounds completed before the
//! first answer that would be refused. A policy serves the teams when it is at least `M`.
//!
//! ```
//! use holdout_ledger::stats::fair::{FairSpec, FairPolicy, PoolSplit, served};
//! use holdout_ledger::stats::interval::Method;
//! let spec = FairSpec { rows: 20_000, delta: 0.05, tolerance: 0.05, method: Method::Exact,
//!     teams: 4, answers_each: 5 };
//! let one_pool = FairPolicy { rule: "rounded:0.01".parse().unwrap(),
//!     schedule: "series".parse().unwrap(), split: PoolSplit::None, isolated: false };
//! let own_pools = FairPolicy { isolated: true, split: PoolSplit::Roster, ..one_pool.clone() };
//! // Four teams sharing one transcript get fewer answers each than four isolated teams.
//! assert!(served(&spec, &one_pool, 0.5) < served(&spec, &own_pools, 0.5));
//! ```

use serde::Serialize;

use super::codes::{CODE, Code};
use super::interval::Method;
use super::plan::{PlanSpec, max_fitting_level};
use super::rules::{Past, Rule};
use super::schedule::Schedule;

/// What a fair plan depends on besides the policy.
#[derive(Debug, Clone, PartialEq)]
pub struct FairSpec {
    /// Rows `n`.
    pub rows: u64,
    /// Total budget.
    pub delta: f64,
    /// Widest acceptable half-width.
    pub tolerance: f64,
    /// Interval method.
    pub method: Method,
    /// Teams `T` (at least 1).
    pub teams: u64,
    /// Answers each team should get, `M` (at least 1).
    pub answers_each: u64,
}

/// How delta is split among the teams.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PoolSplit {
    /// One pool for everyone.
    None,
    /// Equal shares for the declared teams (no reserve).
    Roster,
    /// The `k`-th team to arrive gets `delta / (k (k+1))`.
    OnArrival,
}

impl std::fmt::Display for PoolSplit {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            PoolSplit::None => "none",
            PoolSplit::Roster => "roster",
            PoolSplit::OnArrival => "on-arrival",
        })
    }
}

/// One candidate policy.
#[derive(Debug, Clone, PartialEq)]
pub struct FairPolicy {
    /// Answer rule.
    pub rule: Rule,
    /// Schedule of each pool.
    pub schedule: Schedule,
    /// How delta is split among teams.
    pub split: PoolSplit,
    /// One transcript per team (`isolated`) or one for all (`shared`).
    pub isolated: bool,
}

/// One row of a fair plan.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FairRow {
    /// Answer rule.
    pub rule: String,
    /// Schedule.
    pub schedule: String,
    /// Shares: `none`, `roster` or `on-arrival`.
    pub shares: String,
    /// `shared` or `isolated`.
    pub sharing: String,
    /// Answers every team is sure to get, worst case (capped at `M`).
    pub served: u64,
    /// The same at the expected error.
    pub served_expected: Option<u64>,
    /// Whether every team gets `M` answers at worst case.
    pub serves: bool,
    /// Whether every team gets `M` answers at the expected error.
    pub serves_expected: Option<bool>,
    /// Rows needed for every team to get `M` answers at worst case (`None`: more than 2^40).
    pub rows_needed: Option<u64>,
}

/// The schedules a fair plan compares for `split`: `series`, and `even:K` over the answers
/// expected from the pool (`T M` for one pool, `M` for a team's own).
pub fn schedules(spec: &FairSpec, split: PoolSplit) -> Vec<Schedule> {
    let k = match split {
        PoolSplit::None => spec.teams.saturating_mul(spec.answers_each),
        _ => spec.answers_each,
    };
    vec![Schedule::Series, Schedule::Even { k: k.max(1) }]
}

/// `ln(1/w)` of team `a`'s (0-based) share of delta.
fn ln_inv_weight(split: PoolSplit, teams: u64, a: u64) -> f64 {
    match split {
        PoolSplit::None => 0.0,
        PoolSplit::Roster => (teams as f64).ln(),
        PoolSplit::OnArrival => ((a + 1) as f64).ln() + ((a + 2) as f64).ln(),
    }
}

/// Answers every team is sure to get (at most `M`) when every answer's level must stay at or
/// below `max_level`.
fn served_at(spec: &FairSpec, p: &FairPolicy, max_level: f64) -> u64 {
    let code = Code::for_version(CODE);
    let past = Past::start(&p.rule, spec.rows);
    let worst = |j: u64| code.worst_case_nats(&p.rule, spec.rows, &past, j);
    let ln_inv_delta = -spec.delta.ln();
    let teams = spec.teams.max(1);
    for r in 0..spec.answers_each {
        for a in 0..teams {
            let index = match p.split {
                PoolSplit::None => r * teams + a + 1,
                _ => r + 1,
            };
            let Some(frac) = p.schedule.ln_inv_fraction(index) else {
                return r;
            };
            let transcript = if p.isolated {
                worst(r)
            } else {
                // Teams before `a` in this round have answered `r + 1` times, the rest `r`.
                a as f64 * worst(r + 1) + (teams - a) as f64 * worst(r)
            };
            let level = ln_inv_delta + ln_inv_weight(p.split, teams, a) + frac + transcript;
            // (A NaN level never fits.)
            if level.is_nan() || level > max_level {
                return r;
            }
        }
    }
    spec.answers_each
}

/// Most answers a first team is assumed to take before the others start ([`first_comer`]).
pub const FIRST_COMER_CAP: u64 = 100_000;

/// What happens when the first team takes all it can before the others start: the answers it
/// gets alone (until its next would be refused, at most [`FIRST_COMER_CAP`]), and the answers
/// every later team is then sure to get (taking turns, at most `M`). Compared with
/// [`served`] (everyone taking turns from the start), a smaller second number means that the
/// first answers starve the later teams: under one pool they spend the shares, under `shared`
/// their codes lengthen everyone's transcript.
pub fn first_comer(spec: &FairSpec, p: &FairPolicy, reference: f64) -> (u64, u64) {
    let max_level = max_fitting_level(&plan_spec(spec, p, spec.rows), &p.rule, reference);
    let code = Code::for_version(CODE);
    let past = Past::start(&p.rule, spec.rows);
    let worst = |j: u64| code.worst_case_nats(&p.rule, spec.rows, &past, j);
    let ln_inv_delta = -spec.delta.ln();
    let teams = spec.teams.max(1);
    let fits = |a: u64, index: u64, transcript: f64| {
        p.schedule.ln_inv_fraction(index).is_some_and(|frac| {
            ln_inv_delta + ln_inv_weight(p.split, teams, a) + frac + transcript <= max_level
        })
    };
    let mut alone = 0;
    while alone < FIRST_COMER_CAP && fits(0, alone + 1, worst(alone)) {
        alone += 1;
    }
    if teams == 1 {
        return (alone, 0);
    }
    let others = teams - 1;
    for r in 0..spec.answers_each {
        for b in 1..teams {
            let index = match p.split {
                PoolSplit::None => alone + r * others + b,
                _ => r + 1,
            };
            let transcript = if p.isolated {
                worst(r)
            } else {
                worst(alone) + (b - 1) as f64 * worst(r + 1) + (teams - b) as f64 * worst(r)
            };
            if !fits(b, index, transcript) {
                return (alone, r);
            }
        }
    }
    (alone, spec.answers_each)
}

fn plan_spec(spec: &FairSpec, p: &FairPolicy, rows: u64) -> PlanSpec {
    PlanSpec {
        rows,
        delta: spec.delta,
        tolerance: spec.tolerance,
        schedule: p.schedule,
        method: spec.method,
        batch: 1,
        class_counts: None,
    }
}

/// Answers every team is sure to get (at most `M`) at reference score `reference` (1/2: the
/// worst case).
pub fn served(spec: &FairSpec, p: &FairPolicy, reference: f64) -> u64 {
    let max_level = max_fitting_level(&plan_spec(spec, p, spec.rows), &p.rule, reference);
    served_at(spec, p, max_level)
}

/// The smallest `n >= 2` for which every team gets `M` answers at worst case; `None` past
/// 2^40.
pub fn rows_needed(spec: &FairSpec, p: &FairPolicy) -> Option<u64> {
    let fits = |n: u64| {
        let s = FairSpec {
            rows: n,
            ..spec.clone()
        };
        served(&s, p, 0.5) >= spec.answers_each
    };
    // From 2 rows: at n = 1 a one-sided interval at the reference 1/2 is degenerate (the
    // single-pool plan reports every threshold answer fitting there).
    let (mut lo, mut hi) = (1u64, 2u64);
    while !fits(hi) {
        lo = hi;
        hi = hi.checked_mul(2).filter(|h| *h <= 1 << 40)?;
    }
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if fits(mid) { hi = mid } else { lo = mid }
    }
    Some(hi)
}

/// Every policy built from `rules`: each schedule of [`schedules`], one pool (`shared`), and
/// per-team pools (`roster`, `on-arrival`) under `shared` and `isolated`. Best-of rules are
/// left out (a batch is not one answer per team).
pub fn candidates(spec: &FairSpec, rules: &[Rule]) -> Vec<FairPolicy> {
    let mut out = Vec::new();
    for rule in rules.iter().filter(|r| !matches!(r, Rule::BestOf(_))) {
        for (split, isolated) in [
            (PoolSplit::None, false),
            (PoolSplit::Roster, false),
            (PoolSplit::Roster, true),
            (PoolSplit::OnArrival, false),
            (PoolSplit::OnArrival, true),
        ] {
            for schedule in schedules(spec, split) {
                out.push(FairPolicy {
                    rule: *rule,
                    schedule,
                    split,
                    isolated,
                });
            }
        }
    }
    out
}

/// The fair plan: one row per candidate policy, those that serve every team first (fewest
/// rows needed first), then the rest (most answers served first).
pub fn fair_table(spec: &FairSpec, rules: &[Rule], expected_error: Option<f64>) -> Vec<FairRow> {
    let mut rows: Vec<FairRow> = candidates(spec, rules)
        .into_iter()
        .map(|p| {
            let served_worst = served(spec, &p, 0.5);
            let served_expected = expected_error.map(|e| served(spec, &p, e));
            FairRow {
                rule: p.rule.to_string(),
                schedule: p.schedule.to_string(),
                shares: p.split.to_string(),
                sharing: if p.isolated { "isolated" } else { "shared" }.into(),
                served: served_worst,
                served_expected,
                serves: served_worst >= spec.answers_each,
                serves_expected: served_expected.map(|s| s >= spec.answers_each),
                rows_needed: rows_needed(spec, &p),
            }
        })
        .collect();
    rows.sort_by_key(|r| {
        (
            !r.serves,
            r.rows_needed.unwrap_or(u64::MAX),
            std::cmp::Reverse(r.served),
        )
    });
    rows
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(rows: u64, teams: u64, each: u64) -> FairSpec {
        FairSpec {
            rows,
            delta: 0.05,
            tolerance: 0.05,
            method: Method::Exact,
            teams,
            answers_each: each,
        }
    }

    fn policy(rule: &str, schedule: &str, split: PoolSplit, isolated: bool) -> FairPolicy {
        FairPolicy {
            rule: rule.parse().unwrap(),
            schedule: schedule.parse().unwrap(),
            split,
            isolated,
        }
    }

    /// One team under one pool is the single-pool plan: the answers that fit are
    /// `plan::queries_that_fit` (capped at M).
    #[test]
    fn one_team_one_pool_matches_the_plan() {
        for rule in ["rounded:0.01", "ladder:0.01", "threshold:0.2", "sealed"] {
            let s = spec(20_000, 1, 1_000);
            let p = policy(rule, "series", PoolSplit::None, false);
            let plan =
                crate::stats::plan::queries_that_fit(&plan_spec(&s, &p, s.rows), &p.rule, 0.5);
            assert_eq!(served(&s, &p, 0.5) as f64, plan.min(1_000.0), "{rule}");
        }
    }

    /// More teams on one shared pool get fewer answers each; an even schedule over exactly the
    /// expected answers refuses the one after them.
    #[test]
    fn teams_share_what_one_pool_affords() {
        let p = policy("rounded:0.01", "series", PoolSplit::None, false);
        let one = served(&spec(20_000, 1, 1_000), &p, 0.5);
        let four = served(&spec(20_000, 4, 1_000), &p, 0.5);
        assert!(four < one && four >= 1, "{one} {four}");
        // even:K over K = T M = 8 entries: never more than 2 each.
        let s = spec(200_000, 4, 2);
        let even = policy("sealed", "even:8", PoolSplit::None, false);
        assert_eq!(served(&s, &even, 0.5), 2);
        let s3 = spec(200_000, 4, 3);
        assert_eq!(served(&s3, &even, 0.5), 2);
    }

    /// Rows needed is the smallest n that serves: n serves, n - 1 does not.
    #[test]
    fn rows_needed_is_the_smallest_that_serves() {
        let s = spec(1_000, 5, 3);
        let p = policy("ladder:0.01", "series", PoolSplit::Roster, true);
        let n = rows_needed(&s, &p).unwrap();
        let at = |rows| served(&FairSpec { rows, ..s.clone() }, &p, 0.5);
        assert!(at(n) >= 3 && at(n - 1) < 3, "{n}");
    }

    /// Under one shared pool a first team that takes all it can leaves the others less than
    /// taking turns would; with isolated per-team pools it takes nothing from them.
    #[test]
    fn a_first_comer_starves_a_shared_pool_and_not_isolated_ones() {
        let s = spec(20_000, 4, 3);
        let shared = policy("rounded:0.01", "series", PoolSplit::None, false);
        let (alone, after) = first_comer(&s, &shared, 0.5);
        let turns = served(&s, &shared, 0.5);
        assert!(alone > turns && after < turns, "{alone} {after} {turns}");
        let own = policy("rounded:0.01", "series", PoolSplit::Roster, true);
        let (alone, after) = first_comer(&s, &own, 0.5);
        assert_eq!(after, served(&s, &own, 0.5), "{alone}");
    }

    /// The table puts the policies that serve first, and at the expected error no fewer
    /// answers are served than at worst case.
    #[test]
    fn the_table_lists_serving_policies_first() {
        let s = spec(5_000, 5, 2);
        let rules: Vec<Rule> = ["rounded:0.01", "ladder:0.01", "threshold:0.2", "sealed"]
            .iter()
            .map(|r| r.parse().unwrap())
            .collect();
        let t = fair_table(&s, &rules, Some(0.1));
        assert_eq!(t.len(), 4 * 5 * 2);
        let first_not = t.iter().position(|r| !r.serves).unwrap_or(t.len());
        assert!(t[first_not..].iter().all(|r| !r.serves));
        assert!(t.iter().any(|r| r.serves) && t.iter().any(|r| !r.serves));
        for r in &t {
            assert!(r.served_expected.unwrap() >= r.served, "{r:?}");
        }
    }
}
