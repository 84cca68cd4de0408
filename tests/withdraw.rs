//! Withdrawing a holdout that released nothing (issue 12, safe create): both roles recorded,
//! refused once anything was released, its rows and labels free for a new create, and the
//! withdrawal checked by the audit.

mod audit_support;
mod common;

use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::auth::Role;
use holdout_ledger::engine::{CreateRequest, PolicyInput, SubmitOutcome, TargetDecl};
use holdout_ledger::error::Error;

use audit_support::{Generated, edit_body, rehash};
use common::{Daemon, Parts};

fn policy() -> PolicyInput {
    PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.2,
        ..PolicyInput::default()
    }
}

/// A create request for `name` over the generated holdout's own ids and labels.
fn same_labels(g: &Generated, name: &str) -> CreateRequest {
    CreateRequest {
        name: name.into(),
        description: String::new(),
        policy: policy(),
        targets: vec![TargetDecl {
            name: "y".into(),
            column: "label".into(),
            metric: "error".parse().unwrap(),
            method: String::new(),
            classes: vec!["0".into(), "1".into()],
        }],
        ids: g.ids.clone(),
        columns: vec![g.labels.clone()],
    }
}

fn chain_len(g: &mut Generated) -> usize {
    g.export().entries.len()
}

#[test]
fn an_unanswered_holdout_is_withdrawn_by_both_roles_and_its_labels_sealed_again() {
    let mut g = Generated::new("first", 300, policy(), 2, 11);
    let keeper = g.user("keeper", &[Role::Custodian], None);
    let runner = g.user("runner", &[Role::Organizer], None);
    let analyst = g.analysts[0].clone();

    // Analysts cannot withdraw.
    let err = g
        .engine
        .withdraw_holdout(&analyst, "first", "")
        .unwrap_err();
    assert!(matches!(err, Error::PermissionDenied(_)), "{err}");

    // The labels are locked while the holdout stands.
    g.advance(60);
    let err = g
        .engine
        .create_holdout(&keeper, same_labels(&g, "second"))
        .unwrap_err();
    assert!(err.to_string().contains("already sealed"), "{err}");

    // The custodian asks; the holdout stays open, the request is shown.
    let w = g
        .engine
        .withdraw_holdout(&keeper, "first", "wrong tolerance")
        .unwrap();
    assert!(!w.completed, "{}", w.message);
    assert!(w.holdout.open);
    assert!(w.holdout.withdrawn_at.is_none());
    assert!(
        w.holdout
            .withdrawal_pending
            .contains("waiting for the organizer"),
        "{}",
        w.holdout.withdrawal_pending
    );
    // Asking again with the same role changes nothing.
    let before = chain_len(&mut g);
    let err = g.engine.withdraw_holdout(&keeper, "first", "").unwrap_err();
    assert!(matches!(err, Error::FailedPrecondition(_)), "{err}");
    assert!(err.to_string().contains("organizer must complete"), "{err}");
    assert_eq!(chain_len(&mut g), before);

    // The organizer completes it.
    g.advance(60);
    let w = g.engine.withdraw_holdout(&runner, "first", "").unwrap();
    assert!(w.completed, "{}", w.message);
    assert!(!w.holdout.open);
    assert!(w.holdout.withdrawn_at.is_some());
    assert!(w.holdout.withdrawal_pending.is_empty());

    // It refuses submissions, and a second withdrawal.
    let request = g.request(70);
    let err = g.engine.submit(&analyst, request).unwrap_err();
    assert!(err.to_string().contains("withdrawn"), "{err}");
    let err = g.engine.withdraw_holdout(&runner, "first", "").unwrap_err();
    assert!(err.to_string().contains("already withdrawn"), "{err}");

    // The same labels (same rows) make a new holdout; the old name stays taken.
    g.advance(60);
    let err = g
        .engine
        .create_holdout(&keeper, same_labels(&g, "first"))
        .unwrap_err();
    assert!(matches!(err, Error::AlreadyExists(_)), "{err}");
    let second = g
        .engine
        .create_holdout(&keeper, same_labels(&g, "second"))
        .unwrap();
    assert!(second.open);
    // ... and that one locks them again.
    let err = g
        .engine
        .create_holdout(&keeper, same_labels(&g, "third"))
        .unwrap_err();
    assert!(err.to_string().contains("already sealed"), "{err}");

    // The withdrawn holdout is listed as withdrawn (with closed ones).
    let all = g.engine.list_holdouts(&runner, true).unwrap();
    let first = all.iter().find(|h| h.name == "first").unwrap();
    assert!(first.withdrawn_at.is_some());
    let open = g.engine.list_holdouts(&runner, false).unwrap();
    assert!(open.iter().all(|h| h.name != "first"));

    // The audit of the withdrawn holdout is clean and counts both entries.
    let ex = g.export();
    let report = audit(&ex, AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.checked.get("withdraw-request"), Some(&1));
    assert_eq!(report.checked.get("withdraw"), Some(&1));
    assert_eq!(report.unchecked, 0);
}

