//! The site's MQTT link: one connection that reads signal topics, takes override
//! requests, publishes load commands, retained state and availability.
//!
//! Topics under the site's `topic_prefix` (default `spillway/<site>`):
//! - `<prefix>/status`: `online` (retained) after every connect; the last will
//!   `offline` (retained, QoS 1) tells subscribers when the controller vanished, and
//!   `offline` is also published before a clean shutdown;
//! - `<prefix>/state/<load>` and `<prefix>/state/site`: retained JSON documents (see
//!   [`crate::actuators::mqtt`]);
//! - `<prefix>/override/<load>`: override requests (see [`payload`]);
//! - with `mqtt.discovery`, Home Assistant discovery documents under its prefix,
//!   retained, after every connect (see [`discovery`]).
//!
//! QoS: each point and command topic has its own (`qos:`), default 1 (at least once);
//! the prefix topics use the `mqtt.qos` setting, default 1. rumqttc reconnects on the
//! next poll without any delay, so the link waits a capped, jittered backoff between
//! attempts, and subscribes again after every ConnAck (sessions are clean). Retained
//! deliveries on signal and override topics are ignored: a retained reading may be
//! hours old, and a retained override would come back after every reconnect.

pub mod discovery;
pub mod payload;

use std::collections::HashMap;
use std::sync::Arc;
use std::time::Duration;

use rumqttc::{
    AsyncClient, ConnectReturnCode, Event, EventLoop, LastWill, MqttOptions as RumqttOptions, Outgoing, Packet,
    Publish, QoS,
};
use tokio::sync::{mpsc, watch};
use tokio::time::{Instant, sleep, sleep_until};
use tokio_util::sync::CancellationToken;
use tracing::{debug, info, warn};

pub use payload::{OverrideAction, OverrideRequest};

use super::{Backoff, BackoffPolicy, Clock, Counter, LinkStats, SourceEvent};
use crate::actuators::{MqttOutputs, command_payload};
use crate::config::model::{DeviceId, MqttRead, MqttSettings, PointId, PointRead, Qos, Secret, Site};

/// Tuning of the MQTT link.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MqttOptions {
    /// Reconnect delays.
    pub backoff: BackoffPolicy,
    /// Least time between two publications of `state/site` when only its live numbers
    /// (surplus, grid) changed; a change of mode or limit is published at once.
    pub site_state_interval: Duration,
    /// How long a clean shutdown may take to flush `offline` and DISCONNECT.
    pub shutdown_grace: Duration,
    /// A short-lived link (`read`, `step-test`): its `online`/`offline` status is not
    /// retained and it leaves no last will, so nothing stays on the broker after it.
    pub transient: bool,
}

impl Default for MqttOptions {
    fn default() -> Self {
        MqttOptions {
            backoff: BackoffPolicy::default(),
            site_state_interval: Duration::from_secs(5),
            shutdown_grace: Duration::from_secs(1),
            transient: false,
        }
    }
}

/// Why the MQTT link cannot be built.
#[derive(Debug, thiserror::Error)]
pub enum MqttError {
    /// The site file has no `mqtt` section.
    #[error("the site has no `mqtt` section")]
    NotConfigured,
    /// The password variable is not set.
    #[error("MQTT password variable {0} is not set: export it or use `password_file`")]
    MissingEnv(String),
    /// The password file could not be read.
    #[error("cannot read MQTT password file {path}: {source}")]
    PasswordFile {
        /// The file.
        path: String,
        /// Why.
        #[source]
        source: std::io::Error,
    },
    /// TLS was asked for and could not be set up.
    #[error("MQTT TLS: {0}")]
    Tls(String),
    /// TLS was asked for but this build has no TLS.
    #[error("the site asks for MQTT over TLS but this build has no TLS: rebuild with the `tls` feature")]
    NoTlsSupport,
}

