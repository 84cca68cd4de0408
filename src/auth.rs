//! Users, roles and bearer tokens. Tokens are random, shown once, and stored only as SHA-256
//! hashes; every identity change is recorded in the `@users` ledger chain.

use std::fmt;
use std::str::FromStr;

use chrono::{DateTime, SecondsFormat, Utc};
use rusqlite::{OptionalExtension, params};
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::engine::Append;
use crate::error::{Error, Result};
use crate::ledger;

/// What a user may do (DESIGN 5).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Role {
    /// Uploads labels, creates holdouts.
    Custodian,
    /// Manages users and policies, closes holdouts; sees exact scores only once closed.
    Organizer,
    /// Submits predictions; belongs to a team, the accounting identity.
    Analyst,
    /// Reads and exports the full ledger; reads are recorded.
    Auditor,
}

impl Role {
    /// Every role.
    pub const ALL: [Role; 4] = [
        Role::Custodian,
        Role::Organizer,
        Role::Analyst,
        Role::Auditor,
    ];

    /// Lower-case name.
    pub fn as_str(self) -> &'static str {
        match self {
            Role::Custodian => "custodian",
            Role::Organizer => "organizer",
            Role::Analyst => "analyst",
            Role::Auditor => "auditor",
        }
    }
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for Role {
    type Err = Error;
    fn from_str(s: &str) -> Result<Role> {
        Role::ALL
            .into_iter()
            .find(|r| r.as_str() == s)
            .ok_or_else(|| {
                Error::invalid(
                    "role",
                    format!("unknown role {s:?}; use custodian, organizer, analyst or auditor"),
                )
            })
    }
}

/// An authenticated caller.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Caller {
    /// User name.
    pub name: String,
    /// Roles granted.
    pub roles: Vec<Role>,
    /// Team: the accounting identity of analysts.
    pub team: String,
}

impl Caller {
    /// The public: a web visitor without a token (`serve --web`). No roles, no team; what it
    /// may see is decided by [`crate::engine::Visibility::of`].
    pub fn public() -> Caller {
        Caller {
            name: "(public)".into(),
            roles: Vec::new(),
            team: String::new(),
        }
    }

    /// Whether this is [`Caller::public`] (every user holds at least one role).
    pub fn is_public(&self) -> bool {
        self.roles.is_empty()
    }

    /// Whether the caller holds `role`.
    pub fn has(&self, role: Role) -> bool {
        self.roles.contains(&role)
    }

    /// Fails with a permission error unless the caller holds one of `roles`.
    pub fn require(&self, action: &str, roles: &[Role]) -> Result<()> {
        if roles.iter().any(|r| self.has(*r)) {
            return Ok(());
        }
        let wanted: Vec<&str> = roles.iter().map(|r| r.as_str()).collect();
        Err(Error::PermissionDenied(format!(
            "{action} needs the {} role; {} has {}",
            wanted.join(" or "),
            self.name,
            role_list(&self.roles)
        )))
    }
}

/// A user as stored.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct User {
    /// Name.
    pub name: String,
    /// Roles.
    pub roles: Vec<Role>,
    /// Team.
    pub team: String,
    /// Creation time.
    pub created_at: String,
    /// Whether revoked.
    pub revoked: bool,
}

/// The body of a `user-added` event on the identity chain.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct UserAdded {
    /// User name.
    pub user: String,
    /// Roles granted, comma-separated ([`role_list`]).
    pub roles: String,
    /// Team: the accounting identity the user's entries carry.
    pub team: String,
    /// Who added the user (`init` for the first user).
    pub by: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `user-revoked` event on the identity chain.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct UserRevoked {
    /// User name.
    pub user: String,
    /// Who revoked the user.
    pub by: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// The body of a `token-rotated` event on the identity chain.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct TokenRotated {
    /// User name.
    pub user: String,
    /// When, RFC 3339 UTC.
    pub at: String,
}

/// An identity event's body as JSON for the ledger.
fn event_json<T: Serialize>(event: &T) -> Result<serde_json::Value> {
    serde_json::to_value(event)
        .map_err(|e| Error::Internal(format!("identity event encoding: {e}")))
}

/// Comma-separated role names.
pub fn role_list(roles: &[Role]) -> String {
    if roles.is_empty() {
        return "no role".into();
    }
    roles
        .iter()
        .map(|r| r.as_str())
        .collect::<Vec<_>>()
        .join(",")
}

fn parse_roles(s: &str) -> Vec<Role> {
    s.split(',').filter_map(|r| r.parse().ok()).collect()
}

/// A name for a user, team or holdout: letters, digits, '-', '_', '.', 1 to 64 characters,
/// not starting with '.' or '-'.
pub fn check_name(field: &str, name: &str) -> Result<()> {
    let ok = !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
        && !name.starts_with(['.', '-']);
    if ok {
        Ok(())
    } else {
        Err(Error::invalid(
            field,
            format!(
                "{name:?} is not a valid name (1-64 of letters, digits, '-', '_', '.'; not starting \
                 with '.' or '-')"
            ),
        ))
    }
}

