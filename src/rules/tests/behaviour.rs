//! One test per semantic of the language, named after the behaviour.

use crate::rules::Truth::{False, True, Unknown};
use crate::rules::tests::support::{Run, Site, codes, compiled, errors, rule};
use crate::rules::{Slot, Type, compile_as};
use crate::units::Dimension;

const NAN: f64 = f64::NAN;

#[test]
fn numbers_with_units_compare_in_base_units() {
    for text in ["surplus > 3.2kW", "surplus > 3.2 kW", "surplus > 3200W", "surplus > 0.0032 MW"] {
        let mut r = Run::new(text);
        assert_eq!(r.set("surplus", 3199.0).at(0.0), False, "{text}");
        assert_eq!(r.set("surplus", 3201.0).at(1.0), True, "{text}");
        assert_eq!(r.rule.describe(), "surplus > 3.2 kW", "{text}");
    }
    let mut r = Run::new(
        "tank_temp < 58°C and tank_temp >= 40degC and soc >= 80% and battery.voltage > 51.2V and ev.current <= 16A",
    );
    r.set("tank_temp", 55.0).set("soc", 85.0).set("battery.voltage", 52.0).set("ev.current", 16.0);
    assert_eq!(r.at(0.0), True);
    assert_eq!(
        r.rule.describe(),
        "tank_temp < 58 °C and tank_temp >= 40 °C and soc >= 80 % and battery.voltage > 51.2 V and ev.current <= 16 A"
    );
}

#[test]
fn durations_and_energies_read_in_any_unit() {
    let mut r = Run::new(
        "tank.runtime_today < 1.5h and tank.energy_today < 12kWh and tank.runtime_today > 30 s and tank.runtime_today > 5 min",
    );
    r.set("tank.runtime_today", 3600.0).set("tank.energy_today", 11_999.0);
    assert_eq!(r.at(0.0), True);
    r.set("tank.runtime_today", 5400.0);
    assert_eq!(r.at(1.0), False);
}

#[test]
fn bare_zero_compares_with_any_dimension() {
    let mut r = Run::new("grid < 0 and 0 <= tank_temp");
    assert_eq!(r.set("grid", -10.0).set("tank_temp", 20.0).at(0.0), True);
    assert_eq!(r.set("grid", 10.0).at(1.0), False);
}

#[test]
fn bare_number_against_a_dimensioned_value_is_an_error_with_unit_help() {
    let d = errors("surplus > 3000");
    assert_eq!(codes(&d), ["R0303"]);
    assert_eq!(d[0].span, 10..14);
    assert!(d[0].notes.iter().any(|n| n == "write 3000W or 3kW"), "{d:?}");
    let d = errors("soc > 0.8");
    assert!(d[0].notes[0].contains("write 80%"), "{d:?}");
}

#[test]
fn negative_literals_and_unary_minus() {
    let mut r = Run::new("grid < -250W and -grid > 200 W");
    assert_eq!(r.set("grid", -300.0).at(0.0), True);
    assert_eq!(r.set("grid", -240.0).at(1.0), False);
    assert_eq!(r.rule.describe(), "grid < -250 W and -grid > 200 W");
}

#[test]
fn arithmetic_keeps_or_cancels_dimensions() {
    let mut r =
        Run::new("pv - load > 2kW and surplus / 2 > 1kW and 2 * surplus < 10kW and tank.energy_today / 2kWh >= 1.5");
    r.set("pv", 5000.0).set("load", 2500.0).set("surplus", 2500.0).set("tank.energy_today", 3000.0);
    assert_eq!(r.at(0.0), True);
    r.set("load", 3500.0);
    assert_eq!(r.at(1.0), False);
    assert_eq!(codes(&errors("surplus * surplus > 1kW")), ["R0306"]);
    assert_eq!(codes(&errors("surplus + tank_temp > 1kW")), ["R0301"]);
    assert_eq!(codes(&errors("surplus + 100 > 1kW")), ["R0303"]);
    assert_eq!(codes(&errors("2 / surplus > 1")), ["R0306"]);
}

