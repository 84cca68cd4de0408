//! Rendering replies: JSON objects for scripts, short aligned text for people.

use serde_json::{Value, json};

use crate::proto::v1::{
    Answer, Budget, HistoryEntry, HoldoutInfo, Policy, Quote, Receipt, Refusal, Target, UserInfo,
};

/// Prints a JSON value on one line of stdout.
pub fn print_json(value: &Value) {
    println!("{value}");
}

/// An interval for people, `[lower, upper]`, each end rounded outward (the lower end down, the
/// upper end up) so the shown interval contains the reported one: four decimals, or eight when
/// the interval is narrower than 0.001. Trailing zeros are dropped.
pub fn interval_text(lower: f64, upper: f64) -> String {
    if !(lower.is_finite() && upper.is_finite()) {
        return format!("[{lower}, {upper}]");
    }
    let decimals = if (upper - lower).abs() < 1e-3 { 8 } else { 4 };
    let (mut lo, mut hi) = crate::stats::interval::display_outward(lower, upper, decimals);
    // A limit whose shortest round-trip decimal fits (0.45 for a threshold, 0.2 for a cell
    // edge) is shown as that decimal: it differs from the double by less than one ulp, far
    // inside the margin the outward limits already carry.
    let short = |x: f64, out: &mut String| {
        let t = format!("{x}");
        if t.split_once('.').is_none_or(|(_, f)| f.len() <= decimals) && !t.contains('e') {
            *out = t;
        }
    };
    short(lower, &mut lo);
    short(upper, &mut hi);
    let trim = |t: String| {
        if t.contains('.') {
            let t = t.trim_end_matches('0').trim_end_matches('.');
            if t == "-0" {
                "0".to_string()
            } else {
                t.to_string()
            }
        } else {
            t
        }
    };
    format!("[{}, {}]", trim(lo), trim(hi))
}

/// A number for people, the one formatter of every figure the command line and the web view
/// print: four decimals for ordinary sizes (0.010000000000000002 reads 0.01), at most five
/// significant digits from 10 up (11.695 nats); three
/// significant digits for small ones, written out (0.000758); words for large ones (2.3
/// trillion); powers of ten only past those (3.1×10^-14, 1.8×10^24). Never e-notation.
/// Rounded to nearest: figures that are limits go through [`interval_text`] (outward).
pub fn num(x: f64) -> String {
    if x == 0.0 {
        return "0".into();
    }
    if !x.is_finite() {
        return format!("{x}");
    }
    let a = x.abs();
    let trim = |s: String| {
        if s.contains('.') {
            s.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            s
        }
    };
    if (1e-3..1e6).contains(&a) {
        // Four decimals below 10, then five significant digits (11.695, 1234.6, 123457).
        let decimals = (4 - (a.log10().floor() as i32)).clamp(0, 4) as usize;
        let s = trim(format!("{x:.decimals$}"));
        return if s == "-0" { "0".into() } else { s };
    }
    if (1e-9..1e-3).contains(&a) {
        let decimals = (-a.log10().floor()) as usize + 2;
        return trim(format!("{x:.decimals$}"));
    }
    if (1e6..1e15).contains(&a) {
        for (size, word) in [(1e12, "trillion"), (1e9, "billion"), (1e6, "million")] {
            if a >= size {
                let m = x / size;
                // Three significant digits of the multiple.
                let decimals = if m.abs() >= 100.0 {
                    0
                } else if m.abs() >= 10.0 {
                    1
                } else {
                    2
                };
                return format!("{} {word}", trim(format!("{m:.decimals$}")));
            }
        }
    }
    // Past the words: a mantissa of two significant digits and a power of ten.
    let e = a.log10().floor() as i32;
    let m = x / 10f64.powi(e);
    let (m, e) = if trim(format!("{m:.1}")).trim_start_matches('-') == "10" {
        (m / 10.0, e + 1)
    } else {
        (m, e)
    };
    format!("{}\u{d7}10^{e}", trim(format!("{m:.1}")))
}

/// A count that may be large or fractional, for people: whole below a million, then as
/// [`num`] prints it, with "about" ("about 500 million").
pub fn count(q: f64) -> String {
    if q < 1e6 {
        format!("{}", q.max(0.0) as u64)
    } else {
        format!("about {}", num(q))
    }
}

/// Widest cell a table shows; longer text (a note, a description) is cut with an ellipsis.
pub const MAX_CELL: usize = 80;

/// Text typed by a user, made safe to print on someone else's terminal: control characters
/// (newlines, escape codes) shown escaped, and at most `max` characters, cut with an ellipsis.
pub fn safe_text(text: &str, max: usize) -> String {
    let mut out = String::new();
    for (n, c) in text.chars().enumerate() {
        if n == max {
            out.push('…');
            break;
        }
        if c.is_control() {
            out.extend(c.escape_default());
        } else {
            out.push(c);
        }
    }
    out
}

