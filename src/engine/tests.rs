//! Behaviour tests of the engine, driven through site files so they pin semantics,
//! not internal APIs. Time is simulated: every test is deterministic and sleeps never.

use std::sync::Arc;
use std::time::Duration;

use proptest::prelude::*;

use super::*;
use crate::config::load_str;
use crate::config::model::Site;

/// A site plus an engine plus a snapshot, stepped one tick at a time.
struct Harness {
    site: Arc<Site>,
    engine: Engine,
    snapshot: Snapshot,
    now: Timestamp,
    /// Values re-stamped every tick (a meter that keeps answering).
    live: Vec<Option<f64>>,
}

/// 2026-06-15T00:00:00Z, a Monday.
const START: i64 = 1_781_481_600_000;

impl Harness {
    fn new(yaml: &str) -> Self {
        let loaded = match load_str("test.yaml", yaml) {
            Ok(l) => l,
            Err(e) => panic!("{}", e.render(false)),
        };
        let site = Arc::new(loaded.site);
        let n = site.points.len();
        Harness {
            engine: Engine::new(Arc::clone(&site)),
            snapshot: Snapshot::empty(&site),
            now: Timestamp(START),
            live: vec![None; n],
            site,
        }
    }

    fn at_local(mut self, h: u32, m: u32) -> Self {
        let tz = self.site.timezone;
        let date = self.now.to_utc().with_timezone(&tz).date_naive();
        let t = chrono::TimeZone::from_local_datetime(&tz, &date.and_hms_opt(h, m, 0).unwrap()).single().unwrap();
        self.now = Timestamp::from_utc(t.with_timezone(&chrono::Utc));
        self
    }

    fn point(&self, name: &str) -> PointId {
        self.site.point(name).unwrap_or_else(|| panic!("no point {name}")).0
    }

    /// Sets a point's value; it keeps being reported fresh every tick.
    fn set(&mut self, name: &str, value: f64) {
        let p = self.point(name);
        self.live[p.0] = Some(value);
        self.snapshot.set(p, value, self.now);
    }

    /// The point stops being reported (its last sample ages).
    fn silence(&mut self, name: &str) {
        let p = self.point(name);
        self.live[p.0] = None;
    }

    fn tick(&mut self) -> Decisions {
        self.now = self.now.plus(self.site.tick);
        for (i, v) in self.live.iter().enumerate() {
            if let Some(v) = v {
                self.snapshot.set(PointId(i), *v, self.now);
            }
        }
        self.engine.step(self.now, &self.snapshot).clone()
    }

    fn run(&mut self, d: Duration) -> Decisions {
        let ticks = (d.as_millis() / self.site.tick.as_millis()).max(1);
        let mut last = None;
        for _ in 0..ticks {
            last = Some(self.tick());
        }
        last.unwrap()
    }

    fn load(&self, name: &str) -> usize {
        self.site.load(name).unwrap_or_else(|| panic!("no load {name}")).0.0
    }

    fn command(&self, name: &str) -> Command {
        self.engine.decisions().loads[self.load(name)].command
    }

    fn reason(&self, name: &str) -> Reason {
        self.engine.decisions().loads[self.load(name)].reason
    }
}

fn secs(s: u64) -> Duration {
    Duration::from_secs(s)
}

const DEVICES: &str = r#"
devices:
  meter:    { modbus_tcp: 127.0.0.1:5020, unit: 1 }
  relays:   { modbus_tcp: 127.0.0.1:5020, unit: 3 }
  inverter: { modbus_tcp: 127.0.0.1:5020, unit: 2 }
points:
  grid:      { device: meter, register: 0, type: i32, unit: W }
  pv:        { device: inverter, register: 10, type: u32, unit: W }
  tank_temp: { device: meter, register: 20, type: i16, scale: 0.1, unit: °C, stale_after: 1min }
  grid_available: { device: meter, coil: 5 }
  soc:       { device: meter, register: 30, unit: "%" }
  pump_power: { device: meter, register: 40, unit: W }
inverter:
  rated: 5kW
  limit: { device: inverter, register: 100 }
"#;

fn site(header: &str, loads: &str) -> String {
    format!("site:\n  name: Test\n  timezone: Europe/Lisbon\n{header}\n{DEVICES}\nloads:\n{loads}")
}

const TWO_LOADS: &str = r#"
  - name: tank
    priority: 1
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 3.1kW for 20s
    stop: import > 300W for 10s
    min_on: 2min
    min_off: 1min
  - name: pump
    priority: 2
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.1kW for 20s
    stop: import > 300W for 10s
    min_on: 5min
"#;

// ---------------------------------------------------------------- surplus and priority

#[test]
fn surplus_is_export_plus_the_power_of_managed_loads_that_are_on() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.set("grid", -1500.0);
    let d = h.run(secs(30));
    assert_eq!(h.command("pump"), Command::On, "pump starts on 1.5 kW export");
    // With the pump on, export falls to 500 W; the surplus is still 1.5 kW.
    h.set("grid", -500.0);
    let d2 = h.tick();
    assert!((d2.surplus.0 - 1500.0).abs() < 1e-6, "{} then {}", d.surplus, d2.surplus);
}

/// A load whose relay module stopped answering may be on or off: it is not counted as
/// drawing its command, so its power is not handed to the loads below it as surplus
/// that may not exist.
#[test]
fn a_load_the_command_cannot_reach_is_not_counted_as_drawing_it() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.set("grid", -1500.0);
    h.run(secs(30));
    assert_eq!(h.command("pump"), Command::On);
    h.set("grid", -500.0);
    assert!((h.tick().surplus.0 - 1500.0).abs() < 1e-6);
    let pump = LoadId(h.load("pump"));
    h.engine.set_reachable(pump, false);
    let d = h.tick();
    assert!((d.surplus.0 - 500.0).abs() < 1e-6, "only the export the meter shows: {}", d.surplus);
    h.engine.set_reachable(pump, true);
    assert!((h.tick().surplus.0 - 1500.0).abs() < 1e-6);
}

/// An override's end is said in the site's local time, as the log says it, not as a UTC
/// instant with milliseconds.
#[test]
fn an_overrides_end_is_said_in_local_time() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS)).at_local(14, 0);
    h.set("grid", 500.0);
    h.tick();
    let pump = LoadId(h.load("pump"));
    h.engine.set_override(pump, Command::On, h.now.plus(secs(30 * 60)));
    h.tick();
    let why = h.engine.explain(pump);
    assert!(why.contains("override until 14:30:01 WEST"), "{why}");
}

/// The test site with a battery's power read (`battery_power`, charging +).
fn with_battery_power(yaml: &str) -> String {
    yaml.replace("points:\n", "points:\n  battery_power: { device: meter, register: 50, type: i16, unit: W }\n")
}

/// A battery no load commands runs itself: it holds the meter at zero by discharging,
/// and the pump would run on it forever. Its discharge counts as import: the surplus
/// drops by it, and the pump's `surplus < 500W` stop fires; its charging is not surplus.
#[test]
fn a_self_run_batterys_discharge_counts_as_import_and_its_charging_is_not_surplus() {
    let loads = r#"
  - name: pump
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.1kW for 20s
    stop: surplus < 500W for 10s
"#;
    let yaml = with_battery_power(&site("  export: allowed", loads));
    let mut h = Harness::new(&yaml);
    assert!(h.site.self_run_battery().is_some());
    h.set("battery_power", 0.0);
    h.set("grid", -1500.0);
    h.run(secs(30));
    assert_eq!(h.command("pump"), Command::On);
    // A cloud: the battery covers the whole pump, the meter reads zero.
    h.set("grid", 0.0);
    h.set("battery_power", -1000.0);
    let d = h.tick();
    assert!(d.surplus.0.abs() < 1e-6, "the pump's own 1 kW is not surplus while the battery pays: {}", d.surplus);
    h.run(secs(15));
    assert_eq!(h.command("pump"), Command::Off, "{:?}", h.reason("pump"));
    // Charging is the battery's own business: 2 kW into it at a zero meter is no surplus.
    h.set("battery_power", 2000.0);
    let d = h.run(secs(30));
    assert!(d.surplus.0.abs() < 1e-6 && h.command("pump") == Command::Off, "{}", d.surplus);
    // The same site with the battery as a Spillway load: its reading is that load's
    // business, not import.
    let commanded = yaml.replace(
        "loads:\n",
        "loads:\n  - name: store\n    kind: battery\n    max_charge: 3kW\n    soc: soc\n    setpoint: { device: relays, register: 1, type: i32 }\n",
    );
    let h = Harness::new(&commanded);
    assert!(h.site.self_run_battery().is_none());
    // A stop rule in `import` would never see the battery paying: check warns of it
    // (C0274), once per rule that reads it, and not for rules in `surplus`.
    let warned = |yaml: &str| {
        let loaded = load_str("test.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)));
        loaded.warnings.iter().filter(|w| w.code == "C0274").map(|w| w.message.clone()).collect::<Vec<_>>()
    };
    assert!(warned(&yaml).is_empty());
    let import_rules = with_battery_power(&site("  export: allowed", TWO_LOADS));
    let w = warned(&import_rules);
    assert_eq!(w.len(), 2, "{w:?}");
    assert!(w[0].contains("\"tank\": its stop rule reads `import`"), "{w:?}");
    assert!(warned(&site("  export: allowed", TWO_LOADS)).is_empty(), "no battery, no warning");
}

/// An inverter that limits its own export hides the surplus from the meter; where
/// Spillway cannot curtail (no `inverter:` section) and reads `pv_available`, what the
/// inverter holds back is surplus. Off-grid it is not (the float headroom stands for it).
#[test]
fn what_a_self_limiting_inverter_holds_back_is_surplus() {
    let yaml = site("  export: forbidden", TWO_LOADS)
        .replace("inverter:\n  rated: 5kW\n  limit: { device: inverter, register: 100 }\n", "")
        .replace("points:\n", "points:\n  pv_available: { device: inverter, register: 12, type: u32, unit: W }\n");
    let mut h = Harness::new(&yaml);
    assert!(h.site.inverter.is_none());
    h.set("grid", 0.0);
    h.set("pv", 1000.0);
    h.set("pv_available", 4500.0);
    let d = h.tick();
    assert!((d.surplus.0 - 3500.0).abs() < 1e-6, "{}", d.surplus);
    h.run(secs(25));
    assert_eq!(h.command("tank"), Command::On, "the tank starts on what the inverter holds back");
}

#[test]
fn a_load_with_its_own_meter_counts_its_measured_power_not_its_rating() {
    let loads = r#"
  - name: pump
    rated: 1kW
    power: pump_power
    switch: { device: relays, coil: 1 }
    start: surplus > 1.1kW for 5s
    stop: import > 300W for 10s
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", -1200.0);
    h.set("pump_power", 0.0);
    h.run(secs(10));
    assert_eq!(h.command("pump"), Command::On);
    h.set("pump_power", 650.0);
    h.set("grid", -550.0);
    let d = h.tick();
    assert!((d.surplus.0 - 1200.0).abs() < 1e-6, "650 W measured + 550 W export, got {}", d.surplus);
}

#[test]
fn a_higher_priority_load_takes_the_surplus_of_a_lower_one_once_its_min_on_time_is_over() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    // 1.5 kW export: only the pump fits.
    h.set("grid", -1500.0);
    h.run(secs(25));
    assert_eq!(h.command("pump"), Command::On);
    assert_eq!(h.command("tank"), Command::Off);
    // The sun comes out: export 2.6 kW with the pump on, surplus 3.6 kW. The tank could
    // take it only by displacing the pump, whose 5 min on-time is not over: the tank waits.
    h.set("grid", -2600.0);
    h.run(secs(60));
    assert_eq!(h.command("tank"), Command::Off, "the pump's power is reserved during its min_on");
    // After the pump's minimum on-time the tank may count the pump's power as surplus.
    h.run(secs(270));
    assert_eq!(h.command("tank"), Command::On, "{}", h.engine.explain(LoadId(0)));
    // Now both draw; the pump's surplus is gone and import shows: the pump stops.
    h.set("grid", 400.0);
    h.run(secs(15));
    assert_eq!(h.command("pump"), Command::Off, "{}", h.engine.explain(LoadId(1)));
}

// ---------------------------------------------------------------- hysteresis and anti-chatter

#[test]
fn a_start_rule_must_hold_for_its_whole_duration() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.set("grid", -1500.0);
    h.run(secs(15));
    assert_eq!(h.command("pump"), Command::Off, "15 s of 20");
    h.set("grid", -500.0);
    h.tick();
    h.set("grid", -1500.0);
    h.run(secs(15));
    assert_eq!(h.command("pump"), Command::Off, "the dip reset the timer");
    h.run(secs(6));
    assert_eq!(h.command("pump"), Command::On);
}

#[test]
fn the_minimum_on_time_keeps_a_load_on_after_its_stop_rule_fires() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.set("grid", -1500.0);
    h.run(secs(21));
    assert_eq!(h.command("pump"), Command::On);
    h.set("grid", 800.0);
    h.run(secs(60));
    assert_eq!(h.command("pump"), Command::On);
    assert!(matches!(h.reason("pump"), Reason::MinOn { .. }), "{:?}", h.reason("pump"));
    h.run(secs(250));
    assert_eq!(h.command("pump"), Command::Off);
}

