//! The client commands that need no daemon, through the real binary: help texts, `split`,
//! `create --preview`, and the exit code for an unreachable daemon.

mod common;

use common::{Parts, csv_ids, dead_url, holdout, run};

#[test]
fn help_states_the_assumptions_and_defaults() {
    for cmd in ["create", "submit"] {
        let h = run(holdout(), &[cmd, "--help"]).ok();
        for needle in ["statistical", "i.i.d.", "sharing", "labels"] {
            assert!(
                h.stdout.contains(needle),
                "{cmd} --help lacks {needle:?}:\n{}",
                h.stdout
            );
        }
    }
    let create = run(holdout(), &["create", "--help"]).ok().stdout;
    for default in [
        "[default: 0.05]",
        "[default: series]",
        "[default: rounded:0.01]",
        "[default: id]",
    ] {
        assert!(
            create.contains(default),
            "create --help lacks {default}:\n{create}"
        );
    }
    let split = run(holdout(), &["split", "--help"]).ok().stdout;
    assert!(
        split.contains("independent") && split.contains("own budget"),
        "{split}"
    );
    let top = run(holdout(), &["--help"]).ok().stdout;
    for cmd in [
        "create", "split", "ids", "validate", "submit", "status", "history", "list", "close",
        "user", "whoami",
    ] {
        assert!(top.contains(cmd), "--help does not list {cmd}");
    }
}

#[test]
fn unreachable_daemon_exits_6_naming_the_url() {
    let url = dead_url();
    let r = run(holdout(), &["list", "--server", &url]).code(6);
    assert!(
        r.stderr.starts_with("error: ") && r.stderr.contains(&url),
        "{}",
        r.stderr
    );
    let mut cmd = holdout();
    cmd.env("HOLDOUT_SERVER", &url).env("HOLDOUT_TOKEN", "t");
    run(cmd, &["whoami"]).code(6);
    run(holdout(), &["list", "--server", "http://[not a url"]).code(2);
}

#[test]
fn create_preview_needs_no_daemon_and_bad_labels_are_named() {
    let dir = tempfile::tempdir().expect("tempdir");
    let labels = dir.path().join("labels.csv");
    std::fs::write(&labels, Parts::new(300).labels_csv()).expect("write");
    let labels = labels.display().to_string();
    let url = dead_url();
    let p = run(
        holdout(),
        &[
            "create",
            "qc",
            "--labels",
            &labels,
            "--target",
            "defect:defect:error",
            "--classes",
            "crack,dent,ok",
            "--target",
            "cost:cost:sq_error:400",
            "--preview",
            "--server",
            &url,
        ],
    )
    .ok();
    assert!(p.stdout.contains("300"), "{}", p.stdout);
    assert!(p.stdout.contains("nothing was sent"), "{}", p.stdout);
    // Without --preview the same command needs the daemon.
    run(
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
            "--server",
            &url,
        ],
    )
    .code(6);
    // Labels outside the declared classes are named by line and id, before connecting.
    let r = run(
        holdout(),
        &[
            "create",
            "qc",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--label-column",
            "defect",
            "--classes",
            "ok,dent",
            "--server",
            &url,
        ],
    )
    .code(2);
    assert!(
        r.stderr.contains("labels.csv:") && r.stderr.contains("crack"),
        "{}",
        r.stderr
    );
    // Non-numeric labels for a numeric metric.
    let r = run(
        holdout(),
        &[
            "create",
            "qc",
            "--labels",
            &labels,
            "--target",
            "d:defect:abs_error:5",
            "--server",
            &url,
        ],
    )
    .code(2);
    assert!(r.stderr.contains("labels.csv:2"), "{}", r.stderr);
    // A missing labels file; a missing column; a malformed target.
    run(
        holdout(),
        &[
            "create",
            "qc",
            "--labels",
            "/nonexistent/l.csv",
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--server",
            &url,
        ],
    )
    .code(2);
    let r = run(
        holdout(),
        &[
            "create", "qc", "--labels", &labels, "--metric", "error", "--server", &url,
        ],
    )
    .code(2);
    assert!(r.stderr.contains("no column `label`"), "{}", r.stderr);
    run(
        holdout(),
        &[
            "create", "qc", "--labels", &labels, "--target", "x:defect", "--server", &url,
        ],
    )
    .code(2);
}

#[test]
fn split_through_the_binary() {
    let dir = tempfile::tempdir().expect("tempdir");
    let parts = Parts::new(500);
    let input = dir.path().join("all.csv");
    std::fs::write(&input, parts.labels_csv()).expect("write");
    let input = input.display().to_string();
    let out = dir.path().join("out");
    let out_s = out.display().to_string();
    let r = run(
        holdout(),
        &[
            "split",
            &input,
            "--into",
            "dev=0.5",
            "--into",
            "final=0.5",
            "--seed",
            "3",
            "--out-dir",
            &out_s,
        ],
    )
    .ok();
    assert!(
        r.stdout.contains("dev") && r.stdout.contains("final"),
        "{}",
        r.stdout
    );
    let (a, b) = (
        csv_ids(&out.join("dev.csv")),
        csv_ids(&out.join("final.csv")),
    );
    assert_eq!(a.len() + b.len(), 500);
    assert!(a.iter().all(|id| !b.contains(id)), "parts overlap");
    assert!(
        !out.join("rest.csv").exists(),
        "fractions summing to 1 leave no rest"
    );
    let header = std::fs::read_to_string(out.join("dev.csv")).expect("read");
    assert!(
        header.starts_with("id,defect,cost\n"),
        "same columns as the input"
    );
    // Existing files are not replaced without --force; with it, the same seed gives the same file.
    let before = std::fs::read(out.join("dev.csv")).expect("read");
    run(
        holdout(),
        &[
            "split",
            &input,
            "--into",
            "dev=0.5",
            "--into",
            "final=0.5",
            "--seed",
            "3",
            "--out-dir",
            &out_s,
        ],
    )
    .code(2);
    run(
        holdout(),
        &[
            "split",
            &input,
            "--into",
            "dev=0.5",
            "--into",
            "final=0.5",
            "--seed",
            "3",
            "--out-dir",
            &out_s,
            "--force",
        ],
    )
    .ok();
    assert_eq!(std::fs::read(out.join("dev.csv")).expect("read"), before);
    // Bad fractions and inputs.
    for bad in [
        ["a=0.6", "b=0.6"],
        ["a=0", "b=0.5"],
        ["a=1.2", "b=0.1"],
        ["a=x", "b=0.1"],
        ["a=0.5", "a=0.5"],
    ] {
        run(
            holdout(),
            &[
                "split",
                &input,
                "--into",
                bad[0],
                "--into",
                bad[1],
                "--out-dir",
                &out_s,
                "--force",
            ],
        )
        .code(2);
    }
    run(holdout(), &["split", "/nonexistent.csv", "--into", "a=0.5"]).code(2);
    run(
        holdout(),
        &[
            "split",
            &input,
            "--into",
            "a=0.5",
            "--stratify",
            "colour",
            "--out-dir",
            &out_s,
            "--force",
        ],
    )
    .code(2);
}