/// Text columns padded to their widest cell; cells are escaped and cut by [`safe_text`].
pub fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let rows: Vec<Vec<String>> = rows
        .iter()
        .map(|r| r.iter().map(|c| safe_text(c, MAX_CELL)).collect())
        .collect();
    let mut widths: Vec<usize> = header.iter().map(|h| h.chars().count()).collect();
    for row in &rows {
        for (w, cell) in widths.iter_mut().zip(row) {
            *w = (*w).max(cell.chars().count());
        }
    }
    let line = |cells: Vec<&str>| {
        let padded: Vec<String> = cells
            .iter()
            .zip(&widths)
            .map(|(c, w)| format!("{c:<w$}"))
            .collect();
        padded.join("  ").trim_end().to_string()
    };
    let mut out = line(header.to_vec());
    for row in &rows {
        out.push('\n');
        out.push_str(&line(row.iter().map(String::as_str).collect()));
    }
    out
}

/// `n` with the singular or plural phrase.
pub fn plural(n: u64, one: &str, many: &str) -> String {
    format!("{n} {}", if n == 1 { one } else { many })
}

/// Queries left as JSON: `null` when unbounded (the forecast saturates), never a sentinel.
pub fn queries_left_json(n: u64) -> Value {
    if n == u64::MAX { Value::Null } else { json!(n) }
}

/// Queries left for people: "unbounded" when the forecast saturates.
pub fn queries_left_text(n: u64) -> String {
    if n == u64::MAX {
        "unbounded".into()
    } else {
        n.to_string()
    }
}

/// A budget as JSON.
pub fn budget_json(b: &Budget) -> Value {
    json!({
        "delta": b.delta,
        "spent": b.spent,
        "remaining": b.remaining,
        "transcript_nats": b.transcript_nats,
        "next_half_width": b.next_half_width,
        "queries_left": queries_left_json(b.queries_left),
        "answered": b.answered,
        "refused": b.refused,
        "open": b.open,
        "quota_resets_at": b.quota_resets_at,
        "quota_left_today": b.quota_left_today,
    })
}

/// Budget lines for people.
pub fn budget_text(b: &Budget) -> String {
    // A closed holdout answers nothing more, whatever its budget would still allow.
    let next = if !b.open {
        "none: the holdout is closed and answers no more queries".to_string()
    } else {
        format!(
            "half-width {} at the reference score; {} within the tolerance",
            num(b.next_half_width),
            if b.queries_left == u64::MAX {
                "an unbounded number of queries fit".to_string()
            } else {
                plural(b.queries_left, "more query fits", "more queries fit")
            }
        )
    };
    let mut s = format!(
        "budget     spent {} of delta {}, remaining {}\n\
         transcript {} nats released so far\n\
         next       {next}\n\
         queries    {} answered, {} refused; {}",
        num(b.spent),
        num(b.delta),
        num(b.remaining),
        num(b.transcript_nats),
        b.answered,
        b.refused,
        if b.open { "open" } else { "closed" }
    );
    if !b.quota_resets_at.is_empty() {
        s.push_str(&format!(
            "\nquota      {} left today, resets at {}",
            b.quota_left_today, b.quota_resets_at
        ));
    }
    s
}

/// The budget for people when delta may be split into per-team shares: the holdout's delta on
/// its own line, then the caller's team's share (`budget_of`); with no share of its own
/// (`no_share`, an organizer outside the roster) no pool's figures at all, since a pool of
/// nobody ("spent 0 of delta 0 ... half-width 1") describes nothing. With one pool (both
/// empty) it is [`budget_text`].
pub fn budget_of_text(b: &Budget, budget_of: &str, no_share: bool, holdout_delta: f64) -> String {
    if no_share {
        return format!(
            "delta      {} for the whole holdout, split into per-team shares\n\
             budget     your team has no share of it; each team's status shows its own\n\
             queries    {}",
            num(holdout_delta),
            if b.open { "open" } else { "closed" }
        );
    }
    if budget_of.is_empty() {
        return budget_text(b);
    }
    format!(
        "delta      {} for the whole holdout, split into per-team shares; below: team {}'s share\n{}",
        num(holdout_delta),
        safe_text(budget_of, 100),
        budget_text(b).replacen("of delta", "of its share", 1)
    )
}

/// A receipt for people: the holdout, the query number and the entry's hash.
pub fn receipt_text(r: &Receipt) -> String {
    if r.query > 0 {
        format!("{} query {} entry {}", r.holdout, r.query, r.entry_hash)
    } else {
        format!("{} entry {}", r.holdout, r.entry_hash)
    }
}

