//! Concurrency and crash tests of the daemon as a process: concurrent submitters never
//! double-spend a schedule, and a SIGKILL in the middle of a storm loses no answer a client
//! received and leaves a chain that verifies and replays.

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
use holdout_ledger::ledger::{self, Entry};
use holdout_ledger::proto::v1::{
    self as pb, AddUserRequest, CreateHoldoutChunk, ExportRequest, HoldoutSpec, LabelColumn,
    LabelRows, SubmitChunk, SubmitHeader, create_holdout_chunk, ledger_client::LedgerClient,
    submit_chunk, submit_response::Outcome,
};
use tokio_stream::StreamExt;

struct Serve {
    child: Child,
    url: String,
}

impl Drop for Serve {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn serve(db: &Path) -> Serve {
    let mut child = Command::new(env!("CARGO_BIN_EXE_holdout"))
        .args(["serve", "--listen", "127.0.0.1:0", "--log", "warn", "--db"])
        .arg(db)
        .env_clear()
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("start holdout serve");
    let mut line = String::new();
    BufReader::new(child.stdout.take().expect("stdout"))
        .read_line(&mut line)
        .expect("listening line");
    let addr = line
        .trim()
        .strip_prefix("listening on ")
        .expect("listening on ADDR")
        .to_string();
    Serve {
        child,
        url: format!("http://{addr}"),
    }
}

fn init(dir: &Path) -> (PathBuf, String) {
    let db = dir.join("h.db");
    let token = dir.join("admin.token");
    let status = Command::new(env!("CARGO_BIN_EXE_holdout"))
        .args(["init", "--db"])
        .arg(&db)
        .arg("--token-out")
        .arg(&token)
        .env_clear()
        .stderr(Stdio::null())
        .status()
        .expect("holdout init");
    assert!(status.success());
    (
        db,
        std::fs::read_to_string(token).unwrap().trim().to_string(),
    )
}

async fn conn(url: &str, token: &str) -> Conn {
    Conn::open(&ServerArgs {
        server: url.to_string(),
        token: Some(token.to_string()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect")
}

async fn add_user(c: &Conn, name: &str, role: &str) -> String {
    c.users()
        .add_user(AddUserRequest {
            name: name.into(),
            roles: vec![role.into()],
            team: String::new(),
        })
        .await
        .expect("add user")
        .into_inner()
        .token
}

const N: usize = 2000;

fn truth(i: usize) -> &'static str {
    if i.is_multiple_of(4) { "x" } else { "y" }
}

async fn create(c: &Conn, schedule: &str, answers: &str, tolerance: f64) {
    let ids: Vec<String> = (0..N).map(|i| format!("row-{i}")).collect();
    let labels: Vec<String> = (0..N).map(|i| truth(i).to_string()).collect();
    let chunks = vec![
        CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Spec(HoldoutSpec {
                name: "storm".into(),
                policy: Some(pb::Policy {
                    delta: 0.05,
                    schedule: schedule.into(),
                    answers: answers.into(),
                    tolerance,
                    ..Default::default()
                }),
                targets: vec![pb::Target {
                    name: "y".into(),
                    column: "label".into(),
                    metric: "error".into(),
                    method: "exact".into(),
                    classes: vec!["x".into(), "y".into()],
                }],
                description: String::new(),
                ..Default::default()
            })),
        },
        CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Rows(LabelRows {
                ids,
                columns: vec![LabelColumn { values: labels }],
            })),
        },
    ];
    c.holdouts()
        .create_holdout(tokio_stream::iter(chunks))
        .await
        .expect("create holdout");
}

