//! Identities anchored and cross-checked (issue 11): a holdout's checkpoint (format /2) signs
//! the identity chain's head with the holdout's, so a rewritten or deleted `@users` chain fails
//! against it; and the audit checks every answer's, adoption's, sealed entry's and round
//! answer's user and team against the identity events in force at its time. Ledgers are
//! written by the real engine (`audit_support`) and, for the daemon's side, by the real binary
//! (`common`).

mod audit_support;
mod common;

use holdout_ledger::audit::anchor::{self, CHECKPOINT_FORMAT, CHECKPOINT_FORMAT_V1, Checkpoint};
use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, Finding, Report, audit};
use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{PolicyInput, SubmitOutcome};
use holdout_ledger::ledger::{self, Kind};
use serde_json::Value;

use audit_support::{Generated, edit_body, rehash, small};
use common::{Daemon, Parts};

fn with_checkpoint(ex: &Export, cp: &Checkpoint) -> Report {
    audit(
        ex,
        AuditOptions {
            checkpoints: vec![("cp.json".into(), cp.clone())],
            ..AuditOptions::default()
        },
    )
}

/// Findings the /2 checkpoint makes about the identity chain.
fn identity_head_findings(report: &Report) -> Vec<&Finding> {
    report
        .findings
        .iter()
        .filter(|f| f.chain == ledger::USERS_CHAIN && f.field.starts_with("checkpoint cp.json"))
        .collect()
}

/// Answers (and adoptions) of the holdout's chain, by entry number.
fn answer_entries(ex: &Export) -> Vec<u64> {
    ex.entries
        .iter()
        .filter(|e| matches!(e.kind(), Some(Kind::Answer | Kind::Adopt)))
        .map(|e| e.seq)
        .collect()
}

/// Position in `@users` of the user-added event of `user`.
fn added_event(ex: &Export, user: &str) -> usize {
    ex.users
        .iter()
        .position(|e| {
            e.kind() == Some(Kind::UserAdded)
                && serde_json::from_str::<Value>(&e.body).unwrap()["user"] == user
        })
        .unwrap_or_else(|| panic!("no user-added event of {user}"))
}

/// The outcome's entry number, for an answer.
fn answered_entry(g: &mut Generated, out: &SubmitOutcome) -> u64 {
    let SubmitOutcome::Answer { receipt, .. } = out else {
        panic!("not an answer: {out:?}");
    };
    let ex = g.export();
    ex.entries
        .iter()
        .find(|e| e.hash == receipt.entry_hash)
        .map(|e| e.seq)
        .expect("the receipt's entry")
}

/// Two teams with answers, and room under the tolerance for more (unlike `small`, whose last
/// queries are refused).
fn roomy(seed: u64) -> Generated {
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.5,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("roomy", 300, policy, 2, seed);
    for q in 0..4 {
        g.advance(60);
        g.submit(q % 2, 60 + 5 * q as u64);
    }
    g
}