/// A receipt as JSON (null when absent).
pub fn receipt_json(r: Option<&Receipt>) -> Value {
    match r {
        Some(r) if !r.entry_hash.is_empty() => json!({
            "holdout": r.holdout,
            "query": r.query,
            "entry_hash": r.entry_hash,
        }),
        _ => Value::Null,
    }
}

/// An answer as JSON: the flat fields scripts read, plus the whole budget.
pub fn answer_json(a: &Answer, model_names: &[String]) -> Value {
    answer_json_in(a, model_names, &Units::default())
}

/// [`answer_json`] with `units`: a regression target's answer in its own units (`units`,
/// see [`Units::json`]; `null` for other targets).
pub fn answer_json_in(a: &Answer, model_names: &[String], units: &Units) -> Value {
    let b = a.budget.clone().unwrap_or_default();
    let (lower, upper) = a.interval.as_ref().map_or((Value::Null, Value::Null), |i| {
        (json!(i.lower), json!(i.upper))
    });
    let best_name = a
        .best_model
        .and_then(|m| model_names.get(m as usize))
        .map_or(Value::Null, |n| json!(n));
    json!({
        "refused": false,
        "query": a.query,
        "target": a.target,
        "symbol": a.symbol,
        "score": a.score,
        "lower": lower,
        "upper": upper,
        "delta_i": a.delta_i,
        "level_nats": a.level_nats,
        "code_nats": a.code_nats,
        "spent": b.spent,
        "remaining": b.remaining,
        "transcript_nats": b.transcript_nats,
        "next_half_width": b.next_half_width,
        "queries_left": queries_left_json(b.queries_left),
        "budget": budget_json(&b),
        "receipt": receipt_json(a.receipt.as_ref()),
        "guarantee": a.guarantee,
        "statement": a.statement,
        "digest": a.digest,
        "replayed": a.replayed,
        "best_model": a.best_model,
        "best_model_name": best_name,
        "units": a.interval.as_ref().map_or(Value::Null, |i| {
            units.json(&a.target, a.score, i.lower, i.upper)
        }),
    })
}

/// The guarantee in one sentence, with its assumptions named, for replies that show an
/// interval but not the holdout's full statement (which `status` and `--guarantee` print).
pub fn guarantee_line(delta: Option<f64>) -> String {
    guarantee_brief(
        delta,
        "this interval holds together with every other this holdout reports",
        "--guarantee or `holdout status`",
    )
}

/// The guarantee in one sentence for any reply or view: `claim` is what holds ("these
/// intervals hold together with..."), `full` where the full statement is (a flag, a command).
pub fn guarantee_brief(delta: Option<f64>, claim: &str, full: &str) -> String {
    let chance = delta.map_or_else(
        || "with the holdout's probability".to_string(),
        |d| format!("with probability at least 1 - {}", num(d)),
    );
    format!(
        "guarantee  {chance}, {claim}, if its rows are i.i.d., labels are reached only through \
         answers and the sharing declared at creation holds; a statistical statement, not a \
         certification (high-stakes uses need their domain's review). In full: {full}."
    )
}

/// Holdout facts for people with the guarantee in one line (pointing to `holdout status`,
/// which states it in full): for replies that are not the holdout's own view (create, close).
pub fn holdout_text_brief(h: &HoldoutInfo) -> String {
    let mut s = holdout_text(h);
    if !h.guarantee.is_empty() {
        let full = format!("\n\n{}", h.guarantee);
        if let Some(head) = s.strip_suffix(&full) {
            s = format!(
                "{head}\n{}",
                guarantee_brief(
                    h.policy.as_ref().map(|p| p.delta),
                    "every interval this holdout reports holds simultaneously",
                    &format!("`holdout status {}`", safe_text(&h.name, 100))
                )
            );
        }
    }
    s
}

/// An answer for people. The guarantee is stated in one line unless `full_guarantee`.
pub fn answer_text_with(a: &Answer, model_names: &[String], full_guarantee: bool) -> String {
    let mut s = answer_text(a, model_names);
    if !full_guarantee && !a.guarantee.is_empty() {
        let full = format!("\n\n{}", a.guarantee);
        if let Some(head) = s.strip_suffix(&full) {
            s = format!(
                "{head}\n{}",
                guarantee_line(a.budget.as_ref().map(|b| b.delta))
            );
        }
    }
    s
}

/// The bound `B` of a regression metric (`abs_error:B`, `sq_error:B`) with the words for its
/// mean loss, or `None` for metrics whose scale is already the reader's (error, brier...).
pub fn target_scale(metric: &str) -> Option<(f64, &'static str)> {
    let (name, bound) = metric.split_once(':')?;
    let words = match name {
        "abs_error" => "mean absolute error",
        "sq_error" => "mean squared error",
        _ => return None,
    };
    let b: f64 = bound.trim().parse().ok()?;
    (b.is_finite() && b > 0.0).then_some((b, words))
}

