//! Home Assistant MQTT discovery: retained documents under the discovery prefix that
//! describe topics the link already publishes and listens to, so each load's power,
//! state and reason, buttons to boost it, hold it off or hand it back to its rules, and
//! the site's flows appear in Home Assistant without any configuration there.
//!
//! Nothing here adds a way to drive the plant: the buttons publish the same override
//! payloads a person could send to `<prefix>/override/<load>` (`on 1h`, `off 1h`,
//! `auto`), and an override never defeats a guard.
//!
//! The format follows Home Assistant's documentation of its MQTT integration, "MQTT
//! Discovery" (single-component discovery payloads): the topic
//! `<discovery_prefix>/<component>/<object_id>/config`, an object id of
//! `[a-zA-Z0-9_-]`, a `unique_id`, a `device` mapping with `identifiers`, an `origin`,
//! availability from `<prefix>/status` (`online`/`offline`), sensors reading a JSON state
//! topic through `value_template`, buttons publishing `payload_press` to their
//! `command_topic`.

use serde_json::{Value, json};

use crate::config::model::{Discovery, MqttSettings, Site};
use crate::units::format_duration;

/// One retained discovery document.
#[derive(Debug, Clone, PartialEq)]
pub struct DiscoveryDoc {
    /// `<discovery_prefix>/<component>/<object_id>/config`.
    pub topic: String,
    /// The JSON document.
    pub payload: String,
}

/// The documents for a site: per load a power sensor, an on/off sensor, a reason
/// sensor (with the state document's fields as attributes) and three buttons; for the
/// site the grid, surplus and inverter-limit sensors and the mode.
pub fn documents(site: &Site, mqtt: &MqttSettings, d: &Discovery) -> Vec<DiscoveryDoc> {
    let slug = object_id(&site.name);
    let device = json!({
        "identifiers": [format!("spillway_{slug}")],
        "name": format!("Spillway {}", site.name),
        "manufacturer": "Spillway",
        "model": "surplus load-diversion controller",
        "sw_version": env!("CARGO_PKG_VERSION"),
    });
    let origin = json!({ "name": "spillway", "sw_version": env!("CARGO_PKG_VERSION") });
    let status = format!("{}/status", mqtt.topic_prefix);
    let base = |object: &str, name: String| -> Value {
        json!({
            "name": name,
            "unique_id": object,
            "device": device,
            "origin": origin,
            "availability_topic": status,
            "payload_available": "online",
            "payload_not_available": "offline",
        })
    };
    let mut out = Vec::new();
    let mut push = |component: &str, object: String, doc: Value| {
        out.push(DiscoveryDoc { topic: format!("{}/{component}/{object}/config", d.prefix), payload: doc.to_string() });
    };
    let boost = format_duration(d.boost);
    // The payload must read back as a duration: an exact literal (`150s`), never a
    // person's `2 min 30 s`.
    let ms = i64::try_from(d.boost.as_millis()).unwrap_or(i64::MAX);
    let spoken = crate::rules::format::duration_literal(ms).replace(' ', "");
    for load in &site.loads {
        let l = object_id(&load.name);
        let state = format!("{}/state/{}", mqtt.topic_prefix, load.name);
        let command = format!("{}/override/{}", mqtt.topic_prefix, load.name);
        let id = |what: &str| format!("spillway_{slug}_{l}_{what}");

        let mut power = base(&id("power"), format!("{} power", load.name));
        extend(
            &mut power,
            json!({
                "state_topic": state,
                "value_template": "{{ value_json.power }}",
                "unit_of_measurement": "W",
                "device_class": "power",
                "state_class": "measurement",
            }),
        );
        push("sensor", id("power"), power);

        let mut on = base(&id("on"), format!("{} on", load.name));
        extend(
            &mut on,
            json!({
                "state_topic": state,
                "value_template": "{{ 'ON' if value_json.on else 'OFF' }}",
                "device_class": "power",
            }),
        );
        push("binary_sensor", id("on"), on);

        let mut reason = base(&id("reason"), format!("{} reason", load.name));
        extend(
            &mut reason,
            json!({
                "state_topic": state,
                "value_template": "{{ value_json.reason }}",
                "json_attributes_topic": state,
                "icon": "mdi:help-circle-outline",
            }),
        );
        push("sensor", id("reason"), reason);

        for (what, name, press, icon) in [
            ("boost", format!("{} boost {boost}", load.name), format!("on {spoken}"), "mdi:rocket-launch"),
            ("hold_off", format!("{} hold off {boost}", load.name), format!("off {spoken}"), "mdi:power-off"),
            ("auto", format!("{} back to its rules", load.name), "auto".to_owned(), "mdi:refresh-auto"),
        ] {
            let mut button = base(&id(what), name);
            extend(
                &mut button,
                json!({
                    "command_topic": command,
                    "payload_press": press,
                    "icon": icon,
                }),
            );
            push("button", id(what), button);
        }
    }

    let state = format!("{}/state/site", mqtt.topic_prefix);
    let id = |what: &str| format!("spillway_{slug}_{what}");
    let sensors = [
        ("grid", "grid power (import positive)", "grid"),
        ("surplus", "surplus", "surplus"),
        ("inverter_limit", "inverter limit", "inverter_limit"),
    ];
    // A site without limit control has no inverter limit to show: an entity that is
    // always unknown is noise on a dashboard.
    for (what, name, field) in sensors.into_iter().filter(|(w, _, _)| *w != "inverter_limit" || site.inverter.is_some())
    {
        let mut doc = base(&id(what), name.to_owned());
        extend(
            &mut doc,
            json!({
                "state_topic": state,
                // A stale meter or no limit in force is `null` in the state document; it
                // renders as `None`, which Home Assistant's MQTT sensor takes for
                // "unknown", not 0 (from memory of its `PAYLOAD_NONE`).
                "value_template": format!("{{{{ value_json.{field} }}}}"),
                "unit_of_measurement": "W",
                "device_class": "power",
                "state_class": "measurement",
            }),
        );
        push("sensor", id(what), doc);
    }
    let mut mode = base(&id("mode"), "mode".to_owned());
    extend(
        &mut mode,
        json!({
            "state_topic": state,
            "value_template": "{{ value_json.mode }}",
            "json_attributes_topic": state,
            "icon": "mdi:shield-check-outline",
        }),
    );
    push("sensor", id("mode"), mode);
    out
}

