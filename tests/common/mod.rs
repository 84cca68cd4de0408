//! End-to-end harness: the real `holdout` binary as daemon and as client.
//!
//! [`Daemon::start`] runs `holdout init` then `holdout serve --listen 127.0.0.1:0` on a fresh
//! database in a temporary directory, reads the one `listening on ADDR` line, and kills the
//! daemon when dropped. Every command runs with a cleared environment (only `PATH`, plus the
//! daemon address and token the test chooses), so nothing from the developer's shell leaks in.
#![allow(dead_code)]

use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::mpsc;
use std::time::Duration;

/// The binary under test.
pub const BIN: &str = env!("CARGO_BIN_EXE_holdout");

/// How long the daemon may take to bind.
const START_TIMEOUT: Duration = Duration::from_secs(60);

/// A command for the binary with a cleared environment.
pub fn holdout() -> Command {
    let mut cmd = Command::new(BIN);
    cmd.env_clear();
    if let Some(path) = std::env::var_os("PATH") {
        cmd.env("PATH", path);
    }
    cmd
}

/// What a finished command did.
#[derive(Debug)]
pub struct Run {
    /// The command line, for messages.
    pub args: Vec<String>,
    /// Exit code (-1 when killed by a signal).
    pub code: i32,
    /// Standard output.
    pub stdout: String,
    /// Standard error.
    pub stderr: String,
}

impl Run {
    fn from(args: Vec<String>, out: std::process::Output) -> Run {
        Run {
            args,
            code: out.status.code().unwrap_or(-1),
            stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
            stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
        }
    }

    /// Asserts the exit code, showing everything when it differs.
    #[track_caller]
    pub fn code(self, want: i32) -> Run {
        assert_eq!(
            self.code, want,
            "holdout {:?} exited {} (wanted {want})\n--- stdout\n{}\n--- stderr\n{}",
            self.args, self.code, self.stdout, self.stderr
        );
        self
    }

    /// Asserts success.
    #[track_caller]
    pub fn ok(self) -> Run {
        self.code(0)
    }

    /// Stdout as one JSON document.
    #[track_caller]
    pub fn json(&self) -> serde_json::Value {
        serde_json::from_str(self.stdout.trim()).unwrap_or_else(|e| {
            panic!(
                "holdout {:?}: stdout is not JSON ({e}):\n{}\n--- stderr\n{}",
                self.args, self.stdout, self.stderr
            )
        })
    }

    /// Stdout as JSON Lines.
    #[track_caller]
    pub fn json_lines(&self) -> Vec<serde_json::Value> {
        self.stdout
            .lines()
            .filter(|l| !l.trim().is_empty())
            .map(|l| {
                serde_json::from_str(l)
                    .unwrap_or_else(|e| panic!("not a JSON line ({e}): {l}\n{}", self.stderr))
            })
            .collect()
    }
}

/// Runs a prepared command to completion.
pub fn run(mut cmd: Command, args: &[&str]) -> Run {
    cmd.args(args).stdin(Stdio::null());
    let out = cmd.output().expect("run the holdout binary");
    Run::from(args.iter().map(|s| s.to_string()).collect(), out)
}

