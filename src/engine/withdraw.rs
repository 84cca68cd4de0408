//! Withdrawing a holdout that never released anything, so that a holdout created with the wrong
//! settings does not lock its rows and labels for good.
//!
//! A withdrawal needs both the custodian (who holds the labels) and the organizer (who runs the
//! rounds): the first of them to call records a `withdraw-request` entry, the other completes it
//! with a `withdraw` entry (one call when the caller holds both roles). It is refused, and
//! nothing is recorded, once the holdout released anything learned from its labels: an answer,
//! an adoption, a sealed entry, a round or a release of class counts. Refusals, reads and a close reveal nothing about the
//! labels when nothing was scored (refusals are decided from public facts before scoring; a
//! read of exact scores of a holdout without answers reads none), so they do not block it.
//!
//! After the withdrawal the holdout is closed and listed as withdrawn; its stored labels digest
//! is renamed (`withdrawn:ID:DIGEST`) and its row ids are skipped by the overlap check, so a new
//! create from the same labels is not refused. Its name stays taken: the ledger keeps the
//! withdrawal under it. The checks are made inside the write, so no answer can slip in between.

use rusqlite::{OptionalExtension, params};
use serde::Serialize;

use super::replay::{Record, WithdrawRecord, WithdrawRequestRecord};
use super::{Engine, HoldoutView};
use crate::auth::{Caller, Role, rfc3339};
use crate::error::{Error, Result};
use crate::ledger::{self, Kind};

/// What a withdrawal call did.
#[derive(Debug, Clone, Serialize)]
pub struct Withdrawal {
    /// True when the holdout is now withdrawn; false when this call recorded a request that
    /// waits for the other role.
    pub completed: bool,
    /// One plain sentence: what happened and what is still needed.
    pub message: String,
    /// The holdout as the caller now sees it.
    pub holdout: HoldoutView,
}

/// The withdrawal roles a caller holds, as recorded.
fn withdrawal_roles(caller: &Caller) -> Vec<String> {
    [Role::Custodian, Role::Organizer]
        .into_iter()
        .filter(|r| caller.has(*r))
        .map(|r| r.as_str().to_string())
        .collect()
}

impl Engine {
    /// Whether a holdout was withdrawn (read fresh: withdrawing is a state change).
    pub(crate) fn withdrawn_at(&mut self, id: i64) -> Result<Option<String>> {
        Ok(self
            .store
            .conn()
            .query_row(
                "SELECT withdrawn_at FROM holdouts WHERE id = ?1",
                [id],
                |r| r.get::<_, Option<String>>(0),
            )
            .optional()?
            .flatten())
    }

    /// A withdrawal request waiting for the other role, in words (empty: none).
    pub(crate) fn pending_withdrawal(&mut self, id: i64) -> Result<String> {
        Ok(self
            .store
            .conn()
            .query_row(
                "SELECT withdraw_request FROM holdouts WHERE id = ?1 AND withdrawn_at IS NULL",
                [id],
                |r| r.get::<_, Option<String>>(0),
            )
            .optional()?
            .flatten()
            .unwrap_or_default())
    }

