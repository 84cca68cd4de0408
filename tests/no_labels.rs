//! No call, for any role, ever returns labels: every read path of every service is called as
//! every role, and no response contains any of the (distinctive) sealed label values.

use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
use holdout_ledger::proto::v1::{
    self as pb, AddUserRequest, CreateHoldoutChunk, ExportRequest, GetDeclarationRequest,
    GetHoldoutRequest, HistoryRequest, HoldoutSpec, LabelColumn, LabelRows, ListHoldoutsRequest,
    ListUsersRequest, StatusRequest, SubmitChunk, SubmitHeader, WhoAmIRequest,
    create_holdout_chunk, ledger_client::LedgerClient, submit_chunk,
};
use tokio_stream::StreamExt;

const N: usize = 300;

/// Distinctive label values: no response may contain any of them.
fn label(i: usize) -> String {
    format!("{:.4}", 7000.0 + 13.0 * i as f64 + 0.1234)
}

async fn open(url: &str, token: &str) -> Conn {
    Conn::open(&ServerArgs {
        server: url.into(),
        token: Some(token.into()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn no_read_path_returns_labels() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("h.db");
    let token_file = dir.path().join("t");
    assert!(
        Command::new(env!("CARGO_BIN_EXE_holdout"))
            .args(["init", "--db"])
            .arg(&db)
            .arg("--token-out")
            .arg(&token_file)
            .env_clear()
            .stderr(Stdio::null())
            .status()
            .unwrap()
            .success()
    );
    let admin = std::fs::read_to_string(&token_file)
        .unwrap()
        .trim()
        .to_string();
    let mut child = Command::new(env!("CARGO_BIN_EXE_holdout"))
        .args(["serve", "--listen", "127.0.0.1:0", "--log", "warn", "--db"])
        .arg(&db)
        .env_clear()
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut line = String::new();
    BufReader::new(child.stdout.take().unwrap())
        .read_line(&mut line)
        .unwrap();
    let url = format!("http://{}", line.trim().trim_start_matches("listening on "));

    let root = open(&url, &admin).await;
    let ids: Vec<String> = (0..N).map(|i| format!("u{i}")).collect();
    let labels: Vec<String> = (0..N).map(label).collect();
    root.holdouts()
        .create_holdout(tokio_stream::iter(vec![
            CreateHoldoutChunk {
                part: Some(create_holdout_chunk::Part::Spec(HoldoutSpec {
                    name: "sealed".into(),
                    policy: Some(pb::Policy {
                        delta: 0.05,
                        answers: "rounded:0.01".into(),
                        tolerance: 0.5,
                        ..Default::default()
                    }),
                    targets: vec![pb::Target {
                        name: "amount".into(),
                        column: "amount".into(),
                        metric: "abs_error:100".into(),
                        ..Default::default()
                    }],
                    description: String::new(),
                    ..Default::default()
                })),
            },
            CreateHoldoutChunk {
                part: Some(create_holdout_chunk::Part::Rows(LabelRows {
                    ids: ids.clone(),
                    columns: vec![LabelColumn {
                        values: labels.clone(),
                    }],
                })),
            },
        ]))
        .await
        .expect("create");
    let mut tokens = vec![("custodian+organizer", admin.clone())];
    for role in ["analyst", "auditor", "organizer", "custodian"] {
        let t = root
            .users()
            .add_user(AddUserRequest {
                name: format!("{role}-user"),
                roles: vec![role.into()],
                team: String::new(),
            })
            .await
            .unwrap()
            .into_inner()
            .token;
        tokens.push((role, t));
    }
    // One answered query, so histories and exports have exact scores to show.
    let analyst = open(&url, &tokens[1].1).await;
    analyst
        .submissions()
        .submit(tokio_stream::iter(vec![
            SubmitChunk {
                part: Some(submit_chunk::Part::Header(SubmitHeader {
                    holdout: "sealed".into(),
                    mode: pb::SubmitMode::Answer as i32,
                    ..Default::default()
                })),
            },
            SubmitChunk {
                part: Some(submit_chunk::Part::Predictions(pb::PredictionChunk {
                    model: 0,
                    ids: ids.clone(),
                    values: (0..N).map(|i| 7000.0 + 13.0 * i as f64).collect(),
                    classes: vec![],
                    ..Default::default()
                })),
            },
        ]))
        .await
        .expect("submit");

    let mut seen = String::new();
    for (role, token) in &tokens {
        let c = open(&url, token).await;
        let mut out = Vec::new();
        out.push(format!(
            "{:?}",
            c.holdouts()
                .get_holdout(GetHoldoutRequest {
                    name: "sealed".into()
                })
                .await
        ));
        out.push(format!(
            "{:?}",
            c.holdouts()
                .list_holdouts(ListHoldoutsRequest {
                    include_closed: true
                })
                .await
        ));
        if let Ok(s) = c
            .holdouts()
            .get_declaration(GetDeclarationRequest {
                name: "sealed".into(),
            })
            .await
        {
            let mut s = s.into_inner();
            while let Some(x) = s.next().await {
                out.push(format!("{x:?}"));
            }
        }
        out.push(format!(
            "{:?}",
            c.submissions()
                .get_status(StatusRequest {
                    holdout: "sealed".into()
                })
                .await
        ));
        for exact in [false, true] {
            if let Ok(s) = c
                .submissions()
                .history(HistoryRequest {
                    holdout: "sealed".into(),
                    exact,
                })
                .await
            {
                let mut s = s.into_inner();
                while let Some(x) = s.next().await {
                    out.push(format!("{x:?}"));
                }
            }
        }
        out.push(format!(
            "{:?}",
            c.users().list_users(ListUsersRequest {}).await
        ));
        out.push(format!("{:?}", c.users().who_am_i(WhoAmIRequest {}).await));
        let channel = tonic::transport::Endpoint::from_shared(url.clone())
            .unwrap()
            .connect()
            .await
            .unwrap();
        let bearer: tonic::metadata::MetadataValue<_> = format!("Bearer {token}").parse().unwrap();
        let mut ledger =
            LedgerClient::with_interceptor(channel, move |mut r: tonic::Request<()>| {
                r.metadata_mut().insert("authorization", bearer.clone());
                Ok(r)
            });
        if let Ok(s) = ledger
            .export(ExportRequest {
                holdout: "sealed".into(),
            })
            .await
        {
            let mut s = s.into_inner();
            while let Some(x) = s.next().await {
                out.push(format!("{x:?}"));
            }
        }
        let text = out.join("\n");
        for l in &labels {
            assert!(!text.contains(l.as_str()), "{role} received label {l}");
        }
        seen.push_str(&text);
    }
    // The checks looked at real responses (ids are public and do appear).
    assert!(seen.contains("u299") && seen.contains("guarantee"));
    let _ = child.kill();
    let _ = child.wait();
}
