//! `spillway read SITE.yaml [--device NAME] [--record FILE]`: every point read once, raw and decoded,
//! for an installer checking the wiring, and the coils and registers the site's loads
//! write read back (never written). Exit 0 when everything answered, 1 otherwise (a
//! device with only actuators counts as answering when a read-back drew a normal
//! answer); a value outside its unit's physical range gets a note, not exit 1 (see
//! `plausibility`).

use std::fmt::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Duration;

use spillway::actuators::modbus::limit_model_note;
use spillway::config::model::{DeviceId, PointId, PointRead, Scale, Site, ValueType, Write};
use spillway::daemon::commission;
use spillway::sources::modbus::probe::TargetReading;
use spillway::units::{Dimension, Power, trim_number};

use super::logging::{self, LogFormat};

/// Arguments of `read`.
#[derive(Debug, clap::Args)]
pub struct ReadArgs {
    /// The site file (YAML).
    pub site: PathBuf,
    /// Only this device.
    #[arg(long, value_name = "NAME")]
    pub device: Option<String>,
    /// How long to listen for MQTT points.
    #[arg(long, value_name = "DURATION", default_value = "5s", value_parser = super::parse_duration)]
    pub listen: Duration,
    /// Append the readings to this commissioning record (Markdown; started with the site
    /// as Spillway reads it when new).
    #[arg(long, value_name = "FILE")]
    pub record: Option<PathBuf>,
}

fn value_text(site: &Site, point: PointId, v: f64) -> String {
    let p = &site.points[point.0];
    if p.boolean {
        return if v != 0.0 { "on (1)".to_owned() } else { "off (0)".to_owned() };
    }
    let unit = p.dimension.base_unit();
    let v = (v * 1000.0).round() / 1000.0;
    if unit.is_empty() { trim_number(v) } else { format!("{} {unit}", trim_number(v)) }
}

/// A read-back actuator target: a coil `on`/`off`, a register in the unit it is
/// written in (`0.0 %`, `16.0 A`; a stage number bare) with its raw words.
fn target_text(t: &TargetReading, unit: &str) -> String {
    let v = match &t.value {
        Ok(v) => *v,
        Err(e) => return format!("not read: {e}"),
    };
    if matches!(t.write, Write::Coil { .. }) {
        return if v != 0.0 { "on".to_owned() } else { "off".to_owned() };
    }
    let raw: Vec<String> = t.raw.iter().map(|w| format!("0x{w:04X}")).collect();
    let shown = if unit.is_empty() { trim_number(v) } else { format!("{v:.1} {unit}") };
    format!("{shown}  [{}]", raw.join(" "))
}

/// A note for a value outside what its unit can physically be: a percentage outside
/// 0–100, a temperature outside −50…150 °C (common practice for what a site's sensors
/// see; a boiler's flue would be outside it). Mostly a missing or wrong `scale`, or an
/// unsigned `type` on a value that went below zero. Power is judged by the daemon
/// against the site's ratings, so not here.
fn plausibility(site: &Site, point: PointId, v: f64) -> Option<String> {
    let p = &site.points[point.0];
    if p.boolean || !v.is_finite() {
        return None;
    }
    let (low, high, range) = match p.dimension {
        Dimension::Ratio => (0.0, 100.0, "0–100 %"),
        Dimension::Temperature => (-50.0, 150.0, "−50…150 °C"),
        _ => return None,
    };
    if (low..=high).contains(&v) {
        return None;
    }
    let shown = value_text(site, point, v);
    let (scale, unsigned16) = match &p.read {
        PointRead::Modbus(m) => (
            match m.scale {
                Scale::Factor(f) => Some(f),
                Scale::Register { .. } => None,
            },
            m.value_type == ValueType::U16,
        ),
        _ => (None, false),
    };
    // A raw word with its top bit set on an unsigned point: a negative value read as
    // a large positive one.
    let top_bit = |f: f64| {
        let raw = (v / f / p.unit_factor).round();
        unsigned16 && (32_768.0..65_536.0).contains(&raw)
    };
    let advice = match scale {
        Some(f) if f != 0.0 && top_bit(f) => "check `type` (`i16` if it can be below zero)".to_owned(),
        Some(f) if v > high && f > 0.0 => {
            let tenths = (v / high).log10().ceil() as i32;
            format!("check `scale` ({}?)", trim_number(f * 10f64.powi(-tenths)))
        }
        _ => "check `type` and `scale`".to_owned(),
    };
    Some(format!("{shown} is outside {range}: {advice}"))
}

