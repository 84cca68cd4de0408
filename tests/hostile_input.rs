//! Hostile text and numbers from one user must not charge anything, break anyone's view, or
//! forge rows on another user's terminal.

mod common;

use common::{Daemon, Parts};
use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
use holdout_ledger::proto::v1::{self as pb, SubmitChunk, SubmitHeader, submit_chunk::Part};

const N: usize = 200;

fn setup() -> (Daemon, String, String) {
    let d = Daemon::start();
    let labels = d.write("labels.csv", &Parts::new(N).labels_csv());
    d.admin(&[
        "create",
        "yard",
        "--labels",
        &labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--tolerance",
        "0.5",
        "--answers",
        "rounded:0.05",
    ])
    .ok();
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    let bob = d.add_user("bob", &["analyst"], Some("red"));
    (d, alice, bob)
}

fn answered(d: &Daemon, token: &str) -> u64 {
    d.run(token, &["status", "yard", "--json"]).ok().json()["budget"]["answered"]
        .as_u64()
        .expect("answered")
}

#[test]
fn long_or_forging_notes_cannot_break_or_forge_history() {
    let (d, alice, bob) = setup();
    let parts = Parts::new(N);
    let f = d.write("p.csv", &parts.defect_predictions(4, 0));
    // A 70,000-character note is refused before anything is charged.
    let long = "n".repeat(70_000);
    let r = d
        .run(
            &alice,
            &["submit", "yard", "--predictions", &f, "--note", &long],
        )
        .code(2);
    assert!(r.stderr.contains("note"), "{}", r.stderr);
    assert_eq!(answered(&d, &alice), 0);
    // A note with a newline and an escape code is recorded, but shown escaped on one row.
    let forging = "fine\n1  2026-01-01T00:00:00Z  red  9  defect 0.00  [0, 0.01]\u{1b}[2J";
    d.run(
        &alice,
        &["submit", "yard", "--predictions", &f, "--note", forging],
    )
    .ok();
    let g = d.write("q.csv", &parts.defect_predictions(5, 1));
    d.run(
        &bob,
        &["submit", "yard", "--predictions", &g, "--note", "bob's"],
    )
    .ok();
    let history = d.run(&bob, &["history", "yard"]).ok().stdout;
    assert_eq!(
        history.lines().count(),
        3,
        "a header and two rows:\n{history}"
    );
    assert!(!history.contains('\u{1b}'), "{history}");
    assert!(history.contains("fine\\n1"), "{history}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn max_cost_must_be_a_finite_non_negative_number() {
    let (d, alice, _) = setup();
    let conn = Conn::open(&ServerArgs {
        server: d.url.clone(),
        token: Some(alice.clone()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect");
    let parts = Parts::new(N);
    let (ids, classes): (Vec<String>, Vec<String>) = parts
        .rows
        .iter()
        .map(|r| (r.0.clone(), r.1.clone()))
        .unzip();
    for bad in [f64::NAN, -1.0, f64::INFINITY, f64::NEG_INFINITY] {
        let chunks = vec![
            SubmitChunk {
                part: Some(Part::Header(SubmitHeader {
                    holdout: "yard".into(),
                    mode: pb::SubmitMode::Answer as i32,
                    max_cost_nats: bad,
                    ..Default::default()
                })),
            },
            SubmitChunk {
                part: Some(Part::Predictions(pb::PredictionChunk {
                    model: 0,
                    ids: ids.clone(),
                    classes: classes.clone(),
                    ..Default::default()
                })),
            },
        ];
        let err = conn
            .submissions()
            .submit(tokio_stream::iter(chunks))
            .await
            .expect_err("a bad max cost is refused");
        assert_eq!(err.code(), tonic::Code::InvalidArgument, "{bad}: {err}");
        assert!(err.message().contains("max_cost_nats"), "{err}");
    }
    let status = d.run(&alice, &["status", "yard", "--json"]).ok().json();
    assert_eq!(status["budget"]["answered"], 0, "nothing was charged");
    assert_eq!(status["budget"]["refused"], 0, "nothing was recorded");
}

/// A stream that sends the header and then never ends: the daemon must answer from the header
/// alone, buffering nothing.
fn header_then_silence(
    header: SubmitHeader,
) -> impl tokio_stream::Stream<Item = SubmitChunk> + Send + 'static {
    use tokio_stream::StreamExt;
    tokio_stream::iter(vec![SubmitChunk {
        part: Some(Part::Header(header)),
    }])
    .chain(tokio_stream::pending())
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn roles_and_ids_are_checked_before_anything_is_buffered() {
    let (d, alice, _) = setup();
    let auditor = d.add_user("audra", &["auditor"], None);
    let open = |token: String| {
        let url = d.url.clone();
        async move {
            Conn::open(&ServerArgs {
                server: url,
                token: Some(token),
                ca: None,
                client_cert: None,
                client_key: None,
            })
            .await
            .expect("connect")
        }
    };
    // An auditor's submit is refused on the header, while the stream is still open.
    let conn = open(auditor).await;
    let refused = tokio::time::timeout(
        std::time::Duration::from_secs(20),
        conn.submissions().submit(header_then_silence(SubmitHeader {
            holdout: "yard".into(),
            mode: pb::SubmitMode::Answer as i32,
            ..Default::default()
        })),
    )
    .await
    .expect("the role must be checked on the header, not after the stream ends")
    .expect_err("an auditor cannot submit");
    assert_eq!(refused.code(), tonic::Code::PermissionDenied, "{refused}");

    // An id longer than any id of the holdout is refused at its chunk, quoted short.
    let conn = open(alice.clone()).await;
    let long_id = "p".repeat(1_000_000);
    let chunks = vec![
        SubmitChunk {
            part: Some(Part::Header(SubmitHeader {
                holdout: "yard".into(),
                mode: pb::SubmitMode::Answer as i32,
                ..Default::default()
            })),
        },
        SubmitChunk {
            part: Some(Part::Predictions(pb::PredictionChunk {
                model: 0,
                ids: vec![long_id],
                classes: vec!["ok".into()],
                ..Default::default()
            })),
        },
    ];
    let err = conn
        .submissions()
        .submit(tokio_stream::iter(chunks))
        .await
        .expect_err("an overlong id is refused");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(err.message().contains("longer than any id"), "{err}");
    assert!(
        err.message().len() < 300,
        "the message must quote a short prefix, got {} bytes",
        err.message().len()
    );
    assert_eq!(answered(&d, &alice), 0, "nothing was charged");
}

#[test]
fn explicit_zero_ranking_share_and_long_descriptions_are_refused() {
    let d = Daemon::start();
    let labels = d.write("labels.csv", &Parts::new(N).labels_csv());
    let base = [
        "create",
        "round",
        "--labels",
        labels.as_str(),
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--answers",
        "sealed:0.05",
    ];
    let mut args = base.to_vec();
    args.extend(["--ranking-share", "0"]);
    let r = d.admin(&args).code(2);
    assert!(r.stderr.contains("--ranking-share"), "{}", r.stderr);
    let long = "d".repeat(100_000);
    let mut args = base.to_vec();
    args.extend(["--description", long.as_str()]);
    let r = d.admin(&args).code(2);
    assert!(r.stderr.contains("description"), "{}", r.stderr);
    assert!(r.stderr.len() < 2_000, "the error must not echo the value");
    // Nothing was created by either; `list` keeps working.
    let list = d.admin(&["list", "--json"]).ok().stdout;
    assert!(!list.contains("\"round\""), "{list}");
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn class_indices_are_the_same_query_as_class_names_and_bad_ones_charge_nothing() {
    let (d, alice, _) = setup();
    let conn = Conn::open(&ServerArgs {
        server: d.url.clone(),
        token: Some(alice.clone()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect");
    let parts = Parts::new(N);
    // The declared classes of `yard`, in declaration order.
    let declared = ["crack", "dent", "ok"];
    let ids: Vec<String> = parts.rows.iter().map(|r| r.0.clone()).collect();
    let names: Vec<String> = parts.rows.iter().map(|r| r.1.clone()).collect();
    let indices: Vec<u32> = names
        .iter()
        .map(|c| declared.iter().position(|d| d == c).expect("declared") as u32)
        .collect();
    let send = |mode: pb::SubmitMode, chunk: pb::PredictionChunk| {
        let submissions = conn.submissions();
        async move {
            let mut submissions = submissions;
            submissions
                .submit(tokio_stream::iter(vec![
                    SubmitChunk {
                        part: Some(Part::Header(SubmitHeader {
                            holdout: "yard".into(),
                            mode: mode as i32,
                            ..Default::default()
                        })),
                    },
                    SubmitChunk {
                        part: Some(Part::Predictions(chunk)),
                    },
                ]))
                .await
        }
    };
    let digest = |reply: pb::SubmitResponse| match reply.outcome {
        Some(pb::submit_response::Outcome::Validation(v)) => v.digest,
        other => panic!("expected a validation, got {other:?}"),
    };
    // The same predictions, as names and as indices: one digest, so one query.
    let by_name = send(
        pb::SubmitMode::Validate,
        pb::PredictionChunk {
            ids: ids.clone(),
            classes: names.clone(),
            ..Default::default()
        },
    )
    .await
    .expect("names validate");
    let by_index = send(
        pb::SubmitMode::Validate,
        pb::PredictionChunk {
            ids: ids.clone(),
            class_indices: indices.clone(),
            ..Default::default()
        },
    )
    .await
    .expect("indices validate");
    assert_eq!(digest(by_name.into_inner()), digest(by_index.into_inner()));
    // An index past the declared classes, and a chunk mixing two forms, are refused.
    let mut outside = indices.clone();
    outside[7] = 3;
    let err = send(
        pb::SubmitMode::Answer,
        pb::PredictionChunk {
            ids: ids.clone(),
            class_indices: outside,
            ..Default::default()
        },
    )
    .await
    .expect_err("an index outside the classes");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(
        err.message().contains("class index 3") && err.message().contains(&ids[7]),
        "{err}"
    );
    let err = send(
        pb::SubmitMode::Answer,
        pb::PredictionChunk {
            ids: ids.clone(),
            classes: names,
            class_indices: indices,
            ..Default::default()
        },
    )
    .await
    .expect_err("two forms in one chunk");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(err.message().contains("mixes"), "{err}");
    assert_eq!(answered(&d, &alice), 0, "nothing was charged");
}
