//! `spillway demo`: the built-in site against the simulator on loopback, with a live
//! terminal view redrawn every second (plain frames when the output is not a terminal).

use std::io::{IsTerminal, Write};
use std::net::SocketAddr;
use std::process::ExitCode;

use spillway::daemon::banner;
use spillway::daemon::demo::{self, DemoOptions, Frame};
use spillway::units::{Power, Timestamp};

use super::logging::{self, LogFormat};

/// Arguments of `demo`.
#[derive(Debug, clap::Args)]
pub struct DemoArgs {
    /// Simulated seconds per second (1 = real time, at most 60).
    #[arg(long, value_name = "N", default_value_t = 1.0)]
    pub speed: f64,
    /// Also publish the controller's state to this MQTT broker and take overrides
    /// from it (`HOST:PORT`, e.g. 127.0.0.1:1883).
    #[arg(long, value_name = "HOST:PORT")]
    pub mqtt: Option<String>,
    /// Serve the status page as well (`--http` alone: 127.0.0.1:8080).
    #[arg(long, value_name = "ADDR", num_args = 0..=1, default_missing_value = "127.0.0.1:8080", value_parser = super::run::parse_http)]
    pub http: Option<SocketAddr>,
    /// First simulated instant (RFC 3339) [default: 2026-06-21 11:00 at the site].
    #[arg(long, value_name = "TIME", value_parser = parse_time)]
    pub start: Option<Timestamp>,
    /// The sky over the simulated roof.
    #[arg(long, value_enum, default_value = "clear")]
    pub weather: Weather,
    /// Stop by itself after this long (wall time), e.g. `30s`.
    #[arg(long, value_name = "DURATION", value_parser = super::parse_duration)]
    pub run_for: Option<std::time::Duration>,
}

/// The sky choices.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Weather {
    /// Cloudless.
    Clear,
    /// Clear spells, broken cloud and overcast.
    Mixed,
    /// A cloud deck all day.
    Overcast,
}

fn parse_time(text: &str) -> Result<Timestamp, String> {
    chrono::DateTime::parse_from_rfc3339(text).map(|t| Timestamp::from_utc(t.with_timezone(&chrono::Utc))).map_err(
        |e| match text.get(..10).map(spillway::config::values::parse_date) {
            // chrono calls a day the calendar lacks "out of range": say which.
            Some(Err(no_day @ spillway::config::values::DateError::NoSuchDay(_))) => format!("`{text}`: {no_day}"),
            _ if e.kind() == chrono::format::ParseErrorKind::OutOfRange => format!(
                "`{text}` has a field out of range: hours run 00–23, minutes and seconds 00–59, offsets up to ±23:59"
            ),
            _ => format!("`{text}` is not an RFC 3339 time like 2026-06-21T10:00:00+01:00 ({e})"),
        },
    )
}

pub fn run(args: DemoArgs, format: LogFormat) -> anyhow::Result<ExitCode> {
    // The view owns the terminal: logs only for warnings unless RUST_LOG says more.
    logging::init(format, "warn");
    let sky = match args.weather {
        Weather::Clear => demo::WeatherKind::Clear,
        Weather::Mixed => demo::WeatherKind::Mixed,
        Weather::Overcast => demo::WeatherKind::Overcast,
    };
    let options = DemoOptions {
        speed: args.speed,
        mqtt: args.mqtt,
        start: args.start,
        http: args.http,
        sky: Some(sky),
        run_for: args.run_for,
    };
    let tty = std::io::stdout().is_terminal();
    let mut out = std::io::stdout();
    let mut first = true;
    let result = demo::run(options, |frame| {
        let text = render(frame);
        let _ = if tty {
            // Home, draw, clear what the previous frame left below.
            write!(out, "{}\x1b[H{text}\x1b[J", if first { "\x1b[2J" } else { "" })
        } else {
            writeln!(out, "{text}")
        };
        first = false;
        let _ = out.flush();
    });
    match result {
        Ok(summary) => {
            println!("stopped after {} ticks and {} switchings", summary.ticks, summary.switchings);
            Ok(ExitCode::SUCCESS)
        }
        // The demo could not run (a bad flag, a port in use): an error that stopped it,
        // as for `run`.
        Err(e) => {
            eprintln!("error: {e}");
            Ok(ExitCode::from(2))
        }
    }
}

fn kw(w: f64) -> String {
    Power(w.round()).to_string()
}

