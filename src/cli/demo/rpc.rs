//! The demo's calls to its in-process daemon, through the same gRPC services the command-line
//! client uses.

use anyhow::bail;

use crate::cli::client::conn::{Conn, ServerArgs};
use crate::proto::v1::{
    self as pb, CreateHoldoutChunk, HoldoutInfo, HoldoutSpec, LabelColumn, LabelRows, SubmitChunk,
    SubmitHeader, create_holdout_chunk, submit_chunk, submit_response::Outcome,
};

use super::world::{CLASSES, Shipments, classes};

/// Rows per streamed message.
const CHUNK: usize = 8192;

/// Where the daemon listens and whose token to use.
pub fn server(addr: std::net::SocketAddr, token: &str) -> ServerArgs {
    ServerArgs {
        server: format!("http://{addr}"),
        token: Some(token.to_string()),
        ca: None,
        client_cert: None,
        client_key: None,
    }
}

/// Seals `s` as holdout `name` under `policy` (the caller is a custodian).
pub async fn create(
    conn: &Conn,
    name: &str,
    policy: pb::Policy,
    s: &Shipments,
    description: &str,
    expect_answers: u32,
) -> anyhow::Result<HoldoutInfo> {
    let labels = s.labels();
    let mut chunks = vec![CreateHoldoutChunk {
        part: Some(create_holdout_chunk::Part::Spec(HoldoutSpec {
            name: name.into(),
            policy: Some(policy),
            targets: vec![pb::Target {
                name: "late".into(),
                column: "label".into(),
                metric: "error".into(),
                method: "exact".into(),
                classes: CLASSES.iter().map(|c| c.to_string()).collect(),
            }],
            description: description.into(),
            expect_answers,
            ..Default::default()
        })),
    }];
    for (ids, values) in s.ids.chunks(CHUNK).zip(labels.chunks(CHUNK)) {
        chunks.push(CreateHoldoutChunk {
            part: Some(create_holdout_chunk::Part::Rows(LabelRows {
                ids: ids.to_vec(),
                columns: vec![LabelColumn {
                    values: values.to_vec(),
                }],
            })),
        });
    }
    Ok(conn
        .holdouts()
        .create_holdout(tokio_stream::iter(chunks))
        .await?
        .into_inner())
}

/// What the daemon said to a submission.
pub enum Reply {
    /// Answered.
    Answer(pb::Answer),
    /// Refused (charged nothing).
    Refusal(pb::Refusal),
    /// Entered into a sealed round.
    Sealed(pb::SealedEntry),
}

/// Submits one predictions file (true: late) for the rows of `s`.
pub async fn submit(
    conn: &Conn,
    holdout: &str,
    s: &Shipments,
    says_late: &[bool],
    note: &str,
    mark_final: bool,
) -> anyhow::Result<Reply> {
    let preds = classes(says_late);
    let mut chunks = vec![SubmitChunk {
        part: Some(submit_chunk::Part::Header(SubmitHeader {
            holdout: holdout.into(),
            mode: pb::SubmitMode::Answer as i32,
            note: note.into(),
            mark_final,
            ..Default::default()
        })),
    }];
    for (ids, p) in s.ids.chunks(CHUNK).zip(preds.chunks(CHUNK)) {
        chunks.push(SubmitChunk {
            part: Some(submit_chunk::Part::Predictions(pb::PredictionChunk {
                model: 0,
                ids: ids.to_vec(),
                classes: p.to_vec(),
                values: Vec::new(),
                ..Default::default()
            })),
        });
    }
    let reply = conn
        .submissions()
        .submit(tokio_stream::iter(chunks))
        .await?
        .into_inner();
    Ok(match reply.outcome {
        Some(Outcome::Answer(a)) => Reply::Answer(a),
        Some(Outcome::Refusal(r)) => Reply::Refusal(r),
        Some(Outcome::Sealed(e)) => Reply::Sealed(e),
        other => bail!("the daemon replied with an unexpected outcome: {other:?}"),
    })
}
