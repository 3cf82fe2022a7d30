//! `spillway check`: load a site, print the resolved model or every located error.

use std::path::Path;
use std::process::ExitCode;

use spillway::config::{self, LoadError};
use spillway::diag;

pub fn run(path: &Path, quiet: bool) -> anyhow::Result<ExitCode> {
    match config::load_file(path) {
        Ok(loaded) => {
            if !loaded.warnings.is_empty() {
                eprint!("{}", diag::render(&loaded.source.path, &loaded.source.text, &loaded.warnings, super::color()));
            }
            if !quiet {
                print!("{}", config::describe::describe(&loaded.site));
            }
            println!("{}: ok ({} warning(s))", loaded.source.path, loaded.warnings.len());
            Ok(ExitCode::SUCCESS)
        }
        Err(e @ LoadError::Invalid { .. }) => {
            eprint!("{}", e.render(super::color()));
            eprintln!("{e}");
            Ok(ExitCode::from(1))
        }
        Err(e) => Err(e.into()),
    }
}
