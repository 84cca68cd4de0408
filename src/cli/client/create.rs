//! `holdout create`: reading labels, declaring their public domain, showing what the policy buys,
//! and streaming everything to the daemon.

use std::path::PathBuf;
use std::process::ExitCode;
use std::str::FromStr;

use clap::{Args, ValueEnum};
use serde_json::json;

use super::conn::{Conn, ServerArgs};
use super::{CHUNK_ROWS, show};
use crate::error::{Error, Result};
use crate::files::{self, DEFAULT_MAX_FILE_BYTES, Table, TableSpec};
use crate::metric::Metric;
use crate::proto::v1::{
    CreateHoldoutChunk, HoldoutSpec, LabelColumn, LabelRows, Policy, Target,
    create_holdout_chunk::Part,
};

/// Sharing assumption.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum Sharing {
    /// Anyone may see every answer: one transcript for the holdout.
    Shared,
    /// Each team only ever sees its own answers: one transcript and budget share per team.
    Isolated,
}

/// Public reference score for the tolerance decision.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ToleranceReference {
    /// The widest interval any score could get.
    WorstCase,
    /// The team's last released score (intervals may then come out somewhat wider).
    LastReleased,
}

/// `holdout create`.
// The --help texts show `[:METHOD]`-style optional parts, which rustdoc would read as links.
#[allow(rustdoc::broken_intra_doc_links)]
#[derive(Debug, Args)]
pub struct CreateArgs {
    /// Name of the new holdout: letters, digits, '-', '_' and '.', at most 64 characters.
    pub name: String,
    /// Labels file: CSV with a header row, or JSON Lines (.jsonl/.ndjson).
    #[arg(long, value_name = "FILE")]
    pub labels: PathBuf,
    /// Column of the row ids (unique; they become public).
    #[arg(long, default_value = "id")]
    pub id_column: String,
    /// A target NAME:COLUMN:METRIC[:METHOD]; repeat for several label columns of the same rows
    /// (one holdout, one budget). METRIC is error, brier, abs_error:B, sq_error:B or
    /// log_loss:FLOOR; METHOD is exact, kl or hoeffding (default exact for error, kl otherwise).
    /// Example: --target defect:defect:error --target cost:cost:abs_error:500:hoeffding
    #[arg(long = "target", value_name = "NAME:COLUMN:METRIC[:METHOD]")]
    pub targets: Vec<String>,
    /// Metric of the single label column (--label-column), instead of --target; the target is
    /// named after the column.
    #[arg(long, required_unless_present = "targets", conflicts_with = "targets")]
    pub metric: Option<String>,
    /// Interval method with --metric: exact, kl or hoeffding [default: exact for error, kl
    /// otherwise].
    #[arg(long, requires = "metric")]
    pub method: Option<String>,
    /// The label column, with --metric.
    #[arg(long, default_value = "label")]
    pub label_column: String,
    /// Declared classes of `error` targets (comma-separated), required for them: the label
    /// domain is public, so it is stated here, never read from the labels (which would publish,
    /// say, that a rare class is absent). Every label must be one of them. Brier and log_loss
    /// labels are always 0 and 1.
    #[arg(long, value_delimiter = ',', value_name = "A,B,...")]
    pub classes: Option<Vec<String>>,
    /// Total failure probability of every interval this holdout will ever report (with
    /// --family: this holdout's share of the family's total).
    #[arg(long, default_value_t = 0.05)]
    pub delta: f64,
    /// Join (or found) a family of row-disjoint holdouts that share one total delta: this
    /// holdout's --delta is its share, and the daemon refuses shares that would sum past the
    /// total. Without a family, k holdouts hold jointly only at k times their delta.
    #[arg(long, value_name = "NAME")]
    pub family: Option<String>,
    /// The family's total delta, fixed by its first member (required there); later members may
    /// omit it or must repeat it exactly.
    #[arg(long, value_name = "TOTAL", requires = "family")]
    pub family_delta: Option<f64>,
    /// How the budget is spread over queries: "series" (open-ended) or "even:K"
    /// [default: series] (sealed rounds: even:K over the expected entries, K =
    /// --expect-answers when given, else 100).
    #[arg(long)]
    pub schedule: Option<String>,
    /// Answer rule: rounded:ETA, threshold:TAU, ladder:ETA, best-of:ETA or sealed.
    #[arg(long, default_value = "rounded:0.01")]
    pub answers: String,
    /// Widest half-width still worth answering; beyond it the holdout refuses.
    #[arg(long, default_value_t = 0.05)]
    pub tolerance: f64,
    /// Sharing assumption the guarantee rests on.
    #[arg(long, value_enum, default_value_t = Sharing::Shared)]
    pub sharing: Sharing,
    /// Reference score for the tolerance decision.
    #[arg(long, value_enum, default_value_t = ToleranceReference::WorstCase)]
    pub tolerance_reference: ToleranceReference,
    /// Budget shares per team: none, roster:TEAM,TEAM,...[:RESERVE] (equal shares for the
    /// declared teams plus a reserve for late joiners) or on-arrival (the j-th team to arrive
    /// gets delta / (j (j+1))).
    #[arg(long, default_value = "none")]
    pub shares: String,
    /// Answers the policy must afford (at worst case, within the tolerance) for create to go
    /// ahead, counted for each declared team under `--shares roster:...`; a policy that affords
    /// fewer is refused and nothing is sealed [default: 1; for a
    /// sealed round it also sets the even schedule's K when --schedule is not given].
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    pub expect_answers: Option<u32>,
    /// Teams you expect to submit, for the fair-service lines of the plan only (nothing is
    /// sent; a --shares roster declares its teams itself).
    #[arg(long, value_name = "T", value_parser = clap::value_parser!(u64).range(1..))]
    pub teams: Option<u64>,
    /// Keep each submitted prediction file (parsed, compressed, in the daemon's database) for
    /// DAYS days so an audit can re-score it, then drop it; 0 keeps only its digest [default:
    /// the daemon's `serve --keep-predictions-days`, itself digests only unless set]. Stated
    /// in the genesis entry.
    #[arg(long, value_name = "DAYS",
          value_parser = clap::value_parser!(u32).range(0..=crate::engine::MAX_KEEP_DAYS as i64))]
    pub keep_predictions: Option<u32>,
    /// Sealed rounds: deadline, RFC 3339 (e.g. 2026-06-30T12:00:00Z). Entries after it are
    /// refused and the round closes by itself; without it an organizer closes the round.
    #[arg(long, value_name = "TIME")]
    pub closes_at: Option<String>,
    /// Sealed rounds: fraction of delta reserved for the final ranking's paired comparisons
    /// [default: 0.2].
    #[arg(long, value_name = "FRACTION")]
    pub ranking_share: Option<f64>,
    /// Ladder leaderboard visibility: public or organizers [default: public under shared,
    /// organizers under isolated; public with isolated is refused].
    #[arg(long, value_name = "WHO")]
    pub leaderboard: Option<String>,
    /// Most answered queries per team per UTC day (0: no quota).
    #[arg(long, default_value_t = 0)]
    pub daily_quota: u32,
    /// What the rows are and where they came from (shown in listings).
    #[arg(long, default_value = "")]
    pub description: String,
    /// Error rate at which the plan table also shows half-widths (besides the worst case).
    #[arg(long, default_value_t = 0.1, value_name = "RATE")]
    pub expected_error: f64,
    /// Only print what the policy buys for this file; send nothing.
    #[arg(long)]
    pub preview: bool,
    /// Print one JSON object (the plan, and the created holdout unless --preview).
    #[arg(long)]
    pub json: bool,
    /// Refuse label files larger than this many bytes.
    #[arg(long, default_value_t = DEFAULT_MAX_FILE_BYTES, value_name = "BYTES")]
    pub max_file_bytes: u64,
    #[command(flatten)]
    #[allow(missing_docs)]
    pub server: ServerArgs,
}

