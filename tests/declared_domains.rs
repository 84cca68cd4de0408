//! The label domain is a declaration (DESIGN 4.2 rules 1 and 7): an `error` target's classes are
//! stated by the custodian, never read from the labels, so nothing an analyst can read reveals
//! which classes occur (for example that a rare class is absent).

mod common;

use common::{Daemon, dead_url, holdout, run};
use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
use holdout_ledger::proto::v1::{
    self as pb, CreateHoldoutChunk, HoldoutSpec, LabelColumn, LabelRows, ListHoldoutsRequest,
    create_holdout_chunk,
};
use serde_json::Value;

const N: usize = 60;
const CLASSES: &str = "cat,dog,eel";

/// Labels cycling cat/dog; with `rare`, row 17 is the one `eel`.
fn labels(rare: bool) -> String {
    let mut s = String::from("id,label\n");
    for i in 0..N {
        let y = if rare && i == 17 {
            "eel"
        } else if i % 3 == 0 {
            "dog"
        } else {
            "cat"
        };
        s.push_str(&format!("a{i:03},{y}\n"));
    }
    s
}

fn predictions(with: &str) -> String {
    let mut s = String::from("id,prediction\n");
    for i in 0..N {
        let p = if i == 5 { with } else { "cat" };
        s.push_str(&format!("a{i:03},{p}\n"));
    }
    s
}

/// Everything an analyst of holdout `h` can read, as (what, exit code, stdout, stderr), with the
/// fields that differ between two daemons whatever the labels (times, hashes) removed.
fn analyst_view(d: &Daemon) -> Vec<(String, i32, String, String)> {
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    d.write("undeclared.csv", &predictions("fox"));
    d.write("rare.csv", &predictions("eel"));
    let mut out = Vec::new();
    for args in [
        vec!["ids", "h", "--out", "template.csv", "--json"],
        vec!["ids", "h", "--out", "template2.csv"],
        vec!["validate", "h", "--predictions", "undeclared.csv", "--json"],
        vec!["validate", "h", "--predictions", "rare.csv", "--json"],
        vec!["validate", "h", "--predictions", "undeclared.csv"],
        vec!["submit", "h", "--predictions", "undeclared.csv", "--json"],
        vec![
            "submit",
            "h",
            "--predictions",
            "rare.csv",
            "--dry-run",
            "--json",
        ],
        vec!["status", "h", "--json"],
        vec!["list", "--json"],
    ] {
        let r = d.run(&alice, &args);
        out.push((args.join(" "), r.code, scrub(&r.stdout), r.stderr));
    }
    let template = std::fs::read_to_string(d.path("template.csv")).expect("template");
    out.push(("template.csv".into(), 0, template, String::new()));
    out
}

/// Drops the fields that differ between two daemons whatever their labels.
fn scrub(stdout: &str) -> String {
    fn walk(v: &mut Value) {
        match v {
            Value::Object(m) => {
                for k in ["genesis_hash", "created_at", "at"] {
                    m.remove(k);
                }
                m.values_mut().for_each(walk);
            }
            Value::Array(a) => a.iter_mut().for_each(walk),
            _ => {}
        }
    }
    match serde_json::from_str::<Value>(stdout.trim()) {
        Ok(mut v) => {
            walk(&mut v);
            v.to_string()
        }
        Err(_) => stdout.to_string(),
    }
}

#[test]
fn error_targets_need_declared_classes_and_a_rare_class_leaves_no_trace() {
    let with = Daemon::start();
    let without = Daemon::start();
    let mut refusals = Vec::new();
    for (d, rare) in [(&with, true), (&without, false)] {
        let file = d.write("labels.csv", &labels(rare));
        // Without --classes: refused before anything is sent, naming the missing declaration.
        let r = d.admin(&["create", "h", "--labels", &file, "--metric", "error"]);
        assert_eq!(r.code, 2, "{}", r.stderr);
        assert!(
            r.stderr.contains("--classes") && r.stderr.contains("declared classes"),
            "{}",
            r.stderr
        );
        refusals.push((r.code, r.stdout, r.stderr));
        assert_eq!(
            d.admin(&["list", "--json"]).ok().json(),
            serde_json::json!([])
        );
        d.admin(&[
            "create",
            "h",
            "--labels",
            &file,
            "--metric",
            "error",
            "--classes",
            CLASSES,
            "--tolerance",
            "0.5",
        ])
        .ok();
    }
    // The custodian's refusal is the same whichever classes occur (today's main accepted both,
    // declaring cat,dog,eel for one and cat,dog for the other).
    assert_eq!(refusals[0], refusals[1]);
    let a = analyst_view(&with);
    let b = analyst_view(&without);
    assert_eq!(a.len(), b.len());
    for (x, y) in a.iter().zip(&b) {
        assert_eq!(
            x, y,
            "an analyst's view differs between labels with and without the rare class"
        );
    }
    // The comparison is not vacuous: the undeclared class is refused by name, the rare one is
    // accepted, and the declaration lists it.
    let find = |what: &str| a.iter().find(|x| x.0 == what).expect(what).clone();
    let undeclared = find("validate h --predictions undeclared.csv --json");
    assert_eq!(undeclared.1, 2);
    assert!(undeclared.3.contains("\"fox\""), "{}", undeclared.3);
    assert!(undeclared.3.contains("cat,dog,eel"), "{}", undeclared.3);
    assert_eq!(find("validate h --predictions rare.csv --json").1, 0);
    assert!(find("ids h --out template.csv --json").2.contains("eel"));
}

