//! Identities cross-checked: every answer, adoption, sealed entry and round answer of a
//! holdout names a `user` and a `team`, and the export's identity chain (`@users`) says who was
//! a user, in which team, from when until when. Each entry must name a user added at or before
//! its time, not revoked before it, in the team it carries. Without this check a ledger could
//! charge one team's queries to another (or to nobody) and still replay: the accounting only
//! sees team names.
//!
//! Times are compared as parsed instants, not as strings: RFC 3339 texts order as strings only
//! when they have the same length and offset.

use std::collections::HashMap;

use chrono::{DateTime, Utc};

use super::Finding;
use super::export::Export;
use crate::auth::{UserAdded, UserRevoked};
use crate::engine::Record;
use crate::ledger::{self, Entry, Kind};

/// What the identity check found.
#[derive(Debug, Default)]
pub(super) struct IdentityCheck {
    /// Entries (and round answers) whose user and team were checked against `@users`.
    pub(super) checked: u64,
    /// Every mismatch, and every identity event or entry time that could not be read.
    pub(super) findings: Vec<Finding>,
}

/// One identity event of a user, in chain order.
struct Event {
    seq: u64,
    at: DateTime<Utc>,
    /// `Some((team, roles))` for a user-added event (roles comma-separated), `None` for a
    /// revocation.
    added: Option<(String, String)>,
}

/// The identity chain, by user.
struct Identities {
    events: HashMap<String, Vec<Event>>,
}

impl Identities {
    /// Reads the identity chain; events that cannot be read are findings on `@users` (their
    /// links and hashes are checked elsewhere).
    fn read(users: &[Entry], findings: &mut Vec<Finding>) -> Identities {
        let mut events: HashMap<String, Vec<Event>> = HashMap::new();
        for e in users {
            let mut bad = |field: &str, problem: String| {
                findings.push(Finding {
                    chain: ledger::USERS_CHAIN.into(),
                    entry: Some(e.seq),
                    field: field.into(),
                    problem,
                })
            };
            // Record::parse is the one reader of entry kinds; identity bodies are then read as
            // the typed events `auth` writes.
            let (kind, body) = match Record::parse(e) {
                Ok(Record::Identity(kind, body)) => (kind, body),
                // Unknown kinds and unreadable bodies are already findings of the chain check.
                _ => continue,
            };
            let (user, at, added) = match kind {
                Kind::UserAdded => match serde_json::from_value::<UserAdded>(*body) {
                    Ok(a) => (a.user, a.at, Some((a.team, a.roles))),
                    Err(why) => {
                        bad("body", format!("not a user-added event: {why}"));
                        continue;
                    }
                },
                Kind::UserRevoked => match serde_json::from_value::<UserRevoked>(*body) {
                    Ok(r) => (r.user, r.at, None),
                    Err(why) => {
                        bad("body", format!("not a user-revoked event: {why}"));
                        continue;
                    }
                },
                // A new token changes neither who the user is nor their team.
                _ => continue,
            };
            let Some(at) = instant(&at) else {
                bad("at", format!("{at:?} is not an RFC 3339 time"));
                continue;
            };
            events.entry(user).or_default().push(Event {
                seq: e.seq,
                at,
                added,
            });
        }
        Identities { events }
    }

    /// Why `user` in `team` at `at` is not an identity in force, if it is not, with the field
    /// at fault (`user` or `team`): the last user-added event at or before `at` must name
    /// `team`, with no revocation after it and strictly before `at` (an entry and a revocation
    /// of the same instant get the benefit of the doubt: their order across two chains is not
    /// recorded).
    fn problem(
        &self,
        user: &str,
        team: &str,
        at: DateTime<Utc>,
        when: &str,
    ) -> Option<(&'static str, String)> {
        let users = ledger::USERS_CHAIN;
        let Some(events) = self.events.get(user) else {
            return Some((
                "user",
                format!("user {user} has no user-added event in {users}"),
            ));
        };
        // The add in force: its entry, its team, and the first revocation after it.
        let mut state: Option<(u64, &str, Option<&Event>)> = None;
        for ev in events {
            match &ev.added {
                Some((t, _)) if ev.at <= at => state = Some((ev.seq, t, None)),
                None if ev.at < at => {
                    if let Some(s) = &mut state {
                        s.2.get_or_insert(ev);
                    }
                }
                _ => {}
            }
        }
        match state {
            None => {
                let first = &events[0];
                Some((
                    "user",
                    format!(
                        "user {user} has no user-added event in {users} at or before this \
                         entry's time {when} (its first event is {users} entry {} at {})",
                        first.seq,
                        first.at.to_rfc3339()
                    ),
                ))
            }
            Some((_, _, Some(revoked))) => Some((
                "user",
                format!(
                    "user {user} was revoked before this entry's time {when} ({users} entry {} \
                     at {})",
                    revoked.seq,
                    revoked.at.to_rfc3339()
                ),
            )),
            Some((seq, t, None)) if t != team => Some((
                "team",
                format!(
                    "user {user} belongs to team {t} ({users} entry {seq}), the entry records \
                     team {team}"
                ),
            )),
            Some(_) => None,
        }
    }

