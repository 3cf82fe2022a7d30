//! The device bus: SunSpec layouts against the published model definitions, register
//! round trips, the inverter's reversion timers, the relay and sensor modules, MQTT.

mod plant_support;

use plant_support::{Constant, HalfSine, MONDAY_UTC_MS, fixture, plant, run};
use spillway_sim::bus::sunspec::{
    COMMON, DER_AC_CONTROLS, IMMEDIATE_CONTROLS, INVERTER_1PH, METER_1PH, METER_WYE, Model, NAMEPLATE,
};
use spillway_sim::bus::{
    AVAILABLE_POWER, BusError, HR_BATTERY_W, HR_EV_CURRENT, HR_REGULATOR, INVERTER_UNIT, METER_UNIT, RELAY_UNIT,
    SENSOR_UNIT, SUNSPEC_BASE, Table, ir,
};
use spillway_sim::plant::Plant;

const HR: Table = Table::HoldingRegisters;

// Source: SunSpec information models, repository sunspec/models, files
// json/model_1.json, model_201.json, model_203.json, model_101.json, model_120.json,
// model_123.json and model_704.json: point order and sizes (uint16/int16/enum16/sunssf/pad = 1 register,
// acc32/uint32/int32/bitfield32 = 2, strings as given). The model lengths and offsets
// below were counted by hand from those files. Model 704 follows the release shipped in
// pySunSpec2 1.3.7 (the same offsets as the controller's own table in
// src/sources/modbus/sunspec.rs, written independently from that release):
// WMaxLimPct_SF at data offset 52, i.e. model offset +54.
#[test]
fn model_layouts_match_the_published_definitions() {
    let check = |m: &Model, len: u16, points: &[(&str, u16)]| {
        assert_eq!(m.len(), len, "model {} length", m.id);
        for (name, off) in points {
            assert_eq!(m.offset(name), Some(*off), "model {} point {name}", m.id);
        }
    };
    check(&COMMON, 66, &[("Mn", 0), ("Md", 16), ("Opt", 32), ("Vr", 40), ("SN", 48), ("DA", 64)]);
    // Model 120 as shipped in pySunSpec2 1.3.7 (sunspec2/models/json/model_120.json).
    check(&NAMEPLATE, 26, &[("DERTyp", 0), ("WRtg", 1), ("WRtg_SF", 2), ("MaxDisChaRte_SF", 24), ("Pad", 25)]);
    let meter = [
        ("A", 0),
        ("A_SF", 4),
        ("PhV", 5),
        ("V_SF", 13),
        ("Hz", 14),
        ("Hz_SF", 15),
        ("W", 16),
        ("W_SF", 20),
        ("PF_SF", 35),
        ("TotWhExp", 36),
        ("TotWhImp", 44),
        ("TotWh_SF", 52),
        ("TotVArh_SF", 102),
        ("Evt", 103),
    ];
    check(&METER_1PH, 105, &meter);
    check(&METER_WYE, 105, &meter);
    check(
        &INVERTER_1PH,
        50,
        &[
            ("A", 0),
            ("A_SF", 4),
            ("PhVphA", 8),
            ("V_SF", 11),
            ("W", 12),
            ("W_SF", 13),
            ("Hz", 14),
            ("WH", 22),
            ("WH_SF", 24),
            ("TmpCab", 31),
            ("St", 36),
            ("Evt1", 38),
        ],
    );
    check(
        &IMMEDIATE_CONTROLS,
        24,
        &[
            ("Conn_RvrtTms", 1),
            ("Conn", 2),
            ("WMaxLimPct", 3),
            ("WMaxLimPct_RvrtTms", 5),
            ("WMaxLim_Ena", 7),
            ("WMaxLimPct_SF", 21),
            ("VArPct_SF", 23),
        ],
    );
    check(
        &DER_AC_CONTROLS,
        65,
        &[
            ("WMaxLimPctEna", 12),
            ("WMaxLimPct", 13),
            ("WMaxLimPctRvrt", 14),
            ("WMaxLimPctEnaRvrt", 15),
            ("WMaxLimPctRvrtTms", 16),
            ("WMaxLimPctRvrtRem", 18),
            ("WSet", 22),
            ("WRmp", 47),
            ("AntiIslEna", 50),
            ("PF_SF", 51),
            ("WMaxLimPct_SF", 52),
            ("PFWInj.PF", 57),
            ("PFWAbsRvrt.Ext", 64),
        ],
    );
}

