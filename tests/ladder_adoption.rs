//! Replayed files on a ladder under `shared` (issue 10, defect 4; DESIGN 4.8), through the
//! engine: a file another team already submitted is adopted free as the sender's new best
//! only when its released symbol fixes the sender's answer; otherwise it is a charged ladder
//! query of the sender. The ledger records which (`adopt` entry or `answer` entry), and both
//! the daemon's replay (`Book::replay`, run by a fresh engine on the same database) and the
//! offline audit reproduce it.

use std::sync::Arc;

use chrono::{TimeZone, Utc};
use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{
    CreateRequest, Engine, FixedClock, HistoryItem, ModelPredictions, PolicyInput, RawValues,
    SubmitMode, SubmitOutcome, SubmitRequest, TargetDecl,
};
use holdout_ledger::ledger;
use holdout_ledger::metric::Metric;
use holdout_ledger::store::Store;
use serde_json::Value;

const N: usize = 2000;
const NAME: &str = "lad";

fn caller(name: &str, roles: &[Role], team: &str) -> Caller {
    Caller {
        name: name.into(),
        roles: roles.to_vec(),
        team: team.into(),
    }
}

fn analyst(team: &str) -> Caller {
    caller(&format!("{team}-member"), &[Role::Analyst], team)
}

fn organizer() -> Caller {
    caller("olek", &[Role::Organizer], "olek")
}

fn ids() -> Vec<String> {
    (0..N).map(|i| format!("r{i:05}")).collect()
}

fn truth() -> Vec<String> {
    (0..N)
        .map(|i| if i % 3 == 0 { "a" } else { "b" }.to_string())
        .collect()
}

fn engine(path: &std::path::Path) -> Engine {
    let clock = Arc::new(FixedClock::new(
        Utc.with_ymd_and_hms(2026, 3, 4, 10, 0, 0).unwrap(),
    ));
    Engine::new(Store::open(path).unwrap(), clock)
}

/// Records `who` in the identity chain as the daemon does when a user is added, so the ledger's
/// entries name users the audit can find.
fn register(e: &mut Engine, who: &Caller) {
    let now = e.now();
    e.write(|w| auth::add_user(w, &who.name, &who.roles, Some(&who.team), "cora", now))
        .unwrap();
}

fn create(e: &mut Engine) {
    register(
        e,
        &caller("cora", &[Role::Custodian, Role::Organizer], "cora"),
    );
    register(e, &organizer());
    for team in ["red", "blue", "green", "gold"] {
        register(e, &analyst(team));
    }
    e.create_holdout(
        &caller("cora", &[Role::Custodian, Role::Organizer], "cora"),
        CreateRequest {
            name: NAME.into(),
            description: String::new(),
            policy: PolicyInput {
                answers: "ladder:0.01".into(),
                tolerance: 0.3,
                ..PolicyInput::default()
            },
            targets: vec![TargetDecl {
                name: "y".into(),
                column: "y".into(),
                metric: Metric::Error,
                method: "exact".into(),
                classes: vec!["a".into(), "b".into()],
            }],
            ids: ids(),
            columns: vec![truth()],
        },
    )
    .unwrap();
}

/// Predictions wrong exactly on rows `from..from + wrong` (error `wrong / N`).
fn file(from: usize, wrong: usize) -> ModelPredictions {
    let values = truth()
        .into_iter()
        .enumerate()
        .map(|(i, y)| {
            if (from..from + wrong).contains(&i) {
                if y == "a" { "b" } else { "a" }.to_string()
            } else {
                y
            }
        })
        .collect();
    ModelPredictions {
        ids: ids(),
        values: RawValues::Classes(values),
    }
}

fn submit(e: &mut Engine, team: &str, model: ModelPredictions) -> SubmitOutcome {
    e.submit(
        &analyst(team),
        SubmitRequest {
            holdout: NAME.into(),
            target: String::new(),
            mode: SubmitMode::Answer,
            request_id: None,
            note: String::new(),
            max_cost_nats: None,
            model_names: vec!["f.csv".into()],
            models: vec![model],
            mark_final: false,
        },
    )
    .unwrap()
}

