//! Competitions: the ladder leaderboard, sealed final rounds with their deadline, close and
//! ranking, and the report of identical predictions submitted by different teams.
//!
//! Sealed rounds (DESIGN 4.3 `sealed`). An entry takes its share when it arrives, at the level
//! of the answers released before it ([`super::account::Book::seal`]); its per-row losses are
//! kept in `sealed_entries` until the close, and the ledger records the entry without anything
//! about its score. The round closes at the deadline (checked from the injected clock on every
//! call that touches the holdout) or by an organizer; then every entry is answered at once and
//! the teams' selected entries (the last one each team marked, else its last entry) are ranked
//! by released score. Neighbours are compared with paired intervals (DESIGN 4.6) at a level
//! from the ranking's reserve: `ranking_delta` split evenly over all `K (K - 1) / 2` pairs, so
//! the intervals hold simultaneously for whichever pairs end up adjacent. From core version 2
//! a round with several targets ranks each target on its own (a team's selected entry per
//! target, ranks from 1 in each, neighbours only within a target, the reserve split over the
//! pairs within targets): entries of different targets measure different losses and are never
//! compared. Core version 1 rounds keep their one mixed ranking, so they replay unchanged. The sealed answers
//! use the rest of delta, so the whole holdout stays within the committed delta. The close is
//! the holdout's last event (nothing is answered after it), so neither the cells nor the
//! comparisons have to be coded for a later query.

use std::collections::{BTreeMap, BTreeSet};

use chrono::{DateTime, Utc};
use rusqlite::{OptionalExtension, params};
use serde::{Deserialize, Serialize};

use super::account::{Book, DEFAULT_RANKING_SHARE, HoldoutPolicy, PolicyInput, Quote};
use super::records::{AnswerRecord, Comparison, RankedEntry, RoundRecord, SealedRecord};
use super::replay::Record;
use super::submit::{Receipt, SubmitOutcome, SubmitRequest};
use super::{Engine, Loaded};
use crate::auth::{Caller, Role, rfc3339};
use crate::error::{Error, Result};
use crate::ledger;
use crate::metric::{Labels, Loss, Metric, Predictions};
use crate::stats::interval::Rounding;
use crate::stats::paired::{paired_bounded, paired_errors_with};
use crate::stats::rules::Rule;

/// The parts of a policy that only sealed rounds have.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct RoundTerms {
    pub(crate) closes_at: Option<DateTime<Utc>>,
    pub(crate) ranking_delta: f64,
}

impl RoundTerms {
    /// Parses and checks `closes_at` and `ranking_share` against the rule.
    pub(crate) fn build(input: &PolicyInput, rule: &Rule) -> Result<RoundTerms> {
        let sealed = matches!(rule, Rule::Sealed(_));
        let closes_at = if input.closes_at.is_empty() {
            None
        } else {
            if !sealed {
                return Err(Error::invalid(
                    "closes_at",
                    "only sealed rounds have a deadline (answers: sealed or sealed:ETA)",
                ));
            }
            let t = DateTime::parse_from_rfc3339(&input.closes_at).map_err(|e| {
                Error::invalid(
                    "closes_at",
                    format!(
                        "{:?} is not an RFC 3339 time such as 2026-05-01T12:00:00Z ({e})",
                        input.closes_at
                    ),
                )
            })?;
            Some(t.with_timezone(&Utc))
        };
        let share = input.ranking_share;
        if !sealed {
            if share != 0.0 {
                return Err(Error::invalid(
                    "ranking_share",
                    "only sealed rounds reserve a share for a ranking",
                ));
            }
            return Ok(RoundTerms {
                closes_at,
                ranking_delta: 0.0,
            });
        }
        let share = if share == 0.0 {
            DEFAULT_RANKING_SHARE
        } else {
            share
        };
        if !(share > 0.0 && share < 1.0) {
            return Err(Error::invalid(
                "ranking_share",
                format!("must lie in (0, 1), got {share}"),
            ));
        }
        Ok(RoundTerms {
            closes_at,
            ranking_delta: input.delta * share,
        })
    }
}

/// Who sees the leaderboard; a public one is refused under `isolated`, which it would break.
pub(crate) fn public_leaderboard(spec: &str, isolated: bool) -> Result<bool> {
    match spec {
        "" => Ok(!isolated),
        "organizers" => Ok(false),
        "public" if isolated => Err(Error::invalid(
            "leaderboard",
            "a public leaderboard shows every team's answers to every team, which breaks the \
             isolated assumption (one transcript per team); use sharing shared, or leaderboard \
             organizers",
        )),
        "public" => Ok(true),
        other => Err(Error::invalid(
            "leaderboard",
            format!("unknown leaderboard visibility {other:?}; use public or organizers"),
        )),
    }
}

/// What the guarantee adds for ladder holdouts and sealed rounds.
pub(crate) fn guarantee_addendum(p: &HoldoutPolicy) -> String {
    match p.core.rule {
        Rule::Ladder(_) => "\nLeaderboard (ladder): a team's interval covers the smallest true \
                            error among that team's submissions so far (inside the simultaneous \
                            guarantee); it says nothing about any one file."
            .to_string(),
        Rule::Sealed(_) => format!(
            "\nSealed round: nothing about any entry is released before the close{}; the \
             entries' answers use {} of delta and the ranking's paired comparisons the other {} \
             (split evenly over every pair of ranked entries).",
            p.closes_at
                .map(|t| format!(" (deadline {})", rfc3339(t)))
                .unwrap_or_default(),
            seven_digits(p.core.delta),
            seven_digits(p.ranking_delta)
        ),
        _ => String::new(),
    }
}

