//! Off-grid supply (charge controller, low-voltage disconnect) and grid outages.

mod plant_support;

use plant_support::{Constant, HalfSine, plant, run};
use spillway_sim::plant::battery::ChargerState;

const CABIN: &str = r#"
house: { standby: 100W, activity: 0W, fridge: null, appliances: [] }
battery:
  capacity: 14.3kWh
  max_charge: 3kW
  max_discharge: 3kW
  soc_min: 5%
  initial_soc: 90%
  nominal_voltage: 51.2V
  resistance_ohm: 0.03
off_grid:
  absorption_voltage: 56.0V
  float_voltage: 54.4V
  rebulk_voltage: 52.0V
  absorption_time: 1h
  disconnect_soc: 10%
  reconnect_soc: 30%
loads:
  - { name: dump, kind: regulated, rated: 1.5kW }
"#;

#[test]
fn the_charge_controller_throttles_the_array_at_float() {
    let mut p = plant(CABIN, Constant(3000.0));
    p.step(1.0);
    assert_eq!(p.readings().battery.unwrap().charger, ChargerState::Bulk);
    // In bulk the array delivers all it can: 3 kW, of which 100 W feed the house.
    assert!((p.flows().pv.w - 3000.0).abs() < 1e-6);
    let mut seen_absorption = false;
    for _ in 0..(6 * 3600) {
        p.step(1.0);
        match p.readings().battery.unwrap().charger {
            ChargerState::Absorption => seen_absorption = true,
            ChargerState::Float => break,
            _ => {}
        }
    }
    assert!(seen_absorption);
    assert_eq!(p.readings().battery.unwrap().charger, ChargerState::Float);
    run(&mut p, 600, 1.0);
    // At float a full battery takes (almost) nothing: the array is throttled to the load,
    // and the rest is curtailed.
    let f = p.flows();
    assert!((f.pv.w - 100.0).abs() < 5.0, "pv {} W", f.pv.w);
    assert!(f.pv_curtailed.w > 2800.0, "curtailed {} W", f.pv_curtailed.w);
    assert!(p.readings().pv.limit_w.is_some());
    // A dump load wins the curtailed power back.
    p.controls_mut().regulators[0] = 100.0;
    p.step(1.0);
    assert!((p.flows().pv.w - 1600.0).abs() < 5.0, "pv {} W", p.flows().pv.w);
    assert!(p.flows().balance_error_wh().abs() < 1e-6);
    assert_eq!(p.flows().unserved.wh, 0.0);
}

#[test]
fn the_low_voltage_disconnect_drops_loads_and_reconnects_on_charge() {
    let yaml = CABIN.replace("initial_soc: 90%", "initial_soc: 11%").replace("standby: 100W", "standby: 500W");
    let mut p = plant(&yaml, HalfSine::new(3000.0));
    run(&mut p, 3 * 3600, 1.0);
    let r = p.readings();
    assert!(r.loads_disconnected);
    assert!(r.battery.unwrap().soc_pct <= 10.0 + 1e-6);
    assert_eq!(p.flows().house.w, 0.0);
    assert!((p.flows().unserved.w - 500.0).abs() < 1e-6);
    run(&mut p, 15 * 3600, 1.0);
    assert!(!p.readings().loads_disconnected, "reconnected after a sunny day");
    assert!(p.flows().unserved.wh > 0.0);
    assert!(p.flows().balance_error_wh().abs() < 1e-6);
}

const BACKED_UP: &str = r#"
house: { standby: 800W, activity: 0W, fridge: null, appliances: [] }
battery: { capacity: 10kWh, max_charge: 5kW, max_discharge: 5kW, initial_soc: 50% }
grid:
  outages: [{ start: 1h, duration: 1h }]
"#;

#[test]
fn in_an_outage_the_battery_supplies_the_house() {
    let mut p = plant(BACKED_UP, Constant(0.0));
    run(&mut p, 3600, 1.0);
    assert!(p.readings().grid_available);
    let import_before = p.flows().grid_import.wh;
    run(&mut p, 1800, 1.0);
    let r = p.readings();
    assert!(!r.grid_available);
    assert_eq!(r.grid.unwrap().voltage_v, 0.0);
    assert!((r.battery.unwrap().power_w + 800.0).abs() < 1e-6);
    assert!((p.flows().grid_import.wh - import_before).abs() < 1e-9);
    assert_eq!(p.flows().unserved.wh, 0.0);
    // Readings describe the step just simulated: the first step after the outage.
    run(&mut p, 1801, 1.0);
    assert!(p.readings().grid_available);
    assert!(p.flows().balance_error_wh().abs() < 1e-6);
}

#[test]
fn an_outage_with_sun_caps_pv_at_what_the_island_absorbs() {
    let mut p = plant(BACKED_UP, Constant(9000.0));
    run(&mut p, 5400, 1.0);
    // 800 W house + 5 kW charging; the rest is held back.
    assert!((p.flows().pv.w - 5800.0).abs() < 1e-6, "{}", p.flows().pv.w);
    assert_eq!(p.flows().grid_export.w, 0.0);
}

#[test]
fn without_a_battery_an_outage_is_a_blackout() {
    let yaml =
        BACKED_UP.replace("battery: { capacity: 10kWh, max_charge: 5kW, max_discharge: 5kW, initial_soc: 50% }\n", "");
    let mut p = plant(&yaml, Constant(4000.0));
    run(&mut p, 5400, 1.0);
    // Anti-islanding: the PV inverter stops, nothing is served.
    assert_eq!(p.flows().pv.w, 0.0);
    assert_eq!(p.flows().house.w, 0.0);
    assert!((p.flows().unserved.w - 800.0).abs() < 1e-6);
    assert!(p.readings().loads_disconnected);
}

#[test]
fn a_self_consuming_battery_forms_the_island_and_picks_up_where_it_left_off() {
    // Before the outage it covers the 800 W house on its own control; in the outage it
    // supplies the island; back on the grid it goes on covering the house from the
    // island's power, so the meter sees no step when the grid returns.
    let yaml = BACKED_UP.replace("initial_soc: 50% }", "initial_soc: 50%, control: self_consumption }");
    assert_ne!(yaml, BACKED_UP);
    let mut p = plant(&yaml, Constant(0.0));
    run(&mut p, 3600, 1.0);
    assert!((p.readings().battery.unwrap().power_w + 800.0).abs() < 1e-6);
    let import_before = p.flows().grid_import.wh;
    run(&mut p, 3600, 1.0);
    assert!(!p.readings().grid_available);
    assert!((p.readings().battery.unwrap().power_w + 800.0).abs() < 1e-6);
    assert_eq!(p.flows().unserved.wh, 0.0);
    let before = p.flows().grid_import.wh;
    run(&mut p, 2, 1.0);
    assert!(p.readings().grid_available);
    assert!((p.flows().grid_import.wh - before).abs() < 1e-9, "a step at the meter when the grid came back");
    // Over the two hours, only the first seconds (the battery starting from rest)
    // imported anything.
    assert!(p.flows().grid_import.wh - import_before < 1e-9 && import_before < 1.0, "{import_before} Wh");
    assert!(p.flows().balance_error_wh().abs() < 1e-6);
}
