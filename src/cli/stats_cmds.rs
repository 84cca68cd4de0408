//! The `bound` and `plan` commands: local computations that need no daemon.
//!
//! `main` wires them as subcommands; each `run_*` prints to stdout and returns the exit code.

use std::process::ExitCode;

use anyhow::{Context, bail};
use clap::Args;
use serde_json::json;

use crate::stats::fair::{FairRow, FairSpec, fair_table};
use crate::stats::interval::{
    Interval, Method, Rounding, Sides, display_outward, errors_interval_with, mean_interval_with,
};
use crate::stats::plan::{PlanRow, PlanSpec, plan_table, rows_table};
use crate::stats::rules::Rule;
use crate::stats::schedule::Schedule;

/// `holdout bound`: the interval for one score.
#[derive(Debug, Clone, Args)]
pub struct BoundArgs {
    /// Rows in the test set (n).
    #[arg(long)]
    pub rows: u64,
    /// Number of errors (0-1 loss) among the rows (k <= n).
    #[arg(long, conflicts_with = "mean", required_unless_present = "mean")]
    pub errors: Option<u64>,
    /// Mean loss in [0, 1] instead of an error count (method kl unless told otherwise).
    #[arg(long)]
    pub mean: Option<f64>,
    /// FAILURE probability D, e.g. 0.05 for an interval that holds with probability 0.95.
    /// This is not the confidence: pass 0.05, never 0.95.
    #[arg(
        long,
        conflicts_with = "level_nats",
        required_unless_present = "level_nats"
    )]
    pub delta: Option<f64>,
    /// The level as ln(1/D) nats instead of --delta, for levels far below the smallest double
    /// (e.g. 30000 nats, D = e^-30000).
    #[arg(long)]
    pub level_nats: Option<f64>,
    /// exact (Clopper-Pearson, error counts only), kl or hoeffding [default: exact with
    /// --errors, kl with --mean].
    #[arg(long, value_parser = parse_method)]
    pub method: Option<Method>,
    /// Print a one-sided upper bound at the full level D (the lower limit is then 0).
    #[arg(long)]
    pub one_sided: bool,
    /// Print JSON: {"lower", "upper", "method", "delta", "level_nats", ...}, limits as
    /// round-trip floats.
    #[arg(long)]
    pub json: bool,
}

/// `holdout plan`: how many queries fit, or how many rows a number of queries needs.
#[derive(Debug, Clone, Args)]
pub struct PlanArgs {
    /// Rows in the test set (n); gives the queries that fit.
    #[arg(long, conflicts_with = "queries", required_unless_present = "queries")]
    pub rows: Option<u64>,
    /// Number of queries wanted; gives the rows needed instead.
    #[arg(long)]
    pub queries: Option<u64>,
    /// Total FAILURE probability of the holdout, e.g. 0.05 (not the confidence 0.95); the
    /// default is `create`'s.
    #[arg(long, default_value_t = 0.05)]
    pub delta: f64,
    /// Widest half-width still worth answering, e.g. 0.02.
    #[arg(long)]
    pub tolerance: f64,
    /// Budget schedule: series, or even:K.
    #[arg(long, default_value = "series")]
    pub schedule: String,
    /// Answer rules to compare (rounded:ETA, threshold:TAU, ladder:ETA, best-of:ETA, sealed).
    #[arg(long = "answers", num_args = 1.., default_values_t = default_rules())]
    pub answers: Vec<String>,
    /// Also count queries at this expected error (the worst case is always shown).
    #[arg(long)]
    pub expected_error: Option<f64>,
    /// Interval method: exact (0-1 loss), kl or hoeffding.
    #[arg(long, value_parser = parse_method, default_value = "exact")]
    pub method: Method,
    /// The target's metric, as `create --metric` takes it (error, brier, abs_error:B,
    /// sq_error:B, log_loss...): plans with the interval method create gives it (exact for
    /// error, kl otherwise), in place of --method.
    #[arg(long, value_name = "METRIC", conflicts_with = "method")]
    pub metric: Option<String>,
    /// Models per best-of batch.
    #[arg(long, default_value_t = 10)]
    pub batch: u32,
    /// Declared classes of a target whose metric needs the class counts (per-class or
    /// balanced error, AUC): their release, ln C(n + C - 1, C - 1) nats (about 34 for 180 rows
    /// and 10 classes), is coded once before the first answer and counted in every level.
    #[arg(long, value_name = "C", conflicts_with = "teams", value_parser = clap::value_parser!(u32).range(2..))]
    pub classes: Option<u32>,
    /// Fair service: teams that will share the holdout. With --answers-each, compares which
    /// policies (rules x schedules x shares) serve every team and how many rows each needs.
    #[arg(long, requires_all = ["answers_each", "rows"], value_parser = clap::value_parser!(u64).range(1..))]
    pub teams: Option<u64>,
    /// Fair service: answers each team should get (with --teams).
    #[arg(long, requires = "teams", value_parser = clap::value_parser!(u64).range(1..))]
    pub answers_each: Option<u64>,
    /// Print JSON: a list of {"rule", "queries"[, "queries_expected"]} or {"rule", "rows"};
    /// with --teams, an object with the teams, the answers each and one row per policy.
    #[arg(long)]
    pub json: bool,
}

