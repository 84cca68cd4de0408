//! Replaying a holdout's chain with the daemon's own bookkeeping ([`Book`], over the pure
//! accountant), comparing every recorded field with what is computed again, and checking that
//! refusals were decided from public facts only.

use std::collections::HashMap;

use serde::Serialize;
use serde_json::Value;

use super::Finding;
use crate::engine::{AnswerRecord, Book, BudgetView, HoldoutPolicy, RefusalReason, RefusalRecord};
use crate::ledger::Entry;

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
}

fn finding(chain: &str, entry: u64, field: &str, problem: String) -> Finding {
    Finding {
        chain: chain.to_string(),
        entry: Some(entry),
        field: field.to_string(),
        problem,
    }
}

struct Cmp<'a> {
    chain: &'a str,
    entry: u64,
    out: Vec<Finding>,
    /// Budget checks, computed off the replay thread (see [`replay`]).
    jobs: Option<&'a Jobs>,
}

/// A budget to recompute from a snapshot of the book and compare with what was recorded.
struct BudgetJob {
    entry: u64,
    book: Book,
    team: String,
    recorded: BudgetView,
}

type Jobs = std::sync::mpsc::SyncSender<BudgetJob>;

impl Cmp<'_> {
    fn eq<T: PartialEq + std::fmt::Debug>(&mut self, field: &str, recorded: T, again: T) {
        if recorded != again {
            self.out.push(finding(
                self.chain,
                self.entry,
                field,
                format!("recorded {recorded:?}, replay computes {again:?}"),
            ));
        }
    }

    fn f(&mut self, field: &str, recorded: f64, again: f64) {
        if recorded.to_bits() != again.to_bits() && !(recorded == 0.0 && again == 0.0) {
            self.out.push(finding(
                self.chain,
                self.entry,
                field,
                format!("recorded {recorded}, replay computes {again}"),
            ));
        }
    }

    /// Queues the comparison of `recorded` with the budget `book` shows `team`.
    fn defer_budget(&mut self, book: &Book, team: &str, recorded: &BudgetView) {
        let job = BudgetJob {
            entry: self.entry,
            book: book.clone(),
            team: team.to_string(),
            recorded: recorded.clone(),
        };
        // The receivers live until every job is sent (scoped threads), so this cannot fail.
        if let Some(jobs) = self.jobs {
            let _ = jobs.send(job);
        }
    }

    fn budget(&mut self, recorded: &BudgetView, again: &BudgetView) {
        self.f("budget.delta", recorded.delta, again.delta);
        self.f("budget.spent", recorded.spent, again.spent);
        self.f("budget.remaining", recorded.remaining, again.remaining);
        self.f(
            "budget.transcript_nats",
            recorded.transcript_nats,
            again.transcript_nats,
        );
        self.f(
            "budget.next_half_width",
            recorded.next_half_width,
            again.next_half_width,
        );
        self.eq(
            "budget.queries_left",
            recorded.queries_left,
            again.queries_left,
        );
        self.eq("budget.answered", recorded.answered, again.answered);
        self.eq("budget.refused", recorded.refused, again.refused);
    }
}

/// Keys that would carry exact scores; none may appear in a refusal.
const EXACT_KEYS: &[&str] = &["exact", "score", "losses", "errors", "loss"];

fn exact_key(v: &Value) -> Option<String> {
    match v {
        Value::Object(m) => m.iter().find_map(|(k, v)| {
            if EXACT_KEYS.contains(&k.as_str()) {
                Some(k.clone())
            } else {
                exact_key(v)
            }
        }),
        Value::Array(a) => a.iter().find_map(exact_key),
        _ => None,
    }
}

