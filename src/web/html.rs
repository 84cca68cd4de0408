//! The web view's HTML: one small stylesheet, no script. Every text that comes from a user
//! (holdout names and descriptions, team and user names, notes, messages) goes through
//! [`esc`]; numbers are formatted as the command line formats them.

use std::fmt::Write as _;

use axum::http::StatusCode;

use super::pages::{Board, Facts};
use crate::auth::Caller;
use crate::cli::client::show::{Units, history_cells, interval_text, num, queries_left_text};
use crate::proto::v1::{HistoryEntry, RankingResponse};
use crate::report::{self, ReportData};

/// Who is looking, and where: links stay under the same prefix (`""` for the public paths,
/// `/in` for the signed-in ones).
pub(super) struct Viewer<'a> {
    /// The caller.
    pub(super) caller: &'a Caller,
    /// `""` or `/in`.
    pub(super) base: &'static str,
    /// The page's path below the prefix (for the link to the same page signed in or not).
    pub(super) path: String,
}

/// Escapes user text for HTML text and attribute values.
fn esc(text: &str) -> String {
    report::escape_html(text)
}

/// A path segment: a holdout name percent-encoded (names are restricted to letters, digits,
/// `-`, `_` and `.`, but the page must not rely on it).
fn seg(name: &str) -> String {
    let mut out = String::new();
    for b in name.bytes() {
        if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'_' | b'.') {
            out.push(b as char);
        } else {
            let _ = write!(out, "%{b:02X}");
        }
    }
    out
}

const STYLE: &str = "\
body{margin:0;font:15px/1.5 'DejaVu Sans',system-ui,sans-serif;color:#23272e;background:#f6f4ef}\
header{background:#28352f;color:#f3efe4;padding:.6em 1.4em;display:flex;gap:1em;\
align-items:baseline;flex-wrap:wrap}\
header a{color:#f3efe4;font-weight:bold;text-decoration:none}\
header .who{margin-left:auto;font-size:.9em}header .who a{font-weight:normal;text-decoration:underline}\
main{max-width:1080px;margin:0 auto;padding:1em 1.4em 3em}\
h1{font-size:1.6em;margin:.4em 0 .2em}h2{font-size:1.15em;margin:1.6em 0 .4em;color:#28352f}\
a{color:#7a3e12}\
table{border-collapse:collapse;width:100%;background:#fffdf8;margin:.4em 0}\
th,td{border:1px solid #d9d3c4;padding:.3em .55em;text-align:left;vertical-align:top}\
th{background:#ebe5d6;font-weight:600}td.n{text-align:right;font-variant-numeric:tabular-nums}\
.tag{display:inline-block;padding:0 .5em;border-radius:.6em;font-size:.8em;background:#d7e4d0;\
color:#28352f}.tag.closed{background:#e6d3cf;color:#5a2418}\
dl{display:grid;grid-template-columns:max-content 1fr;gap:.15em 1.2em;margin:.4em 0}\
dt{color:#5b5f57}dd{margin:0}\
.note{background:#fff6df;border-left:4px solid #c99a2e;padding:.5em .8em}\
.guarantee{background:#fffdf8;border:1px solid #d9d3c4;padding:.6em 1em;font-size:.92em}\
.guarantee p{margin:.4em 0}.chart svg{max-width:100%;height:auto;background:#fff}\
nav.sub{margin:.6em 0}nav.sub a{margin-right:1.2em}";

/// The frame of every page.
fn layout(v: &Viewer, title: &str, body: &str) -> String {
    let caller = v.caller;
    // The path is one of this view's routes (a name percent-encoded by `seg`); escaped anyway.
    let here = esc(&v.path);
    let who = if caller.is_public() {
        format!("public view &middot; <a href=\"/in{here}\">sign in with a token</a>")
    } else {
        format!(
            "signed in as {} ({}, team {}) &middot; <a href=\"{here}\">public view</a>",
            esc(&caller.name),
            esc(&crate::auth::role_list(&caller.roles)),
            esc(&caller.team)
        )
    };
    let base = v.base;
    format!(
        "<!doctype html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n\
         <title>{title}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<header><a href=\"{base}/\">\
         holdout-ledger</a><span>read-only view</span><span class=\"who\">{who}</span></header>\n\
         <main>\n{body}</main>\n</body>\n</html>\n",
        title = esc(title),
    )
}

/// The guarantee sentence with its assumptions, as the holdout states it.
fn guarantee(text: &str) -> String {
    let mut s = String::from("<section class=\"guarantee\"><h2>Guarantee</h2>\n");
    for line in text.lines().filter(|l| !l.trim().is_empty()) {
        let _ = writeln!(s, "<p>{}</p>", esc(line));
    }
    s.push_str("</section>\n");
    s
}

