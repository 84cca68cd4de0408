//! Competitions end to end: the real binary against a daemon on port 0, through the CLI.
//! Best-of batches, threshold gates, the ladder leaderboard, a sealed final round with an
//! organizer's close and its ranking, and the duplicate-predictions report.

mod common;

use common::{Daemon, Parts};
use serde_json::Value;

const N: usize = 2000;

fn create(d: &Daemon, name: &str, answers: &str, extra: &[&str]) {
    let parts = Parts::new(N);
    let labels = d.write(&format!("{name}-labels.csv"), &parts.labels_csv());
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
        "--answers",
        answers,
        "--tolerance",
        "0.3",
    ];
    args.extend_from_slice(extra);
    d.admin(&args).ok();
}

/// Predictions wrong on every `every`-th row (error about 1/every).
fn preds(d: &Daemon, file: &str, every: usize, from: usize) -> String {
    d.write(file, &Parts::new(N).defect_predictions(every, from))
}

#[test]
fn a_best_of_answer_names_the_file_and_charges_the_batch_code_once() {
    let d = Daemon::start();
    create(&d, "bo", "best-of:0.01", &[]);
    let hana = d.add_user("hana", &["analyst"], Some("red"));
    let worse = preds(&d, "worse.csv", 4, 0);
    let better = preds(&d, "better.csv", 20, 0);
    let mid = preds(&d, "mid.csv", 10, 0);
    let text = d
        .run(
            &hana,
            &["submit", "bo", "--predictions", &worse, &better, &mid],
        )
        .ok()
        .stdout;
    assert!(text.contains("best model 1 better.csv"), "{text}");
    let again = preds(&d, "again.csv", 8, 1);
    let other = preds(&d, "other.csv", 5, 2);
    let a = d
        .run(
            &hana,
            &["submit", "bo", "--predictions", &again, &other, "--json"],
        )
        .ok()
        .json();
    assert_eq!(a["best_model_name"], "again.csv", "{a}");
    // ln B + ln(M + 1) for the whole batch of B = 2 on a 0.01 grid, once.
    let code = a["code_nats"].as_f64().unwrap();
    assert!((code - (2f64.ln() + 101f64.ln())).abs() < 1e-9, "{code}");
}

#[test]
fn best_per_team_under_rounded_answers_shows_each_team_s_lowest_upper_limit() {
    let d = Daemon::start();
    create(&d, "rb", "rounded:0.01", &[]);
    let red = d.add_user("rae", &["analyst"], Some("red"));
    let blue = d.add_user("bo", &["analyst"], Some("blue"));
    for (token, file) in [
        (&red, preds(&d, "r1.csv", 4, 0)),   // 0.25
        (&blue, preds(&d, "b1.csv", 10, 0)), // 0.10
        (&red, preds(&d, "r2.csv", 5, 0)),   // 0.20: red's best
        (&blue, preds(&d, "b2.csv", 3, 1)),  // about 0.33: not blue's best
    ] {
        d.run(token, &["submit", "rb", "--predictions", &file]).ok();
    }
    let board = d.run(&blue, &["leaderboard", "rb", "--json"]).ok().json();
    assert_eq!(board["kind"], "best-per-team", "{board}");
    let rows = board["rows"].as_array().unwrap();
    let got: Vec<(&str, u64, f64)> = rows
        .iter()
        .map(|r| {
            (
                r["team"].as_str().unwrap(),
                r["query"].as_u64().unwrap(),
                r["best"].as_f64().unwrap(),
            )
        })
        .collect();
    assert_eq!(got, [("blue", 2, 0.1), ("red", 3, 0.2)], "{board}");
    for r in rows {
        let (lo, hi, best) = (
            r["lower"].as_f64().unwrap(),
            r["upper"].as_f64().unwrap(),
            r["best"].as_f64().unwrap(),
        );
        assert!(lo <= best && best <= hi, "{r}");
        assert_eq!(r["submissions"], 2, "{r}");
    }
    // A file written like the labels file is refused with the way out.
    let like_labels = d.write("as-labels.csv", &Parts::new(N).labels_csv());
    let refused = d
        .run(&red, &["submit", "rb", "--predictions", &like_labels])
        .code(2);
    assert!(
        refused
            .stderr
            .contains("looks like the labels file's; predictions are read from a column named `prediction`: rename `defect` to `prediction`, or pass --prediction-column defect"),
        "{}",
        refused.stderr
    );
    let text = d.run(&red, &["leaderboard", "rb"]).ok().stdout;
    assert!(text.contains("best per team on rb"), "{text}");
    assert!(text.contains("query 3"), "{text}");
    assert!(text.contains("lowest upper limit"), "{text}");
}