fn extend(doc: &mut Value, more: Value) {
    if let (Value::Object(a), Value::Object(b)) = (doc, more) {
        a.extend(b);
    }
}

/// A name as a discovery object id: lowercase, `[a-z0-9_-]`, anything else `_`.
pub fn object_id(name: &str) -> String {
    name.to_lowercase().chars().map(|c| if c.is_ascii_alphanumeric() || c == '-' { c } else { '_' }).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn site(yaml_mqtt: &str) -> Site {
        let yaml = format!(
            "site: {{ name: Rose Mead, timezone: Europe/Lisbon }}
devices:
  relays: {{ modbus_tcp: 127.0.0.1:5020, unit: 3 }}
mqtt: {{ broker: 127.0.0.1:1883{yaml_mqtt} }}
loads:
  - {{ name: water_heater, rated: 3kW, switch: {{ device: relays, coil: 0 }} }}
  - {{ name: pool_pump, rated: 1kW, switch: {{ device: relays, coil: 1 }} }}
"
        );
        match crate::config::load_str("t.yaml", &yaml) {
            Ok(l) => l.site,
            Err(e) => panic!("{}", e.render(false)),
        }
    }

    /// Source: Home Assistant documentation, MQTT integration, "MQTT Discovery": the
    /// topic is `<discovery_prefix>/<component>/[<node_id>/]<object_id>/config` and the
    /// object id must consist of `[a-zA-Z0-9_-]`; each entity needs a `unique_id` to be
    /// kept across restarts; a button publishes `payload_press` to `command_topic`.
    #[test]
    fn every_document_has_a_valid_topic_a_unique_id_and_availability() {
        let s = site(", discovery: true");
        let mqtt = s.mqtt.as_ref().unwrap();
        let d = mqtt.discovery.as_ref().unwrap();
        let docs = documents(&s, mqtt, d);
        // Six entities per load; for the site grid, surplus and mode, and no inverter
        // limit on a site that has no inverter to limit.
        assert_eq!(docs.len(), 2 * 6 + 3, "six entities per load, three for the site");
        assert!(!docs.iter().any(|d| d.topic.contains("inverter_limit")));
        let mut ids = std::collections::HashSet::new();
        for doc in &docs {
            let parts: Vec<&str> = doc.topic.split('/').collect();
            assert_eq!(parts.len(), 4, "{}", doc.topic);
            assert_eq!(parts[0], "homeassistant");
            assert!(["sensor", "binary_sensor", "button"].contains(&parts[1]), "{}", doc.topic);
            assert_eq!(parts[3], "config");
            assert!(parts[2].chars().all(|c| c.is_ascii_alphanumeric() || c == '_' || c == '-'), "{}", parts[2]);
            let v: Value = serde_json::from_str(&doc.payload).unwrap();
            assert_eq!(v["unique_id"], parts[2]);
            assert!(ids.insert(parts[2].to_owned()), "unique ids repeat: {}", parts[2]);
            assert_eq!(v["availability_topic"], "spillway/rose-mead/status");
            assert_eq!(v["device"]["identifiers"][0], "spillway_rose_mead");
            if parts[1] == "button" {
                assert!(v["command_topic"].as_str().unwrap().starts_with("spillway/rose-mead/override/"));
            } else {
                assert!(v["state_topic"].as_str().unwrap().starts_with("spillway/rose-mead/state/"));
            }
        }
    }

    #[test]
    fn the_buttons_send_override_payloads_the_link_accepts() {
        let s = site(", discovery: { prefix: ha, boost: 90min }");
        let mqtt = s.mqtt.as_ref().unwrap();
        let docs = documents(&s, mqtt, mqtt.discovery.as_ref().unwrap());
        let presses: Vec<(String, String)> = docs
            .iter()
            .filter(|d| d.topic.starts_with("ha/button/"))
            .map(|d| {
                let v: Value = serde_json::from_str(&d.payload).unwrap();
                (v["command_topic"].as_str().unwrap().to_owned(), v["payload_press"].as_str().unwrap().to_owned())
            })
            .collect();
        assert_eq!(presses.len(), 6);
        let now = crate::units::Timestamp(1_781_481_600_000);
        for (topic, payload) in &presses {
            let name = topic.rsplit('/').next().unwrap();
            let (_, load) = s.load(name).unwrap_or_else(|| panic!("no load {name}"));
            let action = super::super::payload::parse_override(load, payload.as_bytes(), now);
            assert!(action.is_ok(), "{payload}: {action:?}");
        }
        assert!(presses.iter().any(|(_, p)| p == "on 90min"), "{presses:?}");
        // A boost a person reads as minutes and seconds is still sent as one duration.
        let s = site(", discovery: { prefix: ha, boost: 150s }");
        let mqtt = s.mqtt.as_ref().unwrap();
        let docs = documents(&s, mqtt, mqtt.discovery.as_ref().unwrap());
        let press = docs.iter().find(|d| d.topic.ends_with("_boost/config")).unwrap();
        let v: Value = serde_json::from_str(&press.payload).unwrap();
        assert_eq!(v["payload_press"], "on 150s");
        assert!(v["name"].as_str().unwrap().ends_with("boost 2 min 30 s"), "{}", v["name"]);
        let load = s.loads.first().unwrap();
        assert!(super::super::payload::parse_override(load, b"on 150s", now).is_ok());
    }

    #[test]
    fn names_become_object_ids() {
        assert_eq!(object_id("Rose Mead"), "rose_mead");
        assert_eq!(object_id("pool-pump"), "pool-pump");
        assert_eq!(object_id("Café ☀"), "caf___");
    }
}
