//! The accountant: the one function the daemon and the offline audit both call, so that a
//! replay of the ledger recomputes exactly what was answered (DESIGN 4, 5).
//!
//! Protocol, per query:
//! 1. [`Accountant::quote`] decides from public facts only (counts, earlier symbols, the
//!    policy; never the score being answered) whether to refuse, and otherwise returns the
//!    [`Charge`]: schedule index, `delta_i`, `level_nats = ln(1/delta_i) + L`, the reference
//!    half-width. Nothing changes yet.
//! 2. The caller scores the submission, then [`Accountant::answer`] with the exact
//!    [`Outcome`]s: symbol, interval (from the symbol only), code; the transcript advances.
//!    Under the `sealed` rule, [`Accountant::seal`] takes the share instead, and
//!    [`Accountant::close_round`] releases every sealed model at once.
//!
//! Pools. With `shares: none` every analyst draws on one pool (global schedule index). With
//! roster or on-arrival shares each analyst has a pool `delta_a` and their own schedule index.
//! The transcript cost `L` is global under `shared` sharing and per analyst under `isolated`,
//! where nothing an analyst sees depends on other analysts' queries.
//!
//! Determinism: the same policy and the same sequence of calls give bit-identical results on
//! the same build and platform (f64 `ln`/`exp` come from the platform's math library).
//!
//! ```
//! use holdout_ledger::stats::accounting::{Accountant, Outcome, QueryRequest};
//! use holdout_ledger::stats::policy::Policy;
//! let policy: Policy = serde_json::from_str(r#"{"delta": 0.05, "schedule": "series",
//!     "rule": "rounded:0.01", "tolerance": 0.05, "rows": 10000,
//!     "targets": [{"name": "y", "binary": true, "method": "exact"}]}"#).unwrap();
//! let mut acc = Accountant::new(policy).unwrap();
//! let req = QueryRequest { analyst: "team-a".into(), target: 0, models: 1 };
//! let charge = acc.quote(&req).unwrap();
//! // First query: delta_1 = 0.05 / 2, level ln(40) with no transcript yet.
//! assert!((charge.level_nats - 40f64.ln()).abs() < 1e-12);
//! let ans = acc.answer(&req, &charge, &[Outcome::Errors(1234)]).unwrap();
//! assert_eq!(ans.released_score, Some(0.12));
//! assert!((ans.code_nats - 101f64.ln()).abs() < 1e-12); // uniform over 101 cells
//! assert!(ans.interval.contains(0.1234));
//! ```

use std::collections::BTreeMap;

use super::codes::{Code, composition_nats};
use super::interval::{Interval, Method, Sides, errors_interval, mean_interval};
use super::interval::{
    Rounding, errors_interval_with, mean_interval_with, reference_half_width_with,
};
use super::policy::{Policy, Sharing, ToleranceReference};
use super::rules::{KtCounts, Past, Rule, Symbol, cutoff_errors, cutoff_mean};
use super::schedule::Shares;

mod forecast;
mod types;

pub(crate) use forecast::{count_fitting, ln_inv_mean_share};
pub use types::{
    AccountingError, Answer, Charge, CountsRelease, Cutoff, Outcome, QueryRequest, Refusal,
    SealedReceipt, Status, TargetStatus,
};

#[derive(Debug, Clone, Default)]
struct Transcript {
    nats: f64,
    answers: u64,
    threshold: Vec<KtCounts>,
    /// Class counts released in this transcript, by (target, slice; `""` for every row): public
    /// to whoever sees the transcript from their release on.
    counts: BTreeMap<(usize, String), Vec<u64>>,
}

impl Transcript {
    fn kt(&self, target: usize) -> KtCounts {
        self.threshold.get(target).copied().unwrap_or_default()
    }
}

#[derive(Debug, Clone)]
struct AnalystState {
    /// `ln(1/w_a)`: `None` with one pool.
    ln_inv_weight: Option<f64>,
    queries: u64,
    spent: f64,
    transcript: Transcript,
    ladder: Vec<KtCounts>,
    best_cell: Vec<u64>,
    last_value: Vec<Option<f64>>,
    /// Per target, the last cell released to this analyst (rounded answers): the public past
    /// version 2's rounded code is relative to ([`crate::stats::codes`]).
    last_cell: Vec<Option<u64>>,
    /// Models in this analyst's last batch (1 before any): core 2 forecasts with it.
    last_models: u32,
    /// Ladder, per target: the largest level (nats) of a file adopted from another team's
    /// answer (0 when none); core 2 reports this analyst's ladder intervals at no smaller nats.
    adopted_nats: Vec<f64>,
}