/// Replays `entries` (the genesis first) under `policy`, reporting every discrepancy.
/// `progress` is called with the number of entries done.
///
/// The replay itself is sequential (each answer's level depends on the transcript before it),
/// but the budget each entry shows (next half-width, queries left: many interval inversions)
/// is a pure function of the book at that point, so it is recomputed on worker threads from
/// snapshots while the replay goes on.
pub(crate) fn replay(
    policy: &HoldoutPolicy,
    entries: &[Entry],
    progress: &mut dyn FnMut(u64),
) -> Replay {
    let chain = entries.first().map(|e| e.chain.as_str()).unwrap_or("");
    let workers = std::thread::available_parallelism()
        .map(|n| n.get().saturating_sub(1))
        .unwrap_or(1)
        .clamp(1, 8);
    let (tx, rx) = std::sync::mpsc::sync_channel::<BudgetJob>(4096);
    let rx = std::sync::Mutex::new(rx);
    std::thread::scope(|scope| {
        let handles: Vec<_> = (0..workers)
            .map(|_| {
                let rx = &rx;
                scope.spawn(move || {
                    let mut found = Vec::new();
                    loop {
                        let job = match rx.lock() {
                            Ok(r) => r.recv(),
                            Err(_) => break,
                        };
                        let Ok(job) = job else { break };
                        let again = job.book.budget(policy, &job.team);
                        let mut cmp = Cmp {
                            chain,
                            entry: job.entry,
                            out: Vec::new(),
                            jobs: None,
                        };
                        cmp.budget(&job.recorded, &again);
                        found.append(&mut cmp.out);
                    }
                    found
                })
            })
            .collect();
        let mut out = replay_serial(policy, entries, progress, &tx);
        drop(tx);
        for h in handles {
            if let Ok(mut found) = h.join() {
                out.findings.append(&mut found);
            }
        }
        out.findings.sort_by_key(|f| f.entry);
        let flagged: std::collections::HashSet<u64> =
            out.findings.iter().filter_map(|f| f.entry).collect();
        for q in &mut out.queries {
            q.replayed &= !flagged.contains(&q.entry);
        }
        out
    })
}

/// Refusals change nothing in the accountant (they charge nothing; only the refusal counts
/// move), so during a run of refusals the public state is the same: its decision and its budget
/// are computed once per accountant state and reused, with the counts moved on.
/// (accountant generation, team, target, reason code).
type DecisionKey = (u64, String, usize, String);

#[derive(Default)]
struct RefusalMemo {
    /// Bumped after every answer: the accountant's state changed.
    generation: u64,
    /// (generation, team, target, reason) -> the recomputed message, if the reason holds.
    decisions: HashMap<DecisionKey, Option<(String, bool)>>,
    /// (generation, team) -> budget then, and the count it was computed at.
    budgets: HashMap<(u64, String), (BudgetView, u64)>,
    refused_total: u64,
    refused_by_team: HashMap<String, u64>,
}

impl RefusalMemo {
    fn count(&self, policy: &HoldoutPolicy, team: &str) -> u64 {
        if policy.isolated() {
            self.refused_by_team.get(team).copied().unwrap_or(0)
        } else {
            self.refused_total
        }
    }
}

fn replay_serial(
    policy: &HoldoutPolicy,
    entries: &[Entry],
    progress: &mut dyn FnMut(u64),
    jobs: &Jobs,
) -> Replay {
    let mut out = Replay::default();
    let chain = entries.first().map(|e| e.chain.as_str()).unwrap_or("");
    let mut book = match Book::new(policy) {
        Ok(b) => b,
        Err(e) => {
            out.findings
                .push(finding(chain, 0, "policy", format!("cannot replay: {e}")));
            return out;
        }
    };
    let quota = u64::from(policy.daily_quota);
    let mut today: HashMap<(String, String), u64> = HashMap::new();
    let mut closed_at: Option<u64> = None;
    let mut memo = RefusalMemo::default();
    for (i, e) in entries.iter().enumerate().skip(1) {
        if i % 4096 == 0 {
            progress(i as u64);
        }
        let mut cmp = Cmp {
            chain,
            entry: e.seq,
            out: Vec::new(),
            jobs: Some(jobs),
        };
        match e.kind.as_str() {
            "answer" => {
                if let Some(c) = closed_at {
                    cmp.out.push(finding(
                        chain,
                        e.seq,
                        "kind",
                        format!("answered after the holdout was closed at entry {c}"),
                    ));
                }
                let ok = answer(policy, &mut book, e, quota, &mut today, &mut cmp, &mut out);
                memo.generation += 1;
                if let Some(q) = out.queries.last_mut().filter(|q| q.entry == e.seq) {
                    q.replayed = ok && cmp.out.is_empty();
                }
            }
            "refusal" => {
                out.refusals += 1;
                let v = serde_json::from_str::<Value>(&e.body).unwrap_or_default();
                out.refusal_list.push((
                    e.seq,
                    format!(
                        "team {}, {} ({})",
                        v["team"].as_str().unwrap_or("?"),
                        v["reason"].as_str().unwrap_or("?"),
                        v["at"].as_str().unwrap_or("?")
                    ),
                ));
                refusal(policy, &mut book, e, quota, &today, &mut cmp, &mut memo);
            }
            "read" => {
                let what = serde_json::from_str::<Value>(&e.body)
                    .ok()
                    .map(|v| {
                        format!(
                            "{} by {} at {}",
                            v["what"].as_str().unwrap_or("?"),
                            v["by"].as_str().unwrap_or("?"),
                            v["at"].as_str().unwrap_or("?")
                        )
                    })
                    .unwrap_or_else(|| "unreadable read entry".into());
                out.reads.push((e.seq, what));
            }
            "adopt" => {
                // A free adoption of another team's answered file (core 2 ladder): the
                // engine's own replay step checks it against the source entry and the core.
                match book.replay_adoption(policy, entries, e) {
                    Ok(()) => {
                        if let Ok(r) = serde_json::from_str::<AnswerRecord>(&e.body) {
                            cmp.defer_budget(&book, &r.team, &r.budget);
                        }
                    }
                    Err(err) => cmp
                        .out
                        .push(finding(chain, e.seq, "replay", err.to_string())),
                }
                memo.generation += 1;
            }
            "sealed" | "round" => {
                // Competition entries move the accountant too; the engine's own replay step
                // checks them against the core.
                if let Err(err) = crate::engine::replay_competition_entry(&mut book, policy, e) {
                    cmp.out
                        .push(finding(chain, e.seq, "replay", err.to_string()));
                }
                memo.generation += 1;
            }
            "close" => closed_at = Some(e.seq),
            "genesis" => cmp.out.push(finding(
                chain,
                e.seq,
                "kind",
                "a second genesis entry inside the chain".into(),
            )),
            _ => {}
        }
        out.findings.append(&mut cmp.out);
    }
    progress(entries.len() as u64);
    out
}

