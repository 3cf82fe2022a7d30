//! A year at one-second steps of the zero-export example, in-process: the rules run and
//! the no-diversion baseline timed separately (`cargo bench --bench simulate`). This is
//! the figure the README reports for `spillway simulate`; it is a benchmark binary, not
//! a test, and asserts nothing.

use std::sync::Arc;
use std::time::Instant;

use spillway::offline::{self, Controller, RunOptions};

fn main() {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/zero-export-house.yaml");
    let loaded = spillway::config::load_file(&path).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let plant = offline::plant_section(&loaded).unwrap_or_else(|e| panic!("{e}"));
    let site = Arc::new(loaded.site.clone());
    let days: u32 = std::env::var("SPILLWAY_BENCH_DAYS").ok().and_then(|d| d.parse().ok()).unwrap_or(365);
    let only = std::env::var("SPILLWAY_BENCH_ONLY").ok();
    for controller in [Controller::Spillway, Controller::Baseline] {
        if only.as_deref().is_some_and(|o| o != format!("{controller:?}")) {
            continue;
        }
        let mut o = RunOptions::day(chrono::NaiveDate::from_ymd_opt(2026, 1, 1).unwrap_or_default());
        o.days = days;
        o.controller = controller;
        let t = Instant::now();
        let out = offline::simulate_once(&site, loaded.tariff.as_ref(), &plant, o).unwrap_or_else(|e| panic!("{e}"));
        let s = t.elapsed().as_secs_f64();
        println!(
            "{controller:?}: {days} days at 1 s in {s:.2} s = {:.1} M simulated seconds per second (PV {:.0} kWh)",
            out.seconds / s / 1e6,
            out.flows.pv.wh / 1000.0
        );
    }
}
