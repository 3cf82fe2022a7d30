//! `spillway-sim serve`: a plant served live over Modbus TCP (and MQTT) until Ctrl-C,
//! with a status line every few seconds.

use std::io::IsTerminal as _;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use anyhow::Context;
use chrono::{DateTime, NaiveDateTime, TimeZone, Utc};
use chrono_tz::Tz;
use spillway_sim::plant::{Flows, Plant, PlantConfig, Readings};
use spillway_sim::serve::{MqttState, ServeOptions, Server, ServerHandle, parse_fault};
use spillway_sim::site::{self, SiteOptions};
use spillway_sim::weather::WeatherKind;

/// Arguments of `serve`. Units on the wire: 1 grid meter, 2 PV inverter, 3 relay module,
/// 4 sensors (the README has the register map and the rest).
#[derive(Debug, clap::Args)]
pub struct Args {
    /// Plant file: a `plant:` section on its own, its keys at the top level.
    #[arg(long, value_name = "FILE.yaml", required_unless_present = "site", conflicts_with = "site")]
    plant: Option<PathBuf>,
    /// Site file: its `plant:` section is served, the other sections are ignored.
    #[arg(long, value_name = "SITE.yaml")]
    site: Option<PathBuf>,
    /// Modbus TCP address to listen on; port 0 picks a free port (printed at start).
    #[arg(long, value_name = "ADDR:PORT", default_value = "127.0.0.1:5020")]
    modbus: SocketAddr,
    /// MQTT broker to connect to: publish the state topics, obey the command topics.
    #[arg(long, value_name = "HOST:PORT")]
    mqtt: Option<String>,
    /// Clock speed-up: simulated seconds per wall-clock second (10 = ten times faster).
    #[arg(long, default_value_t = 1.0)]
    speed: f64,
    /// Simulated step of the plant, with a unit [default: 100 ms × speed, between 100ms and 1s].
    #[arg(long, value_parser = super::duration_arg)]
    step: Option<f64>,
    /// First simulated instant, RFC 3339; without an offset (2026-06-21T09:00:00) it is
    /// the site's local time [default: now].
    #[arg(long, value_name = "RFC3339")]
    start: Option<String>,
    /// Seed for every random draw [default: the plant's `seed`, else 1].
    #[arg(long)]
    seed: Option<u64>,
    /// Sky over the site, instead of the plant's `weather`.
    #[arg(long, value_enum)]
    weather: Option<Sky>,
    /// A fault to inject (repeatable): KIND[:ARG]…[@START][+DURATION], e.g.
    /// meter-silent@120s+30s, meter-frozen@2min+1min, relay-stuck:pump:open@1h+10min, restart:inverter@5min+20s,
    /// garbage:meter:spike@90s+5s. START counts from --start. A relay channel is the
    /// plant's name for it (`tank`, `pump`, a `plant.loads` name), not the site's load name.
    #[arg(long = "fault", value_name = "SPEC")]
    faults: Vec<String>,
    /// Wall time between two status lines, with a unit; 0 = none (one last line is
    /// still printed at stop).
    #[arg(long, default_value = "5s", value_parser = super::duration_arg)]
    status_every: f64,
    /// Stop by itself after this much simulated time, with a unit [default: run until Ctrl-C].
    #[arg(long, value_parser = super::duration_arg)]
    run_for: Option<f64>,
}

/// The sky choices of `--weather`.
#[derive(Debug, Clone, Copy, clap::ValueEnum)]
enum Sky {
    /// Cloudless.
    Clear,
    /// Clear spells, broken cloud and overcast through the day.
    Mixed,
    /// A cloud deck all day.
    Overcast,
    /// Each day drawn at random among the three.
    Varied,
}

impl From<Sky> for WeatherKind {
    fn from(s: Sky) -> WeatherKind {
        match s {
            Sky::Clear => WeatherKind::Clear,
            Sky::Mixed => WeatherKind::Mixed,
            Sky::Overcast => WeatherKind::Overcast,
            Sky::Varied => WeatherKind::Varied,
        }
    }
}

/// Serves until Ctrl-C (or SIGTERM, or `--run-for`).
pub fn run(args: &Args) -> anyhow::Result<()> {
    // Logs (MQTT connection trouble, lifecycle) go to stderr; status lines to stdout.
    let filter = tracing_subscriber::EnvFilter::try_from_default_env()
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("warn,spillway_sim=info"));
    let _ = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr)
        .with_ansi(std::io::IsTerminal::is_terminal(&std::io::stderr()))
        .try_init();

    let (cfg, tz) = load(args)?;
    let start_ms = match &args.start {
        Some(text) => parse_start(text, tz)?,
        None => Utc::now().timestamp() * 1000,
    };
    let options =
        SiteOptions { start_ms, seed: args.seed.or(cfg.seed).unwrap_or(1), sky: args.weather.map(WeatherKind::from) };
    let plant = site::build(&cfg, &options).context("cannot build the plant")?;
    let serve = ServeOptions {
        modbus: args.modbus,
        mqtt: args.mqtt.clone(),
        speed: args.speed,
        step: args.step.map(Duration::from_secs_f64),
        ..ServeOptions::default()
    };
    // One thread: the plant sits behind one lock, so more would only contend for it.
    let runtime = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
    runtime.block_on(serve_until_stopped(plant, serve, args, tz))
}

