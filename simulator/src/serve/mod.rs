//! The plant on the wire: a running [`Plant`] served over Modbus TCP (every device behind
//! one port, addressed by unit id) and, optionally, MQTT, on a clock that runs in real
//! time or faster. Used by `spillway-sim serve`, by the daemon's tests and by
//! `spillway demo`, in a tokio runtime the caller owns.
//!
//! Libraries spawn nothing, except here: [`Server::start`] *is* the server, so it spawns
//! its clock, its listener and its MQTT link, and [`ServerHandle::stop`] awaits them all.
//! Documented for users in the top-level README ("The simulator on the wire").

mod clock;
mod fault;
mod modbus;
mod mqtt;

use std::net::SocketAddr;
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::Duration;

use tokio::sync::watch;
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;

use crate::plant::config::FaultConfig;
use crate::plant::{Controls, Flows, Plant, PlantError, Readings};

pub use clock::SimClock;
pub use fault::parse_fault;
pub use mqtt::{COMMAND_FILTER, STATUS_TOPIC};

/// What to do about a listener that could not be opened, by what the system said.
fn bind_hint(e: &std::io::Error) -> &'static str {
    match e.kind() {
        std::io::ErrorKind::AddrInUse => "another server holds that port: stop it, or give port 0 to pick a free one",
        std::io::ErrorKind::AddrNotAvailable => {
            "that address is not one of this machine's: use 127.0.0.1, or 0.0.0.0 for every interface"
        }
        std::io::ErrorKind::PermissionDenied => "ports below 1024 need privileges: use a port such as 5020",
        _ => "check the address, or give port 0 to pick a free one",
    }
}

/// Errors of the server.
#[derive(Debug, thiserror::Error)]
pub enum ServeError {
    /// The Modbus TCP listener could not be opened.
    #[error("cannot listen for Modbus TCP on {addr}: {source} ({})", bind_hint(source))]
    Bind {
        /// The address asked for.
        addr: SocketAddr,
        /// What the system said.
        #[source]
        source: std::io::Error,
    },
    /// The MQTT broker address is not `HOST:PORT`.
    #[error("MQTT broker address \"{0}\" is not HOST:PORT (e.g. 127.0.0.1:1883)")]
    MqttAddress(String),
    /// A serving option is out of range.
    #[error("{0}")]
    Options(String),
    /// A fault spec does not parse (see [`parse_fault`] for the syntax).
    #[error("fault `{spec}`: {why}")]
    FaultSpec {
        /// The spec as given.
        spec: String,
        /// What is wrong with it, and what would be right.
        why: String,
    },
    /// The plant refused a fault (e.g. an unknown relay channel).
    #[error("cannot inject the fault: {0}")]
    Fault(#[from] PlantError),
}

/// How to serve a plant.
#[derive(Debug, Clone)]
pub struct ServeOptions {
    /// Modbus TCP listen address; port 0 picks a free port (see [`ServerHandle::modbus_addr`]).
    pub modbus: SocketAddr,
    /// MQTT broker to connect to as a client, `HOST:PORT`; `None` = no MQTT.
    pub mqtt: Option<String>,
    /// MQTT client id; `None` = `spillway-sim-<pid>-<n>`, unique per server.
    pub mqtt_client_id: Option<String>,
    /// Simulated seconds per wall-clock second (10 = ten times faster than real time).
    pub speed: f64,
    /// Simulated step of the plant; `None` = [`SimClock::default_step`] (100 ms at speed
    /// 1, 1 s from speed 10 on).
    pub step: Option<Duration>,
    /// Simulated time between two MQTT snapshots (the meter's default period).
    pub publish_every: Duration,
    /// The clock holds at this instant (ms since the epoch) rather than running past it;
    /// the devices keep answering. `None` = it runs until stopped.
    pub hold_at_ms: Option<i64>,
}

impl Default for ServeOptions {
    fn default() -> ServeOptions {
        ServeOptions {
            modbus: SocketAddr::from(([127, 0, 0, 1], 0)),
            mqtt: None,
            mqtt_client_id: None,
            speed: 1.0,
            step: None,
            publish_every: Duration::from_secs(1),
            hold_at_ms: None,
        }
    }
}

/// Where the MQTT link stands.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MqttState {
    /// No MQTT configured, or not connected (connecting, or waiting to retry).
    Disconnected,
    /// Connected; the command subscription is not acknowledged yet.
    Connected,
    /// Connected and subscribed to the command topics.
    Subscribed,
}

/// What the tasks share: the plant, and the news of its clock and MQTT link.
struct Shared {
    plant: Mutex<Plant>,
    /// The plant's instant after each clock tick (ms since the epoch).
    updates: watch::Sender<i64>,
    mqtt: watch::Sender<MqttState>,
}

