//! The holdout policy as the daemon stores it, and the bridge to the accounting core.
//!
//! [`Book`] wraps the core's [`Accountant`] with what the daemon adds: refusal counts and the
//! translation between ledger records and the core's requests and outcomes. The accountant of a
//! holdout is rebuilt by [`Book::replay`] from its ledger, which also checks that every recorded
//! answer is what the core computes again, so a database whose ledger was edited, or a binary
//! whose accounting changed, stops instead of answering on a wrong budget.

use std::collections::BTreeMap;
use std::fmt;

use serde::{Deserialize, Serialize};

use super::create::TargetDecl;
use super::records::{AnswerRecord, BudgetView, CoreJson};
use crate::error::{Error, Result};
use crate::ledger::{Entry, Kind};
use crate::metric::Loss;
use crate::stats::accounting::{
    Accountant, Answer, Charge, CountsRelease, Outcome, QueryRequest, Refusal,
};
use crate::stats::policy::{Policy, Sharing, TargetPolicy, ToleranceReference, guarantee_text};
use crate::stats::rules::{Rule, Symbol};
use crate::stats::schedule::{Schedule, Shares};

/// The policy exactly as the custodian gave it (empty fields take the defaults).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PolicyInput {
    /// Total failure probability, in (0, 1).
    pub delta: f64,
    /// `series` or `even:K`.
    pub schedule: String,
    /// Answer rule spec.
    pub answers: String,
    /// Widest half-width worth answering.
    pub tolerance: f64,
    /// `shared` or `isolated`.
    pub sharing: String,
    /// `worst-case` or `last-released`.
    pub tolerance_reference: String,
    /// `none`, `on-arrival`, or `roster:TEAM,TEAM,...[:RESERVE]`.
    pub shares: String,
    /// Answered queries per team per UTC day; 0 for no quota.
    pub daily_quota: u32,
    /// Sealed rounds: the deadline (RFC 3339, UTC) after which entries are refused and the
    /// round closes by itself; empty for none (the organizer closes it).
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub closes_at: String,
    /// Sealed rounds: the fraction of delta reserved for the ranking's paired comparisons
    /// (0: the default, 0.2).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub ranking_share: f64,
    /// Who sees the leaderboard: `public` (every caller) or `organizers` (organizers and
    /// auditors; analysts see their own team's row); empty for the default, `public` under
    /// `shared` and `organizers` under `isolated`.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub leaderboard: String,
}

fn is_zero(x: &f64) -> bool {
    *x == 0.0
}

/// The fraction of delta a sealed round reserves for its ranking when the policy names none.
pub const DEFAULT_RANKING_SHARE: f64 = 0.2;

impl Default for PolicyInput {
    fn default() -> Self {
        PolicyInput {
            delta: 0.05,
            schedule: "series".into(),
            answers: "rounded:0.01".into(),
            tolerance: 0.05,
            sharing: "shared".into(),
            tolerance_reference: "worst-case".into(),
            shares: "none".into(),
            daily_quota: 0,
            closes_at: String::new(),
            ranking_share: 0.0,
            leaderboard: String::new(),
        }
    }
}

/// A holdout's complete policy: the accounting core's policy plus the daemon's own parts.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HoldoutPolicy {
    /// The input, with defaults filled in.
    pub input: PolicyInput,
    /// The accounting core's policy.
    pub core: Policy,
    /// Daily quota per team (0: none).
    pub daily_quota: u32,
    /// Targets with their metrics and declared label domains.
    pub targets: Vec<TargetDecl>,
    /// Sealed rounds: the deadline, parsed from `input.closes_at`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub closes_at: Option<chrono::DateTime<chrono::Utc>>,
    /// Sealed rounds: the part of delta reserved for the ranking's paired comparisons
    /// (`core.delta` is what is left for the sealed answers; they sum to `input.delta`).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub ranking_delta: f64,
    /// Whether analysts see every team's row of the leaderboard.
    #[serde(default = "yes")]
    pub public_leaderboard: bool,
}

