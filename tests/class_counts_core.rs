//! The release of class counts in the accounting core (issue 18, DESIGN 4.8 "class counts are
//! label facts"): a coded symbol of its own, charged to the transcript before the first answer
//! that needs the counts, once per transcript.

use holdout_ledger::stats::accounting::{Accountant, AccountingError, Outcome, QueryRequest};
use holdout_ledger::stats::codes::composition_nats;
use holdout_ledger::stats::interval::Method;
use holdout_ledger::stats::policy::{Policy, Sharing, TargetPolicy};
use holdout_ledger::stats::schedule::Shares;

const ROWS: u64 = 600;

fn policy(class_counts: Option<u32>, sharing: Sharing) -> Policy {
    Policy {
        delta: 0.05,
        schedule: "series".parse().unwrap(),
        rule: "rounded:0.01".parse().unwrap(),
        tolerance: 0.5,
        tolerance_reference: Default::default(),
        sharing,
        shares: if sharing == Sharing::Isolated {
            Shares::OnArrival
        } else {
            Shares::None
        },
        rows: ROWS,
        targets: vec![TargetPolicy {
            name: "y".into(),
            binary: true,
            method: Method::Exact,
            class_counts,
        }],
        core_version: holdout_ledger::stats::CORE,
        code_version: holdout_ledger::stats::codes::CODE,
    }
}

fn req(analyst: &str) -> QueryRequest {
    QueryRequest {
        analyst: analyst.into(),
        target: 0,
        models: 1,
    }
}

/// ln C(n + C - 1, C - 1) by Python 3's exact `math.comb` then `math.log`:
/// `math.log(math.comb(189, 9))` = 34.18049824224726 (180 rows, 10 classes; the issue's "about
/// 34"), `math.log(math.comb(602, 2))` = 12.105705199284083 (600 rows, 3 classes).
#[test]
fn the_code_of_a_release_is_the_log_number_of_compositions() {
    let close = |a: f64, b: f64, tol: f64| (a - b).abs() <= tol * b.max(1.0);
    assert!(close(composition_nats(180, 10), 34.18049824224726, 1e-11));
    assert!(close(composition_nats(600, 3), 12.105705199284083, 1e-11));
    // Two classes: ln(n + 1).
    assert!(close(composition_nats(999, 2), 1000f64.ln(), 1e-11));
    // One class reveals nothing.
    assert_eq!(composition_nats(50, 1), 0.0);
    // Never below the exact value (float rounding only overcharges): compare with a sum of
    // log-factorials done in the other order, for sizes where both are accurate to ~1e-13.
    for (n, c) in [(1u64, 2u32), (7, 4), (180, 10), (10_000, 7), (1_000_000, 3)] {
        let direct: f64 = (1..c)
            .rev()
            .map(|j| ((n + u64::from(j)) as f64 / f64::from(j)).ln())
            .sum();
        assert!(composition_nats(n, c) >= direct * (1.0 - 1e-13), "{n} {c}");
        assert!(close(composition_nats(n, c), direct, 1e-11), "{n} {c}");
    }
    // Kraft, by enumeration: 7 rows over 4 classes have C(10, 3) = 120 compositions.
    let mut count = 0u64;
    for a in 0..=7u64 {
        for b in 0..=7 - a {
            for _c in 0..=7 - a - b {
                count += 1;
            }
        }
    }
    assert_eq!(count, 120);
    let total = count as f64 * (-composition_nats(7, 4)).exp();
    assert!(total <= 1.0 && total > 1.0 - 1e-9, "{total}");
}

