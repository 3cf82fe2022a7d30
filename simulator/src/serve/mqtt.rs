//! The plant on MQTT: a client of the given broker that publishes the bus's state topics
//! at each reading update and feeds the command topics back into the bus. Reconnects
//! with capped exponential backoff (rumqttc retries at once on its own) and subscribes
//! again on every `ConnAck` (clean sessions forget subscriptions).

use std::sync::Arc;
use std::time::Duration;

use rumqttc::{AsyncClient, Event, EventLoop, LastWill, MqttOptions, Packet, QoS};
use tokio::time::Instant;
use tokio_util::sync::CancellationToken;

use super::{MqttState, ServeError, Shared};
use crate::bus::mqtt::PREFIX;

/// Every command topic of the bus: `sim/<what>/<name>/set`.
pub const COMMAND_FILTER: &str = "sim/+/+/set";
/// Availability of the simulator: retained `online`, and `offline` as the last will.
pub const STATUS_TOPIC: &str = "sim/status";

const BACKOFF_MIN: Duration = Duration::from_millis(100);
const BACKOFF_MAX: Duration = Duration::from_secs(5);
/// At most one snapshot per this much wall time, whatever the clock speed.
const MIN_WALL_BETWEEN_SNAPSHOTS: Duration = Duration::from_millis(50);

/// Where and how to connect.
#[derive(Debug, Clone)]
pub(super) struct Link {
    pub host: String,
    pub port: u16,
    pub client_id: String,
    /// Simulated ms between two snapshots.
    pub publish_every_ms: i64,
}

/// Splits `HOST:PORT` (IPv6 hosts in brackets: `[::1]:1883`).
pub(super) fn parse_broker(text: &str) -> Result<(String, u16), ServeError> {
    let bad = || ServeError::MqttAddress(text.to_owned());
    let (host, port) = text.trim().rsplit_once(':').ok_or_else(bad)?;
    let host = host.strip_prefix('[').and_then(|h| h.strip_suffix(']')).unwrap_or(host);
    let port: u16 = port.parse().map_err(|_| bad())?;
    if host.is_empty() || port == 0 {
        return Err(bad());
    }
    Ok((host.to_owned(), port))
}

/// Runs the link until `cancel`. Dropping the connection without a DISCONNECT lets the
/// broker publish the last will, so `sim/status` reads `offline` after a stop.
pub(super) async fn run(shared: Arc<Shared>, link: Link, cancel: CancellationToken) {
    let mut options = MqttOptions::new(link.client_id.clone(), link.host.clone(), link.port);
    options.set_keep_alive(Duration::from_secs(10));
    options.set_last_will(LastWill::new(STATUS_TOPIC, "offline", QoS::AtLeastOnce, true));
    // Room for a few snapshots; when full, a snapshot is dropped (latest value wins).
    let (client, eventloop) = AsyncClient::new(options, 512);
    tokio::join!(poll(&shared, &link, &client, eventloop, &cancel), publish(&shared, &link, &client, &cancel),);
    shared.mqtt.send_replace(MqttState::Disconnected);
}

/// Drives the connection: subscriptions on connect, commands into the bus, backoff.
async fn poll(
    shared: &Shared,
    link: &Link,
    client: &AsyncClient,
    mut eventloop: EventLoop,
    cancel: &CancellationToken,
) {
    let mut backoff = BACKOFF_MIN;
    loop {
        // Cancel safety: an interrupted `poll` only matters if the event loop is used
        // again, and it is dropped on cancel.
        let event = tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            event = eventloop.poll() => event,
        };
        match event {
            Ok(Event::Incoming(Packet::ConnAck(_))) => {
                backoff = BACKOFF_MIN;
                tracing::info!(broker = %format!("{}:{}", link.host, link.port), "mqtt connected");
                let subscribed = client.try_subscribe(COMMAND_FILTER, QoS::AtLeastOnce);
                let announced = client.try_publish(STATUS_TOPIC, QoS::AtLeastOnce, true, "online");
                if let Err(err) = subscribed.and(announced) {
                    tracing::warn!(%err, "mqtt: cannot queue the subscription");
                }
                shared.mqtt.send_replace(MqttState::Connected);
            }
            Ok(Event::Incoming(Packet::SubAck(_))) => {
                shared.mqtt.send_replace(MqttState::Subscribed);
            }
            Ok(Event::Incoming(Packet::Publish(p))) => {
                let payload = String::from_utf8_lossy(&p.payload);
                let result = shared.plant().bus_mut().mqtt_command(&p.topic, &payload);
                match result {
                    Ok(()) => tracing::debug!(topic = %p.topic, %payload, "mqtt command applied"),
                    Err(err) => tracing::warn!(topic = %p.topic, %payload, %err, "mqtt command ignored"),
                }
            }
            Ok(_) => {}
            Err(err) => {
                shared.mqtt.send_replace(MqttState::Disconnected);
                tracing::warn!(
                    broker = %format!("{}:{}", link.host, link.port),
                    %err,
                    retry_in_ms = backoff.as_millis() as u64,
                    "mqtt connection lost"
                );
                tokio::select! {
                    biased;
                    () = cancel.cancelled() => return,
                    () = tokio::time::sleep(backoff) => {}
                }
                backoff = (backoff * 2).min(BACKOFF_MAX);
            }
        }
    }
}

/// Publishes the state topics after the clock has moved `publish_every_ms` on.
async fn publish(shared: &Shared, link: &Link, client: &AsyncClient, cancel: &CancellationToken) {
    let mut updates = shared.updates.subscribe();
    let mut due_ms = i64::MIN;
    let mut last_wall: Option<Instant> = None;
    loop {
        // Cancel safety: `changed` is cancel safe.
        tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            changed = updates.changed() => if changed.is_err() { return },
        }
        let now_ms = *updates.borrow_and_update();
        let connected = !matches!(*shared.mqtt.borrow(), MqttState::Disconnected);
        if !connected || now_ms < due_ms || last_wall.is_some_and(|t| t.elapsed() < MIN_WALL_BETWEEN_SNAPSHOTS) {
            continue;
        }
        let snapshot = shared.plant().bus().mqtt_snapshot();
        for (topic, payload) in snapshot {
            debug_assert!(topic.starts_with(PREFIX));
            if client.try_publish(topic, QoS::AtMostOnce, false, payload).is_err() {
                tracing::debug!("mqtt: request queue full, snapshot cut short");
                break;
            }
        }
        // The next one is due a whole period after this one's reading time.
        due_ms = now_ms - now_ms.rem_euclid(link.publish_every_ms) + link.publish_every_ms;
        last_wall = Some(Instant::now());
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn broker_addresses() {
        assert_eq!(parse_broker("127.0.0.1:1883").ok(), Some(("127.0.0.1".to_owned(), 1883)));
        assert_eq!(parse_broker("[::1]:1884").ok(), Some(("::1".to_owned(), 1884)));
        assert_eq!(parse_broker("broker.lan:8883").ok(), Some(("broker.lan".to_owned(), 8883)));
        assert!(parse_broker("127.0.0.1").is_err());
        assert!(parse_broker(":1883").is_err());
        assert!(parse_broker("host:0").is_err());
    }
}
