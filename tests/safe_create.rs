//! A create whose policy could answer nothing (or fewer answers than asked for), or whose
//! deadline is past, is refused before anything is sealed: the same labels then make a working
//! holdout.

mod common;

use common::{Daemon, Parts};

#[test]
fn a_policy_that_affords_too_few_answers_seals_nothing() {
    let d = Daemon::start();
    let labels = d.write("labels.csv", &Parts::new(150).labels_csv());
    let create = |extra: &[&str]| {
        let mut args = vec![
            "create",
            "yard",
            "--labels",
            labels.as_str(),
            "--target",
            "defect:defect:error",
            "--classes",
            "crack,dent,ok",
        ];
        args.extend_from_slice(extra);
        d.admin(&args)
    };
    // 150 rows cannot give a +-0.01 interval: nothing fits, so nothing is sealed.
    let r = create(&["--tolerance", "0.01"]).code(2);
    assert!(
        r.stderr.contains("affords 0 answers") && r.stderr.contains("nothing was sealed"),
        "{}",
        r.stderr
    );
    // Fewer than asked for is refused too.
    let r = create(&["--tolerance", "0.5", "--expect-answers", "1000000"]).code(2);
    assert!(
        r.stderr.contains("fewer than the 1000000 expected"),
        "{}",
        r.stderr
    );
    // Per-team shares: each declared team's own share must afford the answers (one pool at
    // the same tolerance would have; a team's share is smaller).
    let r = create(&["--tolerance", "0.01", "--shares", "roster:north,south,east"]).code(2);
    assert!(
        r.stderr
            .contains("affords 0 answers for each declared team")
            && r.stderr.contains("nothing was sealed"),
        "{}",
        r.stderr
    );
    // A sealed round whose deadline is past would refuse every entry.
    let r = create(&[
        "--answers",
        "sealed:0.05",
        "--tolerance",
        "0.5",
        "--closes-at",
        "2020-01-01T00:00:00Z",
    ])
    .code(2);
    assert!(r.stderr.contains("already past"), "{}", r.stderr);
    // The rows and labels are still free: a workable policy creates the holdout.
    create(&["--tolerance", "0.5"]).ok();
    let list = d.admin(&["list", "--json"]).ok().stdout;
    assert!(list.contains("\"yard\""), "{list}");
}

/// The CLI reads a labels file twice (a check, then the upload in chunks through a bounded
/// queue): a file whose ids are out of order, longer than several chunks, makes the same
/// holdout as the same rows sorted, and a repeated id far into it is named with both lines.
#[test]
fn a_labels_file_in_any_order_is_checked_then_streamed_in_chunks() {
    let d = Daemon::start();
    let n = 20_000;
    let mut rows: Vec<String> = (0..n)
        .map(|i| format!("u{:06},{}", (i * 7919) % n, ["cat", "dog"][i % 2]))
        .collect();
    let body = |rows: &[String]| format!("id,label\n{}\n", rows.join("\n"));
    let shuffled = d.write("shuffled.csv", &body(&rows));
    let info = d
        .admin(&[
            "create",
            "pets",
            "--labels",
            shuffled.as_str(),
            "--metric",
            "error",
            "--classes",
            "cat,dog",
            "--tolerance",
            "0.5",
            "--json",
        ])
        .ok()
        .stdout;
    assert!(
        info.contains("\"rows\": 20000") || info.contains("\"rows\":20000"),
        "{info}"
    );
    // The same ids again (with one more row, so the labels differ) are refused by the daemon:
    // they belong to `pets`.
    rows.push("zz,cat".into());
    rows.sort();
    let sorted = d.write("sorted.csv", &body(&rows));
    let r = d
        .admin(&[
            "create",
            "again",
            "--labels",
            sorted.as_str(),
            "--metric",
            "error",
            "--classes",
            "dog,cat",
            "--tolerance",
            "0.5",
        ])
        .code(7);
    assert!(
        r.stderr
            .contains("row id u000000 already belongs to holdout pets"),
        "{}",
        r.stderr
    );
    // A repeat on the last line of an unsorted file: the CLI's check does not hold the ids to
    // look for it, the daemon finds it while sorting and refuses, and the CLI reads the file
    // again to name both lines.
    let mut repeated: Vec<String> = (0..n)
        .map(|i| format!("w{:06},cat", (i * 7919) % n))
        .collect();
    repeated.push(repeated[3].clone());
    let path = d.write("repeated.csv", &body(&repeated));
    let r = d
        .admin(&[
            "create",
            "twice",
            "--labels",
            path.as_str(),
            "--metric",
            "error",
            "--classes",
            "cat,dog",
            "--tolerance",
            "0.5",
        ])
        .code(2);
    assert!(
        r.stderr
            .contains("duplicate id `w003757`: first on line 5, again on line 20002"),
        "{}",
        r.stderr
    );
    // Nothing was sealed and no row is taken: without the repeat the same file creates.
    let list = d.admin(&["list", "--json"]).ok().stdout;
    assert!(!list.contains("\"twice\""), "{list}");
    repeated.pop();
    let path = d.write("once.csv", &body(&repeated));
    d.admin(&[
        "create",
        "twice",
        "--labels",
        path.as_str(),
        "--metric",
        "error",
        "--classes",
        "cat,dog",
        "--tolerance",
        "0.5",
    ])
    .ok();
    // The check of a preview, which sends nothing, finds the repeat itself.
    let mut repeated: Vec<String> = (0..50)
        .map(|i| format!("v{:03},cat", (i * 7) % 50))
        .collect();
    repeated.push(repeated[10].clone());
    let path = d.write("preview.csv", &body(&repeated));
    let r = d
        .admin(&[
            "create",
            "preview",
            "--labels",
            path.as_str(),
            "--metric",
            "error",
            "--classes",
            "cat,dog",
            "--tolerance",
            "0.5",
            "--preview",
        ])
        .code(2);
    assert!(
        r.stderr
            .contains("duplicate id `v020`: first on line 12, again on line 52"),
        "{}",
        r.stderr
    );
}
