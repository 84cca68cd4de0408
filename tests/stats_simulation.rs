//! Monte Carlo checks with a seeded PRNG (splitmix64): coverage for fixed models, the
//! classic overfitting attack against our accounting and against naive intervals, and the
//! paired comparison. Each test runs in a few seconds at the test profile's opt-level 1.

use holdout_ledger::stats::accounting::{Accountant, Outcome, QueryRequest};
use holdout_ledger::stats::interval::{Method, Sides, errors_interval};
use holdout_ledger::stats::paired::{paired_bounded, paired_errors};
use holdout_ledger::stats::policy::{Policy, Sharing, TargetPolicy};
use holdout_ledger::stats::schedule::Shares;

/// splitmix64 (Steele, Lea and Flood 2014), seeded.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn uniform(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn binomial(&mut self, n: u64, p: f64) -> u64 {
        (0..n).filter(|_| self.uniform() < p).count() as u64
    }
}

#[test]
fn coverage_for_fixed_models_is_at_least_one_minus_d() {
    let mut rng = Rng(1);
    let (n, d, trials) = (300u64, 0.1f64, 3000u32);
    let level = (1.0 / d).ln();
    for p in [0.01, 0.2, 0.5] {
        for m in [Method::Exact, Method::Kl, Method::Hoeffding] {
            let mut covered = 0u32;
            let mut covered_upper = 0u32;
            for _ in 0..trials {
                let k = rng.binomial(n, p);
                covered += u32::from(
                    errors_interval(m, n, k, level, Sides::Two)
                        .unwrap()
                        .contains(p),
                );
                covered_upper += u32::from(
                    errors_interval(m, n, k, level, Sides::Upper)
                        .unwrap()
                        .contains(p),
                );
            }
            // Allow 3 binomial standard deviations of simulation error.
            let floor = (1.0 - d) - 3.0 * (d * (1.0 - d) / f64::from(trials)).sqrt();
            for (what, c) in [("two-sided", covered), ("upper", covered_upper)] {
                let rate = f64::from(c) / f64::from(trials);
                assert!(
                    rate >= floor,
                    "{m:?} p={p} {what}: coverage {rate} < {floor}"
                );
            }
        }
    }
}

const WORDS: usize = 63; // 4032 bits, the first 4000 used

fn random_bits(rng: &mut Rng) -> [u64; WORDS] {
    let mut v = [0u64; WORDS];
    for w in v.iter_mut() {
        *w = rng.next();
    }
    v[WORDS - 1] &= (1u64 << (4000 - 64 * (WORDS - 1))) - 1;
    v
}

fn errors(a: &[u64; WORDS], b: &[u64; WORDS]) -> u64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| u64::from((x ^ y).count_ones()))
        .sum()
}

/// One run of the attack: returns (all our intervals covered 0.5, naive final covered 0.5,
/// naive final empirical error, our final half-width).
fn attack_run(seed: u64, queries: usize) -> (bool, bool, f64, f64) {
    let n = 4000u64;
    let mut rng = Rng(seed);
    let labels = random_bits(&mut rng);
    let policy = Policy {
        delta: 0.05,
        schedule: "series".parse().unwrap(),
        rule: "rounded:0.01".parse().unwrap(),
        tolerance: 1.0,
        tolerance_reference: Default::default(),
        sharing: Sharing::Shared,
        shares: Shares::None,
        rows: n,
        targets: vec![TargetPolicy {
            name: "y".into(),
            binary: true,
            method: Method::Exact,
            class_counts: None,
        }],
        core_version: holdout_ledger::stats::CORE,
        code_version: holdout_ledger::stats::codes::CODE,
    };
    let mut acc = Accountant::new(policy).unwrap();
    let req = QueryRequest {
        analyst: "attacker".into(),
        target: 0,
        models: 1,
    };
    let mut all_covered = true;
    let mut votes = vec![0i32; 4000];
    let ask = |acc: &mut Accountant, v: &[u64; WORDS]| {
        let charge = acc.quote(&req).expect("tolerance 1 never refuses");
        let ans = acc
            .answer(&req, &charge, &[Outcome::Errors(errors(v, &labels))])
            .unwrap();
        (ans.released_score.unwrap(), ans.interval)
    };
    for _ in 0..queries {
        let v = random_bits(&mut rng);
        let (score, ci) = ask(&mut acc, &v);
        // Every random vector has true error exactly 1/2 on fresh labels.
        all_covered &= ci.contains(0.5);
        if score < 0.5 {
            for (i, vote) in votes.iter_mut().enumerate() {
                *vote += if v[i / 64] >> (i % 64) & 1 == 1 {
                    1
                } else {
                    -1
                };
            }
        }
    }
    let mut vote = [0u64; WORDS];
    for (i, c) in votes.iter().enumerate() {
        if *c > 0 {
            vote[i / 64] |= 1 << (i % 64);
        }
    }
    let (_, ci) = ask(&mut acc, &vote);
    all_covered &= ci.contains(0.5);
    let k = errors(&vote, &labels);
    let naive = errors_interval(Method::Exact, n, k, 20f64.ln(), Sides::Two).unwrap();
    (
        all_covered,
        naive.contains(0.5),
        k as f64 / n as f64,
        ci.half_width(),
    )
}

