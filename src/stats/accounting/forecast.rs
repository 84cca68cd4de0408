//! Budget status and forecasts: how wide the next interval would be and how many more queries
//! fit within the tolerance if every answer costs its worst case.

use super::{Accountant, PoolView, QueryRequest, Refusal, Status, TargetStatus};
use crate::stats::policy::Sharing;
use crate::stats::rules::{Past, Rule};
use crate::stats::schedule::Schedule;

impl Accountant {
    /// Budget status. With `Some(analyst)`: that analyst's pool and transcript (safe to show the
    /// analyst; under `isolated` it reveals nothing about other analysts). With `None`: the
    /// whole holdout, for the organizer (under `isolated` never show it to analysts).
    pub fn status(&self, analyst: Option<&str>) -> Status {
        if let Some(a) = analyst
            && let Some(((sequence, who), status)) = &*self.last_status.borrow()
            && *sequence == self.sequence
            && who == a
        {
            return status.clone();
        }
        let status = self.status_of(analyst);
        if let Some(a) = analyst {
            *self.last_status.borrow_mut() = Some(((self.sequence, a.to_string()), status.clone()));
        }
        status
    }

    /// [`Accountant::status`], computed.
    pub(super) fn status_of(&self, analyst: Option<&str>) -> Status {
        let budget_of = |w: f64| (-(self.ln_inv_delta + w)).exp();
        let targets = self.policy.targets.len();
        match analyst {
            None => {
                let (budget, answers, nats) = (
                    self.policy.delta,
                    self.transcript.answers,
                    self.transcript.nats,
                );
                let answers = if self.policy.sharing == Sharing::Isolated {
                    self.analysts.values().map(|a| a.transcript.answers).sum()
                } else {
                    answers
                };
                Status {
                    analyst: None,
                    budget,
                    spent: self.spent,
                    remaining: (budget - self.spent).max(0.0),
                    transcript_nats: nats,
                    answers,
                    next_query_number: self.pool_queries + 1,
                    next_level_nats: None,
                    targets: self
                        .policy
                        .targets
                        .iter()
                        .map(|t| TargetStatus {
                            name: t.name.clone(),
                            next_half_width: None,
                            queries_left: 0,
                        })
                        .collect(),
                }
            }
            Some(a) => {
                let Ok(view) = self.view(a, 0) else {
                    return Status {
                        analyst: Some(a.to_string()),
                        budget: 0.0,
                        spent: 0.0,
                        remaining: 0.0,
                        transcript_nats: 0.0,
                        answers: 0,
                        next_query_number: 1,
                        next_level_nats: None,
                        targets: self
                            .policy
                            .targets
                            .iter()
                            .map(|t| TargetStatus {
                                name: t.name.clone(),
                                next_half_width: None,
                                queries_left: 0,
                            })
                            .collect(),
                    };
                };
                let budget = budget_of(view.ln_inv_weight);
                let spent = if self.per_analyst_pool() {
                    self.analysts.get(a).map_or(0.0, |s| s.spent)
                } else {
                    self.spent
                };
                let batch = self.forecast_batch(a);
                let next_level = self
                    .batch_ln_inv(view.used + 1, batch)
                    .map(|f| self.ln_inv_delta + view.ln_inv_weight + f + view.transcript.nats);
                let per_target = (0..targets)
                    .map(|t| {
                        let v = self.view(a, t).expect("checked above");
                        self.forecast(t, &v, next_level, batch)
                    })
                    .collect();
                Status {
                    analyst: Some(a.to_string()),
                    budget,
                    spent,
                    remaining: (budget - spent).max(0.0),
                    transcript_nats: view.transcript.nats,
                    answers: view.transcript.answers,
                    next_query_number: view.used + 1,
                    next_level_nats: next_level,
                    targets: per_target,
                }
            }
        }
    }

    /// The batch size forecasts assume: core 2 under best-of takes the analyst's last batch
    /// size (its own earlier request, a public fact; 1 before any), so `queries_left` counts
    /// batches of that size. Core 1 forecast single models.
    fn forecast_batch(&self, analyst: &str) -> u32 {
        if self.core2() && matches!(self.policy.rule, Rule::BestOf(_)) {
            self.analysts
                .get(analyst)
                .map_or(1, |s| s.last_models.max(1))
        } else {
            1
        }
    }

    /// `ln(1/share)` of the share a batch of `models` whose first schedule index is `first`
    /// is reported at: core 2, the mean of its shares; otherwise the last (smallest) share,
    /// which for one model is its only share.
    fn batch_ln_inv(&self, first: u64, models: u32) -> Option<f64> {
        let schedule = &self.policy.schedule;
        if self.core2() && models > 1 {
            ln_inv_mean_share(schedule, first, u64::from(models))
        } else {
            schedule.ln_inv_fraction(first.checked_add(u64::from(models.max(1)) - 1)?)
        }
    }

    fn forecast(
        &self,
        target: usize,
        view: &PoolView<'_>,
        next_level: Option<f64>,
        batch: u32,
    ) -> TargetStatus {
        let reference = self.reference_mean(view);
        // Class counts still to be released for this target come before its next answer.
        let due = self.counts_due(view.transcript, target);
        let next_level = next_level.map(|l| l + due);
        let next_half_width = next_level.map(|l| self.judged_half_width(target, reference, l));
        let past = Past {
            threshold: view.transcript.kt(target),
            ladder: view.past_ladder,
            best_cell: view.best_cell,
            models: batch,
            last_cell: view.last_cell,
        };
        let base = self.ln_inv_delta + view.ln_inv_weight;
        let b = u64::from(batch.max(1));
        let queries_left = count_fitting(
            |j| {
                let first = j.checked_mul(b)?.checked_add(view.used.checked_add(1)?)?;
                let frac = self.batch_ln_inv(first, batch)?;
                let cost =
                    self.code()
                        .worst_case_nats(&self.policy.rule, self.policy.rows, &past, j);
                Some(base + frac + view.transcript.nats + due + cost)
            },
            |level| match self.fit_level.get(target) {
                Some(max) if reference == 0.5 => level <= *max,
                _ => self.judged_half_width(target, reference, level) <= self.policy.tolerance,
            },
        );
        TargetStatus {
            name: self.policy.targets[target].name.clone(),
            next_half_width,
            queries_left,
        }
    }

