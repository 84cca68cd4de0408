//! The web view's routes: who is asking, what the engine lets them see, and which form (HTML or
//! JSON) they asked for.
//!
//! Every page's data comes from one call to the database thread through the engine's own
//! operations (`holdout_view`, `history` without exact scores, `leaderboard`, `ranking`), the
//! ones the gRPC services call, converted to the same `holdout.v1` messages; what is hidden is
//! decided there ([`Visibility::of`]), never here.

use axum::Router;
use axum::body::Body;
use axum::extract::{Path, State};
use axum::http::{HeaderMap, HeaderValue, Response, StatusCode, Uri, header};
use axum::routing::get;
use base64::Engine as _;
use serde_json::{Value, json};

use super::html::{self, Viewer};
use crate::auth::Caller;
use crate::cli::client::compete::{leaderboard_json, ranking_json};
use crate::cli::client::show::{Units, history_json, holdout_json};
use crate::engine::{Db, Engine, HoldoutPolicy, Scope, Visibility};
use crate::error::Error;
use crate::proto::v1::{HistoryEntry, HoldoutInfo, LeaderboardResponse, RankingResponse};
use crate::service::convert;
use crate::stats::rules::Rule;

/// The realm browsers show when asking for a token.
const REALM: &str = "Basic realm=\"holdout-ledger (user name: anything; password: your token)\", \
                     charset=\"UTF-8\"";

/// What a handler knows besides the request: the database thread, and whether it serves the
/// signed-in paths (`/in/...`: a token is required, and asked for with a Basic challenge, so a
/// browser sends it from then on).
#[derive(Clone)]
struct Site {
    db: Db,
    signed: bool,
}

/// The routes, every one GET (HEAD answered from it), behind the guard: each page at its public
/// path and again under `/in`.
pub(super) fn router(db: Db) -> Router {
    let routes = |prefix: &str, signed: bool| {
        let mut r = Router::new();
        let home = if prefix.is_empty() { "/" } else { prefix };
        r = r.route(home, get(list));
        if !prefix.is_empty() {
            r = r.route(&format!("{prefix}/"), get(list));
        }
        r.route(&format!("{prefix}/holdouts/{{name}}"), get(status))
            .route(
                &format!("{prefix}/holdouts/{{name}}/leaderboard"),
                get(board),
            )
            .route(&format!("{prefix}/holdouts/{{name}}/ranking"), get(ranking))
            .with_state(Site {
                db: db.clone(),
                signed,
            })
    };
    Router::new()
        .merge(routes("", false))
        .merge(routes("/in", true))
        .fallback(not_found)
        .layer(axum::middleware::from_fn(super::guard))
}

/// HTML for people, JSON for scripts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(super) enum Form {
    Html,
    Json,
}

/// `?format=json` (or `html`) wins; else `Accept: application/json` without `text/html`.
fn form(headers: &HeaderMap, query: Option<&str>) -> Form {
    for pair in query.unwrap_or("").split('&') {
        match pair {
            "format=json" => return Form::Json,
            "format=html" => return Form::Html,
            _ => {}
        }
    }
    let accept = headers
        .get(header::ACCEPT)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("");
    if accept.contains("application/json") && !accept.contains("text/html") {
        Form::Json
    } else {
        Form::Html
    }
}

/// A failed page: the status the error maps to and the message the command line would print.
pub(super) struct Failure {
    status: StatusCode,
    message: String,
}

impl From<Error> for Failure {
    fn from(e: Error) -> Failure {
        // The one mapping of errors to gRPC codes (storage details stay in the log).
        let status = tonic::Status::from(e);
        let code = match status.code() {
            tonic::Code::InvalidArgument => StatusCode::BAD_REQUEST,
            tonic::Code::NotFound => StatusCode::NOT_FOUND,
            tonic::Code::Unauthenticated => StatusCode::UNAUTHORIZED,
            tonic::Code::PermissionDenied => StatusCode::FORBIDDEN,
            tonic::Code::FailedPrecondition | tonic::Code::AlreadyExists => StatusCode::CONFLICT,
            _ => StatusCode::INTERNAL_SERVER_ERROR,
        };
        Failure {
            status: code,
            message: status.message().to_string(),
        }
    }
}