fn default_rules() -> Vec<String> {
    [
        "sealed",
        "threshold:0.5",
        "ladder:0.01",
        "best-of:0.01",
        "rounded:0.01",
    ]
    .map(String::from)
    .to_vec()
}

/// The interval method a plan uses: the one `create` gives `--metric`, else `--method`.
fn plan_method(args: &PlanArgs) -> anyhow::Result<Method> {
    match &args.metric {
        None => Ok(args.method),
        Some(m) => {
            let metric: crate::metric::Metric = m.parse()?;
            parse_method(metric.default_method()).map_err(|e| anyhow::anyhow!(e))
        }
    }
}

fn parse_method(s: &str) -> Result<Method, String> {
    s.parse().map_err(|e| format!("{e}"))
}

fn check_delta(delta: f64) -> anyhow::Result<()> {
    if !(delta > 0.0 && delta < 1.0) {
        bail!(
            "--delta is the failure probability and must lie in (0, 1), e.g. 0.05 for 95 % \
             confidence; got {delta}"
        );
    }
    Ok(())
}

/// Computes the interval of `holdout bound`.
pub fn bound_interval(args: &BoundArgs) -> anyhow::Result<(Interval, Method)> {
    let level = bound_level(args)?;
    let sides = if args.one_sided {
        Sides::Upper
    } else {
        Sides::Two
    };
    let ci = match (args.errors, args.mean) {
        (Some(_), Some(_)) => bail!("give either --errors or --mean, not both"),
        (None, None) => bail!("give --errors K (0-1 loss) or --mean M (a mean loss in [0, 1])"),
        (Some(k), None) => {
            let method = args.method.unwrap_or(Method::Exact);
            if k > args.rows {
                bail!("--errors {k} is more than --rows {}", args.rows);
            }
            let ci = errors_interval_with(Rounding::Outward, method, args.rows, k, level, sides)?;
            (ci, method)
        }
        (None, Some(m)) => {
            let method = args.method.unwrap_or(Method::Kl);
            if method == Method::Exact {
                bail!(
                    "--method exact (Clopper-Pearson) needs --errors; use kl or hoeffding with --mean"
                );
            }
            let ci = mean_interval_with(Rounding::Outward, method, args.rows, m, level, sides)?;
            (ci, method)
        }
    };
    Ok(ci)
}

/// `ln(1/D)` of `holdout bound`, from `--delta` or `--level-nats`.
fn bound_level(args: &BoundArgs) -> anyhow::Result<f64> {
    match (args.delta, args.level_nats) {
        (Some(_), Some(_)) => bail!("give either --delta or --level-nats, not both"),
        (None, None) => bail!("give --delta D (failure probability) or --level-nats ln(1/D)"),
        (Some(d), None) => {
            check_delta(d)?;
            Ok(-d.ln())
        }
        (None, Some(l)) => {
            if !(l.is_finite() && l > 0.0) {
                bail!("--level-nats is ln(1/D) and must be a finite number > 0, got {l}");
            }
            Ok(l)
        }
    }
}