    /// Why `user` at `at` did not hold every one of `roles`, if it did not: the user-added
    /// event in force (as for [`Identities::problem`], whatever the team) must grant them.
    fn roles_problem(
        &self,
        user: &str,
        roles: &[String],
        at: DateTime<Utc>,
        when: &str,
    ) -> Option<(&'static str, String)> {
        let users = ledger::USERS_CHAIN;
        let added = self.events.get(user).and_then(|events| {
            events
                .iter()
                .filter(|ev| ev.at <= at)
                .filter_map(|ev| ev.added.as_ref().map(|(_, r)| (ev.seq, r)))
                .next_back()
        });
        let Some((seq, granted)) = added else {
            return Some((
                "user",
                format!("user {user} has no user-added event in {users} at or before {when}"),
            ));
        };
        let granted: Vec<&str> = granted.split(',').map(str::trim).collect();
        let missing: Vec<&str> = roles
            .iter()
            .map(String::as_str)
            .filter(|r| !granted.contains(r))
            .collect();
        (!missing.is_empty()).then(|| {
            (
                "roles",
                format!(
                    "user {user} did not hold the {} role at {when} ({users} entry {seq} grants \
                     {})",
                    missing.join(","),
                    granted.join(",")
                ),
            )
        })
    }
}

fn instant(text: &str) -> Option<DateTime<Utc>> {
    DateTime::parse_from_rfc3339(text)
        .ok()
        .map(|t| t.with_timezone(&Utc))
}

/// Checks the `user` and `team` of every answer, adoption, sealed entry and round answer of
/// the holdout's chain against the export's identity chain, one entry at a time in chain order
/// ([`Checker::entry`]), from the records the audit parses once for the replay too.
///
/// A round answer is checked at the time of the sealed entry it answers (the k-th sealed entry
/// since the previous round, as the replay pairs them): the user acted then, and the daemon
/// answers at the close the entries of users revoked in between.
pub(super) struct Checker<'a> {
    chain: &'a str,
    identities: Identities,
    out: IdentityCheck,
    /// Times of the sealed entries waiting for the next round, in ticket order.
    pending: Vec<String>,
}

