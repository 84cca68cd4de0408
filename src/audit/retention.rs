//! The audit's side of retention: which prediction files the export still carries, which the
//! ledger says were dropped, whether the labels were shredded, each kept file checked against the digest its entry
//! records and re-scored against the labels (when the audit has labels that match the genesis
//! digest), and what could not be checked without them.

use std::collections::{BTreeMap, HashMap};

use serde::Serialize;

use super::check::{LabelColumns, Report, genesis_policy, labels_digest};
use super::export::Export;
use super::trace::scorings;
use super::{Finding, kept, predictions_digest};
use crate::engine::{HoldoutPolicy, Record, Retention};
use crate::ledger::Kind;
use crate::metric::{self, Labels};

/// What the audit found of the holdout's retention (in the report as `retention`).
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct RetentionReport {
    /// The retention its genesis declares, in words (`digests only`, `files kept N days`).
    pub declared: String,
    /// Entries whose kept file the export carries (each checked against its digest).
    pub kept: Vec<u64>,
    /// Entries whose kept file the ledger says was dropped at the end of the retention.
    pub dropped: Vec<u64>,
    /// The `labels-shredded` entry, if the labels were shredded.
    pub labels_shredded_at: Option<u64>,
    /// Kept files re-scored against the labels, by entry (each re-score compared with the
    /// exact losses its answer records).
    pub rescored: Vec<u64>,
    /// Why kept files were not re-scored, when some were not.
    pub not_rescored: Option<String>,
}

fn finding(chain: &str, entry: Option<u64>, field: &str, problem: String) -> Finding {
    Finding {
        chain: chain.into(),
        entry,
        field: field.into(),
        problem,
    }
}

