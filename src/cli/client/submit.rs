//! Sending predictions: `ids` (the template), `validate`, and `submit` (with `--dry-run`).

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::str::FromStr;

use clap::Args;
use indicatif::{ProgressBar, ProgressStyle};
use serde_json::json;
use tokio_stream::StreamExt;

use super::conn::{Conn, ServerArgs};
use super::{CHUNK_ROWS, exit, show};
use crate::error::Error;
use crate::files::{self, DEFAULT_MAX_FILE_BYTES, TableSpec};
use crate::metric::{self, Metric};
use crate::proto::v1::{
    GetDeclarationRequest, GetHoldoutRequest, PredictionChunk, SubmitChunk, SubmitHeader,
    SubmitMode, Target, submit_chunk::Part, submit_response::Outcome,
};

/// `holdout ids`.
#[derive(Debug, Args)]
pub struct IdsArgs {
    /// Holdout name.
    pub name: String,
    /// Write the template here instead of stdout.
    #[arg(long, value_name = "FILE")]
    pub out: Option<PathBuf>,
    /// Replace --out if it exists.
    #[arg(long, requires = "out")]
    pub force: bool,
    /// Print the label domain as one JSON object on stdout (needs --out, which gets the CSV).
    #[arg(long, requires = "out")]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// Where predictions come from.
#[derive(Debug, Args)]
pub struct PredictionArgs {
    /// Target to score; may be left out when the holdout has a single target.
    #[arg(long)]
    pub target: Option<String>,
    /// Column of the row ids.
    #[arg(long, default_value = "id")]
    pub id_column: String,
    /// Column of the predictions: a class for metric `error`, a number otherwise (a probability of
    /// class "1" for brier and log_loss).
    #[arg(long, default_value = "prediction")]
    pub prediction_column: String,
    /// Refuse prediction files larger than this many bytes.
    #[arg(long, default_value_t = DEFAULT_MAX_FILE_BYTES, value_name = "BYTES")]
    pub max_file_bytes: u64,
}

/// `holdout validate`.
#[derive(Debug, Args)]
pub struct ValidateArgs {
    /// Holdout name.
    pub name: String,
    /// Predictions file (CSV with a header row, or JSON Lines).
    #[arg(long, value_name = "FILE")]
    pub predictions: PathBuf,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub input: PredictionArgs,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// `holdout submit`.
#[derive(Debug, Args)]
pub struct SubmitArgs {
    /// Holdout name.
    pub name: String,
    /// Predictions file(s): CSV with a header row, or JSON Lines. Several files are one best-of
    /// batch: the answer names the best model and charges one share per model.
    #[arg(long, value_name = "FILE", num_args = 1.., required = true)]
    pub predictions: Vec<PathBuf>,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub input: PredictionArgs,
    /// Free text recorded with the query.
    #[arg(long, default_value = "")]
    pub note: String,
    /// Your id for this submission: retrying with the same id and the same predictions returns
    /// the original answer without a second charge; the same id with other predictions is an
    /// error.
    #[arg(long, value_name = "ID", default_value = "")]
    pub request_id: String,
    /// Only quote what the query would cost (level, half-width, worst-case code); nothing is
    /// scored, charged or recorded.
    #[arg(long)]
    pub dry_run: bool,
    /// Refuse, charging and recording nothing, if the answer's worst-case code would exceed this
    /// many nats.
    #[arg(long, value_name = "NATS")]
    pub max_cost: Option<f64>,
    /// Sealed rounds: mark this entry as your team's selected one for the ranking (without a
    /// mark, the team's last entry is selected).
    #[arg(long = "final")]
    pub mark_final: bool,
    /// For CI gates on `threshold:TAU` holdouts: exit with status 9 when the answer is `fail`
    /// (the answer is still recorded and printed). A pass exits 0.
    #[arg(long)]
    pub require_pass: bool,
    /// State the holdout's guarantee and its assumptions in full after the answer (without it,
    /// one line names them; `holdout status` shows them in full too). JSON always has them.
    #[arg(long)]
    pub guarantee: bool,
    /// Print one JSON object.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// Writes the predictions template and shows the label domain.
///
/// # Errors
/// Connection, permission and not-found failures; an --out file that exists.
pub async fn ids(args: &IdsArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let mut stream = conn
        .holdouts()
        .get_declaration(GetDeclarationRequest {
            name: args.name.clone(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    // The ids are written as their chunks arrive: the CLI never holds the whole list. A file
    // left incomplete by a failure on the way is removed.
    let out: Box<dyn std::io::Write + Send> = match &args.out {
        Some(path) => Box::new(std::io::BufWriter::with_capacity(
            1 << 16,
            files::new_file(path, args.force)?,
        )),
        None => Box::new(std::io::BufWriter::new(std::io::stdout())),
    };
    let written = write_template(&mut stream, out, &conn).await;
    if written.is_err()
        && let Some(path) = &args.out
    {
        let _ = std::fs::remove_file(path);
    }
    let (targets, rows) = written?;
    if args.json {
        show::print_json(&json!({
            "holdout": args.name,
            "rows": rows,
            "out": args.out.as_ref().map(|p| p.display().to_string()),
            "targets": targets.iter().map(show::target_json).collect::<Vec<_>>(),
        }));
    } else {
        eprintln!("{}: {rows} row ids", args.name);
        for t in &targets {
            eprintln!("target {}", show::target_text(t));
        }
        if let Some(path) = &args.out {
            eprintln!("template written to {}", path.display());
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Writes the declaration's ids as a CSV template (`id,prediction`, predictions empty) as the
/// chunks arrive; gives back the targets and the number of rows.
async fn write_template(
    stream: &mut tonic::Streaming<crate::proto::v1::DeclarationChunk>,
    out: Box<dyn std::io::Write + Send>,
    conn: &Conn,
) -> anyhow::Result<(Vec<Target>, usize)> {
    let mut w = csv::WriterBuilder::new().flexible(false).from_writer(out);
    w.write_record(["id", "prediction"])
        .map_err(files::csv_write_error)?;
    let mut targets = Vec::new();
    let mut rows = 0;
    while let Some(chunk) = stream.next().await {
        let chunk = chunk.map_err(|e| conn.fail(e))?;
        targets.extend(chunk.targets);
        for id in &chunk.ids {
            w.write_record([id.as_str(), ""])
                .map_err(files::csv_write_error)?;
        }
        rows += chunk.ids.len();
    }
    w.flush().map_err(Error::Io)?;
    Ok((targets, rows))
}

/// Checks predictions against the declaration; nothing is charged or recorded.
///
/// # Errors
/// Bad input (local or from the daemon), connection, permission and not-found failures.
pub async fn validate(args: &ValidateArgs) -> anyhow::Result<ExitCode> {
    let conn = Conn::open(&args.server).await?;
    let (target, rows, _) = find_target(&conn, &args.name, args.input.target.as_deref()).await?;
    let models = vec![read_predictions(
        &args.predictions,
        &args.input,
        &target,
        (&args.name, rows),
    )?];
    let header = SubmitHeader {
        holdout: args.name.clone(),
        target: target.name.clone(),
        mode: SubmitMode::Validate as i32,
        models: 1,
        model_names: vec![file_name(&args.predictions)],
        expected_rows: models[0].len() as u64,
        ..Default::default()
    };
    let outcome = send(&conn, header, models).await?;
    match outcome {
        Outcome::Validation(v) => {
            if args.json {
                show::print_json(&json!({
                    "valid": true,
                    "target": target.name,
                    "rows": v.rows,
                    "digest": v.digest,
                }));
            } else {
                println!(
                    "valid: {} rows match the declaration of {} (target {}); nothing was charged\n\
                     digest {}",
                    v.rows, args.name, target.name, v.digest
                );
            }
            Ok(ExitCode::SUCCESS)
        }
        other => Err(unexpected(&other)),
    }
}

/// Submits predictions: prints the answer (exit 0), the refusal (exit 3) or the quote.
///
/// # Errors
/// Bad input (local or from the daemon), connection, permission, not-found and state failures.
pub async fn submit(args: &SubmitArgs) -> anyhow::Result<ExitCode> {
    if let Some(c) = args.max_cost
        && !(c.is_finite() && c > 0.0)
    {
        return Err(Error::invalid(
            "--max-cost",
            format!("must be a positive number of nats, got {c}"),
        )
        .into());
    }
    // The holdout's size comes first: a file with more rows than the holdout is refused at
    // the row past it, without reading the rest.
    let conn = Conn::open(&args.server).await?;
    let (target, rows, policy) =
        find_target(&conn, &args.name, args.input.target.as_deref()).await?;
    let delta = policy.as_ref().map(|p| p.delta);
    let per_team = policy
        .as_ref()
        .is_some_and(|p| p.shares.trim() != "none" && !p.shares.trim().is_empty());
    let models = args
        .predictions
        .iter()
        .map(|p| read_predictions(p, &args.input, &target, (&args.name, rows)))
        .collect::<Result<Vec<_>, _>>()?;
    let names: Vec<String> = args.predictions.iter().map(|p| file_name(p)).collect();
    let header = SubmitHeader {
        holdout: args.name.clone(),
        target: target.name.clone(),
        mode: if args.dry_run {
            SubmitMode::DryRun
        } else {
            SubmitMode::Answer
        } as i32,
        request_id: args.request_id.clone(),
        note: args.note.clone(),
        max_cost_nats: args.max_cost.unwrap_or(0.0),
        models: u32::try_from(models.len()).unwrap_or(u32::MAX),
        model_names: names.clone(),
        expected_rows: models[0].len() as u64,
        mark_final: args.mark_final,
    };
    match send(&conn, header, models).await? {
        Outcome::Answer(a) => {
            if args.json {
                let units = show::Units::of(std::slice::from_ref(&target));
                show::print_json(&show::answer_json_in(&a, &names, &units));
            } else {
                let mut text = show::answer_text_with(&a, &names, args.guarantee);
                if let (Some(i), Some(line)) = (
                    a.interval.as_ref(),
                    a.interval
                        .as_ref()
                        .and_then(|i| show::units_line(&target.metric, a.score, i.lower, i.upper)),
                ) {
                    // Right after the interval line.
                    let at = format!("\ninterval   {}", show::interval_text(i.lower, i.upper));
                    if let Some(pos) = text.find(&at) {
                        text.insert_str(pos + at.len(), &format!("\n{line}"));
                    }
                }
                println!("{text}");
            }
            if args.require_pass && a.symbol == "fail" {
                eprintln!(
                    "threshold gate: the answer is `fail` (a fail certifies nothing either way); \
                     exit {}",
                    exit::GATE_FAILED
                );
                return Ok(ExitCode::from(exit::GATE_FAILED));
            }
            Ok(ExitCode::SUCCESS)
        }
        Outcome::Refusal(r) => {
            if args.json {
                show::print_json(&show::refusal_json(&r));
            } else {
                println!("{}", show::refusal_text(&r));
            }
            Ok(ExitCode::from(exit::REFUSED))
        }
        Outcome::Quote(q) => {
            if args.json {
                show::print_json(&show::quote_json(&q));
            } else {
                let text = show::quote_text(&q);
                // Under per-team shares the budget is the team's share, not the holdout's delta.
                println!(
                    "{}",
                    if per_team {
                        text.replacen("of delta", "of its share", 1)
                    } else {
                        text
                    }
                );
            }
            Ok(ExitCode::SUCCESS)
        }
        Outcome::Sealed(e) => {
            if args.json {
                show::print_json(&super::compete::sealed_json(&e));
            } else {
                println!("{}", super::compete::sealed_text(&e, args.guarantee, delta));
            }
            Ok(ExitCode::SUCCESS)
        }
        other => Err(unexpected(&other)),
    }
}

fn unexpected(outcome: &Outcome) -> anyhow::Error {
    Error::Internal(format!(
        "the daemon replied with an unexpected outcome: {outcome:?}"
    ))
    .into()
}

fn file_name(p: &Path) -> String {
    p.file_name().map_or_else(
        || p.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    )
}

/// Reads one predictions file, each value checked against the target's declaration and
/// encoded for the wire as it is read; at most the holdout's `rows` rows.
fn read_predictions(
    path: &Path,
    input: &PredictionArgs,
    target: &Target,
    (holdout, rows): (&str, u64),
) -> crate::error::Result<Encoded> {
    let spec = TableSpec::new(&input.id_column, [input.prediction_column.as_str()])
        .max_bytes(input.max_file_bytes)
        .max_rows(rows, format!("holdout {holdout}"));
    read_encoded(path, &spec, target).map_err(|e| labels_header_hint(e, input, target))
}

/// A predictions file written like the labels file (`id,label`) is refused, not read: the
/// column a file is scored on is named, never guessed, so a labels file sent by mistake (or a
/// file whose `label` column means something else) is not scored. The refusal says how to fix
/// it.
fn labels_header_hint(
    e: crate::error::Error,
    input: &PredictionArgs,
    target: &Target,
) -> crate::error::Error {
    use crate::error::Error;
    let missing = format!("no column `{}`;", input.prediction_column);
    match e {
        Error::InvalidArgument { field, message } if message.starts_with(&missing) => {
            let names: Vec<&str> = message
                .split_once("the header has: ")
                .map_or(Vec::new(), |(_, h)| h.split(", ").collect());
            let like_labels = [target.column.as_str(), "label", &target.name]
                .into_iter()
                .find(|c| !c.is_empty() && names.contains(c));
            let hint = match like_labels {
                Some(c) => format!(
                    " (this header looks like the labels file's; predictions are read from a \
                     column named `{}`: rename `{c}` to `{}`, or pass --prediction-column {c})",
                    input.prediction_column, input.prediction_column
                ),
                None => " (name the predictions column `prediction`, or pass \
                         --prediction-column NAME)"
                    .to_string(),
            };
            Error::InvalidArgument {
                field,
                message: format!("{message}{hint}"),
            }
        }
        other => other,
    }
}

fn read_encoded(path: &Path, spec: &TableSpec, target: &Target) -> crate::error::Result<Encoded> {
    Ok(match form(target) {
        Form::Indices => {
            let c = files::read_column(path, spec, class_index(target))?;
            Encoded::ClassIndices(c.ids, c.values)
        }
        Form::Names => {
            let c = files::read_column(path, spec, |v, _| Ok(v.to_string()))?;
            Encoded::ClassNames(c.ids, c.values)
        }
        Form::Numbers => {
            let c = files::read_column(path, spec, number(target))?;
            Encoded::Values(c.ids, c.values)
        }
    })
}

/// Looks the target up on the daemon: the named one, or the only one.
async fn find_target(
    conn: &Conn,
    holdout: &str,
    wanted: Option<&str>,
) -> anyhow::Result<(Target, u64, Option<crate::proto::v1::Policy>)> {
    let info = conn
        .holdouts()
        .get_holdout(GetHoldoutRequest {
            name: holdout.to_string(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    let target = pick_target(&info.targets, holdout, wanted)?;
    Ok((target, info.rows, info.policy))
}

fn pick_target(
    targets: &[Target],
    holdout: &str,
    wanted: Option<&str>,
) -> crate::error::Result<Target> {
    let names = || {
        targets
            .iter()
            .map(|t| t.name.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    };
    match wanted {
        Some(w) => targets
            .iter()
            .find(|t| t.name == w)
            .cloned()
            .ok_or_else(|| {
                Error::not_found(
                    "target",
                    format!("{w} (holdout {holdout} has: {})", names()),
                )
            }),
        None if targets.len() == 1 => Ok(targets[0].clone()),
        None => Err(Error::invalid(
            "--target",
            format!(
                "holdout {holdout} has several targets ({}); choose one with --target",
                names()
            ),
        )),
    }
}

/// One model's predictions, encoded for the wire: ids, and values aligned with them.
#[derive(Debug, Clone, PartialEq)]
pub enum Encoded {
    /// Classes as indices into the target's declared classes (metric `error`).
    ClassIndices(Vec<String>, Vec<u32>),
    /// Class names, for a class target whose classes this client does not know.
    ClassNames(Vec<String>, Vec<String>),
    /// Numbers (every other metric).
    Values(Vec<String>, Vec<f64>),
}

impl Encoded {
    /// Rows.
    pub fn len(&self) -> usize {
        match self {
            Encoded::ClassIndices(ids, _)
            | Encoded::ClassNames(ids, _)
            | Encoded::Values(ids, _) => ids.len(),
        }
    }

    /// Whether there are no rows.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// How a target's predictions are sent.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Form {
    Indices,
    Names,
    Numbers,
}

fn form(target: &Target) -> Form {
    let uses_classes = Metric::from_str(&target.metric).map_or(
        !target.classes.is_empty() && target.metric.starts_with("error"),
        |m| m.uses_classes(),
    );
    match (uses_classes, target.classes.is_empty()) {
        (true, false) => Form::Indices,
        (true, true) => Form::Names,
        (false, _) => Form::Numbers,
    }
}

/// A class prediction as its index among the declared classes; the error names the id, the
/// value and the declared classes (the reader adds `file:line`).
fn class_index(target: &Target) -> impl FnMut(&str, &str) -> Result<u32, String> + '_ {
    move |v, id| {
        target
            .classes
            .iter()
            .position(|c| c == v)
            .map(|i| i as u32)
            .ok_or_else(|| {
                format!(
                    "prediction {v:?} for id `{id}` is not a declared class of target {} ({})",
                    target.name,
                    target.classes.join(",")
                )
            })
    }
}

/// A numeric prediction, checked against the metric's range (probabilities in [0, 1], finite
/// numbers otherwise).
fn number(target: &Target) -> impl FnMut(&str, &str) -> Result<f64, String> + '_ {
    let metric = Metric::from_str(&target.metric).ok();
    move |v, id| {
        let x: f64 = v.parse().map_err(|_| {
            format!(
                "prediction {v:?} for id `{id}` is not a number (target {} uses metric {})",
                target.name, target.metric
            )
        })?;
        let check = match &metric {
            Some(m) => metric::check_number(m, x),
            None if x.is_finite() => Ok(()),
            None => Err(format!("{x} is not a finite number")),
        };
        check.map_err(|why| format!("prediction for id `{id}`: {why}"))?;
        Ok(x)
    }
}

/// Splits a vector into owned pieces of at most `size`, lazily.
fn pieces<T>(v: Vec<T>, size: usize) -> impl Iterator<Item = Vec<T>> {
    let mut it = v.into_iter();
    std::iter::from_fn(move || {
        let piece: Vec<T> = it.by_ref().take(size).collect();
        (!piece.is_empty()).then_some(piece)
    })
}

/// The wire chunks of one model; the ids are moved into them, never copied.
fn chunks(model: u32, encoded: Encoded) -> Box<dyn Iterator<Item = PredictionChunk> + Send> {
    match encoded {
        Encoded::ClassIndices(ids, classes) => Box::new(
            pieces(ids, CHUNK_ROWS)
                .zip(pieces(classes, CHUNK_ROWS))
                .map(move |(ids, class_indices)| PredictionChunk {
                    model,
                    ids,
                    class_indices,
                    ..Default::default()
                }),
        ),
        Encoded::ClassNames(ids, classes) => Box::new(
            pieces(ids, CHUNK_ROWS)
                .zip(pieces(classes, CHUNK_ROWS))
                .map(move |(ids, classes)| PredictionChunk {
                    model,
                    ids,
                    classes,
                    ..Default::default()
                }),
        ),
        Encoded::Values(ids, values) => {
            Box::new(pieces(ids, CHUNK_ROWS).zip(pieces(values, CHUNK_ROWS)).map(
                move |(ids, values)| PredictionChunk {
                    model,
                    ids,
                    values,
                    ..Default::default()
                },
            ))
        }
    }
}

fn progress(total: u64) -> Option<ProgressBar> {
    if !std::io::stderr().is_terminal() {
        return None;
    }
    let bar = ProgressBar::new(total);
    let style = ProgressStyle::with_template("{spinner} sending {bar:40} {pos}/{len} rows ({eta})")
        .unwrap_or_else(|_| ProgressStyle::default_bar());
    bar.set_style(style);
    Some(bar)
}

/// Streams the header and every model's chunks; returns the daemon's outcome.
async fn send(conn: &Conn, header: SubmitHeader, models: Vec<Encoded>) -> anyhow::Result<Outcome> {
    let total: u64 = models.iter().map(|m| m.len() as u64).sum();
    let bar = progress(total);
    let tick = bar.clone();
    let first = std::iter::once(SubmitChunk {
        part: Some(Part::Header(header)),
    });
    let rest = models
        .into_iter()
        .enumerate()
        .flat_map(|(i, m)| chunks(u32::try_from(i).unwrap_or(u32::MAX), m))
        .map(move |c| {
            if let Some(b) = &tick {
                b.inc(c.ids.len() as u64);
            }
            SubmitChunk {
                part: Some(Part::Predictions(c)),
            }
        });
    let stream = tokio_stream::iter(first.chain(rest));
    let reply = conn.submissions().submit(stream).await;
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    let reply = reply.map_err(|e| conn.fail(e))?.into_inner();
    reply
        .outcome
        .ok_or_else(|| Error::Internal("the daemon sent an empty reply".into()).into())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn target(metric: &str, classes: &[&str]) -> Target {
        Target {
            name: "t".into(),
            column: "label".into(),
            metric: metric.into(),
            method: "kl".into(),
            classes: classes.iter().map(|c| c.to_string()).collect(),
        }
    }

    fn args() -> PredictionArgs {
        PredictionArgs {
            target: None,
            id_column: "id".into(),
            prediction_column: "prediction".into(),
            max_file_bytes: DEFAULT_MAX_FILE_BYTES,
        }
    }

    /// Reads `body` as p.csv for `target` of a holdout of `rows` rows.
    fn read(body: &str, target: &Target, rows: u64) -> crate::error::Result<Encoded> {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("p.csv");
        std::fs::write(&path, body).expect("write");
        read_predictions(&path, &args(), target, ("h", rows))
    }

    fn bad(r: crate::error::Result<Encoded>) -> (String, String) {
        match r {
            Err(Error::InvalidArgument { field, message }) => (field, message),
            other => panic!("expected InvalidArgument, got {other:?}"),
        }
    }

    #[test]
    fn class_indices_for_error_numbers_otherwise() {
        let e = read(
            "id,prediction\nr0,b\nr1,a\n",
            &target("error", &["a", "b"]),
            2,
        )
        .expect("encode");
        assert_eq!(
            e,
            Encoded::ClassIndices(vec!["r0".into(), "r1".into()], vec![1, 0])
        );
        let v = read(
            "id,prediction\nr0,0.5\nr1,1e-1\n",
            &target("brier", &["0", "1"]),
            2,
        )
        .expect("encode");
        assert_eq!(
            v,
            Encoded::Values(vec!["r0".into(), "r1".into()], vec![0.5, 0.1])
        );
    }

    #[test]
    fn non_numeric_prediction_names_line_and_id() {
        let (f, m) = bad(read(
            "id,prediction\nr0,0.5\nr1,high\n",
            &target("abs_error:10", &[]),
            2,
        ));
        assert!(f.ends_with("p.csv:3"), "{f}");
        assert!(m.contains("`r1`") && m.contains("not a number"), "{m}");
    }

    #[test]
    fn out_of_domain_predictions_are_local_errors() {
        let (f, m) = bad(read(
            "id,prediction\nr0,a\nr1,c\n",
            &target("error", &["a", "b"]),
            2,
        ));
        assert!(f.ends_with("p.csv:3"), "{f}");
        assert!(m.contains("not a declared class"), "{m}");
        let (f, m) = bad(read(
            "id,prediction\nr0,1.5\n",
            &target("brier", &["0", "1"]),
            1,
        ));
        assert!(f.ends_with("p.csv:2"), "{f}");
        assert!(m.contains("probability"), "{m}");
        let (_, m) = bad(read(
            "id,prediction\nr0,NaN\n",
            &target("sq_error:4", &[]),
            1,
        ));
        assert!(m.contains("finite"), "{m}");
    }

    #[test]
    fn a_file_longer_than_the_holdout_stops_at_the_row_past_it() {
        let mut body = String::from("id,prediction\n");
        for i in 0..10 {
            body.push_str(&format!("r{i},0.5\n"));
        }
        // Line 12 would not even parse: reading must stop before it.
        body.push_str("r10,0.5,extra\n");
        let (f, m) = bad(read(&body, &target("brier", &["0", "1"]), 3));
        assert!(f.ends_with("p.csv:5"), "{f}");
        assert!(m.contains("more rows than the 3 of holdout h"), "{m}");
        assert!(read(&body[..body.len() - 14], &target("brier", &[]), 10).is_ok());
    }

    #[test]
    fn target_choice() {
        let two = [
            target("error", &["a"]),
            Target {
                name: "u".into(),
                ..target("brier", &[])
            },
        ];
        assert_eq!(pick_target(&two, "h", Some("u")).expect("u").name, "u");
        assert!(pick_target(&two, "h", None).is_err());
        assert!(pick_target(&two, "h", Some("zz")).is_err());
        assert_eq!(pick_target(&two[..1], "h", None).expect("only").name, "t");
    }

    #[test]
    fn pieces_cover_everything_in_order() {
        let v: Vec<u32> = (0..20_000).collect();
        let p: Vec<Vec<u32>> = pieces(v.clone(), CHUNK_ROWS).collect();
        assert_eq!(p.len(), 3);
        assert_eq!(p[0].len(), CHUNK_ROWS);
        assert_eq!(p.concat(), v);
    }
}
