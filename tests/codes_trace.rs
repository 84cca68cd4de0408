//! The cheaper codes (code version 2) against the uniform codes (version 1, what holdouts
//! recorded before) on one realistic competition trace (issue 12): 200 submissions from 4
//! teams, n = 20,000, delta 0.05, series schedule, tolerance 0.05, core 2's tolerance check,
//! rounded:0.01 and ladder:0.01. Counts the queries each answers before its first refusal,
//! through the accounting core the daemon uses. `cargo test --test codes_trace --
//! --nocapture` prints the four counts per seed.

use holdout_ledger::stats::accounting::{Accountant, Outcome, QueryRequest};
use holdout_ledger::stats::policy::Policy;

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

const N: u64 = 20_000;
const SUBMISSIONS: usize = 200;
const TEAMS: usize = 4;
const IMPROVEMENTS: usize = 12;

/// The trace: (team, observed error count), teams in round-robin. Each team starts at a true
/// error near 0.30; 12 submissions (at most 3 per team, at random places) are real improvements
/// of 0.02 to 0.04; the others are variations no better than the team's current model (up to
/// 0.01 worse). Observed counts add binomial-sized noise (sd about 0.003 at n = 20,000). The
/// same generator as `tests/compete_ladder_vs_rounded.rs`, at this issue's n.
fn trace(seed: u64) -> Vec<(String, u64)> {
    let mut rng = Rng(seed);
    let mut current: Vec<f64> = (0..TEAMS).map(|_| 0.28 + 0.04 * rng.uniform()).collect();
    let mut slots: Vec<usize> = (0..SUBMISSIONS).collect();
    for i in (1..slots.len()).rev() {
        let j = (rng.next() % (i as u64 + 1)) as usize;
        slots.swap(i, j);
    }
    let improving: Vec<usize> = slots[..IMPROVEMENTS].to_vec();
    let mut per_team = [0usize; TEAMS];
    (0..SUBMISSIONS)
        .map(|s| {
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

fn policy(rule: &str, code: u32) -> Policy {
    serde_json::from_str(&format!(
        r#"{{"delta": 0.05, "schedule": "series", "rule": "{rule}", "tolerance": 0.05,
            "rows": {N}, "targets": [{{"name": "y", "binary": true, "method": "exact"}}],
            "core_version": 2, "code_version": {code}}}"#
    ))
    .unwrap()
}

/// Queries answered before the first refusal, and the mean code of those answers (nats).
fn answered(rule: &str, code: u32, trace: &[(String, u64)]) -> (usize, f64) {
    let mut acc = Accountant::new(policy(rule, code)).unwrap();
    let mut nats = 0.0;
    for (i, (team, k)) in trace.iter().enumerate() {
        let req = QueryRequest {
            analyst: team.clone(),
            target: 0,
            models: 1,
        };
        let Ok(charge) = acc.quote(&req) else {
            return (i, nats / i.max(1) as f64);
        };
        let ans = acc.answer(&req, &charge, &[Outcome::Errors(*k)]).unwrap();
        nats += ans.code_nats;
    }
    (trace.len(), nats / trace.len() as f64)
}

#[test]
fn cheaper_codes_answer_more_queries_on_the_four_team_trace() {
    let mut ratios = Vec::new();
    for seed in 1..=5u64 {
        let t = trace(seed);
        let (rounded_old, old_nats) = answered("rounded:0.01", 1, &t);
        let (rounded_new, new_nats) = answered("rounded:0.01", 2, &t);
        let (ladder_old, _) = answered("ladder:0.01", 1, &t);
        let (ladder_new, _) = answered("ladder:0.01", 2, &t);
        let ratio = rounded_new as f64 / rounded_old as f64;
        println!(
            "seed {seed}: n = {N}, delta 0.05, series, tolerance 0.05, {TEAMS} teams, \
             {SUBMISSIONS} submissions; before the first refusal: rounded:0.01 code 1 \
             {rounded_old} ({old_nats:.2} nats each), code 2 {rounded_new} ({new_nats:.2} nats \
             each), ratio {ratio:.2}; ladder:0.01 code 1 {ladder_old}, code 2 {ladder_new}"
        );
        assert!(
            rounded_old > 0 && rounded_new < SUBMISSIONS,
            "seed {seed}: both rounded codes must refuse within the trace"
        );
        assert!(
            2 * rounded_new >= 3 * rounded_old,
            "seed {seed}: rounded code 2 answered {rounded_new}, code 1 {rounded_old}: under 1.5x"
        );
        assert!(
            ladder_new >= ladder_old,
            "seed {seed}: ladder code 2 answered {ladder_new}, code 1 {ladder_old}"
        );
        ratios.push(ratio);
    }
    println!("rounded ratios: {ratios:.2?}");
}