/// Runs `holdout bound`. Limits are rounded outward (core version 2): in JSON as round-trip
/// floats, in text at 6 decimals with the lower limit rounded down and the upper one up.
pub fn run_bound(args: &BoundArgs) -> anyhow::Result<ExitCode> {
    let (ci, method) = bound_interval(args)?;
    let level = bound_level(args)?;
    if args.json {
        let v = json!({
            "lower": ci.lower,
            "upper": ci.upper,
            "method": method.to_string(),
            "delta": args.delta,
            "level_nats": level,
            "rows": args.rows,
            "errors": args.errors,
            "mean": args.mean,
            "one_sided": args.one_sided,
        });
        println!("{v}");
    } else {
        let what = if args.one_sided {
            "one-sided upper bound"
        } else {
            "two-sided interval"
        };
        let (lo, hi) = display_outward(ci.lower, ci.upper, 6);
        println!("[{lo}, {hi}]");
        let holds = match args.delta {
            Some(d) => format!(
                "holds with probability at least {} (delta = {d} is the failure probability)",
                1.0 - d
            ),
            None => format!(
                "holds with probability at least 1 - e^-{level} (failure probability e^-{level})"
            ),
        };
        println!(
            "{what}, method {method}: {holds}, for rows drawn independently and a model fixed \
             without looking at these labels; limits rounded outward"
        );
    }
    Ok(ExitCode::SUCCESS)
}

/// Computes the rows of `holdout plan`.
pub fn plan_rows(args: &PlanArgs) -> anyhow::Result<Vec<PlanRow>> {
    let method = plan_method(args)?;
    check_delta(args.delta)?;
    if !(args.tolerance > 0.0 && args.tolerance <= 1.0) {
        bail!("--tolerance must lie in (0, 1], got {}", args.tolerance);
    }
    if let Some(p) = args.expected_error
        && !(0.0..=1.0).contains(&p)
    {
        bail!("--expected-error must lie in [0, 1], got {p}");
    }
    let schedule: Schedule = args.schedule.parse().context("--schedule")?;
    let rules = args
        .answers
        .iter()
        .map(|s| s.parse::<Rule>().with_context(|| format!("--answers {s}")))
        .collect::<anyhow::Result<Vec<Rule>>>()?;
    let spec = |rows| PlanSpec {
        rows,
        delta: args.delta,
        tolerance: args.tolerance,
        schedule,
        method,
        batch: args.batch.max(1),
        class_counts: args.classes,
    };
    Ok(match (args.rows, args.queries) {
        (Some(n), None) if n > 0 => plan_table(&spec(n), &rules, args.expected_error),
        (None, Some(k)) if k > 0 => rows_table(&spec(1), &rules, k),
        (Some(_), None) => bail!("--rows must be at least 1"),
        (None, Some(_)) => bail!("--queries must be at least 1"),
        _ => bail!("give either --rows N (queries that fit) or --queries K (rows needed)"),
    })
}

fn count_text(q: Option<f64>) -> String {
    q.map_or("-".into(), crate::cli::client::show::count)
}

/// Computes the rows of `holdout plan --teams T --answers-each M`.
pub fn fair_rows(args: &PlanArgs, teams: u64, each: u64) -> anyhow::Result<Vec<FairRow>> {
    let method = plan_method(args)?;
    plan_rows(args)?; // the same checks of the common inputs
    let rules = args
        .answers
        .iter()
        .map(|s| s.parse::<Rule>().with_context(|| format!("--answers {s}")))
        .collect::<anyhow::Result<Vec<Rule>>>()?;
    let spec = FairSpec {
        rows: args.rows.unwrap_or(1),
        delta: args.delta,
        tolerance: args.tolerance,
        method,
        teams,
        answers_each: each,
    };
    Ok(fair_table(&spec, &rules, args.expected_error))
}

