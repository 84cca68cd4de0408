//! The `Ledger` service: export for auditors, and signed checkpoints of a chain head.

use std::pin::Pin;

use tokio_stream::Stream;
use tonic::{Request, Response, Status};

use super::Daemon;
use crate::audit::anchor;
use crate::auth::{Role, rfc3339};
use crate::engine::Engine;
use crate::error::Result as HResult;
use crate::ledger::{self, Entry};
use crate::proto::v1::{
    BackupReply, BackupRequest, CheckpointRequest, ExportRequest, KeptPrediction, LedgerEntry,
    ProveReply, ProveRequest, SignedCheckpoint, ledger_server::Ledger,
};

/// Whether the caller may learn the identity chain's head and tree (the roles that manage or
/// audit identity events).
fn sees_identity(caller: &crate::auth::Caller) -> bool {
    caller.has(Role::Organizer) || caller.has(Role::Auditor) || caller.has(Role::Custodian)
}

/// Refuses a checkpoint (or proof, which names the tree size) of an isolated holdout to a
/// caller who may not learn how many entries every team made.
fn may_learn_size(engine: &mut Engine, caller: &crate::auth::Caller, name: &str) -> HResult<()> {
    let loaded = engine.loaded(name)?;
    // A checkpoint names the head's position, which counts every team's entries: under
    // `isolated` a team must not learn how many queries the others made.
    if loaded.policy.isolated() && !sees_identity(caller) {
        return Err(crate::error::Error::PermissionDenied(format!(
            "holdout {name} is isolated: its checkpoints and proofs count every team's \
             entries, so only organizers, auditors and custodians may take one; your receipts \
             name your entries by hash, which an auditor can check"
        )));
    }
    Ok(())
}

fn to_proto(e: Entry) -> LedgerEntry {
    LedgerEntry {
        seq: e.seq,
        kind: e.kind,
        body_json: e.body,
        salt: e.salt,
        prev_hash: e.prev_hash,
        hash: e.hash,
        chain: e.chain,
    }
}

/// The JSON checkpoint (format /1 or /2) of `name` for `caller`.
fn checkpoint_of(
    engine: &mut Engine,
    caller: &crate::auth::Caller,
    name: &str,
) -> HResult<anchor::Checkpoint> {
    if name == ledger::USERS_CHAIN {
        // The identity chain: who belongs to which team. Its head counts identity events, so
        // only the roles that manage or audit them get it.
        caller.require(
            "a checkpoint of the identity chain",
            &[Role::Organizer, Role::Auditor, Role::Custodian],
        )?;
        let at = rfc3339(engine.now());
        return anchor::checkpoint(engine.store().conn(), name, &at);
    }
    may_learn_size(engine, caller, name)?;
    let at = rfc3339(engine.now());
    // The identity chain's head is signed with the holdout's (format /2) for the roles that may
    // take a checkpoint of @users; others get the holdout's head alone (/1), since the identity
    // head counts every user and token event.
    if sees_identity(caller) {
        anchor::checkpoint(engine.store().conn(), name, &at)
    } else {
        anchor::checkpoint_without_identity(engine.store().conn(), name, &at)
    }
}

#[tonic::async_trait]
impl Ledger for Daemon {
    type ExportStream = Pin<Box<dyn Stream<Item = Result<LedgerEntry, Status>> + Send + 'static>>;

    async fn export(
        &self,
        request: Request<ExportRequest>,
    ) -> Result<Response<Self::ExportStream>, Status> {
        let caller = self.caller(&request).await?;
        caller.require("exporting the ledger", &[Role::Auditor])?;
        let name = request.into_inner().holdout;
        let entries = self
            .db
            .call(move |engine| {
                if name == ledger::USERS_CHAIN {
                    // Identity events hold no scores; reading them is not a read of exact scores.
                    return ledger::read_chain(engine.store().conn(), ledger::USERS_CHAIN);
                }
                engine.loaded(&name)?;
                // The export is itself a read of exact scores: record it first, so the export
                // contains its own read entry.
                engine.record_read(&caller, &name, "ledger export")?;
                ledger::read_chain(engine.store().conn(), &name)
            })
            .await?;
        let out: Vec<Result<LedgerEntry, Status>> =
            entries.into_iter().map(|e| Ok(to_proto(e))).collect();
        Ok(Response::new(Box::pin(tokio_stream::iter(out))))
    }

    async fn checkpoint(
        &self,
        request: Request<CheckpointRequest>,
    ) -> Result<Response<SignedCheckpoint>, Status> {
        let caller = self.caller(&request).await?;
        let name = request.into_inner().holdout;
        let (cp, note, verifier_key) = self
            .db
            .call(move |engine| {
                // One engine call: no write comes between the two forms.
                let cp = checkpoint_of(engine, &caller, &name)?;
                let with_users = name != ledger::USERS_CHAIN && sees_identity(&caller);
                let at = anchor::note_time(engine.now());
                let conn = engine.store().conn();
                let (_, note) = anchor::note_checkpoint(conn, &name, &at, with_users)?;
                Ok((cp, note, anchor::verifier_key(conn)?))
            })
            .await?;
        Ok(Response::new(SignedCheckpoint {
            holdout: cp.holdout,
            seq: cp.seq,
            head_hash: cp.head_hash,
            at: cp.at,
            public_key: cp.public_key,
            signature: cp.signature,
            format: cp.format,
            users_seq: cp.users_seq.unwrap_or_default(),
            users_head_hash: cp.users_head_hash.unwrap_or_default(),
            note,
            verifier_key,
        }))
    }