#[test]
fn comparisons_need_equal_dimensions_and_name_both_sides() {
    let d = errors("surplus > 58°C");
    assert_eq!(codes(&d), ["R0301"]);
    assert_eq!(d[0].message, "cannot compare a power with a temperature");
    assert_eq!(d[0].label, "this is a temperature");
    assert_eq!(d[0].secondary, vec![(0..7, "`surplus` is a power".to_owned())]);
}

#[test]
fn held_for_becomes_true_once_the_condition_held_the_whole_duration() {
    let mut r = Run::new("surplus > 3kW for 30s");
    r.set("surplus", 3500.0);
    for t in 0..30 {
        assert_eq!(r.at(f64::from(t)), False, "t = {t}");
    }
    assert_eq!(r.at(30.0), True);
    assert_eq!(r.at(31.0), True);
}

#[test]
fn held_for_resets_when_condition_drops() {
    let mut r = Run::new("surplus > 3kW for 30s");
    r.set("surplus", 3500.0);
    r.at(0.0);
    r.at(20.0);
    r.set("surplus", 2000.0);
    assert_eq!(r.at(21.0), False);
    r.set("surplus", 3500.0);
    assert_eq!(r.at(22.0), False);
    assert_eq!(r.at(51.0), False, "only 29 s since the dip");
    assert_eq!(r.at(52.0), True);
}

#[test]
fn held_for_is_unknown_while_its_input_is_unknown_and_then_starts_over() {
    let mut r = Run::new("surplus > 3kW for 10s");
    r.set("surplus", 3500.0);
    r.at(0.0);
    r.at(9.0);
    r.set("surplus", NAN);
    assert_eq!(r.at(10.0), Unknown);
    r.set("surplus", 3500.0);
    assert_eq!(r.at(11.0), False);
    assert_eq!(r.at(21.0), True);
}

#[test]
fn held_for_zero_is_true_at_once_and_warned_about() {
    let c = compiled("tank.on for 0s");
    assert_eq!(codes(&c.warnings), ["R0404"]);
    let mut r = Run::from_rule(c.rule);
    assert_eq!(r.set("tank.on", 1.0).at(0.0), True);
}

#[test]
fn unknown_propagates_with_kleene_logic() {
    // (a, b, a and b, a or b, not a) with a = tank.on, b = pool.on; NaN = unknown.
    let table = [
        (1.0, 1.0, True, True, False),
        (1.0, 0.0, False, True, False),
        (0.0, 0.0, False, False, True),
        (0.0, NAN, False, Unknown, True),
        (NAN, 0.0, False, Unknown, Unknown),
        (1.0, NAN, Unknown, True, False),
        (NAN, 1.0, Unknown, True, Unknown),
        (NAN, NAN, Unknown, Unknown, Unknown),
    ];
    for (a, b, and, or, not) in table {
        let case = |text: &str| {
            let mut r = Run::new(text);
            r.set("tank.on", a).set("pool.on", b);
            r.at(0.0)
        };
        assert_eq!(case("tank.on and pool.on"), and, "{a} and {b}");
        assert_eq!(case("tank.on or pool.on"), or, "{a} or {b}");
        assert_eq!(case("not tank.on"), not, "not {a}");
    }
    // A comparison with an unknown operand is unknown; arithmetic carries it.
    let mut r = Run::new("pv - load > 1kW");
    assert_eq!(r.set("pv", 5000.0).at(0.0), Unknown);
}

#[test]
fn any_nonzero_boolean_signal_is_true() {
    let mut r = Run::new("tank.on");
    assert_eq!(r.set("tank.on", 2.0).at(0.0), True);
    assert_eq!(r.set("tank.on", 0.0).at(1.0), False);
}