fn run_fair(args: &PlanArgs, teams: u64, each: u64) -> anyhow::Result<ExitCode> {
    let rows = fair_rows(args, teams, each)?;
    if args.json {
        println!(
            "{}",
            serde_json::json!({
                "rows": args.rows,
                "teams": teams,
                "answers_each": each,
                "delta": args.delta,
                "tolerance": args.tolerance,
                "expected_error": args.expected_error,
                "policies": rows,
            })
        );
        return Ok(ExitCode::SUCCESS);
    }
    let n = args.rows.unwrap_or(1);
    let serving = rows.iter().filter(|r| r.serves).count();
    println!(
        "{}, {} each, on {n} rows at tolerance {} (delta {}): {serving} of {} policies serve \
         every team at worst case",
        crate::cli::client::show::plural(teams, "team", "teams"),
        crate::cli::client::show::plural(each, "answer", "answers"),
        args.tolerance,
        args.delta,
        rows.len()
    );
    let expected = args.expected_error.map(|e| format!("each at error {e}"));
    let mut header = vec!["rule", "schedule", "shares", "sharing", "each, worst case"];
    if let Some(e) = &expected {
        header.push(e);
    }
    header.push("rows needed");
    let table: Vec<Vec<String>> = rows
        .iter()
        .map(|r| {
            let mut row = vec![
                format!("{}{}", if r.serves { "* " } else { "  " }, r.rule),
                r.schedule.clone(),
                r.shares.clone(),
                r.sharing.clone(),
                r.served.to_string(),
            ];
            if let Some(e) = r.served_expected {
                row.push(e.to_string());
            }
            row.push(r.rows_needed.map_or("> 2^40".into(), |n| n.to_string()));
            row
        })
        .collect();
    println!("{}", crate::cli::client::show::table(&header, &table));
    println!(
        "* serves every team {each} answers at worst case. \"each\": answers every team is sure \
         to get, the teams taking turns, every answer coded at its worst case (the expected-error \
         column judges the half-width at that error). shares: none = one pool; roster = equal \
         shares for the {teams} teams (create with --shares roster:TEAM,...); on-arrival = the \
         k-th team gets delta/(k(k+1)). isolated = each team sees only its own answers (one \
         transcript each). rows needed: the fewest rows that serve every team {each} answers at \
         worst case under that policy. best-of rules are left out."
    );
    Ok(ExitCode::SUCCESS)
}

