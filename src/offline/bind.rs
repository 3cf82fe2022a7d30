//! Connects a site file to the simulated plant in-process: each point to the value the
//! plant's device would report at that address, each actuator to the register or coil
//! it would write — the same addresses the site uses on the wire, so a site file that
//! works here works against `spillway-sim serve` and on the roof.
//!
//! Reads go through [`Probe`]s resolved once at set-up (a year of register encoding would
//! cost more than the physics); at set-up every point is also decoded the slow way from
//! the encoded registers and compared with the probe, so a wrong scale or type in the
//! site file is an error here, not a silent factor of ten. Writes go through the bus
//! itself, only when a command changes (and periodically for the inverter's limit, as
//! the live link does), so stuck relays, restarts and revert timers behave as on the wire.
//!
//! A site file written for real devices names `simulation.bind` ([`SimBind`]): the points
//! and actuators it lists meet the plant by the simulator's own quantity and control
//! names instead of by address (still through the bus, on the simulated device that
//! holds them, so a device that stops answering stops them too).

use spillway_sim::bus::probe::Probe;
use spillway_sim::bus::{Bus, Table as BusTable};
use spillway_sim::plant::Plant;

use super::{OfflineError, SimBind};
use crate::actuators::modbus::LimitControl;
use crate::actuators::{Level, load_levels, modbus::register_words};
use crate::config::model::{Link, PointId, PointRead, Scale, Site, Table, Write};
use crate::engine::{Command, Decisions, Snapshot};
use crate::sources::modbus::codec::{self, Sentinel};
use crate::sources::modbus::sunspec::{self, ModelMap};
use crate::units::Timestamp;

/// One point bound to the plant.
#[derive(Debug, Clone)]
struct BoundPoint {
    point: PointId,
    probe: Probe,
    /// Unit to ask whether the device answers (MQTT points: `None`, always answer).
    unit: Option<u8>,
    /// The grid meter reports its own measurement time (period and delay).
    meter_time: bool,
    poll_ms: i64,
    next_ms: i64,
}

/// The inverter limit bound to the plant.
#[derive(Debug, Clone)]
enum BoundLimit {
    /// The simulated inverter's own control (`simulation.bind`).
    Sim,
    /// SunSpec 123/704 on this unit.
    SunSpec { unit: u8, control: LimitControl },
    /// A plain register (percent or watts).
    Register,
}

/// The site wired to the plant.
#[derive(Debug)]
pub struct Binding {
    points: Vec<BoundPoint>,
    last: Vec<Option<Command>>,
    /// Per load, the simulator controls its actuators drive (`simulation.bind`), else
    /// `None`: its own addresses.
    sim_controls: Vec<Option<Vec<Option<String>>>>,
    limit: Option<BoundLimit>,
    last_limit: Option<Option<f64>>,
    limit_written_ms: i64,
    /// Writes the bus refused (a relay module restarting, a stuck write), counted.
    pub refused_writes: u64,
}

fn bus_table(t: Table) -> BusTable {
    match t {
        Table::Coil => BusTable::Coils,
        Table::DiscreteInput => BusTable::DiscreteInputs,
        Table::InputRegister => BusTable::InputRegisters,
        Table::HoldingRegister => BusTable::HoldingRegisters,
    }
}

fn unit_of(site: &Site, device: crate::config::model::DeviceId) -> Option<u8> {
    site.devices.get(device.0).and_then(|d| d.link.modbus_unit())
}

/// What one actuator of a load does, as the plant must take it.
#[derive(Debug, Clone, Copy)]
enum Role {
    /// A relay that adds this many watts when it closes (a switch, one stage).
    Relay(f64),
    /// A proportional load's setpoint in %, of a load of this rating.
    Percent(f64),
    /// A charger's current setpoint, up to this many amperes.
    Current(f64),
    /// A battery's power setpoint, up to this many watts of charge.
    BatteryPower(f64),
    /// A stepped load's stage number.
    StageNumber,
    /// The enable relay of a proportional load or a charger.
    Enable,
}

/// Each actuator of a load with its role, in the load's order (as [`load_levels`]).
fn roles(load: &crate::config::model::Load) -> Vec<(&Write, Role)> {
    use crate::config::model::{LoadKind, StageCommand};
    match &load.kind {
        LoadKind::Switched { rated, switch } => vec![(switch, Role::Relay(rated.0))],
        LoadKind::Stepped { stages, command: StageCommand::Relays(relays) } => relays
            .iter()
            .zip(stages.iter().scan(0.0, |below, s| {
                let step = s.0 - *below;
                *below = s.0;
                Some(Role::Relay(step))
            }))
            .collect(),
        LoadKind::Stepped { command: StageCommand::Register(w), .. } => vec![(w, Role::StageNumber)],
        LoadKind::Proportional { rated, setpoint, enable, .. } => std::iter::once((setpoint, Role::Percent(rated.0)))
            .chain(enable.iter().map(|e| (e, Role::Enable)))
            .collect(),
        LoadKind::Charger { max, setpoint, enable, .. } => {
            std::iter::once((setpoint, Role::Current(max.0))).chain(enable.iter().map(|e| (e, Role::Enable))).collect()
        }
        LoadKind::Battery { setpoint, max_charge, .. } => vec![(setpoint, Role::BatteryPower(max_charge.0))],
    }
}

