//! Every figure the main commands print for people is tidy: no e-notation (7.580e-4, ~2.3e13)
//! and no decimal with six or more significant digits (0.010000000000000002, 11.69524). The
//! commands run against a real daemon: plan, create (per-team shares, a regression target),
//! status, submit (answer, dry run, sealed entry), history, leaderboard (ladder and best per
//! team), a sealed round's status, close, ranking, and the audit of an export.

mod common;

use common::{Daemon, Parts, holdout, run};

const N: usize = 3000;

/// The figures of `text` that are not tidy, each with its line.
fn untidy(text: &str) -> Vec<String> {
    let mut bad = Vec::new();
    for line in text.lines() {
        for token in line.split(|c: char| c.is_whitespace() || ",;()[]=:'\"`".contains(c)) {
            let t = token
                .trim_end_matches('.')
                .trim_start_matches(['~', '-', '+']);
            if t.is_empty() || !t.starts_with(|c: char| c.is_ascii_digit() || c == '.') {
                continue;
            }
            // e-notation: digits, an `e`, an exponent, and nothing else (hashes have more).
            if let Some((m, e)) = t.split_once(['e', 'E']) {
                let e = e.trim_start_matches(['+', '-']);
                if !m.is_empty()
                    && m.chars().all(|c| c.is_ascii_digit() || c == '.')
                    && !e.is_empty()
                    && e.chars().all(|c| c.is_ascii_digit())
                {
                    bad.push(format!("{token} in: {line}"));
                }
                continue;
            }
            if t.contains('.') && t.chars().all(|c| c.is_ascii_digit() || c == '.') {
                let significant = t.replace('.', "");
                let significant = significant.trim_start_matches('0');
                if significant.len() >= 6 {
                    bad.push(format!("{token} in: {line}"));
                }
            }
        }
    }
    bad
}

#[test]
fn the_checker_finds_what_it_should() {
    assert_eq!(untidy("spent 0.010000000000000002 of delta 0.05").len(), 1);
    assert_eq!(untidy("share 7.580e-4").len(), 1);
    assert_eq!(untidy("sealed ~2.3e13").len(), 1);
    assert_eq!(untidy("level 11.69524 nats").len(), 1);
    assert!(
        untidy("digest 941fa72ede40b1711711713c893967c980c32ef90e3b48a5383b145620d38521")
            .is_empty()
    );
    assert!(untidy("at 2026-12-03T17:31:16.676Z [0.2958, 0.3649] 11.695 0.000758 2000").is_empty());
}