/// For a regression target, the answer in the target's own units: the ledger, the symbol and
/// the `[0, 1]` interval are the mean of the loss divided by `B` (each row's loss capped at
/// `B`); multiplied back by `B` they read as a mean absolute (or squared) error, the interval
/// rounded outward. `None` for other metrics.
pub fn units_line(metric: &str, score: Option<f64>, lower: f64, upper: f64) -> Option<String> {
    let (b, _) = target_scale(metric)?;
    Some(format!(
        "in units   {} (the [0, 1] figures above are that mean with each row capped at {}, \
         divided by {})",
        units_text(metric, score, lower, upper)?,
        num(b),
        num(b)
    ))
}

/// For a regression target, the answer in the target's own units as [`Units::json`] writes it;
/// `null` for other metrics.
pub fn units_json(metric: &str, score: Option<f64>, lower: f64, upper: f64) -> Value {
    match target_scale(metric) {
        Some((b, words)) => Units(vec![(String::new(), b, words)], 1).json("", score, lower, upper),
        None => Value::Null,
    }
}

/// For a regression target, the answer in the target's own units as [`Units::text`] writes
/// it (e.g. `mean absolute error 30 [30, 31]`), for a view that knows one target's metric;
/// `None` for other metrics.
pub fn units_text(metric: &str, score: Option<f64>, lower: f64, upper: f64) -> Option<String> {
    let (b, words) = target_scale(metric)?;
    Units(vec![(String::new(), b, words)], 1).text("", score, lower, upper)
}

/// Each regression target's own units, by target name: the bound `B` of `abs_error:B` or
/// `sq_error:B` and the words for its mean loss. Answers, intervals and limits of these
/// targets are released on `[0, 1]` (each row's loss capped at `B`, divided by `B`); every
/// view shows them also multiplied back by `B`, limits converted outward. Empty for holdouts
/// whose targets are already on the reader's scale (error, brier, log loss...).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Units(Vec<(String, f64, &'static str)>, usize);

impl Units {
    /// The units of a holdout's targets.
    pub fn of(targets: &[Target]) -> Units {
        Units(
            targets
                .iter()
                .filter_map(|t| target_scale(&t.metric).map(|(b, w)| (t.name.clone(), b, w)))
                .collect(),
            targets.len(),
        )
    }

    /// Whether any target has units of its own.
    pub fn any(&self) -> bool {
        !self.0.is_empty()
    }

    /// The bound and words of `target`, if it is a regression target (an empty name, as
    /// rounds recorded before targets were named leave it, is the holdout's only target).
    pub fn scale(&self, target: &str) -> Option<(f64, &'static str)> {
        self.0
            .iter()
            .find(|(n, _, _)| n == target || (target.is_empty() && self.1 == 1))
            .map(|&(_, b, w)| (b, w))
    }

    /// A `[0, 1]` score and interval of `target` in its own units, as JSON: `{"measure",
    /// "bound", "score", "lower", "upper"}` (`lower` rounded down and `upper` up, so the
    /// converted interval contains the exact product); `null` for targets without units.
    pub fn json(&self, target: &str, score: Option<f64>, lower: f64, upper: f64) -> Value {
        match self.scale(target) {
            None => Value::Null,
            Some((b, words)) => {
                let (lo, hi) = scaled_outward(lower, upper, b);
                json!({
                    "measure": words,
                    "bound": b,
                    "score": score.map(|s| tidy(s * b)),
                    "lower": lo,
                    "upper": hi,
                })
            }
        }
    }

    /// The same for people: `mean absolute error 44 [40.1, 48.3]`; `None` without units.
    pub fn text(&self, target: &str, score: Option<f64>, lower: f64, upper: f64) -> Option<String> {
        let (b, words) = self.scale(target)?;
        let (lo, hi) = scaled_outward(lower, upper, b);
        let score = score.map_or(String::new(), |s| format!("{} ", num(s * b)));
        Some(format!("{words} {score}{}", units_interval_text(lo, hi)))
    }
}

/// `lower * b` and `upper * b` rounded outward: the product's rounding error is found exactly
/// (a fused multiply-add) and a limit the rounding moved inward is stepped one ulp out.
pub fn scaled_outward(lower: f64, upper: f64, b: f64) -> (f64, f64) {
    let mut lo = lower * b;
    if lower.mul_add(b, -lo) < 0.0 {
        lo = lo.next_down();
    }
    let mut hi = upper * b;
    if upper.mul_add(b, -hi) > 0.0 {
        hi = hi.next_up();
    }
    (lo, hi)
}

