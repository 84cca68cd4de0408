//! The cheaper codes of code version 2 (`src/stats/codes.rs`, DESIGN 4.2 and 4.8): Kraft's
//! inequality at many random public pasts, the worst-case bounds against enumeration, that a
//! code depends on the public past only (released symbols, never exact scores), and coverage
//! under an adaptive analyst by simulation. Seeded PRNG (splitmix64); no timing.

use holdout_ledger::stats::accounting::{Accountant, Outcome, QueryRequest};
use holdout_ledger::stats::codes::{Code, relative_cell_nats};
use holdout_ledger::stats::interval::Method;
use holdout_ledger::stats::policy::{Policy, Sharing, TargetPolicy};
use holdout_ledger::stats::rules::{Grid, KtCounts, Past, Rule, Symbol};
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
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
}

fn rules(m: u64) -> Vec<Rule> {
    let g = Grid { cells: m };
    vec![
        Rule::Rounded(g),
        Rule::Threshold { tau: 0.2 },
        Rule::Ladder(g),
        Rule::BestOf(g),
        Rule::Sealed(Some(g)),
        Rule::Sealed(None),
    ]
}

/// A sum of many terms with Neumaier's compensation, so that a total of 50,001 equal terms is
/// not off by the 1e-12 a plain float sum accumulates.
fn exact_sum(terms: impl Iterator<Item = f64>) -> f64 {
    let (mut sum, mut carry) = (0.0f64, 0.0f64);
    for x in terms {
        let t = sum + x;
        carry += if sum.abs() >= x.abs() {
            (sum - t) + x
        } else {
            (x - t) + sum
        };
        sum = t;
    }
    sum + carry
}

/// Kraft: at every public past, the probabilities of all possible next symbols sum to at most
/// 1, every symbol has p > 0, and the code charged is `-ln` of its probability. 400 random
/// pasts (grid sizes, last cells or none, best cells, KT counts, batch sizes), every rule.
#[test]
fn every_version_2_code_satisfies_kraft_at_400_random_pasts() {
    let mut rng = Rng(12);
    let mut relative_checked = 0;
    for case in 0..400 {
        // Mostly small grids, some up to 1,000 cells (rounded:0.001).
        let m = if case % 4 == 0 {
            1 + rng.below(1000)
        } else {
            1 + rng.below(120)
        };
        let rows = 1 + rng.below(50_000);
        let (hits, misses) = (rng.below(60), rng.below(60));
        let (lhits, lmisses) = (rng.below(60), rng.below(60));
        let past = Past {
            threshold: KtCounts {
                hits,
                trials: hits + misses,
            },
            ladder: KtCounts {
                hits: lhits,
                trials: lhits + lmisses,
            },
            best_cell: rng.below(m + 1),
            models: 1 + rng.below(6) as u32,
            last_cell: (rng.below(5) != 0).then(|| rng.below(m + 1)),
        };
        for rule in rules(m) {
            let dist = Code::Relative.distribution(&rule, rows, &past);
            assert!(!dist.is_empty(), "{rule} at {past:?}");
            let total = exact_sum(dist.iter().map(|(_, p)| *p));
            assert!(total <= 1.0 + 1e-12, "{rule} sums to {total} at {past:?}");
            for (s, p) in &dist {
                assert!(*p > 0.0, "{rule} gives {s:?} p = 0 at {past:?}");
                let code = Code::Relative.nats(&rule, rows, &past, s);
                assert!((code + p.ln()).abs() < 1e-9, "{rule} {s:?}: {code} vs {p}");
            }
            if matches!(rule, Rule::Rounded(_) | Rule::Ladder(_)) && past.best_cell > 0 {
                // The two new codes are complete: they sum to 1, not less.
                assert!(total >= 1.0 - 1e-12, "{rule} sums to {total} at {past:?}");
                relative_checked += 1;
            }
        }
    }
    assert!(relative_checked > 600, "{relative_checked}");
}

