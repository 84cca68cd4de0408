//! Per-class error, balanced error and AUC against scikit-learn on its bundled breast-cancer
//! table (issue 18, "done when"). The reference file `tests/reference/classes_sklearn.json` is
//! written by `scripts/reference_classes.py` with scikit-learn 1.9.1, scipy 1.17.1 and numpy
//! 2.4.6 (named in the file's `source`): `confusion_matrix`, `balanced_accuracy_score`,
//! `roc_auc_score`, and Clopper-Pearson limits by scipy's `beta.ppf` in the form of statsmodels'
//! `proportion_confint(method="beta")`.

use holdout_ledger::metric::{Labels, class_counts, class_errors};
use holdout_ledger::stats::classes::{auc, class_intervals, class_rates};
use holdout_ledger::stats::interval::Rounding;
use serde_json::Value;

fn reference() -> Value {
    let text = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/classes_sklearn.json"
    ))
    .unwrap();
    serde_json::from_str(&text).unwrap()
}

fn digits(v: &Value) -> Vec<u32> {
    v.as_str()
        .unwrap()
        .chars()
        .map(|c| c.to_digit(10).unwrap())
        .collect()
}

fn numbers(v: &Value) -> Vec<u64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_u64().unwrap())
        .collect()
}

#[test]
fn per_class_and_balanced_error_match_scikit_learn() {
    let doc = reference();
    assert!(
        doc["source"]
            .as_str()
            .unwrap()
            .contains("scikit-learn 1.9.1")
    );
    let y = digits(&doc["labels"]);
    assert_eq!(y.len(), 569);
    let labels = Labels::Classes(y.iter().map(|&c| c as u8).collect());
    let declared = vec!["0".to_string(), "1".to_string()];
    let counts = class_counts(&labels, &declared);
    for case in doc["cases"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let pred = digits(&case["predictions"]);
        let errors = class_errors(&labels, &pred, 2);
        // confusion_matrix: rows of each class, and those off the diagonal.
        assert_eq!(counts, numbers(&case["counts"]), "{name}");
        assert_eq!(errors, numbers(&case["errors"]), "{name}");
        let (_, balanced) = class_rates(&counts, &errors).unwrap();
        // 1 - balanced_accuracy_score.
        let sk = case["balanced_error"].as_f64().unwrap();
        assert!((balanced - sk).abs() < 1e-15, "{name}: {balanced} vs {sk}");
        // Per-class Clopper-Pearson at level / C each, against scipy's beta quantiles.
        let level = case["level_nats"].as_f64().unwrap();
        let ci = class_intervals(
            Rounding::for_core(holdout_ledger::stats::CORE),
            &counts,
            &errors,
            level,
        )
        .unwrap();
        for (c, lim) in case["class_limits"].as_array().unwrap().iter().enumerate() {
            let (lo, hi) = (lim[0].as_f64().unwrap(), lim[1].as_f64().unwrap());
            let got = ci.classes[c];
            assert!(
                (got.lower - lo).abs() < 1e-9,
                "{name} class {c}: {got:?} vs {lo}"
            );
            assert!(
                (got.upper - hi).abs() < 1e-9,
                "{name} class {c}: {got:?} vs {hi}"
            );
            // Outward: never narrower than the reference beyond its own rounding.
            assert!(got.lower <= lo + 1e-12 && got.upper >= hi - 1e-12);
        }
        assert!(ci.balanced.lower <= balanced && balanced <= ci.balanced.upper);
    }
    // The majority-class predictor: fair on plain error, as bad as a coin on balanced error.
    let majority = &doc["cases"][1];
    assert_eq!(majority["name"], "majority");
    let plain = majority["plain_error"].as_f64().unwrap();
    let balanced = majority["balanced_error"].as_f64().unwrap();
    assert!(plain < 0.38 && balanced == 0.5, "{plain} {balanced}");
}

#[test]
fn auc_matches_roc_auc_score_with_ties() {
    let doc = reference();
    let y = digits(&doc["labels"]);
    assert_eq!(doc["positive_class"], "0");
    let positive: Vec<bool> = y.iter().map(|&c| c == 0).collect();
    for case in doc["auc"].as_array().unwrap() {
        let scores: Vec<f64> = case["scores"]
            .as_array()
            .unwrap()
            .iter()
            .map(|x| x.as_f64().unwrap())
            .collect();
        // The columns have tied values (the mid-rank path is exercised).
        let mut sorted = scores.clone();
        sorted.sort_by(f64::total_cmp);
        assert!(sorted.windows(2).any(|w| w[0] == w[1]));
        let a = auc(&positive, &scores).unwrap();
        assert_eq!((a.positives, a.negatives), (212, 357));
        let sk = case["auc"].as_f64().unwrap();
        let got = a.value().unwrap();
        assert!((got - sk).abs() < 1e-14, "{}: {got} vs {sk}", case["name"]);
    }
}
