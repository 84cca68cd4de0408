//! Codes for answer transcripts: `p(symbol | public past)` for every answer rule, by code
//! version (DESIGN 4.2, 4.3, 4.8). A holdout's policy records its `code_version`; a policy
//! recorded before the field existed is version 1, so older ledgers replay with their codes.
//!
//! | version | `rounded:ETA` | `ladder:ETA` (after "improved") | other rules |
//! |---|---|---|---|
//! | 1 | uniform over the `M + 1` cells: `ln(M+1)` | uniform over the `b` releasable cells: `ln b` | as in [`super::rules`] |
//! | 2 | relative to the team's last released cell `c0` (below); the first answer uniform | the drop `j = b - cell` in `1..=b`: half uniform, half geometric (below); the first new best uniform | unchanged |
//!
//! Version 2, rounded (DESIGN 4.8, relative rounded code): for a team (and target) whose last
//! released cell is `c0`,
//! `p(c) = 1/2 * 1/(M+1) + 1/2 * 2^-|c - c0| / Z(c0)`, `Z(c0) = sum over c of 2^-|c - c0|`
//! `= 3 - 2^-c0 - 2^-(M - c0)`. Both halves are probability distributions over the grid, so
//! the sum over every possible next cell is 1 at every past (Kraft). On a 0.01 grid (M = 100)
//! a repeat of `c0` costs 1.76 nats (a little under `ln 6`), a move of one cell 2.43, of two
//! 3.07, against `ln 101` = 4.62 for the uniform code; no cell costs more than `ln(2(M+1))`,
//! one `ln 2` above the uniform code.
//!
//! Version 2, ladder (DESIGN 4.8, ladder drop code): the improve/no-improve bit keeps its
//! Krichevsky-Trofimov code; a new best `cell < b` (`b` the team's best cell) is coded by its
//! drop `j = b - cell` in `1..=b` with `p(j) = 1/2 * 1/b + 1/2 * 2^-j / (1 - 2^-b)` (a uniform
//! and a truncated geometric, both normalised over `1..=b`): small drops are cheap, no drop
//! costs more than `ln(2b)`, and the worst case of many new bests is far below version 1's
//! `ln b` each, because their drops add up to at most `b` ([`drops_worst_nats`]). While the
//! team's best is still the starting best (`b = M`, no new best released to it yet) the drop
//! says where the team starts, not how much it improved, so the first new best keeps version
//! 1's uniform `ln b`.
//!
//! What the codes may depend on: only the public past ([`Past`]: earlier released symbols,
//! their counts, the team's last released cell and best cell), never labels or exact scores.
//! Under `shared` a team's last cell is public to all; under `isolated` it is part of that
//! team's own transcript. The guarantee is unchanged (DESIGN 4.2): any code whose
//! probabilities sum to at most 1 over the possible next symbols at every public past keeps
//! the transcript union bound valid; a cheaper code only makes typical answers cost less.
//!
//! ```
//! use holdout_ledger::stats::codes::Code;
//! use holdout_ledger::stats::rules::{Past, Rule, Symbol};
//! let rule: Rule = "rounded:0.01".parse().unwrap();
//! let mut past = Past::start(&rule, 10_000);
//! let cell = |index| Symbol::Cell { index };
//! // First answer: uniform over the 101 cells.
//! assert!((Code::Relative.nats(&rule, 10_000, &past, &cell(30)) - 101f64.ln()).abs() < 1e-12);
//! past.last_cell = Some(30);
//! // A repeat of the team's last cell: p = 1/202 + 1/(2Z), Z = 3 - 2^-30 - 2^-70 (about 1/6).
//! let repeat = Code::Relative.nats(&rule, 10_000, &past, &cell(30));
//! let z = 3.0 - 0.5f64.powi(30) - 0.5f64.powi(70);
//! assert!((repeat + (1.0 / 202.0 + 0.5 / z).ln()).abs() < 1e-12);
//! // A far move costs at most ln(202), one ln 2 above the uniform code.
//! assert!(Code::Relative.nats(&rule, 10_000, &past, &cell(90)) <= 202f64.ln());
//! ```

use statrs::function::gamma::ln_gamma;
use std::f64::consts::LN_2;

use super::rules::{Past, Rule, Symbol};

/// The code version new holdouts record (`Policy::code_version`).
pub const CODE: u32 = 2;

/// Every code version this binary replays.
pub const KNOWN_CODES: [u32; 2] = [1, 2];

