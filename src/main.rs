//! The `holdout` binary: parses the command line and hands over to the library.

use std::process::ExitCode;

use clap::Parser;
use holdout_ledger::cli::{Cli, run};

/// mimalloc instead of the system allocator: the offline audit allocates and frees a dozen
/// strings per ledger entry on three threads, and with glibc's allocator that was about a tenth
/// of its time (more on a loaded machine; see DEVELOPERS.md, "Benchmark" under the audit).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

fn main() -> ExitCode {
    quiet_broken_pipe();
    run(Cli::parse())
}

/// `holdout history NAME | head` closes stdout early, and the next `println!` panics. Exit
/// quietly with the shell's status for SIGPIPE (128 + 13) instead, as other command-line tools
/// do; whatever was committed to the ledger before printing stays committed.
fn quiet_broken_pipe() {
    let default = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        let payload = info.payload();
        let message = payload
            .downcast_ref::<String>()
            .map(String::as_str)
            .or_else(|| payload.downcast_ref::<&str>().copied())
            .unwrap_or("");
        if message.contains("failed printing to stdout") && message.contains("Broken pipe") {
            std::process::exit(141);
        }
        default(info);
    }));
}
