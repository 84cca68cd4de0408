//! A connection that breaks after the request was sent leaves the outcome unknown: the client
//! exits 10 with a message that says how to retry, and retrying with the same file is never
//! charged twice. A proxy between the client and the real daemon forwards the upload, then
//! stops forwarding replies and cuts both sides, as a daemon killed mid-call or a dropped
//! network would.

mod common;

use std::io::{Read, Write};
use std::net::{Shutdown, TcpListener, TcpStream};
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::time::Duration;

use common::{Daemon, Parts};

/// A proxy to `upstream` that cuts every connection 500 ms after the client has sent more than
/// `cut_after` bytes, forwarding no reply from then on. Returns its URL.
fn cutting_proxy(upstream: String, cut_after: usize) -> String {
    let listener = TcpListener::bind("127.0.0.1:0").unwrap();
    let addr = listener.local_addr().unwrap();
    std::thread::spawn(move || {
        for client in listener.incoming() {
            let Ok(client) = client else { return };
            let Ok(server) = TcpStream::connect(&upstream) else {
                return;
            };
            let sent = Arc::new(AtomicUsize::new(0));
            let cut = Arc::new(AtomicBool::new(false));
            let (mut c_in, mut s_out) = (client.try_clone().unwrap(), server.try_clone().unwrap());
            let (c2, s2) = (client.try_clone().unwrap(), server.try_clone().unwrap());
            let (sent1, cut1) = (sent.clone(), cut.clone());
            std::thread::spawn(move || {
                let mut buf = [0u8; 16384];
                while let Ok(n) = c_in.read(&mut buf) {
                    if n == 0 || s_out.write_all(&buf[..n]).is_err() {
                        break;
                    }
                    if sent1.fetch_add(n, Ordering::SeqCst) + n > cut_after
                        && !cut1.swap(true, Ordering::SeqCst)
                    {
                        let (c3, s3) = (c2.try_clone().unwrap(), s2.try_clone().unwrap());
                        std::thread::spawn(move || {
                            std::thread::sleep(Duration::from_millis(500));
                            let _ = c3.shutdown(Shutdown::Both);
                            let _ = s3.shutdown(Shutdown::Both);
                        });
                    }
                }
            });
            let (mut s_in, mut c_out) = (server, client);
            std::thread::spawn(move || {
                let mut buf = [0u8; 16384];
                while let Ok(n) = s_in.read(&mut buf) {
                    if n == 0 {
                        break;
                    }
                    if !cut.load(Ordering::SeqCst) && c_out.write_all(&buf[..n]).is_err() {
                        break;
                    }
                }
            });
        }
    });
    format!("http://{addr}")
}

#[test]
fn a_broken_connection_exits_10_and_the_retry_is_not_charged_twice() {
    let d = Daemon::start();
    let parts = Parts::new(20_000);
    let labels = d.write("labels.csv", &parts.labels_csv());
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
    ])
    .ok();
    let analyst = d.add_user("ola", &["analyst"], Some("east"));
    let preds_text = parts.defect_predictions(9, 2);
    let preds = d.write("preds.csv", &preds_text);
    // Cut once most of the upload has gone through.
    let proxy = cutting_proxy(d.addr.clone(), preds_text.len() / 2);
    let cut = common::run(
        d.client(Some(&analyst)),
        &[
            "submit",
            "yard",
            "--target",
            "defect",
            "--predictions",
            &preds,
            "--request-id",
            "first-try",
            "--server",
            &proxy,
        ],
    )
    .code(10);
    assert!(
        cut.stderr.contains("may or may not have been recorded")
            && cut.stderr.contains("same --request-id"),
        "{}",
        cut.stderr
    );
    // The retry, straight to the daemon with the same file and id: answered once, charged once.
    let again = d
        .run(
            &analyst,
            &[
                "submit",
                "yard",
                "--target",
                "defect",
                "--predictions",
                &preds,
                "--request-id",
                "first-try",
                "--json",
            ],
        )
        .ok()
        .json();
    // Whether or not the cut call was committed, there is exactly one charged answer now.
    assert_eq!(again["query"], 1, "{again}");
    assert_eq!(again["budget"]["answered"], 1, "{again}");
    let history = d
        .run(&analyst, &["history", "yard", "--json"])
        .ok()
        .json_lines();
    assert_eq!(history.len(), 1, "{history:?}");
    assert_eq!(history[0]["kind"], "answer");
}
