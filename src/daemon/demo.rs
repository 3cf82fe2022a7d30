//! `spillway demo`: the plant simulator served in-process on loopback Modbus TCP, the
//! real daemon driving it over the wire, and a frame of its status every second for a
//! live view. The site is built in (`config/zero-export-house.yaml` with its `plant:`
//! section), its devices pointed at the port the simulator bound.
//!
//! With `speed` above 1 the simulator's clock runs faster; the daemon then follows the
//! simulated time (a scaled clock) and polls, ticks and re-asserts that much more often
//! in wall time, so that in simulated time it behaves exactly as configured.

use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use chrono::{NaiveDate, TimeZone};
use spillway_sim::serve::{ServeOptions, Server};
use spillway_sim::site::{SiteOptions, build, from_site_yaml};
pub use spillway_sim::weather::WeatherKind;
use tracing::info;

use super::{Daemon, DaemonError, Options, Summary, runtime};
use crate::actuators::ActuatorOptions;
use crate::config::model::Site;
use crate::sources::Clock;
use crate::status::Status;
use crate::units::Timestamp;

/// The built-in demo site (an invented house, see the file's header).
pub const SITE: &str = include_str!("../../config/zero-export-house.yaml");
/// The address its devices name in the file, replaced by the simulator's.
const FILE_ADDRESS: &str = "127.0.0.1:5020";
/// The fastest clock the demo accepts: faster, the daemon's polls would crowd a
/// loopback socket and the view would blur.
pub const MAX_SPEED: f64 = 60.0;
/// The simulator's step (simulated time) whatever the speed.
const PLANT_STEP: Duration = Duration::from_millis(100);

/// How to run the demo.
#[derive(Debug, Clone)]
pub struct DemoOptions {
    /// Simulated seconds per second (1 = real time).
    pub speed: f64,
    /// A broker for the daemon's MQTT state publishing and overrides (`HOST:PORT`).
    pub mqtt: Option<String>,
    /// First simulated instant; `None` = 11:00 local time on 21 June 2026 (a summer
    /// morning, so surplus shows within seconds).
    pub start: Option<Timestamp>,
    /// Serve the status page too.
    pub http: Option<SocketAddr>,
    /// The sky; `None` = clear, so the first minute already shows diversion (the
    /// site file's own `weather` is for `simulate`).
    pub sky: Option<WeatherKind>,
    /// Stop by itself after this much wall time (tests, benchmarks); `None` = until
    /// Ctrl-C.
    pub run_for: Option<Duration>,
}

impl Default for DemoOptions {
    fn default() -> Self {
        DemoOptions { speed: 1.0, mqtt: None, start: None, http: None, sky: None, run_for: None }
    }
}

/// Why the demo could not run.
#[derive(Debug, thiserror::Error)]
pub enum DemoError {
    /// The daemon could not start.
    #[error("{0}")]
    Daemon(#[from] DaemonError),
    /// The simulator could not start.
    #[error("the simulator cannot start: {0}")]
    Simulator(String),
    /// The built-in site does not load (a bug: the examples are tested).
    #[error("the built-in demo site does not load: {0}")]
    Site(String),
    /// An option is out of range.
    #[error("{0}")]
    Options(String),
}

/// One frame for the view.
#[derive(Debug, Clone)]
pub struct Frame {
    /// The daemon's status.
    pub status: Arc<Status>,
    /// The site (for its time zone and names).
    pub site: Arc<Site>,
    /// The clock's speed.
    pub speed: f64,
    /// Where the simulator listens.
    pub simulator: SocketAddr,
    /// Where the status page is, when served.
    pub http: Option<SocketAddr>,
    /// The MQTT broker, when used.
    pub mqtt: Option<String>,
    /// What the simulated plant really does (the daemon sees it through its meters).
    pub plant: PlantView,
    /// True for the last frame, after the safe states were written.
    pub last: bool,
}

/// The simulated plant's truth at a frame.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct PlantView {
    /// Simulated instant.
    pub now: Timestamp,
    /// PV AC power, W.
    pub pv_w: f64,
    /// Household base load, W.
    pub house_w: f64,
    /// Grid power at the meter, W, import positive.
    pub grid_w: f64,
    /// Relay contacts as commanded, in the plant's channel order.
    pub relays: Vec<(String, bool)>,
    /// The inverter's power limit as the plant applies it, W.
    pub limit_w: Option<f64>,
    /// Tank temperature at its sensor, °C.
    pub tank_c: Option<f64>,
    /// A layered tank's top temperature (what the taps get), °C; `None` for one node,
    /// whose sensor reads the whole tank.
    pub tank_top_c: Option<f64>,
}

fn plant_view(server: &spillway_sim::serve::ServerHandle) -> PlantView {
    server.with_plant(|p| {
        let flows = p.flows();
        let readings = p.readings();
        let controls = p.controls();
        PlantView {
            now: Timestamp(p.now_ms()),
            pv_w: flows.pv.w,
            house_w: flows.house.w,
            grid_w: readings.grid.map_or(flows.grid_import.w - flows.grid_export.w, |g| g.power_w),
            relays: p.channels().iter().cloned().zip(controls.relays.iter().copied()).collect(),
            limit_w: controls.pv_limit_w,
            tank_c: p.tank_temp_c(),
            tank_top_c: p.tank().filter(|t| t.layers() > 1).map(|t| t.top_c()),
        }
    })
}