#[test]
fn precedence_from_loosest_to_tightest() {
    let cases = [
        ("a_or_and", "tank.on or pool.on and grid < 0", "tank.on or (pool.on and grid < 0)"),
        ("not_and", "not tank.on and pool.on", "not tank.on and pool.on"),
        ("not_cmp", "not surplus > 3kW", "not (surplus > 3 kW)"),
        ("not_for", "not surplus > 3kW for 30s", "not ((surplus > 3 kW) for 30 s)"),
        (
            "for_and",
            "surplus > 3.2kW for 30s and tank_temp < 58°C",
            "(surplus > 3.2 kW) for 30 s and tank_temp < 58 °C",
        ),
        ("arith", "pv - load * 2 > 1kW", "pv - load * 2 > 1 kW"),
        ("parens", "(pv - load) * 2 > 1kW", "(pv - load) * 2 > 1 kW"),
        ("left_assoc", "pv - load - grid > 0", "pv - load - grid > 0"),
        ("right_group", "pv - (load - grid) > 0", "pv - (load - grid) > 0"),
        (
            "chains_flatten",
            "(tank.on and pool.on) and (grid < 0 and soc > 50%)",
            "tank.on and pool.on and grid < 0 and soc > 50 %",
        ),
        ("held_bool", "tank.on for 5min", "tank.on for 5 min"),
    ];
    for (name, text, canonical) in cases {
        assert_eq!(rule(text).describe(), canonical, "{name}");
    }
}

#[test]
fn clock_window_is_half_open() {
    let mut r = Run::new("clock in 10:00..16:00");
    assert_eq!(r.at(10.0 * 3600.0 - 1.0), False);
    assert_eq!(r.at(10.0 * 3600.0), True);
    assert_eq!(r.at(16.0 * 3600.0 - 1.0), True);
    assert_eq!(r.at(16.0 * 3600.0), False);
}

#[test]
fn clock_window_wraps_over_midnight() {
    let mut r = Run::new("clock in 22:00..06:00");
    for (hour, expected) in [(21, False), (22, True), (23, True), (24, True), (29, True), (30, False), (31, False)] {
        assert_eq!(r.at(f64::from(hour) * 3600.0), expected, "hour {hour}");
    }
    let mut r = Run::new("clock >= 16:00 or clock < 07:30");
    assert_eq!(r.at(7.0 * 3600.0), True);
    assert_eq!(r.at(8.0 * 3600.0), False);
}

#[test]
fn weekday_ranges_are_inclusive_and_wrap_over_the_weekend() {
    let days = |text: &str| -> Vec<bool> {
        let mut r = Run::new(text);
        (0..7).map(|d| r.at(f64::from(d) * 86_400.0 + 43_200.0).is_true()).collect()
    };
    assert_eq!(days("weekday in mon..fri"), [true, true, true, true, true, false, false]);
    assert_eq!(days("weekday in fri..mon"), [true, false, false, false, true, true, true]);
    assert_eq!(days("weekday in [sat, sun]"), [false, false, false, false, false, true, true]);
    assert_eq!(days("weekday == wed"), [false, false, true, false, false, false, false]);
    assert_eq!(days("weekday != wed"), [true, true, false, true, true, true, true]);
}

#[test]
fn a_time_of_day_signal_can_bound_a_window() {
    let mut r = Run::new("clock in 10:00..sunset");
    r.set("sunset", 18.0 * 3600.0);
    assert_eq!(r.at(17.0 * 3600.0), True);
    assert_eq!(r.at(19.0 * 3600.0), False);
    r.set("sunset", NAN);
    assert_eq!(r.at(20.0 * 3600.0), Unknown);
}

#[test]
fn avg_is_time_weighted_and_unknown_until_window_full() {
    let mut r = Run::from_rule(compile_as("avg(surplus, 10s)", &Site, Type::Number(Dimension::Power)).unwrap().rule);
    // Irregular ticks: 1 kW from 0 s to 8 s, then 3 kW.
    r.set("surplus", 1000.0);
    for t in [0.0, 2.0, 4.0, 7.0] {
        assert!(r.value_at(t).is_nan(), "window not yet covered at {t} s");
    }
    r.set("surplus", 3000.0);
    assert!(r.value_at(8.0).is_nan());
    // Covered from 10 s: (8 s × 1 kW + 2 s × 3 kW) / 10 s = 1.4 kW, whatever the tick
    // spacing was.
    let v = r.value_at(10.0);
    assert!((v - 1400.0).abs() < 1e-9, "{v}");
    let v = r.value_at(13.0); // window 3..13: 5 s × 1 kW + 5 s × 3 kW
    assert!((v - 2000.0).abs() < 1e-9, "{v}");
    let v = r.value_at(40.0);
    assert!((v - 3000.0).abs() < 1e-9, "{v}");
}