/// A figure in a target's units for JSON: the double with float noise in its last places
/// removed (twelve significant digits), so 44.000000000000004 reads 44. Not for limits.
fn tidy(x: f64) -> f64 {
    format!("{x:.11e}").parse().unwrap_or(x)
}

/// An interval in a target's own units for people, rounded outward to four significant
/// digits of its larger end (whole numbers from 1,000 up).
pub fn units_interval_text(lower: f64, upper: f64) -> String {
    let big = lower.abs().max(upper.abs());
    if !big.is_finite() || big == 0.0 {
        return interval_text(lower, upper);
    }
    let magnitude = big.log10().floor() as i32;
    let decimals = (3 - magnitude).clamp(0, 8) as usize;
    let (lo, hi) = crate::stats::interval::display_outward(lower, upper, decimals);
    let trim = |t: String| {
        if t.contains('.') {
            let t = t.trim_end_matches('0').trim_end_matches('.');
            if t == "-0" {
                "0".to_string()
            } else {
                t.to_string()
            }
        } else {
            t
        }
    };
    format!("[{}, {}]", trim(lo), trim(hi))
}

/// An answer for people, with the holdout's guarantee in full.
pub fn answer_text(a: &Answer, model_names: &[String]) -> String {
    let mut s = format!("answer {} (target {})", a.query, a.target);
    if a.replayed {
        s.push_str(", replayed from the ledger: nothing charged");
    }
    s.push_str(&format!("\nsymbol     {}", a.symbol));
    if let Some(m) = a.best_model {
        let name = model_names.get(m as usize).map_or("", String::as_str);
        s.push_str(&format!("\nbest model {m} {name}"));
    }
    if let Some(i) = &a.interval {
        s.push_str(&format!("\ninterval   {}", interval_text(i.lower, i.upper)));
    }
    s.push_str(&format!(
        "\nlevel      ln(1/d) = {} nats; share delta_i = {}; this answer's code {} nats",
        num(a.level_nats),
        num(a.delta_i),
        num(a.code_nats)
    ));
    if let Some(b) = &a.budget {
        s.push('\n');
        if a.budget_of.is_empty() {
            s.push_str(&budget_text(b));
        } else {
            // Under per-team shares the figures are the team's share, not the holdout's delta.
            s.push_str(&budget_text(b).replacen("of delta", "of its share", 1));
        }
        let ladder = a.symbol.starts_with("new-best") || a.symbol == "no-improvement";
        if ladder && b.open && b.queries_left != u64::MAX {
            // Why two teams with the same share can be told different counts.
            s.push_str(
                "\nforecast   the count assumes every later answer is a new best, each coded \
                 among the grid cells below the team's best so far: the higher that best, the \
                 more cells and the longer each code, so a team with a higher best can fit one \
                 fewer",
            );
        }
    }
    if let Some(r) = &a.receipt {
        s.push_str(&format!("\nreceipt    {}", receipt_text(r)));
    }
    if !a.statement.is_empty() {
        s.push_str(&format!("\nstatement  {}", a.statement));
    }
    s.push_str(&format!("\ndigest     {}", a.digest));
    if !a.guarantee.is_empty() {
        s.push_str("\n\n");
        s.push_str(&a.guarantee);
    }
    s
}

/// A refusal as JSON.
pub fn refusal_json(r: &Refusal) -> Value {
    let b = r.budget.clone().unwrap_or_default();
    json!({
        "refused": true,
        "reason": r.reason,
        "message": r.message,
        "remaining": b.remaining,
        "budget": budget_json(&b),
        "receipt": receipt_json(r.receipt.as_ref()),
    })
}

/// A refusal for people.
pub fn refusal_text(r: &Refusal) -> String {
    let mut s = format!("refused ({}): {}", r.reason, r.message);
    if let Some(b) = &r.budget {
        s.push('\n');
        if r.budget_of.is_empty() {
            s.push_str(&budget_text(b));
        } else {
            // Under per-team shares the figures are the team's share, not the holdout's delta.
            s.push_str(&budget_text(b).replacen("of delta", "of its share", 1));
        }
    }
    match &r.receipt {
        Some(rc) if !rc.entry_hash.is_empty() => {
            s.push_str(&format!("\nreceipt    {}", receipt_text(rc)))
        }
        _ => s.push_str("\nnothing was recorded"),
    }
    s
}

/// A quote as JSON.
pub fn quote_json(q: &Quote) -> Value {
    json!({
        "dry_run": true,
        "query": q.query,
        "delta_i": q.delta_i,
        "level_nats": q.level_nats,
        "half_width": q.half_width,
        "worst_code_nats": q.worst_code_nats,
        "would_refuse": if q.would_refuse.is_empty() { Value::Null } else { json!(q.would_refuse) },
        "budget": q.budget.as_ref().map_or(Value::Null, budget_json),
    })
}