/// Why a `simulation.bind` control cannot drive the actuator at `index` of `load` (the
/// wrong kind of control, or no actuator there), for C0504; `None` when it fits.
pub(super) fn bound_control_misfit(load: &crate::config::model::Load, index: usize, control: &str) -> Option<String> {
    let roles = roles(load);
    let Some(&(_, role)) = roles.get(index) else {
        return Some(format!(
            "load `{}` has {} actuator(s), so this control has none to drive: list one control per actuator in the load's order (switch or stage relays, else setpoint then enable)",
            load.name,
            roles.len()
        ));
    };
    let family = if control.starts_with("relay/") {
        "relay"
    } else if control.starts_with("regulator/") {
        "regulator"
    } else {
        control
    };
    let (what, fits, wanted) = match role {
        Role::Relay(_) => ("a relay", family == "relay", "`relay/<channel>`"),
        Role::Enable => (
            "its enable relay",
            family == "relay",
            "`none` (the simulated regulators and EV charger have no enable contact)",
        ),
        Role::Percent(_) => ("its setpoint in %", family == "regulator", "`regulator/<name>`"),
        Role::Current(_) => ("its charging current", family == "ev/current", "`ev/current`"),
        Role::BatteryPower(_) => ("its battery power", family == "battery/power", "`battery/power`"),
        Role::StageNumber => (
            "its stage number",
            false,
            "`none`: the simulator has no stage-number control; give the load one relay per stage",
        ),
    };
    (!fits).then(|| {
        format!(
            "`{control}` cannot drive {what} (actuator {} of load `{}`): this one takes {wanted}",
            index + 1,
            load.name
        )
    })
}

/// Half to twice: a rating rounded, or an element derated, passes; a heater wired where
/// the pump belongs does not (`common practice`: a nameplate is within a few per cent of
/// what the appliance draws).
fn ratings_differ(plant_w: f64, rated_w: f64) -> bool {
    rated_w > 0.0 && plant_w > 0.0 && !(0.5..=2.0).contains(&(plant_w / rated_w))
}

/// The `simulation.bind` entry that runs a load whose enable relay the plant lacks: its
/// setpoint on the simulator's control, the relay left out.
fn bind_without_enable(plant: &Plant, load: &crate::config::model::Load) -> String {
    use crate::config::model::LoadKind;
    let setpoint = match &load.kind {
        LoadKind::Charger { .. } => "ev/current".to_owned(),
        _ => {
            let name = plant.regulators().iter().find(|r| **r == load.name).or(plant.regulators().first());
            format!("regulator/{}", name.map_or(load.name.as_str(), String::as_str))
        }
    };
    format!("add `simulation.bind: {{ loads: {{ {}: [{setpoint}, none] }} }}`", load.name)
}