/// (symbol, team, entry hash, replayed, lower, upper, level) of an answer outcome.
fn answered(o: &SubmitOutcome) -> (String, String, String, bool, f64, f64, f64) {
    match o {
        SubmitOutcome::Answer {
            record,
            receipt,
            replayed,
        } => (
            record.symbol.clone(),
            record.team.clone(),
            receipt.entry_hash.clone(),
            *replayed,
            record.lower,
            record.upper,
            record.level_nats,
        ),
        other => panic!("not an answer: {other:?}"),
    }
}

/// The position of the entry a receipt names (receipts carry hashes, not positions).
fn seq_of(e: &mut Engine, hash: &str) -> u64 {
    ledger::read_chain(e.store().conn(), NAME)
        .unwrap()
        .into_iter()
        .find(|x| x.hash == hash)
        .expect("the receipt's entry is in the chain")
        .seq
}

fn kinds(e: &mut Engine) -> Vec<String> {
    ledger::read_chain(e.store().conn(), NAME)
        .unwrap()
        .into_iter()
        .map(|x| x.kind)
        .collect()
}

fn spent(e: &mut Engine, team: &str) -> (f64, f64) {
    let v = e.holdout_view(&analyst(team), NAME).unwrap();
    (v.budget.spent, v.budget.transcript_nats)
}

