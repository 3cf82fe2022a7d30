//! The `spillway` binary: argument parsing and error reporting only.

use std::process::ExitCode;

use clap::Parser;

#[path = "cli/mod.rs"]
mod cli;

fn main() -> ExitCode {
    let args = cli::Cli::parse();
    match cli::run(args) {
        Ok(code) => code,
        Err(e) => {
            // The whole chain, outermost first: "cannot read site file x: No such file".
            eprintln!("error: {e}");
            for cause in e.chain().skip(1) {
                eprintln!("  caused by: {cause}");
            }
            ExitCode::from(2)
        }
    }
}