#[test]
fn the_main_commands_print_tidy_figures() {
    let d = Daemon::start();
    let mut printed = String::new();
    let mut keep = |what: &str, text: String| {
        printed.push_str(&format!("--- {what}\n{text}\n"));
    };
    keep(
        "plan",
        run(holdout(), &["plan", "--rows", "3000", "--tolerance", "0.1"])
            .ok()
            .stdout,
    );
    keep(
        "plan --teams",
        run(
            holdout(),
            &[
                "plan",
                "--rows",
                "3000",
                "--tolerance",
                "0.1",
                "--teams",
                "3",
                "--answers-each",
                "2",
            ],
        )
        .ok()
        .stdout,
    );
    // A ladder with per-team shares, and a rounded holdout with a regression target.
    let parts = Parts::new(N);
    let own = |prefix: &str, t: String| t.replace("part-", prefix);
    let lad = d.write("lad.csv", &own("lad-", parts.labels_csv()));
    keep(
        "create ladder",
        d.admin(&[
            "create",
            "lad",
            "--labels",
            &lad,
            "--target",
            "defect:defect:error",
            "--classes",
            "crack,dent,ok",
            "--answers",
            "ladder:0.01",
            "--tolerance",
            "0.1",
            "--shares",
            "roster:red,blue,green",
            "--sharing",
            "isolated",
        ])
        .ok()
        .stdout,
    );
    let qc = d.write("qc.csv", &own("qc-", parts.labels_csv()));
    keep(
        "create rounded",
        d.admin(&[
            "create",
            "qc",
            "--labels",
            &qc,
            "--target",
            "cost:cost:abs_error:100",
            "--answers",
            "rounded:0.01",
            "--tolerance",
            "0.2",
            "--delta",
            "0.03",
        ])
        .ok()
        .stdout,
    );
    // Other label values (a labels file is sealed once, whatever its ids).
    let round = Parts::new(N - 10);
    let fin = d.write("fin.csv", &own("fin-", round.labels_csv()));
    keep(
        "create sealed",
        d.admin(&[
            "create",
            "fin",
            "--labels",
            &fin,
            "--target",
            "cost:cost:abs_error:100",
            "--answers",
            "sealed:0.01",
            "--tolerance",
            "0.2",
            "--expect-answers",
            "2",
            "--closes-at",
            "2099-01-01T00:00:00Z",
        ])
        .ok()
        .stdout,
    );
    let red = d.add_user("rae", &["analyst"], Some("red"));
    let blue = d.add_user("bo", &["analyst"], Some("blue"));
    for (k, (token, every)) in [(&red, 4), (&blue, 7), (&red, 9)].into_iter().enumerate() {
        let file = d.write(
            &format!("l{k}.csv"),
            &own("lad-", parts.defect_predictions(every, k)),
        );
        keep(
            "submit ladder",
            d.run(token, &["submit", "lad", "--predictions", &file])
                .ok()
                .stdout,
        );
    }
    for (k, (token, offset)) in [(&red, 13.7), (&blue, 21.3)].into_iter().enumerate() {
        let file = d.write(
            &format!("c{k}.csv"),
            &own("qc-", parts.cost_predictions(offset)),
        );
        keep(
            "submit --dry-run",
            d.run(
                token,
                &["submit", "qc", "--predictions", &file, "--dry-run"],
            )
            .ok()
            .stdout,
        );
        keep(
            "submit rounded",
            d.run(token, &["submit", "qc", "--predictions", &file])
                .ok()
                .stdout,
        );
        let entry = d.write(
            &format!("f{k}.csv"),
            &own("fin-", round.cost_predictions(offset)),
        );
        keep(
            "submit sealed",
            d.run(
                token,
                &["submit", "fin", "--predictions", &entry, "--final"],
            )
            .ok()
            .stdout,
        );
    }
    keep("status ladder", d.run(&red, &["status", "lad"]).ok().stdout);
    keep("status rounded", d.admin(&["status", "qc"]).ok().stdout);
    keep("status sealed", d.admin(&["status", "fin"]).ok().stdout);
    keep("history", d.admin(&["history", "qc"]).ok().stdout);
    keep(
        "history ladder",
        d.run(&red, &["history", "lad"]).ok().stdout,
    );
    keep(
        "leaderboard ladder",
        d.admin(&["leaderboard", "lad"]).ok().stdout,
    );
    keep(
        "leaderboard best",
        d.admin(&["leaderboard", "qc"]).ok().stdout,
    );
    keep("close", d.admin(&["close", "fin"]).ok().stdout);
    keep("ranking", d.admin(&["ranking", "fin"]).ok().stdout);
    let auditor = d.add_user("audrey", &["auditor"], None);
    let export = d.path("qc-export.json").display().to_string();
    d.run(&auditor, &["export", "qc", "--out", &export]).ok();
    keep("audit", run(holdout(), &["audit", &export]).ok().stdout);

    // The views ran and printed what they are for.
    for shown in [
        "for each team, on its share",
        "= mean absolute error",
        "rank",
        "clean",
    ] {
        assert!(printed.contains(shown), "no {shown:?} in:\n{printed}");
    }
    let bad = untidy(&printed);
    assert!(
        bad.is_empty(),
        "untidy figures:\n{}\n\n{printed}",
        bad.join("\n")
    );
}
