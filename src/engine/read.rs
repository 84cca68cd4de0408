//! Reading a holdout as a caller may see it: its public facts and budget, the history of
//! released answers, the public declaration; and closing it.
//!
//! Everything shown here is a function of released symbols and public parameters (DESIGN 4.2
//! rule 1). Exact scores go only to auditors, and to organizers once the holdout is closed; each
//! such read is itself recorded in the ledger.

use rusqlite::params;
use serde::{Deserialize, Serialize};

use super::account::HoldoutPolicy;
use super::records::{AnswerRecord, BudgetView, RefusalRecord};
use super::replay::Record;
use super::submit::{Receipt, next_midnight};
use super::{Engine, Loaded};
use crate::auth::{Caller, Role, rfc3339};
use crate::error::{Error, Result};
use crate::ledger;

/// Whose share of delta a `team`'s budget view describes: `("", false)` with one pool,
/// `(team, false)` for a team with a share, `("", true)` for a caller whose team has none (not
/// in the roster, or no team at all under on-arrival shares).
pub(crate) fn share_of(policy: &HoldoutPolicy, team: &str) -> (String, bool) {
    use crate::stats::schedule::Shares;
    match &policy.core.shares {
        Shares::None => (String::new(), false),
        Shares::Roster { analysts, .. } if analysts.iter().any(|a| a == team) => {
            (team.to_string(), false)
        }
        Shares::Roster { .. } => (String::new(), true),
        Shares::OnArrival if team.is_empty() => (String::new(), true),
        Shares::OnArrival => (team.to_string(), false),
    }
}

/// A holdout's public facts and the caller's view of its budget.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct HoldoutView {
    /// Name.
    pub name: String,
    /// Description.
    pub description: String,
    /// Rows.
    pub rows: u64,
    /// Policy.
    pub policy: HoldoutPolicy,
    /// Creation time.
    pub created_at: String,
    /// Open for queries.
    pub open: bool,
    /// Withdrawn (released nothing; its rows and labels are free again), RFC 3339 time.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub withdrawn_at: Option<String>,
    /// A withdrawal request waiting for the other role, in words (empty: none).
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub withdrawal_pending: String,
    /// Budget (the caller's team under isolated).
    pub budget: BudgetView,
    /// Whose share `budget` is when delta is split into per-team shares (the caller's team);
    /// empty for a holdout with one pool.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    pub budget_of: String,
    /// True when delta is split into per-team shares and the caller's team has none (an
    /// organizer outside the roster): `budget` then describes no pool at all.
    #[serde(default)]
    pub no_share: bool,
    /// Genesis hash.
    pub genesis_hash: String,
    /// Guarantee sentence and assumptions.
    pub guarantee: String,
}

/// One released event in a history.
#[derive(Debug, Clone)]
pub enum HistoryItem {
    /// An answer; `exact` filled only when the caller may read exact scores and asked.
    Answer(Box<AnswerRecord>, Receipt),
    /// A refusal.
    Refusal(Box<RefusalRecord>, Receipt),
    /// A sealed entry of a final round (nothing about its score).
    Sealed(Box<super::SealedRecord>, Receipt),
}

impl Engine {
    /// Public facts and budget of one holdout.
    pub fn holdout_view(&mut self, caller: &Caller, name: &str) -> Result<HoldoutView> {
        let loaded = self.loaded(name)?;
        self.settle(&loaded)?;
        let closed = self.closed_at(loaded.id)?;
        let budget = self.budget_view(&loaded, &caller.team, closed.is_none())?;
        let (budget_of, no_share) = share_of(&loaded.policy, &caller.team);
        let withdrawn_at = self.withdrawn_at(loaded.id)?;
        let withdrawal_pending = if withdrawn_at.is_none() {
            self.pending_withdrawal(loaded.id)?
        } else {
            String::new()
        };
        Ok(HoldoutView {
            withdrawn_at,
            withdrawal_pending,
            name: loaded.name.clone(),
            description: loaded.description.clone(),
            rows: loaded.rows.len() as u64,
            policy: loaded.policy.clone(),
            created_at: loaded.created_at.clone(),
            open: closed.is_none(),
            budget,
            budget_of,
            no_share,
            genesis_hash: loaded.genesis_hash.clone(),
            guarantee: loaded.policy.guarantee(),
        })
    }

