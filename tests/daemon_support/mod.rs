//! Test bench for the daemon: a small plant behind two Modbus test servers (the grid
//! meter alone on one, so it can fall silent while the relays and the inverter still
//! answer), a site file pointing at them, and helpers that wait on the daemon's status.
//!
//! The plant is a few lines of arithmetic, not the simulator: PV (capped by the limit
//! register) against a fixed house load plus each relay's rated load, the grid meter
//! showing the difference (import positive), updated every 100 ms of tokio time.
#![allow(dead_code)]

use std::sync::{Arc, Mutex};
use std::time::Duration;

use spillway::daemon::{Daemon, Options};
use spillway::sources::Clock;
use spillway::status::Status;
use spillway::units::Timestamp;
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;

use crate::support::modbus::TestServer;

pub mod sim;

/// 2026-06-21 09:00 UTC (10:00 in Lisbon): a summer morning.
pub const T0: Timestamp = Timestamp(1_782_032_400_000);

/// Relay coils and the loads they switch, in watts.
pub const HEATER_W: f64 = 3000.0;
pub const PUMP_W: f64 = 1100.0;
/// The household's own draw.
pub const HOUSE_W: f64 = 400.0;
/// The bench battery's power setpoint: relay unit holding registers 40–41, int32 W,
/// followed within a plant step (+ charges, unless [`Plant::reverse_battery`]).
pub const BATTERY_REGISTER: u16 = 40;
/// Inverter rating.
pub const RATED_W: f64 = 5000.0;

/// One plant step as recorded.
#[derive(Debug, Clone, Copy)]
pub struct Step {
    pub at: Instant,
    pub pv_available: f64,
    pub pv: f64,
    pub grid: f64,
    pub limit: f64,
    pub heater: bool,
    pub pump: bool,
    /// What the battery took from the AC side (W, negative when discharging).
    pub battery: f64,
}

#[derive(Debug, Default)]
struct PlantState {
    pv_available: f64,
    history: Vec<Step>,
    /// −1 for a battery inverter that takes + as discharging.
    battery_sign: f64,
}

/// The plant and its two servers.
pub struct Plant {
    pub meter: Arc<TestServer>,
    pub devices: Arc<TestServer>,
    state: Arc<Mutex<PlantState>>,
    stop: CancellationToken,
}

impl Plant {
    /// Starts both servers and the plant loop.
    pub async fn start(pv_available: f64) -> Plant {
        let meter = TestServer::start().await;
        let devices = TestServer::start().await;
        meter.set_holding(1, 0, &[0]);
        devices.set_holding(2, 0, &[0]); // PV output, W
        devices.set_holding(2, 10, &[RATED_W as u16]); // power limit, W
        devices.set_holding(2, 20, &[0]); // PV available before the limit, W
        devices.add_coils(3, 0, 2);
        devices.set_holding(3, BATTERY_REGISTER, &[0, 0]);
        let state = Arc::new(Mutex::new(PlantState { pv_available, history: Vec::new(), battery_sign: 1.0 }));
        let stop = CancellationToken::new();
        let plant = Plant { meter: Arc::new(meter), devices: Arc::new(devices), state, stop };
        plant.spawn_loop();
        plant
    }

    fn spawn_loop(&self) {
        let (meter, devices) = (Arc::clone(&self.meter), Arc::clone(&self.devices));
        let state = Arc::clone(&self.state);
        let stop = self.stop.clone();
        tokio::spawn(async move {
            let mut every = tokio::time::interval(Duration::from_millis(100));
            loop {
                tokio::select! {
                    () = stop.cancelled() => return,
                    _ = every.tick() => {}
                }
                let limit = devices.holding(2, 10).map_or(RATED_W, f64::from);
                let heater = devices.coil(3, 0).unwrap_or(false);
                let pump = devices.coil(3, 1).unwrap_or(false);
                let words = (devices.holding(3, BATTERY_REGISTER), devices.holding(3, BATTERY_REGISTER + 1));
                let setpoint = match words {
                    (Some(hi), Some(lo)) => f64::from(((u32::from(hi) << 16) | u32::from(lo)) as i32),
                    _ => 0.0,
                };
                let mut s = state.lock().unwrap();
                let battery = (setpoint * s.battery_sign).clamp(-3000.0, 3000.0);
                let pv = s.pv_available.min(limit).max(0.0);
                let load = HOUSE_W + if heater { HEATER_W } else { 0.0 } + if pump { PUMP_W } else { 0.0 } + battery;
                let grid = load - pv;
                meter.set_holding(1, 0, &[(grid.round() as i16) as u16]);
                devices.set_holding(2, 0, &[pv.round() as u16]);
                devices.set_holding(2, 20, &[s.pv_available.round() as u16]);
                let pv_available = s.pv_available;
                s.history.push(Step { at: Instant::now(), pv_available, pv, grid, limit, heater, pump, battery });
            }
        });
    }

    /// Changes the PV the roof could give.
    pub fn set_pv(&self, watts: f64) {
        self.state.lock().unwrap().pv_available = watts;
    }

