//! Static reasoning: `satisfiable`, `implies`, and the always-true/false warnings.

use crate::rules::tests::support::{codes, compiled, rule};
use crate::rules::{implies, satisfiable};

#[test]
fn satisfiable_finds_contradictions_and_proves_witnesses() {
    assert_eq!(satisfiable(&rule("surplus > 5kW and surplus < 3kW")), Some(false));
    assert_eq!(satisfiable(&rule("surplus > 3.2kW for 30s and tank_temp < 58°C")), Some(true));
    assert_eq!(satisfiable(&rule("soc > 100%")), Some(false));
    assert_eq!(satisfiable(&rule("clock in 10:00..10:00")), Some(false));
    assert_eq!(satisfiable(&rule("weekday in [sat, sun] and weekday in mon..fri")), Some(false));
    assert_eq!(satisfiable(&rule("tank.on and not tank.on")), Some(false));
    // A hold cannot be true while its condition is false.
    assert_eq!(satisfiable(&rule("(surplus > 5kW) for 30s and surplus < 3kW")), Some(false));
    // Windows are their own variables...
    assert_eq!(satisfiable(&rule("avg(surplus, 5min) > 5kW and avg(surplus, 5min) < 3kW")), Some(false));
    // ...and with steady signals equal to the signal.
    assert_eq!(satisfiable(&rule("avg(surplus, 5min) > 5kW and surplus > 6kW")), Some(true));
}

#[test]
fn satisfiable_says_none_when_it_cannot_tell() {
    // Two signals compared with each other: outside interval reasoning.
    assert_eq!(satisfiable(&rule("pv > load and surplus > 1kW")), None);
    // A ten-minute hold of a one-minute clock window can never be true, but seeing it
    // needs reasoning over time that the analysis does not do.
    assert_eq!(satisfiable(&rule("(clock in 10:00..10:01) for 10min")), None);
    // Yet a contradiction is found even next to such parts.
    assert_eq!(satisfiable(&rule("pv > load and surplus > 5kW and surplus < 1kW")), Some(false));
}

#[test]
fn implies_reasons_over_intervals() {
    let yes = [
        ("surplus > 5kW", "surplus > 3kW"),
        ("surplus > 5kW and tank.on", "surplus >= 5kW"),
        ("clock in 10:00..12:00", "clock in 09:00..16:00"),
        ("clock in 23:00..01:00", "clock >= 22:00 or clock < 02:00"),
        ("weekday in [sat, sun]", "not (weekday in mon..fri)"),
        ("(surplus > 5kW) for 1min", "surplus > 4kW"),
        ("surplus > 5kW or tank_temp > 60°C", "surplus > 4kW or tank_temp > 59°C"),
        ("soc >= 100%", "soc > 99%"),
    ];
    for (a, b) in yes {
        assert_eq!(implies(&rule(a), &rule(b)), Some(true), "{a} ⇒ {b}");
    }
    let no = [
        ("surplus > 3kW", "surplus > 5kW"),
        ("clock in 09:00..16:00", "clock in 10:00..12:00"),
        ("surplus > 4kW", "(surplus > 4kW) for 1min"),
        // True with `tank_temp` stale, when the second rule is unknown.
        ("surplus > 5kW", "surplus > 5kW and (tank_temp > 50°C or tank_temp <= 50°C)"),
    ];
    for (a, b) in no {
        assert_eq!(implies(&rule(a), &rule(b)), Some(false), "{a} ⇏ {b}");
    }
    assert_eq!(implies(&rule("pv > load"), &rule("surplus > 1kW")), None);
}

#[test]
fn contradiction_in_a_conjunction_is_warned_with_both_parts() {
    let c = compiled("surplus > 5kW and tank.on and surplus < 3kW");
    assert_eq!(codes(&c.warnings), ["R0403"]);
    let w = &c.warnings[0];
    assert_eq!(w.message, "`surplus > 5 kW` and `surplus < 3 kW` can never both be true");
    assert_eq!(w.span, 30..43);
    assert_eq!(w.secondary[0].0, 0..13);
}