/// Reads the plant section, with the command line's faults added to its schedule.
fn load(args: &Args) -> anyhow::Result<(PlantConfig, Tz)> {
    let (path, whole_site) = match (&args.plant, &args.site) {
        (Some(p), _) => (p, false),
        (None, Some(s)) => (s, true),
        (None, None) => anyhow::bail!("give --plant FILE.yaml or --site SITE.yaml"),
    };
    let text = std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
    let mut cfg = if whole_site {
        site::from_site_yaml(&text)
            .with_context(|| format!("{}: not a valid site file", path.display()))?
            .with_context(|| format!("{}: the site has no `plant:` section to serve", path.display()))?
    } else {
        site::from_yaml(&text).with_context(|| {
            // A whole site file given as a plant file: say which flag takes it.
            let looks_like_site = text.lines().any(|l| l.starts_with("site:") || l.starts_with("plant:"));
            if looks_like_site {
                format!("{}: not a plant file but a site file: give it with --site", path.display())
            } else {
                format!("{}: not a valid plant file", path.display())
            }
        })?
    };
    for spec in &args.faults {
        cfg.faults.push(parse_fault(spec)?);
    }
    let zone = cfg.location.as_ref().map_or(cfg.timezone.as_str(), |l| l.timezone.as_str());
    let tz: Tz = zone.parse().map_err(|_| anyhow::anyhow!("{}: unknown time zone \"{zone}\"", path.display()))?;
    Ok((cfg, tz))
}

/// An RFC 3339 instant, or a local date-time of the site.
fn parse_start(text: &str, tz: Tz) -> anyhow::Result<i64> {
    if let Ok(at) = DateTime::parse_from_rfc3339(text) {
        return Ok(at.timestamp_millis());
    }
    let (with_seconds, without) = (
        NaiveDateTime::parse_from_str(text, "%Y-%m-%dT%H:%M:%S"),
        NaiveDateTime::parse_from_str(text, "%Y-%m-%dT%H:%M"),
    );
    let naive = match (with_seconds, without) {
        (Ok(n), _) | (_, Ok(n)) => n,
        (Err(a), Err(b)) => {
            use chrono::format::ParseErrorKind::{Impossible, OutOfRange};
            // The shape is right but a field is not (30 February, hour 25): say that,
            // not what the other format found wrong with it.
            if [a.kind(), b.kind()].iter().any(|k| matches!(k, OutOfRange | Impossible)) {
                anyhow::bail!("--start `{text}`: no such date or time (a day, month, hour or minute out of range)");
            }
            anyhow::bail!(
                "--start `{text}` is not an RFC 3339 time such as 2026-06-21T09:00:00 or 2026-06-21T09:00:00+02:00"
            );
        }
    };
    let local = tz
        .from_local_datetime(&naive)
        .earliest()
        .with_context(|| format!("--start `{text}` does not exist in {tz} (a daylight-saving gap)"))?;
    Ok(local.timestamp_millis())
}