/// A connection dropped sooner than this after its acknowledgement counts towards the
/// warning about a shared client id.
const SHORT_LIVED: Duration = Duration::from_secs(5);

/// The MQTT link of a site.
#[derive(Debug)]
pub struct MqttLink {
    site: Arc<Site>,
    settings: MqttSettings,
    options: MqttOptions,
    rumqtt: RumqttOptions,
    stats: Arc<LinkStats>,
    points: Vec<(PointId, MqttRead)>,
    devices: Vec<DeviceId>,
    discovery: Vec<discovery::DiscoveryDoc>,
    /// Topics whose retained message has been ignored and said so (once each).
    retained_noted: std::sync::Mutex<std::collections::HashSet<String>>,
}

/// What the event-loop half tells the publishing half.
enum Note {
    Connected,
    Disconnected,
}

impl MqttLink {
    /// Builds the link: reads the password (environment or file) and sets up TLS now,
    /// so a mistake stops the daemon at start-up rather than at the first reconnect.
    pub fn new(site: Arc<Site>, options: MqttOptions) -> Result<Self, MqttError> {
        let settings = site.mqtt.clone().ok_or(MqttError::NotConfigured)?;
        let mut o = RumqttOptions::new(&settings.client_id, &settings.host, settings.port);
        o.set_keep_alive(settings.keep_alive.max(Duration::from_secs(1)));
        o.set_clean_session(true);
        if !options.transient {
            o.set_last_will(LastWill::new(status_topic(&settings), "offline", QoS::AtLeastOnce, true));
        }
        if let Some(user) = &settings.username {
            let password = match &settings.password {
                None => String::new(),
                Some(secret) => read_secret(secret)?,
            };
            o.set_credentials(user, password);
        }
        if let Some(tls) = &settings.tls {
            o.set_transport(tls_transport(tls.ca_file.as_deref())?);
        }
        let points = site
            .points
            .iter()
            .enumerate()
            .filter_map(|(i, p)| match &p.read {
                PointRead::Mqtt(m) => Some((PointId(i), m.clone())),
                _ => None,
            })
            .collect();
        let devices = site
            .devices
            .iter()
            .enumerate()
            .filter(|(_, d)| matches!(d.link, crate::config::model::Link::Mqtt))
            .map(|(i, _)| DeviceId(i))
            .collect();
        let discovery = match &settings.discovery {
            Some(d) => discovery::documents(&site, &settings, d),
            None => Vec::new(),
        };
        Ok(MqttLink {
            site,
            settings,
            options,
            rumqtt: o,
            stats: LinkStats::shared(),
            points,
            devices,
            discovery,
            retained_noted: std::sync::Mutex::default(),
        })
    }

    /// The link's counters.
    pub fn stats(&self) -> Arc<LinkStats> {
        Arc::clone(&self.stats)
    }

    /// Runs until `cancel` fires; then publishes the latest commands that are still
    /// due (the daemon's safe states), `offline`, disconnects cleanly (within the
    /// shutdown grace) and returns.
    pub async fn run(
        self,
        outputs: watch::Receiver<Arc<MqttOutputs>>,
        events: mpsc::Sender<SourceEvent>,
        clock: Clock,
        cancel: CancellationToken,
    ) {
        let cap = 64 + 2 * (self.points.len() + self.site.loads.len()) + self.discovery.len();
        let (client, mut eventloop) = AsyncClient::new(self.rumqtt.clone(), cap);
        // Commands are small and latency matters more than packing them: no Nagle.
        let mut net = eventloop.network_options();
        net.set_tcp_nodelay(true);
        eventloop.set_network_options(net);
        let (note_tx, note_rx) = mpsc::channel(8);
        // Two halves in one task (the library spawns nothing): one drives rumqttc's
        // event loop and is never cancelled mid-poll except at shutdown, the other
        // queues publications without blocking it.
        tokio::join!(
            self.drive(eventloop, note_tx, &events, &clock, &cancel),
            self.publish(client, note_rx, outputs, &cancel),
        );
    }