impl Shared {
    /// Locks the plant. A panic while it was held (a bug) leaves it usable: the plant
    /// has no invariant that a half-finished request could break.
    fn plant(&self) -> MutexGuard<'_, Plant> {
        self.plant.lock().unwrap_or_else(|poisoned| poisoned.into_inner())
    }
}

/// One life of the listener and the MQTT link, between two restarts.
struct Generation {
    cancel: CancellationToken,
    /// The listener task, the MQTT task, and one token per open Modbus connection.
    tasks: TaskTracker,
}

/// Starts servers.
#[derive(Debug)]
pub struct Server;

impl Server {
    /// Starts serving `plant` from its current instant: binds the Modbus listener, starts
    /// the clock and, with `options.mqtt`, the MQTT link. Must be called inside a tokio
    /// runtime; the tasks run on it until [`ServerHandle::stop`].
    pub async fn start(plant: Plant, options: ServeOptions) -> Result<ServerHandle, ServeError> {
        let clock = SimClock::new(options.speed, options.step)?;
        let publish_every_ms = i64::try_from(options.publish_every.as_millis()).unwrap_or(i64::MAX);
        if publish_every_ms < 1 {
            return Err(ServeError::Options("publish_every must be at least 1 ms".to_owned()));
        }
        let mqtt = match &options.mqtt {
            Some(broker) => {
                let (host, port) = mqtt::parse_broker(broker)?;
                let client_id = options.mqtt_client_id.clone().unwrap_or_else(unique_client_id);
                Some(mqtt::Link { host, port, client_id, publish_every_ms })
            }
            None => None,
        };
        let sim0_ms = plant.now_ms();
        let shared = Arc::new(Shared {
            plant: Mutex::new(plant),
            updates: watch::Sender::new(sim0_ms),
            mqtt: watch::Sender::new(MqttState::Disconnected),
        });
        let root = CancellationToken::new();
        let (generation, modbus_addr) = start_generation(&shared, options.modbus, mqtt.as_ref(), &root)?;
        let clock_task = TaskTracker::new();
        let hold_at_ms = options.hold_at_ms.unwrap_or(i64::MAX);
        clock_task.spawn(clock::run(shared.clone(), clock, Instant::now(), (sim0_ms, hold_at_ms), root.clone()));
        clock_task.close();
        tracing::info!(%modbus_addr, speed = clock.speed, step_ms = clock.step_ms, "simulator serving");
        Ok(ServerHandle {
            shared,
            modbus_addr,
            clock,
            mqtt,
            root,
            clock_task,
            generation: tokio::sync::Mutex::new(generation),
        })
    }
}

fn unique_client_id() -> String {
    static NEXT: std::sync::atomic::AtomicU32 = std::sync::atomic::AtomicU32::new(0);
    let n = NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    format!("spillway-sim-{}-{n}", std::process::id())
}

/// Binds the listener and spawns the listener task and the MQTT link.
fn start_generation(
    shared: &Arc<Shared>,
    addr: SocketAddr,
    mqtt: Option<&mqtt::Link>,
    root: &CancellationToken,
) -> Result<(Generation, SocketAddr), ServeError> {
    let listener = modbus::bind(addr)?;
    let bound = listener.local_addr().map_err(|source| ServeError::Bind { addr, source })?;
    let cancel = root.child_token();
    let tasks = TaskTracker::new();
    tasks.spawn(modbus::serve(listener, Arc::downgrade(shared), cancel.clone(), tasks.clone()));
    if let Some(link) = mqtt {
        tasks.spawn(mqtt::run(shared.clone(), link.clone(), cancel.clone()));
    }
    tasks.close();
    Ok((Generation { cancel, tasks }, bound))
}

/// Power-on state of every device: contacts commanded open, setpoints zero, the
/// inverter's control registers at their defaults (no limit). The physics (tank
/// temperature, battery charge, the clock) carries on: only the devices restarted.
fn power_on(plant: &mut Plant) {
    let controls = plant.controls_mut();
    controls.relays.iter_mut().for_each(|r| *r = false);
    controls.regulators.iter_mut().for_each(|r| *r = 0.0);
    controls.battery_w = 0.0;
    controls.ev_current_a = 0.0;
    plant.bus_mut().reset_inverter();
}

/// A running server.
pub struct ServerHandle {
    shared: Arc<Shared>,
    modbus_addr: SocketAddr,
    clock: SimClock,
    mqtt: Option<mqtt::Link>,
    root: CancellationToken,
    clock_task: TaskTracker,
    generation: tokio::sync::Mutex<Generation>,
}

impl std::fmt::Debug for ServerHandle {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ServerHandle").field("modbus_addr", &self.modbus_addr).field("clock", &self.clock).finish()
    }
}

impl ServerHandle {
    /// The bound Modbus TCP address (the real port when port 0 was asked for).
    pub fn modbus_addr(&self) -> SocketAddr {
        self.modbus_addr
    }

