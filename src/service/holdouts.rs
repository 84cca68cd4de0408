//! The `Holdouts` service.

use std::pin::Pin;

use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

use super::{Daemon, convert};
use crate::auth::Role;
use crate::engine::{CreateHead, FamilyRequest, NewRows, PolicyInput, TargetDecl};
use crate::error::Error;
use crate::metric::Metric;
use crate::proto::v1::{
    CloseHoldoutRequest, CreateHoldoutChunk, DeclarationChunk, GetDeclarationRequest,
    GetHoldoutRequest, HoldoutInfo, ListHoldoutsRequest, ListHoldoutsResponse, ShredLabelsReply,
    ShredLabelsRequest, WithdrawHoldoutReply, WithdrawHoldoutRequest, create_holdout_chunk::Part,
    holdouts_server::Holdouts,
};

/// Row ids per declaration chunk.
const IDS_PER_CHUNK: usize = 8192;

fn policy_input(p: crate::proto::v1::Policy) -> PolicyInput {
    PolicyInput {
        delta: p.delta,
        schedule: p.schedule,
        answers: p.answers,
        tolerance: p.tolerance,
        sharing: p.sharing,
        tolerance_reference: p.tolerance_reference,
        shares: p.shares,
        daily_quota: p.daily_quota,
        closes_at: p.closes_at,
        ranking_share: p.ranking_share,
        leaderboard: p.leaderboard,
    }
}

/// Metadata of a create refused for a repeated row id: the id's bytes (the CLI, which leaves
/// repeats in an unsorted labels file to the daemon, reads the file again for its lines).
pub const REPEATED_ID_KEY: &str = "holdout-repeated-id-bin";

/// Longest id put in [`REPEATED_ID_KEY`] (the whole reply's headers are limited).
const REPEATED_ID_MAX: usize = 4096;

/// The reply to a refused create: the status of the error, with [`REPEATED_ID_KEY`] when a
/// row id is repeated.
fn create_status(e: Error) -> Status {
    let repeated = match &e {
        Error::InvalidArgument { field, message } if message == crate::engine::REPEATED => field
            .strip_prefix("row id ")
            .filter(|id| id.len() <= REPEATED_ID_MAX)
            .map(|id| tonic::metadata::MetadataValue::from_bytes(id.as_bytes())),
        _ => None,
    };
    let mut status = Status::from(e);
    if let Some(id) = repeated {
        status.metadata_mut().insert_bin(REPEATED_ID_KEY, id);
    }
    status
}

#[tonic::async_trait]
impl Holdouts for Daemon {
    async fn create_holdout(
        &self,
        request: Request<Streaming<CreateHoldoutChunk>>,
    ) -> Result<Response<HoldoutInfo>, Status> {
        let caller = self.caller(&request).await?;
        // Refuse early, before reading labels the caller may not upload.
        caller.require("creating a holdout", &[Role::Custodian])?;
        let mut bytes = super::StreamBytes::new(
            "a holdout creation",
            self.limits.max_create_bytes,
            "--max-create-bytes",
            self.limits.max_message_bytes,
        );
        let mut stream = request.into_inner();
        let first = match stream.next().await {
            Some(Ok(chunk)) => {
                bytes.add(&chunk)?;
                chunk.part
            }
            Some(Err(e)) => return Err(bytes.receive_error(e)),
            None => None,
        };
        let Some(Part::Spec(spec)) = first else {
            return Err(Error::invalid("stream", "the first chunk must carry the spec").into());
        };
        let expect = spec.expect_answers.max(1);
        let retention = crate::engine::Retention::from_days(
            spec.keep_predictions_days.unwrap_or(self.default_keep_days),
        )?;
        let family = if spec.family.is_empty() {
            if spec.family_delta != 0.0 {
                return Err(Error::invalid(
                    "family_delta",
                    "a family total was given without a family name",
                )
                .into());
            }
            None
        } else {
            Some(FamilyRequest {
                name: spec.family.clone(),
                total: (spec.family_delta != 0.0).then_some(spec.family_delta),
            })
        };
        let mut targets = Vec::with_capacity(spec.targets.len());
        for t in &spec.targets {
            let metric: Metric = t.metric.parse()?;
            targets.push(TargetDecl {
                name: t.name.clone(),
                column: t.column.clone(),
                metric,
                method: t.method.clone(),
                classes: t.classes.clone(),
            });
        }
        // Room for the rows announced, within what the byte limit lets through (a row takes at
        // least a few bytes on the wire).
        let limit = self.limits.max_create_bytes;
        let rows_hint = spec.rows_hint.min(limit / 8);
        let id_bytes_hint = spec.id_bytes_hint.min(limit);
        let mut rows = NewRows::new(
            targets,
            usize::try_from(rows_hint).unwrap_or(0),
            usize::try_from(id_bytes_hint).unwrap_or(0),
        )?;
        let width = rows.targets().len();
        // Each chunk is added to the rows as it arrives and dropped: the daemon holds the rows
        // once, packed, never the request.
        while let Some(chunk) = stream.next().await {
            let chunk = chunk.map_err(|e| bytes.receive_error(e))?;
            // Counted before it is kept: the stream is refused as soon as it passes the limit.
            bytes.add(&chunk)?;
            match chunk.part {
                Some(Part::Rows(chunk_rows)) => {
                    if chunk_rows.columns.len() != width {
                        return Err(Error::invalid(
                            "labels",
                            format!(
                                "a chunk has {} label columns for {} targets",
                                chunk_rows.columns.len(),
                                width
                            ),
                        )
                        .into());
                    }
                    for (c, col) in chunk_rows.columns.iter().enumerate() {
                        if col.values.len() != chunk_rows.ids.len() {
                            return Err(Error::invalid(
                                "labels",
                                format!("column {c} is not as long as the ids of its chunk"),
                            )
                            .into());
                        }
                    }
                    let mut values: Vec<&str> = Vec::with_capacity(width);
                    for (i, id) in chunk_rows.ids.iter().enumerate() {
                        values.clear();
                        values.extend(chunk_rows.columns.iter().map(|c| c.values[i].as_str()));
                        rows.push(id, &values)?;
                    }
                }
                Some(Part::Spec(_)) => {
                    return Err(Error::invalid("stream", "the spec was sent twice").into());
                }
                None => {}
            }
        }
        let head = CreateHead {
            name: spec.name,
            description: spec.description,
            policy: policy_input(spec.policy.unwrap_or_default()),
            retention,
        };
        let view = self
            .db
            .call(move |engine| engine.create_streamed(&caller, head, rows, family, expect))
            .await
            .map_err(create_status)?;
        Ok(Response::new(convert::holdout(&view)))
    }
    async fn get_holdout(
        &self,
        request: Request<GetHoldoutRequest>,
    ) -> Result<Response<HoldoutInfo>, Status> {
        let caller = self.caller(&request).await?;
        let name = request.into_inner().name;
        let view = self
            .db
            .call(move |engine| engine.holdout_view(&caller, &name))
            .await?;
        Ok(Response::new(convert::holdout(&view)))
    }

