//! Metrics: per-row losses scaled into [0, 1], label domains, and scoring.
//!
//! | spec | labels | predictions | loss per row |
//! |---|---|---|---|
//! | `error` | declared classes | a declared class | 0 if equal, else 1 |
//! | `brier` | `0` or `1` | probability of `1` in [0, 1] | `(p - y)^2` |
//! | `abs_error:B` | finite numbers | finite numbers | `min(abs(p - y), B) / B` |
//! | `sq_error:B` | finite numbers | finite numbers | `min((p - y)^2, B) / B` |
//! | `log_loss:FLOOR` | `0` or `1` | probability of `1` in [0, 1] | `-ln(max(p_y, FLOOR)) / -ln(FLOOR)` |
//!
//! The clip bound and the floor are part of the policy, fixed at creation (DESIGN 4.2 rule 3);
//! the floor also means no prediction can fail numerically in a label-dependent way.
//! Predictions are validated against the public declaration only (the label domain), never
//! against the labels themselves (DESIGN 4.2 rule 1).

use std::collections::BTreeSet;
use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

/// A metric and its parameter.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
pub enum Metric {
    /// 0-1 loss on class labels.
    Error,
    /// Squared error of a probability for a binary label.
    Brier,
    /// Absolute error clipped at `bound`, divided by it.
    AbsError {
        /// Clip bound B > 0.
        bound: f64,
    },
    /// Squared error clipped at `bound`, divided by it.
    SqError {
        /// Clip bound B > 0 (on the squared error).
        bound: f64,
    },
    /// Log loss with a probability floor, divided by `-ln(floor)`.
    LogLoss {
        /// Floor in (0, 0.5).
        floor: f64,
    },
}

impl Metric {
    /// Whether the per-row loss takes only the values 0 and 1 (exact binomial intervals apply).
    pub fn is_binary(&self) -> bool {
        matches!(self, Metric::Error)
    }

    /// Whether labels and predictions are class names (else numbers).
    pub fn uses_classes(&self) -> bool {
        matches!(self, Metric::Error)
    }

    /// The label domain implied by the metric: `Some(["0","1"])` for binary-label metrics,
    /// `None` for numeric labels; `error` declares its classes separately.
    pub fn fixed_classes(&self) -> Option<Vec<String>> {
        match self {
            Metric::Brier | Metric::LogLoss { .. } => Some(vec!["0".into(), "1".into()]),
            _ => None,
        }
    }

    /// Default interval method name: exact binomial for 0-1 loss, KL otherwise.
    pub fn default_method(&self) -> &'static str {
        if self.is_binary() { "exact" } else { "kl" }
    }

    /// The loss of one row, in [0, 1], for numeric metrics.
    pub fn numeric_loss(&self, prediction: f64, label: f64) -> f64 {
        let loss = match *self {
            Metric::Error => f64::from(u8::from(prediction != label)),
            Metric::Brier => (prediction - label).powi(2),
            Metric::AbsError { bound } => (prediction - label).abs().min(bound) / bound,
            Metric::SqError { bound } => (prediction - label).powi(2).min(bound) / bound,
            Metric::LogLoss { floor } => {
                let p_true = if label >= 0.5 {
                    prediction
                } else {
                    1.0 - prediction
                };
                -(p_true.max(floor)).ln() / -(floor.ln())
            }
        };
        loss.clamp(0.0, 1.0)
    }
}

impl fmt::Display for Metric {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Metric::Error => f.write_str("error"),
            Metric::Brier => f.write_str("brier"),
            Metric::AbsError { bound } => write!(f, "abs_error:{bound}"),
            Metric::SqError { bound } => write!(f, "sq_error:{bound}"),
            Metric::LogLoss { floor } => write!(f, "log_loss:{floor}"),
        }
    }
}