/// A target as asked for on the command line.
#[derive(Debug, Clone, PartialEq)]
pub struct TargetSpec {
    /// Target name.
    pub name: String,
    /// Label column.
    pub column: String,
    /// Metric.
    pub metric: Metric,
    /// Interval method.
    pub method: String,
}

const METHODS: [&str; 3] = ["exact", "kl", "hoeffding"];

/// Parses `NAME:COLUMN:METRIC[:METHOD]`, where METRIC may carry its own `:PARAM`.
///
/// # Errors
/// [`Error::InvalidArgument`] on `--target` for a malformed spec, an unknown metric or method,
/// or `exact` with a metric other than `error`.
pub fn parse_target(s: &str) -> Result<TargetSpec> {
    let parts: Vec<&str> = s.split(':').map(str::trim).collect();
    let bad = |why: String| Error::invalid("--target", format!("{s:?}: {why}"));
    if parts.len() < 3 || parts[0].is_empty() || parts[1].is_empty() {
        return Err(bad("expected NAME:COLUMN:METRIC[:METHOD]".into()));
    }
    let with_param = matches!(parts[2], "abs_error" | "sq_error" | "log_loss");
    let metric_end = if with_param { 4 } else { 3 };
    if parts.len() < metric_end {
        return Err(bad(format!(
            "metric {} needs a parameter, e.g. {}:1",
            parts[2], parts[2]
        )));
    }
    if parts.len() > metric_end + 1 {
        return Err(bad("too many ':' parts".into()));
    }
    let metric =
        Metric::from_str(&parts[2..metric_end].join(":")).map_err(|e| bad(e.to_string()))?;
    let method = parts.get(metric_end).map(|m| m.to_string());
    Ok(TargetSpec {
        name: parts[0].to_string(),
        column: parts[1].to_string(),
        method: check_method(&metric, method).map_err(bad)?,
        metric,
    })
}

