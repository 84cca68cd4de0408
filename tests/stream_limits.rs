//! Byte limits on what a caller may stream, through the real daemon: a submission or a holdout
//! creation far over its limit (`serve --max-submit-bytes`, `--max-create-bytes`) is refused as
//! soon as it passes it, naming the limit and the flag, and the daemon's memory stays bounded
//! (its peak resident size, `VmHWM` in /proc/PID/status, before and after); a caller without
//! the role is refused on the first message, before anything is buffered; one message over
//! `--max-message-bytes` is refused naming that flag.

mod common;

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use common::{Daemon, Parts};
use holdout_ledger::cli::client::conn::{Conn, ServerArgs};
use holdout_ledger::proto::v1::{
    self as pb, CreateHoldoutChunk, HoldoutSpec, LabelColumn, LabelRows, SubmitChunk, SubmitHeader,
    create_holdout_chunk, submit_chunk::Part,
};
use prost::Message;

/// Rows of the holdout the submissions aim at.
const N: usize = 20_000;
/// The stream limit the daemon runs with: 4 MiB.
const LIMIT: u64 = 4 << 20;
/// Rows per message of the oversized streams (each message about 0.5 MB, under the default
/// message limit).
const ROWS: usize = 2048;
/// Peak memory the daemon may add over the whole test: generously above the 4 MiB limit (the
/// limit, one message, HTTP/2 windows of 4 MiB, allocator slack), and far below what buffering
/// any one of the streams below would take (each is over 300 MB on the wire).
const MEMORY_BOUND_KB: u64 = 128 * 1024;

/// `VmHWM` (peak resident) and `VmRSS` (resident) of a process, in kB.
fn memory_kb(pid: u32) -> (u64, u64) {
    let status =
        std::fs::read_to_string(format!("/proc/{pid}/status")).expect("read /proc/PID/status");
    let field = |name: &str| -> u64 {
        status
            .lines()
            .find_map(|l| l.strip_prefix(name))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
            .unwrap_or_else(|| panic!("no {name} in /proc/{pid}/status:\n{status}"))
    };
    (field("VmHWM:"), field("VmRSS:"))
}

/// A daemon with `extra` flags and a holdout `yard` of `rows` rows answering with `answers`.
fn setup(extra: &[&str], rows: usize, answers: &str) -> (Daemon, String) {
    let d = Daemon::start_with(extra);
    let labels = d.write("labels.csv", &Parts::new(rows).labels_csv());
    create(&d, "yard", &labels, answers);
    let alice = d.add_user("alice", &["analyst"], Some("blue"));
    (d, alice)
}

fn create(d: &Daemon, name: &str, labels: &str, answers: &str) {
    d.admin(&[
        "create",
        name,
        "--labels",
        labels,
        "--target",
        "defect:defect:error",
        "--classes",
        "crack,dent,ok",
        "--tolerance",
        "0.5",
        "--answers",
        answers,
    ])
    .ok();
}

async fn open(d: &Daemon, token: &str) -> Conn {
    Conn::open(&ServerArgs {
        server: d.url.clone(),
        token: Some(token.to_string()),
        ca: None,
        client_cert: None,
        client_key: None,
    })
    .await
    .expect("connect")
}

/// A submission of 64 models, each predicting every row with a 256-byte class name (the longest
/// a class may be): every message passes the daemon's row, id and class checks, and the whole
/// stream is about 350 MB. Chunks are made only when asked for.
fn huge_submission_chunks(holdout: &str) -> impl Iterator<Item = SubmitChunk> + Send {
    let ids: Vec<String> = Parts::new(N).rows.into_iter().map(|r| r.0).collect();
    let class = "c".repeat(256);
    let header = SubmitChunk {
        part: Some(Part::Header(SubmitHeader {
            holdout: holdout.into(),
            target: "defect".into(),
            mode: pb::SubmitMode::Answer as i32,
            models: 64,
            ..Default::default()
        })),
    };
    let chunks = (0..64u32).flat_map(move |model| {
        let ids = ids.clone();
        let class = class.clone();
        (0..N.div_ceil(ROWS)).map(move |k| {
            let part = &ids[k * ROWS..((k + 1) * ROWS).min(N)];
            SubmitChunk {
                part: Some(Part::Predictions(pb::PredictionChunk {
                    model,
                    ids: part.to_vec(),
                    classes: vec![class.clone(); part.len()],
                    ..Default::default()
                })),
            }
        })
    });
    std::iter::once(header).chain(chunks)
}