/// Every write a load's actuators would make must be one the simulated plant takes, and
/// drive what the load is: a coil wired to a channel of about the load's power, a
/// setpoint register of the plant's regulator, charger or battery, in its scale.
/// Otherwise each write is refused during the run (the load never draws, yet its run
/// hours count), or drives the wrong appliance, and the report is wrong without a word.
/// Loads that `simulation.bind` names are checked there instead.
fn check_load_writes(site: &Site, plant: &Plant, load: &crate::config::model::Load) -> Result<(), String> {
    use spillway_sim::bus::{HR_BATTERY_W, HR_EV_CURRENT, HR_REGULATOR, RELAY_UNIT};
    // Every load command the plant takes goes to its relay module (coils for relays,
    // holding registers for setpoints): a write to another unit goes nowhere, and the
    // load would count as on while it drew nothing.
    for (target, _) in load_levels(load, Command::Off) {
        let (Write::Coil { device, .. } | Write::Register { device, .. }) = target else { continue };
        let unit = unit_of(site, *device);
        if unit.is_some_and(|u| u != RELAY_UNIT) {
            return Err(format!(
                "writes to device \"{}\" (unit {}), but the simulated plant takes load commands only on its relay module, unit {RELAY_UNIT} (coils for relays, holding registers for setpoints): check the device's `unit`",
                site.devices[device.0].name,
                unit.unwrap_or_default()
            ));
        }
    }
    let layout = plant.bus().layout();
    let wiring = &layout.wiring;
    let channels = plant.channels();
    let wired_list = || {
        if wiring.is_empty() {
            "plant.wiring is empty".to_owned()
        } else {
            let names: Vec<&str> = wiring.iter().map(|&ch| channels[ch].as_str()).collect();
            format!("plant.wiring wires {} coil(s): [{}]", names.len(), names.join(", "))
        }
    };
    let power = |w: f64| crate::units::Power(w).to_string();
    // The plant load to add, as the plant file writes it; a load that watches a
    // temperature is most likely the tank's element.
    let regulated_entry = || {
        let w = load_rated(load);
        let rated = if w >= 1000.0 {
            format!("{}kW", crate::units::trim_number(w / 1000.0))
        } else {
            format!("{}W", crate::units::trim_number(w))
        };
        match (load.temperature, layout.has_tank) {
            (Some(_), true) => format!(
                "`{{ name: {}, kind: regulated, rated: {rated}, heats: {} }}` (without `heats` if it is not the tank's element)",
                load.name, channels[0]
            ),
            _ => format!("`{{ name: {}, kind: regulated, rated: {rated} }}`", load.name),
        }
    };
    for (write, role) in roles(load) {
        match (write, role) {
            (Write::Coil { device, address }, role) if unit_of(site, *device) == Some(RELAY_UNIT) => {
                let wired = wiring.get(usize::from(*address)).copied();
                match (role, wired) {
                    (Role::Relay(_), None) => {
                        return Err(format!(
                            "switches coil {address} of the simulated relay module, but {}: add the plant channel it drives as item {address} of plant.wiring (the plant's channels: {})",
                            wired_list(),
                            channels.join(", ")
                        ));
                    }
                    (Role::Relay(rated_w), Some(ch)) => {
                        if let Some(plant_w) = plant.channel_rated_w(ch)
                            && ratings_differ(plant_w, rated_w)
                        {
                            return Err(format!(
                                "switches coil {address}, which {} wires to the plant's \"{}\" ({}), but the load is rated {}: check the order of plant.wiring (coil i drives item i) or the load's `rated`",
                                if wiring.len() > 1 { "plant.wiring" } else { "the plant" },
                                channels[ch],
                                power(plant_w),
                                power(rated_w)
                            ));
                        }
                    }
                    (Role::Enable, None) => {
                        return Err(format!(
                            "has its enable relay on coil {address} of the simulated relay module, but {}, and the simulated regulators and EV charger have no enable contact to wire there: {} (offline runs then leave the relay out)",
                            wired_list(),
                            bind_without_enable(plant, load)
                        ));
                    }
                    (Role::Enable, Some(ch)) => {
                        return Err(format!(
                            "has its enable relay on coil {address}, which plant.wiring wires to the plant's \"{}\", another appliance: the simulated regulators and EV charger have no enable contact; remove item {address} from plant.wiring if \"{}\" is not on that coil, and {} (offline runs then leave the relay out)",
                            channels[ch],
                            channels[ch],
                            bind_without_enable(plant, load)
                        ));
                    }
                    (_, _) => {
                        return Err(format!(
                            "writes its setpoint to coil {address}, but the simulated relay module takes setpoints in holding registers (see the register map in the README)"
                        ));
                    }
                }
            }
            (Write::Register { device, address, value_type, word_order, scale }, role)
                if unit_of(site, *device) == Some(RELAY_UNIT) =>
            {
                let a = *address;
                // What the register holds, as the plant reads it back.
                let written = |v: f64| register_words(Level::Value(v), *value_type, *word_order, *scale);
                let what_at = |a: u16| match a {
                    HR_EV_CURRENT => "the EV charger's current setpoint".to_owned(),
                    a if (HR_BATTERY_W..HR_BATTERY_W + 2).contains(&a) => "the battery's power setpoint".to_owned(),
                    a if a >= HR_REGULATOR => format!(
                        "regulator {} (the plant's regulated load no. {})",
                        a - HR_REGULATOR,
                        a - HR_REGULATOR + 1
                    ),
                    _ => "a reserved register".to_owned(),
                };
                match role {
                    Role::Percent(rated_w) => {
                        let Some(k) = a.checked_sub(HR_REGULATOR).map(usize::from) else {
                            return Err(format!(
                                "writes its setpoint to holding register {a} of the simulated relay module, {}, not a regulator's: a proportional load's setpoint is register {HR_REGULATOR} + k, for the plant's k-th regulated load (from 0)",
                                what_at(a)
                            ));
                        };
                        let regulators = plant.regulators();
                        let Some((plant_w, _)) = plant.regulator_rated_w(k) else {
                            let have = if regulators.is_empty() {
                                "the plant has no regulated load".to_owned()
                            } else {
                                format!(
                                    "the plant's regulated loads are [{}] (registers {HR_REGULATOR}…{})",
                                    regulators.join(", "),
                                    usize::from(HR_REGULATOR) + regulators.len() - 1
                                )
                            };
                            let add = if k == regulators.len() {
                                format!("add {} to plant.loads", regulated_entry())
                            } else {
                                format!(
                                    "add {} to plant.loads as its regulated load no. {} (or write the setpoint to the register of the regulated load that is this one)",
                                    regulated_entry(),
                                    k + 1
                                )
                            };
                            return Err(format!(
                                "writes its setpoint to holding register {a} of the simulated relay module, the setpoint of regulator {k}, but {have}: {add}"
                            ));
                        };
                        if ratings_differ(plant_w, rated_w) {
                            return Err(format!(
                                "writes its setpoint to register {a}, regulator {k}, the plant's \"{}\" ({}), but the load is rated {}: check the order of the regulated loads in plant.loads (register {HR_REGULATOR} + k drives the k-th) or the load's `rated`",
                                regulators[k],
                                power(plant_w),
                                power(rated_w)
                            ));
                        }
                        let full = written(100.0);
                        if full != [1000] {
                            return Err(format!(
                                "writes 100 % to register {a} as {full:?}, but the simulated regulator takes one register in 0.1 % (1000 = 100 %): give the setpoint `type: u16` and `scale: 0.1`"
                            ));
                        }
                    }
                    Role::Current(max_a) => {
                        if a != HR_EV_CURRENT {
                            return Err(format!(
                                "writes its charging current to holding register {a} of the simulated relay module, {}: the simulated EV charger's current is register {HR_EV_CURRENT}",
                                what_at(a)
                            ));
                        }
                        if !layout.has_ev {
                            return Err("writes the simulated EV charger's current, but the plant has no `ev`: add an `ev` section to the plant".to_owned());
                        }
                        let expected = (max_a * 10.0).round();
                        let full = written(max_a);
                        if full.len() != 1 || f64::from(full[0]) != expected {
                            return Err(format!(
                                "writes {max_a} A to register {a} as {full:?}, but the simulated charger takes one register in 0.1 A ({expected} = {max_a} A): give the setpoint `type: u16` and `scale: 0.1`"
                            ));
                        }
                    }
                    Role::BatteryPower(max_w) => {
                        if a != HR_BATTERY_W {
                            return Err(format!(
                                "writes its power setpoint to holding register {a} of the simulated relay module, {}: the simulated battery's setpoint is registers {HR_BATTERY_W}–{} (i32, W)",
                                what_at(a),
                                HR_BATTERY_W + 1
                            ));
                        }
                        if !layout.has_battery {
                            return Err("writes the simulated battery's power setpoint, but the plant has no `battery`: add a `battery` section to the plant".to_owned());
                        }
                        let full = written(max_w);
                        let read = match full.as_slice() {
                            [hi, lo] => f64::from(((u32::from(*hi) << 16) | u32::from(*lo)) as i32),
                            _ => f64::NAN,
                        };
                        if (read - max_w.round()).abs() > 1.0 {
                            return Err(format!(
                                "writes {} to registers {a}–{} as {full:?}, but the simulated battery takes a signed 32-bit power in W, high word first: give the setpoint `type: i32` (and no `scale`)",
                                power(max_w),
                                a + 1
                            ));
                        }
                    }
                    Role::StageNumber => {
                        return Err(format!(
                            "writes its stage number to holding register {a}, but the simulated plant has no stage register: its stepped loads switch each stage on a relay channel `<name>.<n>`; give the load one relay per stage (`switch: [...]`) and wire them in plant.wiring"
                        ));
                    }
                    Role::Relay(_) | Role::Enable => {
                        return Err(format!(
                            "switches holding register {a} of the simulated relay module ({}), but its relays are coils: use `{{ device, coil }}`",
                            what_at(a)
                        ));
                    }
                }
            }
            (Write::Mqtt { topic, on, off, .. }, role) => {
                let sim = topic.strip_prefix("sim/").and_then(|t| t.strip_suffix("/set"));
                let takes_switch = |p: &str| {
                    matches!(p.trim().to_ascii_lowercase().as_str(), "on" | "off" | "1" | "0" | "true" | "false")
                };
                match (role, sim) {
                    (Role::Relay(rated_w), Some(t)) if t.starts_with("relay/") => {
                        let name = &t["relay/".len()..];
                        let Some(ch) = plant.channel(name) else {
                            return Err(format!(
                                "switches \"{topic}\", but the simulated plant has no relay channel \"{name}\" (its channels: {})",
                                names_or_none(channels)
                            ));
                        };
                        if !(takes_switch(on) && takes_switch(off)) {
                            return Err(format!(
                                "sends \"{on}\"/\"{off}\" to \"{topic}\", but the simulated relay takes on/off, 1/0 or true/false: give the command `on: \"on\"` and `off: \"off\"`"
                            ));
                        }
                        if let Some(plant_w) = plant.channel_rated_w(ch)
                            && ratings_differ(plant_w, rated_w)
                        {
                            return Err(format!(
                                "switches the plant's \"{name}\" ({}), but the load is rated {}: check the topic or the load's `rated`",
                                power(plant_w),
                                power(rated_w)
                            ));
                        }
                    }
                    (Role::Percent(rated_w), Some(t)) if t.starts_with("regulator/") => {
                        let name = &t["regulator/".len()..];
                        let Some(k) = plant.regulator(name) else {
                            return Err(format!(
                                "writes its setpoint to \"{topic}\", but the simulated plant has no regulated load \"{name}\": add `{{ name: {name}, kind: regulated, rated: {} }}` to plant.loads",
                                power(rated_w)
                            ));
                        };
                        if let Some((plant_w, _)) = plant.regulator_rated_w(k)
                            && ratings_differ(plant_w, rated_w)
                        {
                            return Err(format!(
                                "writes its setpoint to the plant's \"{name}\" ({}), but the load is rated {}: check the topic or the load's `rated`",
                                power(plant_w),
                                power(rated_w)
                            ));
                        }
                    }
                    (Role::Current(_), Some("ev/current")) if layout.has_ev => {}
                    (Role::BatteryPower(_), Some("battery/power")) if layout.has_battery => {}
                    (Role::Enable, Some(_)) => {
                        return Err(format!(
                            "has its enable relay on \"{topic}\", but the simulated regulators and EV charger have no enable contact: {} (offline runs then leave the relay out)",
                            bind_without_enable(plant, load)
                        ));
                    }
                    (role, _) => {
                        let wanted = match role {
                            Role::Relay(_) => "sim/relay/<channel>/set",
                            Role::Percent(_) => "sim/regulator/<name>/set",
                            Role::Current(_) => "sim/ev/current/set, with an `ev` in the plant",
                            Role::BatteryPower(_) => "sim/battery/power/set, with a `battery` in the plant",
                            Role::StageNumber => {
                                "none: the simulated plant has no stage-number command; give the load one relay per stage"
                            }
                            Role::Enable => "none",
                        };
                        return Err(format!(
                            "writes to \"{topic}\", which the simulated plant takes no such command on (this actuator needs {wanted}; see \"MQTT\" under \"The device bus\")"
                        ));
                    }
                }
            }
            _ => {}
        }
    }
    Ok(())
}

