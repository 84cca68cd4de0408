//! The gRPC services. Each is the same [`Daemon`] value implementing a generated trait; proto
//! messages are converted to engine types here and nowhere else.

pub(crate) mod convert;
mod holdouts;
mod ledger;
mod submissions;
mod users;

pub use holdouts::REPEATED_ID_KEY;

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use tonic::{Request, Status};

use crate::auth::Caller;
use crate::engine::Db;

/// Byte limits on what a caller may stream to the daemon (each a `holdout serve` flag).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StreamLimits {
    /// Largest single gRPC message (`--max-message-bytes`).
    pub max_message_bytes: usize,
    /// Bytes of one `Submit` stream, every message counted (`--max-submit-bytes`).
    pub max_submit_bytes: u64,
    /// Bytes of one `CreateHoldout` stream, every message counted (`--max-create-bytes`).
    pub max_create_bytes: u64,
}

/// Default of `--max-message-bytes`: 16 MiB. A client chunk of 8,192 rows is far smaller.
pub const DEFAULT_MAX_MESSAGE_BYTES: usize = 16 * 1024 * 1024;
/// Default of `--max-submit-bytes` and `--max-create-bytes`: 1 GiB, enough for 10 million rows
/// with 40-byte ids (checked by `ten_million_rows_fit_the_default_stream_limits`).
pub const DEFAULT_MAX_STREAM_BYTES: u64 = 1024 * 1024 * 1024;

impl Default for StreamLimits {
    fn default() -> StreamLimits {
        StreamLimits {
            max_message_bytes: DEFAULT_MAX_MESSAGE_BYTES,
            max_submit_bytes: DEFAULT_MAX_STREAM_BYTES,
            max_create_bytes: DEFAULT_MAX_STREAM_BYTES,
        }
    }
}

/// gRPC's framing per message: a compression flag and a 4-byte length.
const FRAME_BYTES: u64 = 5;

/// The running byte count of one client stream, refused as soon as it passes its limit (so at
/// most the limit plus one message is ever buffered).
struct StreamBytes {
    total: u64,
    limit: u64,
    max_message: usize,
    what: &'static str,
    flag: &'static str,
}

impl StreamBytes {
    fn new(what: &'static str, limit: u64, flag: &'static str, max_message: usize) -> StreamBytes {
        StreamBytes {
            total: 0,
            limit,
            max_message,
            what,
            flag,
        }
    }

    /// Counts one received message; INVALID_ARGUMENT naming the limit and its flag once the
    /// stream is past it.
    fn add(&mut self, message: &impl prost::Message) -> Result<(), Status> {
        self.total = self
            .total
            .saturating_add(message.encoded_len() as u64 + FRAME_BYTES);
        if self.total > self.limit {
            return Err(crate::error::Error::invalid(
                "stream",
                format!(
                    "{} is larger than this daemon's limit of {} bytes per stream (holdout serve \
                     {}); refused after {} bytes",
                    self.what, self.limit, self.flag, self.total
                ),
            )
            .into());
        }
        Ok(())
    }

    /// A receive error, with tonic's "message too large" turned into a message that names the
    /// limit and its flag.
    fn receive_error(&self, status: Status) -> Status {
        if status.code() == tonic::Code::OutOfRange
            && status.message().contains("message length too large")
        {
            return crate::error::Error::invalid(
                "stream",
                format!(
                    "a message of {} is larger than this daemon's limit of {} bytes per message \
                     (holdout serve --max-message-bytes)",
                    self.what, self.max_message
                ),
            )
            .into();
        }
        status
    }
}

/// What the Submit RPC checks a header and its stream against, before anything reaches the
/// database thread: facts fixed when the holdout was created (its row ids and its policy, recorded
/// in the genesis entry), so they are kept once read. Holdouts are never renamed or deleted.
#[derive(Debug, Clone)]
struct SubmitFacts {
    /// Rows of the holdout.
    rows: usize,
    /// The longest declared row id, in bytes.
    longest_id: usize,
    /// Whether the policy answers best-of batches.
    batches: bool,
    /// The answer rule, for messages.
    answers: String,
}

/// Shared state of the services: a handle to the database thread, the stream limits, and the
/// submission facts of the holdouts seen so far.
#[derive(Debug, Clone)]
pub struct Daemon {
    db: Db,
    limits: StreamLimits,
    facts: Arc<Mutex<HashMap<String, SubmitFacts>>>,
    alerts: Arc<crate::alerts::Alerts>,
    /// Days to keep prediction files of holdouts created without a retention of their own
    /// (`serve --keep-predictions-days`; 0: digests only).
    default_keep_days: u32,
}

impl Daemon {
    /// Services over the engine behind `db`, with the default [`StreamLimits`].
    pub fn new(db: Db) -> Daemon {
        Daemon {
            db,
            limits: StreamLimits::default(),
            facts: Arc::default(),
            alerts: Arc::default(),
            default_keep_days: 0,
        }
    }

    /// The same services with a default retention of prediction files, in days (0: digests
    /// only), for creates that do not ask for one.
    pub fn with_default_retention(mut self, days: u32) -> Daemon {
        self.default_keep_days = days;
        self
    }

