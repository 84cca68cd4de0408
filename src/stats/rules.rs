//! Answer rules: what a query releases (its symbol), the code `-ln p(symbol | public past)`
//! that the transcript pays for it, and the interval reported from the symbol alone
//! (DESIGN 4.2, 4.3).
//!
//! | rule | symbols | code `-ln p` |
//! |---|---|---|
//! | `rounded:ETA` | `Cell { index }` of the grid of step `1/M` | `ln(M+1)` |
//! | `threshold:TAU` | `Pass` / `Fail` | Krichevsky-Trofimov: `p(pass) = (passes + 1/2) / (answers + 1)` |
//! | `ladder:ETA` | `NoImprovement` / `NewBest { cell }` | KT on improve vs not, then `ln b` (uniform over cells `0..b`, `b` the current best cell) |
//! | `best-of:ETA` | `Best { model, cell }` for a batch of `B` | `ln B + ln(M+1)` |
//! | `sealed[:ETA]` | `Cell { index }` for every sealed model, at the round's close | `ln(M+1)` each (`M = n` without ETA: exact scores) |
//!
//! The codes in this table are code version 1; version 2 (new holdouts) codes rounded answers
//! relative to the team's last released cell and ladder drops so that small ones are cheap
//! ([`super::codes`]).
//!
//! Rounding. The cell of `k` errors in `n` rows is `floor((2kM + n) / (2n))`, i.e. `kM/n`
//! rounded half up, computed in `u128` ([`Grid::cell_of_errors`]); the daemon, the interval code
//! and the audit all call that one function. For bounded (non-binary) losses the cell is
//! `floor(mean * M + 1/2)` in f64 ([`Grid::cell_of_mean`]), again one function for everyone.
//!
//! ```
//! use holdout_ledger::stats::rules::{Grid, Rule};
//! let rule: Rule = "rounded:0.01".parse().unwrap();
//! assert_eq!(rule.to_string(), "rounded:0.01");
//! let g = Grid { cells: 100 };
//! // 237 errors in 1000 rows: 23.7 rounds to cell 24, which holds k = 235..=244.
//! assert_eq!(g.cell_of_errors(1000, 237), 24);
//! assert_eq!(g.errors_in_cell(1000, 24), Some((235, 244)));
//! // Ties round up: 245 errors is exactly 24.5 -> cell 25.
//! assert_eq!(g.cell_of_errors(1000, 245), 25);
//! ```

use serde::{Deserialize, Serialize};
use statrs::function::gamma::ln_gamma;
use std::fmt;
use std::str::FromStr;

use super::interval::{Interval, IntervalError, Method, Sides};
use super::interval::{
    Rounding, errors_range_interval_with, mean_range_interval_with, reference_half_width_with,
};

/// A rounding grid `{0, 1/M, ..., 1}` with `M + 1` cells.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub struct Grid {
    /// `M`: the grid step is `1/M`.
    pub cells: u64,
}

impl Grid {
    /// Cell of `k` errors in `n` rows: `k M / n` rounded half up, exact integer arithmetic.
    pub fn cell_of_errors(&self, n: u64, k: u64) -> u64 {
        let (n, k, m) = (u128::from(n.max(1)), u128::from(k), u128::from(self.cells));
        ((2 * k * m + n) / (2 * n)) as u64
    }

    /// The error counts `(k_min, k_max)` whose cell is `j`; `None` when no count falls in it.
    pub fn errors_in_cell(&self, n: u64, j: u64) -> Option<(u64, u64)> {
        if j > self.cells {
            return None;
        }
        let k_min = |j: u64| -> u64 {
            if j == 0 {
                return 0;
            }
            let (n, j, m) = (u128::from(n), u128::from(j), u128::from(self.cells));
            (n * (2 * j - 1)).div_ceil(2 * m) as u64
        };
        let lo = k_min(j);
        let hi = if j == self.cells {
            n
        } else {
            k_min(j + 1).saturating_sub(1)
        };
        (lo <= hi && lo <= n).then_some((lo, hi.min(n)))
    }