fn yes() -> bool {
    true
}

fn or_default(value: &str, default: &str) -> String {
    if value.trim().is_empty() {
        default.to_string()
    } else {
        value.trim().to_string()
    }
}

/// Parses a shares spec.
pub(crate) fn parse_shares(spec: &str) -> Result<Shares> {
    let spec = spec.trim();
    match spec {
        "none" => return Ok(Shares::None),
        "on-arrival" => return Ok(Shares::OnArrival),
        _ => {}
    }
    let Some(rest) = spec.strip_prefix("roster:") else {
        return Err(Error::invalid(
            "shares",
            format!("unknown shares {spec:?}; use none, on-arrival or roster:TEAM,TEAM[:RESERVE]"),
        ));
    };
    let (names, reserve) = match rest.rsplit_once(':') {
        Some((names, r)) => {
            let r: f64 = r.trim().parse().map_err(|_| {
                Error::invalid("shares", format!("roster reserve {r:?} is not a number"))
            })?;
            (names, r)
        }
        None => (rest, 0.0),
    };
    let analysts: Vec<String> = names
        .split(',')
        .map(|s| s.trim().to_string())
        .filter(|s| !s.is_empty())
        .collect();
    Ok(Shares::Roster { analysts, reserve })
}

impl HoldoutPolicy {
    /// Builds and validates a policy for `rows` rows. Errors name the offending field.
    pub fn build(
        input: &PolicyInput,
        targets: Vec<TargetDecl>,
        rows: u64,
    ) -> Result<HoldoutPolicy> {
        let defaults = PolicyInput::default();
        let input = PolicyInput {
            delta: input.delta,
            schedule: or_default(&input.schedule, &defaults.schedule),
            answers: or_default(&input.answers, &defaults.answers),
            tolerance: input.tolerance,
            sharing: or_default(&input.sharing, &defaults.sharing),
            tolerance_reference: or_default(
                &input.tolerance_reference,
                &defaults.tolerance_reference,
            ),
            shares: or_default(&input.shares, &defaults.shares),
            daily_quota: input.daily_quota,
            closes_at: input.closes_at.trim().to_string(),
            ranking_share: input.ranking_share,
            leaderboard: input.leaderboard.trim().to_string(),
        };
        let schedule: Schedule = input
            .schedule
            .parse()
            .map_err(|e: crate::stats::schedule::ScheduleError| Error::invalid("schedule", e.0))?;
        let rule: Rule = input
            .answers
            .parse()
            .map_err(|e: crate::stats::rules::RuleError| Error::invalid("answers", e.0))?;
        let round = super::compete::RoundTerms::build(&input, &rule)?;
        let sharing = match input.sharing.as_str() {
            "shared" => Sharing::Shared,
            "isolated" => Sharing::Isolated,
            other => {
                return Err(Error::invalid(
                    "sharing",
                    format!("unknown sharing assumption {other:?}; use shared or isolated"),
                ));
            }
        };
        let tolerance_reference = match input.tolerance_reference.as_str() {
            "worst-case" => ToleranceReference::WorstCase,
            "last-released" => ToleranceReference::LastReleased,
            other => {
                return Err(Error::invalid(
                    "tolerance_reference",
                    format!("unknown reference {other:?}; use worst-case or last-released"),
                ));
            }
        };
        let shares = parse_shares(&input.shares)?;
        let public_leaderboard =
            super::compete::public_leaderboard(&input.leaderboard, sharing == Sharing::Isolated)?;
        let mut core_targets = Vec::with_capacity(targets.len());
        for t in &targets {
            core_targets.push(TargetPolicy {
                name: t.name.clone(),
                binary: t.metric.is_binary(),
                method: t
                    .method
                    .parse()
                    .map_err(|e: crate::stats::interval::IntervalError| {
                        Error::invalid(format!("target {}", t.name), e.to_string())
                    })?,
                class_counts: None,
            });
        }
        let core = Policy {
            delta: input.delta - round.ranking_delta,
            schedule,
            rule,
            tolerance: input.tolerance,
            tolerance_reference,
            sharing,
            shares,
            rows,
            targets: core_targets,
            core_version: crate::stats::CORE,
            code_version: crate::stats::codes::CODE,
        };
        core.validate()
            .map_err(|e| Error::invalid(e.field, e.message))?;
        Ok(HoldoutPolicy {
            daily_quota: input.daily_quota,
            input,
            core,
            targets,
            closes_at: round.closes_at,
            ranking_delta: round.ranking_delta,
            public_leaderboard,
        })
    }

