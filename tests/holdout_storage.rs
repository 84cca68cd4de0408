//! A holdout's rows in the store: ids as one blob and labels packed (migration 0005), loaded
//! back after a restart; holdouts stored before it (one `holdout_rows` row per id, labels as a
//! JSON array) still load, score and keep their rows to themselves.

use std::path::Path;
use std::sync::Arc;

use holdout_ledger::auth::{self, Caller, Role};
use holdout_ledger::engine::{
    CreateRequest, Engine, ModelPredictions, PolicyInput, RawValues, SubmitMode, SubmitOutcome,
    SubmitRequest, SystemClock, TargetDecl,
};
use holdout_ledger::error::Error;
use holdout_ledger::store::Store;

fn engine(path: &Path) -> Engine {
    Engine::new(Store::open(path).unwrap(), Arc::new(SystemClock))
}

fn user(engine: &mut Engine, name: &str, role: Role, team: Option<&str>) -> Caller {
    let now = engine.now();
    engine
        .write(|w| auth::add_user(w, name, &[role], team, "root", now))
        .unwrap();
    Caller {
        name: name.into(),
        roles: vec![role],
        team: team.unwrap_or("").into(),
    }
}

fn policy() -> PolicyInput {
    PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.5,
        ..PolicyInput::default()
    }
}

fn target(metric: &str, classes: &[&str]) -> TargetDecl {
    TargetDecl {
        name: "y".into(),
        column: "label".into(),
        metric: metric.parse().unwrap(),
        method: String::new(),
        classes: classes.iter().map(|c| c.to_string()).collect(),
    }
}

fn create(
    engine: &mut Engine,
    custodian: &Caller,
    name: &str,
    t: TargetDecl,
    ids: &[String],
    labels: &[String],
) -> Result<(), Error> {
    engine
        .create_holdout(
            custodian,
            CreateRequest {
                name: name.into(),
                description: String::new(),
                policy: policy(),
                targets: vec![t],
                ids: ids.to_vec(),
                columns: vec![labels.to_vec()],
            },
        )
        .map(|_| ())
}

/// The released (rounded) score of one submission.
fn score(
    engine: &mut Engine,
    analyst: &Caller,
    holdout: &str,
    ids: &[String],
    values: RawValues,
) -> f64 {
    let out = engine
        .submit(
            analyst,
            SubmitRequest {
                holdout: holdout.into(),
                target: String::new(),
                mode: SubmitMode::Answer,
                request_id: None,
                note: String::new(),
                max_cost_nats: None,
                model_names: vec![],
                models: vec![ModelPredictions {
                    ids: ids.to_vec(),
                    values,
                }],
                mark_final: false,
            },
        )
        .unwrap();
    match out {
        SubmitOutcome::Answer { record, .. } => record.score.expect("a rounded score"),
        other => panic!("expected an answer, got {other:?}"),
    }
}

/// Row ids in a scrambled order (a fixed permutation), and their position when sorted.
fn scrambled(n: usize) -> Vec<(String, usize)> {
    let mut rows: Vec<(String, usize)> = (0..n).map(|i| (format!("k{i:04}"), i)).collect();
    let mut state = 7u64;
    for i in (1..n).rev() {
        state = state
            .wrapping_mul(6_364_136_223_846_793_005)
            .wrapping_add(1_442_695_040_888_963_407);
        rows.swap(i, (state >> 33) as usize % (i + 1));
    }
    rows
}

#[test]
fn a_holdout_sent_in_any_order_loads_back_from_its_blobs_after_a_restart() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("h.db");
    let rows = scrambled(400);
    let ids: Vec<String> = rows.iter().map(|(id, _)| id.clone()).collect();
    let classes = ["a", "b", "c"];
    let labels: Vec<String> = rows
        .iter()
        .map(|(_, i)| classes[i % 3].to_string())
        .collect();
    // Numbers with their text as written: "2.50" stays "2.50" in the stored labels.
    let numbers: Vec<String> = rows.iter().map(|(_, i)| format!("{}.50", i % 5)).collect();
    let num_ids: Vec<String> = ids.iter().map(|id| format!("n-{id}")).collect();
    {
        let mut e = engine(&path);
        let custodian = user(&mut e, "cus", Role::Custodian, None);
        user(&mut e, "ana", Role::Analyst, Some("t1"));
        create(
            &mut e,
            &custodian,
            "cls",
            target("error", &classes),
            &ids,
            &labels,
        )
        .unwrap();
        create(
            &mut e,
            &custodian,
            "num",
            target("abs_error:4", &[]),
            &num_ids,
            &numbers,
        )
        .unwrap();
    }
    let mut e = engine(&path);
    let analyst = Caller {
        name: "ana".into(),
        roles: vec![Role::Analyst],
        team: "t1".into(),
    };
    let (_, declared) = e.declaration("cls").unwrap();
    let mut sorted = ids.clone();
    sorted.sort();
    assert_eq!(declared, sorted, "ids come back in the canonical order");
    // Wrong on every fourth row (by the row's number), sent in the scrambled order.
    let preds: Vec<String> = rows
        .iter()
        .map(|(_, i)| classes[(i % 3 + usize::from(i % 4 == 0)) % 3].to_string())
        .collect();
    assert_eq!(
        score(&mut e, &analyst, "cls", &ids, RawValues::Classes(preds)),
        0.25
    );
    // All zeros against labels 0.5 .. 4.5, clipped at 4: mean of min(y, 4) / 4.
    let expect: f64 = rows
        .iter()
        .map(|(_, i)| ((i % 5) as f64 + 0.5).min(4.0) / 4.0)
        .sum::<f64>()
        / 400.0;
    let got = score(
        &mut e,
        &analyst,
        "num",
        &num_ids,
        RawValues::Numbers(vec![0.0; 400]),
    );
    assert!((got - expect).abs() <= 0.005 + 1e-12, "{got} vs {expect}");
    // What is stored: one row of ids per holdout, none in the old table, packed labels.
    let conn = rusqlite::Connection::open(&path).unwrap();
    let (blobs, old): (i64, i64) = conn
        .query_row(
            "SELECT (SELECT count(*) FROM holdout_ids), (SELECT count(*) FROM holdout_rows)",
            [],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )
        .unwrap();
    assert_eq!((blobs, old), (2, 0));
    let encodings: Vec<(String, i64)> = conn
        .prepare("SELECT encoding, length(labels) FROM sealed_labels ORDER BY holdout_id")
        .unwrap()
        .query_map([], |r| Ok((r.get(0)?, r.get(1)?)))
        .unwrap()
        .collect::<Result<_, _>>()
        .unwrap();
    assert_eq!(
        encodings,
        [("u8".to_string(), 400), ("lines".to_string(), 5 * 400)]
    );
}

