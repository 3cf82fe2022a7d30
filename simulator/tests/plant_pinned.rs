//! The plant's outputs pinned: two simulated days of the zero-export example with a
//! home battery added, stepped at 1 s (and a stretch of irregular steps) under a crude
//! controller, summarised and compared with `tests/pinned/plant_two_days.txt`.
//!
//! Speed work on the plant is meant to leave every output unchanged; this test says so
//! at once. A change that is meant to change the physics re-blesses the file with
//! `UPDATE_EXPECT=1 cargo test -p spillway-sim --test plant_pinned`, and the diff is
//! reviewed like code. Values are printed to 9 significant digits, which catches any
//! real change while staying clear of the last-bit differences a different libm may give.

use expect_test::expect_file;
use spillway_sim::site::{SiteOptions, build, from_site_yaml};

const START_MS: i64 = 1_748_736_000_000; // 2025-06-01T00:00:00Z

#[test]
fn two_days_of_the_example_plant_with_a_battery_give_the_pinned_outputs() {
    // The one-node tank (the example's tank is layered): its path stays pinned too.
    let text = two_days(1);
    expect_file!["pinned/plant_two_days.txt"].assert_eq(&text);
}

/// The same with the example's tank as it ships, in 8 layers (a stratified tank), pinned
/// on its own so that work on the layered path is checked as the one-node path is.
#[test]
fn two_days_with_a_layered_tank_give_the_pinned_outputs() {
    let text = two_days(8);
    expect_file!["pinned/plant_two_days_layered_tank.txt"].assert_eq(&text);
}

/// Two days of the example plant with a battery added and its tank in `layers` layers,
/// summarised.
fn two_days(layers: u32) -> String {
    let mut cfg = from_site_yaml(include_str!("../../config/zero-export-house.yaml"))
        .expect("the example parses")
        .expect("the example has a plant");
    if let Some(tank) = cfg.tank.as_mut() {
        tank.layers = layers;
    }
    cfg.battery = Some(
        serde_saphyr::from_str("{ capacity: 10kWh, max_charge: 3kW, max_discharge: 3kW }").expect("battery parses"),
    );
    let options = SiteOptions { start_ms: START_MS, seed: 7, sky: None };
    let mut plant = build(&cfg, &options).expect("the example builds");
    let (mut tank_top_sum, mut grid_sum, mut tank_sum, mut volts_sum, mut amps_sum, mut pv_sum) =
        (0.0, 0.0, 0.0, 0.0, 0.0, 0.0);
    let mut reports = 0u64;
    let mut last_update = i64::MIN;
    let mut switchings = 0u64;
    let mut last_contacts = plant.readings().contacts.clone();
    let mut step = 0u64;
    while plant.now_ms() < START_MS + 2 * 86_400_000 {
        if step.is_multiple_of(60) {
            let grid = plant.readings().grid.map_or(0.0, |g| g.power_w);
            let c = plant.controls_mut();
            c.relays[0] = grid < -500.0 || (c.relays[0] && grid < 300.0);
            c.relays[1] = (8 * 3600..16 * 3600).contains(&(step % 86_400));
            c.battery_w = -grid;
        }
        // Mostly 1 s steps, with a stretch of irregular ones in the afternoon of day 1:
        // 4 s in five steps, two of whose ends fall 15 ms apart on either side of a
        // meter period, so that two reports wait at once behind the 0.5 s delay.
        const IRREGULAR: [f64; 5] = [0.99, 0.995, 0.015, 0.49, 1.51];
        let dt = if (50_000..50_600).contains(&step) { IRREGULAR[(step % 5) as usize] } else { 1.0 };
        plant.step(dt);
        step += 1;
        let r = plant.readings();
        if let Some(g) = r.grid {
            grid_sum += g.power_w;
            if g.updated_ms != last_update {
                reports += 1;
                last_update = g.updated_ms;
            }
        }
        tank_sum += r.tank.map_or(0.0, |t| t.temp_c);
        tank_top_sum += plant.tank().map_or(0.0, |t| t.top_c());
        if let Some(b) = r.battery {
            volts_sum += b.voltage_v;
            amps_sum += b.current_a;
        }
        pv_sum += r.pv.power_w;
        switchings += r.contacts.iter().zip(&last_contacts).filter(|(a, b)| a != b).count() as u64;
        last_contacts.clone_from(&r.contacts);
    }
    let f = plant.flows();
    let g = |x: f64| format!("{x:.9e}");
    let mut text = String::new();
    text += &format!("steps {step}, meter reports seen {reports}, contact changes {switchings}\n");
    text += &format!("sum of grid readings, W·step: {}\n", g(grid_sum));
    text += &format!("sum of PV readings, W·step: {}\n", g(pv_sum));
    text += &format!("sum of tank temperatures, °C·step: {}\n", g(tank_sum));
    if plant.tank().is_some_and(|t| t.layers() > 1) {
        text += &format!("sum of tank top temperatures, °C·step: {}\n", g(tank_top_sum));
    }
    text += &format!("sum of battery volts, amps: {} {}\n", g(volts_sum), g(amps_sum));
    for (name, flow) in [
        ("pv", f.pv),
        ("house", f.house),
        ("battery_charge", f.battery_charge),
        ("battery_discharge", f.battery_discharge),
        ("losses", f.losses),
        ("grid_import", f.grid_import),
        ("grid_export", f.grid_export),
        ("pv_curtailed", f.pv_curtailed),
        ("unserved", f.unserved),
        ("pv_spilled", f.pv_spilled),
    ] {
        text += &format!("{name} Wh: {}\n", g(flow.wh));
    }
    for (name, flow) in plant.loads().iter().zip(&f.loads) {
        text += &format!("load {name} Wh: {}\n", g(flow.wh));
    }
    text += &format!("balance error Wh: {:.3e}\n", f.balance_error_wh());
    text
}