#[test]
fn under_a_roster_the_budget_names_whose_share_it_is() {
    let d = Daemon::start();
    let parts = Parts::new(N);
    let labels = d.write("roster-labels.csv", &parts.labels_csv());
    let created = d
        .admin(&[
            "create",
            "ro",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "crack,dent,ok",
            "--label-column",
            "defect",
            "--answers",
            "rounded:0.01",
            "--tolerance",
            "0.3",
            "--shares",
            "roster:red,blue",
        ])
        .ok()
        .stdout;
    // The creator is in no team: no pool of nobody ("spent 0 of delta 0 ... half-width 1").
    assert!(
        created.contains("delta      0.05 for the whole holdout"),
        "{created}"
    );
    assert!(created.contains("your team has no share"), "{created}");
    assert!(!created.contains("of delta 0,"), "{created}");
    assert!(!created.contains("half-width 1 "), "{created}");
    let red = d.add_user("rae", &["analyst"], Some("red"));
    let status = d.run(&red, &["status", "ro"]).ok().stdout;
    assert!(status.contains("below: team red's share"), "{status}");
    assert!(status.contains("spent 0 of its share 0.025"), "{status}");
    let json = d.run(&red, &["status", "ro", "--json"]).ok().json();
    assert_eq!(json["budget_of"], "red", "{json}");
    assert_eq!(json["no_share"], false, "{json}");
}

#[test]
fn threshold_gates_state_what_a_pass_certifies_and_that_a_fail_certifies_nothing() {
    let d = Daemon::start();
    create(&d, "gate", "threshold:0.2", &[]);
    let hana = d.add_user("hana", &["analyst"], Some("red"));
    let good = preds(&d, "good.csv", 20, 0); // about 5 % wrong: passes 0.2
    let bad = preds(&d, "bad.csv", 2, 0); // about 50 % wrong: fails
    let pass = d
        .run(&hana, &["submit", "gate", "--predictions", &good])
        .ok()
        .stdout;
    assert!(pass.contains("symbol     pass"), "{pass}");
    assert!(pass.contains("the true error is at most 0.2"), "{pass}");
    let fail = d
        .run(&hana, &["submit", "gate", "--predictions", &bad, "--json"])
        .ok()
        .json();
    assert_eq!(fail["symbol"], "fail", "{fail}");
    let statement = fail["statement"].as_str().unwrap();
    assert!(statement.contains("certifies nothing"), "{statement}");
    assert!(fail["guarantee"].as_str().unwrap().contains("1 - 0.05"));
}

#[test]
fn the_ladder_leaderboard_ranks_teams_with_its_guarantee() {
    let d = Daemon::start();
    create(&d, "lad", "ladder:0.01", &[]);
    let red = d.add_user("rae", &["analyst"], Some("red"));
    let red2 = d.add_user("rik", &["analyst"], Some("red"));
    let blue = d.add_user("bo", &["analyst"], Some("blue"));
    let files = [
        (&red, preds(&d, "r1.csv", 4, 0)),   // 0.25
        (&blue, preds(&d, "b1.csv", 10, 0)), // 0.10
        (&red2, preds(&d, "r2.csv", 5, 0)),  // 0.20: red's new best, from a second member
        (&blue, preds(&d, "b2.csv", 9, 1)),  // about 0.11: no improvement
    ];
    for (token, file) in &files {
        d.run(token, &["submit", "lad", "--predictions", file]).ok();
    }
    let board = d.run(&blue, &["leaderboard", "lad", "--json"]).ok().json();
    let rows = board["rows"].as_array().unwrap();
    let teams: Vec<&str> = rows.iter().map(|r| r["team"].as_str().unwrap()).collect();
    assert_eq!(teams, ["blue", "red"], "{board}");
    assert_eq!(rows[0]["best"], 0.1);
    assert_eq!(rows[1]["best"], 0.2);
    assert_eq!(rows[1]["submissions"], 2, "a team is one identity: {board}");
    for r in rows {
        let (lo, hi, best) = (
            r["lower"].as_f64().unwrap(),
            r["upper"].as_f64().unwrap(),
            r["best"].as_f64().unwrap(),
        );
        assert!(lo <= best && best <= hi, "{r}");
    }
    assert!(
        board["statement"]
            .as_str()
            .unwrap()
            .contains("smallest true error among all of that team's submissions"),
        "{board}"
    );
    let csv = d.run(&red, &["leaderboard", "lad", "--csv"]).ok().stdout;
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(lines.len(), 3, "{csv}");
    assert!(lines[0].starts_with("rank,team,best"));
    assert!(lines[1].starts_with("1,blue,0.1,"), "{csv}");
    // The guarantee in one line that names its assumptions and where the full text is; in
    // full with --guarantee.
    let text = d.run(&red, &["leaderboard", "lad"]).ok().stdout;
    assert!(
        text.contains("guarantee  with probability at least 1 - 0.05, these intervals hold")
            && text.contains("i.i.d.")
            && text.contains("In full: --guarantee or `holdout status lad`"),
        "{text}"
    );
    assert!(!text.contains("Assumptions:"), "{text}");
    let full = d
        .run(&red, &["leaderboard", "lad", "--guarantee"])
        .ok()
        .stdout;
    assert!(full.contains("sharing 'shared'"), "{full}");
    // A ladder holdout has no final ranking.
    d.run(&red, &["ranking", "lad"]).code(7);
}