#[test]
fn the_minimum_off_time_keeps_a_load_off_after_its_start_rule_fires() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.set("grid", -3500.0);
    h.run(secs(21));
    assert_eq!(h.command("tank"), Command::On);
    h.set("grid", 2500.0);
    h.run(secs(130));
    assert_eq!(h.command("tank"), Command::Off);
    h.set("grid", -3500.0);
    h.run(secs(30));
    assert!(matches!(h.reason("tank"), Reason::MinOff { .. }), "{:?}", h.reason("tank"));
    h.run(secs(40));
    assert_eq!(h.command("tank"), Command::On);
}

#[test]
fn the_starts_per_hour_cap_holds_a_load_off() {
    let loads = r#"
  - name: heater
    rated: 1kW
    switch: { device: relays, coil: 2 }
    start: surplus > 1.1kW
    stop: import > 100W
    max_starts_per_hour: 3
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    let mut starts = 0;
    for _ in 0..10 {
        h.set("grid", -1500.0);
        let d = h.tick();
        starts += d.switchings.iter().filter(|s| s.to.is_on()).count();
        h.set("grid", 500.0);
        h.tick();
    }
    assert_eq!(starts, 3);
    assert!(matches!(h.reason("heater"), Reason::StartsCapped { cap: 3 }) || h.command("heater") == Command::Off);
    // An hour later it may start again.
    h.set("grid", -1500.0);
    h.run(secs(3600));
    assert_eq!(h.command("heater"), Command::On);
}

// ---------------------------------------------------------------- kinds of load

#[test]
fn a_stepped_load_climbs_and_drops_one_stage_at_a_time_with_the_surplus() {
    let loads = r#"
  - name: heater
    kind: stepped
    stages: [1kW, 2kW, 3kW]
    switch: [{ device: relays, coil: 2 }, { device: relays, coil: 3 }, { device: relays, coil: 4 }]
    start: surplus > 1.1kW for 5s
    stop: surplus < 500W for 5s
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", -2600.0);
    h.run(secs(6));
    assert_eq!(h.command("heater"), Command::Stage(1));
    // At stage 1 the export is 1.6 kW: surplus 2.6 kW covers stage 2 (2 kW, plus the
    // 100 W band) but not 3. The climb waits for the surplus to hold for 30 s.
    h.set("grid", -1600.0);
    h.run(secs(20));
    assert_eq!(h.command("heater"), Command::Stage(1), "not held long enough yet");
    h.run(secs(15));
    assert_eq!(h.command("heater"), Command::Stage(2));
    h.set("grid", -600.0);
    h.run(secs(60));
    assert_eq!(h.command("heater"), Command::Stage(2), "stage 3 (3 kW) does not fit 2.6 kW");
    // A cloud: 300 W import at stage 2 means only 1.7 kW surplus, below 2 kW less the
    // band: drop to stage 1 after the hold, once the stage has been held its 2 minutes.
    h.set("grid", 300.0);
    h.run(secs(65));
    assert_eq!(h.command("heater"), Command::Stage(1));
}

fn proportional_site() -> String {
    site(
        "  export: forbidden\n  import_target: 40W",
        r#"
  - name: regulator
    kind: proportional
    rated: 3kW
    setpoint: { device: relays, register: 200 }
    step: 1%
"#,
    )
}

#[test]
fn a_proportional_load_holds_the_grid_at_the_import_target() {
    let mut h = Harness::new(&proportional_site());
    // A trivial plant: 1.2 kW export with the regulator off.
    let base = -1200.0;
    let mut drawn = 0.0;
    for _ in 0..60 {
        h.set("grid", base + drawn);
        h.set("pv", 3000.0);
        let d = h.tick();
        drawn = d.loads[0].command.power(&h.site.loads[0].kind).0;
        eprintln!("grid {} drawn {drawn} {:?} limit {:?}", base + drawn, d.loads[0], d.inverter_limit);
    }
    let grid = base + drawn;
    assert!((grid - 40.0).abs() <= 30.0 + 1.0, "grid {grid} W, one 1 % step (30 W) of the target");
    assert!(matches!(h.reason("regulator"), Reason::Following { .. }));
    assert_eq!(h.engine.decisions().inverter_limit, None, "the load absorbed it: no curtailment");
}

/// A proportional load with a minimum (10 % of 3 kW: 300 W) under a surplus hovering at
/// that minimum, with meter noise and a reading one tick late: it starts once the power
/// it could have reaches its minimum and pauses only below half of it, as a battery
/// does. Without the band it paused and started with the noise (probe3: 1562 switchings
/// in a June week, up to 74 starts an hour). Returns the starts in an hour and the
/// highest import seen while it ran.
fn proportional_at_its_minimum(surplus: f64) -> (usize, f64, Harness) {
    let loads = r#"
  - name: immersion
    kind: proportional
    rated: 3kW
    min: 10%
    step: 1%
    setpoint: { device: relays, register: 200 }
"#;
    let mut h = Harness::new(&site("  export: allowed\n  import_target: 50W", loads));
    let mut last_grid = -surplus;
    let mut rng: u64 = 0x9e37_79b9_7f4a_7c15;
    let (mut starts, mut was_on, mut worst_import) = (0, false, f64::MIN);
    for _ in 0..3600 {
        // xorshift: deterministic uniform noise of ±30 W on the meter.
        rng ^= rng << 13;
        rng ^= rng >> 7;
        rng ^= rng << 17;
        let noise = (rng % 61) as f64 - 30.0;
        h.set("grid", last_grid + noise);
        let d = h.tick();
        let on = d.loads[0].command.is_on();
        starts += usize::from(on && !was_on);
        was_on = on;
        let drawn = d.loads[0].command.power(&h.site.loads[0].kind).0;
        last_grid = -surplus + drawn;
        if on {
            worst_import = worst_import.max(last_grid);
        }
    }
    (starts, worst_import, h)
}

#[test]
fn a_proportional_load_starts_at_its_minimum_and_runs_on_down_to_half_of_it() {
    // The power it could have (surplus + the 50 W import target) at its minimum, 300 W.
    let (starts, worst_import, h) = proportional_at_its_minimum(250.0);
    assert!(starts <= 2, "{starts} starts in an hour at its minimum");
    assert!(worst_import <= 50.0 + 150.0 + 30.0, "imports at most half its minimum beyond the target: {worst_import}");
    assert!(
        matches!(h.reason("immersion"), Reason::Following { .. } | Reason::AtMinimum { .. }),
        "{}",
        h.reason("immersion")
    );
    // Inside the band (200 W could be had): held at its minimum, and the reason says so.
    let (starts, _, h) = proportional_at_its_minimum(150.0);
    assert!(starts <= 2, "{starts}");
    if h.command("immersion").is_on() {
        assert_eq!(h.command("immersion"), Command::Setpoint(Ratio(10.0)));
        assert!(matches!(h.reason("immersion"), Reason::AtMinimum { .. }), "{}", h.reason("immersion"));
    }
    // Below the band (100 W could be had): paused, whatever the noise.
    let (starts, _, h) = proportional_at_its_minimum(50.0);
    assert_eq!(starts, 0);
    assert_eq!(h.command("immersion"), Command::Off);
    assert!(matches!(h.reason("immersion"), Reason::BelowMinimum { .. }), "{}", h.reason("immersion"));
}

/// A charger of 1 A steps at 230 V (230 W a step) under a steady surplus between two
/// steps, the meter ±30 W of noise and a reading two ticks late. Returns how often its
/// setpoint changed after the first three minutes (its start and the ramp to its step).
fn charger_setpoint_changes(header: &str, surplus: impl Fn(usize) -> f64, ticks: usize) -> (usize, Harness) {
    let loads = r#"
  - name: car
    kind: charger
    voltage: 230V
    min_current: 6A
    max_current: 16A
    step: 1A
    setpoint: { device: relays, register: 300, scale: 0.1 }
"#;
    let mut h = Harness::new(&site(header, loads));
    h.set("pv", 5000.0);
    let mut grid = std::collections::VecDeque::from([-surplus(0); 2]);
    let mut rng: u64 = 0x2545_f491_4f6c_dd1d;
    let (mut changes, mut last) = (0, Command::Off);
    for t in 0..ticks {
        // xorshift: deterministic uniform noise of ±30 W on the meter.
        rng ^= rng << 13;
        rng ^= rng >> 7;
        rng ^= rng << 17;
        let noise = (rng % 61) as f64 - 30.0;
        h.set("grid", grid.pop_front().unwrap_or_default() + noise);
        let d = h.tick();
        let c = d.loads[0].command;
        if t >= 180 && c != last {
            changes += 1;
        }
        last = c;
        grid.push_back(-surplus(t) + c.power(&h.site.loads[0].kind).0);
    }
    (changes, h)
}

/// Steady surplus between two steps settles on one step: a setpoint write a few times
/// an hour at most, not every few seconds (7 A ↔ 8 A every 2–4 s on a site before the
/// deadband; 19 changes in this hour at 7.9 A).
#[test]
fn a_chargers_setpoint_settles_on_one_step_under_a_steady_surplus() {
    // 7.5 steps' worth, and near each edge of a step.
    for amps in [7.5, 7.9, 8.1, 7.2, 12.6] {
        let (changes, h) = charger_setpoint_changes("  export: allowed\n  import_target: 50W", |_| amps * 230.0, 3780);
        assert!(changes <= 2, "{amps} A of surplus: {changes} setpoint changes in an hour ({:?})", h.command("car"));
    }
}

/// Where export is limited, export beyond the limit is still taken at once: the
/// deadband never holds a charger a step low while the site exports past its limit.
#[test]
fn a_chargers_deadband_never_delays_taking_export_beyond_the_limit() {
    // Settled at 7 A on 7.6 A of surplus (~140 W of export), then 62 W more at t = 120 s:
    // 200 W of export at 7 A, past the limit of 150 W, while the demand (8.09 A with the
    // 50 W import target) is inside the deadband above 7 A.
    let surplus = |t: usize| if t < 120 { 7.6 * 230.0 } else { 7.6 * 230.0 + 62.0 };
    let (_, h) = charger_setpoint_changes("  export: 150W\n  import_target: 50W", surplus, 118);
    assert_eq!(h.command("car"), Command::Current(Current(7.0)));
    let (_, h) = charger_setpoint_changes("  export: 150W\n  import_target: 50W", surplus, 124);
    assert!(
        matches!(h.command("car"), Command::Current(a) if a.0 >= 8.0),
        "the reading after the rise (two ticks late) must step it up: {:?}",
        h.command("car")
    );
}

#[test]
fn a_charger_never_charges_below_its_minimum_current() {
    let loads = r#"
  - name: ev
    kind: charger
    voltage: 230V
    min_current: 6A
    max_current: 16A
    setpoint: { device: relays, register: 300, scale: 0.1 }
    start: surplus > 1.4kW for 10s
    stop: surplus < 1kW for 1min
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    let mut drawn = 0.0;
    let mut seen_below_min = false;
    for i in 0..300 {
        let export = if i < 150 { 2000.0 } else { 900.0 };
        h.set("grid", -export + drawn);
        let d = h.tick();
        if let Command::Current(a) = d.loads[0].command {
            seen_below_min |= a.0 < 6.0;
        }
        drawn = d.loads[0].command.power(&h.site.loads[0].kind).0;
    }
    assert!(!seen_below_min);
    // Under 1 kW of surplus for over a minute the stop rule ends the session.
    assert_eq!(h.command("ev"), Command::Off, "{:?}", h.reason("ev"));
}

#[test]
fn a_battery_stops_charging_at_its_upper_soc_and_resumes_below_the_resume_level() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    soc: soc
    soc_max: 95%
    soc_resume: 90%
    setpoint: { device: relays, register: 400 }
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("soc", 80.0);
    h.set("grid", -2000.0);
    h.run(secs(10));
    assert!(matches!(h.command("battery"), Command::Charge(p) if p.0 > 0.0));
    h.set("soc", 95.0);
    h.tick();
    assert_eq!(h.reason("battery"), Reason::Full);
    h.set("soc", 92.0);
    h.tick();
    assert_eq!(h.reason("battery"), Reason::Full, "hysteresis: not yet below 90 %");
    h.set("soc", 89.0);
    h.run(secs(3));
    assert!(matches!(h.command("battery"), Command::Charge(p) if p.0 > 0.0));
}