    async fn drive(
        &self,
        mut eventloop: EventLoop,
        notes: mpsc::Sender<Note>,
        events: &mpsc::Sender<SourceEvent>,
        clock: &Clock,
        cancel: &CancellationToken,
    ) {
        let mut backoff = Backoff::new(self.options.backoff, &self.settings.client_id);
        let mut deadline: Option<Instant> = None;
        let mut disconnect_sent = false;
        let mut up: Option<bool> = None;
        // When the current connection was acknowledged, and how many connections in a
        // row the broker dropped within seconds: two clients with one client id (a
        // second copy of the site file running) take the session from each other over
        // and over, and each reconnect re-sends the commands.
        let mut connected_at: Option<Instant> = None;
        let mut short_lived = 0u32;
        let mut told_short_lived = false;
        loop {
            // One poll of the event loop, kept alive across the cancel: a poll is not
            // cancel-safe (it may hold a request taken from the queue but not yet
            // written, or be part-way through a flush). Only the end of the grace drops
            // it.
            let polled = {
                let poll = eventloop.poll();
                tokio::pin!(poll);
                loop {
                    tokio::select! {
                        biased;
                        // Cancel-safe: a token; starts the shutdown grace.
                        () = cancel.cancelled(), if deadline.is_none() => {
                            deadline = Some(Instant::now() + self.options.shutdown_grace);
                        }
                        // Cancel-safe: a sleep.
                        () = sleep_until(deadline.unwrap_or_else(Instant::now)), if deadline.is_some() => {
                            break None;
                        }
                        // Polled by reference: another branch winning does not drop it.
                        r = &mut poll => break Some(r),
                    }
                }
            };
            let Some(polled) = polled else {
                if disconnect_sent {
                    // Everything was written; the broker was just slow to hang up.
                    debug!(broker = %self.broker(), "the broker had not closed the connection by the end of the grace");
                    break;
                }
                warn!(
                    broker = %self.broker(),
                    "the broker connection did not flush within the shutdown grace: the last publications (safe states, offline) may not have reached it"
                );
                break;
            };
            match polled {
                Ok(Event::Incoming(Packet::ConnAck(ack))) => {
                    if ack.code != ConnectReturnCode::Success {
                        continue;
                    }
                    self.stats.count(Counter::Connect);
                    connected_at = Some(Instant::now());
                    backoff.reset();
                    info!(broker = %self.broker(), "mqtt connected");
                    let _ = notes.send(Note::Connected).await;
                    if up != Some(true) {
                        up = Some(true);
                        if events.send(SourceEvent::BrokerUp).await.is_err() {
                            return;
                        }
                        for d in &self.devices {
                            if events.send(SourceEvent::DeviceUp { device: *d }).await.is_err() {
                                return;
                            }
                        }
                    }
                }
                // Once stopping, readings have no one to go to: the control task may
                // already be gone. Leaving here would drop the last publications still
                // queued (the safe states, `offline`), so keep polling to flush them.
                Ok(Event::Incoming(Packet::Publish(p))) if deadline.is_some() => {
                    debug!(topic = %p.topic, "message ignored: stopping");
                }
                Ok(Event::Incoming(Packet::Publish(p))) => {
                    if self.incoming(&p, events, clock).await.is_err() {
                        // The control task is gone, so the daemon is stopping: flush
                        // within the grace, as after a cancel.
                        deadline = Some(Instant::now() + self.options.shutdown_grace);
                    }
                }
                Ok(Event::Outgoing(Outgoing::Disconnect)) if deadline.is_some() => {
                    // Do not close the socket ourselves: wait for the broker to close it
                    // once it has read the DISCONNECT (an error on the next poll), or for
                    // the grace to end. A broker still working through the last
                    // publications (the safe states, `offline`) fails to send their
                    // acknowledgements into a closed socket and drops the connection
                    // with the rest unread: Mosquitto 2.0 then logs "disconnected due to
                    // out of memory", lost the site's `stopped` state now and then in
                    // the tests, and published the last will instead of our `offline`.
                    disconnect_sent = true;
                }
                Ok(_) => {}
                Err(e) => {
                    if deadline.is_some() {
                        break;
                    }
                    self.stats.count(Counter::TransportError);
                    let _ = notes.send(Note::Disconnected).await;
                    match connected_at.take() {
                        Some(at) if at.elapsed() < SHORT_LIVED => short_lived += 1,
                        Some(_) => short_lived = 0,
                        None => {}
                    }
                    if short_lived >= 3 && !told_short_lived {
                        told_short_lived = true;
                        warn!(
                            broker = %self.broker(),
                            client_id = %self.settings.client_id,
                            "the broker dropped {short_lived} connections in a row within seconds of accepting them: most often another client uses the same client id (a second copy of this site running, or `mqtt.client_id` shared with another program); each reconnect re-sends the commands"
                        );
                    }
                    let delay = backoff.next_delay();
                    let reason = e.to_string();
                    if up != Some(false) {
                        if up.is_none() {
                            // Never connected: nothing was lost, and the likely cause is
                            // in the site file or the broker's service, not the network.
                            warn!(
                                broker = %self.broker(),
                                %reason,
                                retry_in_ms = delay.as_millis() as u64,
                                "cannot connect to the mqtt broker: check mqtt.broker (host:port), the login, and that the broker is running"
                            );
                        } else {
                            warn!(broker = %self.broker(), %reason, retry_in_ms = delay.as_millis() as u64, "mqtt connection lost");
                        }
                        up = Some(false);
                        if events.send(SourceEvent::BrokerDown { reason: reason.clone() }).await.is_err() {
                            return;
                        }
                        for d in &self.devices {
                            let ev = SourceEvent::DeviceDown { device: *d, reason: format!("mqtt: {reason}") };
                            if events.send(ev).await.is_err() {
                                return;
                            }
                        }
                    } else {
                        debug!(broker = %self.broker(), %reason, retry_in_ms = delay.as_millis() as u64, "mqtt reconnect failed");
                    }
                    tokio::select! {
                        biased;
                        // Both cancel-safe: a token and a sleep.
                        () = cancel.cancelled() => break,
                        () = sleep(delay) => {}
                    }
                }
            }
        }
    }

