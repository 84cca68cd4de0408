//! Fair service (issue 12) through the binary: `plan --teams T --answers-each M` and the
//! per-team lines and starvation warning of `create` when teams are declared.

mod common;

use common::{dead_url, holdout, run};

fn labels(dir: &std::path::Path, n: usize) -> String {
    let mut s = String::from("id,label\n");
    for i in 0..n {
        // Invented rows; the labels do not matter to a plan.
        s.push_str(&format!("r{i:05},{}\n", if i % 3 == 0 { "a" } else { "b" }));
    }
    let path = dir.join("labels.csv");
    std::fs::write(&path, s).unwrap();
    path.to_string_lossy().into_owned()
}

#[test]
fn plan_for_teams_lists_the_policies_that_serve_them_and_the_rows_they_need() {
    let out = run(
        holdout(),
        &[
            "plan",
            "--rows",
            "2000",
            "--delta",
            "0.05",
            "--tolerance",
            "0.1",
            "--teams",
            "5",
            "--answers-each",
            "2",
            "--expected-error",
            "0.1",
            "--answers",
            "rounded:0.01",
            "sealed",
            "--json",
        ],
    )
    .ok()
    .json();
    assert_eq!(out["teams"], 5);
    assert_eq!(out["answers_each"], 2);
    let policies = out["policies"].as_array().unwrap();
    // Two rules x (one pool + roster and on-arrival, each shared or isolated) x two schedules.
    assert_eq!(policies.len(), 2 * 5 * 2);
    let find = |rule: &str, schedule: &str, shares: &str, sharing: &str| {
        policies
            .iter()
            .find(|p| {
                p["rule"] == rule
                    && p["schedule"] == schedule
                    && p["shares"] == shares
                    && p["sharing"] == sharing
            })
            .unwrap_or_else(|| panic!("no {rule} {schedule} {shares} {sharing}"))
    };
    // Rounded answers on one shared pool: five teams do not get two each on 2,000 rows; each
    // team on its own isolated pool does.
    let shared = find("rounded:0.01", "series", "none", "shared");
    assert_eq!(shared["serves"], false, "{shared}");
    assert!(shared["rows_needed"].as_u64().unwrap() > 2000, "{shared}");
    let isolated = find("rounded:0.01", "even:2", "roster", "isolated");
    assert_eq!(isolated["serves"], true, "{isolated}");
    assert!(
        isolated["rows_needed"].as_u64().unwrap() <= 2000,
        "{isolated}"
    );
    // The even schedule over the expected answers of one pool is T M.
    find("sealed", "even:10", "none", "shared");
    // Serving policies come first.
    let first_not = policies.iter().position(|p| p["serves"] == false).unwrap();
    assert!(policies[first_not..].iter().all(|p| p["serves"] == false));
    // --teams needs --answers-each.
    let bad = run(
        holdout(),
        &[
            "plan",
            "--rows",
            "2000",
            "--delta",
            "0.05",
            "--tolerance",
            "0.1",
            "--teams",
            "5",
        ],
    );
    assert_ne!(bad.code, 0);
}