impl FromStr for Metric {
    type Err = Error;
    fn from_str(s: &str) -> Result<Metric> {
        let (name, param) = match s.split_once(':') {
            Some((n, p)) => (n, Some(p)),
            None => (s, None),
        };
        let number = |what: &str| -> Result<f64> {
            let p = param.ok_or_else(|| {
                Error::invalid("metric", format!("{name} needs a {what}, e.g. {name}:1.0"))
            })?;
            p.parse::<f64>()
                .ok()
                .filter(|v| v.is_finite())
                .ok_or_else(|| Error::invalid("metric", format!("{what} {p:?} is not a number")))
        };
        let no_param = |m: Metric| match param {
            None => Ok(m),
            Some(_) => Err(Error::invalid(
                "metric",
                format!("{name} takes no parameter"),
            )),
        };
        match name {
            "error" => no_param(Metric::Error),
            "brier" => no_param(Metric::Brier),
            "abs_error" | "sq_error" => {
                let bound = number("clip bound")?;
                if bound <= 0.0 {
                    return Err(Error::invalid(
                        "metric",
                        format!("clip bound must be > 0, got {bound}"),
                    ));
                }
                Ok(if name == "abs_error" {
                    Metric::AbsError { bound }
                } else {
                    Metric::SqError { bound }
                })
            }
            "log_loss" => {
                let floor = number("probability floor")?;
                if !(floor > 0.0 && floor < 0.5) {
                    return Err(Error::invalid(
                        "metric",
                        format!("log_loss floor must be in (0, 0.5), got {floor}"),
                    ));
                }
                Ok(Metric::LogLoss { floor })
            }
            other => Err(Error::invalid(
                "metric",
                format!(
                    "unknown metric {other:?}; use error, brier, abs_error:B, sq_error:B or \
                     log_loss:FLOOR"
                ),
            )),
        }
    }
}

/// Sealed labels of one target, parsed and packed: one byte per row for up to 256 declared
/// classes (a 10M-row holdout's labels take 10 MB), four for more.
#[derive(Debug, Clone, PartialEq)]
pub enum Labels {
    /// Class index per row into the declared classes (at most 256 classes).
    Classes(Vec<u8>),
    /// Class index per row into the declared classes (more than 256 classes).
    ManyClasses(Vec<u32>),
    /// Number per row.
    Numbers(Vec<f64>),
}

impl Labels {
    /// Class labels from class indices, packed into bytes when `classes` fit in one.
    pub fn from_indices(indices: Vec<u32>, classes: usize) -> Labels {
        if classes <= 256 {
            Labels::Classes(indices.into_iter().map(|i| i as u8).collect())
        } else {
            Labels::ManyClasses(indices)
        }
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        match self {
            Labels::Classes(v) => v.len(),
            Labels::ManyClasses(v) => v.len(),
            Labels::Numbers(v) => v.len(),
        }
    }

    /// Whether there are no rows.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The class index of row `i` (class labels only).
    pub fn class(&self, i: usize) -> Option<u32> {
        match self {
            Labels::Classes(v) => v.get(i).map(|&c| u32::from(c)),
            Labels::ManyClasses(v) => v.get(i).copied(),
            Labels::Numbers(_) => None,
        }
    }
}

/// Rows of each declared class (`classes` of them), in declaration order: the class counts a
/// per-class metric needs, released as a symbol of their own before its first answer (DESIGN
/// 4.8). Numeric labels of a binary-label metric count by their value's place in `declared`.
pub fn class_counts(labels: &Labels, declared: &[String]) -> Vec<u64> {
    let mut counts = vec![0u64; declared.len()];
    let mut add = |i: usize| {
        if let Some(c) = counts.get_mut(i) {
            *c += 1;
        }
    };
    match labels {
        Labels::Classes(v) => v.iter().for_each(|&c| add(usize::from(c))),
        Labels::ManyClasses(v) => v.iter().for_each(|&c| add(c as usize)),
        Labels::Numbers(v) => {
            let values: Vec<Option<f64>> = declared.iter().map(|d| d.parse().ok()).collect();
            for x in v {
                if let Some(i) = values.iter().position(|d| *d == Some(*x)) {
                    add(i);
                }
            }
        }
    }
    counts
}

/// Errors among the rows of each declared class (`classes` of them): the per-class counts of
/// rows whose prediction differs from the label, in declaration order.
pub fn class_errors(labels: &Labels, predictions: &[u32], classes: usize) -> Vec<u64> {
    let mut errors = vec![0u64; classes];
    for (i, &p) in predictions.iter().enumerate() {
        if let Some(y) = labels.class(i)
            && y != p
            && let Some(e) = errors.get_mut(y as usize)
        {
            *e += 1;
        }
    }
    errors
}

/// Rows where a packed class label and a predicted class index differ. Written as a plain
/// counting loop over equal-length slices so the compiler vectorises it (`benches/score.rs`
/// compares it with numpy and a C loop).
pub fn count_errors(labels: &[u8], predictions: &[u32]) -> u64 {
    let n = labels.len().min(predictions.len());
    let (labels, predictions) = (&labels[..n], &predictions[..n]);
    let mut errors = 0u64;
    // Blocks short enough for a u32 lane counter, summed into the u64 total.
    for (y, p) in labels.chunks(1 << 16).zip(predictions.chunks(1 << 16)) {
        let mut block = 0u32;
        for (a, b) in y.iter().zip(p) {
            block += u32::from(u32::from(*a) != *b);
        }
        errors += u64::from(block);
    }
    errors
}

