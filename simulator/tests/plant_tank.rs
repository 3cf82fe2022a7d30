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

/// A tank (its relay open) after its first hour, 1 s steps: a draw at 00:10 is done.
fn after_an_hour(tank: &str) -> spillway_sim::plant::Plant {
    let mut p = tank_plant(tank);
    run(&mut p, 3600, 1.0);
    p
}

/// A tank whose relay is closed: its thermostat and cut-out alone decide the element.
fn heated_tank(tank: &str) -> spillway_sim::plant::Plant {
    let mut p = tank_plant(tank);
    let ch = p.channel("tank").unwrap();
    p.controls_mut().relays[ch] = true;
    p
}

#[test]
fn heating_a_full_tank_takes_m_c_delta_t() {
    // 150 L (150 kg, water taken as 1 kg/L: common practice) from 20 to 60 °C.
    let mut p = heated_tank(
        "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  initial: 20°C\n  draws: []\n  thermostat: { setpoint: 60°C, deadband: 5°C }\n  cutout: 90°C",
    );
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
    // A layered tank at one temperature: every layer holds its share of the water and of
    // the loss area, so each follows the same curve.
    let mut r = tank_plant(&format!(
        "  volume: {m}L\n  element: 3kW\n  ua: {ua}W/K\n  ambient: {ta}°C\n  initial: {t0}°C\n  layers: 6\n  draws: []"
    ));
    run(&mut r, 24 * 3600, 1.0);
    let profile = r.tank().unwrap().profile();
    assert!(profile.iter().all(|t| (t - analytic).abs() < 1e-6), "{profile:?} vs {analytic}");
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
        after_an_hour(&format!(
            "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  cold: 15°C\n  initial: {initial}°C\n  draws: [{{ at: \"00:10\", volume: 40L, temperature: 40°C }}]"
        ))
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
    let mut p = heated_tank(
        "  volume: 150L\n  element: 3kW\n  ua: 2W/K\n  initial: 40°C\n  thermostat: { setpoint: 60°C, deadband: 6°C }",
    );
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
    let mut p = heated_tank(
        "  volume: 100L\n  element: 3kW\n  ua: 0W/K\n  initial: 70°C\n  draws: []\n  thermostat: { setpoint: 99°C }\n  cutout: 85°C",
    );
    run(&mut p, 3 * 3600, 1.0);
    let r = p.readings().tank.unwrap();
    assert!(r.cutout_tripped);
    assert!(!r.heating);
    assert!((p.tank_temp_c().unwrap() - 85.0).abs() < 0.01);
    // Heating 100 L by 15 K: 100·c·15 / 3600 Wh.
    let expected_wh = 100.0 * C_WATER * 15.0 / 3600.0;
    assert!((p.flows().loads[0].wh - expected_wh).abs() < 1.0);
}

/// Outlet temperature of N well-mixed tanks in series after a step change of the inlet,
/// with θ the volume drawn over the whole volume: T0 − (T0 − T_in)·F(θ), where
/// F(θ) = 1 − exp(−Nθ)·Σ_{k<N} (Nθ)^k/k! is the tanks-in-series model's F curve
/// (Levenspiel, Chemical Reaction Engineering, 3rd ed., 1999, ch. 14, "The
/// Tanks-in-Series Model"). N = 1 is the well-mixed tank's exp(−θ).
fn tanks_in_series_outlet(n: u32, theta: f64, t0: f64, t_in: f64) -> f64 {
    let x = f64::from(n) * theta;
    let (mut term, mut sum) = (1.0, 0.0);
    for k in 0..n {
        if k > 0 {
            term *= x / f64::from(k);
        }
        sum += term;
    }
    let f = 1.0 - (-x).exp() * sum;
    t0 - (t0 - t_in) * f
}

#[test]
fn a_layered_tank_draws_down_as_tanks_in_series() {
    // 150 L at 60 °C, 10 °C inflow, nothing heating or losing: a draw asked for at 95 °C
    // takes the top layer's water undiluted at 6 L/min, so the volume drawn is known at
    // every second and the top layer is the outlet of the model above.
    for n in [1u32, 4, 10, 25] {
        let mut p = tank_plant(&format!(
            "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  cold: 10°C\n  initial: 60°C\n  layers: {n}\n  flow_l_per_min: 6\n  draws: [{{ at: \"00:10\", volume: 240L, temperature: 95°C }}]"
        ));
        run(&mut p, 600, 1.0);
        let mut worst: f64 = 0.0;
        for _ in 0..(40 * 60) {
            p.step(1.0);
            let drawn = p.hot_water_drawn_l().unwrap();
            let top = p.tank().unwrap().profile()[0];
            let model = tanks_in_series_outlet(n, drawn / 150.0, 60.0, 10.0);
            worst = worst.max((top - model).abs());
        }
        // The simulation moves the flow in explicit 0.1 L steps against layers of 6–150 L,
        // which leaves it off the continuous curve by up to 0.11 K (25 layers): within
        // 0.25 % of the 50 K between the tank and its inflow.
        assert!(worst < 0.125, "{n} layers: off the tanks-in-series curve by {worst} K");
    }
}