/// The accounting state of one holdout. See the module documentation for the protocol.
#[derive(Debug, Clone)]
pub struct Accountant {
    policy: Policy,
    ln_inv_delta: f64,
    sequence: u64,
    pool_queries: u64,
    spent: f64,
    arrivals: u64,
    transcript: Transcript,
    analysts: BTreeMap<String, AnalystState>,
    pending: Vec<SealedReceipt>,
    /// Per target, the largest level whose half-width at the worst-case reference (1/2) is
    /// within the tolerance; empty unless the policy judges the tolerance at the worst case.
    /// Forecasts compare levels with it instead of inverting a Beta per candidate.
    fit_level: Vec<f64>,
    /// The last reference half-width computed, by (target, reference bits, level bits).
    last_half_width: std::cell::Cell<Option<HalfWidthMemo>>,
    /// Core 2: the last judged (reported) half-width computed, same key.
    last_judged: std::cell::Cell<Option<HalfWidthMemo>>,
    /// Core 2 threshold: the last cutoff computed, by (target, level bits).
    last_cutoff: std::cell::Cell<Option<((usize, u64), Cutoff)>>,
    /// Interval evaluations made to decide threshold answers (see
    /// [`Accountant::threshold_evaluations`]).
    threshold_evaluations: std::cell::Cell<u64>,
    /// The last analyst status computed ([`Accountant::status`]), by (sequence, analyst).
    /// An answer computes it for the numbers it releases, and the budget shown with the same
    /// answer asks for it again; every change of state forgets it ([`Accountant::changed`]).
    last_status: std::cell::RefCell<Option<StatusMemo>>,
}

/// One pool's public facts, gathered for a quote or a forecast.
struct PoolView<'a> {
    ln_inv_weight: f64,
    used: u64,
    transcript: &'a Transcript,
    past_ladder: KtCounts,
    best_cell: u64,
    last_value: Option<f64>,
    last_cell: Option<u64>,
}

impl Accountant {
    /// A fresh accountant; validates the policy.
    pub fn new(policy: Policy) -> Result<Accountant, AccountingError> {
        policy.validate()?;
        let targets = policy.targets.len();
        let mut acc = Accountant {
            ln_inv_delta: -policy.delta.ln(),
            sequence: 0,
            pool_queries: 0,
            spent: 0.0,
            arrivals: 0,
            transcript: Transcript {
                threshold: vec![KtCounts::default(); targets],
                ..Transcript::default()
            },
            analysts: BTreeMap::new(),
            pending: Vec::new(),
            fit_level: Vec::new(),
            last_half_width: std::cell::Cell::new(None),
            last_judged: std::cell::Cell::new(None),
            last_cutoff: std::cell::Cell::new(None),
            threshold_evaluations: std::cell::Cell::new(0),
            last_status: std::cell::RefCell::new(None),
            policy,
        };
        if acc.policy.tolerance_reference == ToleranceReference::WorstCase {
            acc.fit_level = (0..targets).map(|t| acc.max_fit_level(t, 0.5)).collect();
        }
        Ok(acc)
    }

    /// The largest level (nats) whose half-width at `reference` is within the tolerance, to the
    /// last representable bit: `+inf` when every level fits, `-inf` when none does. Half-widths
    /// grow with the level, so `level <= max_fit_level` decides the same as comparing the
    /// half-width with the tolerance.
    fn max_fit_level(&self, target: usize, reference: f64) -> f64 {
        let fits = |l: f64| self.judged_half_width(target, reference, l) <= self.policy.tolerance;
        let mut lo = f64::MIN_POSITIVE;
        if !fits(lo) {
            return f64::NEG_INFINITY;
        }
        let mut hi = 1.0f64;
        while fits(hi) {
            lo = hi;
            hi *= 2.0;
            if hi > 1e300 {
                return f64::INFINITY;
            }
        }
        loop {
            let mid = lo + 0.5 * (hi - lo);
            if mid <= lo || mid >= hi {
                return lo;
            }
            if fits(mid) {
                lo = mid;
            } else {
                hi = mid;
            }
        }
    }

    /// The policy.
    pub fn policy(&self) -> &Policy {
        &self.policy
    }

    /// Sealed submissions waiting for the close.
    pub fn pending(&self) -> &[SealedReceipt] {
        &self.pending
    }

    fn per_analyst_pool(&self) -> bool {
        self.policy.shares != Shares::None
    }

    fn new_analyst_weight(&self, analyst: &str) -> Option<f64> {
        let shares = &self.policy.shares;
        let on_roster = shares.on_roster(analyst);
        shares.ln_inv_weight(on_roster, if on_roster { 0 } else { self.arrivals + 1 })
    }

    fn fresh_analyst(&self, ln_inv_weight: Option<f64>) -> AnalystState {
        let t = self.policy.targets.len();
        let start = Past::start(&self.policy.rule, self.policy.rows);
        AnalystState {
            ln_inv_weight,
            queries: 0,
            spent: 0.0,
            transcript: Transcript {
                threshold: vec![KtCounts::default(); t],
                ..Transcript::default()
            },
            ladder: vec![KtCounts::default(); t],
            best_cell: vec![start.best_cell; t],
            last_value: vec![None; t],
            last_cell: vec![None; t],
            last_models: 1,
            adopted_nats: vec![0.0; t],
        }
    }

    /// The holdout's answer codes (its policy's code version).
    fn code(&self) -> Code {
        Code::for_version(self.policy.code_version)
    }

    /// Whether this holdout uses core 2's rules (issue 10: threshold by cutoff, tolerance on
    /// the reported interval, best-of at the mean share, adopted ladder files).
    fn core2(&self) -> bool {
        self.policy.core_version >= 2
    }

