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
            // Many messages already end with their cause; a cause already said is not
            // repeated.
            eprintln!("error: {e}");
            let mut said = e.to_string();
            for cause in e.chain().skip(1) {
                let text = cause.to_string();
                if !said.contains(&text) {
                    eprintln!("  caused by: {text}");
                }
                said.push_str(&text);
            }
            ExitCode::from(2)
        }
    }
}