    /// Cell of a mean loss in [0, 1]: `floor(mean M + 1/2)`, clamped to the grid.
    pub fn cell_of_mean(&self, mean: f64) -> u64 {
        let c = (mean.clamp(0.0, 1.0) * self.cells as f64 + 0.5).floor();
        (c as u64).min(self.cells)
    }

    /// The means `[lo, hi]` a cell can stand for (bounded losses).
    pub fn mean_range(&self, j: u64) -> (f64, f64) {
        let m = self.cells as f64;
        let j = j.min(self.cells) as f64;
        (((j - 0.5) / m).max(0.0), ((j + 0.5) / m).min(1.0))
    }

    /// The released value `j / M`.
    pub fn value(&self, j: u64) -> f64 {
        j as f64 / self.cells as f64
    }

    /// `ln(M + 1)`, the uniform code over the grid.
    pub fn uniform_code(&self) -> f64 {
        (self.cells as f64 + 1.0).ln()
    }

    /// The reported interval for cell `j`: the worst case over the cell (DESIGN 4.3).
    /// Binary losses use the error counts of the cell; bounded losses its mean range, never
    /// Clopper-Pearson. An empty cell (possible when `n < M`) cannot be released; it gets [0, 1].
    /// `rounding` follows the holdout's core version ([`Rounding::for_core`]).
    #[allow(clippy::too_many_arguments)]
    pub fn interval(
        &self,
        j: u64,
        n: u64,
        binary: bool,
        method: Method,
        level_nats: f64,
        sides: Sides,
        rounding: Rounding,
    ) -> Result<Interval, IntervalError> {
        if binary {
            match self.errors_in_cell(n, j) {
                Some((lo, hi)) => {
                    errors_range_interval_with(rounding, method, n, lo, hi, level_nats, sides)
                }
                None => Ok(Interval::FULL),
            }
        } else {
            let (lo, hi) = self.mean_range(j);
            let method = if method == Method::Exact {
                Method::Kl
            } else {
                method
            };
            mean_range_interval_with(rounding, method, n, lo, hi, level_nats, sides)
        }
    }
}

/// Half-widths of reported cell intervals: what core 2 judges the tolerance on (DESIGN 4.3,
/// rounded; issue 10, defect 8). A released cell is reported with the worst case over the
/// counts (or means) it stands for, which is wider than the one-count interval at its centre by
/// about half a grid step, so a tolerance judged on the one-count interval let answers through
/// whose reported interval was wider than the tolerance.
impl Grid {
    /// The most error counts minus one that one cell can hold: `ceil(n / M) - 1`. An inner
    /// cell is the half-open range `[(2j-1)n/(2M), (2j+1)n/(2M))` of length `n/M`, so it holds
    /// at most `ceil(n/M)` integers; the end cells hold fewer.
    pub fn max_span(&self, n: u64) -> u64 {
        let (n, m) = (u128::from(n.max(1)), u128::from(self.cells.max(1)));
        (n.div_ceil(m) - 1) as u64
    }

    /// The widest reported interval any cell of this grid can have at this level (two-sided
    /// half-width; `+inf` when it cannot be computed).
    ///
    /// Binary losses: every cell is a count range `[k, k + s]` with `s <= S =`
    /// [`Grid::max_span`], and its interval is the lower limit at `k` and the upper at `k + s`,
    /// so no cell is wider than the widest `[k, k + S]`. That width is symmetric about
    /// `k = (n - S)/2` (`U(k) = 1 - L(n - k)` for Clopper-Pearson, KL and Hoeffding alike) and
    /// largest there, so the four counts around the centre are evaluated. Bounded losses: every
    /// cell is a mean range of length at most `1/M`, widest when centred at 1/2.
    /// Cells whose widths are equal in exact arithmetic (Hoeffding's inner cells) differ by
    /// float rounding, so the figure carries a relative margin of `1e-12`.
    /// `tests/accounting_core2.rs` checks the bound against every cell of many grids.
    pub fn widest_half_width(
        &self,
        n: u64,
        binary: bool,
        method: Method,
        level_nats: f64,
        rounding: Rounding,
    ) -> f64 {
        self.widest_exact(n, binary, method, level_nats, rounding) * (1.0 + 1e-12)
    }

