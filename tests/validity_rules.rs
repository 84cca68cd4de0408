//! DESIGN 4.2's validity rules, each with tests of its own, through the engine (the same code
//! the gRPC services call), on temporary databases.

use std::sync::Arc;

use chrono::{TimeZone, Utc};
use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{
    CreateRequest, Engine, FixedClock, HistoryItem, ModelPredictions, PolicyInput, RawValues,
    SubmitMode, SubmitOutcome, SubmitRequest, TargetDecl,
};
use holdout_ledger::error::Error;
use holdout_ledger::ledger;
use holdout_ledger::metric::Metric;
use holdout_ledger::store::Store;

fn caller(name: &str, roles: &[Role], team: &str) -> Caller {
    Caller {
        name: name.into(),
        roles: roles.to_vec(),
        team: team.into(),
    }
}

fn custodian() -> Caller {
    caller("cora", &[Role::Custodian, Role::Organizer], "cora")
}

fn organizer() -> Caller {
    caller("olek", &[Role::Organizer], "olek")
}

fn analyst(team: &str) -> Caller {
    caller(&format!("{team}-member"), &[Role::Analyst], team)
}

fn auditor() -> Caller {
    caller("aud", &[Role::Auditor], "aud")
}

struct Fixture {
    engine: Engine,
    _dir: tempfile::TempDir,
}

fn engine() -> Fixture {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(&dir.path().join("t.db")).unwrap();
    let clock = Arc::new(FixedClock::new(
        Utc.with_ymd_and_hms(2026, 3, 4, 10, 0, 0).unwrap(),
    ));
    Fixture {
        engine: Engine::new(store, clock),
        _dir: dir,
    }
}

fn ids(n: usize, prefix: &str) -> Vec<String> {
    (0..n).map(|i| format!("{prefix}{i:05}")).collect()
}

/// Labels "a"/"b" alternating, shifted by `phase` so two holdouts can differ in labels only.
fn labels(n: usize, phase: usize) -> Vec<String> {
    (0..n)
        .map(|i| {
            if (i + phase).is_multiple_of(3) {
                "a"
            } else {
                "b"
            }
            .to_string()
        })
        .collect()
}

fn policy(answers: &str, schedule: &str, tolerance: f64) -> PolicyInput {
    PolicyInput {
        delta: 0.05,
        schedule: schedule.into(),
        answers: answers.into(),
        tolerance,
        ..PolicyInput::default()
    }
}

fn error_target(name: &str) -> TargetDecl {
    TargetDecl {
        name: name.into(),
        column: name.into(),
        metric: Metric::Error,
        method: "exact".into(),
        classes: vec!["a".into(), "b".into()],
    }
}

fn create(f: &mut Fixture, name: &str, ids: Vec<String>, labels: Vec<String>, p: PolicyInput) {
    f.engine
        .create_holdout(
            &custodian(),
            CreateRequest {
                name: name.into(),
                description: String::new(),
                policy: p,
                targets: vec![error_target("y")],
                ids,
                columns: vec![labels],
            },
        )
        .unwrap();
}

/// Predictions that are wrong on the first `wrong` rows (of the labels `labels(n, phase)`).
fn predictions(ids: &[String], truth: &[String], wrong: usize) -> ModelPredictions {
    let values = truth
        .iter()
        .enumerate()
        .map(|(i, y)| {
            if i < wrong {
                if y == "a" { "b" } else { "a" }.to_string()
            } else {
                y.clone()
            }
        })
        .collect();
    ModelPredictions {
        ids: ids.to_vec(),
        values: RawValues::Classes(values),
    }
}

fn submit(
    holdout: &str,
    target: &str,
    model: ModelPredictions,
    rid: Option<&str>,
) -> SubmitRequest {
    SubmitRequest {
        holdout: holdout.into(),
        target: target.into(),
        mode: SubmitMode::Answer,
        request_id: rid.map(str::to_string),
        note: String::new(),
        max_cost_nats: None,
        model_names: vec!["preds.csv".into()],
        models: vec![model],
        mark_final: false,
    }
}

fn answer_of(out: SubmitOutcome) -> Box<holdout_ledger::engine::AnswerRecord> {
    match out {
        SubmitOutcome::Answer { record, .. } => record,
        other => panic!("expected an answer, got {other:?}"),
    }
}

fn chain_len(f: &mut Fixture, name: &str) -> usize {
    ledger::read_chain(f.engine.store().conn(), name)
        .unwrap()
        .len()
}