/// Predictions of one model for one target, in the holdout's row order.
#[derive(Debug, Clone, PartialEq)]
pub enum Predictions {
    /// Class index per row into the declared classes.
    Classes(Vec<u32>),
    /// Number per row.
    Numbers(Vec<f64>),
}

/// The exact loss of one model on the holdout: an error count for 0-1 loss, a loss sum else.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Loss {
    /// Number of rows.
    pub rows: u64,
    /// Errors (0-1 loss only).
    pub errors: Option<u64>,
    /// Sum of the per-row losses (equals `errors` for 0-1 loss).
    pub sum: f64,
}

impl Loss {
    /// Mean loss.
    pub fn mean(&self) -> f64 {
        self.sum / self.rows as f64
    }
}

/// Parses the labels of one target against its declaration; `classes` is the declared domain.
/// `ids` names rows in errors. Labels are read once at creation, by the custodian.
pub fn parse_labels(
    metric: &Metric,
    classes: &[String],
    values: &[String],
    ids: &[String],
) -> Result<Labels> {
    if metric.uses_classes() || metric.fixed_classes().is_some() {
        let mut out = Vec::with_capacity(values.len());
        for (v, id) in values.iter().zip(ids) {
            let idx = classes.iter().position(|c| c == v.trim()).ok_or_else(|| {
                Error::invalid(
                    format!("label of row id {id}"),
                    format!("{v:?} is not in the declared domain {}", classes.join(",")),
                )
            })?;
            out.push(idx as u32);
        }
        if metric.uses_classes() {
            return Ok(Labels::from_indices(out, classes.len()));
        }
        // Binary-label numeric metrics: class index is the label value (0 or 1).
        return Ok(Labels::Numbers(
            out.into_iter()
                .map(|i| classes[i as usize].parse::<f64>().unwrap_or(f64::NAN))
                .collect(),
        ));
    }
    values
        .iter()
        .zip(ids)
        .map(|(v, id)| {
            v.trim()
                .parse::<f64>()
                .ok()
                .filter(|x| x.is_finite())
                .ok_or_else(|| {
                    Error::invalid(
                        format!("label of row id {id}"),
                        format!("{v:?} is not a finite number"),
                    )
                })
        })
        .collect::<Result<Vec<_>>>()
        .map(Labels::Numbers)
}

/// The observed classes of a label column, sorted, for a declaration made from the data.
pub fn observed_classes(values: &[String]) -> Vec<String> {
    values
        .iter()
        .map(|v| v.trim().to_string())
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect()
}

/// Checks one numeric prediction against the public declaration.
pub fn check_number(metric: &Metric, value: f64) -> std::result::Result<(), String> {
    if !value.is_finite() {
        return Err(format!("{value} is not a finite number"));
    }
    if matches!(metric, Metric::Brier | Metric::LogLoss { .. }) && !(0.0..=1.0).contains(&value) {
        return Err(format!("{value} is not a probability in [0, 1]"));
    }
    Ok(())
}