/// A load's power at full command, for the plant entry an error suggests.
fn load_rated(load: &crate::config::model::Load) -> f64 {
    use crate::config::model::LoadKind;
    match &load.kind {
        LoadKind::Switched { rated, .. } | LoadKind::Proportional { rated, .. } => rated.0,
        LoadKind::Stepped { stages, .. } => stages.last().map_or(0.0, |s| s.0),
        LoadKind::Charger { max, watts_per_amp, .. } => max.0 * watts_per_amp,
        LoadKind::Battery { max_charge, .. } => max_charge.0,
    }
}

/// Walks a unit's SunSpec model chain on the bus.
fn discover(bus: &Bus, unit: u8) -> Option<ModelMap> {
    let base = sunspec::BASES
        .into_iter()
        .find(|&b| bus.read_registers(unit, BusTable::HoldingRegisters, b, 2).is_ok_and(|w| w == sunspec::MARKER))?;
    let mut models = Vec::new();
    let mut addr = base.checked_add(2);
    while let Some(a) = addr {
        if models.len() >= sunspec::MAX_MODELS {
            break;
        }
        let head = bus
            .read_registers(unit, BusTable::HoldingRegisters, a, 2)
            .or_else(|_| bus.read_registers(unit, BusTable::HoldingRegisters, a, 1))
            .ok()?;
        let Some((model, next)) = sunspec::chain_step(a, &head) else { break };
        models.push(model);
        addr = next;
    }
    Some(ModelMap { base, models })
}