// Rule 1: what an analyst sees is a function of the released symbol and public facts only.
#[test]
fn rule1_the_interval_depends_on_the_released_symbol_only() {
    let n = 1000;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    // Two databases in the same public state; the exact error differs (101 vs 104 errors) but
    // both round to the cell 0.10 on a 0.01 grid.
    let mut answers = Vec::new();
    for wrong in [101, 104] {
        let mut f = engine();
        create(
            &mut f,
            "h",
            id.clone(),
            truth.clone(),
            policy("rounded:0.01", "series", 0.2),
        );
        let out = f
            .engine
            .submit(
                &analyst("t1"),
                submit("h", "", predictions(&id, &truth, wrong), None),
            )
            .unwrap();
        answers.push(answer_of(out));
    }
    assert_eq!(answers[0].symbol, "0.10");
    assert_eq!(answers[0].symbol, answers[1].symbol);
    assert_eq!(answers[0].lower.to_bits(), answers[1].lower.to_bits());
    assert_eq!(answers[0].upper.to_bits(), answers[1].upper.to_bits());
    assert_eq!(answers[0].budget, answers[1].budget);
    // And nothing exact is shown.
    assert!(answers[0].exact.is_none());
}

#[test]
fn rule1_validation_errors_read_the_declaration_never_the_labels() {
    let n = 300;
    let id = ids(n, "r");
    let mut messages = Vec::new();
    // Same declaration (ids, classes), different labels.
    for phase in [0, 1] {
        let mut f = engine();
        create(
            &mut f,
            "h",
            id.clone(),
            labels(n, phase),
            policy("rounded:0.01", "series", 0.3),
        );
        let mut bad = predictions(&id, &labels(n, 0), 0);
        if let RawValues::Classes(v) = &mut bad.values {
            v[7] = "c".into();
        }
        let err = f
            .engine
            .submit(&analyst("t1"), submit("h", "", bad, None))
            .unwrap_err();
        messages.push(err.to_string());
        let mut v = submit("h", "", predictions(&id, &labels(n, 0), 5), None);
        v.mode = SubmitMode::Validate;
        match f.engine.submit(&analyst("t1"), v).unwrap() {
            SubmitOutcome::Validation { rows, digest } => messages.push(format!("{rows} {digest}")),
            other => panic!("{other:?}"),
        }
        assert_eq!(chain_len(&mut f, "h"), 1, "validation records nothing");
    }
    assert_eq!(messages[0], messages[2]);
    assert_eq!(messages[1], messages[3]);
    assert!(messages[0].contains("r00007") && messages[0].contains("not a declared class"));
}

// Rule 2: refusals are decided before scoring, from public facts only.
#[test]
fn rule2_refusals_do_not_depend_on_the_submission() {
    let n = 400;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let mut f = engine();
    // A tight tolerance: the first query fits, the second does not.
    create(
        &mut f,
        "h",
        id.clone(),
        truth.clone(),
        policy("rounded:0.01", "series", 0.09),
    );
    answer_of(
        f.engine
            .submit(
                &analyst("t1"),
                submit("h", "", predictions(&id, &truth, 40), None),
            )
            .unwrap(),
    );
    let before = f.engine.holdout_view(&analyst("t1"), "h").unwrap().budget;
    let mut reasons = Vec::new();
    // A perfect file and a terrible one get the same refusal.
    for wrong in [0, n] {
        let out = f
            .engine
            .submit(
                &analyst("t2"),
                submit("h", "", predictions(&id, &truth, wrong), None),
            )
            .unwrap();
        match out {
            SubmitOutcome::Refusal { record, receipt } => {
                assert!(receipt.is_some(), "a refusal is recorded");
                reasons.push((record.reason, record.message));
            }
            other => panic!("expected a refusal, got {other:?}"),
        }
    }
    assert_eq!(reasons[0], reasons[1]);
    assert_eq!(reasons[0].0, "tolerance");
    let after = f.engine.holdout_view(&analyst("t1"), "h").unwrap().budget;
    assert_eq!(before.spent, after.spent, "a refusal charges nothing");
    assert_eq!(before.transcript_nats, after.transcript_nats);
    assert_eq!(after.refused, 2);
    // The refusal entries carry no score.
    for e in ledger::read_chain(f.engine.store().conn(), "h").unwrap() {
        if e.kind == "refusal" {
            assert!(!e.body.contains("exact"), "{}", e.body);
        }
    }
}

