//! The `Ledger` service: export for auditors.

use std::pin::Pin;

use serde_json::json;
use tokio_stream::Stream;
use tonic::{Request, Response, Status};

use super::Daemon;
use crate::auth::{Role, rfc3339};
use crate::ledger;
use crate::proto::v1::{
    CheckpointRequest, ExportRequest, LedgerEntry, SignedCheckpoint, ledger_server::Ledger,
};

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
                engine.loaded(&name)?;
                let at = rfc3339(engine.now());
                // The export is itself a read of exact scores: record it first, so the export
                // contains its own read entry.
                ledger::append(
                    engine.store().conn(),
                    &name,
                    "read",
                    &json!({"by": caller.name, "roles": crate::auth::role_list(&caller.roles),
                            "what": "ledger export", "at": at}),
                )?;
                ledger::read_chain(engine.store().conn(), &name)
            })
            .await?;
        let out: Vec<Result<LedgerEntry, Status>> = entries
            .into_iter()
            .map(|e| {
                Ok(LedgerEntry {
                    seq: e.seq,
                    kind: e.kind,
                    body_json: e.body,
                    salt: e.salt,
                    prev_hash: e.prev_hash,
                    hash: e.hash,
                })
            })
            .collect();
        Ok(Response::new(Box::pin(tokio_stream::iter(out))))
    }

    async fn checkpoint(
        &self,
        request: Request<CheckpointRequest>,
    ) -> Result<Response<SignedCheckpoint>, Status> {
        self.caller(&request).await?;
        Err(Status::unimplemented(
            "signed checkpoints are not implemented yet; export the ledger and keep its head hash",
        ))
    }
}
