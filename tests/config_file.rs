//! `serve --config FILE`: unknown keys refused by name; flags over environment over file over
//! defaults, as `serve --print-config` shows and as the daemon runs.

use std::io::{BufRead, BufReader};
use std::process::{Command, Output, Stdio};

const BIN: &str = env!("CARGO_BIN_EXE_holdout");

fn holdout(args: &[&str], env: &[(&str, &str)]) -> Output {
    let mut cmd = Command::new(BIN);
    cmd.env_clear().args(args).stdin(Stdio::null());
    for (k, v) in env {
        cmd.env(k, v);
    }
    cmd.output().expect("run holdout")
}

/// `key -> (value, source)` from `--print-config`.
fn effective(out: &Output) -> Vec<(String, String, String)> {
    assert_eq!(
        out.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter(|l| !l.starts_with('#'))
        .map(|l| {
            let (kv, source) = l.rsplit_once("  # ").expect("a source");
            let (k, v) = kv.split_once(" = ").expect("key = value");
            (k.to_string(), v.to_string(), source.to_string())
        })
        .collect()
}

fn get(e: &[(String, String, String)], key: &str) -> (String, String) {
    let (_, v, s) = e.iter().find(|(k, _, _)| k == key).expect(key);
    (v.clone(), s.clone())
}

#[test]
fn an_unknown_key_is_refused_naming_it() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = dir.path().join("daemon.toml");
    std::fs::write(&cfg, "listen = \"127.0.0.1:0\"\nidle-timeuot = 60\n").unwrap();
    let out = holdout(
        &[
            "serve",
            "--config",
            &cfg.display().to_string(),
            "--print-config",
        ],
        &[],
    );
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("unknown field `idle-timeuot`"), "{err}");
    // A value outside a flag's range is refused as the flag would be.
    std::fs::write(&cfg, "max-batch = 0\n").unwrap();
    let out = holdout(&["serve", "--config", &cfg.display().to_string()], &[]);
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("max-batch"), "{err}");
}

#[test]
fn flags_beat_environment_beats_file_beats_default() {
    let dir = tempfile::tempdir().unwrap();
    let cfg = dir.path().join("daemon.toml");
    std::fs::write(
        &cfg,
        "listen = \"127.0.0.1:1111\"\nlog = \"debug\"\nmax-batch = 16\nidle-timeout = 600\n\
         db = \"from-file.db\"\n",
    )
    .unwrap();
    let c = cfg.display().to_string();
    let env = [
        ("HOLDOUT_LISTEN", "127.0.0.1:2222"),
        ("HOLDOUT_LOG", "warn"),
    ];
    let e = effective(&holdout(
        &[
            "serve",
            "--config",
            &c,
            "--print-config",
            "--log",
            "error",
            "--max-batch",
            "8",
        ],
        &env,
    ));
    // Flag over environment over file.
    assert_eq!(get(&e, "log"), ("\"error\"".into(), "flag".into()));
    // Flag over file.
    assert_eq!(get(&e, "max-batch"), ("8".into(), "flag".into()));
    // Environment over file.
    assert_eq!(
        get(&e, "listen"),
        ("\"127.0.0.1:2222\"".into(), "environment".into())
    );
    // File over default.
    assert_eq!(get(&e, "idle-timeout"), ("600".into(), "file".into()));
    assert_eq!(get(&e, "db"), ("\"from-file.db\"".into(), "file".into()));
    // Default.
    assert_eq!(get(&e, "max-connections"), ("512".into(), "default".into()));
    // Without the file the same environment and flags give the defaults back.
    let e = effective(&holdout(&["serve", "--print-config"], &[]));
    assert_eq!(get(&e, "idle-timeout"), ("120".into(), "default".into()));
    assert_eq!(
        get(&e, "listen"),
        ("\"127.0.0.1:7361\"".into(), "default".into())
    );
}

#[test]
fn the_daemon_serves_on_the_files_values() {
    let dir = tempfile::tempdir().unwrap();
    let db = dir.path().join("h.db");
    let token = dir.path().join("t");
    let init = holdout(
        &[
            "init",
            "--db",
            &db.display().to_string(),
            "--token-out",
            &token.display().to_string(),
        ],
        &[],
    );
    assert_eq!(init.status.code(), Some(0));
    let cfg = dir.path().join("daemon.toml");
    std::fs::write(
        &cfg,
        format!(
            "db = {:?}\nlisten = \"127.0.0.1:0\"\nlog = \"warn\"\n",
            db.display().to_string()
        ),
    )
    .unwrap();
    let mut child = Command::new(BIN)
        .env_clear()
        .args(["serve", "--config", &cfg.display().to_string()])
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let mut line = String::new();
    BufReader::new(child.stdout.take().unwrap())
        .read_line(&mut line)
        .unwrap();
    let addr = line
        .trim()
        .strip_prefix("listening on ")
        .map(str::to_string);
    let tok = std::fs::read_to_string(&token).unwrap();
    let who = addr.as_ref().map(|a| {
        holdout(
            &["whoami"],
            &[
                ("HOLDOUT_SERVER", &format!("http://{a}")),
                ("HOLDOUT_TOKEN", tok.trim()),
            ],
        )
    });
    let _ = child.kill();
    let _ = child.wait();
    let addr = addr.unwrap_or_else(|| panic!("unexpected first line {line:?}"));
    assert!(addr.starts_with("127.0.0.1:"), "{addr}");
    let who = who.unwrap();
    assert_eq!(
        who.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&who.stderr)
    );
}
