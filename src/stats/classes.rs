//! Per-class error, balanced error and AUC: the exact values and their intervals (issue 18,
//! DESIGN 4.8). Pure functions of counts; the accountant will call them once the class counts
//! are released ([`super::accounting::Accountant::release_counts`]). Not yet wired to a metric.
//!
//! * **Per-class and balanced error.** Conditional on the class counts `n_c`, the errors of
//!   class `c` are binomial(`n_c`, `e_c`) for rows drawn i.i.d. within the class. Each class gets
//!   the exact (Clopper-Pearson) two-sided interval at level `d / C` (`level + ln C` nats), so
//!   with probability at least `1 - d` every class's interval holds at once (union bound over
//!   the `C` classes). On that event the mean of the lower limits is at most the mean of the
//!   rates and the mean of the upper limits at least it: the balanced error's interval is the
//!   mean of the per-class limits, valid on the same event at no further cost. What it
//!   conditions on: the counts (released, so public), and i.i.d. rows within each class.
//! * **AUC.** Conditional on the numbers of positives and negatives, the empirical AUC (ties
//!   count 1/2) is a two-sample U-statistic with a kernel in [0, 1]. Hoeffding (1963, section
//!   5) writes it as an average over permutations of means of `k = min(n+, n-)` independent
//!   kernel values, so by Jensen's inequality on the moment generating function every Chernoff
//!   bound for a mean of `k` i.i.d. [0, 1] variables holds for it: the KL (Chernoff) interval
//!   with `n = k` is valid, Hoeffding's with the same `k` is the looser check.

use super::interval::{Interval, IntervalError, Method, Rounding, Sides};
use super::interval::{errors_interval_with, mean_interval_with};

/// Per-class intervals and the balanced error's interval.
#[derive(Debug, Clone, PartialEq)]
pub struct ClassIntervals {
    /// One two-sided exact interval per class, each at level `level + ln C`.
    pub classes: Vec<Interval>,
    /// The mean of the per-class limits: the balanced error's interval.
    pub balanced: Interval,
    /// The level each class's interval is at, nats.
    pub class_level_nats: f64,
}

/// Why class intervals cannot be computed.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ClassError {
    /// A class has no rows: its error rate is undefined. Only shown after the class counts
    /// are released (DESIGN 4.2 rule 7).
    #[error("class {0} has no rows in this holdout, so its error rate is undefined")]
    EmptyClass(usize),
    /// Errors and counts do not fit.
    #[error("{0}")]
    Mismatch(String),
    /// The interval itself.
    #[error(transparent)]
    Interval(#[from] IntervalError),
}

/// The exact per-class error rates `errors[c] / counts[c]` and their mean, the balanced error
/// (1 minus scikit-learn's `balanced_accuracy_score`).
pub fn class_rates(counts: &[u64], errors: &[u64]) -> Result<(Vec<f64>, f64), ClassError> {
    check(counts, errors)?;
    let rates: Vec<f64> = counts
        .iter()
        .zip(errors)
        .map(|(&n, &k)| k as f64 / n as f64)
        .collect();
    let balanced = rates.iter().sum::<f64>() / rates.len() as f64;
    Ok((rates, balanced))
}

fn check(counts: &[u64], errors: &[u64]) -> Result<(), ClassError> {
    if counts.len() != errors.len() || counts.is_empty() {
        return Err(ClassError::Mismatch(format!(
            "{} class counts and {} error counts",
            counts.len(),
            errors.len()
        )));
    }
    if let Some(c) = counts.iter().position(|&n| n == 0) {
        return Err(ClassError::EmptyClass(c));
    }
    if let Some(c) = (0..counts.len()).find(|&c| errors[c] > counts[c]) {
        return Err(ClassError::Mismatch(format!(
            "class {c}: {} errors among {} rows",
            errors[c], counts[c]
        )));
    }
    Ok(())
}

/// Exact per-class intervals at `level_nats + ln C` each, and the balanced error's interval
/// (the mean of the per-class limits), jointly valid at `level_nats` (module documentation).
pub fn class_intervals(
    rounding: Rounding,
    counts: &[u64],
    errors: &[u64],
    level_nats: f64,
) -> Result<ClassIntervals, ClassError> {
    check(counts, errors)?;
    let c = counts.len() as f64;
    let class_level_nats = level_nats + c.ln();
    let classes = counts
        .iter()
        .zip(errors)
        .map(|(&n, &k)| {
            errors_interval_with(rounding, Method::Exact, n, k, class_level_nats, Sides::Two)
        })
        .collect::<Result<Vec<_>, _>>()?;
    let mean = |f: fn(&Interval) -> f64| classes.iter().map(f).sum::<f64>() / c;
    let balanced = Interval {
        lower: mean(|i| i.lower).clamp(0.0, 1.0),
        upper: mean(|i| i.upper).clamp(0.0, 1.0),
    };
    Ok(ClassIntervals {
        classes,
        balanced,
        class_level_nats,
    })
}