/// Version 1 is the uniform code of `Rule::code_nats`, unchanged: every older ledger replays.
#[test]
fn version_1_is_the_uniform_code() {
    let rule: Rule = "rounded:0.01".parse().unwrap();
    let mut past = Past::start(&rule, 1000);
    past.last_cell = Some(40);
    for index in [0u64, 40, 41, 100] {
        let s = Symbol::Cell { index };
        assert_eq!(
            Code::Uniform.nats(&rule, 1000, &past, &s).to_bits(),
            101f64.ln().to_bits()
        );
    }
    let ladder: Rule = "ladder:0.01".parse().unwrap();
    let mut past = Past::start(&ladder, 1000);
    past.best_cell = 30;
    let s = Symbol::NewBest { cell: 29 };
    assert_eq!(
        Code::Uniform.nats(&ladder, 1000, &past, &s),
        ladder.code_nats(1000, &past, &s)
    );
    // Version 2 makes a one-cell drop cheaper than version 1's uniform ln 30.
    assert!(Code::Relative.nats(&ladder, 1000, &past, &s) < ladder.code_nats(1000, &past, &s));
    assert_eq!(Code::for_version(1), Code::Uniform);
    assert_eq!(Code::for_version(2), Code::Relative);
}

/// The rounded worst case bounds the total code of every sequence of `j` answers of one team,
/// by enumeration, and is tight up to the geometric half's weight at the far end of the grid.
#[test]
fn rounded_worst_case_bounds_every_sequence() {
    for m in [1u64, 2, 3, 5, 8, 100] {
        let rule = Rule::Rounded(Grid { cells: m });
        let max_j = if m == 100 { 2 } else { 4 };
        for start in std::iter::once(None).chain((0..=m).map(Some)) {
            let mut past = Past::start(&rule, 1000);
            past.last_cell = start;
            for j in 0..=max_j {
                let mut worst = 0.0f64;
                let mut seq = vec![0u64; j as usize];
                loop {
                    let mut p = past;
                    let mut total = 0.0;
                    for &c in &seq {
                        total += Code::Relative.nats(&rule, 1000, &p, &Symbol::Cell { index: c });
                        p.last_cell = Some(c);
                    }
                    worst = worst.max(total);
                    // Next sequence (odometer over 0..=m).
                    let mut i = 0;
                    while i < seq.len() && seq[i] == m {
                        seq[i] = 0;
                        i += 1;
                    }
                    if i == seq.len() {
                        break;
                    }
                    seq[i] += 1;
                }
                let bound = Code::Relative.worst_case_nats(&rule, 1000, &past, j);
                assert!(
                    bound >= worst - 1e-12,
                    "M={m} start={start:?} j={j}: {bound} < {worst}"
                );
                // At most ln(1 + 2) per answer looser for tiny grids, 1e-9 at M = 100.
                let slack = if m == 100 { 1e-9 } else { 3f64.ln() };
                assert!(
                    bound - worst <= j as f64 * slack,
                    "M={m} start={start:?} j={j}: {bound} vs {worst}"
                );
            }
        }
    }
}