    fn widest_exact(
        &self,
        n: u64,
        binary: bool,
        method: Method,
        level_nats: f64,
        rounding: Rounding,
    ) -> f64 {
        let n = n.max(1);
        if binary {
            let s = self.max_span(n).min(n);
            let k0 = (n - s) / 2;
            (k0.saturating_sub(1)..=(k0 + 2).min(n - s))
                .map(|k| {
                    errors_range_interval_with(
                        rounding,
                        method,
                        n,
                        k,
                        k + s,
                        level_nats,
                        Sides::Two,
                    )
                    .map_or(f64::INFINITY, |ci| ci.half_width())
                })
                .fold(0.0, f64::max)
        } else {
            let half = 0.5 / self.cells.max(1) as f64;
            let method = if method == Method::Exact {
                Method::Kl
            } else {
                method
            };
            mean_range_interval_with(
                rounding,
                method,
                n,
                (0.5 - half).max(0.0),
                (0.5 + half).min(1.0),
                level_nats,
                Sides::Two,
            )
            .map_or(f64::INFINITY, |ci| ci.half_width())
        }
    }

    /// The half-width of the reported interval of the cell that holds the mean `reference`
    /// (for binary losses, the count `round(reference n)`).
    pub fn cell_half_width(
        &self,
        n: u64,
        binary: bool,
        method: Method,
        reference: f64,
        level_nats: f64,
        rounding: Rounding,
    ) -> f64 {
        let r = reference.clamp(0.0, 1.0);
        let j = if binary {
            let k = ((r * n.max(1) as f64).round() as u64).min(n);
            self.cell_of_errors(n, k)
        } else {
            self.cell_of_mean(r)
        };
        self.interval(j, n, binary, method, level_nats, Sides::Two, rounding)
            .map_or(f64::INFINITY, |ci| ci.half_width())
    }
}

/// Threshold by cutoff (core 2; DESIGN 4.8): the largest error count `k*` in `-1..=n` whose
/// one-sided upper limit `upper(k)` is at most `tau`, by bisection on `k`. `upper` must be the
/// limit the direct decision would use; it increases in `k`, so "pass iff `upper(k) <= tau`" is
/// "pass iff `k <= k*`". The counts probed depend only on `n`, `tau` and whatever `upper`
/// depends on (the public level), never on the count being answered.
pub fn cutoff_errors(n: u64, tau: f64, mut upper: impl FnMut(u64) -> f64) -> i64 {
    if upper(0) > tau {
        return -1;
    }
    // upper(lo) <= tau; hi = n + 1 stands for "past every count".
    let (mut lo, mut hi) = (0u64, n + 1);
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if upper(mid) <= tau {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    lo as i64
}

/// Threshold by cutoff for a bounded loss (core 2): the largest mean `m*` in [0, 1] with
/// `upper(m*) <= tau`, to the last representable bit (`-inf` when even a mean of 0 fails);
/// pass iff the mean is at most `m*`. Valid whatever rounding `upper` has: a mean below `m*` has
/// a true upper limit no larger than the true limit at `m*`, which `upper(m*)` bounds.
pub fn cutoff_mean(tau: f64, mut upper: impl FnMut(f64) -> f64) -> f64 {
    if upper(0.0) > tau {
        return f64::NEG_INFINITY;
    }
    if upper(1.0) <= tau {
        return 1.0;
    }
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    loop {
        let mid = lo + 0.5 * (hi - lo);
        if mid <= lo || mid >= hi {
            return lo;
        }
        if upper(mid) <= tau {
            lo = mid;
        } else {
            hi = mid;
        }
    }
}

/// An answer rule, fixed in the policy when the holdout is created.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(try_from = "String", into = "String")]
pub enum Rule {
    /// The score rounded to the grid.
    Rounded(Grid),
    /// Pass iff the one-sided upper bound at the full level is at most `tau`.
    Threshold {
        /// The threshold on the error / mean loss.
        tau: f64,
    },
    /// Per analyst: no improvement, or the new best cell (Ladder mechanism, Blum and Hardt 2015).
    Ladder(Grid),
    /// A batch of models: which is best (ties to the lowest index) and its rounded score.
    BestOf(Grid),
    /// Nothing until the round closes, then every sealed model's rounded score
    /// (`None`: exact scores, a grid with `M = n`).
    Sealed(Option<Grid>),
}

/// A rule specification that does not parse or is out of range.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{0}")]
pub struct RuleError(pub String);

fn parse_grid(rule: &str, eta: &str) -> Result<Grid, RuleError> {
    let bad = || {
        RuleError(format!(
            "{rule}: ETA must be 1/M for a whole number M >= 1 (e.g. 0.01 or 1/100), got '{eta}'"
        ))
    };
    let eta = eta.trim();
    let m = if let Some(m) = eta.strip_prefix("1/") {
        m.trim().parse::<u64>().map_err(|_| bad())?
    } else {
        let e: f64 = eta.parse().map_err(|_| bad())?;
        if !(e > 0.0 && e <= 1.0) {
            return Err(bad());
        }
        let m = (1.0 / e).round();
        if (e - 1.0 / m).abs() > 1e-9 || m > 1e15 {
            return Err(bad());
        }
        m as u64
    };
    if m == 0 {
        return Err(bad());
    }
    Ok(Grid { cells: m })
}

fn eta_text(g: &Grid) -> String {
    format!("{}", 1.0 / g.cells as f64)
}

impl fmt::Display for Rule {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Rule::Rounded(g) => write!(f, "rounded:{}", eta_text(g)),
            Rule::Threshold { tau } => write!(f, "threshold:{tau}"),
            Rule::Ladder(g) => write!(f, "ladder:{}", eta_text(g)),
            Rule::BestOf(g) => write!(f, "best-of:{}", eta_text(g)),
            Rule::Sealed(None) => f.write_str("sealed"),
            Rule::Sealed(Some(g)) => write!(f, "sealed:{}", eta_text(g)),
        }
    }
}

