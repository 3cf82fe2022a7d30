//! The plant on MQTT, against a Mosquitto this test starts on a free loopback port:
//! state topics published at each reading update, commands obeyed, the availability
//! topic and its last will, and a broker restart survived. Skipped (saying why) when
//! Mosquitto is not installed, unless `SPILLWAY_REQUIRE_BROKER=1`.

mod serve_support;

use std::collections::BTreeMap;
use std::time::Duration;

use rumqttc::{AsyncClient, Event, EventLoop, MqttOptions, Packet, QoS};
use serve_support::{Broker, free_port, mosquitto_or_skip, quiet_plant, sim_wait, within};
use spillway_sim::serve::{MqttState, STATUS_TOPIC, ServeOptions, Server};

/// A test client subscribed to everything under `sim/`.
async fn watcher(port: u16, id: &str) -> (AsyncClient, EventLoop) {
    let mut options = MqttOptions::new(id, "127.0.0.1", port);
    options.set_keep_alive(Duration::from_secs(5));
    let (client, mut events) = AsyncClient::new(options, 64);
    client.subscribe("sim/#", QoS::AtLeastOnce).await.unwrap();
    within(async {
        loop {
            if let Event::Incoming(Packet::SubAck(_)) = events.poll().await.unwrap() {
                break;
            }
        }
    })
    .await;
    (client, events)
}

/// Collects publications until `done` holds for the topics seen so far (latest payload
/// per topic).
async fn collect(events: &mut EventLoop, done: impl Fn(&BTreeMap<String, String>) -> bool) -> BTreeMap<String, String> {
    let mut seen = BTreeMap::new();
    within(async {
        while !done(&seen) {
            if let Event::Incoming(Packet::Publish(p)) = events.poll().await.unwrap() {
                seen.insert(p.topic.clone(), String::from_utf8_lossy(&p.payload).into_owned());
            }
        }
    })
    .await;
    seen
}

fn has(topic: &'static str, payload: &'static str) -> impl Fn(&BTreeMap<String, String>) -> bool {
    move |seen| seen.get(topic).is_some_and(|p| p == payload)
}

#[tokio::test]
async fn readings_out_commands_in_and_a_broker_restart_survived() {
    let Some(mosquitto) = mosquitto_or_skip("serve_mqtt") else { return };
    let port = free_port();
    let broker = Broker::start(mosquitto, port).await;
    let (_client, mut events) = watcher(port, "serve-mqtt-watcher").await;

    let options = ServeOptions {
        speed: 10.0,
        step: Some(Duration::from_millis(100)),
        mqtt: Some(broker.addr()),
        ..ServeOptions::default()
    };
    let server = Server::start(quiet_plant(), options).await.unwrap();
    within(server.wait_mqtt_subscribed()).await;
    assert_eq!(server.mqtt_state(), MqttState::Subscribed);

    // State: the quiet plant's exact values, on the topics of the bus.
    // The snapshot ends with the relay states.
    let seen = collect(&mut events, |s| s.contains_key("sim/relay/pump/state") && s.contains_key(STATUS_TOPIC)).await;
    assert_eq!(seen[STATUS_TOPIC], "online");
    assert_eq!(seen["sim/meter/power"], "-2800");
    assert_eq!(seen["sim/inverter/power"], "3000");
    assert_eq!(seen["sim/inverter/limit"], "none");
    assert_eq!(seen["sim/relay/tank/state"], "off");
    assert_eq!(seen["sim/load/pump/power"], "0");
    assert_eq!(seen["sim/grid/available"], "on");

    // Commands: the relay closes, the inverter limit holds PV down.
    let commander = events_client(port, "serve-mqtt-commander").await;
    commander.publish("sim/relay/tank/set", QoS::AtLeastOnce, false, "on").await.unwrap();
    commander.publish("sim/inverter/limit/set", QoS::AtLeastOnce, false, "500").await.unwrap();
    collect(&mut events, |s| has("sim/relay/tank/state", "on")(s) && has("sim/inverter/power", "500")(s)).await;
    assert!(server.controls().relays[0]);
    assert_eq!(server.controls().pv_limit_w, Some(500.0));
    // A bad payload is ignored, and the server carries on.
    commander.publish("sim/relay/pump/set", QoS::AtLeastOnce, false, "maybe").await.unwrap();
    sim_wait(&server, 2_000).await;
    assert!(!server.controls().relays[1]);

    // The broker restarts: the server reconnects, subscribes again and publishes again.
    broker.kill();
    within(async {
        while server.mqtt_state() != MqttState::Disconnected {
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
    })
    .await;
    let broker = Broker::start(mosquitto, port).await;
    within(server.wait_mqtt_subscribed()).await;
    let (_client, mut events) = watcher(port, "serve-mqtt-watcher-2").await;
    collect(&mut events, has("sim/relay/tank/state", "on")).await;
    let commander = events_client(port, "serve-mqtt-commander-2").await;
    commander.publish("sim/relay/tank/set", QoS::AtLeastOnce, false, "off").await.unwrap();
    collect(&mut events, has("sim/relay/tank/state", "off")).await;

    // Stopped: the broker publishes the last will.
    server.stop().await;
    collect(&mut events, has(STATUS_TOPIC, "offline")).await;
    broker.kill();
}

/// A client for publishing, its event loop driven in the background.
async fn events_client(port: u16, id: &str) -> AsyncClient {
    let (client, mut events) = AsyncClient::new(MqttOptions::new(id, "127.0.0.1", port), 16);
    tokio::spawn(async move { while events.poll().await.is_ok() {} });
    client
}