    async fn list_holdouts(
        &self,
        request: Request<ListHoldoutsRequest>,
    ) -> Result<Response<ListHoldoutsResponse>, Status> {
        let caller = self.caller(&request).await?;
        let all = request.into_inner().include_closed;
        let views = self
            .db
            .call(move |engine| engine.list_holdouts(&caller, all))
            .await?;
        Ok(Response::new(ListHoldoutsResponse {
            holdouts: views.iter().map(convert::holdout).collect(),
        }))
    }

    async fn close_holdout(
        &self,
        request: Request<CloseHoldoutRequest>,
    ) -> Result<Response<HoldoutInfo>, Status> {
        let caller = self.caller(&request).await?;
        let req = request.into_inner();
        let view = self
            .db
            .call(move |engine| engine.close_holdout(&caller, &req.name, &req.reason))
            .await?;
        Ok(Response::new(convert::holdout(&view)))
    }

    async fn withdraw_holdout(
        &self,
        request: Request<WithdrawHoldoutRequest>,
    ) -> Result<Response<WithdrawHoldoutReply>, Status> {
        let caller = self.caller(&request).await?;
        let req = request.into_inner();
        let w = self
            .db
            .call(move |engine| engine.withdraw_holdout(&caller, &req.name, &req.reason))
            .await?;
        Ok(Response::new(WithdrawHoldoutReply {
            completed: w.completed,
            message: w.message,
            holdout: Some(convert::holdout(&w.holdout)),
        }))
    }

    async fn shred_labels(
        &self,
        request: Request<ShredLabelsRequest>,
    ) -> Result<Response<ShredLabelsReply>, Status> {
        let caller = self.caller(&request).await?;
        let req = request.into_inner();
        let s = self
            .db
            .call(move |engine| engine.shred_labels(&caller, &req.name, &req.reason))
            .await?;
        Ok(Response::new(ShredLabelsReply {
            message: s.message,
            entry: s.entry,
        }))
    }

    type GetDeclarationStream =
        Pin<Box<dyn Stream<Item = Result<DeclarationChunk, Status>> + Send + 'static>>;

    async fn get_declaration(
        &self,
        request: Request<GetDeclarationRequest>,
    ) -> Result<Response<Self::GetDeclarationStream>, Status> {
        self.caller(&request).await?;
        let name = request.into_inner().name;
        let declared = self.db.call(move |engine| engine.declared(&name)).await?;
        // Chunks are made as the stream is read: the ids are never all copied at once.
        let mut first = Some(
            declared
                .targets()
                .iter()
                .map(convert::target)
                .collect::<Vec<_>>(),
        );
        let chunks = (0..declared.len())
            .step_by(IDS_PER_CHUNK)
            .map(move |start| {
                Ok::<_, Status>(DeclarationChunk {
                    targets: first.take().unwrap_or_default(),
                    ids: declared.ids(start..start + IDS_PER_CHUNK),
                })
            });
        Ok(Response::new(Box::pin(tokio_stream::iter(chunks))))
    }
}