impl FromStr for Rule {
    type Err = RuleError;
    fn from_str(s: &str) -> Result<Rule, RuleError> {
        let s = s.trim();
        let (name, arg) = match s.split_once(':') {
            Some((n, a)) => (n.trim(), Some(a)),
            None => (s, None),
        };
        match (name, arg) {
            ("rounded", Some(a)) => Ok(Rule::Rounded(parse_grid(name, a)?)),
            ("ladder", Some(a)) => Ok(Rule::Ladder(parse_grid(name, a)?)),
            ("best-of", Some(a)) => Ok(Rule::BestOf(parse_grid(name, a)?)),
            ("sealed", Some(a)) => Ok(Rule::Sealed(Some(parse_grid(name, a)?))),
            ("sealed", None) => Ok(Rule::Sealed(None)),
            ("threshold", Some(a)) => match a.trim().parse::<f64>() {
                Ok(tau) if tau > 0.0 && tau < 1.0 => Ok(Rule::Threshold { tau }),
                _ => Err(RuleError(format!(
                    "threshold: TAU must be a number in (0, 1), got '{a}'"
                ))),
            },
            ("rounded" | "ladder" | "best-of" | "threshold", None) => Err(RuleError(format!(
                "rule '{name}' needs a parameter, e.g. '{name}:{}'",
                if name == "threshold" { "0.1" } else { "0.01" }
            ))),
            _ => Err(RuleError(format!(
                "unknown answer rule '{s}': expected rounded:ETA, threshold:TAU, ladder:ETA, \
                 best-of:ETA, sealed or sealed:ETA"
            ))),
        }
    }
}

impl TryFrom<String> for Rule {
    type Error = RuleError;
    fn try_from(s: String) -> Result<Rule, RuleError> {
        s.parse()
    }
}

impl From<Rule> for String {
    fn from(r: Rule) -> String {
        r.to_string()
    }
}

