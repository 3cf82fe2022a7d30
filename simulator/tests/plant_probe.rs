//! In-process probes read the same values the encoded registers carry: for every address
//! a probe claims, decoding the bus's own registers gives the probe's value to within
//! the register's resolution.

mod plant_support;

use plant_support::{HalfSine, MONDAY_UTC_MS, fixture, run};
use spillway_sim::bus::probe::Probe;
use spillway_sim::bus::{INVERTER_UNIT, METER_UNIT, RELAY_UNIT, SENSOR_UNIT, SUNSPEC_BASE, Table};
use spillway_sim::plant::Plant;

/// Decodes `count` words as SunSpec-style integers (signed when `signed`), times 10^sf.
fn words_value(words: &[u16], signed: bool, sf: i32) -> f64 {
    let raw = match (words.len(), signed) {
        (1, true) => f64::from(words[0] as i16),
        (1, false) => f64::from(words[0]),
        (2, true) => f64::from((u32::from(words[0]) << 16 | u32::from(words[1])) as i32),
        (_, _) => f64::from(u32::from(words[0]) << 16 | u32::from(words[1])),
    };
    raw * 10f64.powi(sf)
}

#[test]
fn probes_agree_with_the_encoded_registers() {
    for name in ["zero_export_house.yaml", "battery_ev_house.yaml", "offgrid_cabin.yaml"] {
        let cfg = fixture(name);
        let mut p = Plant::new(&cfg, Box::new(HalfSine::new(4000.0)), MONDAY_UTC_MS + 11 * 3_600_000, 3).unwrap();
        run(&mut p, 600, 1.0);
        let bus = p.bus();
        let (r, c) = (bus.readings(), bus.controls());
        // (unit, table, address, words, signed, scale exponent, resolution)
        let cases: &[(u8, Table, u16, u16, bool, i32, f64)] = &[
            (SENSOR_UNIT, Table::InputRegisters, 0, 1, true, -1, 0.05),
            (SENSOR_UNIT, Table::InputRegisters, 10, 1, false, -1, 0.05),
            (SENSOR_UNIT, Table::InputRegisters, 11, 1, false, -2, 0.005),
            (SENSOR_UNIT, Table::InputRegisters, 12, 1, true, -1, 0.05),
            (SENSOR_UNIT, Table::InputRegisters, 20, 1, false, 0, 0.0),
            (INVERTER_UNIT, Table::HoldingRegisters, 50000, 2, false, 0, 0.5),
            (RELAY_UNIT, Table::HoldingRegisters, 0, 1, false, -1, 0.05),
        ];
        for &(unit, table, address, count, signed, sf, resolution) in cases {
            let Some(probe) = bus.probe(unit, table, address) else { continue };
            let Some(direct) = probe.value(r, c) else { continue };
            let Ok(words) = bus.read_registers(unit, table, address, count) else { continue };
            let decoded = words_value(&words, signed, sf);
            assert!(
                (decoded - direct).abs() <= resolution + 1e-9,
                "{name}: {probe:?} registers {decoded} direct {direct}"
            );
        }
        // SunSpec W of the meter (second model after the common one, W at data offset 16,
        // W_SF = 0) and of the inverter (W at data offset 12 in model 101).
        let data = SUNSPEC_BASE + 2 + 68 + 2;
        if let Some(probe) = bus.probe(METER_UNIT, Table::HoldingRegisters, data + 16) {
            assert_eq!(probe, Probe::GridPower);
            let w =
                words_value(&bus.read_registers(METER_UNIT, Table::HoldingRegisters, data + 16, 1).unwrap(), true, 0);
            assert!((w - probe.value(r, c).unwrap()).abs() <= 0.5, "{name}: meter W");
        }
        assert_eq!(bus.probe(INVERTER_UNIT, Table::HoldingRegisters, data + 12), Some(Probe::PvPower));
        // Relay coils map to their wired channels.
        for (coil, &ch) in bus.layout().wiring.iter().enumerate() {
            assert_eq!(bus.probe(RELAY_UNIT, Table::Coils, coil as u16), Some(Probe::RelayCommand(ch)));
        }
    }
}

#[test]
fn a_silent_meter_does_not_answer_through_the_probe_path_either() {
    let mut cfg = fixture("zero_export_house.yaml");
    cfg.faults = serde_saphyr::from_str("- { kind: meter_silent, start: 10s, duration: 60s }").unwrap();
    let mut p = Plant::new(&cfg, Box::new(HalfSine::new(4000.0)), MONDAY_UTC_MS, 3).unwrap();
    assert!(p.bus().answers(METER_UNIT).is_ok());
    run(&mut p, 20, 1.0);
    assert!(p.bus().answers(METER_UNIT).is_err());
    assert!(p.bus().answers(SENSOR_UNIT).is_ok());
}