fn open_tag(open: bool) -> &'static str {
    if open {
        "<span class=\"tag\">open</span>"
    } else {
        "<span class=\"tag closed\">closed</span>"
    }
}

/// Why some of a holdout is not shown to this caller.
fn hidden_note(v: &Viewer) -> String {
    let how = if v.caller.is_public() {
        format!(
            " <a href=\"/in{}\">Sign in</a> with an organizer's token to see it.",
            esc(&v.path)
        )
    } else {
        String::new()
    };
    format!(
        "<p class=\"note\">This holdout's activity (answers, budget, leaderboard) is not public: \
         its leaderboard setting shows it to organizers and auditors only.{how}</p>\n"
    )
}

/// The holdout list.
pub(super) fn list(v: &Viewer, all: &[Facts]) -> String {
    let mut b = String::from("<h1>Holdouts</h1>\n");
    if all.is_empty() {
        b.push_str("<p>No holdouts yet.</p>\n");
    } else {
        b.push_str(
            "<table><thead><tr><th>holdout</th><th>about</th><th class=\"n\">rows</th>\
             <th>answers</th><th class=\"n\">delta</th><th class=\"n\">tolerance</th>\
             <th class=\"n\">answered</th><th class=\"n\">refused</th><th>state</th></tr>\
             </thead><tbody>\n",
        );
        for f in all {
            let p = f.info.policy.clone().unwrap_or_default();
            let (answered, refused) = f
                .info
                .budget
                .as_ref()
                .map_or(("&ndash;".to_string(), "&ndash;".to_string()), |b| {
                    (b.answered.to_string(), b.refused.to_string())
                });
            let _ = writeln!(
                b,
                "<tr><td><a href=\"{base}/holdouts/{seg}\">{name}</a></td><td>{about}</td>\
                 <td class=\"n\">{rows}</td><td>{rule}</td><td class=\"n\">{delta}</td>\
                 <td class=\"n\">&plusmn;{tol}</td><td class=\"n\">{answered}</td>\
                 <td class=\"n\">{refused}</td><td>{open}</td></tr>",
                base = v.base,
                seg = seg(&f.info.name),
                name = esc(&f.info.name),
                about = esc(&f.info.description),
                rows = f.info.rows,
                rule = esc(&p.answers),
                delta = num(p.delta),
                tol = num(p.tolerance),
                open = open_tag(f.info.open),
            );
        }
        b.push_str("</tbody></table>\n");
        b.push_str(
            "<p>A dash: this holdout's activity is shown to organizers only. Each holdout \
             states its own guarantee:</p>\n",
        );
        for f in all {
            let _ = writeln!(
                b,
                "<details><summary>{}</summary>{}</details>",
                esc(&f.info.name),
                guarantee(&f.info.guarantee)
            );
        }
    }
    layout(v, "Holdouts", &b)
}

/// Links to a holdout's pages.
fn subnav(v: &Viewer, f: &Facts) -> String {
    let s = format!("{}/holdouts/{}", v.base, seg(&f.info.name));
    let mut out = format!("<nav class=\"sub\"><a href=\"{s}\">status</a>");
    let _ = write!(
        out,
        "<a href=\"{s}/leaderboard\">{}</a>",
        if f.ladder {
            "leaderboard"
        } else {
            "best per team"
        }
    );
    if f.sealed {
        let _ = write!(out, "<a href=\"{s}/ranking\">ranking</a>");
    }
    let _ = writeln!(out, "<a href=\"{s}?format=json\">JSON</a></nav>");
    out
}

fn heading(v: &Viewer, f: &Facts, what: &str) -> String {
    let mut s = format!(
        "<h1>{}{} {}</h1>\n",
        esc(&f.info.name),
        what,
        open_tag(f.info.open)
    );
    if !f.info.description.is_empty() {
        let _ = writeln!(s, "<p>{}</p>", esc(&f.info.description));
    }
    s.push_str(&subnav(v, f));
    s
}