/// A quote for people.
pub fn quote_text(q: &Quote) -> String {
    let mut s = format!(
        "dry run: nothing scored, charged or recorded\n\
         query      {} would be answered at ln(1/d) = {} nats (share delta_i = {})\n\
         half-width {} at the reference score\n\
         cost       at most {} nats of code",
        q.query,
        num(q.level_nats),
        num(q.delta_i),
        num(q.half_width),
        num(q.worst_code_nats)
    );
    if !q.would_refuse.is_empty() {
        s.push_str(&format!("\nwould be refused: {}", q.would_refuse));
    }
    if let Some(b) = &q.budget {
        s.push('\n');
        s.push_str(&budget_text(b));
    }
    s
}

/// A policy as JSON.
pub fn policy_json(p: &Policy) -> Value {
    json!({
        "delta": p.delta,
        "schedule": p.schedule,
        "answers": p.answers,
        "tolerance": p.tolerance,
        "sharing": p.sharing,
        "tolerance_reference": p.tolerance_reference,
        "shares": p.shares,
        "daily_quota": p.daily_quota,
        "closes_at": p.closes_at,
        "ranking_share": p.ranking_share,
        "leaderboard": p.leaderboard,
    })
}

/// A policy on one line.
pub fn policy_text(p: &Policy) -> String {
    format!(
        "delta {}, schedule {}, answers {}, tolerance {} ({}), sharing {}, shares {}, daily quota {}",
        num(p.delta),
        p.schedule,
        p.answers,
        num(p.tolerance),
        p.tolerance_reference,
        p.sharing,
        p.shares,
        if p.daily_quota == 0 {
            "none".to_string()
        } else {
            p.daily_quota.to_string()
        }
    ) + &if p.closes_at.is_empty() {
        String::new()
    } else {
        format!(", closes at {}", p.closes_at)
    }
}

/// A target as JSON.
pub fn target_json(t: &Target) -> Value {
    json!({
        "name": t.name,
        "column": t.column,
        "metric": t.metric,
        "method": t.method,
        "classes": t.classes,
    })
}

/// A target on one line.
pub fn target_text(t: &Target) -> String {
    let classes = if t.classes.is_empty() {
        "numeric labels".to_string()
    } else {
        format!("classes {}", t.classes.join(","))
    };
    format!(
        "{} (column {}): metric {}, method {}, {}",
        t.name, t.column, t.metric, t.method, classes
    )
}

/// Holdout facts as JSON.
pub fn holdout_json(h: &HoldoutInfo) -> Value {
    json!({
        "name": h.name,
        "description": h.description,
        "rows": h.rows,
        "open": h.open,
        "created_at": h.created_at,
        "policy": h.policy.as_ref().map_or(Value::Null, policy_json),
        "targets": h.targets.iter().map(target_json).collect::<Vec<_>>(),
        "budget": h.budget.as_ref().map_or(Value::Null, budget_json),
        "budget_of": h.budget_of,
        "no_share": h.no_share,
        "genesis_hash": h.genesis_hash,
        "guarantee": h.guarantee,
        "withdrawn_at": (!h.withdrawn_at.is_empty()).then_some(&h.withdrawn_at),
        "withdrawal_pending": (!h.withdrawal_pending.is_empty()).then_some(&h.withdrawal_pending),
    })
}

/// Holdout facts for people.
pub fn holdout_text(h: &HoldoutInfo) -> String {
    let mut s = format!(
        "holdout    {}{}\nrows       {}\ncreated    {}\n",
        h.name,
        if !h.withdrawn_at.is_empty() {
            " (withdrawn: released nothing; its rows and labels are free)"
        } else if h.open {
            ""
        } else {
            " (closed)"
        },
        h.rows,
        h.created_at
    );
    if !h.withdrawn_at.is_empty() {
        s.push_str(&format!("withdrawn  {}\n", h.withdrawn_at));
    }
    if !h.withdrawal_pending.is_empty() {
        s.push_str(&format!(
            "withdrawal {}\n",
            safe_text(&h.withdrawal_pending, 300)
        ));
    }
    if !h.description.is_empty() {
        s.push_str(&format!("about      {}\n", safe_text(&h.description, 500)));
    }
    if let Some(p) = &h.policy {
        s.push_str(&format!("policy     {}\n", policy_text(p)));
    }
    for t in &h.targets {
        s.push_str(&format!("target     {}\n", target_text(t)));
    }
    s.push_str(&format!("genesis    {}", h.genesis_hash));
    if let Some(b) = &h.budget {
        s.push('\n');
        let delta = h.policy.as_ref().map_or(b.delta, |p| p.delta);
        s.push_str(&budget_of_text(b, &h.budget_of, h.no_share, delta));
    }
    if !h.guarantee.is_empty() {
        s.push_str("\n\n");
        s.push_str(&h.guarantee);
    }
    s
}

