//! The gRPC services. Each is the same [`Daemon`] value implementing a generated trait; proto
//! messages are converted to engine types here and nowhere else.

mod convert;
mod holdouts;
mod ledger;
mod submissions;
mod users;

use tonic::{Request, Status};

use crate::auth::Caller;
use crate::engine::Db;

/// Shared state of the services: a handle to the database thread.
#[derive(Debug, Clone)]
pub struct Daemon {
    db: Db,
}

impl Daemon {
    /// Services over the engine behind `db`.
    pub fn new(db: Db) -> Daemon {
        Daemon { db }
    }

    /// The database thread's handle (health checks).
    pub fn db(&self) -> &Db {
        &self.db
    }

    /// The bearer token of a request.
    fn token<T>(request: &Request<T>) -> Result<String, Status> {
        let value = request
            .metadata()
            .get("authorization")
            .ok_or_else(|| Status::unauthenticated("no token: pass --token or set HOLDOUT_TOKEN"))?
            .to_str()
            .map_err(|_| Status::unauthenticated("the authorization header is not text"))?;
        let token = value
            .strip_prefix("Bearer ")
            .or_else(|| value.strip_prefix("bearer "))
            .ok_or_else(|| {
                Status::unauthenticated("the authorization header must be `Bearer TOKEN`")
            })?;
        Ok(token.trim().to_string())
    }

    /// Authenticates the caller of a request.
    async fn caller<T>(&self, request: &Request<T>) -> Result<Caller, Status> {
        let token = Self::token(request)?;
        Ok(self
            .db
            .call(move |engine| crate::auth::authenticate(engine.store().conn(), &token))
            .await?)
    }
}
