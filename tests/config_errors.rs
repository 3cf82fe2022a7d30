//! Broken site files give located diagnostics: file, line and column, the offending
//! text under a caret, what was expected. Pinned by golden files next to each fixture;
//! re-bless with `UPDATE_EXPECT=1 cargo test --test config_errors`.

use std::path::Path;

fn check(name: &str) {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/test_data/broken");
    let yaml = dir.join(format!("{name}.yaml"));
    let text = std::fs::read_to_string(&yaml).unwrap();
    let shown = format!("tests/test_data/broken/{name}.yaml");
    let rendered = match spillway::config::load_str(&shown, &text) {
        Ok(loaded) => format!(
            "loaded with {} warning(s)\n{}",
            loaded.warnings.len(),
            spillway::diag::render(&shown, &text, &loaded.warnings, false)
        ),
        Err(e) => e.render(false),
    };
    let golden = dir.join(format!("{name}.expected"));
    if std::env::var_os("UPDATE_EXPECT").is_some() {
        std::fs::write(&golden, &rendered).unwrap();
        return;
    }
    let expected = std::fs::read_to_string(&golden).unwrap_or_default();
    assert_eq!(
        rendered, expected,
        "diagnostics for {name} changed; re-bless with UPDATE_EXPECT=1 if intended\n{rendered}"
    );
}

#[test]
fn yaml_syntax_errors_are_located() {
    check("yaml-syntax");
}

#[test]
fn unknown_keys_are_reported_with_a_suggestion() {
    check("unknown-key");
}

#[test]
fn wrong_and_missing_units_are_reported() {
    check("wrong-units");
}

#[test]
fn duplicate_load_names_are_reported_with_both_places() {
    check("duplicate-loads");
}

#[test]
fn impossible_settings_are_reported() {
    check("impossible-settings");
}

/// Devices on one serial port share its line: one baud rate, parity and stop bits
/// (C0288), and a unit id each (C0289); another port is another line.
#[test]
fn devices_sharing_a_serial_port_must_agree_and_have_their_own_units() {
    check("shared-serial-port");
}

#[test]
fn limiting_export_without_a_grid_meter_is_an_error() {
    check("no-grid-meter");
}

#[test]
fn unknown_devices_points_and_time_zones_get_suggestions() {
    check("bad-references");
}

#[test]
fn unknown_signals_and_unit_mismatches_in_rules_are_located_in_the_file() {
    check("unknown-signal");
}

#[test]
fn a_stop_rule_that_holds_whenever_the_start_rule_does_is_an_error() {
    check("chattering-rules");
}

/// A key that belongs to another kind of source used to be ignored without a word (an
/// ignored `scale: -1` on an MQTT grid meter would reverse the sign the export guard
/// relies on); a zero scale made every reading 0.
#[test]
fn keys_of_another_kind_of_point_and_a_zero_scale_are_errors() {
    check("misplaced-point-keys");
}

/// A point whose definition fails (an unknown unit) is one error: the rules, the load's
/// temperature, its obligation and the site's need for a grid meter that use it say
/// nothing more (they used to add five errors about a name that was plainly there).
#[test]
fn a_broken_point_is_one_error_not_one_per_use() {
    check("one-broken-point");
}

#[test]
fn a_device_defined_wrongly_is_one_error_and_a_hold_spelt_otherwise_is_named() {
    // The device's own error says how a transport is written; its uses stay quiet (it is
    // defined, only wrongly); `held 30s` is answered with `for 30s`.
    check("first-site-file");
}

#[test]
fn every_error_of_a_file_is_reported_in_one_run() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/test_data/broken");
    let text = std::fs::read_to_string(dir.join("wrong-units.yaml")).unwrap();
    let Err(spillway::config::LoadError::Invalid { diagnostics, .. }) = spillway::config::load_str("x.yaml", &text)
    else {
        panic!("expected errors")
    };
    assert!(diagnostics.iter().filter(|d| d.is_error()).count() >= 4, "{diagnostics:#?}");
}

/// A file saved in another encoding says where and what to do, not only "invalid UTF-8".
#[test]
fn a_file_that_is_not_utf8_names_the_line_and_the_fix() {
    let path = std::env::temp_dir().join(format!("spillway-latin1-{}.yaml", std::process::id()));
    std::fs::write(&path, b"site:\n  name: Caf\xe9\n").unwrap();
    let Err(err) = spillway::config::load_file(&path) else { panic!("refused") };
    let err = err.to_string();
    let _ = std::fs::remove_file(&path);
    assert!(err.contains("not UTF-8 text (line 2, byte 17): save the file as UTF-8"), "{err}");
}

/// Durations beyond a year are refused with the key named (they used to panic).
#[test]
fn durations_beyond_a_year_are_refused() {
    check("endless-durations");
}

/// Guard gains below zero, a tolerance that would waste the array, `sunspec: false` on a
/// limit, and a safe limit above the export limit.
#[test]
fn guard_settings_out_of_range_are_refused() {
    check("guard-out-of-range");
}

