//! `holdout demo` end to end through the binary: every section of the story is there, and the
//! numbers it tells are the ones the story claims (the plain scorer flattered by the attack, the
//! ledger's interval covering the same kind of vote, the refusal, the leaderboard, the ranking
//! and three clean audits). The demo is deterministic (one seed), so these are checks of the
//! whole pipeline on a fixed invented world, not of chance.

mod common;

use std::process::Command;

use serde_json::Value;

fn demo(extra: &[&str]) -> String {
    let dir = tempfile::tempdir().unwrap();
    let out = Command::new(common::BIN)
        .arg("demo")
        .args(extra)
        .current_dir(dir.path())
        .output()
        .expect("run holdout demo");
    let text = String::from_utf8_lossy(&out.stdout).into_owned();
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "demo failed:\n{text}\n{err}");
    // Nothing left behind in the working directory.
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
    text
}

#[test]
fn the_text_tells_every_part_of_the_story() {
    let text = demo(&[]);
    for section in [
        "1. Why: the overfitting attack against a plain scorer",
        "2. The same three squads on holdout-ledger",
        "lantern's attack, side by side",
        "was refused, charged nothing",
        "3. A ladder leaderboard",
        "new bests",
        "4. A final round",
        "closed the round",
        "minus the next rank",
        "5. The audit",
        "With probability at least 1 - 0.05",
        "For high-stakes uses",
    ] {
        assert!(text.contains(section), "missing {section:?} in:\n{text}");
    }
    assert_eq!(
        text.matches("clean: ").count(),
        3,
        "three clean audits:\n{text}"
    );
    assert!(!text.contains("FINDINGS"), "{text}");
}

#[test]
fn the_json_transcript_carries_the_same_story() {
    let text = demo(&["--json"]);
    let t: Value = serde_json::from_str(&text).expect("one JSON object");
    assert_eq!(t["rows_per_holdout"], 4000);

    // The plain scorer: the vote's score flatters it, and the one-file interval misses the
    // truth (the point of the attack).
    let plain = &t["attack"]["plain_scorer"];
    let claimed = plain["claimed_error"].as_f64().unwrap();
    let truth = plain["true_error"].as_f64().unwrap();
    assert!(claimed + 0.01 < truth, "claimed {claimed}, true {truth}");
    let upper = plain["one_file_interval"][1].as_f64().unwrap();
    assert!(upper < truth, "the naive interval should miss: {plain}");

    // The ledger: the vote was answered and its interval covers its true error.
    let ledger = &t["attack"]["ledger"];
    assert_eq!(ledger["covers_true_error"], true, "{ledger}");
    let (lo, hi) = (
        ledger["lower"].as_f64().unwrap(),
        ledger["upper"].as_f64().unwrap(),
    );
    let vote_truth = ledger["true_error"].as_f64().unwrap();
    assert!(lo <= vote_truth && vote_truth <= hi);

    // Every released interval of the shared holdout covers that file's true error (they hold
    // simultaneously with probability >= 0.95; with this seed, all of them do).
    let queries = t["shared"]["queries"].as_array().unwrap();
    assert!(queries.len() >= 10, "{} answers", queries.len());
    for q in queries {
        let (lo, hi, tr) = (
            q["lower"].as_f64().unwrap(),
            q["upper"].as_f64().unwrap(),
            q["true_error"].as_f64().unwrap(),
        );
        assert!(lo <= tr && tr <= hi, "query {q}");
    }
    // Query numbers increase; the set ends with a refusal.
    let numbers: Vec<u64> = queries
        .iter()
        .map(|q| q["query"].as_u64().unwrap())
        .collect();
    assert!(numbers.windows(2).all(|w| w[0] < w[1]), "{numbers:?}");
    assert!(t["shared"]["refusal"]["reason"].as_str().is_some());

    // The leaderboard ranks the three teams; the round ranks three entries with comparisons.
    assert_eq!(t["leaderboard"]["rows"].as_array().unwrap().len(), 3);
    let ranking = &t["final_round"]["ranking"];
    assert_eq!(ranking["entries"].as_array().unwrap().len(), 3);
    assert_eq!(ranking["comparisons"].as_array().unwrap().len(), 2);
    // The coin-flip entry ranks last.
    assert_eq!(ranking["entries"][2]["team"], "lantern");

    // Three audits, every one clean with nothing unchecked.
    let audits = t["audits"].as_array().unwrap();
    assert_eq!(audits.len(), 3);
    for a in audits {
        assert_eq!(a["clean"], true, "{a}");
        assert_eq!(a["unchecked"], 0, "{a}");
        assert_eq!(a["findings"], 0, "{a}");
    }
}

#[test]
fn too_few_rows_is_refused_with_a_clear_message() {
    let out = Command::new(common::BIN)
        .args(["demo", "--rows", "10"])
        .output()
        .unwrap();
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("--rows") && err.contains("at least 1000"),
        "{err}"
    );
    assert_eq!(out.status.code(), Some(2), "bad input exits 2");
}
