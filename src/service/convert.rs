//! Conversions between engine types and `holdout.v1` messages.

use crate::engine::Receipt;
use crate::engine::{
    AnswerRecord, BudgetView, HoldoutPolicy, HoldoutView, RefusalRecord, TargetDecl,
};
use crate::proto::v1 as pb;

pub(super) fn budget(b: &BudgetView) -> pb::Budget {
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

pub(super) fn target(t: &TargetDecl) -> pb::Target {
    pb::Target {
        name: t.name.clone(),
        column: t.column.clone(),
        metric: t.metric.to_string(),
        method: t.method.clone(),
        classes: t.classes.clone(),
    }
}

pub(super) fn policy(p: &HoldoutPolicy) -> pb::Policy {
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
    }
}

pub(super) fn holdout(v: &HoldoutView) -> pb::HoldoutInfo {
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
    }
}

pub(super) fn receipt(r: &Receipt) -> pb::Receipt {
    pb::Receipt {
        holdout: r.holdout.clone(),
        entry: r.entry,
        entry_hash: r.entry_hash.clone(),
        salt: r.salt.clone(),
    }
}

pub(super) fn answer(
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
    }
}

pub(super) fn refusal(r: &RefusalRecord, rc: Option<&Receipt>) -> pb::Refusal {
    pb::Refusal {
        reason: r.reason.clone(),
        message: r.message.clone(),
        budget: Some(budget(&r.budget)),
        receipt: rc.map(receipt),
    }
}
