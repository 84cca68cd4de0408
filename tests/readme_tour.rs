//! The README's tour by role, run as a new user would: every `sh` block between the
//! `<!-- tour:begin -->` and `<!-- tour:end -->` markers, in order, in one bash session in an
//! empty directory, with this build's `holdout` first on the PATH. The one change made to the
//! text is the daemon's address: `holdout serve` gets a free loopback port (and the clients
//! `HOLDOUT_SERVER`), so that tests can run side by side; the test waits for the port before
//! the next command, as a person would wait for the daemon's first log line.
//!
//! The script stops at the first command that fails (`set -e`), so the test fails if any
//! command of the tour does; and the lines the README shows as output are checked against what
//! the commands really print (timestamps and hashes are not shown there, so nothing is masked;
//! a line the README shortens with `...` is checked as a prefix).

use std::io::Write;
use std::net::TcpListener;
use std::path::Path;
use std::process::Command;

/// The `sh` blocks of the tour, in order.
fn tour_blocks(readme: &str) -> Vec<String> {
    let begin = readme
        .find("<!-- tour:begin -->")
        .expect("README has a tour:begin marker");
    let end = readme
        .find("<!-- tour:end -->")
        .expect("README has a tour:end marker");
    let tour = &readme[begin..end];
    let mut blocks = Vec::new();
    let mut rest = tour;
    while let Some(i) = rest.find("```sh\n") {
        let body = &rest[i + 6..];
        let j = body.find("```").expect("an sh block is closed");
        blocks.push(body[..j].to_string());
        rest = &body[j + 3..];
    }
    blocks
}

/// The `text` blocks of the tour (what the README says the commands print).
fn shown_output(readme: &str) -> Vec<String> {
    let begin = readme.find("<!-- tour:begin -->").unwrap();
    let end = readme.find("<!-- tour:end -->").unwrap();
    let mut lines = Vec::new();
    let mut rest = &readme[begin..end];
    while let Some(i) = rest.find("```text\n") {
        let body = &rest[i + 8..];
        let j = body.find("```").unwrap();
        lines.extend(body[..j].lines().map(str::to_string));
        rest = &body[j + 3..];
    }
    lines
}

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port()
}

#[test]
fn the_readme_tour_runs_as_written() {
    let readme = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md"))
        .expect("read README.md");
    let blocks = tour_blocks(&readme);
    assert!(blocks.len() >= 6, "the tour has {} sh blocks", blocks.len());
    let serve = "holdout serve --db ledger.db &";
    let script_body = blocks.join("\n");
    assert_eq!(
        script_body.matches(serve).count(),
        1,
        "the tour starts the daemon once, as `{serve}`"
    );
    let port = free_port();
    let started = format!(
        "holdout serve --db ledger.db --listen 127.0.0.1:{port} 2>serve.log &\n\
         SERVE_PID=$!\n\
         trap 'kill $SERVE_PID 2>/dev/null' EXIT\n\
         for _ in $(seq 200); do (exec 3<>/dev/tcp/127.0.0.1/{port}) 2>/dev/null && break; \
         sleep 0.05; done"
    );
    let script = format!(
        "set -euo pipefail\nexport HOLDOUT_SERVER=http://127.0.0.1:{port}\n{}\n",
        script_body.replace(serve, &started)
    );

    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("tour.sh");
    std::fs::File::create(&path)
        .unwrap()
        .write_all(script.as_bytes())
        .unwrap();
    let bin = Path::new(env!("CARGO_BIN_EXE_holdout"))
        .parent()
        .unwrap()
        .to_path_buf();
    let out = Command::new("bash")
        .arg(&path)
        .current_dir(dir.path())
        .env(
            "PATH",
            format!("{}:{}", bin.display(), std::env::var("PATH").unwrap()),
        )
        .env_remove("HOLDOUT_TOKEN")
        .output()
        .expect("run bash");
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        out.status.success(),
        "the tour failed ({}):\n--- script\n{script}\n--- stdout\n{stdout}\n--- stderr\n{stderr}",
        out.status
    );

    // Every output line the README shows is printed; a line that ends in `...` is shortened
    // there, so it is checked as the start of a printed line, and a bare `...` stands for
    // lines left out.
    let printed = format!("{stdout}\n{stderr}");
    let printed_lines: Vec<&str> = printed.lines().map(str::trim_end).collect();
    let mut checked = 0;
    for line in shown_output(&readme) {
        let line = line.trim_end();
        if line.is_empty() || line == "..." {
            continue;
        }
        let found = match line.strip_suffix("...") {
            Some(start) => printed_lines
                .iter()
                .any(|p| p.starts_with(start.trim_end())),
            None => printed_lines.contains(&line),
        };
        assert!(
            found,
            "the README shows `{line}`, which the tour did not print:\n{printed}"
        );
        checked += 1;
    }
    assert!(checked >= 20, "only {checked} output lines were checked");
    // The chart the README shows was made.
    let png = std::fs::read(dir.path().join("feedback.png")).expect("feedback.png written");
    assert!(png.starts_with(b"\x89PNG"), "feedback.png is a PNG");
}
