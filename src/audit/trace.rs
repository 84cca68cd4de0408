//! Tracing predictions to the entries that scored them (`--find`: answers, adoptions, and sealed
//! entries with the round answer that scored them), re-scoring them against the labels, and
//! what-if replays under another policy.

use serde::Serialize;

use super::Finding;
use super::check::LabelColumns;
use super::export::Export;
use super::predictions_digest;
use crate::engine::{AnswerRecord, Book, HoldoutPolicy, PolicyInput, Record};
use crate::error::{Error, Result};
use crate::files::Table;
use crate::ledger::Kind;
use crate::metric::{self, Metric, Predictions};

/// The charged answers recorded in an export (`answer` entries), with their entry numbers.
pub fn answers(export: &Export) -> Vec<(u64, AnswerRecord)> {
    export
        .entries
        .iter()
        .filter(|e| e.kind() == Some(Kind::Answer))
        .filter_map(|e| match Record::parse(e) {
            Ok(Record::Answer(r)) => Some((e.seq, *r)),
            _ => None,
        })
        .collect()
}

/// An entry that scored a file, or will: a charged answer, a free adoption, or a sealed entry
/// (answered by the round that closed it).
#[derive(Debug, Clone)]
pub struct Scoring {
    /// Entry number of the answer, adoption or sealed entry.
    pub entry: u64,
    /// Its kind.
    pub kind: Kind,
    /// Team.
    pub team: String,
    /// Target.
    pub target: String,
    /// Query number (0 for an adoption).
    pub query: u64,
    /// Digest of the predictions.
    pub digest: String,
    /// When it was submitted.
    pub at: String,
    /// The answer: the entry's own, or a sealed entry's from its round (`None` while the round
    /// is open).
    pub answer: Option<AnswerRecord>,
    /// A sealed entry's round: its entry number and the answer's place in it.
    pub round: Option<(u64, usize)>,
}

/// Every answer, adoption and sealed entry of an export, in chain order; a sealed entry gets
/// the answer of the round that closed it (rounds answer the entries sealed since the last
/// round, in order).
pub fn scorings(export: &Export) -> Vec<Scoring> {
    let mut out: Vec<Scoring> = Vec::new();
    let mut pending: Vec<usize> = Vec::new();
    for e in &export.entries {
        if !matches!(
            e.kind(),
            Some(Kind::Answer | Kind::Adopt | Kind::Sealed | Kind::Round)
        ) {
            continue;
        }
        match Record::parse(e) {
            Ok(Record::Answer(r)) | Ok(Record::Adopt(r)) => out.push(Scoring {
                entry: e.seq,
                kind: e.kind().unwrap_or(Kind::Answer),
                team: r.team.clone(),
                target: r.target.clone(),
                query: r.query,
                digest: r.digest.clone(),
                at: r.at.clone(),
                answer: Some(*r),
                round: None,
            }),
            Ok(Record::Sealed(s)) => {
                pending.push(out.len());
                out.push(Scoring {
                    entry: e.seq,
                    kind: Kind::Sealed,
                    team: s.team,
                    target: s.target,
                    query: s.query,
                    digest: s.digest,
                    at: s.at,
                    answer: None,
                    round: None,
                });
            }
            Ok(Record::Round(r)) => {
                // A round that does not answer exactly the entries sealed before it is the
                // replay's finding; here its answers are matched only to entries they name.
                for (k, (i, a)) in std::mem::take(&mut pending)
                    .into_iter()
                    .zip(r.answers)
                    .enumerate()
                {
                    let s = &mut out[i];
                    if a.team == s.team && a.query == s.query && a.digest == s.digest {
                        s.round = Some((e.seq, k));
                        s.answer = Some(a);
                    }
                }
            }
            _ => {}
        }
    }
    out
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
    /// Entry number (of the answer, adoption or sealed entry).
    pub entry: u64,
    /// Its kind: `answer`, `adopt` or `sealed`.
    pub kind: String,
    /// Query number.
    pub query: u64,
    /// Target.
    pub target: String,
    /// Team.
    pub team: String,
    /// Released symbol (`None` for a sealed entry whose round is still open).
    pub symbol: Option<String>,
    /// Interval.
    pub lower: Option<f64>,
    /// Interval.
    pub upper: Option<f64>,
    /// Time of the submission.
    pub at: String,
    /// The digest matched.
    pub digest: String,
    /// A sealed entry's round (entry number) that answered it.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub round: Option<u64>,
}

/// The entries that scored (or, sealed, will score) this table's predictions, for any target.
pub fn find(export: &Export, policy: &HoldoutPolicy, table: &Table) -> Vec<Match> {
    matches(export, policy, table)
        .into_iter()
        .map(|s| Match {
            entry: s.entry,
            kind: s.kind.as_str().to_string(),
            query: s.query,
            target: s.target,
            team: s.team,
            symbol: s.answer.as_ref().map(|a| a.symbol.clone()),
            lower: s.answer.as_ref().map(|a| a.lower),
            upper: s.answer.as_ref().map(|a| a.upper),
            at: s.at,
            digest: s.digest,
            round: s.round.map(|(seq, _)| seq),
        })
        .collect()
}

fn matches(export: &Export, policy: &HoldoutPolicy, table: &Table) -> Vec<Scoring> {
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
    scorings(export)
        .into_iter()
        .filter(|s| {
            digests
                .iter()
                .any(|(t, d)| *t == s.target && *d == s.digest)
        })
        .collect()
}

/// Re-scores a predictions file against the labels and compares with the exact loss recorded
/// for every entry that scored it: an answer's own, a sealed entry's in the round that answered
/// it. Returns the entries checked (answers and sealed entries; an adoption records no exact
/// loss, and a sealed entry of an open round none yet); discrepancies go to `findings`.
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
    for m in matches(export, policy, table) {
        let Some(answer) = &m.answer else {
            continue;
        };
        if m.kind == Kind::Adopt {
            continue;
        }
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
        let recorded = answer.exact.as_ref().and_then(|x| x.first().copied());
        if recorded != Some(loss) {
            let (entry, field) = match m.round {
                Some((round, k)) => (round, format!("answers[{k}].exact[0]")),
                None => (m.entry, "exact[0]".to_string()),
            };
            let whose = match m.round {
                Some(_) => format!(" for the sealed entry {}", m.entry),
                None => String::new(),
            };
            findings.push(Finding {
                chain: export.header.holdout.clone(),
                entry: Some(entry),
                field,
                problem: format!(
                    "re-scoring {file} against the labels gives {loss:?}, the ledger records \
                     {recorded:?}{whose}"
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