/// Why a SunSpec point or limit on `unit` cannot be bound, with the units that do have
/// a map: a mistyped `unit` in a site file shows here first.
fn no_sunspec_map(bus: &Bus, unit: u8) -> String {
    let units: Vec<String> = (1..=32).filter(|u| discover(bus, *u).is_some()).map(|u| u.to_string()).collect();
    let serves = match units.as_slice() {
        [] => "no unit".to_owned(),
        [one] => format!("unit {one}"),
        [rest @ .., last] => format!("units {} and {last}", rest.join(", ")),
    };
    format!(
        "unit {unit} has no SunSpec map in the simulated plant (it serves SunSpec on {serves}): check the device's `unit`"
    )
}

impl Binding {
    /// Binds every point and actuator of `site` to `plant` (those `bind` names by the
    /// simulator's names, the rest by address), or says which one cannot be. With
    /// `check_writes` false (another site's plant, in `compare`), a load's writes that the
    /// plant would refuse are not checked here: they are refused and counted in the run.
    pub fn new(site: &Site, plant: &Plant, bind: &SimBind, check_writes: bool) -> Result<Binding, OfflineError> {
        let bus = plant.bus();
        let mut maps: Vec<(u8, ModelMap)> = Vec::new();
        let mut map_of = |unit: u8| -> Option<ModelMap> {
            if let Some((_, m)) = maps.iter().find(|(u, _)| *u == unit) {
                return Some(m.clone());
            }
            let m = discover(bus, unit)?;
            maps.push((unit, m.clone()));
            Some(m)
        };
        let start = plant.now_ms();
        let mut points = Vec::new();
        for (i, p) in site.points.iter().enumerate() {
            let device = &site.devices[p.device.0];
            let fail = |why: String| OfflineError::Binding { point: p.name.clone(), why };
            let bound = bind.point(&p.name).map(|q| {
                bus.probe_topic(&format!("sim/{q}")).map(|probe| (probe, Some(sim_unit(q)), None)).ok_or_else(|| {
                    fail(format!(
                        "`simulation.bind` names `{q}`, which the simulated plant does not report (its quantities are its MQTT state topics without `sim/`: meter/power, inverter/power, tank/temperature, battery/soc, …; see \"MQTT\" under \"The device bus\")"
                    ))
                })
            });
            let (probe, unit, check) = match (bound, &p.read, &device.link) {
                (Some(b), _, _) => b?,
                (None, read, link) => match (read, link) {
                    (PointRead::Modbus(m), link) => {
                        let unit =
                            link.modbus_unit().ok_or_else(|| fail("a Modbus point on a non-Modbus device".into()))?;
                        let probe = bus.probe(unit, bus_table(m.table), m.address).ok_or_else(|| {
                        fail(format!(
                            "the simulated plant has nothing at unit {unit} {} {} (see the register map in the README)",
                            bus_table(m.table),
                            m.address
                        ))
                    })?;
                        (
                            probe,
                            Some(unit),
                            Some((m.table, m.address, m.value_type, m.word_order, m.scale, Sentinel::of(m))),
                        )
                    }
                    (PointRead::SunSpec(s), link) => {
                        let unit =
                            link.modbus_unit().ok_or_else(|| fail("a SunSpec point on a non-Modbus device".into()))?;
                        let map = map_of(unit).ok_or_else(|| fail(no_sunspec_map(bus, unit)))?;
                        let r = map.resolve(s.model, &s.point).map_err(fail)?;
                        let probe = bus.probe(unit, BusTable::HoldingRegisters, r.address).ok_or_else(|| {
                            fail(format!("the simulated plant does not report SunSpec {}.{}", s.model, s.point))
                        })?;
                        let scale = r.scale_factor.map_or(Scale::Factor(1.0), |a| Scale::Register {
                            table: Table::HoldingRegister,
                            address: a,
                        });
                        let check = (
                            Table::HoldingRegister,
                            r.address,
                            r.value_type,
                            crate::config::model::WordOrder::HighFirst,
                            scale,
                            r.sentinel,
                        );
                        (probe, Some(unit), Some(check))
                    }
                    (PointRead::Mqtt(m), Link::Mqtt) => {
                        let probe = bus.probe_topic(&m.topic).ok_or_else(|| {
                            fail(format!(
                                "the simulated plant publishes nothing on \"{}\" (its topics start with sim/)",
                                m.topic
                            ))
                        })?;
                        (probe, None, None)
                    }
                    (PointRead::Mqtt(_), _) => return Err(fail("an MQTT point on a Modbus device".into())),
                },
            };
            // The slow way once: decode the encoded registers with the site's own types and
            // scales, and compare with what the probe reads directly.
            if let (Some(unit), Some((table, address, ty, order, scale, sentinel))) = (unit, check) {
                let decoded = decode_once(bus, unit, table, address, ty, order, scale, sentinel);
                let direct = probe.value(bus.readings(), bus.controls());
                if let (Some(d), Some(v)) = (decoded.map(|d| d * p.unit_factor), direct)
                    && !agrees(d, v)
                {
                    return Err(fail(format!(
                        "decodes to {d} with the configured type and scale, but the plant reports {v}: check `type`, `scale` and `unit`"
                    )));
                }
            }
            let poll_ms = i64::try_from(p.poll.as_millis()).unwrap_or(1000).max(1);
            points.push(BoundPoint {
                point: PointId(i),
                probe,
                unit,
                meter_time: matches!(probe, Probe::GridPower | Probe::GridImportWh | Probe::GridExportWh),
                poll_ms,
                next_ms: start,
            });
        }
        let limit = match &site.inverter {
            None => None,
            Some(_) if bind.inverter_limit => Some(BoundLimit::Sim),
            Some(ic) => match &ic.limit {
                Write::SunSpecLimit { device } => {
                    let unit = unit_of(site, *device).ok_or_else(|| OfflineError::Binding {
                        point: "inverter limit".into(),
                        why: "not a Modbus device".into(),
                    })?;
                    let map = map_of(unit).ok_or_else(|| OfflineError::Binding {
                        point: "inverter limit".into(),
                        why: no_sunspec_map(bus, unit),
                    })?;
                    let (control, sf_at) = LimitControl::locate(&map).ok_or_else(|| OfflineError::Binding {
                        point: "inverter limit".into(),
                        why: "no SunSpec model 123 or 704 on the simulated inverter".into(),
                    })?;
                    let sf = sf_at
                        .and_then(|a| bus.read_registers(unit, BusTable::HoldingRegisters, a, 1).ok())
                        .and_then(|w| w.first().map(|v| *v as i16))
                        .filter(|v| (-10..=10).contains(v))
                        .unwrap_or(0);
                    Some(BoundLimit::SunSpec { unit, control: control.with_sf(sf) })
                }
                Write::Register { device, .. } => {
                    let _ = device;
                    Some(BoundLimit::Register)
                }
                other => {
                    return Err(OfflineError::Binding {
                        point: "inverter limit".into(),
                        why: format!(
                            "{} cannot be simulated in-process: write the limit to a holding register or the SunSpec limit",
                            crate::config::describe::write_text(site, other)
                        ),
                    });
                }
            },
        };
        let mut sim_controls = Vec::with_capacity(site.loads.len());
        // A battery on its own control takes no setpoint: a load that would drive it is a
        // mistake in the plant or the site (without any battery, such writes are refused
        // as they are on the wire, and counted).
        let layout = plant.bus().layout();
        let takes_setpoint = layout.battery_setpoint || !layout.has_battery;
        for load in &site.loads {
            let fail = |why: String| OfflineError::Binding { point: load.name.clone(), why };
            let Some(controls) = bind.load(&load.name) else {
                let writes_setpoint =
                    load_levels(load, Command::Off).iter().any(|(target, _)| writes_battery_setpoint(site, target));
                if writes_setpoint && !takes_setpoint {
                    return Err(fail(NO_BATTERY_SETPOINT.to_owned()));
                }
                if check_writes {
                    check_load_writes(site, plant, load).map_err(fail)?;
                }
                sim_controls.push(None);
                continue;
            };
            if controls.iter().flatten().any(|c| c == "battery/power") && !takes_setpoint {
                return Err(fail(NO_BATTERY_SETPOINT.to_owned()));
            }
            let actuators = load_levels(load, Command::Off).len();
            if controls.len() != actuators {
                return Err(fail(format!(
                    "`simulation.bind` gives {} control(s) for {actuators} actuator(s); list one per actuator in the load's order (switch or stage relays, else setpoint then enable), `none` for one the plant does not have",
                    controls.len()
                )));
            }
            for c in controls.iter().flatten() {
                if !sim_control_exists(plant, c) {
                    return Err(fail(format!(
                        "`simulation.bind` names `{c}`, which the simulated plant cannot be told to do (its controls: relay/<channel> for {}, regulator/<name> for {}, ev/current, battery/power)",
                        names_or_none(plant.channels()),
                        names_or_none(plant.regulators())
                    )));
                }
            }
            sim_controls.push(Some(controls.to_vec()));
        }
        Ok(Binding {
            points,
            last: vec![None; site.loads.len()],
            sim_controls,
            limit,
            last_limit: None,
            limit_written_ms: i64::MIN / 2,
            refused_writes: 0,
        })
    }

