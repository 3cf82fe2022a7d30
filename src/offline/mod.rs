//! Offline runs: the engine against the simulated plant, in-process, in simulated time,
//! as fast as the CPU allows — a day, a month or a year in seconds, with the same
//! engine and the same site file as the live daemon.
//!
//! `simulate` runs the site's rules and, on the same weather and seed, a baseline of the
//! same house without diversion, and reports energies, export, guard response times,
//! per-load figures, obligations, monthly import against tariff blocks and costs.

pub mod baseline;
pub mod bind;
pub mod chart;
pub mod compare;
pub mod expect;
pub mod plausible;
pub mod replay;
pub mod report;
pub mod run;
pub mod sweep;

use std::path::PathBuf;

pub use report::Report;
pub use run::{Controller, RunOptions, RunOutput, Trace, simulate_once};

/// Why an offline run could not be done.
#[derive(Debug, thiserror::Error)]
pub enum OfflineError {
    /// The site file has no `plant:` section.
    #[error(
        "{path} has no `plant:` section: offline runs need a simulated plant; copy the `plant:` of an example in config/ and adjust its array, house and loads (README, \"The `plant:` section, key by key\"), and if this file's points and actuators are a real site's addresses, add `simulation.bind` (README, \"`simulation`\")"
    )]
    NoPlant {
        /// The site file.
        path: String,
    },
    /// The `plant:` section does not parse.
    #[error("{path}: the plant section is invalid: {message}")]
    PlantSection {
        /// The site file.
        path: String,
        /// The YAML/serde message with its line and column.
        message: String,
    },
    /// The plant could not be built.
    #[error("the simulated plant cannot be built: {0}")]
    Plant(#[from] spillway_sim::site::SiteError),
    /// A point or actuator of the site has no counterpart in the plant.
    #[error(
        "{point}: {why}\n  offline runs read and write the simulated devices at the addresses the site file names: a site file written for real devices runs offline once `simulation.bind` names, for each point and actuator the simulator does not have at that address, the simulator's own quantity or control (README: \"simulation.bind\"); SunSpec points carry over as they are"
    )]
    Binding {
        /// The point or actuator.
        point: String,
        /// Why.
        why: String,
    },
    /// The dates or options make no sense.
    #[error("{0}")]
    Options(String),
    /// A recorded series could not be used.
    #[error("{path}: {message}")]
    Recorded {
        /// The CSV file.
        path: PathBuf,
        /// What is wrong.
        message: String,
    },
    /// An output file could not be written.
    #[error("cannot write {path}: {source}")]
    Write {
        /// The file.
        path: PathBuf,
        /// The OS error.
        #[source]
        source: std::io::Error,
    },
    /// The chart could not be drawn.
    #[error("cannot draw the chart: {0}")]
    Chart(String),
}

/// Where an offline run finds a site's own points and actuators on the simulated plant
/// (`simulation.bind`), for a site file written for real devices: each named point reads
/// a quantity the simulator reports, each named load's actuators drive the simulator's
/// controls, and the inverter limit goes to the simulated inverter. Everything not named
/// is found at the address the site file gives, as without it.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct SimBind {
    /// Point name → the simulator's quantity: its MQTT state topic without `sim/`
    /// (`meter/power`, `tank/temperature`).
    pub points: Vec<(String, String)>,
    /// Load name → one simulator control per actuator of the load, in the load's order
    /// (`relay/tank`, `ev/current`; `None` for `none`: that actuator is not simulated).
    pub loads: Vec<(String, Vec<Option<String>>)>,
    /// The inverter limit is written to the simulated inverter (`inverter/limit`).
    pub inverter_limit: bool,
}

impl SimBind {
    /// The quantity bound to a point, if any.
    pub fn point(&self, name: &str) -> Option<&str> {
        self.points.iter().find(|(n, _)| n == name).map(|(_, q)| q.as_str())
    }
    /// The controls bound to a load's actuators, if any.
    pub fn load(&self, name: &str) -> Option<&[Option<String>]> {
        self.loads.iter().find(|(n, _)| n == name).map(|(_, c)| c.as_slice())
    }
}

/// The `plant:` section and how the site's points and actuators meet it.
#[derive(Debug, Clone)]
pub struct PlantSection {
    /// The simulated plant.
    pub config: spillway_sim::plant::PlantConfig,
    /// `simulation.bind` (empty: every point and actuator at its own address).
    pub bind: SimBind,
}

impl std::ops::Deref for PlantSection {
    type Target = spillway_sim::plant::PlantConfig;
    fn deref(&self) -> &Self::Target {
        &self.config
    }
}

impl std::ops::DerefMut for PlantSection {
    fn deref_mut(&mut self) -> &mut Self::Target {
        &mut self.config
    }
}

/// Reads the `plant:` section of a loaded site file, with `simulation.bind`.
pub fn plant_section(loaded: &crate::config::Loaded) -> Result<PlantSection, OfflineError> {
    let config = plant_config(loaded)?;
    Ok(PlantSection { config, bind: sim_bind(loaded)? })
}