/// A fresh bearer token.
pub fn new_token() -> Result<String> {
    let mut bytes = [0u8; 24];
    getrandom::fill(&mut bytes).map_err(|e| Error::Internal(format!("no randomness: {e}")))?;
    Ok(format!("hlt_{}", hex::encode(bytes)))
}

/// The stored form of a token.
pub fn token_hash(token: &str) -> String {
    hex::encode(Sha256::digest(token.as_bytes()))
}

/// RFC 3339 UTC with seconds.
pub fn rfc3339(t: DateTime<Utc>) -> String {
    t.to_rfc3339_opts(SecondsFormat::Millis, true)
}

/// Adds a user and returns its token. Records a `user-added` entry in the `@users` chain.
pub fn add_user(
    w: &mut dyn Append,
    name: &str,
    roles: &[Role],
    team: Option<&str>,
    by: &str,
    now: DateTime<Utc>,
) -> Result<(User, String)> {
    check_name("name", name)?;
    if roles.is_empty() {
        return Err(Error::invalid("roles", "give at least one role"));
    }
    let team = match team.filter(|t| !t.is_empty()) {
        Some(t) => {
            check_name("team", t)?;
            t.to_string()
        }
        None => name.to_string(),
    };
    let mut roles = roles.to_vec();
    roles.sort();
    roles.dedup();
    let exists: Option<i64> = w
        .conn()
        .query_row("SELECT id FROM users WHERE name = ?1", [name], |r| r.get(0))
        .optional()?;
    if exists.is_some() {
        return Err(Error::AlreadyExists(format!("user {name} already exists")));
    }
    let at = rfc3339(now);
    w.conn().execute(
        "INSERT INTO users (name, roles, team, created_at) VALUES (?1, ?2, ?3, ?4)",
        params![name, role_list(&roles), team, at],
    )?;
    let user_id = w.conn().last_insert_rowid();
    let token = new_token()?;
    w.conn().execute(
        "INSERT INTO tokens (token_hash, user_id, created_at) VALUES (?1, ?2, ?3)",
        params![token_hash(&token), user_id, at],
    )?;
    w.append(
        ledger::USERS_CHAIN,
        ledger::Kind::UserAdded,
        &event_json(&UserAdded {
            user: name.to_string(),
            roles: role_list(&roles),
            team: team.clone(),
            by: by.to_string(),
            at: at.clone(),
        })?,
    )?;
    Ok((
        User {
            name: name.to_string(),
            roles,
            team,
            created_at: at,
            revoked: false,
        },
        token,
    ))
}

/// Finds the live user a token belongs to.
pub fn authenticate(conn: &rusqlite::Connection, token: &str) -> Result<Caller> {
    let row: Option<(String, String, String)> = conn
        .query_row(
            "SELECT u.name, u.roles, u.team FROM tokens t JOIN users u ON u.id = t.user_id
             WHERE t.token_hash = ?1 AND t.revoked_at IS NULL AND u.revoked_at IS NULL",
            [token_hash(token)],
            |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?)),
        )
        .optional()?;
    match row {
        Some((name, roles, team)) => Ok(Caller {
            name,
            roles: parse_roles(&roles),
            team,
        }),
        None => Err(Error::Unauthenticated(
            "unknown or revoked token; pass --token or set HOLDOUT_TOKEN".into(),
        )),
    }
}

/// All users.
pub fn list_users(conn: &rusqlite::Connection) -> Result<Vec<User>> {
    let mut stmt = conn.prepare(
        "SELECT name, roles, team, created_at, revoked_at IS NOT NULL FROM users ORDER BY name",
    )?;
    let rows = stmt.query_map([], |r| {
        Ok(User {
            name: r.get(0)?,
            roles: parse_roles(&r.get::<_, String>(1)?),
            team: r.get(2)?,
            created_at: r.get(3)?,
            revoked: r.get(4)?,
        })
    })?;
    Ok(rows.collect::<std::result::Result<_, _>>()?)
}

/// Revokes a user and all its tokens.
pub fn revoke_user(w: &mut dyn Append, name: &str, by: &str, now: DateTime<Utc>) -> Result<User> {
    let at = rfc3339(now);
    let n = w.conn().execute(
        "UPDATE users SET revoked_at = ?2 WHERE name = ?1 AND revoked_at IS NULL",
        params![name, at],
    )?;
    if n == 0 {
        let known: Option<i64> = w
            .conn()
            .query_row("SELECT id FROM users WHERE name = ?1", [name], |r| r.get(0))
            .optional()?;
        return Err(match known {
            Some(_) => Error::FailedPrecondition(format!("user {name} is already revoked")),
            None => Error::not_found("user", name),
        });
    }
    w.conn().execute(
        "UPDATE tokens SET revoked_at = ?2 WHERE revoked_at IS NULL
         AND user_id = (SELECT id FROM users WHERE name = ?1)",
        params![name, at],
    )?;
    w.append(
        ledger::USERS_CHAIN,
        ledger::Kind::UserRevoked,
        &event_json(&UserRevoked {
            user: name.to_string(),
            by: by.to_string(),
            at: at.clone(),
        })?,
    )?;
    list_users(w.conn())?
        .into_iter()
        .find(|u| u.name == name)
        .ok_or_else(|| Error::Internal("revoked user vanished".into()))
}

