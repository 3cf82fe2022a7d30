//! The MQTT link against the in-process test broker on loopback: samples from plain
//! and JSON payloads, commands, retained state, availability and its last will,
//! overrides, malformed payloads, login, and a broker restart. Paused tokio clock.

mod support;

use std::sync::Arc;
use std::time::Duration;

use spillway::actuators::{ActuatorOptions, Dispatcher};
use spillway::config::model::Site;
use spillway::engine::{Command, Decisions, LimitReason, LoadDecision, Mode, Reason};
use spillway::sources::{Clock, LinkStats, MqttLink, MqttOptions, OverrideAction, OverrideRequest, SourceEvent};
use spillway::units::{Power, Ratio, Timestamp};
use support::broker::Broker;
use support::{drain_for, site, until, wait_for};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

const T0: Timestamp = Timestamp(1_780_000_000_000);

fn yaml(port: u16, extra_mqtt: &str) -> String {
    format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
mqtt: {{ broker: 127.0.0.1:{port}, topic_prefix: bench/site, client_id: bench-ctl{extra_mqtt} }}
devices:
  home: {{ mqtt: true }}
points:
  grid: {{ device: home, topic: meter/power, unit: W }}
  pv: {{ device: home, topic: pv/output, unit: kW }}
  tank_temp: {{ device: home, topic: tank/state, json: /temperature, unit: °C }}
  door: {{ device: home, topic: door/state, unit: bool }}
  feed_in: {{ device: home, topic: meter/feed_in, unit: kW, scale: -1 }}
loads:
  - name: pump
    priority: 1
    rated: 1kW
    switch: {{ device: home, topic: relay/pump/set }}
    start: grid < 0W
    stop: grid > 100W
  - name: dimmer
    priority: 2
    kind: proportional
    rated: 2kW
    setpoint: {{ device: home, topic: dimmer/set, payload: '{{\"level\": {{value}}}}', retain: true }}
    start: grid < 0W
    stop: grid > 100W
"
    )
}

struct Bench {
    broker: Broker,
    site: Arc<Site>,
    events: mpsc::Receiver<SourceEvent>,
    stats: Arc<LinkStats>,
    dispatcher: Dispatcher,
    clock: Clock,
    /// Events seen while waiting for the subscriptions.
    early: Vec<SourceEvent>,
    cancel: CancellationToken,
    task: tokio::task::JoinHandle<()>,
}

impl Bench {
    async fn start(broker: Broker, extra_mqtt: &str) -> Bench {
        let site = site(&yaml(broker.addr.port(), extra_mqtt));
        let link = MqttLink::new(site.clone(), MqttOptions::default()).unwrap();
        let stats = link.stats();
        let dispatcher = Dispatcher::new(site.clone(), ActuatorOptions::default());
        let (tx, events) = mpsc::channel(1024);
        let cancel = CancellationToken::new();
        let clock = Clock::anchored(T0);
        let task = tokio::spawn(link.run(dispatcher.mqtt(), tx, clock, cancel.clone()));
        let mut b = Bench { broker, site, events, stats, dispatcher, clock, early: Vec::new(), cancel, task };
        b.subscribed().await;
        b
    }

    /// Waits until the link's five subscriptions are in place at the broker.
    async fn subscribed(&mut self) {
        let deadline = tokio::time::Instant::now() + Duration::from_secs(10);
        while self.broker.subscriptions().len() < 5 {
            assert!(tokio::time::Instant::now() < deadline, "never subscribed");
            if let Ok(Some(e)) = tokio::time::timeout(Duration::from_millis(10), self.events.recv()).await {
                self.early.push(e);
            }
        }
        // Retained deliveries arrive right after the SUBACK.
        self.early.extend(drain_for(&mut self.events, Duration::from_millis(100)).await);
    }

    async fn sample(&mut self, name: &str) -> f64 {
        let id = self.site.point(name).unwrap().0;
        wait_for(&mut self.events, Duration::from_secs(5), |e| match e {
            SourceEvent::Sample { point, value, .. } if *point == id => Some(*value),
            _ => None,
        })
        .await
    }

    async fn malformed(&mut self) -> (String, String) {
        wait_for(&mut self.events, Duration::from_secs(5), |e| match e {
            SourceEvent::Malformed { origin, detail, .. } => Some((origin.clone(), detail.clone())),
            _ => None,
        })
        .await
    }