/// Reads `simulation.bind` (absent → empty), checking each name against the site.
pub fn sim_bind(loaded: &crate::config::Loaded) -> Result<SimBind, OfflineError> {
    use crate::config::yaml::{Diagnostics, MapReader, Value};
    let mut out = SimBind::default();
    let Value::Map(top) = &loaded.tree.value else { return Ok(out) };
    let Some((_, sim)) = top.iter().find(|(k, _)| k.name == "simulation") else { return Ok(out) };
    let Value::Map(entries) = &sim.value else { return Ok(out) };
    let Some((_, node)) = entries.iter().find(|(k, _)| k.name == "bind") else { return Ok(out) };
    let mut diags = Diagnostics::default();
    let site = &loaded.site;
    let text = |n: &crate::config::yaml::Node, diags: &mut Diagnostics| -> Option<String> {
        match n.scalar_text() {
            Some(t) if !t.trim().is_empty() => Some(t.trim().trim_start_matches("sim/").to_owned()),
            _ => {
                diags.error(
                    "C0503",
                    format!("expected the name of a simulated quantity or control, found {}", n.value.kind()),
                    n.span.clone(),
                    "such as meter/power, tank/temperature, relay/tank or ev/current",
                );
                None
            }
        }
    };
    if let Some(mut m) = MapReader::new(node, "`simulation.bind`", &mut diags) {
        if let Some(n) = m.get("points") {
            for (name, v) in named_entries(n, "point", |x| site.point(x).is_some(), "grid: meter/power", &mut diags) {
                if let Some(q) = text(v, &mut diags) {
                    out.points.push((name.to_owned(), q));
                }
            }
        }
        if let Some(n) = m.get("loads") {
            for (name, v) in
                named_entries(n, "load", |x| site.load(x).is_some(), "water_heater: relay/tank", &mut diags)
            {
                let items: Vec<&crate::config::yaml::Node> = match &v.value {
                    Value::Seq(list) => list.iter().collect(),
                    _ => vec![v],
                };
                let mut controls = Vec::with_capacity(items.len());
                for (i, item) in items.into_iter().enumerate() {
                    let Some(t) = text(item, &mut diags) else { continue };
                    // A control of the wrong kind for its actuator (a relay for a
                    // setpoint) would have every write refused during the run.
                    if t != "none"
                        && let Some((_, load)) = site.load(name)
                        && let Some(why) = bind::bound_control_misfit(load, i, &t)
                    {
                        diags.error("C0504", why, item.span.clone(), "one control per actuator, of its kind");
                    }
                    controls.push((t != "none").then_some(t));
                }
                out.loads.push((name.to_owned(), controls));
            }
        }
        if let Some(n) = m.get("inverter_limit") {
            match text(n, &mut diags).as_deref() {
                Some("inverter/limit") => out.inverter_limit = true,
                Some(_) => diags.error(
                    "C0503",
                    "the inverter limit can only be bound to `inverter/limit`",
                    n.span.clone(),
                    "inverter_limit: inverter/limit",
                ),
                None => {}
            }
        }
        m.finish(&mut diags);
    }
    if diags.has_errors() {
        let text = crate::diag::render_short(&loaded.source.path, &loaded.source.text, &diags.list);
        return Err(OfflineError::Options(text.trim_end().to_owned()));
    }
    Ok(out)
}

/// The entries of a `simulation.bind` map (`points` or `loads`) whose names the site
/// defines; every other name, or a value that is not a map, is an error.
fn named_entries<'n>(
    node: &'n crate::config::yaml::Node,
    what: &str,
    known: impl Fn(&str) -> bool,
    example: &str,
    diags: &mut crate::config::yaml::Diagnostics,
) -> Vec<(&'n str, &'n crate::config::yaml::Node)> {
    let crate::config::yaml::Value::Map(entries) = &node.value else {
        diags.error(
            "C0503",
            format!("this must map {what} names to the simulator's names, found {}", node.value.kind()),
            node.span.clone(),
            example,
        );
        return Vec::new();
    };
    let mut out = Vec::new();
    for (k, v) in entries {
        if known(&k.name) {
            out.push((k.name.as_str(), v));
        } else {
            diags.error(
                "C0502",
                format!("no {what} named `{}` in this site", k.name),
                k.span.clone(),
                format!("bind a {what} the site defines under `{what}s:`"),
            );
        }
    }
    out
}

