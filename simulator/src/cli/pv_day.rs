//! `spillway-sim pv-day`: one clear-sky day of a single array.

use std::io::Write;

use anyhow::Context;
use chrono::{DateTime, NaiveDate};
use spillway_sim::pv::{LocationConfig, SolarConfig, simulate_day};
use spillway_sim::weather::WeatherConfig;

/// Arguments of `pv-day`. Fixed model choices: Ineichen–Perez clear sky, Hay–Davies
/// transposition with albedo 0.25, Faiman u0 = 25, u1 = 6.84, PVWatts DC and inverter
/// (nominal efficiency 0.96).
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Latitude, degrees north (south negative).
    #[arg(long, allow_hyphen_values = true)]
    lat: f64,
    /// Longitude, degrees east (west negative).
    #[arg(long, allow_hyphen_values = true)]
    lon: f64,
    /// Site altitude above sea level, m.
    #[arg(long, allow_hyphen_values = true)]
    altitude: f64,
    /// IANA time zone of the site; the day runs from local midnight to midnight.
    #[arg(long)]
    tz: String,
    /// Local date, YYYY-MM-DD.
    #[arg(long)]
    date: NaiveDate,
    /// Array tilt from horizontal, degrees.
    #[arg(long)]
    tilt: f64,
    /// Array azimuth, degrees clockwise from north (180 = south).
    #[arg(long)]
    azimuth: f64,
    /// DC nameplate, kWp.
    #[arg(long)]
    kwp: f64,
    /// Inverter AC rating, kW [default: --kwp].
    #[arg(long)]
    ac_kw: Option<f64>,
    /// Temperature coefficient of power, 1/K.
    #[arg(long, default_value_t = -0.004, allow_hyphen_values = true)]
    gamma: f64,
    /// Linke turbidity.
    #[arg(long, default_value_t = 3.0)]
    linke: f64,
    /// Air temperature (constant), °C.
    #[arg(long, default_value_t = 20.0, allow_hyphen_values = true)]
    air_temp: f64,
    /// Wind speed (constant), m/s.
    #[arg(long, default_value_t = 1.0)]
    wind: f64,
    /// DC system losses, percent.
    #[arg(long, default_value_t = 0.0)]
    losses: f64,
    /// Time step with a unit (1s, 30s, 1min, 5min).
    #[arg(long, default_value = "1min", value_parser = super::duration_arg)]
    step: f64,
    /// Print the time series as CSV instead of the daily totals.
    #[arg(long)]
    csv: bool,
}

/// Prints the day's totals as JSON, or the series as CSV.
pub fn run(args: &Args) -> anyhow::Result<()> {
    anyhow::ensure!(args.kwp > 0.0, "--kwp must be positive");
    anyhow::ensure!(args.step >= 1.0, "--step must be at least 1s");
    let location =
        LocationConfig { latitude: args.lat, longitude: args.lon, altitude: args.altitude, timezone: args.tz.clone() };
    let mut solar = SolarConfig::single_array(args.tilt, args.azimuth, args.kwp);
    solar.arrays[0].temp_coefficient = args.gamma;
    solar.inverter.rated_ac = Some(args.ac_kw.unwrap_or(args.kwp) * 1000.0);
    solar.losses = args.losses;
    let weather = WeatherConfig::steady_clear(args.air_temp, args.wind, args.linke);
    let mut system = solar.build(&location, &weather, 0).context("cannot build the PV system")?;
    let tz = system.tz();
    let stdout = std::io::stdout();
    let mut out = std::io::BufWriter::new(stdout.lock());
    if args.csv {
        writeln!(out, "time,ghi_w_m2,poa_w_m2,cell_temp_c,dc_w,ac_w")?;
    }
    let mut failed = None;
    let summary = simulate_day(&mut system, args.date, args.step, |t_ms, s| {
        if !args.csv || failed.is_some() {
            return;
        }
        let time = DateTime::from_timestamp_millis(t_ms).map(|t| t.with_timezone(&tz).to_rfc3339()).unwrap_or_default();
        if let Err(e) =
            writeln!(out, "{time},{:.2},{:.2},{:.2},{:.1},{:.1}", s.ghi_w_m2, s.poa_w_m2, s.cell_temp_c, s.dc_w, s.ac_w)
        {
            failed = Some(e);
        }
    });
    if let Some(e) = failed {
        return Err(e.into());
    }
    if !args.csv {
        writeln!(out, "{}", serde_json::to_string(&summary)?)?;
    }
    out.flush()?;
    Ok(())
}
