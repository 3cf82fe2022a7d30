//! The `spillway-sim` binary: parses arguments, runs one command, prints JSON.

mod cli;

use std::process::ExitCode;

fn main() -> ExitCode {
    match cli::run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("spillway-sim: {e:#}");
            ExitCode::FAILURE
        }
    }
}