/// A history entry as one JSON object (a regression answer's `units` as [`answer_json_in`]).
pub fn history_json(e: &HistoryEntry, units: &Units) -> Value {
    json!({
        "entry": e.entry,
        "entry_hash": e.entry_hash,
        "kind": e.kind,
        "team": e.team,
        "at": e.at,
        "note": e.note,
        "answer": e.answer.as_ref().map_or(Value::Null, |a| answer_json_in(a, &[], units)),
        "refusal": e.refusal.as_ref().map_or(Value::Null, refusal_json),
        "exact_scores": e.exact_scores,
    })
}

/// What a history entry released, as text: (query number, what, interval); `other` is the
/// "what" of an entry that is neither an answer nor a refusal. A regression answer's interval
/// is followed by the same in the target's own units.
pub fn history_cells(e: &HistoryEntry, other: &str, units: &Units) -> (String, String, String) {
    match (&e.answer, &e.refusal) {
        (Some(a), _) => (
            a.query.to_string(),
            format!("{} {}", a.target, a.symbol),
            a.interval.as_ref().map_or(String::new(), |i| {
                let shown = interval_text(i.lower, i.upper);
                match units.text(&a.target, a.score, i.lower, i.upper) {
                    Some(u) => format!("{shown} = {u}"),
                    None => shown,
                }
            }),
        ),
        (None, Some(r)) => (
            String::new(),
            format!("refused: {}", r.reason),
            String::new(),
        ),
        (None, None) => (String::new(), other.to_string(), String::new()),
    }
}

/// A history entry as a table row: entry, time, team, kind, what was released.
pub fn history_row(e: &HistoryEntry, exact: bool, units: &Units) -> Vec<String> {
    let (query, what, interval) = history_cells(e, "", units);
    let mut row = vec![
        e.entry.to_string(),
        e.at.clone(),
        e.team.clone(),
        query,
        what,
        interval,
    ];
    if exact {
        row.push(
            e.exact_scores
                .iter()
                .map(|x| format!("{x}"))
                .collect::<Vec<_>>()
                .join(" "),
        );
    }
    row.push(e.note.clone());
    row
}

/// A user as JSON.
pub fn user_json(u: &UserInfo) -> Value {
    json!({
        "name": u.name,
        "roles": u.roles,
        "team": u.team,
        "created_at": u.created_at,
        "revoked": u.revoked,
    })
}