    /// Reads the points due at `now` into the snapshot (latest value wins).
    #[inline]
    pub fn read(&mut self, bus: &Bus, now_ms: i64, snapshot: &mut Snapshot) {
        for b in &mut self.points {
            if now_ms < b.next_ms {
                continue;
            }
            b.next_ms += b.poll_ms;
            if b.next_ms <= now_ms {
                // A step longer than the poll period: catch up without a burst.
                b.next_ms = now_ms + b.poll_ms;
            }
            if let Some(unit) = b.unit
                && bus.answers(unit).is_err()
            {
                continue;
            }
            let readings = bus.readings();
            let Some(value) = b.probe.value(readings, bus.controls()) else { continue };
            let at = match (b.meter_time, readings.grid) {
                (true, Some(g)) => g.updated_ms,
                _ => now_ms,
            };
            snapshot.set(b.point, value, Timestamp(at));
        }
    }

    /// Writes what changed in `decisions` to the plant.
    pub fn write(&mut self, site: &Site, decisions: &Decisions, plant: &mut Plant) {
        let now = plant.now_ms();
        for (i, (load, d)) in site.loads.iter().zip(&decisions.loads).enumerate() {
            if self.last[i] == Some(d.command) {
                continue;
            }
            self.last[i] = Some(d.command);
            if let Some(controls) = &self.sim_controls[i] {
                for ((_, level), control) in load_levels(load, d.command).into_iter().zip(controls) {
                    let Some(control) = control else { continue };
                    let payload = match level {
                        Level::Switch(on) => (if on { "on" } else { "off" }).to_owned(),
                        Level::Value(v) => crate::units::trim_number(v),
                    };
                    if plant.bus_mut().mqtt_command(&format!("sim/{control}/set"), &payload).is_err() {
                        self.refused_writes += 1;
                    }
                }
                continue;
            }
            for (target, level) in load_levels(load, d.command) {
                if !write_target(site, plant.bus_mut(), target, level) {
                    self.refused_writes += 1;
                }
            }
        }
        let (Some(limit), Some(ic)) = (&self.limit, &site.inverter) else { return };
        let wanted = decisions.inverter_limit.map(|p| p.0);
        let refresh_ms = i64::try_from(ic.refresh.as_millis()).unwrap_or(10_000);
        if self.last_limit == Some(wanted) && now - self.limit_written_ms < refresh_ms {
            return;
        }
        self.last_limit = Some(wanted);
        self.limit_written_ms = now;
        let rated = ic.rated.0.max(1.0);
        let pct = wanted.map_or(100.0, |w| (w / rated * 100.0).clamp(0.0, 100.0));
        let ok = match limit {
            BoundLimit::Sim => {
                let payload = wanted.map_or_else(|| "none".to_owned(), crate::units::trim_number);
                plant.bus_mut().mqtt_command("sim/inverter/limit/set", &payload).is_ok()
            }
            BoundLimit::SunSpec { unit, control } => {
                let safe_pct = (ic.safe_limit.0 / rated * 100.0).clamp(0.0, 100.0);
                control.ops(pct, safe_pct, ic.refresh).iter().all(|op| apply_op(plant.bus_mut(), *unit, op))
            }
            BoundLimit::Register => {
                let level = match ic.limit_unit {
                    crate::config::model::LimitUnit::Percent => Level::Value(pct),
                    crate::config::model::LimitUnit::Watts => Level::Value(wanted.unwrap_or(rated)),
                };
                write_target(site, plant.bus_mut(), &ic.limit, level)
            }
        };
        if !ok {
            self.refused_writes += 1;
        }
    }
}

