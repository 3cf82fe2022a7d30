//! `spillway step-test SITE.yaml --load NAME [--hold 10s] [--discharge 500W] [--record FILE] [--yes]`:
//! switch one load on, watch the grid meter, switch it off — proof that the relay feeds
//! the right load. For a battery, `--discharge` steps it the other way, which proves
//! the setpoint's sign as well. Exit 0 when the step looks like the load's power, 1
//! otherwise.

use std::fmt::Write as _;
use std::io::{BufRead, IsTerminal, Write};
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::Duration;

use spillway::config::model::LoadKind;
use spillway::daemon::commission::{self, StepOptions, StepPhase};
use spillway::engine::Command;
use spillway::units::{Power, format_duration};

use super::logging::{self, LogFormat};

/// Arguments of `step-test`.
#[derive(Debug, clap::Args)]
pub struct StepTestArgs {
    /// The site file (YAML).
    pub site: PathBuf,
    /// The load to switch.
    #[arg(long, value_name = "NAME")]
    pub load: String,
    /// How long the load stays on.
    #[arg(long, value_name = "DURATION", default_value = "10s", value_parser = super::parse_duration)]
    pub hold: Duration,
    /// How long the meter is watched before switching on and after switching off.
    #[arg(long, value_name = "DURATION", default_value = "5s", value_parser = super::parse_duration)]
    pub settle: Duration,
    /// A battery allowed to discharge: discharge this much during the hold instead of
    /// charging (keep it below what the house draws, or it is exported).
    #[arg(long, value_name = "POWER", value_parser = parse_power)]
    pub discharge: Option<Power>,
    /// Append the result to this commissioning record (Markdown; started with the site
    /// as Spillway reads it when new).
    #[arg(long, value_name = "FILE")]
    pub record: Option<PathBuf>,
    /// Do not ask for confirmation.
    #[arg(long)]
    pub yes: bool,
}

fn parse_power(text: &str) -> Result<Power, String> {
    match spillway::units::parse_quantity(text) {
        Ok(q) if q.dimension == spillway::units::Dimension::Power && q.value > 0.0 => Ok(Power(q.value)),
        Ok(_) => Err(format!("\"{text}\" is not a positive power (e.g. 500W)")),
        Err(e) => Err(e.to_string()),
    }
}

fn w(v: Option<f64>) -> String {
    v.map_or_else(|| "no reading".to_owned(), |v| Power(v.round()).to_string())
}

