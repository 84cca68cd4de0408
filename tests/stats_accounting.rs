//! Behaviour of the accountant: refusals, symbols, codes, isolation, replay.

use holdout_ledger::stats::accounting::{
    Accountant, AccountingError, Outcome, QueryRequest, Refusal,
};
use holdout_ledger::stats::interval::Method;
use holdout_ledger::stats::policy::{Policy, Sharing, TargetPolicy};
use holdout_ledger::stats::rules::{Rule, Symbol};
use holdout_ledger::stats::schedule::{Schedule, Shares};

fn policy(rule: &str, schedule: &str, rows: u64, tolerance: f64) -> Policy {
    Policy {
        delta: 0.05,
        schedule: schedule.parse().unwrap(),
        rule: rule.parse().unwrap(),
        tolerance,
        tolerance_reference: Default::default(),
        sharing: Sharing::Shared,
        shares: Shares::None,
        rows,
        targets: vec![TargetPolicy {
            name: "y".into(),
            binary: true,
            method: Method::Exact,
            class_counts: None,
        }],
        core_version: holdout_ledger::stats::CORE,
        // The uniform codes (version 1), whose figures these tests check.
        code_version: 1,
    }
}

fn req(analyst: &str) -> QueryRequest {
    QueryRequest {
        analyst: analyst.into(),
        target: 0,
        models: 1,
    }
}

fn ask(acc: &mut Accountant, analyst: &str, k: u64) -> holdout_ledger::stats::accounting::Answer {
    let r = req(analyst);
    let c = acc.quote(&r).unwrap();
    acc.answer(&r, &c, &[Outcome::Errors(k)]).unwrap()
}

#[test]
fn even_schedule_refuses_after_k_queries() {
    let mut acc = Accountant::new(policy("rounded:0.1", "even:2", 10_000, 0.5)).unwrap();
    let a1 = ask(&mut acc, "a", 100);
    assert!((a1.delta_i - 0.025).abs() < 1e-15);
    assert_eq!(a1.queries_left, 1);
    ask(&mut acc, "b", 100);
    assert_eq!(
        acc.quote(&req("a")).unwrap_err(),
        Refusal::ScheduleExhausted { answered: 2 }
    );
    let s = acc.status(Some("a"));
    assert!(s.remaining < 1e-15 && (s.spent - 0.05).abs() < 1e-15);
}

#[test]
fn level_adds_the_transcript_cost() {
    let mut acc = Accountant::new(policy("rounded:0.01", "series", 10_000, 0.05)).unwrap();
    ask(&mut acc, "a", 2000);
    ask(&mut acc, "a", 2000);
    let c = acc.quote(&req("a")).unwrap();
    // Query 3 under series: delta_3 = 0.05/12; L = 2 ln 101.
    let want = (12.0f64 / 0.05).ln() + 2.0 * 101f64.ln();
    assert!(
        (c.level_nats - want).abs() < 1e-12,
        "{} vs {want}",
        c.level_nats
    );
}

#[test]
fn tolerance_refusals_match_design_table_order_of_magnitude() {
    // DESIGN 4.5 (Hoeffding, n = 10000, tol 0.05, rounded 0.01): 10 queries fit when the
    // tolerance is judged on the one-count interval, as core 1 does (and keeps doing).
    let mut p = policy("rounded:0.01", "series", 10_000, 0.05);
    p.core_version = 1;
    p.targets[0].method = Method::Hoeffding;
    let mut acc = Accountant::new(p).unwrap();
    let first = ask(&mut acc, "a", 5000);
    assert_eq!(first.queries_left, 9);
    let mut answered = 1;
    while acc.quote(&req("a")).is_ok() {
        ask(&mut acc, "a", 5000);
        answered += 1;
    }
    assert_eq!(answered, 10);
    assert!(matches!(
        acc.quote(&req("a")),
        Err(Refusal::ToleranceExceeded { .. })
    ));
}

#[test]
fn stale_and_mismatched_charges_are_errors() {
    let mut acc = Accountant::new(policy("rounded:0.01", "series", 1000, 0.5)).unwrap();
    let c = acc.quote(&req("a")).unwrap();
    ask(&mut acc, "b", 10);
    assert_eq!(
        acc.answer(&req("a"), &c, &[Outcome::Errors(1)])
            .unwrap_err(),
        AccountingError::StaleCharge
    );
    let c = acc.quote(&req("a")).unwrap();
    assert!(acc.answer(&req("a"), &c, &[Outcome::Errors(1001)]).is_err());
    assert!(acc.answer(&req("a"), &c, &[Outcome::LossSum(3.0)]).is_err());
}