/// One team's row of a leaderboard: on a ladder, the team's best so far; under other rules, the
/// team's released answer with the lowest upper limit on one target (best per team).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct LeaderboardRow {
    /// Rank, from 1 (teams with no released best come last, unranked: 0); under other rules
    /// than the ladder, counted within the row's target.
    pub rank: u64,
    /// Team.
    pub team: String,
    /// Target of the row.
    pub target: String,
    /// Query number of the answer the row shows (the number its reply, receipt and history
    /// give it; per team under `isolated`); 0 before a ladder team's first new best.
    pub query: u64,
    /// Best score so far on the grid (`None` before a first new best).
    pub best: Option<f64>,
    /// Interval for the smallest true error among the team's submissions, from its latest
    /// answer.
    pub lower: f64,
    /// Upper end.
    pub upper: f64,
    /// Answered submissions.
    pub submissions: u64,
    /// New bests released.
    pub improvements: u64,
    /// Ledger entry of the latest new best (ties on `best` go to the earlier one).
    pub best_entry: Option<u64>,
    /// Time of the latest new best.
    pub best_at: Option<String>,
}

/// A ladder leaderboard with its guarantee.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Leaderboard {
    /// Holdout.
    pub holdout: String,
    /// Target.
    pub target: String,
    /// Rows, ranked.
    pub rows: Vec<LeaderboardRow>,
    /// What the leaderboard certifies.
    pub statement: String,
    /// The holdout's guarantee with its assumptions.
    pub guarantee: String,
    /// Whether other teams' rows were withheld from this caller.
    pub own_team_only: bool,
    /// `ladder` (each team's best so far on the grid) or `best-per-team` (each team's released
    /// answer with the lowest upper limit, per target).
    pub kind: String,
}

/// One team's entries on one target of a sealed round, as status shows them. Nothing about
/// a score: only counts, and which entry the round will rank for the team.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RoundTeam {
    /// Team.
    pub team: String,
    /// Target.
    pub target: String,
    /// Entries the team made on the target.
    pub entries: u64,
    /// Query number of the team's selected entry (the one the close ranks): its latest marked
    /// entry, else its latest entry. Numbered as in its reply, receipt and history.
    pub selected: u64,
    /// Whether the team marked that entry itself (else it is selected as the latest).
    pub marked: bool,
}

/// A sealed round's entries per team, for status.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct RoundStatus {
    /// Teams with entries, by target then team.
    pub teams: Vec<RoundTeam>,
    /// Declared (roster) teams with no entry yet; empty when the caller sees only its own team.
    pub not_submitted: Vec<String>,
    /// Whether the round has closed.
    pub closed: bool,
    /// Whether other teams were withheld from this caller (`isolated`).
    pub own_team_only: bool,
}

/// The final ranking of a closed round.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Ranking {
    /// Holdout.
    pub holdout: String,
    /// When and how it closed.
    pub closed_at: String,
    /// `deadline` or `organizer`.
    pub trigger: String,
    /// Entries, best first.
    pub entries: Vec<RankedEntry>,
    /// Each entry's query number (as its reply, receipt and history number it), in the order
    /// of `entries`.
    pub queries: Vec<u64>,
    /// Neighbour comparisons, top first.
    pub comparisons: Vec<Comparison>,
    /// What the comparisons certify.
    pub statement: String,
    /// The holdout's guarantee with its assumptions.
    pub guarantee: String,
}

/// Identical predictions submitted by more than one team.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Duplicate {
    /// The prediction digest.
    pub digest: String,
    /// The teams, sorted.
    pub teams: Vec<String>,
    /// Ledger entries `(entry, team, user)` that carried it.
    pub entries: Vec<(u64, String, String)>,
}

/// Per-row losses of one model, in the holdout's row order.
pub(crate) fn row_losses(metric: &Metric, labels: &Labels, preds: &Predictions) -> Vec<f64> {
    match (labels, preds) {
        (Labels::Classes(y), Predictions::Classes(p)) => y
            .iter()
            .zip(p)
            .map(|(a, b)| if u32::from(*a) == *b { 0.0 } else { 1.0 })
            .collect(),
        (Labels::ManyClasses(y), Predictions::Classes(p)) => y
            .iter()
            .zip(p)
            .map(|(a, b)| if a == b { 0.0 } else { 1.0 })
            .collect(),
        (Labels::Numbers(y), Predictions::Numbers(p)) => y
            .iter()
            .zip(p)
            .map(|(label, pred)| metric.numeric_loss(*pred, *label))
            .collect(),
        _ => Vec::new(),
    }
}

fn encode_losses(v: &[f64]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn decode_losses(b: &[u8]) -> Vec<f64> {
    b.chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().expect("8 bytes")))
        .collect()
}

/// The exact loss of a per-row loss vector (summed in row order, like the scorer).
fn loss_of(binary: bool, v: &[f64]) -> Loss {
    let sum: f64 = v.iter().sum();
    Loss {
        rows: v.len() as u64,
        errors: binary.then(|| v.iter().filter(|x| **x != 0.0).count() as u64),
        sum,
    }
}