#[test]
fn a_holdout_stored_one_row_per_id_still_loads_and_keeps_its_rows() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("h.db");
    let rows = scrambled(200);
    let ids: Vec<String> = rows.iter().map(|(id, _)| id.clone()).collect();
    let labels: Vec<String> = rows.iter().map(|(_, i)| (i % 2).to_string()).collect();
    {
        let mut e = engine(&path);
        let custodian = user(&mut e, "cus", Role::Custodian, None);
        user(&mut e, "ana", Role::Analyst, Some("t1"));
        create(
            &mut e,
            &custodian,
            "old",
            target("error", &["0", "1"]),
            &ids,
            &labels,
        )
        .unwrap();
    }
    // Rewrite it as a holdout created before migration 0005 was: ids in `holdout_rows`,
    // labels a JSON array of strings, no blob.
    {
        let mut sorted: Vec<(String, String)> = ids.iter().cloned().zip(labels.clone()).collect();
        sorted.sort();
        let conn = rusqlite::Connection::open(&path).unwrap();
        let id: i64 = conn
            .query_row("SELECT id FROM holdouts WHERE name = 'old'", [], |r| {
                r.get(0)
            })
            .unwrap();
        for (pos, (row, _)) in sorted.iter().enumerate() {
            conn.execute(
                "INSERT INTO holdout_rows (row_id, holdout_id, pos) VALUES (?1, ?2, ?3)",
                rusqlite::params![row, id, pos as i64],
            )
            .unwrap();
        }
        let json = serde_json::to_vec(&sorted.iter().map(|(_, y)| y).collect::<Vec<_>>()).unwrap();
        conn.execute(
            "UPDATE sealed_labels SET labels = ?1, encoding = 'json' WHERE holdout_id = ?2",
            rusqlite::params![json, id],
        )
        .unwrap();
        conn.execute("DELETE FROM holdout_ids WHERE holdout_id = ?1", [id])
            .unwrap();
    }
    let mut e = engine(&path);
    let custodian = Caller {
        name: "cus".into(),
        roles: vec![Role::Custodian],
        team: String::new(),
    };
    let analyst = Caller {
        name: "ana".into(),
        roles: vec![Role::Analyst],
        team: "t1".into(),
    };
    // Wrong on the first 50 rows by number.
    let preds: Vec<String> = rows
        .iter()
        .map(|(_, i)| ((i % 2) ^ usize::from(*i < 50)).to_string())
        .collect();
    assert_eq!(
        score(&mut e, &analyst, "old", &ids, RawValues::Classes(preds)),
        0.25
    );

    // Rows of the old holdout, and of a new one, are refused to a third; the first shared id
    // in the canonical order is named.
    let fresh: Vec<String> = (0..100).map(|i| format!("m{i:03}")).collect();
    let ys: Vec<String> = (0..100).map(|i| (i % 2).to_string()).collect();
    let t = || target("error", &["0", "1"]);
    create(&mut e, &custodian, "new", t(), &fresh, &ys).unwrap();
    let mut overlap = vec!["z1".to_string(), "k0150".to_string(), "k0042".to_string()];
    let y3: Vec<String> = vec!["0".into(), "1".into(), "1".into()];
    match create(&mut e, &custodian, "third", t(), &overlap, &y3) {
        Err(Error::AlreadyExists(m)) => {
            assert!(
                m.contains("row id k0042") && m.contains("holdout old"),
                "{m}"
            )
        }
        other => panic!("an overlap with the old holdout must be refused, got {other:?}"),
    }
    overlap[1] = "m099".into();
    overlap[2] = "k9999".into();
    match create(&mut e, &custodian, "third", t(), &overlap, &y3) {
        Err(Error::AlreadyExists(m)) => {
            assert!(
                m.contains("row id m099") && m.contains("holdout new"),
                "{m}"
            )
        }
        other => panic!("an overlap with the new holdout must be refused, got {other:?}"),
    }
    overlap[1] = "m100".into();
    create(&mut e, &custodian, "third", t(), &overlap, &y3).unwrap();
}
