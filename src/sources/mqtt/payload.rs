//! MQTT payloads coming in: signal values and override requests.
//!
//! Signal payloads (a point's `topic`): a plain number (`21.5`), a word (`ON`, `OFF`,
//! `true`, `false`, any case), or JSON with the point's pointer (`json: /ENERGY/Power`)
//! leading to a number, a boolean or a string holding either. The value is then
//! multiplied by the point's unit factor (`kW` → × 1000).
//!
//! Override payloads, on `<topic_prefix>/override/<load>`:
//! - plain words: `on`, `off` or `auto`, optionally followed by a duration
//!   (`on 30min`, `off 2h`); without one an override lasts one hour;
//! - JSON: `{"command": "on", "for": "30min"}`, `{"command": "off"}`,
//!   `{"command": "auto"}`; for a stepped load `"stage": 2`, for a modulating load
//!   `"level": "60%"` (proportional), `"16A"` (charger) or `"1.5kW"` (battery).
//!
//! `auto` removes the override. An override never lasts more than 24 hours (a
//! forgotten boost must not run for a week) and never defeats a safety guard (the
//! engine sees to that). Anything else is malformed: counted, logged, ignored.

use std::time::Duration;

use serde_json::Value;

use crate::config::model::{Load, LoadId, LoadKind, Payload};
use crate::engine::Command;
use crate::units::{Current, Dimension, Power, Ratio, Timestamp, parse_quantity};

/// How long an override lasts when the payload does not say.
pub const DEFAULT_OVERRIDE: Duration = Duration::from_secs(3600);
pub use crate::config::model::MAX_OVERRIDE;

/// What a person asked for one load.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum OverrideAction {
    /// Force this command until the instant (hand to `Engine::set_override`).
    Set {
        /// The forced command.
        command: Command,
        /// When the override ends by itself.
        until: Timestamp,
    },
    /// Back to the rules (hand to `Engine::clear_override`).
    Clear,
}

impl OverrideAction {
    /// As a person reads it, in the site's time zone: `on until 14:30:00 CEST` (with the
    /// date when that is a day or more after `now`), `auto (back to the rules)`.
    pub fn describe(&self, tz: chrono_tz::Tz, now: Timestamp) -> String {
        match self {
            OverrideAction::Set { command, until } => {
                let local = until.to_utc().with_timezone(&tz);
                let within_a_day = until.0.saturating_sub(now.0) < 86_400_000;
                let at = local.format(if within_a_day { "%H:%M:%S %Z" } else { "%Y-%m-%d %H:%M:%S %Z" });
                format!("{command} until {at}")
            }
            OverrideAction::Clear => "auto (back to the rules)".to_owned(),
        }
    }
}

/// An override request for one load.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OverrideRequest {
    /// Which load.
    pub load: LoadId,
    /// What to do.
    pub action: OverrideAction,
}

/// Decodes a signal payload into the number the point's configuration describes
/// (before the unit factor). `switch_words`: whether `ON`/`OFF`/`true`/`false` (and a
/// JSON boolean) are readings of this point — for a boolean or unitless point; on a
/// point in watts or degrees they are refused, since a grid point subscribed to a
/// plug's state topic by mistake would otherwise read a fresh 1 W forever and never
/// fail safe.
pub fn parse_value(payload: &[u8], format: &Payload, switch_words: bool) -> Result<f64, String> {
    let text = std::str::from_utf8(payload).map_err(|_| "payload is not UTF-8".to_owned())?;
    let switch_state = |what: &str| {
        format!(
            "{what} is a switch state, not a measurement: check that the topic is the device's reading, not its on/off state"
        )
    };
    match format {
        Payload::Plain => plain_value(text, switch_words)
            .map_err(|e| e.unwrap_or_else(|| switch_state(&format!("\"{}\"", text.trim())))),
        Payload::Json(pointer) => {
            let doc: Value = serde_json::from_str(text).map_err(|e| format!("payload is not JSON: {e}"))?;
            let v = doc.pointer(pointer).ok_or_else(|| format!("JSON has nothing at {pointer}"))?;
            match v {
                Value::Number(n) => n.as_f64().ok_or_else(|| format!("number at {pointer} is out of range")),
                Value::Bool(b) if switch_words => Ok(f64::from(u8::from(*b))),
                Value::Bool(b) => Err(switch_state(&format!("JSON {b} at {pointer}"))),
                Value::String(s) => plain_value(s, switch_words)
                    .map_err(|e| e.unwrap_or_else(|| switch_state(&format!("\"{s}\" at {pointer}")))),
                other => Err(format!("JSON at {pointer} is {}, not a number", json_kind(other))),
            }
        }
    }
}

fn json_kind(v: &Value) -> &'static str {
    match v {
        Value::Null => "null",
        Value::Bool(_) => "a boolean",
        Value::Number(_) => "a number",
        Value::String(_) => "a string",
        Value::Array(_) => "an array",
        Value::Object(_) => "an object",
    }
}