fn day_of(at: &str) -> String {
    at.get(..10).unwrap_or("").to_string()
}

fn answer(
    policy: &HoldoutPolicy,
    book: &mut Book,
    e: &Entry,
    quota: u64,
    today: &mut HashMap<(String, String), u64>,
    cmp: &mut Cmp<'_>,
    out: &mut Replay,
) -> bool {
    let r: AnswerRecord = match serde_json::from_str(&e.body) {
        Ok(r) => r,
        Err(err) => {
            cmp.out.push(finding(
                cmp.chain,
                e.seq,
                "body",
                format!("not an answer record: {err}"),
            ));
            return false;
        }
    };
    out.queries.push(QuerySummary {
        entry: e.seq,
        query: r.query,
        team: r.team.clone(),
        target: r.target.clone(),
        symbol: r.symbol.clone(),
        lower: r.lower,
        upper: r.upper,
        level_nats: r.level_nats,
        code_nats: r.code_nats,
        digest: r.digest.clone(),
        replayed: false,
    });
    let day = day_of(&r.at);
    if chrono::DateTime::parse_from_rfc3339(&r.at).is_err() {
        cmp.out.push(finding(
            cmp.chain,
            e.seq,
            "at",
            format!("{:?} is not an RFC 3339 time", r.at),
        ));
    }
    let used = today.entry((r.team.clone(), day)).or_default();
    if quota > 0 && *used >= quota {
        cmp.out.push(finding(
            cmp.chain,
            e.seq,
            "quota",
            format!(
                "team {} was answered beyond its daily quota of {quota} (public fact: answers that \
                 UTC day)",
                r.team
            ),
        ));
    }
    *used += 1;
    let Some(t) = policy.targets.get(r.target_index) else {
        cmp.out.push(finding(
            cmp.chain,
            e.seq,
            "target_index",
            format!("{} is not a target of the policy", r.target_index),
        ));
        return false;
    };
    cmp.eq("target", r.target.as_str(), t.name.as_str());
    let Some(losses) = r.exact.clone() else {
        cmp.out.push(finding(
            cmp.chain,
            e.seq,
            "exact",
            "the answer carries no exact losses, so it cannot be replayed".into(),
        ));
        return false;
    };
    cmp.eq("models", r.models as usize, losses.len());
    for (m, l) in losses.iter().enumerate() {
        if l.rows != policy.core.rows || !(0.0..=l.rows as f64).contains(&l.sum) {
            cmp.out.push(finding(
                cmp.chain,
                e.seq,
                &format!("exact[{m}]"),
                format!(
                    "loss sum {} over {} rows is impossible for this holdout ({} rows)",
                    l.sum, l.rows, policy.core.rows
                ),
            ));
        }
    }
    let quote = match book.quote(policy, &r.team, r.target_index, r.models) {
        Ok(q) => q,
        Err(why) => {
            cmp.out.push(finding(
                cmp.chain,
                e.seq,
                "kind",
                format!(
                    "answered, but the public state at this point refuses it ({}: {why})",
                    why.code()
                ),
            ));
            return false;
        }
    };
    let again = match book.answer(policy, &r.team, r.target_index, &quote, &losses) {
        Ok(a) => a,
        Err(err) => {
            cmp.out.push(finding(
                cmp.chain,
                e.seq,
                "exact",
                format!("the core cannot answer from these losses: {err}"),
            ));
            return false;
        }
    };
    cmp.eq("query", r.query, again.query);
    cmp.eq("symbol", r.symbol.as_str(), again.symbol.as_str());
    cmp.eq(
        "score",
        r.score.map(f64::to_bits),
        again.score.map(f64::to_bits),
    );
    cmp.f("lower", r.lower, again.lower);
    cmp.f("upper", r.upper, again.upper);
    cmp.f("delta_i", r.delta_i, again.delta_i);
    cmp.f("level_nats", r.level_nats, again.level_nats);
    cmp.f("code_nats", r.code_nats, again.code_nats);
    cmp.eq("statement", r.statement.as_str(), again.statement.as_str());
    cmp.eq("best_model", r.best_model, again.best_model);
    if r.core != again.core {
        cmp.out.push(finding(
            cmp.chain,
            e.seq,
            "core",
            "the core's own record differs from what the core computes again".into(),
        ));
    }
    cmp.defer_budget(book, &r.team, &r.budget);
    true
}