fn words(p: &Plant, unit: u8, addr: u16, n: u16) -> Vec<u16> {
    p.bus().read_registers(unit, HR, addr, n).unwrap()
}

/// Walks the SunSpec chain from 40000: (model id, data start address) until the end model.
fn chain(p: &Plant, unit: u8) -> Vec<(u16, u16)> {
    assert_eq!(words(p, unit, SUNSPEC_BASE, 2), [0x5375, 0x6E53], "SunS marker");
    let mut at = SUNSPEC_BASE + 2;
    let mut out = Vec::new();
    loop {
        let h = words(p, unit, at, 2);
        if h[0] == 0xFFFF {
            assert_eq!(h[1], 0);
            return out;
        }
        out.push((h[0], at + 2));
        at += 2 + h[1];
    }
}

fn sunspec_plant() -> Plant {
    let yaml = "house: { standby: 1234W, activity: 0W, fridge: null, appliances: [] }\ninverter: { rating: 4kW }\n";
    plant(yaml, Constant(3000.0))
}

#[test]
fn the_chains_list_the_models_in_order() {
    let p = sunspec_plant();
    let ids = |u| chain(&p, u).iter().map(|m| m.0).collect::<Vec<_>>();
    assert_eq!(ids(METER_UNIT), [1, 201]);
    assert_eq!(ids(INVERTER_UNIT), [1, 101, 123, 704, 120]);
    // The nameplate carries the rating a limit percentage is taken of.
    let nameplate = chain(&p, INVERTER_UNIT)[4].1;
    let np = |point: &str| nameplate + NAMEPLATE.offset(point).unwrap();
    assert_eq!(words(&p, INVERTER_UNIT, np("DERTyp"), 1)[0], 4, "PV");
    assert_eq!(words(&p, INVERTER_UNIT, np("WRtg"), 2), [4000, 0], "4 kW, WRtg_SF 0");
    let three = Plant::new(&fixture("battery_ev_house.yaml"), Box::new(HalfSine::new(5e3)), MONDAY_UTC_MS, 1).unwrap();
    assert_eq!(chain(&three, METER_UNIT).iter().map(|m| m.0).collect::<Vec<_>>(), [1, 203]);
    let common = chain(&p, METER_UNIT)[0].1;
    let mn = words(&p, METER_UNIT, common, 16);
    assert_eq!(
        mn[0..4],
        [
            u16::from_be_bytes(*b"Sp"),
            u16::from_be_bytes(*b"il"),
            u16::from_be_bytes(*b"lw"),
            u16::from_be_bytes(*b"ay")
        ]
    );
}

#[test]
fn meter_and_inverter_registers_encode_the_readings() {
    let mut p = sunspec_plant();
    run(&mut p, 3600, 1.0);
    let meter = chain(&p, METER_UNIT)[1].1;
    let m = |point: &str| meter + METER_1PH.offset(point).unwrap();
    let w = words(&p, METER_UNIT, m("W"), 1)[0] as i16;
    let sf = words(&p, METER_UNIT, m("W_SF"), 1)[0] as i16;
    // 1234 W house − 3000 W PV = 1766 W export, negative.
    assert_eq!(f64::from(w) * 10f64.powi(sf.into()), -1766.0);
    let exp = words(&p, METER_UNIT, m("TotWhExp"), 2);
    assert_eq!((u32::from(exp[0]) << 16) | u32::from(exp[1]), 1766);
    assert_eq!(words(&p, METER_UNIT, m("Hz"), 1)[0], 5000);
    assert_eq!(words(&p, METER_UNIT, m("PF"), 1)[0], 0x8000, "not implemented");
    let inv = chain(&p, INVERTER_UNIT)[1].1;
    let i = |point: &str| inv + INVERTER_1PH.offset(point).unwrap();
    assert_eq!(words(&p, INVERTER_UNIT, i("W"), 1)[0], 3000);
    assert_eq!(words(&p, INVERTER_UNIT, i("St"), 1)[0], 4, "MPPT");
    assert_eq!(words(&p, INVERTER_UNIT, i("DCV"), 1)[0], 0xFFFF, "uint16 not implemented");
    assert_eq!(words(&p, INVERTER_UNIT, AVAILABLE_POWER, 2), [0, 3000]);
}

