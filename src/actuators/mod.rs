//! Decisions in, writes out: what each actuator target should hold, per device.
//!
//! The engine decides a [`Command`] per load and an inverter limit; this module turns
//! them into the desired level of every configured target (a coil, a register, an MQTT
//! topic, the SunSpec power limit) and hands them to the links through `watch`
//! channels, latest wins. The links write on change, re-assert periodically and after
//! every reconnect; nothing here does I/O or decides anything.

pub mod modbus;
pub mod mqtt;

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::watch;

use crate::config::model::{DeviceId, LimitUnit, Link, Load, LoadKind, Site, StageCommand, Write};
use crate::engine::{Command, Decisions};

pub use modbus::{WriteOp, WriteTracker};
pub use mqtt::{StateTopic, command_payload, state_topics};

/// The level a target should hold.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Level {
    /// On or off (a relay, an enable input).
    Switch(bool),
    /// A number in the unit the target's configuration expects (percent for
    /// setpoints and the SunSpec limit, amperes for chargers, watts for batteries and
    /// a limit in watts); registers divide it by their scale.
    Value(f64),
}

impl Level {
    /// The level as a number (switches 1/0).
    pub fn number(self) -> f64 {
        match self {
            Level::Switch(b) => f64::from(u8::from(b)),
            Level::Value(v) => v,
        }
    }
}

/// What one target should hold, and why it is written.
#[derive(Debug, Clone, PartialEq)]
pub struct DesiredWrite {
    /// Where.
    pub target: Write,
    /// What.
    pub level: Level,
    /// Who asked: `load water_heater` or `inverter limit`, for logs.
    pub origin: String,
    /// Re-write it at least this often even when unchanged.
    pub refresh: Duration,
}

/// The desired state of every target of one device (or of every MQTT device, for the
/// MQTT link). `commanded` stays false until the engine has decided once, so a link
/// writes nothing before the first decision (the read-back comes first).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct DeviceCommands {
    /// Whether the engine has decided at least once.
    pub commanded: bool,
    /// Targets and levels, in configuration order.
    pub writes: Vec<DesiredWrite>,
}

/// Tuning of the actuator side.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ActuatorOptions {
    /// How often unchanged load commands are re-written, so a relay module that
    /// rebooted gets its state back without a reconnect (the inverter limit uses
    /// the site's `inverter.refresh`).
    pub reassert: Duration,
}

impl Default for ActuatorOptions {
    /// Re-assert every 10 s, as the README promises and as the inverter limit's default
    /// `refresh`: a relay module that rebooted (its relays open) behind a gateway that
    /// kept the connection leaves the engine counting a load as on that is off, for up
    /// to this long. It was 30 s, unlike the documentation. A write to each target every
    /// 10 s is a few requests a minute even on a shared 9600 Bd line.
    fn default() -> Self {
        ActuatorOptions { reassert: Duration::from_secs(10) }
    }
}

/// The desired state of every target of the site for one set of decisions, indexed by
/// device.
pub fn plan(site: &Site, decisions: &Decisions, options: ActuatorOptions) -> Vec<DeviceCommands> {
    let mut out = vec![DeviceCommands { commanded: true, writes: Vec::new() }; site.devices.len()];
    let mut push = |target: &Write, level: Level, origin: &str, refresh: Duration| {
        if let Some(d) = out.get_mut(target.device().0) {
            d.writes.push(DesiredWrite { target: target.clone(), level, origin: origin.to_owned(), refresh });
        }
    };
    for (load, decision) in site.loads.iter().zip(&decisions.loads) {
        let origin = format!("load {}", load.name);
        for (target, level) in load_levels(load, decision.command) {
            push(target, level, &origin, options.reassert);
        }
    }
    if let Some(ic) = &site.inverter {
        let rated = ic.rated.0.max(1.0);
        let limit = decisions.inverter_limit.map(|p| p.0.clamp(0.0, rated));
        let level = match (&ic.limit, ic.limit_unit) {
            (Write::SunSpecLimit { .. }, _) | (_, LimitUnit::Percent) => {
                Level::Value(limit.map_or(100.0, |w| w / rated * 100.0))
            }
            (_, LimitUnit::Watts) => Level::Value(limit.unwrap_or(rated)),
        };
        push(&ic.limit, level, "inverter limit", ic.refresh);
    }
    out
}