/// The ladder worst case bounds every sequence of improve/no-improve answers, by enumeration,
/// and the bound on many new bests is far below version 1's `ln b` each (each must be small).
#[test]
fn ladder_worst_case_bounds_every_sequence() {
    fn walk(rule: &Rule, past: Past, j: u64) -> f64 {
        if j == 0 {
            return 0.0;
        }
        let mut worst = f64::NEG_INFINITY;
        let mut symbols = vec![Symbol::NoImprovement];
        symbols.extend((0..past.best_cell).map(|cell| Symbol::NewBest { cell }));
        for s in symbols {
            let code = Code::Relative.nats(rule, 1000, &past, &s);
            let mut next = past;
            match s {
                Symbol::NewBest { cell } => {
                    next.ladder.record(true);
                    next.best_cell = cell;
                }
                _ => next.ladder.record(false),
            }
            worst = worst.max(code + walk(rule, next, j - 1));
        }
        worst
    }
    for m in [1u64, 3, 6, 10] {
        let rule = Rule::Ladder(Grid { cells: m });
        for best in 0..=m {
            for (hits, trials) in [(0u64, 0u64), (1, 4), (3, 3)] {
                let mut past = Past::start(&rule, 1000);
                past.best_cell = best;
                past.ladder = KtCounts { hits, trials };
                for j in 0..=(if m <= 6 { 6 } else { 4 }) {
                    let worst = walk(&rule, past, j);
                    let bound = Code::Relative.worst_case_nats(&rule, 1000, &past, j);
                    assert!(
                        bound >= worst - 1e-12,
                        "M={m} best={best} {hits}/{trials} j={j}: {bound} < {worst}"
                    );
                }
            }
        }
    }
    // 100 new bests on a 0.01 grid: version 1 bounds the drops by 100 ln 100 = 460.5 nats;
    // version 2 by ln 100 + (99 + 99) ln 2 = 141.8 (our arithmetic).
    let rule: Rule = "ladder:0.01".parse().unwrap();
    let past = Past::start(&rule, 1000);
    let kt = past.ladder.worst_case_nats(100);
    let v1 = rule.worst_case_nats(1000, &past, 100) - kt;
    let v2 = Code::Relative.worst_case_nats(&rule, 1000, &past, 100) - kt;
    assert!((v1 - 100.0 * 100f64.ln()).abs() < 1e-9, "{v1}");
    assert!(
        (v2 - (100f64.ln() + 198.0 * 2f64.ln())).abs() < 1e-6,
        "{v2}"
    );
}

fn policy(rule: &str, rows: u64, tolerance: f64, sharing: Sharing) -> Policy {
    Policy {
        delta: 0.05,
        schedule: "series".parse().unwrap(),
        rule: rule.parse().unwrap(),
        tolerance,
        tolerance_reference: Default::default(),
        sharing,
        shares: if sharing == Sharing::Isolated {
            Shares::OnArrival
        } else {
            Shares::None
        },
        rows,
        targets: vec![TargetPolicy {
            name: "y".into(),
            binary: true,
            method: Method::Exact,
            class_counts: None,
        }],
        core_version: holdout_ledger::stats::CORE,
        code_version: holdout_ledger::stats::codes::CODE,
    }
}

/// DESIGN 4.2 rules 1 and 2 for the new codes: two runs whose exact counts differ but fall
/// in the same cells release the same symbols, charge the same codes, report the same
/// intervals, refuse at the same query and show the same status. Each charged code is the
/// version-2 code at the past rebuilt from released symbols alone (each team's last cell).
#[test]
fn codes_depend_on_the_public_past_only() {
    for sharing in [Sharing::Shared, Sharing::Isolated] {
        for rule in ["rounded:0.01", "ladder:0.01"] {
            let mut rng = Rng(7);
            let mut a = Accountant::new(policy(rule, 10_000, 0.06, sharing)).unwrap();
            let mut b = Accountant::new(policy(rule, 10_000, 0.06, sharing)).unwrap();
            let grid = Grid { cells: 100 };
            let parsed: Rule = rule.parse().unwrap();
            let mut last: std::collections::BTreeMap<String, Option<u64>> = Default::default();
            let mut refused = false;
            for i in 0..300u64 {
                let team = format!("team-{}", rng.below(3));
                let req = QueryRequest {
                    analyst: team.clone(),
                    target: 0,
                    models: 1,
                };
                let (qa, qb) = (a.quote(&req), b.quote(&req));
                assert_eq!(qa.is_ok(), qb.is_ok(), "{rule} {sharing:?} query {i}");
                let (Ok(ca), Ok(cb)) = (qa, qb) else {
                    refused = true;
                    break;
                };
                assert_eq!(ca.level_nats.to_bits(), cb.level_nats.to_bits());
                // A cell near 0.30, moving by a few cells; two different counts inside it.
                let cell = 27 + rng.below(7);
                let (lo, hi) = grid.errors_in_cell(10_000, cell).unwrap();
                let ra = a.answer(&req, &ca, &[Outcome::Errors(lo)]).unwrap();
                let rb = b.answer(&req, &cb, &[Outcome::Errors(hi)]).unwrap();
                assert_eq!(ra.symbol, rb.symbol);
                assert_eq!(ra.code_nats.to_bits(), rb.code_nats.to_bits());
                assert_eq!(ra.interval, rb.interval);
                assert_eq!(ra.queries_left, rb.queries_left);
                assert_eq!(a.status(Some(&team)), b.status(Some(&team)));
                if parsed == Rule::Rounded(grid) {
                    let mut past = Past::start(&parsed, 10_000);
                    past.last_cell = *last.get(&team).unwrap_or(&None);
                    let expect = relative_cell_nats(100, past.last_cell, cell);
                    assert_eq!(ra.code_nats.to_bits(), expect.to_bits(), "query {i}");
                    last.insert(team, Some(cell));
                }
            }
            if rule.starts_with("rounded") {
                assert!(
                    refused,
                    "{rule} {sharing:?}: the tolerance must bind in 300 queries"
                );
            }
        }
    }
}

