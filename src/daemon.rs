//! The live controller: the only place that owns a tokio runtime and spawns tasks.
//!
//! Task structure (all tracked by one [`TaskTracker`], stopped by one
//! [`CancellationToken`]):
//! - one [`ModbusLink`] task per Modbus device and one [`MqttLink`] task when the site
//!   has `mqtt:` — they send [`SourceEvent`]s into one bounded `mpsc` channel and write
//!   what the dispatcher's `watch` channels hold;
//! - the control task ([`control`]): owns the [`Engine`], the [`Snapshot`] (samples are
//!   latest-value-wins) and the [`Dispatcher`]; ticks at `site.tick`, applies
//!   overrides, logs every switching with its reason, publishes the [`Status`], and
//!   persists the counters every 30 s;
//! - the status page's HTTP server when `--http` is given.
//!
//! Shutdown order matters and is owned by the control task: a shutdown request (SIGINT,
//! SIGTERM, [`Daemon::shutdown`]) makes it dispatch [`Engine::safe_decisions`] and then
//! cancel the token; the links see the cancellation, make one last pass over their (now
//! safe) commands and return, while the control task saves the counters (given up after
//! a grace, so a hung disk cannot hold the stop) and takes their events; every task is
//! awaited. A control task that dies instead (a panic) has the safe states sent for it
//! before the links are cancelled.

pub mod banner;
pub mod commission;
mod control;
pub mod demo;
pub mod failsafe_test;
pub mod replay_log;
pub mod state_file;

use std::net::SocketAddr;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tokio::sync::{mpsc, watch};
use tokio::task::JoinHandle;
use tokio_util::sync::CancellationToken;
use tokio_util::task::TaskTracker;
use tracing::{error, info, warn};

use crate::actuators::{ActuatorOptions, Dispatcher};
use crate::config::model::{DeviceId, Link, LoadId, SafeState, Site};
use crate::engine::{Command, Decisions, Engine, Snapshot};
use crate::sources::modbus::ModbusError;
use crate::sources::mqtt::MqttError;
use crate::sources::{
    Clock, LinkCounts, LinkStats, ModbusLink, ModbusOptions, MqttLink, MqttOptions, SerialLines, SourceEvent,
};
use crate::status::{self, Status};
use crate::units::{Timestamp, format_duration};

pub use control::Summary;
use control::{Control, Request};
use replay_log::{ReplayLog, ReplayLogError, ReplayLogOptions};
use state_file::StateFileError;

/// How to run.
#[derive(Debug, Clone)]
pub struct Options {
    /// Where time stamps come from (the system clock on a site; anchored tokio time in
    /// tests).
    pub clock: Clock,
    /// Where the counters are persisted; `None` keeps them in memory only.
    pub state_file: Option<PathBuf>,
    /// Serve the status page and JSON API on this address.
    pub http: Option<SocketAddr>,
    /// How often the counters are saved (and always at shutdown).
    pub persist_every: Duration,
    /// Modbus link tuning.
    pub modbus: ModbusOptions,
    /// MQTT link tuning.
    pub mqtt: MqttOptions,
    /// Actuator re-assertion.
    pub actuators: ActuatorOptions,
    /// Append the site's PV and household power to a CSV for `spillway replay`.
    pub replay_log: Option<ReplayLogOptions>,
    /// A fail point for tests of the failure path: the engine panics on this tick
    /// (counted from 1). Never set on a site.
    #[doc(hidden)]
    pub fail_at_tick: Option<u64>,
    /// A fail point for tests of a control task that dies outside the engine's tick: it
    /// panics while taking in this sample (counted from 1). Never set on a site.
    #[doc(hidden)]
    pub fail_at_sample: Option<u64>,
    /// A fail point for tests of a dying link: the named device's link panics this long
    /// after the start. Never set on a site.
    #[doc(hidden)]
    pub fail_link_after: Option<(String, Duration)>,
}

impl Default for Options {
    fn default() -> Self {
        Options {
            clock: Clock::System,
            state_file: None,
            http: None,
            persist_every: Duration::from_secs(30),
            modbus: ModbusOptions::default(),
            mqtt: MqttOptions::default(),
            actuators: ActuatorOptions::default(),
            replay_log: None,
            fail_at_tick: None,
            fail_at_sample: None,
            fail_link_after: None,
        }
    }
}

