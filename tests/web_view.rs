//! The read-only web view (`serve --web`) through the real daemon: every page, public and with
//! tokens, in HTML and JSON, fetched over HTTP; a real headless Chromium (Debian's `chromium`)
//! renders the status page (a screenshot whose chart pixels are checked) and dumps the DOM of
//! pages with hostile text.
//!
//! Without Chromium the browser checks print `skipped: install Debian's chromium` on stderr and
//! pass, unless `HOLDOUT_REQUIRE_BROWSER=1` (CI sets it), when they fail.

mod common;

use std::io::{Read, Write};
use std::path::Path;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::Daemon;
use serde_json::Value;

/// Rows per holdout: a prime, so exact error rates k/997 have long decimal forms that a
/// released value on a 0.01 grid cannot share.
const N: usize = 997;

/// The hostile texts.
const SCRIPT_NOTE: &str = "<script>alert(1)</script>";
const IMG_DESCRIPTION: &str = "\"><img src=x onerror=alert(2)>";
/// A note only organizers of the non-public holdout may read.
const VAULT_NOTE: &str = "vault-note-7731";
/// Team names (distinctive, so a search for them cannot hit other words).
const TEAM_A: &str = "kestrel";
const TEAM_B: &str = "osprey";

/// One holdout's invented rows: inspected bolts with a defect class and a gauge reading with
/// six decimals (distinctive strings, so a page that carried a label would be caught).
struct Rows {
    ids: Vec<String>,
    defects: Vec<&'static str>,
    gauges: Vec<String>,
}

impl Rows {
    /// `seed` shifts the classes, so no two holdouts share a labels digest.
    fn new(prefix: &str, seed: usize) -> Rows {
        let classes = ["ok", "ok", "ok", "dent", "crack"];
        Rows {
            ids: (0..N).map(|i| format!("{prefix}-{i:04}")).collect(),
            defects: (0..N)
                .map(|i| classes[(i * 7 + i / 5 + seed) % classes.len()])
                .collect(),
            gauges: (0..N)
                .map(|i| {
                    let frac = (i * 7919 + 13 + seed * 104_729) % 1_000_000;
                    format!("{}.{frac:06}", 5 + (i * 37) % 90)
                })
                .collect(),
        }
    }

    fn labels_csv(&self) -> String {
        let mut s = String::from("id,defect,gauge\n");
        for i in 0..N {
            s.push_str(&format!(
                "{},{},{}\n",
                self.ids[i], self.defects[i], self.gauges[i]
            ));
        }
        s
    }

    /// Class predictions, wrong on rows `i % every == from`.
    fn defects_wrong(&self, every: usize, from: usize) -> String {
        let mut s = String::from("id,prediction\n");
        for i in 0..N {
            let d = self.defects[i];
            let p = if i % every == from % every {
                if d == "ok" { "dent" } else { "ok" }
            } else {
                d
            };
            s.push_str(&format!("{},{p}\n", self.ids[i]));
        }
        s
    }

    /// Gauge predictions off by `offset` on every other row.
    fn gauges_off(&self, offset: f64) -> String {
        let mut s = String::from("id,prediction\n");
        for i in 0..N {
            let g: f64 = self.gauges[i].parse().unwrap();
            let p = if i % 2 == 0 { g + offset } else { g };
            s.push_str(&format!("{},{p}\n", self.ids[i]));
        }
        s
    }
}