impl<'a> Checker<'a> {
    /// A checker with the export's identity chain read.
    pub(super) fn new(export: &'a Export) -> Checker<'a> {
        let mut out = IdentityCheck::default();
        let identities = Identities::read(&export.users, &mut out.findings);
        Checker {
            chain: export.header.holdout.as_str(),
            identities,
            out,
            pending: Vec::new(),
        }
    }

    /// Whether `e` is of a kind that carries a user (only those are parsed for this check).
    pub(super) fn wants(e: &Entry) -> bool {
        matches!(
            e.kind(),
            Some(
                Kind::Answer
                    | Kind::Adopt
                    | Kind::Sealed
                    | Kind::Round
                    | Kind::WithdrawRequest
                    | Kind::Withdraw
            )
        )
    }

    /// Checks entry `e`, parsed as `record` (`None`: its body does not parse, which is the
    /// replay's finding, not repeated here). Entries must come in chain order.
    pub(super) fn entry(&mut self, e: &Entry, record: Option<&Record>) {
        if !Checker::wants(e) {
            return;
        }
        let Some(record) = record else {
            return;
        };
        // (field prefix, user, team, the time the user acted)
        let mut named: Vec<(String, &str, &str, String)> = Vec::new();
        // Withdrawals: (field prefix, user, the withdrawal roles recorded, when).
        let mut acted: Vec<(&str, &str, &[String], &str)> = Vec::new();
        match record {
            Record::WithdrawRequest(r) => acted.push(("", &r.by, &r.roles, &r.at)),
            Record::Withdraw(w) => {
                acted.push(("", &w.by, &w.roles, &w.at));
                acted.push((
                    "requested_",
                    &w.requested_by,
                    &w.requested_roles,
                    &w.requested_at,
                ));
            }
            Record::Answer(r) | Record::Adopt(r) => {
                named.push((String::new(), &r.user, &r.team, r.at.clone()));
            }
            Record::Sealed(r) => {
                self.pending.push(r.at.clone());
                named.push((String::new(), &r.user, &r.team, r.at.clone()));
            }
            Record::Round(r) => {
                let mut sealed = std::mem::take(&mut self.pending).into_iter();
                for (k, a) in r.answers.iter().enumerate() {
                    let when = sealed.next().unwrap_or_else(|| a.at.clone());
                    named.push((format!("answers[{k}]."), &a.user, &a.team, when));
                }
            }
            _ => {}
        }
        for (prefix, user, roles, when) in acted {
            self.out.checked += 1;
            let problem = match instant(when) {
                None => Some((
                    "at",
                    format!("{when:?} is not an RFC 3339 time: the identity in force is unknown"),
                )),
                Some(at) => self.identities.roles_problem(user, roles, at, when),
            };
            if let Some((field, problem)) = problem {
                self.out.findings.push(Finding {
                    chain: self.chain.into(),
                    entry: Some(e.seq),
                    field: format!("{prefix}{field}"),
                    problem,
                });
            }
        }
        for (prefix, user, team, when) in named {
            self.out.checked += 1;
            let problem = match instant(&when) {
                None => Some((
                    "at",
                    format!("{when:?} is not an RFC 3339 time: the identity in force is unknown"),
                )),
                Some(at) => self.identities.problem(user, team, at, &when),
            };
            if let Some((field, problem)) = problem {
                self.out.findings.push(Finding {
                    chain: self.chain.into(),
                    entry: Some(e.seq),
                    field: format!("{prefix}{field}"),
                    problem,
                });
            }
        }
    }

    /// What the check found.
    pub(super) fn finish(self) -> IdentityCheck {
        self.out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn event(seq: u64, kind: Kind, body: serde_json::Value) -> Entry {
        Entry {
            chain: ledger::USERS_CHAIN.into(),
            seq,
            kind: kind.as_str().into(),
            body: ledger::canonical_json(&body),
            salt: String::new(),
            prev_hash: String::new(),
            hash: String::new(),
        }
    }

    fn added(seq: u64, user: &str, team: &str, at: &str) -> Entry {
        event(
            seq,
            Kind::UserAdded,
            json!({"user": user, "roles": "analyst", "team": team, "by": "root", "at": at}),
        )
    }

    fn t(text: &str) -> DateTime<Utc> {
        instant(text).unwrap()
    }

    /// Times of different lengths: as strings "09:00:00.500Z" sorts before "09:00:00Z", as
    /// instants it is half a second later. The check must use the instants.
    #[test]
    fn times_are_compared_as_instants_not_strings() {
        let mut findings = Vec::new();
        let ids = Identities::read(
            &[added(0, "ana", "blue", "2026-03-01T09:00:00Z")],
            &mut findings,
        );
        assert!(findings.is_empty(), "{findings:?}");
        let when = "2026-03-01T09:00:00.500Z";
        assert!(
            when < "2026-03-01T09:00:00Z",
            "the string order is the trap"
        );
        assert_eq!(ids.problem("ana", "blue", t(when), when), None);
        let before = "2026-03-01T08:59:59.999+00:00";
        let (field, why) = ids.problem("ana", "blue", t(before), before).unwrap();
        assert_eq!(field, "user");
        assert!(why.contains("at or before"), "{why}");
    }

    #[test]
    fn revocation_team_and_unknown_users() {
        let mut findings = Vec::new();
        let ids = Identities::read(
            &[
                added(0, "ana", "blue", "2026-03-01T09:00:00.000Z"),
                event(
                    1,
                    Kind::TokenRotated,
                    json!({"user": "ana", "at": "2026-03-01T10:00:00.000Z"}),
                ),
                event(
                    2,
                    Kind::UserRevoked,
                    json!({"user": "ana", "by": "root", "at": "2026-03-01T11:00:00.000Z"}),
                ),
                // Malformed: no team.
                event(
                    3,
                    Kind::UserAdded,
                    json!({"user": "bob", "roles": "analyst", "by": "root", "at": "2026-03-01T09:00:00.000Z"}),
                ),
            ],
            &mut findings,
        );
        assert_eq!(findings.len(), 1, "{findings:?}");
        assert_eq!(
            (findings[0].entry, findings[0].field.as_str()),
            (Some(3), "body")
        );
        let at = |s: &str| (t(s), s.to_string());
        let (mid, mid_s) = at("2026-03-01T10:30:00.000Z");
        assert_eq!(ids.problem("ana", "blue", mid, &mid_s), None);
        // The instant of the revocation itself: not "revoked before".
        let (same, same_s) = at("2026-03-01T11:00:00.000Z");
        assert_eq!(ids.problem("ana", "blue", same, &same_s), None);
        let (late, late_s) = at("2026-03-01T11:00:00.001Z");
        let (field, why) = ids.problem("ana", "blue", late, &late_s).unwrap();
        assert_eq!(field, "user");
        assert!(why.contains("revoked") && why.contains("entry 2"), "{why}");
        let (field, why) = ids.problem("ana", "red", mid, &mid_s).unwrap();
        assert_eq!(field, "team");
        assert!(
            why.contains("team blue") && why.contains("team red"),
            "{why}"
        );
        for nobody in ["bob", "carol"] {
            let (field, why) = ids.problem(nobody, "blue", mid, &mid_s).unwrap();
            assert_eq!(field, "user");
            assert!(why.contains("no user-added event in @users"), "{why}");
        }
    }
}