#[test]
fn a_layered_tank_keeps_its_heat_through_a_draw_and_through_heating() {
    // First law for a layered tank: heating from 20 to 60 °C (UA 0) takes m·c·ΔT of the
    // mean temperature, as for one node, and the top water is never colder than the
    // bottom water.
    let mut p = heated_tank(
        "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  initial: 20°C\n  layers: 8\n  draws: []\n  thermostat: { setpoint: 60°C, deadband: 5°C }\n  cutout: 90°C",
    );
    run(&mut p, 4 * 3600, 1.0);
    let tank = p.tank().unwrap();
    let heat_wh = 150.0 * C_WATER * (tank.mean_c() - 20.0) / 3600.0;
    let element_wh = p.flows().loads[0].wh;
    assert!((element_wh - heat_wh).abs() < 1e-6 * heat_wh, "{element_wh} vs {heat_wh}");
    assert!((tank.mean_c() - 60.0).abs() < 0.05, "{}", tank.mean_c());
    let profile = tank.profile();
    assert!(profile.windows(2).all(|w| w[0] >= w[1]), "{profile:?}");
}

#[test]
fn water_below_the_element_is_not_heated() {
    // An element half-way up heats the water above it (warm water rises), not the water
    // under it: only half the tank reaches the setpoint (common practice: the volume
    // below a water heater's element stays at inflow temperature).
    let mut p = heated_tank(
        "  volume: 200L\n  element: 3kW\n  ua: 0W/K\n  initial: 15°C\n  layers: 10\n  element_at: 55%\n  draws: []\n  thermostat: { setpoint: 60°C, deadband: 5°C }",
    );
    run(&mut p, 4 * 3600, 1.0);
    let profile = p.tank().unwrap().profile();
    assert!(profile[..5].iter().all(|t| (t - 60.0).abs() < 0.05), "{profile:?}");
    assert!(profile[5..].iter().all(|t| (t - 15.0).abs() < 1e-9), "{profile:?}");
    // 100 L heated by 45 K.
    let expected_wh = 100.0 * C_WATER * 45.0 / 3600.0;
    assert!((p.flows().loads[0].wh - expected_wh).abs() < 1e-3 * expected_wh);
}

#[test]
fn a_stratified_tank_gives_hot_showers_longer_than_a_mixed_one() {
    // 120 L asked for at 40 °C from a 150 L tank at 55 °C, 15 °C inflow. Mixed, the node
    // falls below 40 °C part-way through; layered, the top stays hot until the cold
    // front reaches it, so fewer litres come out lukewarm.
    let lukewarm = |layers: u32| {
        let p = after_an_hour(&format!(
            "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  cold: 15°C\n  initial: 55°C\n  layers: {layers}\n  draws: [{{ at: \"00:10\", volume: 160L, temperature: 40°C }}]"
        ));
        p.hot_water_short().unwrap().0
    };
    let (mixed, layered) = (lukewarm(1), lukewarm(10));
    assert!(mixed > 20.0, "{mixed}");
    assert!(layered < mixed / 2.0, "{layered} L lukewarm layered against {mixed} L mixed");
}

#[test]
fn bad_layer_settings_are_refused_with_the_key() {
    for (extra, key) in [
        ("layers: 0", "`layers`"),
        ("layers: 8\n  element_at: 120%", "`element_at`"),
        ("sensor_at: 80%", "set `layers`"),
    ] {
        let yaml = format!("{QUIET}tank:\n  volume: 150L\n  element: 3kW\n  {extra}\nwiring: [tank]\n");
        let cfg = plant_support::config(&yaml);
        let err = spillway_sim::plant::Plant::new(&cfg, Box::new(Constant(0.0)), plant_support::MONDAY_UTC_MS, 1)
            .err()
            .map(|e| e.to_string())
            .unwrap_or_default();
        assert!(err.contains(key), "{extra}: {err}");
    }
}

#[test]
fn a_layered_tank_reports_the_temperature_at_its_sensor() {
    // After a 60 L draw from a 150 L tank at 60 °C, cold water fills the bottom: a sensor
    // near the top still reads hot, one beside a low element reads the inflow's chill.
    let after_draw = |sensor: &str| {
        let p = after_an_hour(&format!(
            "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  cold: 15°C\n  initial: 60°C\n  layers: 10\n  {sensor}\n  draws: [{{ at: \"00:10\", volume: 60L, temperature: 95°C }}]"
        ));
        (p.tank_temp_c().unwrap(), p.readings().tank.unwrap().temp_c)
    };
    let (top, top_reading) = after_draw("sensor_at: 90%");
    let (low, low_reading) = after_draw("element_at: 5%");
    assert!(top > 59.0 && low < 30.0, "top {top}, beside the element {low}");
    assert_eq!((top, low), (top_reading, low_reading));
}