/// The paired comparison of two per-row loss vectors at `level_nats` (DESIGN 4.6).
pub(crate) fn compare(
    rounding: Rounding,
    binary: bool,
    a: &[f64],
    b: &[f64],
    level_nats: f64,
) -> Result<(f64, f64, Comparison)> {
    let n = a.len() as u64;
    let mut c = Comparison {
        ahead: 0,
        behind: 0,
        lower: -1.0,
        upper: 1.0,
        level_nats,
        distinguishable: false,
        a_only: None,
        b_only: None,
        sum_diff: None,
        sum_sq_diff: None,
        target: None,
    };
    let ci = if binary {
        let a_only = a.iter().zip(b).filter(|(x, y)| **x > **y).count() as u64;
        let b_only = a.iter().zip(b).filter(|(x, y)| **x < **y).count() as u64;
        c.a_only = Some(a_only);
        c.b_only = Some(b_only);
        paired_errors_with(rounding, n, a_only, b_only, level_nats)
    } else {
        let (s, s2) = a.iter().zip(b).fold((0.0, 0.0), |(s, s2), (x, y)| {
            let d = x - y;
            (s + d, s2 + d * d)
        });
        c.sum_diff = Some(s);
        c.sum_sq_diff = Some(s2);
        paired_bounded(n, s, s2, level_nats)
    }
    .map_err(|e| Error::Internal(format!("paired comparison: {e}")))?;
    c.lower = ci.lower;
    c.upper = ci.upper;
    c.distinguishable = ci.lower > 0.0 || ci.upper < 0.0;
    Ok((ci.lower, ci.upper, c))
}

/// Recomputes a comparison from the statistics its record carries (audit replay).
pub fn replay_comparison(binary: bool, rows: u64, c: &Comparison) -> Option<(f64, f64)> {
    replay_comparison_with(Rounding::Nearest, binary, rows, c)
}

/// [`replay_comparison`] with the rounding of the holdout's core version.
pub(crate) fn replay_comparison_with(
    rounding: Rounding,
    binary: bool,
    rows: u64,
    c: &Comparison,
) -> Option<(f64, f64)> {
    let ci = if binary {
        paired_errors_with(rounding, rows, c.a_only?, c.b_only?, c.level_nats).ok()?
    } else {
        paired_bounded(rows, c.sum_diff?, c.sum_sq_diff?, c.level_nats).ok()?
    };
    Some((ci.lower, ci.upper))
}

/// `ln(1/d)` of each neighbour comparison: the reserve split over `pairs` pairs.
fn comparison_level(ranking_delta: f64, pairs: u64) -> f64 {
    (pairs.max(1) as f64).ln() - ranking_delta.ln()
}

/// `ln(1/d)` of the paired comparisons of a ranking of `entries` entries whose reserve is
/// `ranking_delta`: the reserve split evenly over all `entries (entries - 1) / 2` pairs, so
/// every pair's interval holds at once, whichever pairs the data make neighbours.
pub fn ranking_level(ranking_delta: f64, entries: u64) -> f64 {
    comparison_level(ranking_delta, entries * entries.saturating_sub(1) / 2)
}

/// `ln(1/d)` of each neighbour comparison of a round whose reserve is split over `pairs` pairs.
pub(crate) fn ranking_level_for_pairs(ranking_delta: f64, pairs: u64) -> f64 {
    comparison_level(ranking_delta, pairs)
}

/// A round's ranking derived from its sealed entries and their released answers (public
/// facts): used by the close to build it and by the replay to derive it again.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct RankPlan {
    /// The teams' selected entries, best first (within each target from core version 2).
    pub(crate) ranking: Vec<RankedEntry>,
    /// (ahead, behind) tickets of each pair of neighbours compared, top first.
    pub(crate) neighbours: Vec<(usize, usize)>,
    /// Pairs the reserve is split over: `K (K - 1) / 2` summed over the groups, at least 1.
    pub(crate) pairs: u64,
}

/// Ranks a round: one selected entry per team (and target from core version 2): its last
/// marked entry, else its last entry; ranked by released score within each group, ties to the
/// earlier entry; neighbours within a group are compared.
pub(crate) fn rank(
    policy: &HoldoutPolicy,
    sealed: &[SealedRecord],
    answers: &[AnswerRecord],
) -> RankPlan {
    // Core version 2 ranks each target on its own; version 1 had one mixed ranking.
    let per_target = policy.core.core_version >= 2;
    let group = |i: usize| {
        if per_target {
            sealed[i].target_index
        } else {
            0
        }
    };
    let mut selected: BTreeMap<(usize, &str), usize> = BTreeMap::new();
    for (i, rec) in sealed.iter().enumerate() {
        let key = (group(i), rec.team.as_str());
        let keep = match selected.get(&key) {
            Some(&j) => rec.marked || !sealed[j].marked,
            None => true,
        };
        if keep {
            selected.insert(key, i);
        }
    }
    let mut order: Vec<usize> = selected.values().copied().collect();
    order.sort_by(|&a, &b| {
        let sa = answers[a].score.unwrap_or(f64::INFINITY);
        let sb = answers[b].score.unwrap_or(f64::INFINITY);
        group(a)
            .cmp(&group(b))
            .then(sa.total_cmp(&sb))
            .then(a.cmp(&b))
    });
    let target_of = |i: usize| per_target.then(|| sealed[i].target.clone());
    let mut ranking: Vec<RankedEntry> = Vec::with_capacity(order.len());
    let mut sizes: BTreeMap<usize, u64> = BTreeMap::new();
    for &i in &order {
        let rank = sizes.entry(group(i)).or_insert(0);
        *rank += 1;
        ranking.push(RankedEntry {
            rank: *rank,
            team: sealed[i].team.clone(),
            ticket: i as u64,
            score: answers[i].score,
            lower: answers[i].lower,
            upper: answers[i].upper,
            digest: sealed[i].digest.clone(),
            target: target_of(i),
        });
    }
    let pairs = sizes
        .values()
        .map(|&k| k * k.saturating_sub(1) / 2)
        .sum::<u64>()
        .max(1);
    let neighbours = order
        .windows(2)
        .filter(|w| group(w[0]) == group(w[1]))
        .map(|w| (w[0], w[1]))
        .collect();
    RankPlan {
        ranking,
        neighbours,
        pairs,
    }
}

