//! `spillway test SITE.yaml`: the site's own expectations against its named simulated
//! days; a pass/fail table, exit code 0 when all pass and 1 otherwise.

use std::path::Path;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::Duration;

use spillway::config::{self, LoadError};
use spillway::offline::{self, expect};

use super::simulate::Format;

pub fn run(path: &Path, step: Duration, format: Format) -> anyhow::Result<ExitCode> {
    let loaded = match config::load_file(path) {
        Ok(l) => l,
        Err(e @ LoadError::Invalid { .. }) => {
            eprint!("{}", e.render(super::color()));
            eprintln!("{e}");
            return Ok(ExitCode::from(1));
        }
        Err(e) => return Err(e.into()),
    };
    let exp = match expect::read(&loaded) {
        Ok(e) => {
            if !e.warnings.is_empty() {
                eprint!(
                    "{}",
                    spillway::diag::render(&loaded.source.path, &loaded.source.text, &e.warnings, super::color())
                );
            }
            e
        }
        Err(diags) => {
            eprint!("{}", spillway::diag::render(&loaded.source.path, &loaded.source.text, &diags, super::color()));
            return Ok(ExitCode::from(1));
        }
    };
    if exp.days.is_empty() || exp.checks.is_empty() {
        eprintln!(
            "{}: no `expect:` days and checks to run (see the README, \"Site expectations\")",
            loaded.source.path
        );
        return Ok(ExitCode::from(1));
    }
    let plant = match offline::plant_section(&loaded) {
        Ok(p) => p,
        // A site file without a usable plant is a checked problem (1), as under `check`.
        Err(e) => {
            eprintln!("error: {e}");
            return Ok(ExitCode::from(1));
        }
    };
    let site = Arc::new(loaded.site.clone());
    let verdicts = expect::run(&site, &loaded, &plant, &exp, step)?;
    match format {
        Format::Json => println!("{}", serde_json::to_string_pretty(&verdicts)?),
        Format::Text => print!("{}", expect::to_text(&verdicts)),
    }
    Ok(if verdicts.iter().all(|v| v.passed) { ExitCode::SUCCESS } else { ExitCode::from(1) })
}