async fn serve_until_stopped(plant: Plant, mut options: ServeOptions, args: &Args, tz: Tz) -> anyhow::Result<()> {
    // Signal handlers first: a SIGTERM that comes right after the address is printed
    // must find them in place.
    let mut signals = Signals::install()?;
    let start_ms = plant.now_ms();
    let until = args.run_for.map(|s| start_ms + (s * 1000.0).round() as i64);
    options.hold_at_ms = until;
    let handle = Server::start(plant, options).await?;
    let clock = handle.clock();
    // An off-grid plant has no grid meter: unit 1 does not answer.
    let units = if handle.with_plant(|p| p.bus().layout().off_grid) {
        "unit 2 inverter, 3 relays, 4 sensors; no meter off-grid"
    } else {
        "unit 1 meter, 2 inverter, 3 relays, 4 sensors"
    };
    println!(
        "spillway-sim: Modbus TCP on {} ({units}), speed {}x, step {} ms, from {}",
        handle.modbus_addr(),
        speed_text(clock.speed),
        clock.step_ms,
        local(start_ms, tz)
    );
    if let Some(broker) = &args.mqtt {
        println!("spillway-sim: MQTT client of {broker}, topics under sim/ (commands sim/+/+/set)");
    }
    for spec in &args.faults {
        println!("spillway-sim: fault scheduled: {spec}");
    }
    // Faults typed at the terminal, one spec a line, start when typed: what a person
    // running a fail-safe test against the simulator needs ("disconnect the meter now").
    let mut typed = typed_faults();
    if std::io::stdin().is_terminal() {
        println!("spillway-sim: type a fault and Enter to inject it now (e.g. meter-silent+30s)");
    }
    let every = (args.status_every > 0.0).then(|| Duration::from_secs_f64(args.status_every));
    let mut ticker = tokio::time::interval(every.unwrap_or(Duration::from_secs(3600)));
    ticker.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Skip);
    ticker.tick().await;
    let reason = loop {
        // Cancel safety: every branch is cancel safe (signals, a watch, a tick).
        tokio::select! {
            why = signals.recv() => break why,
            () = wait_until(&handle, until) => break "the --run-for time is up",
            _ = ticker.tick() => if every.is_some() { println!("{}", status(&handle, tz)) },
            Some(spec) = typed.recv() => match handle.inject_spec(&spec) {
                Ok(()) => println!("spillway-sim: fault injected now: {spec}"),
                Err(e) => println!("spillway-sim: {e}"),
            },
        }
    };
    println!("{}", status(&handle, tz));
    handle.stop().await;
    println!("spillway-sim: stopped ({reason})");
    Ok(())
}

/// Lines typed on standard input, trimmed and not empty. Read on a thread of its own,
/// left to end with the process: tokio's own stdin read cannot be cancelled and would
/// hold the runtime's shutdown until Enter was pressed. The channel closes at the end
/// of input (a pipe, `/dev/null`), and the loop then stops listening to it.
fn typed_faults() -> tokio::sync::mpsc::UnboundedReceiver<String> {
    let (tx, rx) = tokio::sync::mpsc::unbounded_channel();
    let _ = std::thread::Builder::new().name("typed-faults".to_owned()).spawn(move || {
        for line in std::io::stdin().lines() {
            let Ok(line) = line else { break };
            let spec = line.trim();
            if !spec.is_empty() && tx.send(spec.to_owned()).is_err() {
                break;
            }
        }
    });
    rx
}

async fn wait_until(handle: &ServerHandle, until: Option<i64>) {
    match until {
        Some(at) => handle.wait_until(at).await,
        None => std::future::pending().await,
    }
}

/// SIGINT (Ctrl-C) and SIGTERM, registered as soon as this is built.
struct Signals {
    #[cfg(unix)]
    interrupt: tokio::signal::unix::Signal,
    #[cfg(unix)]
    terminate: tokio::signal::unix::Signal,
}

impl Signals {
    fn install() -> anyhow::Result<Signals> {
        #[cfg(unix)]
        {
            use tokio::signal::unix::{SignalKind, signal};
            let interrupt = signal(SignalKind::interrupt()).context("cannot catch SIGINT")?;
            let terminate = signal(SignalKind::terminate()).context("cannot catch SIGTERM")?;
            Ok(Signals { interrupt, terminate })
        }
        #[cfg(not(unix))]
        Ok(Signals {})
    }

    /// Waits for either signal; says which.
    async fn recv(&mut self) -> &'static str {
        #[cfg(unix)]
        {
            tokio::select! {
                _ = self.interrupt.recv() => "interrupted",
                _ = self.terminate.recv() => "terminated",
            }
        }
        #[cfg(not(unix))]
        {
            match tokio::signal::ctrl_c().await {
                Ok(()) => "interrupted",
                Err(_) => std::future::pending().await,
            }
        }
    }
}

fn local(ms: i64, tz: Tz) -> String {
    match tz.timestamp_millis_opt(ms).single() {
        Some(t) => t.format("%Y-%m-%d %H:%M:%S %Z").to_string(),
        None => format!("{ms} ms"),
    }
}

/// Watts as kW to two decimals; a value that rounds to zero is `0.00`, never `-0.00`.
fn kw(w: f64) -> String {
    format!("{:.2} kW", kw_rounded(w))
}

/// As [`kw`], with a sign (`+0.91 kW`, `-1.20 kW`, `+0.00 kW`).
fn kw_signed(w: f64) -> String {
    format!("{:+.2} kW", kw_rounded(w))
}

fn kw_rounded(w: f64) -> f64 {
    let k = (w / 10.0).round() / 100.0;
    // `+ 0.0` turns a negative zero into a positive one.
    k + 0.0
}

/// A speed-up as typed: `96`, `55.66`, without a binary fraction's tail.
fn speed_text(speed: f64) -> String {
    let s = format!("{speed:.2}");
    s.trim_end_matches('0').trim_end_matches('.').to_owned()
}

