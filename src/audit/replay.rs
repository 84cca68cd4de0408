//! Replaying a holdout's chain with the daemon's own bookkeeping ([`Book`], over the pure
//! accountant), comparing every recorded field with what is computed again, and checking that
//! refusals were decided from public facts only.

use std::collections::BTreeMap;

use serde::Serialize;

use super::Finding;
use crate::engine::{AnswerRecord, BudgetCheck, HoldoutPolicy, Problem, Record, Replayer};
use crate::ledger::{Entry, Kind};

/// One answered query, as the replay saw it.
#[derive(Debug, Clone, Serialize)]
pub struct QuerySummary {
    /// Entry number.
    pub entry: u64,
    /// Query number (per team under isolated).
    pub query: u64,
    /// Team.
    pub team: String,
    /// Target.
    pub target: String,
    /// Released symbol.
    pub symbol: String,
    /// Reported interval.
    pub lower: f64,
    /// Reported interval.
    pub upper: f64,
    /// ln(1/d_i).
    pub level_nats: f64,
    /// Code length charged.
    pub code_nats: f64,
    /// Digest of the predictions.
    pub digest: String,
    /// Whether every field replayed exactly.
    pub replayed: bool,
}

/// What a replay found.
#[derive(Debug, Default)]
pub(crate) struct Replay {
    pub(crate) findings: Vec<Finding>,
    pub(crate) queries: Vec<QuerySummary>,
    pub(crate) refusals: u64,
    pub(crate) refusal_list: Vec<(u64, String)>,
    pub(crate) reads: Vec<(u64, String)>,
    /// Sealed entries.
    pub(crate) sealed: u64,
    /// Rounds closed: (entry, answers, ranked entries).
    pub(crate) rounds: Vec<(u64, u64, u64)>,
    /// Entries checked, per kind.
    pub(crate) checked: BTreeMap<String, u64>,
    /// Entries that could not be checked (unknown kind, unreadable body).
    pub(crate) unchecked: u64,
}

fn finding(chain: &str, p: Problem) -> Finding {
    Finding {
        chain: chain.to_string(),
        entry: Some(p.entry),
        field: p.field,
        problem: p.problem,
    }
}

/// Replays `entries` (the genesis first) under `policy` with the engine's one replay step
/// ([`Replayer::step`]), reporting every discrepancy. `records` yields the entries after the
/// genesis parsed ([`Record::parse`]), in order (the audit parses them on another thread; an
/// entry it does not yield is parsed here); each record is handed to `spent` once replayed
/// (the audit drops them on the thread that allocated them). `progress` is called with the
/// number of entries done.
///
/// The budget each answer shows (next half-width, queries left) is compared as the replay goes:
/// the accountant remembers the status the answer itself computed, so recomputing the budget
/// costs no interval inversion of its own.
pub(crate) fn replay(
    policy: &HoldoutPolicy,
    entries: &[Entry],
    records: &mut dyn Iterator<Item = Result<Record, String>>,
    spent: &mut dyn FnMut(Record),
    progress: &mut dyn FnMut(u64),
) -> Replay {
    let mut out = replay_serial(policy, entries, records, spent, progress);
    out.findings.sort_by_key(|f| f.entry);
    let flagged: std::collections::HashSet<u64> =
        out.findings.iter().filter_map(|f| f.entry).collect();
    for q in &mut out.queries {
        q.replayed &= !flagged.contains(&q.entry);
    }
    out
}

/// The summary of a replayed answer, its strings moved out of the record (the record is
/// only dropped after this, so nothing is copied: an audit of an all-answer ledger spent a
/// tenth of its time allocating, copying and freeing strings).
fn summary(entry: u64, r: &mut AnswerRecord) -> QuerySummary {
    QuerySummary {
        entry,
        query: r.query,
        team: std::mem::take(&mut r.team),
        target: std::mem::take(&mut r.target),
        symbol: std::mem::take(&mut r.symbol),
        lower: r.lower,
        upper: r.upper,
        level_nats: r.level_nats,
        code_nats: r.code_nats,
        digest: std::mem::take(&mut r.digest),
        replayed: true,
    }
}

fn replay_serial(
    policy: &HoldoutPolicy,
    entries: &[Entry],
    records: &mut dyn Iterator<Item = Result<Record, String>>,
    spent: &mut dyn FnMut(Record),
    progress: &mut dyn FnMut(u64),
) -> Replay {
    let mut out = Replay::default();
    let chain = entries.first().map(|e| e.chain.as_str()).unwrap_or("");
    if let Some(g) = entries.first() {
        *out.checked
            .entry(Kind::Genesis.as_str().into())
            .or_default() += 1;
        if g.kind() != Some(Kind::Genesis) {
            out.unchecked += 1;
        }
    }
    let mut rp = match Replayer::new(policy, true) {
        Ok(r) => r,
        Err(e) => {
            out.findings.push(finding(
                chain,
                Problem {
                    entry: 0,
                    field: "policy".into(),
                    problem: format!("cannot replay: {e}"),
                },
            ));
            out.unchecked += entries.len().saturating_sub(1) as u64;
            return out;
        }
    };
    let mut problems = Vec::new();
    // Problems of the budgets shown with answers, kept apart so that an entry whose budget
    // differs is still reported as replayed by the step (as when workers compared them).
    let mut budget_problems = Vec::new();
    let mut check = |job: BudgetCheck| budget_problems.extend(job.run());
    for (i, e) in entries.iter().enumerate().skip(1) {
        if i % 4096 == 0 {
            progress(i as u64);
        }
        let mut rec = match records.next().unwrap_or_else(|| Record::parse(e)) {
            Ok(r) => r,
            Err(why) => {
                out.unchecked += 1;
                out.findings.push(finding(
                    chain,
                    Problem {
                        entry: e.seq,
                        field: "body".into(),
                        problem: format!("{why}; the entry cannot be checked"),
                    },
                ));
                continue;
            }
        };
        let before = problems.len();
        rp.step(entries, i, &rec, &mut problems, &mut check);
        let clean = problems.len() == before;
        *out.checked.entry(rec.kind().as_str().into()).or_default() += 1;
        match &mut rec {
            Record::Answer(r) | Record::Adopt(r) => {
                let mut q = summary(e.seq, r);
                q.replayed = clean;
                out.queries.push(q);
            }
            Record::Round(r) => {
                for a in &mut r.answers {
                    let mut q = summary(e.seq, a);
                    q.replayed = clean;
                    out.queries.push(q);
                }
                out.rounds
                    .push((e.seq, r.answers.len() as u64, r.ranking.len() as u64));
            }
            Record::Sealed(_) => out.sealed += 1,
            Record::Refusal(r, _) => {
                out.refusals += 1;
                out.refusal_list
                    .push((e.seq, format!("team {}, {} ({})", r.team, r.reason, r.at)));
            }
            Record::Read(r) => out
                .reads
                .push((e.seq, format!("{} by {} at {}", r.what, r.by, r.at))),
            _ => {}
        }
        spent(rec);
    }
    out.findings.extend(
        problems
            .into_iter()
            .chain(budget_problems)
            .map(|p| finding(chain, p)),
    );
    progress(entries.len() as u64);
    out
}