#[test]
fn the_first_answer_pays_for_the_counts_and_only_after_their_release() {
    let mut acc = Accountant::new(policy(Some(3), Sharing::Shared)).unwrap();
    let mut plain = Accountant::new(policy(None, Sharing::Shared)).unwrap();
    let due = composition_nats(ROWS, 3);
    assert_eq!(acc.counts_pending("a", 0), Some(due));
    assert_eq!(plain.counts_pending("a", 0), None);

    // The quote (public facts only) already includes the counts' code.
    let before = acc.quote(&req("a")).unwrap();
    let without = plain.quote(&req("a")).unwrap();
    assert_eq!(before.transcript_nats, due);
    assert!((before.level_nats - without.level_nats - due).abs() < 1e-12);
    // So does the most a dry run says the answer could cost.
    let worst = acc.worst_code_nats(&req("a")).unwrap();
    let worst_plain = plain.worst_code_nats(&req("a")).unwrap();
    assert!((worst - worst_plain - due).abs() < 1e-12);
    // And the forecast: the next half-width is judged at the level with the counts.
    let s = acc.status(Some("a"));
    let s_plain = plain.status(Some("a"));
    assert!(s.targets[0].next_half_width.unwrap() > s_plain.targets[0].next_half_width.unwrap());
    assert!(s.targets[0].queries_left <= s_plain.targets[0].queries_left);

    // No answer before the release.
    let err = acc
        .answer(&req("a"), &before, &[Outcome::Errors(60)])
        .unwrap_err();
    assert!(matches!(err, AccountingError::BadOutcome(_)), "{err}");
    // Counts that do not fit the declaration are not a release.
    assert!(acc.release_counts("a", 0, &[100, 200]).is_err());
    assert!(acc.release_counts("a", 0, &[100, 200, 301]).is_err());
    assert!(plain.release_counts("a", 0, &[100, 200, 300]).is_err());

    assert_eq!(acc.released_counts("a", 0), None);
    let r = acc.release_counts("a", 0, &[100, 200, 300]).unwrap();
    assert_eq!(acc.released_counts("b", 0), Some(&[100, 200, 300][..]));
    assert_eq!(r.code_nats, due);
    assert_eq!(r.transcript_nats, due);
    // Once per transcript: under `shared` nobody pays again.
    assert_eq!(acc.counts_pending("a", 0), None);
    assert_eq!(acc.counts_pending("b", 0), None);
    assert!(acc.release_counts("b", 0, &[100, 200, 300]).is_err());
    // The release moved the state on: the old quote is stale, a new one has the same level.
    assert_eq!(
        acc.answer(&req("a"), &before, &[Outcome::Errors(60)])
            .unwrap_err(),
        AccountingError::StaleCharge
    );
    let after = acc.quote(&req("a")).unwrap();
    assert_eq!(after.level_nats.to_bits(), before.level_nats.to_bits());
    let ans = acc
        .answer(&req("a"), &after, &[Outcome::Errors(60)])
        .unwrap();
    let ans_plain = plain
        .answer(&req("a"), &without, &[Outcome::Errors(60)])
        .unwrap();
    // The answer's own code is the same; the transcript carries the counts too.
    assert_eq!(ans.code_nats, ans_plain.code_nats);
    assert!((ans.transcript_nats - ans_plain.transcript_nats - due).abs() < 1e-12);
    // The counts cost no share of delta.
    assert_eq!(ans.spent, ans_plain.spent);
}

#[test]
fn under_isolated_each_team_pays_in_its_own_transcript() {
    let mut acc = Accountant::new(policy(Some(4), Sharing::Isolated)).unwrap();
    let due = composition_nats(ROWS, 4);
    acc.release_counts("a", 0, &[150, 150, 150, 150]).unwrap();
    let q = acc.quote(&req("a")).unwrap();
    acc.answer(&req("a"), &q, &[Outcome::Errors(10)]).unwrap();
    // Team b's view is untouched by a's release: it still has the counts due.
    assert_eq!(acc.counts_pending("a", 0), None);
    assert_eq!(acc.counts_pending("b", 0), Some(due));
    assert_eq!(acc.released_counts("a", 0), Some(&[150, 150, 150, 150][..]));
    assert_eq!(acc.released_counts("b", 0), None);
    assert_eq!(acc.status(Some("b")).transcript_nats, 0.0);
    let r = acc.release_counts("b", 0, &[150, 150, 150, 150]).unwrap();
    assert_eq!(r.transcript_nats, due);
}

#[test]
fn policies_without_counts_record_no_field_and_few_classes_are_refused() {
    // A policy recorded before the field existed reads as "no counts", and writes back the
    // same (so older genesis entries hash the same).
    let p = policy(None, Sharing::Shared);
    let json = serde_json::to_string(&p).unwrap();
    assert!(!json.contains("class_counts"), "{json}");
    let back: Policy = serde_json::from_str(&json).unwrap();
    assert_eq!(back, p);
    let with = serde_json::to_string(&policy(Some(3), Sharing::Shared)).unwrap();
    assert!(with.contains("\"class_counts\":3"), "{with}");
    assert!(policy(Some(1), Sharing::Shared).validate().is_err());
    assert!(policy(Some(2), Sharing::Shared).validate().is_ok());
}
