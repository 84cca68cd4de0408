//! How the budget `delta` is split: over analysts (shares) and over each pool's queries
//! (schedules), DESIGN 4.1.
//!
//! A query's budget is `delta_i = delta * w_a * s(i)`: `w_a` the analyst's share (1 when the
//! holdout has one pool) and `s(i)` the schedule's fraction for the pool's `i`-th query.
//! Everything is handled as `ln(1/.)` so that tiny shares stay exact.
//!
//! ```
//! use holdout_ledger::stats::schedule::Schedule;
//! let s: Schedule = "series".parse().unwrap();
//! // delta_3 = delta / (3 * 4).
//! assert!((s.ln_inv_fraction(3).unwrap() - 12f64.ln()).abs() < 1e-15);
//! let e: Schedule = "even:10".parse().unwrap();
//! assert_eq!(e.to_string(), "even:10");
//! assert!(e.ln_inv_fraction(10).is_some() && e.ln_inv_fraction(11).is_none());
//! ```

use serde::{Deserialize, Serialize};
use std::fmt;
use std::str::FromStr;

/// Fraction of a pool's budget that its `i`-th query receives.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(try_from = "String", into = "String")]
pub enum Schedule {
    /// `delta / k` for each of the first `k` queries, then nothing.
    Even {
        /// Number of queries.
        k: u64,
    },
    /// `delta / (i (i+1))`: open-ended, sums to delta.
    Series,
}

/// A schedule or share specification that does not parse or is out of range.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{0}")]
pub struct ScheduleError(pub String);

impl Schedule {
    /// `ln(1/s(i))` for the 1-based query `i`, or `None` when the schedule is exhausted.
    pub fn ln_inv_fraction(&self, i: u64) -> Option<f64> {
        if i == 0 {
            return None;
        }
        match *self {
            Schedule::Even { k } => (i <= k).then(|| (k as f64).ln()),
            Schedule::Series => Some((i as f64).ln() + ((i as f64) + 1.0).ln()),
        }
    }

    /// `ln(1/s(i))` for a query number held as f64 (for counts past `u64`, in planning).
    pub fn ln_inv_fraction_f64(&self, i: f64) -> Option<f64> {
        match *self {
            Schedule::Even { k } => (i >= 1.0 && i <= k as f64).then(|| (k as f64).ln()),
            Schedule::Series => (i >= 1.0).then(|| i.ln() + (i + 1.0).ln()),
        }
    }

    /// How many queries the schedule can ever fund (`None`: open-ended).
    pub fn capacity(&self) -> Option<u64> {
        match *self {
            Schedule::Even { k } => Some(k),
            Schedule::Series => None,
        }
    }
}

impl fmt::Display for Schedule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Schedule::Even { k } => write!(f, "even:{k}"),
            Schedule::Series => f.write_str("series"),
        }
    }
}

impl FromStr for Schedule {
    type Err = ScheduleError;
    fn from_str(s: &str) -> Result<Schedule, ScheduleError> {
        let s = s.trim();
        if s == "series" {
            return Ok(Schedule::Series);
        }
        if let Some(k) = s.strip_prefix("even:") {
            return match k.trim().parse::<u64>() {
                Ok(k) if k >= 1 => Ok(Schedule::Even { k }),
                _ => Err(ScheduleError(format!(
                    "schedule '{s}': even:K needs a whole number of queries K >= 1"
                ))),
            };
        }
        Err(ScheduleError(format!(
            "unknown schedule '{s}': expected 'series' or 'even:K' (e.g. even:10)"
        )))
    }
}

impl TryFrom<String> for Schedule {
    type Error = ScheduleError;
    fn try_from(s: String) -> Result<Schedule, ScheduleError> {
        s.parse()
    }
}

impl From<Schedule> for String {
    fn from(s: Schedule) -> String {
        s.to_string()
    }
}

/// How `delta` is split between analysts before each analyst's schedule applies.
///
/// Shares sum to at most `delta` along every sequence of arrivals: a roster takes
/// `(1 - reserve)`, and late joiners take `reserve / (j (j+1))` for the `j`-th of them, which sums
/// to at most `reserve`; on arrival the `j`-th analyst takes `1 / (j (j+1))`, summing to at most 1.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, Default)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum Shares {
    /// One pool: every analyst draws from one schedule.
    #[default]
    None,
    /// Equal shares for a declared roster, plus a reserve for analysts not on it.
    Roster {
        /// Analyst (team) names declared when the holdout is created.
        analysts: Vec<String>,
        /// Fraction of delta kept for late joiners, in [0, 1).
        reserve: f64,
    },
    /// The `j`-th analyst to arrive gets `delta / (j (j+1))`: open-ended, very unequal.
    OnArrival,
}

