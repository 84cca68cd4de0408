//! The daemon as a process: `holdout serve` on port 0 with a temporary database answers the
//! standard health check, lists its services through reflection, and shuts down gracefully on
//! SIGTERM.

use std::io::{BufRead, BufReader};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use tokio_stream::StreamExt;
use tonic_health::pb::{
    HealthCheckRequest, health_check_response::ServingStatus, health_client::HealthClient,
};
use tonic_reflection::pb::v1::{
    ServerReflectionRequest, server_reflection_client::ServerReflectionClient,
    server_reflection_request::MessageRequest, server_reflection_response::MessageResponse,
};

struct Daemon {
    child: Child,
    addr: String,
    _dir: tempfile::TempDir,
}

impl Drop for Daemon {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

fn start() -> Daemon {
    let dir = tempfile::tempdir().expect("tempdir");
    let mut child = Command::new(env!("CARGO_BIN_EXE_holdout"))
        .args(["serve", "--listen", "127.0.0.1:0", "--log", "warn", "--db"])
        .arg(dir.path().join("h.db"))
        .env_clear()
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("start holdout serve");
    let mut line = String::new();
    BufReader::new(child.stdout.take().expect("stdout"))
        .read_line(&mut line)
        .expect("read the listening line");
    let addr = line
        .trim()
        .strip_prefix("listening on ")
        .unwrap_or_else(|| panic!("unexpected first line {line:?}"))
        .to_string();
    Daemon {
        child,
        addr,
        _dir: dir,
    }
}

#[tokio::test]
async fn health_reflection_and_graceful_shutdown() {
    let mut daemon = start();
    let url = format!("http://{}", daemon.addr);

    let channel = tonic::transport::Endpoint::from_shared(url)
        .expect("url")
        .connect()
        .await
        .expect("connect");
    let mut health = HealthClient::new(channel.clone());
    for service in ["", "holdout.v1.Holdouts", "holdout.v1.Submissions"] {
        let status = health
            .check(HealthCheckRequest {
                service: service.into(),
            })
            .await
            .expect("health check")
            .into_inner()
            .status;
        assert_eq!(status, ServingStatus::Serving as i32, "service {service:?}");
    }

    let mut reflection = ServerReflectionClient::new(channel);
    let request = ServerReflectionRequest {
        host: String::new(),
        message_request: Some(MessageRequest::ListServices(String::new())),
    };
    let mut responses = reflection
        .server_reflection_info(tokio_stream::iter(vec![request]))
        .await
        .expect("reflection")
        .into_inner();
    let response = responses.next().await.expect("one response").expect("ok");
    let names: Vec<String> = match response.message_response {
        Some(MessageResponse::ListServicesResponse(list)) => {
            list.service.into_iter().map(|s| s.name).collect()
        }
        other => panic!("unexpected reflection answer {other:?}"),
    };
    for wanted in [
        "holdout.v1.Holdouts",
        "holdout.v1.Submissions",
        "holdout.v1.Ledger",
        "holdout.v1.Users",
        "grpc.health.v1.Health",
    ] {
        assert!(
            names.iter().any(|n| n == wanted),
            "{wanted} missing from {names:?}"
        );
    }

    // SIGTERM: the daemon stops by itself, with a success status.
    let pid = daemon.child.id().to_string();
    let killed = Command::new("kill")
        .args(["-TERM", &pid])
        .status()
        .expect("kill");
    assert!(killed.success());
    let started = Instant::now();
    let status = loop {
        if let Some(status) = daemon.child.try_wait().expect("wait") {
            break status;
        }
        assert!(
            started.elapsed() < Duration::from_secs(20),
            "daemon did not stop on SIGTERM"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    };
    assert!(status.success(), "daemon exited with {status}");
}

#[test]
fn help_lists_the_commands_and_each_has_help() {
    let out = Command::new(env!("CARGO_BIN_EXE_holdout"))
        .arg("--help")
        .output()
        .expect("run --help");
    assert!(out.status.success());
    let text = String::from_utf8_lossy(&out.stdout);
    for cmd in ["serve", "init", "bound", "plan"] {
        assert!(text.contains(cmd), "--help does not list {cmd}:\n{text}");
        let sub = Command::new(env!("CARGO_BIN_EXE_holdout"))
            .args([cmd, "--help"])
            .output()
            .expect("run CMD --help");
        assert!(sub.status.success(), "{cmd} --help failed");
        assert!(!sub.stdout.is_empty());
    }
    assert!(
        text.contains("Exit codes"),
        "exit codes are documented in --help"
    );
}
