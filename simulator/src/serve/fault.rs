//! The fault syntax of `spillway-sim serve --fault SPEC` and `ServerHandle::inject_spec`:
//! one short text per fault, mapped onto the plant's [`FaultConfig`].
//!
//! ```text
//! SPEC     = KIND [":" ARG]* ["@" START] ["+" DURATION]
//! KIND     = meter-silent
//!          | meter-frozen                        answers, but repeats its last reading
//!          | restart:DEVICE                      DEVICE = meter | inverter | relays | sensors
//!          | relay-stuck:CHANNEL[:closed|:open]  closed by default
//!          | garbage:DEVICE[:nan|:spike|:random] random by default
//! START    = a duration after the start (120s, 5min, 2h; a plain number is seconds),
//!            or an RFC 3339 instant with its offset (2026-06-21T12:00:00+02:00);
//!            absent = at once
//! DURATION = a duration; absent = until the server stops
//! ```
//!
//! Examples: `meter-silent@120s+30s`, `relay-stuck:pump:open@1h+10min`,
//! `restart:inverter@10min+20s`, `garbage:meter:spike@90s+5s`.

use crate::plant::config::{Device, FaultConfig, GarbageMode, When};
use crate::quantity::{self, Kind};

use super::ServeError;

/// Duration of a fault given without `+DURATION`: a century, so the schedule stays in
/// range of an `i64` of milliseconds.
const OPEN_ENDED_S: f64 = 100.0 * 365.25 * 86_400.0;

/// Parses one fault spec (see the module docs). A relative start counts from the run's
/// start on the command line, and from the moment of injection at run time.
pub fn parse_fault(spec: &str) -> Result<FaultConfig, ServeError> {
    let bad = |why: String| ServeError::FaultSpec { spec: spec.to_owned(), why };
    let text = spec.trim();
    // The duration is what follows the last `+`, if that parses as one: an RFC 3339
    // offset (`+02:00`) does not, so `@2026-06-21T12:00:00+02:00` keeps its offset.
    let (text, duration) = match text.rsplit_once('+') {
        Some((head, tail)) if !head.is_empty() && quantity::parse(tail, Kind::Duration).is_ok() => {
            (head, quantity::parse(tail, Kind::Duration).map_err(bad)?)
        }
        _ => (text, OPEN_ENDED_S),
    };
    if !(0.0..=OPEN_ENDED_S).contains(&duration) {
        return Err(bad(format!("the duration must be between 0 s and {OPEN_ENDED_S} s")));
    }
    let (what, start) = match text.split_once('@') {
        Some((what, start)) => (what, parse_start(start).map_err(bad)?),
        None => (text, When::After(0.0)),
    };
    let mut parts = what.split(':');
    let kind = parts.next().unwrap_or_default();
    let args: Vec<&str> = parts.collect();
    let arity = |max: usize| {
        if args.len() > max {
            Err(bad(format!("`{kind}` takes at most {max} argument(s) after `:`, found {}", args.len())))
        } else {
            Ok(())
        }
    };
    let fault = match kind {
        "meter-silent" => {
            arity(0)?;
            FaultConfig::MeterSilent { start, duration }
        }
        "meter-frozen" => {
            arity(0)?;
            FaultConfig::MeterFrozen { start, duration }
        }
        "restart" => {
            arity(1)?;
            let device = parse_device(args.first().copied()).map_err(bad)?;
            FaultConfig::DeviceRestart { device, start, duration }
        }
        "relay-stuck" => {
            arity(2)?;
            let channel = match args.first() {
                Some(c) if !c.is_empty() => (*c).to_owned(),
                _ => return Err(bad("`relay-stuck` needs a relay channel: relay-stuck:CHANNEL[:closed|:open]".into())),
            };
            let closed = match args.get(1).copied() {
                None | Some("closed") => true,
                Some("open") => false,
                Some(other) => return Err(bad(format!("a stuck relay is `closed` or `open`, found `{other}`"))),
            };
            FaultConfig::RelayStuck { channel, closed, start, duration }
        }
        "garbage" => {
            arity(2)?;
            let device = parse_device(args.first().copied()).map_err(bad)?;
            let mode = match args.get(1).copied() {
                None | Some("random") => GarbageMode::Random,
                Some("nan") => GarbageMode::Nan,
                Some("spike") => GarbageMode::Spike,
                Some(other) => return Err(bad(format!("garbage is `nan`, `spike` or `random`, found `{other}`"))),
            };
            FaultConfig::Garbage { device, mode, start, duration }
        }
        other => {
            return Err(bad(format!(
                "unknown fault `{other}`: use meter-silent, meter-frozen, restart:DEVICE, relay-stuck:CHANNEL or garbage:DEVICE"
            )));
        }
    };
    Ok(fault)
}