/// The `plant:` section alone.
fn plant_config(loaded: &crate::config::Loaded) -> Result<spillway_sim::plant::PlantConfig, OfflineError> {
    let path = loaded.source.path.clone();
    match spillway_sim::site::from_site_yaml(&loaded.source.text) {
        Ok(Some(mut p)) => {
            // A measured series named in the site file is found next to it, wherever the
            // command is run from.
            if let Some(m) = &mut p.weather.measured
                && m.path.is_relative()
                && let Some(dir) = std::path::Path::new(&path).parent()
            {
                m.path = dir.join(&m.path);
            }
            Ok(p)
        }
        Ok(None) => Err(OfflineError::NoPlant { path }),
        Err(e) => {
            Err(OfflineError::PlantSection { path, message: e.to_string().lines().next().unwrap_or("").to_owned() })
        }
    }
}

/// The `plant:` section, built once and bound to the site's points and actuators: what
/// `check` reports and what the offline commands verify before spending time on runs.
pub fn checked_plant(loaded: &crate::config::Loaded) -> Result<PlantSection, OfflineError> {
    let p = plant_section(loaded)?;
    check_plant_timezone(loaded, &p)?;
    let options = spillway_sim::site::SiteOptions { start_ms: 0, seed: 1, sky: None };
    let built = spillway_sim::site::build(&p, &options)?;
    bind::Binding::new(&loaded.site, &built, &p.bind, true)?;
    Ok(p)
}

/// The plant keeps its household's schedules (draws, appliances, car sessions) in its
/// own time zone and the rules run on the site's: two zones in one file shift the one
/// against the other by an hour or more, which no report shows. Refused where the plant
/// names a zone (`plant.location.timezone`, or `plant.timezone`) other than the site's.
fn check_plant_timezone(loaded: &crate::config::Loaded, p: &PlantSection) -> Result<(), OfflineError> {
    use crate::config::yaml::Value;
    let site_tz = loaded.site.timezone.name();
    let given = match &p.location {
        Some(l) => Some((l.timezone.as_str(), "plant.location.timezone")),
        None => {
            // `plant.timezone` defaults to UTC; only a zone written in the file counts.
            let Value::Map(top) = &loaded.tree.value else { return Ok(()) };
            let written = top
                .iter()
                .find(|(k, _)| k.name == "plant")
                .is_some_and(|(_, n)| matches!(&n.value, Value::Map(m) if m.iter().any(|(k, _)| k.name == "timezone")));
            written.then_some((p.timezone.as_str(), "plant.timezone"))
        }
    };
    match given {
        Some((plant_tz, key)) if plant_tz != site_tz => Err(OfflineError::Options(format!(
            "{}: the plant's time zone ({plant_tz}, {key}) is not the site's ({site_tz}, site.timezone): the simulated household would keep its hours in one and the rules theirs in the other; give both the same zone",
            loaded.source.path
        ))),
        _ => Ok(()),
    }
}

/// Defaults for offline runs from the site file's optional `simulation:` section, so an
/// example can say which week shows it best (`from: 2026-06-15`, `days: 7`, `seed: 3`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SimulationDefaults {
    /// First local day.
    pub from: Option<chrono::NaiveDate>,
    /// Number of days.
    pub days: Option<u32>,
    /// Seed.
    pub seed: Option<u64>,
}

/// Reads the `simulation:` section (absent → no defaults).
pub fn simulation_defaults(loaded: &crate::config::Loaded) -> Result<SimulationDefaults, OfflineError> {
    use crate::config::yaml::{Diagnostics, MapReader, Value};
    let mut out = SimulationDefaults { from: None, days: None, seed: None };
    let Value::Map(top) = &loaded.tree.value else { return Ok(out) };
    let Some((_, node)) = top.iter().find(|(k, _)| k.name == "simulation") else { return Ok(out) };
    let mut diags = Diagnostics::default();
    if let Some(mut m) = MapReader::new(node, "the `simulation` section", &mut diags) {
        if let Some(n) = m.get("from") {
            use crate::config::values::{DateError, parse_date};
            match n.scalar_text().map(|t| (parse_date(&t), t)) {
                Some((Ok(d), _)) => out.from = Some(d),
                Some((Err(DateError::NoSuchDay(why)), t)) => {
                    diags.error("C0501", format!("there is no date {}", t.trim()), n.span.clone(), why)
                }
                _ => diags.error(
                    "C0501",
                    "`from` must be a date such as 2026-06-15",
                    n.span.clone(),
                    "expected YYYY-MM-DD",
                ),
            }
        }
        if let Some(n) = m.get("days") {
            out.days =
                crate::config::values::integer(n, 1, i64::from(run::MAX_DAYS), "`days`", &mut diags).map(|d| d as u32);
        }
        if let Some(n) = m.get("seed") {
            out.seed = crate::config::values::integer(n, 0, i64::MAX, "`seed`", &mut diags).map(|s| s as u64);
        }
        // Read by `sim_bind`, with the plant.
        let _ = m.get("bind");
        m.finish(&mut diags);
    }
    if diags.has_errors() {
        let text = crate::diag::render_short(&loaded.source.path, &loaded.source.text, &diags.list);
        return Err(OfflineError::Options(text.trim_end().to_owned()));
    }
    Ok(out)
}
