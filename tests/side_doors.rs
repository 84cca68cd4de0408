//! Channels outside the accounting (DESIGN 4.2 rules 6 and 7), through the real daemon and CLI:
//! nothing an analyst or an organizer can read carries an entry's salt, and under `isolated` a
//! team's view does not depend on whether another team submitted in between.

mod common;

use common::{Daemon, Parts};
use serde_json::Value;

const N: usize = 400;

fn create(d: &Daemon, name: &str, extra: &[&str]) {
    let labels = d.write(&format!("{name}-labels.csv"), &Parts::new(N).labels_csv());
    let rule = if extra.contains(&"--answers") {
        &[][..]
    } else {
        &["--answers", "rounded:0.05"][..]
    };
    let mut args = vec![
        "create",
        name,
        "--labels",
        &labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--tolerance",
        "0.4",
        "--description",
        "invented inspection data",
        "--json",
    ];
    args.extend_from_slice(rule);
    args.extend_from_slice(extra);
    d.admin(&args).ok();
}

/// Every salt of an auditor's export of `name`.
fn export_salts(d: &Daemon, auditor: &str, name: &str) -> Vec<String> {
    let out = d.path(&format!("{name}.jsonl"));
    let out = out.display().to_string();
    d.run(auditor, &["export", name, "--out", &out]).ok();
    let text = std::fs::read_to_string(&out).expect("export file");
    let salts: Vec<String> = text
        .lines()
        .skip(1)
        .map(|l| {
            let v: Value = serde_json::from_str(l).expect("export line");
            v["salt"]
                .as_str()
                .expect("every entry has a salt")
                .to_string()
        })
        .collect();
    assert!(salts.len() > 5, "the export holds the entries");
    salts
}

#[test]
fn no_salt_reaches_analysts_or_organizers() {
    let d = Daemon::start();
    create(&d, "shelf", &["--schedule", "even:4"]);
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let bob = d.add_user("bob", &["analyst"], Some("red"));
    let olga = d.add_user("olga", &["organizer"], None);
    let audrey = d.add_user("audrey", &["auditor"], None);
    let parts = Parts::new(N);

    // Everything the analysts and the organizer read goes into `seen`.
    let mut seen = Vec::new();
    let mut answers = Vec::new();
    for (i, who) in [&alice, &bob, &alice, &bob, &alice].iter().enumerate() {
        let f = d.write(&format!("p{i}.csv"), &parts.defect_predictions(3 + i, 0));
        let json = d.run(who, &["submit", "shelf", "--predictions", &f, "--json"]);
        seen.push(json.stdout.clone());
        answers.push(json.stdout);
        let g = d.write(&format!("q{i}.csv"), &parts.defect_predictions(3 + i, 1));
        seen.push(d.run(who, &["submit", "shelf", "--predictions", &g]).stdout);
    }
    assert!(
        answers.last().unwrap().contains("budget-spent"),
        "even:4 refuses the later queries: {}",
        answers.last().unwrap()
    );
    for who in [&alice, &bob, &olga] {
        for args in [
            &["history", "shelf", "--json"][..],
            &["history", "shelf"],
            &["status", "shelf", "--json"],
            &["status", "shelf"],
            &["list", "--json"],
            &["checkpoint", "shelf", "--out", "-"],
        ] {
            seen.push(d.run(who, args).ok().stdout);
        }
    }
    // A certificate is made by an auditor to be handed to others.
    seen.push(
        d.run(&audrey, &["certify", "shelf", "--query", "1"])
            .ok()
            .stdout,
    );
    seen.push(
        d.run(&audrey, &["certify", "shelf", "--query", "2", "--json"])
            .ok()
            .stdout,
    );

    let salts = export_salts(&d, &audrey, "shelf");
    let seen = seen.join("\n");
    assert!(seen.len() > 5_000, "the views were read");
    for salt in &salts {
        assert!(
            !seen.contains(salt.as_str()),
            "salt {salt} of the auditor's export is readable by analysts or organizers"
        );
    }
    assert!(!seen.contains("\"salt\""), "no view has a salt field");

    // A receipt kept with its answer still proves the answer is in the ledger unchanged.
    let first: Value = serde_json::from_str(&answers[0]).expect("answer JSON");
    assert!(first["receipt"].get("entry").is_none(), "{first}");
    assert_eq!(first["receipt"]["query"], 1);
    let kept = d.write("kept.json", &answers[0]);
    let export = d.path("shelf.jsonl").display().to_string();
    d.run(&audrey, &["audit", &export, "--receipt", &kept]).ok();
    let mut forged = first.clone();
    forged["symbol"] = Value::String("0.05".into());
    if forged["symbol"] == first["symbol"] {
        forged["symbol"] = Value::String("0.95".into());
    }
    let forged = d.write("forged.json", &forged.to_string());
    let report = d
        .run(&audrey, &["audit", &export, "--receipt", &forged])
        .code(8);
    assert!(report.stdout.contains("receipt"), "{}", report.stdout);
}

