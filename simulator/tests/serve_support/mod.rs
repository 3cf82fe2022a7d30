//! Shared helpers for the server tests: a quiet plant whose readings are exact, a
//! Modbus client with timeouts, and a Mosquitto broker on a free loopback port.
#![allow(dead_code)]

use std::net::{SocketAddr, TcpListener};
use std::process::{Child, Command, Stdio};
use std::time::Duration;

use spillway_sim::plant::{Plant, PlantConfig};
use spillway_sim::pv_output::{PvSample, PvSource};
use spillway_sim::serve::{ServeOptions, Server, ServerHandle};
use tokio_modbus::client::{Context, tcp};
use tokio_modbus::prelude::*;

/// 2025-06-02T10:00:00Z, a Monday.
pub const START_MS: i64 = 1_748_858_400_000;

/// The SunSpec marker "SunS" at 40000.
pub const SUNSPEC_BASE_MARKER: [u16; 2] = [0x5375, 0x6E53];

/// Grid meter registers (model 201, data from 40072): W, W_SF.
pub const METER_W: u16 = 40088;
/// Inverter registers (model 101, data from 40072): W.
pub const INVERTER_W: u16 = 40084;
/// Inverter model 123 (data from 40124): WMaxLimPct, WMaxLimPct_RvrtTms, WMaxLim_Ena.
pub const LIM_PCT: u16 = 40127;
pub const LIM_RVRT: u16 = 40129;
pub const LIM_ENA: u16 = 40131;

/// PV output that does not change (and obeys the inverter's limit at once).
pub struct SteadyPv(pub f64);

impl PvSource for SteadyPv {
    fn step(&mut self, _t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let ac = limit_w.map_or(self.0, |l| self.0.min(l.max(0.0)));
        PvSample { ac_w: ac, available_ac_w: self.0, clear_sky_index: 1.0, ..PvSample::default() }
    }
}

/// A house whose every power is constant: 200 W standby and nothing else, a 3 kW tank
/// element on coil 0, a 750 W pump on coil 1, a noiseless 1 s meter, 3 kW of PV. With
/// both loads off the meter reads exactly −2800 W.
pub const QUIET: &str = r#"
timezone: UTC
house: { standby: 200W, activity: 0W, variability: 0%, fridge: null, appliances: [] }
tank: { volume: 150L, element: 3kW, initial: 40°C, draws: [] }
pump: { rated: 750W }
meter: { period: 1s, noise: 0W }
inverter: { rating: 5kW }
wiring: [tank, pump]
"#;

/// The quiet plant, run for 5 s so that the meter has a full period behind it.
pub fn quiet_plant() -> Plant {
    let cfg = PlantConfig::from_yaml(QUIET).unwrap_or_else(|e| panic!("{e}"));
    let mut plant = Plant::new(&cfg, Box::new(SteadyPv(3000.0)), START_MS, 1).unwrap();
    for _ in 0..50 {
        plant.step(0.1);
    }
    plant
}

/// Serves the quiet plant on a free loopback port at `speed`, in 100 ms steps.
pub async fn serve_quiet(speed: f64) -> ServerHandle {
    let options = ServeOptions { speed, step: Some(Duration::from_millis(100)), ..ServeOptions::default() };
    Server::start(quiet_plant(), options).await.unwrap()
}

/// Awaits `fut`, failing the test if it takes more than 10 s of wall time (a hang, not
/// a measurement).
pub async fn within<T>(fut: impl std::future::Future<Output = T>) -> T {
    tokio::time::timeout(Duration::from_secs(10), fut).await.expect("no progress within 10 s")
}

/// Waits until the simulated clock has moved `ms` on.
pub async fn sim_wait(handle: &ServerHandle, ms: i64) {
    let at = handle.now_ms() + ms;
    within(handle.wait_until(at)).await;
}

/// A Modbus TCP client of `unit`.
pub async fn connect(addr: SocketAddr, unit: u8) -> Context {
    within(tcp::connect_slave(addr, Slave(unit))).await.unwrap()
}

/// Reads holding registers, expecting an answer without exception.
pub async fn holding(ctx: &mut Context, address: u16, count: u16) -> Vec<u16> {
    within(ctx.read_holding_registers(address, count)).await.unwrap().unwrap()
}

/// Where the broker binary is, if installed.
pub fn mosquitto_binary() -> Option<&'static str> {
    ["/usr/sbin/mosquitto", "/usr/bin/mosquitto", "/usr/local/sbin/mosquitto"]
        .into_iter()
        .find(|p| std::path::Path::new(p).exists())
}

/// Skips (returns `None`, saying why) when there is no broker binary, unless
/// `SPILLWAY_REQUIRE_BROKER=1`, which makes it a failure.
pub fn mosquitto_or_skip(test: &str) -> Option<&'static str> {
    let found = mosquitto_binary();
    if found.is_none() {
        assert!(
            std::env::var("SPILLWAY_REQUIRE_BROKER").as_deref() != Ok("1"),
            "{test}: SPILLWAY_REQUIRE_BROKER=1 but no mosquitto binary is installed"
        );
        eprintln!("{test}: skipped, no mosquitto binary (install the Debian package `mosquitto`)");
    }
    found
}

/// A free loopback port (bound and released: another process could take it in
/// between, which a loopback test run does not do).
pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

/// A Mosquitto process on a loopback port, killed when dropped.
pub struct Broker {
    pub port: u16,
    child: Child,
}

impl Broker {
    /// Starts `mosquitto -p PORT` (loopback only: Mosquitto 2 without a config file
    /// listens on localhost) and waits until it accepts connections.
    pub async fn start(binary: &str, port: u16) -> Broker {
        let child = Command::new(binary)
            .args(["-p", &port.to_string()])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("cannot start {binary}: {e}"));
        let broker = Broker { port, child };
        within(async {
            while tokio::net::TcpStream::connect(("127.0.0.1", port)).await.is_err() {
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
        })
        .await;
        broker
    }

    pub fn addr(&self) -> String {
        format!("127.0.0.1:{}", self.port)
    }

    /// Kills the broker and waits for the process to be gone.
    pub fn kill(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Drop for Broker {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}