    /// The input as given, with defaults.
    pub fn input(&self) -> &PolicyInput {
        &self.input
    }

    /// Whether batches of models are answered (best-of).
    pub fn allows_batches(&self) -> bool {
        matches!(self.core.rule, Rule::BestOf(_))
    }

    /// The answer rule spec.
    pub fn answers_spec(&self) -> String {
        self.core.rule.to_string()
    }

    /// Whether each team has its own transcript.
    pub fn isolated(&self) -> bool {
        self.core.sharing == Sharing::Isolated
    }

    /// Whether entries are sealed until the round closes.
    pub fn sealed(&self) -> bool {
        matches!(self.core.rule, Rule::Sealed(_))
    }

    /// The guarantee sentence and its assumptions, stated at the committed total delta.
    pub fn guarantee(&self) -> String {
        let mut whole = self.core.clone();
        whole.delta = self.input.delta;
        let mut text = guarantee_text(&whole);
        text.push_str(&super::compete::guarantee_addendum(self));
        text
    }
}

/// Why a query is refused (all decided from public facts).
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum RefusalReason {
    /// The accounting core refused.
    Core(Refusal),
    /// The team's daily quota is used.
    Quota,
    /// The analyst's own `--max-cost` limit.
    MaxCost,
}

impl RefusalReason {
    /// Machine-readable code.
    pub(crate) fn code(&self) -> &'static str {
        match self {
            RefusalReason::Core(Refusal::ScheduleExhausted { .. }) => "budget-spent",
            RefusalReason::Core(Refusal::ToleranceExceeded { .. }) => "tolerance",
            RefusalReason::Core(Refusal::NoShare { .. }) => "shares",
            RefusalReason::Core(Refusal::BadRequest(_)) => "bad-request",
            RefusalReason::Quota => "quota",
            RefusalReason::MaxCost => "max-cost",
        }
    }
}

impl fmt::Display for RefusalReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            RefusalReason::Core(Refusal::ScheduleExhausted { answered }) => write!(
                f,
                "the budget is spent: the schedule funded {answered} queries and has no share \
                 left; nothing was charged"
            ),
            RefusalReason::Core(Refusal::ToleranceExceeded {
                half_width,
                tolerance,
            }) => write!(
                f,
                "the holdout is spent for this tolerance: the next interval would be +-{half_width:.4} \
                 at the reference score, wider than the tolerance {tolerance}; nothing was charged"
            ),
            RefusalReason::Core(r) => write!(f, "{r}; nothing was charged"),
            RefusalReason::Quota => f.write_str("the daily quota is used"),
            RefusalReason::MaxCost => f.write_str("the answer could cost more than --max-cost"),
        }
    }
}

/// What a query would be charged.
#[derive(Debug, Clone, PartialEq)]
pub struct Quote {
    /// The core's charge.
    pub charge: Charge,
    /// Query number (per pool).
    pub query: u64,
    /// Schedule share per model.
    pub delta_i: f64,
    /// ln(1/d_i).
    pub level_nats: f64,
    /// Half-width at the public reference score.
    pub half_width: f64,
    /// The most nats the answer could add to the transcript.
    pub worst_code_nats: f64,
}

