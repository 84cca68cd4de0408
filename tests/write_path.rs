//! The engine's one write path: reads of exact scores, closes and identity events keep the
//! cached accounting state (no full replay after them), and a batch of queued answers runs in
//! one transaction, each answer its own entry coded after the one before it, a failing one
//! undone alone.

mod audit_support;

use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::auth::Role;
use holdout_ledger::engine::{PolicyInput, RawValues, SubmitOutcome};
use holdout_ledger::ledger::{self, Kind};

use audit_support::Generated;

/// A holdout with room for many answers, two teams and two answers already.
fn roomy(seed: u64) -> Generated {
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.5,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("roomy", 400, policy, 2, seed);
    for q in 0..2 {
        g.advance(60);
        assert!(matches!(
            g.submit(q % 2, 60 + 5 * q as u64),
            SubmitOutcome::Answer { .. }
        ));
    }
    g
}

#[test]
fn a_read_of_exact_scores_costs_no_replay() {
    let mut g = roomy(3);
    let name = g.name.clone();
    let auditor = g.auditor.clone();
    let replays = g.engine.full_replays();
    let before = ledger::read_chain(g.engine.store().conn(), &name)
        .unwrap()
        .len();
    g.engine.history(&auditor, &name, true).unwrap();
    let chain = ledger::read_chain(g.engine.store().conn(), &name).unwrap();
    assert_eq!(chain.len(), before + 1, "the exact read is recorded");
    assert_eq!(chain.last().unwrap().kind(), Some(Kind::Read));
    // Identity events go through the same path and move no holdout's state either.
    g.user("late-auditor", &[Role::Auditor], None);
    g.advance(60);
    assert!(matches!(g.submit(0, 66), SubmitOutcome::Answer { .. }));
    assert_eq!(
        g.engine.full_replays(),
        replays,
        "a read or an identity event forced a full replay of the chain"
    );
    assert!(audit(&g.export(), AuditOptions::default()).clean());
}

#[test]
fn a_batch_commits_together_and_a_failing_answer_is_undone_alone() {
    let mut g = roomy(4);
    let name = g.name.clone();
    let (a, b) = (g.analysts[0].clone(), g.analysts[1].clone());
    g.advance(60);
    let first = g.request(71);
    let mut broken = g.request(72);
    // One row id too few: refused as bad input, charging nothing.
    if let Some(m) = broken.models.first_mut() {
        m.ids.pop();
        if let RawValues::Classes(v) = &mut m.values {
            v.pop();
        }
    }
    let third = g.request(73);
    let before = ledger::read_chain(g.engine.store().conn(), &name)
        .unwrap()
        .len();
    let replays = g.engine.full_replays();
    let (r1, r2, r3) = g
        .engine
        .write(|e| {
            let r1 = e.submit(&a, first);
            let r2 = e.submit(&b, broken);
            let r3 = e.submit(&b, third);
            Ok((r1, r2, r3))
        })
        .unwrap();
    assert!(matches!(r1, Ok(SubmitOutcome::Answer { .. })), "{r1:?}");
    assert!(r2.is_err(), "the broken file must be refused: {r2:?}");
    assert!(matches!(r3, Ok(SubmitOutcome::Answer { .. })), "{r3:?}");
    let chain = ledger::read_chain(g.engine.store().conn(), &name).unwrap();
    assert_eq!(
        chain.len(),
        before + 2,
        "two answers, nothing for the broken one"
    );
    assert!(
        chain[before..]
            .iter()
            .all(|e| e.kind() == Some(Kind::Answer))
    );
    // Each answer was coded after the one before it, from the staged state: no replay.
    assert_eq!(g.engine.full_replays(), replays);
    let report = audit(&g.export(), AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
}

#[test]
fn a_failed_write_restores_the_cached_state() {
    let mut g = roomy(5);
    let name = g.name.clone();
    let a = g.analysts[0].clone();
    g.advance(60);
    let req = g.request(70);
    // An answer appended and then undone (the write's body fails after it): the ledger and the
    // cached state are as before, and the next answer is still coded correctly.
    let before = ledger::read_chain(g.engine.store().conn(), &name)
        .unwrap()
        .len();
    let replays = g.engine.full_replays();
    let out: Result<(), _> = g.engine.write(|e| {
        e.submit(&a, req)?;
        Err(holdout_ledger::error::Error::Internal(
            "abandoned on purpose".into(),
        ))
    });
    assert!(out.is_err());
    let chain = ledger::read_chain(g.engine.store().conn(), &name).unwrap();
    assert_eq!(
        chain.len(),
        before,
        "the abandoned answer must not be in the ledger"
    );
    g.advance(60);
    assert!(matches!(g.submit(1, 64), SubmitOutcome::Answer { .. }));
    // The state cached before the write was restored, so the next answer needed no replay.
    assert_eq!(g.engine.full_replays(), replays);
    let report = audit(&g.export(), AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
}