/// A holdout's status: facts, budget, the burn-down chart, the history.
pub(super) fn status(v: &Viewer, f: &Facts, history: Option<&[HistoryEntry]>) -> String {
    let mut b = heading(v, f, "");
    let p = f.info.policy.clone().unwrap_or_default();
    b.push_str("<dl>");
    let mut fact = |k: &str, v: String| {
        let _ = write!(b, "<dt>{k}</dt><dd>{v}</dd>");
    };
    fact("rows", f.info.rows.to_string());
    fact("created", esc(&f.info.created_at));
    fact("answers", esc(&p.answers));
    fact("schedule", esc(&p.schedule));
    fact("delta", num(p.delta));
    fact("tolerance", format!("&plusmn;{}", num(p.tolerance)));
    fact("sharing", esc(&p.sharing));
    if !p.closes_at.is_empty() {
        fact("closes at", esc(&p.closes_at));
    }
    for t in &f.info.targets {
        fact(
            "target",
            format!("{} ({}, {})", esc(&t.name), esc(&t.metric), esc(&t.method)),
        );
    }
    b.push_str("</dl>\n");
    match &f.info.budget {
        Some(bu) => {
            b.push_str("<h2>Budget</h2>\n<dl>");
            let mut fact = |k: &str, v: String| {
                let _ = write!(b, "<dt>{k}</dt><dd>{v}</dd>");
            };
            fact(
                "spent",
                format!("{} of delta {}", num(bu.spent), num(bu.delta)),
            );
            fact("remaining", num(bu.remaining));
            fact(
                "transcript",
                format!("{} nats released", num(bu.transcript_nats)),
            );
            fact("next half-width", num(bu.next_half_width));
            fact("queries left", queries_left_text(bu.queries_left));
            fact("answered", bu.answered.to_string());
            fact("refused", bu.refused.to_string());
            b.push_str("</dl>\n");
        }
        None => b.push_str(&hidden_note(v)),
    }
    if let Some(history) = history {
        let data = ReportData::from_history(&f.info, history);
        b.push_str("<h2>Burn-down</h2>\n");
        match report::svg(&data) {
            Ok(svg) => {
                let svg = svg
                    .strip_prefix("<?xml version=\"1.0\" encoding=\"UTF-8\"?>")
                    .unwrap_or(&svg)
                    .trim_start();
                let _ = writeln!(b, "<div class=\"chart\">{svg}</div>");
            }
            Err(e) => {
                let _ = writeln!(b, "<p class=\"note\">{}</p>", esc(&e.to_string()));
            }
        }
        b.push_str(&history_table(history, &Units::of(&f.info.targets)));
    }
    b.push_str(&guarantee(&f.info.guarantee));
    layout(v, &f.info.name, &b)
}

/// The released history, newest first (at most 500 rows).
fn history_table(history: &[HistoryEntry], units: &Units) -> String {
    const MAX_ROWS: usize = 500;
    let mut s = format!(
        "<h2>History</h2>\n<p>{} entries{}.</p>\n<table><thead><tr><th class=\"n\">#</th>\
         <th>at</th><th>team</th><th class=\"n\">query</th><th>released</th><th>interval</th>\
         <th>note</th></tr></thead><tbody>\n",
        history.len(),
        if history.len() > MAX_ROWS {
            format!(", the latest {MAX_ROWS} shown")
        } else {
            String::new()
        }
    );
    for e in history.iter().rev().take(MAX_ROWS) {
        let (query, what, interval) = history_cells(e, &e.kind, units);
        let _ = writeln!(
            s,
            "<tr><td class=\"n\">{}</td><td>{}</td><td>{}</td><td class=\"n\">{}</td><td>{}</td>\
             <td>{}</td><td>{}</td></tr>",
            e.entry,
            esc(&e.at),
            esc(&e.team),
            query,
            esc(&what),
            esc(&interval),
            esc(&e.note)
        );
    }
    s.push_str("</tbody></table>\n");
    s
}

/// An interval, followed for a regression target by the same in its own units.
fn interval_in(units: &Units, target: &str, score: Option<f64>, lower: f64, upper: f64) -> String {
    let shown = interval_text(lower, upper);
    match units.text(target, score, lower, upper) {
        Some(u) => format!("{shown} = {u}"),
        None => shown,
    }
}