/// The core's answer, flattened for the ledger record.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct AnswerCore {
    /// Query number.
    pub query: u64,
    /// Symbol as text.
    pub symbol: String,
    /// Released score.
    pub score: Option<f64>,
    /// Interval.
    pub lower: f64,
    /// Interval.
    pub upper: f64,
    /// Share.
    pub delta_i: f64,
    /// Level.
    pub level_nats: f64,
    /// Code.
    pub code_nats: f64,
    /// Statement.
    pub statement: String,
    /// Chosen model of a batch.
    pub best_model: Option<u32>,
    /// The core's answer as canonical JSON (replayed and compared by audits).
    pub core: CoreJson,
}

/// Formats a grid value `j/M` with as many decimals as the grid needs (`0.30` on a 0.01 grid,
/// `0.025` on a 0.025 grid), at most 6 when `M` does not divide a power of ten.
fn grid_text(v: f64, cells: Option<u64>) -> String {
    let decimals = cells
        .and_then(|m| (0..=9u32).find(|d| 10u64.pow(*d) % m.max(1) == 0))
        .unwrap_or(6) as usize;
    format!("{v:.decimals$}")
}

/// The released symbol as text.
pub(crate) fn symbol_text(symbol: &Symbol, score: Option<f64>, cells: Option<u64>) -> String {
    let s = score.map(|v| grid_text(v, cells)).unwrap_or_default();
    match symbol {
        Symbol::Cell { .. } => s,
        Symbol::Pass => "pass".into(),
        Symbol::Fail => "fail".into(),
        Symbol::NoImprovement => "no-improvement".into(),
        Symbol::NewBest { .. } => format!("new-best {s}"),
        Symbol::Best { model, .. } => format!("best=model-{model} {s}"),
    }
}

/// The accounting state of one holdout, as of some ledger head.
#[derive(Debug, Clone)]
pub(crate) struct Book {
    acct: Accountant,
    refused: BTreeMap<String, u64>,
    refused_total: u64,
    /// The latest UTC day with an answer or a sealed entry, and each team's count that day.
    quota_day: String,
    quota_counts: BTreeMap<String, u64>,
}

/// What the engine records of an accountant's answer: symbol text, released score, interval
/// and level. Charge, code, statement and best model start at nothing (an adoption's); a
/// charged answer sets its own.
fn answer_core(policy: &HoldoutPolicy, ans: &Answer, core: CoreJson) -> AnswerCore {
    AnswerCore {
        query: ans.query_number,
        symbol: symbol_text(
            &ans.symbol,
            ans.released_score,
            policy.core.rule.grid(policy.core.rows).map(|g| g.cells),
        ),
        score: ans.released_score,
        lower: ans.interval.lower,
        upper: ans.interval.upper,
        delta_i: 0.0,
        level_nats: ans.level_nats,
        code_nats: 0.0,
        statement: String::new(),
        best_model: None,
        core,
    }
}

fn outcome(binary: bool, loss: &Loss) -> Outcome {
    match (binary, loss.errors) {
        (true, Some(k)) => Outcome::Errors(k),
        _ => Outcome::LossSum(loss.sum),
    }
}

impl Book {
    /// A fresh book for a new holdout.
    pub(crate) fn new(policy: &HoldoutPolicy) -> Result<Book> {
        Ok(Book {
            acct: Accountant::new(policy.core.clone())
                .map_err(|e| Error::Internal(format!("stored policy: {e}")))?,
            refused: BTreeMap::new(),
            refused_total: 0,
            quota_day: String::new(),
            quota_counts: BTreeMap::new(),
        })
    }

    /// Counts an answer or a sealed entry of `team` on UTC `day` toward the daily quota. Only
    /// the latest day's counts are kept (entries are appended in time order, and the quota only
    /// ever asks about today): an entry of a later day starts a new count.
    pub(crate) fn count_quota(&mut self, team: &str, day: &str) {
        if day > self.quota_day.as_str() {
            self.quota_day = day.to_string();
            self.quota_counts.clear();
        }
        if day == self.quota_day {
            *self.quota_counts.entry(team.to_string()).or_default() += 1;
        }
    }