    async fn prove(&self, request: Request<ProveRequest>) -> Result<Response<ProveReply>, Status> {
        let caller = self.caller(&request).await?;
        let req = request.into_inner();
        let proofs = self
            .db
            .call(move |engine| {
                let name = req.holdout;
                if name == ledger::USERS_CHAIN {
                    caller.require(
                        "proofs about the identity chain",
                        &[Role::Organizer, Role::Auditor, Role::Custodian],
                    )?;
                } else {
                    may_learn_size(engine, &caller, &name)?;
                }
                let at = anchor::note_time(engine.now());
                let with_users = name != ledger::USERS_CHAIN && sees_identity(&caller);
                let entry = (!req.entry_hash.is_empty()).then_some(req.entry_hash.as_str());
                anchor::prove(
                    engine.store().conn(),
                    &name,
                    entry,
                    req.first_size,
                    &at,
                    with_users,
                )
            })
            .await?;
        let json = |v: Option<String>| v.map(|t| t + "\n").unwrap_or_default();
        Ok(Response::new(ProveReply {
            checkpoint: proofs.checkpoint,
            inclusion_proof: json(
                proofs
                    .inclusion
                    .as_ref()
                    .map(ledger::merkle::InclusionProof::text),
            ),
            consistency_proof: json(
                proofs
                    .consistency
                    .as_ref()
                    .map(ledger::merkle::ConsistencyProof::text),
            ),
            verifier_key: proofs.verifier_key,
        }))
    }

    async fn backup(
        &self,
        request: Request<BackupRequest>,
    ) -> Result<Response<BackupReply>, Status> {
        let caller = self.caller(&request).await?;
        caller.require("backing up the database", &[Role::Custodian])?;
        let out = std::path::PathBuf::from(request.into_inner().out);
        if !out.is_absolute() {
            return Err(crate::error::Error::invalid(
                "out",
                "give an absolute path on the daemon's machine",
            )
            .into());
        }
        if out.exists() {
            return Err(crate::error::Error::AlreadyExists(format!(
                "{} exists on the daemon's machine; a backup never overwrites a file",
                out.display()
            ))
            .into());
        }
        let file = out.display().to_string();
        let (at, reader) = self
            .db
            .call(move |engine| {
                let reader = engine.store().reader().ok_or_else(|| {
                    crate::error::Error::FailedPrecondition(
                        "the daemon runs on an in-memory database; nothing to back up".into(),
                    )
                })?;
                let (_, at) = engine.record_backup(
                    &caller.name,
                    &crate::auth::role_list(&caller.roles),
                    "online",
                    &file,
                )?;
                Ok((at, reader))
            })
            .await?;
        // Copied on a blocking thread from a read connection: one read transaction (a
        // consistent snapshot holding every commit so far, the backup entries included) while
        // the engine goes on writing.
        let path = out.clone();
        let verified =
            tokio::task::spawn_blocking(move || crate::store::backup::copy_to(&reader, &path))
                .await
                .map_err(|e| Status::internal(format!("backup task: {e}")))??;
        tracing::info!(file = %out.display(), bytes = verified.bytes, "backup written");
        Ok(Response::new(BackupReply {
            path: out.display().to_string(),
            bytes: verified.bytes,
            schema_version: verified.schema_version,
            holdouts: verified.holdouts() as u64,
            entries: verified.entries,
            at,
        }))
    }

    type KeptPredictionsStream =
        Pin<Box<dyn Stream<Item = Result<KeptPrediction, Status>> + Send + 'static>>;

    async fn kept_predictions(
        &self,
        request: Request<ExportRequest>,
    ) -> Result<Response<Self::KeptPredictionsStream>, Status> {
        let caller = self.caller(&request).await?;
        caller.require("reading kept prediction files", &[Role::Auditor])?;
        let name = request.into_inner().holdout;
        let files = self
            .db
            .call(move |engine| {
                engine.loaded(&name)?;
                crate::engine::kept_files(engine.store().conn(), &name)
            })
            .await?;
        let out: Vec<Result<KeptPrediction, Status>> = files
            .into_iter()
            .map(|k| {
                Ok(KeptPrediction {
                    entry: k.entry,
                    target: k.target,
                    digest: k.digest,
                    at: k.at,
                    data: k.data,
                })
            })
            .collect();
        Ok(Response::new(Box::pin(tokio_stream::iter(out))))
    }
}
