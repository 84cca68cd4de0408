//! Group commit on the database thread (`Db::call_batched`, src/engine/worker.rs): queued
//! submissions share one transaction, each still its own ledger entry coded after the one
//! before it, each caller answered only after the commit; a failing job is undone alone; a
//! failed commit acknowledges nobody and restores the cached state; durability stays
//! `synchronous = FULL`.
//!
//! Batches are made deterministic by holding the database thread on a job until every
//! submission of the batch is queued (`call_batched` queues its job when called).

mod audit_support;
mod common;

use std::collections::HashSet;

use holdout_ledger::audit::export::Export;
use holdout_ledger::audit::{AuditOptions, audit};
use holdout_ledger::auth::Caller;
use holdout_ledger::engine::{
    BatchStats, Db, Engine, PolicyInput, RawValues, SubmitOutcome, SubmitRequest, SystemClock,
};
use holdout_ledger::error::Result;
use holdout_ledger::ledger::{self, Entry};
use holdout_ledger::store::Store;

use audit_support::Generated;

/// A policy with room for many answers.
fn roomy() -> PolicyInput {
    PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.5,
        ..PolicyInput::default()
    }
}

/// Blocks the database thread on a job until the returned sender is used (or dropped), and
/// returns only once that job is running, so every job queued after this call waits behind it.
async fn hold(db: &Db) -> std::sync::mpsc::Sender<()> {
    let (release, wait) = std::sync::mpsc::channel::<()>();
    let (started, running) = tokio::sync::oneshot::channel::<()>();
    let db = db.clone();
    tokio::spawn(async move {
        db.call(move |_| {
            let _ = started.send(());
            let _ = wait.recv();
            Ok(())
        })
        .await
        .expect("the holding job");
    });
    running.await.expect("the holding job started");
    release
}

/// The holdout's chain and the identity chain, read on the database thread.
async fn chains(db: &Db, name: &str) -> (Vec<Entry>, Vec<Entry>) {
    let name = name.to_string();
    db.call(move |e| {
        let conn = e.store().conn();
        Ok((
            ledger::read_chain(conn, &name)?,
            ledger::read_chain(conn, ledger::USERS_CHAIN)?,
        ))
    })
    .await
    .unwrap()
}

async fn replays(db: &Db) -> u64 {
    db.call(|e| Ok(e.full_replays())).await.unwrap()
}

/// Queues one submission as the daemon's Submit does.
fn queue(
    db: &Db,
    caller: &Caller,
    req: SubmitRequest,
) -> impl Future<Output = Result<SubmitOutcome>> + use<> {
    let caller = caller.clone();
    db.call_batched(move |e: &mut Engine| e.submit(&caller, req))
}

/// A file with one row id too few: refused as bad input before anything is charged.
fn broken(mut req: SubmitRequest) -> SubmitRequest {
    if let Some(m) = req.models.first_mut() {
        m.ids.pop();
        if let RawValues::Classes(v) = &mut m.values {
            v.pop();
        }
    }
    req
}

/// The audit of the holdout's export is clean, and the chain verifies.
fn assert_audits_clean(name: &str, entries: Vec<Entry>, users: Vec<Entry>) {
    assert!(ledger::verify_chain(&entries).is_empty(), "chain broken");
    let export = Export::new(name, "2026-03-02T00:00:00Z", entries, users);
    let report = audit(&export, AuditOptions::default());
    assert!(report.clean(), "{:#?}", report.findings);
}

/// Answer entries' query numbers, in chain order.
fn answer_queries(entries: &[Entry]) -> Vec<u64> {
    entries
        .iter()
        .filter(|e| e.kind == "answer")
        .map(|e| {
            serde_json::from_str::<serde_json::Value>(&e.body).unwrap()["query"]
                .as_u64()
                .unwrap()
        })
        .collect()
}

