//! Fault schedule: which faults are active at an instant, and the edges where a device
//! restart begins or ends (its outputs go to their power-on state then).

use super::PlantError;
use super::config::{Device, FaultConfig, GarbageMode};

/// Index of a device in per-device arrays (unit id − 1).
pub fn device_index(d: Device) -> usize {
    match d {
        Device::Meter => 0,
        Device::Inverter => 1,
        Device::Relays => 2,
        Device::Sensors => 3,
    }
}

#[derive(Debug, Clone, Copy)]
enum Kind {
    MeterSilent,
    MeterFrozen,
    Restart(usize),
    Stuck { channel: usize, closed: bool },
    Garbage(usize, GarbageMode),
}

#[derive(Debug, Clone, Copy)]
struct Event {
    start_ms: i64,
    end_ms: i64,
    kind: Kind,
}

/// Faults in force now.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Active {
    /// The grid meter reports nothing.
    pub meter_silent: bool,
    /// The grid meter repeats its last reading.
    pub meter_frozen: bool,
    /// Per device (unit − 1): rebooting.
    pub restarting: [bool; 4],
    /// Per device (unit − 1): reporting garbage.
    pub garbage: [Option<GarbageMode>; 4],
    /// Per relay channel: stuck closed (`Some(true)`) or open (`Some(false)`).
    pub stuck: Vec<Option<bool>>,
}

/// The run's fault schedule.
#[derive(Debug)]
pub struct Faults {
    events: Vec<Event>,
    /// The next instant at which the active set may change.
    pub next_change_ms: i64,
    /// Faults in force.
    pub active: Active,
}

impl Faults {
    /// Resolves the configured faults for a run starting at `start_ms`.
    pub fn new(
        cfgs: &[FaultConfig],
        start_ms: i64,
        channel: impl Fn(&str) -> Option<usize>,
        channels: usize,
    ) -> Result<Faults, PlantError> {
        let mut events = Vec::with_capacity(cfgs.len());
        for cfg in cfgs {
            events.push(event(cfg, start_ms, &channel)?);
        }
        let mut faults = Faults {
            events,
            next_change_ms: i64::MIN,
            active: Active { stuck: vec![None; channels], ..Active::default() },
        };
        faults.update(start_ms);
        Ok(faults)
    }

    /// Adds a fault while the plant runs; `When::After` counts from `now_ms`. The
    /// caller recomputes the active set (see [`Faults::update`]).
    pub fn add(
        &mut self,
        cfg: &FaultConfig,
        now_ms: i64,
        channel: impl Fn(&str) -> Option<usize>,
    ) -> Result<(), PlantError> {
        self.events.push(event(cfg, now_ms, &channel)?);
        Ok(())
    }

    /// Recomputes the active set at `t_ms`. Returns, per device, whether a restart
    /// began or ended since the last update.
    pub fn update(&mut self, t_ms: i64) -> [bool; 4] {
        let before = self.active.restarting;
        let mut active = Active { stuck: vec![None; self.active.stuck.len()], ..Active::default() };
        let mut next = i64::MAX;
        for e in &self.events {
            if e.start_ms > t_ms {
                next = next.min(e.start_ms);
                continue;
            }
            if e.end_ms <= t_ms {
                continue;
            }
            next = next.min(e.end_ms);
            match e.kind {
                Kind::MeterSilent => active.meter_silent = true,
                Kind::MeterFrozen => active.meter_frozen = true,
                Kind::Restart(d) => active.restarting[d] = true,
                Kind::Stuck { channel, closed } => active.stuck[channel] = Some(closed),
                Kind::Garbage(d, mode) => active.garbage[d] = Some(mode),
            }
        }
        self.active = active;
        self.next_change_ms = next;
        std::array::from_fn(|i| before[i] != self.active.restarting[i])
    }
}

/// Resolves one configured fault against the instant its `When::After` counts from.
fn event(cfg: &FaultConfig, from_ms: i64, channel: &impl Fn(&str) -> Option<usize>) -> Result<Event, PlantError> {
    let (start, duration, kind) = match cfg {
        FaultConfig::MeterSilent { start, duration } => (start, duration, Kind::MeterSilent),
        FaultConfig::MeterFrozen { start, duration } => (start, duration, Kind::MeterFrozen),
        FaultConfig::DeviceRestart { device, start, duration } => {
            (start, duration, Kind::Restart(device_index(*device)))
        }
        FaultConfig::RelayStuck { channel: name, closed, start, duration } => {
            let channel = channel(name)
                .ok_or_else(|| PlantError::UnknownChannel { name: name.clone(), place: "faults".to_owned() })?;
            (start, duration, Kind::Stuck { channel, closed: *closed })
        }
        FaultConfig::Garbage { device, mode, start, duration } => {
            (start, duration, Kind::Garbage(device_index(*device), *mode))
        }
    };
    if !(*duration >= 0.0) {
        return Err(PlantError::Invalid {
            what: "faults".to_owned(),
            why: "a fault's duration must be ≥ 0".to_owned(),
        });
    }
    let start_ms = start.resolve(from_ms);
    Ok(Event { start_ms, end_ms: start_ms + (duration * 1000.0).round() as i64, kind })
}
