//! Conversions between engine types and `holdout.v1` messages.

use crate::engine::{
    AnswerRecord, BudgetView, HoldoutPolicy, HoldoutView, RefusalRecord, TargetDecl,
};
use crate::engine::{Duplicate, HistoryItem, Leaderboard, Ranking, Receipt, SealedRecord};
use crate::proto::v1 as pb;

pub(crate) fn budget(b: &BudgetView) -> pb::Budget {
    pb::Budget {
        delta: b.delta,
        spent: b.spent,
        remaining: b.remaining,
        transcript_nats: b.transcript_nats,
        next_half_width: b.next_half_width,
        queries_left: b.queries_left,
        answered: b.answered,
        refused: b.refused,
        open: b.open,
        quota_resets_at: b.quota_resets_at.clone().unwrap_or_default(),
        quota_left_today: b.quota_left_today.unwrap_or(0),
    }
}

pub(crate) fn target(t: &TargetDecl) -> pb::Target {
    pb::Target {
        name: t.name.clone(),
        column: t.column.clone(),
        metric: t.metric.to_string(),
        method: t.method.clone(),
        classes: t.classes.clone(),
    }
}

pub(crate) fn policy(p: &HoldoutPolicy) -> pb::Policy {
    let input = p.input();
    pb::Policy {
        delta: input.delta,
        schedule: input.schedule.clone(),
        answers: input.answers.clone(),
        tolerance: input.tolerance,
        sharing: input.sharing.clone(),
        tolerance_reference: input.tolerance_reference.clone(),
        shares: input.shares.clone(),
        daily_quota: input.daily_quota,
        canonical_json: serde_json::to_string(p).unwrap_or_default(),
        closes_at: input.closes_at.clone(),
        ranking_share: input.ranking_share,
        leaderboard: input.leaderboard.clone(),
    }
}

pub(crate) fn holdout(v: &HoldoutView) -> pb::HoldoutInfo {
    pb::HoldoutInfo {
        name: v.name.clone(),
        description: v.description.clone(),
        rows: v.rows,
        policy: Some(policy(&v.policy)),
        targets: v.policy.targets.iter().map(target).collect(),
        created_at: v.created_at.clone(),
        open: v.open,
        budget: Some(budget(&v.budget)),
        genesis_hash: v.genesis_hash.clone(),
        guarantee: v.guarantee.clone(),
        withdrawn_at: v.withdrawn_at.clone().unwrap_or_default(),
        withdrawal_pending: v.withdrawal_pending.clone(),
        budget_of: v.budget_of.clone(),
        no_share: v.no_share,
    }
}

pub(crate) fn receipt(r: &Receipt) -> pb::Receipt {
    pb::Receipt {
        holdout: r.holdout.clone(),
        query: r.query,
        entry_hash: r.entry_hash.clone(),
    }
}

pub(crate) fn answer(
    r: &AnswerRecord,
    rc: &Receipt,
    replayed: bool,
    guarantee: &str,
) -> pb::Answer {
    pb::Answer {
        query: r.query,
        symbol: r.symbol.clone(),
        score: r.score,
        interval: Some(pb::Interval {
            lower: r.lower,
            upper: r.upper,
        }),
        delta_i: r.delta_i,
        level_nats: r.level_nats,
        code_nats: r.code_nats,
        budget: Some(budget(&r.budget)),
        receipt: Some(receipt(rc)),
        guarantee: guarantee.to_string(),
        statement: r.statement.clone(),
        best_model: r.best_model,
        replayed,
        digest: r.digest.clone(),
        target: r.target.clone(),
        // Set by the submit path, which knows the policy's shares.
        budget_of: String::new(),
    }
}

pub(crate) fn refusal(r: &RefusalRecord, rc: Option<&Receipt>) -> pb::Refusal {
    pb::Refusal {
        reason: r.reason.clone(),
        message: r.message.clone(),
        budget: Some(budget(&r.budget)),
        receipt: rc.map(receipt),
        // Set by the submit path, which knows the policy's shares.
        budget_of: String::new(),
    }
}

pub(crate) fn sealed(
    r: &SealedRecord,
    rc: &Receipt,
    replayed: bool,
    closes_at: &str,
    guarantee: &str,
) -> pb::SealedEntry {
    pb::SealedEntry {
        query: r.query,
        ticket: r.ticket,
        delta_i: r.delta_i,
        level_nats: r.level_nats,
        receipt: Some(receipt(rc)),
        digest: r.digest.clone(),
        marked: r.marked,
        closes_at: closes_at.to_string(),
        statement: format!(
            "sealed: query {} is recorded and its share taken; nothing about its score is \
             released until the round closes ({}), when every entry is answered at once",
            r.query,
            if closes_at.is_empty() {
                "by an organizer".to_string()
            } else {
                format!("deadline {closes_at}")
            }
        ),
        guarantee: guarantee.to_string(),
        replayed,
        target: r.target.clone(),
    }
}