#[test]
fn overfitting_attack_is_covered_by_the_accounting_and_not_by_naive_intervals() {
    let runs = 100u64;
    let mut ours = 0;
    let mut naive = 0;
    let mut sum_err = 0.0;
    let mut width = 0.0;
    for seed in 0..runs {
        let (o, nv, e, h) = attack_run(1000 + seed, 200);
        ours += u32::from(o);
        naive += u32::from(nv);
        sum_err += e;
        width = h;
    }
    let mean_err = sum_err / runs as f64;
    println!(
        "ours covered {ours}/{runs}, naive {naive}/{runs}, vote error {mean_err:.3}, half-width {width:.3}"
    );
    // The majority vote really overfits: its empirical error is far below the true 0.5.
    assert!(mean_err < 0.45, "{mean_err}");
    // Simultaneous coverage of the accounting: >= 1 - delta (here every run).
    assert!(f64::from(ours) >= 0.95 * runs as f64, "ours {ours}/{runs}");
    // Naive per-query intervals fail much more often.
    assert!(
        f64::from(naive) <= 0.2 * runs as f64,
        "naive {naive}/{runs}"
    );
}

#[test]
fn paired_interval_is_valid_and_narrow_when_models_agree() {
    let mut rng = Rng(7);
    let (n, d) = (2000u64, 0.05f64);
    let level = (1.0 / d).ln();
    // Rows: both wrong 0.18, only A wrong 0.02, only B wrong 0.04 -> err A 0.20, err B 0.22.
    let (both, only_a, only_b) = (0.18, 0.02, 0.04);
    let truth = only_a - only_b;
    let trials = 1000;
    let (mut covered, mut covered_b) = (0, 0);
    let (mut paired_w, mut separate_w) = (0.0, 0.0);
    for _ in 0..trials {
        let (mut n10, mut n01, mut ka, mut kb) = (0u64, 0u64, 0u64, 0u64);
        for _ in 0..n {
            let u = rng.uniform();
            if u < both {
                ka += 1;
                kb += 1;
            } else if u < both + only_a {
                ka += 1;
                n10 += 1;
            } else if u < both + only_a + only_b {
                kb += 1;
                n01 += 1;
            }
        }
        let ci = paired_errors(n, n10, n01, level).unwrap();
        covered += u32::from(ci.contains(truth));
        paired_w += ci.upper - ci.lower;
        // Separate intervals at d/2 each, differenced.
        let a = errors_interval(Method::Exact, n, ka, level + 2f64.ln(), Sides::Two).unwrap();
        let b = errors_interval(Method::Exact, n, kb, level + 2f64.ln(), Sides::Two).unwrap();
        separate_w += (a.upper - b.lower) - (a.lower - b.upper);
        // Bounded-loss version on the same rows: D in {-1, 0, 1}.
        let s = n10 as f64 - n01 as f64;
        let s2 = (n10 + n01) as f64;
        covered_b += u32::from(paired_bounded(n, s, s2, level).unwrap().contains(truth));
    }
    let rate = f64::from(covered) / f64::from(trials);
    let rate_b = f64::from(covered_b) / f64::from(trials);
    println!(
        "paired coverage {rate}, bounded {rate_b}, width {:.4} vs separate {:.4}",
        paired_w / f64::from(trials),
        separate_w / f64::from(trials)
    );
    assert!(rate >= 0.95 - 3.0 * (0.05f64 * 0.95 / 1000.0).sqrt());
    assert!(rate_b >= 0.95 - 3.0 * (0.05f64 * 0.95 / 1000.0).sqrt());
    assert!(paired_w < 0.5 * separate_w, "{paired_w} vs {separate_w}");
}