/// The token of a request: the password of HTTP Basic (the user name if the password is
/// empty), or a bearer token. `None` without an `Authorization` header.
fn token(headers: &HeaderMap) -> Result<Option<String>, Failure> {
    let Some(value) = headers.get(header::AUTHORIZATION) else {
        return Ok(None);
    };
    let unauthenticated = |m: &str| Failure {
        status: StatusCode::UNAUTHORIZED,
        message: m.to_string(),
    };
    let value = value
        .to_str()
        .map_err(|_| unauthenticated("the Authorization header is not text"))?;
    let (scheme, rest) = value.split_once(' ').unwrap_or((value, ""));
    let token = if scheme.eq_ignore_ascii_case("bearer") {
        rest.trim().to_string()
    } else if scheme.eq_ignore_ascii_case("basic") {
        let bytes = base64::engine::general_purpose::STANDARD
            .decode(rest.trim())
            .map_err(|_| unauthenticated("the Basic credentials are not base64"))?;
        let text = String::from_utf8(bytes)
            .map_err(|_| unauthenticated("the Basic credentials are not UTF-8"))?;
        let (user, password) = text.split_once(':').unwrap_or((&text, ""));
        if password.is_empty() { user } else { password }.to_string()
    } else {
        return Err(unauthenticated(
            "use HTTP Basic (any user name, the token as password) or `Bearer TOKEN`",
        ));
    };
    if token.is_empty() {
        return Err(unauthenticated("the token is empty"));
    }
    Ok(Some(token))
}

/// The caller: the token's user, or the public without one (refused on the signed-in paths).
async fn caller(site: &Site, headers: &HeaderMap) -> Result<Caller, Failure> {
    match token(headers)? {
        None if site.signed => Err(Failure {
            status: StatusCode::UNAUTHORIZED,
            message: "sign in: your token as the password (any user name)".into(),
        }),
        None => Ok(Caller::public()),
        Some(token) => Ok(site
            .db
            .call(move |engine| crate::auth::authenticate(engine.store().conn(), &token))
            .await?),
    }
}

/// The viewer of a page at `uri` on `site`.
fn viewer<'a>(site: &Site, uri: &Uri, caller: &'a Caller) -> Viewer<'a> {
    let base = if site.signed { "/in" } else { "" };
    let path = uri.path().strip_prefix(base).unwrap_or(uri.path());
    Viewer {
        caller,
        base,
        path: if path.is_empty() {
            "/".into()
        } else {
            path.into()
        },
    }
}

/// What each page hands to its renderer.
pub(super) struct Facts {
    /// The holdout as the caller may see it (no budget when it is hidden).
    pub(super) info: HoldoutInfo,
    /// What the caller may see of it.
    pub(super) visibility: Visibility,
    /// It answers on a ladder (it has a leaderboard).
    pub(super) ladder: bool,
    /// It is a sealed round (it has a ranking once closed).
    pub(super) sealed: bool,
}

fn facts(engine: &mut Engine, caller: &Caller, name: &str) -> crate::error::Result<Facts> {
    let view = engine.holdout_view(caller, name)?;
    Ok(facts_of(&view, caller))
}

fn facts_of(view: &crate::engine::HoldoutView, caller: &Caller) -> Facts {
    let visibility = Visibility::of(&view.policy, caller);
    let mut info = convert::holdout(view);
    if !visibility.budget {
        info.budget = None;
    }
    Facts {
        info,
        ladder: is_ladder(&view.policy),
        sealed: view.policy.sealed(),
        visibility,
    }
}

