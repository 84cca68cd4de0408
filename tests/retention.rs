//! Retention of prediction files and label shredding (issue 16): files kept for N days are
//! dropped by the engine's clock with a ledger entry, the audit re-scores the kept ones and flags
//! a tampered one; a closed holdout's labels are shredded by its custodian only, the audit stays
//! clean and says what it could not check, and the custodian's copy makes the re-scores run again.

mod audit_support;

use holdout_ledger::audit::kept;
use holdout_ledger::audit::{AuditOptions, Report, audit};
use holdout_ledger::auth::Role;
use holdout_ledger::engine::{PolicyInput, Retention, SubmitOutcome};
use holdout_ledger::error::Error;
use holdout_ledger::ledger::Kind;
use holdout_ledger::metric::Predictions;

use audit_support::{Generated, edit_body, rehash};

fn policy() -> PolicyInput {
    PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.2,
        ..PolicyInput::default()
    }
}

fn answered(o: &SubmitOutcome) {
    assert!(matches!(o, SubmitOutcome::Answer { .. }), "{o:?}");
}

fn audited(g: &mut Generated, with_labels: bool) -> Report {
    let export = g.export();
    audit(
        &export,
        AuditOptions {
            labels: with_labels.then(|| g.label_columns()),
            ..AuditOptions::default()
        },
    )
}

fn clean(r: &Report) {
    assert!(
        r.clean(),
        "findings: {:#?}, unchecked {}",
        r.findings,
        r.unchecked
    );
}

const DAY: i64 = 86_400;

#[test]
fn kept_files_are_dropped_after_their_days_and_the_audit_rescores_the_rest() {
    let mut g = Generated::keeping("kept", 300, policy(), 2, 5, Retention::Keep { days: 3 });
    let genesis: serde_json::Value = serde_json::from_str(&g.export().entries[0].body).unwrap();
    assert_eq!(
        genesis["retention"],
        serde_json::json!({"predictions": "kept", "days": 3})
    );

    let first = g.submit(0, 80);
    answered(&first);
    g.advance(DAY);
    answered(&g.submit(1, 70));
    let entries = g.answer_entries.clone();
    assert_eq!(entries.len(), 2);

    // Nothing is due yet.
    assert!(g.engine.drop_expired_predictions().unwrap().is_empty());
    let ex = g.export();
    assert_eq!(ex.kept.len(), 2);
    assert_eq!(ex.header.kept, Some(2));

    // With the labels every kept file is re-scored; without them, the audit says it did not.
    let r = audited(&mut g, true);
    clean(&r);
    let ret = r.retention.clone().unwrap();
    assert_eq!(ret.declared, "files kept 3 days");
    assert_eq!(ret.kept, entries);
    assert_eq!(ret.rescored, entries);
    assert!(ret.not_rescored.is_none());
    let r = audited(&mut g, false);
    clean(&r);
    assert!(r.retention.as_ref().unwrap().rescored.is_empty());
    assert!(
        r.cannot_check
            .iter()
            .any(|c| c.starts_with("re-scoring 2 kept prediction files: no labels")),
        "{:?}",
        r.cannot_check
    );

    // Three days and a second after the first answer: it goes, the second stays.
    g.advance(2 * DAY + 1);
    let dropped = g.engine.drop_expired_predictions().unwrap();
    assert_eq!(dropped, vec![("kept".to_string(), 1)]);
    assert!(g.engine.drop_expired_predictions().unwrap().is_empty());
    let ex = g.export();
    let last = ex.entries.last().unwrap();
    assert_eq!(last.kind(), Some(Kind::PredictionsDropped));
    assert!(last.body.contains(&format!("\"entries\":[{}]", entries[0])));
    assert_eq!(
        ex.kept.iter().map(|k| k.entry).collect::<Vec<_>>(),
        vec![entries[1]]
    );
    let r = audited(&mut g, true);
    clean(&r);
    let ret = r.retention.clone().unwrap();
    assert_eq!(ret.dropped, vec![entries[0]]);
    assert_eq!(ret.kept, vec![entries[1]]);
    assert_eq!(ret.rescored, vec![entries[1]]);
    assert_eq!(r.checked.get("predictions-dropped"), Some(&1));

    // The export file round-trips its kept lines and audits the same.
    let mut bytes = Vec::new();
    ex.write_to(&mut bytes).unwrap();
    let back = holdout_ledger::audit::export::Export::parse("x", &bytes[..]).unwrap();
    assert_eq!(back.kept, ex.kept);
    let r = audit(
        &back,
        AuditOptions {
            labels: Some(g.label_columns()),
            ..AuditOptions::default()
        },
    );
    clean(&r);
    assert_eq!(r.retention.unwrap().rescored, vec![entries[1]]);

    // The second one goes at its own time.
    g.advance(DAY);
    assert_eq!(
        g.engine.drop_expired_predictions().unwrap(),
        vec![("kept".to_string(), 1)]
    );
    assert!(g.export().kept.is_empty());
    clean(&audited(&mut g, true));
}

