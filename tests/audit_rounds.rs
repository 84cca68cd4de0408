//! The offline audit on a sealed final round written by the real engine: a clean export
//! verifies (entries, the close, the ranking and its paired comparisons replay), and a crafted
//! change to the round's released answers or comparisons is named even when the chain is
//! rebuilt around it.

mod audit_support;

use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::auth::Role;
use holdout_ledger::engine::{PolicyInput, SubmitOutcome};
use holdout_ledger::ledger::{self, Entry, Kind};
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
        e.hash = ledger::Encoding::V2.hash(e).unwrap();
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

fn body_of(e: &Entry) -> Value {
    serde_json::from_str(&e.body).unwrap()
}

/// Changes the round entry's body with `change`, rebuilds the chain from there, and returns
/// the findings at the round entry.
fn craft_round(export: &Export, change: impl FnOnce(&mut Value)) -> Vec<String> {
    let round = export
        .entries
        .iter()
        .position(|e| e.kind() == Some(Kind::Round))
        .unwrap();
    let mut crafted = export.clone();
    let mut body = body_of(&crafted.entries[round]);
    change(&mut body);
    crafted.entries[round].body = ledger::canonical_json(&body);
    rehash(&mut crafted.entries, round);
    let report = audit(&crafted, AuditOptions::default());
    assert!(!report.clean(), "a crafted round audits clean");
    report
        .findings
        .iter()
        .filter(|f| f.entry == Some(round as u64))
        .map(|f| f.field.clone())
        .collect()
}

#[test]
fn every_entry_of_a_closed_round_with_three_teams_is_counted() {
    let mut g = sealed_round();
    let export = g.export();
    let report = audit(&export, AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.unchecked, 0);
    let count = |k: Kind| report.checked.get(k.as_str()).copied().unwrap_or(0);
    assert_eq!(count(Kind::Genesis), 1);
    assert_eq!(count(Kind::Sealed), 4, "{:?}", report.checked);
    assert_eq!(count(Kind::Round), 1);
    // Every entry of the holdout's chain is counted under its kind.
    let holdout_kinds = [
        Kind::Genesis,
        Kind::Answer,
        Kind::Refusal,
        Kind::Sealed,
        Kind::Round,
        Kind::Close,
        Kind::Read,
        Kind::Adopt,
    ];
    let counted: u64 = holdout_kinds.iter().map(|&k| count(k)).sum();
    assert_eq!(counted, export.entries.len() as u64, "{:?}", report.checked);
    // The identity events too (custodian, auditor, three analysts, the organizer).
    assert_eq!(count(Kind::UserAdded), export.users.len() as u64);
    // The round's four answers are listed as queries, each replayed; three teams ranked.
    assert_eq!(report.sealed, 4);
    assert_eq!(report.queries.len(), 4);
    assert!(report.queries.iter().all(|q| q.replayed));
    assert_eq!(report.rounds.len(), 1);
    assert_eq!((report.rounds[0].1, report.rounds[0].2), (4, 3));
}

#[test]
fn a_crafted_cell_ranking_position_or_comparison_is_named() {
    let mut g = sealed_round();
    let export = g.export();
    // A released cell of the round: one grid step lower, symbol and score together.
    let fields = craft_round(&export, |b| {
        let a = &mut b["answers"][1];
        let score = a["score"].as_f64().unwrap();
        let lower = score - 0.01;
        a["score"] = Value::from(lower);
        a["symbol"] = Value::from(format!("{lower:.2}"));
    });
    assert!(fields.iter().any(|f| f == "answers[1].score"), "{fields:?}");
    // A ranking position: the first two ranked entries swapped (ranks kept).
    let fields = craft_round(&export, |b| {
        let r = b["ranking"].as_array_mut().unwrap();
        let (first, second) = (r[0].clone(), r[1].clone());
        r[0] = second;
        r[1] = first;
        r[0]["rank"] = Value::from(1);
        r[1]["rank"] = Value::from(2);
    });
    assert!(fields.iter().any(|f| f == "ranking[0]"), "{fields:?}");
    // A paired comparison: the discordant counts moved together (the interval recomputed from
    // them would change, and they no longer fit the two entries' errors).
    let fields = craft_round(&export, |b| {
        let c = &mut b["comparisons"][0];
        let ao = c["a_only"].as_u64().unwrap();
        c["a_only"] = Value::from(ao + 3);
    });
    assert!(
        fields.iter().any(|f| f.starts_with("comparisons[0].")),
        "{fields:?}"
    );
    // A comparison said to tell the ranks apart when its interval does not (or the reverse).
    let fields = craft_round(&export, |b| {
        let c = &mut b["comparisons"][0];
        let d = c["distinguishable"].as_bool().unwrap();
        c["distinguishable"] = Value::from(!d);
    });
    assert!(
        fields.iter().any(|f| f == "comparisons[0].distinguishable"),
        "{fields:?}"
    );
    // The reserve's split: the pair count changed.
    let fields = craft_round(&export, |b| {
        let p = b["pairs"].as_u64().unwrap();
        b["pairs"] = Value::from(p + 1);
    });
    assert!(fields.iter().any(|f| f == "pairs"), "{fields:?}");
}

#[test]
fn a_sealed_holdout_with_a_daily_quota_audits_clean() {
    // The quota counts sealed entries as the daemon does; the audit counts them the same way,
    // so a genuine ledger with quota refusals is clean.
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "sealed:0.01".into(),
        tolerance: 0.3,
        daily_quota: 2,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("quota-round", 300, policy, 2, 5);
    let mut refused = 0;
    for (t, accuracy) in [(0, 70), (0, 72), (0, 74), (1, 80), (1, 81), (1, 82)] {
        g.advance(60);
        if let SubmitOutcome::Refusal { record, .. } = g.submit(t, accuracy) {
            assert_eq!(record.reason, "quota");
            refused += 1;
        }
    }
    assert_eq!(refused, 2, "each team's third entry of the day is refused");
    // The next day the quota is fresh.
    g.advance(86_400);
    assert!(matches!(g.submit(0, 76), SubmitOutcome::Sealed { .. }));
    let organizer = g.user("organizer", &[Role::Organizer], None);
    let name = g.name.clone();
    g.engine.close_holdout(&organizer, &name, "done").unwrap();
    let report = audit(&g.export(), AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.refusals, 2);
    assert_eq!(report.sealed, 5);
}

#[test]
fn an_entry_of_an_unknown_kind_is_unchecked_and_never_clean() {
    let mut g = sealed_round();
    let mut export = g.export();
    let last = export.entries.last().unwrap().clone();
    export.entries.push(Entry {
        seq: last.seq + 1,
        kind: "annotation".into(),
        body: "{\"text\":\"added later\"}".into(),
        prev_hash: last.hash.clone(),
        hash: String::new(),
        ..last
    });
    let n = export.entries.len();
    rehash(&mut export.entries, n - 1);
    export.header.chains.insert(g.name.clone(), n as u64);
    let report = audit(&export, AuditOptions::default());
    assert_eq!(report.unchecked, 1, "{:#?}", report.findings);
    assert!(!report.clean());
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.entry == Some(n as u64 - 1) && f.problem.contains("annotation")),
        "{:#?}",
        report.findings
    );
}