    fn broker(&self) -> String {
        format!("{}:{}", self.settings.host, self.settings.port)
    }

    /// A message from the broker: a signal, an override, or noise.
    async fn incoming(&self, p: &Publish, events: &mpsc::Sender<SourceEvent>, clock: &Clock) -> Result<(), ()> {
        let now = clock.now();
        if p.payload.is_empty() {
            // How a retained message is deleted: the broker passes the empty payload on
            // to whoever is subscribed (MQTT 3.1.1, section 3.3.1.3). Someone clearing a
            // retained override or reading is not a device sending garbage.
            debug!(topic = %p.topic, "empty payload ignored (a retained message being cleared)");
            return Ok(());
        }
        if let Some(name) = p.topic.strip_prefix(&self.settings.topic_prefix).and_then(|t| t.strip_prefix("/override/"))
        {
            if p.retain {
                if self.first_retained(&p.topic) {
                    info!(topic = %p.topic, "a retained override was ignored: it would come back after every reconnect; publish overrides without retain (and clear this one with an empty retained message)");
                }
                return Ok(());
            }
            let Some((id, load)) = self.site.load(name) else {
                let names: Vec<&str> = self.site.loads.iter().map(|l| l.name.as_str()).collect();
                let detail = format!("no load called \"{name}\" (the site's loads: {})", names.join(", "));
                return self.malformed(events, &p.topic, detail).await;
            };
            return match payload::parse_override(load, &p.payload, now) {
                Ok(action) => {
                    info!(load = %load.name, action = %action.describe(self.site.timezone, now), "override requested");
                    send(events, SourceEvent::Override(OverrideRequest { load: id, action })).await
                }
                Err(detail) => self.malformed(events, &p.topic, detail).await,
            };
        }
        for (id, read) in self.points.iter().filter(|(_, r)| r.topic == p.topic) {
            if p.retain {
                if self.first_retained(&p.topic) {
                    info!(topic = %p.topic, "a retained reading was ignored: it may be hours old; the point waits for the device's next message");
                }
                continue;
            }
            let point = &self.site.points[id.0];
            let switch_words = point.boolean || point.dimension == crate::units::Dimension::Scalar;
            match payload::parse_value(&p.payload, &read.payload, switch_words) {
                Ok(v) => {
                    let value = if point.boolean { f64::from(u8::from(v != 0.0)) } else { v * point.unit_factor };
                    self.stats.count(Counter::Sample);
                    send(events, SourceEvent::Sample { point: *id, value, at: now }).await?;
                }
                Err(detail) => self.malformed(events, &p.topic, detail).await?,
            }
        }
        Ok(())
    }