#[test]
fn a_digests_only_holdout_keeps_nothing_and_says_so() {
    let mut g = Generated::new("plain", 200, policy(), 1, 3);
    answered(&g.submit(0, 80));
    let ex = g.export();
    assert!(ex.kept.is_empty());
    assert_eq!(ex.header.kept, None);
    let genesis: serde_json::Value = serde_json::from_str(&ex.entries[0].body).unwrap();
    assert_eq!(genesis["retention"]["predictions"], "digests");
    let r = audited(&mut g, true);
    clean(&r);
    assert_eq!(r.retention.unwrap().declared, "digests only");
}

#[test]
fn a_tampered_missing_or_misscored_kept_file_is_a_finding() {
    let mut g = Generated::keeping("tamper", 300, policy(), 1, 9, Retention::Keep { days: 30 });
    answered(&g.submit(0, 80));
    answered(&g.submit(0, 60));
    let entries = g.answer_entries.clone();
    let labels = g.label_columns();
    let run = |ex: &holdout_ledger::audit::export::Export| {
        audit(
            ex,
            AuditOptions {
                labels: Some(labels.clone()),
                ..AuditOptions::default()
            },
        )
    };
    let good = g.export();
    clean(&run(&good));

    // One prediction changed in the kept file.
    let mut ex = good.clone();
    let mut preds = kept::decode(&ex.kept[0].data).unwrap();
    let Predictions::Classes(v) = &mut preds[0] else {
        panic!("classes expected");
    };
    v[7] = 1 - v[7];
    ex.kept[0].data = kept::encode(&preds);
    let r = run(&ex);
    assert!(
        r.findings.iter().any(|f| f.entry == Some(entries[0])
            && f.field == "kept"
            && f.problem.contains("does not have the digest")),
        "{:#?}",
        r.findings
    );

    // A kept file missing from the export, with no drop entry naming it.
    let mut ex = good.clone();
    let rest = ex.kept[1..].to_vec();
    ex = ex.with_kept(rest);
    let r = run(&ex);
    assert!(
        r.findings
            .iter()
            .any(|f| f.entry == Some(entries[0]) && f.problem.contains("carries none")),
        "{:#?}",
        r.findings
    );

    // The header announcing more files than the export carries.
    let mut ex = good.clone();
    ex.kept.pop();
    let r = run(&ex);
    assert!(r.findings.iter().any(|f| f.field == "header.kept"));

    // A ledger rebuilt with another exact loss for the second answer: the kept file's
    // re-score names it.
    let mut ex = good.clone();
    let i = entries[1] as usize;
    edit_body(&mut ex.entries[i], |b| {
        let e = b["exact"][0]["errors"].as_u64().unwrap();
        b["exact"][0]["errors"] = serde_json::json!(e + 1);
    });
    rehash(&mut ex.entries, i);
    let r = run(&ex);
    assert!(
        r.findings.iter().any(|f| f.entry == Some(entries[1])
            && f.field == "exact"
            && f.problem.contains("re-scoring the kept file")),
        "{:#?}",
        r.findings
    );
}