/// What an answer releases.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Symbol {
    /// A grid cell (rounded and sealed rules).
    Cell {
        /// Cell index `j`; the released value is `j / M`.
        index: u64,
    },
    /// Threshold passed: certifies `R <= TAU`.
    Pass,
    /// Threshold not passed: certifies nothing.
    Fail,
    /// Ladder: the submission did not beat the best by a grid step.
    NoImprovement,
    /// Ladder: a new best cell.
    NewBest {
        /// The new best cell.
        cell: u64,
    },
    /// Best-of: the best model of the batch and its cell.
    Best {
        /// 0-based index of the model in the batch.
        model: u32,
        /// Its cell.
        cell: u64,
    },
}

/// Krichevsky-Trofimov counts for a binary symbol stream (pass/fail, improve/not).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
pub struct KtCounts {
    /// Earlier `true` symbols (passes, improvements).
    pub hits: u64,
    /// Earlier symbols of this stream.
    pub trials: u64,
}

impl KtCounts {
    /// `-ln p(hit)` with `p(hit) = (hits + 1/2) / (trials + 1)`.
    pub fn code_nats(&self, hit: bool) -> f64 {
        let count = if hit {
            self.hits
        } else {
            self.trials - self.hits
        };
        (self.trials as f64 + 1.0).ln() - (count as f64 + 0.5).ln()
    }

    /// Adds a symbol.
    pub fn record(&mut self, hit: bool) {
        self.trials += 1;
        self.hits += u64::from(hit);
    }

    /// The largest total code the next `j` symbols can cost: KT probability depends only on
    /// the counts, and `-ln` of it is largest where the final counts are most balanced.
    pub fn worst_case_nats(&self, j: u64) -> f64 {
        if j == 0 {
            return 0.0;
        }
        let (h, m, t) = (
            self.hits as f64,
            (self.trials - self.hits) as f64,
            self.trials as f64,
        );
        let jf = j as f64;
        let cost = |a: f64| {
            ln_gamma(h + 0.5) + ln_gamma(m + 0.5) + ln_gamma(t + 1.0 + jf)
                - ln_gamma(h + 0.5 + a)
                - ln_gamma(m + 0.5 + jf - a)
                - ln_gamma(t + 1.0)
        };
        let centre = ((m + jf - h) / 2.0).clamp(0.0, jf);
        [centre.floor(), centre.ceil()]
            .into_iter()
            .map(cost)
            .fold(f64::NEG_INFINITY, f64::max)
    }
}

/// The public past a code may depend on, for one analyst and one target.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
pub struct Past {
    /// Threshold pass/fail counts in this transcript for this target.
    pub threshold: KtCounts,
    /// Ladder improve/not counts of this analyst for this target.
    pub ladder: KtCounts,
    /// Ladder: this analyst's best cell (`M` before any improvement).
    pub best_cell: u64,
    /// Best-of: models in the batch (1 otherwise).
    pub models: u32,
    /// This analyst's last released cell on this target (`None` before any): version 2's
    /// rounded code is relative to it ([`super::codes`]).
    #[serde(default)]
    pub last_cell: Option<u64>,
}

impl Past {
    /// The past before any answer.
    pub fn start(rule: &Rule, rows: u64) -> Past {
        Past {
            threshold: KtCounts::default(),
            ladder: KtCounts::default(),
            best_cell: rule.grid(rows).map_or(0, |g| g.cells),
            models: 1,
            last_cell: None,
        }
    }
}

impl Rule {
    /// The rule's grid (`M = rows` for exact sealed scores); `None` for threshold.
    pub fn grid(&self, rows: u64) -> Option<Grid> {
        match *self {
            Rule::Rounded(g) | Rule::Ladder(g) | Rule::BestOf(g) | Rule::Sealed(Some(g)) => Some(g),
            Rule::Sealed(None) => Some(Grid { cells: rows.max(1) }),
            Rule::Threshold { .. } => None,
        }
    }