fn is_ladder(policy: &HoldoutPolicy) -> bool {
    matches!(policy.core.rule, Rule::Ladder(_))
}

/// The history the caller may see (none when it is hidden), without exact scores.
fn history(
    engine: &mut Engine,
    caller: &Caller,
    facts: &Facts,
) -> crate::error::Result<Option<Vec<HistoryEntry>>> {
    if facts.visibility.history == Scope::Nothing {
        return Ok(None);
    }
    let items = engine.history(caller, &facts.info.name, false)?;
    Ok(Some(convert::history(items, &facts.info.guarantee)))
}

/// Sends a page in the form asked for, or its failure.
fn respond(form: Form, v: &Viewer, page: Result<(String, Value), Failure>) -> Response<Body> {
    let caller = v.caller;
    let (status, body, json_form) = match page {
        Ok((html, mut value)) => {
            if caller.is_public() {
                strip_digests(&mut value);
            }
            match form {
                Form::Html => (StatusCode::OK, html, false),
                Form::Json => (StatusCode::OK, value.to_string(), true),
            }
        }
        Err(f) => match form {
            Form::Html => (f.status, html::failure(v, f.status, &f.message), false),
            Form::Json => (
                f.status,
                json!({"error": f.message, "status": f.status.as_u16()}).to_string(),
                true,
            ),
        },
    };
    let mut response = Response::new(Body::from(body));
    *response.status_mut() = status;
    let kind = if json_form {
        "application/json"
    } else {
        "text/html; charset=utf-8"
    };
    let headers = response.headers_mut();
    headers.insert(header::CONTENT_TYPE, HeaderValue::from_static(kind));
    headers.insert(
        header::VARY,
        HeaderValue::from_static("Accept, Authorization"),
    );
    if status == StatusCode::UNAUTHORIZED {
        headers.insert(header::WWW_AUTHENTICATE, HeaderValue::from_static(REALM));
    }
    response
}

/// Prediction digests are shown to users who may see the history; the public gets the page
/// without them (they say nothing about labels, but nothing asks for them either).
fn strip_digests(value: &mut Value) {
    match value {
        Value::Object(map) => {
            map.remove("digest");
            map.values_mut().for_each(strip_digests);
        }
        Value::Array(items) => items.iter_mut().for_each(strip_digests),
        _ => {}
    }
}

/// Resolves the caller, then fetches the page's data on the database thread and renders it.
async fn serve<T, F, R>(
    site: Site,
    uri: Uri,
    headers: HeaderMap,
    fetch: F,
    render: R,
) -> Response<Body>
where
    T: Send + 'static,
    F: FnOnce(&mut Engine, &Caller) -> crate::error::Result<T> + Send + 'static,
    R: FnOnce(&Viewer, T) -> (String, Value),
{
    let form = form(&headers, uri.query());
    let caller = match caller(&site, &headers).await {
        Ok(c) => c,
        Err(f) => {
            let public = Caller::public();
            return respond(form, &viewer(&site, &uri, &public), Err(f));
        }
    };
    let v = viewer(&site, &uri, &caller);
    let who = caller.clone();
    let fetched = site.db.call(move |engine| fetch(engine, &who)).await;
    let page = fetched.map(|data| render(&v, data)).map_err(Failure::from);
    respond(form, &v, page)
}

async fn list(State(site): State<Site>, uri: Uri, headers: HeaderMap) -> Response<Body> {
    serve(
        site,
        uri,
        headers,
        |engine, caller| {
            let views = engine.list_holdouts(caller, true)?;
            Ok(views
                .iter()
                .map(|v| facts_of(v, caller))
                .collect::<Vec<_>>())
        },
        |v, all: Vec<Facts>| {
            let json = json!({
                "viewer": viewer_json(v.caller),
                "holdouts": all.iter().map(facts_json).collect::<Vec<_>>(),
            });
            (html::list(v, &all), json)
        },
    )
    .await
}