/// A distinct prediction vector for each `seed`: wrong on rows `seed..seed + 100 + seed % 50`.
fn predictions(seed: usize) -> Vec<SubmitChunk> {
    let ids: Vec<String> = (0..N).map(|i| format!("row-{i}")).collect();
    let wrong = seed % N..(seed + 100 + seed % 50).min(N);
    let classes: Vec<String> = (0..N)
        .map(|i| {
            let t = truth(i);
            if wrong.contains(&i) {
                if t == "x" { "y" } else { "x" }
            } else {
                t
            }
            .to_string()
        })
        .collect();
    vec![
        SubmitChunk {
            part: Some(submit_chunk::Part::Header(SubmitHeader {
                holdout: "storm".into(),
                mode: pb::SubmitMode::Answer as i32,
                ..Default::default()
            })),
        },
        SubmitChunk {
            part: Some(submit_chunk::Part::Predictions(pb::PredictionChunk {
                model: 0,
                ids,
                classes,
                values: vec![],
                ..Default::default()
            })),
        },
    ]
}

async fn export(url: &str, auditor: &str) -> Vec<Entry> {
    let c = Conn::open(&ServerArgs {
        server: url.to_string(),
        token: Some(auditor.to_string()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect");
    let channel = tonic::transport::Endpoint::from_shared(c.url.clone())
        .unwrap()
        .connect()
        .await
        .unwrap();
    let token: tonic::metadata::MetadataValue<_> = format!("Bearer {auditor}").parse().unwrap();
    let mut client = LedgerClient::with_interceptor(channel, move |mut r: tonic::Request<()>| {
        r.metadata_mut().insert("authorization", token.clone());
        Ok(r)
    });
    let mut stream = client
        .export(ExportRequest {
            holdout: "storm".into(),
        })
        .await
        .expect("export")
        .into_inner();
    let mut out = Vec::new();
    while let Some(e) = stream.next().await {
        let e = e.expect("entry");
        out.push(Entry {
            chain: "storm".into(),
            seq: e.seq,
            kind: e.kind,
            body: e.body_json,
            salt: e.salt,
            prev_hash: e.prev_hash,
            hash: e.hash,
        });
    }
    out
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn thirty_two_concurrent_submitters_against_even_10_get_exactly_10_answers() {
    let dir = tempfile::tempdir().unwrap();
    let (db, admin) = init(dir.path());
    let daemon = serve(&db);
    let root = conn(&daemon.url, &admin).await;
    create(&root, "even:10", "rounded:0.1", 0.5).await;
    let mut tokens = Vec::new();
    for i in 0..32 {
        tokens.push(add_user(&root, &format!("analyst-{i}"), "analyst").await);
    }
    let auditor = add_user(&root, "auditor", "auditor").await;

    let mut tasks = Vec::new();
    for (i, token) in tokens.into_iter().enumerate() {
        let url = daemon.url.clone();
        tasks.push(tokio::spawn(async move {
            let c = conn(&url, &token).await;
            let reply = c
                .submissions()
                .submit(tokio_stream::iter(predictions(i * 37)))
                .await
                .expect("submit")
                .into_inner();
            match reply.outcome {
                Some(Outcome::Answer(a)) => ("answer", a.receipt.unwrap().entry_hash),
                Some(Outcome::Refusal(r)) => {
                    assert_eq!(r.reason, "budget-spent", "{}", r.message);
                    ("refusal", r.receipt.unwrap().entry_hash)
                }
                other => panic!("unexpected {other:?}"),
            }
        }));
    }
    let mut answers = 0;
    let mut refusals = 0;
    let mut entries = Vec::new();
    for t in tasks {
        let (kind, entry) = t.await.unwrap();
        entries.push(entry);
        if kind == "answer" {
            answers += 1
        } else {
            refusals += 1
        }
    }
    assert_eq!((answers, refusals), (10, 22));
    entries.sort();
    entries.dedup();
    assert_eq!(entries.len(), 32, "every reply has its own ledger entry");

    let chain = export(&daemon.url, &auditor).await;
    assert!(ledger::verify_chain(&chain).is_empty());
    assert_eq!(chain.iter().filter(|e| e.kind == "answer").count(), 10);
    assert_eq!(chain.iter().filter(|e| e.kind == "refusal").count(), 22);
    // Queries 1..=10 each charged once: the schedule's ten shares sum to delta.
    let spent: f64 = chain
        .iter()
        .filter(|e| e.kind == "answer")
        .map(|e| {
            serde_json::from_str::<serde_json::Value>(&e.body).unwrap()["delta_i"]
                .as_f64()
                .unwrap()
        })
        .sum();
    assert!((spent - 0.05).abs() < 1e-12, "spent {spent}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn sigkill_mid_storm_loses_no_received_answer() {
    let dir = tempfile::tempdir().unwrap();
    let (db, admin) = init(dir.path());
    let mut daemon = serve(&db);
    let root = conn(&daemon.url, &admin).await;
    // Cheap answers and a loose tolerance, so the storm is not cut short by refusals.
    create(&root, "series", "rounded:0.5", 0.5).await;
    let auditor = add_user(&root, "auditor", "auditor").await;
    let mut tokens = Vec::new();
    for i in 0..8 {
        tokens.push(add_user(&root, &format!("storm-{i}"), "analyst").await);
    }

    let (tx, mut rx) = tokio::sync::mpsc::unbounded_channel::<(u64, String)>();
    let mut tasks = Vec::new();
    for (i, token) in tokens.into_iter().enumerate() {
        let url = daemon.url.clone();
        let tx = tx.clone();
        tasks.push(tokio::spawn(async move {
            let c = conn(&url, &token).await;
            for round in 0..10_000 {
                let reply = c
                    .submissions()
                    .submit(tokio_stream::iter(predictions(i * 1000 + round)))
                    .await;
                match reply {
                    Ok(r) => match r.into_inner().outcome {
                        Some(Outcome::Answer(a)) => {
                            let rc = a.receipt.unwrap();
                            let _ = tx.send((rc.query, rc.entry_hash));
                        }
                        Some(Outcome::Refusal(_)) => {}
                        other => panic!("unexpected {other:?}"),
                    },
                    // The daemon was killed: stop.
                    Err(_) => return,
                }
            }
        }));
    }
    drop(tx);
    // Let the storm run, then kill -9 in the middle of it.
    let mut received = Vec::new();
    let deadline = tokio::time::Instant::now() + Duration::from_secs(20);
    while received.len() < 40 && tokio::time::Instant::now() < deadline {
        if let Ok(Some(r)) = tokio::time::timeout(Duration::from_millis(200), rx.recv()).await {
            received.push(r);
        }
    }
    daemon.child.kill().expect("SIGKILL");
    daemon.child.wait().unwrap();
    for t in tasks {
        let _ = t.await;
    }
    while let Ok(r) = rx.try_recv() {
        received.push(r);
    }
    assert!(
        received.len() >= 10,
        "the storm produced {} answers",
        received.len()
    );

    // Restart on the same file: every answer a client received is in the ledger, unchanged.
    let daemon = serve(&db);
    let chain = export(&daemon.url, &auditor).await;
    assert!(
        ledger::verify_chain(&chain).is_empty(),
        "chain broken after SIGKILL"
    );
    // Receipts name entries by hash: each must be in the chain, unchanged (the hash recomputes,
    // checked by verify_chain), recording the query number the client was told.
    for (query, hash) in &received {
        let e = chain
            .iter()
            .find(|e| &e.hash == hash)
            .unwrap_or_else(|| panic!("the answer to query {query} ({hash}) was lost"));
        assert_eq!(e.kind, "answer");
        let body: serde_json::Value = serde_json::from_str(&e.body).unwrap();
        assert_eq!(
            body["query"].as_u64(),
            Some(*query),
            "query {query} changed"
        );
    }
    // The restarted daemon replays the ledger and keeps answering on the same budget.
    let c = conn(&daemon.url, &admin).await;
    let analyst = add_user(&c, "after-restart", "analyst").await;
    let reply = conn(&daemon.url, &analyst)
        .await
        .submissions()
        .submit(tokio_stream::iter(predictions(999_999)))
        .await
        .expect("submit after restart")
        .into_inner();
    let answered = chain.iter().filter(|e| e.kind == "answer").count() as u64;
    match reply.outcome {
        Some(Outcome::Answer(a)) => assert_eq!(a.query, answered + 1),
        other => panic!("unexpected {other:?}"),
    }
}