fn control_starts(p: &Plant) -> (u16, u16) {
    let c = chain(p, INVERTER_UNIT);
    (c[2].1, c[3].1)
}

#[test]
fn model_123_limit_drops_when_its_revert_timer_expires() {
    let mut p = sunspec_plant();
    let (m123, _) = control_starts(&p);
    let at = |point: &str| m123 + IMMEDIATE_CONTROLS.offset(point).unwrap();
    assert_eq!(words(&p, INVERTER_UNIT, at("WMaxLimPct_SF"), 1)[0] as i16, -2);
    // 50.00 % of 4 kW, for 60 s.
    let bus = p.bus_mut();
    bus.write_register(INVERTER_UNIT, at("WMaxLimPct"), 5000).unwrap();
    bus.write_register(INVERTER_UNIT, at("WMaxLimPct_RvrtTms"), 60).unwrap();
    bus.write_register(INVERTER_UNIT, at("WMaxLim_Ena"), 1).unwrap();
    p.step(1.0);
    assert_eq!(p.readings().pv.limit_w, Some(2000.0));
    assert_eq!(p.flows().pv.w, 2000.0);
    run(&mut p, 60, 1.0);
    // Source: SunSpec model 123, WMaxLimPct_RvrtTms "Timeout period for power limit":
    // when it runs out the limit is no longer applied.
    assert_eq!(p.readings().pv.limit_w, None);
    assert_eq!(p.flows().pv.w, 3000.0);
    assert_eq!(words(&p, INVERTER_UNIT, at("WMaxLim_Ena"), 1)[0], 0);
    // Disconnect: no output at all.
    p.bus_mut().write_register(INVERTER_UNIT, at("Conn"), 0).unwrap();
    p.step(1.0);
    assert_eq!(p.flows().pv.w, 0.0);
}

#[test]
fn model_704_applies_its_reversion_limit_when_the_timer_expires() {
    let mut p = sunspec_plant();
    let (_, m704) = control_starts(&p);
    let at = |point: &str| m704 + DER_AC_CONTROLS.offset(point).unwrap();
    assert_eq!(words(&p, INVERTER_UNIT, at("WMaxLimPct_SF"), 1)[0] as i16, -2);
    let bus = p.bus_mut();
    // Limit 75 %, reversion limit 20 %, reversion after 30 s without a refresh.
    bus.write_registers(INVERTER_UNIT, at("WMaxLimPctEna"), &[1, 7500, 2000, 1, 0, 30]).unwrap();
    p.step(1.0);
    assert_eq!(p.readings().pv.limit_w, Some(3000.0));
    run(&mut p, 10, 1.0);
    assert_eq!(words(&p, INVERTER_UNIT, at("WMaxLimPctRvrtRem"), 2), [0, 19]);
    // Refreshing the limit restarts the timer.
    p.bus_mut().write_register(INVERTER_UNIT, at("WMaxLimPct"), 5000).unwrap();
    run(&mut p, 29, 1.0);
    assert_eq!(p.readings().pv.limit_w, Some(2000.0));
    run(&mut p, 2, 1.0);
    // Source: SunSpec model 704, WMaxLimPctRvrt "Reversion limit maximum active power
    // percent value", applied when WMaxLimPctRvrtTms expires.
    assert_eq!(p.readings().pv.limit_w, Some(800.0));
    assert_eq!(p.flows().pv.w, 800.0);
    assert_eq!(words(&p, INVERTER_UNIT, at("WMaxLimPct"), 1)[0], 2000);
    assert_eq!(words(&p, INVERTER_UNIT, at("WMaxLimPctRvrtRem"), 2), [0, 0]);
}