/// A battery allowed to discharge covers the house's own import in the evening, counts
/// that discharge as import for the other loads (a heater waiting for surplus stays
/// off), never pays for a load a person switched on, and stops when the meter goes
/// silent. The grid here reads the previous tick's commands (one reading late).
#[test]
fn a_battery_allowed_to_discharge_covers_the_house_and_nothing_else() {
    let loads = r#"
  - name: heater
    priority: 1
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 1kW for 20s
    stop: import > 300W for 10s
  - name: battery
    priority: 2
    kind: battery
    max_charge: 3kW
    soc: soc
    setpoint: { device: relays, register: 400, type: i32 }
    discharge: { max: 2.5kW, soc_min: 20% }
    safe_state: hold          # even so, no discharge is held once nobody steers it
"#;
    let mut h = Harness::new(&site("  export: forbidden", loads).replace("rated: 5kW", "rated: 5kW\n  safe_limit: 0W"));
    h.set("soc", 60.0);
    let house = 800.0;
    let (heater, battery) = (h.load("heater"), h.load("battery"));
    let mut grid = Vec::new();
    let step = |h: &mut Harness, seconds: usize, grid: &mut Vec<f64>| {
        for _ in 0..seconds {
            let d = h.engine.decisions().clone();
            let drawn: f64 = d.loads.iter().zip(&h.site.loads).map(|(l, site_l)| l.command.power(&site_l.kind).0).sum();
            let g = house + drawn;
            h.set("grid", g);
            grid.push(g);
            h.tick();
        }
    };
    step(&mut h, 60, &mut grid);
    let Command::Charge(p) = h.command("battery") else { panic!("{:?}", h.command("battery")) };
    assert!((p.0 + (house - 50.0)).abs() < 20.0, "covers all but the import target: {p:?}");
    assert!(matches!(h.reason("battery"), Reason::CoveringHouse { .. }));
    assert!(grid[10..].iter().all(|g| *g > 0.0), "never exports: {grid:?}");
    assert_eq!(h.command("heater"), Command::Off, "the discharge is not surplus");

    // A person switches the heater on: the battery does not pay for it.
    h.engine.set_override(LoadId(heater), Command::On, h.now.plus(secs(3600)));
    grid.clear();
    step(&mut h, 30, &mut grid);
    let last = *grid.last().unwrap();
    assert!((last - (3000.0 + 50.0)).abs() < 25.0, "the heater stays on the grid: {last}");

    // The meter goes silent: fail-safe, and the battery stops discharging.
    h.engine.set_override(LoadId(heater), Command::Off, h.now.plus(secs(1)));
    h.silence("grid");
    h.run(secs(30));
    assert_eq!(h.engine.decisions().loads[battery].command, Command::Off);
    assert_eq!(h.engine.decisions().mode, Mode::Failsafe);
}

/// On a no-export site whose inverter is held back, a full battery allowed to discharge
/// does not pay for the house: the PV held back can. Before, it displaced the PV: the
/// guard cut the inverter by what the battery gave, the meter still read the import
/// target, and each reading of noise above it raised the discharge, until the battery
/// was emptying at noon under an array curtailed to a few hundred watts (found by an
/// installer's walk-through against the simulator). The meter here reads the flows of
/// two ticks before, with noise.
#[test]
fn a_battery_does_not_pay_for_the_house_while_the_pv_is_held_back() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    soc: soc
    soc_max: 95%
    setpoint: { device: relays, register: 400, type: i32 }
    discharge: { max: 5kW, soc_min: 15% }
"#;
    let yaml = site("  export: forbidden", loads)
        .replace("rated: 5kW", "rated: 5kW\n  safe_limit: 0W")
        .replace("type: i32, unit: W }", "type: i32, unit: W, latency: 2s }");
    let mut h = Harness::new(&yaml);
    h.set("soc", 96.0);
    let battery = h.load("battery");
    let (house, available) = (800.0, 4000.0);
    let (mut discharges, mut pvs) = (Vec::new(), Vec::new());
    // The meter reads two ticks late.
    let mut flows = std::collections::VecDeque::from([house, house]);
    for k in 0..900 {
        let d = h.engine.decisions().clone();
        let pv = d.inverter_limit.map_or(available, |l| l.0.clamp(0.0, available));
        let battery_w = d.loads[battery].command.power(&h.site.loads[battery].kind).0;
        let noise = if k % 3 == 0 { 30.0 } else { -10.0 };
        flows.push_back(house + battery_w - pv + noise);
        h.set("grid", flows.pop_front().unwrap());
        h.set("pv", pv);
        h.tick();
        discharges.push((-battery_w).max(0.0));
        pvs.push(pv);
    }
    let late = &discharges[300..];
    assert!(late.iter().all(|w| *w < 1.0), "the battery discharged under a curtailed array: {:?}", &late[..20]);
    assert!(pvs[300..].iter().all(|p| *p > house - 100.0), "the PV covers the house: {:?}", &pvs[300..320]);
}

/// A decision that keeps the last command (here the minimum off-time after charging
/// stopped) never keeps a discharge once the cover ends: at its floor the battery is
/// told 0 W, not the last discharge again.
#[test]
fn a_kept_command_does_not_keep_a_discharge_at_the_floor() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    soc: soc
    setpoint: { device: relays, register: 400, type: i32 }
    discharge: { max: 2kW, soc_min: 20% }
    min_off: 5min
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("soc", 50.0);
    h.set("grid", -1000.0);
    h.run(secs(20));
    assert!(h.command("battery").is_on(), "charging: {:?}", h.command("battery"));
    // The sun goes: charging stops, and while the minimum off-time holds, the battery
    // covers the house.
    h.set("grid", 700.0);
    h.run(secs(10));
    assert!(matches!(h.reason("battery"), Reason::CoveringHouse { .. }), "{:?}", h.reason("battery"));
    h.set("soc", 19.0);
    h.tick();
    assert_eq!(h.command("battery").power(&h.site.loads[0].kind), Power::ZERO, "{:?}", h.reason("battery"));
}

/// The `discharge:` keys: a floor that would meet the charging's resume level is
/// refused, an unknown key is named, and the setpoint written is never a deeper
/// discharge than `max` (nor any discharge for a battery without the key).
#[test]
fn a_batterys_discharge_keys_are_checked_and_its_setpoint_bounded() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    soc: soc
    soc_max: 95%
    setpoint: { device: relays, register: 400, type: i32 }
    discharge: { max: 2kW, soc_min: 20%, window: "16:00..07:00" }
"#;
    let h = Harness::new(&site("  export: allowed", loads));
    let described = crate::config::describe::describe(&h.site);
    assert!(
        described.contains("discharges up to 2 kW to cover the house's own import in 16:00..07:00, down to 20 %"),
        "{described}"
    );
    let levels = |site: &Site, p: f64| match crate::actuators::load_levels(&site.loads[0], Command::Charge(Power(p)))[..]
    {
        [(_, crate::actuators::Level::Value(v))] => v,
        ref other => panic!("{other:?}"),
    };
    assert_eq!(levels(&h.site, -5000.0), -2000.0);
    assert_eq!(levels(&h.site, -800.0), -800.0);
    let without = Harness::new(&site(
        "  export: allowed",
        &loads.replace("    discharge: { max: 2kW, soc_min: 20%, window: \"16:00..07:00\" }\n", ""),
    ));
    assert_eq!(levels(&without.site, -800.0), 0.0, "no discharge without the key");

    let high = site("  export: allowed", &loads.replace("soc_min: 20%", "soc_min: 91%"));
    let Err(e) = load_str("test.yaml", &high) else { panic!("a floor at the resume level is refused") };
    assert!(e.render(false).contains("[C0273]"), "{}", e.render(false));
    let island = format!(
        "site:\n  name: Cabin\n  timezone: America/Denver\n  grid: off\n  off_grid: {{ float_voltage: 54.4V }}\n{DEVICES}\n  battery_voltage: {{ device: meter, register: 50, scale: 0.01, unit: V }}\n  battery_current: {{ device: meter, register: 51, type: i16, scale: 0.1, unit: A }}\nloads:\n{loads}"
    );
    let loaded = load_str(
        "test.yaml",
        &island.replace("inverter:\n  rated: 5kW\n  limit: { device: inverter, register: 100 }\n", ""),
    )
    .unwrap_or_else(|e| panic!("{}", e.render(false)));
    assert!(
        loaded.warnings.iter().any(|w| w.code == "C0275"),
        "off-grid, `discharge` does nothing: {:?}",
        loaded.warnings
    );
    let unsigned = site("  export: allowed", &loads.replace("register: 400, type: i32", "register: 400"));
    let Err(e) = load_str("test.yaml", &unsigned) else { panic!("an unsigned setpoint cannot discharge") };
    assert!(e.render(false).contains("[C0276]") && e.render(false).contains("not u16"), "{}", e.render(false));
    let typo = site("  export: allowed", &loads.replace("soc_min: 20%", "soc_low: 20%"));
    let Err(e) = load_str("test.yaml", &typo) else { panic!("an unknown key is refused") };
    assert!(e.render(false).contains("unknown key \"soc_low\""), "{}", e.render(false));
}

/// Around zero surplus the PI's share follows the meter's noise; a battery that charged
/// at any share of 1 W or more toggled on and off every few seconds at dawn and dusk
/// (42 starts in an hour on the battery/EV example). It now starts at `min_charge`
/// (50 W by default) and goes on down to half of it.
#[test]
fn a_battery_starts_at_its_minimum_charge_and_goes_on_down_to_half_of_it() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    soc: soc
    setpoint: { device: relays, register: 400 }
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("soc", 50.0);
    // Noise around zero: ±30 W of export and import, a minute of it.
    let mut starts = 0;
    let mut was_on = false;
    for t in 0..60 {
        h.set("grid", if t % 2 == 0 { -30.0 } else { 25.0 });
        let on = h.tick().loads[0].command.is_on();
        starts += usize::from(on && !was_on);
        was_on = on;
    }
    assert_eq!(starts, 0, "the battery toggled on noise");
    assert!(matches!(h.reason("battery"), Reason::BelowMinimum { .. } | Reason::Following { .. }));
    // Real surplus: it starts.
    h.set("grid", -400.0);
    h.run(secs(10));
    assert!(matches!(h.command("battery"), Command::Charge(p) if p.0 >= 50.0), "{:?}", h.command("battery"));
    // The default shows in `check`'s model, and the key sets it.
    assert!(matches!(h.site.loads[0].kind, LoadKind::Battery { min_charge, .. } if min_charge == Power(50.0)));
    let h2 = Harness::new(&site(
        "  export: allowed",
        &loads.replace("max_charge: 3kW", "max_charge: 3kW\n    min_charge: 200W"),
    ));
    assert!(matches!(h2.site.loads[0].kind, LoadKind::Battery { min_charge, .. } if min_charge == Power(200.0)));
    let wide = site("  export: allowed", &loads.replace("max_charge: 3kW", "max_charge: 3kW\n    min_charge: 4kW"));
    let Err(e) = load_str("test.yaml", &wide) else { panic!("a minimum above max_charge is refused") };
    assert!(e.render(false).contains("[C0271]"), "{}", e.render(false));
}

// ---------------------------------------------------------------- export guard

#[test]
fn the_export_guard_curtails_within_one_tick_when_no_load_can_absorb() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", 100.0);
    h.run(secs(5));
    assert_eq!(h.engine.decisions().inverter_limit, None);
    // A cloud clears: 1.5 kW export appears on the next measurement.
    h.set("grid", -1500.0);
    let d = h.tick();
    let limit = d.inverter_limit.expect("curtailed in the same tick");
    assert!((limit.0 - (4000.0 - 1540.0)).abs() < 1.0, "cuts the whole excess at once: {limit}");
    assert_eq!(d.limit_reason, LimitReason::ExportGuard);
}

#[test]
fn curtailment_is_released_gradually_once_import_returns() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -1500.0);
    let first = h.tick().inverter_limit.unwrap();
    // The inverter obeyed: PV at the limit, grid at the target, then the load rises.
    h.set("pv", first.0);
    h.set("grid", 600.0);
    let d = h.tick();
    let second = d.inverter_limit.unwrap();
    assert!(second.0 > first.0 && second.0 - first.0 <= 200.0 + 1e-9, "{first} → {second}: at most the release rate");
}

/// A charger held on (here by its duty) with no car to charge draws nothing, and its own
/// meter says so. The guard once counted its command as power about to be drawn, raised
/// the inverter's limit by 3.7 kW, and exported that for as long as the command stood.
#[test]
fn a_load_commanded_on_that_draws_nothing_does_not_open_the_inverter_into_export() {
    let loads = r#"
  - name: car
    kind: charger
    min_current: 6A
    max_current: 16A
    power: pump_power
    setpoint: { device: relays, register: 0, scale: 0.1 }
    obligations:
      - { run: 3h, grid_window: "11:00..14:00" }
"#;
    let mut h = Harness::new(&site(
        "  export: forbidden
  import_target: 40W",
        loads,
    ))
    .at_local(11, 0);
    let (house, available) = (500.0, 4000.0);
    h.set("pump_power", 0.0); // the car is away
    let mut limit: Option<f64> = None;
    let mut over = 0;
    for second in 0..300 {
        let pv = limit.map_or(available, |l| l.min(available));
        let grid = house - pv;
        h.set("pv", pv);
        h.set("grid", grid);
        let d = h.tick();
        assert!(second < 2 || matches!(d.loads[0].reason, Reason::Obligation { .. }), "{:?}", d.loads[0]);
        limit = d.inverter_limit.map(|p| p.0);
        if grid < -100.0 {
            over += 1;
        }
    }
    assert!(over <= 8, "{over} s of export above 100 W (the limit ended at {limit:?})");
}