#[test]
fn a_team_rewritten_in_users_with_hashes_recomputed_fails_against_a_v2_checkpoint() {
    let mut g = small(21);
    let cp = g.checkpoint();
    let ex = g.export();
    assert_eq!(cp.format, CHECKPOINT_FORMAT);
    assert_eq!(cp.users_seq, Some(ex.users.len() as u64 - 1));
    assert_eq!(
        cp.users_head_hash.as_deref(),
        Some(ex.users.last().unwrap().hash.as_str())
    );
    let clean = with_checkpoint(&ex, &cp);
    assert!(clean.clean(), "{:#?}", clean.findings);
    assert_eq!(clean.identity_checked, answer_entries(&ex).len() as u64);
    assert!(
        clean.identity_checked >= 4,
        "the generator's teams answered"
    );

    // analyst1 moved from team1 to team0 in @users, every later hash recomputed: the identity
    // chain verifies on its own; the checkpoint's identity head does not match any more.
    let mut moved = ex.clone();
    let i = added_event(&moved, "analyst1");
    edit_body(&mut moved.users[i], |v| v["team"] = Value::from("team0"));
    rehash(&mut moved.users, i);
    assert!(ledger::verify_chain(&moved.users).is_empty());
    let report = with_checkpoint(&moved, &cp);
    let head = identity_head_findings(&report);
    assert_eq!(head.len(), 1, "{:#?}", report.findings);
    assert!(
        head[0].field.ends_with("users_head_hash") && head[0].problem.contains("@users"),
        "{:?}",
        head[0]
    );
    // The answers still say team1: each of analyst1's is a team finding naming @users.
    let team_findings: Vec<&Finding> = report
        .findings
        .iter()
        .filter(|f| f.field == "team")
        .collect();
    assert!(!team_findings.is_empty(), "{:#?}", report.findings);
    for f in &team_findings {
        assert!(
            f.problem.contains("analyst1")
                && f.problem.contains("team team0")
                && f.problem.contains("@users"),
            "{f:?}"
        );
    }

    // An identity chain rebuilt to say exactly the same things (every event re-created with
    // a fresh salt) agrees with every answer: only the checkpoint tells it from the original.
    let mut rebuilt = ex.clone();
    for e in &mut rebuilt.users {
        e.salt = ledger::fresh_salt().unwrap();
    }
    rehash(&mut rebuilt.users, 0);
    let report = audit(&rebuilt, AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
    let report = with_checkpoint(&rebuilt, &cp);
    assert_eq!(
        identity_head_findings(&report).len(),
        1,
        "{:#?}",
        report.findings
    );
    assert_eq!(report.findings.len(), 1, "{:#?}", report.findings);
}

#[test]
fn deleting_every_identity_event_fails_against_a_v2_checkpoint() {
    let mut g = small(22);
    let cp = g.checkpoint();
    let (name, at) = (g.name.clone(), auth::rfc3339(g.engine.now()));
    let bare = anchor::checkpoint_without_identity(g.engine.store().conn(), &name, &at).unwrap();
    let ex = g.export();
    let mut gone = ex.clone();
    gone.users.clear();
    gone.header.chains.insert(ledger::USERS_CHAIN.into(), 0);

    let report = with_checkpoint(&gone, &cp);
    let head = identity_head_findings(&report);
    assert_eq!(head.len(), 1, "{:#?}", report.findings);
    assert!(
        head[0].field.ends_with("users_seq")
            && head[0]
                .problem
                .contains("truncated or deleted identity events"),
        "{:?}",
        head[0]
    );
    // And every answer now names a user nobody added.
    let answers = answer_entries(&ex);
    for seq in &answers {
        assert!(
            report.findings.iter().any(|f| f.entry == Some(*seq)
                && f.field == "user"
                && f.problem.contains("no user-added event in @users")),
            "entry {seq}: {:#?}",
            report.findings
        );
    }
    assert_eq!(report.identity_checked, answers.len() as u64);

    // A checkpoint of the holdout's head alone (/1) says nothing about @users: only the
    // cross-check catches the deletion then.
    assert_eq!(bare.format, CHECKPOINT_FORMAT_V1);
    let report = with_checkpoint(&gone, &bare);
    assert!(identity_head_findings(&report).is_empty());
    assert!(!report.clean());
    assert!(
        report
            .findings
            .iter()
            .all(|f| f.field == "user" && f.problem.contains("@users")),
        "{:#?}",
        report.findings
    );
}

#[test]
fn an_answer_whose_user_has_no_user_added_event_is_flagged() {
    let mut g = roomy(23);
    g.advance(60);
    // A caller the identity chain never heard of, in an existing team.
    let stranger = Caller {
        name: "mallory".into(),
        roles: vec![Role::Analyst],
        team: "team0".into(),
    };
    let out = g.submit_as(&stranger, 70);
    let unknown = answered_entry(&mut g, &out);
    // A known user whose entry carries another team than @users gives them.
    g.advance(60);
    let mut elsewhere = g.analysts[0].clone();
    elsewhere.team = "team1".into();
    let out = g.submit_as(&elsewhere, 72);
    let moved = answered_entry(&mut g, &out);

    let ex = g.export();
    let report = audit(&ex, AuditOptions::default());
    assert!(!report.clean());
    assert_eq!(report.findings.len(), 2, "{:#?}", report.findings);
    let f = &report.findings[0];
    assert_eq!((f.entry, f.field.as_str()), (Some(unknown), "user"));
    assert!(
        f.problem.contains("mallory") && f.problem.contains("no user-added event in @users"),
        "{f:?}"
    );
    let f = &report.findings[1];
    assert_eq!((f.entry, f.field.as_str()), (Some(moved), "team"));
    assert!(
        f.problem.contains("analyst0")
            && f.problem.contains("belongs to team team0")
            && f.problem.contains("records team team1"),
        "{f:?}"
    );
    assert_eq!(report.identity_checked, answer_entries(&ex).len() as u64);
}

#[test]
fn an_answer_after_its_user_was_revoked_is_flagged() {
    let mut g = roomy(24);
    let before = g.export();
    let analyst1_answers: Vec<u64> = before
        .entries
        .iter()
        .filter(|e| e.body.contains("\"user\":\"analyst1\"") && e.kind() == Some(Kind::Answer))
        .map(|e| e.seq)
        .collect();
    assert!(!analyst1_answers.is_empty());
    g.advance(60);
    g.revoke("analyst1");
    g.advance(60);
    // The engine takes the caller as given; the daemon would have refused the revoked token.
    let caller = g.analysts[1].clone();
    let out = g.submit_as(&caller, 75);
    let late = answered_entry(&mut g, &out);

    let ex = g.export();
    let report = audit(&ex, AuditOptions::default());
    assert_eq!(report.findings.len(), 1, "{:#?}", report.findings);
    let f = &report.findings[0];
    assert_eq!((f.entry, f.field.as_str()), (Some(late), "user"));
    assert!(
        f.problem.contains("analyst1") && f.problem.contains("revoked"),
        "{f:?}"
    );
    // analyst1's answers from before the revocation stand.
    for seq in analyst1_answers {
        assert!(report.findings.iter().all(|f| f.entry != Some(seq)));
    }
}

#[test]
fn a_genuine_ledger_with_several_users_and_teams_audits_clean() {
    // Open holdout: three teams, a second member of team0 added later, a token rotation, and
    // a user revoked after their answers.
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("several", 300, policy, 3, 25);
    for q in 0..3 {
        g.advance(60);
        g.submit(q, 60 + 5 * q as u64);
    }
    g.advance(60);
    let second = g.user("analyst0b", &[Role::Analyst], Some("team0"));
    g.rotate("analyst0");
    g.advance(60);
    g.submit_as(&second, 66);
    g.advance(60);
    g.submit(0, 68);
    g.revoke("analyst2");
    g.advance(60);
    g.submit(1, 71);
    let cp = g.checkpoint();
    assert_eq!(cp.format, CHECKPOINT_FORMAT);
    let ex = g.export();
    let kinds: Vec<Option<Kind>> = ex.users.iter().map(|e| e.kind()).collect();
    for k in [Kind::UserAdded, Kind::TokenRotated, Kind::UserRevoked] {
        assert!(kinds.contains(&Some(k)), "{kinds:?}");
    }
    let teams: std::collections::BTreeSet<String> = ex
        .entries
        .iter()
        .filter(|e| e.kind() == Some(Kind::Answer))
        .map(|e| serde_json::from_str::<Value>(&e.body).unwrap()["team"].to_string())
        .collect();
    assert_eq!(teams.len(), 3, "{teams:?}");
    let report = audit(
        &ex,
        AuditOptions {
            labels: Some(g.label_columns()),
            checkpoints: vec![("cp.json".into(), cp)],
            ..AuditOptions::default()
        },
    );
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.identity_checked, answer_entries(&ex).len() as u64);
    assert_eq!(report.identity_checked, 6);

    // Sealed round: team1's user is revoked after sealing and before the close. The round's
    // answers are written at the close, but the user acted when the entry was sealed: clean.
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "sealed:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("sealed", 400, policy, 3, 26);
    for (t, accuracy) in [(0, 70), (1, 80), (2, 90), (0, 75)] {
        g.advance(30);
        let out = g.submit(t, accuracy);
        assert!(matches!(out, SubmitOutcome::Sealed { .. }), "{out:?}");
    }
    g.advance(30);
    g.revoke("analyst1");
    g.advance(30);
    let organizer = g.user("organizer", &[Role::Organizer], None);
    let name = g.name.clone();
    g.engine
        .close_holdout(&organizer, &name, "deadline")
        .unwrap();
    let cp = g.checkpoint();
    let ex = g.export();
    assert!(ex.entries.iter().any(|e| e.kind() == Some(Kind::Round)));
    let report = audit(
        &ex,
        AuditOptions {
            labels: Some(g.label_columns()),
            checkpoints: vec![("cp.json".into(), cp)],
            ..AuditOptions::default()
        },
    );
    assert!(report.clean(), "{:#?}", report.findings);
    // Four sealed entries and the four answers of the round.
    assert_eq!(report.identity_checked, 8);

    // The same round, but a sealed entry by the revoked user after the revocation is named
    // (and so is its answer in the round, checked at the sealed entry's time).
    let policy = PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "sealed:0.01".into(),
        tolerance: 0.3,
        ..PolicyInput::default()
    };
    let mut g = Generated::new("sealed-late", 400, policy, 2, 27);
    g.advance(30);
    g.submit(0, 70);
    g.revoke("analyst1");
    g.advance(30);
    g.submit(1, 80);
    let organizer = g.user("organizer", &[Role::Organizer], None);
    let name = g.name.clone();
    g.engine
        .close_holdout(&organizer, &name, "deadline")
        .unwrap();
    let ex = g.export();
    let report = audit(&ex, AuditOptions::default());
    let fields: Vec<&str> = report.findings.iter().map(|f| f.field.as_str()).collect();
    assert_eq!(
        fields,
        ["user", "answers[1].user"],
        "{:#?}",
        report.findings
    );
    assert!(
        report
            .findings
            .iter()
            .all(|f| f.problem.contains("revoked"))
    );
}

