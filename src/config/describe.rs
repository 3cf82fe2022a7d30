//! The resolved model as a person reads it: what `spillway check` prints. Loads in
//! priority order, each rule as the engine understood it, every threshold with units.

use std::fmt::Write as _;

use super::model::*;
use crate::units::{format_duration, trim_number};

/// Renders the whole site.
pub fn describe(site: &Site) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "{} — time zone {}", site.name, site.timezone.name());
    let connection = match &site.connection {
        Connection::Grid { export, backup } => {
            let export = match export {
                ExportPolicy::Allowed => "export allowed".to_owned(),
                ExportPolicy::Forbidden => "export forbidden".to_owned(),
                ExportPolicy::Limited(p) => format!("export limited to {p}"),
            };
            format!("grid-tied{}, {export}", if backup.is_some() { " with backup" } else { "" })
        }
        Connection::OffGrid(og) => format!(
            "off-grid: float at {} (−{} to leave), full at {}, battery takes up to {} before dump loads, {} assumed spare in float",
            og.float_voltage, og.float_hysteresis, og.full_soc, og.charge_acceptance, og.float_headroom
        ),
    };
    // Off-grid there is no meter to hold at a target and no export to guard.
    let off_grid = matches!(site.connection, Connection::OffGrid(_));
    if off_grid {
        let _ = writeln!(out, "  {connection}; engine tick {}", format_duration(site.tick));
    } else {
        let _ = writeln!(
            out,
            "  {connection}; import target {}; engine tick {}",
            site.import_target,
            format_duration(site.tick)
        );
        // The margin matters only under a non-zero limit (a no-export site is held at
        // its import target).
        let margin = match site.export_limit() {
            Some(l) if l.0 > 0.0 => format!(", holds export {} under the limit", site.guard.margin),
            _ => String::new(),
        };
        let _ = writeln!(
            out,
            "  export guard: tolerance {}{margin}, escalates to the safe limit after {}, releases at {}/s",
            site.guard.tolerance,
            format_duration(site.guard.deadline),
            site.guard.release_rate
        );
    }
    let _ = writeln!(
        out,
        "  fail-safe: points stale after {} unless set per point; loads held {} after signals return",
        format_duration(site.failsafe.stale_after),
        format_duration(site.failsafe.recovery_hold)
    );
    if let Some(inv) = &site.inverter {
        let _ = writeln!(
            out,
            "  inverter: rated {}, limit {}, safe limit {}, re-written every {}",
            inv.rated,
            write_text(site, &inv.limit),
            inv.safe_limit,
            format_duration(inv.refresh)
        );
    }
    if let Some(p) = site.self_run_battery() {
        let _ = writeln!(
            out,
            "  battery: `{}` reads a battery on its own control (no load commands it): its discharge counts as import for the loads",
            site.points[p.0].name
        );
    }
    if let Some(m) = &site.mqtt {
        let _ = writeln!(
            out,
            "  MQTT: {}:{} as {}{}, topics under {}/",
            m.host,
            m.port,
            m.client_id,
            if m.tls.is_some() { " over TLS" } else { "" },
            m.topic_prefix
        );
        if let Some(d) = &m.discovery {
            let _ = writeln!(
                out,
                "  Home Assistant discovery under {}/ (boost and hold-off buttons: {})",
                d.prefix,
                format_duration(d.boost)
            );
        }
    }

    let _ = writeln!(out, "\ndevices");
    for d in &site.devices {
        let link = match &d.link {
            Link::ModbusTcp { host, port, unit } => format!("Modbus TCP {host}:{port} unit {unit}"),
            Link::ModbusRtu { path, unit, .. } => {
                format!("Modbus RTU {path} {}, unit {unit}", d.link.serial_framing().unwrap_or_default())
            }
            Link::Mqtt => "MQTT".to_owned(),
        };
        if matches!(d.link, Link::Mqtt) {
            // Published, not polled: poll and timeout mean nothing here.
            let _ = writeln!(out, "  {:<12} {link} (readings as published)", d.name);
            continue;
        }
        let _ = writeln!(
            out,
            "  {:<12} {link}{}, poll {}, timeout {}",
            d.name,
            if d.sunspec { ", SunSpec" } else { "" },
            format_duration(d.poll),
            format_duration(d.timeout)
        );
    }

    let _ = writeln!(out, "\npoints");
    for p in &site.points {
        let device = &site.devices[p.device.0].name;
        let source = match &p.read {
            PointRead::Modbus(m) => {
                let table = match m.table {
                    Table::Coil => "coil",
                    Table::DiscreteInput => "discrete input",
                    Table::InputRegister => "input register",
                    Table::HoldingRegister => "holding register",
                };
                let scale = match m.scale {
                    Scale::Factor(1.0) => String::new(),
                    Scale::Factor(f) => format!(" × {}", trim_number(f)),
                    Scale::Register { address, .. } => format!(" × 10^sf(register {address})"),
                };
                let ty = if m.value_type == ValueType::Bool {
                    String::new()
                } else {
                    format!(" {:?}", m.value_type).to_lowercase()
                };
                let missing = m.missing.map_or_else(String::new, |raw| format!(" ({raw:#06X} = no reading)"));
                format!("{table} {}{ty}{scale}{missing}", m.address)
            }
            PointRead::SunSpec(s) => format!("SunSpec {}.{}{}", s.model, s.point, factor_note(p.unit_factor)),
            PointRead::Mqtt(m) => match &m.payload {
                Payload::Plain => format!("topic {}{}", m.topic, factor_note(p.unit_factor)),
                Payload::Json(ptr) => format!("topic {} at {ptr}{}", m.topic, factor_note(p.unit_factor)),
            },
        };
        let what = if p.boolean {
            "on/off".to_owned()
        } else {
            p.dimension.describe().trim_start_matches("a ").trim_start_matches("an ").to_owned()
        };
        let role = if ROLE_NAMES.iter().any(|(n, _)| *n == p.name) { "  (site role)" } else { "" };
        let frozen =
            p.frozen_after.map_or(String::new(), |f| format!(", frozen after {} unchanged", format_duration(f)));
        // An MQTT point is published, not polled: its `poll` is the period it is
        // expected at, which sets its default stale_after.
        let every = match &p.read {
            PointRead::Mqtt(_) => "expected every",
            _ => "every",
        };
        let _ = writeln!(
            out,
            "  {:<16} {device}: {source}; {what}, {every} {}, stale after {}{frozen}{role}",
            p.name,
            format_duration(p.poll),
            format_duration(p.stale_after)
        );
    }

    let _ = writeln!(out, "\nloads, in priority order");
    if site.loads.is_empty() {
        let _ = writeln!(out, "  (none)");
    }
    for (i, l) in site.loads.iter().enumerate() {
        let _ = writeln!(out, "  {}. {} (priority {}) — {}", i + 1, l.name, l.priority, kind_text(site, &l.kind));
        for (word, rule) in [("start", &l.start), ("stop", &l.stop), ("inhibit", &l.inhibit)] {
            if let Some(r) = rule {
                let default = if r.origin.ends_with("(default)") { "   (default)" } else { "" };
                let _ = writeln!(out, "     {word:<8} {}{default}", r.rule.describe());
            }
        }
        let mut limits = Vec::new();
        if !l.min_on.is_zero() {
            limits.push(format!("min on {}", format_duration(l.min_on)));
        }
        if !l.min_off.is_zero() {
            limits.push(format!("min off {}", format_duration(l.min_off)));
        }
        if let Some(n) = l.max_starts_per_hour {
            limits.push(format!("at most {n} starts an hour"));
        }
        limits.push(format!(
            "safe state {}",
            match l.safe_state {
                SafeState::Off => "off",
                SafeState::On => "on",
                SafeState::Hold => "hold",
            }
        ));
        if matches!(site.connection, Connection::Grid { backup: Some(_), .. }) {
            limits.push(if l.shed_on_outage { "shed in an outage".to_owned() } else { "kept in an outage".to_owned() });
        }
        let _ = writeln!(out, "     {}", limits.join(", "));
        if let Some(p) = l.power {
            let _ = writeln!(out, "     metered by {}", site.points[p.0].name);
        }
        if let Some(v) = l.volume {
            let _ = writeln!(out, "     heats a tank of {} L", trim_number(v));
        }
        for ob in &l.obligations {
            let window = ob.grid_window().map_or(" (from surplus only)".to_owned(), |w| {
                // A window ends at midnight as 24:00, the way it was written.
                let end = if w.end == chrono::NaiveTime::MIN {
                    "24:00".to_owned()
                } else {
                    w.end.format("%H:%M").to_string()
                };
                format!(" (grid allowed {}–{end})", w.start.format("%H:%M"))
            });
            let point = match ob {
                Obligation::RunDaily { .. } => None,
                Obligation::ChargeBy { .. } => l.kind.soc_point(),
                Obligation::ReachBy { .. } | Obligation::Cycle { .. } => l.temperature,
            };
            let temp = point.map_or_else(String::new, |p| format!(" on {}", site.points[p.0].name));
            let _ = writeln!(out, "     obligation: {}{temp}{window}", ob.describe());
        }
    }
    out
}