/// A running daemon on a fresh database.
pub struct Daemon {
    child: Child,
    /// `HOST:PORT` it listens on.
    pub addr: String,
    /// `http://HOST:PORT`.
    pub url: String,
    /// The web view's base URL (`http://HOST:PORT` or `https://...`) when started with --web.
    pub web: Option<String>,
    /// Token of the first user (custodian and organizer).
    pub admin: String,
    /// Scratch directory (holds the database and test files).
    pub dir: tempfile::TempDir,
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Daemon {
    /// Initialises a database and starts serving it on an ephemeral port.
    pub fn start() -> Daemon {
        Daemon::start_with(&[])
    }

    /// As [`Daemon::start`], with extra `holdout serve` flags.
    pub fn start_with(extra: &[&str]) -> Daemon {
        Daemon::start_under(&[], extra)
    }

    /// As [`Daemon::start_with`], with the daemon started through `launcher` (a program and
    /// its arguments, followed by the binary and its arguments; it must `exec` the binary, so
    /// the child's id stays the daemon's), e.g. `sh -c 'ulimit -n 1024 && exec "$@"' sh`.
    pub fn start_under(launcher: &[&str], extra: &[&str]) -> Daemon {
        let dir = tempfile::tempdir().expect("tempdir");
        let db = dir.path().join("holdout.db");
        let token_file = dir.path().join("admin.token");
        let init = run(
            holdout(),
            &[
                "init",
                "--db",
                &db.display().to_string(),
                "--token-out",
                &token_file.display().to_string(),
            ],
        );
        assert_eq!(init.code, 0, "holdout init failed: {}", init.stderr);
        let admin = std::fs::read_to_string(&token_file)
            .expect("read the token file")
            .trim()
            .to_string();
        assert!(!admin.is_empty(), "init wrote an empty token");
        let log = std::fs::File::create(dir.path().join("daemon.log")).expect("log file");
        let mut daemon = match launcher.split_first() {
            None => holdout(),
            Some((program, args)) => {
                let mut cmd = Command::new(program);
                cmd.env_clear();
                if let Some(path) = std::env::var_os("PATH") {
                    cmd.env("PATH", path);
                }
                cmd.args(args).arg(BIN);
                cmd
            }
        };
        let mut child = daemon
            .args(["serve", "--listen", "127.0.0.1:0", "--db"])
            .arg(&db)
            .args(extra)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::from(log))
            .spawn()
            .expect("start holdout serve");
        let stdout = child.stdout.take().expect("daemon stdout");
        let (tx, rx) = mpsc::channel();
        // With --web the daemon prints a second line, `web view on URL`, before serving.
        let web_wanted = extra.contains(&"--web");
        let (web_tx, web_rx) = mpsc::channel();
        std::thread::spawn(move || {
            let mut reader = BufReader::new(stdout);
            let mut line = String::new();
            let first = reader.read_line(&mut line).map(|_| line);
            let _ = tx.send(first);
            if web_wanted {
                let mut line = String::new();
                let _ = web_tx.send(reader.read_line(&mut line).map(|_| line));
            }
            // Keep draining, so a later line can never fail on a closed pipe.
            let _ = std::io::copy(&mut reader, &mut std::io::sink());
        });
        let line = match rx.recv_timeout(START_TIMEOUT) {
            Ok(Ok(line)) => line,
            Ok(Err(e)) => panic!("reading the daemon's first line: {e}"),
            Err(_) => {
                let _ = child.kill();
                panic!("the daemon did not print `listening on ADDR` within {START_TIMEOUT:?}");
            }
        };
        let Some(addr) = line.trim().strip_prefix("listening on ") else {
            let _ = child.kill();
            let log = std::fs::read_to_string(dir.path().join("daemon.log")).unwrap_or_default();
            panic!("unexpected first line from the daemon: {line:?}\n--- daemon log\n{log}");
        };
        let addr = addr.to_string();
        let web = if web_wanted {
            let line = match web_rx.recv_timeout(START_TIMEOUT) {
                Ok(Ok(line)) => line,
                other => {
                    let _ = child.kill();
                    panic!("the daemon did not print `web view on URL`: {other:?}");
                }
            };
            let Some(url) = line.trim().strip_prefix("web view on ") else {
                let _ = child.kill();
                panic!("unexpected second line from the daemon: {line:?}");
            };
            Some(url.to_string())
        } else {
            None
        };
        Daemon {
            child,
            url: format!("http://{addr}"),
            addr,
            web,
            admin,
            dir,
        }
    }

    /// The daemon's process id (for `/proc/PID/status` and `/proc/PID/limits`).
    pub fn pid(&self) -> u32 {
        self.child.id()
    }

    /// A path inside the scratch directory.
    pub fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    /// Writes a file in the scratch directory; returns its path as text.
    pub fn write(&self, name: &str, contents: &str) -> String {
        let p = self.path(name);
        std::fs::write(&p, contents).expect("write test file");
        p.display().to_string()
    }