    /// Whether this is the first retained message ignored on `topic` since start.
    fn first_retained(&self, topic: &str) -> bool {
        self.retained_noted.lock().is_ok_and(|mut seen| seen.len() < 256 && seen.insert(topic.to_owned()))
    }

    async fn malformed(&self, events: &mpsc::Sender<SourceEvent>, topic: &str, detail: String) -> Result<(), ()> {
        self.stats.count(Counter::Malformed);
        // The control task logs it, a minute apart per topic: a device that publishes
        // garbage every second must not flood the log from here.
        debug!(topic, %detail, "malformed mqtt payload ignored");
        // A bad override is a person's or an automation's mistake, not the device's:
        // it counts against the broker.
        let is_override = topic.strip_prefix(&self.settings.topic_prefix).is_some_and(|t| t.starts_with("/override/"));
        let device = if is_override { None } else { self.devices.first().copied() };
        send(events, SourceEvent::Malformed { device, origin: topic.to_owned(), detail }).await
    }

    /// The publishing half: subscriptions after every ConnAck, commands, state.
    async fn publish(
        &self,
        client: AsyncClient,
        mut notes: mpsc::Receiver<Note>,
        mut outputs: watch::Receiver<Arc<MqttOutputs>>,
        cancel: &CancellationToken,
    ) {
        let mut connected = false;
        let mut watching = true;
        let mut current = Arc::clone(&outputs.borrow_and_update());
        // topic → (payload, when, key) last queued.
        let mut sent: HashMap<String, (String, Instant, String)> = HashMap::new();
        loop {
            let wake = if connected { self.publish_due(&client, &current, &mut sent) } else { None };
            tokio::select! {
                biased;
                // All branches cancel-safe: a token, an mpsc receive, a watch change, a sleep.
                () = cancel.cancelled() => {
                    // The daemon puts the safe states here before it cancels.
                    current = Arc::clone(&outputs.borrow_and_update());
                    let has_commands = current.commands.commanded && !current.commands.writes.is_empty();
                    if connected {
                        let queued_before = self.stats.counts().writes;
                        // Every safe state goes out at the stop, also where the command
                        // did not change: a plug switched on by its own button while the
                        // controller held it off would otherwise stay on.
                        for w in &current.commands.writes {
                            if let Some((topic, ..)) = command_payload(&w.target, w.level) {
                                sent.remove(topic);
                            }
                        }
                        self.publish_due(&client, &current, &mut sent);
                        let retain = !self.options.transient;
                        let _ = client.try_publish(status_topic(&self.settings), QoS::AtLeastOnce, retain, "offline");
                        if has_commands {
                            let queued = self.stats.counts().writes - queued_before;
                            info!(broker = %self.broker(), queued, "safe states sent to the broker at shutdown");
                        }
                    } else if has_commands {
                        warn!(
                            broker = %self.broker(),
                            "safe states NOT sent at shutdown: not connected to the broker; devices switched over MQTT keep what they had"
                        );
                    }
                    let _ = client.try_disconnect();
                    return;
                }
                note = notes.recv() => match note {
                    Some(Note::Connected) => {
                        connected = true;
                        sent.clear();
                        self.on_connect(&client);
                    }
                    Some(Note::Disconnected) => connected = false,
                    None => return,
                },
                changed = outputs.changed(), if watching => match changed {
                    Ok(()) => current = Arc::clone(&outputs.borrow_and_update()),
                    Err(_) => watching = false,
                },
                () = sleep_until(wake.unwrap_or_else(|| Instant::now() + Duration::from_secs(3600))) => {}
            }
        }
    }