#[test]
fn create_with_declared_teams_says_what_each_can_expect_and_warns_of_starvation() {
    let dir = tempfile::tempdir().unwrap();
    let labels = labels(dir.path(), 2000);
    let preview = |extra: &[&str]| {
        let mut args = vec![
            "create",
            "x",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "a,b",
            "--tolerance",
            "0.1",
            "--preview",
            "--json",
            "--server",
        ];
        let url = dead_url();
        let url = url.as_str();
        args.push(url);
        args.extend_from_slice(extra);
        run(holdout(), &args).ok().json()
    };
    // One shared transcript, per-team shares: a first team that keeps submitting leaves the
    // others nothing.
    let shared = preview(&["--shares", "roster:north,south,east,west,harbor"]);
    let t = &shared["plan"]["teams"];
    assert_eq!(t["teams"], 5, "{shared}");
    assert_eq!(t["starves"], true, "{t}");
    assert!(t["others_after_first"].as_u64().unwrap() < t["each_expected"].as_u64().unwrap());
    assert!(t["each_expected"].as_u64().unwrap() >= t["each_worst_case"].as_u64().unwrap());
    // Isolated teams with their own shares: no warning.
    let isolated = preview(&[
        "--shares",
        "roster:north,south,east,west,harbor",
        "--sharing",
        "isolated",
    ]);
    assert_eq!(isolated["plan"]["teams"]["starves"], false, "{isolated}");
    // Without teams, no fair-service lines; --teams gives them under one pool.
    let none = preview(&[]);
    assert!(none["plan"]["teams"].is_null(), "{none}");
    let pool = preview(&["--teams", "3"]);
    assert_eq!(pool["plan"]["teams"]["teams"], 3, "{pool}");
    assert_eq!(pool["plan"]["teams"]["starves"], true, "{pool}");
    // The text says it in words.
    let text = run(
        holdout(),
        &[
            "create",
            "x",
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "a,b",
            "--tolerance",
            "0.1",
            "--teams",
            "3",
            "--preview",
            "--server",
            &dead_url(),
        ],
    )
    .ok();
    assert!(
        text.stdout.contains("fair service, 3 teams taking turns")
            && text.stdout.contains("would starve later teams"),
        "{}",
        text.stdout
    );
}

/// Sealed rounds default to an even schedule over the expected entries: every entry gets the
/// same level (nothing is released before the close), so none is refused for the tolerance
/// before the close. The same round under `series` cannot afford the entries at all.
#[test]
fn sealed_rounds_default_to_an_even_schedule_and_refuse_no_entry_for_tolerance() {
    let d = common::Daemon::start();
    let labels = labels(d.dir.path(), 300);
    let create = |name: &str, extra: &[&str]| {
        let mut args = vec![
            "create",
            name,
            "--labels",
            &labels,
            "--metric",
            "error",
            "--classes",
            "a,b",
            "--answers",
            "sealed:0.01",
            "--tolerance",
            "0.1",
            "--expect-answers",
            "8",
            "--json",
        ];
        args.extend_from_slice(extra);
        d.admin(&args)
    };
    // Under series the eighth entry's share is too small for the tolerance on 300 rows:
    // refused before anything is sealed.
    let refused = create("round-series", &["--schedule", "series"]).code(2);
    assert!(
        refused.stderr.contains("nothing was sealed"),
        "{}",
        refused.stderr
    );
    let info = create("round", &[]).ok().json();
    assert_eq!(info["policy"]["schedule"], "even:8", "{info}");
    let mut sealed = 0;
    for t in 0..4 {
        let token = d.add_user(&format!("ana{t}"), &["analyst"], Some(&format!("team{t}")));
        for k in 0..2 {
            let mut p = String::from("id,prediction\n");
            for i in 0..300 {
                let v = if (i + t + k) % 4 == 0 { "a" } else { "b" };
                p.push_str(&format!("r{i:05},{v}\n"));
            }
            let file = d.write(&format!("p{t}{k}.csv"), &p);
            let out = d.run(
                &token,
                &["submit", "round", "--predictions", &file, "--json"],
            );
            assert_eq!(out.code, 0, "entry {t}/{k}: {}\n{}", out.stdout, out.stderr);
            sealed += 1;
        }
    }
    assert_eq!(sealed, 8);
    // The ninth is refused as spent (the schedule's K), not for the tolerance.
    let token = d.add_user("late", &["analyst"], Some("late"));
    let mut p = String::from("id,prediction\n");
    for i in 0..300 {
        p.push_str(&format!("r{i:05},a\n"));
    }
    let file = d.write("late.csv", &p);
    let out = d
        .run(&token, &["submit", "round", "--predictions", &file])
        .code(3);
    assert!(!out.stderr.contains("tolerance"), "{}", out.stderr);
}