#[test]
fn one_caller_with_both_roles_withdraws_in_one_call() {
    let mut g = Generated::new("solo", 300, policy(), 1, 12);
    let boss = g.user("boss", &[Role::Custodian, Role::Organizer], None);
    let w = g.engine.withdraw_holdout(&boss, "solo", "typo").unwrap();
    assert!(w.completed, "{}", w.message);
    let ex = g.export();
    assert_eq!(ex.entries.last().unwrap().kind, "withdraw");
    let report = audit(&ex, AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.checked.get("withdraw"), Some(&1));
}

#[test]
fn a_holdout_that_answered_cannot_be_withdrawn_and_nothing_is_recorded() {
    let mut g = Generated::new("used", 300, policy(), 1, 13);
    let boss = g.user("boss", &[Role::Custodian, Role::Organizer], None);
    g.advance(60);
    assert!(matches!(g.submit(0, 70), SubmitOutcome::Answer { .. }));
    let before = chain_len(&mut g);
    let err = g.engine.withdraw_holdout(&boss, "used", "").unwrap_err();
    assert!(matches!(err, Error::FailedPrecondition(_)), "{err}");
    assert!(err.to_string().contains("(answer) released"), "{err}");
    assert_eq!(chain_len(&mut g), before);
    let view = g.engine.holdout_view(&boss, "used").unwrap();
    assert!(view.open && view.withdrawn_at.is_none());
    // Its labels stay sealed.
    let err = g
        .engine
        .create_holdout(&boss, same_labels(&g, "again"))
        .unwrap_err();
    assert!(err.to_string().contains("already sealed"), "{err}");
}

#[test]
fn a_sealed_entry_blocks_a_withdrawal_too() {
    let p = PolicyInput {
        answers: "sealed:0.01".into(),
        ..policy()
    };
    let mut g = Generated::new("final", 300, p, 1, 14);
    let boss = g.user("boss", &[Role::Custodian, Role::Organizer], None);
    g.advance(60);
    assert!(matches!(g.submit(0, 70), SubmitOutcome::Sealed { .. }));
    let err = g.engine.withdraw_holdout(&boss, "final", "").unwrap_err();
    assert!(err.to_string().contains("(sealed) released"), "{err}");
}

