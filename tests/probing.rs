//! Heavy probing flagged in `status` (issue 12, fair service): a team's share of the
//! transcript, and runs of near-duplicate submissions; who may see which flag.

mod audit_support;
mod common;

use holdout_ledger::auth::Role;
use holdout_ledger::engine::{PolicyInput, SubmitOutcome};

use audit_support::Generated;

fn policy(sharing: &str, shares: &str) -> PolicyInput {
    PolicyInput {
        delta: 0.05,
        schedule: "series".into(),
        answers: "rounded:0.01".into(),
        tolerance: 0.3,
        sharing: sharing.into(),
        shares: shares.into(),
        ..PolicyInput::default()
    }
}

fn flip(preds: &mut [String], i: usize) {
    preds[i] = if preds[i] == "1" { "0" } else { "1" }.into();
}

fn kinds(flags: &[holdout_ledger::engine::ProbeFlag], team: &str) -> Vec<String> {
    flags
        .iter()
        .filter(|f| f.team == team)
        .map(|f| f.kind.clone())
        .collect()
}

/// Team 0 sends six files that each change one row in 2,000 (0.05 %) from the one before:
/// after five such near-duplicates it is flagged; the others, who send one file each, are not.
#[test]
fn a_run_of_near_duplicates_is_flagged_and_a_real_change_clears_it() {
    let mut g = Generated::new("probe", 2000, policy("shared", "none"), 3, 21);
    let organizer = g.user("olga", &[Role::Organizer], None);
    let mut preds = g.predictions(70);
    for k in 0..5 {
        g.advance(60);
        let out = g.submit_values(0, preds.clone(), "");
        assert!(
            matches!(out, SubmitOutcome::Answer { .. }),
            "submission {k}"
        );
        flip(&mut preds, k);
        let flags = g.engine.probe_flags(&organizer, "probe").unwrap();
        assert!(!kinds(&flags, "team0").contains(&"near-duplicates".to_string()));
    }
    g.advance(60);
    g.submit_values(0, preds.clone(), "");
    for t in 1..3 {
        g.advance(60);
        g.submit(t, 75);
    }
    let flags = g.engine.probe_flags(&organizer, "probe").unwrap();
    assert!(
        kinds(&flags, "team0").contains(&"near-duplicates".to_string()),
        "{flags:?}"
    );
    assert!(kinds(&flags, "team1").is_empty() && kinds(&flags, "team2").is_empty());
    // A file that differs in 5 % of rows breaks the run.
    for i in 0..100 {
        flip(&mut preds, 100 + i);
    }
    g.advance(60);
    g.submit_values(0, preds, "");
    let flags = g.engine.probe_flags(&organizer, "probe").unwrap();
    assert!(
        !kinds(&flags, "team0").contains(&"near-duplicates".to_string()),
        "{flags:?}"
    );
}

/// One of four teams releases most of the transcript: flagged for more than twice its fair
/// share; the others are not.
#[test]
fn a_team_with_more_than_twice_its_fair_share_of_the_transcript_is_flagged() {
    let mut g = Generated::new("share", 2000, policy("shared", "none"), 4, 22);
    let organizer = g.user("olga", &[Role::Organizer], None);
    for t in 1..4 {
        g.advance(60);
        g.submit(t, 70);
    }
    let flags = g.engine.probe_flags(&organizer, "share").unwrap();
    assert!(flags.is_empty(), "{flags:?}");
    for k in 0..10 {
        g.advance(60);
        // Far apart accuracies: every answer a jump, coded at its cost.
        let out = g.submit(0, if k % 2 == 0 { 55 } else { 95 });
        assert!(matches!(out, SubmitOutcome::Answer { .. }), "answer {k}");
    }
    let flags = g.engine.probe_flags(&organizer, "share").unwrap();
    assert_eq!(
        kinds(&flags, "team0"),
        vec!["transcript-share".to_string()],
        "{flags:?}"
    );
    for t in 1..4 {
        assert!(kinds(&flags, &format!("team{t}")).is_empty(), "{flags:?}");
    }
}

/// Under `isolated` an analyst sees only its own team's near-duplicate flag: never another
/// team's, and not its transcript share (which would tell it the others' activity). The
/// organizer sees every flag.
#[test]
fn analysts_of_an_isolated_holdout_see_no_other_teams_flags() {
    let mut g = Generated::new(
        "iso",
        2000,
        policy("isolated", "roster:team0,team1,team2,team3"),
        4,
        23,
    );
    let organizer = g.user("olga", &[Role::Organizer], None);
    let mut preds = g.predictions(70);
    for k in 0..8 {
        g.advance(60);
        let out = g.submit_values(0, preds.clone(), "");
        assert!(matches!(out, SubmitOutcome::Answer { .. }), "answer {k}");
        flip(&mut preds, k);
    }
    g.advance(60);
    g.submit(1, 70);
    let all = g.engine.probe_flags(&organizer, "iso").unwrap();
    let team0 = kinds(&all, "team0");
    assert!(team0.contains(&"near-duplicates".to_string()), "{all:?}");
    assert!(team0.contains(&"transcript-share".to_string()), "{all:?}");
    let a0 = g.analysts[0].clone();
    let a1 = g.analysts[1].clone();
    let own = g.engine.probe_flags(&a0, "iso").unwrap();
    assert_eq!(kinds(&own, "team0"), vec!["near-duplicates".to_string()]);
    assert_eq!(own.len(), 1, "{own:?}");
    let other = g.engine.probe_flags(&a1, "iso").unwrap();
    assert!(other.is_empty(), "{other:?}");
}

/// Through the daemon: `holdout status --json` shows the flags to an organizer.
#[test]
fn status_shows_flags_to_organizers_through_the_daemon() {
    let d = common::Daemon::start_with(&["--probe-run", "2"]);
    let parts = common::Parts::new(500);
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
        "--answers",
        "threshold:0.3",
        "--tolerance",
        "0.3",
    ])
    .ok();
    let ana = d.add_user("ana", &["analyst"], Some("north"));
    for wrong in [0, 1, 2] {
        // Each file wrong on one more row than the one before (1 row in 500: 0.2 %).
        let mut p = String::from("id,prediction\n");
        for (i, (id, defect, _)) in parts.rows.iter().enumerate() {
            let v = if i < wrong {
                if defect == "ok" { "dent" } else { "ok" }
            } else {
                defect.as_str()
            };
            p.push_str(&format!("{id},{v}\n"));
        }
        let f = d.write(&format!("p{wrong}.csv"), &p);
        d.run(&ana, &["submit", "qc", "--predictions", &f]).ok();
    }
    let status = d.admin(&["status", "qc", "--json"]).ok().json();
    let flags = status["flags"].as_array().unwrap();
    assert!(
        flags
            .iter()
            .any(|f| f["team"] == "north" && f["kind"] == "near-duplicates"),
        "{status}"
    );
    let text = d.admin(&["status", "qc"]).ok();
    assert!(
        text.stdout.contains("flag       north (near-duplicates)"),
        "{}",
        text.stdout
    );
}