/// A daemon with the web view and five holdouts, each with some activity.
struct World {
    d: Daemon,
    web: String,
    /// Tokens.
    kestrel: String,
    organizer: String,
    auditor: String,
    /// Every holdout's rows.
    rows: Vec<(&'static str, Rows)>,
}

fn create(d: &Daemon, name: &str, rows: &Rows, target: &str, extra: &[&str]) {
    let labels = d.write(&format!("{name}-labels.csv"), &rows.labels_csv());
    let mut args = vec![
        "create",
        name,
        "--labels",
        &labels,
        "--target",
        target,
        "--tolerance",
        "0.3",
    ];
    if target.contains(":error") {
        args.extend(["--classes", "crack,dent,ok"]);
    }
    args.extend_from_slice(extra);
    d.admin(&args).ok();
}

fn submit(d: &Daemon, token: &str, name: &str, file: &str, text: &str, note: &str, extra: &[&str]) {
    let path = d.write(file, text);
    let mut args = vec!["submit", name, "--predictions", &path, "--note", note];
    args.extend_from_slice(extra);
    d.run(token, &args).ok();
}

fn world() -> World {
    let d = Daemon::start_with(&["--web", "127.0.0.1:0"]);
    let web = d.web.clone().expect("the web view's address");
    let kestrel = d.add_user("ana", &["analyst"], Some(TEAM_A));
    let osprey = d.add_user("bo", &["analyst"], Some(TEAM_B));
    let organizer = d.add_user("olga", &["organizer"], None);
    let auditor = d.add_user("audrey", &["auditor"], None);
    let yard = Rows::new("yard", 0);
    let vault = Rows::new("vault", 1);
    let gauge = Rows::new("gauge", 2);
    let lad = Rows::new("lad", 3);
    let fin = Rows::new("fin", 4);

    // A public holdout with hostile text in its description and in a note.
    create(
        &d,
        "yard",
        &yard,
        "defect:defect:error",
        &[
            "--answers",
            "rounded:0.01",
            "--description",
            IMG_DESCRIPTION,
        ],
    );
    for (k, (who, every)) in [(&kestrel, 9), (&osprey, 6), (&kestrel, 11), (&osprey, 7)]
        .into_iter()
        .enumerate()
    {
        let note = if k == 0 { SCRIPT_NOTE } else { "plain note" };
        submit(
            &d,
            who,
            "yard",
            &format!("y{k}.csv"),
            &yard.defects_wrong(every, k),
            note,
            &[],
        );
    }
    // Shown to organizers only.
    create(
        &d,
        "vault",
        &vault,
        "defect:defect:error",
        &["--answers", "rounded:0.01", "--leaderboard", "organizers"],
    );
    submit(
        &d,
        &kestrel,
        "vault",
        "v1.csv",
        &vault.defects_wrong(8, 1),
        VAULT_NOTE,
        &[],
    );
    submit(
        &d,
        &osprey,
        "vault",
        "v2.csv",
        &vault.defects_wrong(5, 2),
        VAULT_NOTE,
        &[],
    );
    // Numeric labels (a gauge reading), so a leaked label would be a distinctive decimal.
    create(
        &d,
        "gauge",
        &gauge,
        "gauge:gauge:abs_error:100",
        &["--answers", "rounded:0.01"],
    );
    submit(
        &d,
        &kestrel,
        "gauge",
        "g1.csv",
        &gauge.gauges_off(3.217),
        "g",
        &[],
    );
    submit(
        &d,
        &osprey,
        "gauge",
        "g2.csv",
        &gauge.gauges_off(-7.5),
        "g",
        &[],
    );
    // A ladder.
    create(
        &d,
        "lad",
        &lad,
        "defect:defect:error",
        &["--answers", "ladder:0.01"],
    );
    submit(
        &d,
        &kestrel,
        "lad",
        "l1.csv",
        &lad.defects_wrong(4, 0),
        "l",
        &[],
    );
    submit(
        &d,
        &osprey,
        "lad",
        "l2.csv",
        &lad.defects_wrong(10, 3),
        "l",
        &[],
    );
    submit(
        &d,
        &kestrel,
        "lad",
        "l3.csv",
        &lad.defects_wrong(12, 1),
        "l",
        &[],
    );
    // A sealed round, closed by the organizer: a ranking with paired comparisons.
    create(
        &d,
        "fin",
        &fin,
        "defect:defect:error",
        &[
            "--answers",
            "sealed:0.01",
            "--closes-at",
            "2099-01-01T00:00:00Z",
        ],
    );
    submit(
        &d,
        &kestrel,
        "fin",
        "f1.csv",
        &fin.defects_wrong(9, 0),
        "f",
        &["--final"],
    );
    submit(
        &d,
        &osprey,
        "fin",
        "f2.csv",
        &fin.defects_wrong(3, 1),
        "f",
        &["--final"],
    );
    d.run(&organizer, &["close", "fin"]).ok();
    World {
        d,
        web,
        kestrel,
        organizer,
        auditor,
        rows: vec![
            ("yard", yard),
            ("vault", vault),
            ("gauge", gauge),
            ("lad", lad),
            ("fin", fin),
        ],
    }
}

/// An HTTP reply.
#[derive(Debug)]
struct Reply {
    status: u16,
    head: String,
    body: String,
}

impl Reply {
    fn header(&self, name: &str) -> Option<String> {
        self.head.lines().find_map(|l| {
            let (k, v) = l.split_once(':')?;
            k.trim()
                .eq_ignore_ascii_case(name)
                .then(|| v.trim().to_string())
        })
    }