#[test]
fn percentages_outside_0_to_100_are_warned() {
    assert_eq!(codes(&compiled("soc > 120%").warnings), ["R0402"]);
    assert_eq!(codes(&compiled("soc <= 100%").warnings), ["R0402"]);
    assert_eq!(codes(&compiled("soc < 0%").warnings), ["R0402"]);
    assert!(compiled("soc < 100%").warnings.is_empty());
    // Found inside a larger rule too, as a dead branch.
    assert_eq!(codes(&compiled("tank.on or soc > 101%").warnings), ["R0402"]);
}

#[test]
fn constant_comparisons_and_empty_windows_are_warned() {
    assert_eq!(codes(&compiled("3kW > 2kW or tank.on").warnings), ["R0401"]);
    assert_eq!(codes(&compiled("clock in 10:00..10:00").warnings), ["R0406"]);
    assert_eq!(codes(&compiled("clock in 00:00..24:00").warnings), ["R0406"]);
    assert_eq!(codes(&compiled("weekday in [mon, tue, wed, thu, fri, sat, sun]").warnings), ["R0406"]);
    assert_eq!(codes(&compiled("clock >= 24:00").warnings), ["R0402"]);
}

#[test]
fn a_hold_longer_than_the_clock_lets_its_condition_last_is_warned() {
    let never = |text: &str| assert_eq!(codes(&compiled(text).warnings), ["R0407"], "{text}");
    let fine = |text: &str| assert!(compiled(text).warnings.is_empty(), "{text}: {:?}", compiled(text).warnings);
    // A time of day lasts one second of the clock.
    never("clock == 10:00 for 1min");
    never("clock == 10:00 for 1s");
    never("clock == 10:00 for 1min and tank.on");
    never("(clock == 10:00 and surplus > 1kW) for 1min");
    never("tank.on or clock == 10:00 for 10s");
    // A range lasts its length: a hold must be shorter.
    never("clock in 10:00..10:05 for 5min");
    fine("clock in 10:00..10:05 for 4min");
    fine("(clock in 10:00..10:05 or clock in 10:05..10:10) for 8min");
    never("(clock in 10:00..10:05 or clock in 10:06..10:10) for 6min");
    // Another signal that can be true all day lifts the bound.
    fine("(clock == 10:00 or surplus > 1kW) for 1min");
    // Around midnight the day wraps, and a summer-time change may repeat an hour there.
    fine("clock in 23:50..00:10 for 15min");
    fine("clock in 01:00..01:30 for 45min");
    never("clock in 01:00..01:30 for 2h");
    never("clock >= 23:00 for 2h");
    // A condition that is never true at all gets the warning for that, not this one.
    assert_eq!(codes(&compiled("clock in 10:00..10:00 for 1min").warnings), ["R0406"]);
    let w = &compiled("clock == 10:00 for 1min").warnings[0];
    assert_eq!(w.message, "`clock == 10:00` is true for at most 1 s at a time, so holding it for 1 min never fires");
}

#[test]
fn tautologies_in_a_disjunction_are_warned() {
    let c = compiled("surplus > 3kW or surplus <= 3kW");
    assert_eq!(codes(&c.warnings), ["R0405"]);
}

#[test]
fn ordinary_rules_have_no_warnings() {
    for text in [
        "surplus > 3.2kW for 30s and tank_temp < 58°C",
        "import > 250W for 20s or tank_temp >= 62°C",
        "clock in 10:00..16:00 and weekday in mon..fri and soc > 80%",
        "avg(surplus, 5min) > 1.5kW or (pv > load) for 1min",
        "not tank.on and tank.runtime_today < 2h and clock >= 14:00",
    ] {
        let c = compiled(text);
        assert!(c.warnings.is_empty(), "{text}: {:?}", c.warnings);
    }
}
