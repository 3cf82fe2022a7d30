//! Water-heater tank: heating energy, standing-loss cooling, draws, thermostat, cut-out.

mod plant_support;

use plant_support::{Constant, plant, run};

const QUIET: &str = "house: { standby: 0W, activity: 0W, fridge: null, appliances: [] }\n";

/// Specific heat of water. Source: physics/engineering handbooks (e.g. the CRC Handbook
/// of Chemistry and Physics) give 4.186 kJ/(kg·K) near 15 °C; from memory.
const C_WATER: f64 = 4186.0;

fn tank_plant(tank: &str) -> spillway_sim::plant::Plant {
    let yaml = format!("{QUIET}tank:\n{tank}\nwiring: [tank]\n");
    plant(&yaml, Constant(0.0))
}

#[test]
fn heating_a_full_tank_takes_m_c_delta_t() {
    // 150 L (150 kg, water taken as 1 kg/L: common practice) from 20 to 60 °C.
    let mut p = tank_plant(
        "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  initial: 20°C\n  draws: []\n  thermostat: { setpoint: 60°C, deadband: 5°C }\n  cutout: 90°C",
    );
    let ch = p.channel("tank").unwrap();
    p.controls_mut().relays[ch] = true;
    let mut seconds = 0;
    while p.readings().tank.unwrap().heating || seconds == 0 {
        p.step(1.0);
        seconds += 1;
        assert!(seconds < 20_000, "thermostat never opened");
    }
    // Source: Q = m·c·ΔT (calorimetry; c from the handbook value above).
    let expected_wh = 150.0 * C_WATER * 40.0 / 3600.0; // 6976.7 Wh
    let element_wh = p.flows().loads[0].wh;
    assert!((element_wh - expected_wh).abs() / expected_wh < 1e-3, "{element_wh} vs {expected_wh}");
    // t = m·c·ΔT / P = 8372 s; the thermostat opens within a step of it.
    let expected_s = 150.0 * C_WATER * 40.0 / 3000.0;
    assert!((f64::from(seconds) - expected_s).abs() <= 2.0, "{seconds} s vs {expected_s} s");
    assert!((p.tank_temp_c().unwrap() - 60.0).abs() < 0.01);
}

#[test]
fn standing_loss_follows_newtons_law_of_cooling() {
    // Source: Newton's law of cooling, m·c·dT/dt = −UA·(T − Ta), whose textbook
    // solution is T(t) = Ta + (T0 − Ta)·exp(−UA·t/(m·c)) (any heat-transfer text,
    // e.g. Incropera, Fundamentals of Heat and Mass Transfer, lumped capacitance).
    let (m, ua, t0, ta) = (200.0, 2.2, 65.0, 20.0);
    let mut p = tank_plant(&format!(
        "  volume: {m}L\n  element: 3kW\n  ua: {ua}W/K\n  ambient: {ta}°C\n  initial: {t0}°C\n  draws: []"
    ));
    for hour in 1..=72 {
        run(&mut p, 3600, 1.0);
        let t = f64::from(hour) * 3600.0;
        let analytic = ta + (t0 - ta) * (-ua * t / (m * C_WATER)).exp();
        let sim = p.tank_temp_c().unwrap();
        assert!((sim - analytic).abs() < 1e-6, "hour {hour}: {sim} vs {analytic}");
    }
    // The same with a coarse 60 s step: the update is exact for any step length.
    let mut q = tank_plant(&format!(
        "  volume: {m}L\n  element: 3kW\n  ua: {ua}W/K\n  ambient: {ta}°C\n  initial: {t0}°C\n  draws: []"
    ));
    run(&mut q, 24 * 3600, 60.0);
    let analytic = ta + (t0 - ta) * (-ua * 86_400.0 / (m * C_WATER)).exp();
    assert!((q.tank_temp_c().unwrap() - analytic).abs() < 1e-6);
}