    /// Answers and sealed entries `team` had on UTC `day` (the daily quota's count; 0 for a day
    /// before the latest one counted).
    pub(crate) fn quota_used(&self, team: &str, day: &str) -> u64 {
        if day != self.quota_day {
            return 0;
        }
        self.quota_counts.get(team).copied().unwrap_or(0)
    }

    /// Refusals shown to `team` (its own under isolated, all otherwise).
    pub(crate) fn refused_count(&self, policy: &HoldoutPolicy, team: &str) -> u64 {
        if policy.isolated() {
            self.refused.get(team).copied().unwrap_or(0)
        } else {
            self.refused_total
        }
    }

    fn request(team: &str, target: usize, models: u32) -> QueryRequest {
        QueryRequest {
            analyst: team.to_string(),
            target,
            models: models.max(1),
        }
    }

    /// Decides refusal or charge from public facts only; changes nothing.
    pub(crate) fn quote(
        &self,
        _policy: &HoldoutPolicy,
        team: &str,
        target: usize,
        models: u32,
    ) -> std::result::Result<Quote, RefusalReason> {
        let req = Book::request(team, target, models);
        let charge = self.acct.quote(&req).map_err(RefusalReason::Core)?;
        let worst = self
            .acct
            .worst_code_nats(&req)
            .map_err(RefusalReason::Core)?;
        Ok(Quote {
            query: charge.query_number,
            delta_i: charge.delta_i,
            level_nats: charge.level_nats,
            half_width: charge.reference_half_width,
            worst_code_nats: worst,
            charge,
        })
    }

    /// A quote for display when the query would be refused: what the level would be, ignoring
    /// the tolerance (zeros when the schedule has nothing left).
    pub(crate) fn quote_ignoring_limits(
        &self,
        policy: &HoldoutPolicy,
        team: &str,
        target: usize,
        models: u32,
    ) -> Quote {
        let req = Book::request(team, target, models);
        let status = self.acct.status(Some(team));
        let worst = self.acct.worst_code_nats(&req).unwrap_or(0.0);
        let level = status.next_level_nats.unwrap_or(0.0);
        let half = status
            .targets
            .get(target)
            .and_then(|t| t.next_half_width)
            .unwrap_or(0.0);
        let _ = policy;
        Quote {
            charge: Charge {
                sequence: 0,
                request: req,
                query_number: status.next_query_number,
                shares: models.max(1),
                delta_i: 0.0,
                ln_inv_delta_i: 0.0,
                level_nats: level,
                transcript_nats: status.transcript_nats,
                delta_charged: 0.0,
                reference_half_width: half,
            },
            query: status.next_query_number,
            delta_i: 0.0,
            level_nats: level,
            half_width: half,
            worst_code_nats: worst,
        }
    }

    /// The nats a release of `target`'s class counts costs before `team`'s next answer on it,
    /// if they are due (public facts only).
    pub(crate) fn counts_pending(&self, team: &str, target: usize) -> Option<f64> {
        self.acct.counts_pending(team, target)
    }

    /// Releases `target`'s class counts to `team`'s transcript (the holdout's under `shared`).
    pub(crate) fn release_counts(
        &mut self,
        team: &str,
        target: usize,
        counts: &[u64],
    ) -> Result<CountsRelease> {
        self.acct
            .release_counts(team, target, counts)
            .map_err(|e| Error::Internal(format!("accounting: {e}")))
    }

    /// Answers a quoted query from the exact losses; advances the transcript.
    pub(crate) fn answer(
        &mut self,
        policy: &HoldoutPolicy,
        team: &str,
        target: usize,
        quote: &Quote,
        losses: &[Loss],
    ) -> Result<AnswerCore> {
        let req = Book::request(team, target, losses.len() as u32);
        let binary = policy.core.targets[target].binary;
        let outcomes: Vec<Outcome> = losses.iter().map(|l| outcome(binary, l)).collect();
        let ans = self
            .acct
            .answer(&req, &quote.charge, &outcomes)
            .map_err(|e| Error::Internal(format!("accounting: {e}")))?;
        let best_model = match ans.symbol {
            Symbol::Best { model, .. } => Some(model),
            _ => None,
        };
        let core = CoreJson::of_answer(&ans);
        Ok(AnswerCore {
            delta_i: ans.delta_i,
            code_nats: ans.code_nats,
            statement: ans.statement.clone(),
            best_model,
            ..answer_core(policy, &ans, core)
        })
    }