/// Runs `holdout plan`.
pub fn run_plan(args: &PlanArgs) -> anyhow::Result<ExitCode> {
    if let (Some(teams), Some(each)) = (args.teams, args.answers_each) {
        return run_fair(args, teams, each);
    }
    let rows = plan_rows(args)?;
    if args.json {
        println!("{}", serde_json::to_string(&rows)?);
        return Ok(ExitCode::SUCCESS);
    }
    let width = rows.iter().map(|r| r.rule.len()).max().unwrap_or(4).max(4);
    if let Some(k) = args.queries {
        println!("{:width$}  rows needed for {k} queries", "rule");
        for r in &rows {
            let n = r.rows.map_or("> 2^62".into(), |n| n.to_string());
            println!("{:width$}  {n}", r.rule);
        }
    } else {
        let expected = args
            .expected_error
            .map(|p| format!("  at error {p}"))
            .unwrap_or_default();
        println!("{:width$}  worst case{expected}", "rule");
        for r in &rows {
            let e = if args.expected_error.is_some() {
                format!("  {:>10}", count_text(r.queries_expected))
            } else {
                String::new()
            };
            println!("{:width$}  {:>10}{e}", r.rule, count_text(r.queries));
        }
    }
    println!(
        "Queries (best-of: batches of {}) whose half-width stays within {} using method {} and \
         schedule {}, every answer costing its rule's worst-case code; sealed counts one round \
         released as the last event. Valid simultaneously with probability at least {} if rows \
         are drawn independently, submissions see the labels only through released answers, and \
         analysts share answers as the policy declares.",
        args.batch.max(1),
        args.tolerance,
        args.method,
        args.schedule,
        1.0 - args.delta
    );
    if let Some(c) = args.classes {
        println!(
            "Counted first: the release of the {c} class counts, coded once before the first \
             answer at ln C(n + {c} - 1, {c} - 1) nats{}, which every later level pays for.",
            args.rows.map_or(String::new(), |n| format!(
                " ({:.3} for {n} rows)",
                crate::stats::codes::composition_nats(n, c)
            ))
        );
    }
    Ok(ExitCode::SUCCESS)
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::Parser;

    #[derive(Parser)]
    struct Bound {
        #[command(flatten)]
        args: BoundArgs,
    }

    #[derive(Parser)]
    struct Plan {
        #[command(flatten)]
        args: PlanArgs,
    }

    fn bound(argv: &[&str]) -> anyhow::Result<(Interval, Method)> {
        let parsed = Bound::try_parse_from(std::iter::once("bound").chain(argv.iter().copied()))?;
        bound_interval(&parsed.args)
    }

    #[test]
    fn bound_defaults_and_errors() {
        let (ci, m) = bound(&[
            "--rows",
            "1000",
            "--errors",
            "0",
            "--delta",
            "0.05",
            "--one-sided",
        ])
        .unwrap();
        assert_eq!(m, Method::Exact);
        assert!((ci.upper - (1.0 - 0.05f64.powf(1e-3))).abs() < 1e-12);
        let (_, m) = bound(&["--rows", "100", "--mean", "0.3", "--delta", "0.05"]).unwrap();
        assert_eq!(m, Method::Kl);
        let e = bound(&["--rows", "10", "--errors", "11", "--delta", "0.05"]).unwrap_err();
        assert!(e.to_string().contains("more than"), "{e}");
        let e = bound(&["--rows", "10", "--errors", "1", "--delta", "0.95"]);
        assert!(
            e.is_ok(),
            "0.95 is a legal (if useless) failure probability"
        );
        let e = bound(&["--rows", "10", "--errors", "1", "--delta", "1.5"]).unwrap_err();
        assert!(e.to_string().contains("failure probability"), "{e}");
        assert!(bound(&["--rows", "10", "--delta", "0.05"]).is_err());
        assert!(
            bound(&[
                "--rows", "10", "--errors", "1", "--mean", "0.1", "--delta", "0.05"
            ])
            .is_err()
        );
        let e = bound(&[
            "--rows", "10", "--mean", "0.1", "--method", "exact", "--delta", "0.05",
        ])
        .unwrap_err();
        assert!(e.to_string().contains("needs --errors"), "{e}");
    }

    #[test]
    fn help_says_delta_is_the_failure_probability() {
        use clap::CommandFactory;
        let help = Bound::command().render_long_help().to_string();
        assert!(help.contains("FAILURE probability"), "{help}");
        assert!(help.contains("not the confidence"), "{help}");
    }

    #[test]
    fn plan_json_shape() {
        let p = Plan::try_parse_from([
            "plan",
            "--rows",
            "10000",
            "--delta",
            "0.05",
            "--tolerance",
            "0.05",
            "--method",
            "hoeffding",
            "--answers",
            "rounded:0.01",
            "threshold:0.1",
            "--expected-error",
            "0.1",
        ])
        .unwrap();
        let rows = plan_rows(&p.args).unwrap();
        let v = serde_json::to_value(&rows).unwrap();
        assert_eq!(v[0]["rule"], "rounded:0.01");
        // DESIGN 4.5's 10 judges the one-count interval with the uniform code; core 2 the
        // reported cell, and code 2 a worst case of ln 202 after the first answer (see
        // `design_magnitudes_show_up` in cli/client/plan.rs for the arithmetic): 7.
        assert_eq!(v[0]["queries"], 7.0);
        // Counts are whole numbers in JSON ("7", not "7.0"); a count past 2^53 stays a float.
        assert!(v[0]["queries"].is_u64(), "{}", v[0]["queries"]);
        let text = serde_json::to_string(&rows).unwrap();
        assert!(
            text.contains(r#""queries":7"#) && !text.contains(".0,"),
            "{text}"
        );
        let huge = PlanRow {
            rule: "sealed".into(),
            queries: Some(1.7707170589536468e109),
            queries_expected: None,
            rows: None,
        };
        assert_eq!(
            serde_json::to_string(&huge).unwrap(),
            r#"{"rule":"sealed","queries":1.7707170589536468e+109}"#
        );
        assert!(v[1]["queries_expected"].as_f64().unwrap() >= v[1]["queries"].as_f64().unwrap());
        let p = Plan::try_parse_from([
            "plan",
            "--queries",
            "10",
            "--delta",
            "0.05",
            "--tolerance",
            "0.05",
            "--method",
            "hoeffding",
            "--answers",
            "rounded:0.01",
        ])
        .unwrap();
        let rows = plan_rows(&p.args).unwrap();
        let n = rows[0].rows.unwrap();
        // Core 2, code 2: the 10th query needs ln(40 * 110) + ln 101 + 8 ln 202 = 55.47 nats
        // <= 2n (0.05 - 0.005)^2, about n >= 13,700 (our arithmetic; 12,330 with the uniform
        // code's 9 ln 101; DESIGN 4.5's one-count figure is under 10,000).
        assert!((13_400..=14_000).contains(&n), "{n}");
        assert!(
            serde_json::to_value(&rows).unwrap()[0]
                .get("queries")
                .is_none()
        );
    }
}