fn interval(lower: f64, upper: f64) -> Option<pb::Interval> {
    Some(pb::Interval { lower, upper })
}

pub(crate) fn leaderboard(l: &Leaderboard) -> pb::LeaderboardResponse {
    pb::LeaderboardResponse {
        holdout: l.holdout.clone(),
        target: l.target.clone(),
        rows: l
            .rows
            .iter()
            .map(|r| pb::LeaderboardRow {
                rank: r.rank,
                team: r.team.clone(),
                best: r.best,
                interval: interval(r.lower, r.upper),
                submissions: r.submissions,
                improvements: r.improvements,
                best_at: r.best_at.clone().unwrap_or_default(),
                target: r.target.clone(),
                query: r.query,
            })
            .collect(),
        statement: l.statement.clone(),
        guarantee: l.guarantee.clone(),
        own_team_only: l.own_team_only,
        kind: l.kind.clone(),
    }
}

pub(crate) fn ranking(r: &Ranking) -> pb::RankingResponse {
    pb::RankingResponse {
        holdout: r.holdout.clone(),
        closed_at: r.closed_at.clone(),
        trigger: r.trigger.clone(),
        entries: r
            .entries
            .iter()
            .zip(&r.queries)
            .map(|(e, &query)| pb::RankedEntry {
                rank: e.rank,
                team: e.team.clone(),
                ticket: e.ticket,
                query,
                score: e.score,
                interval: interval(e.lower, e.upper),
                digest: e.digest.clone(),
                target: e.target.clone().unwrap_or_default(),
            })
            .collect(),
        comparisons: r
            .comparisons
            .iter()
            .map(|c| pb::Comparison {
                ahead: c.ahead,
                behind: c.behind,
                difference: interval(c.lower, c.upper),
                level_nats: c.level_nats,
                distinguishable: c.distinguishable,
                target: c.target.clone().unwrap_or_default(),
            })
            .collect(),
        statement: r.statement.clone(),
        guarantee: r.guarantee.clone(),
    }
}

pub(crate) fn duplicates(holdout: &str, d: &[Duplicate]) -> pb::DuplicatesResponse {
    pb::DuplicatesResponse {
        holdout: holdout.to_string(),
        duplicates: d
            .iter()
            .map(|d| pb::Duplicate {
                digest: d.digest.clone(),
                teams: d.teams.clone(),
                entries: d
                    .entries
                    .iter()
                    .map(|(entry, team, user)| pb::DuplicateEntry {
                        entry: *entry,
                        team: team.clone(),
                        user: user.clone(),
                    })
                    .collect(),
            })
            .collect(),
    }
}

/// A caller's history as the `History` RPC streams it. Rows are numbered by their place in the
/// caller's own view, never by their position in the chain: under `isolated` that position would
/// count other teams' queries.
pub(crate) fn history(items: Vec<HistoryItem>, guarantee: &str) -> Vec<pb::HistoryEntry> {
    items
        .into_iter()
        .enumerate()
        .map(|(row, item)| {
            let row = row as u64 + 1;
            match item {
                HistoryItem::Answer(r, rc) => pb::HistoryEntry {
                    entry: row,
                    entry_hash: rc.entry_hash.clone(),
                    kind: crate::ledger::Kind::Answer.as_str().into(),
                    team: r.team.clone(),
                    at: r.at.clone(),
                    note: r.note.clone(),
                    exact_scores: r
                        .exact
                        .as_ref()
                        .map(|v| v.iter().map(|l| l.mean()).collect())
                        .unwrap_or_default(),
                    answer: Some(answer(&r, &rc, false, guarantee)),
                    refusal: None,
                },
                HistoryItem::Sealed(r, rc) => pb::HistoryEntry {
                    entry: row,
                    entry_hash: rc.entry_hash.clone(),
                    kind: crate::ledger::Kind::Sealed.as_str().into(),
                    team: r.team.clone(),
                    at: r.at.clone(),
                    note: r.note.clone(),
                    exact_scores: Vec::new(),
                    answer: None,
                    refusal: None,
                },
                HistoryItem::Refusal(r, rc) => pb::HistoryEntry {
                    entry: row,
                    entry_hash: rc.entry_hash.clone(),
                    kind: crate::ledger::Kind::Refusal.as_str().into(),
                    team: r.team.clone(),
                    at: r.at.clone(),
                    note: r.note.clone(),
                    exact_scores: Vec::new(),
                    answer: None,
                    refusal: Some(refusal(&r, Some(&rc))),
                },
            }
        })
        .collect()
}