    async fn override_request(&mut self) -> OverrideRequest {
        wait_for(&mut self.events, Duration::from_secs(5), |e| match e {
            SourceEvent::Override(r) => Some(*r),
            _ => None,
        })
        .await
    }

    async fn settle(&mut self) {
        drain_for(&mut self.events, Duration::from_millis(300)).await;
    }
}

fn decisions(commands: &[Command]) -> Decisions {
    Decisions {
        now: T0,
        loads: commands.iter().map(|c| LoadDecision { command: *c, reason: Reason::Started }).collect(),
        inverter_limit: None,
        limit_reason: LimitReason::None,
        mode: Mode::Normal,
        surplus: Power(1800.0),
        grid: Some(Power(-20.0)),
        switchings: Vec::new(),
    }
}

#[tokio::test(start_paused = true)]
async fn samples_come_from_plain_and_json_payloads_and_malformed_ones_are_counted() {
    let broker = Broker::start().await;
    // A retained reading from before we subscribed may be hours old: ignored.
    broker.publish("meter/power", "999", true);
    let mut b = Bench::start(broker, "").await;

    b.broker.publish("meter/power", "-350.5", false);
    assert_eq!(b.sample("grid").await, -350.5);
    b.broker.publish("pv/output", "1.25", false);
    assert_eq!(b.sample("pv").await, 1250.0, "kW × 1000");
    b.broker.publish("tank/state", r#"{"temperature": 58.5, "heating": true}"#, false);
    assert_eq!(b.sample("tank_temp").await, 58.5);
    b.broker.publish("door/state", "ON", false);
    assert_eq!(b.sample("door").await, 1.0);
    b.broker.publish("door/state", "false", false);
    assert_eq!(b.sample("door").await, 0.0);
    // A meter that counts export as positive, flipped by its `scale`, on top of its unit.
    b.broker.publish("meter/feed_in", "0.5", false);
    assert_eq!(b.sample("feed_in").await, -500.0, "kW × 1000 × −1");

    // An empty payload is how a retained message is deleted (MQTT 3.1.1, section
    // 3.3.1.3): not garbage, so not counted; the next malformed one is "lots".
    b.broker.publish("meter/power", "", false);
    b.broker.publish("meter/power", "lots", false);
    let (origin, detail) = b.malformed().await;
    assert_eq!(origin, "meter/power");
    assert!(detail.contains("not a number"), "{detail}");
    b.broker.publish("tank/state", r#"{"temp": 1}"#, false);
    assert!(b.malformed().await.1.contains("/temperature"));
    b.broker.publish("tank/state", "{", false);
    assert!(b.malformed().await.1.contains("not JSON"));
    // The link keeps going.
    b.broker.publish("meter/power", "12", false);
    assert_eq!(b.sample("grid").await, 12.0);
    let c = b.stats.counts();
    assert_eq!((c.malformed, c.samples, c.connects), (3, 7, 1));
    b.cancel.cancel();
    b.task.await.unwrap();
}

#[tokio::test(start_paused = true)]
async fn commands_and_retained_state_are_published_and_status_is_online() {
    let broker = Broker::start().await;
    let mut b = Bench::start(broker, "").await;
    assert_eq!(b.broker.retained("bench/site/status").as_deref(), Some("online"));

    b.dispatcher.apply(&decisions(&[Command::On, Command::Setpoint(Ratio(40.0))]));
    b.settle().await;
    let got: Vec<(String, String, bool)> = b
        .broker
        .received()
        .into_iter()
        .filter(|r| r.client == "bench-ctl" && !r.topic.starts_with("bench/"))
        .map(|r| (r.topic, r.payload, r.retain))
        .collect();
    assert_eq!(
        got,
        vec![
            ("relay/pump/set".to_owned(), "ON".to_owned(), false),
            ("dimmer/set".to_owned(), r#"{"level": 40}"#.to_owned(), true),
        ]
    );
    let pump: serde_json::Value = serde_json::from_str(&b.broker.retained("bench/site/state/pump").unwrap()).unwrap();
    assert_eq!(pump["command"], "on");
    assert_eq!(pump["reason"], "start_rule");
    assert_eq!(pump["power"], 1000.0);
    let dimmer: serde_json::Value =
        serde_json::from_str(&b.broker.retained("bench/site/state/dimmer").unwrap()).unwrap();
    assert_eq!(dimmer["power"], 800.0);
    let s: serde_json::Value = serde_json::from_str(&b.broker.retained("bench/site/state/site").unwrap()).unwrap();
    assert_eq!((s["mode"].as_str(), s["grid"].as_f64()), (Some("normal"), Some(-20.0)));

    // The same decisions again: nothing new on the wire.
    let before = b.broker.received().len();
    b.dispatcher.apply(&decisions(&[Command::On, Command::Setpoint(Ratio(40.0))]));
    b.settle().await;
    assert_eq!(b.broker.received().len(), before);
    // A change: only the changed command and its state.
    b.dispatcher.apply(&decisions(&[Command::Off, Command::Setpoint(Ratio(40.0))]));
    b.settle().await;
    let new: Vec<String> = b.broker.received()[before..].iter().map(|r| format!("{}={}", r.topic, r.payload)).collect();
    assert_eq!(new.len(), 2, "{new:?}");
    assert_eq!(new[0], "relay/pump/set=OFF");
    assert!(new[1].starts_with("bench/site/state/pump="), "{new:?}");

    // A clean shutdown publishes the last commands, then says `offline` itself (no
    // last will needed).
    b.dispatcher.apply(&decisions(&[Command::On, Command::Off]));
    b.cancel.cancel();
    (&mut b.task).await.unwrap();
    b.settle().await;
    assert_eq!(b.broker.retained("bench/site/status").as_deref(), Some("offline"));
    let all = b.broker.received();
    let tail: Vec<String> = all.iter().rev().take(5).rev().map(|r| format!("{}={}", r.topic, r.payload)).collect();
    assert_eq!(tail[0], "relay/pump/set=ON", "{tail:?}");
    assert_eq!(tail[1], r#"dimmer/set={"level": 0}"#, "{tail:?}");
    assert!(tail[2].starts_with("bench/site/state/pump="), "{tail:?}");
    assert!(tail[3].starts_with("bench/site/state/dimmer="), "{tail:?}");
    assert_eq!(tail[4], "bench/site/status=offline", "{tail:?}");
    assert_eq!(all.last().unwrap().client, "bench-ctl");
}

#[tokio::test(start_paused = true)]
async fn an_unclean_drop_leaves_the_last_will_offline() {
    let broker = Broker::start().await;
    let mut b = Bench::start(broker, "").await;
    assert_eq!(b.broker.retained("bench/site/status").as_deref(), Some("online"));
    // Killed mid-flight: no DISCONNECT, the broker publishes the will.
    b.task.abort();
    let _ = (&mut b.task).await;
    until("the will is published", || b.broker.retained("bench/site/status").as_deref() == Some("offline")).await;
    let last = b.broker.received().pop().unwrap();
    assert_eq!((last.client.as_str(), last.retain), ("will", true));
}

#[tokio::test(start_paused = true)]
async fn a_broker_restart_is_followed_by_reconnect_resubscribe_and_republish() {
    let (logs, _guard) = support::Logs::capture();
    let broker = Broker::start().await;
    let mut b = Bench::start(broker, "").await;
    b.dispatcher.apply(&decisions(&[Command::On, Command::Setpoint(Ratio(40.0))]));
    b.settle().await;
    assert!(b.broker.retained("bench/site/state/pump").is_some());

    // The broker restarts without persistence: retained messages and sessions are gone.
    b.broker.restart().await;
    assert_eq!(b.broker.retained("bench/site/status"), None);
    let down = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::DeviceDown { reason, .. } => Some(reason.clone()),
        _ => None,
    })
    .await;
    assert!(down.starts_with("mqtt: "), "{down}");
    // It had a connection, and lost it.
    assert!(logs.text().contains("mqtt connection lost"), "{}", logs.text());
    assert!(!logs.text().contains("cannot connect to the mqtt broker"), "{}", logs.text());
    let t = tokio::time::Instant::now();
    wait_for(&mut b.events, Duration::from_secs(35), |e| matches!(e, SourceEvent::DeviceUp { .. }).then_some(())).await;
    // The first retry waits the backoff (0.25–0.5 s), not zero.
    assert!(t.elapsed() >= Duration::from_millis(250), "{:?}", t.elapsed());
    b.subscribed().await;
    b.settle().await;
    assert_eq!(b.broker.retained("bench/site/status").as_deref(), Some("online"));
    assert!(b.broker.retained("bench/site/state/pump").is_some());
    assert_eq!(b.broker.retained("dimmer/set").as_deref(), Some(r#"{"level": 40}"#));
    assert_eq!(b.broker.connects(), 2);
    b.broker.publish("meter/power", "-5", false);
    assert_eq!(b.sample("grid").await, -5.0);
    b.cancel.cancel();
    b.task.await.unwrap();
}

/// A broker that was never reached (a wrong port, a broker not started) is not a lost
/// connection: the warning sends the reader to the site file and the broker's service.
#[tokio::test(start_paused = true)]
async fn a_broker_never_reached_is_reported_as_such_not_as_a_lost_connection() {
    let (logs, _guard) = support::Logs::capture();
    // A loopback port with nothing listening on it.
    let port = std::net::TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let site = site(&yaml(port, ""));
    let link = MqttLink::new(site.clone(), MqttOptions::default()).unwrap();
    let dispatcher = Dispatcher::new(site, ActuatorOptions::default());
    let (tx, mut events) = mpsc::channel(1024);
    let cancel = CancellationToken::new();
    let task = tokio::spawn(link.run(dispatcher.mqtt(), tx, Clock::anchored(T0), cancel.clone()));
    wait_for(&mut events, Duration::from_secs(5), |e| matches!(e, SourceEvent::BrokerDown { .. }).then_some(())).await;
    let text = logs.text();
    assert!(text.contains("cannot connect to the mqtt broker: check mqtt.broker (host:port)"), "{text}");
    assert!(text.contains(&format!("127.0.0.1:{port}")), "{text}");
    assert!(!text.contains("connection lost"), "{text}");
    cancel.cancel();
    task.await.unwrap();
}

#[tokio::test(start_paused = true)]
async fn override_requests_are_parsed_and_bad_ones_ignored() {
    let broker = Broker::start().await;
    // A retained override (left by someone's dashboard) is not taken on (re)connect.
    broker.publish("bench/site/override/pump", "on", true);
    let mut b = Bench::start(broker, "").await;
    assert!(!b.early.iter().any(|e| matches!(e, SourceEvent::Override(_))), "{:?}", b.early);
    let pump = b.site.load("pump").unwrap().0;
    let dimmer = b.site.load("dimmer").unwrap().0;
    // The paused clock does not move between a publication and its delivery.
    let t = b.clock.now();
    let min = |m: u64| t.plus(Duration::from_secs(60 * m));

    b.broker.publish("bench/site/override/pump", "on 30min", false);
    let request = b.override_request().await;
    assert_eq!(
        request,
        OverrideRequest {
            load: pump,
            action: OverrideAction::Set { command: Command::On, until: min(30), adjusted: None }
        }
    );
    // Logged as a person reads it, in the site's time: T0 is 20:26:40 UTC, 21:26:40 in
    // Lisbon. (Checked on the text the log line carries, not on a captured log: a
    // callsite first reached by a test running beside this one, with no subscriber,
    // can miss a capture, and did once in CI.)
    assert_eq!(request.action.describe(b.site.timezone, t), "on until 21:56:40 WEST");
    b.broker.publish("bench/site/override/pump", r#"{"command": "off", "for": "2h"}"#, false);
    assert_eq!(
        b.override_request().await.action,
        OverrideAction::Set { command: Command::Off, until: min(120), adjusted: None }
    );
    b.broker.publish("bench/site/override/pump", "OFF", false);
    assert_eq!(
        b.override_request().await.action,
        OverrideAction::Set { command: Command::Off, until: min(60), adjusted: None },
        "one hour when the payload does not say"
    );
    b.broker.publish("bench/site/override/dimmer", r#"{"command": "on", "level": "60%", "for": "45min"}"#, false);
    assert_eq!(
        b.override_request().await,
        OverrideRequest {
            load: dimmer,
            action: OverrideAction::Set { command: Command::Setpoint(Ratio(60.0)), until: min(45), adjusted: None }
        }
    );
    b.broker.publish("bench/site/override/pump", "auto", false);
    assert_eq!(b.override_request().await.action, OverrideAction::Clear);

    // Someone deleting a retained override (an empty payload) asks for nothing.
    b.broker.publish("bench/site/override/pump", "", false);
    for (topic, payload, expect) in [
        ("bench/site/override/pump", r#"{"command": "boost"}"#, "not on, off or auto"),
        ("bench/site/override/pump", "on 3 weeks", "is not a duration"),
        ("bench/site/override/pump", "on 48h", "at most 24 h"),
        // Too long for the type itself: refused, not a panic of the link.
        ("bench/site/override/pump", "on 100000000000000000000s", "at most 24 h"),
        ("bench/site/override/pump", r#"{"command": "on", "level": "50%"}"#, "takes no level"),
        ("bench/site/override/dimmer", r#"{"command": "on", "level": "3kW"}"#, "a percentage"),
        ("bench/site/override/sauna", "on", "no load called \"sauna\" (the site's loads: pump, dimmer"),
        ("bench/site/override/pump", r#"{"command": "on", "until": "17:00"}"#, "unknown key"),
    ] {
        b.broker.publish(topic, payload, false);
        let (origin, detail) = b.malformed().await;
        assert_eq!(origin, topic);
        assert!(detail.contains(expect), "{payload}: {detail}");
    }
    assert_eq!(b.stats.counts().malformed, 8);
    b.cancel.cancel();
    b.task.await.unwrap();
}

/// With `mqtt.discovery`, Home Assistant finds each load's sensors and buttons in
/// retained documents under its prefix; a button press is an ordinary override request.
/// Source for the document format: Home Assistant documentation, MQTT integration, "MQTT
/// Discovery" (see `src/sources/mqtt/discovery.rs`).
#[tokio::test(start_paused = true)]
async fn home_assistant_discovery_is_retained_and_a_button_press_is_an_override() {
    let broker = Broker::start().await;
    let mut b = Bench::start(broker, ", discovery: { boost: 2h }").await;
    b.settle().await;
    let doc = |topic: &str| -> serde_json::Value {
        let text = b.broker.retained(topic).unwrap_or_else(|| panic!("no retained {topic}"));
        serde_json::from_str(&text).unwrap()
    };
    let boost = doc("homeassistant/button/spillway_bench_pump_boost/config");
    assert_eq!(boost["name"], "pump boost 2 h");
    assert_eq!(boost["command_topic"], "bench/site/override/pump");
    assert_eq!(boost["payload_press"], "on 2h");
    assert_eq!(boost["availability_topic"], "bench/site/status");
    let power = doc("homeassistant/sensor/spillway_bench_pump_power/config");
    assert_eq!(power["state_topic"], "bench/site/state/pump");
    assert_eq!(power["unit_of_measurement"], "W");
    let on = doc("homeassistant/binary_sensor/spillway_bench_dimmer_on/config");
    assert_eq!(on["state_topic"], "bench/site/state/dimmer");
    let grid = doc("homeassistant/sensor/spillway_bench_grid/config");
    assert_eq!(grid["state_topic"], "bench/site/state/site");

    // What the sensors' templates read is in the state documents.
    b.dispatcher.apply(&decisions(&[Command::On, Command::Setpoint(Ratio(40.0))]));
    b.settle().await;
    let pump: serde_json::Value = serde_json::from_str(&b.broker.retained("bench/site/state/pump").unwrap()).unwrap();
    assert_eq!((pump["on"].as_bool(), pump["power"].as_f64()), (Some(true), Some(1000.0)));
    assert!(pump["reason"].is_string());

    // Pressing the button in Home Assistant publishes its payload to its topic.
    let t = b.clock.now();
    b.broker.publish(boost["command_topic"].as_str().unwrap(), boost["payload_press"].as_str().unwrap(), false);
    let r = b.override_request().await;
    assert_eq!(r.load, b.site.load("pump").unwrap().0);
    assert_eq!(
        r.action,
        OverrideAction::Set { command: Command::On, until: t.plus(Duration::from_secs(7200)), adjusted: None }
    );
    b.cancel.cancel();
    (&mut b.task).await.unwrap();
}

#[tokio::test(start_paused = true)]
async fn a_password_from_a_file_logs_in() {
    let broker = Broker::start().await;
    broker.require_login("spill", "s3cret");
    let file = std::env::temp_dir().join(format!("spillway-mqtt-pw-{}", std::process::id()));
    std::fs::write(&file, "s3cret\n").unwrap();
    let extra = format!(", username: spill, password_file: {}", file.display());
    let b = Bench::start(broker, &extra).await;
    assert_eq!(b.broker.connects(), 1);
    b.cancel.cancel();
    b.task.await.unwrap();
    std::fs::remove_file(&file).unwrap();

    // A missing variable stops the link at construction, with a hint.
    let site = site(&yaml(1, ", username: spill, password_env: SPILLWAY_TEST_NO_SUCH_VAR"));
    let err = MqttLink::new(site, MqttOptions::default()).unwrap_err();
    assert_eq!(
        err.to_string(),
        "MQTT password variable SPILLWAY_TEST_NO_SUCH_VAR is not set: export it or use `password_file`"
    );
}
