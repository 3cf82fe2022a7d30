//! `spillway check`: load a site, print the resolved model or every located error. The
//! sections offline runs read (`plant:`, `simulation:`, `expect:`) are checked too.

use std::path::Path;
use std::process::ExitCode;

use spillway::config::{self, LoadError, yaml::Value};
use spillway::diag;
use spillway::offline::{self, expect};

pub fn run(path: &Path, quiet: bool) -> anyhow::Result<ExitCode> {
    let loaded = match config::load_file(path) {
        Ok(l) => l,
        Err(e @ LoadError::Invalid { .. }) => {
            eprint!("{}", e.render(super::color()));
            eprintln!("{e}");
            return Ok(ExitCode::from(1));
        }
        Err(e) => return Err(e.into()),
    };
    if !loaded.warnings.is_empty() {
        eprint!("{}", diag::render(&loaded.source.path, &loaded.source.text, &loaded.warnings, super::color()));
    }
    let mut ok = true;
    // Warnings about the offline sections (plausibility notes), counted with the site's.
    let mut offline_warnings = 0;
    let mut extra = Vec::new();
    let has = |key: &str| matches!(&loaded.tree.value, Value::Map(m) if m.iter().any(|(k, _)| k.name == key));
    if has("plant") {
        match offline::checked_plant(&loaded) {
            Ok(p) => {
                for note in offline::plausible::notes(&loaded, &p) {
                    eprintln!("{}: {note}", loaded.source.path);
                    offline_warnings += 1;
                }
                let kwp = p.solar.as_ref().map_or(0.0, |s| s.nameplate_w() / 1000.0);
                // The tank model moves the hot-water figures most, so name it.
                let tank = match &p.tank {
                    Some(t) if t.layers > 1 => format!(", tank {:.0} L in {} layers", t.volume, t.layers),
                    Some(t) => format!(", tank {:.0} L as one well-mixed node", t.volume),
                    None => String::new(),
                };
                extra.push(format!(
                    "plant: {kwp:.2} kWp{tank}, every point and actuator found on the simulated devices"
                ));
            }
            Err(e) => {
                eprintln!("{}: plant: {e:#}", loaded.source.path);
                ok = false;
            }
        }
    }
    if let Err(e) = offline::simulation_defaults(&loaded) {
        eprintln!("{e}");
        ok = false;
    }
    match expect::read(&loaded) {
        Ok(exp) => {
            if !exp.warnings.is_empty() {
                eprint!("{}", diag::render(&loaded.source.path, &loaded.source.text, &exp.warnings, super::color()));
                offline_warnings += exp.warnings.len();
            }
            if !exp.checks.is_empty() {
                extra.push(format!("expectations: {} check(s) on {} day(s)", exp.checks.len(), exp.days.len()));
            }
        }
        Err(diags) => {
            eprint!("{}", diag::render(&loaded.source.path, &loaded.source.text, &diags, super::color()));
            ok = false;
        }
    }
    if !quiet {
        print!("{}", config::describe::describe(&loaded.site));
        for line in &extra {
            println!("{line}");
        }
    }
    if !ok {
        eprintln!("{}: the site is fine, but a section for offline runs is not", loaded.source.path);
        return Ok(ExitCode::from(1));
    }
    println!("{}: ok ({} warning(s))", loaded.source.path, loaded.warnings.len() + offline_warnings);
    Ok(ExitCode::SUCCESS)
}
