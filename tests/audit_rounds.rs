//! The offline audit on a sealed final round written by the real engine: a clean export
//! verifies (entries, the close, the ranking and its paired comparisons replay), and a crafted
//! change to the round's released answers or comparisons is named even when the chain is
//! rebuilt around it.

mod audit_support;

use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::auth::Role;
use holdout_ledger::engine::{PolicyInput, SubmitOutcome};
use holdout_ledger::ledger::{self, Entry};
use serde_json::Value;

use audit_support::Generated;

fn sealed_round() -> Generated {
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "sealed:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("final-round", 400, policy, 3, 11);
    for (t, accuracy) in [(0, 70), (1, 80), (2, 90), (0, 75)] {
        g.advance(30);
        let out = g.submit(t, accuracy);
        assert!(
            !matches!(out, SubmitOutcome::Answer { .. }),
            "a sealed entry releases no answer before the close"
        );
    }
    let organizer = g.user("organizer", &[Role::Organizer], None);
    let name = g.name.clone();
    g.engine
        .close_holdout(&organizer, &name, "deadline reached")
        .unwrap();
    g
}

fn rehash(entries: &mut [Entry], from: usize) {
    for i in from..entries.len() {
        let prev = if i == 0 {
            ledger::ZERO_HASH.to_string()
        } else {
            entries[i - 1].hash.clone()
        };
        let e = &mut entries[i];
        e.prev_hash = prev;
        e.hash = ledger::entry_hash(&e.prev_hash, e.seq, &e.kind, &e.salt, &e.body);
    }
}

#[test]
fn a_closed_sealed_round_audits_clean_and_crafted_rounds_are_caught() {
    let mut g = sealed_round();
    let export = g.export();
    let kinds: Vec<&str> = export.entries.iter().map(|e| e.kind.as_str()).collect();
    assert!(kinds.contains(&"round"), "{kinds:?}");
    let labels = g.label_columns();
    let report = audit(
        &export,
        AuditOptions {
            labels: Some(labels),
            ..AuditOptions::default()
        },
    );
    assert!(report.clean(), "{:#?}", report.findings);

    let round = export
        .entries
        .iter()
        .position(|e| e.kind == "round")
        .unwrap();
    // Lower one released interval of the round, and rebuild the chain so only the replay can
    // notice.
    for field in ["answers", "comparisons"] {
        let mut crafted = export.clone();
        let e = &mut crafted.entries[round];
        let mut body: Value = serde_json::from_str(&e.body).unwrap();
        let item = &mut body[field][0];
        let key = if field == "answers" { "lower" } else { "upper" };
        let old = item[key]
            .as_f64()
            .unwrap_or_else(|| panic!("{field}[0].{key} in {item}"));
        item[key] = Value::from(old * 0.5 + 1e-3);
        e.body = ledger::canonical_json(&body);
        rehash(&mut crafted.entries, round);
        let report = audit(&crafted, AuditOptions::default());
        assert!(
            report
                .findings
                .iter()
                .any(|f| f.entry == Some(round as u64)),
            "crafted {field} not named: {:#?}",
            report.findings
        );
    }
}
