//! `holdout report NAME --out FILE`: the budget burn-down and every released interval as an
//! SVG, PNG or HTML file (the extension says which). Drawn from what the caller may see: the
//! holdout's history without exact scores.

use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use serde_json::json;
use tokio_stream::StreamExt as _;

use super::conn::{Conn, ServerArgs};
use super::show;
use crate::error::Error;
use crate::proto::v1::{GetHoldoutRequest, HistoryRequest};
use crate::report::{self, Format, ReportData};

/// `holdout report`.
#[derive(Debug, Args)]
pub struct ReportArgs {
    /// Holdout name.
    pub name: String,
    /// File to write: `.svg`, `.png` or `.html` (a self-contained page).
    #[arg(long)]
    pub out: PathBuf,
    /// Replace the file if it exists.
    #[arg(long)]
    pub overwrite: bool,
    /// Print a JSON summary of what was drawn.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// Writes the report.
///
/// # Errors
/// Bad `--out` (extension, existing file), connection, permission and not-found failures.
pub async fn run(args: &ReportArgs) -> anyhow::Result<ExitCode> {
    let format = Format::from_path(&args.out)?;
    if args.out.exists() && !args.overwrite {
        return Err(Error::invalid(
            "--out",
            format!(
                "{} exists; pass --overwrite to replace it",
                args.out.display()
            ),
        )
        .into());
    }
    let conn = Conn::open(&args.server).await?;
    let info = conn
        .holdouts()
        .get_holdout(GetHoldoutRequest {
            name: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let mut stream = conn
        .submissions()
        .history(HistoryRequest {
            holdout: args.name.clone(),
            exact: false,
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let mut history = Vec::new();
    while let Some(entry) = stream.next().await {
        history.push(entry.map_err(|e| conn.fail(e))?);
    }
    let data = ReportData::from_history(&info, &history);
    let bytes = report::render(&data, format)?;
    let mut file = if args.overwrite {
        std::fs::File::create(&args.out)
    } else {
        std::fs::File::create_new(&args.out)
    }
    .map_err(|e| Error::invalid("--out", format!("{}: {e}", args.out.display())))?;
    file.write_all(&bytes)
        .map_err(|e| Error::invalid("--out", format!("{}: {e}", args.out.display())))?;
    if args.json {
        show::print_json(&json!({
            "holdout": data.holdout,
            "out": args.out.display().to_string(),
            "answers": data.answers.len(),
            "refusals": data.refusals.len(),
            "teams": data.teams(),
            "bytes": bytes.len(),
        }));
    } else {
        eprintln!(
            "report of {} ({}, {}) written to {}",
            data.holdout,
            show::plural(data.answers.len() as u64, "answer", "answers"),
            show::plural(data.refusals.len() as u64, "refusal", "refusals"),
            args.out.display()
        );
    }
    Ok(ExitCode::SUCCESS)
}