/// A plain number, or a switch word where `switch_words`; `Err(None)` for a switch word
/// where it is not a reading.
fn plain_value(text: &str, switch_words: bool) -> Result<f64, Option<String>> {
    let t = text.trim();
    let word = match t.to_ascii_lowercase().as_str() {
        "on" | "true" => Some(1.0),
        "off" | "false" => Some(0.0),
        _ => None,
    };
    match word {
        Some(v) if switch_words => return Ok(v),
        Some(_) => return Err(None),
        None => {}
    }
    match t.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        _ => Err(Some(if switch_words {
            format!("\"{}\" is not a number or ON/OFF", t.chars().take(40).collect::<String>())
        } else {
            format!("\"{}\" is not a number", t.chars().take(40).collect::<String>())
        })),
    }
}

/// Decodes an override payload for `load` received at `now`.
pub fn parse_override(load: &Load, payload: &[u8], now: Timestamp) -> Result<OverrideAction, String> {
    let text = std::str::from_utf8(payload).map_err(|_| "payload is not UTF-8".to_owned())?.trim();
    let (word, duration, level, stage) = if text.starts_with('{') {
        let doc: Value = serde_json::from_str(text).map_err(|e| format!("payload is not JSON: {e}"))?;
        let obj = doc.as_object().ok_or_else(|| "expected a JSON object".to_owned())?;
        for key in obj.keys() {
            if !["command", "for", "level", "stage"].contains(&key.as_str()) {
                return Err(format!("unknown key \"{key}\" (expected command, for, level, stage)"));
            }
        }
        let word = obj
            .get("command")
            .and_then(Value::as_str)
            .ok_or_else(|| "\"command\" must be \"on\", \"off\" or \"auto\"".to_owned())?
            .to_owned();
        let text_of = |k: &str| -> Result<Option<String>, String> {
            match obj.get(k) {
                None => Ok(None),
                Some(Value::String(s)) => Ok(Some(s.clone())),
                Some(_) => Err(format!("\"{k}\" must be a string such as \"30min\" or \"60%\"")),
            }
        };
        let stage = match obj.get("stage") {
            None => None,
            Some(v) => Some(
                v.as_u64()
                    .filter(|n| (1..=255).contains(n))
                    .ok_or_else(|| "\"stage\" must be a whole number from 1".to_owned())? as u8,
            ),
        };
        (word, text_of("for")?, text_of("level")?, stage)
    } else {
        let mut parts = text.splitn(2, char::is_whitespace);
        let word = parts.next().unwrap_or_default().to_owned();
        (word, parts.next().map(str::to_owned), None, None)
    };
    let word = word.to_ascii_lowercase();
    if word == "auto" {
        return Ok(OverrideAction::Clear);
    }
    let duration = match duration {
        None => DEFAULT_OVERRIDE,
        Some(d) => {
            let q = parse_quantity(&d).ok().filter(|q| q.dimension == Dimension::Duration && q.value > 0.0);
            let Some(q) = q else { return Err(not_a_duration(&d)) };
            // `try_`: a payload is untrusted input, and a duration too large for the
            // type must be refused, not panic the link.
            match Duration::try_from_secs_f64(q.value) {
                Ok(d) if d <= MAX_OVERRIDE => d,
                _ => return Err("an override lasts at most 24 h".to_owned()),
            }
        }
    };
    let command = match word.as_str() {
        "off" => Command::Off,
        "on" => on_command(load, level.as_deref(), stage)?,
        other => {
            return Err(format!("\"{}\" is not on, off or auto", other.chars().take(20).collect::<String>()));
        }
    };
    Ok(OverrideAction::Set { command, until: now.plus(duration) })
}

/// Why an override's duration was refused, in the words of the payload's own form
/// (`on 30mins` has no "for" to blame) and with the one slip people make most.
fn not_a_duration(text: &str) -> String {
    let t = text.trim();
    let unit = t.trim_start_matches(|c: char| c.is_ascii_digit() || c == '.').trim();
    let hint = match unit {
        "m" | "mins" | "minute" | "minutes" => " (minutes are written min)",
        "hr" | "hrs" | "hour" | "hours" => " (hours are written h)",
        "sec" | "secs" | "second" | "seconds" => " (seconds are written s)",
        _ => "",
    };
    format!("\"{t}\" is not a duration{hint}: write a number and ms, s, min, h or d, such as 30min or 2h")
}