fn check_method(metric: &Metric, method: Option<String>) -> std::result::Result<String, String> {
    let method = method.unwrap_or_else(|| metric.default_method().to_string());
    if !METHODS.contains(&method.as_str()) {
        return Err(format!(
            "unknown method {method:?}; use exact, kl or hoeffding"
        ));
    }
    if method == "exact" && !metric.is_binary() {
        return Err(format!(
            "method exact (Clopper-Pearson) needs 0-1 loss; metric {metric} takes kl or hoeffding"
        ));
    }
    Ok(method)
}

/// The targets of a command line: the --target list, or the single --metric column.
///
/// # Errors
/// Bad specs, duplicate target names.
pub fn targets_of(args: &CreateArgs) -> Result<Vec<TargetSpec>> {
    let targets = if args.targets.is_empty() {
        let spec = args
            .metric
            .as_deref()
            .ok_or_else(|| Error::invalid("--metric", "give --metric or at least one --target"))?;
        let metric =
            Metric::from_str(spec).map_err(|e| Error::invalid("--metric", e.to_string()))?;
        vec![TargetSpec {
            name: args.label_column.clone(),
            column: args.label_column.clone(),
            method: check_method(&metric, args.method.clone())
                .map_err(|e| Error::invalid("--method", e))?,
            metric,
        }]
    } else {
        args.targets
            .iter()
            .map(|t| parse_target(t))
            .collect::<Result<Vec<_>>>()?
    };
    for (i, t) in targets.iter().enumerate() {
        if targets[..i].iter().any(|u| u.name == t.name) {
            return Err(Error::invalid(
                "--target",
                format!("target {:?} is named twice", t.name),
            ));
        }
    }
    Ok(targets)
}

/// Declares each target's public label domain and checks every label against it, naming the
/// file line and id of the first label that does not fit (target by target).
///
/// # Errors
/// [`Error::InvalidArgument`] naming `file:line`.
pub fn declare(
    table: &Table,
    targets: &[TargetSpec],
    classes: Option<&[String]>,
) -> Result<Vec<Target>> {
    let declared = declared_targets(targets, classes)?;
    for (t, target) in declared.iter().enumerate() {
        let k = table.column_index(&target.column).ok_or_else(|| {
            Error::invalid(
                table.source.clone(),
                format!("no column {:?}", target.column),
            )
        })?;
        for r in &table.rows {
            check_label(
                &targets[t],
                target,
                &table.source,
                r.line,
                &r.id,
                &r.values[k],
            )?;
        }
    }
    Ok(declared)
}

