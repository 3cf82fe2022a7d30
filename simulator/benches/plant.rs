//! Plant throughput: simulated seconds per wall second for a household + tank + pump +
//! battery + meter site at 1 s steps, with a stub PV source (the PV chain is benched
//! separately), and the whole plant of the zero-export example with its modelled PV
//! and mixed clouds, also with a battery added. Criterion reports "elements/s" = simulated seconds per second.
//!
//! `SPILLWAY_BENCH_ONCE=whole_plant|whole_plant_battery SPILLWAY_BENCH_DAYS=N` runs that
//! plant once for N days without criterion, for counting its instructions under
//! callgrind (`benches/count_instructions.sh`).

use std::hint::black_box;

use criterion::{Criterion, Throughput, criterion_group};
use spillway_sim::plant::{Plant, PlantConfig};
use spillway_sim::pv_output::{PvSample, PvSource};
use spillway_sim::site::{SiteOptions, build, from_site_yaml};

/// A cheap stand-in for the PV chain: a fixed triangular day, limit obeyed.
struct Stub;

impl PvSource for Stub {
    #[inline]
    fn step(&mut self, t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let s = (t_ms % 86_400_000) as f64 / 1000.0;
        let available = (4000.0 - (s - 43_200.0).abs() * (4000.0 / 21_600.0)).max(0.0);
        let ac = limit_w.map_or(available, |l| available.min(l));
        PvSample { ac_w: ac, available_ac_w: available, ..PvSample::default() }
    }
}

const SITE: &str = r#"
timezone: Africa/Johannesburg
tank: { volume: 150L, element: 3kW, ua: 2W/K }
pump: { rated: 750W }
battery: { capacity: 10kWh, max_charge: 3kW, max_discharge: 3kW }
meter: { period: 1s, noise: 15W }
wiring: [tank, pump]
"#;

const START_MS: i64 = 1_735_689_600_000; // 2025-01-01T00:00:00Z

fn plant() -> Plant {
    let cfg = PlantConfig::from_yaml(SITE).expect("bench site parses");
    Plant::new(&cfg, Box::new(Stub), START_MS, 42).expect("bench site builds")
}

/// Runs `seconds` of 1 s steps with a crude once-a-minute controller.
fn simulate(p: &mut Plant, seconds: u64) {
    for s in 0..seconds {
        if s % 60 == 0 {
            let grid = p.readings().grid.map_or(0.0, |g| g.power_w);
            let c = p.controls_mut();
            c.relays[0] = grid < -500.0 || (c.relays[0] && grid < 300.0);
            c.relays[1] = (8 * 3600..16 * 3600).contains(&(s % 86_400));
            c.battery_w = -grid;
        }
        p.step(1.0);
    }
}

fn bench(c: &mut Criterion) {
    let mut g = c.benchmark_group("plant");
    g.sample_size(10);
    let day = 86_400;
    g.throughput(Throughput::Elements(day));
    g.bench_function("day_at_1s", |b| {
        let mut p = plant();
        b.iter(|| {
            simulate(&mut p, day);
            black_box(p.flows().grid_import.wh)
        })
    });
    let year = 365 * day;
    g.throughput(Throughput::Elements(year));
    g.bench_function("year_at_1s", |b| {
        b.iter(|| {
            let mut p = plant();
            simulate(&mut p, year);
            black_box(p.flows().balance_error_wh())
        })
    });
    // The whole plant: the example's roof, mixed weather, house, tank and pump; then the
    // same with a home battery as well (the issue's "whole plant" lists one), which the
    // crude controller charges from export and discharges against import.
    for (name, battery) in [("year_at_1s_whole_plant", false), ("year_at_1s_whole_plant_battery", true)] {
        let cfg = example(battery);
        g.bench_function(name, |b| {
            b.iter(|| {
                let options = SiteOptions { start_ms: START_MS, seed: 7, sky: None };
                let mut p = build(&cfg, &options).expect("the example builds");
                simulate(&mut p, year);
                black_box(p.flows().balance_error_wh())
            })
        });
    }
    g.finish();
}

/// The zero-export example's plant, with or without a 10 kWh home battery.
fn example(battery: bool) -> PlantConfig {
    let mut cfg = from_site_yaml(include_str!("../../config/zero-export-house.yaml"))
        .expect("the example parses")
        .expect("the example has a plant");
    if battery {
        cfg.battery = Some(
            serde_saphyr::from_str("{ capacity: 10kWh, max_charge: 3kW, max_discharge: 3kW }").expect("battery parses"),
        );
    }
    cfg
}

/// One run of a whole plant for `days`, timed once (for callgrind, not for timing).
fn once(which: &str, days: u64) {
    let cfg = match which {
        "whole_plant" => example(false),
        "whole_plant_battery" => example(true),
        other => panic!("SPILLWAY_BENCH_ONCE: no plant {other:?} (whole_plant or whole_plant_battery)"),
    };
    let options = SiteOptions { start_ms: START_MS, seed: 7, sky: None };
    let mut p = build(&cfg, &options).expect("the example builds");
    let t = std::time::Instant::now();
    simulate(&mut p, days * 86_400);
    println!("{which}: {days} days at 1 s in {:.2} s", t.elapsed().as_secs_f64());
}

criterion_group!(benches, bench);

fn main() {
    if let Ok(which) = std::env::var("SPILLWAY_BENCH_ONCE") {
        let days = std::env::var("SPILLWAY_BENCH_DAYS").ok().and_then(|d| d.parse().ok()).unwrap_or(365);
        once(&which, days);
        return;
    }
    benches();
    Criterion::default().configure_from_args().final_summary();
}
