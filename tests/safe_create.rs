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