/// A safe limit that lets a no-export site export while its meter is lost: the site
/// loads, with a warning at the safe limit.
#[test]
fn a_safe_limit_above_the_export_limit_is_warned_about() {
    let yaml = "
site: { name: Open House, timezone: Europe/Lisbon, export: forbidden }
devices:
  meter:    { modbus_tcp: 127.0.0.1:5020, unit: 1 }
  inverter: { modbus_tcp: 127.0.0.1:5020, unit: 2 }
points:
  grid: { device: meter, register: 0, type: i16, unit: W }
inverter:
  rated: 5kW
  limit: { device: inverter, register: 10 }
  safe_limit: 5kW
loads: []
";
    let loaded = spillway::config::load_str("open.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let shown = spillway::diag::render("open.yaml", yaml, &loaded.warnings, false);
    assert!(shown.contains("[C0262] Warning: the safe limit is above the export limit"), "{shown}");
    assert!(shown.contains("11 │   safe_limit: 5kW"), "{shown}");
    // At or below the limit, nothing to say.
    let quiet = spillway::config::load_str("ok.yaml", &yaml.replace("safe_limit: 5kW", "safe_limit: 0W")).unwrap();
    assert!(quiet.warnings.iter().all(|w| w.code != "C0262"));
}

/// Off-grid levels outside what they can mean.
#[test]
fn off_grid_settings_out_of_range_are_refused() {
    check("off-grid-out-of-range");
}

/// `by: "24:00"` is refused with the fix; `24:00` ending a window is accepted.
#[test]
fn a_deadline_at_24_00_is_refused_and_a_window_to_24_00_is_not() {
    check("midnight-deadline");
}

/// `start: false` parks a load: a warning that the start rule never fires, not the
/// chatter error (a rule that never holds implies every stop rule).
#[test]
fn a_parked_load_gets_the_never_fires_warning_not_the_chatter_error() {
    let yaml = "
site: { name: Parked House, timezone: Europe/Lisbon }
devices:
  relays: { modbus_tcp: 127.0.0.1:5020, unit: 3 }
loads:
  - name: sauna
    rated: 6kW
    switch: { device: relays, coil: 0 }
    start: false
    stop: import > 300W
";
    let loaded = spillway::config::load_str("parked.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let codes: Vec<&str> = loaded.warnings.iter().map(|w| w.code).collect();
    assert_eq!(codes, ["C0231"], "{codes:?}");
}

/// A point or load named like a keyword or a weekday could never appear in a rule.
#[test]
fn names_taken_by_the_rule_language_are_refused() {
    check("reserved-names");
}

/// An error on the second line of a folded rule is shown on that line, under its word.
#[test]
fn an_error_in_a_folded_rule_is_shown_where_it_is() {
    check("folded-rule");
}

/// A discovery prefix is a topic without wildcards; a boost button lasts 1 min to 24 h.
#[test]
fn a_wildcard_discovery_prefix_and_a_boost_over_a_day_are_refused() {
    check("discovery");
}

/// A frozen-reading timeout is for measurements only, and must outlast two polls: one
/// repeat proves nothing.
#[test]
fn frozen_after_on_an_on_off_value_or_shorter_than_two_polls_is_refused() {
    check("frozen-after");
}

/// Polls and timeouts of no time, a limit re-written without pause, and an export limit
/// without a unit.
#[test]
fn periods_of_no_time_and_a_bare_export_limit_are_refused() {
    check("too-fast");
}

/// A limited-export site slower than ENA EREC G100 Issue 1's 5 s to act on a lost meter
/// or an export excursion gets a warning naming both; `export: 0` is no export.
#[test]
fn settings_slower_than_g100_are_warned_about_and_export_zero_is_forbidden() {
    let yaml = "
site:
  name: Slow House
  timezone: Europe/Lisbon
  export: 0
  guard: { deadline: 1h }
  failsafe: { stale_after: 1h }
devices:
  meter: { modbus_tcp: 127.0.0.1:5020, unit: 1 }
points:
  grid: { device: meter, register: 0, type: i16, unit: W }
loads: []
";
    let loaded = spillway::config::load_str("slow.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    assert!(matches!(
        loaded.site.connection,
        spillway::config::model::Connection::Grid { export: spillway::config::model::ExportPolicy::Forbidden, .. }
    ));
    let shown = spillway::diag::render("slow.yaml", yaml, &loaded.warnings, false);
    assert!(shown.contains("[C0263] Warning: slower than 5 s"), "{shown}");
    assert!(shown.contains("a lost grid meter is noticed after 60 min 1 s"), "{shown}");
    assert!(shown.contains("escalated to the safe limit after 1 h"), "{shown}");
    // The defaults are inside the 5 s.
    let quick = spillway::config::load_str(
        "ok.yaml",
        &yaml.replace("  guard: { deadline: 1h }\n  failsafe: { stale_after: 1h }\n", ""),
    )
    .unwrap();
    assert!(quick.warnings.iter().all(|w| w.code != "C0263"), "{:?}", quick.warnings);
}

/// `guard.margin` must leave export above zero (an error when it is not below the limit),
/// should clear the tolerance (a warning), and means nothing without a non-zero limit (a
/// warning); left out, it defaults to 50 W, or to the tolerance when that is wider.
#[test]
fn a_guard_margin_is_checked_against_the_export_limit_and_the_tolerance() {
    let site = |header: &str| {
        format!(
            "
site:
  name: Margin House
  timezone: Europe/Lisbon
{header}
devices:
  meter: {{ modbus_tcp: 127.0.0.1:5020, unit: 1 }}
points:
  grid: {{ device: meter, register: 0, type: i16, unit: W }}
loads: []
"
        )
    };
    let yaml = site("  export: 1.5kW\n  guard: { margin: 1.5kW }");
    let Err(err) = spillway::config::load_str("m.yaml", &yaml) else {
        panic!("a margin as wide as the limit is refused")
    };
    let shown = err.render(false);
    assert!(shown.contains("[C0269] Error: the guard margin is not below the export limit"), "{shown}");

    let yaml = site("  export: 1.5kW\n  guard: { tolerance: 40W, margin: 20W }");
    let loaded = spillway::config::load_str("m.yaml", &yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let shown = spillway::diag::render("m.yaml", &yaml, &loaded.warnings, false);
    assert!(shown.contains("[C0270] Warning: the guard margin is smaller than its tolerance"), "{shown}");
    assert_eq!(loaded.site.guard.margin.0, 20.0);

    let yaml = site("  export: forbidden\n  guard: { margin: 100W }");
    let loaded = spillway::config::load_str("m.yaml", &yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let shown = spillway::diag::render("m.yaml", &yaml, &loaded.warnings, false);
    assert!(shown.contains("[C0270] Warning: `guard.margin` applies only to a non-zero export limit"), "{shown}");

    let defaults = |header: &str| {
        let l = spillway::config::load_str("m.yaml", &site(header)).unwrap_or_else(|e| panic!("{}", e.render(false)));
        assert!(l.warnings.is_empty(), "{:?}", l.warnings);
        l.site.guard.margin.0
    };
    assert_eq!(defaults("  export: 1.5kW"), 50.0);
    assert_eq!(defaults("  export: 1.5kW\n  guard: { tolerance: 120W }"), 120.0);
}

/// An ordinal sign typed for the degree sign, and an unquoted rule with a comma in a
/// flow mapping, each get advice that names the slip.
#[test]
fn keyboard_slips_get_advice_that_names_them() {
    check("keyboard-slips");
}

/// A cycle whose hold is longer than its grid window can only be completed from surplus.
#[test]
fn a_cycle_hold_longer_than_its_window_is_warned_about() {
    let yaml = "
site: { name: Cycle House, timezone: Europe/Lisbon }
devices:
  sensors: { modbus_tcp: 127.0.0.1:5020, unit: 4 }
points:
  tank_temp: { device: sensors, register: 1, unit: °C }
loads:
  - name: heater
    rated: 3kW
    switch: { device: sensors, coil: 0 }
    temperature: tank_temp
    obligations:
      - { cycle: 60°C, hold: 5h, every: 7d, grid_window: \"11:00..11:30\" }
";
    let loaded = spillway::config::load_str("cycle.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let shown = spillway::diag::render("cycle.yaml", yaml, &loaded.warnings, false);
    assert!(shown.contains("a hold of 5 h cannot fit inside a 30 min grid window"), "{shown}");
}

/// A temperature target above the inhibit threshold can never be met: a warning.
#[test]
fn a_target_the_inhibit_rule_forbids_is_warned_about() {
    let yaml = "
site: { name: Hot House, timezone: Europe/Lisbon }
devices:
  sensors: { modbus_tcp: 127.0.0.1:5020, unit: 4 }
points:
  tank_temp: { device: sensors, register: 1, unit: °C }
loads:
  - name: heater
    rated: 3kW
    switch: { device: sensors, coil: 0 }
    temperature: tank_temp
    inhibit: tank_temp >= 75°C
    obligations:
      - { reach: 80°C, by: \"17:00\", grid_window: \"14:00..17:00\" }
";
    let loaded = spillway::config::load_str("hot.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let shown = spillway::diag::render("hot.yaml", yaml, &loaded.warnings, false);
    assert!(shown.contains("[C0264] Warning: load \"heater\": the inhibit rule stops the load before"), "{shown}");
    // A target below the threshold is fine.
    let ok = spillway::config::load_str("ok.yaml", &yaml.replace("reach: 80°C", "reach: 60°C")).unwrap();
    assert!(ok.warnings.iter().all(|w| w.code != "C0264"), "{:?}", ok.warnings);
}

/// `reach: 80%` needs a state of charge to read, and a battery's own limit must let it
/// get there.
#[test]
fn a_state_of_charge_obligation_needs_a_soc_point_and_a_reachable_target() {
    let yaml = "
site: { name: Carport, timezone: Europe/Lisbon }
devices:
  box: { modbus_tcp: 127.0.0.1:5020, unit: 4 }
points:
  car_soc: { device: box, register: 31, scale: 0.1, unit: \"%\", missing: 0xFFFF }
  store_soc: { device: box, register: 10, scale: 0.1, unit: \"%\" }
loads:
  - name: car
    kind: charger
    min_current: 6A
    max_current: 16A
    setpoint: { device: box, register: 0, scale: 0.1 }
    soc: car_soc
    car_capacity: 58kWh
    obligations:
      - { reach: 80%, by: \"07:00\", grid_window: \"00:00..06:00\" }
  - name: store
    kind: battery
    max_charge: 3kW
    soc: store_soc
    soc_max: 90%
    setpoint: { device: box, register: 1, type: i32 }
    obligations:
      - { reach: 85%, by: \"18:00\", grid_window: \"13:00..18:00\" }
";
    let loaded = spillway::config::load_str("soc.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let described = spillway::config::describe::describe(&loaded.site);
    assert!(described.contains("obligation: reach 80 % by 07:00 on car_soc (grid allowed 00:00–06:00)"), "{described}");
    assert!(described.contains("the car's state of charge on car_soc (a car of 58 kWh)"), "{described}");
    assert!(described.contains("battery charging from"), "{described}");
    // The capacity gives the duty its pace: 580 Wh a point at 3.68 kW, 9 min 27.4 s.
    use spillway::config::model::Obligation;
    let car = &loaded.site.loads.iter().find(|l| l.name == "car").unwrap();
    match &car.obligations[0] {
        Obligation::ChargeBy { pace: Some(p), .. } => assert!((p.as_secs_f64() - 567.39).abs() < 0.01, "{p:?}"),
        other => panic!("{other:?}"),
    }
    let with_capacity = yaml.replace("    soc_max: 90%\n", "    soc_max: 90%\n    capacity: 10kWh\n");
    let with_capacity = spillway::config::load_str("soc.yaml", &with_capacity).unwrap();
    let described = spillway::config::describe::describe(&with_capacity.site);
    assert!(described.contains("battery of 10 kWh charging from"), "{described}");
    // Above the battery's own limit.
    let shown = refused(&yaml.replace("reach: 85%", "reach: 95%"));
    assert!(shown.contains("[C0278]") && shown.contains("above the battery's `soc_max`"), "{shown}");
    // A charger without `soc`.
    let shown = refused(&yaml.replace("    soc: car_soc\n", ""));
    assert!(shown.contains("[C0279]") && shown.contains("add `soc: <point>` to the charger"), "{shown}");
    // A heater has no state of charge.
    let heater = yaml.replace(
        "loads:\n",
        "loads:\n  - name: heater\n    rated: 2kW\n    switch: { device: box, coil: 0 }\n    obligations:\n      - { reach: 80%, by: \"17:00\" }\n",
    );
    let shown = refused(&heater);
    assert!(shown.contains("[C0279]") && shown.contains("a heater's is a temperature"), "{shown}");
    // A window wholly after the deadline is never used: a warning.
    let late = yaml.replace("grid_window: \"00:00..06:00\"", "grid_window: \"18:00..23:00\"");
    let late = spillway::config::load_str("soc.yaml", &late).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let shown = spillway::diag::render("soc.yaml", yaml, &late.warnings, false);
    assert!(shown.contains("[C0282]") && shown.contains("has no time before the deadline 07:00"), "{shown}");
    assert!(loaded.warnings.iter().all(|w| w.code != "C0282"), "{:?}", loaded.warnings);
    // Out of range.
    let shown = refused(&yaml.replace("reach: 80%", "reach: 120%"));
    assert!(shown.contains("[C0277]"), "{shown}");
    // `missing:` is the raw value a device shows for "no reading".
    use spillway::config::model::{ModbusRead, PointRead};
    let raw = |site: &spillway::config::model::Site, name: &str| {
        let p = site.points.iter().find(|p| p.name == name).unwrap();
        match &p.read {
            PointRead::Modbus(ModbusRead { missing, .. }) => *missing,
            other => panic!("{other:?}"),
        }
    };
    assert_eq!(raw(&loaded.site, "car_soc"), Some(0xFFFF));
    assert_eq!(raw(&loaded.site, "store_soc"), None);
    let signed = yaml.replace("register: 10, scale: 0.1,", "register: 10, type: i16, missing: -32768, scale: 0.1,");
    let signed = spillway::config::load_str("soc.yaml", &signed).unwrap_or_else(|e| panic!("{}", e.render(false)));
    assert_eq!(raw(&signed.site, "store_soc"), Some(0x8000));
    let shown = refused(&yaml.replace("missing: 0xFFFF", "missing: 0x10000"));
    assert!(shown.contains("[C0280]") && shown.contains("does not fit the point's 16-bit registers"), "{shown}");
    // Hex without its 0x is text to YAML: say so, and nothing else.
    let shown = refused(&yaml.replace("missing: 0xFFFF", "missing: ffff"));
    assert!(shown.contains("[C0280]") && shown.contains("write it as 0xFFFF"), "{shown}");
    assert!(!shown.contains("unknown key"), "a broken point leaves no key of its load unread: {shown}");
    // A bare number on a charger with a SoC and no temperature is a SoC without its %.
    let shown = refused(&yaml.replace("reach: 80%", "reach: 80"));
    assert!(shown.contains("the target state of charge needs a unit") && shown.contains("write 80%"), "{shown}");
    assert!(!shown.contains("[C0248]"), "{shown}");
}

/// A tank's `volume` gives its temperature duty a pace (m·c / P per kelvin); without a
/// `temperature` it has nothing to serve and is refused.
#[test]
fn a_tanks_volume_paces_its_temperature_duty_and_needs_a_temperature() {
    let yaml = "
site: { name: Hot House, timezone: Europe/Lisbon }
devices:
  sensors: { modbus_tcp: 127.0.0.1:5020, unit: 4 }
points:
  tank_temp: { device: sensors, register: 1, scale: 0.1, unit: °C }
loads:
  - name: heater
    rated: 3.6kW
    switch: { device: sensors, coil: 0 }
    temperature: tank_temp
    volume: 250L
    obligations:
      - { reach: 55°C, by: \"16:00\", grid_window: \"13:00..16:00\" }
";
    let loaded = spillway::config::load_str("hot.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    use spillway::config::model::Obligation;
    // 250 kg × 4186 J/(kg·K) (specific heat of water, CRC Handbook; from memory) / 3600 W.
    match &loaded.site.loads[0].obligations[0] {
        Obligation::ReachBy { pace: Some(p), .. } => assert!((p.as_secs_f64() - 290.69).abs() < 0.01, "{p:?}"),
        other => panic!("{other:?}"),
    }
    let described = spillway::config::describe::describe(&loaded.site);
    assert!(described.contains("heats a tank of 250 L"), "{described}");
    let shown = refused(&yaml.replace("    temperature: tank_temp\n", ""));
    assert!(shown.contains("[C0281]") && shown.contains("has a `volume` but no `temperature`"), "{shown}");
    let shown = refused(&yaml.replace("250L", "250kg"));
    assert!(shown.contains("the tank's volume"), "{shown}");
}

/// The rendered errors of a site file that must be refused.
fn refused(yaml: &str) -> String {
    match spillway::config::load_str("site.yaml", yaml) {
        Ok(_) => panic!("accepted:\n{yaml}"),
        Err(e) => e.render(false),
    }
}

#[test]
fn a_command_at_qos_0_or_retained_is_warned_about() {
    // Its safe state at shutdown goes once and may be lost; QoS 1 (the default) is quiet.
    let yaml = |qos: &str| {
        format!(
            "
site: {{ name: Plug House, timezone: Europe/Dublin, export: allowed }}
mqtt: {{ broker: 127.0.0.1:1883 }}
devices:
  home: {{ mqtt: true }}
points:
  grid: {{ device: home, topic: home/meter, unit: W }}
loads:
  - name: pump
    priority: 1
    rated: 750W
    switch: {{ device: home, topic: home/plug/set{qos} }}
    start: surplus > 800W for 1min
    stop: import > 200W for 1min
"
        )
    };
    let loaded =
        spillway::config::load_str("plug.yaml", &yaml(", qos: 0")).unwrap_or_else(|e| panic!("{}", e.render(false)));
    let codes: Vec<&str> = loaded.warnings.iter().map(|w| w.code).collect();
    assert_eq!(codes, ["C0283"], "{}", spillway::diag::render("plug.yaml", &yaml(", qos: 0"), &loaded.warnings, false));
    let quiet = spillway::config::load_str("plug.yaml", &yaml("")).unwrap_or_else(|e| panic!("{}", e.render(false)));
    assert!(quiet.warnings.is_empty());
    // A retained command outlives the controller: a plug that reconnects after a crash
    // would take the last ON the broker kept.
    let retained = spillway::config::load_str("plug.yaml", &yaml(", retain: true"))
        .unwrap_or_else(|e| panic!("{}", e.render(false)));
    let codes: Vec<&str> = retained.warnings.iter().map(|w| w.code).collect();
    assert_eq!(codes, ["C0284"]);
    let fine = spillway::config::load_str("plug.yaml", &yaml(", retain: false"))
        .unwrap_or_else(|e| panic!("{}", e.render(false)));
    assert!(fine.warnings.is_empty());
}

/// The codes of every diagnostic a site file gives, errors and warnings, in file order;
/// empty when it loads without a word.
fn codes(yaml: &str) -> Vec<&'static str> {
    match spillway::config::load_str("site.yaml", yaml) {
        Ok(loaded) => loaded.warnings.iter().map(|w| w.code).collect(),
        Err(spillway::config::LoadError::Invalid { diagnostics, .. }) => diagnostics.iter().map(|d| d.code).collect(),
        Err(e) => panic!("{e}"),
    }
}

/// A small grid-tied site with one relay device and one temperature point, for the
/// tests below that change one thing in it.
const RELAY_HOUSE: &str = "
site: { name: Relay House, timezone: Europe/Lisbon }
devices:
  relays: { modbus_tcp: 127.0.0.1:5020, unit: 3 }
points:
  tank_temp: { device: relays, register: 1, unit: °C }
loads:
  - name: heater
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 3.2kW for 1min
    stop: import > 250W for 1min
";

/// The expectations of `RELAY_HOUSE` with `expect` appended: the codes they give.
fn expect_codes(expect: &str) -> Vec<&'static str> {
    let yaml = format!("{RELAY_HOUSE}{expect}");
    let loaded = spillway::config::load_str("site.yaml", &yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
    match spillway::offline::expect::read(&loaded) {
        Ok(exp) => {
            assert!(!exp.days.is_empty(), "read without error but without its day: {exp:?}");
            Vec::new()
        }
        Err(diags) => diags.iter().map(|d| d.code).collect(),
    }
}

/// A test day whose `date` is empty or a list used to vanish without a word: `check`
/// said "ok" over no day at all, and a check naming the day was told there was no such
/// day. Now the date is reported, and the check that names the day says nothing more.
#[test]
fn a_test_day_without_a_date_is_reported_not_dropped() {
    let expect = |date: &str| {
        format!(
            "expect:\n  days:\n    - name: june\n      date: {date}\n  checks:\n    - {{ name: calm, switchings: heater, days: [june] }}\n"
        )
    };
    assert_eq!(expect_codes(&expect("2026-06-21")), Vec::<&str>::new());
    assert_eq!(expect_codes(&expect("")), ["C0101"]);
    assert_eq!(expect_codes(&expect("[2026-06-21]")), ["C0101"]);
    assert_eq!(expect_codes(&expect("{ day: 21 }")), ["C0101"]);
    // A date that is there but wrong is C0601, as before, and no C0606 either.
    assert_eq!(expect_codes(&expect("21/06/2026")), ["C0601"]);
    // A day nobody defined is still C0606.
    assert_eq!(expect_codes(&expect("2026-06-21").replace("[june]", "[july]")), ["C0606"]);
    // The message says what is wrong with the date.
    let yaml = format!("{RELAY_HOUSE}{}", expect(""));
    let loaded = spillway::config::load_str("site.yaml", &yaml).unwrap();
    let diags = spillway::offline::expect::read(&loaded).unwrap_err();
    let shown = spillway::diag::render("site.yaml", &yaml, &diags, false);
    assert!(shown.contains("the day's date must be a single value, found nothing"), "{shown}");
}

/// `backup` settings were read only on a grid-connected site: on an off-grid one they
/// were ignored without a word.
#[test]
fn a_backup_section_on_an_off_grid_site_is_refused() {
    let yaml = "
site:
  name: Far Cabin
  timezone: Europe/Lisbon
  grid: off
  off_grid: { float_voltage: 54.4V }
  backup: { shed_interval: 30s }
devices:
  shunt: { modbus_tcp: 127.0.0.1:5020, unit: 1 }
points:
  battery_voltage: { device: shunt, register: 0, unit: V }
  battery_current: { device: shunt, register: 1, type: i16, unit: A }
loads: []
";
    assert_eq!(codes(yaml), ["C0204"]);
    let shown = refused(yaml);
    assert!(shown.contains("`backup` settings need `grid: backup`"), "{shown}");
    assert!(shown.contains("this site is off-grid"), "{shown}");
    assert_eq!(codes(&yaml.replace("  backup: { shed_interval: 30s }\n", "")), Vec::<&str>::new());
}

/// A stepped load whose `stages` is missing or not a list is one error: its `switch`
/// or `stage_register` used to be reported as unknown keys on top.
#[test]
fn a_stepped_load_with_broken_stages_does_not_disown_its_other_keys() {
    let stepped = |stages: &str, command: &str| {
        RELAY_HOUSE.replace(
            "    rated: 3kW\n    switch: { device: relays, coil: 0 }\n",
            &format!("    kind: stepped\n{stages}{command}"),
        )
    };
    let relays = "    switch: [{ device: relays, coil: 0 }, { device: relays, coil: 1 }]\n";
    let register = "    stage_register: { device: relays, register: 7 }\n";
    assert_eq!(codes(&stepped("    stages: [1kW, 2kW]\n", relays)), Vec::<&str>::new());
    assert_eq!(codes(&stepped("", relays)), ["C0004"]);
    assert_eq!(codes(&stepped("", register)), ["C0004"]);
    assert_eq!(codes(&stepped("    stages: 3kW\n", relays)), ["C0237"]);
    assert_eq!(codes(&stepped("    stages: [2kW, 1kW]\n", register)), ["C0237"]);
    // A key no stepped load has is still unknown.
    assert_eq!(codes(&stepped("", &format!("{relays}    rated: 3kW\n"))), ["C0004", "C0005"]);
}

/// A battery whose own settings stop the reading early (charging resumes above where
/// it stops) keeps its `discharge` a known key.
#[test]
fn a_battery_with_broken_levels_does_not_disown_its_discharge() {
    let yaml = "
site: { name: Store House, timezone: Europe/Lisbon }
devices:
  box: { modbus_tcp: 127.0.0.1:5020, unit: 4 }
points:
  store_soc: { device: box, register: 10, scale: 0.1, unit: \"%\" }
loads:
  - name: store
    kind: battery
    max_charge: 3kW
    soc: store_soc
    soc_max: 90%
    soc_resume: 95%
    setpoint: { device: box, register: 1, type: i32 }
    discharge: { max: 2kW, soc_min: 20% }
";
    assert_eq!(codes(yaml), ["C0236"]);
}

/// An unknown `kind` is one error: which kind was meant cannot be known, so the keys of
/// every kind are accepted; only a key no load has is reported.
#[test]
fn an_unknown_load_kind_does_not_make_its_keys_unknown() {
    let kind = |k: &str| RELAY_HOUSE.replace("    rated: 3kW\n", &format!("    kind: {k}\n    rated: 3kW\n"));
    assert_eq!(codes(&kind("switched")), Vec::<&str>::new());
    assert_eq!(codes(&kind("switchd")), ["C0104"]);
    assert_eq!(codes(&kind("heater")), ["C0104"]);
    assert_eq!(codes(&kind("[switched]")), ["C0104"]);
    // Keys of another kind than the one most like it: still no more errors.
    let other =
        kind("stepd").replace("    rated: 3kW\n", "    rated: 3kW\n    stages: [1kW, 2kW]\n    max_charge: 3kW\n");
    assert_eq!(codes(&other), ["C0104"]);
    // A key no kind has is a mistake of its own.
    let typo = kind("stepd").replace("    rated: 3kW\n", "    ratd: 3kW\n");
    let shown = refused(&typo);
    assert_eq!(codes(&typo), ["C0104", "C0005"], "{shown}");
    assert!(shown.contains("did you mean \"rated\"?"), "{shown}");
}

/// A point whose name is refused is defined, only wrongly: what refers to it says
/// nothing more (a load's `temperature`, `power`, a rule), as for a refused device.
#[test]
fn a_refused_point_name_is_one_error_not_one_per_use() {
    let named = |name: &str| {
        RELAY_HOUSE
            .replace("  tank_temp: {", &format!("  {name}: {{"))
            .replace("    start:", &format!("    temperature: {name}\n    start:"))
    };
    assert_eq!(codes(&named("tank_temp")), Vec::<&str>::new());
    assert_eq!(codes(&named("Tank_Temp")), ["C0105"]);
    assert_eq!(codes(&named("tank-temp")), ["C0105"]);
    assert_eq!(codes(&named("for")), ["C0105"]);
    // A name Spillway computes itself.
    let power = RELAY_HOUSE
        .replace(
            "  tank_temp: { device: relays, register: 1, unit: °C }",
            "  surplus: { device: relays, register: 1, unit: W }",
        )
        .replace("    start:", "    power: surplus\n    start:");
    assert_eq!(codes(&power), ["C0214"]);
    // A rule that names it.
    let rule = RELAY_HOUSE
        .replace("  tank_temp: {", "  tank.temp: {")
        .replace("stop: import > 250W for 1min", "stop: import > 250W for 1min or tank.temp > 80°C");
    assert_eq!(codes(&rule), ["C0105"], "{}", refused(&rule));
}

/// `mqtt: false` on a device says it is not an MQTT device: it is no transport, so a
/// Modbus device may carry it; `mqtt` is true or false.
#[test]
fn mqtt_false_on_a_device_is_no_transport() {
    let device =
        |d: &str| RELAY_HOUSE.replace("  relays: { modbus_tcp: 127.0.0.1:5020, unit: 3 }", &format!("  relays: {d}"));
    assert_eq!(codes(&device("{ modbus_tcp: 127.0.0.1:5020, unit: 3, mqtt: false }")), Vec::<&str>::new());
    let alone = device("{ mqtt: false }");
    assert_eq!(codes(&alone), ["C0210"]);
    let shown = refused(&alone);
    assert!(shown.contains("`mqtt: false` is no transport"), "{shown}");
    assert_eq!(codes(&device("{ modbus_tcp: 127.0.0.1:5020, unit: 3, mqtt: broker }")), ["C0102"]);
    // `mqtt: true` with Modbus is still two transports.
    assert_eq!(codes(&device("{ modbus_tcp: 127.0.0.1:5020, unit: 3, mqtt: true }")), ["C0210"]);
}

/// The note on a refused name describes what is accepted: a leading `_` is fine.
#[test]
fn the_note_on_an_unusable_name_says_what_is_accepted() {
    assert_eq!(codes(&RELAY_HOUSE.replace("name: heater", "name: _heater")), Vec::<&str>::new());
    let shown = refused(&RELAY_HOUSE.replace("name: heater", "name: Heater"));
    assert!(shown.contains("start with a lowercase letter or _"), "{shown}");
    assert!(!shown.contains("start with a letter and"), "{shown}");
}

/// A grid meter read through an unsigned register (`u16` is the default) can never read
/// negative: export would never show and the export guard would be blind (`common
/// practice`: meters publish import/export power as one signed register, i16 or i32).
/// Refused on `grid`; a battery's two-way flows are warned about.
#[test]
fn a_two_way_power_in_an_unsigned_register_is_caught() {
    let yaml = |grid: &str, battery: &str| {
        format!(
            "
site: {{ name: Test, timezone: UTC, export: allowed }}
devices:
  meter: {{ modbus_tcp: 127.0.0.1:5020, unit: 1 }}
points:
  grid: {{ device: meter, register: 10, unit: W{grid} }}
  battery_power: {{ device: meter, register: 20, unit: W{battery} }}
loads:
  - name: heater
    rated: 2kW
    switch: {{ device: meter, coil: 0 }}
    start: surplus > 2kW
    stop: surplus < 500W for 1min
"
        )
    };
    assert_eq!(codes(&yaml("", ", type: i16")), ["C0285"]);
    let err = match spillway::config::load_str("site.yaml", &yaml("", ", type: i16")) {
        Ok(_) => panic!("an unsigned grid point loaded"),
        Err(e) => e.render(false),
    };
    assert!(err.contains("can never show export") && err.contains("type: i16"), "{err}");
    let flipped = match spillway::config::load_str("site.yaml", &yaml(", type: u32, scale: -1", ", type: i32")) {
        Ok(_) => panic!("an unsigned grid point loaded"),
        Err(e) => e.render(false),
    };
    assert!(flipped.contains("`u32`") && flipped.contains("can never show import"), "{flipped}");
    // A battery's flow: warned, not refused.
    assert_eq!(codes(&yaml(", type: i32", "")), ["C0285"]);
    assert!(spillway::config::load_str("site.yaml", &yaml(", type: i32", "")).is_ok());
    assert!(codes(&yaml(", type: i16", ", type: f32")).is_empty());
}

/// A no-export site held at almost no import reads the meter's noise as export (in
/// simulation: 1,113 export episodes in a clear day at 0 W, 94 at 50 W): warned.
#[test]
fn a_no_export_site_with_an_import_target_near_zero_is_warned_about() {
    let yaml = |target: &str| {
        RELAY_HOUSE.replace(
            "site: { name: Relay House, timezone: Europe/Lisbon }",
            &format!("site: {{ name: Relay House, timezone: Europe/Lisbon, export: forbidden{target} }}"),
        )
    };
    assert!(codes(&yaml(", import_target: 0W")).contains(&"C0286"), "{:?}", codes(&yaml(", import_target: 0W")));
    assert!(codes(&yaml(", import_target: 20W")).contains(&"C0286"));
    assert!(!codes(&yaml(", import_target: 50W")).contains(&"C0286"));
    assert!(!codes(&yaml("")).contains(&"C0286"), "the default (50 W) is fine");
}

/// A tariff with a flat price and blocks, bounds that fall, a time-of-use window on
/// blocks and a day set that does not exist: every mistake at once, not the first of them.
#[test]
fn every_mistake_of_a_tariff_is_reported_in_one_run() {
    check("tariff-mistakes");
}

/// Gains that make the modulating loads hunt are warned about (C0287). A walk-through
/// with a proportional heater and a charger on a limited-export site counted 1,562
/// switchings a week at the defaults (kp 0.1, ki 0.5) and 38,800 at kp 1.5, ki 2, with
/// 397 s over the limit against 43 s. The check runs the loop with the grid point's
/// latency (1.5 s here: a reading two ticks behind its command).
#[test]
fn loop_gains_that_make_the_modulating_loads_hunt_are_warned_about() {
    let base = std::fs::read_to_string("config/battery-ev-limited-export.yaml").unwrap();
    let with = |guard: &str| base.replace("  import_target: 0W\n", &format!("  import_target: 0W\n  guard: {guard}\n"));
    assert!(!codes(&with("{ kp: 0.1, ki: 0.5 }")).contains(&"C0287"), "the defaults settle");
    assert!(!codes(&with("{ kp: 0.3, ki: 0.3 }")).contains(&"C0287"));
    assert!(codes(&with("{ kp: 1.5, ki: 2 }")).contains(&"C0287"));
    assert!(codes(&with("{ kp: 0.8, ki: 0.5 }")).contains(&"C0287"));
    assert!(!codes(&with("{ ki: 0.9 }")).contains(&"C0287"));
    assert!(codes(&with("{ ki: 1.05 }")).contains(&"C0287"), "above 1 an integral loop two ticks behind grows");
    // The defaults too, where the meter is slow: four ticks behind, they oscillate.
    let slow = base.replace("latency: 1500ms", "latency: 3s, stale_after: 6s");
    assert!(codes(&slow).contains(&"C0287"), "{:?}", codes(&slow));
    // Without a modulating load the gains drive nothing.
    let relays = RELAY_HOUSE.replace(
        "site: { name: Relay House, timezone: Europe/Lisbon }",
        "site: { name: Relay House, timezone: Europe/Lisbon, guard: { kp: 1.5, ki: 2 } }",
    );
    assert!(!codes(&relays).contains(&"C0287"), "{:?}", codes(&relays));
    let loaded = spillway::config::load_str("site.yaml", &with("{ kp: 1.5, ki: 2 }")).unwrap();
    let w = loaded.warnings.iter().find(|w| w.code == "C0287").unwrap();
    assert!(w.message.contains("oscillate, growing"), "{}", w.message);
}

/// The topic prefix starts every topic Spillway publishes: a wildcard in it made the
/// broker drop the connection, reported as a broker that cannot be reached; an MQTT
/// password without a user name was ignored (MQTT 3.1.1 §3.1.2.9 sends a password only
/// with a user name).
#[test]
fn a_wildcard_topic_prefix_and_a_password_without_a_user_are_refused() {
    let yaml = |mqtt: &str| {
        format!(
            "
site: {{ name: Plug House, timezone: Europe/Dublin, export: allowed }}
mqtt: {{ broker: 127.0.0.1:1883{mqtt} }}
devices:
  home: {{ mqtt: true }}
points:
  grid: {{ device: home, topic: home/meter, unit: W }}
loads:
  - {{ name: pump, priority: 1, rated: 750W, switch: {{ device: home, topic: home/plug/set }}, start: surplus > 800W for 1min, stop: import > 200W for 1min }}
"
        )
    };
    assert_eq!(codes(&yaml(", topic_prefix: plug/house")), Vec::<&str>::new());
    for prefix in ["spillway/+/x", "spillway/#", "a+b", "\"/\""] {
        assert_eq!(codes(&yaml(&format!(", topic_prefix: {prefix}"))), ["C0218"], "{prefix}");
    }
    assert_eq!(codes(&yaml(", password_env: PLUG_PW")), ["C0209"]);
    assert_eq!(codes(&yaml(", password_file: /etc/spillway/pw")), ["C0209"]);
    assert_eq!(codes(&yaml(", username: plug, password_file: /etc/spillway/pw")), Vec::<&str>::new());
}