    /// Withdraws a holdout that released nothing, or records the request of one of the two
    /// roles it needs (see the module documentation).
    ///
    /// # Errors
    /// `PermissionDenied` without the custodian or organizer role; `NotFound`;
    /// `FailedPrecondition` (nothing recorded) once anything was released, when the holdout is
    /// already withdrawn, or when this role already asked and the other has not.
    pub fn withdraw_holdout(
        &mut self,
        caller: &Caller,
        name: &str,
        reason: &str,
    ) -> Result<Withdrawal> {
        caller.require("withdrawing a holdout", &[Role::Custodian, Role::Organizer])?;
        let loaded = self.loaded(name)?;
        // A sealed round past its deadline closes (and releases) first.
        self.settle(&loaded)?;
        let roles = withdrawal_roles(caller);
        let at = rfc3339(self.now());
        let completed = self.write(|engine| {
            if engine.withdrawn_at(loaded.id)?.is_some() {
                return Err(Error::FailedPrecondition(format!(
                    "holdout {name} is already withdrawn"
                )));
            }
            let entries = ledger::read_chain(engine.store.conn(), name)?;
            let mut request: Option<WithdrawRequestRecord> = None;
            for e in entries.iter().skip(1) {
                match Record::read(e)? {
                    rec @ (Record::Answer(_)
                    | Record::Adopt(_)
                    | Record::Sealed(_)
                    | Record::Round(_)
                    | Record::ClassCounts(_)) => {
                        return Err(Error::FailedPrecondition(format!(
                            "holdout {name} cannot be withdrawn: entry {} ({}) released what \
                             its labels gave, so its rows stay spent; nothing was recorded. \
                             Close it instead (`holdout close {name}`)",
                            e.seq,
                            rec.kind()
                        )));
                    }
                    Record::WithdrawRequest(r) => request = Some(r),
                    _ => {}
                }
            }
            let both = roles.len() == 2;
            let complete = match &request {
                _ if both => Some(WithdrawRecord {
                    requested_by: caller.name.clone(),
                    requested_roles: roles.clone(),
                    requested_at: at.clone(),
                    by: caller.name.clone(),
                    roles: roles.clone(),
                    reason: reason.to_string(),
                    at: at.clone(),
                }),
                Some(r) if r.roles.iter().any(|x| !roles.contains(x)) => Some(WithdrawRecord {
                    requested_by: r.by.clone(),
                    requested_roles: r.roles.clone(),
                    requested_at: r.at.clone(),
                    by: caller.name.clone(),
                    roles: roles.clone(),
                    reason: if reason.is_empty() {
                        r.reason.clone()
                    } else {
                        reason.to_string()
                    },
                    at: at.clone(),
                }),
                Some(r) => {
                    return Err(Error::FailedPrecondition(format!(
                        "{} ({}) already asked to withdraw holdout {name} at {}; the {} must \
                         complete it",
                        r.by,
                        r.roles.join(","),
                        r.at,
                        other_role(&roles)
                    )));
                }
                None => None,
            };
            match complete {
                Some(w) => {
                    engine.store.conn().execute(
                        "UPDATE holdouts SET withdrawn_at = ?2,
                                closed_at = coalesce(closed_at, ?2),
                                labels_digest = 'withdrawn:' || id || ':' || labels_digest
                         WHERE id = ?1",
                        params![loaded.id, at],
                    )?;
                    let body = serde_json::to_value(&w)
                        .map_err(|e| Error::Internal(format!("withdrawal encoding: {e}")))?;
                    engine.closed_in_write(name);
                    engine.append(name, Kind::Withdraw, &body, None)?;
                    Ok(true)
                }
                None => {
                    let r = WithdrawRequestRecord {
                        by: caller.name.clone(),
                        roles: roles.clone(),
                        reason: reason.to_string(),
                        at: at.clone(),
                    };
                    let body = serde_json::to_value(&r)
                        .map_err(|e| Error::Internal(format!("withdrawal encoding: {e}")))?;
                    engine.append(name, Kind::WithdrawRequest, &body, None)?;
                    engine.store.conn().execute(
                        "UPDATE holdouts SET withdraw_request = ?2 WHERE id = ?1",
                        params![
                            loaded.id,
                            format!(
                                "{} ({}) asked to withdraw it at {at}; waiting for the {}",
                                caller.name,
                                roles.join(","),
                                other_role(&roles)
                            )
                        ],
                    )?;
                    Ok(false)
                }
            }
        })?;
        let message = if completed {
            tracing::info!(holdout = %name, by = %caller.name, "withdrew holdout");
            format!(
                "withdrew {name}: it released nothing; its rows and labels are free for a new \
                 holdout (under another name: the ledger keeps the withdrawal under this one)"
            )
        } else {
            format!(
                "recorded {}'s request to withdraw {name}; the {} must run `holdout withdraw \
                 {name}` to complete it",
                caller.name,
                other_role(&roles)
            )
        };
        let holdout = self.holdout_view(caller, name)?;
        Ok(Withdrawal {
            completed,
            message,
            holdout,
        })
    }
}

/// The withdrawal role a caller holding `roles` lacks.
fn other_role(roles: &[String]) -> &'static str {
    if roles.iter().any(|r| r == "custodian") {
        "organizer"
    } else {
        "custodian"
    }
}
