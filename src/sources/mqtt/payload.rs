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
//!   `{"command": "auto"}`; with a `"level"` in the one form each kind takes: a
//!   percentage for a proportional load (`"60%"`), a current for a charger (`"16A"`), a
//!   power for a battery (`"1.5kW"`) or a stepped load (`"2kW"`: the highest stage at or
//!   below it; or `"stage": 2`). A switched load takes no level. A level outside the
//!   load's range is brought into it, and the request says so when it is logged.
//!
//! `auto` removes the override. An override never lasts more than 24 hours (a
//! forgotten boost must not run for a week) and never defeats a safety guard (the
//! engine sees to that). Anything else is malformed: counted, logged, ignored.

use std::time::Duration;

use serde_json::Value;

use crate::config::model::{Load, LoadId, LoadKind, Payload};
use crate::engine::Command;
use crate::units::{Current, Dimension, Power, Quantity, Ratio, Timestamp, parse_quantity};

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
        /// The level asked for, where the command is not that level (brought into the
        /// load's range, or a power turned into a stage).
        adjusted: Option<Adjustment>,
    },
    /// Back to the rules (hand to `Engine::clear_override`).
    Clear,
}

/// A level the payload asked for that the command does not take as it is.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Adjustment {
    /// The level in the payload.
    pub asked: Quantity,
    /// What was done with it, as a person reads it: `raised to its minimum`.
    pub what: &'static str,
}

