//! End to end through the real binary: export, checkpoint and certify against a daemon, then
//! the offline audit of the export and of the database file, receipts, --find, what-if, and
//! periodic checkpoints written by `serve --checkpoint-dir`.

mod common;

use std::io::{BufRead, BufReader};
use std::process::Stdio;
use std::time::{Duration, Instant};

use common::{Daemon, holdout, run};

const ROWS: usize = 400;

/// Labels with distinctive cost values, so the test can look for any of them in an export.
fn labels_csv() -> (String, Vec<String>) {
    let classes = ["ok", "ok", "dent", "ok", "crack"];
    let mut s = String::from("id,defect,cost\n");
    let mut costs = Vec::new();
    for i in 0..ROWS {
        let cost = format!("{:.6}", 300.0 + i as f64 * 0.731_4 + 0.000_137);
        s.push_str(&format!(
            "p{i:04},{},{cost}\n",
            classes[(i * 3 + i / 7) % 5]
        ));
        costs.push(cost);
    }
    (s, costs)
}

fn defect_predictions(wrong_every: usize) -> String {
    let classes = ["ok", "ok", "dent", "ok", "crack"];
    let mut s = String::from("id,prediction\n");
    for i in 0..ROWS {
        let truth = classes[(i * 3 + i / 7) % 5];
        let p = if i % wrong_every == 0 {
            if truth == "ok" { "dent" } else { "ok" }
        } else {
            truth
        };
        s.push_str(&format!("p{i:04},{p}\n"));
    }
    s
}

/// Cost predictions; `exp` writes them in exponent notation and in reverse row order.
fn cost_predictions(offset: f64, exp: bool) -> String {
    let mut rows: Vec<String> = (0..ROWS)
        .map(|i| {
            let v = 300.0 + i as f64 * 0.731_4 + offset;
            if exp {
                format!("p{i:04},{v:e}")
            } else {
                format!("p{i:04},{v}")
            }
        })
        .collect();
    if exp {
        rows.reverse();
    }
    format!("id,prediction\n{}\n", rows.join("\n"))
}

struct Setup {
    d: Daemon,
    auditor: String,
    analyst: String,
    costs: Vec<String>,
    labels: String,
}

fn setup() -> Setup {
    let d = Daemon::start();
    let (csv, costs) = labels_csv();
    let labels = d.write("labels.csv", &csv);
    d.admin(&[
        "create",
        "qc",
        "--labels",
        &labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--target",
        "cost:cost:abs_error:100:hoeffding",
        "--tolerance",
        "0.3",
        "--json",
    ])
    .ok();
    let auditor = d.add_user("ava", &["auditor"], None);
    let analyst = d.add_user("sam", &["analyst"], Some("squad"));
    Setup {
        d,
        auditor,
        analyst,
        costs,
        labels,
    }
}