#[test]
fn rule2_even_schedule_refuses_after_k_answers_whatever_the_scores() {
    let n = 200;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let mut f = engine();
    create(
        &mut f,
        "h",
        id.clone(),
        truth.clone(),
        policy("rounded:0.1", "even:3", 0.5),
    );
    let mut kinds = Vec::new();
    for q in 0..5 {
        let out = f
            .engine
            .submit(
                &analyst("t1"),
                submit("h", "", predictions(&id, &truth, q * 7), None),
            )
            .unwrap();
        kinds.push(match out {
            SubmitOutcome::Answer { .. } => "answer".to_string(),
            SubmitOutcome::Refusal { record, .. } => record.reason,
            other => panic!("{other:?}"),
        });
    }
    assert_eq!(
        kinds,
        ["answer", "answer", "answer", "budget-spent", "budget-spent"]
    );
}

// Rule 3: the policy is fixed at creation and written to the genesis entry.
#[test]
fn rule3_the_policy_is_in_the_genesis_entry() {
    let n = 100;
    let mut f = engine();
    create(
        &mut f,
        "h",
        ids(n, "r"),
        labels(n, 0),
        policy("threshold:0.3", "even:7", 0.4),
    );
    let chain = ledger::read_chain(f.engine.store().conn(), "h").unwrap();
    assert_eq!(chain[0].kind, "genesis");
    let body: serde_json::Value = serde_json::from_str(&chain[0].body).unwrap();
    assert_eq!(body["policy"]["core"]["rule"], "threshold:0.3");
    assert_eq!(body["policy"]["core"]["schedule"], "even:7");
    assert_eq!(body["policy"]["core"]["delta"], 0.05);
    assert_eq!(body["rows"], 100);
    assert_eq!(body["labels_sha256"].as_str().unwrap().len(), 64);
    assert!(body["versions"]["core"].is_string());
    // The stored policy is what the daemon answers with.
    let view = f.engine.holdout_view(&analyst("x"), "h").unwrap();
    assert_eq!(serde_json::to_value(&view.policy).unwrap(), body["policy"]);
}

#[test]
fn rule3_policies_that_make_no_sense_are_refused() {
    let n = 50;
    for (p, field) in [
        (
            PolicyInput {
                delta: 0.0,
                ..policy("rounded:0.01", "series", 0.1)
            },
            "delta",
        ),
        (
            PolicyInput {
                delta: 1.0,
                ..policy("rounded:0.01", "series", 0.1)
            },
            "delta",
        ),
        (policy("rounded:0.01", "series", 0.0), "tolerance"),
        (policy("rounded:0.013", "series", 0.1), "answers"),
        (policy("rounded:0.01", "weekly", 0.1), "schedule"),
    ] {
        let mut f = engine();
        let err = f
            .engine
            .create_holdout(
                &custodian(),
                CreateRequest {
                    name: "h".into(),
                    description: String::new(),
                    policy: p,
                    targets: vec![error_target("y")],
                    ids: ids(n, "r"),
                    columns: vec![labels(n, 0)],
                },
            )
            .unwrap_err();
        assert!(
            matches!(&err, Error::InvalidArgument { field: f, .. } if f == field),
            "{field}: {err}"
        );
    }
    // Exact intervals on a non-binary loss.
    let mut f = engine();
    let err = f
        .engine
        .create_holdout(
            &custodian(),
            CreateRequest {
                name: "h".into(),
                description: String::new(),
                policy: policy("rounded:0.01", "series", 0.1),
                targets: vec![TargetDecl {
                    name: "amount".into(),
                    column: "amount".into(),
                    metric: Metric::AbsError { bound: 10.0 },
                    method: "exact".into(),
                    classes: vec![],
                }],
                ids: ids(n, "r"),
                columns: vec![(0..n).map(|i| format!("{i}")).collect()],
            },
        )
        .unwrap_err();
    assert!(err.to_string().contains("0-1 loss"), "{err}");
}

