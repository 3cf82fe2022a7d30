//! Battery: round-trip efficiency, state-of-charge and power limits, voltage curve.

mod plant_support;

use plant_support::{Constant, HalfSine, plant, run};

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

/// A battery on its own self-consumption control: charges from what would be exported,
/// discharges to cover what would be imported.
fn own_control_plant(
    pv: impl spillway_sim::pv_output::PvSource + 'static,
    house_w: f64,
    initial_soc: f64,
) -> spillway_sim::plant::Plant {
    let yaml = format!(
        "house: {{ standby: {house_w}W, activity: 0W, fridge: null, appliances: [] }}\nmeter: {{ noise: 0W }}\nbattery:\n  capacity: 10kWh\n  max_charge: 3kW\n  max_discharge: 3kW\n  soc_min: 10%\n  soc_max: 90%\n  initial_soc: {initial_soc}%\n  control: self_consumption\n  response: 2s\n"
    );
    plant(&yaml, pv)
}

/// True grid power of the last step from the plant's import and export accounts, W.
fn grid_of_last_step(p: &spillway_sim::plant::Plant, before: (f64, f64)) -> f64 {
    let f = p.flows();
    ((f.grid_import.wh - before.0) - (f.grid_export.wh - before.1)) * 3600.0
}

#[test]
fn a_self_consuming_battery_holds_the_grid_near_zero_while_it_has_room() {
    // A clear half-sine day peaking at 2.5 kW over a 500 W house: the surplus (≤ 2 kW)
    // and the night's demand (500 W) are both within the battery's 3 kW, so the grid
    // should see only the measurement lag while the charge is between its limits (its
    // net power changes by at most 0.2 W a second, so the lag leaves well under 2 W).
    let mut p = own_control_plant(HalfSine::new(2500.0), 500.0, 50.0);
    let (mut within, mut near_zero) = (0u32, 0u32);
    for _ in 0..86_400 {
        let before = (p.flows().grid_import.wh, p.flows().grid_export.wh);
        p.step(1.0);
        let soc = p.readings().battery.unwrap().soc_pct;
        if soc > 10.5 && soc < 89.5 {
            within += 1;
            if grid_of_last_step(&p, before).abs() < 2.0 {
                near_zero += 1;
            }
        }
    }
    // It empties before dawn and fills in the afternoon: most of the day is in between.
    assert!(within > 60_000, "the charge stayed between its limits for {within} s only");
    // The only steps outside ±2 W are the first ones: the battery starts at rest against a
    // 500 W house, and 500 W·(1 − α)^k with α = 1 − e^(−0.5) falls below 2 W at k = 12.
    assert_eq!(within - near_zero, 12, "steps off zero");
    assert!(p.flows().balance_error_wh().abs() < 1e-6);
    // It did discharge at night and charge by day.
    assert!(p.flows().battery_discharge.wh > 1000.0 && p.flows().battery_charge.wh > 1000.0);
}

#[test]
fn a_self_consuming_battery_lags_a_step_by_its_measurement_and_time_constant() {
    // 2 kW of PV over no house, the battery at rest: the export it lets through decays
    // geometrically, A·(1−α)^k in step k with α = 1 − e^(−Δt/τ), one step late. Summed,
    // A/α watt-seconds (the geometric series), here 2000 W / (1 − e^(−0.5)) = 5083 J.
    let mut p = own_control_plant(Constant(2000.0), 0.0, 50.0);
    run(&mut p, 120, 1.0);
    let alpha = 1.0 - (-0.5f64).exp();
    let expected_wh = 2000.0 / alpha / 3600.0;
    let exported = p.flows().grid_export.wh;
    assert!((exported - expected_wh).abs() < 1e-6 * expected_wh, "{exported} Wh, expected {expected_wh}");
    assert!((p.readings().battery.unwrap().power_w - 2000.0).abs() < 1e-6);
}

#[test]
fn a_self_consuming_battery_stops_at_its_limits_and_the_grid_takes_the_rest() {
    // Night: a 1 kW house on a battery at 12 %: it covers the house until 10 %, then the
    // grid does; with 4 kW of PV over the same house, 3 kW charge it and 0 W leave until
    // 90 %, then everything but the house is exported.
    let mut p = own_control_plant(Constant(0.0), 1000.0, 12.0);
    run(&mut p, 4 * 3600, 1.0);
    let b = p.readings().battery.unwrap();
    assert!((b.soc_pct - 10.0).abs() < 1e-6, "{}", b.soc_pct);
    // 2 % of 10 kWh is 200 Wh stored, 190 Wh at 95 % out: the house imported the rest.
    let imported = p.flows().grid_import.wh;
    assert!((imported - (4000.0 - 200.0 * 0.95)).abs() < 2.0, "{imported} Wh");
    let mut p = own_control_plant(Constant(4000.0), 1000.0, 88.0);
    run(&mut p, 3600, 1.0);
    assert!((p.readings().battery.unwrap().soc_pct - 90.0).abs() < 1e-6);
    let before = (p.flows().grid_import.wh, p.flows().grid_export.wh);
    p.step(1.0);
    assert!((grid_of_last_step(&p, before) + 3000.0).abs() < 1e-6);
}

#[test]
fn a_self_consuming_battery_takes_no_setpoint_and_is_not_for_off_grid() {
    use spillway_sim::bus::{HR_BATTERY_W, RELAY_UNIT};
    let mut p = own_control_plant(Constant(0.0), 0.0, 50.0);
    assert!(!p.bus().layout().battery_setpoint);
    let err = p.bus_mut().write_registers(RELAY_UNIT, HR_BATTERY_W, &[0, 1000]).unwrap_err();
    assert!(err.to_string().contains("illegal data address"), "{err}");
    assert!(p.bus_mut().mqtt_command("sim/battery/power/set", "1000").is_err());
    p.controls_mut().battery_w = 2000.0;
    run(&mut p, 60, 1.0);
    assert_eq!(p.readings().battery.unwrap().power_w, 0.0, "it followed a setpoint");
    let off_grid = "house: { standby: 100W, activity: 0W, fridge: null, appliances: [] }\nbattery: { capacity: 10kWh, max_charge: 3kW, max_discharge: 3kW, control: self_consumption }\noff_grid: { absorption_voltage: 56V, float_voltage: 54.4V, rebulk_voltage: 52V, absorption_time: 1h, disconnect_soc: 10%, reconnect_soc: 30% }\n";
    let cfg = plant_support::config(off_grid);
    let err =
        spillway_sim::plant::Plant::new(&cfg, Box::new(Constant(0.0)), plant_support::MONDAY_UTC_MS, 1).err().unwrap();
    assert!(err.to_string().contains("self_consumption") && err.to_string().contains("off-grid"), "{err}");
}