#[test]
fn only_writable_addresses_are_accepted() {
    let mut p = sunspec_plant();
    let (m123, m704) = control_starts(&p);
    let bus = p.bus_mut();
    let e = bus.write_register(METER_UNIT, SUNSPEC_BASE + 80, 1).unwrap_err();
    assert!(matches!(e, BusError::IllegalDataAddress { .. }), "{e}");
    let sf = m123 + IMMEDIATE_CONTROLS.offset("WMaxLimPct_SF").unwrap();
    assert!(matches!(bus.write_register(INVERTER_UNIT, sf, 0), Err(BusError::IllegalDataAddress { .. })));
    let rem = m704 + DER_AC_CONTROLS.offset("WMaxLimPctRvrtRem").unwrap();
    assert!(matches!(bus.write_register(INVERTER_UNIT, rem, 0), Err(BusError::IllegalDataAddress { .. })));
    let ena = m123 + IMMEDIATE_CONTROLS.offset("WMaxLim_Ena").unwrap();
    assert!(matches!(bus.write_register(INVERTER_UNIT, ena, 2), Err(BusError::IllegalDataValue { .. })));
    assert!(matches!(bus.write_register(SENSOR_UNIT, 0, 1), Err(BusError::IllegalFunction { .. })));
    assert!(matches!(bus.write_coil(INVERTER_UNIT, 0, true), Err(BusError::IllegalFunction { .. })));
    assert!(matches!(bus.read(9, HR, 0, 1), Err(BusError::Timeout { unit: 9 })));
    assert!(matches!(bus.read(METER_UNIT, HR, SUNSPEC_BASE, 0), Err(BusError::IllegalDataValue { .. })));
    assert!(matches!(bus.read(METER_UNIT, HR, 39_999, 2), Err(BusError::IllegalDataAddress { .. })));
    assert!(matches!(bus.read(METER_UNIT, Table::InputRegisters, 0, 1), Err(BusError::IllegalFunction { .. })));
}

const RELAYS: &str = r#"
house: { standby: 0W, activity: 0W, fridge: null, appliances: [] }
tank: { volume: 100L, element: 2kW, initial: 30°C, draws: [] }
pump: { rated: 750W }
loads:
  - { name: heater, kind: regulated, rated: 2kW }
  - { name: patio, kind: stepped, stages: [1kW, 500W] }
battery: { capacity: 5kWh, max_charge: 3kW, max_discharge: 3kW }
ev:
  capacity: 50kWh
  sessions: [{ arrive: "00:00", depart: "23:59", soc: 30% }]
wiring: [pump, tank, patio.2]
"#;

