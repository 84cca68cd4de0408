//! Competitions through the engine (the code the gRPC services call) with a controlled clock:
//! sealed final rounds (nothing released before the close, late entries refused, the deadline
//! closes the round, the ranking's paired comparisons), the ladder leaderboard, policy checks,
//! and the duplicate-predictions report.

use std::sync::Arc;

use chrono::{TimeZone, Utc};
use holdout_ledger::auth::{Caller, Role};
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

struct Fixture {
    engine: Engine,
    clock: Arc<FixedClock>,
    dir: tempfile::TempDir,
}

fn fixture() -> Fixture {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(&dir.path().join("t.db")).unwrap();
    let clock = Arc::new(FixedClock::new(
        Utc.with_ymd_and_hms(2026, 3, 4, 10, 0, 0).unwrap(),
    ));
    Fixture {
        engine: Engine::new(store, clock.clone()),
        clock,
        dir,
    }
}

fn ids(n: usize) -> Vec<String> {
    (0..n).map(|i| format!("r{i:05}")).collect()
}

fn truth(n: usize) -> Vec<String> {
    (0..n)
        .map(|i| if i % 3 == 0 { "a" } else { "b" }.to_string())
        .collect()
}

fn create(f: &mut Fixture, name: &str, n: usize, p: PolicyInput) -> Result<(), Error> {
    f.engine
        .create_holdout(
            &custodian(),
            CreateRequest {
                name: name.into(),
                description: String::new(),
                policy: p,
                targets: vec![TargetDecl {
                    name: "y".into(),
                    column: "y".into(),
                    metric: Metric::Error,
                    method: "exact".into(),
                    classes: vec!["a".into(), "b".into()],
                }],
                ids: ids(n),
                columns: vec![truth(n)],
            },
        )
        .map(|_| ())
}