/// Why a load cannot drive a battery on its own control.
const NO_BATTERY_SETPOINT: &str = "writes the simulated battery's power setpoint, but the plant's battery has `control: self_consumption`: it runs itself and takes no setpoint. Remove this load (read the battery's power as the point `battery_power` instead, and its discharge counts as import), or set `plant.battery.control: setpoint`";

/// Whether a write lands on the simulated battery's power setpoint (relay-module holding
/// registers 1–2, or its MQTT command topic).
fn writes_battery_setpoint(site: &Site, target: &Write) -> bool {
    use spillway_sim::bus::{HR_BATTERY_W, RELAY_UNIT};
    match target {
        Write::Register { device, address, .. } => {
            unit_of(site, *device) == Some(RELAY_UNIT) && (HR_BATTERY_W..=HR_BATTERY_W + 1).contains(address)
        }
        Write::Mqtt { topic, .. } => topic == "sim/battery/power/set",
        _ => false,
    }
}

/// The simulated device that holds a quantity (its Modbus unit), so that a bound point
/// stops with its device as an addressed one does.
fn sim_unit(quantity: &str) -> u8 {
    use spillway_sim::bus::{INVERTER_UNIT, METER_UNIT, RELAY_UNIT, SENSOR_UNIT};
    match quantity.split('/').next() {
        Some("meter") => METER_UNIT,
        Some("inverter") => INVERTER_UNIT,
        Some("relay") => RELAY_UNIT,
        _ => SENSOR_UNIT,
    }
}