    /// Every holdout, by name.
    pub fn list_holdouts(
        &mut self,
        caller: &Caller,
        include_closed: bool,
    ) -> Result<Vec<HoldoutView>> {
        let names: Vec<(String, bool)> = {
            let conn = self.store.conn();
            let mut stmt =
                conn.prepare("SELECT name, closed_at IS NOT NULL FROM holdouts ORDER BY name")?;
            let rows = stmt.query_map([], |r| Ok((r.get(0)?, r.get(1)?)))?;
            rows.collect::<std::result::Result<_, _>>()?
        };
        let mut out = Vec::new();
        for (name, closed) in names {
            if closed && !include_closed {
                continue;
            }
            out.push(self.holdout_view(caller, &name)?);
        }
        Ok(out)
    }

    /// The budget as `team` may see it.
    pub(crate) fn budget_view(
        &mut self,
        loaded: &Loaded,
        team: &str,
        open: bool,
    ) -> Result<BudgetView> {
        let book = self.book(loaded)?;
        let mut budget = book.budget(&loaded.policy, team);
        budget.open = open;
        let quota = loaded.policy.daily_quota;
        if quota > 0 {
            let now = self.now();
            let used = book.quota_used(team, &super::replay::day_of(&rfc3339(now)));
            budget.quota_left_today = Some(quota.saturating_sub(used as u32));
            budget.quota_resets_at = Some(rfc3339(next_midnight(now)));
        }
        Ok(budget)
    }

    /// Released answers and refusals, oldest first.
    pub fn history(
        &mut self,
        caller: &Caller,
        name: &str,
        exact: bool,
    ) -> Result<Vec<HistoryItem>> {
        let loaded = self.loaded(name)?;
        self.settle(&loaded)?;
        let closed = self.closed_at(loaded.id)?.is_some();
        if exact {
            let allowed = caller.has(Role::Auditor) || (caller.has(Role::Organizer) && closed);
            if !allowed {
                return Err(Error::PermissionDenied(if caller.has(Role::Organizer) {
                    format!(
                        "exact scores of holdout {name} are shown to organizers only after it is \
                         closed (someone who sees them must not choose models while it is open)"
                    )
                } else {
                    "exact scores need the auditor role".into()
                }));
            }
        }
        let scope = super::Visibility::of(&loaded.policy, caller).history;
        if scope == super::Scope::Nothing {
            return Err(Error::PermissionDenied(format!(
                "the history of {name} is shown to organizers only (its leaderboard setting)"
            )));
        }
        let see_all = scope == super::Scope::Every;
        let entries = ledger::read_chain(self.store.conn(), name)?;
        let mut out = Vec::new();
        for e in &entries {
            let receipt = |query: u64| Receipt {
                holdout: name.to_string(),
                query,
                entry_hash: e.hash.clone(),
            };
            match Record::read(e)? {
                // An adoption (core 2 ladder) is shown like the answer it is.
                Record::Answer(mut r) | Record::Adopt(mut r) => {
                    if !scope.covers(&r.team) {
                        continue;
                    }
                    if !exact {
                        r.exact = None;
                    }
                    let rc = receipt(r.query);
                    out.push(HistoryItem::Answer(r, rc));
                }
                Record::Refusal(r, _) => {
                    if !scope.covers(&r.team) {
                        continue;
                    }
                    out.push(HistoryItem::Refusal(r, receipt(0)));
                }
                Record::Sealed(r) => {
                    if !scope.covers(&r.team) {
                        continue;
                    }
                    let rc = receipt(r.query);
                    let r = super::compete::team_view(*r, !see_all);
                    out.push(HistoryItem::Sealed(Box::new(r), rc));
                }
                Record::Round(round) => {
                    for mut r in round.answers {
                        if !scope.covers(&r.team) {
                            continue;
                        }
                        if !exact {
                            r.exact = None;
                        }
                        let rc = receipt(r.query);
                        out.push(HistoryItem::Answer(Box::new(r), rc));
                    }
                }
                _ => {}
            }
        }
        if exact {
            self.record_read(caller, name, "exact scores (history)")?;
        }
        Ok(out)
    }