#[test]
fn a_sealed_round_through_the_cli() {
    let d = Daemon::start();
    create(
        &d,
        "final",
        "sealed:0.001",
        &["--closes-at", "2099-01-01T00:00:00Z"],
    );
    let red = d.add_user("rae", &["analyst"], Some("red"));
    let blue = d.add_user("bo", &["analyst"], Some("blue"));
    let green = d.add_user("gil", &["analyst"], Some("green"));
    let r1 = preds(&d, "r1.csv", 10, 0);
    let b1 = preds(&d, "b1.csv", 4, 0);
    let sealed = d
        .run(
            &red,
            &["submit", "final", "--predictions", &r1, "--final", "--json"],
        )
        .ok()
        .json();
    assert_eq!(sealed["sealed"], true, "{sealed}");
    assert_eq!(sealed["marked"], true);
    assert!(sealed.get("score").is_none() && sealed.get("interval").is_none());
    assert!(
        sealed["statement"]
            .as_str()
            .unwrap()
            .contains("deadline 2099-01-01")
    );
    let reply = d
        .run(&blue, &["submit", "final", "--predictions", &b1])
        .ok()
        .stdout;
    // The reply numbers the entry as its receipt and history do.
    assert!(reply.starts_with("sealed entry, query 2 "), "{reply}");
    assert!(reply.contains("query 2"), "{reply}");
    // Green sends blue's file: an identical prediction vector from another team.
    d.run(&green, &["submit", "final", "--predictions", &b1])
        .ok();
    // Before the close: no scores anywhere an analyst looks.
    let status = d.run(&blue, &["status", "final", "--json"]).ok().json();
    assert_eq!(status["budget"]["open"], true);
    // Entries per team and each team's selected entry; no score.
    let teams = status["round"]["teams"].as_array().unwrap();
    let got: Vec<(&str, u64, bool)> = teams
        .iter()
        .map(|t| {
            (
                t["team"].as_str().unwrap(),
                t["entries"].as_u64().unwrap(),
                t["marked"].as_bool().unwrap(),
            )
        })
        .collect();
    assert_eq!(
        got,
        [("blue", 1, false), ("green", 1, false), ("red", 1, true)],
        "{status}"
    );
    let text = d.run(&blue, &["status", "final"]).ok().stdout;
    assert!(
        text.contains("round      open, 3 entries from 3 teams; scores are sealed until the close"),
        "{text}"
    );
    assert!(text.contains("query 1 (marked)"), "{text}");
    let history = d
        .run(&blue, &["history", "final", "--json"])
        .ok()
        .json_lines();
    assert_eq!(history.len(), 3);
    assert!(
        history
            .iter()
            .all(|h| h["kind"] == "sealed" && h["answer"].is_null())
    );
    let refused = d.run(&blue, &["ranking", "final"]).code(7);
    assert!(
        refused.stderr.contains("sealed until it closes"),
        "{}",
        refused.stderr
    );
    // Organizers see the duplicate; analysts may not ask.
    d.run(&blue, &["duplicates", "final"]).code(4);
    let dup = d.admin(&["duplicates", "final", "--json"]).ok().json();
    assert_eq!(
        dup["duplicates"][0]["teams"],
        serde_json::json!(["blue", "green"])
    );
    // The organizer closes the round; every entry is answered and ranked.
    d.admin(&["close", "final", "--reason", "end of the final round"])
        .ok();
    d.run(&red, &["submit", "final", "--predictions", &b1])
        .code(7);
    let ranking = d.run(&blue, &["ranking", "final", "--json"]).ok().json();
    let entries: Vec<&Value> = ranking["entries"].as_array().unwrap().iter().collect();
    assert_eq!(entries[0]["team"], "red", "{ranking}");
    assert_eq!(entries[0]["score"], 0.1);
    assert_eq!(ranking["comparisons"].as_array().unwrap().len(), 2);
    // Blue and green sent the same file: the data cannot tell them apart.
    let last = &ranking["comparisons"][1];
    assert_eq!(last["distinguishable"], false, "{ranking}");
    assert!(
        ranking["guarantee"]
            .as_str()
            .unwrap()
            .contains("Sealed round")
    );
    let text = d.run(&red, &["ranking", "final"]).ok().stdout;
    assert!(text.contains("told apart"), "{text}");
    let csv = d.run(&red, &["ranking", "final", "--csv"]).ok().stdout;
    assert_eq!(csv.lines().count(), 4, "{csv}");
    // One numbering: the ranking names each entry by the query number of its reply (red's
    // entry was query 1, blue's query 2, green's query 3), not by its position in the round.
    assert_eq!(entries[0]["query"], 1, "{ranking}");
    assert!(csv.starts_with("rank,team,query,"), "{csv}");
    let mut queries: Vec<&str> = csv
        .lines()
        .skip(1)
        .map(|l| l.split(',').nth(2).unwrap())
        .collect();
    queries.sort();
    assert_eq!(queries, ["1", "2", "3"], "{csv}");
}