#[test]
fn a_replayed_file_that_fixes_the_ladder_is_adopted_free_and_one_that_does_not_is_charged() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("t.db");
    let mut e = engine(&db);
    create(&mut e);

    // red: 0.10 (new best 0.10). blue: 0.30 (new best 0.30).
    let red_file = || file(0, 200);
    let r = answered(&submit(&mut e, "red", red_file()));
    assert_eq!((r.0.as_str(), r.3), ("new-best 0.10", false));
    let red_entry = r.2.clone();
    let red_level = r.6;
    let b = answered(&submit(&mut e, "blue", file(100, 600)));
    assert_eq!(b.0, "new-best 0.30");

    // blue sends red's file: red's symbol (new best 0.10) is public and 0.10 is below blue's
    // best 0.30, so blue adopts it free.
    let before = spent(&mut e, "blue");
    let entries_before = kinds(&mut e).len();
    let a = answered(&submit(&mut e, "blue", red_file()));
    assert_eq!(a.0, "new-best 0.10", "{a:?}");
    assert_eq!(a.1, "blue", "the adoption is blue's own record");
    assert!(a.3, "free: marked as a replay");
    assert_eq!(a.6.to_bits(), red_level.to_bits(), "at red's level");
    assert!(a.4 <= 0.10 && 0.10 <= a.5);
    assert_eq!(spent(&mut e, "blue"), before, "nothing charged or coded");
    let k = kinds(&mut e);
    assert_eq!(k.len(), entries_before + 1);
    assert_eq!(k.last().unwrap(), "adopt");
    let adopt_entry = seq_of(&mut e, &a.2);

    // The leaderboard now shows blue's best as 0.10 with the adopted interval.
    let board = e.leaderboard(&organizer(), NAME).unwrap();
    let blue = board.rows.iter().find(|r| r.team == "blue").unwrap();
    assert_eq!(blue.best, Some(0.10));
    assert_eq!(blue.best_entry, Some(adopt_entry));
    assert_eq!((blue.lower, blue.upper), (a.4, a.5));
    assert_eq!(blue.submissions, 2);

    // blue sends it again: its own adoption again, no new entry.
    let again = answered(&submit(&mut e, "blue", red_file()));
    assert_eq!(again.2, a.2);
    assert_eq!(kinds(&mut e).len(), entries_before + 1);

    // blue's history shows the adoption.
    let hist = e.history(&analyst("blue"), NAME, false).unwrap();
    assert!(hist.iter().any(|h| matches!(h,
        HistoryItem::Answer(r, rc) if rc.entry_hash == a.2 && r.symbol == "new-best 0.10")));

    // blue's next own query reports its ladder interval at no smaller nats than red's file.
    let next = answered(&submit(&mut e, "blue", file(50, 300)));
    assert_eq!(next.0, "no-improvement");
    assert!(next.6 >= red_level);

    // green: 0.05 first; then red's file (0.10, not below green's best 0.05) is a charged
    // ladder query of green, answered from green's own ladder.
    let g = answered(&submit(&mut e, "green", file(0, 100)));
    assert_eq!(g.0, "new-best 0.05");
    let before = spent(&mut e, "green");
    let c = answered(&submit(&mut e, "green", red_file()));
    assert_eq!(
        (c.0.as_str(), c.1.as_str(), c.3),
        ("no-improvement", "green", false),
        "{c:?}"
    );
    assert_ne!(c.2, red_entry);
    assert_eq!(kinds(&mut e).last().unwrap(), "answer");
    let after = spent(&mut e, "green");
    assert!(
        after.0 > before.0 && after.1 > before.1,
        "charged and coded"
    );

    // A file whose first answer was "no improvement" released no cell: it is a charged query
    // of whoever sends it next. red: 0.20 (no improvement over 0.10); gold sends it and gets
    // its own first new best from the charged query.
    let mid = || file(300, 400);
    assert_eq!(answered(&submit(&mut e, "red", mid())).0, "no-improvement");
    let gold = answered(&submit(&mut e, "gold", mid()));
    assert_eq!((gold.0.as_str(), gold.3), ("new-best 0.20", false));

    // The daemon's replay: a fresh engine on the same database rebuilds the book from the
    // ledger (adoption included) and keeps answering consistently.
    let view_before = e.holdout_view(&analyst("blue"), NAME).unwrap().budget;
    drop(e);
    let mut fresh = engine(&db);
    let view_after = fresh.holdout_view(&analyst("blue"), NAME).unwrap().budget;
    assert_eq!(view_before, view_after);
    let again = answered(&submit(&mut fresh, "blue", file(0, 190)));
    assert_eq!(again.0, "no-improvement", "blue's best is the adopted 0.10");

    // The offline audit replays every entry, the adoption included, cleanly.
    let ex = export(&mut fresh);
    let report = audit(&ex, AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
    assert!(ex.entries.iter().any(|x| x.kind == "adopt"));
    // Every answer and adoption names a user and team of @users, and each was checked.
    let named = ex
        .entries
        .iter()
        .filter(|x| matches!(x.kind(), Some(ledger::Kind::Answer | ledger::Kind::Adopt)))
        .count() as u64;
    assert_eq!(report.identity_checked, named);

    // A tampered adoption is found: its interval edited, or its source swapped for a file
    // whose answer fixes nothing.
    for tamper in 0..2 {
        let mut ex = export(&mut fresh);
        let i = ex
            .entries
            .iter()
            .position(|x| x.kind == "adopt")
            .expect("adopt entry");
        let mut v: Value = serde_json::from_str(&ex.entries[i].body).unwrap();
        if tamper == 0 {
            v["lower"] = Value::from(0.099);
        } else {
            // The source: green's charged "no improvement" (another team, but it fixes
            // nothing): the replay must refuse to adopt it.
            let charged = ex
                .entries
                .iter()
                .find(|x| x.hash == c.2)
                .map(|x| x.seq)
                .unwrap();
            v["core"]["adopted_from"] = Value::from(charged);
        }
        ex.entries[i].body = ledger::canonical_json(&v);
        rehash(&mut ex.entries, i);
        let report = audit(&ex, AuditOptions::default());
        let seq = ex.entries[i].seq;
        assert!(
            report
                .findings
                .iter()
                .any(|f| f.entry == Some(seq) && f.field == "replay"),
            "tamper {tamper}: {:#?}",
            report.findings
        );
    }
}

fn export(e: &mut Engine) -> Export {
    let conn = e.store().conn();
    let entries = ledger::read_chain(conn, NAME).unwrap();
    let users = ledger::read_chain(conn, ledger::USERS_CHAIN).unwrap();
    Export::new(NAME, "2026-03-05T00:00:00Z", entries, users)
}

/// Recomputes links and hashes from position `from` on, as someone rebuilding a chain would.
fn rehash(entries: &mut [ledger::Entry], from: usize) {
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