#[test]
fn the_daemons_connection_is_synchronous_full_in_wal_mode() {
    let dir = tempfile::tempdir().unwrap();
    let store = Store::open(&dir.path().join("h.db")).unwrap();
    let db = Db::spawn(Engine::new(store, std::sync::Arc::new(SystemClock)));
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    let (sync, journal) = rt
        .block_on(db.call(|e| {
            let conn = e.store().conn();
            let sync: i64 = conn.pragma_query_value(None, "synchronous", |r| r.get(0))?;
            let journal: String = conn.pragma_query_value(None, "journal_mode", |r| r.get(0))?;
            Ok((sync, journal))
        }))
        .unwrap();
    // SQLite: 0 OFF, 1 NORMAL, 2 FULL, 3 EXTRA. FULL syncs the WAL at every commit, so a
    // group commit's reply leaves only after its batch is on disk.
    assert_eq!(sync, 2, "synchronous must be FULL");
    assert_eq!(journal, "wal");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn concurrent_submissions_are_each_recorded_once_with_dense_query_numbers() {
    let mut g = Generated::new("busy", 300, roomy(), 8, 21);
    g.advance(60);
    let name = g.name.clone();
    // 100 distinct files from 8 teams; 40 of them sent twice (the repeat is answered again
    // from the ledger, free), all at once.
    let mut jobs: Vec<(Caller, SubmitRequest)> = (0..100)
        .map(|i| (g.analysts[i % 8].clone(), g.request(55 + (i as u64 % 40))))
        .collect();
    for i in 0..40 {
        let (c, r) = jobs[i].clone();
        jobs.push((c, r));
    }
    let Generated { engine, .. } = g;
    let db = Db::spawn(engine);
    let release = hold(&db).await;
    // Queued behind the held job, then sent from concurrent tasks as they complete.
    let pending: Vec<_> = jobs.iter().map(|(c, r)| queue(&db, c, r.clone())).collect();
    let tasks: Vec<_> = pending.into_iter().map(tokio::spawn).collect();
    release.send(()).unwrap();
    let mut receipts = Vec::new();
    let mut fresh = HashSet::new();
    for t in tasks {
        match t.await.unwrap().unwrap() {
            SubmitOutcome::Answer {
                receipt, replayed, ..
            } => {
                if !replayed {
                    assert!(fresh.insert(receipt.entry_hash.clone()), "hash twice");
                }
                receipts.push(receipt);
            }
            other => panic!("unexpected {other:?}"),
        }
    }
    let stats: BatchStats = db.batch_stats();
    // 140 queued at once, at most 64 a batch: 64 + 64 + 12.
    assert_eq!(
        (stats.batches, stats.batched_jobs, stats.largest),
        (3, 140, 64),
        "{stats:?}"
    );
    let (entries, users) = chains(&db, &name).await;
    let answers: Vec<&Entry> = entries.iter().filter(|e| e.kind == "answer").collect();
    assert_eq!(answers.len(), 100, "one entry per distinct file");
    // Every acknowledged answer is in the ledger exactly once, with the number it was told.
    for r in &receipts {
        let found: Vec<&&Entry> = answers.iter().filter(|e| e.hash == r.entry_hash).collect();
        assert_eq!(
            found.len(),
            1,
            "receipt {} found {} times",
            r.query,
            found.len()
        );
        let body: serde_json::Value = serde_json::from_str(&found[0].body).unwrap();
        assert_eq!(body["query"].as_u64(), Some(r.query));
    }
    assert_eq!(fresh.len(), 100);
    // Query numbers are dense and unique, in chain order.
    assert_eq!(answer_queries(&entries), (1..=100).collect::<Vec<u64>>());
    assert_audits_clean(&name, entries, users);
}

#[tokio::test]
async fn a_failing_job_in_a_batch_is_undone_alone_and_refusals_batch_too() {
    // Three answers in all (even:3): the batch holds answers, a broken file, then refusals.
    let policy = PolicyInput {
        schedule: "even:3".into(),
        answers: "rounded:0.1".into(),
        ..roomy()
    };
    let mut g = Generated::new("tight", 300, policy, 2, 7);
    g.advance(60);
    let name = g.name.clone();
    let (a, b) = (g.analysts[0].clone(), g.analysts[1].clone());
    let reqs: Vec<SubmitRequest> = (0..6).map(|i| g.request(60 + i)).collect();
    let Generated { engine, .. } = g;
    let db = Db::spawn(engine);
    let (before, _) = chains(&db, &name).await;
    let replays_before = replays(&db).await;
    let release = hold(&db).await;
    let pending = vec![
        queue(&db, &a, reqs[0].clone()),
        queue(&db, &b, reqs[1].clone()),
        queue(&db, &a, broken(reqs[2].clone())),
        queue(&db, &b, reqs[3].clone()),
        queue(&db, &a, reqs[4].clone()),
        queue(&db, &b, reqs[5].clone()),
    ];
    release.send(()).unwrap();
    let mut outcomes = Vec::new();
    for p in pending {
        outcomes.push(p.await);
    }
    assert_eq!(
        db.batch_stats(),
        BatchStats {
            batches: 1,
            batched_jobs: 6,
            alone_jobs: 0,
            largest: 6,
            failed_commits: 0
        }
    );
    let kinds: Vec<&str> = outcomes
        .iter()
        .map(|o| match o {
            Ok(SubmitOutcome::Answer {
                replayed: false, ..
            }) => "answer",
            Ok(SubmitOutcome::Refusal {
                receipt: Some(_), ..
            }) => "refusal",
            Err(_) => "error",
            other => panic!("unexpected {other:?}"),
        })
        .collect();
    assert_eq!(
        kinds,
        ["answer", "answer", "error", "answer", "refusal", "refusal"]
    );
    match &outcomes[2] {
        Err(e) => assert!(e.to_string().contains("invalid"), "{e}"),
        _ => unreachable!(),
    }
    for o in &outcomes[4..] {
        if let Ok(SubmitOutcome::Refusal { record, .. }) = o {
            assert_eq!(record.reason, "budget-spent", "{}", record.message);
        }
    }
    let (entries, users) = chains(&db, &name).await;
    let added: Vec<&str> = entries[before.len()..]
        .iter()
        .map(|e| e.kind.as_str())
        .collect();
    assert_eq!(
        added,
        ["answer", "answer", "answer", "refusal", "refusal"],
        "nothing for the broken file, everything else committed"
    );
    assert_eq!(answer_queries(&entries), [1, 2, 3]);
    // Each answer coded after the one before it from the staged state: no full replay.
    assert_eq!(replays(&db).await, replays_before);
    assert_audits_clean(&name, entries, users);
}

#[tokio::test]
async fn a_batch_whose_commit_fails_acknowledges_none_and_restores_the_cached_state() {
    let mut g = Generated::new("doomed", 300, roomy(), 2, 9);
    g.advance(60);
    let name = g.name.clone();
    let (a, b) = (g.analysts[0].clone(), g.analysts[1].clone());
    let reqs: Vec<SubmitRequest> = (0..4).map(|i| g.request(60 + i)).collect();
    // Two answers already, so there is a cached state to restore.
    g.submit(0, 50);
    g.submit(1, 51);
    let Generated { engine, .. } = g;
    let db = Db::spawn(engine);
    let (before, _) = chains(&db, &name).await;
    let replays_before = replays(&db).await;
    let release = hold(&db).await;
    let mut pending = vec![
        queue(&db, &a, reqs[0].clone()),
        queue(&db, &b, reqs[1].clone()),
    ];
    // The injected failure: a job whose write breaks a deferred foreign key. SQLite checks
    // deferred constraints at COMMIT only, so each savepoint is released and the batch's
    // COMMIT itself fails (SQLITE_CONSTRAINT_FOREIGNKEY).
    let poison = db.call_batched(|e: &mut Engine| {
        e.write(|w| {
            w.store().conn().execute_batch(
                "PRAGMA defer_foreign_keys = ON;
                 INSERT INTO request_keys (holdout_id, team, request_id, digest, seq)
                 VALUES (987654321, 'nobody', 'poison', 'none', 0);",
            )?;
            Ok(())
        })
    });
    pending.push(queue(&db, &a, reqs[2].clone()));
    release.send(()).unwrap();
    let poisoned = poison.await;
    let mut outcomes = Vec::new();
    for p in pending {
        outcomes.push(p.await);
    }
    assert!(poisoned.is_err(), "{poisoned:?}");
    for o in &outcomes {
        match o {
            Err(e) => assert!(
                e.to_string().contains("nothing from it was recorded"),
                "{e}"
            ),
            Ok(out) => panic!("acknowledged from a batch that did not commit: {out:?}"),
        }
    }
    let stats = db.batch_stats();
    assert_eq!((stats.batches, stats.failed_commits), (1, 1), "{stats:?}");
    let (after, _) = chains(&db, &name).await;
    assert_eq!(
        after.len(),
        before.len(),
        "nothing of the batch is in the ledger"
    );
    // The cached state is the one from before the batch: the next answer is number 3, coded
    // without a full replay of the chain.
    let next = queue(&db, &b, reqs[3].clone()).await.unwrap();
    match next {
        SubmitOutcome::Answer { receipt, .. } => assert_eq!(receipt.query, 3),
        other => panic!("unexpected {other:?}"),
    }
    assert_eq!(replays(&db).await, replays_before);
    // The files of the failed batch are new queries when sent again (nothing was recorded).
    let again = queue(&db, &a, reqs[0].clone()).await.unwrap();
    assert!(
        matches!(&again, SubmitOutcome::Answer { replayed: false, receipt, .. } if receipt.query == 4),
        "{again:?}"
    );
    let (entries, users) = chains(&db, &name).await;
    assert_eq!(answer_queries(&entries), [1, 2, 3, 4]);
    assert_audits_clean(&name, entries, users);
}

#[tokio::test]
async fn with_group_commit_off_each_submission_commits_alone() {
    let mut g = Generated::new("single", 300, roomy(), 2, 11);
    g.advance(60);
    let name = g.name.clone();
    let a = g.analysts[0].clone();
    let reqs: Vec<SubmitRequest> = (0..5).map(|i| g.request(60 + i)).collect();
    let Generated { engine, .. } = g;
    let db = Db::spawn_with(engine, 1);
    let release = hold(&db).await;
    let pending: Vec<_> = reqs.into_iter().map(|r| queue(&db, &a, r)).collect();
    release.send(()).unwrap();
    for p in pending {
        assert!(matches!(p.await.unwrap(), SubmitOutcome::Answer { .. }));
    }
    let stats = db.batch_stats();
    assert_eq!((stats.batches, stats.alone_jobs), (0, 5), "{stats:?}");
    let (entries, users) = chains(&db, &name).await;
    assert_eq!(answer_queries(&entries), [1, 2, 3, 4, 5]);
    assert_audits_clean(&name, entries, users);
}

#[test]
fn serve_refuses_a_batch_size_of_zero() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_holdout"))
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--max-batch",
            "0",
            "--db",
        ])
        .arg(dir.path().join("h.db"))
        .env_clear()
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2), "a usage error");
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("--max-batch"), "{err}");
    assert!(
        !dir.path().join("h.db").exists(),
        "nothing is created on a usage error"
    );
}