#[test]
fn threshold_pass_certifies_and_fail_certifies_nothing() {
    let mut acc = Accountant::new(policy("threshold:0.2", "series", 10_000, 0.5)).unwrap();
    let pass = ask(&mut acc, "a", 1000);
    assert_eq!(pass.symbol, Symbol::Pass);
    assert_eq!((pass.interval.lower, pass.interval.upper), (0.0, 0.2));
    // First answer: KT p(pass) = 1/2.
    assert!((pass.code_nats - 2f64.ln()).abs() < 1e-12);
    let fail = ask(&mut acc, "a", 1990);
    assert_eq!(fail.symbol, Symbol::Fail);
    assert_eq!((fail.interval.lower, fail.interval.upper), (0.0, 1.0));
    assert!(fail.statement.contains("certifies nothing"));
    // Second answer: p(fail) = (0 + 1/2) / 2.
    assert!((fail.code_nats - 4f64.ln()).abs() < 1e-12);
}

#[test]
fn ladder_releases_only_improvements() {
    let mut acc = Accountant::new(policy("ladder:0.01", "series", 10_000, 0.5)).unwrap();
    let a = ask(&mut acc, "a", 3000);
    assert_eq!(a.symbol, Symbol::NewBest { cell: 30 });
    // KT 1/2 then uniform over 100 cells below the start.
    assert!((a.code_nats - (2f64.ln() + 100f64.ln())).abs() < 1e-12);
    let b = ask(&mut acc, "a", 2960);
    assert_eq!(b.symbol, Symbol::NoImprovement);
    assert!(b.interval.contains(0.30) && b.released_score.is_none());
    let c = ask(&mut acc, "a", 2940);
    assert_eq!(c.symbol, Symbol::NewBest { cell: 29 });
    // Another analyst starts from the top again.
    let d = ask(&mut acc, "b", 2940);
    assert_eq!(d.symbol, Symbol::NewBest { cell: 29 });
}

#[test]
fn best_of_takes_b_shares_and_picks_lowest_index_on_ties() {
    let mut acc = Accountant::new(policy("best-of:0.01", "even:10", 10_000, 0.5)).unwrap();
    let r = QueryRequest {
        analyst: "a".into(),
        target: 0,
        models: 3,
    };
    let c = acc.quote(&r).unwrap();
    assert_eq!(c.shares, 3);
    assert!((c.delta_charged - 0.015).abs() < 1e-15);
    let out = [
        Outcome::Errors(2500),
        Outcome::Errors(2100),
        Outcome::Errors(2100),
    ];
    let ans = acc.answer(&r, &c, &out).unwrap();
    assert_eq!(ans.symbol, Symbol::Best { model: 1, cell: 21 });
    assert!((ans.code_nats - (3f64.ln() + 101f64.ln())).abs() < 1e-12);
    assert_eq!(acc.status(Some("a")).next_query_number, 4);
    assert!(acc.quote(&req("a")).is_ok());
}

#[test]
fn sealed_round_uses_levels_fixed_at_submission() {
    let mut acc = Accountant::new(policy("sealed:0.01", "even:4", 10_000, 0.5)).unwrap();
    let mut levels = Vec::new();
    for who in ["a", "b", "c"] {
        let c = acc.quote(&req(who)).unwrap();
        levels.push(c.level_nats);
        acc.seal(&req(who), &c).unwrap();
    }
    // Nothing released yet: every level is ln(4/0.05) with L = 0.
    assert!(levels.iter().all(|l| (l - 80f64.ln()).abs() < 1e-12));
    let answers = acc
        .close_round(&[
            Outcome::Errors(100),
            Outcome::Errors(2000),
            Outcome::Errors(5000),
        ])
        .unwrap();
    assert_eq!(answers[1].symbol, Symbol::Cell { index: 20 });
    assert!(
        answers
            .iter()
            .all(|a| (a.level_nats - 80f64.ln()).abs() < 1e-12)
    );
    // The release is paid by any later query.
    let c = acc.quote(&req("d")).unwrap();
    assert!((c.transcript_nats - 3.0 * 101f64.ln()).abs() < 1e-9);
    let r = req("a");
    let c = acc.quote(&r).unwrap();
    assert!(matches!(
        acc.answer(&r, &c, &[Outcome::Errors(1)]),
        Err(AccountingError::WrongRule(_))
    ));
}

#[test]
fn isolated_analysts_see_nothing_of_each_other() {
    let mut p = policy("rounded:0.01", "series", 10_000, 0.5);
    p.sharing = Sharing::Isolated;
    p.shares = Shares::Roster {
        analysts: vec!["a".into(), "b".into()],
        reserve: 0.0,
    };
    let mut acc = Accountant::new(p).unwrap();
    let before = acc.status(Some("b"));
    for _ in 0..5 {
        ask(&mut acc, "a", 4000);
    }
    assert_eq!(acc.status(Some("b")), before);
    assert!((before.budget - 0.025).abs() < 1e-15);
    assert!(matches!(
        acc.quote(&req("stranger")),
        Err(Refusal::NoShare { .. })
    ));
}