/// Predictions wrong exactly on rows `from..to`.
fn wrong_on(n: usize, from: usize, to: usize) -> ModelPredictions {
    let values = truth(n)
        .into_iter()
        .enumerate()
        .map(|(i, y)| {
            if (from..to).contains(&i) {
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

fn entry(holdout: &str, model: ModelPredictions, mark: bool) -> SubmitRequest {
    SubmitRequest {
        holdout: holdout.into(),
        target: String::new(),
        mode: SubmitMode::Answer,
        request_id: None,
        note: String::new(),
        max_cost_nats: None,
        model_names: vec!["final.csv".into()],
        models: vec![model],
        mark_final: mark,
    }
}

fn sealed_policy(closes_at: &str) -> PolicyInput {
    PolicyInput {
        answers: "sealed".into(),
        tolerance: 0.2,
        closes_at: closes_at.into(),
        ..PolicyInput::default()
    }
}

/// Everything an analyst can read about a sealed round before its close, as text.
fn analyst_views(f: &mut Fixture, team: &str) -> Vec<String> {
    let me = analyst(team);
    let view = f.engine.holdout_view(&me, "final").unwrap();
    let history: Vec<String> = f
        .engine
        .history(&me, "final", false)
        .unwrap()
        .into_iter()
        .map(|h| match h {
            HistoryItem::Sealed(r, _) => format!("sealed {} {} {}", r.team, r.ticket, r.level_nats),
            other => panic!("before the close only sealed entries exist: {other:?}"),
        })
        .collect();
    // Best per team: a sealed round releases no answer before its close, so no row.
    let board = f.engine.leaderboard(&me, "final").unwrap();
    assert!(board.rows.is_empty(), "{board:?}");
    assert_eq!(board.kind, "best-per-team");
    let board = format!("{board:?}");
    let round = format!("{:?}", f.engine.round_status(&me, "final").unwrap());
    let ranking = f.engine.ranking(&me, "final").unwrap_err();
    assert!(matches!(ranking, Error::FailedPrecondition(_)), "{ranking}");
    assert!(f.engine.history(&me, "final", true).is_err());
    vec![
        serde_json::to_string(&view.budget).unwrap(),
        format!("open {}", view.open),
        history.join("; "),
        board,
        round,
        ranking.to_string(),
    ]
}

/// Runs a round in which team t1's entry has `t1_wrong` errors; returns what the analysts saw
/// before the close (submit replies and every read path).
fn round_before_close(f: &mut Fixture, n: usize, t1_wrong: usize) -> Vec<String> {
    create(f, "final", n, sealed_policy("2026-03-04T12:00:00Z")).unwrap();
    let mut seen = Vec::new();
    for (team, model, mark) in [
        ("t1", wrong_on(n, 0, t1_wrong), true),
        ("t2", wrong_on(n, 0, 150), false),
        ("t3", wrong_on(n, 0, 400), false),
        // t1's later, worse entry: not selected, because t1 marked its first one.
        ("t1", wrong_on(n, 0, 700), false),
    ] {
        let out = f
            .engine
            .submit(&analyst(team), entry("final", model, mark))
            .unwrap();
        match out {
            SubmitOutcome::Sealed { record, .. } => seen.push(format!(
                "{} {} {} {} {}",
                record.team, record.ticket, record.query, record.delta_i, record.level_nats
            )),
            other => panic!("a sealed entry gets a sealed receipt: {other:?}"),
        }
        for t in ["t1", "t2", "t3"] {
            seen.extend(analyst_views(f, t));
        }
    }
    seen
}

#[test]
fn a_sealed_round_releases_nothing_before_it_closes() {
    // Two worlds that differ only in the score of t1's entry: every read path an analyst has
    // must show exactly the same before the close.
    let n = 3000;
    let mut good = fixture();
    let mut bad = fixture();
    let a = round_before_close(&mut good, n, 100);
    let b = round_before_close(&mut bad, n, 1400);
    assert_eq!(a, b);
    // The ledger holds nothing about the scores either: no sealed entry mentions a score.
    for e in ledger::read_chain(good.engine.store().conn(), "final").unwrap() {
        if e.kind == "sealed" {
            for key in ["score", "exact", "lower", "upper", "symbol"] {
                assert!(!e.body.contains(&format!("\"{key}\"")), "{}", e.body);
            }
        }
    }
    // After the close the two worlds differ: the scores are released.
    good.clock
        .set(Utc.with_ymd_and_hms(2026, 3, 4, 12, 0, 0).unwrap());
    bad.clock
        .set(Utc.with_ymd_and_hms(2026, 3, 4, 12, 0, 0).unwrap());
    let ra = good.engine.ranking(&analyst("t2"), "final").unwrap();
    let rb = bad.engine.ranking(&analyst("t2"), "final").unwrap();
    assert_ne!(ra.entries, rb.entries);
}

#[test]
fn the_deadline_closes_the_round_and_late_entries_are_refused() {
    let n = 3000;
    let mut f = fixture();
    round_before_close(&mut f, n, 100);
    // One second before the deadline the round is still open.
    f.clock
        .set(Utc.with_ymd_and_hms(2026, 3, 4, 11, 59, 59).unwrap());
    assert!(f.engine.holdout_view(&analyst("t2"), "final").unwrap().open);
    // Past the deadline: the first call of any kind closes it; a late entry is refused.
    f.clock
        .set(Utc.with_ymd_and_hms(2026, 3, 4, 12, 0, 1).unwrap());
    let late = f
        .engine
        .submit(&analyst("t4"), entry("final", wrong_on(n, 0, 10), false))
        .unwrap_err();
    assert!(matches!(late, Error::FailedPrecondition(_)), "{late}");
    assert!(
        late.to_string().contains("closed at 2026-03-04T12:00:00"),
        "{late}"
    );
    let chain = ledger::read_chain(f.engine.store().conn(), "final").unwrap();
    let round = chain
        .iter()
        .find(|e| e.kind == "round")
        .expect("round entry");
    let body: serde_json::Value = serde_json::from_str(&round.body).unwrap();
    assert_eq!(body["trigger"], "deadline");
    assert!(
        body["at"]
            .as_str()
            .unwrap()
            .starts_with("2026-03-04T12:00:00")
    );
    assert_eq!(
        body["answers"].as_array().unwrap().len(),
        4,
        "every entry is answered"
    );
    assert!(
        !chain.iter().any(|e| e.body.contains("t4-member")),
        "late entry not recorded"
    );

    // The ranking: one entry per team (t1's marked one), by released score.
    let r = f.engine.ranking(&analyst("t3"), "final").unwrap();
    let teams: Vec<&str> = r.entries.iter().map(|e| e.team.as_str()).collect();
    assert_eq!(teams, ["t1", "t2", "t3"]);
    assert_eq!(r.entries[0].score, Some(100.0 / n as f64));
    assert_eq!(r.comparisons.len(), 2);
    // t2 (150 errors) vs t3 (400): far apart and the data tell them apart.
    assert!(r.comparisons[1].distinguishable);
    assert!(r.comparisons[1].upper < 0.0);
    // Analysts now see the answers in history.
    let answers = f
        .engine
        .history(&analyst("t3"), "final", false)
        .unwrap()
        .into_iter()
        .filter(|h| matches!(h, HistoryItem::Answer(..)))
        .count();
    assert_eq!(answers, 4);

    // A fresh engine on the same database replays the ledger (sealed and round entries).
    let store = Store::open(&f.dir.path().join("t.db")).unwrap();
    let mut again = Engine::new(store, f.clock.clone());
    let view = again.holdout_view(&organizer(), "final").unwrap();
    assert!(!view.open);
    assert_eq!(again.ranking(&organizer(), "final").unwrap(), r);
}

#[test]
fn paired_comparisons_tell_apart_models_whose_own_intervals_overlap() {
    let n = 4000;
    let mut f = fixture();
    create(&mut f, "final", n, sealed_policy("")).unwrap();
    // A is wrong on rows 0..400 (10 %), B on rows 0..480 (12 %): they disagree on 80 rows only.
    for (team, to) in [("ta", 400), ("tb", 480)] {
        f.engine
            .submit(&analyst(team), entry("final", wrong_on(n, 0, to), false))
            .unwrap();
    }
    // No deadline: the round stays sealed until an organizer closes it.
    f.clock
        .set(Utc.with_ymd_and_hms(2030, 1, 1, 0, 0, 0).unwrap());
    assert!(f.engine.ranking(&analyst("ta"), "final").is_err());
    assert!(
        f.engine
            .close_holdout(&analyst("ta"), "final", "done")
            .is_err(),
        "only organizers close"
    );
    f.engine
        .close_holdout(&organizer(), "final", "done")
        .unwrap();
    let r = f.engine.ranking(&analyst("ta"), "final").unwrap();
    assert_eq!(r.trigger, "organizer");
    let (a, b) = (&r.entries[0], &r.entries[1]);
    assert_eq!((a.team.as_str(), b.team.as_str()), ("ta", "tb"));
    assert!(
        a.upper > b.lower,
        "the separate intervals overlap: {a:?} {b:?}"
    );
    let c = &r.comparisons[0];
    assert_eq!((c.a_only, c.b_only), (Some(0), Some(80)));
    assert!(c.distinguishable && c.upper < 0.0, "{c:?}");
    assert!(
        c.lower <= -0.02 && -0.02 <= c.upper,
        "covers the true difference: {c:?}"
    );
}

#[test]
fn competition_policies_that_break_the_guarantee_are_refused() {
    let mut f = fixture();
    let cases = [
        (
            PolicyInput {
                answers: "ladder:0.01".into(),
                sharing: "isolated".into(),
                shares: "roster:t1,t2".into(),
                leaderboard: "public".into(),
                ..PolicyInput::default()
            },
            "leaderboard",
        ),
        (
            PolicyInput {
                answers: "rounded:0.01".into(),
                closes_at: "2026-03-05T00:00:00Z".into(),
                ..PolicyInput::default()
            },
            "closes_at",
        ),
        (sealed_policy("tomorrow noon"), "closes_at"),
        (
            PolicyInput {
                ranking_share: 1.5,
                ..sealed_policy("")
            },
            "ranking_share",
        ),
    ];
    for (i, (p, field)) in cases.into_iter().enumerate() {
        let err = create(&mut f, &format!("h{i}"), 30, p).unwrap_err();
        assert!(err.to_string().contains(field), "{field}: {err}");
    }
}

#[test]
fn the_ladder_leaderboard_ranks_teams_and_respects_isolation() {
    let n = 2000;
    for isolated in [false, true] {
        let mut f = fixture();
        let p = PolicyInput {
            answers: "ladder:0.01".into(),
            tolerance: 0.2,
            sharing: if isolated { "isolated" } else { "shared" }.into(),
            shares: if isolated { "roster:t1,t2,t3" } else { "none" }.into(),
            ..PolicyInput::default()
        };
        create(&mut f, "lad", n, p).unwrap();
        // t1 improves 0.30 -> 0.20; t2 reaches 0.15; t3 submits twice with no second best.
        for (team, wrong) in [
            ("t1", 600),
            ("t2", 300),
            ("t1", 400),
            ("t3", 500),
            ("t3", 495),
            ("t1", 410),
        ] {
            f.engine
                .submit(&analyst(team), entry("lad", wrong_on(n, 0, wrong), false))
                .unwrap();
        }
        let board = f.engine.leaderboard(&organizer(), "lad").unwrap();
        let order: Vec<(&str, Option<f64>, u64)> = board
            .rows
            .iter()
            .map(|r| (r.team.as_str(), r.best, r.submissions))
            .collect();
        assert_eq!(
            order,
            [
                ("t2", Some(0.15), 1),
                ("t1", Some(0.2), 3),
                ("t3", Some(0.25), 2)
            ]
        );
        for r in &board.rows {
            let best = r.best.unwrap();
            assert!(r.lower <= best && best <= r.upper, "{r:?}");
        }
        assert!(board.statement.contains("not the error of any one file"));
        assert!(
            board
                .guarantee
                .contains(if isolated { "'isolated'" } else { "'shared'" })
        );
        let mine = f.engine.leaderboard(&analyst("t3"), "lad").unwrap();
        if isolated {
            assert!(mine.own_team_only);
            assert_eq!(mine.rows.len(), 1);
            assert_eq!(mine.rows[0].team, "t3");
        } else {
            assert_eq!(mine.rows, board.rows);
        }
    }
}

#[test]
fn sealed_round_status_counts_entries_per_team_and_names_who_has_not_entered() {
    let n = 2000;
    for isolated in [false, true] {
        let mut f = fixture();
        let p = PolicyInput {
            sharing: if isolated { "isolated" } else { "shared" }.into(),
            shares: "roster:t1,t2,t3,t4".into(),
            ..sealed_policy("2026-03-04T12:00:00Z")
        };
        create(&mut f, "final", n, p).unwrap();
        // t1 marks its first entry and sends a later one; t2 marks its second; t3 marks none.
        for (team, wrong, mark) in [
            ("t1", 100, true),
            ("t2", 200, false),
            ("t1", 300, false),
            ("t2", 250, true),
            ("t3", 400, false),
            ("t3", 410, false),
            ("t2", 260, false),
        ] {
            f.engine
                .submit(&analyst(team), entry("final", wrong_on(n, 0, wrong), mark))
                .unwrap();
        }
        let all = f
            .engine
            .round_status(&organizer(), "final")
            .unwrap()
            .unwrap();
        assert!(!all.closed && !all.own_team_only);
        let got: Vec<(&str, u64, bool)> = all
            .teams
            .iter()
            .map(|t| (t.team.as_str(), t.entries, t.marked))
            .collect();
        assert_eq!(got, [("t1", 2, true), ("t2", 3, true), ("t3", 2, false)]);
        assert_eq!(all.not_submitted, ["t4"]);
        // The selected entry is the one the close ranks: compare with the ranking's digests.
        let history = f.engine.history(&organizer(), "final", false).unwrap();
        let digest_of = |team: &str, query: u64| {
            history
                .iter()
                .find_map(|h| match h {
                    HistoryItem::Sealed(r, _) if r.team == team && r.query == query => {
                        Some(r.digest.clone())
                    }
                    _ => None,
                })
                .unwrap()
        };
        let selected: Vec<(String, String)> = all
            .teams
            .iter()
            .map(|t| (t.team.clone(), digest_of(&t.team, t.selected)))
            .collect();
        // An analyst under `isolated` sees its own team only and not who else is missing.
        let mine = f
            .engine
            .round_status(&analyst("t3"), "final")
            .unwrap()
            .unwrap();
        if isolated {
            assert!(mine.own_team_only);
            assert_eq!(mine.teams.len(), 1);
            assert_eq!(mine.teams[0].team, "t3");
            assert!(mine.not_submitted.is_empty());
        } else {
            assert_eq!(mine, all);
        }
        f.clock
            .set(Utc.with_ymd_and_hms(2026, 3, 4, 12, 0, 0).unwrap());
        let ranking = f.engine.ranking(&organizer(), "final").unwrap();
        let mut ranked: Vec<(String, String)> = ranking
            .entries
            .iter()
            .map(|e| (e.team.clone(), e.digest.clone()))
            .collect();
        ranked.sort();
        assert_eq!(ranked, selected, "isolated {isolated}");
        assert!(
            f.engine
                .round_status(&organizer(), "final")
                .unwrap()
                .unwrap()
                .closed
        );
    }
}

#[test]
fn best_per_team_covers_every_other_rule_and_respects_isolation() {
    let n = 2000;
    for (answers, isolated) in [
        ("rounded:0.01", false),
        ("rounded:0.01", true),
        ("best-of:0.01", false),
    ] {
        let mut f = fixture();
        let p = PolicyInput {
            answers: answers.into(),
            tolerance: 0.2,
            sharing: if isolated { "isolated" } else { "shared" }.into(),
            shares: if isolated { "roster:t1,t2,t3" } else { "none" }.into(),
            ..PolicyInput::default()
        };
        create(&mut f, "h", n, p).unwrap();
        // t1: 0.30 then 0.20 then 0.21; t2: 0.15; t3: 0.25 twice.
        for (team, wrong) in [
            ("t1", 600),
            ("t2", 300),
            ("t1", 400),
            ("t3", 500),
            ("t3", 500),
            ("t1", 420),
        ] {
            f.engine
                .submit(&analyst(team), entry("h", wrong_on(n, 0, wrong), false))
                .unwrap();
        }
        let board = f.engine.leaderboard(&organizer(), "h").unwrap();
        assert_eq!(board.kind, "best-per-team", "{answers}");
        // Each row is the team's answer with the lowest upper limit, read from the history.
        let history = f.engine.history(&organizer(), "h", false).unwrap();
        for r in &board.rows {
            let mine: Vec<_> = history
                .iter()
                .filter_map(|h| match h {
                    HistoryItem::Answer(a, _) if a.team == r.team => Some(a),
                    _ => None,
                })
                .collect();
            let lowest = mine.iter().map(|a| a.upper).fold(f64::INFINITY, f64::min);
            assert_eq!(r.upper, lowest, "{answers} {r:?}");
            assert_eq!(r.submissions, mine.len() as u64);
            let shown = mine.iter().find(|a| a.query == r.query).unwrap();
            assert_eq!((shown.lower, shown.upper), (r.lower, r.upper));
        }
        let order: Vec<(u64, &str)> = board
            .rows
            .iter()
            .map(|r| (r.rank, r.team.as_str()))
            .collect();
        assert_eq!(order, [(1, "t2"), (2, "t1"), (3, "t3")], "{answers}");
        // The true errors 0.15, 0.20 and 0.25 lie in the rows' intervals.
        for (r, truth) in board.rows.iter().zip([0.15, 0.2, 0.25]) {
            assert!(r.lower <= truth && truth <= r.upper, "{answers} {r:?}");
        }
        let mine = f.engine.leaderboard(&analyst("t3"), "h").unwrap();
        if isolated {
            assert!(mine.own_team_only);
            assert_eq!(mine.rows.len(), 1);
            assert_eq!(mine.rows[0].team, "t3");
            // Team-local numbering: t3's answers are its queries 1 and 2.
            assert!(mine.rows[0].query <= 2, "{:?}", mine.rows[0]);
        } else {
            assert_eq!(mine.rows, board.rows);
        }
    }
}

#[test]
fn identical_predictions_from_different_teams_are_reported() {
    let n = 300;
    let mut f = fixture();
    create(
        &mut f,
        "h",
        n,
        PolicyInput {
            tolerance: 0.3,
            sharing: "isolated".into(),
            shares: "on-arrival".into(),
            ..PolicyInput::default()
        },
    )
    .unwrap();
    for (team, wrong) in [("t1", 30), ("t2", 30), ("t2", 40), ("t3", 50)] {
        f.engine
            .submit(&analyst(team), entry("h", wrong_on(n, 0, wrong), false))
            .unwrap();
    }
    assert!(f.engine.duplicates(&analyst("t1"), "h").is_err());
    let d = f.engine.duplicates(&organizer(), "h").unwrap();
    assert_eq!(d.len(), 1, "{d:?}");
    assert_eq!(d[0].teams, ["t1", "t2"]);
    assert_eq!(d[0].entries.len(), 2);
}

/// The daemon's timer closes a round at its deadline without any call touching the holdout.
#[test]
fn the_deadline_timer_closes_a_round_nobody_touches() {
    let n = 3000;
    let mut f = fixture();
    round_before_close(&mut f, n, 100);
    f.clock
        .set(Utc.with_ymd_and_hms(2026, 3, 4, 11, 59, 59).unwrap());
    assert!(f.engine.settle_deadlines().unwrap().is_empty());
    let kinds = |f: &mut Fixture| -> Vec<String> {
        ledger::read_chain(f.engine.store().conn(), "final")
            .unwrap()
            .into_iter()
            .map(|e| e.kind)
            .collect()
    };
    assert!(!kinds(&mut f).contains(&"round".to_string()));
    f.clock
        .set(Utc.with_ymd_and_hms(2026, 3, 4, 12, 0, 1).unwrap());
    assert_eq!(
        f.engine.settle_deadlines().unwrap(),
        vec!["final".to_string()]
    );
    assert!(kinds(&mut f).contains(&"round".to_string()));
    // Settling again changes nothing.
    let before = kinds(&mut f).len();
    assert!(f.engine.settle_deadlines().unwrap().is_empty());
    assert_eq!(kinds(&mut f).len(), before);
}
