//! Holdout families (DESIGN 4.8): row-disjoint holdouts sharing one total delta. Without a
//! family, k holdouts carved by `split` hold jointly only at k * delta, and `split` and `create`
//! say so; with one, the daemon refuses shares past the total, each genesis records family,
//! share and total, and `holdout audit EXPORT --family OTHER` checks the sum across exports.

mod common;

use common::{Daemon, Parts};
use holdout_ledger::audit::export::Export;
use serde_json::{Value, json};

const CLASSES: &str = "crack,dent,ok";

/// Splits 900 invented rows into parts a, b, c (0.4, 0.3, 0.3) in the daemon's directory.
fn split(d: &Daemon, stratify: bool) -> common::Run {
    let all = d.write("all.csv", &Parts::new(900).labels_csv());
    let mut args = vec![
        "split",
        &all,
        "--into",
        "a=0.4",
        "b=0.3",
        "c=0.3",
        "--out-dir",
        "parts",
        "--force",
    ];
    if stratify {
        args.extend(["--stratify", "defect"]);
    }
    d.admin(&args).ok()
}

fn create(d: &Daemon, name: &str, file: &str, extra: &[&str]) -> common::Run {
    let mut args = vec![
        "create",
        name,
        "--labels",
        file,
        "--metric",
        "error",
        "--label-column",
        "defect",
        "--classes",
        CLASSES,
        "--tolerance",
        "0.5",
    ];
    args.extend_from_slice(extra);
    d.admin(&args)
}

fn genesis(path: &std::path::Path) -> Value {
    let ex = Export::read(path).expect("read export");
    serde_json::from_str(&ex.entries[0].body).expect("genesis body")
}

#[test]
fn split_and_create_state_the_joint_delta() {
    let d = Daemon::start();
    let plain = split(&d, false);
    assert!(
        plain.stdout.contains("1 - k * delta") && plain.stdout.contains("--family"),
        "{}",
        plain.stdout
    );
    assert!(!plain.stdout.contains("class counts are tied"));
    let strat = split(&d, true);
    assert!(
        strat.stdout.contains("class counts are tied together")
            && strat.stdout.contains("class mix"),
        "{}",
        strat.stdout
    );
    let j = d
        .admin(&[
            "split",
            &d.path("all.csv").display().to_string(),
            "--into",
            "x=0.5",
            "y=0.5",
            "--out-dir",
            "json-parts",
            "--stratify",
            "defect",
            "--json",
        ])
        .ok()
        .json();
    assert!(
        j["joint"]
            .as_str()
            .is_some_and(|s| s.contains("1 - k * delta")),
        "{j}"
    );
    assert!(j["stratify_condition"].as_str().is_some(), "{j}");

    let alone = create(&d, "solo", "parts/a.csv", &[]).ok();
    assert!(
        alone
            .stdout
            .contains("This holdout's delta 0.05 covers this holdout alone")
            && alone.stdout.contains("1 - k * delta")
            && alone.stdout.matches("covers this holdout alone").count() == 1,
        "{}",
        alone.stdout
    );
    let preview = create(
        &d,
        "fam",
        "parts/b.csv",
        &[
            "--family",
            "q3",
            "--family-delta",
            "0.05",
            "--delta",
            "0.02",
            "--preview",
        ],
    )
    .ok();
    assert!(
        preview
            .stdout
            .contains("this holdout's delta 0.02 is its share of the family's total delta 0.05"),
        "{}",
        preview.stdout
    );
    // --family-delta without --family is refused by the command line.
    create(&d, "x", "parts/c.csv", &["--family-delta", "0.05"]).code(2);
}