async fn status(
    State(site): State<Site>,
    Path(name): Path<String>,
    uri: Uri,
    headers: HeaderMap,
) -> Response<Body> {
    serve(
        site,
        uri,
        headers,
        move |engine, caller| {
            let facts = facts(engine, caller, &name)?;
            let history = history(engine, caller, &facts)?;
            Ok((facts, history))
        },
        |v, (facts, history): (Facts, Option<Vec<HistoryEntry>>)| {
            let json = json!({
                "viewer": viewer_json(v.caller),
                "holdout": facts_json(&facts),
                "history": history.as_ref().map_or(Value::Null, |h| {
                    let units = Units::of(&facts.info.targets);
                    Value::Array(h.iter().map(|e| history_json(e, &units)).collect())
                }),
            });
            (html::status(v, &facts, history.as_deref()), json)
        },
    )
    .await
}

/// The holdout's leaderboard as the `Leaderboard` RPC returns it (`holdout leaderboard`): a
/// ladder's, or for other rules the engine's best-per-team table, so the page and the command
/// line can never disagree.
pub(super) enum Board {
    /// The engine's table, rows already limited to what the caller may see.
    Shown(LeaderboardResponse),
    /// The caller may see no team's rows.
    Hidden,
}

async fn board(
    State(site): State<Site>,
    Path(name): Path<String>,
    uri: Uri,
    headers: HeaderMap,
) -> Response<Body> {
    serve(
        site,
        uri,
        headers,
        move |engine, caller| {
            let facts = facts(engine, caller, &name)?;
            let board = if facts.visibility.leaderboard == Scope::Nothing {
                Board::Hidden
            } else {
                Board::Shown(convert::leaderboard(&engine.leaderboard(caller, &name)?))
            };
            Ok((facts, board))
        },
        |v, (facts, board): (Facts, Board)| {
            let units = Units::of(&facts.info.targets);
            let rows = match &board {
                Board::Shown(b) => leaderboard_json(b, &units),
                Board::Hidden => Value::Null,
            };
            let json = json!({
                "viewer": viewer_json(v.caller),
                "holdout": facts_json(&facts),
                "board": rows,
            });
            (html::board(v, &facts, &board), json)
        },
    )
    .await
}

async fn ranking(
    State(site): State<Site>,
    Path(name): Path<String>,
    uri: Uri,
    headers: HeaderMap,
) -> Response<Body> {
    serve(
        site,
        uri,
        headers,
        move |engine, caller| {
            let facts = facts(engine, caller, &name)?;
            let ranking = if facts.sealed && facts.visibility.ranking {
                // Before the close the engine refuses, revealing nothing: show why.
                match engine.ranking(caller, &name) {
                    Ok(r) => Ok(convert::ranking(&r)),
                    Err(Error::FailedPrecondition(why)) => Err(why),
                    Err(e) => return Err(e),
                }
            } else if facts.sealed {
                Err(
                    "the ranking of this round is shown to organizers only (its leaderboard \
                     setting)"
                        .to_string(),
                )
            } else {
                Err(format!(
                    "{} is not a sealed round; rankings are for sealed rounds",
                    facts.info.name
                ))
            };
            Ok((facts, ranking))
        },
        |v, (facts, ranking): (Facts, Result<RankingResponse, String>)| {
            let json = json!({
                "viewer": viewer_json(v.caller),
                "holdout": facts_json(&facts),
                "ranking": ranking.as_ref().map_or(Value::Null, |r| {
                    ranking_json(r, &Units::of(&facts.info.targets))
                }),
                "not_shown": ranking.as_ref().err(),
            });
            (html::ranking(v, &facts, &ranking), json)
        },
    )
    .await
}

async fn not_found(uri: Uri, headers: HeaderMap) -> Response<Body> {
    let public = Caller::public();
    let v = Viewer {
        caller: &public,
        base: "",
        path: "/".into(),
    };
    respond(
        form(&headers, uri.query()),
        &v,
        Err(Failure {
            status: StatusCode::NOT_FOUND,
            message: "no such page: see / for the holdouts".into(),
        }),
    )
}