    /// A client command aimed at this daemon with `token` (none: no token at all).
    pub fn client(&self, token: Option<&str>) -> Command {
        let mut cmd = holdout();
        cmd.env("HOLDOUT_SERVER", &self.url);
        if let Some(t) = token {
            cmd.env("HOLDOUT_TOKEN", t);
        }
        cmd.current_dir(self.dir.path());
        cmd
    }

    /// Runs a client command with `token`.
    pub fn run(&self, token: &str, args: &[&str]) -> Run {
        run(self.client(Some(token)), args)
    }

    /// Runs a client command as the first user (custodian and organizer).
    pub fn admin(&self, args: &[&str]) -> Run {
        self.run(&self.admin, args)
    }

    /// Adds a user through the CLI and returns their token.
    pub fn add_user(&self, name: &str, roles: &[&str], team: Option<&str>) -> String {
        let mut args = vec!["user", "add", name, "--json"];
        for r in roles {
            args.push("--role");
            args.push(r);
        }
        if let Some(t) = team {
            args.push("--team");
            args.push(t);
        }
        let out = self.admin(&args).ok().json();
        out["token"]
            .as_str()
            .unwrap_or_else(|| panic!("no token in {out}"))
            .to_string()
    }

    /// The daemon's log so far (for failure messages).
    pub fn log(&self) -> String {
        let mut s = String::new();
        if let Ok(mut f) = std::fs::File::open(self.path("daemon.log")) {
            let _ = f.read_to_string(&mut s);
        }
        s
    }

    /// A gRPC channel to the daemon.
    pub async fn channel(&self) -> tonic::transport::Channel {
        tonic::transport::Endpoint::from_shared(self.url.clone())
            .expect("endpoint")
            .connect()
            .await
            .expect("connect to the daemon")
    }
}

/// An address nothing listens on (bound, then released).
pub fn dead_url() -> String {
    let l = std::net::TcpListener::bind("127.0.0.1:0").expect("bind");
    let addr = l.local_addr().expect("addr");
    drop(l);
    format!("http://{addr}")
}

/// Invented quality-control data: `n` parts with a defect class and a repair cost.
pub struct Parts {
    /// (id, defect, cost)
    pub rows: Vec<(String, String, f64)>,
}

impl Parts {
    /// Deterministic rows: defects cycle through ok/ok/ok/dent/crack, costs follow the id.
    pub fn new(n: usize) -> Parts {
        let classes = ["ok", "ok", "ok", "dent", "crack"];
        let rows = (0..n)
            .map(|i| {
                let defect = classes[(i * 7 + i / 5) % classes.len()].to_string();
                let cost = ((i * 37) % 90) as f64 + 5.0;
                (format!("part-{i:05}"), defect, cost)
            })
            .collect();
        Parts { rows }
    }

    /// The labels file: `id,defect,cost`.
    pub fn labels_csv(&self) -> String {
        let mut s = String::from("id,defect,cost\n");
        for (id, d, c) in &self.rows {
            s.push_str(&format!("{id},{d},{c}\n"));
        }
        s
    }

    /// Class predictions, wrong on every row whose index is `wrong_from` mod `every`.
    pub fn defect_predictions(&self, every: usize, wrong_from: usize) -> String {
        let mut s = String::from("id,prediction\n");
        for (i, (id, d, _)) in self.rows.iter().enumerate() {
            let p = if i % every == wrong_from % every {
                if d == "ok" { "dent" } else { "ok" }
            } else {
                d.as_str()
            };
            s.push_str(&format!("{id},{p}\n"));
        }
        s
    }

    /// Cost predictions off by `offset`.
    pub fn cost_predictions(&self, offset: f64) -> String {
        let mut s = String::from("id,prediction\n");
        for (id, _, c) in &self.rows {
            s.push_str(&format!("{id},{}\n", c + offset));
        }
        s
    }
}

/// Reads the ids of a CSV file written by `split` or `ids` (first column named `id`).
pub fn csv_ids(path: &Path) -> Vec<String> {
    let text = std::fs::read_to_string(path).expect("read csv");
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().expect("header").split(',').collect();
    let k = header.iter().position(|h| *h == "id").expect("id column");
    lines
        .filter(|l| !l.is_empty())
        .map(|l| l.split(',').nth(k).expect("id field").to_string())
        .collect()
}