/// Replaces every token of `name` with a new one, returned once.
pub fn rotate_token(w: &mut dyn Append, name: &str, now: DateTime<Utc>) -> Result<String> {
    let at = rfc3339(now);
    let user_id: i64 = w
        .conn()
        .query_row(
            "SELECT id FROM users WHERE name = ?1 AND revoked_at IS NULL",
            [name],
            |r| r.get(0),
        )
        .optional()?
        .ok_or_else(|| Error::not_found("user", name))?;
    w.conn().execute(
        "UPDATE tokens SET revoked_at = ?2 WHERE user_id = ?1 AND revoked_at IS NULL",
        params![user_id, at],
    )?;
    let token = new_token()?;
    w.conn().execute(
        "INSERT INTO tokens (token_hash, user_id, created_at) VALUES (?1, ?2, ?3)",
        params![token_hash(&token), user_id, at],
    )?;
    w.append(
        ledger::USERS_CHAIN,
        ledger::Kind::TokenRotated,
        &event_json(&TokenRotated {
            user: name.to_string(),
            at: at.clone(),
        })?,
    )?;
    Ok(token)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::{Engine, SystemClock};
    use crate::store::Store;

    fn engine() -> Result<Engine> {
        Ok(Engine::new(
            Store::open_in_memory()?,
            std::sync::Arc::new(SystemClock),
        ))
    }

    #[test]
    fn tokens_authenticate_until_revoked_and_are_stored_hashed() -> Result<()> {
        let mut engine = engine()?;
        let now = Utc::now();
        let (user, token) =
            engine.write(|w| add_user(w, "ana", &[Role::Analyst], Some("blue"), "root", now))?;
        let store = engine.store();
        assert_eq!(user.team, "blue");
        let caller = authenticate(store.conn(), &token)?;
        assert_eq!(caller.name, "ana");
        assert!(caller.has(Role::Analyst) && !caller.has(Role::Custodian));
        let stored: i64 = store.conn().query_row(
            "SELECT count(*) FROM tokens WHERE token_hash = ?1",
            [&token],
            |r| r.get(0),
        )?;
        assert_eq!(stored, 0, "the clear token must not be stored");

        let new = engine.write(|w| rotate_token(w, "ana", now))?;
        let store = engine.store();
        assert!(authenticate(store.conn(), &token).is_err());
        assert!(authenticate(store.conn(), &new).is_ok());

        engine.write(|w| revoke_user(w, "ana", "root", now))?;
        let store = engine.store();
        assert!(matches!(
            authenticate(store.conn(), &new),
            Err(Error::Unauthenticated(_))
        ));
        let chain = ledger::read_chain(store.conn(), ledger::USERS_CHAIN)?;
        assert_eq!(chain.len(), 3);
        assert!(ledger::verify_chain(&chain).is_empty());
        // The typed events write the bodies 0.1.0 wrote (keys sorted, same fields).
        let at = rfc3339(now);
        let kinds: Vec<_> = chain.iter().map(|e| e.kind()).collect();
        assert_eq!(
            kinds,
            [
                Some(ledger::Kind::UserAdded),
                Some(ledger::Kind::TokenRotated),
                Some(ledger::Kind::UserRevoked)
            ]
        );
        assert_eq!(
            chain[0].body,
            format!(r#"{{"at":"{at}","by":"root","roles":"analyst","team":"blue","user":"ana"}}"#)
        );
        assert_eq!(chain[1].body, format!(r#"{{"at":"{at}","user":"ana"}}"#));
        assert_eq!(
            chain[2].body,
            format!(r#"{{"at":"{at}","by":"root","user":"ana"}}"#)
        );
        Ok(())
    }

    #[test]
    fn bad_names_and_duplicates_are_refused() -> Result<()> {
        let mut engine = engine()?;
        let mut add = |name: &str, roles: &[Role]| {
            engine.write(|w| add_user(w, name, roles, None, "root", Utc::now()))
        };
        assert!(add("", &[Role::Analyst]).is_err());
        assert!(add("a b", &[Role::Analyst]).is_err());
        assert!(add("x", &[]).is_err());
        add("x", &[Role::Auditor])?;
        assert!(matches!(
            add("x", &[Role::Auditor]),
            Err(Error::AlreadyExists(_))
        ));
        Ok(())
    }

    #[test]
    fn require_names_the_missing_role() {
        let c = Caller {
            name: "ana".into(),
            roles: vec![Role::Analyst],
            team: "ana".into(),
        };
        let err = c
            .require("creating a holdout", &[Role::Custodian])
            .unwrap_err();
        assert!(err.to_string().contains("custodian"), "{err}");
    }
}
