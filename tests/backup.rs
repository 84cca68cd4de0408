//! Backups through the real daemon: a copy taken while eight clients submit restores, verifies,
//! audits clean and holds every answer acknowledged before it started; damaged copies are
//! refused by `restore`; a database of the v0.1.0 schema is copied automatically before its
//! migration and audits clean after it.

use std::io::{BufRead, BufReader};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::Duration;

use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
use holdout_ledger::ledger::{self, Entry};
use holdout_ledger::proto::v1::{
    self as pb, AddUserRequest, CreateHoldoutChunk, HoldoutSpec, LabelColumn, LabelRows,
    SubmitChunk, SubmitHeader, create_holdout_chunk, submit_chunk, submit_response::Outcome,
};

const BIN: &str = env!("CARGO_BIN_EXE_holdout");

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
    let mut child = Command::new(BIN)
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
        .unwrap_or_else(|| panic!("unexpected first line {line:?}"))
        .to_string();
    Serve {
        child,
        url: format!("http://{addr}"),
    }
}

fn holdout(args: &[&str], env: &[(&str, &str)]) -> Output {
    let mut cmd = Command::new(BIN);
    cmd.env_clear().args(args).stdin(Stdio::null());
    for (k, v) in env {
        cmd.env(k, v);
    }
    cmd.output().expect("run holdout")
}

