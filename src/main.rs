//! The `holdout` binary: parses the command line and hands over to the library.

use std::process::ExitCode;

use clap::Parser;
use holdout_ledger::cli::{Cli, run};

fn main() -> ExitCode {
    run(Cli::parse())
}
