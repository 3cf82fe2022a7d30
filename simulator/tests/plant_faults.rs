//! Faults on a schedule, and the meter's period, delay and noise.

mod plant_support;

use plant_support::{Constant, plant, run};
use spillway_sim::bus::sunspec::{IMMEDIATE_CONTROLS, METER_1PH};
use spillway_sim::bus::{BusError, INVERTER_UNIT, METER_UNIT, RELAY_UNIT, SUNSPEC_BASE, Table};

const HR: Table = Table::HoldingRegisters;
const QUIET: &str = "house: { standby: 500W, activity: 0W, fridge: null, appliances: [] }\n";
/// Data start of the meter model: after SunS (2), common (2 + 66) and the meter header (2).
const METER_DATA: u16 = SUNSPEC_BASE + 2 + 68 + 2;

#[test]
fn a_silent_meter_freezes_and_times_out() {
    let yaml = format!("{QUIET}faults: [{{ kind: meter_silent, start: 10min, duration: 5min }}]\n");
    let mut p = plant(&yaml, Constant(0.0));
    run(&mut p, 600, 1.0);
    let before = p.readings().grid.unwrap();
    assert_eq!(before.updated_ms, p.now_ms());
    run(&mut p, 120, 1.0);
    let during = p.readings().grid.unwrap();
    assert_eq!(during.updated_ms, before.updated_ms, "no new readings");
    assert_eq!(p.bus().read(METER_UNIT, HR, SUNSPEC_BASE, 2), Err(BusError::Timeout { unit: METER_UNIT }));
    assert!(p.bus().mqtt_snapshot().iter().all(|(t, _)| !t.starts_with("sim/meter/")));
    run(&mut p, 200, 1.0);
    assert_eq!(p.readings().grid.unwrap().updated_ms, p.now_ms());
    assert!(p.bus().read(METER_UNIT, HR, SUNSPEC_BASE, 2).is_ok());
}

#[test]
fn a_frozen_meter_answers_on_time_but_repeats_its_last_reading() {
    // The PV changes under it, so a live meter's reading would move.
    let yaml = format!(
        "{QUIET}meter: {{ period: 1s, delay: 2s, noise: 10W }}\nfaults: [{{ kind: meter_frozen, start: 10min, duration: 5min }}]\n"
    );
    let mut p = plant(&yaml, Constant(300.0));
    run(&mut p, 600, 1.0);
    let before = p.readings().grid.unwrap();
    run(&mut p, 1, 1.0);
    let queued = p.readings().grid.unwrap();
    assert_ne!(queued.power_w, before.power_w, "noise moves a live reading");
    run(&mut p, 120, 1.0);
    let during = p.readings().grid.unwrap();
    assert_eq!(during.updated_ms, p.now_ms(), "still reporting on time");
    run(&mut p, 1, 1.0);
    let next = p.readings().grid.unwrap();
    assert_eq!(next.power_w, during.power_w, "the same reading, report after report");
    assert_eq!((next.import_wh, next.export_wh), (during.import_wh, during.export_wh), "counters hang too");
    assert!(next.updated_ms > during.updated_ms);
    assert!(p.bus().read(METER_UNIT, HR, SUNSPEC_BASE, 2).is_ok(), "the unit answers");
    run(&mut p, 200, 1.0);
    let after = p.readings().grid.unwrap();
    run(&mut p, 1, 1.0);
    assert_ne!(p.readings().grid.unwrap().power_w, after.power_w, "live again");
}