    /// The same services with budget alerts ([`crate::alerts`]).
    pub fn with_alerts(mut self, alerts: crate::alerts::Alerts) -> Daemon {
        self.alerts = Arc::new(alerts);
        self
    }

    /// The same services with other stream limits.
    pub fn with_limits(mut self, limits: StreamLimits) -> Daemon {
        self.limits = limits;
        self
    }

    /// The stream limits in force.
    pub fn limits(&self) -> StreamLimits {
        self.limits
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

    /// The submission facts of a holdout: kept from an earlier call, else read on the database
    /// thread once.
    async fn submit_facts(&self, holdout: &str) -> Result<SubmitFacts, Status> {
        if let Some(f) = self.facts.lock().ok().and_then(|m| m.get(holdout).cloned()) {
            return Ok(f);
        }
        let name = holdout.to_string();
        let facts = self
            .db
            .call(move |engine| {
                let loaded = engine.loaded(&name)?;
                let policy = &loaded.policy;
                Ok(SubmitFacts {
                    rows: loaded.rows.len(),
                    longest_id: loaded.rows.iter().map(str::len).max().unwrap_or(0),
                    batches: policy.allows_batches(),
                    answers: policy.answers_spec(),
                })
            })
            .await?;
        if let Ok(mut m) = self.facts.lock() {
            m.insert(holdout.to_string(), facts.clone());
        }
        Ok(facts)
    }

    /// Authenticates the caller of a request.
    async fn caller<T>(&self, request: &Request<T>) -> Result<Caller, Status> {
        let token = Self::token(request)?;
        Ok(self.db.authenticate(token).await?)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::Message;

    use crate::proto::v1::{
        CreateHoldoutChunk, LabelColumn, LabelRows, PredictionChunk, SubmitChunk,
        create_holdout_chunk, submit_chunk,
    };

    /// Rows per client message (`cli::client::CHUNK_ROWS`).
    const ROWS: usize = 8192;
    const TEN_MILLION: usize = 10_000_000;

    fn id(i: usize) -> String {
        // 40 bytes, as long as a UUID with a short prefix.
        format!("row-{i:036}")
    }

    #[test]
    fn ten_million_rows_fit_the_default_stream_limits() {
        let chunks = TEN_MILLION.div_ceil(ROWS) as u64;
        let create = CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Rows(LabelRows {
                ids: (0..ROWS).map(id).collect(),
                columns: vec![LabelColumn {
                    values: (0..ROWS)
                        .map(|i| format!("{:.3}", i as f64 / 7.0))
                        .collect(),
                }],
            })),
        };
        let submit = SubmitChunk {
            part: Some(submit_chunk::Part::Predictions(PredictionChunk {
                model: 0,
                ids: (0..ROWS).map(id).collect(),
                classes: Vec::new(),
                values: (0..ROWS).map(|i| i as f64 / 3.0).collect(),
                ..Default::default()
            })),
        };
        let limits = StreamLimits::default();
        for (what, len, limit) in [
            ("create", create.encoded_len(), limits.max_create_bytes),
            ("submit", submit.encoded_len(), limits.max_submit_bytes),
        ] {
            assert!(len < limits.max_message_bytes, "{what}: {len}");
            // Every chunk full, plus a generous header.
            let total = chunks * (len as u64 + FRAME_BYTES) + 64 * 1024;
            assert!(
                total < limit,
                "{what}: 10M rows take {total} bytes, over the default {limit}"
            );
        }
    }

    #[test]
    fn a_stream_is_refused_as_soon_as_it_passes_its_limit_naming_the_flag() {
        let chunk = SubmitChunk {
            part: Some(submit_chunk::Part::Predictions(PredictionChunk {
                model: 0,
                ids: (0..100).map(id).collect(),
                classes: Vec::new(),
                values: vec![0.5; 100],
                ..Default::default()
            })),
        };
        let one = chunk.encoded_len() as u64 + FRAME_BYTES;
        let mut bytes = StreamBytes::new("a submission", 3 * one, "--max-submit-bytes", 1 << 20);
        for _ in 0..3 {
            bytes.add(&chunk).expect("within the limit");
        }
        let refused = bytes.add(&chunk).expect_err("past the limit");
        assert_eq!(refused.code(), tonic::Code::InvalidArgument);
        assert!(
            refused.message().contains("--max-submit-bytes")
                && refused.message().contains(&(3 * one).to_string()),
            "{}",
            refused.message()
        );
    }

    #[test]
    fn tonic_message_too_large_names_the_flag() {
        let bytes = StreamBytes::new("a submission", 1 << 30, "--max-submit-bytes", 4096);
        let tonic = Status::out_of_range(
            "Error, decoded message length too large: found 9999 bytes, the limit is: 4096 bytes",
        );
        let status = bytes.receive_error(tonic);
        assert_eq!(status.code(), tonic::Code::InvalidArgument);
        assert!(
            status.message().contains("--max-message-bytes") && status.message().contains("4096"),
            "{}",
            status.message()
        );
        let other = bytes.receive_error(Status::cancelled("gone"));
        assert_eq!(other.code(), tonic::Code::Cancelled);
    }
}