    /// The pool of `analyst` as the next query would see it; `Err` if it has no share.
    fn view(&self, analyst: &str, target: usize) -> Result<PoolView<'_>, Refusal> {
        let fresh;
        let state = match self.analysts.get(analyst) {
            Some(s) => s,
            None => {
                let w = if self.per_analyst_pool() {
                    Some(
                        self.new_analyst_weight(analyst)
                            .ok_or_else(|| Refusal::NoShare {
                                analyst: analyst.to_string(),
                            })?,
                    )
                } else {
                    None
                };
                fresh = self.fresh_analyst(w);
                &fresh
            }
        };
        let isolated = self.policy.sharing == Sharing::Isolated;
        let view = PoolView {
            ln_inv_weight: state.ln_inv_weight.unwrap_or(0.0),
            used: if self.per_analyst_pool() {
                state.queries
            } else {
                self.pool_queries
            },
            transcript: if isolated {
                // Borrow from the stored state when present; a fresh analyst has an empty one.
                self.analysts
                    .get(analyst)
                    .map_or(&EMPTY_TRANSCRIPT, |s| &s.transcript)
            } else {
                &self.transcript
            },
            past_ladder: state.ladder[target],
            best_cell: state.best_cell[target],
            last_value: state.last_value[target],
            last_cell: state.last_cell[target],
        };
        Ok(view)
    }

    fn reference_mean(&self, view: &PoolView<'_>) -> f64 {
        match self.policy.tolerance_reference {
            ToleranceReference::WorstCase => 0.5,
            ToleranceReference::LastReleased => view.last_value.unwrap_or(0.5),
        }
    }

    fn half_width(&self, target: usize, reference: f64, level_nats: f64) -> f64 {
        // The next query's half-width is asked for by the previous answer's forecast, by
        // status, and by the next quote, all at the same level: remember the last one (a pure
        // function of its key, so the cache cannot change any result).
        let key = (target, reference.to_bits(), level_nats.to_bits());
        if let Some((k, h)) = self.last_half_width.get()
            && k == key
        {
            return h;
        }
        let t = &self.policy.targets[target];
        let method = effective_method(t.binary, t.method);
        let h = reference_half_width_with(
            Rounding::for_core(self.policy.core_version),
            method,
            self.policy.rows,
            reference,
            level_nats,
            self.policy.rule.sides(),
        )
        .unwrap_or(f64::INFINITY);
        self.last_half_width.set(Some((key, h)));
        h
    }

    /// The half-width the tolerance is judged on. Core 1: the one-count interval at the
    /// reference score. Core 2: the interval that will be reported (for grid rules, the widest
    /// cell under the worst-case reference, else the cell holding the reference score;
    /// [`Rule::reported_half_width`]).
    fn judged_half_width(&self, target: usize, reference: f64, level_nats: f64) -> f64 {
        if !self.core2() {
            return self.half_width(target, reference, level_nats);
        }
        let key = (target, reference.to_bits(), level_nats.to_bits());
        if let Some((k, h)) = self.last_judged.get()
            && k == key
        {
            return h;
        }
        let t = &self.policy.targets[target];
        let reference = match self.policy.tolerance_reference {
            ToleranceReference::WorstCase => None,
            ToleranceReference::LastReleased => Some(reference),
        };
        let h = self.policy.rule.reported_half_width(
            self.policy.rows,
            t.binary,
            effective_method(t.binary, t.method),
            reference,
            level_nats,
            Rounding::for_core(self.policy.core_version),
        );
        self.last_judged.set(Some((key, h)));
        h
    }

    /// Core 2 threshold rule: the cutoff for `target` at `level_nats` (DESIGN 4.8), computed
    /// from the public level alone by bisection and remembered for the level; `None` for
    /// another rule. A quote computes it, so the answer that follows only compares.
    pub fn threshold_cutoff(&self, target: usize, level_nats: f64) -> Option<Cutoff> {
        let Rule::Threshold { tau } = self.policy.rule else {
            return None;
        };
        let t = self.policy.targets.get(target)?;
        let key = (target, level_nats.to_bits());
        if let Some((k, c)) = self.last_cutoff.get()
            && k == key
        {
            return Some(c);
        }
        let n = self.policy.rows;
        let method = effective_method(t.binary, t.method);
        let evals = &self.threshold_evaluations;
        let rounding = Rounding::for_core(self.policy.core_version);
        let cutoff = if t.binary {
            Cutoff::Errors(cutoff_errors(n, tau, |k| {
                evals.set(evals.get() + 1);
                errors_interval_with(rounding, method, n, k, level_nats, Sides::Upper)
                    .map_or(1.0, |ci| ci.upper)
            }))
        } else {
            Cutoff::Mean(cutoff_mean(tau, |m| {
                evals.set(evals.get() + 1);
                mean_interval_with(rounding, method, n, m, level_nats, Sides::Upper)
                    .map_or(1.0, |ci| ci.upper)
            }))
        };
        self.last_cutoff.set(Some((key, cutoff)));
        Some(cutoff)
    }

    /// How many one-sided limits this accountant has evaluated to decide threshold answers
    /// (all of them inside [`Accountant::threshold_cutoff`], at counts chosen from the public
    /// level): a test can check that answering evaluates none at the exact score.
    pub fn threshold_evaluations(&self) -> u64 {
        self.threshold_evaluations.get()
    }

    /// Decides whether the query is answered and at what charge; changes nothing.
    pub fn quote(&self, req: &QueryRequest) -> Result<Charge, Refusal> {
        let policy = &self.policy;
        if req.target >= policy.targets.len() {
            return Err(Refusal::BadRequest(format!(
                "target {} does not exist (the holdout has {})",
                req.target,
                policy.targets.len()
            )));
        }
        if req.models == 0 {
            return Err(Refusal::BadRequest(
                "a query needs at least one model".into(),
            ));
        }
        if req.models > 1 && !matches!(policy.rule, Rule::BestOf(_)) {
            return Err(Refusal::BadRequest(format!(
                "batches of models are answered only under best-of; this holdout's rule is {}",
                policy.rule
            )));
        }
        let view = self.view(&req.analyst, req.target)?;
        let base = self.ln_inv_delta + view.ln_inv_weight;
        let mut delta_charged = 0.0;
        let mut ln_inv_last = 0.0;
        for b in 0..u64::from(req.models) {
            let frac = policy.schedule.ln_inv_fraction(view.used + 1 + b).ok_or(
                Refusal::ScheduleExhausted {
                    answered: view.used,
                },
            )?;
            ln_inv_last = base + frac;
            delta_charged += (-ln_inv_last).exp();
        }
        if self.core2() && req.models > 1 {
            // Best-of (DESIGN 4.8): the winner is picked by the data, so the batch is reported
            // at the mean of its B shares: a union over the B models at that level costs
            // exactly the B shares charged. Core 1 reported at the smallest share.
            let first = view.used + 1;
            ln_inv_last = base
                + ln_inv_mean_share(&policy.schedule, first, u64::from(req.models)).ok_or(
                    Refusal::ScheduleExhausted {
                        answered: view.used,
                    },
                )?;
        }
        // Class counts not yet released in this transcript are released just before this
        // answer (Accountant::release_counts), so its level already includes their code.
        let transcript_nats = view.transcript.nats + self.counts_due(view.transcript, req.target);
        let level_nats = ln_inv_last + transcript_nats;
        let reference = self.reference_mean(&view);
        let h = self.judged_half_width(req.target, reference, level_nats);
        if h > policy.tolerance {
            return Err(Refusal::ToleranceExceeded {
                half_width: h,
                tolerance: policy.tolerance,
            });
        }
        if self.core2() {
            // Threshold: fix the cutoff now, from the public level; the answer only compares.
            let _ = self.threshold_cutoff(req.target, level_nats);
        }
        Ok(Charge {
            sequence: self.sequence,
            request: req.clone(),
            query_number: view.used + 1,
            shares: req.models,
            delta_i: (-ln_inv_last).exp(),
            ln_inv_delta_i: ln_inv_last,
            level_nats,
            transcript_nats,
            delta_charged,
            reference_half_width: h,
        })
    }

    fn check_charge(&self, req: &QueryRequest, charge: &Charge) -> Result<(), AccountingError> {
        if charge.sequence != self.sequence || &charge.request != req {
            return Err(AccountingError::StaleCharge);
        }
        Ok(())
    }

    fn check_outcomes(
        &self,
        req: &QueryRequest,
        outcomes: &[Outcome],
    ) -> Result<(), AccountingError> {
        if outcomes.len() != req.models as usize {
            return Err(AccountingError::BadOutcome(format!(
                "{} outcomes for {} models",
                outcomes.len(),
                req.models
            )));
        }
        let n = self.policy.rows;
        let binary = self.policy.targets[req.target].binary;
        for o in outcomes {
            match (*o, binary) {
                (Outcome::Errors(k), true) if k <= n => {}
                (Outcome::LossSum(s), false) if (0.0..=n as f64).contains(&s) => {}
                _ => {
                    return Err(AccountingError::BadOutcome(format!(
                        "{o:?} does not fit a {} target of {n} rows",
                        if binary { "0-1 loss" } else { "bounded loss" }
                    )));
                }
            }
        }
        Ok(())
    }

    /// Forgets what was remembered of the state (the last status): called by every method
    /// that changes the state, before it changes anything. The other memos are keyed by
    /// everything their values depend on and need no forgetting.
    fn changed(&mut self) {
        *self.last_status.get_mut() = None;
    }

    /// Registers `analyst` if new (an arrival, under on-arrival shares).
    fn register(&mut self, analyst: &str) {
        self.changed();
        if !self.analysts.contains_key(analyst) {
            let w = if self.per_analyst_pool() {
                if !self.policy.shares.on_roster(analyst) {
                    self.arrivals += 1;
                }
                let on_roster = self.policy.shares.on_roster(analyst);
                self.policy
                    .shares
                    .ln_inv_weight(on_roster, if on_roster { 0 } else { self.arrivals })
            } else {
                None
            };
            let fresh = self.fresh_analyst(w);
            self.analysts.insert(analyst.to_string(), fresh);
        }
    }

    /// Takes the charge's shares and registers a new analyst; returns the analyst's state.
    fn take_shares(&mut self, charge: &Charge) -> &mut AnalystState {
        self.changed();
        let analyst = &charge.request.analyst;
        self.register(analyst);
        self.sequence += 1;
        self.pool_queries += u64::from(charge.shares);
        self.spent += charge.delta_charged;
        let state = self.analysts.get_mut(analyst).expect("inserted above");
        state.queries += u64::from(charge.shares);
        state.spent += charge.delta_charged;
        state.last_models = charge.shares;
        state
    }

    /// Answers a quoted query from the exact outcomes (one per model): computes the symbol,
    /// the interval from the symbol alone, the code, and advances the transcript.
    pub fn answer(
        &mut self,
        req: &QueryRequest,
        charge: &Charge,
        outcomes: &[Outcome],
    ) -> Result<Answer, AccountingError> {
        self.changed();
        self.check_charge(req, charge)?;
        if matches!(self.policy.rule, Rule::Sealed(_)) {
            return Err(AccountingError::WrongRule(
                "the sealed rule answers at close_round; use seal",
            ));
        }
        self.check_outcomes(req, outcomes)?;
        let view = self
            .view(&req.analyst, req.target)
            .map_err(|_| AccountingError::StaleCharge)?;
        if self.counts_due(view.transcript, req.target) > 0.0 {
            return Err(AccountingError::BadOutcome(format!(
                "the class counts of target '{}' must be released before its first answer",
                self.policy.targets[req.target].name
            )));
        }
        let past = Past {
            threshold: view.transcript.kt(req.target),
            ladder: view.past_ladder,
            best_cell: view.best_cell,
            models: req.models,
            last_cell: view.last_cell,
        };
        let symbol = self.symbol(req.target, charge.level_nats, &past, outcomes);
        let rule = self.policy.rule;
        let rows = self.policy.rows;
        let code = self.code().nats(&rule, rows, &past, &symbol);
        debug_assert!(code.is_finite(), "released symbol {symbol:?} has p = 0");
        // A ladder that adopted another team's answered file reports at a level no larger than
        // the one that file was answered at (DESIGN 4.8); 0 (no effect) without an adoption,
        // and always under core 1, which never adopts.
        let level = charge
            .level_nats
            .max(view_adopted_nats(self, &req.analyst, req.target));
        let (interval, released) = self.interval_of(req.target, &symbol, &past, level);
        let isolated = self.policy.sharing == Sharing::Isolated;
        let target = req.target;
        let state = self.take_shares(charge);
        match symbol {
            Symbol::NoImprovement => state.ladder[target].record(false),
            Symbol::NewBest { cell } => {
                state.ladder[target].record(true);
                state.best_cell[target] = cell;
            }
            Symbol::Cell { index } => state.last_cell[target] = Some(index),
            _ => {}
        }
        if released.is_some() {
            state.last_value[target] = released;
        }
        let transcript = if isolated {
            &mut state.transcript
        } else {
            &mut self.transcript
        };
        transcript.nats += code;
        transcript.answers += 1;
        match symbol {
            Symbol::Pass => transcript.threshold[target].record(true),
            Symbol::Fail => transcript.threshold[target].record(false),
            _ => {}
        }
        Ok(self.finish(req, charge, symbol, released, interval, code, level))
    }

    /// The code a release of class counts of `target` would add to `transcript` now: 0 when
    /// the target needs no counts or they were released in it already.
    fn counts_due(&self, transcript: &Transcript, target: usize) -> f64 {
        match self.policy.targets.get(target).and_then(|t| t.class_counts) {
            Some(classes) if !transcript.counts.contains_key(&(target, String::new())) => {
                composition_nats(self.policy.rows, classes)
            }
            _ => 0.0,
        }
    }

    /// The nats a release of `target`'s class counts would cost before `analyst`'s next answer
    /// on it (DESIGN 4.8): `None` when the target needs no counts, when they were released in
    /// the analyst's transcript already (the holdout's under `shared`, the analyst's own under
    /// `isolated`), or when the analyst has no share. Public facts only: the cost is
    /// `ln C(n + C - 1, C - 1)`, whatever the counts.
    pub fn counts_pending(&self, analyst: &str, target: usize) -> Option<f64> {
        let view = self.view(analyst, target).ok()?;
        let due = self.counts_due(view.transcript, target);
        (due > 0.0).then_some(due)
    }

    /// The class counts of `target` released in `analyst`'s transcript (the holdout's under
    /// `shared`), once they are: the per-class metrics' intervals and refusals may use them from
    /// then on, and nothing may before (DESIGN 4.2 rule 7).
    pub fn released_counts(&self, analyst: &str, target: usize) -> Option<&[u64]> {
        let transcript = if self.policy.sharing == Sharing::Isolated {
            &self.analysts.get(analyst)?.transcript
        } else {
            &self.transcript
        };
        transcript
            .counts
            .get(&(target, String::new()))
            .map(Vec::as_slice)
    }

    /// Releases the class counts of `target` (one per declared class, summing to the rows) to
    /// `analyst`'s transcript: the symbol is the count vector, coded uniformly over the
    /// compositions ([`composition_nats`]), and its code is added to the transcript like any
    /// answer's, so every later level pays for it. Takes no share of delta (the counts are
    /// exact facts, not an estimate with a failure event). Made once per transcript, at the
    /// first query that needs the counts and is not refused; the quote of that query already
    /// includes the code, and [`Accountant::answer`] refuses to answer it before the release.
    pub fn release_counts(
        &mut self,
        analyst: &str,
        target: usize,
        counts: &[u64],
    ) -> Result<CountsRelease, AccountingError> {
        let Some(classes) = self.policy.targets.get(target).and_then(|t| t.class_counts) else {
            return Err(AccountingError::BadOutcome(format!(
                "target {target} needs no class counts"
            )));
        };
        if counts.len() != classes as usize
            || counts.iter().try_fold(0u64, |a, c| a.checked_add(*c)) != Some(self.policy.rows)
        {
            return Err(AccountingError::BadOutcome(format!(
                "{} class counts summing to {:?} do not fit {classes} classes over {} rows",
                counts.len(),
                counts.iter().try_fold(0u64, |a, c| a.checked_add(*c)),
                self.policy.rows
            )));
        }
        let due = self.counts_pending(analyst, target).ok_or_else(|| {
            AccountingError::BadOutcome(format!(
                "the class counts of target {target} are not due for '{analyst}' (released \
                 already, or no share)"
            ))
        })?;
        self.changed();
        self.sequence += 1;
        let transcript = if self.policy.sharing == Sharing::Isolated {
            self.register(analyst);
            &mut self
                .analysts
                .get_mut(analyst)
                .expect("registered above")
                .transcript
        } else {
            &mut self.transcript
        };
        transcript.nats += due;
        transcript
            .counts
            .insert((target, String::new()), counts.to_vec());
        Ok(CountsRelease {
            code_nats: due,
            transcript_nats: transcript.nats,
        })
    }

    /// Core 2, ladder under `shared`: whether a file already answered for another team with
    /// `NewBest { cell }` fixes `analyst`'s answer (its cell is at least one grid step below
    /// the analyst's best), so that it may update the analyst's ladder at no charge.
    pub fn can_adopt(&self, analyst: &str, target: usize, cell: u64) -> bool {
        self.core2()
            && matches!(self.policy.rule, Rule::Ladder(_))
            && self.policy.sharing == Sharing::Shared
            && target < self.policy.targets.len()
            && self.view(analyst, target).is_ok_and(|v| cell < v.best_cell)
    }

    /// Adopts a file answered for another team as `analyst`'s new best at no charge (DESIGN
    /// 4.8, replayed files on a ladder): the symbol was public, and it fixes the analyst's
    /// answer ([`Accountant::can_adopt`]). Nothing is charged and nothing is coded; the
    /// interval is the cell's at `level_nats`, the level the file was answered at, and the
    /// analyst's later ladder intervals use no smaller nats.
    pub fn adopt(
        &mut self,
        analyst: &str,
        target: usize,
        cell: u64,
        level_nats: f64,
    ) -> Result<Answer, AccountingError> {
        self.changed();
        if !self.can_adopt(analyst, target, cell) {
            return Err(AccountingError::WrongRule(
                "only a ladder under shared sharing (core 2) adopts, and only a cell below the \
                 analyst's best",
            ));
        }
        if !(level_nats.is_finite() && level_nats > 0.0) {
            return Err(AccountingError::BadOutcome(format!(
                "an adopted file's level must be a positive number of nats, got {level_nats}"
            )));
        }
        let symbol = Symbol::NewBest { cell };
        let past = Past::start(&self.policy.rule, self.policy.rows);
        let (interval, released) = self.interval_of(target, &symbol, &past, level_nats);
        self.register(analyst);
        self.sequence += 1;
        let state = self.analysts.get_mut(analyst).expect("registered above");
        state.best_cell[target] = cell;
        state.last_value[target] = released;
        state.adopted_nats[target] = state.adopted_nats[target].max(level_nats);
        let req = QueryRequest {
            analyst: analyst.to_string(),
            target,
            models: 1,
        };
        let charge = Charge {
            sequence: self.sequence,
            request: req.clone(),
            query_number: 0,
            shares: 0,
            delta_i: 0.0,
            ln_inv_delta_i: 0.0,
            level_nats,
            transcript_nats: 0.0,
            delta_charged: 0.0,
            reference_half_width: 0.0,
        };
        Ok(self.finish(&req, &charge, symbol, released, interval, 0.0, level_nats))
    }

    #[allow(clippy::too_many_arguments)]
    fn finish(
        &self,
        req: &QueryRequest,
        charge: &Charge,
        symbol: Symbol,
        released_score: Option<f64>,
        interval: Interval,
        code_nats: f64,
        level_nats: f64,
    ) -> Answer {
        let status = self.status(Some(&req.analyst));
        let t = &status.targets[req.target];
        Answer {
            statement: symbol.statement(&self.policy.rule, self.policy.rows),
            symbol,
            released_score,
            interval,
            query_number: charge.query_number,
            delta_i: charge.delta_i,
            level_nats,
            code_nats,
            spent: status.spent,
            remaining: status.remaining,
            transcript_nats: status.transcript_nats,
            next_half_width: t.next_half_width.unwrap_or(f64::INFINITY),
            queries_left: t.queries_left,
        }
    }

    fn mean_of(&self, o: &Outcome) -> f64 {
        let n = self.policy.rows as f64;
        match *o {
            Outcome::Errors(k) => k as f64 / n,
            Outcome::LossSum(s) => s / n,
        }
    }

    fn cell_of(&self, o: &Outcome) -> u64 {
        let grid = self.policy.rule.grid(self.policy.rows).expect("grid rule");
        match *o {
            Outcome::Errors(k) => grid.cell_of_errors(self.policy.rows, k),
            Outcome::LossSum(_) => grid.cell_of_mean(self.mean_of(o)),
        }
    }

    fn symbol(&self, target: usize, level_nats: f64, past: &Past, outcomes: &[Outcome]) -> Symbol {
        match self.policy.rule {
            Rule::Rounded(_) | Rule::Sealed(_) => Symbol::Cell {
                index: self.cell_of(&outcomes[0]),
            },
            Rule::Threshold { .. } if self.core2() => {
                // Threshold by cutoff: one comparison with a boundary computed from the public
                // level alone (cached by the quote), so the work does not depend on the score.
                let cutoff = self
                    .threshold_cutoff(target, level_nats)
                    .expect("threshold rule");
                if cutoff.passes(&outcomes[0], self.policy.rows) {
                    Symbol::Pass
                } else {
                    Symbol::Fail
                }
            }
            Rule::Threshold { tau } => {
                let t = &self.policy.targets[target];
                let n = self.policy.rows;
                let method = effective_method(t.binary, t.method);
                let upper = match outcomes[0] {
                    Outcome::Errors(k) => errors_interval(method, n, k, level_nats, Sides::Upper),
                    Outcome::LossSum(_) => mean_interval(
                        method,
                        n,
                        self.mean_of(&outcomes[0]),
                        level_nats,
                        Sides::Upper,
                    ),
                }
                .map_or(1.0, |ci| ci.upper);
                if upper <= tau {
                    Symbol::Pass
                } else {
                    Symbol::Fail
                }
            }
            Rule::Ladder(_) => {
                let cell = self.cell_of(&outcomes[0]);
                if cell < past.best_cell {
                    Symbol::NewBest { cell }
                } else {
                    Symbol::NoImprovement
                }
            }
            Rule::BestOf(_) => {
                let key = |o: &Outcome| match *o {
                    Outcome::Errors(k) => k as f64,
                    Outcome::LossSum(s) => s,
                };
                let mut best = 0usize;
                for (i, o) in outcomes.iter().enumerate() {
                    if key(o) < key(&outcomes[best]) {
                        best = i;
                    }
                }
                Symbol::Best {
                    model: best as u32,
                    cell: self.cell_of(&outcomes[best]),
                }
            }
        }
    }

    /// The reported interval and released value, from the symbol (and public past) only.
    fn interval_of(
        &self,
        target: usize,
        symbol: &Symbol,
        past: &Past,
        level: f64,
    ) -> (Interval, Option<f64>) {
        let t = &self.policy.targets[target];
        let n = self.policy.rows;
        let grid = self.policy.rule.grid(n);
        let cell_interval = |j: u64| {
            let g = grid.expect("grid rule");
            let ci = g
                .interval(
                    j,
                    n,
                    t.binary,
                    effective_method(t.binary, t.method),
                    level,
                    Sides::Two,
                    Rounding::for_core(self.policy.core_version),
                )
                .unwrap_or(Interval::FULL);
            (ci, g.value(j))
        };
        match *symbol {
            Symbol::Cell { index: j }
            | Symbol::NewBest { cell: j }
            | Symbol::Best { cell: j, .. } => {
                let (ci, v) = cell_interval(j);
                (ci, Some(v))
            }
            // The interval for the analyst's best true error so far, from the standing best cell.
            Symbol::NoImprovement => (cell_interval(past.best_cell).0, None),
            Symbol::Pass => match self.policy.rule {
                Rule::Threshold { tau } => (
                    Interval {
                        lower: 0.0,
                        upper: tau,
                    },
                    None,
                ),
                _ => (Interval::FULL, None),
            },
            Symbol::Fail => (Interval::FULL, None),
        }
    }

    /// Takes a sealed submission's share now (its level uses the transcript as it stands);
    /// its answer is released by [`Accountant::close_round`].
    pub fn seal(
        &mut self,
        req: &QueryRequest,
        charge: &Charge,
    ) -> Result<SealedReceipt, AccountingError> {
        self.changed();
        self.check_charge(req, charge)?;
        if !matches!(self.policy.rule, Rule::Sealed(_)) {
            return Err(AccountingError::WrongRule(
                "seal is only for the sealed rule",
            ));
        }
        if req.models != 1 {
            return Err(AccountingError::BadOutcome(
                "one model per sealed submission".into(),
            ));
        }
        self.take_shares(charge);
        let receipt = SealedReceipt {
            ticket: self.pending.len(),
            charge: charge.clone(),
        };
        self.pending.push(receipt.clone());
        Ok(receipt)
    }

    /// Closes the round: releases every sealed model's cell with the level fixed at its
    /// submission. `outcomes[i]` is the exact outcome of ticket `i`. The codes (`ln(M+1)` each)
    /// are added to the transcript after all answers are formed, so a later round pays for
    /// them; if the close is the holdout's last event, nobody does.
    pub fn close_round(&mut self, outcomes: &[Outcome]) -> Result<Vec<Answer>, AccountingError> {
        self.changed();
        if outcomes.len() != self.pending.len() {
            return Err(AccountingError::BadOutcome(format!(
                "{} outcomes for {} sealed submissions",
                outcomes.len(),
                self.pending.len()
            )));
        }
        for (r, o) in self.pending.iter().zip(outcomes) {
            self.check_outcomes(&r.charge.request, std::slice::from_ref(o))?;
        }
        let pending = std::mem::take(&mut self.pending);
        let rows = self.policy.rows;
        let rule = self.policy.rule;
        let mut formed = Vec::with_capacity(pending.len());
        for (r, o) in pending.iter().zip(outcomes) {
            let past = Past::start(&rule, rows);
            let symbol = Symbol::Cell {
                index: self.cell_of(o),
            };
            let code = self.code().nats(&rule, rows, &past, &symbol);
            let (interval, released) =
                self.interval_of(r.charge.request.target, &symbol, &past, r.charge.level_nats);
            formed.push((r, symbol, released, interval, code));
        }
        for (r, _, released, _, code) in &formed {
            let req = &r.charge.request;
            let isolated = self.policy.sharing == Sharing::Isolated;
            let state = self
                .analysts
                .get_mut(&req.analyst)
                .expect("sealed analyst registered");
            state.last_value[req.target] = *released;
            let transcript = if isolated {
                &mut state.transcript
            } else {
                &mut self.transcript
            };
            transcript.nats += code;
            transcript.answers += 1;
        }
        self.sequence += 1;
        Ok(formed
            .iter()
            .map(|(r, symbol, released, interval, code)| {
                self.finish(
                    &r.charge.request,
                    &r.charge,
                    *symbol,
                    *released,
                    *interval,
                    *code,
                    r.charge.level_nats,
                )
            })
            .collect())
    }
}