#[test]
fn a_restarting_relay_module_drops_its_outputs_and_forgets_its_coils() {
    let yaml = format!(
        "{QUIET}pump: {{ rated: 750W }}\nloads: [{{ name: heater, kind: switched, rated: 1kW }}]\nwiring: [pump]\nfaults: [{{ kind: device_restart, device: relays, start: 60s, duration: 30s }}]\n"
    );
    let mut p = plant(&yaml, Constant(0.0));
    p.bus_mut().write_coil(RELAY_UNIT, 0, true).unwrap();
    let heater = p.channel("heater").unwrap();
    p.controls_mut().relays[heater] = true; // not on the relay module
    run(&mut p, 61, 1.0);
    assert_eq!(p.readings().loads_w[0], 0.0, "pump off while the module reboots");
    assert_eq!(p.readings().loads_w[1], 1000.0, "an unwired load is unaffected");
    assert_eq!(p.bus().read(RELAY_UNIT, Table::Coils, 0, 1), Err(BusError::ServerDeviceFailure { unit: RELAY_UNIT }));
    assert!(p.bus_mut().write_coil(RELAY_UNIT, 0, true).is_err());
    run(&mut p, 40, 1.0);
    // Back, at its power-on state: the coil is open until the controller re-asserts it.
    assert_eq!(p.bus().read_bits(RELAY_UNIT, Table::Coils, 0, 1).unwrap(), [false]);
    assert_eq!(p.readings().loads_w[0], 0.0);
    p.bus_mut().write_coil(RELAY_UNIT, 0, true).unwrap();
    p.step(1.0);
    assert_eq!(p.readings().loads_w[0], 750.0);
}

#[test]
fn a_restarting_inverter_stops_then_forgets_its_limit() {
    let yaml = format!(
        "{QUIET}inverter: {{ rating: 4kW }}\nfaults: [{{ kind: device_restart, device: inverter, start: 60s, duration: 30s }}]\n"
    );
    let mut p = plant(&yaml, Constant(3000.0));
    let pct = SUNSPEC_BASE + 2 + 68 + 52 + 2 + IMMEDIATE_CONTROLS.offset("WMaxLimPct").unwrap();
    p.bus_mut().write_registers(INVERTER_UNIT, pct, &[2500, 0, 0, 0, 1]).unwrap(); // 25 %, enabled
    p.step(1.0);
    assert_eq!(p.flows().pv.w, 1000.0);
    run(&mut p, 70, 1.0);
    assert_eq!(p.flows().pv.w, 0.0, "no output while rebooting");
    assert!(matches!(p.bus().read(INVERTER_UNIT, HR, SUNSPEC_BASE, 2), Err(BusError::ServerDeviceFailure { .. })));
    run(&mut p, 30, 1.0);
    assert_eq!(p.readings().pv.limit_w, None, "limit lost with the reboot");
    assert_eq!(p.flows().pv.w, 3000.0);
}

#[test]
fn a_stuck_relay_ignores_its_coil() {
    let yaml = format!(
        "{QUIET}pump: {{ rated: 750W }}\nwiring: [pump]\nfaults: [{{ kind: relay_stuck, channel: pump, closed: true, start: 1min, duration: 10min }}]\n"
    );
    let mut p = plant(&yaml, Constant(0.0));
    p.bus_mut().write_coil(RELAY_UNIT, 0, false).unwrap();
    run(&mut p, 120, 1.0);
    assert_eq!(p.readings().loads_w[0], 750.0, "welded contact keeps the pump running");
    assert_eq!(p.bus().read_bits(RELAY_UNIT, Table::Coils, 0, 1).unwrap(), [false]);
    assert_eq!(p.bus().read_bits(RELAY_UNIT, Table::DiscreteInputs, 0, 1).unwrap(), [true]);
    run(&mut p, 600, 1.0);
    assert_eq!(p.readings().loads_w[0], 0.0, "freed, it follows the coil again");
}

#[test]
fn garbage_reaches_the_readings_and_the_wire() {
    for (mode, check) in [
        ("nan", (|w: f64, reg: u16| w.is_nan() && reg == 0x8000) as fn(f64, u16) -> bool),
        ("spike", |w, reg| w.abs() == 1e6 && (reg == 0x7FFF || reg == 0x8001)),
        ("random", |w, _| w.is_finite() && w.abs() <= 50_000.0 && w != 500.0),
    ] {
        let yaml =
            format!("{QUIET}faults: [{{ kind: garbage, device: meter, mode: {mode}, start: 10s, duration: 10s }}]\n");
        let mut p = plant(&yaml, Constant(0.0));
        run(&mut p, 15, 1.0);
        let w = p.readings().grid.unwrap().power_w;
        let reg = p.bus().read_registers(METER_UNIT, HR, METER_DATA + METER_1PH.offset("W").unwrap(), 1).unwrap()[0];
        assert!(check(w, reg), "{mode}: {w} W, register {reg:#06x}");
        run(&mut p, 10, 1.0);
        assert_eq!(p.readings().grid.unwrap().power_w, 500.0, "{mode}: clean again");
    }
}

