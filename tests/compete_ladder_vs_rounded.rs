//! The Ladder mechanism (Blum and Hardt 2015) against `rounded:0.01` on one realistic
//! competition trace: 200 submissions from 4 teams, 12 of them real improvements, at the same
//! n, delta, schedule and tolerance. Counts the queries each rule answers before its first
//! refusal, through the accounting core the daemon uses. `cargo test --test
//! compete_ladder_vs_rounded -- --nocapture` prints the numbers.

use holdout_ledger::stats::accounting::{Accountant, Outcome, QueryRequest};
use holdout_ledger::stats::policy::Policy;
use holdout_ledger::stats::rules::Symbol;

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
    /// Approximately normal (sum of 12 uniforms).
    fn normal(&mut self) -> f64 {
        (0..12).map(|_| self.uniform()).sum::<f64>() - 6.0
    }
}

const N: u64 = 100_000;
const SUBMISSIONS: usize = 200;
const TEAMS: usize = 4;
const IMPROVEMENTS: usize = 12;

/// The trace: (team, observed error count). Each team starts at a true error near 0.30; 12
/// submissions (3 per team, at random places) are real improvements of 0.02 to 0.04; the
/// others are variations no better than the team's current model (up to 0.01 worse). Observed
/// counts add binomial-sized noise.
fn trace(seed: u64) -> Vec<(String, u64)> {
    let mut rng = Rng(seed);
    let mut current: Vec<f64> = (0..TEAMS).map(|_| 0.28 + 0.04 * rng.uniform()).collect();
    let mut slots: Vec<usize> = (0..SUBMISSIONS).collect();
    // Fisher-Yates: the first 12 slots improve.
    for i in (1..slots.len()).rev() {
        let j = (rng.next() % (i as u64 + 1)) as usize;
        slots.swap(i, j);
    }
    let improving: Vec<usize> = slots[..IMPROVEMENTS].to_vec();
    let mut per_team = [0usize; TEAMS];
    (0..SUBMISSIONS)
        .map(|s| {
            // Round-robin teams, so each team's 3 improvements come from its own slots.
            let team = s % TEAMS;
            let truth = if improving.contains(&s) && per_team[team] < 3 {
                per_team[team] += 1;
                current[team] -= 0.02 + 0.02 * rng.uniform();
                current[team]
            } else {
                current[team] + 0.01 * rng.uniform()
            };
            let sd = (N as f64 * truth * (1.0 - truth)).sqrt();
            let k = (N as f64 * truth + sd * rng.normal())
                .round()
                .clamp(0.0, N as f64);
            (format!("team-{team}"), k as u64)
        })
        .collect()
}

/// Tolerance 0.03: core 2 judges it on the reported cell interval, which on a 0.01 grid is half
/// a step (0.005) wider than the one-count interval core 1 judged (at 0.025 then).
fn policy(rule: &str) -> Policy {
    serde_json::from_str(&format!(
        r#"{{"delta": 0.05, "schedule": "series", "rule": "{rule}", "tolerance": 0.03,
            "rows": {N}, "targets": [{{"name": "y", "binary": true, "method": "exact"}}], "core_version": 2}}"#
    ))
    .unwrap()
}

/// Queries answered before the first refusal, and the ladder's released new bests.
fn answered(rule: &str, trace: &[(String, u64)]) -> (usize, usize) {
    let mut acc = Accountant::new(policy(rule)).unwrap();
    let mut bests = 0;
    for (i, (team, k)) in trace.iter().enumerate() {
        let req = QueryRequest {
            analyst: team.clone(),
            target: 0,
            models: 1,
        };
        let Ok(charge) = acc.quote(&req) else {
            return (i, bests);
        };
        let ans = acc.answer(&req, &charge, &[Outcome::Errors(*k)]).unwrap();
        bests += usize::from(matches!(ans.symbol, Symbol::NewBest { .. }));
    }
    (trace.len(), bests)
}

#[test]
fn the_ladder_answers_at_least_five_times_as_many_queries_as_rounded() {
    for seed in 1..=5u64 {
        let t = trace(seed);
        let (ladder, bests) = answered("ladder:0.01", &t);
        let (rounded, _) = answered("rounded:0.01", &t);
        println!(
            "seed {seed}: n = {N}, delta = 0.05, series, tolerance 0.03: ladder:0.01 answered \
             {ladder} of {SUBMISSIONS} ({bests} new bests), rounded:0.01 answered {rounded}; \
             ratio {:.1}",
            ladder as f64 / rounded as f64
        );
        assert!(
            rounded > 0 && rounded < SUBMISSIONS,
            "rounded must refuse within the trace"
        );
        assert!(ladder >= 5 * rounded, "seed {seed}: {ladder} vs {rounded}");
    }
}