#[test]
fn a_non_loopback_listen_without_tls_is_refused_unless_allowed() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("h.db").display().to_string();
    let r = run(holdout(), &["serve", "--db", &db, "--listen", "0.0.0.0:0"]).code(2);
    assert!(
        r.stderr.contains("not a loopback address")
            && r.stderr.contains("--allow-plaintext-network"),
        "{}",
        r.stderr
    );
}

/// `user add --token-out FILE` makes the file before asking the daemon (a path that cannot be
/// written costs no user), and removes it again when no user was added: the same command then
/// runs as written once the daemon answers (found by a new user whose daemon was not up yet).
#[test]
fn a_failed_user_add_leaves_no_token_file_behind() {
    let dir = tempfile::tempdir().expect("tempdir");
    let token = dir.path().join("ines.token");
    let token_arg = token.display().to_string();
    let url = dead_url();
    let args = [
        "user",
        "add",
        "ines",
        "--role",
        "analyst",
        "--team",
        "north",
        "--token-out",
        &token_arg,
        "--server",
        &url,
    ];
    let failed = run(holdout(), &args).code(6);
    assert!(failed.stderr.contains("cannot reach"), "{}", failed.stderr);
    assert!(!token.exists(), "an empty token file was left behind");
    // An existing file is still never overwritten.
    std::fs::write(&token, "kept").unwrap();
    let refused = run(holdout(), &args).code(2);
    assert!(
        refused.stderr.contains("must not exist"),
        "{}",
        refused.stderr
    );
    assert_eq!(std::fs::read_to_string(&token).unwrap(), "kept");
}

/// `plan --metric` plans with the interval method `create` gives that metric (a regression
/// user tried `plan --metric abs_error:350` first): the same table as `--method kl`, and for
/// `error` the same as the default exact method; a bad metric is named.
#[test]
fn plan_takes_the_metric_as_create_does() {
    let base = ["plan", "--rows", "142", "--tolerance", "0.15", "--json"];
    let with = |extra: &[&str]| {
        let mut args = base.to_vec();
        args.extend_from_slice(extra);
        run(holdout(), &args).ok().stdout
    };
    let by_metric = with(&["--metric", "abs_error:350"]);
    assert_eq!(by_metric, with(&["--method", "kl"]));
    assert_ne!(by_metric, with(&["--method", "exact"]));
    assert_eq!(with(&["--metric", "error"]), with(&[]));
    let mut bad = base.to_vec();
    bad.extend_from_slice(&["--metric", "nonsense"]);
    let refused = run(holdout(), &bad).code(2);
    assert!(
        refused.stderr.contains("unknown metric"),
        "{}",
        refused.stderr
    );
}

/// `plan --classes C` counts the release of a target's class counts (issue 18): fewer queries
/// fit than without it, the text names its code (34.180 nats for 180 rows and 10 classes,
/// Python 3 `math.log(math.comb(189, 9))`), and it is refused with `--teams` (the fair table
/// does not count it) and below two classes.
#[test]
fn plan_counts_the_class_counts_release() {
    let base = ["plan", "--rows", "180", "--tolerance", "0.45"];
    let json = |extra: &[&str]| {
        let mut args = base.to_vec();
        args.push("--json");
        args.extend_from_slice(extra);
        let out: serde_json::Value =
            serde_json::from_str(&run(holdout(), &args).ok().stdout).expect("plan --json");
        out.as_array()
            .expect("rows")
            .iter()
            .map(|r| r["queries"].as_f64().expect("queries"))
            .collect::<Vec<f64>>()
    };
    let (plain, counted) = (json(&[]), json(&["--classes", "10"]));
    assert_eq!(plain.len(), counted.len());
    assert!(
        plain.iter().zip(&counted).all(|(p, c)| c < p),
        "{plain:?} vs {counted:?}"
    );
    let mut text = base.to_vec();
    text.extend_from_slice(&["--classes", "10"]);
    let shown = run(holdout(), &text).ok().stdout;
    assert!(shown.contains("34.180 for 180 rows"), "{shown}");
    let mut fair = base.to_vec();
    fair.extend_from_slice(&["--classes", "10", "--teams", "3", "--answers-each", "5"]);
    run(holdout(), &fair).code(2);
    let mut one = base.to_vec();
    one.extend_from_slice(&["--classes", "1"]);
    run(holdout(), &one).code(2);
}