pub fn run(args: StepTestArgs, format: LogFormat) -> anyhow::Result<ExitCode> {
    let loaded = match super::run::load_site(&args.site) {
        Ok(l) => l,
        Err(code) => return Ok(code),
    };
    // Held for the whole test: the service (or another test) must not drive the site
    // meanwhile.
    let _lock = match super::lock::lock_or_explain(&args.site, "step-test") {
        Ok(lock) => lock,
        Err(message) => {
            eprintln!("error: {message}");
            return Ok(ExitCode::from(2));
        }
    };
    logging::init(format, "warn");
    // A record that cannot be written is found before anything is switched.
    if let Some(path) = &args.record
        && let Err(e) = super::record::writable(path)
    {
        eprintln!("error: cannot write the record {}: {e}", path.display());
        return Ok(ExitCode::from(2));
    }
    let site_text = loaded.source.text.clone();
    let site = Arc::new(loaded.site);
    let Some((id, load)) = site.load(&args.load) else {
        let names: Vec<&str> = site.loads.iter().map(|l| l.name.as_str()).collect();
        eprintln!("error: the site has no load \"{}\" (loads: {})", args.load, names.join(", "));
        // A bad flag value: an error that stops the command.
        return Ok(ExitCode::from(2));
    };
    let command = match (args.discharge, &load.kind) {
        (None, _) => Command::On,
        (Some(p), LoadKind::Battery { discharge: Some(d), .. }) if p <= d.max => Command::Charge(-p),
        (Some(_), LoadKind::Battery { discharge: Some(d), .. }) => {
            eprintln!("error: \"{}\" may discharge at most {} (its `discharge.max`)", load.name, d.max);
            return Ok(ExitCode::from(2));
        }
        (Some(_), _) => {
            eprintln!("error: --discharge is for a battery load with `discharge:`; \"{}\" is not one", load.name);
            return Ok(ExitCode::from(2));
        }
    };
    let targets: Vec<String> =
        spillway::actuators::load_levels(load, command).iter().map(|(t, _)| describe_target(&site, t)).collect();
    let is_battery = matches!(load.kind, LoadKind::Battery { .. });
    // What the hold is called: a battery is told a power, any other load switched on.
    let (what, on_word, off_word) = match command {
        Command::Charge(p) if p < Power::ZERO => {
            (format!("told to DISCHARGE {}", -p), format!("DISCHARGE {}", -p), "0 W")
        }
        _ if is_battery => {
            let p = command.power(&load.kind);
            (format!("told to CHARGE {p}"), format!("CHARGE {p}"), "0 W")
        }
        _ => (format!("switched ON ({})", command.power(&load.kind)), "ON".to_owned(), "OFF"),
    };
    println!(
        "step test: {} will be {what} for {} through {}, then {off_word}.",
        load.name,
        format_duration(args.hold),
        targets.join(", ")
    );
    if command != Command::On {
        println!(
            "  a discharge larger than the house draws now is exported: keep --discharge small on a site that may not export"
        );
    }
    if !args.yes {
        if !std::io::stdin().is_terminal() {
            eprintln!("error: no terminal to confirm on: run with --yes once the load is safe to switch");
            return Ok(ExitCode::from(1));
        }
        print!("Is it safe to switch this load now (nobody working on it, thermostat and cut-out in place)? [y/N] ");
        std::io::stdout().flush()?;
        let mut answer = String::new();
        std::io::stdin().lock().read_line(&mut answer)?;
        if !matches!(answer.trim(), "y" | "Y" | "yes" | "YES" | "Yes") {
            println!("not switched");
            return Ok(ExitCode::from(1));
        }
    }
    let options = StepOptions { hold: args.hold, settle: args.settle, command, ..StepOptions::default() };
    let mut last = None;
    let result = commission::step_test(Arc::clone(&site), id, options, |phase| match phase {
        StepPhase::Baseline => println!("devices answer; watching the meter for {}", format_duration(options.settle)),
        StepPhase::On => println!("{}: {on_word}", load_name(&site, id)),
        StepPhase::Off => println!("{}: {off_word}", load_name(&site, id)),
        StepPhase::Grid(g) => {
            // One line per sample would scroll; show the reading in place on a terminal.
            if std::io::stdout().is_terminal() {
                print!("\r  grid {:>10}   ", Power(g.round()).to_string());
                let _ = std::io::stdout().flush();
                last = Some(g);
            }
        }
    });
    if last.is_some() {
        println!();
    }
    let r = match result {
        Ok(r) => r,
        Err(e) => {
            eprintln!("error: {e}");
            return Ok(ExitCode::from(1));
        }
    };
    // What the terminal shows from here on is also the record's text.
    let mut text = String::new();
    let _ = writeln!(
        text,
        "step test of {} through {}: {what} for {}",
        load.name,
        targets.join(", "),
        format_duration(args.hold)
    );
    let _ = writeln!(
        text,
        "grid before {}, while on {}, after {} ({} / {} / {} readings)",
        w(r.grid_before),
        w(r.grid_on),
        w(r.grid_after),
        r.samples[0],
        r.samples[1],
        r.samples[2]
    );
    if let Some(p) = r.load_power_on {
        let _ = writeln!(text, "the load's own meter read {} while on", w(Some(p)));
    }
    // No controller runs during a step test (it holds the site's lock): on a site whose
    // export is limited, nothing holds the limit meanwhile, and an installer should know.
    let exported = [r.grid_before, r.grid_after].into_iter().flatten().fold(0.0_f64, |m, g| m.max(-g));
    if let Some(limit) = site.export_limit()
        && exported > limit.0 + site.guard.tolerance.0
    {
        let _ = writeln!(
            text,
            "note: the site exported up to {} around the test (export limit {limit}): no controller runs during a step test, so nothing holds the limit meanwhile; keep the tests short, or make them when the sun is low",
            Power(exported.round())
        );
    }
    let passed = match r.step() {
        Some(step) if r.plausible() && is_battery => {
            let _ = writeln!(
                text,
                "step {:+.0} W against {} asked: the setpoint drives this battery, + charging",
                step,
                Power(r.rated)
            );
            true
        }
        Some(step) if r.plausible() => {
            let _ =
                writeln!(text, "step {:+.0} W against {} rated: the relay switches this load", step, Power(r.rated));
            true
        }
        Some(step) if r.reversed() && is_battery => {
            let _ = writeln!(
                text,
                "step {:+.0} W against {} asked: the battery went the other way. Spillway writes + for charging and − for discharging; this setpoint takes the opposite sign: set the battery inverter (or its gateway) to take + as charging before letting Spillway drive it",
                step,
                Power(r.rated)
            );
            false
        }
        Some(step) if r.reversed() => {
            let _ = writeln!(
                text,
                "step {:+.0} W against {} rated: the grid reading fell by about the load's power as it came on, so the meter's sign looks reversed (Spillway takes import as positive). If the meter counts export as positive, add `scale: -1` to the `grid` point (or set the meter so), check with `spillway read` that the grid shows import while the PV gives nothing, and run this test again. Do not run the site until it passes: with the sign reversed the guard takes export for import",
                step,
                Power(r.rated)
            );
            false
        }
        Some(step) => {
            let _ = writeln!(
                text,
                "step {:+.0} W against {} rated: check that {} feeds {} (and that the load was not already hot or off by its own thermostat)",
                step,
                Power(r.rated),
                targets.join(", "),
                load_name(&site, id)
            );
            false
        }
        None => {
            let _ = writeln!(text, "no grid readings: the step could not be measured");
            false
        }
    };
    let _ = writeln!(text, "result: {}", if passed { "PASS" } else { "FAIL" });
    print!("{text}");
    if let Some(path) = &args.record {
        let section = super::record::Section { title: format!("Step test: {}", load.name), text: &text, passed };
        if let Err(e) = super::record::append(path, &site, &args.site, &site_text, &section) {
            eprintln!("error: cannot write the record {}: {e}", path.display());
            return Ok(ExitCode::from(2));
        }
        println!("result appended to the record {}", path.display());
    }
    Ok(if passed { ExitCode::SUCCESS } else { ExitCode::from(1) })
}

fn load_name(site: &spillway::config::model::Site, id: spillway::config::model::LoadId) -> &str {
    &site.loads[id.0].name
}

fn describe_target(site: &spillway::config::model::Site, t: &spillway::config::model::Write) -> String {
    use spillway::config::model::Write;
    let dev = &site.devices[t.device().0].name;
    match t {
        Write::Coil { address, .. } => format!("{dev} coil {address}"),
        Write::Register { address, .. } => format!("{dev} register {address}"),
        Write::Mqtt { topic, .. } => format!("{dev} topic {topic}"),
        Write::SunSpecLimit { .. } => format!("{dev} SunSpec limit"),
    }
}