    fn json(&self) -> Value {
        serde_json::from_str(&self.body).unwrap_or_else(|e| panic!("not JSON ({e}): {}", self.body))
    }
}

/// One HTTP/1.1 request on a fresh connection (`Connection: close`).
fn request(base: &str, method: &str, target: &str, headers: &[(&str, &str)], body: &str) -> Reply {
    let host = base.strip_prefix("http://").expect("an http:// base");
    let mut s = std::net::TcpStream::connect(host).expect("connect to the web view");
    s.set_read_timeout(Some(Duration::from_secs(30))).unwrap();
    let mut req = format!("{method} {target} HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n");
    for (k, v) in headers {
        req.push_str(&format!("{k}: {v}\r\n"));
    }
    if !body.is_empty() {
        req.push_str(&format!("Content-Length: {}\r\n", body.len()));
    }
    req.push_str("\r\n");
    req.push_str(body);
    s.write_all(req.as_bytes()).unwrap();
    let mut raw = Vec::new();
    let _ = s.read_to_end(&mut raw);
    let text = String::from_utf8_lossy(&raw).into_owned();
    let (head, body) = text.split_once("\r\n\r\n").unwrap_or((&text, ""));
    let status = head
        .split_whitespace()
        .nth(1)
        .and_then(|c| c.parse().ok())
        .unwrap_or_else(|| panic!("no status line in {text:?}"));
    Reply {
        status,
        head: head.to_string(),
        body: body.to_string(),
    }
}

fn basic(token: &str) -> String {
    use base64::Engine as _;
    format!(
        "Basic {}",
        base64::engine::general_purpose::STANDARD.encode(format!("anyone:{token}"))
    )
}

fn get(w: &World, target: &str, token: Option<&str>) -> Reply {
    let auth = token.map(basic);
    let headers: Vec<(&str, &str)> = auth
        .as_deref()
        .map(|a| vec![("Authorization", a)])
        .unwrap_or_default();
    request(&w.web, "GET", target, &headers, "")
}

/// Every exact score in an auditor's export of `name` (means of every `exact` loss).
fn exact_scores(w: &World, name: &str) -> Vec<f64> {
    fn walk(v: &Value, out: &mut Vec<f64>) {
        match v {
            Value::Object(m) => {
                if let Some(Value::Array(losses)) = m.get("exact") {
                    for l in losses {
                        let (sum, rows) = (l["sum"].as_f64(), l["rows"].as_f64());
                        if let (Some(sum), Some(rows)) = (sum, rows) {
                            out.push(sum / rows);
                        }
                    }
                }
                m.values().for_each(|v| walk(v, out));
            }
            Value::Array(a) => a.iter().for_each(|v| walk(v, out)),
            _ => {}
        }
    }
    let out = w.d.path(&format!("{name}.export.jsonl"));
    let out = out.display().to_string();
    w.d.run(&w.auditor, &["export", name, "--out", &out]).ok();
    let mut scores = Vec::new();
    for line in std::fs::read_to_string(&out).unwrap().lines().skip(1) {
        let entry: Value = serde_json::from_str(line).unwrap();
        let body: Value = serde_json::from_str(entry["body"].as_str().unwrap()).unwrap();
        walk(&body, &mut scores);
    }
    scores
}

/// Every page, for the public and for each token, as HTML, as `?format=json` and as
/// `Accept: application/json`.
fn every_page(w: &World) -> Vec<(String, Reply)> {
    let mut targets = vec!["/".to_string()];
    for (name, _) in &w.rows {
        for suffix in ["", "/leaderboard", "/ranking"] {
            targets.push(format!("/holdouts/{name}{suffix}"));
        }
    }
    let mut pages = Vec::new();
    for (who, token) in [
        ("public", None),
        ("analyst", Some(w.kestrel.as_str())),
        ("organizer", Some(w.organizer.as_str())),
    ] {
        for t in &targets {
            let html = get(w, t, token);
            assert_eq!(html.status, 200, "{who} {t}: {}", html.body);
            let json = get(w, &format!("{t}?format=json"), token);
            assert_eq!(json.status, 200, "{who} {t}: {}", json.body);
            let auth = token.map(|t| format!("Bearer {t}"));
            let mut headers = vec![("Accept", "application/json")];
            if let Some(a) = &auth {
                headers.push(("Authorization", a.as_str()));
            }
            let accepted = request(&w.web, "GET", t, &headers, "");
            assert_eq!(
                accepted.header("content-type").as_deref(),
                Some("application/json"),
                "{who} {t}"
            );
            assert_eq!(
                accepted.json(),
                json.json(),
                "{who} {t}: the two JSON forms differ"
            );
            pages.push((format!("{who} {t}"), html));
            pages.push((format!("{who} {t}?format=json"), json));
        }
    }
    pages
}

fn rows_units_null(board: &Value) -> bool {
    board["board"]["rows"]
        .as_array()
        .unwrap()
        .iter()
        .all(|r| r["units"].is_null())
}

#[test]
fn pages_show_what_each_caller_may_see_and_never_a_label_or_an_exact_score() {
    let w = world();
    let pages = every_page(&w);

    // No exact score, in its shortest decimal form or to six decimals, on any page. Scores
    // whose forms are short (0, 0.5) could match anything and are left out; enough remain.
    let mut forms = Vec::new();
    for (name, _) in &w.rows {
        for x in exact_scores(&w, name) {
            for f in [format!("{x}"), format!("{x:.6}")] {
                if f.len() >= 7 {
                    forms.push(f);
                }
            }
        }
    }
    assert!(
        forms.len() >= 20,
        "too few exact scores to check: {forms:?}"
    );
    // No label: no gauge reading (six decimals each), no row id.
    let mut labels = Vec::new();
    for (_, rows) in &w.rows {
        labels.extend(rows.gauges.iter().cloned());
        labels.extend(rows.ids.iter().cloned());
    }
    for (what, page) in &pages {
        for f in &forms {
            assert!(
                !page.body.contains(f.as_str()),
                "{what} shows the exact score {f}"
            );
        }
        for l in &labels {
            assert!(
                !page.body.contains(l.as_str()),
                "{what} shows the label or row {l}"
            );
        }
    }
    // The check can fail: the auditor's history does carry the exact scores' forms.
    let exact =
        w.d.run(&w.auditor, &["history", "yard", "--exact", "--json"])
            .ok()
            .stdout;
    assert!(
        forms.iter().any(|f| exact.contains(f.as_str())),
        "the exact forms searched for are not the ones the ledger holds"
    );

    let page = |what: &str| -> &Reply {
        &pages
            .iter()
            .find(|(w, _)| w == what)
            .unwrap_or_else(|| panic!("no page {what}"))
            .1
    };

    // The non-public holdout: the public sees its declaration, nothing of its activity.
    for what in [
        "public /holdouts/vault",
        "public /holdouts/vault?format=json",
        "public /holdouts/vault/leaderboard",
        "public /holdouts/vault/leaderboard?format=json",
        "public /holdouts/vault/ranking",
        "public /",
        "public /?format=json",
    ] {
        let body = &page(what).body;
        for hidden in [TEAM_A, TEAM_B, VAULT_NOTE] {
            assert!(!body.contains(hidden), "{what} shows {hidden}");
        }
    }
    let public = page("public /holdouts/vault?format=json").json();
    assert!(public["holdout"]["budget"].is_null(), "{public}");
    assert!(public["history"].is_null(), "{public}");
    assert_eq!(public["holdout"]["shown"]["history"], "nothing");
    assert!(!page("public /holdouts/vault").body.contains("<svg"));
    assert!(page("public /holdouts/vault").body.contains("organizers"));
    // ... and its guarantee.
    assert!(
        page("public /holdouts/vault")
            .body
            .contains("With probability at least 1 - 0.05")
    );
    // The organizer sees what the public does not.
    let org = page("organizer /holdouts/vault").body.clone();
    for shown in [TEAM_A, TEAM_B, VAULT_NOTE, "<svg"] {
        assert!(org.contains(shown), "the organizer's page lacks {shown}");
    }
    let org = page("organizer /holdouts/vault?format=json").json();
    assert_eq!(org["holdout"]["budget"]["answered"], 2, "{org}");
    assert_eq!(org["history"].as_array().map(Vec::len), Some(2), "{org}");
    // An analyst of the shared holdout sees its history (as `holdout history` shows it), but
    // only its own team's leaderboard row.
    let ana = page("analyst /holdouts/vault/leaderboard?format=json").json();
    let teams: Vec<&str> = ana["board"]["rows"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["team"].as_str().unwrap())
        .collect();
    assert_eq!(teams, [TEAM_A], "{ana}");
    let cli =
        w.d.run(&w.kestrel, &["history", "vault", "--json"])
            .ok()
            .json_lines();
    let web = page("analyst /holdouts/vault?format=json").json();
    assert_eq!(web["history"].as_array().unwrap().len(), cli.len());

    // A public holdout: the public sees its activity, chart included, without digests.
    let yard = page("public /holdouts/yard").body.clone();
    for shown in [TEAM_A, TEAM_B, "<svg", "plain note"] {
        assert!(yard.contains(shown), "the public yard page lacks {shown}");
    }
    let yard_json = page("public /holdouts/yard?format=json");
    assert!(!yard_json.body.contains("\"digest\""), "{}", yard_json.body);
    assert!(
        page("organizer /holdouts/yard?format=json")
            .body
            .contains("\"digest\"")
    );
    // Hostile text is escaped in the HTML.
    assert!(
        yard.contains("&lt;script&gt;alert(1)&lt;/script&gt;"),
        "{yard}"
    );
    assert!(
        yard.contains("&quot;&gt;&lt;img src=x onerror=alert(2)&gt;"),
        "{yard}"
    );
    for (what, p) in &pages {
        if !what.ends_with("format=json") {
            assert!(
                !p.body.contains("<script"),
                "{what} carries a script element"
            );
            assert!(!p.body.contains("<img"), "{what} carries an img element");
        }
    }

    // Every leaderboard page is the engine's own table, the one `holdout leaderboard` prints,
    // for each caller (best per team and ladder alike), so the two can never disagree.
    for (who, token) in [("analyst", &w.kestrel), ("organizer", &w.organizer)] {
        for name in ["yard", "vault", "gauge", "lad", "fin"] {
            let web = page(&format!("{who} /holdouts/{name}/leaderboard?format=json")).json();
            let cli = w.d.run(token, &["leaderboard", name, "--json"]).ok().json();
            assert_eq!(
                web["board"], cli,
                "{who} {name}: the web board differs from the CLI's"
            );
        }
    }
    // A regression target's rows carry its own units beside the [0, 1] figures: the web
    // board, the history (JSON and HTML) and the CLI's leaderboard.
    let gauge = page("public /holdouts/gauge/leaderboard?format=json").json();
    let rows = gauge["board"]["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 2, "{gauge}");
    for r in rows {
        let u = &r["units"];
        assert_eq!(u["measure"], "mean absolute error", "{r}");
        let (lo, hi) = (r["lower"].as_f64().unwrap(), r["upper"].as_f64().unwrap());
        let (ulo, uhi) = (u["lower"].as_f64().unwrap(), u["upper"].as_f64().unwrap());
        assert!(ulo <= lo * 100.0 && uhi >= hi * 100.0, "{r}");
        assert!((ulo - lo * 100.0).abs() < 1e-9 && (uhi - hi * 100.0).abs() < 1e-9);
    }
    assert!(
        page("public /holdouts/gauge/leaderboard")
            .body
            .contains("= mean absolute error"),
        "the HTML board shows the units"
    );
    let history = page("organizer /holdouts/gauge?format=json").json();
    assert!(
        history["history"]
            .as_array()
            .unwrap()
            .iter()
            .all(|e| e["answer"]["units"]["measure"] == "mean absolute error"),
        "{history}"
    );
    assert!(
        page("organizer /holdouts/gauge")
            .body
            .contains("= mean absolute error")
    );
    // ... and none on a classification target.
    assert!(rows_units_null(
        &page("public /holdouts/lad/leaderboard?format=json").json()
    ));

    // The ladder's leaderboard and the closed round's ranking with its comparisons.
    let board = page("public /holdouts/lad/leaderboard?format=json").json();
    let rows = board["board"]["rows"].as_array().unwrap();
    assert_eq!(rows.len(), 2, "{board}");
    assert!(
        page("public /holdouts/lad/leaderboard")
            .body
            .contains("new bests")
    );
    let ranking = page("public /holdouts/fin/ranking?format=json").json();
    assert_eq!(
        ranking["ranking"]["entries"].as_array().unwrap().len(),
        2,
        "{ranking}"
    );
    assert_eq!(
        ranking["ranking"]["comparisons"].as_array().unwrap().len(),
        1
    );
    let html = &page("public /holdouts/fin/ranking").body;
    assert!(html.contains("told apart"), "{html}");
    // Every holdout page states the guarantee with its assumptions.
    for (what, p) in &pages {
        if what.contains("/holdouts/") && !what.ends_with("format=json") {
            assert!(
                p.body.contains("Assumptions: rows drawn independently"),
                "{what} lacks the guarantee"
            );
        }
    }
}

#[test]
fn the_web_view_is_read_only_small_and_token_checked() {
    let d = Daemon::start_with(&["--web", "127.0.0.1:0"]);
    let web = d.web.clone().unwrap();
    let post = request(&web, "POST", "/", &[], "");
    assert_eq!(post.status, 405, "{post:?}");
    assert_eq!(post.header("allow").as_deref(), Some("GET, HEAD"));
    for method in ["PUT", "DELETE", "PATCH", "OPTIONS"] {
        assert_eq!(request(&web, method, "/holdouts/x", &[], "").status, 405);
    }
    let head = request(&web, "HEAD", "/", &[], "");
    assert_eq!(head.status, 200);
    assert!(head.body.is_empty());
    let body = request(&web, "GET", "/", &[], "hello");
    assert_eq!(body.status, 413, "{body:?}");
    let long = format!("/holdouts/{}", "a".repeat(3000));
    assert_eq!(request(&web, "GET", &long, &[], "").status, 414);
    // A head larger than the limit is refused by the HTTP layer.
    let big = "b".repeat(40 * 1024);
    let huge = request(&web, "GET", "/", &[("X-Filler", &big)], "");
    assert_eq!(huge.status, 431, "{}", huge.head);
    let unknown = request(
        &web,
        "GET",
        "/",
        &[("Authorization", "Bearer not-a-token")],
        "",
    );
    assert_eq!(unknown.status, 401);
    assert!(
        unknown
            .header("www-authenticate")
            .unwrap()
            .starts_with("Basic")
    );
    // The signed-in paths ask for a token (a Basic challenge, which browsers answer) ...
    let challenge = request(&web, "GET", "/in/", &[], "");
    assert_eq!(challenge.status, 401);
    assert!(
        challenge
            .header("www-authenticate")
            .unwrap()
            .starts_with("Basic realm=")
    );
    // ... and show the user's view once given one.
    let ok = request(
        &web,
        "GET",
        "/in/",
        &[("Authorization", &basic(&d.admin))],
        "",
    );
    assert_eq!(ok.status, 200);
    assert!(ok.body.contains("signed in as custodian"), "{}", ok.body);
    assert!(
        ok.body.contains("href=\"/in/\""),
        "links stay signed in: {}",
        ok.body
    );
    assert_eq!(request(&web, "GET", "/nowhere", &[], "").status, 404);
    let missing = request(&web, "GET", "/holdouts/none?format=json", &[], "");
    assert_eq!(missing.status, 404);
    assert!(missing.json()["error"].as_str().unwrap().contains("none"));
    // Every page keeps scripts, frames and caches out.
    let csp = ok.header("content-security-policy").unwrap();
    assert!(csp.contains("default-src 'none'"), "{csp}");
    assert_eq!(ok.header("x-frame-options").as_deref(), Some("DENY"));
    assert_eq!(ok.header("cache-control").as_deref(), Some("no-store"));
}

#[test]
fn a_silent_connection_to_the_web_view_is_closed_at_the_handshake_deadline() {
    let d = Daemon::start_with(&["--web", "127.0.0.1:0", "--handshake-timeout", "1"]);
    let host = d
        .web
        .as_deref()
        .unwrap()
        .strip_prefix("http://")
        .unwrap()
        .to_string();
    let mut silent = std::net::TcpStream::connect(&host).unwrap();
    silent
        .set_read_timeout(Some(Duration::from_secs(20)))
        .unwrap();
    let start = Instant::now();
    let mut buf = [0u8; 64];
    // The daemon closes it (a read of 0 bytes, or a reset), well before our 20 s.
    let n = silent.read(&mut buf).unwrap_or(0);
    assert_eq!(n, 0, "the daemon sent {n} bytes to a silent connection");
    let waited = start.elapsed();
    assert!(waited < Duration::from_secs(10), "closed after {waited:?}");
    // A speaking client is still served.
    let reply = request(d.web.as_deref().unwrap(), "GET", "/", &[], "");
    assert_eq!(reply.status, 200);
}

/// Writes ca.pem, server.pem and server.key into `dir` (as `tests/tls.rs` does).
fn make_certs(dir: &Path) {
    use rcgen::{BasicConstraints, CertificateParams, IsCa, Issuer, KeyPair};
    let ca_key = KeyPair::generate().unwrap();
    let mut ca_params = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca_params.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    let ca_cert = ca_params.self_signed(&ca_key).unwrap();
    let issuer = Issuer::new(ca_params, ca_key);
    let server_key = KeyPair::generate().unwrap();
    let server = CertificateParams::new(vec!["localhost".to_string(), "127.0.0.1".to_string()])
        .unwrap()
        .signed_by(&server_key, &issuer)
        .unwrap();
    std::fs::write(dir.join("ca.pem"), ca_cert.pem()).unwrap();
    std::fs::write(dir.join("server.pem"), server.pem()).unwrap();
    std::fs::write(dir.join("server.key"), server_key.serialize_pem()).unwrap();
}

/// GET `/` over TLS, trusting `ca`; the status line, or the TLS error.
fn https_get(host: &str, ca: &Path) -> Result<String, String> {
    use tokio::io::{AsyncReadExt as _, AsyncWriteExt as _};
    use tokio_rustls::rustls;
    use tokio_rustls::rustls::pki_types::{CertificateDer, ServerName, pem::PemObject as _};
    let mut roots = rustls::RootCertStore::empty();
    let pem = std::fs::read(ca).unwrap();
    for c in CertificateDer::pem_slice_iter(&pem) {
        roots.add(c.unwrap()).unwrap();
    }
    let provider = std::sync::Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()
        .unwrap()
        .with_root_certificates(roots)
        .with_no_client_auth();
    let connector = tokio_rustls::TlsConnector::from(std::sync::Arc::new(config));
    let runtime = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    runtime.block_on(async {
        let tcp = tokio::net::TcpStream::connect(host)
            .await
            .map_err(|e| e.to_string())?;
        let name = ServerName::try_from("localhost").unwrap();
        let mut tls = connector
            .connect(name, tcp)
            .await
            .map_err(|e| e.to_string())?;
        let req = format!("GET / HTTP/1.1\r\nHost: {host}\r\nConnection: close\r\n\r\n");
        tls.write_all(req.as_bytes())
            .await
            .map_err(|e| e.to_string())?;
        let mut out = Vec::new();
        let _ = tls.read_to_end(&mut out).await;
        let text = String::from_utf8_lossy(&out).into_owned();
        Ok(text.lines().next().unwrap_or("").to_string() + "\n" + &text)
    })
}

#[test]
fn the_web_view_speaks_tls_with_the_daemons_certificate() {
    let certs = tempfile::tempdir().unwrap();
    make_certs(certs.path());
    let p = |n: &str| certs.path().join(n).display().to_string();
    // A non-loopback --web is accepted with TLS.
    let d = Daemon::start_with(&[
        "--tls-cert",
        &p("server.pem"),
        "--tls-key",
        &p("server.key"),
        "--web",
        "0.0.0.0:0",
    ]);
    let web = d.web.clone().unwrap();
    let host = web
        .strip_prefix("https://")
        .expect("the web view says https");
    let port = host.rsplit_once(':').unwrap().1;
    let local = format!("127.0.0.1:{port}");
    let page = https_get(&local, &certs.path().join("ca.pem")).expect("an https page");
    assert!(page.starts_with("HTTP/1.1 200"), "{page}");
    assert!(page.contains("<h1>Holdouts</h1>"), "{page}");
    // Plain HTTP on the TLS port gets no page.
    let mut plain = std::net::TcpStream::connect(&local).unwrap();
    plain
        .set_read_timeout(Some(Duration::from_secs(20)))
        .unwrap();
    plain
        .write_all(b"GET / HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        .unwrap();
    let mut raw = Vec::new();
    let _ = plain.read_to_end(&mut raw);
    let raw = String::from_utf8_lossy(&raw);
    assert!(!raw.contains("Holdouts"), "a page went out in clear: {raw}");
}

#[test]
fn a_plaintext_web_view_on_a_network_address_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("h.db").display().to_string();
    let out = common::run(
        common::holdout(),
        &[
            "serve",
            "--db",
            &db,
            "--listen",
            "127.0.0.1:0",
            "--web",
            "0.0.0.0:0",
        ],
    );
    assert_ne!(out.code, 0, "{out:?}");
    assert!(out.stderr.contains("--web"), "{}", out.stderr);
    assert!(out.stderr.contains("loopback"), "{}", out.stderr);
}

// ---- the browser ----

/// Debian's Chromium, or `None` (after saying so) when it is missing and not required.
fn chromium() -> Option<&'static str> {
    const BIN: &str = "/usr/bin/chromium";
    if Path::new(BIN).exists() {
        return Some(BIN);
    }
    if std::env::var("HOLDOUT_REQUIRE_BROWSER").as_deref() == Ok("1") {
        panic!("{BIN} is missing and HOLDOUT_REQUIRE_BROWSER=1: apt-get install -y chromium");
    }
    eprintln!(
        "skipped: install Debian's chromium (apt-get install chromium) to run the browser checks"
    );
    None
}

/// Runs headless Chromium with a fresh profile; its stdout. A DOM dump that comes back empty
/// (seen once in a few dozen runs with the machine busy) is retried twice.
fn browse(bin: &str, args: &[&str]) -> String {
    for attempt in 1..=3 {
        let (out, err) = browse_once(bin, args);
        if !out.trim().is_empty() || !args.contains(&"--dump-dom") {
            return out;
        }
        eprintln!("chromium {args:?} printed nothing (attempt {attempt}); stderr:\n{err}");
    }
    String::new()
}

fn browse_once(bin: &str, args: &[&str]) -> (String, String) {
    let profile = tempfile::tempdir().unwrap();
    let mut child = Command::new(bin)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--hide-scrollbars",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start chromium");
    let mut stdout = child.stdout.take().unwrap();
    let mut stderr = child.stderr.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut s = String::new();
        let _ = stdout.read_to_string(&mut s);
        s
    });
    let err_reader = std::thread::spawn(move || {
        let mut s = String::new();
        let _ = stderr.read_to_string(&mut s);
        s
    });
    let deadline = Instant::now() + Duration::from_secs(90);
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if Instant::now() > deadline {
            let _ = child.kill();
            panic!("chromium {args:?} did not finish within 90 s");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    (reader.join().unwrap(), err_reader.join().unwrap())
}

