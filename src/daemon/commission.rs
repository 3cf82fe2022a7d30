//! Commissioning: read every point once (`spillway read`), and the load-step test
//! (`spillway step-test`) that switches one load on and off and measures the change at
//! the grid meter, proving its relay is wired to the right load.
//!
//! Both run on a runtime of their own and use the same links as the daemon; nothing
//! here decides. The step test commands only the tested load's targets: other loads
//! and the inverter limit are left as the device holds them.

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, watch};
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use super::{DaemonError, runtime};
use crate::actuators::{DesiredWrite, DeviceCommands, MqttOutputs, load_levels};
use crate::config::model::{DeviceId, LimitUnit, Link, LoadId, LoadKind, PointId, Site, StageCommand, Write};
use crate::engine::Command;
use crate::sources::modbus::probe::{self, DeviceProbe};
use crate::sources::{Clock, ModbusLink, ModbusOptions, MqttLink, MqttOptions, SerialLines, SourceEvent};

/// What `read` found on one device.
#[derive(Debug)]
pub struct DeviceRead {
    /// The device.
    pub device: DeviceId,
    /// The probe, or why the device could not be reached.
    pub result: Result<DeviceProbe, String>,
}

/// What `read` heard on MQTT.
#[derive(Debug, Default)]
pub struct MqttRead {
    /// The first value of each MQTT point of the selected devices (`None`: nothing
    /// arrived while listening).
    pub samples: Vec<(PointId, Option<f64>)>,
    /// Malformed payloads seen: (topic, what was wrong).
    pub malformed: Vec<(String, String)>,
    /// Why the broker could not be reached, if it could not.
    pub error: Option<String>,
}

/// Reads every point of the site (or of one device) once. MQTT points are listened to
/// for `listen` under a client id and topic prefix of their own, so a running daemon's
/// connection and status topic are not disturbed.
pub fn read(
    site: &Site,
    only: Option<DeviceId>,
    listen: Duration,
    connect_timeout: Duration,
) -> Result<(Vec<DeviceRead>, Option<MqttRead>), DaemonError> {
    let rt = runtime()?;
    rt.block_on(async {
        let mut devices = Vec::new();
        let mut mqtt_devices = Vec::new();
        for (i, d) in site.devices.iter().enumerate() {
            let id = DeviceId(i);
            if only.is_some_and(|o| o != id) {
                continue;
            }
            if matches!(d.link, Link::Mqtt) {
                mqtt_devices.push(id);
                continue;
            }
            let result = probe::probe(site, id, connect_timeout).await.map_err(|e| e.to_string());
            devices.push(DeviceRead { device: id, result });
        }
        let mqtt = if mqtt_devices.is_empty() || site.mqtt.is_none() {
            None
        } else {
            Some(listen_mqtt(site, &mqtt_devices, listen).await)
        };
        Ok((devices, mqtt))
    })
}

/// One Modbus target the site writes on a device, with what it is for.
#[derive(Debug, Clone, PartialEq)]
pub struct ActuatorTarget {
    /// The target.
    pub write: Write,
    /// What writes it: the load's name (`water_heater`), with the role where the load
    /// has several (`immersion setpoint`, `heater stage 2`), or `inverter limit`.
    pub what: String,
    /// The unit of the value written (`%`, `A`, `W`); empty for a relay or a stage.
    pub unit: &'static str,
    /// The load that writes it (its index in the site's loads); `None` for the
    /// inverter limit.
    pub load: Option<usize>,
}

