//! The `spillway-sim` binary: parses arguments, runs one command, prints JSON.

mod cli;

use std::process::ExitCode;

fn main() -> ExitCode {
    match cli::run() {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            // The chain, outermost first, without repeating a cause a message already
            // ends with.
            let mut text = e.to_string();
            for cause in e.chain().skip(1) {
                let c = cause.to_string();
                if !text.contains(&c) {
                    text.push_str(": ");
                    text.push_str(&c);
                }
            }
            eprintln!("spillway-sim: {text}");
            ExitCode::FAILURE
        }
    }
}