    /// The most nats the next answer to `req` could add to the transcript, whatever its
    /// symbol, with the class counts it would release first where they are due: what a dry run
    /// shows and what `--max-cost` is compared with. Decided from public facts only.
    pub fn worst_code_nats(&self, req: &QueryRequest) -> Result<f64, Refusal> {
        if req.target >= self.policy.targets.len() {
            return Err(Refusal::BadRequest(format!(
                "target {} does not exist",
                req.target
            )));
        }
        let view = self.view(&req.analyst, req.target)?;
        let past = Past {
            threshold: view.transcript.kt(req.target),
            ladder: view.past_ladder,
            best_cell: view.best_cell,
            models: req.models,
            last_cell: view.last_cell,
        };
        Ok(self
            .code()
            .worst_case_nats(&self.policy.rule, self.policy.rows, &past, 1)
            + self.counts_due(view.transcript, req.target))
    }
}

/// `ln(1/mean share)` of the `count` schedule shares from index `first` on: the level (before
/// the pool weight and the transcript) a best-of batch is reported at under core 2. Computed in
/// log space (log-sum-exp), so shares far below the smallest f64 still give a finite level;
/// `None` when the schedule runs out inside the batch.
pub(crate) fn ln_inv_mean_share(schedule: &Schedule, first: u64, count: u64) -> Option<f64> {
    let count = count.max(1);
    let mut ln_inv = Vec::with_capacity(count.min(1 << 16) as usize);
    for i in 0..count {
        ln_inv.push(schedule.ln_inv_fraction(first.checked_add(i)?)?);
    }
    let smallest = ln_inv.iter().copied().fold(f64::INFINITY, f64::min);
    let sum: f64 = ln_inv.iter().map(|x| (smallest - x).exp()).sum();
    // ln(mean) = -smallest + ln(sum) - ln(count).
    Some(smallest - sum.ln() + (count as f64).ln())
}

/// How many `j = 0, 1, ...` have `fits(level(j))`, where `level` is non-decreasing in `j` and
/// `None` once the schedule is exhausted, and `fits` is monotone (true below a threshold).
/// Exponential then binary search; saturates at `u64::MAX`.
///
/// The search returns `u64::MAX` exactly when `j = 0, 1, 2, 4, ..., 2^63` all fit; by the
/// monotonicity above that is when `2^63` fits, so that one is tried first (after `0`): a
/// holdout whose every answer fits (a tolerance of 1) costs two evaluations per forecast, not
/// 64 (an audit of an all-answer ledger spent a sixth of its replay here).
pub(crate) fn count_fitting(level: impl Fn(u64) -> Option<f64>, fits: impl Fn(f64) -> bool) -> u64 {
    let ok = |j: u64| level(j).is_some_and(&fits);
    if !ok(0) {
        return 0;
    }
    if ok(1 << 63) {
        return u64::MAX;
    }
    let mut lo = 0u64; // ok(lo)
    let mut hi = 1u64;
    while ok(hi) {
        lo = hi;
        if hi >= u64::MAX / 2 {
            return u64::MAX;
        }
        hi *= 2;
    }
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if ok(mid) { lo = mid } else { hi = mid }
    }
    lo + 1
}

#[cfg(test)]
mod count_tests {
    use super::count_fitting;

    /// The search as it was before the saturation test (exponential then binary search only).
    fn plain(level: impl Fn(u64) -> Option<f64>, fits: impl Fn(f64) -> bool) -> u64 {
        let ok = |j: u64| level(j).is_some_and(&fits);
        if !ok(0) {
            return 0;
        }
        let (mut lo, mut hi) = (0u64, 1u64);
        while ok(hi) {
            lo = hi;
            if hi >= u64::MAX / 2 {
                return u64::MAX;
            }
            hi *= 2;
        }
        while hi - lo > 1 {
            let mid = lo + (hi - lo) / 2;
            if ok(mid) { lo = mid } else { hi = mid }
        }
        lo + 1
    }

    #[test]
    fn the_saturation_test_changes_no_count() {
        // Levels growing like a schedule's ln(1/fraction) (slowly, then not at all, then
        // exhausted), cut by thresholds from "nothing fits" to "everything fits".
        type Level = fn(u64) -> Option<f64>;
        let levels: [(&str, Level); 3] = [
            ("log", |j| Some(3.0 + 2.0 * ((j as f64) + 1.0).ln())),
            ("flat", |j| Some(if j < 1000 { j as f64 } else { 1000.0 })),
            ("exhausted", |j| (j < 5_000).then_some(j as f64 * 0.01)),
        ];
        for (name, level) in levels {
            for tau in [
                -1.0, 0.0, 2.9, 3.0, 3.5, 10.0, 50.0, 91.0, 999.0, 1000.0, 1e9,
            ] {
                let fits = |l: f64| l <= tau;
                assert_eq!(
                    count_fitting(level, fits),
                    plain(level, fits),
                    "{name} at threshold {tau}"
                );
            }
        }
        // A case each way that the test is there for.
        assert_eq!(count_fitting(|_| Some(0.0), |_| true), u64::MAX);
        assert_eq!(count_fitting(|j| Some(j as f64), |l| l <= 41.0), 42);
    }
}