const WORDS: usize = 32; // 2048 bits, the first 2000 used
const ROWS: u64 = 2000;

fn random_bits(rng: &mut Rng) -> [u64; WORDS] {
    let mut v = [0u64; WORDS];
    for w in v.iter_mut() {
        *w = rng.next();
    }
    v[WORDS - 1] &= (1u64 << (ROWS as usize - 64 * (WORDS - 1))) - 1;
    v
}

fn errors(a: &[u64; WORDS], b: &[u64; WORDS]) -> u64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| u64::from((x ^ y).count_ones()))
        .sum()
}

/// One run of an adaptive analyst against a version-2 holdout with random labels: random
/// prediction vectors, the ones the answers favour voted into a majority, then the vote
/// submitted. Every vector, the vote included, has true error 1/2 on fresh labels; returns
/// whether every reported interval contained 1/2, and how many queries were answered.
fn adaptive_run(rule: &str, seed: u64) -> (bool, u64) {
    let mut rng = Rng(seed);
    let labels = random_bits(&mut rng);
    let mut acc = Accountant::new(policy(rule, ROWS, 1.0, Sharing::Shared)).unwrap();
    let req = QueryRequest {
        analyst: "prober".into(),
        target: 0,
        models: 1,
    };
    let mut covered = true;
    let mut votes = vec![0i32; ROWS as usize];
    let mut answered = 0;
    let mut ask = |acc: &mut Accountant, v: &[u64; WORDS]| {
        let charge = acc.quote(&req).expect("tolerance 1 never refuses");
        answered += 1;
        acc.answer(&req, &charge, &[Outcome::Errors(errors(v, &labels))])
            .unwrap()
    };
    for _ in 0..150 {
        let v = random_bits(&mut rng);
        let ans = ask(&mut acc, &v);
        covered &= ans.interval.contains(0.5);
        // Favoured: a released score below 1/2 (rounded), a new best (ladder).
        let favoured = match ans.symbol {
            Symbol::Cell { index } => index < 50,
            Symbol::NewBest { .. } => true,
            _ => false,
        };
        if favoured {
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
    let ans = ask(&mut acc, &vote);
    covered &= ans.interval.contains(0.5);
    (covered, answered)
}

/// Coverage under an adaptive analyst, 100 runs per rule: every interval of a run covers the
/// true error in at least 1 - delta = 95 % of the runs.
#[test]
fn version_2_intervals_cover_under_an_adaptive_analyst() {
    for rule in ["rounded:0.01", "ladder:0.01"] {
        let runs = 100u64;
        let mut covered = 0u64;
        for seed in 0..runs {
            let (c, answered) = adaptive_run(rule, 5000 + seed);
            assert_eq!(answered, 151);
            covered += u64::from(c);
        }
        println!("{rule}, code 2: every interval covered 1/2 in {covered}/{runs} runs");
        assert!(covered >= 95, "{rule}: {covered}/{runs}");
    }
}