    /// Records a read of exact scores (`what`: history, export...) by `caller`, in its own
    /// write. The cached accounting state stays valid: a read moves nothing.
    pub fn record_read(&mut self, caller: &Caller, name: &str, what: &str) -> Result<()> {
        let read = super::ReadRecord {
            by: caller.name.clone(),
            roles: crate::auth::role_list(&caller.roles),
            what: what.to_string(),
            at: rfc3339(self.now()),
        };
        let body = serde_json::to_value(&read)
            .map_err(|e| Error::Internal(format!("read encoding: {e}")))?;
        self.write(|engine| engine.append(name, ledger::Kind::Read, &body, None))?;
        Ok(())
    }

    /// The public declaration: targets and row ids.
    pub fn declaration(&mut self, name: &str) -> Result<(Vec<super::TargetDecl>, Vec<String>)> {
        let d = self.declared(name)?;
        Ok((d.targets().to_vec(), d.ids(0..d.len())))
    }

    /// The public declaration, read from the loaded holdout when asked (ids are copied a
    /// range at a time, not all at once).
    pub fn declared(&mut self, name: &str) -> Result<Declared> {
        Ok(Declared(self.loaded(name)?))
    }

    /// Closes a holdout (organizer).
    pub fn close_holdout(
        &mut self,
        caller: &Caller,
        name: &str,
        reason: &str,
    ) -> Result<HoldoutView> {
        caller.require("closing a holdout", &[Role::Organizer])?;
        let loaded = self.loaded(name)?;
        self.settle(&loaded)?;
        if loaded.policy.sealed() {
            if self.closed_at(loaded.id)?.is_some() {
                return Err(Error::FailedPrecondition(format!(
                    "holdout {name} is already closed"
                )));
            }
            self.close_sealed(caller, &loaded)?;
            return self.holdout_view(caller, name);
        }
        let at = rfc3339(self.now());
        self.write(|engine| {
            let n = engine.store.conn().execute(
                "UPDATE holdouts SET closed_at = ?2 WHERE id = ?1 AND closed_at IS NULL",
                params![loaded.id, at],
            )?;
            if n == 0 {
                return Err(Error::FailedPrecondition(format!(
                    "holdout {name} is already closed"
                )));
            }
            let close = super::CloseRecord {
                by: caller.name.clone(),
                reason: reason.to_string(),
                at: at.clone(),
            };
            let body = serde_json::to_value(&close)
                .map_err(|e| Error::Internal(format!("close encoding: {e}")))?;
            engine.closed_in_write(name);
            engine.append(name, ledger::Kind::Close, &body, None)
        })?;
        self.holdout_view(caller, name)
    }
}

/// A holdout's public declaration, shared with its loaded form: targets and row ids.
#[derive(Debug, Clone)]
pub struct Declared(std::sync::Arc<super::Loaded>);

impl Declared {
    /// The targets.
    pub fn targets(&self) -> &[super::TargetDecl] {
        &self.0.policy.targets
    }

    /// Number of rows.
    pub fn len(&self) -> usize {
        self.0.rows.len()
    }

    /// Whether there are no rows (never true for a stored holdout).
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The ids of a range of rows, in the canonical order (the range is cut to the rows).
    pub fn ids(&self, range: std::ops::Range<usize>) -> Vec<String> {
        let end = range.end.min(self.len());
        (range.start.min(end)..end)
            .map(|i| self.0.rows.id(i).to_string())
            .collect()
    }
}