/// The levels one load's command puts on its targets.
pub fn load_levels(load: &Load, command: Command) -> Vec<(&Write, Level)> {
    let mut v = Vec::new();
    match &load.kind {
        LoadKind::Switched { switch, .. } => v.push((switch, Level::Switch(command.is_on()))),
        LoadKind::Stepped { stages, command: how } => {
            let n = match command {
                Command::Stage(n) => usize::from(n),
                Command::On => stages.len(),
                _ => 0,
            };
            match how {
                StageCommand::Relays(relays) => {
                    for (i, w) in relays.iter().enumerate() {
                        v.push((w, Level::Switch(i < n)));
                    }
                }
                StageCommand::Register(w) => v.push((w, Level::Value(n as f64))),
            }
        }
        LoadKind::Proportional { setpoint, enable, .. } => {
            let pct = match command {
                Command::Setpoint(r) => r.0.clamp(0.0, 100.0),
                Command::On => 100.0,
                _ => 0.0,
            };
            v.push((setpoint, Level::Value(pct)));
            if let Some(e) = enable {
                v.push((e, Level::Switch(pct > 0.0)));
            }
        }
        LoadKind::Charger { setpoint, enable, max, .. } => {
            let amps = match command {
                Command::Current(a) => a.0.max(0.0),
                Command::On => max.0,
                _ => 0.0,
            };
            v.push((setpoint, Level::Value(amps)));
            if let Some(e) = enable {
                v.push((e, Level::Switch(amps > 0.0)));
            }
        }
        LoadKind::Battery { setpoint, max_charge, discharge, .. } => {
            // Negative (a discharge) only for a battery allowed to discharge, and no further.
            let floor = discharge.map_or(0.0, |d| -d.max.0);
            let w = match command {
                Command::Charge(p) => p.0.max(floor),
                Command::On => max_charge.0,
                _ => 0.0,
            };
            v.push((setpoint, Level::Value(w)));
        }
    }
    v
}

/// Every actuator target configured on a device, in configuration order (what the
/// start-up read-back reads).
pub fn targets_of(site: &Site, device: DeviceId) -> Vec<Write> {
    let mut v: Vec<Write> = Vec::new();
    for load in &site.loads {
        for (w, _) in load_levels(load, Command::Off) {
            if w.device() == device && !v.contains(w) {
                v.push(w.clone());
            }
        }
    }
    if let Some(ic) = &site.inverter
        && ic.limit.device() == device
    {
        v.push(ic.limit.clone());
    }
    v
}

/// Fans decisions out to the links: one `watch` per Modbus device and one for the
/// MQTT link (its command topics plus the retained state topics).
#[derive(Debug)]
pub struct Dispatcher {
    site: Arc<Site>,
    options: ActuatorOptions,
    devices: Vec<watch::Sender<Arc<DeviceCommands>>>,
    mqtt: watch::Sender<Arc<MqttOutputs>>,
    /// Each load's command as last handed out, for a safe state of `hold` when the
    /// control task dies and the daemon sends the safe states without it.
    last: std::sync::Mutex<Vec<Command>>,
}

/// What the MQTT link publishes.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MqttOutputs {
    /// Command topics of MQTT devices.
    pub commands: DeviceCommands,
    /// Retained state topics (relative to the topic prefix).
    pub state: Vec<StateTopic>,
}

impl Dispatcher {
    /// A dispatcher for a site; every channel starts with nothing commanded.
    pub fn new(site: Arc<Site>, options: ActuatorOptions) -> Self {
        let devices = site.devices.iter().map(|_| watch::Sender::new(Arc::new(DeviceCommands::default()))).collect();
        let last = std::sync::Mutex::new(vec![Command::Off; site.loads.len()]);
        Dispatcher { site, options, devices, mqtt: watch::Sender::new(Arc::new(MqttOutputs::default())), last }
    }

    /// Each load's command as last handed to the links (`off` before the first tick).
    pub fn last_commands(&self) -> Vec<Command> {
        self.last.lock().unwrap_or_else(std::sync::PoisonError::into_inner).clone()
    }

