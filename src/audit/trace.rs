//! Tracing predictions to the entries that scored them (`--find`), re-scoring them against the
//! labels, and what-if replays under another policy.

use serde::Serialize;

use super::Finding;
use super::check::LabelColumns;
use super::export::Export;
use super::predictions_digest;
use crate::engine::{AnswerRecord, Book, HoldoutPolicy, PolicyInput};
use crate::error::{Error, Result};
use crate::files::Table;
use crate::metric::{self, Metric, Predictions};

/// The answers recorded in an export, with their entry numbers.
pub fn answers(export: &Export) -> Vec<(u64, AnswerRecord)> {
    export
        .entries
        .iter()
        .filter(|e| e.kind == "answer")
        .filter_map(|e| Some((e.seq, serde_json::from_str(&e.body).ok()?)))
        .collect()
}

/// Parses one predictions table for a target in canonical (row-id) order; `None` when the
/// values do not fit the target's domain.
pub fn parse_predictions(
    table: &Table,
    metric: &Metric,
    classes: &[String],
) -> Option<(Vec<String>, Predictions)> {
    let mut rows: Vec<(&str, &str)> = table
        .rows
        .iter()
        .map(|r| {
            (
                r.id.as_str(),
                r.values.first().map(String::as_str).unwrap_or(""),
            )
        })
        .collect();
    rows.sort_by(|a, b| a.0.cmp(b.0));
    let ids = rows.iter().map(|r| r.0.to_string()).collect();
    if metric.uses_classes() {
        let v = rows
            .iter()
            .map(|(_, v)| classes.iter().position(|c| c == v.trim()).map(|i| i as u32))
            .collect::<Option<Vec<u32>>>()?;
        Some((ids, Predictions::Classes(v)))
    } else {
        let v = rows
            .iter()
            .map(|(_, v)| v.trim().parse::<f64>().ok())
            .collect::<Option<Vec<f64>>>()?;
        Some((ids, Predictions::Numbers(v)))
    }
}

/// One entry that scored a predictions file.
#[derive(Debug, Clone, Serialize)]
pub struct Match {
    /// Entry number.
    pub entry: u64,
    /// Query number.
    pub query: u64,
    /// Target.
    pub target: String,
    /// Team.
    pub team: String,
    /// Released symbol.
    pub symbol: String,
    /// Interval.
    pub lower: f64,
    /// Interval.
    pub upper: f64,
    /// Time.
    pub at: String,
    /// The digest matched.
    pub digest: String,
}

/// The entries whose prediction digest equals this table's, for any target.
pub fn find(export: &Export, policy: &HoldoutPolicy, table: &Table) -> Vec<Match> {
    let digests: Vec<(String, String)> = policy
        .targets
        .iter()
        .filter_map(|t| {
            let (_, p) = parse_predictions(table, &t.metric, &t.classes)?;
            Some((
                t.name.clone(),
                predictions_digest(&t.name, &t.classes, &[p]),
            ))
        })
        .collect();
    answers(export)
        .into_iter()
        .filter(|(_, r)| {
            digests
                .iter()
                .any(|(t, d)| *t == r.target && *d == r.digest)
        })
        .map(|(entry, r)| Match {
            entry,
            query: r.query,
            target: r.target,
            team: r.team,
            symbol: r.symbol,
            lower: r.lower,
            upper: r.upper,
            at: r.at,
            digest: r.digest,
        })
        .collect()
}

/// Re-scores a predictions file against the labels and compares with every entry that scored
/// it. Returns the entries checked; discrepancies go to `findings`.
pub fn rescore(
    export: &Export,
    policy: &HoldoutPolicy,
    labels: &LabelColumns,
    file: &str,
    table: &Table,
    findings: &mut Vec<Finding>,
) -> Result<Vec<u64>> {
    let mut order: Vec<usize> = (0..labels.ids.len()).collect();
    order.sort_by(|&a, &b| labels.ids[a].trim().cmp(labels.ids[b].trim()));
    let ids: Vec<String> = order
        .iter()
        .map(|&i| labels.ids[i].trim().to_string())
        .collect();
    let mut checked = Vec::new();
    for m in find(export, policy, table) {
        let Some(t) = policy.targets.iter().position(|t| t.name == m.target) else {
            continue;
        };
        let target = &policy.targets[t];
        let Some((pids, preds)) = parse_predictions(table, &target.metric, &target.classes) else {
            continue;
        };
        if pids != ids {
            return Err(Error::invalid(
                file,
                "its row ids are not the labels' row ids",
            ));
        }
        let col: Vec<String> = order
            .iter()
            .map(|&i| labels.columns[t][i].trim().to_string())
            .collect();
        let parsed = metric::parse_labels(&target.metric, &target.classes, &col, &ids)?;
        let loss = metric::score(&target.metric, &parsed, &preds)?;
        let recorded = export
            .entries
            .get(m.entry as usize)
            .and_then(|e| serde_json::from_str::<AnswerRecord>(&e.body).ok())
            .and_then(|r| r.exact)
            .and_then(|x| x.first().copied());
        if recorded != Some(loss) {
            findings.push(Finding {
                chain: export.header.holdout.clone(),
                entry: Some(m.entry),
                field: "exact[0]".into(),
                problem: format!(
                    "re-scoring {file} against the labels gives {loss:?}, the ledger records \
                     {recorded:?}"
                ),
            });
        }
        checked.push(m.entry);
    }
    Ok(checked)
}

/// One query under the what-if policy.
#[derive(Debug, Clone, Serialize)]
pub struct WhatIf {
    /// Entry number of the original answer.
    pub entry: u64,
    /// Team.
    pub team: String,
    /// Symbol and interval as answered.
    pub actual: String,
    /// Symbol and interval under the other policy, or the refusal it would have met.
    pub would_be: String,
    /// Level under the other policy (ln 1/d_i), when answered.
    pub level_nats: Option<f64>,
}

/// Replays the recorded answers (their exact losses, in the same order) under another answer
/// rule and schedule. The analysts' adaptive choices would have differed under other answers;
/// this shows the guarantee the same queries would have had.
pub fn what_if(
    policy: &HoldoutPolicy,
    export: &Export,
    answers_rule: Option<&str>,
    schedule: Option<&str>,
) -> Result<Vec<WhatIf>> {
    let input = PolicyInput {
        answers: answers_rule.map_or(policy.input.answers.clone(), str::to_string),
        schedule: schedule.map_or(policy.input.schedule.clone(), str::to_string),
        ..policy.input.clone()
    };
    let other = HoldoutPolicy::build(&input, policy.targets.clone(), policy.core.rows)?;
    let mut book = Book::new(&other)?;
    let mut out = Vec::new();
    for (entry, r) in answers(export) {
        let actual = format!("{} [{:.4}, {:.4}]", r.symbol, r.lower, r.upper);
        let Some(losses) = r.exact.clone() else {
            continue;
        };
        let (would_be, level) = match book.quote(&other, &r.team, r.target_index, r.models) {
            Err(why) => (format!("refused ({}): {why}", why.code()), None),
            Ok(q) => match book.answer(&other, &r.team, r.target_index, &q, &losses) {
                Ok(a) => (
                    format!("{} [{:.4}, {:.4}]", a.symbol, a.lower, a.upper),
                    Some(a.level_nats),
                ),
                Err(e) => (format!("not answerable: {e}"), None),
            },
        };
        out.push(WhatIf {
            entry,
            team: r.team,
            actual,
            would_be,
            level_nats: level,
        });
    }
    Ok(out)
}