/// Every coil and holding register the site's loads and inverter limit write on
/// `device`, in the site file's order (each once). MQTT targets are left out: they are
/// published, not read back.
pub fn actuator_targets(site: &Site, device: DeviceId) -> Vec<ActuatorTarget> {
    let mut all: Vec<(&Write, String, &'static str, Option<usize>)> = Vec::new();
    for (i, l) in site.loads.iter().enumerate() {
        let n = &l.name;
        let mut mine: Vec<(&Write, String, &'static str)> = Vec::new();
        match &l.kind {
            LoadKind::Switched { switch, .. } => mine.push((switch, n.clone(), "")),
            LoadKind::Stepped { command: StageCommand::Relays(relays), .. } => {
                for (k, w) in relays.iter().enumerate() {
                    mine.push((w, format!("{n} stage {}", k + 1), ""));
                }
            }
            LoadKind::Stepped { command: StageCommand::Register(w), .. } => mine.push((w, format!("{n} stage"), "")),
            LoadKind::Proportional { setpoint, enable, .. } => {
                mine.push((setpoint, format!("{n} setpoint"), "%"));
                mine.extend(enable.iter().map(|e| (e, format!("{n} enable"), "")));
            }
            LoadKind::Charger { setpoint, enable, .. } => {
                mine.push((setpoint, format!("{n} current"), "A"));
                mine.extend(enable.iter().map(|e| (e, format!("{n} enable"), "")));
            }
            LoadKind::Battery { setpoint, .. } => mine.push((setpoint, format!("{n} charge power"), "W")),
        }
        all.extend(mine.into_iter().map(|(w, what, unit)| (w, what, unit, Some(i))));
    }
    if let Some(ic) = &site.inverter {
        let unit = match (&ic.limit, ic.limit_unit) {
            (Write::SunSpecLimit { .. }, _) | (_, LimitUnit::Percent) => "%",
            (_, LimitUnit::Watts) => "W",
        };
        all.push((&ic.limit, "inverter limit".to_owned(), unit, None));
    }
    let mut out: Vec<ActuatorTarget> = Vec::new();
    for (w, what, unit, load) in all {
        if w.device() != device || matches!(w, Write::Mqtt { .. }) || out.iter().any(|t| t.write == *w) {
            continue;
        }
        out.push(ActuatorTarget { write: w.clone(), what, unit, load });
    }
    out
}

/// What a write the device refused was for: the target a load (or the inverter limit)
/// writes at `address` with Modbus function `function` (5 and 15 coils, 6 and 16
/// holding registers; the first address of a multiple write). `None` for a read, or
/// an address no load writes.
pub fn refused_write(site: &Site, device: DeviceId, function: u8, address: u16) -> Option<ActuatorTarget> {
    let targets = actuator_targets(site, device);
    let at = |t: &&ActuatorTarget| match (&t.write, function) {
        (Write::Coil { address: a, .. }, 5 | 15) | (Write::Register { address: a, .. }, 6 | 16) => *a == address,
        _ => false,
    };
    // A SunSpec limit's register is found on the device, not in the site file: a
    // refused register write on its device with no other owner is the limit's.
    let sunspec = |t: &&ActuatorTarget| matches!((&t.write, function), (Write::SunSpecLimit { .. }, 6 | 16));
    targets.iter().find(at).or_else(|| targets.iter().find(sunspec)).cloned()
}

/// A copy of the site whose MQTT identity cannot clash with a running daemon's.
fn commissioning_site(site: &Site, role: &str) -> Site {
    let mut s = site.clone();
    if let Some(m) = &mut s.mqtt {
        m.client_id = format!("{}-{role}-{}", m.client_id, std::process::id());
        m.topic_prefix = format!("{}/{role}", m.topic_prefix);
        // Discovery documents are retained and shared by name with the running
        // controller's: a commissioning link publishing its own would point every
        // entity at its topics, unavailable once it exits.
        m.discovery = None;
    }
    s
}

async fn listen_mqtt(site: &Site, devices: &[DeviceId], listen: Duration) -> MqttRead {
    let site = Arc::new(commissioning_site(site, "read"));
    let points: Vec<PointId> =
        (0..site.points.len()).map(PointId).filter(|p| devices.contains(&site.points[p.0].device)).collect();
    let mut out = MqttRead { samples: points.iter().map(|p| (*p, None)).collect(), ..MqttRead::default() };
    let link = match MqttLink::new(Arc::clone(&site), MqttOptions { transient: true, ..MqttOptions::default() }) {
        Ok(l) => l,
        Err(e) => {
            out.error = Some(e.to_string());
            return out;
        }
    };
    let (_outputs_tx, outputs_rx) = watch::channel(Arc::new(MqttOutputs::default()));
    let (tx, mut rx) = mpsc::channel(256);
    let cancel = CancellationToken::new();
    let task = tokio::spawn(link.run(outputs_rx, tx, Clock::System, cancel.clone()));
    let deadline = Instant::now() + listen;
    let mut connected = false;
    loop {
        let ev = tokio::select! {
            // Both cancel-safe: an mpsc receive and a sleep.
            ev = rx.recv() => ev,
            () = tokio::time::sleep_until(deadline) => None,
        };
        match ev {
            Some(SourceEvent::Sample { point, value, .. }) => {
                if let Some(slot) = out.samples.iter_mut().find(|(p, v)| *p == point && v.is_none()) {
                    slot.1 = Some(value);
                }
                if out.samples.iter().all(|(_, v)| v.is_some()) {
                    break;
                }
            }
            Some(SourceEvent::DeviceUp { .. }) => connected = true,
            Some(SourceEvent::DeviceDown { reason, .. }) => out.error = Some(reason),
            Some(SourceEvent::Malformed { origin, detail, .. }) => out.malformed.push((origin, detail)),
            Some(_) => {}
            None => break,
        }
    }
    if connected {
        out.error = None;
    }
    cancel.cancel();
    let _ = task.await;
    out
}

/// How a step test is run.
#[derive(Debug, Clone, Copy)]
pub struct StepOptions {
    /// How long the load stays on.
    pub hold: Duration,
    /// How long the meter is watched before switching on and after switching off.
    pub settle: Duration,
    /// How long to wait for the devices to answer at the start.
    pub connect_timeout: Duration,
    /// What the load is told during the hold: `On` (full power), or for a battery that
    /// may discharge, `Charge` with a negative power.
    pub command: Command,
}

impl Default for StepOptions {
    fn default() -> Self {
        StepOptions {
            hold: Duration::from_secs(10),
            settle: Duration::from_secs(5),
            connect_timeout: Duration::from_secs(10),
            command: Command::On,
        }
    }
}

/// What a step test measured: mean grid power (import positive) in each phase, and the
/// load's own power point where it has one.
#[derive(Debug, Clone, PartialEq)]
pub struct StepResult {
    /// Before switching on.
    pub grid_before: Option<f64>,
    /// The second half of the hold.
    pub grid_on: Option<f64>,
    /// After switching off again.
    pub grid_after: Option<f64>,
    /// The load's power point during the hold, if configured.
    pub load_power_on: Option<f64>,
    /// What the load should draw during the hold (negative: a battery discharging).
    pub rated: f64,
    /// Samples of the grid point in each phase.
    pub samples: [usize; 3],
}

impl StepResult {
    /// The measured step: grid when on minus the mean of before and after.
    pub fn step(&self) -> Option<f64> {
        let on = self.grid_on?;
        let base = match (self.grid_before, self.grid_after) {
            (Some(b), Some(a)) => (b + a) / 2.0,
            (Some(b), None) => b,
            (None, Some(a)) => a,
            (None, None) => return None,
        };
        Some(on - base)
    }

    /// Whether the step looks like the load: at least half and at most one and a half
    /// times its rated power, in the same direction (`common practice` for a wiring
    /// check: a wrong relay shows no step or another load's).
    pub fn plausible(&self) -> bool {
        self.ratio().is_some_and(|r| (0.5..=1.5).contains(&r))
    }

    /// Whether the step looks like the load's power the other way round: a battery
    /// that discharged when told to charge, or charged when told to discharge (a
    /// setpoint whose sign convention is the opposite of Spillway's, + charging).
    pub fn reversed(&self) -> bool {
        self.ratio().is_some_and(|r| (-1.5..=-0.5).contains(&r))
    }

    fn ratio(&self) -> Option<f64> {
        (self.rated != 0.0).then_some(())?;
        Some(self.step()? / self.rated)
    }
}

/// Why a step test could not be run.
#[derive(Debug, thiserror::Error)]
pub enum StepError {
    /// Runtime or link set-up.
    #[error("{0}")]
    Daemon(#[from] DaemonError),
    /// A device the test needs does not answer.
    #[error("device \"{device}\" does not answer: {reason}; check its address, unit id and wiring")]
    NoAnswer {
        /// The device.
        device: String,
        /// The last reason given.
        reason: String,
    },
    /// The site has no grid meter to watch.
    #[error("the site has no grid point to measure the step on")]
    NoGridPoint,
    /// Ctrl-C or SIGTERM during the test; the load was commanded off before stopping.
    #[error("interrupted: the load was switched OFF again and the test stopped")]
    Interrupted,
}

/// The phases as they happen, for a live display.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum StepPhase {
    /// Devices answer; watching the meter before switching.
    Baseline,
    /// The load has been commanded on.
    On,
    /// The load has been commanded off.
    Off,
    /// A grid sample arrived (W, import positive).
    Grid(f64),
}

/// Runs the load-step test on `load`: baseline, on for `hold`, off, and the same
/// settling period after. The load is commanded off again whatever happens.
pub fn step_test(
    site: Arc<Site>,
    load: LoadId,
    options: StepOptions,
    mut progress: impl FnMut(StepPhase),
) -> Result<StepResult, StepError> {
    let grid = site.roles.grid.ok_or(StepError::NoGridPoint)?;
    let rt = runtime().map_err(StepError::Daemon)?;
    rt.block_on(async move {
        let site = Arc::new(commissioning_site(&site, "step-test"));
        let l = &site.loads[load.0];
        let rated = options.command.power(&l.kind).0;
        let cancel = CancellationToken::new();
        let tracker = TaskTracker::new();
        let (tx, mut rx) = mpsc::channel(1024);
        // The devices the load's targets live on; everything else is only read.
        let on_writes = writes_for(&site, load, options.command);
        let off_writes = writes_for(&site, load, Command::Off);
        let mut senders = Vec::new();
        let mut needed: Vec<DeviceId> = on_writes.iter().map(|w| w.target.device()).collect();
        needed.push(site.points[grid.0].device);
        needed.sort();
        needed.dedup();
        let lines = SerialLines::new();
        for (i, d) in site.devices.iter().enumerate() {
            let id = DeviceId(i);
            if matches!(d.link, Link::Mqtt) {
                continue;
            }
            let link = ModbusLink::sharing(Arc::clone(&site), id, ModbusOptions::default(), &lines)
                .map_err(|e| StepError::Daemon(e.into()))?;
            let (wtx, wrx) = watch::channel(Arc::new(DeviceCommands::default()));
            senders.push((id, wtx));
            tracker.spawn(link.run(wrx, tx.clone(), Clock::System, cancel.clone()));
        }
        let mqtt_tx = if site.mqtt.is_some() {
            let link = MqttLink::new(Arc::clone(&site), MqttOptions { transient: true, ..MqttOptions::default() })
                .map_err(|e| StepError::Daemon(e.into()))?;
            let (mtx, mrx) = watch::channel(Arc::new(MqttOutputs::default()));
            tracker.spawn(link.run(mrx, tx.clone(), Clock::System, cancel.clone()));
            Some(mtx)
        } else {
            None
        };
        drop(tx);
        tracker.close();
        let command = |writes: &[DesiredWrite]| {
            for (id, s) in &senders {
                let mine: Vec<DesiredWrite> = writes.iter().filter(|w| w.target.device() == *id).cloned().collect();
                if !mine.is_empty() {
                    s.send_replace(Arc::new(DeviceCommands { commanded: true, writes: mine }));
                }
            }
            if let Some(m) = &mqtt_tx {
                let mine: Vec<DesiredWrite> = writes
                    .iter()
                    .filter(|w| matches!(site.devices[w.target.device().0].link, Link::Mqtt))
                    .cloned()
                    .collect();
                if !mine.is_empty() {
                    m.send_replace(Arc::new(MqttOutputs {
                        commands: DeviceCommands { commanded: true, writes: mine },
                        state: Vec::new(),
                    }));
                }
            }
        };

        let outcome = async {
            // Wait until every needed device answers (a grid sample proves the meter).
            let mut up: Vec<DeviceId> = Vec::new();
            let mut last_reason: Vec<(DeviceId, String)> = Vec::new();
            let mut have_grid = false;
            let deadline = Instant::now() + options.connect_timeout;
            while !(have_grid && needed.iter().all(|d| up.contains(d) || *d == site.points[grid.0].device)) {
                let ev = tokio::select! {
                    // Both cancel-safe.
                    ev = rx.recv() => ev,
                    () = tokio::time::sleep_until(deadline) => None,
                };
                match ev {
                    Some(SourceEvent::DeviceUp { device }) => up.push(device),
                    Some(SourceEvent::DeviceDown { device, reason }) => last_reason.push((device, reason)),
                    Some(SourceEvent::Sample { point, value, .. }) if point == grid && value.is_finite() => {
                        have_grid = true;
                    }
                    Some(_) => {}
                    None => {
                        let missing =
                            needed.iter().find(|d| !up.contains(d)).copied().unwrap_or(site.points[grid.0].device);
                        let reason = last_reason
                            .iter()
                            .rev()
                            .find(|(d, _)| *d == missing)
                            .map_or_else(|| "no answer yet".to_owned(), |(_, r)| r.clone());
                        return Err(StepError::NoAnswer { device: site.devices[missing.0].name.clone(), reason });
                    }
                }
            }
            progress(StepPhase::Baseline);
            let before = watch_grid(&mut rx, grid, l.power, options.settle, &mut progress).await;
            command(&on_writes);
            progress(StepPhase::On);
            // The first half of the hold lets the load and the meter settle.
            let _ = watch_grid(&mut rx, grid, l.power, options.hold / 2, &mut progress).await;
            let on = watch_grid(&mut rx, grid, l.power, options.hold - options.hold / 2, &mut progress).await;
            command(&off_writes);
            progress(StepPhase::Off);
            let _ = watch_grid(&mut rx, grid, l.power, options.settle / 2, &mut progress).await;
            let after = watch_grid(&mut rx, grid, l.power, options.settle - options.settle / 2, &mut progress).await;
            Ok(StepResult {
                grid_before: before.grid,
                grid_on: on.grid,
                grid_after: after.grid,
                load_power_on: on.load,
                rated,
                samples: [before.n, on.n, after.n],
            })
        };
        // Ctrl-C or SIGTERM must not leave a mains load switched on with nobody watching
        // it: the test stops, and the load is switched off below like after any outcome.
        let outcome = tokio::select! {
            // Both cancel-safe: dropping the test mid-way loses only its measurements.
            r = outcome => r,
            () = interrupted() => Err(StepError::Interrupted),
        };
        // Whatever happened: the load off, then the links' last pass writes it.
        command(&off_writes);
        cancel.cancel();
        // Events still in flight must not block the links' last pass.
        while rx.recv().await.is_some() {}
        tracker.wait().await;
        outcome
    })
}

/// Resolves on Ctrl-C or (on Unix) SIGTERM. If a signal cannot be listened for, that
/// branch never fires and the test runs to its end as before.
async fn interrupted() {
    #[cfg(unix)]
    let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()).ok();
    #[cfg(unix)]
    let terminate = async {
        match term.as_mut() {
            Some(t) => {
                t.recv().await;
            }
            None => std::future::pending::<()>().await,
        }
    };
    #[cfg(not(unix))]
    let terminate = std::future::pending::<()>();
    tokio::select! {
        r = tokio::signal::ctrl_c() => {
            if r.is_err() {
                std::future::pending::<()>().await;
            }
        }
        () = terminate => {}
    }
}

fn writes_for(site: &Site, load: LoadId, command: Command) -> Vec<DesiredWrite> {
    let l = &site.loads[load.0];
    load_levels(l, command)
        .into_iter()
        .map(|(target, level)| DesiredWrite {
            target: target.clone(),
            level,
            origin: format!("step test {}", l.name),
            refresh: Duration::from_secs(5),
        })
        .collect()
}

struct Means {
    grid: Option<f64>,
    load: Option<f64>,
    n: usize,
}

/// Means of the grid point and the load's power point over `d`.
async fn watch_grid(
    rx: &mut mpsc::Receiver<SourceEvent>,
    grid: PointId,
    load_power: Option<PointId>,
    d: Duration,
    progress: &mut impl FnMut(StepPhase),
) -> Means {
    let deadline = Instant::now() + d;
    let (mut g, mut gn, mut p, mut pn) = (0.0, 0usize, 0.0, 0usize);
    loop {
        let ev = tokio::select! {
            // Both cancel-safe.
            ev = rx.recv() => ev,
            () = tokio::time::sleep_until(deadline) => None,
        };
        match ev {
            Some(SourceEvent::Sample { point, value, .. }) if value.is_finite() => {
                if point == grid {
                    g += value;
                    gn += 1;
                    progress(StepPhase::Grid(value));
                } else if Some(point) == load_power {
                    p += value;
                    pn += 1;
                }
            }
            Some(_) => {}
            None => break,
        }
    }
    Means { grid: (gn > 0).then(|| g / gn as f64), load: (pn > 0).then(|| p / pn as f64), n: gn }
}

#[cfg(test)]
mod tests {
    use super::commissioning_site;

    /// `read` and `step-test` beside a running controller: their MQTT link has its own
    /// client id and prefix, and publishes no discovery documents, which are retained
    /// under the same names as the controller's and would point its entities at a link
    /// that is gone a few seconds later.
    #[test]
    fn a_commissioning_link_keeps_out_of_the_controllers_way() {
        let yaml = "
site: { name: T, timezone: UTC, export: allowed }
mqtt: { broker: 127.0.0.1:1883, topic_prefix: spillway/t, client_id: ctl, discovery: true }
devices:
  home: { mqtt: true }
points:
  grid: { device: home, topic: home/meter, unit: W }
";
        let site = crate::config::load_str("t.yaml", yaml).map_err(|e| e.render(false)).unwrap().site;
        assert!(site.mqtt.as_ref().unwrap().discovery.is_some());
        let read = commissioning_site(&site, "read");
        let m = read.mqtt.unwrap();
        assert!(m.discovery.is_none());
        assert_eq!(m.topic_prefix, "spillway/t/read");
        assert!(m.client_id.starts_with("ctl-read-"), "{}", m.client_id);
    }
}
