//! Mapping errors to the documented exit codes ([`super::EXIT_CODES_HELP`]).

use crate::error::Error;

/// Answered, or success.
pub const OK: u8 = 0;
/// Internal error.
pub const INTERNAL: u8 = 1;
/// Bad input.
pub const BAD_INPUT: u8 = 2;
/// Refused (budget, tolerance, quota, max-cost).
pub const REFUSED: u8 = 3;
/// Authentication or permission failure.
pub const AUTH: u8 = 4;
/// Not found.
pub const NOT_FOUND: u8 = 5;
/// Cannot reach the daemon.
pub const UNREACHABLE: u8 = 6;
/// Not possible in the current state.
pub const PRECONDITION: u8 = 7;
/// `submit --require-pass` got a `fail` answer.
pub const GATE_FAILED: u8 = 9;
/// The connection broke after the request was sent: it may or may not have been recorded.
pub const OUTCOME_UNKNOWN: u8 = 10;

/// The exit code for a gRPC status code.
pub fn code_for_status(code: tonic::Code) -> u8 {
    use tonic::Code as C;
    match code {
        C::InvalidArgument | C::OutOfRange => BAD_INPUT,
        C::Unauthenticated | C::PermissionDenied => AUTH,
        C::NotFound => NOT_FOUND,
        C::Unavailable | C::DeadlineExceeded => UNREACHABLE,
        C::FailedPrecondition | C::AlreadyExists | C::Aborted => PRECONDITION,
        C::ResourceExhausted => REFUSED,
        _ => INTERNAL,
    }
}

/// The exit code for any error a command returns: gRPC statuses, transport failures and the
/// crate's own errors are recognised anywhere in the chain; anything else is bad input when it
/// is an argument or file problem, reported by the command as [`Error::InvalidArgument`].
pub fn code_for(err: &anyhow::Error) -> u8 {
    if err
        .downcast_ref::<super::client::conn::OutcomeUnknown>()
        .is_some()
    {
        return OUTCOME_UNKNOWN;
    }
    for cause in err.chain() {
        if let Some(status) = cause.downcast_ref::<tonic::Status>() {
            return code_for_status(status.code());
        }
        if cause.downcast_ref::<tonic::transport::Error>().is_some() {
            return UNREACHABLE;
        }
        if let Some(e) = cause.downcast_ref::<Error>() {
            return match e {
                Error::InvalidArgument { .. } => BAD_INPUT,
                Error::NotFound { .. } => NOT_FOUND,
                Error::Unauthenticated(_) | Error::PermissionDenied(_) => AUTH,
                Error::AlreadyExists(_) | Error::FailedPrecondition(_) => PRECONDITION,
                _ => INTERNAL,
            };
        }
        if cause.downcast_ref::<std::io::Error>().is_some() {
            return BAD_INPUT;
        }
    }
    INTERNAL
}