impl Engine {
    /// Closes a sealed round whose deadline has passed (on the injected clock). Called by every
    /// operation that touches a holdout, so the close happens at the first call after the
    /// deadline whatever it is; it depends only on the time, a public fact.
    pub(crate) fn settle(&mut self, loaded: &Loaded) -> Result<()> {
        let Some(deadline) = loaded.policy.closes_at else {
            return Ok(());
        };
        if self.now() < deadline || self.closed_at(loaded.id)?.is_some() {
            return Ok(());
        }
        match self.close_round_tx(loaded, "deadline", "daemon", deadline) {
            // Another connection closed it first.
            Err(Error::FailedPrecondition(_)) => Ok(()),
            other => other.map(|_| ()),
        }
    }

    /// Closes every sealed round whose deadline has passed, without waiting for a call that
    /// touches it; the daemon runs this on a timer. Returns the names of the rounds it closed.
    pub fn settle_deadlines(&mut self) -> Result<Vec<String>> {
        let open: Vec<String> = {
            let conn = self.store.conn();
            let mut stmt =
                conn.prepare("SELECT name FROM holdouts WHERE closed_at IS NULL ORDER BY name")?;
            let rows = stmt.query_map([], |r| r.get::<_, String>(0))?;
            rows.collect::<std::result::Result<_, _>>()?
        };
        let mut closed = Vec::new();
        for name in open {
            let loaded = self.loaded(&name)?;
            let Some(deadline) = loaded.policy.closes_at else {
                continue;
            };
            if self.now() < deadline {
                continue;
            }
            self.settle(&loaded)?;
            if self.closed_at(loaded.id)?.is_some() {
                closed.push(name);
            }
        }
        Ok(closed)
    }