#[test]
fn relay_module_coils_and_setpoints_round_trip() {
    let mut p = plant(RELAYS, Constant(0.0));
    let bus = p.bus_mut();
    bus.write_coils(RELAY_UNIT, 0, &[true, true, true]).unwrap();
    bus.write_register(RELAY_UNIT, HR_EV_CURRENT, 105).unwrap(); // 10.5 A
    let minus = (-1500i32) as u32;
    bus.write_registers(RELAY_UNIT, HR_BATTERY_W, &[(minus >> 16) as u16, minus as u16]).unwrap();
    bus.write_register(RELAY_UNIT, HR_REGULATOR, 250).unwrap(); // 25.0 %
    assert!(matches!(bus.write_register(RELAY_UNIT, HR_REGULATOR, 1001), Err(BusError::IllegalDataValue { .. })));
    assert!(matches!(bus.write_register(RELAY_UNIT, 5, 1), Err(BusError::IllegalDataAddress { .. })));
    assert!(matches!(bus.write_coil(RELAY_UNIT, 3, true), Err(BusError::IllegalDataAddress { .. })));
    let c = p.controls();
    assert_eq!(c.ev_current_a, 10.5);
    assert_eq!(c.battery_w, -1500.0);
    assert_eq!(c.regulators, [25.0]);
    let ch = |n: &str| p.channel(n).unwrap();
    assert!(c.relays[ch("pump")] && c.relays[ch("tank")] && c.relays[ch("patio.2")]);
    assert!(!c.relays[ch("patio.1")]);
    assert_eq!(p.bus().read_registers(RELAY_UNIT, HR, 0, 11).unwrap(), [105, 0xFFFF, 0xFA24, 0, 0, 0, 0, 0, 0, 0, 250]);
    p.step(1.0);
    assert_eq!(p.bus().read_bits(RELAY_UNIT, Table::Coils, 0, 3).unwrap(), [true; 3]);
    assert_eq!(p.bus().read_bits(RELAY_UNIT, Table::DiscreteInputs, 0, 3).unwrap(), [true; 3]);
    // Sensors: per-load power in load order (tank, pump, heater, patio, ev).
    let s = p.bus().read_registers(SENSOR_UNIT, Table::InputRegisters, ir::LOAD_POWER, 5).unwrap();
    assert_eq!(s, [2000, 750, 500, 500, 2300]);
    let t = p.bus().read_registers(SENSOR_UNIT, Table::InputRegisters, ir::TANK_TEMP, 2).unwrap();
    assert_eq!((t[0] as i16, t[1]), (300, 1));
    let b = p.bus().read_registers(SENSOR_UNIT, Table::InputRegisters, ir::BATTERY_SOC, 5).unwrap();
    assert_eq!(b[0], 500);
    assert_eq!(b[3] as i16, -1500);
    assert_eq!(p.bus().read_registers(SENSOR_UNIT, Table::InputRegisters, ir::GRID_AVAILABLE, 1).unwrap(), [1]);
    assert_eq!(p.bus().read_registers(SENSOR_UNIT, Table::InputRegisters, ir::EV_CURRENT, 1).unwrap(), [100]);
}

#[test]
fn mqtt_publishes_readings_and_takes_commands() {
    let mut p = plant(RELAYS, Constant(1000.0));
    p.bus_mut().mqtt_command("sim/relay/pump/set", "on").unwrap();
    p.bus_mut().mqtt_command("sim/regulator/heater/set", "50").unwrap();
    p.bus_mut().mqtt_command("sim/inverter/limit/set", "400").unwrap();
    p.bus_mut().mqtt_command("sim/battery/power/set", "-200").unwrap();
    p.bus_mut().mqtt_command("sim/ev/current/set", "6").unwrap();
    assert!(matches!(p.bus_mut().mqtt_command("sim/relay/pump/set", "maybe"), Err(BusError::BadPayload { .. })));
    assert!(matches!(p.bus_mut().mqtt_command("sim/relay/garage/set", "on"), Err(BusError::UnknownTopic(_))));
    p.step(1.0);
    let snap = p.bus().mqtt_snapshot();
    let get = |t: &str| snap.iter().find(|(k, _)| k == t).map(|(_, v)| v.as_str());
    assert_eq!(get("sim/relay/pump/state"), Some("on"));
    assert_eq!(get("sim/load/pump/power"), Some("750"));
    assert_eq!(get("sim/load/heater/power"), Some("1000"));
    assert_eq!(get("sim/inverter/power"), Some("400"));
    assert_eq!(get("sim/inverter/limit"), Some("400"));
    assert_eq!(get("sim/battery/power"), Some("-200"));
    assert_eq!(get("sim/ev/current"), Some("6"));
    // 750 + 1000 + 1380 (EV) − 200 (battery) − 400 (PV) = 2530 W import.
    assert_eq!(get("sim/meter/power"), Some("2530"));
    assert_eq!(get("sim/grid/available"), Some("on"));
    p.bus_mut().mqtt_command("sim/inverter/limit/set", "none").unwrap();
    assert_eq!(p.controls().pv_limit_w, None);
}