/// Pixels within `tol` of `rgb` in each channel.
fn count(png: &resvg::tiny_skia::Pixmap, rgb: (u8, u8, u8), tol: u8) -> usize {
    count_where(png, |r, g, b| {
        r.abs_diff(rgb.0) <= tol && g.abs_diff(rgb.1) <= tol && b.abs_diff(rgb.2) <= tol
    })
}

fn count_where(png: &resvg::tiny_skia::Pixmap, f: impl Fn(u8, u8, u8) -> bool) -> usize {
    png.pixels()
        .iter()
        .filter(|p| f(p.red(), p.green(), p.blue()))
        .count()
}

/// Pure red blended with white (a one-pixel red line, smoothed): full red, equal green and
/// blue, not grey.
fn reddish(png: &resvg::tiny_skia::Pixmap) -> usize {
    count_where(png, |r, g, b| r >= 235 && g.abs_diff(b) <= 12 && g < 200)
}

fn screenshot(bin: &str, url: &str, file: &Path) -> resvg::tiny_skia::Pixmap {
    browse(
        bin,
        &[
            &format!("--screenshot={}", file.display()),
            "--window-size=1200,2400",
            url,
        ],
    );
    let bytes = std::fs::read(file).expect("chromium wrote the screenshot");
    resvg::tiny_skia::Pixmap::decode_png(&bytes).expect("a PNG")
}