/// [`huge_submission_chunks`] as a stream the transport pulls from; `sent` counts the bytes of
/// the chunks made so far.
fn huge_submission(
    holdout: &str,
    sent: Arc<AtomicU64>,
) -> impl tokio_stream::Stream<Item = SubmitChunk> + Send {
    tokio_stream::iter(huge_submission_chunks(holdout).inspect(move |c| {
        sent.fetch_add(c.encoded_len() as u64, Ordering::SeqCst);
    }))
}

/// A holdout creation of 1.5 million rows with 200-byte ids (about 300 MB), made lazily.
fn huge_creation(
    sent: Arc<AtomicU64>,
) -> impl tokio_stream::Stream<Item = CreateHoldoutChunk> + Send {
    const ROWS_TOTAL: usize = 1_500_000;
    let spec = CreateHoldoutChunk {
        part: Some(create_holdout_chunk::Part::Spec(HoldoutSpec {
            name: "huge".into(),
            targets: vec![pb::Target {
                name: "defect".into(),
                column: "defect".into(),
                metric: "error".into(),
                classes: vec!["crack".into(), "dent".into(), "ok".into()],
                ..Default::default()
            }],
            ..Default::default()
        })),
    };
    let rows = (0..ROWS_TOTAL.div_ceil(ROWS)).map(|k| CreateHoldoutChunk {
        part: Some(create_holdout_chunk::Part::Rows(LabelRows {
            ids: (k * ROWS..(k + 1) * ROWS)
                .map(|i| format!("{i:0200}"))
                .collect(),
            columns: vec![LabelColumn {
                values: vec!["ok".into(); ROWS],
            }],
        })),
    });
    tokio_stream::iter(std::iter::once(spec).chain(rows).inspect(move |c| {
        sent.fetch_add(c.encoded_len() as u64, Ordering::SeqCst);
    }))
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn oversized_and_unauthorised_streams_are_refused_early_with_memory_bounded() {
    let limit = LIMIT.to_string();
    // A best-of holdout takes batches of up to 64 models; `plain` answers one at a time.
    let (d, alice) = setup(
        &["--max-submit-bytes", &limit, "--max-create-bytes", &limit],
        N,
        "best-of:0.05",
    );
    let other_rows = Parts::new(100).labels_csv().replace("part-", "bolt-");
    create(
        &d,
        "plain",
        &d.write("plain.csv", &other_rows),
        "rounded:0.05",
    );
    let auditor = d.add_user("audra", &["auditor"], None);
    let total: u64 = huge_submission_chunks("yard")
        .map(|c| c.encoded_len() as u64)
        .sum();
    assert!(total > 300_000_000, "the submission is {total} bytes");
    let (hwm_before, rss_before) = memory_kb(d.pid());
    eprintln!("daemon before: VmHWM {hwm_before} kB, VmRSS {rss_before} kB");
    // Far from everything may be sent before the refusal arrives: the limit, the HTTP/2
    // windows (4 MiB each way) and what the client had encoded ahead.
    let early = 64u64 << 20;

    // An analyst's submission over --max-submit-bytes: refused as soon as it passes the limit.
    let sent = Arc::new(AtomicU64::new(0));
    let err = open(&d, &alice)
        .await
        .submissions()
        .submit(huge_submission("yard", sent.clone()))
        .await
        .expect_err("a submission over the limit is refused");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(
        err.message().contains("--max-submit-bytes") && err.message().contains(&limit),
        "the message names the limit and the flag: {err}"
    );
    let sent = sent.load(Ordering::SeqCst);
    assert!(
        sent < early,
        "refused only after {sent} of {total} bytes were made"
    );
    eprintln!("submission refused after the client made {sent} of {total} bytes: {err}");

    // An auditor may not submit: refused on the header, the same huge stream behind it.
    let sent = Arc::new(AtomicU64::new(0));
    let err = open(&d, &auditor)
        .await
        .submissions()
        .submit(huge_submission("yard", sent.clone()))
        .await
        .expect_err("an auditor cannot submit");
    assert_eq!(err.code(), tonic::Code::PermissionDenied, "{err}");
    assert!(sent.load(Ordering::SeqCst) < early, "{sent:?}");

    // A batch on a holdout that answers one model at a time: refused on the header.
    let sent = Arc::new(AtomicU64::new(0));
    let err = open(&d, &alice)
        .await
        .submissions()
        .submit(huge_submission("plain", sent.clone()))
        .await
        .expect_err("a batch needs a best-of holdout");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(err.message().contains("best-of"), "{err}");
    assert!(sent.load(Ordering::SeqCst) < early, "{sent:?}");

    // An analyst may not create: refused before the first message is read.
    let sent = Arc::new(AtomicU64::new(0));
    let err = open(&d, &alice)
        .await
        .holdouts()
        .create_holdout(huge_creation(sent.clone()))
        .await
        .expect_err("an analyst cannot create a holdout");
    assert_eq!(err.code(), tonic::Code::PermissionDenied, "{err}");
    assert!(sent.load(Ordering::SeqCst) < early, "{sent:?}");

    // A custodian's creation over --max-create-bytes: refused as soon as it passes the limit.
    let sent = Arc::new(AtomicU64::new(0));
    let err = open(&d, &d.admin)
        .await
        .holdouts()
        .create_holdout(huge_creation(sent.clone()))
        .await
        .expect_err("a creation over the limit is refused");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(
        err.message().contains("--max-create-bytes") && err.message().contains(&limit),
        "{err}"
    );
    let sent = sent.load(Ordering::SeqCst);
    assert!(sent < early, "creation refused only after {sent} bytes");
    eprintln!("creation refused after the client made {sent} bytes: {err}");

    let (hwm_after, rss_after) = memory_kb(d.pid());
    eprintln!("daemon after: VmHWM {hwm_after} kB, VmRSS {rss_after} kB");
    assert!(
        hwm_after < rss_before + MEMORY_BOUND_KB,
        "the daemon's peak grew from {rss_before} kB resident to {hwm_after} kB"
    );

    // Nothing was charged or created, and the daemon serves a real submission.
    for name in ["yard", "plain"] {
        let status = d.run(&alice, &["status", name, "--json"]).ok().json();
        assert_eq!(status["budget"]["answered"], 0, "{status}");
        assert_eq!(status["budget"]["refused"], 0, "{status}");
    }
    d.admin(&["status", "huge"]).code(5);
    let f = d.write("p.csv", &Parts::new(N).defect_predictions(4, 0));
    d.run(&alice, &["submit", "yard", "--predictions", &f]).ok();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_message_over_the_message_limit_is_refused_naming_the_flag() {
    // 2,000 rows: the CLI's messages (create and submit) stay under 64 KiB.
    const SMALL: usize = 2_000;
    let (d, alice) = setup(&["--max-message-bytes", "65536"], SMALL, "rounded:0.05");
    let ids: Vec<String> = Parts::new(SMALL).rows.into_iter().map(|r| r.0).collect();
    let chunks = vec![
        SubmitChunk {
            part: Some(Part::Header(SubmitHeader {
                holdout: "yard".into(),
                target: "defect".into(),
                mode: pb::SubmitMode::Answer as i32,
                ..Default::default()
            })),
        },
        // About 540 kB in one message: 256-byte class names.
        SubmitChunk {
            part: Some(Part::Predictions(pb::PredictionChunk {
                model: 0,
                classes: vec!["c".repeat(256); ids.len()],
                ids,
                ..Default::default()
            })),
        },
    ];
    assert!(chunks[1].encoded_len() > 65536);
    let err = open(&d, &alice)
        .await
        .submissions()
        .submit(tokio_stream::iter(chunks))
        .await
        .expect_err("a message over the limit is refused");
    assert_eq!(err.code(), tonic::Code::InvalidArgument, "{err}");
    assert!(
        err.message().contains("--max-message-bytes") && err.message().contains("65536"),
        "{err}"
    );
    let status = d.run(&alice, &["status", "yard", "--json"]).ok().json();
    assert_eq!(status["budget"]["answered"], 0, "{status}");
    // Messages under the limit are served as before.
    let f = d.write("p.csv", &Parts::new(SMALL).defect_predictions(4, 0));
    d.run(&alice, &["submit", "yard", "--predictions", &f]).ok();
}