/// A slow release with the widest tolerance: each second's step is smaller than half
/// the tolerance, which once kept every release from being written, so the limit never
/// climbed back and the array stayed curtailed all day.
#[test]
fn a_slow_release_is_not_swallowed_by_a_wide_tolerance() {
    let header = "  export: forbidden\n  import_target: 40W\n  guard: { tolerance: 250W, release_rate: 20W }";
    let mut h = Harness::new(&site(header, TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -1500.0);
    let first = h.tick().inverter_limit.unwrap();
    // The inverter obeys; the house now imports well above the target.
    h.set("pv", first.0);
    h.set("grid", 1500.0);
    let mut limit = first;
    for _ in 0..30 {
        let d = h.tick();
        limit = d.inverter_limit.unwrap_or(Power(4000.0));
        h.set("pv", limit.0);
    }
    assert!(limit.0 >= first.0 + 300.0, "30 s at 20 W/s gives back about 600 W: {first} → {limit}");
}

/// The live set-up that once made the guard oscillate: ticks every second, the PV
/// polled half a second before each tick, and a meter whose reading describes the site
/// 1.5 s before it arrives. A limit raise shows in the next PV sample and, already, in
/// the next fresh grid reading; the guard must not count it twice (cutting back what it
/// just gave) but settle at the import target with the limit still.
#[test]
fn a_limit_raise_seen_by_a_late_meter_is_not_corrected_twice() {
    let yaml = site("  export: forbidden\n  import_target: 100W", TWO_LOADS)
        .replace("type: i32, unit: W }", "type: i32, unit: W, latency: 1500ms }");
    let mut h = Harness::new(&yaml);
    let grid_p = h.point("grid");
    let pv_p = h.point("pv");
    let tank = h.load("tank");
    // The plant on a 0.5 s grid: 5.2 kW of sun, a 300 W house, the tank's 3 kW element
    // on (forced via the decisions below), an inverter that follows its limit at once.
    let potential: f64 = 5200.0;
    let house = 300.0;
    let mut limit: Option<f64> = None;
    let mut drawn = 0.0;
    let mut grid_history: Vec<f64> = Vec::new(); // one entry per 0.5 s
    let mut limits = Vec::new();
    let mut grids = Vec::new();
    for tick in 0..240 {
        // Two half-second plant steps per tick.
        for _ in 0..2 {
            let pv = limit.map_or(potential, |l: f64| potential.min(l));
            grid_history.push(house + drawn - pv);
        }
        let now = h.now.plus(h.site.tick);
        let half = Duration::from_millis(500);
        // PV polled 0.5 s before the tick; the meter's answer at the same moment
        // describes the site 1.5 s earlier (three half-steps back).
        let n = grid_history.len();
        let pv_then = limit.map_or(potential, |l: f64| potential.min(l));
        h.snapshot.set(pv_p, pv_then, now.minus(half));
        h.snapshot.set(grid_p, grid_history[n.saturating_sub(4)], now.minus(half));
        let d = h.tick();
        limit = d.inverter_limit.map(|p| p.0);
        drawn = d.loads.iter().zip(&h.site.loads).map(|(l, sl)| l.command.power(&sl.kind).0).sum();
        if tick >= 180 {
            limits.push(limit);
            grids.push(*grid_history.last().unwrap());
        }
    }
    assert!(h.engine.decisions().loads[tank].command.is_on(), "the tank took the surplus");
    let changes = limits.windows(2).filter(|w| w[0] != w[1]).count();
    assert!(changes <= 1, "the limit settles, it does not swing: {limits:?}");
    for g in &grids {
        assert!((-50.0..=400.0).contains(g), "grid held near the 100 W import target: {grids:?}");
    }
}

/// The live set-up in which a return from the fail-safe once exported: an inverter that
/// ramps up to a raised limit at 10 % of its rating per second (so a big release takes
/// more than one PV poll), a meter averaging 1 s and answering 0.5 s late, and the first
/// answer after its silence the frozen reading from before it. The guard gave back the
/// house's consumption in one step, then read a grid reading taken during the ramp as
/// import still to be covered and raised again: 0.1–0.3 kW of export for a few seconds.
/// A raise now waits for the PV to stop rising and for a reading measured after that.
#[test]
fn a_release_during_the_inverters_ramp_is_not_counted_twice() {
    let loads = "  - name: tank\n    rated: 3kW\n    switch: { device: relays, coil: 0 }\n    start: surplus > 50kW\n";
    let yaml = site("  export: forbidden\n  import_target: 100W", loads)
        .replace("type: i32, unit: W }", "type: i32, unit: W, latency: 1500ms }");
    let mut h = Harness::new(&yaml);
    let (grid_p, pv_p) = (h.point("grid"), h.point("pv"));
    let (potential, house, ramp_per_half_s) = (5000.0_f64, 770.0, 250.0);
    let mut limit: Option<f64> = None;
    // The limit the inverter obeys: the decision of the tick before (the write goes out
    // on the inverter link's next cycle).
    let mut written: Option<f64> = None;
    let mut out = potential;
    let mut grid_history: Vec<f64> = Vec::new(); // one entry per 0.5 s
    let mut frozen = None;
    let mut worst_export: f64 = 0.0;
    for tick in 0..120 {
        for _ in 0..2 {
            let target = written.map_or(potential, |l| potential.min(l));
            out = if target < out { target } else { (out + ramp_per_half_s).min(target) };
            let grid = house - out;
            grid_history.push(grid);
            if tick >= 40 {
                worst_export = worst_export.max(-grid);
            }
        }
        let now = h.now.plus(h.site.tick);
        let half = Duration::from_millis(500);
        let n = grid_history.len();
        h.snapshot.set(pv_p, out, now.minus(half));
        // The meter's latency (1 s average, 0.5 s delay) is configured, but the poll
        // adds up to a second more that nobody can see: the reading answered now
        // describes the second that ended a whole second ago.
        let reading = (grid_history[n.saturating_sub(4)] + grid_history[n.saturating_sub(3)]) / 2.0;
        match tick {
            // Silent for 15 s: the last reading is kept to be served again on return.
            20..35 => {
                frozen.get_or_insert(reading);
            }
            35 => h.snapshot.set(grid_p, frozen.unwrap(), now.minus(half)),
            _ => h.snapshot.set(grid_p, reading, now.minus(half)),
        }
        let d = h.tick();
        if tick == 30 {
            assert_eq!(d.mode, Mode::Failsafe);
            assert_eq!(d.inverter_limit, Some(Power::ZERO), "the safe limit");
        }
        written = limit;
        limit = d.inverter_limit.map(|p| p.0);
    }
    let grid_now = *grid_history.last().unwrap();
    eprintln!("after the return: worst export {worst_export:.0} W, grid now {grid_now:.0} W, limit {limit:?}");
    assert!(worst_export <= 10.0, "no export on the way back from the fail-safe: {worst_export:.0} W");
    assert!((0.0..=250.0).contains(&grid_now), "the house's consumption is given back: grid {grid_now:.0} W");
}

/// Closed loop for the carry-forward with a slow meter: PV polled every second, a grid
/// reading that describes the site `latency_s` before it arrives, a 3 kW house and the
/// sun coming out from behind a cloud edge (the array's potential ramps 1 → 5 kW at
/// 100 W/s, then stays): export starts 20 s into the ramp. Returns the export energy in
/// Wh over the ramp and after.
fn export_wh_on_a_ramp_with_a_late_meter(latency_s: usize) -> f64 {
    let yaml = site("  export: forbidden\n  import_target: 100W", TWO_LOADS).replace(
        "grid:      { device: meter, register: 0, type: i32, unit: W }",
        &format!(
            "grid:      {{ device: meter, register: 0, type: i32, unit: W, latency: {latency_s}s, stale_after: 30s }}"
        ),
    );
    let mut h = Harness::new(&yaml);
    let (grid_p, pv_p) = (h.point("grid"), h.point("pv"));
    let house = 3000.0;
    let mut limit: Option<f64> = None;
    let mut grid_history: Vec<f64> = Vec::new(); // one entry per second
    let mut export_wh = 0.0;
    for tick in 0..180usize {
        let potential = (1000.0 + 100.0 * (tick as f64 - 30.0).max(0.0)).min(5000.0);
        let pv = limit.map_or(potential, |l| potential.min(l));
        let grid = house - pv;
        grid_history.push(grid);
        export_wh += (-grid).max(0.0) / 3600.0;
        let now = h.now.plus(h.site.tick);
        h.snapshot.set(pv_p, pv, now);
        // The reading arriving now describes the site `latency_s` seconds ago.
        h.snapshot.set(grid_p, grid_history[tick.saturating_sub(latency_s)], now);
        limit = h.tick().inverter_limit.map(|p| p.0);
    }
    export_wh
}

/// The guard carries a late grid reading forward by the PV change since the reading was
/// measured, so the PV history must reach back to the reading however late the meter is
/// (within its stale timeout). With a 10 s window a 15 s meter lost the first 5 s of
/// every ramp and the site exported that share until the meter caught up.
#[test]
fn the_carry_forward_reaches_back_to_a_meter_later_than_ten_seconds() {
    let prompt = export_wh_on_a_ramp_with_a_late_meter(2);
    let late = export_wh_on_a_ramp_with_a_late_meter(15);
    let later = export_wh_on_a_ramp_with_a_late_meter(25);
    eprintln!("export over the ramp: {prompt:.3} Wh (2 s meter), {late:.3} Wh (15 s), {later:.3} Wh (25 s)");
    for (what, wh) in [("2 s", prompt), ("15 s", late), ("25 s", later)] {
        assert!(wh < 1.0, "a {what} meter: {wh:.3} Wh exported over a ramp the guard could see coming");
    }
}

/// Every tick the site file allows (up to 60 s) runs: the release window was clamped to
/// `[tick, 5 s]`, which panics once the tick is longer than 5 s.
#[test]
fn a_tick_longer_than_the_release_window_does_not_panic() {
    for tick in ["6s", "10s", "60s"] {
        let mut h =
            Harness::new(&site(&format!("  export: forbidden\n  import_target: 40W\n  tick: {tick}"), TWO_LOADS));
        h.set("pv", 4000.0);
        h.set("grid", -1500.0);
        let cut = h.tick().inverter_limit.expect("curtailed");
        h.set("pv", cut.0);
        h.set("grid", 400.0);
        let released = h.run(secs(180)).inverter_limit;
        assert!(released.is_none_or(|l| l > cut), "tick {tick}: the limit is given back ({cut} → {released:?})");
    }
}

/// With no sun the limit has nothing to hold back: it must not follow the house load
/// down and up, rewriting the inverter at every wobble all night.
#[test]
fn a_curtailment_does_not_chase_the_house_load_through_the_night() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -1500.0);
    let mut limit = h.tick().inverter_limit.expect("curtailed");
    // Night: no PV, a house wobbling between 200 and 400 W (a fridge, standby loads).
    h.set("pv", 0.0);
    let mut changes = 0;
    for t in 0..600 {
        h.set("grid", if (t / 7) % 2 == 0 { 200.0 } else { 400.0 });
        let next = h.tick().inverter_limit;
        let Some(next) = next else { break };
        assert!(next >= limit, "a release never lowers the limit: {limit} → {next} at t={t}");
        if next != limit {
            changes += 1;
        }
        limit = next;
    }
    assert!(changes <= 2, "{changes} limit writes over ten minutes of night");
}

#[test]
fn the_guard_escalates_to_the_safe_limit_when_export_outlasts_its_deadline() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    // An inverter that ignores its limit: export stays.
    h.set("pv", 4000.0);
    h.set("grid", -1500.0);
    h.tick();
    h.run(secs(2));
    let d = h.tick();
    assert_eq!(d.limit_reason, LimitReason::Escalated);
    assert_eq!(d.inverter_limit, Some(Power(0.0)));
}

/// Where the safe limit is the export limit (a limited site's usual choice) and the
/// guard already holds the inverter below it, export that outlasts the deadline (an
/// inverter slow to follow) never raises the limit to the safe one: escalation cuts,
/// it does not give back (it did: "escalated" from 897 W to 1.5 kW during export).
#[test]
fn escalation_never_raises_a_limit_already_below_the_safe_limit() {
    let loads = "  - name: tank\n    rated: 3kW\n    switch: { device: relays, coil: 0 }\n    start: surplus > 50kW\n";
    let yaml = site("  export: 1.5kW", loads).replace("rated: 5kW", "rated: 5kW\n  safe_limit: 1.5kW");
    let mut h = Harness::new(&yaml);
    // More export than the PV gives (a battery discharging into it, say).
    h.set("pv", 2500.0);
    h.set("grid", -3500.0);
    let d = h.tick();
    let first = d.inverter_limit.expect("the guard cuts").0;
    assert!(first < 1500.0, "cut below the safe limit: {first}");
    // The inverter does not follow: export stays past the deadline.
    let mut seen = Vec::new();
    for _ in 0..20 {
        let d = h.tick();
        seen.push((d.inverter_limit.map(|l| l.0), d.limit_reason));
    }
    assert!(seen.iter().all(|(l, _)| l.is_some_and(|l| l <= first)), "the limit rose: {seen:?}");
}

/// A closed loop for a site whose export is limited to 1.5 kW: an array that could give
/// 4 kW, a house at `house(tick)`, and a meter whose reading describes the site 1 s
/// before it arrives with ±30 W of noise on it (a fixed pseudo-random sequence), its
/// point declaring `latency`. The inverter obeys a limit at once; no load ever starts.
/// Returns the true export, the limit and its reason at every tick.
fn limited_export_loop(
    header: &str,
    latency: &str,
    ticks: usize,
    house: impl Fn(usize) -> f64,
) -> Vec<(f64, Option<f64>, LimitReason)> {
    let loads = "  - name: tank\n    rated: 3kW\n    switch: { device: relays, coil: 0 }\n    start: surplus > 50kW\n";
    let yaml =
        site(header, loads).replace("type: i32, unit: W }", &format!("type: i32, unit: W, latency: {latency} }}"));
    let mut h = Harness::new(&yaml);
    let (grid_p, pv_p) = (h.point("grid"), h.point("pv"));
    let potential = 4000.0_f64;
    let mut limit: Option<f64> = None;
    let mut grid_history: Vec<f64> = Vec::new();
    let mut noise_state: u32 = 12345;
    let mut out = Vec::new();
    for tick in 0..ticks {
        let pv = limit.map_or(potential, |l| potential.min(l));
        let grid = house(tick) - pv;
        grid_history.push(grid);
        // A linear congruential generator (Numerical Recipes' constants): uniform noise.
        noise_state = noise_state.wrapping_mul(1_664_525).wrapping_add(1_013_904_223);
        let noise = f64::from(noise_state >> 8) / f64::from(1u32 << 24) * 60.0 - 30.0;
        let now = h.now.plus(h.site.tick);
        h.snapshot.set(pv_p, pv, now);
        h.snapshot.set(grid_p, grid_history[tick.saturating_sub(1)] + noise, now);
        let d = h.tick();
        limit = d.inverter_limit.map(|p| p.0);
        out.push((-grid, limit, d.limit_reason));
    }
    out
}

