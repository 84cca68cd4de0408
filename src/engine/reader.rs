//! Authentication on a read-only connection of its own, off the database thread.
//!
//! Every call authenticates first. On the database thread that read would wait behind whatever
//! runs there, a group commit and its fsync included, so a submission made three trips through
//! the queue and only the last one was batched. A second connection in WAL mode reads the last
//! committed state without waiting for the writer: a token revoked (or a user created) by a
//! committed write, from this process or another, is seen by the very next call, exactly as on
//! the database thread. The reader holds no cache.
//!
//! An in-memory database has no second connection, so there (and if the reader thread is gone
//! or a read fails for any reason other than an unknown token) the database thread answers, as
//! it always did.

use std::sync::mpsc;
use std::thread;

use rusqlite::Connection;
use tokio::sync::oneshot;

use crate::auth::Caller;
use crate::error::{Error, Result};

type Job = (String, oneshot::Sender<Result<Caller>>);

/// A handle to the authentication thread.
#[derive(Debug, Clone)]
pub(crate) struct AuthReader {
    jobs: mpsc::Sender<Job>,
}

impl AuthReader {
    /// Starts the thread over `conn` (a read-only connection to the engine's file).
    pub(crate) fn spawn(conn: Connection) -> Option<AuthReader> {
        let (jobs, rx) = mpsc::channel::<Job>();
        thread::Builder::new()
            .name("holdout-auth".into())
            .spawn(move || {
                while let Ok((token, reply)) = rx.recv() {
                    let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                        crate::auth::authenticate(&conn, &token)
                    }))
                    .unwrap_or_else(|_| {
                        Err(Error::Internal("the authentication read failed".into()))
                    });
                    let _ = reply.send(out);
                }
            })
            .ok()?;
        Some(AuthReader { jobs })
    }

    /// The caller a token belongs to, or `None` when this reader cannot say (thread gone, a
    /// storage error): the database thread is then asked instead.
    pub(crate) async fn authenticate(&self, token: String) -> Option<Result<Caller>> {
        let (tx, rx) = oneshot::channel();
        self.jobs.send((token, tx)).ok()?;
        match rx.await.ok()? {
            Ok(caller) => Some(Ok(caller)),
            Err(e @ Error::Unauthenticated(_)) => Some(Err(e)),
            Err(e) => {
                tracing::warn!(error = %e, "authentication read failed; asking the database thread");
                None
            }
        }
    }
}