#[test]
fn windows_skip_unknown_samples() {
    let mut r = Run::from_rule(compile_as("avg(surplus, 10s)", &Site, Type::Number(Dimension::Power)).unwrap().rule);
    r.set("surplus", 1000.0);
    r.value_at(0.0);
    r.set("surplus", NAN);
    r.value_at(4.0);
    r.set("surplus", 2000.0);
    r.value_at(6.0);
    // Known: 4 s at 1 kW and 4 s at 2 kW; the 2 s without data are left out.
    let v = r.value_at(10.0);
    assert!((v - 1500.0).abs() < 1e-9, "{v}");
    // Each sample holds until the next tick: 2 kW from 6 s, unknown from 11 s.
    r.set("surplus", NAN);
    r.value_at(11.0);
    let v = r.value_at(21.0);
    assert!(v.is_nan(), "nothing known in the last 10 s: {v}");
}

#[test]
fn min_and_max_cover_the_window_including_the_current_value() {
    let mut r = Run::new("min(surplus, 1min) > 2kW and max(grid, 1min) < 0");
    r.set("surplus", 2500.0).set("grid", -500.0);
    for t in 0..60 {
        assert_eq!(r.at(f64::from(t)), Unknown, "window filling at {t}");
    }
    assert_eq!(r.at(60.0), True);
    r.set("surplus", 1900.0);
    assert_eq!(r.at(61.0), False, "a dip counts at once");
    r.set("surplus", 2500.0);
    assert_eq!(r.at(62.0), False);
    assert_eq!(r.at(121.0), False, "the dip held from 61 s to 62 s");
    assert_eq!(r.at(122.5), True);
    r.set("grid", 10.0);
    assert_eq!(r.at(123.0), False);
}

#[test]
fn windows_nest_and_the_horizon_adds_them_up() {
    let r = rule("avg(max(surplus, 1min), 5min) > 3kW for 30s or tank_temp > 60°C for 2h");
    assert_eq!(r.horizon(), std::time::Duration::from_secs(2 * 3600));
    let r = rule("(avg(max(surplus, 1min), 5min) > 3kW) for 30s");
    assert_eq!(r.horizon(), std::time::Duration::from_secs(60 + 300 + 30));
    assert_eq!(rule("surplus > 0").horizon(), std::time::Duration::ZERO);
}

#[test]
fn slots_lists_every_signal_once() {
    let r = rule("surplus > 3kW and avg(surplus, 5min) > 2kW and tank.on and clock in 10:00..16:00");
    assert_eq!(r.slots(), [Slot(0), Slot(7)]);
}

#[test]
fn describe_normalises_units_and_reads_back_the_same() {
    let cases = [
        ("surplus>3.2kW for 30s and tank_temp<58°C", "(surplus > 3.2 kW) for 30 s and tank_temp < 58 °C"),
        ("import > 250W for 20s or tank_temp >= 62degC", "(import > 250 W) for 20 s or tank_temp >= 62 °C"),
        ("avg(surplus,300s) > 1500 W", "avg(surplus, 5 min) > 1.5 kW"),
        ("tank.runtime_today < 90min", "tank.runtime_today < 90 min"),
        ("tank.runtime_today < 1.5h", "tank.runtime_today < 90 min"),
        ("weekday in [sun,sat] and clock in 9:30..24:00", "weekday in [sat, sun] and clock in 09:30..24:00"),
        ("(surplus > 1kW) for 250ms", "(surplus > 1 kW) for 250 ms"),
        ("tank.energy_today < 2500Wh", "tank.energy_today < 2.5 kWh"),
        ("cycles < 3 and true", "cycles < 3 and true"),
        ("-(pv - load) < 0", "-(pv - load) < 0"),
    ];
    for (text, canonical) in cases {
        let d = rule(text).describe();
        assert_eq!(d, canonical, "{text}");
        assert_eq!(rule(&d).describe(), d, "{text} reads back");
    }
}