#[track_caller]
fn code(out: &Output, want: i32) {
    assert_eq!(
        out.status.code(),
        Some(want),
        "--- stdout\n{}\n--- stderr\n{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
}

fn p(path: &Path) -> String {
    path.display().to_string()
}

fn init(dir: &Path) -> (PathBuf, String) {
    let db = dir.join("h.db");
    let token = dir.join("admin.token");
    let out = holdout(&["init", "--db", &p(&db), "--token-out", &p(&token)], &[]);
    code(&out, 0);
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

async fn create(c: &Conn) {
    let ids: Vec<String> = (0..N).map(|i| format!("row-{i}")).collect();
    let labels: Vec<String> = (0..N).map(|i| truth(i).to_string()).collect();
    let chunks = vec![
        CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Spec(HoldoutSpec {
                name: "bays".into(),
                policy: Some(pb::Policy {
                    delta: 0.05,
                    schedule: "series".into(),
                    answers: "rounded:0.5".into(),
                    tolerance: 0.5,
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

/// A distinct prediction vector for each `seed`.
fn predictions(seed: usize) -> Vec<SubmitChunk> {
    let ids: Vec<String> = (0..N).map(|i| format!("row-{i}")).collect();
    let wrong = seed % N..(seed % N + 100 + seed % 50).min(N);
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
                holdout: "bays".into(),
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

fn chain_of(db: &Path, chain: &str) -> Vec<Entry> {
    let conn =
        rusqlite::Connection::open_with_flags(db, rusqlite::OpenFlags::SQLITE_OPEN_READ_ONLY)
            .unwrap();
    ledger::read_chain(&conn, chain).unwrap()
}

#[tokio::test(flavor = "multi_thread", worker_threads = 4)]
async fn a_backup_taken_while_eight_clients_submit_restores_and_audits_clean() {
    let dir = tempfile::tempdir().unwrap();
    let (db, admin) = init(dir.path());
    let daemon = serve(&db);
    let root = conn(&daemon.url, &admin).await;
    create(&root).await;
    let analyst = add_user(&root, "not-custodian", "organizer").await;
    let mut tokens = Vec::new();
    for i in 0..8 {
        tokens.push(add_user(&root, &format!("bay-{i}"), "analyst").await);
    }

    // Eight clients submit until told to stop; each acknowledged answer is sent here.
    let stop = Arc::new(AtomicBool::new(false));
    let (tx, mut rx) = tokio::sync::mpsc::unbounded_channel::<String>();
    let mut tasks = Vec::new();
    for (i, token) in tokens.into_iter().enumerate() {
        let url = daemon.url.clone();
        let tx = tx.clone();
        let stop = stop.clone();
        tasks.push(tokio::spawn(async move {
            let c = conn(&url, &token).await;
            let mut round = 0;
            while !stop.load(Ordering::Relaxed) {
                let reply = c
                    .submissions()
                    .submit(tokio_stream::iter(predictions(round * 8 + i)))
                    .await
                    .expect("submit");
                round += 1;
                match reply.into_inner().outcome {
                    Some(Outcome::Answer(a)) => {
                        let _ = tx.send(a.receipt.unwrap().entry_hash);
                    }
                    Some(Outcome::Refusal(_)) => {}
                    other => panic!("unexpected {other:?}"),
                }
            }
        }));
    }
    drop(tx);
    let mut before = Vec::new();
    while before.len() < 30 {
        match tokio::time::timeout(Duration::from_secs(60), rx.recv()).await {
            Ok(Some(h)) => before.push(h),
            other => panic!("the clients stopped answering: {other:?}"),
        }
    }
    // Every answer acknowledged so far, collected just before the backup starts.
    while let Ok(h) = rx.try_recv() {
        before.push(h);
    }
    let out = dir.path().join("online.backup");
    let env = [
        ("HOLDOUT_SERVER", daemon.url.as_str()),
        ("HOLDOUT_TOKEN", admin.as_str()),
    ];
    let backup = {
        let out = p(&out);
        let env: Vec<(String, String)> = env
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect();
        tokio::task::spawn_blocking(move || {
            let env: Vec<(&str, &str)> =
                env.iter().map(|(k, v)| (k.as_str(), v.as_str())).collect();
            holdout(&["backup", "--out", &out, "--json"], &env)
        })
        .await
        .unwrap()
    };
    code(&backup, 0);
    // Answers still arrive after the backup: the daemon kept answering.
    let mut after = 0;
    while after < 5 {
        match tokio::time::timeout(Duration::from_secs(60), rx.recv()).await {
            Ok(Some(_)) => after += 1,
            other => panic!("no answers after the backup: {other:?}"),
        }
    }
    stop.store(true, Ordering::Relaxed);
    for t in tasks {
        t.await.unwrap();
    }
    let reply: serde_json::Value =
        serde_json::from_slice(&backup.stdout).expect("backup --json prints JSON");
    assert_eq!(reply["holdouts"], 1, "{reply}");
    assert!(
        reply["entries"].as_u64().unwrap() > before.len() as u64,
        "{reply} {}",
        before.len()
    );

    // Only the custodian may take one; a relative path is made absolute by the client, an
    // existing file is never overwritten.
    let denied = holdout(
        &["backup", "--out", &p(&dir.path().join("x.backup"))],
        &[
            ("HOLDOUT_SERVER", daemon.url.as_str()),
            ("HOLDOUT_TOKEN", analyst.as_str()),
        ],
    );
    code(&denied, 4);
    assert!(!dir.path().join("x.backup").exists());
    let again = holdout(&["backup", "--out", &p(&out)], &env);
    code(&again, 7);

    // Restore to a new file: it verifies, audits clean, and holds every answer acknowledged
    // before the backup started, and the backup's own entry.
    let restored = dir.path().join("restored.db");
    let r = holdout(&["restore", &p(&out), "--db", &p(&restored)], &[]);
    code(&r, 0);
    let chain = chain_of(&restored, "bays");
    assert!(ledger::verify_chain(&chain).is_empty());
    for h in &before {
        assert!(
            chain.iter().any(|e| &e.hash == h && e.kind == "answer"),
            "answer {h} acknowledged before the backup is missing from it"
        );
    }
    let backups: Vec<&Entry> = chain.iter().filter(|e| e.kind == "backup").collect();
    assert_eq!(backups.len(), 1);
    let body: serde_json::Value = serde_json::from_str(&backups[0].body).unwrap();
    assert_eq!(body["by"], "custodian", "{body}");
    assert_eq!(body["how"], "online");
    let audit = holdout(&["audit", "bays", "--db", &p(&restored), "--json"], &[]);
    code(&audit, 0);
    let report: serde_json::Value = serde_json::from_slice(&audit.stdout).unwrap();
    assert_eq!(report["unchecked"], 0, "{report}");
    assert!(report.to_string().contains("\"backup\":1"), "{report}");

    // The live database holds answers the copy lacks: restoring over it is refused.
    drop(daemon);
    let over = holdout(&["restore", &p(&out), "--db", &p(&db)], &[]);
    code(&over, 7);
    assert!(
        String::from_utf8_lossy(&over.stderr).contains("refusing to overwrite"),
        "{}",
        String::from_utf8_lossy(&over.stderr)
    );
    // The restored copy serves: the daemon replays it and answers on the same budget.
    let daemon = serve(&restored);
    let c = conn(&daemon.url, &admin).await;
    let late = add_user(&c, "late", "analyst").await;
    let reply = conn(&daemon.url, &late)
        .await
        .submissions()
        .submit(tokio_stream::iter(predictions(7_777_777)))
        .await
        .expect("submit on the restored database")
        .into_inner();
    let answered = chain.iter().filter(|e| e.kind == "answer").count() as u64;
    match reply.outcome {
        Some(Outcome::Answer(a)) => assert_eq!(a.query, answered + 1),
        other => panic!("unexpected {other:?}"),
    }
}

#[test]
fn truncated_and_corrupted_backups_are_refused_by_restore() {
    let dir = tempfile::tempdir().unwrap();
    let (db, _admin) = init(dir.path());
    let out = dir.path().join("offline.backup");
    code(
        &holdout(&["backup", "--db", &p(&db), "--out", &p(&out)], &[]),
        0,
    );
    let good = std::fs::read(&out).unwrap();
    let target = dir.path().join("target.db");

    // Truncated: half the file.
    let cut = dir.path().join("cut.backup");
    std::fs::write(&cut, &good[..good.len() / 2]).unwrap();
    let r = holdout(&["restore", &p(&cut), "--db", &p(&target)], &[]);
    code(&r, 2);
    assert!(!target.exists());

    // Corrupted ledger content: one character of an entry's salt changed in place (the
    // file stays a sound SQLite file; the chain no longer verifies). Not its hash: since
    // schema 8 the hash is also in the `ledger_by_hash` index, so a changed hash fails SQLite's
    // integrity check before the chain is read (refused too, checked below).
    let users = chain_of(&out, ledger::USERS_CHAIN);
    let flip_at = |text: &str| {
        let bytes = text.as_bytes();
        let at = good
            .windows(bytes.len())
            .position(|w| w == bytes)
            .expect("the text is stored in the file");
        let mut bad = good.clone();
        bad[at] = if bad[at] == b'0' { b'1' } else { b'0' };
        bad
    };
    let flipped = dir.path().join("flipped.backup");
    std::fs::write(&flipped, flip_at(&users[0].salt)).unwrap();
    let r = holdout(&["restore", &p(&flipped), "--db", &p(&target)], &[]);
    code(&r, 2);
    assert!(
        String::from_utf8_lossy(&r.stderr).contains("does not verify"),
        "{}",
        String::from_utf8_lossy(&r.stderr)
    );
    assert!(!target.exists());
    std::fs::write(&flipped, flip_at(&users[0].hash)).unwrap();
    let r = holdout(&["restore", &p(&flipped), "--db", &p(&target)], &[]);
    code(&r, 2);
    assert!(!target.exists());

    // Corrupted structure: a page of the file overwritten with garbage.
    let page = 4096;
    let mut bad = good.clone();
    for (i, b) in bad[page..2 * page].iter_mut().enumerate() {
        *b = (i * 31 % 251) as u8;
    }
    let garbled = dir.path().join("garbled.backup");
    std::fs::write(&garbled, &bad).unwrap();
    let r = holdout(&["restore", &p(&garbled), "--db", &p(&target)], &[]);
    code(&r, 2);
    assert!(!target.exists());

    // The intact copy restores.
    code(
        &holdout(&["restore", &p(&out), "--db", &p(&target)], &[]),
        0,
    );
    assert_eq!(
        chain_of(&target, ledger::USERS_CHAIN),
        chain_of(&out, ledger::USERS_CHAIN)
    );
}

/// Builds a database of the v0.1.0 schema (migrations 1 to 3, the schema that version wrote)
/// holding the v0.1.0 ledger fixture: its chains as exported, its holdout row, row ids and
/// labels as that version stored them (ids in `holdout_rows`, labels as a JSON array).
fn v010_database(path: &Path) {
    let fixtures = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/ledgers");
    let export = std::fs::read_to_string(fixtures.join("v0.1.0.export.jsonl")).unwrap();
    let labels = std::fs::read_to_string(fixtures.join("v0.1.0.labels.csv")).unwrap();
    let mut conn = rusqlite::Connection::open(path).unwrap();
    for (i, (_, sql)) in holdout_ledger::store::MIGRATIONS.iter().take(3).enumerate() {
        let tx = conn.transaction().unwrap();
        tx.execute_batch(sql).unwrap();
        tx.pragma_update(None, "user_version", i as u32 + 1)
            .unwrap();
        tx.commit().unwrap();
    }
    let tx = conn.transaction().unwrap();
    let mut genesis = None;
    let mut closed_at = None;
    for line in export.lines().skip(1) {
        let e: Entry = serde_json::from_str(line).unwrap();
        let body: serde_json::Value = serde_json::from_str(&e.body).unwrap();
        if e.chain == "fixture" && e.kind == "genesis" {
            genesis = Some(body.clone());
        }
        if e.chain == "fixture" && e.kind == "close" {
            closed_at = Some(body["at"].as_str().unwrap().to_string());
        }
        tx.execute(
            "INSERT INTO ledger (chain, seq, kind, body, salt, prev_hash, hash)
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)",
            rusqlite::params![
                e.chain,
                e.seq as i64,
                e.kind,
                e.body,
                e.salt,
                e.prev_hash,
                e.hash
            ],
        )
        .unwrap();
    }
    let g = genesis.expect("genesis in the fixture");
    let rows: Vec<(String, String)> = labels
        .lines()
        .skip(1)
        .map(|l| {
            let (id, v) = l.split_once(',').unwrap();
            (id.to_string(), v.to_string())
        })
        .collect();
    tx.execute(
        "INSERT INTO holdouts (id, name, description, row_count, policy_json, targets_json,
                               labels_digest, created_at, closed_at)
         VALUES (1, 'fixture', ?1, ?2, ?3, ?4, ?5, ?6, ?7)",
        rusqlite::params![
            g["description"].as_str().unwrap(),
            rows.len() as i64,
            g["policy"].to_string(),
            g["declaration"]["targets"].to_string(),
            g["labels_sha256"].as_str().unwrap(),
            g["at"].as_str().unwrap(),
            closed_at,
        ],
    )
    .unwrap();
    for (pos, (id, _)) in rows.iter().enumerate() {
        tx.execute(
            "INSERT INTO holdout_rows (row_id, holdout_id, pos) VALUES (?1, 1, ?2)",
            rusqlite::params![id, pos as i64],
        )
        .unwrap();
    }
    let values: Vec<&str> = rows.iter().map(|(_, v)| v.as_str()).collect();
    tx.execute(
        "INSERT INTO sealed_labels (holdout_id, target, labels) VALUES (1, 0, ?1)",
        [serde_json::to_string(&values).unwrap().into_bytes()],
    )
    .unwrap();
    tx.commit().unwrap();
}

#[test]
fn migrating_a_v010_database_leaves_an_automatic_backup_and_audits_clean() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("old.db");
    v010_database(&db);
    let before = chain_of(&db, "fixture");

    // The daemon opens it: copy first, then migrate.
    let daemon = serve(&db);
    drop(daemon);
    let copies: Vec<PathBuf> = std::fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|f| {
            let n = f.file_name().unwrap().to_string_lossy().into_owned();
            n.starts_with("old.db.before-schema-") && n.ends_with(".backup")
        })
        .collect();
    assert_eq!(copies.len(), 1, "one automatic copy: {copies:?}");
    let copy = &copies[0];
    let name = copy.file_name().unwrap().to_string_lossy().into_owned();
    assert!(name.contains(".from-3."), "{name}");
    // The copy is the old database: schema 3, the fixture's chain unchanged.
    let v: u32 = rusqlite::Connection::open(copy)
        .unwrap()
        .query_row("PRAGMA user_version", [], |r| r.get(0))
        .unwrap();
    assert_eq!(v, 3);
    assert_eq!(chain_of(copy, "fixture"), before);

    // The migrated database records the copy and audits clean, labels included.
    let after = chain_of(&db, "fixture");
    assert_eq!(&after[..before.len()], &before[..]);
    let last = after.last().unwrap();
    assert_eq!(last.kind, "backup");
    let body: serde_json::Value = serde_json::from_str(&last.body).unwrap();
    assert!(
        body["how"]
            .as_str()
            .unwrap()
            .starts_with("automatic, before migration from schema 3 to"),
        "{body}"
    );
    assert_eq!(body["file"], p(copy));
    let audit = holdout(&["audit", "fixture", "--db", &p(&db), "--json"], &[]);
    code(&audit, 0);
    let report: serde_json::Value = serde_json::from_slice(&audit.stdout).unwrap();
    assert_eq!(report["unchecked"], 0, "{report}");

    // Opening it again migrates nothing and copies nothing.
    drop(serve(&db));
    let n = std::fs::read_dir(dir.path())
        .unwrap()
        .filter(|e| {
            e.as_ref()
                .unwrap()
                .file_name()
                .to_string_lossy()
                .ends_with(".backup")
        })
        .count();
    assert_eq!(n, 1);
}