impl Shares {
    /// Checks the share specification.
    pub fn validate(&self) -> Result<(), ScheduleError> {
        if let Shares::Roster { analysts, reserve } = self {
            if !(0.0..1.0).contains(reserve) {
                return Err(ScheduleError(format!(
                    "roster reserve must lie in [0, 1), got {reserve}"
                )));
            }
            if analysts.is_empty() {
                return Err(ScheduleError(
                    "a roster needs at least one analyst (use on-arrival shares otherwise)".into(),
                ));
            }
            let mut names: Vec<&String> = analysts.iter().collect();
            names.sort();
            if let Some(w) = names.windows(2).find(|w| w[0] == w[1]) {
                return Err(ScheduleError(format!("analyst '{}' is listed twice", w[0])));
            }
        }
        Ok(())
    }

    /// `ln(1/w)` of a new analyst's share: `on_roster` says whether the analyst was declared;
    /// `late_index` is the 1-based arrival index among analysts that take an arrival share
    /// (everyone under on-arrival, non-roster analysts under a roster). `None` when no share is
    /// available (a roster without reserve) or for `Shares::None`, which has no per-analyst shares.
    pub fn ln_inv_weight(&self, on_roster: bool, late_index: u64) -> Option<f64> {
        let series = |j: u64| (j as f64).ln() + (j as f64 + 1.0).ln();
        match self {
            Shares::None => None,
            Shares::Roster { analysts, reserve } => {
                if on_roster {
                    Some((analysts.len() as f64).ln() - (-reserve).ln_1p())
                } else if *reserve > 0.0 && late_index >= 1 {
                    Some(-reserve.ln() + series(late_index))
                } else {
                    None
                }
            }
            Shares::OnArrival => (late_index >= 1).then(|| series(late_index)),
        }
    }

    /// Whether this analyst is on the declared roster.
    pub fn on_roster(&self, analyst: &str) -> bool {
        matches!(self, Shares::Roster { analysts, .. } if analysts.iter().any(|a| a == analyst))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parse_errors_are_clear() {
        assert!(
            "even:0"
                .parse::<Schedule>()
                .unwrap_err()
                .0
                .contains("K >= 1")
        );
        assert!(
            "weekly"
                .parse::<Schedule>()
                .unwrap_err()
                .0
                .contains("series")
        );
        assert_eq!(
            "even:7".parse::<Schedule>().unwrap(),
            Schedule::Even { k: 7 }
        );
    }

    #[test]
    fn fractions_sum_to_at_most_one() {
        let total: f64 = (1..=1_000_000u64)
            .map(|i| (-Schedule::Series.ln_inv_fraction(i).unwrap()).exp())
            .sum();
        assert!(total <= 1.0 && total > 0.999_99);
        let even = Schedule::Even { k: 3 };
        let total: f64 = (1..=10)
            .filter_map(|i| even.ln_inv_fraction(i))
            .map(|l| (-l).exp())
            .sum();
        assert!((total - 1.0).abs() < 1e-15);
    }

    #[test]
    fn shares_sum_to_at_most_one_along_any_arrivals() {
        let roster = Shares::Roster {
            analysts: vec!["a".into(), "b".into(), "c".into()],
            reserve: 0.25,
        };
        roster.validate().unwrap();
        let mut total: f64 = 3.0 * (-roster.ln_inv_weight(true, 0).unwrap()).exp();
        total += (1..=100_000u64)
            .map(|j| (-roster.ln_inv_weight(false, j).unwrap()).exp())
            .sum::<f64>();
        assert!(total <= 1.0 && total > 0.9999);
        let arrival: f64 = (1..=100_000u64)
            .map(|j| (-Shares::OnArrival.ln_inv_weight(false, j).unwrap()).exp())
            .sum();
        assert!(arrival <= 1.0);
        let closed = Shares::Roster {
            analysts: vec!["a".into()],
            reserve: 0.0,
        };
        assert!(closed.ln_inv_weight(false, 1).is_none());
    }
}
