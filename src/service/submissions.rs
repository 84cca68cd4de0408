//! The `Submissions` service.

use std::pin::Pin;

use tokio_stream::{Stream, StreamExt};
use tonic::{Request, Response, Status, Streaming};

use super::{Daemon, convert};
use crate::engine::{ModelPredictions, RawValues, SubmitMode, SubmitOutcome, SubmitRequest};
use crate::error::Error;
use crate::proto::v1::{
    self as pb, HistoryEntry, HistoryRequest, StatusRequest, StatusResponse, SubmitChunk,
    SubmitResponse, submissions_server::Submissions, submit_chunk::Part, submit_response::Outcome,
};

/// Longest note a query may carry: notes are written to the append-only ledger and shown to
/// other users, so they are kept short.
pub(crate) const MAX_NOTE_CHARS: usize = 2_000;

/// Longest class name a prediction may carry (declared classes are short names).
pub(crate) const MAX_CLASS_BYTES: usize = 256;

/// The form of a model's values on the wire.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Form {
    /// `classes`: class names.
    Names,
    /// `class_indices`: indices into the declared classes.
    Indices,
    /// `values`: numbers.
    Numbers,
}

#[tonic::async_trait]
impl Submissions for Daemon {
    async fn submit(
        &self,
        request: Request<Streaming<SubmitChunk>>,
    ) -> Result<Response<SubmitResponse>, Status> {
        // Authentication comes from the call's metadata, before any message is read.
        let caller = self.caller(&request).await?;
        let mut bytes = super::StreamBytes::new(
            "a submission",
            self.limits.max_submit_bytes,
            "--max-submit-bytes",
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
        let Some(Part::Header(header)) = first else {
            return Err(Error::invalid("stream", "the first chunk must be the header").into());
        };
        let mode = match pb::SubmitMode::try_from(header.mode) {
            Ok(pb::SubmitMode::Answer) => SubmitMode::Answer,
            Ok(pb::SubmitMode::DryRun) => SubmitMode::DryRun,
            Ok(pb::SubmitMode::Validate) => SubmitMode::Validate,
            _ => return Err(Error::invalid("mode", "set the submit mode").into()),
        };
        // 0 (the field's default) means no limit; anything else must be a finite cost.
        if !(header.max_cost_nats.is_finite() && header.max_cost_nats >= 0.0) {
            return Err(Error::invalid(
                "max_cost_nats",
                "must be a finite number of nats >= 0 (0: no limit)",
            )
            .into());
        }
        let note_chars = header.note.chars().count();
        if note_chars > MAX_NOTE_CHARS {
            return Err(Error::invalid(
                "note",
                format!("at most {MAX_NOTE_CHARS} characters, got {note_chars}"),
            )
            .into());
        }
        // Who may send is checked on the header, before anything is buffered.
        if mode != SubmitMode::Validate {
            caller.require("submitting predictions", &[crate::auth::Role::Analyst])?;
        }
        // Rows per model are capped at the holdout's size (more is an error anyway), and every
        // id at the longest declared id, so a runaway client cannot exhaust memory.
        let super::SubmitFacts {
            rows,
            longest_id,
            batches,
            answers,
        } = self.submit_facts(&header.holdout).await?;
        let models = header.models.max(1) as usize;
        if models > 64 {
            return Err(Error::invalid("models", "a batch holds at most 64 models").into());
        }
        // A batch on a holdout that answers one model at a time is refused on the header (as
        // the engine would refuse it), not after the whole batch was streamed.
        if models > 1 && !batches {
            return Err(Error::invalid(
                "predictions",
                format!(
                    "a batch of {models} models needs a best-of holdout; this one answers with \
                     {answers}"
                ),
            )
            .into());
        }
        let mut preds: Vec<ModelPredictions> = (0..models)
            .map(|_| ModelPredictions {
                ids: Vec::new(),
                values: RawValues::Numbers(Vec::new()),
            })
            .collect();
        // Each model's values come in one form: class names, class indices or numbers.
        let mut kinds: Vec<Option<Form>> = vec![None; models];
        while let Some(chunk) = stream.next().await {
            let chunk = chunk.map_err(|e| bytes.receive_error(e))?;
            // Counted before it is kept: the stream is refused as soon as it passes the limit.
            bytes.add(&chunk)?;
            let chunk = match chunk.part {
                Some(Part::Predictions(c)) => c,
                Some(Part::Header(_)) => {
                    return Err(Error::invalid("stream", "the header was sent twice").into());
                }
                None => continue,
            };
            let m = chunk.model as usize;
            let name = header
                .model_names
                .get(m)
                .cloned()
                .unwrap_or_else(|| format!("model {m}"));
            let target = preds.get_mut(m).ok_or_else(|| {
                Error::invalid(
                    "predictions",
                    format!("model index {m} is outside the batch"),
                )
            })?;
            let forms = [
                !chunk.classes.is_empty(),
                !chunk.class_indices.is_empty(),
                !chunk.values.is_empty(),
            ];
            if forms.iter().filter(|f| **f).count() > 1 {
                return Err(Error::invalid(
                    name,
                    "a chunk mixes class names, class indices and numbers",
                )
                .into());
            }
            let kind = match forms {
                [true, ..] => Form::Names,
                [_, true, _] => Form::Indices,
                _ => Form::Numbers,
            };
            let n_values = match kind {
                Form::Names => chunk.classes.len(),
                Form::Indices => chunk.class_indices.len(),
                Form::Numbers => chunk.values.len(),
            };
            if n_values != chunk.ids.len() {
                return Err(Error::invalid(
                    name,
                    format!("a chunk has {} ids but {n_values} values", chunk.ids.len()),
                )
                .into());
            }
            if chunk.ids.is_empty() {
                continue;
            }
            match kinds[m] {
                None => {
                    kinds[m] = Some(kind);
                    target.values = match kind {
                        Form::Names => RawValues::Classes(Vec::new()),
                        Form::Indices => RawValues::ClassIndices(Vec::new()),
                        Form::Numbers => RawValues::Numbers(Vec::new()),
                    };
                }
                Some(k) if k != kind => {
                    return Err(Error::invalid(
                        name,
                        "mixes class names, class indices and numbers",
                    )
                    .into());
                }
                _ => {}
            }
            if let Some(long) = chunk.ids.iter().find(|id| id.len() > longest_id) {
                return Err(Error::invalid(
                    name,
                    format!(
                        "row id {} is longer than any id of the holdout ({longest_id} bytes)",
                        crate::error::short(long)
                    ),
                )
                .into());
            }
            if let Some(long) = chunk.classes.iter().find(|c| c.len() > MAX_CLASS_BYTES) {
                return Err(Error::invalid(
                    name,
                    format!(
                        "class name {} is longer than {MAX_CLASS_BYTES} bytes",
                        crate::error::short(long)
                    ),
                )
                .into());
            }
            if target.ids.len() + chunk.ids.len() > rows {
                return Err(Error::invalid(
                    name,
                    format!("more prediction rows than the holdout's {rows} rows"),
                )
                .into());
            }
            if target.ids.is_empty() {
                // Most files fit in one reservation: the holdout's size.
                target.ids.reserve_exact(rows);
            }
            target.ids.extend(chunk.ids);
            match &mut target.values {
                RawValues::Classes(v) => v.extend(chunk.classes),
                RawValues::ClassIndices(v) => v.extend(chunk.class_indices),
                RawValues::Numbers(v) => v.extend(chunk.values),
            }
        }
        let req = SubmitRequest {
            holdout: header.holdout,
            target: header.target,
            mode,
            request_id: Some(header.request_id).filter(|s| !s.is_empty()),
            note: header.note,
            max_cost_nats: Some(header.max_cost_nats).filter(|c| *c > 0.0),
            model_names: header.model_names,
            models: preds,
            mark_final: header.mark_final,
        };
        let holdout = req.holdout.clone();
        // Group commit: queued submissions share one transaction; the reply leaves after it
        // committed (src/engine/worker.rs).
        let alert_holdout = holdout.clone();
        let (outcome, guarantee, closes_at, tolerance, isolated, budget_of) = self
            .db
            .call_batched(move |engine| {
                let out = engine.submit(&caller, req)?;
                let policy = &engine.loaded(&holdout)?.policy;
                let closes_at = policy.closes_at.map(crate::auth::rfc3339);
                Ok((
                    out,
                    policy.guarantee(),
                    closes_at.unwrap_or_default(),
                    policy.input.tolerance,
                    policy.isolated(),
                    crate::engine::share_of(policy, &caller.team).0,
                ))
            })
            .await?;
        let outcome = match outcome {
            SubmitOutcome::Answer {
                record,
                receipt,
                replayed,
            } => {
                // Alerts read the budget released with this answer, nothing else.
                if !replayed {
                    let team = if isolated { record.team.as_str() } else { "" };
                    self.alerts
                        .observe(&alert_holdout, team, &record.budget, tolerance);
                }
                let mut answer = convert::answer(&record, &receipt, replayed, &guarantee);
                answer.budget_of = budget_of;
                Outcome::Answer(answer)
            }
            SubmitOutcome::Refusal { record, receipt } => {
                let mut refusal = convert::refusal(&record, receipt.as_ref());
                refusal.budget_of = budget_of;
                Outcome::Refusal(refusal)
            }
            SubmitOutcome::Quote {
                quote,
                would_refuse,
                budget,
            } => Outcome::Quote(pb::Quote {
                query: quote.query,
                delta_i: quote.delta_i,
                level_nats: quote.level_nats,
                half_width: quote.half_width,
                worst_code_nats: quote.worst_code_nats,
                would_refuse: would_refuse.unwrap_or_default(),
                budget: Some(convert::budget(&budget)),
            }),
            SubmitOutcome::Validation { rows, digest } => {
                Outcome::Validation(pb::Validation { rows, digest })
            }
            SubmitOutcome::Sealed {
                record,
                receipt,
                replayed,
            } => Outcome::Sealed(convert::sealed(
                &record, &receipt, replayed, &closes_at, &guarantee,
            )),
        };
        Ok(Response::new(SubmitResponse {
            outcome: Some(outcome),
        }))
    }

    async fn get_status(
        &self,
        request: Request<StatusRequest>,
    ) -> Result<Response<StatusResponse>, Status> {
        let caller = self.caller(&request).await?;
        let name = request.into_inner().holdout;
        let who = caller.clone();
        let (view, flags, isolated, round) = self
            .db
            .call(move |engine| {
                let view = engine.holdout_view(&caller, &name)?;
                let flags = engine.probe_flags(&caller, &name)?;
                let isolated = engine.loaded(&name)?.policy.isolated();
                let round = engine.round_status(&caller, &name)?;
                Ok((view, flags, isolated, round))
            })
            .await?;
        // Every team's alerts for the roles that see every team's figures; an analyst under
        // `isolated` sees its own team's only.
        let all = who.has(crate::auth::Role::Organizer)
            || who.has(crate::auth::Role::Custodian)
            || who.has(crate::auth::Role::Auditor);
        let alerts: Vec<pb::BudgetAlert> = self
            .alerts
            .fired_for(&view.name)
            .into_iter()
            .filter(|a| all || !isolated || a.team == who.team)
            .map(|a| pb::BudgetAlert {
                kind: a.kind.to_string(),
                team: a.team.clone(),
                detail: a.detail(),
            })
            .collect();
        Ok(Response::new(StatusResponse {
            holdout: view.name.clone(),
            budget: Some(convert::budget(&view.budget)),
            guarantee: view.guarantee.clone(),
            policy: Some(convert::policy(&view.policy)),
            flags: flags
                .into_iter()
                .map(|f| pb::ProbeFlag {
                    team: f.team,
                    kind: f.kind,
                    detail: f.detail,
                })
                .collect(),
            alerts,
            budget_of: view.budget_of.clone(),
            no_share: view.no_share,
            round: round.map(|r| pb::SealedRoundStatus {
                teams: r
                    .teams
                    .into_iter()
                    .map(|t| pb::RoundTeam {
                        team: t.team,
                        target: t.target,
                        entries: t.entries,
                        selected: t.selected,
                        marked: t.marked,
                    })
                    .collect(),
                not_submitted: r.not_submitted,
                closed: r.closed,
                own_team_only: r.own_team_only,
            }),
        }))
    }

    type HistoryStream = Pin<Box<dyn Stream<Item = Result<HistoryEntry, Status>> + Send + 'static>>;

    async fn history(
        &self,
        request: Request<HistoryRequest>,
    ) -> Result<Response<Self::HistoryStream>, Status> {
        let caller = self.caller(&request).await?;
        let req = request.into_inner();
        let (items, guarantee) = self
            .db
            .call(move |engine| {
                let items = engine.history(&caller, &req.holdout, req.exact)?;
                Ok((items, engine.loaded(&req.holdout)?.policy.guarantee()))
            })
            .await?;
        let entries: Vec<Result<HistoryEntry, Status>> = convert::history(items, &guarantee)
            .into_iter()
            .map(Ok)
            .collect();
        Ok(Response::new(Box::pin(tokio_stream::iter(entries))))
    }

    async fn leaderboard(
        &self,
        request: Request<pb::LeaderboardRequest>,
    ) -> Result<Response<pb::LeaderboardResponse>, Status> {
        let caller = self.caller(&request).await?;
        let name = request.into_inner().holdout;
        let board = self
            .db
            .call(move |engine| engine.leaderboard(&caller, &name))
            .await?;
        Ok(Response::new(convert::leaderboard(&board)))
    }

    async fn ranking(
        &self,
        request: Request<pb::RankingRequest>,
    ) -> Result<Response<pb::RankingResponse>, Status> {
        let caller = self.caller(&request).await?;
        let name = request.into_inner().holdout;
        let ranking = self
            .db
            .call(move |engine| engine.ranking(&caller, &name))
            .await?;
        Ok(Response::new(convert::ranking(&ranking)))
    }

    async fn duplicates(
        &self,
        request: Request<pb::DuplicatesRequest>,
    ) -> Result<Response<pb::DuplicatesResponse>, Status> {
        let caller = self.caller(&request).await?;
        let name = request.into_inner().holdout;
        let holdout = name.clone();
        let found = self
            .db
            .call(move |engine| engine.duplicates(&caller, &name))
            .await?;
        Ok(Response::new(convert::duplicates(&holdout, &found)))
    }
}