#[test]
fn export_checkpoint_audit_receipts_find_certify_and_db() {
    let s = setup();
    let d = &s.d;
    let p1 = d.write("p1.csv", &defect_predictions(9));
    let answer = d
        .run(
            &s.analyst,
            &[
                "submit",
                "qc",
                "--target",
                "defect",
                "--predictions",
                &p1,
                "--json",
            ],
        )
        .ok()
        .json();
    let receipt = d.write("receipt.json", &answer.to_string());
    let early = d.path("early.json").display().to_string();
    d.run(&s.analyst, &["checkpoint", "qc", "--json", "--out", &early])
        .ok();
    let c1 = d.write("c1.csv", &cost_predictions(1.5, false));
    d.run(
        &s.analyst,
        &["submit", "qc", "--target", "cost", "--predictions", &c1],
    )
    .ok();
    let p2 = d.write("p2.csv", &defect_predictions(4));
    d.run(
        &s.analyst,
        &["submit", "qc", "--target", "defect", "--predictions", &p2],
    )
    .ok();
    let late = d.path("late.json").display().to_string();
    d.run(&s.analyst, &["checkpoint", "qc", "--json", "--out", &late])
        .ok();

    // Exporting needs the auditor role.
    let out = d.path("qc.jsonl").display().to_string();
    d.run(&s.analyst, &["export", "qc", "--out", &out]).code(4);
    d.run(&s.auditor, &["export", "qc", "--out", &out]).ok();
    let text = std::fs::read_to_string(&out).unwrap();
    assert!(
        text.lines()
            .next()
            .unwrap()
            .contains("holdout-ledger-export/1")
    );
    // No label value appears anywhere in the export.
    for c in &s.costs {
        assert!(
            !text.contains(c.as_str()),
            "label {c} leaked into the export"
        );
    }
    assert!(
        text.contains("\"kind\":\"read\""),
        "the export records its own read"
    );

    // A clean audit, offline, with labels, both checkpoints and the receipt.
    let audit = |extra: &[&str]| {
        let mut args = vec!["audit", out.as_str()];
        args.extend_from_slice(extra);
        run(holdout(), &args)
    };
    let ok = audit(&[
        "--labels",
        &s.labels,
        "--checkpoint",
        &early,
        "--checkpoint",
        &late,
        "--receipt",
        &receipt,
        "--json",
    ])
    .ok()
    .json();
    assert_eq!(ok["clean"], true, "{ok:#}");
    assert_eq!(ok["queries"].as_array().unwrap().len(), 3);
    assert_eq!(ok["labels_checked"], true);
    let human = audit(&["--checkpoint", &early]).ok();
    assert!(
        human.stdout.contains("clean: no discrepancies"),
        "{}",
        human.stdout
    );
    assert!(human.stdout.contains("i.i.d."), "{}", human.stdout);

    // A forged receipt: exit 8, named.
    let mut forged = answer.clone();
    forged["receipt"]["salt"] = "00".repeat(16).into();
    let forged = d.write("forged.json", &forged.to_string());
    let bad = audit(&["--receipt", &forged]).code(8);
    assert!(bad.stdout.contains("salt"), "{}", bad.stdout);

    // A truncated export (the last two entries cut, header fixed) against the late checkpoint.
    let lines: Vec<&str> = text.lines().collect();
    let users = lines
        .iter()
        .filter(|l| l.contains("\"chain\":\"@users\""))
        .count();
    let qc: Vec<&str> = lines[1..]
        .iter()
        .copied()
        .filter(|l| l.contains("\"chain\":\"qc\""))
        .collect();
    let mut header: serde_json::Value = serde_json::from_str(lines[0]).unwrap();
    header["chains"]["qc"] = (qc.len() - 2).into();
    let mut cut = vec![header.to_string()];
    cut.extend(qc[..qc.len() - 2].iter().map(|s| s.to_string()));
    cut.extend(
        lines
            .iter()
            .filter(|l| l.contains("\"chain\":\"@users\""))
            .map(|s| s.to_string()),
    );
    assert_eq!(cut.len(), 1 + qc.len() - 2 + users);
    let cut_path = d.write("cut.jsonl", &(cut.join("\n") + "\n"));
    run(holdout(), &["audit", &cut_path]).ok();
    let caught = run(holdout(), &["audit", &cut_path, "--checkpoint", &late]).code(8);
    assert!(caught.stdout.contains("truncated"), "{}", caught.stdout);

    // --find: the cost file re-saved in exponent notation and reverse order names its entry.
    let c1_again = d.write("c1-resaved.csv", &cost_predictions(1.5, true));
    assert_ne!(
        std::fs::read(&c1).unwrap(),
        std::fs::read(&c1_again).unwrap()
    );
    let found = audit(&["--find", &c1_again, "--json"]).ok().json();
    let entries = found["find"][0]["entries"].as_array().unwrap();
    assert_eq!(entries.len(), 1, "{found:#}");
    assert_eq!(entries[0]["target"], "cost");
    let other = d.write("c2.csv", &cost_predictions(2.5, false));
    let none = audit(&["--find", &other, "--json"]).ok().json();
    assert!(none["find"][0]["entries"].as_array().unwrap().is_empty());

    // Re-scoring the prediction files found in the ledger against the labels.
    let rescored = audit(&[
        "--labels",
        &s.labels,
        "--predictions",
        &d.dir.path().display().to_string(),
        "--json",
    ])
    .ok()
    .json();
    let checked: usize = rescored["rescored"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f["entries"].as_array().unwrap().len())
        .sum();
    assert!(checked >= 3, "{rescored:#}");

    // What-if under a coarser rule.
    let w = audit(&["--what-if-answers", "rounded:0.05", "--json"])
        .ok()
        .json();
    assert_eq!(w["what_if"].as_array().unwrap().len(), 3, "{w:#}");

    // The database file itself, read-only, with the labels it seals.
    let db = d.path("holdout.db").display().to_string();
    let live = run(
        holdout(),
        &["audit", "--db", &db, "qc", "--checkpoint", &late, "--json"],
    )
    .ok()
    .json();
    assert_eq!(live["labels_checked"], true);
    assert_eq!(live["clean"], true, "{live:#}");

    // A certificate a model card can cite.
    let cert = d
        .run(&s.auditor, &["certify", "qc", "--query", "1", "--json"])
        .ok()
        .json();
    assert_eq!(cert["answer"]["query"], 1);
    assert_eq!(cert["kind"], "answer");
    // Two targets: the answer in words names its target and metric.
    let words = cert["answer"]["in_words"].as_str().unwrap();
    assert!(words.starts_with("target defect: error "), "{words}");
    assert!(words.contains(", between "), "{words}");
    assert!(cert["guarantee"].as_str().unwrap().contains("probability"));
    let rfile = d.write("cert-receipt.json", &cert["receipt"].to_string());
    let cpfile = d.write("cert-cp.json", &cert["checkpoint"].to_string());
    d.run(
        &s.auditor,
        &[
            "export",
            "qc",
            "--out",
            &d.path("qc2.jsonl").display().to_string(),
        ],
    )
    .ok();
    run(
        holdout(),
        &[
            "audit",
            &d.path("qc2.jsonl").display().to_string(),
            "--receipt",
            &rfile,
            "--checkpoint",
            &cpfile,
        ],
    )
    .ok();
}

