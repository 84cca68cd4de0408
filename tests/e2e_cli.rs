//! End to end through the real binary: a daemon on port 0 with a fresh database, driven by the
//! client commands exactly as a user would type them.

mod common;

use common::{Daemon, Parts, csv_ids, dead_url, holdout, run};
use serde_json::Value;

const N: usize = 2000;

/// Creates the two-target quality-control holdout `name` as the custodian; returns its JSON.
fn create_qc(d: &Daemon, name: &str, extra: &[&str]) -> Value {
    let labels = d.write(&format!("{name}-labels.csv"), &Parts::new(N).labels_csv());
    let mut args = vec![
        "create",
        name,
        "--labels",
        &labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--target",
        "cost:cost:abs_error:100",
        "--description",
        "invented inspection data",
        "--json",
    ];
    args.extend_from_slice(extra);
    d.admin(&args).ok().json()
}

/// The budget part of `status --json`.
fn budget(d: &Daemon, token: &str, name: &str) -> Value {
    d.run(token, &["status", name, "--json"]).ok().json()["budget"].clone()
}

fn is_hex64(v: &Value) -> bool {
    v.as_str()
        .is_some_and(|s| s.len() == 64 && s.chars().all(|c| c.is_ascii_hexdigit()))
}

#[test]
fn create_ids_validate_dry_run_submit_status_history() {
    let d = Daemon::start();
    let parts = Parts::new(N);

    // --preview prints the plan and sends nothing (no daemon needed).
    let labels = d.write("labels.csv", &parts.labels_csv());
    let preview = run(
        holdout(),
        &[
            "create",
            "qc",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
            "--preview",
            "--json",
            "--server",
            &dead_url(),
        ],
    )
    .ok()
    .json();
    assert_eq!(preview["rows"], N);
    assert_eq!(
        preview["targets"][0]["classes"],
        serde_json::json!(["crack", "dent", "ok"])
    );

    let info = create_qc(&d, "qc", &["--tolerance", "0.2"]);
    assert_eq!(info["name"], "qc");
    assert_eq!(info["rows"], N);
    assert_eq!(info["targets"].as_array().map(Vec::len), Some(2));
    assert_eq!(info["targets"][0]["metric"], "error");
    assert_eq!(info["targets"][0]["method"], "exact");
    assert_eq!(
        info["targets"][0]["classes"],
        serde_json::json!(["crack", "dent", "ok"])
    );
    assert_eq!(info["targets"][1]["metric"], "abs_error:100");
    assert_eq!(info["targets"][1]["method"], "kl");
    assert!(is_hex64(&info["genesis_hash"]), "{info}");
    assert!(info["guarantee"].as_str().is_some_and(|g| !g.is_empty()));

    let alice = d.add_user("alice", &["analyst"], Some("blue"));

    // ids: a template with every row id and the label domain as JSON.
    let ids = d
        .run(&alice, &["ids", "qc", "--out", "template.csv", "--json"])
        .ok()
        .json();
    assert_eq!(ids["rows"], N);
    assert_eq!(ids["targets"][0]["name"], "defect");
    let template = std::fs::read_to_string(d.path("template.csv")).expect("template");
    assert!(template.starts_with("id,prediction\n"), "{template:.40}");
    let mut got = csv_ids(&d.path("template.csv"));
    got.sort();
    let mut want: Vec<String> = parts.rows.iter().map(|r| r.0.clone()).collect();
    want.sort();
    assert_eq!(got, want);
    // The template is written as the ids arrive: an existing file is refused before anything
    // is written (and kept), replaced with --force; an unknown holdout leaves no file.
    let r = d
        .run(&alice, &["ids", "qc", "--out", "template.csv"])
        .code(2);
    assert!(r.stderr.contains("already exists"), "{}", r.stderr);
    assert_eq!(
        std::fs::read_to_string(d.path("template.csv")).expect("template"),
        template
    );
    d.run(&alice, &["ids", "qc", "--out", "template.csv", "--force"])
        .ok();
    assert_eq!(
        std::fs::read_to_string(d.path("template.csv")).expect("template"),
        template
    );
    d.run(&alice, &["ids", "nope", "--out", "nope.csv"]).code(5);
    assert!(!d.path("nope.csv").exists());

    let before = budget(&d, &alice, "qc");
    assert_eq!(before["answered"], 0);

    // validate and dry run charge nothing.
    let preds = d.write("p1.csv", &parts.defect_predictions(10, 0));
    let v = d
        .run(
            &alice,
            &[
                "validate",
                "qc",
                "--target",
                "defect",
                "--predictions",
                &preds,
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(v["rows"], N);
    assert!(v["digest"].as_str().is_some_and(|s| !s.is_empty()));
    let q = d
        .run(
            &alice,
            &[
                "submit",
                "qc",
                "--target",
                "defect",
                "--predictions",
                &preds,
                "--dry-run",
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(q["dry_run"], true);
    assert_eq!(q["query"], 1);
    assert!(q["level_nats"].as_f64().is_some_and(|x| x > 0.0), "{q}");
    assert!(
        q["half_width"].as_f64().is_some_and(|x| x > 0.0 && x < 1.0),
        "{q}"
    );
    assert_eq!(
        budget(&d, &alice, "qc"),
        before,
        "validate and dry run must charge nothing"
    );

    // A real answer: about 10 % wrong.
    let a = d
        .run(
            &alice,
            &[
                "submit",
                "qc",
                "--target",
                "defect",
                "--predictions",
                &preds,
                "--note",
                "first",
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(a["query"], 1);
    assert_eq!(a["target"], "defect");
    assert_eq!(a["replayed"], false);
    let (lo, hi) = (
        a["lower"].as_f64().expect("lower"),
        a["upper"].as_f64().expect("upper"),
    );
    assert!(
        lo <= 0.1 && 0.1 <= hi,
        "interval [{lo}, {hi}] should contain the true 0.1"
    );
    if let Some(score) = a["score"].as_f64() {
        assert!(lo <= score && score <= hi);
        assert!(
            (score - 0.1).abs() <= 0.005 + 1e-12,
            "rounded score {score}"
        );
    } else {
        panic!("a rounded rule releases a score: {a}");
    }
    for key in [
        "symbol",
        "level_nats",
        "spent",
        "remaining",
        "next_half_width",
        "queries_left",
        "guarantee",
        "delta_i",
        "code_nats",
        "transcript_nats",
        "statement",
        "digest",
        "best_model",
    ] {
        assert!(a.get(key).is_some(), "answer JSON lacks {key}: {a}");
    }
    assert!(a["spent"].as_f64().is_some_and(|s| s > 0.0));
    assert!(a["code_nats"].as_f64().is_some_and(|c| c > 0.0));
    assert_eq!(a["receipt"]["holdout"], "qc");
    assert!(is_hex64(&a["receipt"]["entry_hash"]), "{a}");

    // The second target on the same rows shares the budget and the query count.
    let costs = d.write("c1.csv", &parts.cost_predictions(3.0));
    let c = d
        .run(
            &alice,
            &[
                "submit",
                "qc",
                "--target",
                "cost",
                "--predictions",
                &costs,
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(c["query"], 2);
    assert_eq!(c["target"], "cost");
    let (lo, hi) = (
        c["lower"].as_f64().expect("lower"),
        c["upper"].as_f64().expect("upper"),
    );
    assert!(lo <= 0.03 && 0.03 <= hi, "abs error 3/100 in [{lo}, {hi}]");

    let after = budget(&d, &alice, "qc");
    assert_eq!(after["answered"], 2);
    assert!(after["spent"].as_f64() > before["spent"].as_f64());
    assert!(after["transcript_nats"].as_f64() > before["transcript_nats"].as_f64());

    let history = d
        .run(&alice, &["history", "qc", "--json"])
        .ok()
        .json_lines();
    assert_eq!(history.len(), 2, "{history:?}");
    assert_eq!(history[0]["kind"], "answer");
    assert_eq!(history[0]["answer"]["query"], 1);
    assert_eq!(history[0]["note"], "first");
    assert_eq!(history[1]["answer"]["target"], "cost");

    // Human output names the symbol, the interval and the guarantee.
    let status = d.run(&alice, &["status", "qc"]).ok();
    assert!(status.stdout.contains("remaining"), "{}", status.stdout);
    let listed = d.run(&alice, &["list", "--json"]).ok().json();
    assert_eq!(listed.as_array().map(Vec::len), Some(1), "{listed}");

    // A text answer names the guarantee's assumptions in one line; `--guarantee` states the
    // holdout's guarantee in full (common practice: the statement travels with the number).
    let p3 = d.write("p3.csv", &parts.defect_predictions(11, 3));
    let short = d
        .run(
            &alice,
            &["submit", "qc", "--target", "defect", "--predictions", &p3],
        )
        .ok();
    assert!(
        short
            .stdout
            .contains("guarantee  with probability at least 1 - "),
        "{}",
        short.stdout
    );
    assert!(!short.stdout.contains("Assumptions:"), "{}", short.stdout);
    let p4 = d.write("p4.csv", &parts.defect_predictions(12, 4));
    let full = d
        .run(
            &alice,
            &[
                "submit",
                "qc",
                "--target",
                "defect",
                "--predictions",
                &p4,
                "--guarantee",
            ],
        )
        .ok();
    assert!(full.stdout.contains("Assumptions:"), "{}", full.stdout);
    assert!(
        full.stdout
            .contains("over the draw of this holdout's labels"),
        "{}",
        full.stdout
    );
}

#[test]
fn submits_until_the_budget_is_spent_then_refuses() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    create_qc(
        &d,
        "short",
        &["--schedule", "even:3", "--tolerance", "0.45"],
    );
    let bob = d.add_user("bob", &["analyst"], None);
    for i in 0..3 {
        let preds = d.write(&format!("p{i}.csv"), &parts.defect_predictions(7 + i, i));
        let a = d
            .run(
                &bob,
                &[
                    "submit",
                    "short",
                    "--target",
                    "defect",
                    "--predictions",
                    &preds,
                    "--json",
                ],
            )
            .ok()
            .json();
        assert_eq!(a["query"], i as u64 + 1);
    }
    let spent = budget(&d, &bob, "short");
    assert_eq!(spent["answered"], 3);
    assert!(
        spent["remaining"].as_f64().is_some_and(|r| r <= 1e-12),
        "{spent}"
    );
    let preds = d.write("p9.csv", &parts.defect_predictions(11, 5));
    let r = d
        .run(
            &bob,
            &[
                "submit",
                "short",
                "--target",
                "defect",
                "--predictions",
                &preds,
                "--json",
            ],
        )
        .code(3)
        .json();
    assert_eq!(r["refused"], true);
    assert!(r["reason"].as_str().is_some_and(|s| !s.is_empty()), "{r}");
    assert!(r["message"].as_str().is_some_and(|s| !s.is_empty()), "{r}");
    assert!(
        r.get("remaining").is_some() && r.get("receipt").is_some(),
        "{r}"
    );
    // Human output of a refusal also exits 3.
    let human = d
        .run(
            &bob,
            &[
                "submit",
                "short",
                "--target",
                "defect",
                "--predictions",
                &preds,
            ],
        )
        .code(3);
    assert!(human.stdout.contains("refused"), "{}", human.stdout);
    let after = budget(&d, &bob, "short");
    assert_eq!(after["answered"], 3);
    assert_eq!(after["spent"], spent["spent"], "a refusal charges nothing");
    assert!(after["refused"].as_u64().is_some_and(|n| n >= 1), "{after}");
    let history = d
        .run(&bob, &["history", "short", "--json"])
        .ok()
        .json_lines();
    assert!(
        history.iter().any(|h| h["kind"] == "refusal"),
        "{history:?}"
    );
}

#[test]
fn bad_inputs_exit_with_their_codes_and_charge_nothing() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    create_qc(&d, "qc", &["--tolerance", "0.2"]);
    let carol = d.add_user("carol", &["analyst"], None);
    let good = d.write("good.csv", &parts.defect_predictions(10, 0));
    // One answer first, so "nothing charged" is checked against a non-trivial state.
    d.run(
        &carol,
        &["submit", "qc", "--target", "defect", "--predictions", &good],
    )
    .ok();
    let before = budget(&d, &carol, "qc");

    let submit = |target: &str, file: &str| {
        d.run(
            &carol,
            &["submit", "qc", "--target", target, "--predictions", file],
        )
    };
    // Missing file.
    let r = submit("defect", "nope.csv").code(2);
    assert!(
        r.stderr.starts_with("error: ") && r.stderr.contains("nope.csv"),
        "{}",
        r.stderr
    );
    // Non-numeric prediction for a numeric target, named by file:line and id.
    let bad_num = {
        let mut s = String::from("id,prediction\n");
        for (i, (id, _, c)) in parts.rows.iter().enumerate() {
            if i == 3 {
                s.push_str(&format!("{id},high\n"));
            } else {
                s.push_str(&format!("{id},{c}\n"));
            }
        }
        d.write("bad-number.csv", &s)
    };
    let r = submit("cost", &bad_num).code(2);
    assert!(
        r.stderr.contains("bad-number.csv:5") && r.stderr.contains("part-00003"),
        "{}",
        r.stderr
    );
    // A class outside the declared domain.
    let alien = d.write(
        "alien.csv",
        &parts
            .defect_predictions(10, 0)
            .replacen(",ok\n", ",scratch\n", 1),
    );
    submit("defect", &alien).code(2);
    // Duplicate id.
    let dup = d.write(
        "dup.csv",
        &format!("{}part-00000,ok\n", parts.defect_predictions(10, 0)),
    );
    let r = submit("defect", &dup).code(2);
    assert!(r.stderr.contains("duplicate id"), "{}", r.stderr);
    // Rows missing (checked by the daemon against the declared ids).
    let short: String = parts
        .defect_predictions(10, 0)
        .lines()
        .take(N / 2)
        .map(|l| format!("{l}\n"))
        .collect();
    let short = d.write("short.csv", &short);
    submit("defect", &short).code(2);
    // An id the holdout does not have.
    let extra = d.write(
        "extra.csv",
        &format!("{}ghost-1,ok\n", parts.defect_predictions(10, 0)),
    );
    submit("defect", &extra).code(2);
    // Ragged CSV.
    let ragged = d.write("ragged.csv", "id,prediction\npart-00000,ok,extra\n");
    submit("defect", &ragged).code(2);
    // Unknown holdout, unknown target, ambiguous target.
    d.run(
        &carol,
        &[
            "submit",
            "nope",
            "--target",
            "defect",
            "--predictions",
            &good,
        ],
    )
    .code(5);
    submit("colour", &good).code(5);
    d.run(&carol, &["submit", "qc", "--predictions", &good])
        .code(2);
    d.run(&carol, &["status", "nope"]).code(5);
    // No token, a wrong token.
    run(
        d.client(None),
        &["submit", "qc", "--target", "defect", "--predictions", &good],
    )
    .code(4);
    d.run("not-a-token", &["status", "qc"]).code(4);
    // No daemon at that address: exit 6, naming the URL.
    let dead = dead_url();
    let r = run(
        holdout(),
        &["status", "qc", "--server", &dead, "--token", &carol],
    )
    .code(6);
    assert!(r.stderr.contains(&dead), "{}", r.stderr);
    // --max-cost below any answer's code: refused without recording.
    let other = d.write("other.csv", &parts.defect_predictions(9, 1));
    let r = d
        .run(
            &carol,
            &[
                "submit",
                "qc",
                "--target",
                "defect",
                "--predictions",
                &other,
                "--max-cost",
                "0.001",
                "--json",
            ],
        )
        .code(3)
        .json();
    assert_eq!(r["refused"], true);
    assert_eq!(r["reason"], "max-cost");
    // Bad policy values are refused before anything is sent.
    let labels = d.write("l2.csv", &Parts::new(50).labels_csv());
    d.admin(&[
        "create",
        "x",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
        "--delta",
        "1.5",
    ])
    .code(2);
    d.admin(&[
        "create",
        "x",
        "--labels",
        &labels,
        "--target",
        "c:cost:abs_error",
    ])
    .code(2);
    d.admin(&[
        "create",
        "x",
        "--labels",
        &labels,
        "--target",
        "c:nocolumn:error",
        "--classes",
        "crack,dent,ok",
    ])
    .code(2);

    assert_eq!(
        budget(&d, &carol, "qc"),
        before,
        "bad inputs must charge and record nothing"
    );
    let history = d
        .run(&carol, &["history", "qc", "--json"])
        .ok()
        .json_lines();
    assert_eq!(
        history.len(),
        1,
        "only the first answer is in the history: {history:?}"
    );
}

#[test]
fn roles_are_enforced() {
    let d = Daemon::start();
    let parts = Parts::new(200);
    let labels = d.write("labels.csv", &parts.labels_csv());
    let dave = d.add_user("dave", &["analyst"], None);
    // An analyst cannot create holdouts, add users or close holdouts.
    d.run(
        &dave,
        &[
            "create",
            "h",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
        ],
    )
    .code(4);
    d.admin(&[
        "create",
        "h",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
        "--tolerance",
        "0.3",
    ])
    .ok();
    d.run(&dave, &["user", "add", "eve", "--role", "analyst"])
        .code(4);
    d.run(&dave, &["user", "list"]).code(4);
    d.run(&dave, &["close", "h"]).code(4);
    // Exact scores are not for analysts.
    d.run(&dave, &["history", "h", "--exact"]).code(4);
    let me = d.run(&dave, &["whoami", "--json"]).ok().json();
    assert_eq!(me["name"], "dave");
    assert_eq!(me["roles"], serde_json::json!(["analyst"]));
    // Rotation: the old token stops working, the new one works.
    let rotated = d.run(&dave, &["user", "rotate", "--json"]).ok().json();
    let fresh = rotated["token"].as_str().expect("new token").to_string();
    d.run(&dave, &["whoami"]).code(4);
    d.run(&fresh, &["whoami"]).ok();
    // Revocation.
    d.admin(&["user", "revoke", "dave"]).ok();
    // Refused on the very next call (tokens are checked on a connection of their own, which
    // reads every committed revocation), whatever the call.
    let after = d.write("after-revoke.csv", &parts.defect_predictions(5, 0));
    d.run(&fresh, &["submit", "h", "--predictions", &after])
        .code(4);
    d.run(&fresh, &["status", "h"]).code(4);
    let users = d.admin(&["user", "list", "--json"]).ok().json();
    let dave_row = users
        .as_array()
        .and_then(|u| u.iter().find(|x| x["name"] == "dave"))
        .cloned()
        .expect("dave listed");
    assert_eq!(dave_row["revoked"], true);
    // The organizer closes; a closed holdout answers nothing more.
    let closed = d
        .admin(&["close", "h", "--reason", "round over", "--json"])
        .ok()
        .json();
    assert_eq!(closed["open"], false);
    let frank = d.add_user("frank", &["analyst"], None);
    let preds = d.write("p.csv", &parts.defect_predictions(5, 0));
    let r = d.run(&frank, &["submit", "h", "--predictions", &preds]);
    assert!(
        r.code == 3 || r.code == 7,
        "closed holdout: exit {} {}",
        r.code,
        r.stderr
    );
    assert_eq!(budget(&d, &frank, "h")["answered"], 0);
    // Its status says it answers nothing more, not how many queries the budget would allow.
    let status = d.run(&frank, &["status", "h"]).ok().stdout;
    assert!(
        status.contains("next       none: the holdout is closed and answers no more queries")
            && !status.contains("more queries fit"),
        "{status}"
    );
}

#[test]
fn a_request_id_is_answered_once() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    create_qc(&d, "qc", &["--tolerance", "0.2"]);
    let gina = d.add_user("gina", &["analyst"], None);
    let p1 = d.write("p1.csv", &parts.defect_predictions(10, 0));
    let p2 = d.write("p2.csv", &parts.defect_predictions(10, 3));
    let submit = |file: &str| {
        d.run(
            &gina,
            &[
                "submit",
                "qc",
                "--target",
                "defect",
                "--predictions",
                file,
                "--request-id",
                "run-17",
                "--json",
            ],
        )
    };
    let first = submit(&p1).ok().json();
    let spent = budget(&d, &gina, "qc");
    let again = submit(&p1).ok().json();
    assert_eq!(again["replayed"], true);
    assert_eq!(again["query"], first["query"]);
    assert_eq!(again["symbol"], first["symbol"]);
    assert_eq!(again["receipt"], first["receipt"]);
    assert_eq!(budget(&d, &gina, "qc"), spent, "a replay charges nothing");
    // The same id with other predictions is not a free second answer.
    let r = submit(&p2).code(7);
    assert!(r.stderr.starts_with("error: "), "{}", r.stderr);
    assert_eq!(budget(&d, &gina, "qc"), spent);
}

#[test]
fn split_parts_are_disjoint_and_each_becomes_a_holdout() {
    let d = Daemon::start();
    let parts = Parts::new(1000);
    let labels = d.write("all.csv", &parts.labels_csv());
    let split = |dir: &str| {
        run(
            holdout(),
            &[
                "split",
                &labels,
                "--into",
                "feedback=0.6",
                "--into",
                "final=0.3",
                "--seed",
                "11",
                "--stratify",
                "defect",
                "--out-dir",
                &d.path(dir).display().to_string(),
                "--json",
            ],
        )
        .ok()
        .json()
    };
    let report = split("a");
    assert_eq!(report["rows"], 1000);
    let ids = |dir: &str, f: &str| csv_ids(&d.path(dir).join(f));
    let (fb, fi, rest) = (
        ids("a", "feedback.csv"),
        ids("a", "final.csv"),
        ids("a", "rest.csv"),
    );
    assert_eq!((fb.len(), fi.len(), rest.len()), (600, 300, 100));
    let mut all: Vec<String> = fb.iter().chain(&fi).chain(&rest).cloned().collect();
    all.sort();
    let before = all.len();
    all.dedup();
    assert_eq!(all.len(), before, "parts share no row");
    let mut want: Vec<String> = parts.rows.iter().map(|r| r.0.clone()).collect();
    want.sort();
    assert_eq!(all, want, "the parts' union is the input");
    // Same seed, same parts.
    split("b");
    for f in ["feedback.csv", "final.csv", "rest.csv"] {
        assert_eq!(
            std::fs::read(d.path("a").join(f)).expect("a"),
            std::fs::read(d.path("b").join(f)).expect("b")
        );
    }
    // Fractions over 1 are refused.
    run(
        holdout(),
        &[
            "split",
            &labels,
            "--into",
            "a=0.7",
            "--into",
            "b=0.4",
            "--out-dir",
            &d.path("c").display().to_string(),
        ],
    )
    .code(2);
    // Each part is its own holdout; the whole file overlaps them and is refused.
    for name in ["feedback", "final"] {
        let file = d
            .path("a")
            .join(format!("{name}.csv"))
            .display()
            .to_string();
        d.admin(&[
            "create",
            name,
            "--labels",
            &file,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
            "--tolerance",
            "0.3",
        ])
        .ok();
    }
    let r = d.admin(&[
        "create",
        "everything",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
    ]);
    assert_eq!(r.code, 7, "overlapping rows must be refused: {}", r.stderr);
    let listed = d.admin(&["list", "--json"]).ok().json();
    assert_eq!(listed.as_array().map(Vec::len), Some(2));
}

#[test]
fn a_best_of_batch_names_the_best_model() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    let labels = d.write("labels.csv", &parts.labels_csv());
    d.admin(&[
        "create",
        "bo",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
        "--answers",
        "best-of:0.01",
        "--schedule",
        "even:10",
        "--tolerance",
        "0.3",
    ])
    .ok();
    let hana = d.add_user("hana", &["analyst"], None);
    let worse = d.write("worse.csv", &parts.defect_predictions(4, 0));
    let better = d.write("better.csv", &parts.defect_predictions(20, 0));
    let a = d
        .run(
            &hana,
            &["submit", "bo", "--predictions", &worse, &better, "--json"],
        )
        .ok()
        .json();
    assert_eq!(a["best_model"], 1, "{a}");
    assert_eq!(a["best_model_name"], "better.csv");
    // Under even:10 every share is delta/10, so a batch of two spends exactly two of them.
    let b = budget(&d, &hana, "bo");
    let delta_i = a["delta_i"].as_f64().expect("delta_i");
    let spent = b["spent"].as_f64().expect("spent");
    assert!(
        (spent - 2.0 * delta_i).abs() <= 1e-12 * spent.max(1.0),
        "a batch of 2 takes 2 shares: {spent} vs {delta_i}"
    );
}

#[test]
fn many_rows_stream_in_chunks_and_json_lines_are_read() {
    // 20,000 rows: three chunks of at most 8192 rows each way.
    let d = Daemon::start();
    let parts = Parts::new(20_000);
    let labels = d.write("labels.csv", &parts.labels_csv());
    let info = d
        .admin(&[
            "create",
            "big",
            "--labels",
            &labels,
            "--metric",
            "sq_error:10000",
            "--label-column",
            "cost",
            "--json",
        ])
        .ok()
        .json();
    assert_eq!(info["rows"], 20_000);
    assert_eq!(info["targets"][0]["name"], "cost");
    let ivy = d.add_user("ivy", &["analyst"], None);
    let mut jsonl = String::new();
    for (id, _, c) in parts.rows.iter().rev() {
        jsonl.push_str(&format!(
            "{{\"id\": \"{id}\", \"prediction\": {}}}\n",
            c + 10.0
        ));
    }
    let preds = d.write("preds.jsonl", &jsonl);
    let v = d
        .run(
            &ivy,
            &["validate", "big", "--predictions", &preds, "--json"],
        )
        .ok()
        .json();
    assert_eq!(v["rows"], 20_000);
    let a = d
        .run(&ivy, &["submit", "big", "--predictions", &preds, "--json"])
        .ok()
        .json();
    // Every prediction is off by 10: squared error 100 of the clip bound 10,000 = 0.01.
    let (lo, hi) = (
        a["lower"].as_f64().expect("lower"),
        a["upper"].as_f64().expect("upper"),
    );
    assert!(lo <= 0.01 && 0.01 <= hi, "[{lo}, {hi}]");
    // The same vector as CSV in another order has the same digest: it is replayed, not charged.
    let csv = d.write("preds.csv", &parts.cost_predictions(10.0));
    let again = d
        .run(&ivy, &["submit", "big", "--predictions", &csv, "--json"])
        .ok()
        .json();
    assert_eq!(again["digest"], a["digest"]);
    assert_eq!(again["replayed"], true);
    assert_eq!(budget(&d, &ivy, "big")["answered"], 1);
}

#[test]
fn regression_answers_are_also_shown_in_the_target_s_own_units() {
    let d = Daemon::start();
    create_qc(&d, "qcu", &[]);
    let alice = d.add_user("alice", &["analyst"], Some("red"));
    // Every cost prediction is off by 30: a mean absolute error of 30, 0.3 on the [0, 1] scale
    // of abs_error:100.
    let costs = d.write("c30.csv", &Parts::new(N).cost_predictions(30.0));
    let text = d
        .run(
            &alice,
            &["submit", "qcu", "--target", "cost", "--predictions", &costs],
        )
        .ok()
        .stdout;
    let line = text
        .lines()
        .find(|l| l.starts_with("in units   mean absolute error 30 ["))
        .unwrap_or_else(|| panic!("{text}"));
    // The interval in units, read back, contains 30 and is 100 times the [0, 1] one.
    let inner = &line[line.find('[').unwrap() + 1..line.find(']').unwrap()];
    let (lo, hi) = inner.split_once(", ").unwrap();
    let (lo, hi): (f64, f64) = (lo.parse().unwrap(), hi.parse().unwrap());
    assert!(lo <= 30.0 && 30.0 <= hi && hi - lo > 1.0, "{line}");
    assert!(line.contains("capped at 100, divided by 100"), "{line}");
    // The error target has no units line.
    let defects = d.write("d.csv", &Parts::new(N).defect_predictions(10, 0));
    let text = d
        .run(
            &alice,
            &[
                "submit",
                "qcu",
                "--target",
                "defect",
                "--predictions",
                &defects,
            ],
        )
        .ok()
        .stdout;
    assert!(!text.contains("in units"), "{text}");
}

#[test]
fn every_view_of_a_regression_answer_shows_the_target_s_own_units() {
    let d = Daemon::start();
    create_qc(&d, "qcv", &["--tolerance", "0.3"]);
    let alice = d.add_user("alice", &["analyst"], Some("red"));
    let costs = d.write("c30.csv", &Parts::new(N).cost_predictions(30.0));
    d.run(
        &alice,
        &["submit", "qcv", "--target", "cost", "--predictions", &costs],
    )
    .ok();
    // history: the text row and the JSON answer.
    let text = d.run(&alice, &["history", "qcv"]).ok().stdout;
    assert!(text.contains("= mean absolute error 30 ["), "{text}");
    let h = d
        .run(&alice, &["history", "qcv", "--json"])
        .ok()
        .json_lines();
    let a = &h[0]["answer"];
    let u = &a["units"];
    assert_eq!(u["measure"], "mean absolute error", "{a}");
    assert_eq!(u["bound"], 100.0);
    assert_eq!(u["score"], 30.0);
    let (lo, hi) = (a["lower"].as_f64().unwrap(), a["upper"].as_f64().unwrap());
    let (ulo, uhi) = (u["lower"].as_f64().unwrap(), u["upper"].as_f64().unwrap());
    assert!(ulo <= 30.0 && 30.0 <= uhi, "{u}");
    assert!(
        ulo <= lo * 100.0 && uhi >= hi * 100.0,
        "outward: {u} vs [{lo}, {hi}]"
    );
    // leaderboard (best per team): text and JSON.
    let text = d.run(&alice, &["leaderboard", "qcv"]).ok().stdout;
    assert!(text.contains("= mean absolute error 30 ["), "{text}");
    let b = d.run(&alice, &["leaderboard", "qcv", "--json"]).ok().json();
    let row = b["rows"]
        .as_array()
        .unwrap()
        .iter()
        .find(|r| r["target"] == "cost")
        .expect("a cost row");
    assert_eq!(row["units"]["score"], 30.0, "{row}");
    // leaderboard --csv: unit columns at the end of each row.
    let csv = d.run(&alice, &["leaderboard", "qcv", "--csv"]).ok().stdout;
    let header: Vec<&str> = csv.lines().next().unwrap().split(',').collect();
    let at = |name: &str| header.iter().position(|h| *h == name).expect(name);
    let cost_row: Vec<&str> = csv
        .lines()
        .skip(1)
        .map(|l| l.split(',').collect::<Vec<_>>())
        .find(|r| r[at("target")] == "cost")
        .expect("a cost row");
    assert_eq!(cost_row[at("units_best")], "30", "{csv}");
    let (ul, uu): (f64, f64) = (
        cost_row[at("units_lower")].parse().unwrap(),
        cost_row[at("units_upper")].parse().unwrap(),
    );
    assert!(ul <= 30.0 && 30.0 <= uu, "{csv}");
    // submit --json.
    let again = d.write("c31.csv", &Parts::new(N).cost_predictions(31.0));
    let a = d
        .run(
            &alice,
            &[
                "submit",
                "qcv",
                "--target",
                "cost",
                "--predictions",
                &again,
                "--json",
            ],
        )
        .ok()
        .json();
    assert_eq!(a["units"]["measure"], "mean absolute error", "{a}");
    // The certificate of the first answer: in words and in JSON, in the target's units too.
    let auditor = d.add_user("ann", &["auditor"], None);
    let cert = d
        .run(&auditor, &["certify", "qcv", "--query", "1", "--json"])
        .ok()
        .json();
    let words = cert["answer"]["in_words"].as_str().unwrap();
    assert!(
        words.contains("in the target's units, mean absolute error 30 ["),
        "{words}"
    );
    assert_eq!(cert["answer"]["units"]["score"], 30.0, "{cert}");
    let text = d
        .run(&auditor, &["certify", "qcv", "--query", "1"])
        .ok()
        .stdout;
    assert!(text.contains("mean absolute error 30 ["), "{text}");

    // A sealed round's ranking: entries and comparisons in units too.
    // Rows of their own (a row belongs to one holdout).
    let own = |t: String| t.replace("part-", "final-");
    let labels = d.write("fin-labels.csv", &own(Parts::new(N).labels_csv()));
    d.admin(&[
        "create",
        "fin",
        "--labels",
        &labels,
        "--target",
        "cost:cost:abs_error:100",
        "--answers",
        "sealed:0.01",
        "--tolerance",
        "0.3",
        "--expect-answers",
        "2",
        "--closes-at",
        "2099-01-01T00:00:00Z",
    ])
    .ok();
    let bob = d.add_user("bob", &["analyst"], Some("blue"));
    let far = d.write("c50.csv", &own(Parts::new(N).cost_predictions(50.0)));
    let costs = d.write("f30.csv", &own(Parts::new(N).cost_predictions(30.0)));
    d.run(
        &alice,
        &["submit", "fin", "--predictions", &costs, "--final"],
    )
    .ok();
    d.run(&bob, &["submit", "fin", "--predictions", &far, "--final"])
        .ok();
    d.admin(&["close", "fin"]).ok();
    let text = d.admin(&["ranking", "fin"]).ok().stdout;
    assert!(text.contains("= mean absolute error 30 ["), "{text}");
    assert!(text.contains("= mean absolute error 50 ["), "{text}");
    let r = d.admin(&["ranking", "fin", "--json"]).ok().json();
    for e in r["entries"].as_array().unwrap() {
        assert_eq!(e["units"]["measure"], "mean absolute error", "{e}");
    }
    let c = &r["comparisons"][0];
    let (lo, ulo) = (
        c["lower"].as_f64().unwrap(),
        c["units"]["lower"].as_f64().unwrap(),
    );
    assert!(ulo <= lo * 100.0 && (ulo - lo * 100.0).abs() < 1e-9, "{c}");
    // A classification target carries none.
    let defects = d.write("d.csv", &Parts::new(N).defect_predictions(10, 0));
    let a = d
        .run(
            &alice,
            &[
                "submit",
                "qcv",
                "--target",
                "defect",
                "--predictions",
                &defects,
                "--json",
            ],
        )
        .ok()
        .json();
    assert!(a["units"].is_null(), "{a}");
}