#[test]
fn the_meter_reports_period_means_after_its_delay() {
    let yaml = format!("{QUIET}pump: {{ rated: 1kW }}\nmeter: {{ period: 5s, delay: 2s }}\n");
    let mut p = plant(&yaml, Constant(0.0));
    run(&mut p, 10, 1.0);
    let ch = p.channel("pump").unwrap();
    p.controls_mut().relays[ch] = true; // on for seconds 10..12 of the period 10..15
    run(&mut p, 2, 1.0);
    p.controls_mut().relays[ch] = false;
    run(&mut p, 4, 1.0); // t = 16 s: the period ended at 15 s, visible at 17 s
    assert_eq!(p.readings().grid.unwrap().power_w, 500.0);
    p.step(1.0);
    let g = p.readings().grid.unwrap();
    assert_eq!(g.power_w, 500.0 + 2.0 / 5.0 * 1000.0);
    assert_eq!(g.updated_ms, p.now_ms());
}

#[test]
fn meter_noise_has_the_configured_spread() {
    let yaml = format!("{QUIET}meter: {{ noise: 25W }}\n");
    let mut p = plant(&yaml, Constant(0.0));
    let (mut s, mut s2, n) = (0.0, 0.0, 20_000);
    for _ in 0..n {
        p.step(1.0);
        let e = p.readings().grid.unwrap().power_w - 500.0;
        s += e;
        s2 += e * e;
    }
    let mean = s / f64::from(n);
    let sd = (s2 / f64::from(n) - mean * mean).sqrt();
    assert!(mean.abs() < 1.0, "{mean}");
    assert!((sd - 25.0).abs() < 1.0, "{sd}");
}

#[test]
fn sensor_garbage_and_a_restarting_sensor_module() {
    let yaml = format!(
        "{QUIET}tank: {{ volume: 100L, element: 2kW, initial: 50°C, draws: [] }}\nfaults:\n  - {{ kind: garbage, device: sensors, mode: nan, start: 10s, duration: 10s }}\n  - {{ kind: device_restart, device: sensors, start: 30s, duration: 10s }}\n  - {{ kind: device_restart, device: meter, start: 50s, duration: 10s }}\n"
    );
    let mut p = plant(&yaml, Constant(0.0));
    run(&mut p, 15, 1.0);
    assert!(p.readings().tank.unwrap().temp_c.is_nan());
    let ir = Table::InputRegisters;
    assert_eq!(p.bus().read_registers(spillway_sim::bus::SENSOR_UNIT, ir, 0, 1).unwrap(), [0x8000]);
    run(&mut p, 20, 1.0);
    assert!((p.readings().tank.unwrap().temp_c - 50.0).abs() < 0.1);
    assert!(matches!(
        p.bus().read(spillway_sim::bus::SENSOR_UNIT, ir, 0, 1),
        Err(BusError::ServerDeviceFailure { .. })
    ));
    assert!(p.bus().mqtt_snapshot().iter().all(|(t, _)| !t.starts_with("sim/tank/")));
    run(&mut p, 20, 1.0);
    let frozen = p.readings().grid.unwrap().updated_ms;
    assert!(matches!(p.bus().read(METER_UNIT, HR, SUNSPEC_BASE, 2), Err(BusError::ServerDeviceFailure { .. })));
    run(&mut p, 5, 1.0);
    assert_eq!(p.readings().grid.unwrap().updated_ms, frozen, "a rebooting meter reports nothing");
}