/// The empirical AUC of scores against binary labels, exactly: `twice_u / (2 n+ n-)`, where
/// `U` counts the (positive, negative) pairs ranked correctly, a tie counting 1/2.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Auc {
    /// Twice the Mann-Whitney U of the positives (a whole number: ties count 1/2).
    pub twice_u: u64,
    /// Positive rows.
    pub positives: u64,
    /// Negative rows.
    pub negatives: u64,
}

impl Auc {
    /// The AUC in [0, 1] (`None` when a class has no rows).
    pub fn value(&self) -> Option<f64> {
        let pairs = self.positives.checked_mul(self.negatives)?;
        (pairs > 0).then(|| self.twice_u as f64 / (2.0 * pairs as f64))
    }

    /// The effective sample size of its interval: `min(n+, n-)`.
    pub fn effective_rows(&self) -> u64 {
        self.positives.min(self.negatives)
    }
}

/// The AUC of `scores` (higher means positive) against `positive` labels, by mid-ranks:
/// `O(n log n)`, exact (twice a mid-rank is a whole number). Scores must be finite (checked
/// against the public declaration before scoring); `None` if they are not or the lengths differ.
pub fn auc(positive: &[bool], scores: &[f64]) -> Option<Auc> {
    if positive.len() != scores.len() || scores.iter().any(|s| !s.is_finite()) {
        return None;
    }
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    let positives = positive.iter().filter(|&&p| p).count() as u64;
    let negatives = positive.len() as u64 - positives;
    // Sum over positives of twice their 1-based mid-rank.
    let mut twice_ranks: u64 = 0;
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        // -0.0 and 0.0 are one score: compare values, not bits.
        while j + 1 < order.len() && scores[order[j + 1]] == scores[order[i]] {
            j += 1;
        }
        let twice_mid = (i + j + 2) as u64;
        let pos_here = order[i..=j].iter().filter(|&&r| positive[r]).count() as u64;
        twice_ranks += pos_here * twice_mid;
        i = j + 1;
    }
    Some(Auc {
        twice_u: twice_ranks - positives * (positives + 1),
        positives,
        negatives,
    })
}

/// The interval of an AUC: the KL (or Hoeffding) interval of a mean of `min(n+, n-)` values
/// in [0, 1] at `level_nats` (module documentation).
pub fn auc_interval(
    rounding: Rounding,
    method: Method,
    auc: &Auc,
    level_nats: f64,
    sides: Sides,
) -> Result<Interval, ClassError> {
    let value = auc
        .value()
        .ok_or(ClassError::EmptyClass(usize::from(auc.positives != 0)))?;
    if method == Method::Exact {
        return Err(ClassError::Mismatch(
            "an AUC is not a 0-1 loss: use kl or hoeffding".into(),
        ));
    }
    Ok(mean_interval_with(
        rounding,
        method,
        auc.effective_rows(),
        value,
        level_nats,
        sides,
    )?)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn auc_counts_ties_as_half_and_orders() {
        // Perfect, reversed, all tied.
        let y = [false, false, true, true];
        assert_eq!(auc(&y, &[0.1, 0.2, 0.3, 0.4]).unwrap().value(), Some(1.0));
        assert_eq!(auc(&y, &[0.4, 0.3, 0.2, 0.1]).unwrap().value(), Some(0.0));
        assert_eq!(auc(&y, &[0.5; 4]).unwrap().value(), Some(0.5));
        // One tie across the classes out of four pairs: (3 + 1/2) / 4.
        assert_eq!(auc(&y, &[0.1, 0.3, 0.3, 0.4]).unwrap().value(), Some(0.875));
        assert_eq!(auc(&[true, true], &[0.1, 0.2]).unwrap().value(), None);
        assert!(auc(&y, &[0.1, f64::NAN, 0.3, 0.4]).is_none());
    }

    #[test]
    fn an_empty_class_is_named_and_limits_average() {
        assert_eq!(
            class_intervals(Rounding::for_core(4), &[5, 0], &[1, 0], 3.0).unwrap_err(),
            ClassError::EmptyClass(1)
        );
        let ci = class_intervals(Rounding::for_core(4), &[5, 50], &[1, 5], 3.0).unwrap();
        let mean_lo = (ci.classes[0].lower + ci.classes[1].lower) / 2.0;
        assert_eq!(ci.balanced.lower, mean_lo);
        assert!((ci.class_level_nats - 3.0 - 2f64.ln()).abs() < 1e-15);
    }
}