#[test]
fn labels_are_shredded_by_the_custodian_of_a_closed_holdout_only() {
    let mut g = Generated::keeping("shred", 300, policy(), 1, 13, Retention::Keep { days: 30 });
    let keeper = g.user("keeper", &[Role::Custodian], None);
    let runner = g.user("runner", &[Role::Organizer], None);
    let analyst = g.analysts[0].clone();
    answered(&g.submit(0, 80));
    answered(&g.submit(0, 75));
    let entries = g.answer_entries.clone();
    let before = g.export().entries.len();

    // Refused while open (custodian) and to anyone else (open or closed); nothing recorded.
    let err = g.engine.shred_labels(&keeper, "shred", "").unwrap_err();
    assert!(matches!(err, Error::FailedPrecondition(_)), "{err}");
    assert!(err.to_string().contains("is open"), "{err}");
    let err = g.engine.shred_labels(&analyst, "shred", "").unwrap_err();
    assert!(matches!(err, Error::PermissionDenied(_)), "{err}");
    g.engine.close_holdout(&runner, "shred", "done").unwrap();
    let closed = g.export().entries.len();
    assert_eq!(closed, before + 1);
    let err = g.engine.shred_labels(&runner, "shred", "").unwrap_err();
    assert!(matches!(err, Error::PermissionDenied(_)), "{err}");
    assert_eq!(g.export().entries.len(), closed);

    // The labels are in a copy of the database before the shred, and in none after.
    let blob: Vec<u8> = g
        .engine
        .store()
        .conn()
        .query_row(
            "SELECT labels FROM sealed_labels s JOIN holdouts h ON h.id = s.holdout_id
             WHERE h.name = 'shred'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(blob.len(), 300);
    let dir = tempfile::tempdir().unwrap();
    let holds = |path: &std::path::Path| {
        let bytes = std::fs::read(path).unwrap();
        bytes.windows(blob.len()).any(|w| w == blob.as_slice())
    };
    let copy_before = dir.path().join("before.db");
    holdout_ledger::store::backup::copy_to(g.engine.store().conn(), &copy_before).unwrap();
    assert!(holds(&copy_before), "the check must be able to see labels");

    g.advance(60);
    let s = g
        .engine
        .shred_labels(&keeper, "shred", "contract ended")
        .unwrap();
    assert_eq!(s.targets, 1);
    assert!(s.message.contains("--labels"), "{}", s.message);
    let err = g.engine.shred_labels(&keeper, "shred", "").unwrap_err();
    assert!(err.to_string().contains("already shredded"), "{err}");

    let copy_after = dir.path().join("after.db");
    holdout_ledger::store::backup::copy_to(g.engine.store().conn(), &copy_after).unwrap();
    assert!(
        !holds(&copy_after),
        "a backup after the shred holds the labels"
    );
    let left: i64 = g
        .engine
        .store()
        .conn()
        .query_row(
            "SELECT count(*) FROM sealed_labels s JOIN holdouts h ON h.id = s.holdout_id
             WHERE h.name = 'shred'",
            [],
            |r| r.get(0),
        )
        .unwrap();
    assert_eq!(left, 0);

    // The daemon still serves the holdout's public facts and its history.
    let view = g.engine.holdout_view(&keeper, "shred").unwrap();
    assert!(!view.open);
    let request = g.request(80);
    let err = g.engine.submit(&analyst, request).unwrap_err();
    assert!(err.to_string().contains("closed"), "{err}");

    // The audit without labels is clean, says they were shredded and what it could not do.
    let r = audited(&mut g, false);
    clean(&r);
    assert_eq!(r.checked.get("labels-shredded"), Some(&1));
    assert!(!r.labels_checked);
    let ret = r.retention.clone().unwrap();
    assert_eq!(ret.labels_shredded_at, Some(closed as u64));
    assert_eq!(ret.kept, entries);
    assert!(ret.rescored.is_empty());
    for want in [
        "re-scoring 2 kept prediction files: the labels were shredded",
        "the labels digest of the genesis entry: the labels were shredded",
    ] {
        assert!(
            r.cannot_check.iter().any(|c| c.starts_with(want)),
            "{want}: {:?}",
            r.cannot_check
        );
    }
    // With the custodian's copy the digest is checked and every kept file re-scored.
    let r = audited(&mut g, true);
    clean(&r);
    assert!(r.labels_checked);
    assert_eq!(r.retention.unwrap().rescored, entries);

    // Kept files still go at the end of their retention after a shred.
    g.advance(31 * DAY);
    assert_eq!(
        g.engine.drop_expired_predictions().unwrap(),
        vec![("shred".to_string(), 2)]
    );
    clean(&audited(&mut g, false));
}

#[test]
fn the_replay_refuses_a_shred_of_an_open_holdout_and_an_early_drop() {
    let mut g = Generated::keeping("early", 200, policy(), 1, 17, Retention::Keep { days: 3 });
    answered(&g.submit(0, 80));
    let entry = g.answer_entries[0];
    g.advance(3 * DAY);
    g.engine.drop_expired_predictions().unwrap();
    let good = g.export();
    clean(&audit(&good, AuditOptions::default()));
    let last = good.entries.len() - 1;

    // The drop moved back to a day after the answer: before its three days were up.
    let mut ex = good.clone();
    edit_body(&mut ex.entries[last], |b| {
        b["at"] = serde_json::json!("2026-03-02T09:00:00Z");
    });
    rehash(&mut ex.entries, last);
    let r = audit(&ex, AuditOptions::default());
    assert!(
        r.findings.iter().any(|f| f.entry == Some(last as u64)
            && f.problem.contains(&format!("entry {entry}"))
            && f.problem.contains("before its 3 days")),
        "{:#?}",
        r.findings
    );

    // The drop turned into a shred of the still-open holdout.
    let mut ex = good.clone();
    ex.entries[last].kind = "labels-shredded".into();
    let digest =
        serde_json::from_str::<serde_json::Value>(&ex.entries[0].body).unwrap()["labels_sha256"]
            .clone();
    edit_body(&mut ex.entries[last], |b| {
        *b = serde_json::json!({"by": "custodian", "roles": "custodian",
            "labels_sha256": digest, "reason": "", "at": "2026-03-04T09:00:00Z"});
    });
    rehash(&mut ex.entries, last);
    let r = audit(&ex, AuditOptions::default());
    assert!(
        r.findings
            .iter()
            .any(|f| f.entry == Some(last as u64)
                && f.problem.contains("while the holdout was open")),
        "{:#?}",
        r.findings
    );
}

#[test]
fn sealed_entries_keep_their_files_and_are_rescored_once_their_round_answers() {
    let sealed = PolicyInput {
        answers: "sealed".into(),
        tolerance: 0.2,
        ..PolicyInput::default()
    };
    let mut g = Generated::keeping("final", 300, sealed, 2, 21, Retention::Keep { days: 10 });
    let runner = g.user("runner", &[Role::Organizer], None);
    for (t, accuracy) in [(0, 80), (1, 70)] {
        let o = g.submit(t, accuracy);
        assert!(matches!(o, SubmitOutcome::Sealed { .. }), "{o:?}");
    }
    let sealed_entries: Vec<u64> = g
        .export()
        .entries
        .iter()
        .filter(|e| e.kind() == Some(Kind::Sealed))
        .map(|e| e.seq)
        .collect();
    assert_eq!(sealed_entries.len(), 2);

    // Kept while the round is open, but not re-scored: nothing is answered yet.
    let r = audited(&mut g, true);
    clean(&r);
    let ret = r.retention.clone().unwrap();
    assert_eq!(ret.kept, sealed_entries);
    assert!(ret.rescored.is_empty());
    assert!(
        r.cannot_check
            .iter()
            .any(|c| c.contains("2 sealed entries are not answered yet")),
        "{:?}",
        r.cannot_check
    );

    // The close answers both; each kept file is re-scored against its round answer.
    g.engine.close_holdout(&runner, "final", "").unwrap();
    let r = audited(&mut g, true);
    clean(&r);
    assert_eq!(r.retention.unwrap().rescored, sealed_entries);
}

/// The size a kept file takes for 1,000,000 rows (printed; run by hand with `--ignored
/// --nocapture`): two classes drawn at random (about one bit of entropy a row), and random
/// numbers. Checks the round trip.
#[test]
#[ignore = "prints kept-file sizes for the docs; run by hand"]
fn kept_file_sizes_for_a_million_rows() {
    let mut state: u64 = 7;
    let mut next = move || {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        state >> 33
    };
    let n = 1_000_000;
    let classes = vec![Predictions::Classes(
        (0..n).map(|_| (next() % 2) as u32).collect(),
    )];
    let numbers = vec![Predictions::Numbers(
        (0..n)
            .map(|_| next() as f64 / (1u64 << 31) as f64)
            .collect(),
    )];
    for (what, p, raw) in [("classes", &classes, 4 * n), ("numbers", &numbers, 8 * n)] {
        let data = kept::encode(p);
        assert_eq!(&kept::decode(&data).unwrap(), p);
        println!(
            "{what}: {n} rows, {raw} bytes of values, {} bytes kept ({:.3} of raw)",
            data.len(),
            data.len() as f64 / raw as f64
        );
    }
}