/// Scores predictions against labels (same row order). Deterministic: rows are summed in order.
pub fn score(metric: &Metric, labels: &Labels, predictions: &Predictions) -> Result<Loss> {
    match (labels, predictions) {
        (Labels::Classes(y), Predictions::Classes(p)) if y.len() == p.len() => {
            let errors = count_errors(y, p);
            Ok(Loss {
                rows: y.len() as u64,
                errors: Some(errors),
                sum: errors as f64,
            })
        }
        (Labels::ManyClasses(y), Predictions::Classes(p)) if y.len() == p.len() => {
            let errors = y.iter().zip(p).filter(|(a, b)| a != b).count() as u64;
            Ok(Loss {
                rows: y.len() as u64,
                errors: Some(errors),
                sum: errors as f64,
            })
        }
        (Labels::Numbers(y), Predictions::Numbers(p)) if y.len() == p.len() => {
            let sum = y
                .iter()
                .zip(p)
                .map(|(label, pred)| metric.numeric_loss(*pred, *label))
                .sum();
            Ok(Loss {
                rows: y.len() as u64,
                errors: None,
                sum,
            })
        }
        _ => Err(Error::Internal(
            "predictions and labels differ in kind or length".into(),
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn specs_round_trip_and_bad_specs_are_named() {
        for s in [
            "error",
            "brier",
            "abs_error:2.5",
            "sq_error:4",
            "log_loss:0.001",
        ] {
            let m: Metric = s.parse().unwrap();
            assert_eq!(m.to_string().parse::<Metric>().unwrap(), m);
        }
        for bad in [
            "abs_error",
            "abs_error:0",
            "abs_error:-1",
            "log_loss:0.7",
            "mse",
            "error:1",
        ] {
            let err = bad.parse::<Metric>().unwrap_err();
            assert!(matches!(err, Error::InvalidArgument { .. }), "{bad}: {err}");
        }
    }

    // Worked values (common practice: the definitions of the losses).
    #[test]
    fn per_row_losses() {
        let close = |a: f64, b: f64| (a - b).abs() < 1e-12;
        assert!(close(Metric::Brier.numeric_loss(0.8, 1.0), 0.04));
        assert!(close(
            Metric::AbsError { bound: 2.0 }.numeric_loss(3.0, 2.0),
            0.5
        ));
        assert!(close(
            Metric::AbsError { bound: 2.0 }.numeric_loss(9.0, 2.0),
            1.0
        ));
        assert!(close(
            Metric::SqError { bound: 4.0 }.numeric_loss(3.0, 2.0),
            0.25
        ));
        let ll = Metric::LogLoss { floor: 1e-3 };
        // p_true = 0.5: ln 2 / ln 1000.
        assert!(close(ll.numeric_loss(0.5, 0.0), 2f64.ln() / 1000f64.ln()));
        // A confident wrong answer hits the floor: loss 1, never infinity.
        assert!(close(ll.numeric_loss(1.0, 0.0), 1.0));
        assert!(close(ll.numeric_loss(1.0, 1.0), 0.0));
    }

    #[test]
    fn scoring_counts_errors_exactly() -> Result<()> {
        let y = Labels::Classes(vec![0, 1, 1, 2]);
        let p = Predictions::Classes(vec![0, 1, 2, 2]);
        let loss = score(&Metric::Error, &y, &p)?;
        assert_eq!(loss.errors, Some(1));
        assert_eq!(loss.mean(), 0.25);
        let wide = Labels::ManyClasses(vec![0, 1, 300, 2]);
        let p = Predictions::Classes(vec![0, 1, 300, 3]);
        assert_eq!(score(&Metric::Error, &wide, &p)?.errors, Some(1));
        // A predicted index past 255 never equals a packed label (no wrap-around).
        let p = Predictions::Classes(vec![256, 1, 1, 2]);
        assert_eq!(score(&Metric::Error, &y, &p)?.errors, Some(1));
        Ok(())
    }

    #[test]
    fn the_counting_kernel_agrees_with_a_plain_count_across_blocks() {
        // Longer than one 65,536-row block, with a tail.
        let n = (1 << 16) * 2 + 777;
        let y: Vec<u8> = (0..n).map(|i| (i * 7 % 5) as u8).collect();
        let p: Vec<u32> = (0..n).map(|i| (i * 3 % 5) as u32).collect();
        let plain = y
            .iter()
            .zip(&p)
            .filter(|(a, b)| u32::from(**a) != **b)
            .count() as u64;
        assert_eq!(count_errors(&y, &p), plain);
        assert!(plain > 0 && plain < n as u64);
    }

    #[test]
    fn class_counts_follow_the_declared_order() {
        let declared: Vec<String> = ["b", "a", "c"].iter().map(|s| s.to_string()).collect();
        let y = Labels::Classes(vec![0, 1, 1, 0, 1]);
        assert_eq!(class_counts(&y, &declared), vec![2, 3, 0]);
        let wide = Labels::ManyClasses(vec![2, 2, 0]);
        assert_eq!(class_counts(&wide, &declared), vec![1, 0, 2]);
        let binary = Labels::Numbers(vec![1.0, 0.0, 1.0, 1.0]);
        assert_eq!(
            class_counts(&binary, &["0".to_string(), "1".to_string()]),
            vec![1, 3]
        );
    }

    #[test]
    fn labels_outside_the_domain_are_named() {
        let ids = vec!["r1".to_string(), "r2".to_string()];
        let err = parse_labels(
            &Metric::Brier,
            &["0".into(), "1".into()],
            &["1".into(), "2".into()],
            &ids,
        )
        .unwrap_err();
        assert!(err.to_string().contains("r2"), "{err}");
    }

    #[test]
    fn probabilities_are_checked() {
        assert!(check_number(&Metric::Brier, 1.2).is_err());
        assert!(check_number(&Metric::Brier, f64::NAN).is_err());
        assert!(check_number(&Metric::AbsError { bound: 1.0 }, -5.0).is_ok());
        assert!(check_number(&Metric::AbsError { bound: 1.0 }, f64::INFINITY).is_err());
    }
}