#[test]
fn a_real_browser_draws_the_status_chart_and_escapes_hostile_text() {
    let Some(bin) = chromium() else { return };
    let w = world();
    let shots = w.d.path("shots");
    std::fs::create_dir_all(&shots).unwrap();

    // The status page's chart: the burn-down's blue series, the red tolerance line, and each
    // team's colour (plotters' Palette99, first two entries, as the report draws them).
    use plotters::style::{Color as _, Palette as _, Palette99};
    let team = |i: usize| {
        let c = Palette99::pick(i).to_rgba();
        (c.0, c.1, c.2)
    };
    let yard = screenshot(
        bin,
        &format!("{}/holdouts/yard", w.web),
        &shots.join("yard.png"),
    );
    // HOLDOUT_WEB_SHOTS=DIR keeps the screenshot, to look at.
    if let Ok(dir) = std::env::var("HOLDOUT_WEB_SHOTS") {
        let _ = std::fs::copy(
            shots.join("yard.png"),
            Path::new(&dir).join("web-status.png"),
        );
    }
    let (blue, red) = (count(&yard, (0, 0, 255), 40), reddish(&yard));
    let (a, b) = (count(&yard, team(0), 12), count(&yard, team(1), 12));
    assert!(blue > 300, "{blue} blue pixels: no burn-down series drawn");
    assert!(red > 300, "{red} red pixels: no tolerance lines drawn");
    assert!(a > 40 && b > 40, "team colours: {a} and {b} pixels");
    // The same check on a page without a chart (the public view of the non-public holdout)
    // finds nothing: it can fail.
    let bare = screenshot(
        bin,
        &format!("{}/holdouts/vault", w.web),
        &shots.join("vault.png"),
    );
    let (bare_blue, bare_red) = (count(&bare, (0, 0, 255), 40), reddish(&bare));
    assert!(
        bare_blue < 30 && bare_red < 30,
        "{bare_blue} blue, {bare_red} red without a chart"
    );

    // The rendered DOM: hostile text is text, not elements; the guarantee is there.
    let dom = browse(bin, &["--dump-dom", &format!("{}/holdouts/yard", w.web)]);
    assert!(
        dom.contains("&lt;script&gt;alert(1)&lt;/script&gt;"),
        "{dom}"
    );
    assert!(
        dom.contains("\"&gt;&lt;img src=x onerror=alert(2)&gt;"),
        "{dom}"
    );
    assert!(!dom.contains("<script") && !dom.contains("<img"), "{dom}");
    assert!(dom.contains("Assumptions: rows drawn independently"));
    assert!(dom.contains(TEAM_A) && dom.contains(TEAM_B));
    // The non-public holdout as the browser shows it to the public, then to its organizer
    // (HTTP Basic credentials in the URL: the token as the password).
    let public = browse(bin, &["--dump-dom", &format!("{}/holdouts/vault", w.web)]);
    assert!(public.contains("is not public"), "{public}");
    for hidden in [TEAM_A, TEAM_B, VAULT_NOTE] {
        assert!(!public.contains(hidden), "the public DOM shows {hidden}");
    }
    // The browser answers the signed-in path's challenge with the credentials.
    let host = w.web.strip_prefix("http://").unwrap();
    let signed = browse(
        bin,
        &[
            "--dump-dom",
            &format!("http://olga:{}@{host}/in/holdouts/vault", w.organizer),
        ],
    );
    assert!(signed.contains("signed in as olga"), "{signed}");
    assert!(
        signed.contains(VAULT_NOTE) && signed.contains(TEAM_B),
        "{signed}"
    );
}