/// A limited site is held its margin (50 W by default) under the limit. Held within the
/// tolerance of it (10 W), as it once was, a meter's noise alone read as export past the
/// limit: the guard cut and escalated to the safe limit over and over, and the export
/// itself crossed the limit plus the tolerance for seconds at a time.
#[test]
fn a_limited_site_is_held_its_margin_under_the_limit_clear_of_meter_noise() {
    let run = limited_export_loop("  export: 1.5kW", "1s", 900, |_| 500.0);
    let settled = &run[10..];
    let escalations = settled.iter().filter(|(_, _, r)| *r == LimitReason::Escalated).count();
    assert_eq!(escalations, 0, "noise alone escalated the guard");
    let worst = settled.iter().map(|(e, _, _)| *e).fold(f64::MIN, f64::max);
    assert!(worst <= 1510.0, "export reached {worst:.0} W, past the limit plus the tolerance");
    let mean = settled.iter().map(|(e, _, _)| *e).sum::<f64>() / settled.len() as f64;
    assert!((1400.0..=1480.0).contains(&mean), "held about 50 W under the limit: mean export {mean:.0} W");
}

/// `guard.margin` moves the hold point; the limit itself still triggers the first cut.
#[test]
fn the_guard_margin_moves_where_a_limited_site_is_held() {
    let run = limited_export_loop("  export: 1.5kW\n  guard: { margin: 300W }", "1s", 300, |_| 500.0);
    let settled = &run[10..];
    let mean = settled.iter().map(|(e, _, _)| *e).sum::<f64>() / settled.len() as f64;
    assert!((1150.0..=1230.0).contains(&mean), "held about 300 W under the limit: mean export {mean:.0} W");
    // Under the limit the guard leaves the inverter alone.
    let free = limited_export_loop("  export: 1.5kW", "1s", 60, |_| 3000.0);
    assert!(free.iter().all(|(_, l, _)| l.is_none()), "1 kW of export under a 1.5 kW limit is not curtailed");
}

/// A house load of 1.8 kW ends while the guard holds a limited site: the export it
/// leaves must be cut on the first reading that shows it, whatever the guard did the
/// tick before. A small trim of the limit (noise) used to make that reading look too
/// old to act on (it was measured before the trim), so the export stood until the
/// deadline and the guard escalated to the safe limit: on the battery/EV example, most
/// of its escalations. Run with the load ending at 60 different moments.
#[test]
fn export_left_by_a_load_ending_is_cut_at_once_even_after_a_trim() {
    for drop_at in 200..260 {
        let run =
            limited_export_loop("  export: 1.5kW", "1s", drop_at + 30, |t| if t < drop_at { 2300.0 } else { 500.0 });
        let escalated = run.iter().position(|(_, _, r)| *r == LimitReason::Escalated);
        assert_eq!(escalated, None, "load ends at {drop_at}: escalated at {escalated:?}");
        // The export shows at the meter one tick later; the cut acts the tick after.
        let after = &run[drop_at + 2..];
        let worst = after.iter().map(|(e, _, _)| *e).fold(f64::MIN, f64::max);
        assert!(worst <= 1510.0, "load ends at {drop_at}: export still {worst:.0} W two ticks on");
    }
}

/// A reading older than a raise is not credited: its carry-forward counts the PV's rise
/// to the raised limit as export, and a meter that answers sooner than its declared
/// `latency` (here 2 s declared, 1 s true) already shows the raise. Credited like a cut,
/// such a reading made the guard cut each release straight back: on the battery/EV
/// example, 2 % of a month's PV. A house that draws 500 W more for 5 s in every 10 s
/// makes the guard release and cut all along (the carry-forward of a reading from
/// just before a release cuts some of it back already, which this leaves alone); the
/// credit must not add to that.
#[test]
fn a_release_is_not_cut_back_by_a_reading_from_before_it() {
    let run = limited_export_loop("  export: 1.5kW", "2s", 600, |t| if t % 10 < 5 { 1000.0 } else { 500.0 });
    let pv: f64 =
        run[20..].iter().map(|(_, l, _)| l.unwrap_or(4000.0).min(4000.0)).sum::<f64>() / (run.len() - 20) as f64;
    let cuts = run[20..].windows(2).filter(|w| w[1].1.unwrap_or(4000.0) < w[0].1.unwrap_or(4000.0) - 100.0).count();
    // Measured: 2,060 W and 60 cuts; 2,056 W and 59 before the credit existed; 2,007 W
    // and 76 with raises credited like cuts.
    assert!(pv >= 2040.0 && cuts <= 65, "releases cut back: mean PV {pv:.0} W, {cuts} cuts of over 100 W");
}

// ---------------------------------------------------------------- fail-safe

/// Source: ENA Engineering Recommendation G100, Issue 1 (2018), export limitation
/// schemes: export must be brought under the limit within 5 s, and within 5 s of any
/// part of the scheme failing (Issue 2 allows typically 15 s, at most 60 s). Our
/// defaults must fit the strictest of these.
#[test]
fn default_stale_timeout_and_guard_deadline_fit_inside_g100_issue_1_five_seconds() {
    let h = Harness::new(&site("  export: forbidden", TWO_LOADS));
    let f = &h.site.failsafe;
    let grid = &h.site.points[h.point("grid").0];
    assert!(
        grid.stale_after + h.site.guard.deadline <= secs(5),
        "{:?} + {:?}",
        grid.stale_after,
        h.site.guard.deadline
    );
    assert_eq!(f.stale_after, crate::config::load::DEFAULT_STALE_AFTER);
}

#[test]
fn stale_grid_signal_sends_loads_to_safe_states_and_curtails_within_the_timeout() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -3500.0);
    h.run(secs(25));
    assert_eq!(h.command("tank"), Command::On);
    h.silence("grid");
    let stale_after = h.site.points[h.point("grid").0].stale_after;
    let mut t = Duration::ZERO;
    let mut safe_at = None;
    while t < secs(10) {
        let d = h.tick();
        t += h.site.tick;
        if d.mode == Mode::Failsafe && safe_at.is_none() {
            assert!(d.loads.iter().all(|l| l.command == Command::Off));
            assert_eq!(d.inverter_limit, Some(Power(0.0)));
            safe_at = Some(t);
        }
    }
    let safe_at = safe_at.expect("reached fail-safe");
    assert!(safe_at <= stale_after + h.site.tick, "fail-safe after {safe_at:?}, timeout {stale_after:?}");
}

#[test]
fn a_grid_reading_that_repeats_exactly_past_frozen_after_puts_the_site_in_fail_safe() {
    let yaml = site("  export: forbidden\n  import_target: 40W", TWO_LOADS).replace(
        "grid:      { device: meter, register: 0, type: i32, unit: W }",
        "grid:      { device: meter, register: 0, type: i32, unit: W, frozen_after: 30s }",
    );
    let mut h = Harness::new(&yaml);
    h.set("pv", 4000.0);
    // A live meter: the last digit moves every reading.
    for i in 0..40 {
        h.set("grid", -3500.0 - f64::from(i % 3));
        h.tick();
    }
    assert_eq!(h.engine.decisions().mode, Mode::Normal);
    assert_eq!(h.command("tank"), Command::On);
    // The gateway keeps answering on time with the last reading of a meter that hung.
    h.set("grid", -500.0);
    let mut failsafe_after = None;
    for t in 1..=40 {
        let d = h.tick();
        if d.mode == Mode::Failsafe {
            failsafe_after = Some(t);
            break;
        }
    }
    // 30 s of the same reading, then the next one proves it hung.
    assert_eq!(failsafe_after, Some(31), "fail-safe once the reading has repeated for over 30 s");
    let d = h.engine.decisions().clone();
    assert!(d.loads.iter().all(|l| l.command == Command::Off && l.reason == Reason::Failsafe));
    assert_eq!(d.inverter_limit, Some(Power(0.0)));
    let why = h.engine.explain(LoadId(0));
    assert!(why.contains("\"grid\" is frozen (the same reading for over 30 s)"), "{why}");
    assert_eq!(h.engine.lost_guard_signals(), vec![why.trim_start_matches("safe state: ").to_owned()]);
    // The meter comes back to life: the fail-safe ends.
    for i in 0..5 {
        h.set("grid", -500.0 - f64::from(i));
        h.tick();
    }
    assert_ne!(h.engine.decisions().mode, Mode::Failsafe);
}

#[test]
fn a_constant_reading_without_frozen_after_stays_fresh() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -3500.0);
    h.run(secs(600));
    assert_eq!(h.engine.decisions().mode, Mode::Normal);
}

#[test]
fn fresh_data_returning_causes_at_most_one_switching_per_load_in_the_next_minute() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -3500.0);
    h.run(secs(60));
    h.silence("grid");
    h.run(secs(10));
    assert_eq!(h.engine.decisions().mode, Mode::Failsafe);
    // Signals return with a noisy surplus hovering around both thresholds.
    let mut counts = vec![0; h.site.loads.len()];
    for i in 0..60 {
        h.set("grid", if i % 2 == 0 { -4500.0 } else { 500.0 });
        for s in h.tick().switchings {
            counts[s.load.0] += 1;
        }
    }
    assert!(counts.iter().all(|&c| c <= 1), "{counts:?}");
}

/// A restart does not reset a contactor's protection: the starts of the last hour count
/// against `max_starts_per_hour` after it, and `min_off` runs from the restart for a
/// load that was on (the stop or the start switched it off). A walk-through started a
/// pump for the seventh time in an hour, capped at six, by restarting the daemon.
#[test]
fn a_restart_keeps_the_starts_of_the_last_hour_and_the_minimum_off_time() {
    let loads = r#"
  - name: pump
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.1kW for 5s
    stop: import > 300W for 5s
    min_off: 2min
    max_starts_per_hour: 2
"#;
    let yaml = site("  export: allowed", loads);
    let mut h = Harness::new(&yaml);
    for _ in 0..2 {
        h.set("grid", -1500.0);
        h.run(secs(10));
        assert_eq!(h.command("pump"), Command::On);
        h.set("grid", 800.0);
        h.run(secs(10));
        assert_eq!(h.command("pump"), Command::Off);
        h.run(secs(150));
    }
    // On when saved: the third start of the hour, allowed after the second's min_off.
    h.set("grid", -1500.0);
    h.run(secs(10));
    assert_eq!(h.command("pump"), Command::Off, "capped at two an hour");
    let saved = h.engine.persisted();
    assert_eq!(saved.loads[0].starts_ms.len(), 2);

    let mut after = Harness::new(&yaml);
    after.now = h.now.plus(secs(5));
    after.engine.restore(&saved, after.now);
    after.set("grid", -1500.0);
    after.run(secs(60));
    assert_eq!(after.command("pump"), Command::Off, "still capped after the restart");
    assert!(matches!(after.reason("pump"), Reason::StartsCapped { .. }), "{:?}", after.reason("pump"));

    // A load that was on when saved waits its min_off from the restart.
    let mut on = Harness::new(&yaml);
    on.set("grid", -1500.0);
    on.run(secs(10));
    assert_eq!(on.command("pump"), Command::On);
    let saved = on.engine.persisted();
    assert!(saved.loads[0].on);
    let mut restarted = Harness::new(&yaml);
    restarted.now = on.now.plus(secs(5));
    restarted.engine.restore(&saved, restarted.now);
    restarted.set("grid", -1500.0);
    restarted.run(secs(90));
    assert_eq!(restarted.command("pump"), Command::Off, "min_off from the restart");
    restarted.run(secs(60));
    assert_eq!(restarted.command("pump"), Command::On, "after it");
}

#[test]
fn safe_decisions_put_every_load_in_its_safe_state_and_the_inverter_at_its_safe_limit() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -4500.0);
    h.run(secs(30));
    assert_eq!(h.command("tank"), Command::On);
    let d = h.engine.safe_decisions(h.now);
    assert!(d.loads.iter().all(|l| l.command == Command::Off && l.reason == Reason::Failsafe));
    assert_eq!(d.inverter_limit, Some(Power(0.0)));
}

#[test]
fn a_load_whose_own_signal_goes_stale_takes_its_safe_state_while_others_run() {
    let loads = r#"
  - name: tank
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 3.1kW and tank_temp < 60°C
    stop: import > 300W or tank_temp >= 65°C
  - name: pump
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.1kW
    stop: import > 300W
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", -4500.0);
    h.set("tank_temp", 40.0);
    h.run(secs(3));
    assert_eq!((h.command("tank"), h.command("pump")), (Command::On, Command::On));
    h.silence("tank_temp");
    h.run(secs(61));
    assert_eq!(h.command("tank"), Command::Off);
    assert!(matches!(h.reason("tank"), Reason::SignalLost { .. }));
    assert!(h.engine.explain(LoadId(0)).contains("tank_temp"), "{}", h.engine.explain(LoadId(0)));
    assert_eq!(h.command("pump"), Command::On);
}

