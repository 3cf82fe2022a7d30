//! The plant simulator (`spillway_sim::serve`) in-process on loopback for the daemon's
//! tests: the zero-export example site's plant, with its PV replaced by a source the
//! test steps by hand, so that "a step in PV" happens at a known instant.

use std::net::SocketAddr;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;

use spillway_sim::plant::Plant;
use spillway_sim::pv_output::{PvSample, PvSource};
use spillway_sim::serve::{ServeOptions, Server, ServerHandle};
use spillway_sim::site::from_site_yaml;

/// The example site the tests run (devices at 127.0.0.1:5020 in the file).
pub const SITE: &str = include_str!("../../config/zero-export-house.yaml");

/// PV whose available power the test sets; the inverter limit caps what it delivers.
#[derive(Debug, Clone, Default)]
pub struct StepPv(Arc<AtomicU64>);

impl StepPv {
    /// Sets the power the roof could give, W.
    pub fn set(&self, w: f64) {
        self.0.store(w.to_bits(), Ordering::Relaxed);
    }
    fn get(&self) -> f64 {
        f64::from_bits(self.0.load(Ordering::Relaxed))
    }
}

impl PvSource for StepPv {
    fn step(&mut self, _t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let available = self.get();
        let ac = limit_w.map_or(available, |l| available.min(l.max(0.0)));
        PvSample { ac_w: ac, available_ac_w: available, dc_w: ac / 0.97, clear_sky_index: 1.0, ..PvSample::default() }
    }
}

/// 2026-06-21 10:00 UTC (11:00 in Lisbon).
pub const START_MS: i64 = 1_782_036_000_000;

/// A served plant and its PV knob.
pub struct Sim {
    pub handle: ServerHandle,
    pub pv: StepPv,
    /// The site file whose plant is served.
    site: &'static str,
}

impl Sim {
    /// Serves the example plant on 127.0.0.1:0 with a 100 ms step.
    pub async fn start(pv_w: f64) -> Sim {
        Sim::start_site(SITE, pv_w).await
    }

    /// Serves the plant of another site file (devices at 127.0.0.1:5020 in it).
    pub async fn start_site(site: &'static str, pv_w: f64) -> Sim {
        Sim::start_site_at(site, pv_w, START_MS).await
    }

    /// The same, from another instant (ms since the epoch, UTC).
    pub async fn start_site_at(site: &'static str, pv_w: f64, start_ms: i64) -> Sim {
        let cfg = from_site_yaml(site).unwrap().expect("the site has a plant section");
        let pv = StepPv::default();
        pv.set(pv_w);
        let plant = Plant::new(&cfg, Box::new(pv.clone()), start_ms, cfg.seed.unwrap_or(7)).unwrap();
        let options = ServeOptions { step: Some(Duration::from_millis(100)), ..ServeOptions::default() };
        let handle = Server::start(plant, options).await.unwrap();
        Sim { handle, pv, site }
    }

    pub fn addr(&self) -> SocketAddr {
        self.handle.modbus_addr()
    }

    /// The example site pointed at this simulator; `edit` may change its text.
    pub fn site_yaml(&self) -> String {
        self.site.replace("127.0.0.1:5020", &self.addr().to_string())
    }

    /// Writes [`Sim::site_yaml`] to `NAME.yaml` in a fresh temporary directory named by
    /// `tag`; returns the directory and the file (the test removes the directory).
    pub fn write_site(&self, tag: &str, name: &str) -> (std::path::PathBuf, std::path::PathBuf) {
        let dir = std::env::temp_dir().join(format!("spillway-{tag}-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let site = dir.join(format!("{name}.yaml"));
        std::fs::write(&site, self.site_yaml()).unwrap();
        (dir, site)
    }

    /// Grid power at the simulated meter as it reports it (import positive).
    pub fn meter_w(&self) -> f64 {
        self.handle.readings().grid.map_or(f64::NAN, |g| g.power_w)
    }

    /// The inverter limit as the plant applies it, W.
    pub fn limit_w(&self) -> Option<f64> {
        self.handle.controls().pv_limit_w
    }

    /// Relay states in the plant's channel order (tank, pump for the example).
    pub fn relays(&self) -> Vec<bool> {
        self.handle.controls().relays
    }
}