fn viewer_json(caller: &Caller) -> Value {
    if caller.is_public() {
        json!({"public": true})
    } else {
        json!({
            "public": false,
            "user": caller.name,
            "roles": crate::auth::role_list(&caller.roles),
            "team": caller.team,
        })
    }
}

fn scope_json(s: &Scope) -> Value {
    match s {
        Scope::Every => json!("every team"),
        Scope::Team(t) => json!(format!("team {t}")),
        Scope::Nothing => json!("nothing"),
    }
}

fn facts_json(f: &Facts) -> Value {
    let mut v = holdout_json(&f.info);
    v["shown"] = json!({
        "history": scope_json(&f.visibility.history),
        "leaderboard": scope_json(&f.visibility.leaderboard),
        "ranking": f.visibility.ranking,
        "budget": f.visibility.budget,
    });
    v["ladder"] = json!(f.ladder);
    v["sealed_round"] = json!(f.sealed);
    v
}

#[cfg(test)]
mod tests {
    use super::*;

    fn headers(pairs: &[(header::HeaderName, &str)]) -> HeaderMap {
        let mut h = HeaderMap::new();
        for (k, v) in pairs {
            h.insert(k.clone(), HeaderValue::from_str(v).unwrap());
        }
        h
    }

    #[test]
    fn json_is_asked_for_by_query_or_accept() {
        let none = HeaderMap::new();
        assert_eq!(form(&none, None), Form::Html);
        assert_eq!(form(&none, Some("format=json")), Form::Json);
        assert_eq!(form(&none, Some("a=1&format=json")), Form::Json);
        let json_accept = headers(&[(header::ACCEPT, "application/json")]);
        assert_eq!(form(&json_accept, None), Form::Json);
        assert_eq!(form(&json_accept, Some("format=html")), Form::Html);
        // What browsers send.
        let browser = headers(&[(
            header::ACCEPT,
            "text/html,application/xhtml+xml,application/xml;q=0.9,*/*;q=0.8",
        )]);
        assert_eq!(form(&browser, None), Form::Html);
    }

    #[test]
    fn tokens_come_from_basic_passwords_or_bearer() {
        // RFC 7617's encoding of "anyone:tok-123".
        let basic = base64::engine::general_purpose::STANDARD.encode("anyone:tok-123");
        let h = headers(&[(header::AUTHORIZATION, &format!("Basic {basic}"))]);
        assert_eq!(token(&h).ok().flatten().as_deref(), Some("tok-123"));
        let only_user = base64::engine::general_purpose::STANDARD.encode("tok-9:");
        let h = headers(&[(header::AUTHORIZATION, &format!("Basic {only_user}"))]);
        assert_eq!(token(&h).ok().flatten().as_deref(), Some("tok-9"));
        let h = headers(&[(header::AUTHORIZATION, "Bearer tok-456")]);
        assert_eq!(token(&h).ok().flatten().as_deref(), Some("tok-456"));
        assert_eq!(token(&HeaderMap::new()).ok().flatten(), None);
        let h = headers(&[(header::AUTHORIZATION, "Digest x")]);
        assert_eq!(
            token(&h).err().map(|f| f.status),
            Some(StatusCode::UNAUTHORIZED)
        );
        let h = headers(&[(header::AUTHORIZATION, "Basic !!!")]);
        assert_eq!(
            token(&h).err().map(|f| f.status),
            Some(StatusCode::UNAUTHORIZED)
        );
    }

    #[test]
    fn digests_are_stripped_at_every_depth() {
        let mut v = json!({"digest": "d", "a": [{"digest": "e", "k": 1}], "b": {"digest": 2}});
        strip_digests(&mut v);
        assert_eq!(v, json!({"a": [{"k": 1}], "b": {}}));
    }
}