// Rule 4: a request id is scoped to the team and tied to the digest.
#[test]
fn rule4_request_ids_and_digests() {
    let n = 300;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let mut f = engine();
    create(
        &mut f,
        "h",
        id.clone(),
        truth.clone(),
        policy("rounded:0.01", "series", 0.3),
    );
    let first = f
        .engine
        .submit(
            &analyst("t1"),
            submit("h", "", predictions(&id, &truth, 30), Some("q-1")),
        )
        .unwrap();
    let (rec, receipt) = match first {
        SubmitOutcome::Answer {
            record,
            receipt,
            replayed,
        } => {
            assert!(!replayed);
            (record, receipt)
        }
        other => panic!("{other:?}"),
    };
    let spent = f
        .engine
        .holdout_view(&analyst("t1"), "h")
        .unwrap()
        .budget
        .spent;

    // Same id, same predictions (rows in another order): the original answer, no charge.
    let mut shuffled = predictions(&id, &truth, 30);
    shuffled.ids.reverse();
    if let RawValues::Classes(v) = &mut shuffled.values {
        v.reverse();
    }
    match f
        .engine
        .submit(&analyst("t1"), submit("h", "", shuffled, Some("q-1")))
        .unwrap()
    {
        SubmitOutcome::Answer {
            record,
            receipt: r2,
            replayed,
        } => {
            assert!(replayed);
            assert_eq!(record.symbol, rec.symbol);
            assert_eq!(r2, receipt);
        }
        other => panic!("{other:?}"),
    }
    // Same id, other predictions: an error, not a free second answer.
    let err = f
        .engine
        .submit(
            &analyst("t1"),
            submit("h", "", predictions(&id, &truth, 31), Some("q-1")),
        )
        .unwrap_err();
    assert!(matches!(err, Error::FailedPrecondition(_)), "{err}");
    // The same id from another team is another request.
    answer_of(
        f.engine
            .submit(
                &analyst("t2"),
                submit("h", "", predictions(&id, &truth, 31), Some("q-1")),
            )
            .unwrap(),
    );
    // An identical vector without an id is answered again from the ledger at no charge.
    let spent_before = f
        .engine
        .holdout_view(&analyst("t1"), "h")
        .unwrap()
        .budget
        .spent;
    match f
        .engine
        .submit(
            &analyst("t1"),
            submit("h", "", predictions(&id, &truth, 30), None),
        )
        .unwrap()
    {
        SubmitOutcome::Answer { replayed, .. } => assert!(replayed),
        other => panic!("{other:?}"),
    }
    let spent_after = f
        .engine
        .holdout_view(&analyst("t1"), "h")
        .unwrap()
        .budget
        .spent;
    assert_eq!(spent_before, spent_after);
    assert!(spent_after > spent, "the second team's query was charged");
}

// Rule 5: one set of rows, one budget.
#[test]
fn rule5_overlapping_rows_or_repeated_labels_are_refused() {
    let n = 100;
    let mut f = engine();
    create(
        &mut f,
        "first",
        ids(n, "r"),
        labels(n, 0),
        policy("rounded:0.01", "series", 0.3),
    );
    // Overlapping ids.
    let mut overlap = ids(50, "z");
    overlap.push("r00042".into());
    let err = f
        .engine
        .create_holdout(
            &custodian(),
            CreateRequest {
                name: "second".into(),
                description: String::new(),
                policy: policy("rounded:0.01", "series", 0.3),
                targets: vec![error_target("y")],
                ids: overlap,
                columns: vec![labels(51, 0)],
            },
        )
        .unwrap_err();
    let msg = err.to_string();
    assert!(
        msg.contains("r00042") && msg.contains("split") && msg.contains("target"),
        "{msg}"
    );
    // The same labels under new ids.
    let err = f
        .engine
        .create_holdout(
            &custodian(),
            CreateRequest {
                name: "third".into(),
                description: String::new(),
                policy: policy("rounded:0.01", "series", 0.3),
                targets: vec![error_target("y")],
                ids: ids(n, "q"),
                columns: vec![labels(n, 0)],
            },
        )
        .unwrap_err();
    assert!(err.to_string().contains("already sealed"), "{err}");
    // Nothing of the refused holdouts was stored.
    assert_eq!(chain_len(&mut f, "second"), 0);
    assert_eq!(chain_len(&mut f, "third"), 0);
}

