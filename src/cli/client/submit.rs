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
use crate::files::{self, DEFAULT_MAX_FILE_BYTES, Table, TableSpec};
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
    let mut targets = Vec::new();
    let mut rows: Vec<Vec<String>> = Vec::new();
    while let Some(chunk) = stream.next().await {
        let chunk = chunk.map_err(|e| conn.fail(e))?;
        targets.extend(chunk.targets);
        rows.extend(chunk.ids.into_iter().map(|id| vec![id, String::new()]));
    }
    let header = vec!["id".to_string(), "prediction".to_string()];
    match &args.out {
        Some(path) => files::write_csv_file(path, &header, &rows, args.force)?,
        None => files::write_csv(std::io::stdout().lock(), &header, &rows)?,
    }
    if args.json {
        show::print_json(&json!({
            "holdout": args.name,
            "rows": rows.len(),
            "out": args.out.as_ref().map(|p| p.display().to_string()),
            "targets": targets.iter().map(show::target_json).collect::<Vec<_>>(),
        }));
    } else {
        eprintln!("{}: {} row ids", args.name, rows.len());
        for t in &targets {
            eprintln!("target {}", show::target_text(t));
        }
        if let Some(path) = &args.out {
            eprintln!("template written to {}", path.display());
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Checks predictions against the declaration; nothing is charged or recorded.
///
/// # Errors
/// Bad input (local or from the daemon), connection, permission and not-found failures.
pub async fn validate(args: &ValidateArgs) -> anyhow::Result<ExitCode> {
    let tables = vec![read_predictions(&args.predictions, &args.input)?];
    let conn = Conn::open(&args.server).await?;
    let target = find_target(&conn, &args.name, args.input.target.as_deref()).await?;
    let models = encode_all(&tables, &target)?;
    let header = SubmitHeader {
        holdout: args.name.clone(),
        target: target.name.clone(),
        mode: SubmitMode::Validate as i32,
        models: 1,
        model_names: vec![file_name(&args.predictions)],
        expected_rows: tables[0].len() as u64,
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
    let tables = args
        .predictions
        .iter()
        .map(|p| read_predictions(p, &args.input))
        .collect::<Result<Vec<_>, _>>()?;
    let conn = Conn::open(&args.server).await?;
    let target = find_target(&conn, &args.name, args.input.target.as_deref()).await?;
    let models = encode_all(&tables, &target)?;
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
        models: u32::try_from(tables.len()).unwrap_or(u32::MAX),
        model_names: names.clone(),
        expected_rows: tables[0].len() as u64,
        mark_final: args.mark_final,
    };
    match send(&conn, header, models).await? {
        Outcome::Answer(a) => {
            if args.json {
                show::print_json(&show::answer_json(&a, &names));
            } else {
                println!("{}", show::answer_text(&a, &names));
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
                println!("{}", show::quote_text(&q));
            }
            Ok(ExitCode::SUCCESS)
        }
        Outcome::Sealed(e) => {
            if args.json {
                show::print_json(&super::compete::sealed_json(&e));
            } else {
                println!("{}", super::compete::sealed_text(&e));
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

fn read_predictions(path: &Path, input: &PredictionArgs) -> crate::error::Result<Table> {
    let spec = TableSpec::new(&input.id_column, [input.prediction_column.as_str()])
        .max_bytes(input.max_file_bytes);
    files::read_table(path, &spec)
}

/// Looks the target up on the daemon: the named one, or the only one.
async fn find_target(conn: &Conn, holdout: &str, wanted: Option<&str>) -> anyhow::Result<Target> {
    let info = conn
        .holdouts()
        .get_holdout(GetHoldoutRequest {
            name: holdout.to_string(),
        })
        .await
        .map_err(|e| conn.fail(e))?
        .into_inner();
    pick_target(&info.targets, holdout, wanted).map_err(Into::into)
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

/// One model's predictions, encoded for the wire.
#[derive(Debug, Clone, PartialEq)]
pub enum Encoded {
    /// Classes (metric `error`).
    Classes(Vec<String>, Vec<String>),
    /// Numbers (every other metric).
    Values(Vec<String>, Vec<f64>),
}

fn encode_all(tables: &[Table], target: &Target) -> crate::error::Result<Vec<Encoded>> {
    tables.iter().map(|t| encode(t, target)).collect()
}

/// Turns a predictions table into wire values, checking each against the public declaration
/// (classes, probability range) so mistakes are named by file line before anything is sent.
///
/// # Errors
/// [`Error::InvalidArgument`] naming `file:line` and the id of the first bad prediction.
pub fn encode(table: &Table, target: &Target) -> crate::error::Result<Encoded> {
    let metric = Metric::from_str(&target.metric).ok();
    let uses_classes = metric.map_or(
        !target.classes.is_empty() && target.metric.starts_with("error"),
        |m| m.uses_classes(),
    );
    let ids: Vec<String> = table.rows.iter().map(|r| r.id.clone()).collect();
    let at = |line: u64| format!("{}:{line}", table.source);
    if uses_classes {
        let mut classes = Vec::with_capacity(table.len());
        for r in &table.rows {
            let v = &r.values[0];
            if !target.classes.is_empty() && !target.classes.contains(v) {
                return Err(Error::invalid(
                    at(r.line),
                    format!(
                        "prediction {v:?} for id `{}` is not a declared class of target {} ({})",
                        r.id,
                        target.name,
                        target.classes.join(",")
                    ),
                ));
            }
            classes.push(v.clone());
        }
        return Ok(Encoded::Classes(ids, classes));
    }
    let mut values = Vec::with_capacity(table.len());
    for r in &table.rows {
        let v = &r.values[0];
        let x: f64 = v.parse().map_err(|_| {
            Error::invalid(
                at(r.line),
                format!(
                    "prediction {v:?} for id `{}` is not a number (target {} uses metric {})",
                    r.id, target.name, target.metric
                ),
            )
        })?;
        let check = match &metric {
            Some(m) => metric::check_number(m, x),
            None if x.is_finite() => Ok(()),
            None => Err(format!("{x} is not a finite number")),
        };
        check.map_err(|why| {
            Error::invalid(at(r.line), format!("prediction for id `{}`: {why}", r.id))
        })?;
        values.push(x);
    }
    Ok(Encoded::Values(ids, values))
}

/// Splits a vector into owned pieces of at most `size`, lazily.
fn pieces<T>(v: Vec<T>, size: usize) -> impl Iterator<Item = Vec<T>> {
    let mut it = v.into_iter();
    std::iter::from_fn(move || {
        let piece: Vec<T> = it.by_ref().take(size).collect();
        (!piece.is_empty()).then_some(piece)
    })
}

fn chunks(model: u32, encoded: Encoded) -> Box<dyn Iterator<Item = PredictionChunk> + Send> {
    match encoded {
        Encoded::Classes(ids, classes) => Box::new(
            pieces(ids, CHUNK_ROWS)
                .zip(pieces(classes, CHUNK_ROWS))
                .map(move |(ids, classes)| PredictionChunk {
                    model,
                    ids,
                    classes,
                    values: Vec::new(),
                }),
        ),
        Encoded::Values(ids, values) => {
            Box::new(pieces(ids, CHUNK_ROWS).zip(pieces(values, CHUNK_ROWS)).map(
                move |(ids, values)| PredictionChunk {
                    model,
                    ids,
                    classes: Vec::new(),
                    values,
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
    let total: u64 = models
        .iter()
        .map(|m| match m {
            Encoded::Classes(ids, _) | Encoded::Values(ids, _) => ids.len() as u64,
        })
        .sum();
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

    fn table(values: &[&str]) -> Table {
        Table {
            source: "p.csv".into(),
            format: files::Format::Csv,
            id_column: "id".into(),
            columns: vec!["prediction".into()],
            rows: values
                .iter()
                .enumerate()
                .map(|(i, v)| files::Row {
                    line: i as u64 + 2,
                    id: format!("r{i}"),
                    values: vec![v.to_string()],
                })
                .collect(),
        }
    }

    fn target(metric: &str, classes: &[&str]) -> Target {
        Target {
            name: "t".into(),
            column: "label".into(),
            metric: metric.into(),
            method: "kl".into(),
            classes: classes.iter().map(|c| c.to_string()).collect(),
        }
    }

    fn bad(r: crate::error::Result<Encoded>) -> (String, String) {
        match r {
            Err(Error::InvalidArgument { field, message }) => (field, message),
            other => panic!("expected InvalidArgument, got {other:?}"),
        }
    }

    #[test]
    fn classes_for_error_numbers_otherwise() {
        let e = encode(&table(&["a", "b"]), &target("error", &["a", "b"])).expect("encode");
        assert_eq!(
            e,
            Encoded::Classes(vec!["r0".into(), "r1".into()], vec!["a".into(), "b".into()])
        );
        let v = encode(&table(&["0.5", "1e-1"]), &target("brier", &["0", "1"])).expect("encode");
        assert_eq!(
            v,
            Encoded::Values(vec!["r0".into(), "r1".into()], vec![0.5, 0.1])
        );
    }

    #[test]
    fn non_numeric_prediction_names_line_and_id() {
        let (f, m) = bad(encode(
            &table(&["0.5", "high"]),
            &target("abs_error:10", &[]),
        ));
        assert_eq!(f, "p.csv:3");
        assert!(m.contains("`r1`") && m.contains("not a number"), "{m}");
    }

    #[test]
    fn out_of_domain_predictions_are_local_errors() {
        let (f, m) = bad(encode(&table(&["a", "c"]), &target("error", &["a", "b"])));
        assert_eq!(f, "p.csv:3");
        assert!(m.contains("not a declared class"), "{m}");
        let (f, m) = bad(encode(&table(&["1.5"]), &target("brier", &["0", "1"])));
        assert_eq!(f, "p.csv:2");
        assert!(m.contains("probability"), "{m}");
        let (_, m) = bad(encode(&table(&["NaN"]), &target("sq_error:4", &[])));
        assert!(m.contains("finite"), "{m}");
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