fn kind_text(site: &Site, kind: &LoadKind) -> String {
    match kind {
        LoadKind::Switched { rated, switch } => {
            format!("switched, {rated}, {}", write_text(site, switch))
        }
        LoadKind::Stepped { stages, command } => {
            let stages: Vec<String> = stages.iter().map(ToString::to_string).collect();
            let how = match command {
                StageCommand::Relays(w) => w.iter().map(|w| write_text(site, w)).collect::<Vec<_>>().join(" / "),
                StageCommand::Register(w) => format!("stage number to {}", write_text(site, w)),
            };
            format!("stepped {}, {how}", stages.join(" → "))
        }
        LoadKind::Proportional { rated, min, step, setpoint, enable } => format!(
            "proportional up to {rated} (min {min}, step {step}), setpoint to {}{}",
            write_text(site, setpoint),
            enable_text(site, enable.as_ref())
        ),
        LoadKind::Charger {
            watts_per_amp,
            min,
            max,
            step,
            setpoint,
            enable,
            hold_min_from_grid,
            soc,
            car_capacity,
            ..
        } => format!(
            "charger {min}–{max} in steps of {step} ({} W per A), current to {}{}; {}{}{}",
            trim_number(*watts_per_amp),
            write_text(site, setpoint),
            enable_text(site, enable.as_ref()),
            if *hold_min_from_grid { "holds its minimum from the grid" } else { "pauses below its minimum" },
            soc.map_or_else(String::new, |p| format!("; the car's state of charge on {}", site.points[p.0].name)),
            car_capacity.map_or_else(String::new, |c| format!(" (a car of {c})"))
        ),
        LoadKind::Battery { max_charge, min_charge, soc_max, soc_resume, soc, setpoint, discharge, capacity } => {
            let discharge = match discharge {
                None => "; never discharged by Spillway".to_string(),
                Some(d) => format!(
                    "; discharges up to {} to cover the house's own import{}, down to {}",
                    d.max,
                    d.window
                        .map(|w| format!(" in {}..{}", w.start.format("%H:%M"), w.end.format("%H:%M")))
                        .unwrap_or_default(),
                    d.soc_min
                ),
            };
            format!(
                "battery{} charging from {min_charge} up to {max_charge} until {} reaches {soc_max} (resumes below {soc_resume}){discharge}, power to {}",
                capacity.map_or_else(String::new, |c| format!(" of {c}")),
                site.points[soc.0].name,
                write_text(site, setpoint)
            )
        }
    }
}

