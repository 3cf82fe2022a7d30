//! One engine step for a site with 16 loads and 32 signals (the yardstick),
//! and for the two-load zero-export example (what an accelerated year repeats).

use std::fmt::Write as _;
use std::sync::Arc;
use std::time::Duration;

use criterion::{Criterion, black_box, criterion_group, criterion_main};
use spillway::engine::{Engine, Snapshot};
use spillway::units::Timestamp;

fn big_site() -> String {
    let mut y = String::from(
        "site:\n  name: Bench\n  timezone: Europe/Lisbon\n  export: forbidden\n  import_target: 40W\n\
         devices:\n  meter: { modbus_tcp: 127.0.0.1:5020, unit: 1 }\n  relays: { modbus_tcp: 127.0.0.1:5020, unit: 3 }\n\
         inverter:\n  rated: 10kW\n  limit: { device: meter, register: 900 }\n\
         points:\n  grid: { device: meter, register: 0, type: i32, unit: W }\n  pv: { device: meter, register: 2, type: u32, unit: W }\n",
    );
    for i in 0..30 {
        let _ = writeln!(y, "  t{i}: {{ device: meter, register: {}, type: i16, scale: 0.1, unit: °C }}", 10 + i);
    }
    y.push_str("loads:\n");
    for i in 0..16 {
        let _ = write!(
            y,
            "  - name: load{i}\n    priority: {}\n    rated: {}W\n    switch: {{ device: relays, coil: {i} }}\n    \
             start: surplus > {}W for 30s and t{} < 60°C and avg(surplus, 1min) > 500W\n    \
             stop: import > 300W for 20s or t{} >= 65°C\n    inhibit: t{} >= 80°C\n    min_on: 3min\n    min_off: 2min\n    max_starts_per_hour: 6\n",
            i + 1,
            500 + 100 * i,
            600 + 100 * i,
            i % 30,
            i % 30,
            (i + 1) % 30
        );
    }
    y
}

fn bench_site(c: &mut Criterion, name: &str, yaml: &str) {
    let loaded = spillway::config::load_str("bench.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let site = Arc::new(loaded.site);
    let mut engine = Engine::new(Arc::clone(&site));
    let mut snapshot = Snapshot::empty(&site);
    let mut now = Timestamp(1_781_481_600_000);
    let mut k: u64 = 0;
    c.bench_function(name, |b| {
        b.iter(|| {
            k += 1;
            now = now.plus(Duration::from_secs(1));
            // A surplus that wanders, so loads switch now and then.
            let grid = -2000.0 + ((k % 600) as f64 - 300.0) * 10.0;
            for (i, s) in snapshot.samples.iter_mut().enumerate() {
                s.value = if i == 0 {
                    grid
                } else if i == 1 {
                    5000.0
                } else {
                    40.0 + (i as f64)
                };
                s.at = now;
            }
            black_box(engine.step(now, &snapshot).inverter_limit)
        })
    });
}

fn engine_step(c: &mut Criterion) {
    bench_site(c, "engine_step_16_loads_32_signals", &big_site());
    let example = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/config/zero-export-house.yaml"))
        .unwrap_or_default();
    bench_site(c, "engine_step_zero_export_example", &example);
}

criterion_group!(benches, engine_step);
criterion_main!(benches);