/// A team's view, with times and per-run random values (salted hashes) taken out.
fn masked(v: &mut Value) {
    match v {
        Value::Object(map) => {
            for (k, x) in map.iter_mut() {
                if matches!(
                    k.as_str(),
                    "at" | "created_at" | "entry_hash" | "genesis_hash" | "quota_resets_at"
                ) {
                    *x = Value::String("*".into());
                } else {
                    masked(x);
                }
            }
        }
        Value::Array(items) => items.iter_mut().for_each(masked),
        _ => {}
    }
}

fn blue_view(with_red: bool, rule: &[&str]) -> Vec<Value> {
    let d = Daemon::start();
    let mut args = vec![
        "--sharing",
        "isolated",
        "--shares",
        "roster:blue,red",
        "--leaderboard",
        "organizers",
    ];
    args.extend_from_slice(rule);
    create(&d, "bench", &args);
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let bob = d.add_user("bob", &["analyst"], Some("red"));
    let parts = Parts::new(N);
    let mut view = Vec::new();
    let blue = |i: usize, view: &mut Vec<Value>| {
        let f = d.write(&format!("blue{i}.csv"), &parts.defect_predictions(4 + i, 0));
        view.push(
            d.run(&alice, &["submit", "bench", "--predictions", &f, "--json"])
                .json(),
        );
    };
    blue(0, &mut view);
    if with_red {
        for i in 0..3 {
            let f = d.write(&format!("red{i}.csv"), &parts.defect_predictions(2 + i, 1));
            d.run(&bob, &["submit", "bench", "--predictions", &f, "--json"])
                .ok();
        }
    }
    blue(1, &mut view);
    blue(2, &mut view);
    view.extend(
        d.run(&alice, &["history", "bench", "--json"])
            .ok()
            .json_lines(),
    );
    view.push(d.run(&alice, &["status", "bench", "--json"]).ok().json());
    view.push(d.run(&alice, &["list", "--json"]).ok().json());
    // A checkpoint counts every team's entries: refused to a team of an isolated holdout.
    let cp = d
        .run(&alice, &["checkpoint", "bench", "--out", "-"])
        .code(4);
    assert!(cp.stderr.contains("isolated"), "{}", cp.stderr);
    view.iter_mut().for_each(masked);
    view
}

#[test]
fn isolated_team_view_is_the_same_whether_or_not_another_team_submitted() {
    for rule in [&[][..], &["--answers", "sealed:0.05"][..]] {
        let alone = blue_view(false, rule);
        let with_red = blue_view(true, rule);
        assert_eq!(alone.len(), with_red.len());
        for (a, b) in alone.iter().zip(&with_red) {
            assert_eq!(a, b, "{rule:?}: blue's view depends on red's activity");
        }
        // The view is not trivially empty: three answers or entries numbered 1, 2, 3 for blue.
        let queries: Vec<u64> = alone[..3]
            .iter()
            .map(|a| a["query"].as_u64().expect("an answer"))
            .collect();
        assert_eq!(queries, [1, 2, 3], "{rule:?}");
    }
}