/// A proportional load's or a charger's enable relay, as `check` shows it after the
/// setpoint: `, enabled by coil 3 on relays` (nothing without one).
fn enable_text(site: &Site, enable: Option<&Write>) -> String {
    enable.map_or_else(String::new, |e| format!(", enabled by {}", write_text(site, e)))
}

/// Where a write goes, as `check` shows it: `coil 3 on relays`, `topic … via …`.
pub fn write_text(site: &Site, w: &Write) -> String {
    let device = &site.devices[w.device().0].name;
    match w {
        Write::Coil { address, .. } => format!("coil {address} on {device}"),
        Write::Register { address, value_type, scale, .. } => {
            let scale = if *scale == 1.0 { String::new() } else { format!(" ÷ {}", trim_number(*scale)) };
            format!("register {address} ({}{scale}) on {device}", format!("{value_type:?}").to_lowercase())
        }
        Write::Mqtt { topic, .. } => format!("topic {topic} via {device}"),
        Write::SunSpecLimit { .. } => format!("SunSpec power limit on {device}"),
    }
}

/// The factor a topic or SunSpec value is multiplied by (its unit's and its `scale`),
/// shown when it is not 1; a negative one is called out, since it reverses the sign.
fn factor_note(factor: f64) -> String {
    if factor == 1.0 {
        String::new()
    } else if factor < 0.0 {
        format!(" × {} (sign reversed)", trim_number(factor))
    } else {
        format!(" × {}", trim_number(factor))
    }
}

#[cfg(test)]
mod tests {
    use crate::config::load_str;

    /// `spillway check` shows what a topic's or SunSpec value is multiplied by, and calls
    /// out a reversed sign: the installer must see it before anything is switched.
    #[test]
    fn a_reversed_sign_on_a_topic_point_is_shown() {
        let yaml = "site: { name: Flip, timezone: Europe/Lisbon }\nmqtt: { broker: 127.0.0.1:1883 }\n\
            devices:\n  home: { mqtt: true }\npoints:\n  grid: { device: home, topic: meter/feed_in, unit: kW, scale: -1 }\n  \
            pv: { device: home, topic: pv/power, unit: W }\n";
        let site = load_str("flip.yaml", yaml).map_err(|e| e.render(false)).unwrap().site;
        let text = super::describe(&site);
        assert!(text.contains("topic meter/feed_in × -1000 (sign reversed); power"), "{text}");
        assert!(text.contains("topic pv/power; power"), "{text}");
        // An MQTT device is not polled: no poll period or timeout is shown for it.
        let home = text.lines().find(|l| l.trim_start().starts_with("home ")).unwrap_or_default();
        assert!(home.contains("MQTT (readings as published)") && !home.contains("poll"), "{text}");
    }
}
