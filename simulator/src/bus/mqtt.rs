//! The MQTT face of the bus: the readings as a topic tree under `sim/`, and command
//! topics for switches and setpoints. Payloads are plain UTF-8 numbers or words.

use super::{Bus, BusError, INVERTER_UNIT, METER_UNIT, RELAY_UNIT, SENSOR_UNIT};

/// Prefix of every topic.
pub const PREFIX: &str = "sim";

fn num(v: f64) -> String {
    if v.is_finite() {
        let s = format!("{v:.2}");
        match s.trim_end_matches('0').trim_end_matches('.') {
            // A value that rounds to zero from below: no `-0` on the wire.
            "-0" => "0".to_owned(),
            t => t.to_owned(),
        }
    } else {
        "nan".to_owned()
    }
}

fn on_off(b: bool) -> String {
    if b { "on" } else { "off" }.to_owned()
}

fn parse_switch(topic: &str, payload: &str) -> Result<bool, BusError> {
    match payload.trim().to_ascii_lowercase().as_str() {
        "on" | "1" | "true" => Ok(true),
        "off" | "0" | "false" => Ok(false),
        _ => Err(BusError::BadPayload {
            topic: topic.to_owned(),
            payload: payload.to_owned(),
            expected: "on/off, 1/0 or true/false",
        }),
    }
}

fn parse_number(topic: &str, payload: &str, expected: &'static str) -> Result<f64, BusError> {
    payload.trim().parse::<f64>().ok().filter(|v| v.is_finite()).ok_or_else(|| BusError::BadPayload {
        topic: topic.to_owned(),
        payload: payload.to_owned(),
        expected,
    })
}

impl Bus {
    fn up(&self, unit: u8) -> bool {
        self.check_unit(unit).is_ok()
    }

    /// Every state topic with its payload now, in a stable order. A silent or
    /// restarting device publishes nothing, so its topics are missing.
    pub fn mqtt_snapshot(&self) -> Vec<(String, String)> {
        let r = &self.readings;
        let mut out = Vec::with_capacity(32 + 2 * self.layout.loads.len());
        let mut put = |topic: String, payload: String| out.push((format!("{PREFIX}/{topic}"), payload));
        if let (Some(g), true) = (&r.grid, self.up(METER_UNIT)) {
            put("meter/power".into(), num(g.power_w));
            put("meter/import_energy".into(), num(g.import_wh));
            put("meter/export_energy".into(), num(g.export_wh));
            put("meter/voltage".into(), num(g.voltage_v));
            put("meter/frequency".into(), num(g.frequency_hz));
        }
        if self.up(SENSOR_UNIT) {
            put("grid/available".into(), on_off(r.grid_available));
        }
        if self.up(INVERTER_UNIT) {
            put("inverter/power".into(), num(r.pv.power_w));
            put("inverter/available".into(), num(r.pv.available_w));
            put("inverter/limit".into(), r.pv.limit_w.map_or_else(|| "none".to_owned(), num));
            put("inverter/energy".into(), num(r.pv.energy_wh));
        }
        if self.up(SENSOR_UNIT) {
            if let Some(t) = &r.tank {
                put("tank/temperature".into(), num(t.temp_c));
                put("tank/heating".into(), on_off(t.heating));
                put("tank/cutout".into(), on_off(t.cutout_tripped));
            }
            if let Some(b) = &r.battery {
                put("battery/soc".into(), num(b.soc_pct));
                put("battery/voltage".into(), num(b.voltage_v));
                put("battery/current".into(), num(b.current_a));
                put("battery/power".into(), num(b.power_w));
                put("battery/charger".into(), b.charger.name().to_owned());
            }
            put("loads/disconnected".into(), on_off(r.loads_disconnected));
            if let Some(e) = &r.ev {
                put("ev/plugged".into(), on_off(e.plugged));
                if e.plugged {
                    // A charger knows a car's SoC only while the car is plugged in.
                    put("ev/soc".into(), num(e.soc_pct));
                }
                put("ev/current".into(), num(e.current_a));
                put("ev/power".into(), num(e.power_w));
            }
            for (name, w) in self.layout.loads.iter().zip(&r.loads_w) {
                put(format!("load/{name}/power"), num(*w));
            }
        }
        for (ch, name) in self.layout.channels.iter().enumerate() {
            let wired = self.layout.wiring.contains(&ch);
            if !wired || self.up(RELAY_UNIT) {
                put(format!("relay/{name}/state"), on_off(r.contacts[ch]));
            }
        }
        out
    }

    /// Applies a command published on `topic`:
    /// `sim/relay/<channel>/set` (on/off), `sim/regulator/<name>/set` (%),
    /// `sim/ev/current/set` (A), `sim/battery/power/set` (W, + charges),
    /// `sim/inverter/limit/set` (W or `none`).
    pub fn mqtt_command(&mut self, topic: &str, payload: &str) -> Result<(), BusError> {
        let unknown = || BusError::UnknownTopic(topic.to_owned());
        let rest = topic
            .strip_prefix(PREFIX)
            .and_then(|t| t.strip_prefix('/'))
            .and_then(|t| t.strip_suffix("/set"))
            .ok_or_else(unknown)?;
        let relays_down = !self.up(RELAY_UNIT);
        let down = |unit| BusError::ServerDeviceFailure { unit };
        if let Some(name) = rest.strip_prefix("relay/") {
            let ch = self.layout.channels.iter().position(|c| c == name).ok_or_else(unknown)?;
            if relays_down && self.layout.wiring.contains(&ch) {
                return Err(down(RELAY_UNIT));
            }
            self.controls.relays[ch] = parse_switch(topic, payload)?;
            return Ok(());
        }
        if let Some(name) = rest.strip_prefix("regulator/") {
            let k = self.layout.regulators.iter().position(|c| c == name).ok_or_else(unknown)?;
            if relays_down {
                return Err(down(RELAY_UNIT));
            }
            let pct = parse_number(topic, payload, "a percentage 0–100")?;
            self.controls.regulators[k] = pct.clamp(0.0, 100.0);
            return Ok(());
        }
        match rest {
            "ev/current" if self.layout.has_ev => {
                if relays_down {
                    return Err(down(RELAY_UNIT));
                }
                self.controls.ev_current_a = parse_number(topic, payload, "a current in A")?.max(0.0);
                Ok(())
            }
            "battery/power" if self.layout.battery_setpoint => {
                if relays_down {
                    return Err(down(RELAY_UNIT));
                }
                self.controls.battery_w = parse_number(topic, payload, "a power in W")?;
                Ok(())
            }
            "inverter/limit" => {
                if !self.up(INVERTER_UNIT) {
                    return Err(down(INVERTER_UNIT));
                }
                self.controls.pv_limit_w = if payload.trim().eq_ignore_ascii_case("none") {
                    None
                } else {
                    Some(parse_number(topic, payload, "a power in W, or none")?.max(0.0))
                };
                Ok(())
            }
            _ => Err(unknown()),
        }
    }
}