#[test]
fn explain_says_why_with_current_values() {
    let mut r = Run::new("surplus > 3.2kW for 30s and tank_temp < 58°C");
    r.set("surplus", 2100.0).set("tank_temp", 50.0);
    r.at(0.0);
    assert_eq!(r.explain(), "surplus 2.1 kW is not > 3.2 kW");
    r.set("surplus", 3500.0);
    r.at(1.0);
    r.at(13.0);
    assert_eq!(r.explain(), "surplus > 3.2 kW held 12 s of 30 s");
    // To the whole second: once "held 30.999 s of 1 min".
    r.at(26.999);
    assert_eq!(r.explain(), "surplus > 3.2 kW held 26 s of 30 s");
    r.at(40.0);
    assert_eq!(r.explain(), "surplus > 3.2 kW held 39 s of 30 s and tank_temp 50 °C < 58 °C");
    r.set("tank_temp", NAN);
    r.at(41.0);
    assert_eq!(r.explain(), "tank_temp is unknown");
}

#[test]
fn explain_covers_windows_clocks_and_weekdays() {
    let mut r = Run::new("avg(surplus, 5min) > 2kW or clock in 10:00..16:00 or weekday in [sat, sun]");
    r.set("surplus", 2500.0);
    r.at(9.0 * 3600.0);
    // Unknown `or`: the unknown operand is what keeps it from being false.
    assert_eq!(r.explain(), "avg(surplus, 5 min) is unknown: 0 s of 5 min of history so far");
    r.at(9.0 * 3600.0 + 300.0);
    assert_eq!(r.explain(), "avg(surplus, 5 min) = 2.5 kW > 2 kW");
    // A new value starts its step now: the window still averages the old one.
    r.set("surplus", 1000.0);
    r.at(12.0 * 3600.0);
    assert_eq!(r.explain(), "avg(surplus, 5 min) = 2.5 kW > 2 kW or clock 12:00 is in 10:00..16:00");
    r.at(5.0 * 86_400.0 + 20.0 * 3600.0);
    assert_eq!(r.explain(), "weekday sat is in [sat, sun]");
    r.at(6.0 * 86_400.0 + 3.0 * 3600.0);
    // A true `or` names the operand that makes it true.
    assert_eq!(r.explain(), "weekday sun is in [sat, sun]");
}

#[test]
fn explain_before_any_tick() {
    let r = Run::new("tank.on");
    assert_eq!(r.explain(), "not evaluated yet");
}

#[test]
fn compile_as_checks_numeric_expressions_with_the_same_rules() {
    let c = compile_as("pv - load", &Site, Type::Number(Dimension::Power)).unwrap();
    let mut r = Run::from_rule(c.rule);
    r.set("pv", 4000.0).set("load", 1500.0);
    assert_eq!(r.value_at(0.0), 2500.0);
    let Err(d) = compile_as("tank_temp + 1°C", &Site, Type::Number(Dimension::Power)) else {
        panic!("a temperature is not a power");
    };
    assert_eq!(codes(&d), ["R0308"]);
    let Err(d) = compile_as("3000", &Site, Type::Number(Dimension::Power)) else {
        panic!("a bare number is not a power");
    };
    assert_eq!(codes(&d), ["R0303"]);
    let d = errors("pv - load");
    assert_eq!(codes(&d), ["R0308"]);
    assert!(d[0].notes[0].contains("pv - load > 3kW"), "{d:?}");
}

#[test]
fn time_going_backwards_restarts_timers_and_windows() {
    let mut r = Run::new("surplus > 3kW for 10s");
    r.set("surplus", 3500.0);
    r.at(100.0);
    assert_eq!(r.at(110.0), True);
    assert_eq!(r.at(50.0), False, "the clock was set back: start over");
    assert_eq!(r.at(60.0), True);
}

#[test]
fn a_second_evaluation_at_the_same_instant_changes_nothing() {
    let mut r = Run::new("surplus > 3kW for 10s");
    r.set("surplus", 3500.0);
    r.at(0.0);
    assert_eq!(r.at(10.0), True);
    assert_eq!(r.at(10.0), True);
}