/// A family of codes, one per answer rule.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Code {
    /// Version 1: the codes of [`Rule::code_nats`] (uniform over the grid for rounded answers,
    /// uniform over the releasable cells for a ladder's new best).
    Uniform,
    /// Version 2: rounded answers relative to the team's last released cell, ladder drops
    /// after the first new best half uniform and half geometric; every other rule as in
    /// version 1.
    Relative,
}

impl Code {
    /// The code of a holdout whose policy records `code_version` (1 for a missing field).
    pub fn for_version(code_version: u32) -> Code {
        if code_version >= 2 {
            Code::Relative
        } else {
            Code::Uniform
        }
    }

    /// `-ln p(symbol | past)`; `+inf` for a symbol the rule cannot release at this past.
    pub fn nats(self, rule: &Rule, rows: u64, past: &Past, symbol: &Symbol) -> f64 {
        match (self, rule, symbol) {
            (Code::Relative, Rule::Rounded(g), Symbol::Cell { index }) => {
                relative_cell_nats(g.cells, past.last_cell, *index)
            }
            (Code::Relative, Rule::Ladder(g), Symbol::NewBest { cell })
                if *cell < past.best_cell && past.best_cell < g.cells =>
            {
                past.ladder.code_nats(true) + drop_nats(past.best_cell, past.best_cell - cell)
            }
            _ => rule.code_nats(rows, past, symbol),
        }
    }

    /// Every symbol the rule could release at this past, with its probability (the code of a
    /// symbol is `-ln` of it). The symbols are those of [`Rule::distribution`]; the sum is at
    /// most 1 (Kraft), which `tests/stats_codes.rs` checks over many random pasts.
    pub fn distribution(self, rule: &Rule, rows: u64, past: &Past) -> Vec<(Symbol, f64)> {
        rule.distribution(rows, past)
            .into_iter()
            .map(|(s, _)| (s, (-self.nats(rule, rows, past, &s)).exp()))
            .collect()
    }

    /// An upper bound on the total code of the next `j` answers of one analyst on one target,
    /// whatever they are (for `queries_left` and planning); see [`Rule::worst_case_nats`].
    pub fn worst_case_nats(self, rule: &Rule, rows: u64, past: &Past, j: u64) -> f64 {
        match (self, rule) {
            (Code::Relative, Rule::Rounded(g)) => {
                if j == 0 {
                    return 0.0;
                }
                let each = relative_worst_nats(g.cells);
                match past.last_cell {
                    // The first answer of a team is uniform; the rest relative.
                    None => g.uniform_code() + (j - 1) as f64 * each,
                    Some(_) => j as f64 * each,
                }
            }
            (Code::Relative, Rule::Ladder(g)) => {
                let b = past.best_cell;
                let bests = j.min(b);
                if bests == 0 {
                    // No answer, or a best of 0 after which only "no improvement" (p = 1) is
                    // possible.
                    return 0.0;
                }
                let drops = if b >= g.cells {
                    // From the starting best the first new best is uniform over b cells; the
                    // rest start from a best of at most b - 1.
                    (b as f64).ln() + drops_worst_nats(b - 1, bests - 1)
                } else {
                    drops_worst_nats(b, bests)
                };
                past.ladder.worst_case_nats(j) + drops
            }
            _ => rule.worst_case_nats(rows, past, j),
        }
    }
}

/// The code of a release of class counts (DESIGN 4.8, "class counts are label facts"): the
/// counts `(n_1, ..., n_C)` of `rows` rows over `classes` classes, coded uniformly over every
/// composition of `rows` into `classes` non-negative parts, `p = 1 / C(n + C - 1, C - 1)`.
/// The compositions are the symbols the release could take; they number exactly
/// `C(n + C - 1, C - 1)`, so the probabilities sum to 1 (Kraft) and every possible count
/// vector has `p > 0`. The code depends on `n` and `C` only (public facts), never on the
/// counts: what a release costs is known before it is made.
///
/// Computed as `sum over j = 1..C-1 of ln(1 + n / j)`, then raised by a relative `1e-12` so
/// that float rounding can only overcharge: about 34.2 nats for 180 rows and 10 classes,
/// `ln(n + 1)` for two classes. `0` for one class (nothing is revealed).
pub fn composition_nats(rows: u64, classes: u32) -> f64 {
    let n = rows as f64;
    let exact: f64 = (1..classes).map(|j| (n / f64::from(j)).ln_1p()).sum();
    exact * (1.0 + 1e-12)
}