/// The line about the inverter's power-limit control, for the device the site writes
/// its SunSpec limit to: which model it uses and what happens if Spillway stops.
fn limit_note(site: &Site, device: DeviceId, models: &[(u16, u16)]) -> Option<String> {
    let limit_device = match site.inverter.as_ref().map(|i| &i.limit) {
        Some(Write::SunSpecLimit { device }) => *device,
        _ => return None,
    };
    if limit_device != device {
        return None;
    }
    let ids: Vec<u16> = models.iter().map(|&(id, _)| id).collect();
    match limit_model_note(site, &ids) {
        Some(Ok(note)) => Some(note),
        Some(Err(warning)) => Some(format!("warning: {warning}")),
        None if models.is_empty() => None,
        None => Some("warning: no SunSpec model 123 or 704: the inverter limit cannot be written".to_owned()),
    }
}

pub fn run(args: ReadArgs, format: LogFormat) -> anyhow::Result<ExitCode> {
    let loaded = match super::run::load_site(&args.site) {
        Ok(l) => l,
        Err(code) => return Ok(code),
    };
    logging::init(format, "warn");
    if let Some(path) = &args.record
        && let Err(e) = super::record::writable(path)
    {
        eprintln!("error: cannot write the record {}: {e}", path.display());
        return Ok(ExitCode::from(2));
    }
    let site_text = loaded.source.text.clone();
    let site = loaded.site;
    let only = match &args.device {
        Some(name) => match site.device(name) {
            Some((id, _)) => Some(id),
            None => {
                let names: Vec<&str> = site.devices.iter().map(|d| d.name.as_str()).collect();
                eprintln!("error: the site has no device \"{name}\" (devices: {})", names.join(", "));
                // A bad flag value: an error that stops the command.
                return Ok(ExitCode::from(2));
            }
        },
        None => None,
    };
    let (devices, mqtt) = commission::read(&site, only, args.listen, Duration::from_secs(3))?;
    let width = site.points.iter().map(|p| p.name.len()).max().unwrap_or(4).max(5);
    let mut problems = 0usize;
    // Printed at the end, and the record's text.
    let mut out = String::new();
    for d in &devices {
        let dev = &site.devices[d.device.0];
        match &d.result {
            Err(e) => {
                problems += 1;
                let _ = writeln!(out, "{}: {e}", dev.name);
            }
            Ok(probe) => {
                let models = if probe.models.is_empty() {
                    String::new()
                } else {
                    let m: Vec<String> = probe.models.iter().map(|(id, at)| format!("{id}@{at}")).collect();
                    format!("  SunSpec models {}", m.join(" "))
                };
                let _ = writeln!(out, "{}{models}", dev.name);
                if let Some(note) = limit_note(&site, d.device, &probe.models) {
                    let _ = writeln!(out, "  {note}");
                }
                let actuators = commission::actuator_targets(&site, d.device);
                if probe.points.is_empty() && probe.targets.is_empty() {
                    let _ = writeln!(out, "  (no points configured)");
                } else if probe.points.is_empty() {
                    let _ = writeln!(out, "  (no points; the site's actuators on it read back, nothing written)");
                }
                let origin_width = probe.points.iter().map(|r| r.origin.chars().count()).max().unwrap_or(0).max(18);
                for r in &probe.points {
                    let name = &site.points[r.point.0].name;
                    let raw: Vec<String> = r.raw.iter().map(|w| format!("0x{w:04X}")).collect();
                    let shown = match &r.value {
                        Ok(v) => value_text(&site, r.point, *v),
                        Err(e) => {
                            problems += 1;
                            format!("error: {e}")
                        }
                    };
                    let _ = writeln!(
                        out,
                        "  {name:<width$}  {:<origin_width$}  {:<24}  {shown}",
                        r.origin,
                        format!("[{}]", raw.join(" "))
                    );
                    if let Some(note) = r.value.as_ref().ok().and_then(|v| plausibility(&site, r.point, *v)) {
                        let _ = writeln!(out, "    note: {note}");
                    }
                }
                if !probe.points.is_empty() && !probe.targets.is_empty() {
                    let _ = writeln!(out, "  actuators, read back (nothing written):");
                }
                for t in &probe.targets {
                    let label = actuators.iter().find(|a| a.write == t.write);
                    let what = label.map_or("", |a| a.what.as_str());
                    let _ = writeln!(out, "  {} ({what}) {}", t.origin, target_text(t, label.map_or("", |a| a.unit)));
                }
                // A device with nothing but actuators is judged by whether it answers
                // their read-back: silence, or nothing but exceptions, is a device not
                // answering (a module unplugged behind a gateway, a wrong unit id).
                if probe.points.is_empty() && !probe.targets.is_empty() && !probe.answered {
                    problems += 1;
                    let why = probe.targets.iter().find_map(|t| t.value.as_ref().err()).map_or("", String::as_str);
                    let _ = writeln!(out, "  error: the device does not answer: {why}");
                }
            }
        }
    }
    if let Some(m) = &mqtt {
        let _ = writeln!(out, "mqtt (listened {})", spillway::units::format_duration(args.listen));
        if let Some(e) = &m.error {
            problems += 1;
            let _ = writeln!(out, "  error: {e}");
        }
        for (point, v) in &m.samples {
            let p = &site.points[point.0];
            let topic = match &p.read {
                spillway::config::model::PointRead::Mqtt(r) => r.topic.as_str(),
                _ => "",
            };
            let shown = match v {
                Some(v) => value_text(&site, *point, *v),
                None => {
                    problems += 1;
                    "nothing received".to_owned()
                }
            };
            let _ = writeln!(out, "  {:<width$}  {topic:<40}  {shown}", p.name);
            if let Some(note) = v.and_then(|v| plausibility(&site, *point, v)) {
                let _ = writeln!(out, "    note: {note}");
            }
        }
        for (topic, detail) in &m.malformed {
            let _ = writeln!(out, "  malformed on {topic}: {detail}");
        }
    }
    // Export while the PV gives nothing is what a meter read the wrong way round shows
    // (import must be positive); a battery could also do it, so it is a note, not a
    // problem.
    let mut read: Vec<(PointId, f64)> = Vec::new();
    for d in &devices {
        if let Ok(probe) = &d.result {
            read.extend(probe.points.iter().filter_map(|r| r.value.as_ref().ok().map(|v| (r.point, *v))));
        }
    }
    if let Some(m) = &mqtt {
        read.extend(m.samples.iter().filter_map(|(p, v)| v.map(|v| (*p, v))));
    }
    let role = |id: Option<PointId>| id.and_then(|id| read.iter().find(|(p, _)| *p == id).map(|(_, v)| *v));
    let battery = site.roles.battery_power.is_some()
        || site.loads.iter().any(|l| matches!(l.kind, spillway::config::model::LoadKind::Battery { .. }));
    if let (Some(grid), Some(pv)) = (role(site.roles.grid), role(site.roles.pv))
        && grid < -100.0
        && pv < 50.0
        && !battery
    {
        let _ = writeln!(
            out,
            "note: the grid reads {} (export) while the PV gives {}: with nothing else to export, the meter's sign looks reversed (import must be positive; `scale: -1` on the `grid` point turns it round). `spillway step-test` tells for sure",
            Power(grid.round()),
            Power(pv.round())
        );
    }
    print!("{out}");
    if let Some(path) = &args.record {
        let title = match &args.device {
            Some(name) => format!("Readings: {name}"),
            None => "Readings".to_owned(),
        };
        if problems > 0 {
            let _ = writeln!(out, "{problems} problem(s)");
        }
        let section = super::record::Section { title, text: &out, passed: problems == 0 };
        if let Err(e) = super::record::append(path, &site, &args.site, &site_text, &section) {
            eprintln!("error: cannot write the record {}: {e}", path.display());
            return Ok(ExitCode::from(2));
        }
        println!("readings appended to the record {}", path.display());
    }
    if problems > 0 {
        eprintln!("{problems} problem(s): see above");
        return Ok(ExitCode::from(1));
    }
    Ok(ExitCode::SUCCESS)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn note(point: &str, v: f64) -> Option<String> {
        let yaml = "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  bms: { modbus_tcp: 127.0.0.1:5020, unit: 4 }
points:
  grid: { device: bms, register: 0, type: i16, unit: W }
  battery_soc: { device: bms, register: 10, unit: '%' }
  tank_temp: { device: bms, register: 11, scale: 0.1, unit: °C }
";
        let site = spillway::config::load_str("test.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false))).site;
        let (id, _) = site.point(point).unwrap();
        plausibility(&site, id, v)
    }

    #[test]
    fn values_outside_their_units_physical_range_get_a_note() {
        assert_eq!(note("battery_soc", 965.0).as_deref(), Some("965 % is outside 0–100 %: check `scale` (0.1?)"));
        assert_eq!(note("battery_soc", 96.5), None);
        assert_eq!(note("tank_temp", 552.0).as_deref(), Some("552 °C is outside −50…150 °C: check `scale` (0.01?)"));
        // A negative temperature read as u16: 0xFFF6 × 0.1.
        assert_eq!(
            note("tank_temp", 6552.6).as_deref(),
            Some("6552.6 °C is outside −50…150 °C: check `type` (`i16` if it can be below zero)")
        );
        assert_eq!(note("tank_temp", 55.2), None);
        assert_eq!(note("grid", 1.0e6), None, "power is judged against the site, not here");
    }
}