    /// Makes the bench battery take + as discharging (a sign convention the other way
    /// round from Spillway's).
    pub fn reverse_battery(&self) {
        self.state.lock().unwrap().battery_sign = -1.0;
    }

    /// Every step so far.
    pub fn history(&self) -> Vec<Step> {
        self.state.lock().unwrap().history.clone()
    }

    /// The latest step.
    pub fn last(&self) -> Option<Step> {
        self.state.lock().unwrap().history.last().copied()
    }

    /// The site file for this plant; `loads` is the YAML of the `loads:` list and
    /// `extra` more top-level sections.
    pub fn site_yaml(&self, loads: &str, extra: &str) -> String {
        format!(
            "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: forbidden
  import_target: 40W
devices:
  meter:    {{ modbus_tcp: 127.0.0.1:{m}, unit: 1, poll: 1s, timeout: 500ms }}
  inverter: {{ modbus_tcp: 127.0.0.1:{d}, unit: 2, poll: 1s, timeout: 500ms }}
  relays:   {{ modbus_tcp: 127.0.0.1:{d}, unit: 3, poll: 1s, timeout: 500ms }}
points:
  grid: {{ device: meter, register: 0, type: i16, unit: W }}
  pv:   {{ device: inverter, register: 0, unit: W }}
  pv_available: {{ device: inverter, register: 20, unit: W }}
inverter:
  rated: 5kW
  limit: {{ device: inverter, register: 10 }}
  limit_unit: W
  safe_limit: 0W
loads:
{loads}
{extra}",
            m = self.meter.addr.port(),
            d = self.devices.addr.port(),
        )
    }
}

impl Drop for Plant {
    fn drop(&mut self) {
        self.stop.cancel();
    }
}

/// A water heater that starts on 3.1 kW of surplus held 5 s, and a pool pump with a
/// daily run-time duty.
pub const LOADS: &str = "
  - name: water_heater
    priority: 1
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 3.1kW for 5s
    stop: import > 300W for 5s
    min_on: 1min
    min_off: 1min
  - name: pool_pump
    priority: 2
    rated: 1.1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.2kW for 10s
    stop: import > 400W for 10s
    min_on: 2min
    min_off: 2min
    obligations:
      - run: 5h
        grid_window: 16:00..21:00
";

/// Options for a daemon on the paused test clock.
pub fn options(at: Timestamp) -> Options {
    Options { clock: Clock::anchored(at), ..Options::default() }
}

/// Starts a daemon for a site text.
pub async fn start(yaml: &str, options: Options) -> Daemon {
    let site = crate::support::site(yaml);
    match Daemon::start(site, options).await {
        Ok(d) => d,
        Err(e) => panic!("daemon did not start: {e}"),
    }
}

/// Waits (tokio time) until the status satisfies `cond`; panics after `limit`.
pub async fn status_until(
    daemon: &Daemon,
    limit: Duration,
    what: &str,
    mut cond: impl FnMut(&Status) -> bool,
) -> Status {
    let mut rx = daemon.status();
    let deadline = Instant::now() + limit;
    loop {
        {
            let s = rx.borrow_and_update();
            if cond(&s) {
                return (**s).clone();
            }
        }
        match tokio::time::timeout_at(deadline, rx.changed()).await {
            Ok(Ok(())) => {}
            Ok(Err(_)) => panic!("daemon stopped before: {what}"),
            Err(_) => panic!("not within {limit:?}: {what}; last status: {:#?}", rx.borrow()),
        }
    }
}

/// Waits (tokio time) until the plant satisfies `cond`; panics after `limit`.
pub async fn plant_until(plant: &Plant, limit: Duration, what: &str, mut cond: impl FnMut(&Step) -> bool) -> Step {
    let deadline = Instant::now() + limit;
    loop {
        if let Some(s) = plant.last()
            && cond(&s)
        {
            return s;
        }
        assert!(Instant::now() < deadline, "not within {limit:?}: {what}; last step {:?}", plant.last());
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// A load's entry in the status.
pub fn load<'a>(s: &'a Status, name: &str) -> &'a spillway::status::LoadStatus {
    s.loads.iter().find(|l| l.name == name).unwrap_or_else(|| panic!("no load {name} in the status"))
}

/// A stretch of export at the meter: when it began, how long it lasted, its peak (W).
#[derive(Debug, Clone, Copy)]
pub struct Excursion {
    pub start: Instant,
    pub duration: Duration,
    pub peak_w: f64,
}

/// The stretches of export (grid below `-tolerance_w`) in a history.
pub fn excursions(history: &[Step], tolerance_w: f64) -> Vec<Excursion> {
    let mut out: Vec<Excursion> = Vec::new();
    let mut open: Option<Excursion> = None;
    for s in history {
        match (&mut open, s.grid < -tolerance_w) {
            (None, true) => open = Some(Excursion { start: s.at, duration: Duration::ZERO, peak_w: -s.grid }),
            (Some(e), true) => {
                e.duration = s.at - e.start;
                e.peak_w = e.peak_w.max(-s.grid);
            }
            (Some(e), false) => {
                e.duration = s.at - e.start;
                out.push(*e);
                open = None;
            }
            (None, false) => {}
        }
    }
    out.extend(open);
    out
}
