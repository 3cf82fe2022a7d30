//! EV charger: plug-in sessions, minimum current, step rounding, stop at target.

mod plant_support;

use plant_support::{Constant, plant, run};

const QUIET: &str = "house: { standby: 0W, activity: 0W, fridge: null, appliances: [] }\n";

fn ev_plant(extra: &str) -> spillway_sim::plant::Plant {
    // Plugged from 00:00:10 to 23:00 UTC every day.
    let yaml = format!(
        "{QUIET}ev:\n  capacity: 40kWh\n  min_current: 6A\n  max_current: 16A\n  step: 1A\n  phases: 1\n  voltage: 230V\n  efficiency: 90%\n  sessions: [{{ arrive: \"00:00:10\", depart: \"23:00\", soc: 50% }}]\n{extra}"
    );
    plant(&yaml, Constant(0.0))
}

#[test]
fn below_the_minimum_current_the_car_does_not_charge() {
    // IEC 61851-1 control pilot: 6 A is the lowest current a charger may offer (from
    // memory); that cars do not charge below it is `common practice`.
    let mut p = ev_plant("");
    run(&mut p, 20, 1.0);
    assert!(p.readings().ev.unwrap().plugged);
    for (cmd, expect_a) in [(0.0, 0.0), (5.9, 0.0), (6.0, 6.0), (9.7, 9.0), (16.0, 16.0), (32.0, 16.0)] {
        p.controls_mut().ev_current_a = cmd;
        p.step(1.0);
        let r = p.readings().ev.unwrap();
        assert!((r.current_a - expect_a).abs() < 1e-9, "cmd {cmd}: {}", r.current_a);
        assert!((r.power_w - expect_a * 230.0).abs() < 1e-6);
    }
}

#[test]
fn a_car_that_is_not_plugged_in_draws_nothing() {
    let mut p = ev_plant("");
    p.controls_mut().ev_current_a = 16.0;
    p.step(1.0); // 00:00:00, before arrival
    assert!(!p.readings().ev.unwrap().plugged);
    assert_eq!(p.readings().ev.unwrap().power_w, 0.0);
    run(&mut p, 23 * 3600, 1.0);
    assert!(!p.readings().ev.unwrap().plugged, "departed at 23:00");
    assert_eq!(p.readings().ev.unwrap().power_w, 0.0);
}

#[test]
fn charging_stops_at_the_target_and_the_energy_adds_up() {
    let mut p = ev_plant("");
    p.controls_mut().ev_current_a = 16.0;
    run(&mut p, 12 * 3600, 1.0);
    let r = p.readings().ev.unwrap();
    assert!((r.soc_pct - 100.0).abs() < 1e-6, "{}", r.soc_pct);
    assert_eq!(r.power_w, 0.0);
    // 20 kWh into the car at 90 % takes 22.22 kWh from the site.
    let ev_wh = p.flows().loads[0].wh;
    assert!((ev_wh - 20_000.0 / 0.9).abs() < 0.01, "{ev_wh}");
}

#[test]
fn three_phases_triple_the_power() {
    let yaml = format!(
        "{QUIET}ev:\n  capacity: 60kWh\n  phases: 3\n  sessions: [{{ arrive: \"00:00\", depart: \"23:00\", soc: 20% }}]\n"
    );
    let mut p = plant(&yaml, Constant(0.0));
    p.controls_mut().ev_current_a = 10.0;
    run(&mut p, 10, 1.0);
    assert!((p.readings().ev.unwrap().power_w - 10.0 * 230.0 * 3.0).abs() < 1e-6);
}

#[test]
fn a_car_that_leaves_below_its_target_is_counted_short() {
    // Target 100 % (the default) of 40 kWh, arriving at 50 %: 20 kWh short if never
    // charged; 6 A at 230 V for 2 h puts 2.76 kW·2 h·0.9 = 2.484 kWh into the car.
    let mut p = ev_plant("");
    assert_eq!(p.ev_departures(), Some((0, 0.0)));
    run(&mut p, 23 * 3600 + 1, 1.0);
    let (left, short_wh) = p.ev_departures().unwrap();
    assert_eq!(left, 1);
    assert!((short_wh - 20_000.0).abs() < 1e-6, "{short_wh}");

    let mut p = ev_plant("");
    run(&mut p, 20, 1.0);
    p.controls_mut().ev_current_a = 6.0;
    run(&mut p, 2 * 3600, 1.0);
    p.controls_mut().ev_current_a = 0.0;
    run(&mut p, 21 * 3600, 1.0);
    let (left, short_wh) = p.ev_departures().unwrap();
    assert_eq!(left, 1);
    let expect = 20_000.0 - 6.0 * 230.0 * 2.0 * 0.9;
    assert!((short_wh - expect).abs() < 1.0, "{short_wh} against {expect}");

    // A car charged to its target leaves nothing short.
    let mut p = ev_plant("");
    p.controls_mut().ev_current_a = 16.0;
    run(&mut p, 23 * 3600 + 1, 1.0);
    assert_eq!(p.ev_departures(), Some((1, 0.0)));
}

#[test]
fn with_carry_over_a_car_that_left_short_comes_back_that_much_emptier() {
    let yaml = format!(
        "{QUIET}ev:\n  capacity: 40kWh\n  efficiency: 90%\n  carry_shortfall: true\n  sessions: [{{ arrive: \"00:00:10\", depart: \"23:00\", soc: 50% }}]\n"
    );
    let mut p = plant(&yaml, Constant(0.0));
    // Day 1: 2 h at 6 A put 2.484 kWh into the car, which leaves 17.516 kWh short of 40.
    run(&mut p, 20, 1.0);
    p.controls_mut().ev_current_a = 6.0;
    run(&mut p, 2 * 3600, 1.0);
    p.controls_mut().ev_current_a = 0.0;
    run(&mut p, 23 * 3600, 1.0);
    let short_1 = 20_000.0 - 6.0 * 230.0 * 2.0 * 0.9;
    let (left, short_wh) = p.ev_departures().unwrap();
    assert_eq!(left, 1);
    assert!((short_wh - short_1).abs() < 1.0, "{short_wh}");
    // Day 2: it arrives at 50 % of 40 kWh less what it lacked, 2.484 kWh (6.21 %).
    run(&mut p, 3600, 1.0);
    let r = p.readings().ev.unwrap();
    assert!(r.plugged);
    let expect_pct = 100.0 * (20_000.0 - short_1) / 40_000.0;
    assert!((r.soc_pct - expect_pct).abs() < 0.01, "{} against {expect_pct}", r.soc_pct);
    // Without carry-over it would have come back at 50 %.
    let mut p = plant(&yaml.replace("  carry_shortfall: true\n", ""), Constant(0.0));
    run(&mut p, 25 * 3600, 1.0);
    assert!((p.readings().ev.unwrap().soc_pct - 50.0).abs() < 1e-9);
}