    /// `-ln p(symbol | past)` under code version 1 (see [`super::codes::Code`] for the codes
    /// by version); `+inf` for a symbol the rule cannot release at this past.
    pub fn code_nats(&self, rows: u64, past: &Past, symbol: &Symbol) -> f64 {
        let grid = self.grid(rows);
        match (self, symbol) {
            (Rule::Rounded(_) | Rule::Sealed(_), Symbol::Cell { index }) => match grid {
                Some(g) if *index <= g.cells => g.uniform_code(),
                _ => f64::INFINITY,
            },
            (Rule::Threshold { .. }, Symbol::Pass) => past.threshold.code_nats(true),
            (Rule::Threshold { .. }, Symbol::Fail) => past.threshold.code_nats(false),
            (Rule::Ladder(_), Symbol::NoImprovement) if past.best_cell == 0 => 0.0,
            (Rule::Ladder(_), Symbol::NoImprovement) => past.ladder.code_nats(false),
            (Rule::Ladder(_), Symbol::NewBest { cell }) if *cell < past.best_cell => {
                past.ladder.code_nats(true) + (past.best_cell as f64).ln()
            }
            (Rule::BestOf(g), Symbol::Best { model, cell })
                if *model < past.models && *cell <= g.cells =>
            {
                f64::from(past.models).ln() + g.uniform_code()
            }
            _ => f64::INFINITY,
        }
    }

    /// Every symbol the rule could release at this past, with its probability under code
    /// version 1; the code of a symbol is `-ln` of it. Used to check Kraft's inequality (the
    /// sum is at most 1).
    pub fn distribution(&self, rows: u64, past: &Past) -> Vec<(Symbol, f64)> {
        let symbols: Vec<Symbol> = match (self, self.grid(rows)) {
            (Rule::Threshold { .. }, _) => vec![Symbol::Pass, Symbol::Fail],
            (Rule::Ladder(_), _) => std::iter::once(Symbol::NoImprovement)
                .chain((0..past.best_cell).map(|cell| Symbol::NewBest { cell }))
                .collect(),
            (Rule::BestOf(_), Some(g)) => (0..past.models)
                .flat_map(|model| (0..=g.cells).map(move |cell| Symbol::Best { model, cell }))
                .collect(),
            (_, Some(g)) => (0..=g.cells).map(|index| Symbol::Cell { index }).collect(),
            (_, None) => Vec::new(),
        };
        symbols
            .into_iter()
            .map(|s| (s, (-self.code_nats(rows, past, &s)).exp()))
            .collect()
    }

    /// An upper bound on the total code (version 1) of the next `j` answers of one analyst on
    /// one target, whatever they are (used for `queries_left` and planning). Sealed answers count 0: a
    /// round released as the holdout's last event is never paid for by a later query.
    pub fn worst_case_nats(&self, rows: u64, past: &Past, j: u64) -> f64 {
        let jf = j as f64;
        match self {
            Rule::Rounded(g) => jf * g.uniform_code(),
            Rule::Threshold { .. } => past.threshold.worst_case_nats(j),
            Rule::Ladder(_) => {
                let b = past.best_cell;
                if b == 0 {
                    0.0
                } else {
                    past.ladder.worst_case_nats(j) + (j.min(b) as f64) * (b as f64).ln()
                }
            }
            Rule::BestOf(g) => jf * (f64::from(past.models.max(1)).ln() + g.uniform_code()),
            Rule::Sealed(_) => {
                let _ = rows;
                0.0
            }
        }
    }

    /// Core 2: the half-width of the interval this rule reports at `level_nats`, which is what
    /// the tolerance is judged on. `reference`: `None` for the worst case (the widest cell a
    /// release can have), `Some(mean)` for the cell holding that public reference score. The
    /// threshold rule reports `[0, TAU]` or nothing, and decides on the one-sided upper limit of
    /// the exact count: its figure stays that limit's spread at the reference score (1/2 in the
    /// worst case). `method` is the target's effective method (never `exact` for a bounded loss).
    pub fn reported_half_width(
        &self,
        rows: u64,
        binary: bool,
        method: Method,
        reference: Option<f64>,
        level_nats: f64,
        rounding: Rounding,
    ) -> f64 {
        match (self, self.grid(rows)) {
            (Rule::Threshold { .. }, _) | (_, None) => reference_half_width_with(
                rounding,
                method,
                rows,
                reference.unwrap_or(0.5),
                level_nats,
                self.sides(),
            )
            .unwrap_or(f64::INFINITY),
            (_, Some(g)) => match reference {
                None => g.widest_half_width(rows, binary, method, level_nats, rounding),
                Some(r) => g.cell_half_width(rows, binary, method, r, level_nats, rounding),
            },
        }
    }