    /// The clock in use (speed and step).
    pub fn clock(&self) -> SimClock {
        self.clock
    }

    /// The simulated instant, ms since the Unix epoch.
    pub fn now_ms(&self) -> i64 {
        self.shared.plant().now_ms()
    }

    /// What meters and sensors report now.
    pub fn readings(&self) -> Readings {
        self.shared.plant().readings().clone()
    }

    /// Physical truth: power now and energy so far, per flow.
    pub fn flows(&self) -> Flows {
        self.shared.plant().flows().clone()
    }

    /// The controls as the devices hold them now.
    pub fn controls(&self) -> Controls {
        self.shared.plant().controls().clone()
    }

    /// Runs `f` on the plant under its lock (the clock and requests wait meanwhile;
    /// keep it short).
    pub fn with_plant<R>(&self, f: impl FnOnce(&mut Plant) -> R) -> R {
        f(&mut self.shared.plant())
    }

    /// Waits until the simulated clock has reached `at_ms` (forever if the clock holds
    /// earlier, see [`ServeOptions::hold_at_ms`]).
    pub async fn wait_until(&self, at_ms: i64) {
        let mut updates = self.shared.updates.subscribe();
        // The sender lives in `self.shared`, so `wait_for` cannot see it closed.
        let _ = updates.wait_for(|&now| now >= at_ms).await;
    }

    /// An MQTT broker was given.
    pub fn mqtt_enabled(&self) -> bool {
        self.mqtt.is_some()
    }

    /// Where the MQTT link stands ([`MqttState::Disconnected`] without MQTT).
    pub fn mqtt_state(&self) -> MqttState {
        *self.shared.mqtt.borrow()
    }

    /// Waits until the MQTT link is subscribed to the command topics; returns at once
    /// when no broker was given ([`ServerHandle::mqtt_enabled`]).
    pub async fn wait_mqtt_subscribed(&self) {
        if self.mqtt.is_none() {
            return;
        }
        let mut state = self.shared.mqtt.subscribe();
        let _ = state.wait_for(|s| *s == MqttState::Subscribed).await;
    }

    /// Injects a fault while running; a relative start (`When::After`) counts from now.
    pub fn inject(&self, fault: &FaultConfig) -> Result<(), ServeError> {
        self.shared.plant().inject_fault(fault)?;
        Ok(())
    }

    /// Injects a fault given in the `--fault` syntax (see [`parse_fault`]).
    pub fn inject_spec(&self, spec: &str) -> Result<(), ServeError> {
        self.inject(&parse_fault(spec)?)
    }

    /// Restarts the simulator's devices: every Modbus connection and the MQTT link are
    /// dropped, the devices come back at their power-on state, and the listener opens
    /// again on the same port. The clock and the physics carry on.
    pub async fn restart(&self) -> Result<(), ServeError> {
        self.restart_after(Duration::ZERO).await
    }

    /// As [`ServerHandle::restart`], with the listener closed for `downtime` of wall
    /// time before it opens again (clients see refused connections meanwhile).
    pub async fn restart_after(&self, downtime: Duration) -> Result<(), ServeError> {
        let mut generation = self.generation.lock().await;
        generation.cancel.cancel();
        generation.tasks.wait().await;
        power_on(&mut self.shared.plant());
        if !downtime.is_zero() {
            tokio::time::sleep(downtime).await;
        }
        let (next, _) = start_generation(&self.shared, self.modbus_addr, self.mqtt.as_ref(), &self.root)?;
        *generation = next;
        tracing::info!(modbus_addr = %self.modbus_addr, "simulator restarted");
        Ok(())
    }

    /// Stops serving: closes every connection and the listener, stops the clock and the
    /// MQTT link, and returns when all of them have finished.
    pub async fn stop(self) {
        self.root.cancel();
        let generation = self.generation.lock().await;
        generation.tasks.wait().await;
        self.clock_task.wait().await;
        tracing::info!(modbus_addr = %self.modbus_addr, "simulator stopped");
    }
}

impl Drop for ServerHandle {
    /// A handle dropped without [`ServerHandle::stop`] still stops its tasks (without
    /// waiting for them).
    fn drop(&mut self) {
        self.root.cancel();
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The advice fits what went wrong: a busy port is not a foreign address.
    #[test]
    fn a_listener_that_cannot_open_gets_advice_for_its_cause() {
        let addr: SocketAddr = "10.255.255.1:5020".parse().unwrap();
        let said = |kind: std::io::ErrorKind| ServeError::Bind { addr, source: kind.into() }.to_string();
        assert!(said(std::io::ErrorKind::AddrInUse).contains("another server holds that port"));
        assert!(said(std::io::ErrorKind::AddrNotAvailable).contains("not one of this machine's"));
        assert!(said(std::io::ErrorKind::PermissionDenied).contains("below 1024"));
    }
}