#[test]
fn families_cap_their_shares_and_the_audit_checks_them_across_exports() {
    let d = Daemon::start();
    split(&d, true);
    let auditor = d.add_user("ava", &["auditor"], None);

    // A family needs its total on the first member.
    let r = create(
        &d,
        "fa",
        "parts/a.csv",
        &["--family", "q3", "--delta", "0.02"],
    );
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(r.stderr.contains("first member fixes"), "{}", r.stderr);

    let a = create(
        &d,
        "fa",
        "parts/a.csv",
        &[
            "--family",
            "q3",
            "--family-delta",
            "0.05",
            "--delta",
            "0.02",
            "--json",
        ],
    )
    .ok()
    .json();
    assert_eq!(
        a["family"],
        json!({"name": "q3", "share": 0.02, "total": 0.05})
    );
    create(
        &d,
        "fb",
        "parts/b.csv",
        &["--family", "q3", "--delta", "0.03"],
    )
    .ok();

    // 0.02 + 0.03 + 0.01 > 0.05: refused, nothing stored.
    let r = create(
        &d,
        "fc",
        "parts/c.csv",
        &["--family", "q3", "--delta", "0.01"],
    );
    assert_eq!(r.code, 7, "{}", r.stderr);
    assert!(
        r.stderr.contains("sum past the total") && r.stderr.contains("Nothing was stored"),
        "{}",
        r.stderr
    );
    // A different total for an existing family is refused too.
    let r = create(
        &d,
        "fc",
        "parts/c.csv",
        &["--family", "q3", "--family-delta", "0.1", "--delta", "0.01"],
    );
    assert_eq!(r.code, 2, "{}", r.stderr);
    assert!(
        r.stderr.contains("fixed by its first member"),
        "{}",
        r.stderr
    );
    let listed = d.admin(&["list", "--json"]).ok().json();
    assert_eq!(listed.as_array().map(Vec::len), Some(2), "{listed}");
    // The refused member's name and rows are still free.
    create(&d, "fc", "parts/c.csv", &[]).ok();

    // Each member's genesis records family, share and total; a non-member records none.
    for name in ["fa", "fb", "fc"] {
        d.run(
            &auditor,
            &["export", name, "--out", &format!("{name}.jsonl")],
        )
        .ok();
    }
    assert_eq!(
        genesis(&d.path("fa.jsonl"))["family"],
        json!({"name": "q3", "share": 0.02, "total": 0.05})
    );
    assert_eq!(
        genesis(&d.path("fb.jsonl"))["family"],
        json!({"name": "q3", "share": 0.03, "total": 0.05})
    );
    assert!(genesis(&d.path("fc.jsonl")).get("family").is_none());

    // The audit of one member names its family; with the other member it checks the sum.
    let one = d.run(&auditor, &["audit", "fa.jsonl"]).ok();
    assert!(one.stdout.contains("member of family q3"), "{}", one.stdout);
    let both = d
        .run(&auditor, &["audit", "fa.jsonl", "--family", "fb.jsonl"])
        .ok();
    assert!(
        both.stdout.contains("family     q3: total 0.05")
            && both.stdout.contains("the shares fit within the total"),
        "{}",
        both.stdout
    );
    let v = d
        .run(
            &auditor,
            &["audit", "fa.jsonl", "--family", "fb.jsonl", "--json"],
        )
        .ok()
        .json();
    assert_eq!(v["clean"], true, "{v}");
    assert_eq!(v["family"]["families"][0]["fits"], true, "{v}");
    assert_eq!(
        v["family"]["families"][0]["members"]
            .as_array()
            .map(Vec::len),
        Some(2)
    );

    // A holdout outside the family given as a member is flagged.
    let r = d.run(&auditor, &["audit", "fa.jsonl", "--family", "fc.jsonl"]);
    assert_eq!(r.code, 8, "{}", r.stdout);
    assert!(r.stdout.contains("belongs to no family"), "{}", r.stdout);

    // A crafted excess: another daemon founds a family of the same name and total, whose member
    // takes 0.04. Each daemon accepted its own members; together they sum to 0.09 > 0.05, and
    // only the multi-export audit can see it.
    let other = Daemon::start();
    other.write(
        "x.csv",
        &std::fs::read_to_string(d.path("parts/c.csv")).expect("c"),
    );
    create(
        &other,
        "fx",
        "x.csv",
        &[
            "--family",
            "q3",
            "--family-delta",
            "0.05",
            "--delta",
            "0.04",
        ],
    )
    .ok();
    let aud2 = other.add_user("ava", &["auditor"], None);
    other
        .run(&aud2, &["export", "fx", "--out", "fx.jsonl"])
        .ok();
    std::fs::copy(other.path("fx.jsonl"), d.path("fx.jsonl")).expect("copy export");
    d.run(&auditor, &["audit", "fx.jsonl"]).ok();
    let r = d.run(
        &auditor,
        &[
            "audit", "fa.jsonl", "--family", "fb.jsonl", "--family", "fx.jsonl",
        ],
    );
    assert_eq!(r.code, 8, "{}", r.stdout);
    assert!(
        r.stdout.contains("sum PAST the total")
            && r.stdout.contains("the shares of family q3")
            && r.stdout.contains("1 discrepancies"),
        "{}",
        r.stdout
    );
}
