//! The command line: parse arguments, call the library, map outcomes to exit codes.
//! Nothing here decides anything; each verb is a thin wrapper over a library call.

mod check;
mod compare;
mod demo;
mod failsafe_test;
mod lock;
mod logging;
mod read;
mod record;
mod replay;
mod run;
mod simulate;
mod step_test;
mod sweep;
mod test;

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

/// Spillway: divert solar surplus into useful loads, never export where it is forbidden.
#[derive(Debug, Parser)]
#[command(name = "spillway", version, about, long_about = None)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Verb,
    /// How log lines look (the level comes from RUST_LOG, e.g. `RUST_LOG=debug`).
    #[arg(long, global = true, value_enum, default_value = "human")]
    pub log_format: logging::LogFormat,
}

/// The verbs.
#[derive(Debug, Subcommand)]
pub enum Verb {
    /// Check a site file and print the model as Spillway understood it.
    Check {
        /// The site file (YAML).
        site: PathBuf,
        /// Print only errors and warnings, not the model.
        #[arg(long)]
        quiet: bool,
    },
    /// Run the site's rules against its simulated plant (and a no-diversion baseline on
    /// the same weather) and report energies, export, loads, obligations and costs.
    Simulate {
        /// The site file, with a `plant:` section.
        site: PathBuf,
        #[command(flatten)]
        run: simulate::RunArgs,
        /// Report format.
        #[arg(long, value_enum, default_value = "text")]
        report: simulate::Format,
        /// Write a chart (SVG): power flows for short runs, monthly bars for long ones.
        #[arg(long)]
        chart: Option<PathBuf>,
    },
    /// Replay a recorded PV and household series (CSV: time, pv_w, house_w) against the
    /// site's rules, with the same report as `simulate`.
    Replay {
        /// The site file, with a `plant:` section (its PV and house are replaced).
        site: PathBuf,
        /// The recorded series.
        recorded: PathBuf,
        #[command(flatten)]
        run: simulate::RunArgs,
        /// Report format.
        #[arg(long, value_enum, default_value = "text")]
        report: simulate::Format,
        /// Write a chart (SVG).
        #[arg(long)]
        chart: Option<PathBuf>,
    },
    /// Run the site once per value of one setting (a year each by default), on all
    /// cores, and tabulate import, export, savings and the array's simple payback.
    Sweep {
        /// The site file.
        site: PathBuf,
        /// The setting and its values: KEY=FROM..TO:STEP, e.g.
        /// `plant.solar.arrays.roof.strings.0.modules=8..20:2` or
        /// `loads.water_heater.start#1=2kW..4kW:0.5kW` (the rule's first number).
        #[arg(long)]
        vary: String,
        #[command(flatten)]
        run: simulate::RunArgs,
        /// Report format.
        #[arg(long, value_enum, default_value = "text")]
        report: simulate::Format,
        /// Write a chart (SVG) of energies, savings and payback against the value.
        #[arg(long)]
        chart: Option<PathBuf>,
        /// Runs in parallel (default: the number of cores).
        #[arg(long)]
        jobs: Option<usize>,
    },
    /// Check the site's own expectations (`expect:`) against its named simulated days:
    /// a pass/fail table, exit code 0 when every check passes, 1 otherwise.
    Test {
        /// The site file, with `plant:` and `expect:` sections.
        site: PathBuf,
        /// Simulation step.
        #[arg(long, default_value = "1s", value_parser = simulate::parse_duration)]
        step: std::time::Duration,
        /// Output format.
        #[arg(long, value_enum, default_value = "text")]
        report: simulate::Format,
    },
    /// Run two site files' rules on the same plant (the first file's), weather and seed,
    /// and show their figures side by side with the better value marked.
    Compare {
        /// The first site file (its plant is used for both).
        a: PathBuf,
        /// The second site file.
        b: PathBuf,
        /// Run both on a recorded PV and household series (the CSV `replay` reads, e.g.
        /// the site's own `run --replay-log`) in place of the modelled ones.
        #[arg(long, value_name = "FILE.csv")]
        recorded: Option<PathBuf>,
        #[command(flatten)]
        run: simulate::RunArgs,
        /// Output format.
        #[arg(long, value_enum, default_value = "text")]
        report: simulate::Format,
    },
    /// Run the controller: read the devices, decide, switch, until SIGINT or SIGTERM.
    Run(run::RunArgs),
    /// Watch the controller work: a built-in site against the plant simulator on loopback.
    Demo(demo::DemoArgs),
    /// Read every point once and print raw registers and decoded values (commissioning).
    Read(read::ReadArgs),
    /// Switch one load on and off and measure the step at the grid meter (commissioning).
    StepTest(step_test::StepTestArgs),
    /// Time the way to the safe state while the grid meter's link is disconnected, and
    /// the return once it is reconnected (commissioning).
    FailsafeTest(failsafe_test::FailsafeTestArgs),
}

/// A duration with its unit: `10s`, `2min`, `500ms`.
pub fn parse_duration(text: &str) -> Result<std::time::Duration, String> {
    let q = spillway::units::parse_quantity(text).map_err(|e| format!("`{text}`: {e}"))?;
    if q.dimension != spillway::units::Dimension::Duration || q.value < 0.0 || !q.value.is_finite() {
        return Err(format!("`{text}` is not a duration like 10s or 2min"));
    }
    match std::time::Duration::try_from_secs_f64(q.value) {
        Ok(d) if d <= spillway::config::values::MAX_DURATION => Ok(d),
        _ => Err(format!("`{text}` is longer than a year (366 d at most)")),
    }
}

/// Whether to colour diagnostics.
pub fn color() -> bool {
    std::io::stderr().is_terminal() && std::env::var_os("NO_COLOR").is_none()
}

/// Runs a parsed command line.
pub fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    match cli.command {
        Verb::Check { site, quiet } => check::run(&site, quiet),
        Verb::Simulate { site, run, report, chart } => simulate::run(&site, &run, report, chart.as_deref()),
        Verb::Compare { a, b, recorded, run, report } => compare::run(&a, &b, recorded.as_deref(), &run, report),
        Verb::Test { site, step, report } => test::run(&site, step, report),
        Verb::Sweep { site, vary, run, report, chart, jobs } => {
            sweep::run(&site, &vary, run, report, chart.as_deref(), jobs)
        }
        Verb::Replay { site, recorded, run, report, chart } => {
            replay::run(&site, &recorded, &run, report, chart.as_deref())
        }
        Verb::Run(args) => run::run(args, cli.log_format),
        Verb::Demo(args) => demo::run(args, cli.log_format),
        Verb::Read(args) => read::run(args, cli.log_format),
        Verb::StepTest(args) => step_test::run(args, cli.log_format),
        Verb::FailsafeTest(args) => failsafe_test::run(args, cli.log_format),
    }
}

/// A small no-export site for the commands' own tests: its file text, and the site.
#[cfg(test)]
pub(crate) fn test_site(name: &str) -> (spillway::config::model::Site, String) {
    let yaml = format!(
        "site: {{ name: {name}, timezone: Europe/Lisbon, export: forbidden }}
devices:
  meter: {{ modbus_tcp: 127.0.0.1:5020, unit: 1 }}
points:
  grid: {{ device: meter, register: 0, type: i16, unit: W }}
inverter: {{ rated: 5kW, limit: {{ device: meter, register: 10 }} }}
loads: []
"
    );
    let site =
        spillway::config::load_str("t.yaml", &yaml).map(|l| l.site).unwrap_or_else(|e| panic!("{}", e.render(false)));
    (site, yaml)
}
