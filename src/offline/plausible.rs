//! Notes on a site file that offline runs can carry out but that cannot do what it asks
//! of the simulated plant: warnings, never refusals (the file may be right for the real
//! site and the plant section only a sketch of it).

use crate::config::Loaded;
use crate::config::model::Obligation;

/// A grid point's `latency` below this share of the plant meter's period plus delay is
/// "much below it".
const LATENCY_SHARE: f64 = 0.5;

/// What the site file asks that the simulated plant cannot give, one line each, saying
/// what to do.
pub fn notes(loaded: &Loaded, plant: &spillway_sim::plant::PlantConfig) -> Vec<String> {
    let site = &loaded.site;
    let mut out = Vec::new();
    if let Some(tank) = &plant.tank {
        let setpoint = tank.thermostat.setpoint;
        for load in &site.loads {
            for ob in &load.obligations {
                if let Obligation::ReachBy { target, .. } = ob
                    && target.0 > setpoint
                {
                    out.push(format!(
                        "load \"{}\": `reach: {}°C` is above the simulated tank's thermostat setpoint ({setpoint}°C), so it is never met in simulation: lower the target or raise `plant.tank.thermostat.setpoint`",
                        load.name, target.0
                    ));
                }
            }
        }
    }
    let meter_s = plant.meter.period + plant.meter.delay;
    if let Some(grid) = site.roles.grid
        && let Some(point) = site.points.get(grid.0)
        && meter_s > 0.0
        && point.latency.as_secs_f64() < LATENCY_SHARE * meter_s
    {
        out.push(format!(
            "point \"{}\" has latency {} ms, but the plant's meter reports the mean of each {} s period {} s late: the export guard corrects again before its last correction shows; add `latency: {:.0}ms` to the point (the meter's period plus its delay)",
            point.name,
            point.latency.as_millis(),
            plant.meter.period,
            plant.meter.delay,
            meter_s * 1000.0
        ));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn notes_of(edit: impl Fn(String) -> String) -> Vec<String> {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/zero-export-house.yaml");
        let text = edit(std::fs::read_to_string(path).unwrap());
        let loaded = crate::config::load_str("x.yaml", &text).unwrap_or_else(|e| panic!("{}", e.render(false)));
        let plant = crate::offline::checked_plant(&loaded).unwrap();
        notes(&loaded, &plant)
    }

    #[test]
    fn the_example_as_written_needs_no_note() {
        assert_eq!(notes_of(|t| t), Vec::<String>::new());
    }

    #[test]
    fn a_reach_above_the_tank_thermostat_is_named() {
        let n = notes_of(|t| t.replace("setpoint: 68°C", "setpoint: 55°C"));
        assert_eq!(n.len(), 1, "{n:?}");
        assert!(n[0].contains("`reach: 60°C` is above the simulated tank's thermostat setpoint (55°C)"), "{n:?}");
    }

    #[test]
    fn a_grid_point_without_the_meters_latency_is_told_what_to_write() {
        let n = notes_of(|t| t.replace(", latency: 1500ms", ""));
        assert_eq!(n.len(), 1, "{n:?}");
        assert!(n[0].contains("point \"grid\" has latency 0 ms") && n[0].contains("add `latency: 1500ms`"), "{n:?}");
    }
}