    /// The sidedness of the rule's answers: threshold tests a one-sided upper bound.
    pub fn sides(&self) -> Sides {
        match self {
            Rule::Threshold { .. } => Sides::Upper,
            _ => Sides::Two,
        }
    }
}

impl Symbol {
    /// A plain sentence saying what the symbol certifies (inside the simultaneous guarantee).
    pub fn statement(&self, rule: &Rule, rows: u64) -> String {
        let value = |j: u64| rule.grid(rows).map_or(f64::NAN, |g| g.value(j));
        match *self {
            Symbol::Cell { index } => format!("score rounded to the grid: {}", value(index)),
            Symbol::Pass => match rule {
                Rule::Threshold { tau } => format!(
                    "pass: the true error is at most {tau} (inside the simultaneous guarantee)"
                ),
                _ => "pass".into(),
            },
            Symbol::Fail => "fail: certifies nothing; the one-sided test did not pass, which is \
                             not evidence that the error exceeds the threshold"
                .into(),
            Symbol::NoImprovement => {
                "no improvement: the best score so far stands; the interval covers the best \
                 true error among this analyst's submissions"
                    .into()
            }
            Symbol::NewBest { cell } => format!(
                "new best: {}; the interval covers the best true error among this analyst's \
                 submissions",
                value(cell)
            ),
            Symbol::Best { model, cell } => format!(
                "best of the batch: model {model} (0-based), score rounded to {}",
                value(cell)
            ),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grid_cells_partition_the_counts() {
        for &(n, m) in &[
            (1u64, 100u64),
            (7, 3),
            (1000, 100),
            (999, 7),
            (10, 100),
            (12345, 101),
        ] {
            let g = Grid { cells: m };
            let mut next = 0;
            for j in 0..=m {
                if let Some((lo, hi)) = g.errors_in_cell(n, j) {
                    assert_eq!(lo, next, "n={n} m={m} j={j}");
                    for k in lo..=hi {
                        assert_eq!(g.cell_of_errors(n, k), j);
                    }
                    next = hi + 1;
                }
            }
            assert_eq!(next, n + 1);
        }
    }

    #[test]
    fn rule_strings_round_trip_and_reject_bad_eta() {
        for s in [
            "rounded:0.01",
            "threshold:0.1",
            "ladder:0.05",
            "best-of:0.01",
            "sealed",
        ] {
            assert_eq!(s.parse::<Rule>().unwrap().to_string(), s);
        }
        assert_eq!(
            "rounded:1/3".parse::<Rule>().unwrap(),
            Rule::Rounded(Grid { cells: 3 })
        );
        let err = "rounded:0.03".parse::<Rule>().unwrap_err();
        assert!(err.0.contains("1/M"), "{err}");
        assert!("threshold:1.5".parse::<Rule>().is_err());
        assert!(
            "ladder"
                .parse::<Rule>()
                .unwrap_err()
                .0
                .contains("ladder:0.01")
        );
    }

    #[test]
    fn kt_worst_case_matches_enumeration() {
        // Exhaustive over all 2^j continuations.
        for &(hits, trials) in &[(0u64, 0u64), (3, 5), (0, 4)] {
            let start = KtCounts { hits, trials };
            for j in 0..10u32 {
                let mut worst = 0.0f64;
                for mask in 0..(1u32 << j) {
                    let mut c = start;
                    let mut total = 0.0;
                    for b in 0..j {
                        let hit = mask >> b & 1 == 1;
                        total += c.code_nats(hit);
                        c.record(hit);
                    }
                    worst = worst.max(total);
                }
                let bound = start.worst_case_nats(u64::from(j));
                assert!(
                    (bound - worst).abs() < 1e-9,
                    "{hits}/{trials} j={j}: {bound} {worst}"
                );
            }
        }
    }
}
