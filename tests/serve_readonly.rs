//! `holdout serve` refuses to start on a database it cannot write, with a message naming the
//! file and a non-zero exit, instead of starting and failing every write later: a read-only
//! database file, and a writable file in a read-only directory (SQLite cannot create its journal).
//!
//! File permissions do not bind root, so when the tests run as root the daemon is started as the
//! unprivileged user `nobody` (uid and gid 65534), for whom they do.

mod common;

use std::os::unix::fs::PermissionsExt;
use std::os::unix::process::CommandExt;
use std::path::Path;
use std::process::Stdio;
use std::time::{Duration, Instant};

/// The effective user id of this process, from `/proc/self/status`.
fn euid() -> u32 {
    let status = std::fs::read_to_string("/proc/self/status").expect("read /proc/self/status");
    status
        .lines()
        .find_map(|l| l.strip_prefix("Uid:"))
        .and_then(|v| v.split_whitespace().nth(1))
        .and_then(|v| v.parse().ok())
        .expect("a Uid line")
}

/// Unprivileged ids for the daemon when the tests run as root.
const NOBODY: u32 = 65534;

fn chmod(path: &Path, mode: u32) {
    std::fs::set_permissions(path, std::fs::Permissions::from_mode(mode)).expect("chmod");
}

/// Every file in `dir` writable by anyone (the database and any -wal and -shm files).
fn make_writable(dir: &Path) {
    for entry in std::fs::read_dir(dir).expect("read dir") {
        chmod(&entry.expect("entry").path(), 0o666);
    }
}

/// A fresh database initialised in `dir` (journal files folded back in by `init`).
fn init(dir: &Path) -> std::path::PathBuf {
    let db = dir.join("holdout.db");
    let token = dir.join("admin.token");
    let r = common::run(
        common::holdout(),
        &[
            "init",
            "--db",
            &db.display().to_string(),
            "--token-out",
            &token.display().to_string(),
        ],
    );
    assert_eq!(r.code, 0, "init: {}", r.stderr);
    db
}

/// Runs `serve` on `db` (as `nobody` when this process is root) and waits at most 60 s for it
/// to exit; a daemon that starts serving instead is killed and the test fails.
fn serve_must_refuse(db: &Path) {
    let mut cmd = common::holdout();
    cmd.args(["serve", "--listen", "127.0.0.1:0", "--db"])
        .arg(db)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    if euid() == 0 {
        cmd.uid(NOBODY).gid(NOBODY);
    }
    let mut child = cmd.spawn().expect("start holdout serve");
    let started = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().expect("wait") {
            break status;
        }
        if started.elapsed() > Duration::from_secs(60) {
            let _ = child.kill();
            let out = child.wait_with_output().expect("output");
            panic!(
                "serve kept running on an unwritable database\n--- stdout\n{}\n--- stderr\n{}",
                String::from_utf8_lossy(&out.stdout),
                String::from_utf8_lossy(&out.stderr)
            );
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    let out = child.wait_with_output().expect("output");
    let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert_eq!(
        status.code(),
        Some(2),
        "serve must exit with the bad-input code: {status:?}\n{stderr}"
    );
    assert!(
        !stdout.contains("listening on"),
        "serve must not start listening: {stdout}"
    );
    assert!(
        stderr.contains(&db.display().to_string()),
        "the message names the database file: {stderr}"
    );
    assert!(
        stderr.contains("invalid --db") && stderr.contains("cannot be written"),
        "the message says the database cannot be written: {stderr}"
    );
    eprintln!("{status}: {}", stderr.trim());
}

#[test]
fn serve_refuses_a_read_only_database_file() {
    let dir = tempfile::tempdir().expect("tempdir");
    let db = init(dir.path());
    // The directory stays writable (for `nobody` too); only the file is read-only.
    chmod(dir.path(), 0o777);
    chmod(&db, 0o444);
    serve_must_refuse(&db);
    // The same file, writable again, is served: the refusal was about writing. (SQLite made
    // its -shm file beside it read-only like the database: that one too.)
    make_writable(dir.path());
    let d = serve_starts(&db);
    drop(d);
}

#[test]
fn serve_refuses_a_database_in_a_read_only_directory() {
    let dir = tempfile::tempdir().expect("tempdir");
    let db = init(dir.path());
    // The file is writable, but SQLite cannot create its journal beside it.
    chmod(&db, 0o666);
    chmod(dir.path(), 0o555);
    serve_must_refuse(&db);
    chmod(dir.path(), 0o777);
    make_writable(dir.path());
    let d = serve_starts(&db);
    drop(d);
}

/// The positive control: `serve` on `db` (as `nobody` under root) prints `listening on`; the
/// daemon is killed when the guard drops.
fn serve_starts(db: &Path) -> KillOnDrop {
    let mut cmd = common::holdout();
    cmd.args(["serve", "--listen", "127.0.0.1:0", "--db"])
        .arg(db)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::null());
    if euid() == 0 {
        cmd.uid(NOBODY).gid(NOBODY);
    }
    let mut child = KillOnDrop(cmd.spawn().expect("start holdout serve"));
    let stdout = child.0.stdout.take().expect("stdout");
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        use std::io::BufRead;
        let mut line = String::new();
        let _ = std::io::BufReader::new(stdout).read_line(&mut line);
        let _ = tx.send(line);
    });
    let line = rx
        .recv_timeout(Duration::from_secs(60))
        .expect("serve starts on a writable database");
    assert!(line.starts_with("listening on"), "{line:?}");
    child
}

struct KillOnDrop(std::process::Child);

impl Drop for KillOnDrop {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}