/// Whether the plant has the control a `simulation.bind` entry names.
/// `tank, pump`, or `none` for an empty list (an error message's list of names).
fn names_or_none(names: &[String]) -> String {
    if names.is_empty() { "none".to_owned() } else { names.join(", ") }
}

fn sim_control_exists(plant: &Plant, control: &str) -> bool {
    if let Some(ch) = control.strip_prefix("relay/") {
        return plant.channels().iter().any(|c| c == ch);
    }
    if let Some(r) = control.strip_prefix("regulator/") {
        return plant.regulators().iter().any(|x| x == r);
    }
    match control {
        "ev/current" => plant.bus().probe_topic("sim/ev/current").is_some(),
        "battery/power" => plant.bus().layout().battery_setpoint,
        _ => false,
    }
}

/// Whether a decoded register value and a direct reading agree to within register
/// resolution (a tenth of a unit, or 1 % for large values).
fn agrees(decoded: f64, direct: f64) -> bool {
    let tolerance = (direct.abs() * 0.01).max(0.11);
    (decoded - direct).abs() <= tolerance
}

#[allow(clippy::too_many_arguments)]
fn decode_once(
    bus: &Bus,
    unit: u8,
    table: Table,
    address: u16,
    ty: crate::config::model::ValueType,
    order: crate::config::model::WordOrder,
    scale: Scale,
    sentinel: Sentinel,
) -> Option<f64> {
    let t = bus_table(table);
    let raw = if matches!(table, Table::Coil | Table::DiscreteInput) {
        let bits = bus.read_bits(unit, t, address, 1).ok()?;
        if bits.first().copied()? { 1.0 } else { 0.0 }
    } else {
        let words = bus.read_registers(unit, t, address, ty.registers()).ok()?;
        codec::decode(&words, ty, order, sentinel)?
    };
    let factor = match scale {
        Scale::Factor(f) => f,
        Scale::Register { table, address } => {
            let sf = bus.read_registers(unit, bus_table(table), address, 1).ok()?.first().copied()? as i16;
            return codec::apply_sunssf(raw, sf);
        }
    };
    Some(raw * factor)
}

fn apply_op(bus: &mut Bus, unit: u8, op: &crate::actuators::WriteOp) -> bool {
    use crate::actuators::WriteOp;
    match op {
        WriteOp::Coil { address, value } => bus.write_coil(unit, *address, *value).is_ok(),
        WriteOp::Coils { address, values } => bus.write_coils(unit, *address, values).is_ok(),
        WriteOp::Register { address, value } => bus.write_register(unit, *address, *value).is_ok(),
        WriteOp::Registers { address, words } => bus.write_registers(unit, *address, words).is_ok(),
    }
}

fn write_target(site: &Site, bus: &mut Bus, target: &Write, level: Level) -> bool {
    match target {
        Write::Coil { device, address } => {
            let Some(unit) = unit_of(site, *device) else { return false };
            bus.write_coil(unit, *address, level.number() > 0.5).is_ok()
        }
        Write::Register { device, address, value_type, word_order, scale } => {
            let Some(unit) = unit_of(site, *device) else { return false };
            let words = register_words(level, *value_type, *word_order, *scale);
            if words.len() == 1 {
                bus.write_register(unit, *address, words[0]).is_ok()
            } else {
                bus.write_registers(unit, *address, &words).is_ok()
            }
        }
        Write::Mqtt { topic, on, off, value, .. } => {
            let payload = match level {
                Level::Switch(true) => on.clone(),
                Level::Switch(false) => off.clone(),
                Level::Value(v) => value.replace("{value}", &crate::units::trim_number(v)),
            };
            bus.mqtt_command(topic, &payload).is_ok()
        }
        Write::SunSpecLimit { .. } => false,
    }
}
