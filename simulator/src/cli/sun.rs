//! `spillway-sim sun`: the sun's position at one instant.

use anyhow::Context;
use chrono::{DateTime, Datelike};
use serde::Serialize;
use spillway_sim::sky::pressure_at_altitude;
use spillway_sim::sun::{Atmosphere, Observer, delta_t_estimate, spa};

/// Arguments of `sun`.
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Latitude, degrees north (south negative).
    #[arg(long, allow_hyphen_values = true)]
    lat: f64,
    /// Longitude, degrees east (west negative).
    #[arg(long, allow_hyphen_values = true)]
    lon: f64,
    /// Instant, RFC 3339 (e.g. 2025-06-21T12:00:00+02:00).
    #[arg(long)]
    at: String,
    /// Observer elevation above sea level, m.
    #[arg(long, default_value_t = 0.0, allow_hyphen_values = true)]
    elevation: f64,
    /// Mean local air pressure, hPa [default: standard atmosphere at --elevation].
    #[arg(long)]
    pressure: Option<f64>,
    /// Mean local air temperature, °C.
    #[arg(long, default_value_t = 12.0, allow_hyphen_values = true)]
    temperature: f64,
    /// ΔT = TT − UT, s [default: Espenak–Meeus estimate for the date].
    #[arg(long, allow_hyphen_values = true)]
    delta_t: Option<f64>,
}

#[derive(Serialize)]
struct Output {
    zenith_deg: f64,
    azimuth_deg: f64,
}

/// Prints `{"zenith_deg": …, "azimuth_deg": …}`.
pub fn run(args: &Args) -> anyhow::Result<()> {
    let at = DateTime::parse_from_rfc3339(&args.at)
        .with_context(|| format!("--at `{}` is not an RFC 3339 time such as 2025-06-21T12:00:00Z", args.at))?;
    anyhow::ensure!((-90.0..=90.0).contains(&args.lat), "--lat must be between -90 and 90");
    anyhow::ensure!((-180.0..=180.0).contains(&args.lon), "--lon must be between -180 and 180");
    let observer = Observer { latitude_deg: args.lat, longitude_deg: args.lon, elevation_m: args.elevation };
    let atmosphere = Atmosphere {
        pressure_hpa: args.pressure.unwrap_or_else(|| pressure_at_altitude(args.elevation) / 100.0),
        temperature_c: args.temperature,
        ..Atmosphere::default()
    };
    let delta_t = args.delta_t.unwrap_or_else(|| delta_t_estimate(at.year(), at.month()));
    let unix_s = at.timestamp_millis() as f64 / 1000.0;
    let p = spa(unix_s, &observer, &atmosphere, delta_t);
    let out = Output { zenith_deg: p.zenith_deg, azimuth_deg: p.azimuth_deg };
    println!("{}", serde_json::to_string(&out)?);
    Ok(())
}