    /// The desired state of one Modbus device, for its link.
    pub fn device(&self, device: DeviceId) -> Option<watch::Receiver<Arc<DeviceCommands>>> {
        self.devices.get(device.0).map(watch::Sender::subscribe)
    }

    /// The MQTT link's outputs.
    pub fn mqtt(&self) -> watch::Receiver<Arc<MqttOutputs>> {
        self.mqtt.subscribe()
    }

    /// Hands a tick's decisions to the links; a channel is only touched when its
    /// content changes, so links wake on change, not on every tick.
    pub fn apply(&self, decisions: &Decisions) {
        self.apply_as(decisions, false, &[]);
    }

    /// As [`Dispatcher::apply`], with the guard signals that are lost (the engine's
    /// `lost_guard_signals`), so a load's MQTT state document in fail-safe names the
    /// point as the log and the status page do.
    pub fn apply_explained(&self, decisions: &Decisions, lost: &[String]) {
        self.apply_as(decisions, false, lost);
    }

    /// The safe states at shutdown: as [`Dispatcher::apply`], and the retained site
    /// state says `stopped` (with no live numbers) rather than the last tick's.
    pub fn apply_stopped(&self, safe: &Decisions) {
        self.apply_as(safe, true, &[]);
    }

    fn apply_as(&self, decisions: &Decisions, stopped: bool, lost: &[String]) {
        {
            // No allocation per tick: the vector keeps its capacity.
            let mut last = self.last.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
            last.clear();
            last.extend(decisions.loads.iter().map(|l| l.command));
        }
        let planned = plan(&self.site, decisions, self.options);
        let mut mqtt = DeviceCommands { commanded: true, writes: Vec::new() };
        for ((device, commands), tx) in self.site.devices.iter().zip(planned).zip(&self.devices) {
            if matches!(device.link, Link::Mqtt) {
                mqtt.writes.extend(commands.writes.iter().cloned());
            }
            tx.send_if_modified(|cur| {
                let changed = **cur != commands;
                if changed {
                    *cur = Arc::new(commands);
                }
                changed
            });
        }
        let mut state = state_topics(&self.site, decisions, lost);
        if stopped {
            mqtt::mark_stopped(&mut state, decisions);
        }
        let outputs = MqttOutputs { commands: mqtt, state };
        self.mqtt.send_if_modified(|cur| {
            let changed = **cur != outputs;
            if changed {
                *cur = Arc::new(outputs);
            }
            changed
        });
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::{LimitReason, LoadDecision, Mode};
    use crate::units::{Power, Timestamp};

    fn site(unit: &str) -> Site {
        let text = format!(
            "
site: {{ name: T, timezone: UTC, export: forbidden }}
devices:
  inv: {{ modbus_tcp: 127.0.0.1:1502, unit: 1 }}
points:
  grid: {{ device: inv, register: 0, type: i16, unit: W }}
inverter:
  rated: 4kW
  limit: {{ device: inv, register: 10 }}
  limit_unit: {unit}
"
        );
        crate::config::load_str("t.yaml", &text).map_err(|e| e.render(false)).unwrap().site
    }

    fn limit(site: &Site, w: Option<f64>) -> Level {
        let d = Decisions {
            now: Timestamp(0),
            loads: Vec::<LoadDecision>::new(),
            inverter_limit: w.map(Power),
            limit_reason: LimitReason::ExportGuard,
            mode: Mode::Normal,
            surplus: Power::ZERO,
            grid: None,
            switchings: Vec::new(),
        };
        plan(site, &d, ActuatorOptions::default())[0].writes[0].level
    }

    #[test]
    fn the_inverter_limit_is_written_in_the_configured_unit() {
        let pct = site("'%'");
        assert_eq!(limit(&pct, Some(1000.0)), Level::Value(25.0));
        assert_eq!(limit(&pct, None), Level::Value(100.0), "unlimited = 100 %");
        assert_eq!(limit(&pct, Some(9000.0)), Level::Value(100.0), "clamped to rated");
        let w = site("W");
        assert_eq!(limit(&w, Some(1000.0)), Level::Value(1000.0));
        assert_eq!(limit(&w, None), Level::Value(4000.0));
    }
}
