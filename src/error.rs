//! The crate's error type and its one mapping to gRPC status codes.

use tonic::{Code, Status};

/// Everything that can go wrong in the daemon and the library.
#[derive(Debug, thiserror::Error)]
pub enum Error {
    /// Bad input from a caller; `field` names the offending field, file line or row id.
    #[error("invalid {field}: {message}")]
    InvalidArgument {
        /// What was wrong (a field, `file:line`, or `row id X`).
        field: String,
        /// Why.
        message: String,
    },
    /// An unknown holdout, target, user...
    #[error("{what} not found: {name}")]
    NotFound {
        /// Kind of thing.
        what: &'static str,
        /// Its name.
        name: String,
    },
    /// A name or a set of rows that already exists.
    #[error("{0}")]
    AlreadyExists(String),
    /// Missing or unknown token.
    #[error("unauthenticated: {0}")]
    Unauthenticated(String),
    /// The caller's role does not allow this.
    #[error("permission denied: {0}")]
    PermissionDenied(String),
    /// The holdout is in a state that does not allow this (closed, for instance).
    #[error("{0}")]
    FailedPrecondition(String),
    /// The database was written by a newer binary.
    #[error(
        "the database was written by a newer holdout-ledger (schema version {found}; this binary \
         supports up to {supported}); upgrade the binary"
    )]
    SchemaTooNew {
        /// Version found in the file.
        found: u32,
        /// Latest version this binary knows.
        supported: u32,
    },
    /// A migration failed.
    #[error("migration {name} failed: {detail}")]
    Migration {
        /// Migration name.
        name: String,
        /// SQLite's message.
        detail: String,
    },
    /// SQLite failed.
    #[error("storage error: {0}")]
    Storage(#[from] rusqlite::Error),
    /// File system failure.
    #[error("i/o error: {0}")]
    Io(#[from] std::io::Error),
    /// A bug or an inconsistent database.
    #[error("internal error: {0}")]
    Internal(String),
}

/// Shorthand for results of this crate.
pub type Result<T, E = Error> = std::result::Result<T, E>;

impl Error {
    /// A bad-input error naming the field.
    pub fn invalid(field: impl Into<String>, message: impl Into<String>) -> Self {
        Error::InvalidArgument {
            field: field.into(),
            message: message.into(),
        }
    }

    /// An unknown thing.
    pub fn not_found(what: &'static str, name: impl Into<String>) -> Self {
        Error::NotFound {
            what,
            name: name.into(),
        }
    }
}

impl From<Error> for Status {
    fn from(err: Error) -> Status {
        let code = match &err {
            Error::InvalidArgument { .. } => Code::InvalidArgument,
            Error::NotFound { .. } => Code::NotFound,
            Error::AlreadyExists(_) => Code::AlreadyExists,
            Error::Unauthenticated(_) => Code::Unauthenticated,
            Error::PermissionDenied(_) => Code::PermissionDenied,
            Error::FailedPrecondition(_) => Code::FailedPrecondition,
            Error::SchemaTooNew { .. }
            | Error::Migration { .. }
            | Error::Storage(_)
            | Error::Io(_)
            | Error::Internal(_) => Code::Internal,
        };
        // Storage details stay in the daemon's log, never in a reply (they may name tables).
        let message = match &err {
            Error::Storage(e) => {
                tracing::error!(error = %e, "storage failure");
                "storage failure; see the daemon log".to_string()
            }
            Error::Io(e) => {
                tracing::error!(error = %e, "i/o failure");
                "i/o failure; see the daemon log".to_string()
            }
            other => other.to_string(),
        };
        Status::new(code, message)
    }
}

/// A short, escaped prefix of a user's value for error messages: at most 40 characters, with
/// control characters escaped, and the length when it was cut. A bad value is never echoed
/// whole (a 100 MB cell must not come back in a message).
pub fn short(value: &str) -> String {
    const KEEP: usize = 40;
    let mut out: String = value
        .chars()
        .take(KEEP)
        .flat_map(char::escape_debug)
        .collect();
    if value.chars().nth(KEEP).is_some() {
        out.push_str(&format!("... ({} bytes)", value.len()));
    }
    format!("\"{out}\"")
}

#[cfg(test)]
mod short_tests {
    use super::short;

    #[test]
    fn short_values_are_quoted_escaped_and_cut() {
        assert_eq!(short("abc"), "\"abc\"");
        assert_eq!(short("a\nb\u{1b}[31m"), "\"a\\nb\\u{1b}[31m\"");
        let long = "x".repeat(100_000);
        let s = short(&long);
        assert!(s.len() < 80, "{s}");
        assert!(s.ends_with("(100000 bytes)\""), "{s}");
    }
}
