//! Budget alerts through the real daemon: a configured share of the budget crossed runs the
//! configured command once, with the holdout's name and released figures as arguments.

mod common;

use std::time::{Duration, Instant};

use common::{Daemon, Parts};

const N: usize = 2000;

#[cfg(unix)]
#[test]
fn a_crossed_budget_share_runs_the_command_exactly_once() {
    use std::os::unix::fs::PermissionsExt;
    let scratch = tempfile::tempdir().unwrap();
    let fired = scratch.path().join("fired.txt");
    let script = scratch.path().join("alert.sh");
    std::fs::write(
        &script,
        format!("#!/bin/sh\necho \"$@\" >> '{}'\n", fired.display()),
    )
    .unwrap();
    std::fs::set_permissions(&script, std::fs::Permissions::from_mode(0o755)).unwrap();
    let d = Daemon::start_with(&[
        "--alert-share",
        "0.6",
        "--alert-command",
        &script.display().to_string(),
    ]);
    let parts = Parts::new(N);
    let labels = d.write("labels.csv", &parts.labels_csv());
    d.admin(&[
        "create",
        "bays",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
        "--answers",
        "rounded:0.05",
        "--tolerance",
        "0.5",
    ])
    .ok();
    let analyst = d.add_user("ana", &["analyst"], Some("north"));
    // Under `series` query i is charged delta/(i(i+1)): after query 1 half the budget is
    // spent (below 0.6), after query 2 two thirds (the crossing), then more.
    let mut spent = Vec::new();
    for q in 0..5 {
        let preds = d.write(&format!("p{q}.csv"), &parts.defect_predictions(7 + q, 0));
        let out = d
            .run(
                &analyst,
                &["submit", "bays", "--predictions", &preds, "--json"],
            )
            .ok()
            .json();
        spent.push(out["budget"]["spent"].as_f64().unwrap());
        if q == 0 {
            // Nothing yet: wait a moment to be sure nothing fires below the share.
            std::thread::sleep(Duration::from_millis(300));
            assert!(!fired.exists(), "fired below the share (spent {spent:?})");
        }
    }
    assert!(spent[0] < 0.6 * 0.05 && spent[1] >= 0.6 * 0.05, "{spent:?}");
    // The command runs detached: wait for its line, then a moment for any second one.
    let deadline = Instant::now() + Duration::from_secs(20);
    while !fired.exists() && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(50));
    }
    std::thread::sleep(Duration::from_millis(500));
    let text = std::fs::read_to_string(&fired).unwrap_or_default();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines.len(), 1, "exactly one alert: {text:?}\n{}", d.log());
    let args: Vec<&str> = lines[0].split(' ').collect();
    assert_eq!(args[0], "budget-share");
    assert_eq!(args[1], "bays");
    // Shared holdout: an empty team. Then spent (after query 2), delta, next half-width,
    // tolerance.
    assert_eq!(args.len(), 7, "{args:?}");
    assert_eq!(args[2], "");
    assert_eq!(args[3].parse::<f64>().unwrap(), spent[1]);
    assert_eq!(args[4], "0.05");
    assert_eq!(args[6], "0.5");
    assert!(d.log().contains("budget alert"), "{}", d.log());
    // `status` shows it, to the analyst (shared holdout) and the organizer, text and JSON.
    let status = d.run(&analyst, &["status", "bays", "--json"]).ok().json();
    let alerts = status["alerts"].as_array().unwrap();
    assert_eq!(alerts.len(), 1, "{status}");
    assert_eq!(alerts[0]["kind"], "budget-share");
    assert!(
        alerts[0]["detail"]
            .as_str()
            .unwrap()
            .contains("of delta 0.05 (67%)"),
        "{status}"
    );
    let text = d.admin(&["status", "bays"]).ok().stdout;
    assert!(text.contains("alert      budget-share: spent"), "{text}");
}

#[test]
fn no_alert_without_a_threshold_and_status_lists_none() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    let labels = d.write("labels.csv", &parts.labels_csv());
    d.admin(&[
        "create",
        "bays",
        "--labels",
        &labels,
        "--metric",
        "error",
        "--classes",
        "crack,dent,ok",
        "--label-column",
        "defect",
        "--tolerance",
        "0.5",
    ])
    .ok();
    let analyst = d.add_user("ana", &["analyst"], Some("north"));
    for q in 0..3 {
        let preds = d.write(&format!("p{q}.csv"), &parts.defect_predictions(7 + q, 0));
        d.run(&analyst, &["submit", "bays", "--predictions", &preds])
            .ok();
    }
    let status = d.admin(&["status", "bays", "--json"]).ok().json();
    assert_eq!(status["alerts"], serde_json::json!([]), "{status}");
    assert!(!d.log().contains("budget alert"));
}
