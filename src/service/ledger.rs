//! The `Ledger` service: export for auditors, and signed checkpoints of a chain head.

use std::pin::Pin;

use tokio_stream::Stream;
use tonic::{Request, Response, Status};

use super::Daemon;
use crate::audit::anchor;
use crate::auth::{Role, rfc3339};
use crate::ledger::{self, Entry};
use crate::proto::v1::{
    BackupReply, BackupRequest, CheckpointRequest, ExportRequest, KeptPrediction, LedgerEntry,
    SignedCheckpoint, ledger_server::Ledger,
};

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
        let cp = self
            .db
            .call(move |engine| {
                if name == ledger::USERS_CHAIN {
                    // The identity chain: who belongs to which team. Its head counts identity
                    // events, so only the roles that manage or audit them get it.
                    caller.require(
                        "a checkpoint of the identity chain",
                        &[Role::Organizer, Role::Auditor, Role::Custodian],
                    )?;
                    let at = rfc3339(engine.now());
                    return anchor::checkpoint(engine.store().conn(), &name, &at);
                }
                let loaded = engine.loaded(&name)?;
                // A checkpoint names the head's position, which counts every team's entries:
                // under `isolated` a team must not learn how many queries the others made.
                if loaded.policy.isolated()
                    && !(caller.has(Role::Organizer)
                        || caller.has(Role::Auditor)
                        || caller.has(Role::Custodian))
                {
                    return Err(crate::error::Error::PermissionDenied(format!(
                        "holdout {name} is isolated: its checkpoints count every team's \
                         entries, so only organizers, auditors and custodians may take one; \
                         your receipts name your entries by hash, which an auditor can check"
                    )));
                }
                let at = rfc3339(engine.now());
                // The identity chain's head is signed with the holdout's (format /2) for the
                // roles that may take a checkpoint of @users; others get the holdout's head
                // alone (/1), since the identity head counts every user and token event.
                if caller.has(Role::Organizer)
                    || caller.has(Role::Auditor)
                    || caller.has(Role::Custodian)
                {
                    anchor::checkpoint(engine.store().conn(), &name, &at)
                } else {
                    anchor::checkpoint_without_identity(engine.store().conn(), &name, &at)
                }
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