/// The holdout's leaderboard, the engine's own table (`holdout leaderboard`): the ladder's, or
/// each team's best released answer per target under the other rules.
pub(super) fn board(v: &Viewer, f: &Facts, board: &Board) -> String {
    let title = if f.ladder {
        ": leaderboard"
    } else {
        ": best per team"
    };
    let units = Units::of(&f.info.targets);
    let mut b = heading(v, f, title);
    match board {
        Board::Hidden => b.push_str(&hidden_note(v)),
        Board::Shown(l) => {
            if l.own_team_only {
                b.push_str(
                    "<p class=\"note\">Only your team's row: this leaderboard is shown in full \
                     to organizers.</p>\n",
                );
            }
            if l.kind == "best-per-team" {
                b.push_str(
                    "<table><thead><tr><th>target</th><th class=\"n\">rank</th><th>team</th>\
                     <th class=\"n\">best answer</th><th class=\"n\">score</th>\
                     <th>interval for its true error</th><th class=\"n\">answered</th></tr>\
                     </thead><tbody>\n",
                );
                for r in &l.rows {
                    let iv = r.interval.unwrap_or_default();
                    let _ = writeln!(
                        b,
                        "<tr><td>{}</td><td class=\"n\">{}</td><td>{}</td>\
                         <td class=\"n\">query {}</td><td class=\"n\">{}</td><td>{}</td>\
                         <td class=\"n\">{}</td></tr>",
                        esc(&r.target),
                        r.rank,
                        esc(&r.team),
                        r.query,
                        r.best.map_or("&ndash;".to_string(), num),
                        esc(&interval_in(&units, &r.target, r.best, iv.lower, iv.upper)),
                        r.submissions
                    );
                }
            } else {
                let _ = writeln!(b, "<p>Target {}.</p>", esc(&l.target));
                b.push_str(
                    "<table><thead><tr><th class=\"n\">rank</th><th>team</th><th class=\"n\">\
                     best</th><th>best true error among its submissions</th>\
                     <th class=\"n\">answered</th><th class=\"n\">new bests</th></tr></thead>\
                     <tbody>\n",
                );
                for r in &l.rows {
                    let iv = r.interval.unwrap_or_default();
                    let _ = writeln!(
                        b,
                        "<tr><td class=\"n\">{}</td><td>{}</td><td class=\"n\">{}</td>\
                         <td>{}</td><td class=\"n\">{}</td><td class=\"n\">{}</td></tr>",
                        if r.rank == 0 {
                            "&ndash;".to_string()
                        } else {
                            r.rank.to_string()
                        },
                        esc(&r.team),
                        r.best.map_or("&ndash;".to_string(), num),
                        esc(&interval_in(&units, &r.target, r.best, iv.lower, iv.upper)),
                        r.submissions,
                        r.improvements
                    );
                }
            }
            b.push_str("</tbody></table>\n");
            let _ = writeln!(b, "<p>{}</p>", esc(&l.statement));
        }
    }
    b.push_str(&guarantee(&f.info.guarantee));
    layout(v, &f.info.name, &b)
}

/// A closed round's ranking with the paired comparison of each entry with the next.
pub(super) fn ranking(v: &Viewer, f: &Facts, ranking: &Result<RankingResponse, String>) -> String {
    let units = Units::of(&f.info.targets);
    let mut b = heading(v, f, ": ranking");
    match ranking {
        Err(why) => {
            let _ = writeln!(b, "<p class=\"note\">{}</p>", esc(why));
        }
        Ok(r) => {
            let _ = writeln!(
                b,
                "<p>Closed {} ({}).</p>",
                esc(&r.closed_at),
                esc(&r.trigger)
            );
            b.push_str(
                "<table><thead><tr><th class=\"n\">rank</th><th>team</th><th class=\"n\">query\
                 </th><th class=\"n\">score</th><th>interval</th><th>minus the next rank</th>\
                 </tr></thead><tbody>\n",
            );
            for e in &r.entries {
                let iv = e.interval.unwrap_or_default();
                let vs =
                    r.comparisons
                        .iter()
                        .find(|c| c.ahead == e.ticket)
                        .map_or(String::new(), |c| {
                            let d = c.difference.unwrap_or_default();
                            format!(
                                "{} {}",
                                esc(&interval_in(&units, &c.target, None, d.lower, d.upper)),
                                if c.distinguishable {
                                    "told apart"
                                } else {
                                    "not told apart"
                                }
                            )
                        });
                let rank = if e.target.is_empty() {
                    e.rank.to_string()
                } else {
                    format!("{} {}", esc(&e.target), e.rank)
                };
                let _ = writeln!(
                    b,
                    "<tr><td class=\"n\">{rank}</td><td>{}</td><td class=\"n\">{}</td>\
                     <td class=\"n\">{}</td><td>{}</td><td>{}</td></tr>",
                    esc(&e.team),
                    e.query,
                    e.score.map_or("&ndash;".to_string(), num),
                    esc(&interval_in(&units, &e.target, e.score, iv.lower, iv.upper)),
                    vs
                );
            }
            b.push_str("</tbody></table>\n");
            let _ = writeln!(b, "<p>{}</p>", esc(&r.statement));
        }
    }
    b.push_str(&guarantee(&f.info.guarantee));
    layout(v, &f.info.name, &b)
}

/// An error page: the status and the message the command line would print.
pub(super) fn failure(v: &Viewer, status: StatusCode, message: &str) -> String {
    let mut b = format!(
        "<h1>{} {}</h1>\n<p class=\"note\">{}</p>\n",
        status.as_u16(),
        esc(status.canonical_reason().unwrap_or("")),
        esc(message)
    );
    if status == StatusCode::UNAUTHORIZED {
        b.push_str(
            "<p>Give your token as the password (any user name), or send \
             <code>Authorization: Bearer TOKEN</code>.</p>\n",
        );
    }
    let _ = writeln!(b, "<p><a href=\"{}/\">All holdouts</a></p>", v.base);
    layout(v, &format!("{}", status.as_u16()), &b)
}
