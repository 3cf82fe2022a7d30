//! Speed of the solar chain: a year of PV output with clouds at 1 s steps (the plant's
//! budget is ≥ 20 M simulated seconds per wall second for everything), one day, and the
//! sun-position algorithm alone.
//!
//! Run: `cargo bench -p spillway-sim --bench solar` (throughput is in simulated steps/s).

use std::hint::black_box;
use std::time::Duration;

use criterion::{Criterion, Throughput, criterion_group, criterion_main};
use spillway_sim::pv::{LocationConfig, SolarConfig};
use spillway_sim::pv_output::PvSource;
use spillway_sim::sun::{Atmosphere, Observer, SunTrack, spa};
use spillway_sim::weather::{WeatherConfig, WeatherKind};

const YEAR_START_MS: i64 = 1_735_689_600_000; // 2025-01-01T00:00:00Z
const YEAR_S: i64 = 365 * 86_400;

fn site() -> (SolarConfig, LocationConfig, WeatherConfig) {
    // Two orientations, three strings, one shaded module: a typical small roof.
    let cfg: SolarConfig = serde_saphyr::from_str(
        "arrays:\n\
         \x20 - name: east\n    tilt: 30\n    azimuth: 100\n    strings: [{ modules: 8, module_power: 410Wp }]\n\
         \x20 - name: west\n    tilt: 30\n    azimuth: 280\n    strings: [{ modules: 8, module_power: 410Wp }, { modules: 6, module_power: 410Wp }]\n\
         inverter: { rated_ac: 8kW }\n\
         shading: [{ array: west, string: 2, module: 1, from: \"16:00\", until: \"18:30\", blocked: 90% }]\n",
    )
    .expect("bench configuration");
    let location = LocationConfig { latitude: 45.46, longitude: 9.19, altitude: 120.0, timezone: "Europe/Rome".into() };
    let weather = WeatherConfig { sky: WeatherKind::Varied, ..WeatherConfig::default() };
    (cfg, location, weather)
}

fn run(seconds: i64, seed: u64) -> f64 {
    let (cfg, location, weather) = site();
    let mut system = cfg.build(&location, &weather, seed).expect("bench system");
    let mut wh = 0.0;
    for i in 0..seconds {
        wh += system.step(YEAR_START_MS + i * 1000, 1.0, None).ac_w;
    }
    wh / 3600.0
}

fn bench(c: &mut Criterion) {
    let mut g = c.benchmark_group("solar");
    g.throughput(Throughput::Elements(YEAR_S as u64));
    g.sample_size(10);
    g.measurement_time(Duration::from_secs(20));
    g.bench_function("year_1s_varied_clouds", |b| b.iter(|| black_box(run(YEAR_S, 7))));

    // The same chain pvlib runs in tests/reference/bench_pvlib.py: one array, clear sky,
    // a year at 1-minute steps (every step is a knot: full topocentric SPA and clear sky).
    g.throughput(Throughput::Elements((YEAR_S / 60) as u64));
    g.bench_function("year_1min_clear_single_array", |b| {
        b.iter(|| {
            let mut cfg = SolarConfig::single_array(30.0, 180.0, 8.0);
            cfg.delta_t = Some(69.0);
            let (_, location, _) = site();
            let weather = WeatherConfig::steady_clear(20.0, 1.0, 3.0);
            let mut system = cfg.build(&location, &weather, 0).expect("bench system");
            let mut wh = 0.0;
            for i in 0..YEAR_S / 60 {
                wh += system.step(YEAR_START_MS + i * 60_000, 60.0, None).ac_w;
            }
            black_box(wh / 60.0)
        })
    });

    g.throughput(Throughput::Elements(86_400));
    g.sample_size(20);
    g.measurement_time(Duration::from_secs(5));
    g.bench_function("day_1s_varied_clouds", |b| b.iter(|| black_box(run(86_400, 7))));
    g.finish();

    let observer = Observer { latitude_deg: 45.46, longitude_deg: 9.19, elevation_m: 120.0 };
    let atmosphere = Atmosphere::default();
    let mut s = c.benchmark_group("sun");
    s.throughput(Throughput::Elements(1));
    s.bench_function("spa_full", |b| b.iter(|| spa(black_box(1.75e9), &observer, &atmosphere, 69.0)));
    let mut track = SunTrack::new(&observer, &atmosphere, 69.0);
    let mut t = 1.75e9;
    s.bench_function("tracker_per_minute", |b| {
        b.iter(|| {
            t += 60.0;
            track.at(black_box(t))
        })
    });
    s.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