    fn on_connect(&self, client: &AsyncClient) {
        let mut filters: Vec<rumqttc::SubscribeFilter> =
            self.points.iter().map(|(_, r)| rumqttc::SubscribeFilter::new(r.topic.clone(), qos(r.qos))).collect();
        filters.push(rumqttc::SubscribeFilter::new(
            format!("{}/override/+", self.settings.topic_prefix),
            qos(self.settings.qos),
        ));
        filters.dedup_by(|a, b| a.path == b.path);
        if let Err(e) = client.try_subscribe_many(filters) {
            warn!(error = %e, "mqtt subscribe could not be queued");
        }
        let retain = !self.options.transient;
        if let Err(e) = client.try_publish(status_topic(&self.settings), QoS::AtLeastOnce, retain, "online") {
            warn!(error = %e, "mqtt status could not be queued");
        }
        self.stats.count(Counter::Request);
        // Retained, so Home Assistant finds them whenever it starts; sent again after
        // every connect in case the broker lost its retained store.
        for doc in &self.discovery {
            self.queue(client, &doc.topic, &doc.payload, true, qos(self.settings.qos));
        }
        if !self.discovery.is_empty() {
            debug!(documents = self.discovery.len(), "home assistant discovery published");
        }
    }

    /// Queues what is due; returns when something held back falls due.
    fn publish_due(
        &self,
        client: &AsyncClient,
        current: &MqttOutputs,
        sent: &mut HashMap<String, (String, Instant, String)>,
    ) -> Option<Instant> {
        let now = Instant::now();
        let mut wake: Option<Instant> = None;
        let mut at = |t: Instant| wake = Some(wake.map_or(t, |w: Instant| w.min(t)));
        if current.commands.commanded {
            for w in &current.commands.writes {
                let Some((topic, payload, retain, q)) = command_payload(&w.target, w.level) else {
                    continue;
                };
                let due = match sent.get(topic) {
                    Some((p, t, _)) => *p != payload || now.saturating_duration_since(*t) >= w.refresh,
                    None => true,
                };
                if due {
                    if self.queue(client, topic, &payload, retain, qos(q)) {
                        debug!(topic, %payload, origin = %w.origin, "mqtt command");
                        self.stats.count(Counter::Write);
                        sent.insert(topic.to_owned(), (payload, now, String::new()));
                        at(now + w.refresh);
                    }
                } else if let Some((_, t, _)) = sent.get(topic) {
                    at(*t + w.refresh);
                }
            }
        }
        for s in &current.state {
            let topic = format!("{}/{}", self.settings.topic_prefix, s.suffix);
            let due = match sent.get(&topic) {
                None => true,
                Some((p, _, _)) if *p == s.payload => false,
                Some((_, _, k)) if *k != s.key => true,
                Some((_, t, _)) => {
                    let next = *t + self.options.site_state_interval;
                    if now < next {
                        at(next);
                    }
                    now >= next
                }
            };
            if due && self.queue(client, &topic, &s.payload, !self.options.transient, qos(self.settings.qos)) {
                debug!(topic, key = %s.key, "mqtt state");
                sent.insert(topic, (s.payload.clone(), now, s.key.clone()));
            }
        }
        wake
    }

