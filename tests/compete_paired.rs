//! The final ranking's paired comparisons in simulation: rounds of five correlated models on
//! the same rows, ranked by observed error, neighbours compared at the ranking's level (the
//! reserve split over all pairs). All neighbour comparisons of a round must hold together in at
//! least `1 - reserve` of the rounds.

use holdout_ledger::engine::{Comparison, ranking_level, replay_comparison};

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
}

fn comparison(a_only: u64, b_only: u64, level_nats: f64) -> Comparison {
    Comparison {
        target: None,
        ahead: 0,
        behind: 1,
        lower: 0.0,
        upper: 0.0,
        level_nats,
        distinguishable: false,
        a_only: Some(a_only),
        b_only: Some(b_only),
        sum_diff: None,
        sum_sq_diff: None,
    }
}

#[test]
fn neighbour_comparisons_hold_together_at_the_ranking_reserve() {
    let n = 1500usize;
    // Model j is wrong when a shared row difficulty u < base[j], and each model's answer is
    // flipped independently with probability FLIP: true error base (1 - FLIP) + (1 - base) FLIP.
    let base = [0.20, 0.205, 0.21, 0.22, 0.25];
    const FLIP: f64 = 0.02;
    let err: Vec<f64> = base
        .iter()
        .map(|b| b * (1.0 - FLIP) + (1.0 - b) * FLIP)
        .collect();
    let reserve = 0.2;
    let level = ranking_level(reserve, base.len() as u64);
    assert!((level - (10.0f64 / reserve).ln()).abs() < 1e-12, "10 pairs");
    let rounds = 1000;
    let (mut all_hold, mut told_apart) = (0u32, 0u32);
    let mut rng = Rng(11);
    for _ in 0..rounds {
        let rows: Vec<[bool; 5]> = (0..n)
            .map(|_| {
                let u = rng.uniform();
                std::array::from_fn(|j| (u < base[j]) ^ (rng.uniform() < FLIP))
            })
            .collect();
        let errors: Vec<usize> = (0..base.len())
            .map(|j| rows.iter().filter(|r| r[j]).count())
            .collect();
        let mut order: Vec<usize> = (0..base.len()).collect();
        order.sort_by_key(|&j| (errors[j], j));
        let mut ok = true;
        for w in order.windows(2) {
            let (a, b) = (w[0], w[1]);
            let a_only = rows.iter().filter(|r| r[a] && !r[b]).count() as u64;
            let b_only = rows.iter().filter(|r| !r[a] && r[b]).count() as u64;
            let (lo, hi) = replay_comparison(true, n as u64, &comparison(a_only, b_only, level))
                .expect("interval");
            let truth = err[a] - err[b];
            ok &= lo <= truth && truth <= hi;
            told_apart += u32::from(hi < 0.0 || lo > 0.0);
        }
        all_hold += u32::from(ok);
    }
    let rate = f64::from(all_hold) / f64::from(rounds);
    println!(
        "all neighbour comparisons held in {rate} of {rounds} rounds (needs >= {}); \
         {told_apart} of {} comparisons told their pair apart",
        1.0 - reserve,
        rounds * 4
    );
    let sd = (reserve * (1.0 - reserve) / f64::from(rounds)).sqrt();
    assert!(rate >= 1.0 - reserve - 3.0 * sd, "{rate}");
    // Not vacuous: the 0.22 / 0.25 pair is usually told apart.
    assert!(told_apart > rounds / 2, "{told_apart}");
}