/// (target, reference bits, level bits) and the half-width computed for them.
type HalfWidthMemo = ((usize, u64, u64), f64);

/// (sequence, analyst) and the status computed for them.
type StatusMemo = ((u64, String), Status);

static EMPTY_TRANSCRIPT: Transcript = Transcript {
    nats: 0.0,
    answers: 0,
    threshold: Vec::new(),
    counts: BTreeMap::new(),
};

/// The largest level an analyst's adopted ladder files were answered at (0: none).
fn view_adopted_nats(acc: &Accountant, analyst: &str, target: usize) -> f64 {
    acc.analysts
        .get(analyst)
        .and_then(|s| s.adopted_nats.get(target).copied())
        .unwrap_or(0.0)
}

/// Exact needs counts; on bounded losses KL stands in (policy validation forbids the pair).
fn effective_method(binary: bool, method: Method) -> Method {
    if !binary && method == Method::Exact {
        Method::Kl
    } else {
        method
    }
}

#[cfg(test)]
mod status_memo_tests {
    use super::*;

    /// The remembered status is the status: after every answer of a few analysts (and before
    /// any), `status` equals a fresh computation, for the analyst who answered and the others.
    #[test]
    fn remembered_status_is_the_computed_status() {
        let policy: Policy = serde_json::from_str(
            r#"{"delta": 0.05, "schedule": "series", "rule": "rounded:0.01", "tolerance": 0.2,
            "rows": 2000, "sharing": "isolated", "shares": {"kind": "on-arrival"},
            "targets": [{"name": "y", "binary": true, "method": "exact"}], "core_version": 2}"#,
        )
        .unwrap();
        let mut acc = Accountant::new(policy).unwrap();
        let teams = ["a", "b", "c"];
        for i in 0..12u64 {
            let team = teams[(i % 3) as usize];
            for t in teams {
                assert_eq!(
                    acc.status(Some(t)),
                    acc.status_of(Some(t)),
                    "before {i}, {t}"
                );
            }
            let req = QueryRequest {
                analyst: team.into(),
                target: 0,
                models: 1,
            };
            let Ok(charge) = acc.quote(&req) else { break };
            let ans = acc
                .answer(&req, &charge, &[Outcome::Errors(300 + 17 * i)])
                .unwrap();
            let s = acc.status(Some(team));
            assert_eq!(s, acc.status_of(Some(team)), "after answer {i}");
            assert_eq!(
                s.targets[0]
                    .next_half_width
                    .unwrap_or(f64::INFINITY)
                    .to_bits(),
                ans.next_half_width.to_bits()
            );
            for t in teams {
                assert_eq!(
                    acc.status(Some(t)),
                    acc.status_of(Some(t)),
                    "after {i}, {t}"
                );
            }
        }
    }
}
