//! Battery: round-trip efficiency, state-of-charge and power limits, voltage curve.

mod plant_support;

use plant_support::{Constant, plant, run};

const QUIET: &str = "house: { standby: 0W, activity: 0W, fridge: null, appliances: [] }\n";

fn battery_plant() -> spillway_sim::plant::Plant {
    let yaml = format!(
        "{QUIET}battery:\n  capacity: 10kWh\n  max_charge: 3kW\n  max_discharge: 3kW\n  charge_efficiency: 95%\n  discharge_efficiency: 95%\n  soc_min: 10%\n  soc_max: 90%\n  initial_soc: 10%\n"
    );
    plant(&yaml, Constant(0.0))
}

#[test]
fn round_trip_efficiency_is_the_product_of_the_one_way_efficiencies() {
    // Source: round-trip efficiency = energy out / energy in over a full cycle, which
    // for constant one-way efficiencies is η_c·η_d (common practice): 0.95² = 0.9025.
    let mut p = battery_plant();
    p.controls_mut().battery_w = 2000.0;
    run(&mut p, 8 * 3600, 1.0);
    assert!((p.readings().battery.unwrap().soc_pct - 90.0).abs() < 1e-6);
    let charged_ac = p.flows().grid_import.wh;
    // 8 kWh stored needs 8/0.95 kWh from the grid.
    assert!((charged_ac - 8000.0 / 0.95).abs() < 0.01, "{charged_ac}");
    p.controls_mut().battery_w = -2000.0;
    run(&mut p, 8 * 3600, 1.0);
    assert!((p.readings().battery.unwrap().soc_pct - 10.0).abs() < 1e-6);
    let discharged_ac = p.flows().grid_export.wh;
    let rte = discharged_ac / charged_ac;
    assert!((rte - 0.9025).abs() < 1e-6, "{rte}");
    // The difference is the battery's losses.
    assert!((p.flows().losses.wh - (charged_ac - discharged_ac)).abs() < 1e-6);
    assert!(p.flows().balance_error_wh().abs() < 1e-6);
}

#[test]
fn power_limits_and_soc_limits_hold() {
    let mut p = battery_plant();
    p.controls_mut().battery_w = 9000.0;
    p.step(1.0);
    assert_eq!(p.readings().battery.unwrap().power_w, 3000.0);
    run(&mut p, 10 * 3600, 1.0);
    assert!(p.readings().battery.unwrap().soc_pct <= 90.0 + 1e-9);
    assert_eq!(p.readings().battery.unwrap().power_w, 0.0);
    p.controls_mut().battery_w = -9000.0;
    p.step(1.0);
    assert_eq!(p.readings().battery.unwrap().power_w, -3000.0);
    run(&mut p, 10 * 3600, 1.0);
    assert!(p.readings().battery.unwrap().soc_pct >= 10.0 - 1e-9);
}

#[test]
fn voltage_rises_with_charge_and_sags_under_load() {
    let mut p = battery_plant();
    p.controls_mut().battery_w = 0.0;
    p.step(1.0);
    let rest = p.readings().battery.unwrap();
    p.controls_mut().battery_w = 3000.0;
    p.step(1.0);
    let charging = p.readings().battery.unwrap();
    assert!(charging.voltage_v > rest.voltage_v);
    assert!(charging.current_a > 0.0);
    // I·V ≈ the stored power (3 kW × 0.95) at the terminals.
    let dc = charging.current_a * (charging.voltage_v - charging.current_a * 0.03);
    assert!((dc - 2850.0).abs() < 1.0, "{dc}");
    p.controls_mut().battery_w = -3000.0;
    p.step(1.0);
    let discharging = p.readings().battery.unwrap();
    assert!(discharging.voltage_v < rest.voltage_v);
    assert!(discharging.current_a < 0.0);
    // 16 LFP cells near 10 % rest around 3.2 V each (typical curve, from memory).
    assert!((rest.voltage_v / 16.0 - 3.2).abs() < 0.05, "{}", rest.voltage_v);
}