#[test]
fn a_v1_checkpoint_still_verifies() {
    // The checkpoint written by 0.1.0 (format /1) verifies, audits its export clean, and still
    // catches a changed head.
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/ledgers");
    let cp = Checkpoint::read(&dir.join("v0.1.0.checkpoint.json")).unwrap();
    assert_eq!(cp.format, CHECKPOINT_FORMAT_V1);
    assert_eq!((cp.users_seq, cp.users_head_hash.as_deref()), (None, None));
    assert_eq!(cp.verify_signature(), Ok(()));
    let ex = Export::read(&dir.join("v0.1.0.export.jsonl")).unwrap();
    let report = with_checkpoint(&ex, &cp);
    assert!(report.clean(), "{:#?}", report.findings);
    assert_eq!(report.checkpoints.len(), 1);
    // The fixture's answers name users of its identity chain.
    assert_eq!(report.identity_checked, answer_entries(&ex).len() as u64);
    assert_eq!(report.identity_checked, 4);
    let mut changed = ex.clone();
    let last = changed.entries.len() - 1;
    changed.entries[last].salt = "00".repeat(16);
    rehash(&mut changed.entries, last);
    let report = with_checkpoint(&changed, &cp);
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.field == "checkpoint cp.json: head_hash"),
        "{:#?}",
        report.findings
    );

    // One written now without the identity head is the same format, checked as before.
    let mut g = small(28);
    let at = auth::rfc3339(g.engine.now());
    let name = g.name.clone();
    let v1 = anchor::checkpoint_without_identity(g.engine.store().conn(), &name, &at).unwrap();
    assert_eq!(v1.format, CHECKPOINT_FORMAT_V1);
    assert_eq!(v1.verify_signature(), Ok(()));
    let ex = g.export();
    assert!(with_checkpoint(&ex, &v1).clean());
    let mut cut = ex.clone();
    cut.entries.pop();
    cut.header.chains.insert(name, cut.entries.len() as u64);
    let report = with_checkpoint(&cut, &v1);
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.field == "checkpoint cp.json: seq" && f.problem.contains("truncated")),
        "{:#?}",
        report.findings
    );
    // A /1 checkpoint with identity fields added after signing is refused.
    let mut padded = v1;
    padded.users_seq = Some(0);
    padded.users_head_hash = Some(ex.users[0].hash.clone());
    let report = with_checkpoint(&ex, &padded);
    assert!(
        report
            .findings
            .iter()
            .any(|f| f.field == "checkpoint cp.json: signature"),
        "{:#?}",
        report.findings
    );
}