    fn queue(&self, client: &AsyncClient, topic: &str, payload: &str, retain: bool, q: QoS) -> bool {
        match client.try_publish(topic, q, retain, payload.as_bytes().to_vec()) {
            Ok(()) => {
                self.stats.count(Counter::Request);
                true
            }
            Err(e) => {
                warn!(topic, error = %e, "mqtt publication could not be queued; will retry");
                false
            }
        }
    }
}

async fn send(events: &mpsc::Sender<SourceEvent>, ev: SourceEvent) -> Result<(), ()> {
    events.send(ev).await.map_err(|_| ())
}

/// `<prefix>/status`.
pub fn status_topic(settings: &MqttSettings) -> String {
    format!("{}/status", settings.topic_prefix)
}

/// `<prefix>/override/<load>`.
pub fn override_topic(settings: &MqttSettings, load: &str) -> String {
    format!("{}/override/{load}", settings.topic_prefix)
}

/// Our QoS in rumqttc's terms.
pub fn qos(q: Qos) -> QoS {
    match q {
        Qos::AtMostOnce => QoS::AtMostOnce,
        Qos::AtLeastOnce => QoS::AtLeastOnce,
        Qos::ExactlyOnce => QoS::ExactlyOnce,
    }
}

/// Reads a secret from the environment or a file (one trailing newline removed).
fn read_secret(secret: &Secret) -> Result<String, MqttError> {
    match secret {
        Secret::Env(var) => std::env::var(var).map_err(|_| MqttError::MissingEnv(var.clone())),
        Secret::File(path) => std::fs::read_to_string(path)
            .map(|s| s.trim_end_matches(['\r', '\n']).to_owned())
            .map_err(|source| MqttError::PasswordFile { path: path.clone(), source }),
    }
}

#[cfg(feature = "tls")]
fn tls_transport(ca_file: Option<&str>) -> Result<rumqttc::Transport, MqttError> {
    use rustls::pki_types::CertificateDer;
    use rustls::pki_types::pem::PemObject;

    let mut roots = rustls::RootCertStore::empty();
    match ca_file {
        Some(path) => {
            let certs: Vec<CertificateDer<'static>> = CertificateDer::pem_file_iter(path)
                .map_err(|e| MqttError::Tls(format!("cannot read CA file {path}: {e}")))?
                .collect::<Result<_, _>>()
                .map_err(|e| MqttError::Tls(format!("CA file {path}: {e}")))?;
            if certs.is_empty() {
                return Err(MqttError::Tls(format!("CA file {path} holds no certificate")));
            }
            for c in certs {
                roots.add(c).map_err(|e| MqttError::Tls(format!("CA file {path}: {e}")))?;
            }
        }
        None => {
            let found = rustls_native_certs::load_native_certs();
            for c in found.certs {
                // A broken system certificate is skipped, as every TLS client does.
                let _ = roots.add(c);
            }
            if roots.is_empty() {
                return Err(MqttError::Tls("no system CA certificates found: give `tls: {ca_file: ...}`".to_owned()));
            }
        }
    }
    let provider = Arc::new(rustls::crypto::ring::default_provider());
    let config = rustls::ClientConfig::builder_with_provider(provider)
        .with_safe_default_protocol_versions()
        .map_err(|e| MqttError::Tls(e.to_string()))?
        .with_root_certificates(roots)
        .with_no_client_auth();
    Ok(rumqttc::Transport::tls_with_config(rumqttc::TlsConfiguration::Rustls(Arc::new(config))))
}

#[cfg(not(feature = "tls"))]
fn tls_transport(_ca_file: Option<&str>) -> Result<rumqttc::Transport, MqttError> {
    Err(MqttError::NoTlsSupport)
}
