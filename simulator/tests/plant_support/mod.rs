//! Shared helpers for the plant tests: a deterministic half-sine PV day and loaders.
#![allow(dead_code)]

use spillway_sim::plant::{Plant, PlantConfig};
use spillway_sim::pv_output::{PvSample, PvSource};

/// 2025-06-02T00:00:00Z, a Monday.
pub const MONDAY_UTC_MS: i64 = 1_748_822_400_000;

/// A clear half-sine day: zero outside [rise, set] (seconds of the UTC day), `peak_w`
/// at solar noon. Obeys the limit exactly and at once.
#[derive(Debug, Clone, Copy)]
pub struct HalfSine {
    pub peak_w: f64,
    pub rise_s: f64,
    pub set_s: f64,
}

impl HalfSine {
    pub fn new(peak_w: f64) -> HalfSine {
        HalfSine { peak_w, rise_s: 6.0 * 3600.0, set_s: 18.0 * 3600.0 }
    }

    pub fn available(&self, t_ms: i64) -> f64 {
        let s = (t_ms.rem_euclid(86_400_000)) as f64 / 1000.0;
        if s <= self.rise_s || s >= self.set_s {
            return 0.0;
        }
        self.peak_w * (std::f64::consts::PI * (s - self.rise_s) / (self.set_s - self.rise_s)).sin()
    }
}

impl PvSource for HalfSine {
    fn step(&mut self, t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let available = self.available(t_ms);
        let ac = limit_w.map_or(available, |l| available.min(l.max(0.0)));
        PvSample { ac_w: ac, available_ac_w: available, dc_w: ac / 0.96, clear_sky_index: 1.0, ..PvSample::default() }
    }
}

/// Constant PV output (limit obeyed).
pub struct Constant(pub f64);

impl PvSource for Constant {
    fn step(&mut self, _t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let ac = limit_w.map_or(self.0, |l| self.0.min(l.max(0.0)));
        PvSample { ac_w: ac, available_ac_w: self.0, ..PvSample::default() }
    }
}

pub fn config(yaml: &str) -> PlantConfig {
    PlantConfig::from_yaml(yaml).unwrap_or_else(|e| panic!("{e}"))
}

pub fn fixture(name: &str) -> PlantConfig {
    let path = format!("{}/tests/fixtures/{name}", env!("CARGO_MANIFEST_DIR"));
    let text = std::fs::read_to_string(&path).unwrap();
    config(&text)
}

pub fn plant(yaml: &str, pv: impl PvSource + 'static) -> Plant {
    Plant::new(&config(yaml), Box::new(pv), MONDAY_UTC_MS, 1).unwrap()
}

pub fn run(p: &mut Plant, seconds: u32, dt: f64) {
    let steps = (f64::from(seconds) / dt).round() as u64;
    for _ in 0..steps {
        p.step(dt);
    }
}