#[test]
fn tampered_withdrawals_are_named_by_the_audit() {
    // A withdrawal whose roles were rewritten to one role.
    let mut g = Generated::new("w", 300, policy(), 1, 15);
    let keeper = g.user("keeper", &[Role::Custodian], None);
    let runner = g.user("runner", &[Role::Organizer], None);
    g.engine.withdraw_holdout(&keeper, "w", "").unwrap();
    g.advance(30);
    g.engine.withdraw_holdout(&runner, "w", "").unwrap();
    let ex = g.export();
    assert!(audit(&ex, AuditOptions::default()).clean());
    let last = ex.entries.len() - 1;

    let mut t = ex.clone();
    edit_body(&mut t.entries[last], |v| {
        v["requested_roles"] = serde_json::json!(["organizer"]);
    });
    rehash(&mut t.entries, last);
    let report = audit(&t, AuditOptions::default());
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.entry == Some(last as u64) && f.field == "roles"),
        "{:#?}",
        report.findings
    );

    // A one-call withdrawal forged for the custodian alone, claiming both roles: the replay
    // accepts its shape, the identity chain says the custodian was never an organizer.
    let mut t = ex.clone();
    let at = {
        let v: serde_json::Value = serde_json::from_str(&t.entries[last].body).unwrap();
        v["at"].clone()
    };
    edit_body(&mut t.entries[last], |v| {
        v["by"] = serde_json::json!("keeper");
        v["requested_by"] = serde_json::json!("keeper");
        v["roles"] = serde_json::json!(["custodian", "organizer"]);
        v["requested_roles"] = serde_json::json!(["custodian", "organizer"]);
        v["requested_at"] = at;
    });
    rehash(&mut t.entries, last);
    let report = audit(&t, AuditOptions::default());
    assert!(
        report.findings.iter().any(|f| f.entry == Some(last as u64)
            && f.field == "roles"
            && f.problem.contains("did not hold the organizer role")),
        "{:#?}",
        report.findings
    );

    // A withdrawal naming a request nobody made.
    let mut t = ex.clone();
    edit_body(&mut t.entries[last], |v| {
        v["requested_by"] = serde_json::json!("mallory");
    });
    rehash(&mut t.entries, last);
    let report = audit(&t, AuditOptions::default());
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.entry == Some(last as u64) && f.field == "requested_by"),
        "{:#?}",
        report.findings
    );

    // A withdrawal moved after an answer (and an answer after a withdrawal).
    let mut used = Generated::new("w", 300, policy(), 1, 16);
    used.advance(60);
    used.submit(0, 70);
    let mut t = used.export();
    let answer_at = t.entries.len() - 1;
    let mut withdrawal = ex.entries[last].clone();
    withdrawal.chain = t.entries[0].chain.clone();
    t.entries.push(withdrawal.clone());
    rehash(&mut t.entries, answer_at + 1);
    let report = audit(&t, AuditOptions::default());
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.entry == Some(answer_at as u64 + 1)
                && f.problem.contains("withdrawn after entry")),
        "{:#?}",
        report.findings
    );
    let mut t = used.export();
    t.entries.insert(answer_at, withdrawal);
    rehash(&mut t.entries, answer_at);
    let report = audit(&t, AuditOptions::default());
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.entry == Some(answer_at as u64 + 1)
                && f.problem.contains("after the holdout was withdrawn")),
        "{:#?}",
        report.findings
    );
}

/// The CLI path of the done-when: withdraw an unanswered holdout and re-create it from
/// the same labels file (the daemon's first user holds both roles).
#[test]
fn the_cli_withdraws_and_re_creates_from_the_same_labels_file() {
    let d = Daemon::start();
    let parts = Parts::new(400);
    let labels = d.write("labels.csv", &parts.labels_csv());
    let create = |name: &str, tolerance: &str| {
        d.admin(&[
            "create",
            name,
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
            "--tolerance",
            tolerance,
            "--json",
        ])
    };
    create("qc", "0.2").ok();
    // A second create from the same file is refused while qc stands.
    let again = create("qc2", "0.3").code(7);
    assert!(again.stderr.contains("already sealed"), "{}", again.stderr);
    let out = d
        .admin(&[
            "withdraw",
            "qc",
            "--reason",
            "tolerance too tight",
            "--json",
        ])
        .ok()
        .json();
    assert_eq!(out["completed"], true, "{out}");
    assert!(out["holdout"]["withdrawn_at"].is_string(), "{out}");
    let text = d.admin(&["list", "--all"]).ok();
    assert!(text.stdout.contains("withdrawn"), "{}", text.stdout);
    create("qc2", "0.3").ok();
    // Submissions to the withdrawn holdout are refused as a state error (exit 7).
    let preds = d.write("p.csv", &parts.defect_predictions(5, 0));
    let ana = d.add_user("ana", &["analyst"], Some("north"));
    let refused = d
        .run(&ana, &["submit", "qc", "--predictions", &preds])
        .code(7);
    assert!(refused.stderr.contains("withdrawn"), "{}", refused.stderr);
}
