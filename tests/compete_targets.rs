//! Sealed rounds with several targets (issue 10, defect 5): each target is ranked on its own,
//! neighbours are compared only within a target, and the ranking's reserve is split over the
//! pairs within targets. Before the fix the round ranked all entries together and compared an
//! entry of one target with an entry of another (a difference of two unrelated losses).
//! The round is then audited offline: the ranking and its comparisons replay.

use std::sync::Arc;

use chrono::{TimeZone, Utc};
use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, LabelColumns, audit};
use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{
    CreateRequest, Engine, FixedClock, ModelPredictions, PolicyInput, RawValues, SubmitMode,
    SubmitRequest, TargetDecl, ranking_level,
};
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

/// Records `who` in the identity chain as the daemon does when a user is added, so the ledger's
/// entries name users the audit can find.
fn register(engine: &mut Engine, who: &Caller) {
    let now = engine.now();
    engine
        .write(|w| auth::add_user(w, &who.name, &who.roles, Some(&who.team), "cora", now))
        .unwrap();
}

fn ids(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("r{i:05}")).collect()
}

/// Two label columns on the same rows: `y` (every third row "a") and `z` (every other row "a").
fn column(n: usize, every: usize) -> Vec<String> {
    (0..n)
        .map(|i| if i % every == 0 { "a" } else { "b" }.to_string())
        .collect()
}

/// Predictions for a column, wrong exactly on rows `0..wrong`.
fn wrong_on(n: usize, every: usize, wrong: usize) -> ModelPredictions {
    let values = column(n, every)
        .into_iter()
        .enumerate()
        .map(|(i, y)| {
            if i < wrong {
                if y == "a" { "b" } else { "a" }.to_string()
            } else {
                y
            }
        })
        .collect();
    ModelPredictions {
        ids: ids(n),
        values: RawValues::Classes(values),
    }
}

#[test]
fn a_two_target_round_ranks_and_compares_within_each_target() {
    let n = 4000;
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(&dir.path().join("t.db")).unwrap();
    let clock = Arc::new(FixedClock::new(
        Utc.with_ymd_and_hms(2026, 3, 4, 10, 0, 0).unwrap(),
    ));
    let mut engine = Engine::new(store, clock.clone());
    let custodian = caller("cora", &[Role::Custodian, Role::Organizer], "cora");
    register(&mut engine, &custodian);
    register(&mut engine, &caller("olek", &[Role::Organizer], "olek"));
    for team in ["t1", "t2", "t3", "t4"] {
        register(
            &mut engine,
            &caller(&format!("{team}-m"), &[Role::Analyst], team),
        );
    }
    let target = |name: &str| TargetDecl {
        name: name.into(),
        column: name.into(),
        metric: Metric::Error,
        method: "exact".into(),
        classes: vec!["a".into(), "b".into()],
    };
    engine
        .create_holdout(
            &custodian,
            CreateRequest {
                name: "final".into(),
                description: String::new(),
                policy: PolicyInput {
                    answers: "sealed".into(),
                    tolerance: 0.2,
                    ..PolicyInput::default()
                },
                targets: vec![target("y"), target("z")],
                ids: ids(n),
                columns: vec![column(n, 3), column(n, 2)],
            },
        )
        .unwrap();
    // Target y: t1 10 % wrong, t2 12 %; target z: t3 25 %, t4 26 %. Ranked together, t2 (y)
    // would sit next to t3 (z) and be "told apart" from it.
    for (team, tgt, every, wrong) in [
        ("t1", "y", 3, 400),
        ("t2", "y", 3, 480),
        ("t3", "z", 2, 1000),
        ("t4", "z", 2, 1040),
    ] {
        let req = SubmitRequest {
            holdout: "final".into(),
            target: tgt.into(),
            mode: SubmitMode::Answer,
            request_id: None,
            note: String::new(),
            max_cost_nats: None,
            model_names: vec!["final.csv".into()],
            models: vec![wrong_on(n, every, wrong)],
            mark_final: false,
        };
        engine
            .submit(&caller(&format!("{team}-m"), &[Role::Analyst], team), req)
            .unwrap();
    }
    let organizer = caller("olek", &[Role::Organizer], "olek");
    engine.close_holdout(&organizer, "final", "done").unwrap();
    let r = engine
        .ranking(&caller("t1-m", &[Role::Analyst], "t1"), "final")
        .unwrap();

    // Each target its own ranking, ranks from 1.
    let rows: Vec<(Option<&str>, u64, &str)> = r
        .entries
        .iter()
        .map(|e| (e.target.as_deref(), e.rank, e.team.as_str()))
        .collect();
    assert_eq!(
        rows,
        vec![
            (Some("y"), 1, "t1"),
            (Some("y"), 2, "t2"),
            (Some("z"), 1, "t3"),
            (Some("z"), 2, "t4"),
        ]
    );
    // Only neighbours within a target are compared: one pair per target, none across.
    let target_of = |ticket: u64| {
        r.entries
            .iter()
            .find(|e| e.ticket == ticket)
            .and_then(|e| e.target.clone())
    };
    assert_eq!(r.comparisons.len(), 2, "{:#?}", r.comparisons);
    for c in &r.comparisons {
        assert_eq!(target_of(c.ahead), target_of(c.behind), "{c:?}");
        assert_eq!(c.target, target_of(c.ahead));
        // The true differences are -0.02 (y) and -0.01 (z).
        let truth = if c.target.as_deref() == Some("y") {
            -0.02
        } else {
            -0.01
        };
        assert!(c.lower <= truth && truth <= c.upper, "{c:?}");
    }
    // The reserve is split over the 2 pairs within targets, not the 6 pairs of 4 entries.
    let round: serde_json::Value = {
        let entries = ledger::read_chain(engine.store().conn(), "final").unwrap();
        let e = entries.iter().find(|e| e.kind == "round").unwrap();
        serde_json::from_str(&e.body).unwrap()
    };
    assert_eq!(round["pairs"], 2);
    let reserve = round["ranking_delta"].as_f64().unwrap();
    for c in &r.comparisons {
        // ln(pairs / reserve) with pairs = 2 (ranking_level(reserve, 4) would be 6 pairs).
        assert_eq!(c.level_nats.to_bits(), (2f64.ln() - reserve.ln()).to_bits());
        assert!(c.level_nats < ranking_level(reserve, 4));
    }
    assert!(
        r.statement.contains("Each target is ranked on its own"),
        "{}",
        r.statement
    );

    // The offline audit replays the round.
    let (entries, users) = {
        let conn = engine.store().conn();
        (
            ledger::read_chain(conn, "final").unwrap(),
            ledger::read_chain(conn, ledger::USERS_CHAIN).unwrap(),
        )
    };
    let export = Export::new("final", "2026-03-05T00:00:00Z", entries, users);
    let report = audit(
        &export,
        AuditOptions {
            labels: Some(LabelColumns {
                ids: ids(n),
                columns: vec![column(n, 3), column(n, 2)],
            }),
            ..AuditOptions::default()
        },
    );
    assert!(report.clean(), "{:#?}", report.findings);
    // Four sealed entries and their four answers in the round, each against @users.
    assert_eq!(report.identity_checked, 8);
}