/// An upper bound on the total drop code of `k` new bests from a best of `b` cells (after the
/// team's first new best), whatever the drops: each new best lowers the best by at least one
/// cell, so the `t`-th (from 0) is coded over at most `b - t` cells and costs at most
/// `ln(2(b - t))` (the uniform half alone); and a drop of `j` costs at most `(1 + j) ln 2`
/// (the geometric half alone) with the drops summing to at most `b`. Both totals bound the
/// sum, so their minimum does: `min(k ln 2 + ln(b! / (b-k)!), (k + b) ln 2)`. Many new bests
/// are therefore cheap in the worst case too (each is a small drop). The log-factorials carry
/// a margin of `1e-9` nats for `ln_gamma`'s rounding.
pub fn drops_worst_nats(b: u64, k: u64) -> f64 {
    let k = k.min(b);
    if k == 0 {
        return 0.0;
    }
    let (bf, kf) = (b as f64, k as f64);
    let falling = if k <= 64 {
        (0..k).map(|t| (bf - t as f64).ln()).sum::<f64>()
    } else {
        ln_gamma(bf + 1.0) - ln_gamma(bf - kf + 1.0) + 1e-9 * (1.0 + bf)
    };
    (kf * LN_2 + falling).min((kf + bf) * LN_2)
}

/// `2^-d` for a whole number `d >= 0` (0 once it underflows).
fn half_pow(d: u64) -> f64 {
    (-(d as f64)).exp2()
}

/// Version 2's code of cell `cell` on a grid of `cells + 1` cells, after the team's last cell
/// `last` (`None`: the team's first answer, uniform). `+inf` off the grid.
pub fn relative_cell_nats(cells: u64, last: Option<u64>, cell: u64) -> f64 {
    if cell > cells {
        return f64::INFINITY;
    }
    let size = cells as f64 + 1.0;
    let Some(c0) = last else {
        return size.ln();
    };
    let c0 = c0.min(cells);
    let z = 3.0 - half_pow(c0) - half_pow(cells - c0);
    // p = (1 + (M+1) 2^-d / Z) / (2 (M+1)).
    let x = size * half_pow(cell.abs_diff(c0)) / z;
    (2.0 * size).ln() - x.ln_1p()
}

/// The largest code [`relative_cell_nats`] gives on a grid of `cells + 1` cells, at any past:
/// `ln(2(M+1))` (the uniform half alone), an upper bound that is tight to about `2^-(M/2)`.
pub fn relative_worst_nats(cells: u64) -> f64 {
    (2.0 * (cells as f64 + 1.0)).ln()
}

/// Version 2's code of a ladder drop of `drop` cells when `below` cells lie below the best
/// (drops `1..=below`): `p = 1/2 * 1/below + 1/2 * 2^-drop / (1 - 2^-below)`. `+inf` for a
/// drop the ladder cannot release.
pub fn drop_nats(below: u64, drop: u64) -> f64 {
    if drop == 0 || drop > below {
        return f64::INFINITY;
    }
    let b = below as f64;
    let x = b * half_pow(drop) / (1.0 - half_pow(below));
    (2.0 * b).ln() - x.ln_1p()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_code_sums_to_one_on_small_grids() {
        for cells in 1..40u64 {
            for c0 in 0..=cells {
                let total: f64 = (0..=cells)
                    .map(|c| (-relative_cell_nats(cells, Some(c0), c)).exp())
                    .sum();
                assert!((total - 1.0).abs() < 1e-12, "M={cells} c0={c0}: {total}");
            }
        }
    }

    #[test]
    fn drops_bound_is_the_same_on_both_sides_of_the_loop_limit() {
        for b in [70u64, 150, 1000, 100_000] {
            for k in 55..=b.min(75) {
                let falling: f64 = (0..k).map(|t| ((b - t) as f64).ln()).sum();
                let direct = (k as f64 * LN_2 + falling).min((k + b) as f64 * LN_2);
                let got = drops_worst_nats(b, k);
                assert!(got >= direct - 1e-12, "b={b} k={k}: {got} < {direct}");
                assert!(
                    got - direct < 1e-6 * (1.0 + direct),
                    "b={b} k={k}: {got} {direct}"
                );
            }
        }
        assert_eq!(drops_worst_nats(5, 0), 0.0);
        assert_eq!(drops_worst_nats(0, 3), 0.0);
    }

    #[test]
    fn drop_code_sums_to_one() {
        for below in 1..60u64 {
            let total: f64 = (1..=below).map(|j| (-drop_nats(below, j)).exp()).sum();
            assert!((total - 1.0).abs() < 1e-12, "b={below}: {total}");
            assert!(drop_nats(below, below) <= (2.0 * below as f64).ln());
        }
        assert!(drop_nats(1, 1).abs() < 1e-15);
        assert_eq!(drop_nats(5, 0), f64::INFINITY);
        assert_eq!(drop_nats(5, 6), f64::INFINITY);
    }
}
