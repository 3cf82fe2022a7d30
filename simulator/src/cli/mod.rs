//! Command-line interface of `spillway-sim`: one module per command, each printing JSON
//! (or CSV) on stdout. To add a command, add a variant to [`Command`] and a module with
//! its arguments struct and a `run` function.

mod pv_day;
mod serve;
mod sun;

use clap::{Parser, Subcommand};

/// Plant simulator for Spillway: sun, PV, and (later) the whole site.
#[derive(Debug, Parser)]
#[command(name = "spillway-sim", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Sun position (NREL SPA): apparent topocentric zenith and azimuth (clockwise from
    /// north) at one instant, as JSON.
    Sun(sun::Args),
    /// One clear-sky day of a single PV array: daily energies as JSON, or the time
    /// series as CSV with --csv.
    PvDay(pv_day::Args),
    /// Serve a plant live over Modbus TCP (units 1 meter, 2 inverter, 3 relays, 4
    /// sensors) and optionally MQTT, in real time or faster, with injected faults.
    Serve(serve::Args),
}

/// Parses the command line and runs the command.
pub fn run() -> anyhow::Result<()> {
    match Cli::parse().command {
        Command::Sun(args) => sun::run(&args),
        Command::PvDay(args) => pv_day::run(&args),
        Command::Serve(args) => serve::run(&args),
    }
}

/// Parses a duration with a unit (`1min`, `30s`) for clap.
pub(crate) fn duration_arg(text: &str) -> Result<f64, String> {
    spillway_sim::quantity::parse(text, spillway_sim::quantity::Kind::Duration)
}
