//! MQTT payloads of the actuator side: command payloads for load topics and the
//! retained state documents under `<topic_prefix>/state/...`.
//!
//! State documents (JSON, retained):
//! - `<prefix>/state/<load>`: `{"command": "on", "on": true, "reason": "start_rule",
//!   "why": "started: start rule is true", "power": 3000}` — `command` as the engine
//!   prints it (`off`, `on`, `stage 2`, `45 %`, `16 A`, `charge 1.2 kW`), `on` whether
//!   it draws power, `reason` a stable code, `why` the sentence, `power` the watts the
//!   command implies;
//! - `<prefix>/state/site`: `{"mode": "normal", "surplus": 1520, "grid": -35,
//!   "inverter_limit": 2500, "limit_reason": "export_guard"}` — watts, `grid` import
//!   positive (`null` when stale), `inverter_limit` `null` when unlimited.

use serde_json::json;

use super::Level;
use crate::config::model::{Qos, Site, Write};
use crate::engine::{Decisions, LimitReason, Mode};
use crate::units::trim_number;

/// A retained state document.
#[derive(Debug, Clone, PartialEq)]
pub struct StateTopic {
    /// Topic below the prefix (`state/water_heater`).
    pub suffix: String,
    /// The JSON document.
    pub payload: String,
    /// The part of the document whose change is published at once; other changes
    /// (live numbers) may be held back by the link's rate limit.
    pub key: String,
}

/// The publication for an MQTT target at a level: topic, payload, retain, QoS.
pub fn command_payload(target: &Write, level: Level) -> Option<(&str, String, bool, Qos)> {
    let Write::Mqtt { topic, on, off, value, retain, qos, .. } = target else {
        return None;
    };
    let payload = match level {
        Level::Switch(true) => on.clone(),
        Level::Switch(false) => off.clone(),
        Level::Value(v) => value.replace("{value}", &trim_number(v)),
    };
    Some((topic.as_str(), payload, *retain, *qos))
}

/// The state documents for one set of decisions; `lost`: the guard signals lost, in
/// words, for a load held in its safe state by the fail-safe.
pub fn state_topics(site: &Site, decisions: &Decisions, lost: &[String]) -> Vec<StateTopic> {
    let mut out = Vec::with_capacity(site.loads.len() + 1);
    for (load, d) in site.loads.iter().zip(&decisions.loads) {
        let command = d.command.to_string();
        let power = d.command.power(&load.kind).0;
        let why = why(site, d.reason, lost);
        let doc = json!({
            "command": command,
            "on": d.command.is_on(),
            "reason": d.reason.code(),
            "why": why,
            "power": power.round(),
        });
        // The fail-safe's sentence names the lost point: a point going from stale to
        // frozen changes it, and the document is sent again.
        let key = match d.reason {
            crate::engine::Reason::Failsafe => format!("{command}|failsafe|{why}"),
            _ => format!("{command}|{}", d.reason.code()),
        };
        out.push(StateTopic { suffix: format!("state/{}", load.name), payload: doc.to_string(), key });
    }
    let mode = mode_word(decisions.mode);
    let limit_reason = limit_word(decisions.limit_reason);
    let limit = decisions.inverter_limit.map(|p| p.0.round());
    let doc = json!({
        "mode": mode,
        "surplus": crate::status::surplus_known(site, decisions).then(|| decisions.surplus.0.round()),
        "grid": decisions.grid.map(|g| g.0.round()),
        "inverter_limit": limit,
        "limit_reason": limit_reason,
    });
    out.push(StateTopic {
        suffix: "state/site".to_owned(),
        payload: doc.to_string(),
        key: format!("{mode}|{limit_reason}|{}", limit.is_some()),
    });
    out
}

/// The reason as a sentence, a lost signal by its point's name (the reason itself
/// knows only the point's index).
fn why(site: &Site, reason: crate::engine::Reason, lost: &[String]) -> String {
    match reason {
        crate::engine::Reason::Failsafe if !lost.is_empty() => format!("safe state: {}", lost.join(", ")),
        crate::engine::Reason::SignalLost { point } => match site.points.get(point) {
            Some(p) => format!("safe state: point \"{}\" is stale, missing or frozen", p.name),
            None => reason.to_string(),
        },
        _ => reason.to_string(),
    }
}

