//! The `posteriord` binary: parse the command line, set up logging, run, and pick the exit code.

use std::io::IsTerminal;
use std::process::ExitCode;

use clap::Parser;
use tracing_subscriber::EnvFilter;

use posteriord::cli::{self, Cli, UsageError};

fn init_logging() {
    // POSTERIORD_LOG takes an env-filter directive (e.g. "info,posteriord=debug").
    let filter =
        EnvFilter::try_from_env("POSTERIORD_LOG").unwrap_or_else(|_| EnvFilter::new("info"));
    // Colours only on a terminal: a log file or a journal must not fill with escape codes.
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_ansi(std::io::stderr().is_terminal())
        .with_writer(std::io::stderr);
    if std::env::var("POSTERIORD_LOG_FORMAT").is_ok_and(|f| f == "json") {
        builder.json().init();
    } else {
        builder.init();
    }
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    init_logging();
    match cli::run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        // The reader of standard output is gone (`| head`): nothing is left to say to anyone.
        Err(e) if cli::is_broken_pipe(&e) => ExitCode::SUCCESS,
        Err(e) if e.downcast_ref::<UsageError>().is_some() => {
            eprintln!("posteriord: {e}");
            ExitCode::from(2)
        }
        Err(e) => {
            eprintln!("posteriord: {e:#}");
            ExitCode::from(1)
        }
    }
}