/// One line: simulated time, PV, house, grid (import +), each load, the PV limit, MQTT.
fn status(handle: &ServerHandle, tz: Tz) -> String {
    let (now, flows, readings, names, off_grid) = handle.with_plant(|p| {
        (p.now_ms(), p.flows().clone(), p.readings().clone(), p.loads().to_vec(), p.bus().layout().off_grid)
    });
    let mqtt_down = handle.mqtt_state() == MqttState::Disconnected && handle.mqtt_enabled();
    status_line(&Shown { now, flows: &flows, readings: &readings, names: &names, off_grid, mqtt_down }, tz)
}

/// What one status line shows.
struct Shown<'a> {
    now: i64,
    flows: &'a Flows,
    readings: &'a Readings,
    names: &'a [String],
    off_grid: bool,
    mqtt_down: bool,
}

fn status_line(s: &Shown<'_>, tz: Tz) -> String {
    let (flows, readings, names) = (s.flows, s.readings, s.names);
    let mut line = format!("{}  pv {}  house {}", local(s.now, tz), kw(flows.pv.w), kw(flows.house.w));
    // An off-grid plant has no grid connection to show.
    if !s.off_grid {
        let grid = flows.grid_import.w - flows.grid_export.w;
        line.push_str(&format!("  grid {}", kw_signed(grid)));
    }
    let loads: Vec<String> = names.iter().zip(&flows.loads).map(|(n, f)| format!("{n} {}", kw(f.w))).collect();
    if !loads.is_empty() {
        line.push_str("  loads: ");
        line.push_str(&loads.join(", "));
    }
    if let Some(b) = &readings.battery {
        line.push_str(&format!("  battery {:.0} % {}", b.soc_pct, kw_signed(b.power_w)));
    }
    if let Some(limit) = readings.pv.limit_w {
        line.push_str(&format!("  pv limit {}", kw(limit)));
    }
    if s.mqtt_down {
        line.push_str("  mqtt down");
    }
    line
}

#[cfg(test)]
mod tests {
    use super::*;
    use spillway_sim::plant::Flow;

    fn shown_line(flows: &Flows, readings: &Readings, names: &[&str], off_grid: bool) -> String {
        let names: Vec<String> = names.iter().map(|n| (*n).to_owned()).collect();
        let shown = Shown { now: 1_782_036_000_000, flows, readings, names: &names, off_grid, mqtt_down: false };
        status_line(&shown, "America/Denver".parse().unwrap())
    }

    #[test]
    fn the_status_line_rounds_and_shows_no_negative_zero() {
        let flows = Flows {
            pv: Flow { w: 55_660.000_001, ..Flow::default() },
            house: Flow { w: 96.000_000_000_01, ..Flow::default() },
            grid_export: Flow { w: 0.4, ..Flow::default() },
            loads: vec![Flow { w: -0.000_001, ..Flow::default() }],
            ..Flows::default()
        };
        let line = shown_line(&flows, &Readings::default(), &["space_heater"], false);
        assert!(line.ends_with("pv 55.66 kW  house 0.10 kW  grid +0.00 kW  loads: space_heater 0.00 kW"), "{line}");
        assert_eq!(speed_text(96.000_000_000_01), "96");
        assert_eq!(speed_text(0.1 + 0.2), "0.3");
    }

    #[test]
    fn an_off_grid_plant_shows_no_grid_in_its_status_line() {
        let flows = Flows { loads: vec![Flow::default()], ..Flows::default() };
        let line = shown_line(&flows, &Readings::default(), &["tank"], true);
        assert!(!line.contains("grid"), "{line}");
        assert!(shown_line(&flows, &Readings::default(), &["tank"], false).contains("grid +0.00 kW"));
    }

    #[test]
    fn start_instants() {
        let lisbon: Tz = "Europe/Lisbon".parse().unwrap();
        // 2026-06-21 09:00 WEST (UTC+1) = 08:00Z = 1_782_028_800 s after the epoch.
        assert_eq!(parse_start("2026-06-21T09:00:00", lisbon).unwrap(), 1_782_028_800_000);
        assert_eq!(parse_start("2026-06-21T09:00", lisbon).unwrap(), 1_782_028_800_000);
        assert_eq!(parse_start("2026-06-21T08:00:00Z", lisbon).unwrap(), 1_782_028_800_000);
        // 2026-03-29 01:30 does not exist in Lisbon (clocks go 01:00 → 02:00).
        assert!(parse_start("2026-03-29T01:30:00", lisbon).is_err());
        assert!(parse_start("tomorrow", lisbon).is_err());
        // An impossible date says so, in either format.
        for text in ["2026-02-30T10:00", "2026-02-30T10:00:00", "2026-06-21T25:00"] {
            let e = parse_start(text, lisbon).unwrap_err().to_string();
            assert!(e.contains("no such date or time"), "{text}: {e}");
        }
    }
}