/// Each target's public label domain: the declared classes of an `error` target, `0` and `1`
/// for brier and log_loss, none (numbers) otherwise.
///
/// # Errors
/// An `error` target without `--classes`.
pub fn declared_targets(targets: &[TargetSpec], classes: Option<&[String]>) -> Result<Vec<Target>> {
    targets
        .iter()
        .map(|t| {
            let declared: Vec<String> = if t.metric.uses_classes() {
                match classes {
                    Some(c) => c.iter().map(|x| x.trim().to_string()).collect(),
                    None => {
                        return Err(Error::invalid(
                            "--classes",
                            format!(
                                "target {} (metric {}) needs its declared classes: give \
                                 --classes A,B,... (the label domain is public, so it is \
                                 stated, never read from the labels); nothing was sent",
                                t.name, t.metric
                            ),
                        ));
                    }
                }
            } else {
                t.metric.fixed_classes().unwrap_or_default()
            };
            Ok(Target {
                name: t.name.clone(),
                column: t.column.clone(),
                metric: t.metric.to_string(),
                method: t.method.clone(),
                classes: declared,
            })
        })
        .collect()
}

/// Checks one label against its target's declared domain.
///
/// # Errors
/// [`Error::InvalidArgument`] naming `source:line`, the id, the column, the target and the
/// domain.
fn check_label(
    spec: &TargetSpec,
    target: &Target,
    source: &str,
    line: u64,
    id: &str,
    v: &str,
) -> Result<()> {
    let declared = &target.classes;
    let ok = if declared.is_empty() {
        v.parse::<f64>().is_ok_and(f64::is_finite)
    } else {
        declared.iter().any(|c| c == v)
    };
    if ok {
        return Ok(());
    }
    let domain = if declared.is_empty() {
        "a finite number".to_string()
    } else {
        format!("one of {}", declared.join(","))
    };
    Err(Error::invalid(
        format!("{source}:{line}"),
        format!(
            "label {} of id `{}` (column {}, target {}, metric {}) is not {domain}",
            quote(v),
            cut(id),
            spec.column,
            spec.name,
            spec.metric
        ),
    ))
}

/// Longest value quoted whole in a message about a label file; longer ones are cut.
const QUOTE_MAX: usize = 40;

/// A text cut after [`QUOTE_MAX`] characters, its length stated, so a huge cell never comes
/// back whole.
fn cut(v: &str) -> String {
    if v.chars().count() <= QUOTE_MAX {
        v.to_string()
    } else {
        let head: String = v.chars().take(QUOTE_MAX).collect();
        format!("{head}... ({} bytes)", v.len())
    }
}

/// [`cut`], quoted.
fn quote(v: &str) -> String {
    if v.chars().count() <= QUOTE_MAX {
        format!("{v:?}")
    } else {
        let head: String = v.chars().take(QUOTE_MAX).collect();
        format!("{head:?}... ({} bytes)", v.len())
    }
}

/// The plain sentence on joint validity printed with every creation (it depends only on the
/// command line): each holdout's delta covers that holdout alone; holdouts of one family share
/// one total.
pub fn joint_note(delta: f64, family: Option<&str>, family_delta: Option<f64>) -> String {
    match (family, family_delta) {
        (Some(f), Some(total)) => format!(
            "Family {f}: this holdout's delta {delta} is its share of the family's total delta \
             {total}. The daemon refuses shares that would sum past the total, so every interval \
             of every member of {f} holds jointly with probability at least 1 - {total}."
        ),
        (Some(f), None) => format!(
            "Family {f}: this holdout's delta {delta} is its share of the family's total delta \
             (fixed by its first member). The daemon refuses shares that would sum past the \
             total, so every interval of every member of {f} holds jointly with probability at \
             least 1 minus that total."
        ),
        (None, _) => format!(
            "This holdout's delta {delta} covers this holdout alone. Holdouts carved from one \
             file by `holdout split` each carry their own delta, so k of them hold jointly only \
             with probability at least 1 - k * delta; to give them one total instead, create \
             them as one family (--family NAME, --family-delta TOTAL on the first member, each \
             member's --delta its share)."
        ),
    }
}

/// Entries a sealed round's default even schedule is spread over when --expect-answers is not
/// given.
pub const SEALED_DEFAULT_ENTRIES: u32 = 100;

