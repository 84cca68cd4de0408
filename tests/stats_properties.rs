//! Property tests of the intervals and the codes.

use holdout_ledger::stats::interval::{Method, Sides, errors_interval, mean_interval};
use holdout_ledger::stats::rules::{Grid, KtCounts, Past, Rule};
use proptest::prelude::*;

fn width(m: Method, n: u64, k: u64, level: f64) -> f64 {
    let ci = errors_interval(m, n, k, level, Sides::Two).unwrap();
    ci.upper - ci.lower
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(300))]

    /// The KL interval contains Clopper-Pearson at the same level (the fallback is safe).
    #[test]
    fn kl_contains_clopper_pearson(n in 1u64..200_000, frac in 0.0f64..=1.0, level in 0.01f64..400.0) {
        let k = ((n as f64) * frac).round() as u64;
        for sides in [Sides::Two, Sides::Upper, Sides::Lower] {
            let cp = errors_interval(Method::Exact, n, k, level, sides).unwrap();
            let kl = errors_interval(Method::Kl, n, k, level, sides).unwrap();
            prop_assert!(kl.lower <= cp.lower * (1.0 + 1e-12) && cp.upper <= kl.upper * (1.0 + 1e-12),
                "n={} k={} level={} {:?}: kl {:?} cp {:?}", n, k, level, sides, kl, cp);
            // The point estimate lies inside once each tail has probability <= 1/2
            // (level >= ln 2 nats); for d near 1 a one-sided limit may pass it, correctly.
            let p = k as f64 / n as f64;
            if level >= std::f64::consts::LN_2 {
                prop_assert!(cp.lower <= p && p <= cp.upper, "{:?} n={} k={}: {:?}", sides, n, k, cp);
            }
        }
    }

    /// Widths shrink with n (same error rate) and grow as the level tightens.
    #[test]
    fn widths_are_monotone(n in 1u64..50_000, frac in 0.0f64..=1.0, level in 0.05f64..200.0, extra in 0.01f64..50.0) {
        let k = ((n as f64) * frac).round() as u64;
        for m in [Method::Exact, Method::Kl, Method::Hoeffding] {
            let w = width(m, n, k, level);
            prop_assert!(width(m, 4 * n, 4 * k, level) <= w * (1.0 + 1e-12), "{:?} n={} k={}", m, n, k);
            prop_assert!(width(m, n, k, level + extra) >= w * (1.0 - 1e-12), "{:?} n={} k={}", m, n, k);
        }
    }

    /// Levels far past f64 underflow still give finite, valid intervals.
    #[test]
    fn extreme_levels_stay_valid(n in 1u64..2_000_000, frac in 0.0f64..=1.0, big in prop::sample::select(vec![1e3, 1e4, 1e5])) {
        let k = ((n as f64) * frac).round() as u64;
        let p = k as f64 / n as f64;
        for m in [Method::Exact, Method::Kl, Method::Hoeffding] {
            for sides in [Sides::Two, Sides::Upper, Sides::Lower] {
                let ci = errors_interval(m, n, k, big, sides).unwrap();
                prop_assert!(ci.lower.is_finite() && ci.upper.is_finite());
                prop_assert!(0.0 <= ci.lower && ci.lower <= p && p <= ci.upper && ci.upper <= 1.0,
                    "{:?} {:?} n={} k={} level={}: {:?}", m, sides, n, k, big, ci);
            }
        }
        let ci = mean_interval(Method::Kl, n, p, big, Sides::Two).unwrap();
        prop_assert!(ci.lower <= p && p <= ci.upper);
    }

    /// Kraft: at every public past, the probabilities of all symbols sum to at most 1, every
    /// symbol has p > 0, and the code used is -ln of that probability.
    #[test]
    fn every_code_satisfies_kraft(
        rows in 1u64..3000, m in 1u64..300, hits in 0u64..50, misses in 0u64..50,
        lhits in 0u64..50, lmisses in 0u64..50, best in 0u64..300, models in 1u32..8,
    ) {
        let g = Grid { cells: m };
        let rules = [Rule::Rounded(g), Rule::Threshold { tau: 0.2 }, Rule::Ladder(g), Rule::BestOf(g), Rule::Sealed(Some(g)), Rule::Sealed(None)];
        for rule in rules {
            let past = Past {
                threshold: KtCounts { hits, trials: hits + misses },
                ladder: KtCounts { hits: lhits, trials: lhits + lmisses },
                best_cell: best.min(m),
                models,
                last_cell: None,
            };
            let dist = rule.distribution(rows, &past);
            prop_assert!(!dist.is_empty());
            let total: f64 = dist.iter().map(|(_, p)| p).sum();
            prop_assert!(total <= 1.0 + 1e-9, "{} sums to {}", rule, total);
            for (s, p) in &dist {
                prop_assert!(*p > 0.0, "{} gives {:?} p = 0", rule, s);
                let code = rule.code_nats(rows, &past, s);
                prop_assert!((code + p.ln()).abs() < 1e-9);
            }
        }
    }
}

#[test]
fn zero_errors_one_sided_is_one_minus_d_to_the_one_over_n() {
    // Closed form 1 - d^(1/n); rule of three 3/n at 95 % (common practice) for n >= 100.
    for n in [100u64, 1000, 10_000, 1_000_000] {
        let ci = errors_interval(Method::Exact, n, 0, 20f64.ln(), Sides::Upper).unwrap();
        // 1 - d^(1/n), formed without cancellation; the naive form agrees to its own precision.
        let exact = -(0.05f64.ln() / n as f64).exp_m1();
        assert!((ci.upper - exact).abs() <= 1e-14 * exact, "n={n}");
        let naive = 1.0 - 0.05f64.powf(1.0 / n as f64);
        assert!((ci.upper - naive).abs() <= 1e-9 * exact, "n={n}");
        let three = 3.0 / n as f64;
        assert!(
            (ci.upper / three - 1.0).abs() < 0.02,
            "n={n}: {} vs {three}",
            ci.upper
        );
        let two = errors_interval(Method::Exact, n, 0, 20f64.ln(), Sides::Two).unwrap();
        assert!((two.upper + (0.025f64.ln() / n as f64).exp_m1()).abs() < 1e-14 * two.upper);
    }
}

#[test]
fn hoeffding_worked_example() {
    // sqrt(ln(2/0.05) / 2000) = 0.042947 (DESIGN 3 formula).
    let ci = mean_interval(Method::Hoeffding, 1000, 0.5, 20f64.ln(), Sides::Two).unwrap();
    assert_eq!(format!("{:.5}", ci.half_width()), "0.04295");
    let one = mean_interval(Method::Hoeffding, 1000, 0.5, 20f64.ln(), Sides::Upper).unwrap();
    assert!((one.upper - 0.5 - (20f64.ln() / 2000.0).sqrt()).abs() < 1e-15);
}