fn refusal(
    policy: &HoldoutPolicy,
    book: &mut Book,
    e: &Entry,
    quota: u64,
    today: &HashMap<(String, String), u64>,
    cmp: &mut Cmp<'_>,
    memo: &mut RefusalMemo,
) {
    let raw: Value = serde_json::from_str(&e.body).unwrap_or(Value::Null);
    if let Some(k) = exact_key(&raw) {
        cmp.out.push(finding(
            cmp.chain,
            e.seq,
            &k,
            "a refusal carries a score-like field; refusals must be decided before scoring".into(),
        ));
    }
    let r: RefusalRecord = match serde_json::from_value(raw) {
        Ok(r) => r,
        Err(err) => {
            cmp.out.push(finding(
                cmp.chain,
                e.seq,
                "body",
                format!("not a refusal record: {err}"),
            ));
            book.note_refusal(policy, "");
            memo.refused_total += 1;
            return;
        }
    };
    let now_count = memo.count(policy, &r.team);
    let (view, at_count) = memo
        .budgets
        .entry((memo.generation, r.team.clone()))
        .or_insert_with(|| (book.budget(policy, &r.team), now_count))
        .clone();
    let mut expected = view;
    expected.refused += now_count - at_count;
    cmp.budget(&r.budget, &expected);
    let target = policy.targets.iter().position(|t| t.name == r.target);
    match r.reason.as_str() {
        "quota" => {
            let used = today
                .get(&(r.team.clone(), day_of(&r.at)))
                .copied()
                .unwrap_or(0);
            if quota == 0 || used < quota {
                cmp.out.push(finding(
                    cmp.chain,
                    e.seq,
                    "reason",
                    format!(
                        "refused for the quota, but team {} had {used} answers that day (quota {})",
                        r.team,
                        if quota == 0 {
                            "none".to_string()
                        } else {
                            quota.to_string()
                        }
                    ),
                ));
            }
        }
        "max-cost" => cmp.out.push(finding(
            cmp.chain,
            e.seq,
            "reason",
            "max-cost refusals are local and never recorded".into(),
        )),
        code => {
            // The number of models is not recorded with a refusal: accept the decision when
            // some batch size reproduces it from the public state, message included.
            let key = (
                memo.generation,
                r.team.clone(),
                target.unwrap_or(usize::MAX),
                code.to_string(),
            );
            let decided = memo
                .decisions
                .entry(key)
                .or_insert_with(|| {
                    target.and_then(|t| {
                        (1..=64u32).find_map(|m| match book.quote(policy, &r.team, t, m) {
                            Err(why) if why.code() == code => {
                                Some((why.to_string(), matches!(why, RefusalReason::Core(_))))
                            }
                            _ => None,
                        })
                    })
                })
                .clone();
            match decided {
                None => cmp.out.push(finding(
                    cmp.chain,
                    e.seq,
                    "reason",
                    format!(
                        "refused as {code:?}, but the public state at this point does not refuse \
                         for that reason"
                    ),
                )),
                Some((message, core)) => {
                    if core && message != r.message {
                        cmp.out.push(finding(
                            cmp.chain,
                            e.seq,
                            "message",
                            format!("recorded {:?}, replay computes {message:?}", r.message),
                        ));
                    }
                }
            }
        }
    }
    book.note_refusal(policy, &r.team);
    memo.refused_total += 1;
    *memo.refused_by_team.entry(r.team.clone()).or_default() += 1;
}