#[test]
fn rule5_two_targets_share_one_budget_and_one_transcript() {
    let n = 500;
    let id = ids(n, "r");
    let truth = labels(n, 0);
    let amounts: Vec<String> = (0..n).map(|i| format!("{}", (i % 10) as f64)).collect();
    let mut f = engine();
    f.engine
        .create_holdout(
            &custodian(),
            CreateRequest {
                name: "h".into(),
                description: String::new(),
                policy: policy("rounded:0.01", "series", 0.4),
                targets: vec![
                    error_target("class"),
                    TargetDecl {
                        name: "amount".into(),
                        column: "amount".into(),
                        metric: Metric::AbsError { bound: 10.0 },
                        method: String::new(),
                        classes: vec![],
                    },
                ],
                ids: id.clone(),
                columns: vec![truth.clone(), amounts],
            },
        )
        .unwrap();
    let a1 = answer_of(
        f.engine
            .submit(
                &analyst("t1"),
                submit("h", "class", predictions(&id, &truth, 10), None),
            )
            .unwrap(),
    );
    let a2 = answer_of(
        f.engine
            .submit(
                &analyst("t1"),
                submit(
                    "h",
                    "amount",
                    ModelPredictions {
                        ids: id.clone(),
                        values: RawValues::Numbers(vec![4.5; n]),
                    },
                    None,
                ),
            )
            .unwrap(),
    );
    assert_eq!(
        (a1.query, a2.query),
        (1, 2),
        "one schedule for both targets"
    );
    // The second target's level pays for the first target's released symbol.
    assert!((a2.budget.transcript_nats - 2.0 * 101f64.ln()).abs() < 1e-9);
    assert!(a2.level_nats > a1.level_nats + 101f64.ln() - 1e-9);
    // Without a target name, a two-target holdout asks which.
    let err = f
        .engine
        .submit(
            &analyst("t1"),
            submit("h", "", predictions(&id, &truth, 3), None),
        )
        .unwrap_err();
    assert!(err.to_string().contains("several targets"), "{err}");
}

// Rule 6: exact scores only for auditors (and organizers once closed); every read recorded;
// every entry salted.
#[test]
fn rule6_exact_scores_are_guarded_and_reads_recorded() {
    let n = 200;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let mut f = engine();
    create(
        &mut f,
        "h",
        id.clone(),
        truth.clone(),
        policy("rounded:0.01", "series", 0.3),
    );
    answer_of(
        f.engine
            .submit(
                &analyst("t1"),
                submit("h", "", predictions(&id, &truth, 17), None),
            )
            .unwrap(),
    );
    for who in [analyst("t1"), organizer(), custodian()] {
        let err = f.engine.history(&who, "h", true).unwrap_err();
        assert!(
            matches!(err, Error::PermissionDenied(_)),
            "{}: {err}",
            who.name
        );
        for item in f.engine.history(&who, "h", false).unwrap() {
            if let HistoryItem::Answer(r, _) = item {
                assert!(r.exact.is_none());
            }
        }
    }
    let before = chain_len(&mut f, "h");
    let items = f.engine.history(&auditor(), "h", true).unwrap();
    let HistoryItem::Answer(r, _) = &items[0] else {
        panic!()
    };
    assert_eq!(r.exact.as_ref().unwrap()[0].errors, Some(17));
    let chain = ledger::read_chain(f.engine.store().conn(), "h").unwrap();
    assert_eq!(chain.len(), before + 1);
    assert_eq!(chain.last().unwrap().kind, "read");
    // Organizers see exact scores once the holdout is closed.
    f.engine
        .close_holdout(&organizer(), "h", "round over")
        .unwrap();
    assert!(f.engine.history(&organizer(), "h", true).is_ok());
    // Every entry has its own 128-bit salt.
    let chain = ledger::read_chain(f.engine.store().conn(), "h").unwrap();
    let mut salts: Vec<&str> = chain.iter().map(|e| e.salt.as_str()).collect();
    assert!(salts.iter().all(|s| s.len() == 32));
    salts.sort();
    salts.dedup();
    assert_eq!(salts.len(), chain.len());
    assert!(ledger::verify_chain(&chain).is_empty());
    // A closed holdout answers no more queries.
    let err = f
        .engine
        .submit(
            &analyst("t1"),
            submit("h", "", predictions(&id, &truth, 3), None),
        )
        .unwrap_err();
    assert!(matches!(err, Error::FailedPrecondition(_)), "{err}");
}