#[test]
fn replay_is_bit_identical() {
    let run = || {
        let mut p = policy("ladder:0.01", "series", 5000, 0.5);
        p.shares = Shares::OnArrival;
        let mut acc = Accountant::new(p).unwrap();
        let mut out = Vec::new();
        for i in 0..40u64 {
            let who = ["a", "b", "c"][(i % 3) as usize];
            out.push(serde_json::to_string(&ask(&mut acc, who, 2500 - 13 * i)).unwrap());
        }
        out
    };
    assert_eq!(run(), run());
}

#[test]
fn policies_reject_bad_fields() {
    let mut p = policy("rounded:0.01", "series", 100, 0.1);
    p.delta = 0.95;
    assert!(p.validate().is_ok());
    p.delta = 1.0;
    assert_eq!(p.validate().unwrap_err().field, "delta");
    let mut p = policy("rounded:0.01", "series", 100, 0.1);
    p.targets[0].binary = false;
    assert_eq!(p.validate().unwrap_err().field, "targets");
    let mut p = policy("rounded:0.01", "series", 100, 0.1);
    p.sharing = Sharing::Isolated;
    assert_eq!(p.validate().unwrap_err().field, "shares");
    let mut p = policy("rounded:0.01", "series", 100, 0.1);
    p.tolerance = 0.0;
    assert_eq!(p.validate().unwrap_err().field, "tolerance");
    let json = serde_json::to_string(&policy("threshold:0.1", "even:3", 10, 0.2)).unwrap();
    let back: Policy = serde_json::from_str(&json).unwrap();
    assert_eq!(back.rule, Rule::Threshold { tau: 0.1 });
    assert_eq!(back.schedule, Schedule::Even { k: 3 });
}

/// The forecast's cached largest fitting level decides exactly as comparing each candidate's
/// half-width with the tolerance: `worst-case` (cached) and `last-released` (direct; its
/// reference stays 1/2 while a threshold rule releases no score) agree on `queries_left` after
/// every answer, across sizes, tolerances, methods and schedules.
#[test]
fn cached_fit_level_matches_direct_half_width_comparison() {
    use holdout_ledger::stats::policy::ToleranceReference;
    let mut compared = 0;
    for rows in [50u64, 999, 20_000, 1_000_000] {
        for tolerance in [0.01, 0.05, 0.12, 0.3, 0.6] {
            for method in [Method::Exact, Method::Kl, Method::Hoeffding] {
                for schedule in ["series", "even:40"] {
                    let mut cached = policy("threshold:0.2", schedule, rows, tolerance);
                    cached.targets[0].method = method;
                    let mut direct = cached.clone();
                    direct.tolerance_reference = ToleranceReference::LastReleased;
                    let (mut a, mut b) = (
                        Accountant::new(cached).unwrap(),
                        Accountant::new(direct).unwrap(),
                    );
                    for step in 0..6u64 {
                        let (sa, sb) = (a.status(Some("t")), b.status(Some("t")));
                        assert_eq!(
                            sa.targets[0].queries_left, sb.targets[0].queries_left,
                            "rows {rows} tol {tolerance} {method:?} {schedule} step {step}"
                        );
                        compared += 1;
                        let r = req("t");
                        match (a.quote(&r), b.quote(&r)) {
                            (Ok(ca), Ok(cb)) => {
                                let k = Outcome::Errors(rows * (step % 3) / 10);
                                a.answer(&r, &ca, &[k]).unwrap();
                                b.answer(&r, &cb, &[k]).unwrap();
                            }
                            (Err(_), Err(_)) => break,
                            other => panic!("quotes disagree: {other:?}"),
                        }
                    }
                }
            }
        }
    }
    assert!(compared > 200, "{compared}");
}

/// Core 2 judges the tolerance on the reported cell interval: with Hoeffding the cell's
/// interval is the one-count half-width plus half a grid step (0.005 on a 0.01 grid), so the
/// same policy answers fewer queries than core 1's 10, every one within the tolerance, and the
/// first answer's `queries_left` still predicts the count exactly.
#[test]
fn core_2_tolerance_refusals_follow_the_reported_interval() {
    let mut p = policy("rounded:0.01", "series", 10_000, 0.05);
    p.targets[0].method = Method::Hoeffding;
    let mut acc = Accountant::new(p).unwrap();
    let first = ask(&mut acc, "a", 5000);
    let mut answered = 1;
    assert!(first.interval.half_width() <= 0.05);
    while acc.quote(&req("a")).is_ok() {
        let a = ask(&mut acc, "a", 5000);
        assert!(
            a.interval.half_width() <= 0.05,
            "{}",
            a.interval.half_width()
        );
        answered += 1;
    }
    assert_eq!(first.queries_left, answered - 1);
    assert!((1..10).contains(&answered), "{answered}");
}