/// Through the daemon: the Checkpoint RPC signs the identity head for auditors (and organizers
/// and custodians), never for analysts, and the auditor's /2 checkpoint audits the export
/// clean, the bootstrap user from `holdout init` included.
#[test]
fn the_daemon_signs_the_identity_head_for_auditors_and_not_for_analysts() {
    let d = Daemon::start();
    let labels = d.write("labels.csv", &Parts::new(400).labels_csv());
    d.admin(&[
        "create",
        "shelf",
        "--labels",
        &labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--answers",
        "rounded:0.05",
        "--tolerance",
        "0.4",
        "--description",
        "invented inspection data",
        "--json",
    ])
    .ok();
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let bob = d.add_user("bob", &["analyst"], Some("red"));
    let audrey = d.add_user("audrey", &["auditor"], None);
    let parts = Parts::new(400);
    for (i, who) in [&alice, &bob].iter().enumerate() {
        let f = d.write(&format!("p{i}.csv"), &parts.defect_predictions(3 + i, 0));
        d.run(who, &["submit", "shelf", "--predictions", &f, "--json"])
            .ok();
    }

    let analyst_cp = d
        .run(&alice, &["checkpoint", "shelf", "--json", "--out", "-"])
        .ok();
    let analyst_cp: Value = serde_json::from_str(&analyst_cp.stdout).unwrap();
    assert_eq!(analyst_cp["format"], CHECKPOINT_FORMAT_V1, "{analyst_cp}");
    assert!(analyst_cp.get("users_seq").is_none(), "{analyst_cp}");
    assert!(analyst_cp.get("users_head_hash").is_none(), "{analyst_cp}");

    let cp_path = d.path("auditor.checkpoint.json").display().to_string();
    d.run(
        &audrey,
        &["checkpoint", "shelf", "--json", "--out", &cp_path],
    )
    .ok();
    let cp = Checkpoint::read(std::path::Path::new(&cp_path)).unwrap();
    assert_eq!(cp.format, CHECKPOINT_FORMAT);
    assert_eq!(cp.verify_signature(), Ok(()));

    let export = d.path("shelf.jsonl").display().to_string();
    d.run(&audrey, &["export", "shelf", "--out", &export]).ok();
    let ex = Export::read(std::path::Path::new(&export)).unwrap();
    // init's user, alice, bob, audrey.
    assert_eq!(ex.users.len(), 4);
    assert_eq!(cp.users_seq, Some(3));
    assert_eq!(
        cp.users_head_hash.as_deref(),
        Some(ex.users[3].hash.as_str())
    );
    let analyst_file = d.write("analyst.checkpoint.json", &analyst_cp.to_string());
    let out = d
        .run(
            &audrey,
            &[
                "audit",
                &export,
                "--checkpoint",
                &cp_path,
                "--checkpoint",
                &analyst_file,
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(out["clean"], true, "{out:#}");
    assert_eq!(out["identity_checked"], 2, "{out:#}");
    assert_eq!(out["checkpoints"].as_array().unwrap().len(), 2, "{out:#}");
}
