//! Notes on a site file that offline runs can carry out but that cannot do what it asks
//! of the simulated plant: warnings, never refusals (the file may be right for the real
//! site and the plant section only a sketch of it).

use std::fmt;

use spillway_sim::bus::{HR_REGULATOR, RELAY_UNIT, SENSOR_UNIT, ir};
use spillway_sim::plant::config::LoadKind as PlantLoadKind;

use super::PlantSection;
use crate::actuators::load_levels;
use crate::config::Loaded;
use crate::config::model::{Link, Load, Obligation, PointRead, Site, Table, Write};
use crate::engine::Command;

/// A grid point's `latency` below this share of the plant meter's period plus delay is
/// "much below it".
const LATENCY_SHARE: f64 = 0.5;

/// One warning about what the simulated plant cannot give, saying what to do.
#[derive(Debug, Clone, PartialEq)]
pub struct Note {
    /// Its code in docs/site-file-codes.md, where it has one.
    pub code: Option<&'static str>,
    /// The warning itself.
    pub text: String,
}

impl fmt::Display for Note {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.code {
            Some(code) => write!(f, "warning[{code}]: {}", self.text),
            None => write!(f, "warning: {}", self.text),
        }
    }
}

/// What the site file asks that the simulated plant cannot give, one note each, saying
/// what to do.
pub fn notes(loaded: &Loaded, plant: &PlantSection) -> Vec<Note> {
    let site = &loaded.site;
    let mut out = Vec::new();
    let mut note = |code, text| out.push(Note { code, text });
    if let Some(tank) = &plant.tank {
        let setpoint = tank.thermostat.setpoint;
        for load in &site.loads {
            for ob in &load.obligations {
                if let Obligation::ReachBy { target, .. } = ob
                    && target.0 > setpoint
                {
                    note(
                        None,
                        format!(
                            "load \"{}\": `reach: {}°C` is above the simulated tank's thermostat setpoint ({setpoint}°C), so it is never met in simulation: lower the target or raise `plant.tank.thermostat.setpoint`",
                            load.name, target.0
                        ),
                    );
                }
            }
        }
        for load in &site.loads {
            if let Some(text) = unheated_tank(site, plant, &tank.name, load) {
                note(Some("C0701"), text);
            }
        }
    }
    let meter_s = plant.meter.period + plant.meter.delay;
    if let Some(grid) = site.roles.grid
        && let Some(point) = site.points.get(grid.0)
        && meter_s > 0.0
        && point.latency.as_secs_f64() < LATENCY_SHARE * meter_s
    {
        note(
            None,
            format!(
                "point \"{}\" has latency {} ms, but the plant's meter reports the mean of each {} s period {} s late: the export guard corrects again before its last correction shows; add `latency: {:.0}ms` to the point (the meter's period plus its delay)",
                point.name,
                point.latency.as_millis(),
                plant.meter.period,
                plant.meter.delay,
                meter_s * 1000.0
            ),
        );
    }
    out
}