// ---------------------------------------------------------------- obligations

/// A 1 kW pump on surplus with a daily run duty topped up from the grid in `window`.
fn pump_with_run_duty(run: &str, window: &str) -> String {
    format!(
        "
  - name: pump
    rated: 1kW
    switch: {{ device: relays, coil: 1 }}
    start: surplus > 1.1kW for 1min
    stop: import > 300W for 1min
    obligations:
      - run: {run}
        grid_window: {window}
"
    )
}

#[test]
fn a_daily_run_obligation_tops_up_from_the_grid_late_in_its_window_and_is_reported() {
    let loads = &pump_with_run_duty("2h", "18:00..21:00");
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(17, 0);
    h.set("grid", 500.0);
    h.run(secs(3600));
    assert_eq!(h.command("pump"), Command::Off, "18:00: three hours left for two hours' work");
    h.run(secs(3600 - 30));
    assert_eq!(h.command("pump"), Command::On, "by 19:00 it must start");
    assert!(matches!(h.reason("pump"), Reason::Obligation { .. }));
    h.run(secs(2 * 3600 + 300));
    assert_eq!(h.command("pump"), Command::Off, "done");
    // Past midnight the day is judged.
    h.run(secs(3 * 3600));
    let results = h.engine.take_obligation_results();
    assert_eq!(results.len(), 1);
    assert!(results[0].met);
}

/// A tank heater that must be at 60 °C by 17:00, from the grid from 15:00 if need be.
const TANK_AT_60_BY_FIVE: &str = r#"
  - name: tank
    rated: 3kW
    switch: { device: relays, coil: 0 }
    temperature: tank_temp
    start: surplus > 3.1kW for 20s
    stop: import > 300W for 10s
    obligations:
      - reach: 60°C
        by: "17:00"
        grid_window: 15:00..17:00
"#;

#[test]
fn a_reach_by_obligation_heats_from_the_grid_in_its_window_until_the_target() {
    let loads = TANK_AT_60_BY_FIVE;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(14, 0);
    h.set("grid", 500.0);
    h.set("tank_temp", 45.0);
    h.run(secs(1800));
    assert_eq!(h.command("tank"), Command::Off);
    h.run(secs(3600));
    assert_eq!(h.command("tank"), Command::On);
    h.set("tank_temp", 60.2);
    h.tick();
    assert_eq!(h.command("tank"), Command::Off, "{:?}", h.reason("tank"));
}

/// A run duty whose window holds the hour the clocks skip (Lisbon, 2026-03-29: 01:00
/// WET is followed by 02:00 WEST; the IANA tz database via chrono-tz) has an hour less
/// of real time in it than on the wall: `00:00..06:00` is five hours that night. The
/// top-up starts early enough for the real time, and four and a half hours are run.
#[test]
fn a_run_duty_over_the_hour_the_clocks_skip_starts_early_enough() {
    let loads = &pump_with_run_duty("270min", "00:00..06:00");
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.now = Timestamp::from_utc(chrono::TimeZone::with_ymd_and_hms(&chrono::Utc, 2026, 3, 29, 0, 0, 0).unwrap());
    h.set("grid", 500.0);
    h.run(secs(5 * 3600 + 60));
    let (runtime, _) = h.engine.load_today(LoadId(h.load("pump")));
    assert!(runtime >= secs(4 * 3600 + 30 * 60), "{runtime:?}");
}

/// A tank at its target at the deadline has met the day, and a restart that evening
/// (an upgrade, a power cut) does not turn the day into a miss at midnight: the state
/// file carries the obligation's progress, as it does the run time.
#[test]
fn a_reach_met_at_its_deadline_stays_met_across_a_restart_that_evening() {
    let loads = TANK_AT_60_BY_FIVE;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(16, 50);
    h.set("grid", 500.0);
    h.set("tank_temp", 61.0);
    h.run(secs(3600));
    let saved = h.engine.persisted();
    let mut restarted = Engine::new(Arc::clone(&h.site));
    restarted.restore(&saved, h.now);
    h.engine = restarted;
    h.run(secs(7 * 3600 + 300));
    let results = h.engine.take_obligation_results();
    assert_eq!(results.len(), 1, "{results:?}");
    assert!(results[0].met, "{results:?}");
}

/// `reach: 80%` on a battery: charged from the grid at full power inside the window
/// while below the target, released at it, judged at the deadline.
#[test]
fn a_state_of_charge_obligation_charges_a_battery_from_the_grid_until_the_target() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    soc: soc
    setpoint: { device: relays, register: 400, type: i32 }
    discharge: { max: 2kW, soc_min: 20% }
    obligations:
      - reach: 80%
        by: "18:00"
        grid_window: 14:00..18:00
"#;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(13, 0);
    h.set("grid", 400.0);
    h.set("soc", 50.0);
    h.run(secs(1800));
    assert!(
        matches!(h.command("battery"), Command::Charge(p) if p.0 < 0.0),
        "before the window it covers the house: {:?}",
        h.command("battery")
    );
    h.run(secs(3600));
    assert_eq!(h.command("battery"), Command::Charge(Power(3000.0)), "in the window: full charge from the grid");
    assert!(matches!(h.reason("battery"), Reason::Obligation { .. }));
    h.set("soc", 79.5);
    h.tick();
    assert_eq!(h.command("battery"), Command::Charge(Power(3000.0)), "a top-up runs to the target itself");
    h.set("soc", 80.0);
    h.tick();
    assert!(!matches!(h.reason("battery"), Reason::Obligation { .. }), "{:?}", h.reason("battery"));
    // A sag of less than a point does not restart it; a larger one does.
    h.set("soc", 79.4);
    h.run(secs(10));
    assert!(!matches!(h.reason("battery"), Reason::Obligation { .. }), "{:?}", h.reason("battery"));
    h.set("soc", 78.9);
    h.run(secs(10));
    assert!(matches!(h.reason("battery"), Reason::Obligation { .. }), "{:?}", h.reason("battery"));
    h.set("soc", 80.2);
    // Past the deadline and midnight (it is 14:30 now) the day is judged met.
    h.run(secs(11 * 3600));
    assert!(one_verdict(&mut h));
    // A day that ends below the target is missed.
    h.set("soc", 60.0);
    h.run(secs(24 * 3600));
    assert!(!one_verdict(&mut h));
}

/// The one obligation verdict given since the last call: met or not.
fn one_verdict(h: &mut Harness) -> bool {
    let results = h.engine.take_obligation_results();
    assert_eq!(results.len(), 1, "{results:?}");
    results[0].met
}

/// A battery that may discharge keeps its charge inside a `reach: N%` duty's window:
/// covering the house there would give away what the grid then puts back. With its
/// `capacity` the top-up waits (30 points × 2 min × 1.25 + 10 min: from 16:35), and
/// until then the battery neither charges nor discharges.
#[test]
fn a_battery_keeps_its_charge_for_its_duty_inside_the_window() {
    let loads = r#"
  - name: battery
    kind: battery
    max_charge: 3kW
    capacity: 10kWh
    soc: soc
    setpoint: { device: relays, register: 400, type: i32 }
    discharge: { max: 2kW, soc_min: 20% }
    obligations:
      - { reach: 80%, by: "18:00", grid_window: "14:00..18:00" }
"#;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(13, 0);
    h.set("grid", 400.0);
    h.set("soc", 50.0);
    h.run(secs(1800));
    assert!(matches!(h.command("battery"), Command::Charge(p) if p.0 < 0.0), "13:30: covering the house");
    h.run(secs(3600));
    let idle = |c: Command| c == Command::Off || c == Command::Charge(Power::ZERO);
    assert!(idle(h.command("battery")), "14:30: kept for the duty, {:?}", h.command("battery"));
    assert_eq!(h.reason("battery"), Reason::KeepingForDuty { index: 0 });
    let why = h.engine.explain(LoadId(0));
    assert!(why.contains("keeping its charge for \"reach 80 % by 18:00\""), "{why}");
    h.run(secs(2 * 3600 + 4 * 60));
    assert!(idle(h.command("battery")), "16:34: not yet, {:?}", h.command("battery"));
    h.run(secs(120));
    assert_eq!(h.command("battery"), Command::Charge(Power(3000.0)), "16:36: the top-up");
    h.set("soc", 80.5);
    h.run(secs(3600 + 1800));
    assert!(matches!(h.command("battery"), Command::Charge(p) if p.0 < 0.0), "after 18:00 it covers again");
}

/// `reach: 80%` on a charger reads the car's SoC; a silent SoC (the car away, a charger
/// that reports nothing then) stops only the top-up, never surplus charging.
#[test]
fn a_chargers_state_of_charge_obligation_reads_the_car_and_a_silent_soc_stops_only_the_top_up() {
    let loads = r#"
  - name: car
    kind: charger
    min_current: 6A
    max_current: 16A
    soc: soc
    setpoint: { device: relays, register: 0, scale: 0.1 }
    start: surplus > 1.5kW for 10s
    stop: surplus < 1kW for 10s
    obligations:
      - { reach: 80%, by: "07:00", grid_window: "00:00..06:00" }
"#;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(0, 0);
    h.set("grid", 300.0);
    h.set("soc", 55.0);
    h.run(secs(60));
    assert_eq!(h.command("car"), Command::Current(Current(16.0)), "{:?}", h.reason("car"));
    assert!(matches!(h.reason("car"), Reason::Obligation { .. }));
    h.set("soc", 80.0);
    h.tick();
    assert_eq!(h.command("car"), Command::Off, "{:?}", h.reason("car"));
    // The car's SoC goes silent: no top-up, and no fail-safe either.
    h.set("soc", f64::NAN);
    h.run(secs(60));
    assert_eq!(h.command("car"), Command::Off);
    assert!(!matches!(h.reason("car"), Reason::SignalLost { .. }), "{:?}", h.reason("car"));
    // At 12:00 a surplus charges it as the rules say.
    h.run(secs(12 * 3600));
    h.set("grid", -3000.0);
    h.run(secs(30));
    assert!(matches!(h.command("car"), Command::Current(a) if a.0 >= 6.0), "{:?}", h.reason("car"));
    // No SoC at 07:00 (the car was away): the day is neither met nor missed.
    h.run(secs(12 * 3600));
    assert!(h.engine.take_obligation_results().is_empty());
    // The next day the car is home at 07:00, short of its target: missed.
    h.set("grid", 300.0);
    h.set("soc", 70.0);
    h.run(secs(24 * 3600));
    assert!(!one_verdict(&mut h));
}

/// A grid top-up keeps to the load's anti-chatter limits. Here an inhibit rule trips on
/// the very import the top-up causes: without `min_off` and the starts cap applying to
/// the top-up, the relay would switch on and off every tick through the window.
#[test]
fn a_grid_top_up_keeps_to_min_off_and_the_starts_cap_when_an_inhibit_keeps_tripping() {
    let loads = r#"
  - name: tank
    rated: 3kW
    switch: { device: relays, coil: 0 }
    temperature: tank_temp
    start: surplus > 3.1kW for 20s
    stop: import > 300W for 10s
    inhibit: import > 2kW
    min_off: 5min
    max_starts_per_hour: 4
    obligations:
      - reach: 60°C
        by: "17:00"
        grid_window: 15:00..17:00
"#;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(15, 0);
    h.set("tank_temp", 45.0);
    let mut starts = Vec::new();
    let mut on = false;
    for _ in 0..3600 {
        // The house draws 500 W; the heater, when on, adds its 3 kW at the meter.
        h.set("grid", if on { 3500.0 } else { 500.0 });
        let d = h.tick();
        let now_on = d.loads[0].command.is_on();
        if now_on && !on {
            starts.push(h.now);
        }
        on = now_on;
    }
    assert!(!starts.is_empty(), "the top-up is tried");
    assert!(starts.len() <= 4, "at most 4 starts in the hour, not one every other tick: {}", starts.len());
    for pair in starts.windows(2) {
        assert!(pair[1].since(pair[0]) >= secs(300), "5 min off between starts: {pair:?}");
    }
}

// ---------------------------------------------------------------- overrides, outages, off-grid

#[test]
fn an_override_expires_by_itself_and_never_defeats_the_inhibit_rule() {
    let loads = r#"
  - name: tank
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 3.1kW for 20s
    stop: import > 300W for 10s
    inhibit: tank_temp >= 75°C
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", 200.0);
    h.set("tank_temp", 50.0);
    h.tick();
    let until = h.now.plus(secs(600));
    h.engine.set_override(LoadId(0), Command::On, until);
    h.tick();
    assert_eq!(h.command("tank"), Command::On);
    assert!(matches!(h.reason("tank"), Reason::Override { .. }));
    h.set("tank_temp", 76.0);
    h.tick();
    assert_eq!(h.command("tank"), Command::Off, "inhibit beats the boost");
    h.set("tank_temp", 50.0);
    h.run(secs(600));
    assert_eq!(h.command("tank"), Command::Off, "expired");
    assert_eq!(h.engine.override_of(LoadId(0)), None);
}