/// The site state at shutdown: mode `stopped`, no live numbers (they would be stale
/// the moment the controller is gone), the safe limit dispatched.
pub fn mark_stopped(state: &mut [StateTopic], safe: &Decisions) {
    // Each load's safe state is there because the controller stopped, not because a
    // signal was lost: said so, as the status page says it (the retained document is
    // what a dashboard shows until the next start).
    for s in state.iter_mut().filter(|s| s.suffix.starts_with("state/") && s.suffix != "state/site") {
        if let Ok(mut doc) = serde_json::from_str::<serde_json::Value>(&s.payload) {
            doc["reason"] = json!("shutdown");
            doc["why"] = json!("controller stopping: safe state");
            s.payload = doc.to_string();
            s.key = format!("{}|shutdown", doc["command"].as_str().unwrap_or_default());
        }
    }
    if let Some(site) = state.iter_mut().find(|s| s.suffix == "state/site") {
        let limit = safe.inverter_limit.map(|p| p.0.round());
        site.payload = json!({
            "mode": "stopped",
            "surplus": null,
            "grid": null,
            "inverter_limit": limit,
            "limit_reason": "shutdown",
        })
        .to_string();
        site.key = "stopped".to_owned();
    }
}

/// The site mode as a word.
pub fn mode_word(mode: Mode) -> &'static str {
    match mode {
        Mode::Normal => "normal",
        Mode::Failsafe => "failsafe",
        Mode::Recovering => "recovering",
        Mode::Outage => "outage",
    }
}

/// The reason for the inverter limit as a word.
pub fn limit_word(reason: LimitReason) -> &'static str {
    reason.word()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::{Command, LimitReason, LoadDecision, Mode, Reason};
    use crate::units::{Power, Timestamp};

    /// A lost signal is named in the retained state a dashboard shows, not numbered.
    #[test]
    fn a_lost_signal_is_named_by_its_point() {
        let yaml = "
site: { name: T, timezone: UTC, export: allowed }
mqtt: { broker: 127.0.0.1:1883 }
devices:
  home: { mqtt: true }
points:
  grid: { device: home, topic: home/meter, unit: W }
  pump_power: { device: home, topic: home/pump, unit: W }
loads:
  - name: pump
    rated: 750W
    switch: { device: home, topic: home/pump/set }
    power: pump_power
";
        let site = crate::config::load_str("t.yaml", yaml).map_err(|e| e.render(false)).unwrap().site;
        let point = site.point("pump_power").unwrap().0.0;
        let d = Decisions {
            now: Timestamp(0),
            loads: vec![LoadDecision { command: Command::Off, reason: Reason::SignalLost { point } }],
            inverter_limit: None,
            limit_reason: LimitReason::None,
            mode: Mode::Normal,
            surplus: Power::ZERO,
            grid: None,
            switchings: Vec::new(),
        };
        let state = state_topics(&site, &d, &[]);
        let doc: serde_json::Value = serde_json::from_str(&state[0].payload).unwrap();
        assert_eq!(doc["why"], "safe state: point \"pump_power\" is stale, missing or frozen", "{doc}");
        assert_eq!(doc["reason"], "signal_lost");
        // The fail-safe names the guard signal that is lost, as the log does, and a
        // change of what is wrong with it sends the document again.
        let failsafe =
            Decisions { loads: vec![LoadDecision { command: Command::Off, reason: Reason::Failsafe }], ..d.clone() };
        let frozen = ["point \"grid\" is frozen (the same reading for over 20 s)".to_owned()];
        let state = state_topics(&site, &failsafe, &frozen);
        let doc: serde_json::Value = serde_json::from_str(&state[0].payload).unwrap();
        assert_eq!(doc["why"], "safe state: point \"grid\" is frozen (the same reading for over 20 s)", "{doc}");
        let stale = state_topics(&site, &failsafe, &["point \"grid\" is stale".to_owned()]);
        assert_ne!(state[0].key, stale[0].key);
        // With no fresh grid reading the surplus is unknown, not 0 W.
        let site_doc: serde_json::Value = serde_json::from_str(&stale.last().unwrap().payload).unwrap();
        assert!(site_doc["surplus"].is_null() && site_doc["grid"].is_null(), "{site_doc}");
        let known =
            state_topics(&site, &Decisions { grid: Some(Power(-300.0)), surplus: Power(300.0), ..d.clone() }, &[]);
        let site_doc: serde_json::Value = serde_json::from_str(&known.last().unwrap().payload).unwrap();
        assert_eq!(site_doc["surplus"], 300.0, "{site_doc}");
    }
}
