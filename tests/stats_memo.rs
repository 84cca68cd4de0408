//! The per-thread memo of Beta evaluations (`stats::beta::memo`) cannot change a number:
//! intervals computed with it, cold and warm, are bit for bit those computed without it.

use holdout_ledger::stats::beta::{ln_incomplete_beta, memo};
use holdout_ledger::stats::interval::{
    Method, Rounding, Sides, errors_interval_with, errors_range_interval_with,
};
use holdout_ledger::stats::rules::Grid;
use proptest::prelude::*;

/// Bits of an interval result (error or limits), so that comparisons are exact.
fn bits(r: Result<holdout_ledger::stats::interval::Interval, impl std::fmt::Debug>) -> String {
    match r {
        Ok(ci) => format!("{:016x} {:016x}", ci.lower.to_bits(), ci.upper.to_bits()),
        Err(e) => format!("{e:?}"),
    }
}

/// `f` without the memo, then with an empty memo (every evaluation a miss), then again with the
/// memo as that left it (the repeated evaluations or solves now hits). Returns the three
/// results, the evaluations the cold run made and the remembered values the warm run took.
fn three_ways<T>(f: impl Fn() -> T) -> (T, T, T, u64, u64) {
    let off = memo::with_memo(false, &f);
    let (h0, m0) = memo::counts();
    memo::with_memo(false, memo::clear);
    let cold = memo::with_memo(true, &f);
    let (h1, m1) = memo::counts();
    let s1 = memo::solve_hits();
    let warm = memo::with_memo(true, &f);
    let (h2, _) = memo::counts();
    let _ = h1 - h0;
    // A warm run takes remembered evaluations, or whole remembered solves (then it evaluates
    // nothing at all).
    (off, cold, warm, m1 - m0, h2 - h1 + memo::solve_hits() - s1)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    /// Clopper-Pearson limits (both roundings, every sidedness, one count or a cell's range of
    /// counts) agree bit for bit with and without the memo, cold and warm.
    #[test]
    fn cached_and_uncached_intervals_agree_bit_for_bit(
        n in 1u64..200_000,
        frac in 0.0f64..=1.0,
        span in 0u64..50,
        level in prop_oneof![0.01f64..5.0, 5.0f64..400.0, prop::sample::select(vec![1e3, 1e4])],
    ) {
        let k = ((n as f64) * frac).round() as u64;
        let k_hi = (k + span).min(n);
        for rounding in [Rounding::Nearest, Rounding::Outward] {
            for sides in [Sides::Two, Sides::Upper, Sides::Lower] {
                let (off, cold, warm, missed, hit) = three_ways(|| {
                    (
                        bits(errors_interval_with(rounding, Method::Exact, n, k, level, sides)),
                        bits(errors_range_interval_with(
                            rounding, Method::Exact, n, k, k_hi, level, sides,
                        )),
                    )
                });
                prop_assert_eq!(&off, &cold, "n={} k={}..{} level={} {:?} {:?}", n, k, k_hi, level, rounding, sides);
                prop_assert_eq!(&off, &warm, "n={} k={}..{} level={} {:?} {:?}", n, k, k_hi, level, rounding, sides);
                // When the cold run evaluated the Beta function, the warm run must have taken
                // remembered values: the cached path is the one compared.
                if missed > 0 {
                    prop_assert!(hit > 0, "warm run took no remembered value");
                }
            }
        }
    }

    /// The widest reported cell (what core 2 judges the tolerance on, and what every answer's
    /// forecast computes) agrees bit for bit too.
    #[test]
    fn cached_and_uncached_widest_cells_agree_bit_for_bit(
        n in 1u64..100_000,
        cells in 1u64..1000,
        level in 0.5f64..300.0,
    ) {
        let g = Grid { cells };
        for rounding in [Rounding::Nearest, Rounding::Outward] {
            let solves_before = memo::solve_hits();
            let (off, cold, warm, _, _) = three_ways(|| {
                g.widest_half_width(n, true, Method::Exact, level, rounding).to_bits()
            });
            prop_assert_eq!(off, cold);
            prop_assert_eq!(off, warm);
            // The widest cell asks for the lower limit at k and the upper at n - k, one root:
            // remembered solves were taken (so the comparison above covers that path), when
            // the span leaves room for four counts around the centre.
            let s = g.max_span(n).min(n);
            if n >= s + 6 {
                prop_assert!(memo::solve_hits() > solves_before, "n={} cells={}", n, cells);
            }
        }
    }

    /// The incomplete Beta function itself, at arbitrary points.
    #[test]
    fn cached_and_uncached_incomplete_beta_agree_bit_for_bit(
        a in 0.5f64..1e6,
        b in 0.5f64..1e6,
        x in 0.0f64..=1.0,
    ) {
        let (off, cold, warm, missed, hit) =
            three_ways(|| ln_incomplete_beta(a, b, x).map(f64::to_bits));
        prop_assert_eq!(off, cold);
        prop_assert_eq!(off, warm);
        if missed > 0 {
            prop_assert!(hit > 0);
        }
    }
}

/// Many inversions at one row count and many levels, interleaved as an audit interleaves them
/// (so that remembered entries are evicted and promoted), against the uncached results.
#[test]
fn an_audit_like_sequence_agrees_with_the_uncached_one() {
    let n = 2000u64;
    let g = Grid { cells: 100 };
    let mut level = 3.7f64;
    let before = memo::counts();
    for i in 0..400u64 {
        level += 4.615_120_516_934_1 + (i % 7) as f64 * 1e-3;
        let j = 5 + (i * 37) % 40;
        let run = || {
            (
                g.interval(
                    j,
                    n,
                    true,
                    Method::Exact,
                    level,
                    Sides::Two,
                    Rounding::Outward,
                )
                .map(|ci| (ci.lower.to_bits(), ci.upper.to_bits())),
                g.widest_half_width(n, true, Method::Exact, level, Rounding::Outward)
                    .to_bits(),
            )
        };
        let cached = memo::with_memo(true, run);
        let plain = memo::with_memo(false, run);
        assert_eq!(cached, plain, "answer {i} at level {level}, cell {j}");
    }
    let after = memo::counts();
    assert!(
        after.0 > before.0,
        "the sequence should reuse remembered evaluations"
    );
}