/// One frame of the view.
pub fn render(f: &Frame) -> String {
    let s = &f.status;
    let tz = f.site.timezone;
    let off_grid = matches!(f.site.connection, spillway::config::model::Connection::OffGrid(_));
    let local = |t: Timestamp| t.to_utc().with_timezone(&tz).format("%H:%M:%S").to_string();
    let mut o = String::new();
    let mut line = |l: String| {
        o.push_str(&l);
        o.push('\n');
    };
    line(format!(
        "Spillway demo · {} · {} · {} {}{}",
        s.site,
        if off_grid { "off-grid".to_owned() } else { format!("export {}", s.export_policy) },
        f.plant.now.to_utc().with_timezone(&tz).format("%Y-%m-%d %H:%M:%S %Z"),
        if f.speed > 1.0 { format!("· {}× speed ", f.speed) } else { String::new() },
        if f.last { "· STOPPED" } else { "" }
    ));
    line(format!(
        "simulator on {} (Modbus TCP){}{}",
        f.simulator,
        f.mqtt.as_ref().map_or(String::new(), |m| format!(" · MQTT {m}")),
        f.http.map_or(String::new(), |a| format!(" · status page http://{a}/"))
    ));
    line(String::new());
    let grid = f.plant.grid_w;
    let grid_word = if grid > 0.5 {
        "importing"
    } else if grid < -0.5 {
        "EXPORTING"
    } else {
        "balanced"
    };
    let flows = format!(
        "  PV {:>9}    house {:>9}    loads {:>9}",
        kw(f.plant.pv_w),
        kw(f.plant.house_w),
        kw(s.loads.iter().map(|l| l.power_w).sum()),
    );
    // Off-grid there is no grid to show, and no inverter limit unless the site sets one.
    line(if off_grid { flows } else { format!("{flows}    grid {:>9} {grid_word}", kw(grid.abs())) });
    let limit = match &s.inverter {
        Some(i) => match i.limit_w {
            Some(w) => format!(" · inverter limit {} ({})", kw(w), i.why),
            None => " · inverter limit none".to_owned(),
        },
        None if off_grid => String::new(),
        None => " · inverter limit: no limit control".to_owned(),
    };
    let surplus = s.surplus_w.map_or_else(|| "unknown".to_owned(), kw);
    line(format!("  controller: mode {} · surplus {surplus}{limit}", s.mode));
    match (f.plant.tank_c, f.plant.tank_top_c) {
        (Some(t), Some(top)) => {
            line(format!("  tank {t:.1} °C at its sensor, {top:.1} °C at the top (what the taps get)"))
        }
        (Some(t), None) => line(format!("  tank {t:.1} °C")),
        _ => {}
    }
    line(String::new());
    line(format!("  {:<2} {:<14} {:<9} {:>9}  why", "#", "load", "command", "power"));
    for l in &s.loads {
        let ob = l.obligations.iter().map(|o| format!("{}: {}", o.what, o.progress)).collect::<Vec<_>>().join("; ");
        line(format!("  {:<2} {:<14} {:<9} {:>9}  {}", l.priority, l.name, l.command, kw(l.power_w), l.why));
        if !ob.is_empty() {
            line(format!("  {:<2} {:<14} {:<9} {:>9}  duty {ob}", "", "", "", ""));
        }
    }
    line(String::new());
    line("  recent:".to_owned());
    let recent: Vec<_> = s.recent.iter().rev().take(6).collect();
    if recent.is_empty() {
        line("    (nothing switched yet)".to_owned());
    }
    for e in recent.into_iter().rev() {
        let at = chrono::DateTime::parse_from_rfc3339(&e.time)
            .map(|t| local(Timestamp::from_utc(t.with_timezone(&chrono::Utc))))
            .unwrap_or_else(|_| e.time.clone());
        line(format!("    {at}  {}", e.text));
    }
    line(String::new());
    if f.last {
        let relays: Vec<String> =
            f.plant.relays.iter().map(|(n, on)| format!("{n} {}", if *on { "closed" } else { "open" })).collect();
        line(format!(
            "  safe states written: relays {} · inverter limit {}",
            relays.join(", "),
            f.plant.limit_w.map_or_else(|| "none".to_owned(), kw)
        ));
    } else {
        line(format!("  Ctrl-C stops the controller (safe states are written first). {}", banner::SAFETY_NOTICE[0]));
    }
    o
}
