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
//!
//! The same is done for the small competition of "Serving every team" (between the
//! `<!-- recipe:begin -->` and `<!-- recipe:end -->` markers): 2,000 rows and five teams, each
//! of them answered and ranked.

use std::io::Write;
use std::net::TcpListener;
use std::path::Path;
use std::process::Command;

/// The part of the README between `<!-- NAME:begin -->` and `<!-- NAME:end -->`.
fn region<'a>(readme: &'a str, name: &str) -> &'a str {
    let begin = readme
        .find(&format!("<!-- {name}:begin -->"))
        .unwrap_or_else(|| panic!("README has a {name}:begin marker"));
    let end = readme
        .find(&format!("<!-- {name}:end -->"))
        .unwrap_or_else(|| panic!("README has a {name}:end marker"));
    &readme[begin..end]
}

/// The `sh` blocks of a region, in order.
fn sh_blocks(readme: &str, name: &str) -> Vec<String> {
    let tour = region(readme, name);
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

/// The `text` blocks of a region (what the README says the commands print).
fn shown_output(readme: &str, name: &str) -> Vec<String> {
    let mut lines = Vec::new();
    let mut rest = region(readme, name);
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

/// Runs the `sh` blocks of region `name` as one bash script in an empty directory (the daemon
/// started by `serve`, a line of the blocks, on a free port), checks that it succeeds and that
/// every output line the region shows was printed; returns the directory and what was printed.
fn run_region(
    name: &str,
    serve: &str,
    min_blocks: usize,
    min_lines: usize,
) -> (tempfile::TempDir, String) {
    let readme = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md"))
        .expect("read README.md");
    let blocks = sh_blocks(&readme, name);
    assert!(
        blocks.len() >= min_blocks,
        "the {name} has {} sh blocks",
        blocks.len()
    );
    let script_body = blocks.join("\n");
    assert_eq!(
        script_body.matches(serve).count(),
        1,
        "the {name} starts the daemon once, as `{serve}`"
    );
    let port = free_port();
    let db = serve
        .trim_start_matches("holdout serve ")
        .trim_end_matches(" &");
    let started = format!(
        "holdout serve {db} --listen 127.0.0.1:{port} 2>serve.log &\n\
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
    let path = dir.path().join(format!("{name}.sh"));
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
        "the {name} failed ({}):\n--- script\n{script}\n--- stdout\n{stdout}\n--- stderr\n{stderr}",
        out.status
    );

    // Every output line the README shows is printed; a line that ends in `...` is shortened
    // there, so it is checked as the start of a printed line, and a bare `...` stands for
    // lines left out.
    let printed = format!("{stdout}\n{stderr}");
    let printed_lines: Vec<&str> = printed.lines().map(str::trim_end).collect();
    let mut checked = 0;
    for line in shown_output(&readme, name) {
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
            "the README shows `{line}`, which the {name} did not print:\n{printed}"
        );
        checked += 1;
    }
    assert!(
        checked >= min_lines,
        "only {checked} output lines were checked"
    );
    (dir, printed)
}

#[test]
fn the_readme_tour_runs_as_written() {
    let (dir, _) = run_region("tour", "holdout serve --db ledger.db &", 6, 20);
    // The chart the README shows was made.
    let png = std::fs::read(dir.path().join("feedback.png")).expect("feedback.png written");
    assert!(png.starts_with(b"\x89PNG"), "feedback.png is a PNG");
}

/// The small competition of "Serving every team": 2,000 rows, five teams, as written; every
/// team is answered on the feedback holdout and ranked in the final round.
#[test]
fn the_readme_small_competition_serves_every_team() {
    let (_dir, printed) = run_region("recipe", "holdout serve --db cup.db &", 1, 10);
    for team in ["ash", "birch", "cedar", "dune", "elm"] {
        assert!(
            printed
                .lines()
                .any(|l| l.split_whitespace().nth(1) == Some(team) && l.contains("[0.")),
            "team {team} has no leaderboard row:\n{printed}"
        );
        assert!(
            printed
                .lines()
                .any(|l| l.starts_with("label ") && l.split_whitespace().nth(2) == Some(team)),
            "team {team} was not ranked:\n{printed}"
        );
    }
    // The feedback holdout's answers are charged to each team's own share, and say so.
    assert!(
        printed.contains("budget     spent 0.005 of its share 0.01, remaining 0.005"),
        "{printed}"
    );
    // A refusal prints a line starting "refused (REASON)".
    assert!(
        !printed.lines().any(|l| l.starts_with("refused")),
        "a submission was refused:\n{printed}"
    );
}