/// A user as a table row: name, roles, team, created, state.
pub fn user_row(u: &UserInfo) -> Vec<String> {
    vec![
        u.name.clone(),
        u.roles.join(","),
        u.team.clone(),
        u.created_at.clone(),
        if u.revoked { "revoked" } else { "active" }.to_string(),
    ]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unbounded_queries_left_is_null_or_a_word_never_a_sentinel() {
        assert_eq!(queries_left_json(u64::MAX), Value::Null);
        assert_eq!(queries_left_json(7), json!(7));
        assert_eq!(queries_left_text(u64::MAX), "unbounded");
        let b = Budget {
            queries_left: u64::MAX,
            open: true,
            ..Default::default()
        };
        assert_eq!(budget_json(&b)["queries_left"], Value::Null);
        assert!(budget_text(&b).contains("an unbounded number of queries fit"));
        assert!(!budget_text(&b).contains("18446744073709551615"));
        // Closed: no count at all, only that it answers nothing more.
        let closed = Budget { open: false, ..b };
        assert!(budget_text(&closed).contains("closed and answers no more queries"));
        assert!(!budget_text(&closed).contains("queries fit"));
    }

    #[test]
    fn an_answer_states_the_guarantee_in_one_line_unless_asked_in_full() {
        let full = "With probability at least 1 - 0.05 over the draw of this holdout's labels, \
                    every interval ...\nAssumptions: rows drawn independently ...";
        let a = Answer {
            query: 3,
            target: "label".into(),
            symbol: "0.32".into(),
            budget: Some(Budget {
                delta: 0.05,
                ..Default::default()
            }),
            guarantee: full.into(),
            ..Default::default()
        };
        let short = answer_text_with(&a, &[], false);
        assert!(!short.contains("Assumptions:"), "{short}");
        let last = short.lines().last().unwrap();
        assert!(
            last.starts_with("guarantee  with probability at least 1 - 0.05, this interval"),
            "{short}"
        );
        assert!(
            !last["guarantee  ".len()..].contains("  "),
            "one line, single spaces: {last}"
        );
        for named in [
            "i.i.d.",
            "only through answers",
            "sharing",
            "not a certification",
        ] {
            assert!(last.contains(named), "the line names {named:?}: {last}");
        }
        let long = answer_text_with(&a, &[], true);
        assert!(long.ends_with(full), "{long}");
        assert!(!long.contains("guarantee  with"), "{long}");
        assert_eq!(long, answer_text(&a, &[]));
    }

    #[test]
    fn numbers_for_people() {
        assert_eq!(num(0.05), "0.05");
        assert_eq!(num(0.12345), "0.1235");
        assert_eq!(num(1.0), "1");
        assert_eq!(num(0.0), "0");
        assert_eq!(num(2.5e-7), "0.00000025");
        assert_eq!(num(7.58e-4), "0.000758");
        assert_eq!(num(0.010000000000000002), "0.01");
        assert_eq!(num(-0.00001), "-0.00001");
        assert_eq!(num(2.3e13), "23 trillion");
        assert_eq!(num(5.0e8), "500 million");
        assert_eq!(num(1.25e6), "1.25 million");
        assert_eq!(num(1.8e24), "1.8\u{d7}10^24");
        assert_eq!(num(9.96e24), "1\u{d7}10^25");
        assert_eq!(num(3.1e-14), "3.1\u{d7}10^-14");
        assert_eq!(num(11.69524), "11.695");
        assert_eq!(num(5.29832), "5.2983");
        assert_eq!(num(1234.5678), "1234.6");
        assert_eq!(num(44.0), "44");
        assert_eq!(count(17.0), "17");
        assert_eq!(count(5.04e8), "about 504 million");
        for x in [1e-300, 2.5e-7, 7.58e-4, 0.123456, 44.5, 2.3e13, 1e300] {
            let s = num(x);
            assert!(!s.contains('e'), "{x}: {s}");
            let digits = s.split('\u{d7}').next().unwrap().chars();
            let significant: String = digits
                .filter(char::is_ascii_digit)
                .collect::<String>()
                .trim_start_matches('0')
                .to_string();
            assert!(significant.len() <= 5, "{x}: {s}");
        }
    }

    #[test]
    fn intervals_are_shown_rounded_outward() {
        assert_eq!(interval_text(0.0203305, 0.0425514), "[0.0203, 0.0426]");
        assert_eq!(interval_text(0.0, 1.0), "[0, 1]");
        assert_eq!(interval_text(0.25, 0.5), "[0.25, 0.5]");
        // Narrow intervals keep their digits, still outward.
        assert_eq!(
            interval_text(0.123456781, 0.123456789),
            "[0.12345678, 0.12345679]"
        );
        assert_eq!(interval_text(-0.00001, 0.2), "[-0.0001, 0.2]");
    }

    #[test]
    fn table_cells_cannot_forge_rows_or_overflow() {
        let note = format!("ok\nforged-row\u{1b}[2J{}", "x".repeat(70_000));
        let t = table(&["a", "b"], &[vec!["1".into(), note]]);
        assert_eq!(t.lines().count(), 2, "{t:.200}");
        assert!(t.contains("ok\\nforged-row\\u{1b}[2J"), "{t:.200}");
        assert!(!t.contains('\u{1b}'));
        assert!(t.chars().count() < 200, "long cells are cut");
        assert!(t.ends_with('…'));
    }

    #[test]
    fn table_pads_columns() {
        let t = table(&["a", "bb"], &[vec!["xxx".into(), "y".into()]]);
        assert_eq!(t, "a    bb\nxxx  y");
    }

    #[test]
    fn refusal_json_has_the_documented_keys() {
        let r = Refusal {
            reason: "budget-spent".into(),
            message: "spent".into(),
            budget: Some(Budget {
                remaining: 0.0,
                ..Default::default()
            }),
            receipt: None,
            budget_of: String::new(),
        };
        let v = refusal_json(&r);
        assert_eq!(v["refused"], json!(true));
        assert_eq!(v["reason"], json!("budget-spent"));
        assert_eq!(v["remaining"], json!(0.0));
        assert!(v["receipt"].is_null());
    }

    /// Under per-team shares a refusal's budget is the team's share, as an answer's is (a new
    /// user's refused submission read "spent 0.0083 of delta 0.0167" on a 0.05 holdout).
    #[test]
    fn a_refusal_under_per_team_shares_names_the_share() {
        let mut r = Refusal {
            reason: "tolerance".into(),
            message: "spent".into(),
            budget: Some(Budget {
                delta: 0.0167,
                spent: 0.0083,
                remaining: 0.0084,
                open: true,
                ..Default::default()
            }),
            receipt: None,
            budget_of: String::new(),
        };
        assert!(
            refusal_text(&r).contains("of delta 0.0167"),
            "{}",
            refusal_text(&r)
        );
        r.budget_of = "a".into();
        let text = refusal_text(&r);
        assert!(text.contains("spent 0.0083 of its share 0.0167"), "{text}");
        assert!(!text.contains("of delta"), "{text}");
    }
}