/// Through the real daemon (the binary, group commit on by default): 16 analysts submit 6
/// distinct files each, all at once, over gRPC; every acknowledged answer is in the exported
/// ledger once with the query number it was told, the numbers are dense, and `holdout audit`
/// of the export (with the labels) is clean.
#[test]
fn concurrent_submitters_through_the_daemon_audit_clean() {
    use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
    use holdout_ledger::proto::v1::{
        self as pb, PredictionChunk, SubmitChunk, SubmitHeader, submit_chunk,
        submit_response::Outcome,
    };

    let d = common::Daemon::start();
    let rows = 300;
    let truth = |i: usize| if i.is_multiple_of(3) { "x" } else { "y" };
    let mut labels = String::from("id,label\n");
    for i in 0..rows {
        labels.push_str(&format!("r{i:04},{}\n", truth(i)));
    }
    let labels = d.write("labels.csv", &labels);
    d.admin(&[
        "create",
        "busy",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "x,y",
        "--label-column",
        "label",
        "--schedule",
        "series",
        "--answers",
        "rounded:0.01",
        "--tolerance",
        "0.5",
        "--expect-answers",
        "100",
        "--json",
    ])
    .ok();
    let auditor = d.add_user("auditor", &["auditor"], None);
    let tokens: Vec<String> = (0..16)
        .map(|t| d.add_user(&format!("a{t}"), &["analyst"], Some(&format!("team{t}"))))
        .collect();

    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(4)
        .enable_all()
        .build()
        .unwrap();
    let receipts: Vec<(u64, String)> = rt.block_on(async {
        let mut tasks = Vec::new();
        for (t, token) in tokens.into_iter().enumerate() {
            let url = d.url.clone();
            tasks.push(tokio::spawn(async move {
                let c = Conn::open(&ServerArgs {
                    server: url,
                    token: Some(token),
                    ca: None,
                    client_cert: None,
                    client_key: None,
                })
                .await
                .expect("connect");
                let mut got = Vec::new();
                for round in 0..6usize {
                    // Distinct per (team, round): wrong on 10 + t rows starting at 40 * round.
                    let k = t * 6 + round;
                    let classes: Vec<String> = (0..rows)
                        .map(|i| {
                            let wrong = (40 * round..40 * round + 10 + t).contains(&i);
                            let l = truth(i);
                            (if wrong {
                                if l == "x" { "y" } else { "x" }
                            } else {
                                l
                            })
                            .to_string()
                        })
                        .collect();
                    let chunks = vec![
                        SubmitChunk {
                            part: Some(submit_chunk::Part::Header(SubmitHeader {
                                holdout: "busy".into(),
                                mode: pb::SubmitMode::Answer as i32,
                                note: format!("file {k}"),
                                ..Default::default()
                            })),
                        },
                        SubmitChunk {
                            part: Some(submit_chunk::Part::Predictions(PredictionChunk {
                                model: 0,
                                ids: (0..rows).map(|i| format!("r{i:04}")).collect(),
                                classes,
                                values: vec![],
                                ..Default::default()
                            })),
                        },
                    ];
                    let reply = c
                        .submissions()
                        .submit(tokio_stream::iter(chunks))
                        .await
                        .expect("submit")
                        .into_inner();
                    match reply.outcome {
                        Some(Outcome::Answer(a)) if !a.replayed => {
                            let r = a.receipt.expect("receipt");
                            got.push((r.query, r.entry_hash));
                        }
                        other => panic!("unexpected {other:?}"),
                    }
                }
                got
            }));
        }
        let mut all = Vec::new();
        for t in tasks {
            all.extend(t.await.unwrap());
        }
        all
    });
    assert_eq!(receipts.len(), 96);
    let mut queries: Vec<u64> = receipts.iter().map(|(q, _)| *q).collect();
    queries.sort();
    assert_eq!(queries, (1..=96).collect::<Vec<u64>>(), "dense and unique");

    let out = d.path("busy.export").display().to_string();
    d.run(&auditor, &["export", "busy", "--out", &out]).ok();
    let text = std::fs::read_to_string(&out).unwrap();
    for (query, hash) in &receipts {
        let lines: Vec<&str> = text
            .lines()
            .filter(|l| l.contains(&format!("\"hash\":\"{hash}\"")))
            .collect();
        assert_eq!(lines.len(), 1, "query {query}: {} entries", lines.len());
        let entry: serde_json::Value = serde_json::from_str(lines[0]).unwrap();
        let body: serde_json::Value =
            serde_json::from_str(entry["body"].as_str().unwrap()).unwrap();
        assert_eq!(entry["kind"], "answer");
        assert_eq!(body["query"].as_u64(), Some(*query));
    }
    let report = common::run(
        common::holdout(),
        &["audit", &out, "--labels", &labels, "--json"],
    )
    .ok()
    .json();
    assert_eq!(report["clean"], true, "{report:#}");
    assert_eq!(report["labels_checked"], true);
}