/// Why the daemon could not start.
#[derive(Debug, thiserror::Error)]
pub enum DaemonError {
    /// The async runtime or the signal handlers could not be set up.
    #[error("cannot start the runtime: {0}")]
    Runtime(#[source] std::io::Error),
    /// A Modbus device of the site cannot be given a link.
    #[error("cannot start a Modbus link: {0}")]
    Modbus(#[from] ModbusError),
    /// The MQTT link cannot be set up (password, TLS).
    #[error("cannot start the MQTT link: {0}")]
    Mqtt(#[from] MqttError),
    /// The status page's address cannot be bound.
    #[error("cannot serve the status page on {addr}: {source}; choose another address with --http")]
    Http {
        /// The address asked for.
        addr: SocketAddr,
        /// Why.
        #[source]
        source: std::io::Error,
    },
    /// The engine failed while running; the daemon stopped with safe states.
    #[error(
        "the controller failed ({0}); the daemon sent the safe states and stopped. This is a bug: please report it with the log"
    )]
    EngineFailed(String),
    /// The state file exists but cannot be read, or cannot be written.
    #[error("{0}")]
    State(#[from] StateFileError),
    /// The replay log cannot be kept in the file given.
    #[error("{0}")]
    ReplayLog(#[from] ReplayLogError),
}

/// A running daemon.
#[derive(Debug)]
pub struct Daemon {
    requests: mpsc::Sender<Request>,
    cancel: CancellationToken,
    tracker: TaskTracker,
    status: watch::Receiver<Arc<Status>>,
    http: Option<SocketAddr>,
    links: Vec<(String, Arc<LinkStats>)>,
    control: JoinHandle<Result<Summary, tokio::task::JoinError>>,
}

impl Daemon {
    /// Starts every task on the current tokio runtime: reads the state file, binds the
    /// status page, builds the links, then spawns them and the control task.
    pub async fn start(site: Arc<Site>, options: Options) -> Result<Daemon, DaemonError> {
        let mut engine = Engine::new(Arc::clone(&site));
        if let Some(path) = &options.state_file {
            restore(&mut engine, path, &options.clock)?;
            state_file::write_at_start(path, &site.name, &engine.persisted(), options.clock.now())?;
        }
        // The inverter may sit at its safe limit (a stop, a fail-safe or a reversion left
        // it there): the limit is given back from it gently, never in one write.
        engine.start_from_safe_limit();
        let replay_log = options.replay_log.as_ref().map(|o| ReplayLog::start(&site, o)).transpose()?;
        let http = match options.http {
            Some(addr) => {
                let listener = TcpListener::bind(addr).await.map_err(|source| DaemonError::Http { addr, source })?;
                let bound = listener.local_addr().map_err(|source| DaemonError::Http { addr, source })?;
                Some((listener, bound))
            }
            None => None,
        };
        let dispatcher = Arc::new(Dispatcher::new(Arc::clone(&site), options.actuators));
        // What the daemon sends by itself if the control task dies (a panic outside the
        // engine's guarded tick): every load in its safe state, the inverter at its safe
        // limit. A load whose safe state is `hold` keeps its last command (filled in then).
        let fallback = engine.safe_decisions(options.clock.now());
        let (events_tx, events_rx) = mpsc::channel::<SourceEvent>(event_capacity(&site));
        let cancel = CancellationToken::new();
        let tracker = TaskTracker::new();
        let mut links = Vec::new();

        // Build every link before spawning any, so a configuration problem stops the
        // start-up with nothing left running.
        let mut modbus = Vec::new();
        // Devices on one serial port share its line (one open port, polled in turn).
        let lines = SerialLines::new();
        for (i, d) in site.devices.iter().enumerate() {
            if matches!(d.link, Link::Mqtt) {
                continue;
            }
            let id = DeviceId(i);
            let link = ModbusLink::sharing(Arc::clone(&site), id, options.modbus, &lines)?;
            links.push((d.name.clone(), link.stats()));
            let Some(rx) = dispatcher.device(id) else { continue };
            modbus.push((link, rx));
        }
        let mqtt = match &site.mqtt {
            Some(_) => {
                let link = MqttLink::new(Arc::clone(&site), options.mqtt)?;
                links.push(("mqtt".to_owned(), link.stats()));
                Some(link)
            }
            None => None,
        };
        // A link ends only when the daemon stops. One that ends before (a panic) leaves
        // its device unread and uncommanded: the watchdog asks for the orderly stop.
        let (req_tx, req_rx) = mpsc::channel(4);
        let watch_link = |name: String, task: tokio::task::JoinHandle<()>| {
            let (stop, requests) = (cancel.clone(), req_tx.clone());
            async move {
                let r = task.await;
                if !stop.is_cancelled() {
                    let why = match r {
                        Err(e) if e.is_panic() => format!("the link of {name} panicked"),
                        _ => format!("the link of {name} ended"),
                    };
                    error!(link = %name, "{why}: stopping with safe states");
                    let _ = requests.send(Request::LinkDied(why)).await;
                }
            }
        };
        for (link, rx) in modbus {
            let name = site.devices[link.device().0].name.clone();
            let run = link.run(rx, events_tx.clone(), options.clock, cancel.clone());
            let task = match &options.fail_link_after {
                Some((failing, after)) if *failing == name => {
                    let after = *after;
                    tokio::spawn(async move {
                        tokio::select! {
                            () = run => {}
                            () = tokio::time::sleep(after) => panic!("fail point: link panics"),
                        }
                    })
                }
                _ => tokio::spawn(run),
            };
            tracker.spawn(watch_link(name, task));
        }
        if let Some(link) = mqtt {
            let task = tokio::spawn(link.run(dispatcher.mqtt(), events_tx.clone(), options.clock, cancel.clone()));
            tracker.spawn(watch_link("the MQTT broker".to_owned(), task));
        }
        drop(events_tx);

        let snapshot = Snapshot::empty(&site);
        let (status_tx, status_rx) = watch::channel(Arc::new(status::starting(&engine, &snapshot)));
        let bound = http.as_ref().map(|(_, a)| *a);
        if let Some((listener, addr)) = http {
            let rx = status_rx.clone();
            let stop = cancel.clone();
            tracker.spawn(async move {
                info!(%addr, "status page at http://{addr}/");
                if let Err(e) = status::http::serve(listener, rx, stop.cancelled_owned()).await {
                    warn!(%addr, error = %e, "status page stopped");
                }
            });
        }

        let control = Control::new(engine, snapshot, Arc::clone(&dispatcher), status_tx, replay_log, &options);
        // The control task normally sends the safe states and cancels the links itself;
        // if it dies some other way (a panic anywhere in it), this sends them and stops
        // the links, so the process can neither hang on with links and no controller nor
        // let the links' last pass write the last tick's commands as if they were safe.
        let inner = tokio::spawn(control.run(events_rx, req_rx, cancel.clone()));
        let stop = cancel.clone();
        let (fallback_site, clock) = (Arc::clone(&site), options.clock);
        let handle = tracker.spawn(async move {
            let r = inner.await;
            if let Err(e) = &r {
                error!(error = %e, "the control task died: sending the safe states and stopping the links");
                let safe = fallback_safe(&fallback_site, fallback, &dispatcher.last_commands(), clock.now());
                dispatcher.apply_stopped(&safe);
            }
            stop.cancel();
            r
        });
        tracker.close();
        info!(
            site = %site.name,
            modbus_links = site.devices.iter().filter(|d| !matches!(d.link, Link::Mqtt)).count(),
            mqtt = site.mqtt.is_some(),
            tick_ms = site.tick.as_millis() as u64,
            "controller running"
        );
        Ok(Daemon { requests: req_tx, cancel, tracker, status: status_rx, http: bound, links, control: handle })
    }

    /// The live status document (updated after every tick).
    pub fn status(&self) -> watch::Receiver<Arc<Status>> {
        self.status.clone()
    }

    /// Where the status page listens, once bound (port 0 resolved).
    pub fn http_addr(&self) -> Option<SocketAddr> {
        self.http
    }

    /// Counters of every link, by device name (`mqtt` for the MQTT link).
    pub fn link_counts(&self) -> Vec<(String, LinkCounts)> {
        self.links.iter().map(|(n, s)| (n.clone(), s.counts())).collect()
    }

    /// Asks for an orderly stop: safe states, counters saved, links stopped.
    pub fn shutdown(&self) {
        // A full queue means a stop is already pending; a closed one that it is done.
        let _ = self.requests.try_send(Request::Shutdown);
    }

    /// Resolves once the daemon has begun stopping (the token was cancelled).
    pub async fn stopping(&self) {
        self.cancel.cancelled().await;
    }

    /// Waits until every task has ended; returns what the control task counted.
    pub async fn wait(self) -> Summary {
        self.tracker.wait().await;
        match self.control.await {
            Ok(Ok(summary)) => summary,
            Ok(Err(e)) | Err(e) => {
                warn!(error = %e, "control task ended abnormally");
                Summary { engine_failed: Some(e.to_string()), ..Summary::default() }
            }
        }
    }
}

/// Restores the engine's counters from the state file, if there is one.
fn restore(engine: &mut Engine, path: &std::path::Path, clock: &Clock) -> Result<(), DaemonError> {
    match state_file::read(path) {
        Ok(None) => {
            info!(path = %path.display(), "no state file yet: counters start at zero");
            Ok(())
        }
        Ok(Some(doc)) => {
            if doc.site != engine.site().name {
                // Loads match by name, so this may be right (a renamed site); it may
                // also be another site's file given by mistake.
                warn!(
                    path = %path.display(),
                    file_site = %doc.site,
                    site = %engine.site().name,
                    "the state file was written by another site name: its counters are restored for loads of the same name; check --state if this is not a renamed site"
                );
            }
            if doc.stopped_cleanly == Some(false) {
                // Between the last save and this start nothing held the loads: relays
                // kept whatever they had, and an inverter without a reversion timer
                // its last limit.
                warn!(
                    path = %path.display(),
                    saved_at = %doc.saved_at,
                    "the controller did not stop in order last time (killed, crashed or its power failed; up to 30 s of run time since the last save is lost): the relays held their last state and the inverter its last limit until now; every load starts in its safe state"
                );
            }
            engine.restore(&doc.counters, clock.now());
            let site = Arc::clone(engine.site());
            for (i, l) in site.loads.iter().enumerate() {
                let (runtime, energy) = engine.load_today(LoadId(i));
                info!(
                    load = %l.name,
                    runtime_today = %format_duration(runtime),
                    energy_today = %energy,
                    saved_at = %doc.saved_at,
                    "counters restored"
                );
            }
            Ok(())
        }
        Err(e @ StateFileError::Invalid { .. }) => {
            // Kept, not overwritten by the next save: it may be worth restoring by hand.
            let aside = state_file::set_aside(path)?;
            warn!(error = %e, kept_as = %aside.display(), "state file ignored: counters start at zero");
            Ok(())
        }
        Err(e) => Err(e.into()),
    }
}

/// The safe decisions computed at start, stamped `now`, with each load whose safe state
/// is `hold` keeping the command it was last given.
fn fallback_safe(site: &Site, mut safe: Decisions, last: &[Command], now: Timestamp) -> Decisions {
    safe.now = now;
    for ((d, l), was) in safe.loads.iter_mut().zip(&site.loads).zip(last) {
        if l.safe_state == SafeState::Hold {
            d.command = *was;
        }
    }
    safe
}

/// Room for a burst of samples from every point plus link reports.
fn event_capacity(site: &Site) -> usize {
    (64 + 4 * site.points.len()).min(4096)
}

/// Runs the daemon on a runtime of its own until SIGINT or SIGTERM, then stops in
/// order. `on_start` sees the running daemon (to print where the page is).
pub fn run(site: Arc<Site>, options: Options, on_start: impl FnOnce(&Daemon)) -> Result<Summary, DaemonError> {
    let runtime = runtime()?;
    let stopped = runtime.block_on(async move {
        let mut term = signal_terminate().map_err(DaemonError::Runtime)?;
        let daemon = Daemon::start(site, options).await?;
        on_start(&daemon);
        tokio::select! {
            // All three are cancel-safe: a signal stream, the ctrl-c future, a token.
            _ = term.recv() => info!("SIGTERM received: stopping"),
            r = tokio::signal::ctrl_c() => match r {
                Ok(()) => info!("SIGINT received: stopping"),
                Err(e) => warn!(error = %e, "cannot listen for SIGINT: stopping"),
            },
            () = daemon.stopping() => {}
        }
        daemon.shutdown();
        let summary = daemon.wait().await;
        match summary.engine_failed {
            Some(why) => Err(DaemonError::EngineFailed(why)),
            None => Ok(summary),
        }
    });
    // Dropping the runtime would wait for every blocking task, a save of the state
    // file that hangs on its disk included: the stop has given up on it already.
    runtime.shutdown_timeout(Duration::from_secs(1));
    stopped
}

/// The runtime the daemon and the commissioning verbs run on: one thread is plenty
/// for a handful of devices, and keeps the resident memory small.
pub fn runtime() -> Result<tokio::runtime::Runtime, DaemonError> {
    tokio::runtime::Builder::new_current_thread().enable_all().build().map_err(DaemonError::Runtime)
}

#[cfg(unix)]
fn signal_terminate() -> std::io::Result<tokio::signal::unix::Signal> {
    tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())
}

#[cfg(not(unix))]
fn signal_terminate() -> std::io::Result<NeverSignal> {
    Ok(NeverSignal)
}

/// Where there is no SIGTERM, a stream that never fires.
#[cfg(not(unix))]
struct NeverSignal;

#[cfg(not(unix))]
impl NeverSignal {
    async fn recv(&mut self) -> Option<()> {
        std::future::pending().await
    }
}