/// The command "on" means for a kind of load, with an optional level or stage.
fn on_command(load: &Load, level: Option<&str>, stage: Option<u8>) -> Result<Command, String> {
    let level = match level {
        None => None,
        Some(text) => Some(parse_quantity(text).map_err(|e| format!("\"level\": {e}"))?),
    };
    let want = |dim: Dimension, example: &str| -> Result<Option<f64>, String> {
        match level {
            None => Ok(None),
            Some(q) if q.dimension == dim && q.value >= 0.0 => Ok(Some(q.value)),
            Some(_) => Err(format!("load \"{}\" takes {} as its level (e.g. {example})", load.name, dim.describe())),
        }
    };
    if stage.is_some() && !matches!(load.kind, LoadKind::Stepped { .. }) {
        return Err(format!("load \"{}\" has no stages", load.name));
    }
    Ok(match &load.kind {
        LoadKind::Switched { .. } => {
            if level.is_some() {
                return Err(format!("load \"{}\" is on/off: it takes no level", load.name));
            }
            Command::On
        }
        LoadKind::Stepped { stages, .. } => {
            let top = stages.len().min(255) as u8;
            match stage {
                Some(n) if n > top => {
                    return Err(format!("load \"{}\" has {top} stages", load.name));
                }
                Some(n) => Command::Stage(n),
                None => Command::Stage(top),
            }
        }
        LoadKind::Proportional { .. } => {
            Command::Setpoint(Ratio(want(Dimension::Ratio, "60%")?.unwrap_or(100.0).min(100.0)))
        }
        LoadKind::Charger { min, max, .. } => {
            let a = want(Dimension::Current, "16A")?.unwrap_or(max.0);
            Command::Current(Current(a.clamp(min.0, max.0)))
        }
        LoadKind::Battery { max_charge, .. } => {
            let w = want(Dimension::Power, "1.5kW")?.unwrap_or(max_charge.0);
            Command::Charge(Power(w.min(max_charge.0)))
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signal_payloads() {
        let j = |p: &str| Payload::Json(p.to_owned());
        let any = |payload: &[u8], format: &Payload| parse_value(payload, format, true);
        assert_eq!(any(b" 21.5\n", &Payload::Plain), Ok(21.5));
        assert_eq!(any(b"ON", &Payload::Plain), Ok(1.0));
        assert_eq!(any(b"false", &Payload::Plain), Ok(0.0));
        assert_eq!(any(br#"{"ENERGY":{"Power":512}}"#, &j("/ENERGY/Power")), Ok(512.0));
        assert_eq!(any(br#"{"on":true}"#, &j("/on")), Ok(1.0));
        assert_eq!(any(br#"{"t":"19.5"}"#, &j("/t")), Ok(19.5));
        assert!(any(b"warm", &Payload::Plain).is_err());
        assert!(any(b"NaN", &Payload::Plain).is_err());
        assert!(any(br#"{"t":null}"#, &j("/t")).is_err());
        assert!(any(br#"{"t":1}"#, &j("/u")).is_err());
        assert!(any(b"{", &j("/u")).is_err());
    }

    /// A point in watts or degrees takes numbers only: a grid point subscribed to a
    /// plug's state topic by mistake (`ON`) read a fresh 1 W, and a no-export site
    /// whose meter had gone silent never failed safe.
    #[test]
    fn a_measurement_refuses_a_switch_state() {
        let j = |p: &str| Payload::Json(p.to_owned());
        let measured = |payload: &[u8], format: &Payload| parse_value(payload, format, false);
        assert_eq!(measured(b"-1500", &Payload::Plain), Ok(-1500.0));
        assert_eq!(measured(br#"{"p":"512"}"#, &j("/p")), Ok(512.0));
        for (payload, format) in [
            (&b"ON"[..], Payload::Plain),
            (b" true ", Payload::Plain),
            (br#"{"p":true}"#, j("/p")),
            (br#"{"p":"off"}"#, j("/p")),
        ] {
            let err = measured(payload, &format).unwrap_err();
            assert!(err.contains("is a switch state, not a measurement"), "{err}");
        }
        assert_eq!(measured(b"warm", &Payload::Plain), Err("\"warm\" is not a number".to_owned()));
    }

    #[test]
    fn a_mistyped_duration_says_how_to_write_it_in_either_form() {
        let yaml = "site: { name: Test, timezone: UTC }
devices:
  relays: { modbus_tcp: 127.0.0.1:5020, unit: 1 }
loads:
  - { name: pump, rated: 1kW, switch: { device: relays, coil: 0 } }
";
        let site = match crate::config::load_str("t.yaml", yaml) {
            Ok(l) => l.site,
            Err(e) => panic!("{}", e.render(false)),
        };
        let load = site.load("pump").unwrap().1;
        let now = Timestamp(1_781_481_600_000);
        let err = |payload: &str| parse_override(load, payload.as_bytes(), now).unwrap_err();
        assert_eq!(
            err("on 5m"),
            "\"5m\" is not a duration (minutes are written min): write a number and ms, s, min, h or d, such as 30min or 2h"
        );
        // The plain form has no "for" key, so the message does not name one.
        assert!(!err("on 30mins").contains("\"for\""), "{}", err("on 30mins"));
        assert!(err("on 30mins").contains("minutes are written min"));
        assert!(err(r#"{"command":"on","for":"2 hours"}"#).contains("hours are written h"));
        assert!(err("on -5min").starts_with("\"-5min\" is not a duration"));
        assert!(parse_override(load, b"on 5min", now).is_ok());
    }
}