#[test]
fn serve_writes_periodic_checkpoints() {
    let s = setup();
    let db = s.d.path("holdout.db");
    let copy = s.d.path("copy.db");
    // Copy through SQLite's backup so the WAL content is included.
    {
        let src = rusqlite::Connection::open(&db).unwrap();
        src.execute("VACUUM INTO ?1", [copy.display().to_string()])
            .unwrap();
    }
    let dir = s.d.path("anchors");
    let (mut child, _url) = serve_with_checkpoints(&copy, &dir, "1");
    let deadline = Instant::now() + Duration::from_secs(30);
    let mut files = Vec::new();
    while Instant::now() < deadline {
        files = std::fs::read_dir(&dir)
            .map(|r| r.filter_map(|e| e.ok().map(|e| e.path())).collect())
            .unwrap_or_default();
        if files
            .iter()
            .any(|f| f.file_name().unwrap().to_string_lossy().starts_with("qc-"))
        {
            break;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    let _ = child.kill();
    let _ = child.wait();
    // The identity chain is signed beside the holdout.
    assert!(
        files.iter().any(|f| f
            .file_name()
            .unwrap()
            .to_string_lossy()
            .starts_with("@users-")),
        "{files:?}"
    );
    // And the trees, in format 3 (the holdout's with the identity tree).
    let tree = files
        .iter()
        .find(|f| {
            f.file_name()
                .unwrap()
                .to_string_lossy()
                .starts_with("tree-qc-")
        })
        .unwrap_or_else(|| panic!("no tree-qc- file in {files:?}"));
    let note = std::fs::read_to_string(tree).unwrap();
    assert!(
        note.starts_with("holdout-ledger/qc\n") && note.contains("\nusers "),
        "{note}"
    );
    files.retain(|f| f.file_name().unwrap().to_string_lossy().starts_with("qc-"));
    assert_eq!(files.len(), 1, "{files:?}");
    let name = files[0].file_name().unwrap().to_string_lossy().to_string();
    assert!(name.starts_with("qc-0.checkpoint"), "{name}");
    let dbs = copy.display().to_string();
    let cp = files[0].display().to_string();
    run(
        holdout(),
        &["audit", "--db", &dbs, "qc", "--checkpoint", &cp],
    )
    .ok();
}

#[test]
fn serve_signs_the_last_heads_at_shutdown() {
    let s = setup();
    let copy = s.d.path("copy2.db");
    {
        let src = rusqlite::Connection::open(s.d.path("holdout.db")).unwrap();
        src.execute("VACUUM INTO ?1", [copy.display().to_string()])
            .unwrap();
    }
    let dir = s.d.path("anchors2");
    // An hour between ticks: only the start and the shutdown can write checkpoints here.
    let (mut child, url) = serve_with_checkpoints(&copy, &dir, "3600");
    let files = |dir: &std::path::Path| -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(dir)
            .map(|r| {
                r.filter_map(|e| e.ok().map(|e| e.file_name().to_string_lossy().to_string()))
                    .filter(|f| f.starts_with("qc-"))
                    .collect()
            })
            .unwrap_or_default();
        v.sort();
        v
    };
    let deadline = Instant::now() + Duration::from_secs(30);
    while files(&dir).is_empty() && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(50));
    }
    assert_eq!(
        files(&dir),
        ["qc-0.checkpoint.json"],
        "the start signs genesis"
    );
    let preds = s.d.write("shutdown.csv", &defect_predictions(9));
    run(
        holdout(),
        &[
            "submit",
            "qc",
            "--target",
            "defect",
            "--predictions",
            &preds,
            "--server",
            &url,
            "--token",
            &s.analyst,
        ],
    )
    .ok();
    // The identity chain can be checkpointed on request too, and audits with the export.
    let users_cp = s.d.path("users.checkpoint.json").display().to_string();
    run(
        holdout(),
        &[
            "checkpoint",
            "@users",
            "--json",
            "--out",
            &users_cp,
            "--server",
            &url,
            "--token",
            &s.auditor,
        ],
    )
    .ok();
    let users_export = s.d.path("users-export.jsonl").display().to_string();
    run(
        holdout(),
        &[
            "export",
            "qc",
            "--out",
            &users_export,
            "--server",
            &url,
            "--token",
            &s.auditor,
        ],
    )
    .ok();
    run(
        holdout(),
        &["audit", &users_export, "--checkpoint", &users_cp],
    )
    .ok();
    let term = std::process::Command::new("kill")
        .args(["-TERM", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(term.success());
    let status = child.wait().unwrap();
    assert!(status.success(), "{status:?}");
    assert_eq!(
        files(&dir),
        ["qc-0.checkpoint.json", "qc-2.checkpoint.json"],
        "the last head before shutdown (the answer, then the export's read entry) is covered"
    );
}

#[test]
fn a_corrupted_labels_blob_is_a_finding_about_the_labels() {
    let s = setup();
    let copy = s.d.path("corrupt.db");
    {
        let src = rusqlite::Connection::open(s.d.path("holdout.db")).unwrap();
        src.execute("VACUUM INTO ?1", [copy.display().to_string()])
            .unwrap();
    }
    let conn = rusqlite::Connection::open(&copy).unwrap();
    let n = conn
        .execute(
            "UPDATE sealed_labels SET labels = x'5b2274727563' WHERE target = 0",
            [],
        )
        .unwrap();
    assert_eq!(n, 1);
    drop(conn);
    let db = copy.display().to_string();
    let out = run(holdout(), &["audit", "--db", &db, "qc"]).code(8);
    assert!(
        out.stdout.contains("labels") && out.stdout.contains("unreadable"),
        "{}\n{}",
        out.stdout,
        out.stderr
    );
    let json = run(holdout(), &["audit", "--db", &db, "qc", "--json"])
        .code(8)
        .json();
    assert!(
        json.to_string().contains("sealed labels of target 0"),
        "{json}"
    );
}

#[test]
fn serve_signs_an_organizers_close_at_once() {
    let s = setup();
    let copy = s.d.path("copy3.db");
    {
        let src = rusqlite::Connection::open(s.d.path("holdout.db")).unwrap();
        src.execute("VACUUM INTO ?1", [copy.display().to_string()])
            .unwrap();
    }
    let dir = s.d.path("anchors3");
    // An hour between ticks: only the start, a close and the shutdown can write checkpoints.
    let (mut child, url) = serve_with_checkpoints(&copy, &dir, "3600");
    let files = |dir: &std::path::Path| -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(dir)
            .map(|r| {
                r.filter_map(|e| e.ok().map(|e| e.file_name().to_string_lossy().to_string()))
                    .filter(|f| f.starts_with("qc-"))
                    .collect()
            })
            .unwrap_or_default();
        v.sort();
        v
    };
    let deadline = Instant::now() + Duration::from_secs(30);
    while files(&dir).is_empty() && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(50));
    }
    assert_eq!(
        files(&dir),
        ["qc-0.checkpoint.json"],
        "the start signs genesis"
    );
    run(
        holdout(),
        &[
            "close",
            "qc",
            "--reason",
            "inspection finished",
            "--server",
            &url,
            "--token",
            &s.d.admin,
        ],
    )
    .ok();
    // Signed as the close committed, with the daemon still running.
    assert_eq!(
        files(&dir),
        ["qc-0.checkpoint.json", "qc-1.checkpoint.json"],
        "the close (entry 1) is signed at once"
    );
    let _ = child.kill();
    let _ = child.wait();
}

/// `holdout serve` on `db` with `--checkpoint-dir dir`, on an ephemeral port: the child and its
/// URL (read from the `listening on` line).
fn serve_with_checkpoints(
    db: &std::path::Path,
    dir: &std::path::Path,
    every: &str,
) -> (std::process::Child, String) {
    let mut child = holdout()
        .args([
            "serve",
            "--listen",
            "127.0.0.1:0",
            "--checkpoint-every",
            every,
            "--db",
        ])
        .arg(db)
        .arg("--checkpoint-dir")
        .arg(dir)
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut line = String::new();
    BufReader::new(child.stdout.take().unwrap())
        .read_line(&mut line)
        .unwrap();
    let addr = line
        .trim()
        .strip_prefix("listening on ")
        .unwrap_or_else(|| panic!("serve printed {line:?}"));
    (child, format!("http://{addr}"))
}