/// Checks the export's kept files and the retention entries; fills `report.retention`, adds
/// findings, and names in `report.cannot_check` what it could not check.
pub(super) fn check(export: &Export, labels: Option<&LabelColumns>, report: &mut Report) {
    let chain = export.header.holdout.as_str();
    let mut scratch = Vec::new();
    let Some((policy, genesis)) = genesis_policy(export, &mut scratch) else {
        return;
    };
    let declared = match Retention::from_genesis(&genesis) {
        Ok(r) => r,
        Err(why) => {
            report
                .findings
                .push(finding(chain, Some(0), "retention", why));
            return;
        }
    };
    let mut out = RetentionReport {
        declared: declared.describe(),
        ..RetentionReport::default()
    };
    // Files gone by the ledger's word: entry -> the drop or shred entry.
    let mut gone: HashMap<u64, (u64, Kind)> = HashMap::new();
    for e in &export.entries {
        match e.kind() {
            Some(Kind::PredictionsDropped | Kind::LabelsShredded) => {}
            _ => continue,
        }
        match Record::parse(e) {
            Ok(Record::PredictionsDropped(d)) => {
                for n in &d.entries {
                    gone.insert(*n, (e.seq, Kind::PredictionsDropped));
                    out.dropped.push(*n);
                }
            }
            Ok(Record::LabelsShredded(_)) => out.labels_shredded_at = Some(e.seq),
            // An unreadable body is the replay's finding.
            _ => {}
        }
    }
    if export.header.kept.unwrap_or(0) != export.kept.len() as u64 {
        report.findings.push(finding(
            chain,
            None,
            "header.kept",
            format!(
                "the header announces {} kept prediction files, the file holds {}",
                export.header.kept.unwrap_or(0),
                export.kept.len()
            ),
        ));
    }
    let scored: BTreeMap<u64, _> = scorings(export)
        .into_iter()
        .filter(|s| s.kind != Kind::Adopt)
        .map(|s| (s.entry, s))
        .collect();
    let kept_by_entry: HashMap<u64, usize> = export
        .kept
        .iter()
        .enumerate()
        .map(|(i, k)| (k.entry, i))
        .collect();
    if declared.days().is_some() {
        for (n, s) in &scored {
            if !kept_by_entry.contains_key(n) && !gone.contains_key(n) {
                report.findings.push(finding(
                    chain,
                    Some(*n),
                    "kept",
                    format!(
                        "the holdout keeps prediction files, but the export carries none for \
                         this {} entry and no predictions-dropped entry names it",
                        s.kind
                    ),
                ));
            }
        }
    }
    let usable = labels.filter(|l| {
        l.columns.len() == policy.targets.len()
            && genesis["labels_sha256"].as_str() == Some(labels_digest(&policy, l).0.as_str())
    });
    let sorted = usable.map(|l| SortedLabels::new(&policy, l));
    let mut unanswered = 0;
    for k in &export.kept {
        let at_entry = |field: &str, problem: String| finding(chain, Some(k.entry), field, problem);
        if declared.days().is_none() {
            report.findings.push(at_entry(
                "kept",
                "the export carries a kept file, but the genesis entry declares digests only"
                    .into(),
            ));
        }
        if let Some((by, kind)) = gone.get(&k.entry) {
            report.findings.push(at_entry(
                "kept",
                format!("the export carries a file the {kind} entry {by} says is gone"),
            ));
        }
        let Some(s) = scored.get(&k.entry) else {
            report.findings.push(at_entry(
                "kept",
                "a kept file for an entry that is not an answer or sealed entry".into(),
            ));
            continue;
        };
        if s.target != k.target || s.digest != k.digest {
            report.findings.push(at_entry(
                "kept",
                format!(
                    "the kept file is labelled target {} digest {}, the entry records target \
                     {} digest {}",
                    k.target, k.digest, s.target, s.digest
                ),
            ));
            continue;
        }
        let Some((t, target)) = policy
            .targets
            .iter()
            .enumerate()
            .find(|(_, t)| t.name == s.target)
        else {
            continue;
        };
        let preds = match kept::decode(&k.data) {
            Ok(p) => p,
            Err(why) => {
                report.findings.push(at_entry(
                    "kept",
                    format!("the kept file is unreadable: {why}"),
                ));
                continue;
            }
        };
        let fits = preds.iter().all(|p| match p {
            metric::Predictions::Classes(v) => {
                v.len() as u64 == policy.core.rows
                    && v.iter().all(|c| (*c as usize) < target.classes.len())
            }
            metric::Predictions::Numbers(v) => v.len() as u64 == policy.core.rows,
        });
        if !fits || predictions_digest(&target.name, &target.classes, &preds) != s.digest {
            report.findings.push(at_entry(
                "kept",
                format!(
                    "the kept file does not have the digest {} its entry records: it was \
                     altered or damaged after scoring",
                    s.digest
                ),
            ));
            out.kept.push(k.entry);
            continue;
        }
        out.kept.push(k.entry);
        let Some(sorted) = &sorted else {
            continue;
        };
        let Some(answer) = &s.answer else {
            unanswered += 1;
            continue;
        };
        let Some(labels) = sorted.labels.get(t).and_then(Option::as_ref) else {
            continue;
        };
        let again: Vec<_> = preds
            .iter()
            .map(|p| metric::score(&target.metric, labels, p).ok())
            .collect();
        let recorded: Vec<_> = answer
            .exact
            .as_ref()
            .map(|x| x.iter().copied().map(Some).collect())
            .unwrap_or_default();
        if again != recorded {
            let (entry, field) = match s.round {
                Some((round, i)) => (round, format!("answers[{i}].exact")),
                None => (s.entry, "exact".to_string()),
            };
            report.findings.push(finding(
                chain,
                Some(entry),
                &field,
                format!(
                    "re-scoring the kept file of entry {} against the labels gives {again:?}, \
                     the ledger records {recorded:?}",
                    s.entry
                ),
            ));
        }
        out.rescored.push(s.entry);
    }
    let not_rescored = out.kept.len() - out.rescored.len();
    if not_rescored > 0 {
        let why = if sorted.is_none() {
            match (out.labels_shredded_at, labels) {
                (_, Some(_)) => "the labels given do not match the genesis digest".to_string(),
                (Some(s), None) => format!(
                    "the labels were shredded at entry {s} and no copy was given (--labels)"
                ),
                (None, None) => "no labels were given (--labels, or audit --db)".to_string(),
            }
        } else {
            format!("{unanswered} sealed entries are not answered yet (their round is open)")
        };
        report.cannot_check.push(format!(
            "re-scoring {not_rescored} kept prediction file{}: {why}",
            if not_rescored == 1 { "" } else { "s" }
        ));
        out.not_rescored = Some(why);
    }
    if let (Some(s), None) = (out.labels_shredded_at, labels) {
        report.cannot_check.push(format!(
            "the labels digest of the genesis entry: the labels were shredded at entry {s}; give \
             the custodian's copy with --labels to check it and re-score"
        ));
    }
    report.retention = Some(out);
}

/// The labels parsed per target in the canonical (sorted id) order, as the daemon scored them.
struct SortedLabels {
    labels: Vec<Option<Labels>>,
}

impl SortedLabels {
    fn new(policy: &HoldoutPolicy, l: &LabelColumns) -> SortedLabels {
        let mut order: Vec<usize> = (0..l.ids.len()).collect();
        order.sort_by(|&a, &b| l.ids[a].trim().cmp(l.ids[b].trim()));
        let ids: Vec<String> = order.iter().map(|&i| l.ids[i].trim().to_string()).collect();
        let labels = policy
            .targets
            .iter()
            .zip(&l.columns)
            .map(|(t, col)| {
                let col: Vec<String> = order.iter().map(|&i| col[i].trim().to_string()).collect();
                metric::parse_labels(&t.metric, &t.classes, &col, &ids).ok()
            })
            .collect();
        SortedLabels { labels }
    }
}