#[test]
fn a_draw_removes_the_heat_the_tap_delivers() {
    // First-law balance of a thermostatic mixing tap: 40 L at 40 °C from 15 °C cold
    // water takes 40·(40 − 15)·c of heat; a 150 L node loses 40·25/150 = 6.667 K.
    let mut p = tank_plant(
        "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  cold: 15°C\n  initial: 60°C\n  draws: [{ at: \"00:10\", volume: 40L, temperature: 40°C }]",
    );
    run(&mut p, 3600, 1.0);
    let t = p.tank_temp_c().unwrap();
    assert!((t - (60.0 - 40.0 * 25.0 / 150.0)).abs() < 1e-9, "{t}");
}

#[test]
fn a_tank_below_the_tap_temperature_delivers_lukewarm_water_and_counts_the_heat_it_lacked() {
    // 40 L asked for at 40 °C from a 150 L tank at 30 °C, 15 °C cold inflow, no heating:
    // the tap takes the tank as it is, and each litre drawn dilutes it (well mixed:
    // T(v) = 15 + 15·exp(−v/150)). The heat lacked is c·∫(40 − T(v))dv over 40 L
    // = c·(25·40 − 15·150·(1 − exp(−40/150))) = c·473.3 L·K (first-law balance of a
    // mixed tank; c as above).
    // One 40 L draw at 40 °C from a 150 L tank starting at `initial` °C.
    let drawn_from = |initial: f64| {
        let mut p = tank_plant(&format!(
            "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  cold: 15°C\n  initial: {initial}°C\n  draws: [{{ at: \"00:10\", volume: 40L, temperature: 40°C }}]"
        ));
        run(&mut p, 3600, 1.0);
        p
    };
    let p = drawn_from(30.0);
    let (lukewarm_l, short_wh) = p.hot_water_short().unwrap();
    assert!((lukewarm_l - 40.0).abs() < 0.2, "{lukewarm_l}");
    let expected_wh = C_WATER * (25.0 * 40.0 - 15.0 * 150.0 * (1.0 - (-40.0f64 / 150.0).exp())) / 3600.0;
    assert!((short_wh - expected_wh).abs() / expected_wh < 0.005, "{short_wh} vs {expected_wh}");

    // The same draw from a tank hot enough to mix down to 40 °C lacks nothing.
    let hot = drawn_from(60.0);
    assert_eq!(hot.hot_water_short(), Some((0.0, 0.0)));
}

#[test]
fn thermostat_holds_the_band_whatever_the_relay_says() {
    let mut p = tank_plant(
        "  volume: 150L\n  element: 3kW\n  ua: 2W/K\n  initial: 40°C\n  thermostat: { setpoint: 60°C, deadband: 6°C }",
    );
    let ch = p.channel("tank").unwrap();
    p.controls_mut().relays[ch] = true;
    run(&mut p, 4 * 3600, 1.0);
    let (mut lo, mut hi, mut switches, mut was) = (f64::MAX, f64::MIN, 0, true);
    for _ in 0..(3 * 86_400) {
        p.step(1.0);
        let r = p.readings().tank.unwrap();
        lo = lo.min(r.temp_c);
        hi = hi.max(r.temp_c);
        if r.heating != was {
            switches += 1;
            was = r.heating;
        }
    }
    // Draws pull it below the band's floor; the element never pushes it past the setpoint.
    assert!(hi <= 60.0 + 0.01, "{hi}");
    assert!(lo < 54.0, "draws should cool it below the band: {lo}");
    assert!(switches >= 6, "{switches}");
}

#[test]
fn the_cut_out_trips_and_stays_open() {
    // A thermostat set above the cut-out (a failed thermostat) lets the cut-out act.
    let mut p = tank_plant(
        "  volume: 100L\n  element: 3kW\n  ua: 0W/K\n  initial: 70°C\n  draws: []\n  thermostat: { setpoint: 99°C }\n  cutout: 85°C",
    );
    let ch = p.channel("tank").unwrap();
    p.controls_mut().relays[ch] = true;
    run(&mut p, 3 * 3600, 1.0);
    let r = p.readings().tank.unwrap();
    assert!(r.cutout_tripped);
    assert!(!r.heating);
    assert!((p.tank_temp_c().unwrap() - 85.0).abs() < 0.01);
    // Heating 100 L by 15 K: 100·c·15 / 3600 Wh.
    let expected_wh = 100.0 * C_WATER * 15.0 / 3600.0;
    assert!((p.flows().loads[0].wh - expected_wh).abs() < 1.0);
}
