//! Idle connections against a daemon limited to 1,024 file descriptors (`ulimit -n 1024`):
//! 1,500 idle TCP connections (half silent, half sending one byte and stalling) must keep a
//! legitimate client (`holdout whoami`) out for at most 25 s, and the daemon must log that its
//! connection limit was hit. Loopback only; the wait is bounded and the time it took is printed.
//!
//! The test process holds the 1,500 connections itself, so it needs more descriptors than that:
//! when its own soft limit is lower, it runs the test again under `sh -c 'ulimit -n 4096'`, and
//! skips with a message when the limit cannot be raised.

mod common;

use std::io::Write;
use std::net::{SocketAddr, TcpStream};
use std::process::Command;
use std::time::{Duration, Instant};

use common::Daemon;

/// Idle connections opened against the daemon.
const IDLE: usize = 1_500;
/// How long a legitimate client may be kept out.
const BOUND: Duration = Duration::from_secs(25);
/// Marks the re-run under a raised limit.
const CHILD: &str = "HOLDOUT_FD_TEST_RERUN";

/// The soft limit on open files of a process, from `/proc/PID/limits` (`None`: unlimited).
fn open_files(pid: &str) -> Option<u64> {
    let text = std::fs::read_to_string(format!("/proc/{pid}/limits")).expect("read limits");
    let line = text
        .lines()
        .find(|l| l.starts_with("Max open files"))
        .expect("a Max open files line");
    line["Max open files".len()..]
        .split_whitespace()
        .next()
        .and_then(|v| v.parse().ok())
}

/// True when this process may hold the idle connections; otherwise runs `test` again in a
/// child whose limit is raised (asserting it passed) and returns false.
fn enough_descriptors_or_rerun(test: &str) -> bool {
    if open_files("self").is_none_or(|n| n >= 4096) {
        return true;
    }
    if std::env::var_os(CHILD).is_some() {
        panic!("the re-run still has too few descriptors");
    }
    let exe = std::env::current_exe().expect("test binary");
    let status = Command::new("sh")
        .args([
            "-c",
            "ulimit -n 4096 2>/dev/null || exit 77; exec \"$0\" \"$@\"",
        ])
        .arg(exe)
        .args(["--exact", test, "--nocapture", "--test-threads", "1"])
        .env(CHILD, "1")
        .status()
        .expect("run sh");
    if status.code() == Some(77) {
        eprintln!(
            "SKIPPED {test}: this process may open only {:?} files and `ulimit -n 4096` failed; \
             holding {IDLE} connections needs more",
            open_files("self")
        );
        return false;
    }
    assert!(status.success(), "{test} failed under a raised limit");
    false
}

/// Runs the attack against a daemon started with `extra` flags under `ulimit -n 1024`; returns
/// the daemon's log.
fn attack(extra: &[&str]) -> String {
    let d = Daemon::start_under(&["sh", "-c", "ulimit -n 1024 && exec \"$0\" \"$@\""], extra);
    let pid = d.pid().to_string();
    assert_eq!(
        open_files(&pid),
        Some(1024),
        "the daemon runs limited to 1,024 files"
    );
    let addr: SocketAddr = d.addr.parse().expect("daemon address");
    // 1,500 connections that never complete a handshake: every other one sends one byte of the
    // HTTP/2 preface and stalls, the rest send nothing.
    let mut idle = Vec::with_capacity(IDLE);
    let opening = Instant::now();
    for i in 0..IDLE {
        if let Ok(mut s) = TcpStream::connect_timeout(&addr, Duration::from_secs(5)) {
            if i % 2 == 1 {
                let _ = s.write_all(b"P");
            }
            idle.push(s);
        }
    }
    let fds = std::fs::read_dir(format!("/proc/{pid}/fd"))
        .map(|d| d.count())
        .unwrap_or(0);
    eprintln!(
        "opened {} idle connections in {:.2} s; the daemon holds {fds} descriptors",
        idle.len(),
        opening.elapsed().as_secs_f64()
    );
    assert_eq!(idle.len(), IDLE, "every idle connection was opened");

    // A legitimate client tries until it is served, while the idle connections stay open.
    let started = Instant::now();
    let mut tries = 0;
    let mut last = None;
    while started.elapsed() < BOUND {
        tries += 1;
        let r = common::run(d.client(Some(&d.admin)), &["whoami"]);
        if r.code == 0 {
            break;
        }
        last = Some(r);
        std::thread::sleep(Duration::from_millis(200));
    }
    let waited = started.elapsed();
    assert!(
        waited < BOUND,
        "a legitimate client was kept out for {BOUND:?} ({tries} tries); last: {last:?}\n--- daemon log\n{}",
        d.log()
    );
    eprintln!(
        "a legitimate client was served after {:.2} s ({tries} tries)",
        waited.as_secs_f64()
    );
    assert!(
        d.log().contains("connection limit reached"),
        "the daemon logs that its limit was hit:\n{}",
        d.log()
    );
    drop(idle);
    d.log()
}

#[test]
fn idle_connections_keep_a_client_out_briefly_under_1024_descriptors() {
    if enough_descriptors_or_rerun(
        "idle_connections_keep_a_client_out_briefly_under_1024_descriptors",
    ) {
        // The default --max-connections (512) fits in 1,024 descriptors.
        let log = attack(&[]);
        assert!(!log.contains("--max-connections lowered"), "{log}");
    }
}

#[test]
fn more_slots_than_descriptors_are_lowered_to_keep_a_reserve() {
    if enough_descriptors_or_rerun("more_slots_than_descriptors_are_lowered_to_keep_a_reserve") {
        // 5,000 slots cannot fit in 1,024 descriptors: the daemon lowers them (keeping a reserve
        // for the database and itself), says so, and still lets the client in. Silent
        // connections may last 60 s here, so only shedding can let the client in within 25 s.
        let log = attack(&["--max-connections", "5000", "--handshake-timeout", "60"]);
        assert!(log.contains("--max-connections lowered"), "{log}");
        assert!(!log.contains("Too many open files"), "{log}");
    }
}