/// The schedule: as given; else `even:K` for a sealed round (K the expected entries), so that
/// every entry gets the same share and, as nothing is released before the close, the same
/// level: if the first entry fits the tolerance, all K do, and none is refused for the
/// tolerance before the close (after K entries the round refuses as spent). Else `series`.
fn schedule_of(args: &CreateArgs) -> String {
    if let Some(s) = &args.schedule {
        return s.clone();
    }
    if args.answers.trim().starts_with("sealed") {
        let k = args.expect_answers.unwrap_or(SEALED_DEFAULT_ENTRIES);
        return format!("even:{k}");
    }
    "series".into()
}

fn policy_of(args: &CreateArgs) -> Policy {
    Policy {
        delta: args.delta,
        schedule: schedule_of(args),
        answers: args.answers.clone(),
        tolerance: args.tolerance,
        sharing: match args.sharing {
            Sharing::Shared => "shared",
            Sharing::Isolated => "isolated",
        }
        .to_string(),
        tolerance_reference: match args.tolerance_reference {
            ToleranceReference::WorstCase => "worst-case",
            ToleranceReference::LastReleased => "last-released",
        }
        .to_string(),
        shares: args.shares.clone(),
        daily_quota: args.daily_quota,
        canonical_json: String::new(),
        closes_at: args.closes_at.clone().unwrap_or_default(),
        ranking_share: args.ranking_share.unwrap_or(0.0),
        leaderboard: args.leaderboard.clone().unwrap_or_default(),
    }
}