#[test]
fn cli_refuses_labels_outside_the_declaration_without_echoing_huge_values() {
    let dir = tempfile::tempdir().expect("tempdir");
    let huge = "z".repeat(50_000);
    let mut text = labels(false);
    text.push_str(&format!("a999,{huge}\n"));
    let file = dir.path().join("labels.csv");
    std::fs::write(&file, text).expect("write");
    let r = run(
        holdout(),
        &[
            "create",
            "h",
            "--labels",
            &file.display().to_string(),
            "--metric",
            "error",
            "--classes",
            CLASSES,
            "--server",
            &dead_url(),
        ],
    );
    assert_eq!(r.code, 2, "refused before connecting: {}", r.stderr);
    assert!(
        r.stderr.contains("a999") && r.stderr.contains("target label"),
        "{}",
        r.stderr
    );
    assert!(
        r.stderr.contains("50000 bytes") && r.stderr.len() < 400,
        "{}",
        r.stderr
    );
}

fn spec(classes: &[&str]) -> HoldoutSpec {
    HoldoutSpec {
        name: "h".into(),
        policy: Some(pb::Policy {
            delta: 0.05,
            answers: "rounded:0.01".into(),
            tolerance: 0.5,
            ..Default::default()
        }),
        targets: vec![pb::Target {
            name: "kind".into(),
            column: "label".into(),
            metric: "error".into(),
            method: "exact".into(),
            classes: classes.iter().map(|c| c.to_string()).collect(),
        }],
        ..Default::default()
    }
}

fn chunks(spec: HoldoutSpec, ids: &[String], values: &[String]) -> Vec<CreateHoldoutChunk> {
    vec![
        CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Spec(spec)),
        },
        CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Rows(LabelRows {
                ids: ids.to_vec(),
                columns: vec![LabelColumn {
                    values: values.to_vec(),
                }],
            })),
        },
    ]
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn the_daemon_refuses_missing_classes_and_undeclared_labels_storing_nothing() {
    let d = Daemon::start();
    let conn = Conn::open(&ServerArgs {
        server: d.url.clone(),
        token: Some(d.admin.clone()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect");
    let ids: Vec<String> = (0..N).map(|i| format!("a{i:03}")).collect();
    let mut values: Vec<String> = (0..N)
        .map(|i| if i % 2 == 0 { "cat" } else { "dog" }.to_string())
        .collect();

    // No classes in the request: refused, naming the target and the missing declaration.
    let err = conn
        .holdouts()
        .create_holdout(tokio_stream::iter(chunks(spec(&[]), &ids, &values)))
        .await
        .expect_err("no classes");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err:?}");
    assert!(
        err.message().contains("classes of target kind")
            && err.message().contains("declared classes"),
        "{}",
        err.message()
    );

    // A label outside the declared domain, huge: refused naming the target and the row id,
    // without the value whole.
    values[7] = "q".repeat(100_000);
    let err = conn
        .holdouts()
        .create_holdout(tokio_stream::iter(chunks(
            spec(&["cat", "dog"]),
            &ids,
            &values,
        )))
        .await
        .expect_err("undeclared label");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err:?}");
    assert!(
        err.message().contains("target kind") && err.message().contains("a007"),
        "{}",
        err.message()
    );
    assert!(err.message().len() < 400, "{}", err.message());

    // Nothing was stored: no holdout, and the same name and rows are still free.
    let listed = conn
        .holdouts()
        .list_holdouts(ListHoldoutsRequest {
            include_closed: true,
        })
        .await
        .expect("list")
        .into_inner();
    assert!(listed.holdouts.is_empty(), "{listed:?}");
    values[7] = "cat".into();
    let info = conn
        .holdouts()
        .create_holdout(tokio_stream::iter(chunks(
            spec(&["cat", "dog", "eel"]),
            &ids,
            &values,
        )))
        .await
        .expect("create with a declaration")
        .into_inner();
    assert_eq!(info.targets[0].classes, ["cat", "dog", "eel"]);
}
