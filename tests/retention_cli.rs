//! Retention and shredding through the real daemon and CLI (issue 16): `create
//! --keep-predictions`, an auditor's export carrying the kept files, `audit --labels` re-scoring
//! them, `shred` refused while open and to non-custodians, and the audit after a shred.

mod common;

use common::{Daemon, Parts, holdout, run};

const N: usize = 400;

#[test]
fn kept_files_travel_in_the_export_and_shredded_labels_need_the_custodians_copy() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    let labels = d.write("labels.csv", &parts.labels_csv());
    d.admin(&[
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
        "--tolerance",
        "0.2",
        "--keep-predictions",
        "30",
        "--json",
    ])
    .ok();
    // Out of range: refused by the CLI, naming the flag.
    let refused = d
        .admin(&[
            "create",
            "qc2",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
            "--keep-predictions",
            "36501",
        ])
        .code(2);
    assert!(
        refused.stderr.contains("--keep-predictions"),
        "{}",
        refused.stderr
    );

    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let auditor = d.add_user("ann", &["auditor"], None);
    let organizer = d.add_user("olga", &["organizer"], None);
    for (i, every) in [10, 7].into_iter().enumerate() {
        let p = d.write(&format!("p{i}.csv"), &parts.defect_predictions(every, i));
        d.run(&alice, &["submit", "qc", "--predictions", &p, "--json"])
            .ok();
    }

    let export = d.path("qc.export.jsonl").display().to_string();
    d.run(&auditor, &["export", "qc", "--out", &export]).ok();
    let text = std::fs::read_to_string(&export).unwrap();
    assert_eq!(
        text.lines().filter(|l| l.starts_with("{\"kept\":")).count(),
        2
    );
    let audited = run(holdout(), &["audit", &export, "--labels", &labels]).ok();
    assert!(
        audited
            .stdout
            .contains("retention  files kept 30 days; 2 kept files carried"),
        "{}",
        audited.stdout
    );
    assert!(
        audited
            .stdout
            .contains("rescored   2 kept files against the labels"),
        "{}",
        audited.stdout
    );
    let json = run(
        holdout(),
        &["audit", &export, "--labels", &labels, "--json"],
    )
    .ok()
    .json();
    assert_eq!(json["clean"], true);
    assert_eq!(
        json["retention"]["rescored"].as_array().map(Vec::len),
        Some(2)
    );

    // Offline on the database file: its own labels re-score the kept files.
    let db = d.path("holdout.db").display().to_string();
    let offline = run(holdout(), &["audit", "qc", "--db", &db]).ok();
    assert!(
        offline
            .stdout
            .contains("rescored   2 kept files against the labels"),
        "{}",
        offline.stdout
    );

    // Shred: refused while open, and to an analyst or an organizer.
    let open = d.admin(&["shred", "qc"]).code(7);
    assert!(open.stderr.contains("is open"), "{}", open.stderr);
    d.run(&alice, &["shred", "qc"]).code(4);
    d.run(&organizer, &["close", "qc", "--reason", "done"]).ok();
    d.run(&organizer, &["shred", "qc"]).code(4);
    let shred = d
        .admin(&["shred", "qc", "--reason", "agreement ended"])
        .ok();
    assert!(
        shred.stdout.contains("were deleted from the store"),
        "{}",
        shred.stdout
    );

    let after = d.path("after.export.jsonl").display().to_string();
    d.run(&auditor, &["export", "qc", "--out", &after]).ok();
    let plain = run(holdout(), &["audit", &after]).ok();
    assert!(
        plain.stdout.contains("labels     shredded at entry"),
        "{}",
        plain.stdout
    );
    assert!(
        plain.stdout.contains("rescored   0 of 2 kept files"),
        "{}",
        plain.stdout
    );
    // The database no longer holds the labels: not a finding, and said.
    let offline = run(holdout(), &["audit", "qc", "--db", &db]).ok();
    assert!(
        offline.stdout.contains("labels     shredded at entry"),
        "{}",
        offline.stdout
    );
    assert!(
        offline.stdout.contains("rescored   0 of 2 kept files"),
        "{}",
        offline.stdout
    );
    let with_copy = run(holdout(), &["audit", &after, "--labels", &labels]).ok();
    assert!(
        with_copy
            .stdout
            .contains("rescored   2 kept files against the labels"),
        "{}",
        with_copy.stdout
    );
}

/// The daemon's default retention (`serve --keep-predictions-days`, also a configuration-file
/// key) applies to a create that does not ask for one; `--keep-predictions 0` asks for digests
/// only; the genesis entry states what each holdout got.
#[test]
fn the_daemons_default_retention_applies_to_creates_that_do_not_choose() {
    let d = Daemon::start_with(&["--keep-predictions-days", "9"]);
    let create = |name: &str, rows: usize, extra: &[&str]| {
        // Rows and labels of their own for each holdout (a set of labels gets one budget).
        let labels = d.write(
            &format!("{name}.labels.csv"),
            &Parts::new(rows)
                .labels_csv()
                .replace("part-", &format!("{name}-")),
        );
        let mut args = vec![
            "create",
            name,
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
            "--tolerance",
            "0.2",
        ];
        args.extend_from_slice(extra);
        d.admin(&args).ok();
    };
    create("by-default", N, &[]);
    create("digests", N + 1, &["--keep-predictions", "0"]);
    create("own", N + 2, &["--keep-predictions", "2"]);
    let auditor = d.add_user("ann", &["auditor"], None);
    for (name, want) in [
        ("by-default", r#"{"days":9,"predictions":"kept"}"#),
        ("digests", r#"{"predictions":"digests"}"#),
        ("own", r#"{"days":2,"predictions":"kept"}"#),
    ] {
        let export = d.path(&format!("{name}.jsonl")).display().to_string();
        d.run(&auditor, &["export", name, "--out", &export]).ok();
        let text = std::fs::read_to_string(&export).unwrap();
        let genesis: serde_json::Value = text
            .lines()
            .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
            .find(|e| e["kind"] == "genesis")
            .expect("a genesis entry");
        let body: serde_json::Value =
            serde_json::from_str(genesis["body"].as_str().unwrap()).unwrap();
        assert_eq!(body["retention"].to_string(), want, "{name}");
    }
}