#[test]
fn roles_are_enforced_by_the_engine() {
    let n = 100;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let mut f = engine();
    // Only a custodian creates.
    for who in [analyst("t1"), organizer(), auditor()] {
        let err = f
            .engine
            .create_holdout(
                &who,
                CreateRequest {
                    name: "h".into(),
                    description: String::new(),
                    policy: policy("rounded:0.01", "series", 0.3),
                    targets: vec![error_target("y")],
                    ids: id.clone(),
                    columns: vec![truth.clone()],
                },
            )
            .unwrap_err();
        assert!(matches!(err, Error::PermissionDenied(_)));
    }
    create(
        &mut f,
        "h",
        id.clone(),
        truth.clone(),
        policy("rounded:0.01", "series", 0.3),
    );
    // Only analysts submit.
    for who in [custodian(), organizer(), auditor()] {
        let err = f
            .engine
            .submit(&who, submit("h", "", predictions(&id, &truth, 3), None))
            .unwrap_err();
        assert!(matches!(err, Error::PermissionDenied(_)));
    }
    // Only organizers close.
    let err = f.engine.close_holdout(&analyst("t1"), "h", "").unwrap_err();
    assert!(matches!(err, Error::PermissionDenied(_)));
    // Tokens: unknown ones are refused.
    assert!(matches!(
        auth::authenticate(f.engine.store().conn(), "hlt_nope"),
        Err(Error::Unauthenticated(_))
    ));
    assert_eq!(chain_len(&mut f, "h"), 1, "nothing refused was recorded");
}

#[test]
fn restart_replays_the_ledger_to_the_same_budget() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("t.db");
    let n = 300;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let clock = || {
        Arc::new(FixedClock::new(
            Utc.with_ymd_and_hms(2026, 3, 4, 10, 0, 0).unwrap(),
        ))
    };
    let budget = {
        let mut f = Fixture {
            engine: Engine::new(Store::open(&path).unwrap(), clock()),
            _dir: tempfile::tempdir().unwrap(),
        };
        create(
            &mut f,
            "h",
            id.clone(),
            truth.clone(),
            policy("threshold:0.4", "series", 0.45),
        );
        for w in [10, 200, 20, 250] {
            f.engine
                .submit(
                    &analyst("t1"),
                    submit("h", "", predictions(&id, &truth, w), None),
                )
                .unwrap();
        }
        f.engine.holdout_view(&analyst("t1"), "h").unwrap().budget
    };
    let mut engine = Engine::new(Store::open(&path).unwrap(), clock());
    let again = engine.holdout_view(&analyst("t1"), "h").unwrap().budget;
    assert_eq!(budget, again);
    assert_eq!(again.answered, 4);
}

#[test]
fn daily_quota_refuses_until_utc_midnight() {
    let dir = tempfile::tempdir().unwrap();
    let clock = Arc::new(FixedClock::new(
        Utc.with_ymd_and_hms(2026, 3, 4, 23, 50, 0).unwrap(),
    ));
    let mut f = Fixture {
        engine: Engine::new(
            Store::open(&dir.path().join("q.db")).unwrap(),
            clock.clone(),
        ),
        _dir: dir,
    };
    let n = 300;
    let (id, truth) = (ids(n, "r"), labels(n, 0));
    let p = PolicyInput {
        daily_quota: 2,
        ..policy("rounded:0.1", "series", 0.4)
    };
    create(&mut f, "h", id.clone(), truth.clone(), p);
    let mut kinds = Vec::new();
    for w in [3, 4, 5] {
        match f
            .engine
            .submit(
                &analyst("t1"),
                submit("h", "", predictions(&id, &truth, w), None),
            )
            .unwrap()
        {
            SubmitOutcome::Answer { .. } => kinds.push("answer".to_string()),
            SubmitOutcome::Refusal { record, .. } => {
                assert!(
                    record.message.contains("2026-03-05T00:00:00"),
                    "{}",
                    record.message
                );
                kinds.push(record.reason);
            }
            other => panic!("{other:?}"),
        }
    }
    assert_eq!(kinds, ["answer", "answer", "quota"]);
    // Another team has its own quota.
    answer_of(
        f.engine
            .submit(
                &analyst("t2"),
                submit("h", "", predictions(&id, &truth, 6), None),
            )
            .unwrap(),
    );
    let b = f.engine.holdout_view(&analyst("t1"), "h").unwrap().budget;
    assert_eq!(b.quota_left_today, Some(0));
    // Past midnight UTC the quota is fresh.
    clock.set(Utc.with_ymd_and_hms(2026, 3, 5, 0, 0, 1).unwrap());
    answer_of(
        f.engine
            .submit(
                &analyst("t1"),
                submit("h", "", predictions(&id, &truth, 7), None),
            )
            .unwrap(),
    );
    let b = f.engine.holdout_view(&analyst("t1"), "h").unwrap().budget;
    assert_eq!(b.quota_left_today, Some(1));
    assert_eq!(
        b.quota_resets_at.as_deref(),
        Some("2026-03-06T00:00:00.000Z")
    );
}
