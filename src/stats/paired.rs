//! Paired comparison of two models scored on the same rows (DESIGN 4.6).
//!
//! 0-1 loss: with `n10` rows where A is wrong and B right and `n01` the reverse, the difference
//! of true errors is `q10 - q01`. Two-sided Clopper-Pearson intervals for both rates, each at
//! level `d/2` (so each tail gets `d/4`), give
//! `[lower(q10) - upper(q01), upper(q10) - lower(q01)]`, valid with probability `1 - d` by the
//! union bound. Its width follows the disagreement rate, not the error rate.
//!
//! Bounded losses: per-row differences `D = l_A - l_B` in [-1, 1], shifted to `Z = (D + 1)/2`
//! in [0, 1], with the empirical-Bernstein bound of Maurer and Pontil (2009, Thm 4), two-sided
//! at `ln(4/d)`: `|mean - E| <= sqrt(2 V ln(4/d) / n) + 7 ln(4/d) / (3 (n - 1))`, `V` the
//! unbiased sample variance of `Z`. The released interval depends on `V`: a daemon that reports
//! it must release and code `V` (rounded up to its cell) like any other symbol.
//!
//! ```
//! use holdout_ledger::stats::paired::paired_errors;
//! // 10,000 rows, models disagree on 3 %: A alone wrong on 100 rows, B alone wrong on 200.
//! let ci = paired_errors(10_000, 100, 200, (20.0f64).ln()).unwrap();
//! assert!(ci.upper < 0.0); // A is better, at d = 0.05
//! assert!(ci.upper - ci.lower < 0.02);
//! ```

use serde::{Deserialize, Serialize};

use super::interval::{IntervalError, Method, Rounding, Sides, errors_interval_with};

/// An interval for a difference of risks, inside [-1, 1].
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct DiffInterval {
    /// Lower limit of `R(A) - R(B)`.
    pub lower: f64,
    /// Upper limit of `R(A) - R(B)`.
    pub upper: f64,
}

impl DiffInterval {
    /// Whether `value` lies in the closed interval.
    pub fn contains(&self, value: f64) -> bool {
        self.lower <= value && value <= self.upper
    }
}

/// Interval for `err(A) - err(B)` under 0-1 loss from the discordant counts.
pub fn paired_errors(
    n: u64,
    n10: u64,
    n01: u64,
    level_nats: f64,
) -> Result<DiffInterval, IntervalError> {
    paired_errors_with(Rounding::Nearest, n, n10, n01, level_nats)
}

/// [`paired_errors`] with the limits rounded as the holdout's core version says.
pub fn paired_errors_with(
    rounding: Rounding,
    n: u64,
    n10: u64,
    n01: u64,
    level_nats: f64,
) -> Result<DiffInterval, IntervalError> {
    if n10.saturating_add(n01) > n {
        return Err(IntervalError::ErrorsExceedRows {
            errors: n10.saturating_add(n01),
            rows: n,
        });
    }
    // Each rate's two-sided interval at d/2.
    let level = level_nats + std::f64::consts::LN_2;
    let a = errors_interval_with(rounding, Method::Exact, n, n10, level, Sides::Two)?;
    let b = errors_interval_with(rounding, Method::Exact, n, n01, level, Sides::Two)?;
    Ok(DiffInterval {
        lower: (a.lower - b.upper).max(-1.0),
        upper: (a.upper - b.lower).min(1.0),
    })
}

/// Interval for `R(A) - R(B)` under a bounded loss, from the sum and the sum of squares of the
/// per-row differences `l_A - l_B` (each in [-1, 1]); empirical Bernstein, `n >= 2`.
pub fn paired_bounded(
    n: u64,
    sum_diff: f64,
    sum_sq_diff: f64,
    level_nats: f64,
) -> Result<DiffInterval, IntervalError> {
    if n < 2 {
        return Err(IntervalError::NoRows);
    }
    if level_nats.is_nan() || level_nats <= 0.0 {
        return Err(IntervalError::BadLevel(level_nats));
    }
    let nf = n as f64;
    let mean_d = sum_diff / nf;
    if !(-1.0..=1.0).contains(&mean_d) {
        return Err(IntervalError::MeanOutOfRange(mean_d));
    }
    // Z = (D + 1) / 2: var(Z) = var(D) / 4.
    let var_d = ((sum_sq_diff - nf * mean_d * mean_d) / (nf - 1.0)).max(0.0);
    let var_z = var_d / 4.0;
    let l = level_nats + 4f64.ln();
    let half_z = (2.0 * var_z * l / nf).sqrt() + 7.0 * l / (3.0 * (nf - 1.0));
    let half = 2.0 * half_z;
    Ok(DiffInterval {
        lower: (mean_d - half).max(-1.0),
        upper: (mean_d + half).min(1.0),
    })
}