    /// Seals one entry: takes its share, records it, keeps its per-row losses for the close.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn seal_entry(
        &mut self,
        caller: &Caller,
        loaded: &Loaded,
        req: &SubmitRequest,
        target_index: usize,
        preds: &Predictions,
        digest: String,
    ) -> Result<SubmitOutcome> {
        let team = caller.team.clone();
        let at = rfc3339(self.now());
        self.begin_write()?;
        let result = (|| -> Result<(SubmitOutcome, Option<(u64, Book)>)> {
            // A retried request id, or the same predictions again from the same team: the
            // earlier receipt, nothing charged.
            let earlier: Option<(i64, String)> = self
                .store
                .conn()
                .query_row(
                    "SELECT seq, digest FROM sealed_entries WHERE holdout_id = ?1 AND team = ?2
                     AND (digest = ?3 OR (request_id = ?4 AND ?4 != '')) ORDER BY ticket LIMIT 1",
                    params![
                        loaded.id,
                        team,
                        digest,
                        req.request_id.clone().unwrap_or_default()
                    ],
                    |r| Ok((r.get(0)?, r.get(1)?)),
                )
                .optional()?;
            if let Some((seq, d)) = earlier {
                if d != digest {
                    return Err(Error::FailedPrecondition(format!(
                        "request id {} was already used with different predictions; a retry \
                         must send the same file, a new entry needs a new id",
                        req.request_id.clone().unwrap_or_default()
                    )));
                }
                return Ok((self.sealed_receipt(loaded, seq as u64, true)?, None));
            }
            let mut book = self.book(loaded)?;
            let target_name = loaded.policy.targets[target_index].name.clone();
            let budget_now = book.budget(&loaded.policy, &team);
            let refusal = |reason: String, message: String| super::RefusalRecord {
                holdout: loaded.name.clone(),
                target: target_name.clone(),
                user: caller.name.clone(),
                team: team.clone(),
                reason,
                message,
                request_id: req.request_id.clone(),
                note: req.note.clone(),
                at: at.clone(),
                budget: budget_now.clone(),
            };
            if let Some((reason, message)) = self.quota_refusal(loaded, &book, &team)? {
                return self.record_refusal(loaded, &mut book, refusal(reason, message));
            }
            let quote: Quote = match book.quote(&loaded.policy, &team, target_index, 1) {
                Ok(q) => q,
                Err(r) => {
                    let (code, msg) = (r.code().to_string(), r.to_string());
                    return self.record_refusal(loaded, &mut book, refusal(code, msg));
                }
            };
            let ticket = book.seal(&team, target_index, &quote)?;
            book.count_quota(&team, &super::replay::day_of(&at));
            let target = &loaded.policy.targets[target_index];
            let losses = row_losses(&target.metric, &loaded.labels[target_index], preds);
            let record = SealedRecord {
                holdout: loaded.name.clone(),
                target: target.name.clone(),
                target_index,
                user: caller.name.clone(),
                team: team.clone(),
                ticket,
                query: quote.query,
                delta_i: quote.delta_i,
                level_nats: quote.level_nats,
                digest: digest.clone(),
                marked: req.mark_final,
                request_id: req.request_id.clone(),
                note: req.note.clone(),
                at: at.clone(),
            };
            let body = serde_json::to_value(&record)
                .map_err(|e| Error::Internal(format!("sealed entry encoding: {e}")))?;
            let entry = self.append(&loaded.name, ledger::Kind::Sealed, &body, None)?;
            self.keep_predictions(
                loaded,
                entry.seq,
                &target.name,
                &digest,
                &at,
                std::slice::from_ref(preds),
            )?;
            let conn = self.store.conn();
            conn.execute(
                "INSERT INTO sealed_entries
                 (holdout_id, ticket, seq, team, digest, request_id, marked, losses)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)",
                params![
                    loaded.id,
                    ticket as i64,
                    entry.seq as i64,
                    team,
                    digest,
                    req.request_id.clone().unwrap_or_default(),
                    req.mark_final,
                    encode_losses(&losses)
                ],
            )?;
            let receipt = Receipt::of(&entry, record.query);
            Ok((
                SubmitOutcome::Sealed {
                    record: Box::new(team_view(record, loaded.policy.isolated())),
                    receipt,
                    replayed: false,
                },
                Some((entry.seq, book)),
            ))
        })();
        self.finish_write(&loaded.name, result)
    }

    fn sealed_receipt(
        &mut self,
        loaded: &Loaded,
        seq: u64,
        replayed: bool,
    ) -> Result<SubmitOutcome> {
        let (body, hash): (String, String) = self.store.conn().query_row(
            "SELECT body, hash FROM ledger WHERE chain = ?1 AND seq = ?2",
            params![loaded.name, seq as i64],
            |r| Ok((r.get(0)?, r.get(1)?)),
        )?;
        let record: SealedRecord = serde_json::from_str(&body)
            .map_err(|e| Error::Internal(format!("stored sealed entry {seq}: {e}")))?;
        let receipt = Receipt {
            holdout: loaded.name.clone(),
            query: record.query,
            entry_hash: hash,
        };
        Ok(SubmitOutcome::Sealed {
            record: Box::new(team_view(record, loaded.policy.isolated())),
            receipt,
            replayed,
        })
    }

    /// Closes a sealed round: answers every entry, ranks the selected ones, compares
    /// neighbours, records it all in one `round` entry and marks the holdout closed.
    pub(crate) fn close_round_tx(
        &mut self,
        loaded: &Loaded,
        trigger: &str,
        by: &str,
        when: DateTime<Utc>,
    ) -> Result<RoundRecord> {
        let at = rfc3339(when);
        self.begin_write()?;
        self.closed_in_write(&loaded.name);
        let result = self
            .close_round_inner(loaded, trigger, by, &at)
            .map(|(record, seq, book)| (record, Some((seq, book))));
        self.finish_write(&loaded.name, result)
    }

    fn close_round_inner(
        &mut self,
        loaded: &Loaded,
        trigger: &str,
        by: &str,
        at: &str,
    ) -> Result<(RoundRecord, u64, Book)> {
        let n = self.store.conn().execute(
            "UPDATE holdouts SET closed_at = ?2 WHERE id = ?1 AND closed_at IS NULL",
            params![loaded.id, at],
        )?;
        if n == 0 {
            return Err(Error::FailedPrecondition(format!(
                "holdout {} is already closed",
                loaded.name
            )));
        }
        let mut book = self.book(loaded)?;
        let stored: Vec<(i64, i64, bool, Vec<u8>)> = {
            let conn = self.store.conn();
            let mut stmt = conn.prepare(
                "SELECT ticket, seq, marked, losses FROM sealed_entries WHERE holdout_id = ?1
                 ORDER BY ticket",
            )?;
            let rows = stmt.query_map([loaded.id], |r| {
                Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?))
            })?;
            rows.collect::<std::result::Result<_, _>>()?
        };
        let pending = book.pending();
        if stored.len() != pending.len() {
            return Err(Error::Internal(format!(
                "{} sealed entries stored for {} in the ledger",
                stored.len(),
                pending.len()
            )));
        }
        let mut sealed = Vec::with_capacity(stored.len());
        let mut vectors = Vec::with_capacity(stored.len());
        let mut losses = Vec::with_capacity(stored.len());
        for ((ticket, seq, _, blob), _) in stored.iter().zip(&pending) {
            let body: String = self.store.conn().query_row(
                "SELECT body FROM ledger WHERE chain = ?1 AND seq = ?2",
                params![loaded.name, seq],
                |r| r.get(0),
            )?;
            let rec: SealedRecord = serde_json::from_str(&body)
                .map_err(|e| Error::Internal(format!("sealed entry {seq}: {e}")))?;
            if rec.ticket != *ticket as u64 {
                return Err(Error::Internal(format!(
                    "sealed entry {seq}: ticket mismatch"
                )));
            }
            let v = decode_losses(blob);
            let binary = loaded.policy.core.targets[rec.target_index].binary;
            losses.push(loss_of(binary, &v));
            vectors.push(v);
            sealed.push(rec);
        }
        let cores = book.close_round(&loaded.policy, &losses)?;
        let mut answers = Vec::with_capacity(cores.len());
        for ((rec, core), loss) in sealed.iter().zip(cores).zip(&losses) {
            answers.push(AnswerRecord {
                holdout: loaded.name.clone(),
                target: rec.target.clone(),
                target_index: rec.target_index,
                user: rec.user.clone(),
                team: rec.team.clone(),
                query: core.query,
                symbol: core.symbol,
                score: core.score,
                lower: core.lower,
                upper: core.upper,
                delta_i: core.delta_i,
                level_nats: core.level_nats,
                code_nats: core.code_nats,
                statement: core.statement,
                best_model: None,
                models: 1,
                model_names: Vec::new(),
                digest: rec.digest.clone(),
                request_id: rec.request_id.clone(),
                note: rec.note.clone(),
                at: at.to_string(),
                budget: book.budget(&loaded.policy, &rec.team),
                core: core.core,
                exact: Some(vec![*loss]),
            });
        }
        let plan = rank(&loaded.policy, &sealed, &answers);
        let level = comparison_level(loaded.policy.ranking_delta, plan.pairs);
        let rounding = Rounding::for_core(loaded.policy.core.core_version);
        let per_target = loaded.policy.core.core_version >= 2;
        let mut comparisons = Vec::new();
        for &(a, b) in &plan.neighbours {
            let binary = loaded.policy.core.targets[sealed[a].target_index].binary;
            let (_, _, mut c) = compare(rounding, binary, &vectors[a], &vectors[b], level)?;
            c.ahead = a as u64;
            c.behind = b as u64;
            c.target = per_target.then(|| sealed[a].target.clone());
            comparisons.push(c);
        }
        let (ranking, pairs) = (plan.ranking, plan.pairs);
        let record = RoundRecord {
            holdout: loaded.name.clone(),
            trigger: trigger.to_string(),
            by: by.to_string(),
            at: at.to_string(),
            answers,
            ranking,
            comparisons,
            ranking_delta: loaded.policy.ranking_delta,
            pairs,
        };
        let body = serde_json::to_value(&record)
            .map_err(|e| Error::Internal(format!("round encoding: {e}")))?;
        let entry = self.append(&loaded.name, ledger::Kind::Round, &body, None)?;
        Ok((record, entry.seq, book))
    }

    /// The final ranking of a sealed round; refused (revealing nothing) until it closes.
    pub fn ranking(&mut self, caller: &Caller, name: &str) -> Result<Ranking> {
        let loaded = self.loaded(name)?;
        if !super::Visibility::of(&loaded.policy, caller).ranking {
            return Err(Error::PermissionDenied(format!(
                "the ranking of {name} is shown to organizers only (its leaderboard setting)"
            )));
        }
        if !loaded.policy.sealed() {
            return Err(Error::FailedPrecondition(format!(
                "holdout {name} is not a sealed round (its answers are {}); rankings are for \
                 sealed rounds, see `holdout leaderboard` for ladder holdouts",
                loaded.policy.answers_spec()
            )));
        }
        self.settle(&loaded)?;
        let round: Option<String> = self
            .store
            .conn()
            .query_row(
                "SELECT body FROM ledger WHERE chain = ?1 AND kind = ?2",
                [name, ledger::Kind::Round.as_str()],
                |r| r.get(0),
            )
            .optional()?;
        let Some(body) = round else {
            return Err(Error::FailedPrecondition(format!(
                "the round on {name} is sealed until it closes ({}); nothing about its entries \
                 is released before",
                loaded
                    .policy
                    .closes_at
                    .map(|t| format!("deadline {}", rfc3339(t)))
                    .unwrap_or_else(|| "by an organizer".into())
            )));
        };
        let r: RoundRecord = serde_json::from_str(&body)
            .map_err(|e| Error::Internal(format!("round entry: {e}")))?;
        let per_target = r.ranking.iter().any(|e| e.target.is_some());
        let queries = r
            .ranking
            .iter()
            .map(|e| {
                r.answers
                    .get(e.ticket as usize)
                    .map_or(e.ticket + 1, |a| a.query)
            })
            .collect();
        Ok(Ranking {
            holdout: r.holdout,
            closed_at: r.at,
            trigger: r.trigger,
            entries: r.ranking,
            queries,
            comparisons: r.comparisons,
            statement: format!(
                "Each comparison is an interval for R(ahead) - R(behind), the difference of the \
                 two entries' true errors; an interval that excludes 0 tells the two ranks apart. \
                 All comparisons hold together with probability at least 1 - {} (the ranking's \
                 reserve, split over {} pairs), inside the holdout's total delta.{}",
                seven_digits(r.ranking_delta),
                r.pairs,
                if per_target {
                    " Each target is ranked on its own: ranks count within a target and only \
                     entries of the same target are compared."
                } else {
                    ""
                }
            ),
            guarantee: loaded.policy.guarantee(),
        })
    }

    /// The leaderboard: on a ladder holdout each team's best so far with its interval, ranked;
    /// under every other rule (sealed rounds included, once closed) each team's released answer
    /// with the lowest upper limit on each target. Rows follow the leaderboard's visibility
    /// (an analyst of an `isolated` holdout sees its own team's row only).
    pub fn leaderboard(&mut self, caller: &Caller, name: &str) -> Result<Leaderboard> {
        let loaded = self.loaded(name)?;
        let scope = super::Visibility::of(&loaded.policy, caller).leaderboard;
        let own_only = scope != super::Scope::Every;
        if !matches!(loaded.policy.core.rule, Rule::Ladder(_)) {
            return self.best_per_team(&loaded, scope);
        }
        let entries = ledger::read_chain(self.store.conn(), name)?;
        let mut rows: BTreeMap<String, LeaderboardRow> = BTreeMap::new();
        // `adopt` entries (core 2): another team's answered file taken over as this team's new
        // best, with its interval at the level that file was answered at (DESIGN 4.8).
        for e in &entries {
            let rec = Record::read(e)?;
            let Some(r) = rec.answer() else { continue };
            // One ladder per team and target; the leaderboard shows the first target's.
            if r.target_index != 0 || !scope.covers(&r.team) {
                continue;
            }
            let row = rows
                .entry(r.team.clone())
                .or_insert_with(|| LeaderboardRow {
                    rank: 0,
                    team: r.team.clone(),
                    target: r.target.clone(),
                    query: 0,
                    best: None,
                    lower: 0.0,
                    upper: 1.0,
                    submissions: 0,
                    improvements: 0,
                    best_entry: None,
                    best_at: None,
                });
            row.submissions += 1;
            row.lower = r.lower;
            row.upper = r.upper;
            if r.symbol.starts_with("new-best") {
                row.best = r.score;
                row.query = r.query;
                row.improvements += 1;
                row.best_entry = Some(e.seq);
                row.best_at = Some(r.at.clone());
            }
        }
        let mut ranked: Vec<LeaderboardRow> = rows.into_values().collect();
        ranked.sort_by(|a, b| match (a.best, b.best) {
            (Some(x), Some(y)) => x.total_cmp(&y).then(a.best_entry.cmp(&b.best_entry)),
            (Some(_), None) => std::cmp::Ordering::Less,
            (None, Some(_)) => std::cmp::Ordering::Greater,
            (None, None) => a.team.cmp(&b.team),
        });
        for (i, r) in ranked.iter_mut().enumerate() {
            r.rank = if r.best.is_some() { i as u64 + 1 } else { 0 };
        }
        let eta = loaded
            .policy
            .core
            .rule
            .grid(loaded.policy.core.rows)
            .map_or(0.0, |g| g.value(1));
        Ok(Leaderboard {
            holdout: loaded.name.clone(),
            target: loaded.policy.targets[0].name.clone(),
            rows: ranked,
            statement: format!(
                "A team's best is its best score so far on the grid of step {eta}; its interval \
                 covers the smallest true error among all of that team's submissions so far, not \
                 the error of any one file. The rows hold together with every other interval the \
                 holdout reports, with probability at least 1 - {} (DESIGN 4.3, ladder: the shown \
                 best is within {eta} plus the latest half-width of that smallest error).",
                loaded.policy.input.delta
            ),
            guarantee: loaded.policy.guarantee(),
            own_team_only: own_only,
            kind: "ladder".into(),
        })
    }

    /// Best per team for rules other than the ladder: per team and target, the released answer
    /// with the lowest upper limit (ties: the earlier), ranked within each target by that limit.
    /// A sealed round's answers are released at its close, so before it the table is empty.
    fn best_per_team(&mut self, loaded: &Loaded, scope: super::Scope) -> Result<Leaderboard> {
        let name = loaded.name.clone();
        self.settle(loaded)?;
        let entries = ledger::read_chain(self.store.conn(), &name)?;
        let mut rows: BTreeMap<(usize, String), LeaderboardRow> = BTreeMap::new();
        let mut take = |r: &AnswerRecord| {
            if !scope.covers(&r.team) {
                return;
            }
            let row = rows
                .entry((r.target_index, r.team.clone()))
                .or_insert_with(|| LeaderboardRow {
                    rank: 0,
                    team: r.team.clone(),
                    target: r.target.clone(),
                    query: r.query,
                    best: r.score,
                    lower: r.lower,
                    upper: r.upper,
                    submissions: 0,
                    improvements: 0,
                    best_entry: None,
                    best_at: Some(r.at.clone()),
                });
            row.submissions += 1;
            if row.submissions == 1 || r.upper < row.upper {
                row.improvements += 1;
                (row.query, row.best, row.lower, row.upper) = (r.query, r.score, r.lower, r.upper);
                row.best_at = Some(r.at.clone());
            }
        };
        for e in &entries {
            match Record::read(e)? {
                Record::Answer(r) | Record::Adopt(r) => take(&r),
                Record::Round(round) => round.answers.iter().for_each(&mut take),
                _ => {}
            }
        }
        let mut ranked: Vec<(usize, LeaderboardRow)> =
            rows.into_iter().map(|((t, _), r)| (t, r)).collect();
        ranked.sort_by(|(ta, a), (tb, b)| {
            ta.cmp(tb)
                .then(a.upper.total_cmp(&b.upper))
                .then(a.team.cmp(&b.team))
        });
        let mut rank = 0;
        let mut last = usize::MAX;
        for (t, r) in ranked.iter_mut() {
            rank = if *t == last { rank + 1 } else { 1 };
            last = *t;
            r.rank = rank;
        }
        // Before the close a sealed round's table is empty: say why (and only then).
        let sealed_open = loaded.policy.sealed() && self.closed_at(loaded.id)?.is_none();
        Ok(Leaderboard {
            holdout: name,
            target: loaded.policy.targets[0].name.clone(),
            rows: ranked.into_iter().map(|(_, r)| r).collect(),
            statement: format!(
                "Each row is, among one team's released answers on one target, the one with the \
                 lowest upper limit; teams are ranked by that limit within each target. Every \
                 interval this holdout reports holds simultaneously with all the others, with \
                 probability at least 1 - {}, so picking one of them after the fact keeps it \
                 valid: the row's interval contains the true error of the file that answer was \
                 for.{}",
                seven_digits(loaded.policy.input.delta),
                if sealed_open {
                    " A sealed round releases its answers at the close: until then the table is \
                     empty (see status for the entries per team)."
                } else {
                    ""
                }
            ),
            guarantee: loaded.policy.guarantee(),
            own_team_only: scope != super::Scope::Every,
            kind: "best-per-team".into(),
        })
    }

    /// A sealed round's entries per team, each team's selected entry and the declared teams
    /// that have not entered; `None` for other holdouts and for callers who may see no team's
    /// activity. Follows the history's visibility: under `isolated` an analyst sees its own team
    /// only (and not who else has entered).
    pub fn round_status(&mut self, caller: &Caller, name: &str) -> Result<Option<RoundStatus>> {
        let loaded = self.loaded(name)?;
        if !loaded.policy.sealed() {
            return Ok(None);
        }
        let scope = super::Visibility::of(&loaded.policy, caller).history;
        if scope == super::Scope::Nothing {
            return Ok(None);
        }
        self.settle(&loaded)?;
        let closed = self.closed_at(loaded.id)?.is_some();
        let entries = ledger::read_chain(self.store.conn(), name)?;
        let mut teams: BTreeMap<(usize, String), RoundTeam> = BTreeMap::new();
        let mut entered: BTreeSet<String> = BTreeSet::new();
        for e in &entries {
            let Record::Sealed(r) = Record::read(e)? else {
                continue;
            };
            entered.insert(r.team.clone());
            if !scope.covers(&r.team) {
                continue;
            }
            let t = teams
                .entry((r.target_index, r.team.clone()))
                .or_insert_with(|| RoundTeam {
                    team: r.team.clone(),
                    target: r.target.clone(),
                    entries: 0,
                    selected: r.query,
                    marked: r.marked,
                });
            t.entries += 1;
            // The same choice as the close's (`rank`): a later entry replaces the selected one
            // unless that one was marked and the later one is not.
            if r.marked || !t.marked {
                (t.selected, t.marked) = (r.query, r.marked);
            }
        }
        let every = scope == super::Scope::Every;
        let not_submitted = match (&loaded.policy.core.shares, every) {
            (crate::stats::schedule::Shares::Roster { analysts, .. }, true) => analysts
                .iter()
                .filter(|t| !entered.contains(*t))
                .cloned()
                .collect(),
            _ => Vec::new(),
        };
        Ok(Some(RoundStatus {
            teams: teams.into_values().collect(),
            not_submitted,
            closed,
            own_team_only: !every,
        }))
    }

    /// Identical prediction digests submitted by different teams (organizers and auditors).
    pub fn duplicates(&mut self, caller: &Caller, name: &str) -> Result<Vec<Duplicate>> {
        caller.require(
            "reading the duplicate-predictions report",
            &[Role::Organizer, Role::Auditor],
        )?;
        let _ = self.loaded(name)?;
        let entries = ledger::read_chain(self.store.conn(), name)?;
        let mut by_digest: BTreeMap<String, Vec<(u64, String, String)>> = BTreeMap::new();
        for e in &entries {
            let (digest, team, user) = match Record::read(e)? {
                Record::Answer(r) => (r.digest, r.team, r.user),
                Record::Sealed(r) => (r.digest, r.team, r.user),
                _ => continue,
            };
            by_digest
                .entry(digest)
                .or_default()
                .push((e.seq, team, user));
        }
        Ok(by_digest
            .into_iter()
            .filter_map(|(digest, entries)| {
                let teams: BTreeSet<String> = entries.iter().map(|e| e.1.clone()).collect();
                (teams.len() > 1).then(|| Duplicate {
                    digest,
                    teams: teams.into_iter().collect(),
                    entries,
                })
            })
            .collect())
    }

    /// Records an organizer's close of a sealed round.
    pub(crate) fn close_sealed(&mut self, caller: &Caller, loaded: &Loaded) -> Result<()> {
        let now = self.now();
        self.close_round_tx(loaded, "organizer", &caller.name, now)?;
        Ok(())
    }
}

/// A sealed entry as its team sees it. Under `isolated` its position in the round would count
/// other teams' entries (DESIGN 4.2 rule 7): the team is shown its position among its own
/// entries instead (`query` counts per team there).
pub(crate) fn team_view(mut record: SealedRecord, isolated: bool) -> SealedRecord {
    if isolated {
        record.ticket = record.query.saturating_sub(1);
    }
    record
}

/// `x` to seven significant digits, shortest form (0.010000000000000002 reads 0.01): for
/// probabilities in sentences, where float noise in the last place means nothing.
fn seven_digits(x: f64) -> String {
    format!("{x:.6e}")
        .parse::<f64>()
        .map_or_else(|_| x.to_string(), |y| y.to_string())
}