    /// Core 2, ladder under `shared`: the cell `team` may adopt at no charge from `src`, an
    /// answer another team received for the same file, when its released symbol fixes
    /// `team`'s answer (a new best at least one grid step below `team`'s best; DESIGN 4.8).
    /// `None`: the file is answered as a charged ladder query of `team` instead.
    pub(crate) fn adoptable(&self, team: &str, src: &AnswerRecord) -> Option<u64> {
        if src.team == team {
            return None;
        }
        let released: Answer = src.core.parse()?;
        match released.symbol {
            Symbol::NewBest { cell } if self.acct.can_adopt(team, src.target_index, cell) => {
                Some(cell)
            }
            _ => None,
        }
    }

    /// Adopts `cell` from the answer recorded at entry `src_seq` as `team`'s new best, free.
    /// The interval is the cell's at the level `src` was answered at.
    pub(crate) fn adopt(
        &mut self,
        policy: &HoldoutPolicy,
        team: &str,
        src_seq: u64,
        src: &AnswerRecord,
        cell: u64,
    ) -> Result<AnswerCore> {
        let ans = self
            .acct
            .adopt(team, src.target_index, cell, src.level_nats)
            .map_err(|e| Error::Internal(format!("accounting: {e}")))?;
        let core = serde_json::json!({ "adopted_from": src_seq, "answer": ans });
        Ok(AnswerCore {
            statement: format!(
                "adopted at no charge: another team's answer for this same file released a new \
                 best below this team's best, so it is this team's new best too ({}); the \
                 interval is at the level that answer was given",
                ans.statement
            ),
            ..answer_core(policy, &ans, CoreJson::from_value(&core))
        })
    }

    /// Replays an `adopt` entry: the source answer must be an earlier answer of another team
    /// for the same file and target whose symbol fixes this team's answer, and the adoption
    /// must be exactly what [`Book::adopt`] computes again.
    pub(crate) fn replay_adoption(
        &mut self,
        policy: &HoldoutPolicy,
        entries: &[Entry],
        e: &Entry,
    ) -> Result<()> {
        let bad = |why: String| Error::Internal(format!("ledger entry {} (adopt): {why}", e.seq));
        let r: AnswerRecord =
            serde_json::from_str(&e.body).map_err(|err| bad(format!("not an answer: {err}")))?;
        let src_seq = r
            .core
            .to_value()
            .get("adopted_from")
            .and_then(|v| v.as_u64())
            .ok_or_else(|| bad("no adopted_from".into()))?;
        let src_entry = entries
            .iter()
            .find(|x| x.seq == src_seq && x.seq < e.seq && x.kind() == Some(Kind::Answer))
            .ok_or_else(|| bad(format!("entry {src_seq} is not an earlier answer")))?;
        let src: AnswerRecord = serde_json::from_str(&src_entry.body)
            .map_err(|err| bad(format!("source entry {src_seq}: {err}")))?;
        if src.digest != r.digest || src.target_index != r.target_index {
            return Err(bad(format!(
                "source entry {src_seq} is another file or another target"
            )));
        }
        let cell = self.adoptable(&r.team, &src).ok_or_else(|| {
            bad(format!(
                "the answer at entry {src_seq} does not fix team {}'s answer: the file should \
                 have been a charged query",
                r.team
            ))
        })?;
        let again = self.adopt(policy, &r.team, src_seq, &src, cell)?;
        if again.symbol != r.symbol
            || again.score.map(f64::to_bits) != r.score.map(f64::to_bits)
            || again.level_nats.to_bits() != r.level_nats.to_bits()
            || again.lower.to_bits() != r.lower.to_bits()
            || again.upper.to_bits() != r.upper.to_bits()
            || again.core != r.core
            || r.exact.is_some()
            || r.code_nats != 0.0
            || r.delta_i != 0.0
        {
            return Err(bad(format!(
                "does not replay: recorded {} [{}, {}] at {} nats, recomputed {} [{}, {}] at {} \
                 nats",
                r.symbol,
                r.lower,
                r.upper,
                r.level_nats,
                again.symbol,
                again.lower,
                again.upper,
                again.level_nats
            )));
        }
        Ok(())
    }