/// A charger an override started, back on its rules while the site imports: what holds
/// it at its minimum current is its minimum on-time, and its reason says so in the words
/// a switched load's does. It once said "following the surplus at 1.38 kW" while the
/// site imported 1 kW.
#[test]
fn a_charger_held_at_its_minimum_by_min_on_says_so() {
    let loads = r#"
  - name: car
    kind: charger
    voltage: 230V
    min_current: 6A
    max_current: 16A
    setpoint: { device: relays, register: 300, scale: 0.1 }
    start: surplus > 1.5kW for 1min
    stop: surplus < 1kW for 3min
    min_on: 10min
    min_off: 5min
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", 0.0);
    h.tick();
    h.engine.set_override(LoadId(0), Command::Current(Current(6.0)), h.now.plus(secs(3600)));
    h.run(secs(60));
    assert_eq!(h.command("car"), Command::Current(Current(6.0)));
    h.engine.clear_override(LoadId(0));
    // The car draws 1.38 kW and the site imports 1 kW of it.
    h.set("grid", 1000.0);
    for _ in 0..8 * 60 {
        h.tick();
        assert_eq!(h.command("car"), Command::Current(Current(6.0)));
        let reason = h.reason("car");
        assert!(matches!(reason, Reason::MinOn { .. }), "{reason}");
        assert!(reason.to_string().starts_with("held on: minimum on-time ("), "{reason}");
    }
    // Past its minimum on-time, with the stop rule long true, it stops.
    h.run(secs(120));
    assert_eq!(h.command("car"), Command::Off, "{}", h.reason("car"));

    // Without a minimum on-time, what holds it is the session (the stop rule not yet
    // true), and the reason says that, not "following".
    let mut h = Harness::new(&site("  export: allowed", &loads.replace("    min_on: 10min\n", "")));
    h.set("grid", 0.0);
    h.tick();
    h.engine.set_override(LoadId(0), Command::Current(Current(6.0)), h.now.plus(secs(3600)));
    h.run(secs(60));
    h.engine.clear_override(LoadId(0));
    h.set("grid", 1000.0);
    h.run(secs(60));
    let reason = h.reason("car");
    assert_eq!(h.command("car"), Command::Current(Current(6.0)));
    assert!(matches!(reason, Reason::AtMinimum { .. }), "{reason}");
    assert!(reason.to_string().starts_with("held at its minimum, 1.38 kW: "), "{reason}");
}

/// Countdowns in reasons read to the whole second, in one form, and shares to the watt.
#[test]
fn reasons_count_down_in_whole_seconds() {
    let left = Duration::from_millis(190_001);
    assert_eq!(Reason::MinOn { left }.to_string(), "held on: minimum on-time (3 min 11 s left)");
    assert_eq!(Reason::MinOff { left: secs(179) }.to_string(), "held off: minimum off-time (2 min 59 s left)");
    assert_eq!(
        Reason::Recovering { left: Duration::from_millis(29_200) }.to_string(),
        "held in safe state after signals returned (30 s left)"
    );
    // The share available, to the watt.
    let paused = Reason::BelowMinimum { available: Power(288.08), minimum: Power(300.0) };
    assert_eq!(paused.to_string(), "paused: 288 W available, needs 300 W");
}

/// An automation toggling a pump's override every few seconds cannot chatter it: `off`
/// is obeyed at once, `on` waits out `min_off` and the starts cap, and then takes effect.
#[test]
fn an_override_start_keeps_to_min_off_and_the_starts_cap() {
    let loads = r#"
  - name: pump
    rated: 1kW
    switch: { device: relays, coil: 0 }
    start: surplus > 1.1kW for 20s
    stop: import > 300W for 10s
    min_off: 5min
    max_starts_per_hour: 2
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", 200.0);
    h.tick();
    let mut starts = 0;
    let mut on = false;
    for i in 0..1800 {
        // Every 2 s the automation flips its mind.
        if i % 2 == 0 {
            let command = if (i / 2) % 2 == 0 { Command::On } else { Command::Off };
            h.engine.set_override(LoadId(0), command, h.now.plus(secs(3600)));
        }
        let now_on = h.tick().loads[0].command.is_on();
        if now_on && !on {
            starts += 1;
        }
        on = now_on;
    }
    assert!((1..=2).contains(&starts), "at most the cap of 2 starts in the half hour, not 450: {starts}");
    // A plain override after the wait starts the pump at once.
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", 200.0);
    h.run(secs(400));
    h.engine.set_override(LoadId(0), Command::On, h.now.plus(secs(600)));
    h.tick();
    assert_eq!(h.command("pump"), Command::On);
}

#[test]
fn an_override_never_defeats_the_failsafe() {
    let mut h = Harness::new(&site("  export: forbidden", TWO_LOADS));
    h.set("grid", 200.0);
    h.tick();
    h.engine.set_override(LoadId(1), Command::On, h.now.plus(secs(3600)));
    h.silence("grid");
    h.run(secs(5));
    assert_eq!(h.command("pump"), Command::Off);
    assert_eq!(h.reason("pump"), Reason::Failsafe);
}

#[test]
fn a_grid_outage_sheds_non_essential_loads_lowest_priority_first() {
    let loads = r#"
  - name: fridge_room
    priority: 1
    rated: 500W
    switch: { device: relays, coil: 0 }
    start: surplus > 0W
    stop: surplus < -5kW
    shed_on_outage: false
  - name: tank
    priority: 2
    rated: 3kW
    switch: { device: relays, coil: 1 }
    start: surplus > 0W
    stop: surplus < -5kW
  - name: pump
    priority: 3
    rated: 1kW
    switch: { device: relays, coil: 2 }
    start: surplus > 0W
    stop: surplus < -5kW
"#;
    let mut h = Harness::new(&site("  export: allowed\n  grid: backup\n  backup: { shed_interval: 30s }", loads));
    h.set("grid", -100.0);
    h.set("grid_available", 1.0);
    h.run(secs(5));
    assert!(h.engine.decisions().loads.iter().all(|l| l.command == Command::On));
    h.set("grid_available", 0.0);
    h.tick();
    assert_eq!(h.command("pump"), Command::Off, "lowest priority shed at once");
    assert_eq!(h.command("tank"), Command::On);
    h.run(secs(31));
    assert_eq!(h.command("tank"), Command::Off);
    assert_eq!(h.reason("tank"), Reason::Shed);
    assert_eq!(h.command("fridge_room"), Command::On, "essential load kept");
}

#[test]
fn an_off_grid_site_infers_surplus_from_the_battery_in_float() {
    let yaml = r#"
site:
  name: Cabin
  timezone: America/Denver
  grid: off
  off_grid: { float_voltage: 54.4V, charge_acceptance: 2kW, float_headroom: 600W }
devices:
  bms: { modbus_tcp: 127.0.0.1:5020, unit: 5 }
  relays: { modbus_tcp: 127.0.0.1:5020, unit: 3 }
points:
  battery_voltage: { device: bms, register: 0, scale: 0.01, unit: V }
  battery_current: { device: bms, register: 1, type: i16, scale: 0.1, unit: A }
loads:
  - name: dump
    rated: 500W
    switch: { device: relays, coil: 0 }
    start: surplus > 550W for 30s
    stop: surplus < 100W for 30s
"#;
    let mut h = Harness::new(yaml);
    // Bulk charging at 1.5 kW: the battery has first call.
    h.set("battery_voltage", 52.0);
    h.set("battery_current", 28.8);
    h.run(secs(60));
    assert_eq!(h.command("dump"), Command::Off);
    // Float: a trickle in, the charge controller holding PV back.
    h.set("battery_voltage", 54.6);
    h.set("battery_current", 1.0);
    h.run(secs(31));
    assert_eq!(h.command("dump"), Command::On, "{}", h.engine.explain(LoadId(0)));
    // What the dump load takes counts as diverted with no grid meter to show it (it
    // stayed at 0 Wh off-grid, while the load's own counter grew).
    let before = h.engine.counters().diverted_today;
    h.run(secs(36));
    let diverted = h.engine.counters().diverted_today - before;
    assert!((diverted.0 - 5.0).abs() < 0.01, "500 W for 36 s is 5 Wh, counted {diverted}");
    // The dump load is more than the array can give: the battery discharges, voltage sags.
    h.set("battery_voltage", 53.0);
    h.set("battery_current", -20.0);
    h.run(secs(31));
    assert_eq!(h.command("dump"), Command::Off);
}

// ---------------------------------------------------------------- time, counters, reasons

#[test]
fn clock_windows_in_rules_follow_local_time_across_a_dst_change() {
    let loads = r#"
  - name: pump
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: clock in 09:00..10:00
    stop: not (clock in 09:00..10:00)
"#;
    let mut h = Harness::new(&site("  export: allowed", loads));
    h.set("grid", 0.0);
    // 2026-10-25 is the autumn change in Lisbon (02:00 WEST → 01:00 WET). 09:30 local is
    // 09:30 UTC after it (source: IANA tz database through chrono-tz).
    h.now = Timestamp::from_utc(chrono::TimeZone::with_ymd_and_hms(&chrono::Utc, 2026, 10, 25, 9, 0, 0).unwrap());
    h.run(secs(1800));
    assert_eq!(h.command("pump"), Command::On);
    h.run(secs(1800));
    assert_eq!(h.command("pump"), Command::Off, "10:00 local");
}

#[test]
fn energy_counters_roll_over_at_local_midnight_and_survive_a_restart() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS)).at_local(23, 0);
    h.set("grid", 1000.0);
    h.run(secs(1800));
    let c = h.engine.counters();
    assert!((c.import_today.0 - 500.0).abs() < 1.0, "{}", c.import_today);
    let saved = h.engine.persisted();
    // A restart the same evening restores today's counters.
    let mut restarted = Engine::new(Arc::clone(&h.site));
    restarted.restore(&saved, h.now);
    assert!((restarted.counters().import_today.0 - c.import_today.0).abs() < 1e-9);
    // Past local midnight the daily counter starts again; the monthly one keeps going.
    h.run(secs(3600));
    let c = h.engine.counters();
    assert!(c.import_today.0 < 600.0, "{}", c.import_today);
    assert!(c.import_month.0 > 1400.0, "{}", c.import_month);
}

/// The day the clocks go back is 25 hours long (Lisbon, 2026-10-25: 02:00 WEST back to
/// 01:00 WET; the IANA tz database via chrono-tz). A pump on since midnight has run
/// 24 h 30 min by 23:30, and a restart then keeps all of it.
#[test]
fn a_restart_late_on_a_25_hour_day_keeps_all_of_the_days_run_time() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.now = Timestamp::from_utc(chrono::TimeZone::with_ymd_and_hms(&chrono::Utc, 2026, 10, 25, 12, 0, 0).unwrap());
    let mut h = h.at_local(23, 30);
    h.set("grid", 0.0);
    h.tick();
    let mut saved = h.engine.persisted();
    let ran = 24.0 * 3600.0 + 30.0 * 60.0;
    saved.loads[h.load("pump")].runtime_today_s = ran;
    let mut restarted = Engine::new(Arc::clone(&h.site));
    restarted.restore(&saved, h.now);
    let (runtime, _) = restarted.load_today(LoadId(h.load("pump")));
    assert_eq!(runtime.as_secs_f64(), ran);
}

#[test]
fn every_load_has_a_reason_that_a_person_can_read() {
    let mut h = Harness::new(&site("  export: allowed", TWO_LOADS));
    h.set("grid", -1500.0);
    h.run(secs(10));
    for i in 0..h.site.loads.len() {
        let text = h.engine.explain(LoadId(i));
        assert!(!text.is_empty());
    }
    assert!(h.engine.explain(LoadId(1)).contains("start rule"), "{}", h.engine.explain(LoadId(1)));
}

// ---------------------------------------------------------------- properties