/// 11:00 at the site on 21 June 2026.
pub fn default_start(site: &Site) -> Timestamp {
    let local = NaiveDate::from_ymd_opt(2026, 6, 21).and_then(|d| d.and_hms_opt(11, 0, 0));
    match local.and_then(|t| site.timezone.from_local_datetime(&t).single()) {
        Some(t) => Timestamp::from_utc(t.with_timezone(&chrono::Utc)),
        None => Timestamp(1_782_036_000_000),
    }
}

/// The demo site's text with its devices at `addr` and, with a broker, an `mqtt:` section.
pub fn site_text(addr: SocketAddr, mqtt: Option<&str>) -> String {
    let mut text = SITE.replace(FILE_ADDRESS, &addr.to_string());
    if let Some(broker) = mqtt {
        text.push_str(&format!("\nmqtt: {{ broker: \"{broker}\", topic_prefix: spillway/demo }}\n"));
    }
    text
}

/// Makes a checked site run `speed` times faster in wall time: the engine period, the
/// polls and the inverter limit's refresh shrink by `speed`; timeouts stay (a loopback
/// request takes what it takes) and every age is judged on the simulated clock.
pub fn accelerate(site: &mut Site, speed: f64) {
    if speed <= 1.0 {
        return;
    }
    site.tick = site.tick.div_f64(speed);
    for d in &mut site.devices {
        d.poll = d.poll.div_f64(speed);
    }
    for p in &mut site.points {
        p.poll = p.poll.div_f64(speed);
    }
    if let Some(ic) = &mut site.inverter {
        ic.refresh = ic.refresh.div_f64(speed);
    }
}

/// Runs the demo until Ctrl-C (or `run_for`); `view` gets a frame every second.
pub fn run(options: DemoOptions, mut view: impl FnMut(&Frame)) -> Result<Summary, DemoError> {
    if !(options.speed >= 1.0 && options.speed <= MAX_SPEED) {
        return Err(DemoError::Options(format!("--speed must be between 1 and {MAX_SPEED}")));
    }
    let rt = runtime()?;
    rt.block_on(async move {
        let plant_cfg = from_site_yaml(SITE)
            .map_err(|e| DemoError::Site(e.to_string()))?
            .ok_or_else(|| DemoError::Site("it has no plant section".to_owned()))?;
        // The site's time zone before the real port is known: load once with the file's.
        let probe_site = crate::config::load_str("demo.yaml", SITE).map_err(|e| DemoError::Site(e.render(false)))?;
        let start = options.start.unwrap_or_else(|| default_start(&probe_site.site));
        let seed = plant_cfg.seed.unwrap_or(7);
        let sky = Some(options.sky.unwrap_or(WeatherKind::Clear));
        let plant = build(&plant_cfg, &SiteOptions { start_ms: start.0, seed, sky })
            .map_err(|e| DemoError::Simulator(e.to_string()))?;
        // A fine plant step at every speed: a coarse one would make the meter lag the
        // limit by a whole step, which the guard cannot see from the time stamps.
        let serve = ServeOptions { speed: options.speed, step: Some(PLANT_STEP), ..ServeOptions::default() };
        let server = Server::start(plant, serve).await.map_err(|e| DemoError::Simulator(e.to_string()))?;
        let addr = server.modbus_addr();
        let text = site_text(addr, options.mqtt.as_deref());
        let mut site = match crate::config::load_str("demo.yaml", &text) {
            Ok(l) => l.site,
            Err(e) => {
                server.stop().await;
                return Err(DemoError::Site(e.render(false)));
            }
        };
        accelerate(&mut site, options.speed);
        let site = Arc::new(site);
        let clock =
            Clock::Scaled { origin: tokio::time::Instant::now(), at: Timestamp(server.now_ms()), speed: options.speed };
        let daemon_options = Options {
            clock,
            http: options.http,
            actuators: ActuatorOptions { reassert: ActuatorOptions::default().reassert.div_f64(options.speed) },
            ..Options::default()
        };
        let daemon = match Daemon::start(Arc::clone(&site), daemon_options).await {
            Ok(d) => d,
            Err(e) => {
                server.stop().await;
                return Err(e.into());
            }
        };
        info!(simulator = %addr, speed = options.speed, "demo running");
        let http = daemon.http_addr();
        let frame = |status: Arc<Status>, plant: PlantView, last: bool| Frame {
            status,
            site: Arc::clone(&site),
            speed: options.speed,
            simulator: addr,
            http,
            mqtt: options.mqtt.clone(),
            plant,
            last,
        };
        let mut every = tokio::time::interval(Duration::from_secs(1));
        let stop_at = options.run_for.map(|d| tokio::time::Instant::now() + d);
        let ctrl_c = tokio::signal::ctrl_c();
        tokio::pin!(ctrl_c);
        loop {
            tokio::select! {
                // All cancel-safe: a pinned future polled again, an interval, a sleep.
                _ = &mut ctrl_c => break,
                _ = every.tick() => {
                    let status = Arc::clone(&daemon.status().borrow());
                    view(&frame(status, plant_view(&server), false));
                }
                () = async {
                    match stop_at {
                        Some(t) => tokio::time::sleep_until(t).await,
                        None => std::future::pending().await,
                    }
                } => break,
            }
        }
        let status = daemon.status();
        daemon.shutdown();
        let summary = daemon.wait().await;
        // The plant after the links' last pass: relays open, inverter at its safe limit.
        let status = Arc::clone(&status.borrow());
        view(&frame(status, plant_view(&server), true));
        server.stop().await;
        Ok(summary)
    })
}