/// Runs `holdout create`.
///
/// # Errors
/// Bad arguments or labels (nothing sent), connection, permission and daemon refusals.
pub async fn run(args: &CreateArgs) -> anyhow::Result<ExitCode> {
    if !(args.delta > 0.0 && args.delta < 1.0) {
        return Err(
            Error::invalid("--delta", format!("must lie in (0, 1), got {}", args.delta)).into(),
        );
    }
    if let Some(t) = args.family_delta
        && !(t > 0.0 && t < 1.0 && args.delta <= t)
    {
        return Err(Error::invalid(
            "--family-delta",
            format!(
                "the family's total must lie in (0, 1) and be at least this member's share \
                 --delta {}, got {t}",
                args.delta
            ),
        )
        .into());
    }
    if !(args.tolerance > 0.0 && args.tolerance.is_finite()) {
        return Err(Error::invalid(
            "--tolerance",
            format!("must be positive, got {}", args.tolerance),
        )
        .into());
    }
    // 0 on the wire means "the default"; given explicitly it is a mistake, not the default.
    if let Some(s) = args.ranking_share
        && !(s > 0.0 && s < 1.0)
    {
        return Err(Error::invalid(
            "--ranking-share",
            format!("must lie in (0, 1) (a fraction of delta), got {s}"),
        )
        .into());
    }
    let specs = targets_of(args)?;
    let mut columns: Vec<String> = Vec::new();
    for s in &specs {
        if !columns.contains(&s.column) {
            columns.push(s.column.clone());
        }
    }
    let spec_of_file =
        TableSpec::new(&args.id_column, columns.clone()).max_bytes(args.max_file_bytes);
    let targets = match declared_targets(&specs, args.classes.as_deref()) {
        Ok(targets) => targets,
        Err(e) => {
            // The file's own problems (unreadable, a column missing) are named first.
            files::check_rows(&args.labels, &spec_of_file, &mut |_, _, _| Ok(()))?;
            return Err(e.into());
        }
    };
    let positions: Vec<usize> = specs
        .iter()
        .map(|s| columns.iter().position(|c| *c == s.column).unwrap_or(0))
        .collect();
    // First pass: every check (ids, labels) with nothing kept but a fingerprint of the rows,
    // which the second pass, the upload, must reproduce. Ids out of order are not checked for
    // repeats (that would hold every id): the daemon finds a repeat while it sorts the rows,
    // and `upload` then names its lines. A preview, which sends nothing, checks them here.
    let check: fn(&std::path::Path, &TableSpec, &mut files::RowSink<'_>) -> Result<_> =
        if args.preview {
            files::check_rows
        } else {
            files::check_rows_except_repeats
        };
    let mut fingerprint = Fingerprint::new();
    let source = args.labels.display().to_string();
    let mut last_line = 0;
    let checked = check(&args.labels, &spec_of_file, &mut |line, id, values| {
        for (t, &k) in positions.iter().enumerate() {
            check_label(&specs[t], &targets[t], &source, line, id, values[k])?;
        }
        // Lines start over when the check reads the file again (ids out of order).
        if line <= last_line {
            fingerprint = fingerprint.restart();
        }
        last_line = line;
        fingerprint.add(id, values);
        Ok(())
    })?;

    let policy = policy_of(args);
    let plan = super::plan::describe(
        checked.rows,
        &policy,
        &targets,
        args.expected_error,
        args.teams,
    )?;
    let joint = joint_note(args.delta, args.family.as_deref(), args.family_delta);
    let family_json = args
        .family
        .as_ref()
        .map(|f| json!({"name": f, "share": args.delta, "total": args.family_delta}));
    if args.json && args.preview {
        show::print_json(&json!({
            "preview": true,
            "rows": checked.rows,
            "policy": show::policy_json(&policy),
            "targets": targets.iter().map(show::target_json).collect::<Vec<_>>(),
            "plan": plan.json,
            "family": family_json,
            "joint": joint,
        }));
        return Ok(ExitCode::SUCCESS);
    }
    if !args.json {
        println!("{}\n\n{joint}", plan.text);
    }
    if args.preview {
        println!("preview only: nothing was sent");
        return Ok(ExitCode::SUCCESS);
    }
    let conn = Conn::open(&args.server).await?;
    let spec = HoldoutSpec {
        name: args.name.clone(),
        policy: Some(policy),
        targets: targets.clone(),
        description: args.description.clone(),
        family: args.family.clone().unwrap_or_default(),
        family_delta: args.family_delta.unwrap_or(0.0),
        expect_answers: args.expect_answers.unwrap_or(1),
        rows_hint: checked.rows,
        id_bytes_hint: checked.id_bytes,
        keep_predictions_days: args.keep_predictions,
    };
    let info = upload(
        &conn,
        spec,
        &args.labels,
        &spec_of_file,
        &positions,
        &checked,
        fingerprint,
    )
    .await?;
    if args.json {
        let mut v = show::holdout_json(&info);
        v["plan"] = plan.json;
        v["family"] = family_json.unwrap_or(serde_json::Value::Null);
        v["joint"] = json!(joint);
        show::print_json(&v);
    } else {
        // The joint-delta note was printed with the plan, before the upload.
        println!("\ncreated\n{}", show::holdout_text_brief(&info));
    }
    Ok(ExitCode::SUCCESS)
}

/// Chunks in flight between the thread reading the file and the upload.
const QUEUE_CHUNKS: usize = 4;

/// A fingerprint of a file's rows (ids and values, in order), to find a file that changed
/// between the check and the upload.
struct Fingerprint {
    hasher: hashbrown::DefaultHashBuilder,
    value: u64,
}

impl Fingerprint {
    fn new() -> Fingerprint {
        Fingerprint {
            hasher: hashbrown::DefaultHashBuilder::default(),
            value: 0,
        }
    }

    /// The same rows in the same order give the same value (under one hasher).
    fn add(&mut self, id: &str, values: &[&str]) {
        use std::hash::BuildHasher;
        self.value = self.value.rotate_left(7) ^ self.hasher.hash_one((id, values));
    }

    fn restart(&self) -> Fingerprint {
        Fingerprint {
            hasher: self.hasher.clone(),
            value: 0,
        }
    }
}

/// Second pass: reads the labels file again on a thread of its own and sends it in chunks
/// through a small bounded queue while the daemon receives them, so neither end holds the
/// file. A file that changed since it was checked (other rows, fewer, more) is found when it
/// has been read again, before the stream ends: the reader then sends a second spec, which the
/// daemon refuses, so nothing is created.
async fn upload(
    conn: &Conn,
    spec: HoldoutSpec,
    path: &std::path::Path,
    file_spec: &TableSpec,
    positions: &[usize],
    checked: &files::Streamed,
    fingerprint: Fingerprint,
) -> anyhow::Result<crate::proto::v1::HoldoutInfo> {
    let (tx, rx) = tokio::sync::mpsc::channel::<CreateHoldoutChunk>(QUEUE_CHUNKS);
    let first = CreateHoldoutChunk {
        part: Some(Part::Spec(spec)),
    };
    let (file, table) = (path, file_spec);
    let (path, file_spec, positions) = (path.to_path_buf(), file_spec.clone(), positions.to_vec());
    let (expect_rows, expect_print) = (checked.rows, fingerprint.value);
    let mut again = fingerprint.restart();
    let reader = tokio::task::spawn_blocking(move || -> std::result::Result<(), Option<Error>> {
        // `None`: the call ended early (the daemon refused); its answer says why.
        tx.blocking_send(first).map_err(|_| None)?;
        let mut ids: Vec<String> = Vec::with_capacity(CHUNK_ROWS);
        let mut cols: Vec<Vec<String>> = vec![Vec::with_capacity(CHUNK_ROWS); positions.len()];
        let send = |ids: &mut Vec<String>, cols: &mut Vec<Vec<String>>| {
            let chunk = CreateHoldoutChunk {
                part: Some(Part::Rows(LabelRows {
                    ids: std::mem::replace(ids, Vec::with_capacity(CHUNK_ROWS)),
                    columns: cols
                        .iter_mut()
                        .map(|c| LabelColumn {
                            values: std::mem::replace(c, Vec::with_capacity(CHUNK_ROWS)),
                        })
                        .collect(),
                })),
            };
            tx.blocking_send(chunk).is_ok()
        };
        let mut stopped = false;
        let read = files::stream_rows(&path, &file_spec, &mut |_, id, values| {
            again.add(id, values);
            ids.push(id.to_string());
            for (c, &k) in cols.iter_mut().zip(&positions) {
                c.push(values[k].to_string());
            }
            if ids.len() == CHUNK_ROWS && !send(&mut ids, &mut cols) {
                stopped = true;
                return Err(Error::Internal("the upload stopped".into()));
            }
            Ok(())
        });
        if stopped {
            return Err(None);
        }
        let failure = match read {
            Ok(r) if r.rows == expect_rows && again.value == expect_print => {
                if !ids.is_empty() && !send(&mut ids, &mut cols) {
                    return Err(None);
                }
                return Ok(());
            }
            Ok(_) => Error::invalid(
                path.display().to_string(),
                "the file changed while it was being sent (it differs from the file checked); \
                 nothing was created",
            ),
            Err(e) => e,
        };
        // A second spec: the daemon refuses the stream, and creates nothing.
        let _ = tx.blocking_send(CreateHoldoutChunk {
            part: Some(Part::Spec(HoldoutSpec::default())),
        });
        Err(Some(failure))
    });
    let mut client = conn.holdouts();
    let call = client.create_holdout(tokio_stream::wrappers::ReceiverStream::new(rx));
    let (answer, read) = tokio::join!(call, reader);
    match read.map_err(|e| anyhow::anyhow!("reading the labels: {e}"))? {
        Err(Some(e)) => Err(e.into()),
        Ok(()) | Err(None) => match answer {
            Ok(info) => Ok(info.into_inner()),
            Err(status) => {
                // A repeated id in a file whose ids were out of order (so the check left
                // repeats to the daemon): named with both its lines, as the check names one.
                if !checked.ids_increase
                    && let Some(id) = repeated_id(&status)
                    && let Ok(Some((first, line))) = files::find_repeat(file, table, &id)
                {
                    return Err(files::repeat_error(&checked.source, &id, first, line).into());
                }
                Err(conn.fail(status))
            }
        },
    }
}

/// The row id a create was refused for, repeated in its labels (see
/// [`crate::service::REPEATED_ID_KEY`]).
fn repeated_id(status: &tonic::Status) -> Option<String> {
    if status.code() != tonic::Code::InvalidArgument {
        return None;
    }
    let value = status.metadata().get_bin(crate::service::REPEATED_ID_KEY)?;
    String::from_utf8(value.to_bytes().ok()?.to_vec()).ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn joint_sentences() {
        let alone = joint_note(0.05, None, None);
        assert!(alone.contains("1 - k * delta"), "{alone}");
        assert!(alone.contains("--family"), "{alone}");
        let first = joint_note(0.02, Some("q3"), Some(0.05));
        assert!(
            first.contains("share of the family's total delta 0.05") && first.contains("1 - 0.05"),
            "{first}"
        );
        let later = joint_note(0.02, Some("q3"), None);
        assert!(later.contains("fixed by its first member"), "{later}");
    }

    #[test]
    fn target_specs() {
        let t = parse_target("defect:defect_col:error").expect("error target");
        assert_eq!(
            (t.name.as_str(), t.column.as_str(), t.method.as_str()),
            ("defect", "defect_col", "exact")
        );
        let t = parse_target("cost:cost:abs_error:500:hoeffding").expect("abs target");
        assert_eq!(t.metric, Metric::AbsError { bound: 500.0 });
        assert_eq!(t.method, "hoeffding");
        let t = parse_target("p:y:log_loss:0.001").expect("log loss");
        assert_eq!(t.method, "kl");
        let t = parse_target("q:y:brier:hoeffding").expect("brier");
        assert_eq!(t.method, "hoeffding");
        for bad in [
            "a:b",
            "a:b:abs_error",
            "a:b:brier:exact",
            "a:b:error:fast",
            "a:b:nope",
            "a:b:sq_error:2:kl:extra",
            ":b:error",
        ] {
            assert!(
                matches!(parse_target(bad), Err(Error::InvalidArgument { .. })),
                "{bad} should be refused"
            );
        }
    }

    fn table(rows: &[(&str, &str)]) -> Table {
        Table {
            source: "labels.csv".into(),
            format: files::Format::Csv,
            id_column: "id".into(),
            columns: vec!["y".into()],
            rows: rows
                .iter()
                .enumerate()
                .map(|(i, (id, y))| files::Row {
                    line: i as u64 + 2,
                    id: id.to_string(),
                    values: vec![y.to_string()],
                })
                .collect(),
        }
    }

    fn spec(metric: Metric) -> TargetSpec {
        TargetSpec {
            name: "t".into(),
            column: "y".into(),
            method: metric.default_method().into(),
            metric,
        }
    }

    #[test]
    fn label_domains() {
        let t = table(&[("a", "dog"), ("b", "cat"), ("c", "dog")]);
        // No default from the labels: the classes must be declared.
        match declare(&t, &[spec(Metric::Error)], None) {
            Err(Error::InvalidArgument { field, message }) => {
                assert_eq!(field, "--classes");
                assert!(message.contains("target t"), "{message}");
                assert!(!message.contains("dog"), "{message}");
            }
            other => panic!("expected a refusal without --classes, got {other:?}"),
        }
        let given = vec!["cat".to_string(), "dog".to_string(), "eel".to_string()];
        let d = declare(&t, &[spec(Metric::Error)], Some(&given)).expect("declared");
        assert_eq!(d[0].classes, given);
        let narrow = vec!["dog".to_string()];
        match declare(&t, &[spec(Metric::Error)], Some(&narrow)) {
            Err(Error::InvalidArgument { field, message }) => {
                assert_eq!(field, "labels.csv:3");
                assert!(message.contains("`b`"), "{message}");
            }
            other => panic!("expected a label error, got {other:?}"),
        }
        // A huge label is not echoed whole.
        let huge = "x".repeat(10_000);
        let long = table(&[("a", "dog"), ("b", huge.as_str())]);
        match declare(&long, &[spec(Metric::Error)], Some(&given)) {
            Err(Error::InvalidArgument { field, message }) => {
                assert_eq!(field, "labels.csv:3");
                assert!(
                    message.contains("`b`") && message.contains("target t"),
                    "{message}"
                );
                assert!(
                    message.contains("10000 bytes") && message.len() < 300,
                    "{message}"
                );
            }
            other => panic!("expected a label error, got {other:?}"),
        }
        let b = table(&[("a", "1"), ("b", "0")]);
        assert_eq!(
            declare(&b, &[spec(Metric::Brier)], None).expect("brier")[0].classes,
            ["0", "1"]
        );
        assert!(declare(&t, &[spec(Metric::Brier)], None).is_err());
        let n = table(&[("a", "3.5"), ("b", "-2")]);
        let d = declare(&n, &[spec(Metric::SqError { bound: 4.0 })], None).expect("numeric");
        assert!(d[0].classes.is_empty());
        assert!(
            declare(
                &table(&[("a", "x")]),
                &[spec(Metric::SqError { bound: 4.0 })],
                None
            )
            .is_err()
        );
    }
}
