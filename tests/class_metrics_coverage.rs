//! Coverage by simulation (seeded, modest size) of the balanced-error interval (a class of 5
//! rows among them) and of the AUC interval (10 positives against 1,000 negatives): the share
//! of draws whose interval misses the true value must not exceed the nominal failure
//! probability (issue 18, "done when").

use holdout_ledger::stats::classes::{Auc, auc, auc_interval, class_intervals};
use holdout_ledger::stats::interval::{Method, Rounding, Sides};

/// SplitMix64 (common practice), seeded: the same draws on every run.
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
    /// Standard normal by Box-Muller.
    fn normal(&mut self) -> f64 {
        let u = 1.0 - self.uniform();
        let v = self.uniform();
        (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos()
    }
}

fn rounding() -> Rounding {
    Rounding::for_core(holdout_ledger::stats::CORE)
}

#[test]
fn balanced_error_interval_covers_at_least_nominally() {
    // Failure probability 0.2 (so misses would show in 3,000 draws), level ln(1/0.2).
    let delta = 0.2f64;
    let level = -delta.ln();
    let counts = [5u64, 40, 300];
    let rates = [0.4f64, 0.15, 0.03];
    let truth = rates.iter().sum::<f64>() / 3.0;
    let mut rng = Rng(18);
    let trials = 3000;
    let (mut balanced_misses, mut class_misses, mut unsplit_misses) = (0, 0, 0);
    for _ in 0..trials {
        let errors: Vec<u64> = counts
            .iter()
            .zip(rates)
            .map(|(&n, p)| (0..n).filter(|_| rng.uniform() < p).count() as u64)
            .collect();
        let ci = class_intervals(rounding(), &counts, &errors, level).unwrap();
        if !(ci.balanced.lower <= truth && truth <= ci.balanced.upper) {
            balanced_misses += 1;
        }
        if ci
            .classes
            .iter()
            .zip(rates)
            .any(|(i, p)| !(i.lower <= p && p <= i.upper))
        {
            class_misses += 1;
        }
        // Each class at the full level (no split over the classes): not jointly valid.
        let unsplit = class_intervals(rounding(), &counts, &errors, level - 3f64.ln()).unwrap();
        if unsplit
            .classes
            .iter()
            .zip(rates)
            .any(|(i, p)| !(i.lower <= p && p <= i.upper))
        {
            unsplit_misses += 1;
        }
    }
    let share = |m: u64| m as f64 / trials as f64;
    eprintln!(
        "balanced error: {balanced_misses}/{trials} misses, some class missed {class_misses}/{trials}, \
         without the split {unsplit_misses}/{trials} (nominal {delta})"
    );
    assert!(share(class_misses) <= delta, "{class_misses}");
    assert!(share(balanced_misses) <= delta, "{balanced_misses}");
    // The intervals are not trivially wide: without the split over the classes the same draws
    // miss more often.
    assert!(
        unsplit_misses > class_misses,
        "{unsplit_misses} {class_misses}"
    );
}

/// The standard normal distribution function, by statrs' erfc.
fn phi(x: f64) -> f64 {
    0.5 * statrs::function::erf::erfc(-x / std::f64::consts::SQRT_2)
}

#[test]
fn auc_interval_covers_at_least_nominally_with_ten_positives() {
    let delta = 0.2f64;
    let level = -delta.ln();
    // Negatives N(0, 1), positives N(1, 1): true AUC = P(X+ > X-) = Phi(1 / sqrt 2).
    let shift = 1.0;
    let truth = phi(shift / std::f64::consts::SQRT_2);
    assert!((truth - 0.760_249).abs() < 1e-5, "{truth}");
    let (pos, neg) = (10usize, 1000usize);
    let mut rng = Rng(1963);
    let trials = 1500;
    let (mut kl_misses, mut hoeffding_misses, mut wider) = (0, 0, 0);
    let mut labels = vec![false; neg];
    labels.extend(std::iter::repeat_n(true, pos));
    for _ in 0..trials {
        let mut scores: Vec<f64> = (0..neg).map(|_| rng.normal()).collect();
        for _ in 0..pos {
            scores.push(shift + rng.normal());
        }
        let a: Auc = auc(&labels, &scores).unwrap();
        assert_eq!(a.effective_rows(), 10);
        let kl = auc_interval(rounding(), Method::Kl, &a, level, Sides::Two).unwrap();
        let hf = auc_interval(rounding(), Method::Hoeffding, &a, level, Sides::Two).unwrap();
        kl_misses += u64::from(!(kl.lower <= truth && truth <= kl.upper));
        hoeffding_misses += u64::from(!(hf.lower <= truth && truth <= hf.upper));
        wider += u64::from(hf.upper - hf.lower >= kl.upper - kl.lower - 1e-12);
    }
    eprintln!(
        "AUC, 10 vs 1000: KL misses {kl_misses}/{trials}, Hoeffding {hoeffding_misses}/{trials} \
         (nominal {delta})"
    );
    assert!(kl_misses as f64 / trials as f64 <= delta);
    assert!(hoeffding_misses as f64 / trials as f64 <= delta);
    // KL is the tighter of the two almost always (Hoeffding is the check).
    assert!(wider as f64 >= 0.9 * trials as f64, "{wider}");
}