/// A tank whose element is driven by a burst-fire regulator (`heats: tank`), its own
/// relay channel left open, at `pct` %.
fn regulated_tank(tank: &str, pct: f64) -> spillway_sim::plant::Plant {
    let yaml =
        format!("{QUIET}tank:\n{tank}\nloads: [{{ name: immersion, kind: regulated, rated: 3kW, heats: tank }}]\n");
    let mut p = plant(&yaml, Constant(0.0));
    let k = p.regulator("immersion").unwrap();
    p.controls_mut().regulators[k] = pct;
    p
}

#[test]
fn a_regulated_element_heats_the_tank_by_m_c_delta_t() {
    // 150 L from 20 to 60 °C at half power (a burst-fire regulator at 50 % of 3 kW).
    let mut p = regulated_tank(
        "  volume: 150L\n  element: 3kW\n  ua: 0W/K\n  initial: 20°C\n  draws: []\n  thermostat: { setpoint: 60°C, deadband: 5°C }\n  cutout: 90°C",
        50.0,
    );
    let heater = p.load("immersion").unwrap();
    let mut seconds = 0;
    while p.readings().tank.unwrap().heating || seconds == 0 {
        p.step(1.0);
        seconds += 1;
        assert!(seconds < 40_000, "thermostat never opened");
    }
    // Source: Q = m·c·ΔT (calorimetry; c from the handbook value above): 6976.7 Wh,
    // drawn by the regulated load, none by the tank's own (relay-switched) element.
    let expected_wh = 150.0 * C_WATER * 40.0 / 3600.0;
    let heater_wh = p.flows().loads[heater].wh;
    assert!((heater_wh - expected_wh).abs() / expected_wh < 1e-3, "{heater_wh} vs {expected_wh}");
    assert_eq!(p.flows().loads[0].wh, 0.0, "the relay channel stayed open");
    // t = m·c·ΔT / P at 1.5 kW = 16 744 s.
    let expected_s = 150.0 * C_WATER * 40.0 / 1500.0;
    assert!((f64::from(seconds) - expected_s).abs() <= 2.0, "{seconds} s vs {expected_s} s");
    assert!(p.heats_tank(heater));
}

#[test]
fn the_thermostat_opens_a_regulated_elements_circuit() {
    // At the setpoint the thermostat is open: the regulator at 80 % draws nothing, and
    // draws again once the water has cooled below setpoint − deadband.
    let mut p = regulated_tank(
        "  volume: 100L\n  element: 3kW\n  ua: 5W/K\n  ambient: 20°C\n  initial: 60°C\n  draws: []\n  thermostat: { setpoint: 60°C, deadband: 2°C }\n  cutout: 90°C",
        80.0,
    );
    let heater = p.load("immersion").unwrap();
    p.step(1.0);
    assert_eq!(p.flows().loads[heater].w, 0.0, "drew with the thermostat open");
    assert!(!p.readings().tank.unwrap().heating);
    let (mut seconds, mut before) = (0, f64::NAN);
    while p.flows().loads[heater].w == 0.0 {
        before = p.tank_temp_c().unwrap();
        p.step(1.0);
        seconds += 1;
        assert!(seconds < 86_400, "never called for heat");
    }
    // It closed at the band's floor: the step that drew started at or below 58 °C.
    assert!(before <= 58.0 + 1e-9 && before > 57.9, "{before}");
    assert!((p.flows().loads[heater].w - 2400.0).abs() < 1e-9, "80 % of 3 kW");
    assert!(p.readings().tank.unwrap().heating);
    // A tripped cut-out opens it for good.
    let mut q = regulated_tank("  volume: 100L\n  element: 3kW\n  initial: 90°C\n  draws: []\n  cutout: 85°C", 100.0);
    run(&mut q, 3600 * 24, 60.0);
    assert!(q.readings().tank.unwrap().cutout_tripped);
    assert_eq!(q.flows().loads[q.load("immersion").unwrap()].wh, 0.0);
}

#[test]
fn heats_is_refused_where_it_heats_nothing() {
    let build = |yaml: &str| spillway_sim::plant::PlantConfig::from_yaml(yaml).map(|_| ()).map_err(|e| e.to_string());
    // Parsing succeeds; building says what is wrong.
    let err = |yaml: &str| {
        let cfg = spillway_sim::plant::PlantConfig::from_yaml(yaml).unwrap();
        match spillway_sim::plant::Plant::new(&cfg, Box::new(Constant(0.0)), 0, 1) {
            Ok(_) => String::new(),
            Err(e) => e.to_string(),
        }
    };
    assert!(build("loads: [{ name: h, kind: regulated, rated: 3kW, heats: tank }]").is_ok());
    assert!(err("loads: [{ name: h, kind: regulated, rated: 3kW, heats: tank }]").contains("the plant has no `tank`"));
    let e =
        err("tank: { volume: 150L, element: 3kW }\nloads: [{ name: h, kind: regulated, rated: 3kW, heats: geyser }]");
    assert!(e.contains("`heats: geyser` names no tank: the plant's tank is \"tank\""), "{e}");
    let e = err("tank: { volume: 150L, element: 3kW }\nloads: [{ name: h, kind: switched, rated: 3kW, heats: tank }]");
    assert!(e.contains("`heats` is only for kind: regulated"), "{e}");
}