fn parse_start(text: &str) -> Result<When, String> {
    if let Ok(at) = chrono::DateTime::parse_from_rfc3339(text.trim()) {
        return Ok(When::At(at.timestamp_millis()));
    }
    match quantity::parse(text, Kind::Duration) {
        Ok(s) if (0.0..=OPEN_ENDED_S).contains(&s) => Ok(When::After(s)),
        _ => Err(format!(
            "the start `{text}` is neither a duration after the start (120s, 5min) nor an RFC 3339 instant with an offset"
        )),
    }
}

fn parse_device(text: Option<&str>) -> Result<Device, String> {
    match text {
        Some("meter") => Ok(Device::Meter),
        Some("inverter") => Ok(Device::Inverter),
        Some("relays") => Ok(Device::Relays),
        Some("sensors") => Ok(Device::Sensors),
        Some(other) => Err(format!("unknown device `{other}`: use meter, inverter, relays or sensors")),
        None => Err("this fault needs a device after `:` (meter, inverter, relays or sensors)".to_owned()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(spec: &str, expect: &str) {
        let got = match parse_fault(spec) {
            Ok(f) => format!("{f:?}"),
            Err(e) => format!("error: {e}"),
        };
        assert_eq!(got, expect, "{spec}");
    }

    #[test]
    fn specs_map_onto_plant_faults() {
        check("meter-silent@120s+30s", "MeterSilent { start: After(120.0), duration: 30.0 }");
        check("meter-silent+30s", "MeterSilent { start: After(0.0), duration: 30.0 }");
        check("meter-frozen@2min+1min", "MeterFrozen { start: After(120.0), duration: 60.0 }");
        check("restart:inverter@10min+20s", "DeviceRestart { device: Inverter, start: After(600.0), duration: 20.0 }");
        check(
            "relay-stuck:pool_pump@1h+10min",
            "RelayStuck { channel: \"pool_pump\", closed: true, start: After(3600.0), duration: 600.0 }",
        );
        check(
            "relay-stuck:heater.2:open@5",
            "RelayStuck { channel: \"heater.2\", closed: false, start: After(5.0), duration: 3155760000.0 }",
        );
        check(
            "garbage:meter:spike@90s+5s",
            "Garbage { device: Meter, mode: Spike, start: After(90.0), duration: 5.0 }",
        );
        check(
            "garbage:sensors",
            "Garbage { device: Sensors, mode: Random, start: After(0.0), duration: 3155760000.0 }",
        );
        // 2026-06-21T10:00:00Z = 1_782_036_000 s after the epoch.
        check(
            "meter-silent@2026-06-21T12:00:00+02:00+1min",
            "MeterSilent { start: At(1782036000000), duration: 60.0 }",
        );
        check(
            "meter-silent@2026-06-21T12:00:00+02:00",
            "MeterSilent { start: At(1782036000000), duration: 3155760000.0 }",
        );
    }

    #[test]
    fn mistakes_say_what_would_be_right() {
        check(
            "meter-quiet@1s",
            "error: fault `meter-quiet@1s`: unknown fault `meter-quiet`: use meter-silent, meter-frozen, restart:DEVICE, relay-stuck:CHANNEL or garbage:DEVICE",
        );
        check(
            "restart:pump@1s",
            "error: fault `restart:pump@1s`: unknown device `pump`: use meter, inverter, relays or sensors",
        );
        check(
            "relay-stuck:tank:welded",
            "error: fault `relay-stuck:tank:welded`: a stuck relay is `closed` or `open`, found `welded`",
        );
        check(
            "meter-silent@soon+1s",
            "error: fault `meter-silent@soon+1s`: the start `soon` is neither a duration after the start (120s, 5min) nor an RFC 3339 instant with an offset",
        );
        check(
            "meter-silent:x",
            "error: fault `meter-silent:x`: `meter-silent` takes at most 0 argument(s) after `:`, found 1",
        );
    }
}