#[test]
fn a_state_from_another_rule_is_replaced_not_misread() {
    let a = rule("avg(surplus, 1min) > 1kW for 5s");
    let b = rule("tank.on");
    let mut state = b.new_state();
    let values = vec![1000.0; 16];
    let input = crate::rules::EvalInput {
        values: &values,
        now: crate::units::Timestamp::from_millis(0),
        local: crate::rules::LocalClock { seconds_of_day: 0, weekday: chrono::Weekday::Mon },
    };
    assert_eq!(a.eval(&input, &mut state), Unknown);
    // A values table shorter than the scope reads as unknown signals.
    assert_eq!(b.eval(&crate::rules::EvalInput { values: &[], ..input }, &mut state), Unknown);
}

#[test]
fn steady_state_evaluation_keeps_its_buffers() {
    let mut r = Run::new("(surplus > 3kW) for 30s and avg(tank_temp, 5min) < 58°C and max(grid, 1min) < 0");
    r.set("surplus", 3500.0).set("grid", -100.0);
    let mut t = 0.0;
    let tick = |r: &mut Run, t: &mut f64| {
        r.set("tank_temp", 50.0 + (*t % 7.0));
        r.set("grid", -100.0 - (*t % 5.0));
        r.at(*t);
        *t += 1.0;
    };
    for _ in 0..400 {
        tick(&mut r, &mut t);
    }
    let capacities = r.state.capacities();
    for _ in 0..5000 {
        tick(&mut r, &mut t);
    }
    assert_eq!(r.state.capacities(), capacities, "no buffer grew after warm-up");
}

#[test]
fn rules_are_bounded_in_length_and_nesting() {
    let deep = format!("{}tank.on{}", "(".repeat(40), ")".repeat(40));
    assert_eq!(codes(&errors(&deep)), ["R0113"]);
    let long = vec!["tank.on"; 200].join(" and ");
    assert_eq!(codes(&errors(&long)), ["R0114"]);
    let fine = vec!["tank.on"; 100].join(" and ");
    assert_eq!(rule(&fine).describe(), fine);
}

#[test]
fn bounded_signals_are_kept_inside_their_domain() {
    // A percentage glitching past 100 % reads as 100 %, so `soc > 100%` stays false
    // as the analysis promises.
    let mut r = Run::new("soc >= 100% and not (soc > 100%)");
    assert_eq!(r.set("soc", 104.0).at(0.0), True);
    // A time of day outside the day is no time at all.
    let mut r = Run::new("sunset >= 00:00");
    assert_eq!(r.set("sunset", -60.0).at(0.0), Unknown);
    assert_eq!(r.set("sunset", 90_000.0).at(1.0), Unknown);
    assert_eq!(r.set("sunset", 3600.0).at(2.0), True);
    // A clock reading past the end of the day stays in its last second.
    let mut r = Run::new("clock < 24:00");
    r.at(0.0);
    r.clock.seconds_of_day = 86_400;
    let input = crate::rules::EvalInput {
        values: &r.values,
        now: crate::units::Timestamp::from_millis(r.now_ms + 1000),
        local: r.clock,
    };
    assert_eq!(r.rule.eval(&input, &mut r.state), True);
}

#[test]
fn the_documented_examples_compile_without_warnings() {
    let doc = include_str!("../../../docs/rules.md");
    let examples = doc
        .split("## Examples")
        .nth(1)
        .and_then(|rest| rest.split("```text").nth(1))
        .and_then(|block| block.split("```").next())
        .unwrap_or_default();
    let rules: Vec<&str> = examples.lines().map(str::trim).filter(|l| !l.is_empty() && !l.starts_with('#')).collect();
    assert!(rules.len() >= 10, "found {} examples", rules.len());
    for text in rules {
        let c = compiled(text);
        assert!(c.warnings.is_empty(), "{text}: {:?}", c.warnings);
    }
}

#[test]
fn one_mistake_gives_one_error() {
    assert_eq!(codes(&errors("Avg(surplus, 5min) > 1kW")), ["R0110"]);
    assert_eq!(codes(&errors("surplus > 3kw and tank.on")), ["R0102"]);
    assert_eq!(codes(&errors("tank_tmp > 58°C and tank_tmp < 70°C")), ["R0201", "R0201"]);
    assert_eq!(codes(&errors("(surplus > 3kw) for 30s")), ["R0102"]);
    assert_eq!(codes(&errors("not surplus")), ["R0302"]);
}