fn noisy_site() -> String {
    site(
        "  export: allowed",
        r#"
  - name: tank
    priority: 1
    rated: 2kW
    switch: { device: relays, coil: 0 }
    start: surplus > 2.1kW for 10s
    stop: surplus < 1.9kW for 10s
    min_on: 4min
    min_off: 2min
    max_starts_per_hour: 6
  - name: pump
    priority: 2
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1kW
    stop: surplus < 1kW
    min_on: 1min
    min_off: 1min
"#,
    )
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 8, ..ProptestConfig::default() })]

    /// Under a surplus hovering around the start thresholds for 24 simulated hours, each
    /// load's starts stay within what min on/off and the starts-per-hour cap allow.
    #[test]
    fn switchings_stay_bounded_under_a_noisy_surplus(seed in any::<u64>()) {
        let mut h = Harness::new(&noisy_site());
        let mut rng = seed | 1;
        let mut starts = vec![Vec::<Timestamp>::new(); h.site.loads.len()];
        let mut drawn = 0.0;
        for _ in 0..86_400 {
            // xorshift: a cheap deterministic noise source for the test.
            rng ^= rng << 13; rng ^= rng >> 7; rng ^= rng << 17;
            let noise = (rng % 1000) as f64 - 500.0;
            h.set("grid", -(2100.0 + noise) + drawn);
            let d = h.tick();
            for s in &d.switchings {
                if s.to.is_on() && !s.from.is_on() {
                    starts[s.load.0].push(d.now);
                }
            }
            drawn = d.loads.iter().zip(&h.site.loads).map(|(l, sl)| l.command.power(&sl.kind).0).sum();
        }
        for (i, l) in h.site.loads.iter().enumerate() {
            let cycle = (l.min_on + l.min_off).as_secs_f64().max(1.0);
            let by_times = (86_400.0 / cycle).ceil() as usize + 1;
            let by_cap = l.max_starts_per_hour.map_or(usize::MAX, |c| c as usize * 24);
            prop_assert!(starts[i].len() <= by_times.min(by_cap), "{}: {} starts", l.name, starts[i].len());
            if let Some(cap) = l.max_starts_per_hour {
                for (k, t) in starts[i].iter().enumerate() {
                    let in_hour = starts[i][k..].iter().take_while(|u| u.since(*t) < secs(3600)).count();
                    prop_assert!(in_hour <= cap as usize);
                }
            }
        }
    }

    /// Against a trivial plant (PV minus base load, loads drawing their power, an
    /// inverter obeying its limit) with export forbidden, export never stays above the
    /// tolerance for more than one measurement period.
    #[test]
    fn export_never_outlasts_one_measurement_period_against_a_trivial_plant(seed in any::<u64>()) {
        let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
        let mut rng = seed | 1;
        let mut pv_potential: f64 = 2000.0;
        let mut limit: Option<f64> = None;
        let mut drawn = 0.0;
        let mut over = 0;
        for t in 0..20_000 {
            rng ^= rng << 13; rng ^= rng >> 7; rng ^= rng << 17;
            // Clouds: big random steps now and then.
            if rng % 97 == 0 { pv_potential = (rng % 5000) as f64; }
            let pv = limit.map_or(pv_potential, |l| pv_potential.min(l));
            let base = 400.0;
            let grid = base + drawn - pv;
            h.set("grid", grid);
            h.set("pv", pv);
            let d = h.tick();
            if -grid > h.site.guard.tolerance.0 { over += 1; } else { over = 0; }
            prop_assert!(over <= 1, "export {} W for {over} ticks at t={t}", -grid);
            limit = d.inverter_limit.map(|p| p.0);
            drawn = d.loads.iter().zip(&h.site.loads).map(|(l, sl)| l.command.power(&sl.kind).0).sum();
        }
    }

    /// The same inputs always give the same decisions.
    #[test]
    fn the_same_inputs_give_the_same_decisions(seed in any::<u64>()) {
        let run = || {
            let mut h = Harness::new(&noisy_site());
            let mut rng = seed | 1;
            let mut out = Vec::new();
            for _ in 0..3_000 {
                rng ^= rng << 13; rng ^= rng >> 7; rng ^= rng << 17;
                h.set("grid", (rng % 6000) as f64 - 4000.0);
                let d = h.tick();
                out.push((d.loads.clone(), d.inverter_limit));
            }
            out
        };
        prop_assert_eq!(run(), run());
    }
}

// ---------------------------------------------------------------- hidden headroom

/// A zero-export site without a `pv_available` point, closed around a crude plant: the
/// array can give `available`, the inverter gives the lesser of that and its limit, the
/// house draws `house`, the meter reads the rest at once. Returns the tank's starts and
/// the seconds the site exported over `minutes` once the guard had its first reading
/// (the run starts uncurtailed, exporting).
fn curtailed_evening(available: impl Fn(u64) -> f64, minutes: u64) -> (usize, u32, Harness) {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 100W", TWO_LOADS));
    let house = 300.0;
    let (mut limit, mut drawn) = (None::<f64>, 0.0);
    let (mut starts, mut export_s) = (0, 0);
    let tank = h.load("tank");
    for t in 0..minutes * 60 {
        let available = available(t);
        let pv = limit.map_or(available, |l| available.min(l));
        let grid = house + drawn - pv;
        if t > 0 && grid < 0.0 {
            export_s += 1;
        }
        h.set("pv", pv);
        h.set("grid", grid);
        let d = h.tick();
        limit = d.inverter_limit.map(|p| p.0);
        drawn = d.loads.iter().zip(&h.site.loads).map(|(l, sl)| l.command.power(&sl.kind).0).sum();
        starts += d.switchings.iter().filter(|s| s.load.0 == tank && s.to.is_on()).count();
    }
    (starts, export_s, h)
}

/// Evening on a curtailed site: 2 kW left in the array, less than the 3 kW tank needs.
/// Guessing the rest of the 5 kW rating every time, the tank would start, find too
/// little, stop after its `min_on` and start again after its `min_off`, all evening
/// (20 times in this hour, measured with the memory taken out). Remembering what the array gave when last released, it is
/// tried once per [`guard::CEILING_MEMORY`] at most, and the 1 kW pump, which the 2 kW
/// does cover, runs instead.
#[test]
fn without_a_pv_available_point_a_failed_start_at_dusk_is_not_repeated_every_few_minutes() {
    let (starts, export_s, h) = curtailed_evening(|_| 2000.0, 60);
    assert!(starts <= 4, "{starts} tank starts in an hour on 2 kW");
    assert_eq!(export_s, 0, "never exported");
    assert_eq!(h.command("pump"), Command::On, "the pump takes what the array can give");
}

/// At midday the memory must not hold back a load the array can carry: with 6 kW
/// available the tank starts as soon as its rule's hold time allows, on the same
/// curtailed site.
#[test]
fn the_remembered_ceiling_does_not_delay_a_start_the_array_can_carry() {
    let (starts, export_s, h) = curtailed_evening(|_| 6000.0, 3);
    assert_eq!(starts, 1, "the tank starts once and stays on");
    assert_eq!(export_s, 0, "never exported");
    assert_eq!(h.command("tank"), Command::On);
}

/// A cloud is not taken for dusk: the low reading under it stops standing for the array
/// once the sun is back, and the tank, stopped by the cloud, starts again as soon as its
/// `min_off` and its rule's hold time allow.
#[test]
fn a_reading_under_a_passing_cloud_does_not_hold_the_loads_back_afterwards() {
    let cloud = |t: u64| if (60..180).contains(&t) { 500.0 } else { 6000.0 };
    let (starts, export_s, h) = curtailed_evening(cloud, 5);
    assert_eq!(starts, 2, "on before the cloud, stopped under it, on again after");
    // The sun's return is a step from 0.5 to 6 kW with no limit in force: one tick of
    // export before the guard's cut, as on a real site.
    assert!(export_s <= 1, "{export_s} s of export");
    assert_eq!(h.command("tank"), Command::On);
}

// ---------------------------------------------------------------- a restart

/// A restart with the inverter at its safe limit (0 W, where the last stop left it) and
/// the first readings in before the first tick: the engine must not take the limit for
/// absent, or its first write gives the whole array back at once and a no-export site
/// exports until the guard cuts again (2–5 s, seen against `spillway-sim serve`).
/// Started from the safe limit, it gives the limit back gently; loads that do not want
/// the surplus leave the inverter curtailed, and the meter never shows export.
fn restart_run(from_safe_limit: bool) -> (Option<Power>, usize) {
    let quiet = r#"
  - name: tank
    rated: 3kW
    switch: { device: relays, coil: 0 }
    start: surplus > 9kW for 20s
"#;
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", quiet));
    if from_safe_limit {
        h.engine.start_from_safe_limit();
    }
    let (mut device_limit, mut export_ticks, mut first) = (Some(0.0_f64), 0, None);
    for i in 0..120 {
        // The plant: 4.5 kW of sun, a 500 W house, an inverter that follows its limit
        // at once (a limit of "none" is the whole array).
        let pv = device_limit.map_or(4500.0, |l| l.min(4500.0));
        let grid = 500.0 - pv;
        h.set("pv", pv);
        h.set("grid", grid);
        let d = h.tick();
        if i == 0 {
            first = Some(d.inverter_limit);
        }
        device_limit = d.inverter_limit.map(|p| p.0);
        export_ticks += usize::from(grid < -50.0);
    }
    (first.flatten(), export_ticks)
}

#[test]
fn a_restart_gives_the_inverter_back_gently_from_its_safe_limit() {
    // The hazard, as it was: no limit on the first tick, and export follows.
    let (first, export) = restart_run(false);
    assert_eq!(first, None);
    assert!(export >= 1, "{export}");
    // Started from the safe limit: held on the first tick, never any export.
    let (first, export) = restart_run(true);
    assert_eq!(first, Some(Power(0.0)));
    assert_eq!(export, 0, "ticks with export above 50 W");
}

// ---------------------------------------------------------------- the wall clock stepping

/// A controller on a board without a real-time clock starts on a guessed time and sees
/// it stepped when NTP answers; an operator may set the clock by hand. The guard must
/// survive a step either way, and a step back must not hold loads on: every instant the
/// engine remembers moves with the clock (before that, an hour back kept a tank and a
/// pump on through a cloud for the hour: 500 s of import above 1 kW in ten minutes).
fn clock_step_run(step_s: i64, cloud: bool) -> (usize, usize) {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    // A plant: 6 kW of PV behind the inverter's limit, a 500 W house; at tick 400 either
    // the tank's thermostat cuts (export appears) or a cloud leaves 1 kW (import).
    let (mut export_ticks, mut import_ticks) = (0, 0);
    for i in 0..900 {
        if i == 300 {
            h.now = Timestamp(h.now.0 + step_s * 1000);
        }
        let d = h.engine.decisions().clone();
        let available = if cloud && i >= 400 { 1000.0 } else { 6000.0 };
        let pv = d.inverter_limit.map_or(available, |p| p.0.min(available));
        let tank = if d.loads[0].command.is_on() && (cloud || i < 400) { 3000.0 } else { 0.0 };
        let pump = if d.loads[1].command.is_on() { 1000.0 } else { 0.0 };
        let grid = 500.0 + tank + pump - pv;
        h.set("pv", pv);
        h.set("grid", grid);
        h.tick();
        if i >= 300 {
            export_ticks += usize::from(grid < -100.0);
            import_ticks += usize::from(grid > 1000.0);
        }
    }
    (export_ticks, import_ticks)
}

#[test]
fn a_step_of_the_wall_clock_either_way_leaves_the_export_guard_working() {
    let (steady, _) = clock_step_run(0, false);
    for step_s in [-3600, -5, 5, 3600] {
        let (export, _) = clock_step_run(step_s, false);
        assert_eq!(export, steady, "a {step_s} s step: seconds of export above 100 W after the thermostat cut");
    }
    assert!(steady <= 2, "{steady}");
}

#[test]
fn a_step_of_the_wall_clock_either_way_does_not_hold_loads_on_through_a_cloud() {
    let (_, steady) = clock_step_run(0, true);
    assert!(steady <= 15, "{steady}");
    for step_s in [-3600, -5, 5, 3600] {
        let (_, import) = clock_step_run(step_s, true);
        assert_eq!(import, steady, "a {step_s} s step: seconds of import above 1 kW after the cloud");
    }
}

/// A clock set back across midnight (NTP correcting a guessed time just after it) is not
/// a new day: the day that began at the first midnight goes on, its run time and energy
/// are kept, and the day before is judged once, not again when midnight comes round a
/// second time.
#[test]
fn a_step_back_across_midnight_does_not_start_or_judge_a_day_twice() {
    let loads = r#"
  - name: pump
    rated: 1kW
    switch: { device: relays, coil: 1 }
    start: surplus > 1.1kW for 1min
    stop: import > 300W for 1min
    obligations:
      - run: 1h
"#;
    let mut h = Harness::new(&site("  export: allowed", loads)).at_local(23, 50);
    h.set("grid", 200.0);
    // Past midnight: the day before is judged (missed: the pump never ran).
    h.run(secs(11 * 60));
    let results = h.engine.take_obligation_results();
    assert_eq!(results.len(), 1, "{results:?}");
    assert!(!results[0].met);
    // Some export for the pump: run time of the new day.
    h.set("grid", -1500.0);
    h.run(secs(5 * 60));
    assert!(h.command("pump").is_on());
    let runtime = h.engine.persisted();
    // The clock is set back ten minutes, to before midnight, and runs on past it again.
    h.now = Timestamp(h.now.0 - 10 * 60 * 1000);
    h.run(secs(2 * 60));
    let during = h.engine.persisted();
    h.run(secs(15 * 60));
    assert!(h.engine.take_obligation_results().is_empty(), "judged again");
    let after = h.engine.persisted();
    assert_eq!(during.day, runtime.day, "the day the clock went back into is not a new day");
    assert_eq!(after.day, runtime.day);
    let (before_s, after_s) = (runtime.loads[0].runtime_today_s, after.loads[0].runtime_today_s);
    assert!(after_s >= before_s + 16.0 * 60.0, "run time kept and grown: {before_s} → {after_s} s");
}

#[test]
fn a_step_back_keeps_an_override_and_a_minimum_on_time_at_their_lengths() {
    let mut h = Harness::new(&site("  export: forbidden\n  import_target: 40W", TWO_LOADS));
    h.set("pv", 4000.0);
    h.set("grid", -3500.0);
    h.run(secs(30));
    assert_eq!(h.command("tank"), Command::On);
    let pump = h.site.load("pump").unwrap().0;
    h.engine.set_override(pump, Command::On, h.now.plus(secs(600)));
    h.tick();
    // An hour back; a cloud at once: the tank came on some 10 s before the step, so its
    // min_on (2 min) and stop rule (10 s) let it go about 2 min later, not an hour later.
    h.now = Timestamp(h.now.0 - 3_600_000);
    h.set("pv", 500.0);
    h.set("grid", 3000.0);
    h.run(secs(130));
    assert_eq!(h.command("tank"), Command::Off, "{:?}", h.reason("tank"));
    // The override had 10 min left at the step and keeps them: on at 9 min, gone by 11.
    h.run(secs(410));
    assert!(h.command("pump").is_on(), "{:?}", h.reason("pump"));
    h.run(secs(120));
    assert!(h.engine.override_of(pump).is_none() || !h.command("pump").is_on(), "{:?}", h.reason("pump"));
}