impl OverrideAction {
    /// As a person reads it, in the site's time zone: `on until 14:30:00 CEST` (with the
    /// date when that is a day or more after `now`), `auto (back to the rules)`.
    pub fn describe(&self, tz: chrono_tz::Tz, now: Timestamp) -> String {
        match self {
            OverrideAction::Set { command, until, adjusted } => {
                let local = until.to_utc().with_timezone(&tz);
                let within_a_day = until.0.saturating_sub(now.0) < 86_400_000;
                let at = local.format(if within_a_day { "%H:%M:%S %Z" } else { "%Y-%m-%d %H:%M:%S %Z" });
                match adjusted {
                    Some(a) => format!("{command} until {at} (asked {}: {})", a.asked, a.what),
                    None => format!("{command} until {at}"),
                }
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
        "off" => (Command::Off, None),
        "on" => on_command(load, level.as_deref(), stage)?,
        other => {
            return Err(format!("\"{}\" is not on, off or auto", other.chars().take(20).collect::<String>()));
        }
    };
    let (command, adjusted) = command;
    Ok(OverrideAction::Set { command, until: now.plus(duration), adjusted })
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

/// The command "on" means for a kind of load, with an optional level or stage, and
/// what was done to the level where the command does not take it as it is.
///
/// Each kind takes its level in one form (the README's "MQTT topics" says which); any
/// other form is refused with a message naming the form the load takes, so a request
/// is never read as something else (a power on a stepped load once ran it at full
/// power).
fn on_command(load: &Load, level: Option<&str>, stage: Option<u8>) -> Result<(Command, Option<Adjustment>), String> {
    let name = &load.name;
    let level = match level {
        None => None,
        Some(text) => Some(parse_quantity(text).map_err(|e| format!("\"level\": {e}"))?),
    };
    if let Some(q) = level
        && q.value < 0.0
    {
        return Err(format!("\"level\": {q} is negative: a level is 0 or more"));
    }
    // The level in the form `dim`, or a message naming the form the load takes.
    let want = |dim: Dimension, example: &str| -> Result<Option<Quantity>, String> {
        match level {
            Some(q) if q.dimension != dim => Err(format!(
                "load \"{name}\" takes {} as its level (e.g. \"{example}\"), not {}",
                dim.describe(),
                q.dimension.describe()
            )),
            other => Ok(other),
        }
    };
    if stage.is_some() && !matches!(load.kind, LoadKind::Stepped { .. }) {
        return Err(format!("load \"{name}\" has no stages"));
    }
    // A level brought into `lo..=hi`, noted when it was moved.
    let bounded = |q: Quantity, lo: f64, hi: f64| -> (f64, Option<Adjustment>) {
        if q.value < lo {
            (lo, Some(Adjustment { asked: q, what: "raised to its minimum" }))
        } else if q.value > hi {
            (hi, Some(Adjustment { asked: q, what: "lowered to its maximum" }))
        } else {
            (q.value, None)
        }
    };
    Ok(match &load.kind {
        LoadKind::Switched { .. } => {
            if level.is_some() {
                return Err(format!("load \"{name}\" is on/off: it takes no level"));
            }
            (Command::On, None)
        }
        LoadKind::Stepped { stages, .. } => {
            let top = stages.len().min(255) as u8;
            let form = "a stage (\"stage\": 2) or a power as its level (e.g. \"2kW\")";
            match (stage, level) {
                (Some(_), Some(_)) => {
                    return Err(format!("load \"{name}\" takes a stage or a level, not both"));
                }
                (Some(n), None) if n > top => {
                    return Err(format!("load \"{name}\" has {top} stages"));
                }
                (Some(n), None) => (Command::Stage(n), None),
                (None, None) => (Command::Stage(top), None),
                (None, Some(q)) if q.dimension != Dimension::Power => {
                    return Err(format!("load \"{name}\" takes {form}, not {}", q.dimension.describe()));
                }
                (None, Some(q)) => {
                    // The highest stage that draws no more than was asked: a level is a
                    // ceiling, never exceeded.
                    let n = stages.iter().take_while(|s| s.0 <= q.value + 1e-9).count().min(255) as u8;
                    if n == 0 {
                        let list: Vec<String> = stages.iter().map(ToString::to_string).collect();
                        return Err(format!(
                            "load \"{name}\" has stages of {}: {q} is below its first stage, so the request is refused (send \"off\" to turn it off)",
                            list.join(", ")
                        ));
                    }
                    let exact = stages.get(usize::from(n) - 1).is_some_and(|s| (s.0 - q.value).abs() < 1e-9);
                    let note = (!exact).then_some(Adjustment { asked: q, what: "the highest stage at or below it" });
                    (Command::Stage(n), note)
                }
            }
        }
        LoadKind::Proportional { min, .. } => match want(Dimension::Ratio, "60%")? {
            None => (Command::Setpoint(Ratio(100.0)), None),
            Some(q) => {
                // `min` is the lowest non-zero setpoint the load takes: an `on` below it
                // runs at it, as a charger's current below its minimum does.
                let (pct, note) = bounded(q, min.0, 100.0);
                (Command::Setpoint(Ratio(pct)), note)
            }
        },
        LoadKind::Charger { min, max, .. } => match want(Dimension::Current, "16A")? {
            None => (Command::Current(*max), None),
            Some(q) => {
                let (a, note) = bounded(q, min.0, max.0);
                (Command::Current(Current(a)), note)
            }
        },
        LoadKind::Battery { max_charge, .. } => match want(Dimension::Power, "1.5kW")? {
            None => (Command::Charge(*max_charge), None),
            Some(q) => {
                let (w, note) = bounded(q, 0.0, max_charge.0);
                (Command::Charge(Power(w)), note)
            }
        },
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

    /// One load of every kind, for the level tests.
    fn every_kind() -> crate::config::model::Site {
        let yaml = r#"site: { name: Test, timezone: UTC }
devices:
  relays: { modbus_tcp: 127.0.0.1:5020, unit: 1 }
points:
  soc: { device: relays, register: 30, unit: "%" }
loads:
  - { name: pump, rated: 1kW, switch: { device: relays, coil: 0 } }
  - name: heater
    kind: stepped
    stages: [1kW, 2kW, 3kW]
    switch: [{ device: relays, coil: 1 }, { device: relays, coil: 2 }, { device: relays, coil: 3 }]
  - { name: immersion, kind: proportional, rated: 3kW, min: 10%, setpoint: { device: relays, register: 10 } }
  - { name: car, kind: charger, min_current: 6A, max_current: 16A, setpoint: { device: relays, register: 11 } }
  - { name: battery, kind: battery, max_charge: 3kW, soc: soc, setpoint: { device: relays, register: 12 } }
"#;
        match crate::config::load_str("t.yaml", yaml) {
            Ok(l) => l.site,
            Err(e) => panic!("{}", e.render(false)),
        }
    }

    /// What `{"command":"on","level":LEVEL}` does on `load`: the command and the logged
    /// words, or the refusal.
    fn on_level(site: &crate::config::model::Site, load: &str, level: &str) -> Result<String, String> {
        let load = site.load(load).unwrap().1;
        let now = Timestamp(1_781_481_600_000);
        let payload = format!(r#"{{"command":"on","level":"{level}","for":"3min"}}"#);
        let action = parse_override(load, payload.as_bytes(), now)?;
        let text = action.describe(chrono_tz::UTC, now);
        Ok(text.replace(" until 00:03:00 UTC", ""))
    }

    /// A power on a stepped load picks the highest stage at or below it; it once ran
    /// the load at its top stage whatever was asked (500 W ran 3 kW).
    #[test]
    fn a_power_level_on_a_stepped_load_picks_the_highest_stage_at_or_below_it() {
        let site = every_kind();
        let on = |level: &str| on_level(&site, "heater", level);
        assert_eq!(on("1kW").as_deref(), Ok("stage 1"));
        assert_eq!(on("1.5kW").as_deref(), Ok("stage 1 (asked 1.5 kW: the highest stage at or below it)"));
        assert_eq!(on("2kW").as_deref(), Ok("stage 2"));
        assert_eq!(on("2.5kW").as_deref(), Ok("stage 2 (asked 2.5 kW: the highest stage at or below it)"));
        assert_eq!(on("3000W").as_deref(), Ok("stage 3"));
        assert_eq!(on("9kW").as_deref(), Ok("stage 3 (asked 9 kW: the highest stage at or below it)"));
        let refused = on("500W").unwrap_err();
        assert_eq!(
            refused,
            "load \"heater\" has stages of 1 kW, 2 kW, 3 kW: 500 W is below its first stage, so the request is refused (send \"off\" to turn it off)"
        );
        assert!(
            on("60%").unwrap_err().contains("takes a stage (\"stage\": 2) or a power as its level"),
            "{:?}",
            on("60%")
        );
        assert!(on("16A").unwrap_err().contains("not a current"), "{:?}", on("16A"));
        let load = site.load("heater").unwrap().1;
        let both = parse_override(load, br#"{"command":"on","stage":1,"level":"2kW"}"#, Timestamp(0));
        assert_eq!(both.unwrap_err(), "load \"heater\" takes a stage or a level, not both");
    }

    /// A proportional load's `min` (10 % here) is its lowest non-zero setpoint: an `on`
    /// below it runs at it, and the log says so. 5 % was once commanded as 5 %.
    #[test]
    fn a_percentage_below_a_proportional_loads_min_runs_at_its_min() {
        let site = every_kind();
        let on = |level: &str| on_level(&site, "immersion", level);
        assert_eq!(on("5%").as_deref(), Ok("10 % (asked 5 %: raised to its minimum)"));
        assert_eq!(on("0%").as_deref(), Ok("10 % (asked 0 %: raised to its minimum)"));
        assert_eq!(on("10%").as_deref(), Ok("10 %"));
        assert_eq!(on("60%").as_deref(), Ok("60 %"));
    }

    /// Every form of level on every kind: the one form a kind takes works (brought into
    /// its range, and the log says so), every other form is refused naming that form.
    #[test]
    fn each_kind_takes_its_level_in_one_form_and_refuses_the_others() {
        let site = every_kind();
        let on = |load: &str, level: &str| on_level(&site, load, level);
        // Switched: no level at all.
        for level in ["60%", "16A", "1.5kW"] {
            assert_eq!(on("pump", level).unwrap_err(), "load \"pump\" is on/off: it takes no level");
        }
        // Proportional: a percentage.
        assert_eq!(on("immersion", "60%").as_deref(), Ok("60 %"));
        assert_eq!(on("immersion", "150%").as_deref(), Ok("100 % (asked 150 %: lowered to its maximum)"));
        assert_eq!(
            on("immersion", "1.5kW").unwrap_err(),
            "load \"immersion\" takes a percentage as its level (e.g. \"60%\"), not a power"
        );
        assert!(on("immersion", "16A").unwrap_err().contains("takes a percentage"));
        // Charger: a current, brought into min_current..max_current.
        assert_eq!(on("car", "10A").as_deref(), Ok("10 A"));
        assert_eq!(on("car", "4A").as_deref(), Ok("6 A (asked 4 A: raised to its minimum)"));
        assert_eq!(on("car", "32A").as_deref(), Ok("16 A (asked 32 A: lowered to its maximum)"));
        assert_eq!(
            on("car", "60%").unwrap_err(),
            "load \"car\" takes a current as its level (e.g. \"16A\"), not a percentage"
        );
        assert!(on("car", "3kW").unwrap_err().contains("takes a current"));
        // Battery: a power, a charge up to max_charge.
        assert_eq!(on("battery", "1.5kW").as_deref(), Ok("charge 1.5 kW"));
        assert_eq!(on("battery", "5kW").as_deref(), Ok("charge 3 kW (asked 5 kW: lowered to its maximum)"));
        assert!(on("battery", "60%").unwrap_err().contains("takes a power as its level"));
        assert!(on("battery", "16A").unwrap_err().contains("takes a power as its level"));
        // Negative levels are refused on every kind that takes one.
        for load in ["heater", "immersion", "car", "battery"] {
            assert!(on(load, "-1kW").unwrap_err().contains("is negative"), "{load}");
        }
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