/// A load whose `temperature` reads the simulated tank's sensor but whose actuators
/// drive nothing that heats the tank: the rules watch water they cannot warm, so its
/// temperature duties are missed (and its grid top-ups bought) every simulated day.
fn unheated_tank(site: &Site, plant: &PlantSection, tank: &str, load: &Load) -> Option<String> {
    let point = &site.points[load.temperature?.0];
    let reads_tank = match (plant.bind.point(&point.name), &point.read) {
        (Some(q), _) => q == "tank/temperature",
        (None, PointRead::Modbus(m)) => {
            site.devices[point.device.0].link.modbus_unit() == Some(SENSOR_UNIT)
                && m.table == Table::InputRegister
                && m.address == ir::TANK_TEMP
        }
        (None, PointRead::Mqtt(m)) => m.topic == "sim/tank/temperature",
        (None, PointRead::SunSpec(_)) => false,
    };
    if !reads_tank {
        return None;
    }
    // The plant's regulated loads in register order, and whether each heats the tank.
    let regulators: Vec<(&str, bool)> = plant
        .loads
        .iter()
        .filter(|l| l.kind == PlantLoadKind::Regulated)
        .map(|l| (l.name.as_str(), l.heats.as_deref() == Some(tank)))
        .collect();
    let heater = |name: &str| regulators.iter().any(|(n, h)| *n == name && *h);
    let heats = match plant.bind.load(&load.name) {
        Some(controls) => controls
            .iter()
            .flatten()
            .any(|c| c.strip_prefix("relay/") == Some(tank) || c.strip_prefix("regulator/").is_some_and(heater)),
        None => load_levels(load, Command::Off).iter().any(|(w, _)| match w {
            Write::Coil { device, address } => {
                site.devices[device.0].link.modbus_unit() == Some(RELAY_UNIT)
                    && plant.wiring.get(usize::from(*address)).is_some_and(|ch| ch == tank)
            }
            Write::Register { device, address, .. } => {
                site.devices[device.0].link.modbus_unit() == Some(RELAY_UNIT)
                    && address
                        .checked_sub(HR_REGULATOR)
                        .and_then(|k| regulators.get(usize::from(k)))
                        .is_some_and(|r| r.1)
            }
            Write::Mqtt { topic, .. } if matches!(site.devices[w.device().0].link, Link::Mqtt) => {
                let t = topic.strip_prefix("sim/").and_then(|t| t.strip_suffix("/set")).unwrap_or_default();
                t.strip_prefix("relay/") == Some(tank) || t.strip_prefix("regulator/").is_some_and(heater)
            }
            _ => false,
        }),
    };
    if heats {
        return None;
    }
    let duties = load.obligations.iter().any(|o| matches!(o, Obligation::ReachBy { .. } | Obligation::Cycle { .. }));
    let fix = match regulators.iter().find(|(n, _)| *n == load.name) {
        Some(_) => format!(
            "add `heats: {tank}` to the plant's regulated load \"{}\" (plant.loads) if it is the tank's element",
            load.name
        ),
        None => format!(
            "drive the tank's element: wire the load's relay to the plant's channel \"{tank}\" (plant.wiring), or give plant.loads a regulated load with `heats: {tank}` and write the load's setpoint to it"
        ),
    };
    Some(format!(
        "load \"{}\" reads the simulated tank's temperature (point \"{}\") but drives nothing that heats the tank, so {}: {fix}",
        load.name,
        point.name,
        if duties {
            "its temperature duties are missed every simulated day, and their grid top-ups heat nothing"
        } else {
            "its rules watch water it cannot warm"
        }
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn notes_of(edit: impl Fn(String) -> String) -> Vec<Note> {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/zero-export-house.yaml");
        let text = edit(std::fs::read_to_string(path).unwrap());
        let loaded = crate::config::load_str("x.yaml", &text).unwrap_or_else(|e| panic!("{}", e.render(false)));
        let plant = crate::offline::checked_plant(&loaded).unwrap();
        notes(&loaded, &plant)
    }

    #[test]
    fn the_example_as_written_needs_no_note() {
        assert_eq!(notes_of(|t| t), Vec::<Note>::new());
    }

    #[test]
    fn a_reach_above_the_tank_thermostat_is_named() {
        let n = notes_of(|t| t.replace("setpoint: 68°C", "setpoint: 55°C"));
        assert_eq!(n.len(), 1, "{n:?}");
        assert!(n[0].text.contains("`reach: 60°C` is above the simulated tank's thermostat setpoint (55°C)"), "{n:?}");
    }

    #[test]
    fn a_grid_point_without_the_meters_latency_is_told_what_to_write() {
        let n = notes_of(|t| t.replace(", latency: 1500ms", ""));
        assert_eq!(n.len(), 1, "{n:?}");
        assert!(
            n[0].text.contains("point \"grid\" has latency 0 ms") && n[0].text.contains("add `latency: 1500ms`"),
            "{n:?}"
        );
    }
}