    /// Takes a sealed entry's share now; its answer waits for [`Book::close_round`].
    pub(crate) fn seal(&mut self, team: &str, target: usize, quote: &Quote) -> Result<u64> {
        let req = Book::request(team, target, 1);
        self.acct
            .seal(&req, &quote.charge)
            .map(|r| r.ticket as u64)
            .map_err(|e| Error::Internal(format!("accounting: {e}")))
    }

    /// Sealed entries waiting for the close: (team, target) in ticket order.
    pub(crate) fn pending(&self) -> Vec<(String, usize)> {
        self.acct
            .pending()
            .iter()
            .map(|r| (r.charge.request.analyst.clone(), r.charge.request.target))
            .collect()
    }

    /// Closes the round: answers every sealed entry from its exact loss (ticket order).
    pub(crate) fn close_round(
        &mut self,
        policy: &HoldoutPolicy,
        losses: &[Loss],
    ) -> Result<Vec<AnswerCore>> {
        let outcomes: Vec<Outcome> = self
            .acct
            .pending()
            .iter()
            .zip(losses)
            .map(|(r, l)| outcome(policy.core.targets[r.charge.request.target].binary, l))
            .collect();
        let answers = self
            .acct
            .close_round(&outcomes)
            .map_err(|e| Error::Internal(format!("accounting: {e}")))?;
        let cells = policy.core.rule.grid(policy.core.rows).map(|g| g.cells);
        Ok(answers
            .into_iter()
            .map(|ans| AnswerCore {
                query: ans.query_number,
                symbol: symbol_text(&ans.symbol, ans.released_score, cells),
                score: ans.released_score,
                lower: ans.interval.lower,
                upper: ans.interval.upper,
                delta_i: ans.delta_i,
                level_nats: ans.level_nats,
                code_nats: ans.code_nats,
                statement: ans.statement.clone(),
                best_model: None,
                core: CoreJson::of_answer(&ans),
            })
            .collect())
    }

    /// Counts a refusal (public: refusals are decided from public facts).
    pub(crate) fn note_refusal(&mut self, _policy: &HoldoutPolicy, team: &str) {
        *self.refused.entry(team.to_string()).or_default() += 1;
        self.refused_total += 1;
    }

    /// The budget as `team` may see it (its own pool and transcript under isolated).
    pub(crate) fn budget(&self, policy: &HoldoutPolicy, team: &str) -> BudgetView {
        let s = self.acct.status(Some(team));
        let next_half_width = s
            .targets
            .iter()
            .map(|t| t.next_half_width.unwrap_or(1.0))
            .fold(0.0f64, f64::max);
        let queries_left = s.targets.iter().map(|t| t.queries_left).min().unwrap_or(0);
        let refused = if policy.isolated() {
            self.refused.get(team).copied().unwrap_or(0)
        } else {
            self.refused_total
        };
        // With one pool the budget is delta itself; computing it back from ln(1/delta) would
        // show float noise (0.05000000000000001).
        let (delta, remaining) = if policy.core.shares == Shares::None {
            (policy.core.delta, (policy.core.delta - s.spent).max(0.0))
        } else {
            (s.budget, s.remaining)
        };
        BudgetView {
            delta,
            spent: s.spent,
            remaining,
            transcript_nats: s.transcript_nats,
            next_half_width,
            queries_left,
            answered: s.answers,
            refused,
            open: true,
            quota_resets_at: None,
            quota_left_today: None,
        }
    }
}
