//! The daemon through MQTT: the grid meter publishes on a topic, the water heater is
//! switched by a command topic, and a plant client on the broker closes the loop. Run
//! against the in-process test broker, a `mosquitto` the test starts on a free port
//! (where `/usr/sbin/mosquitto` exists) and the broker on 127.0.0.1:1883 when one
//! answers; the real-broker cases print why they were skipped, unless
//! `SPILLWAY_REQUIRE_BROKER=1` makes a missing broker a failure.
//!
//! Each scenario: a PV step makes export, the heater's start rule clears it (the figure
//! is printed); an override turns it off and `auto` gives it back; malformed payloads
//! are counted and ignored; a broker restart is followed by resubscription and fresh
//! retained state. Real clock (the broker may be another process); waits are bounded
//! and no assertion is on a duration.

mod support;

use std::net::TcpListener as StdListener;
use std::process::{Child, Command as Process, Stdio};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use rumqttc::{AsyncClient, Event, MqttOptions as ClientOptions, Packet, QoS};
use spillway::daemon::{Daemon, Options};
use spillway::status::Status;
use support::broker::Broker;

const MOSQUITTO: &str = "/usr/sbin/mosquitto";
const HOUSE_W: f64 = 400.0;
const HEATER_W: f64 = 3000.0;

fn skip(why: &str) {
    if std::env::var("SPILLWAY_REQUIRE_BROKER").is_ok_and(|v| v == "1") {
        panic!("SPILLWAY_REQUIRE_BROKER=1 but {why}");
    }
    println!("skipped: {why} (set SPILLWAY_REQUIRE_BROKER=1 to make this a failure)");
}

fn unique_prefix(tag: &str) -> String {
    let nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().subsec_nanos();
    format!("spillway-daemon-test/{tag}-{}-{nanos}", std::process::id())
}

fn site_yaml(port: u16, prefix: &str) -> String {
    format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: forbidden
  tick: 200ms
mqtt: {{ broker: 127.0.0.1:{port}, topic_prefix: {prefix}/ctl, client_id: ctl-{n}-{nanos} }}
devices:
  home: {{ mqtt: true }}
points:
  grid: {{ device: home, topic: {prefix}/dev/meter, unit: W }}
loads:
  - name: water_heater
    priority: 1
    rated: 3kW
    switch: {{ device: home, topic: {prefix}/dev/heater/set }}
    start: surplus > 2.5kW
    stop: import > 1kW for 2s
",
        n = std::process::id(),
        nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().subsec_nanos(),
    )
}

#[derive(Debug, Default)]
struct PlantState {
    pv: f64,
    heater: bool,
    /// When the plant first published export after the last PV step.
    export_at: Option<Instant>,
    /// When the heater command arrived after that.
    on_at: Option<Instant>,
    /// Every (topic, payload, retain) seen under the controller's prefix.
    seen: Vec<(String, String, bool)>,
    /// Every payload seen on the heater's command topic.
    heater_commands: Vec<String>,
    connects: usize,
}

/// The plant on the broker: publishes the meter every 100 ms, follows the heater's
/// command topic, records what the controller publishes.
struct MqttPlant {
    client: AsyncClient,
    state: Arc<Mutex<PlantState>>,
    prefix: String,
    tasks: Vec<tokio::task::JoinHandle<()>>,
}

impl MqttPlant {
    async fn start(port: u16, prefix: &str) -> MqttPlant {
        // Unique per plant: tests share the broker on 1883, and a second client with the
        // same id would take the first one's session over.
        let mut o = ClientOptions::new(format!("plant-{}", prefix.replace('/', "-")), "127.0.0.1", port);
        o.set_keep_alive(Duration::from_secs(5));
        let (client, mut eventloop) = AsyncClient::new(o, 256);
        let state = Arc::new(Mutex::new(PlantState::default()));
        let (st, c, pre) = (Arc::clone(&state), client.clone(), prefix.to_owned());
        let driver = tokio::spawn(async move {
            loop {
                match eventloop.poll().await {
                    Ok(Event::Incoming(Packet::ConnAck(_))) => {
                        st.lock().unwrap().connects += 1;
                        let _ = c.subscribe(format!("{pre}/dev/heater/set"), QoS::AtLeastOnce).await;
                        let _ = c.subscribe(format!("{pre}/ctl/#"), QoS::AtLeastOnce).await;
                    }
                    Ok(Event::Incoming(Packet::Publish(p))) => {
                        let payload = String::from_utf8_lossy(&p.payload).into_owned();
                        let mut s = st.lock().unwrap();
                        if p.topic.ends_with("/dev/heater/set") {
                            s.heater_commands.push(payload.clone());
                            let on = payload == "ON";
                            if on && !s.heater && s.export_at.is_some() && s.on_at.is_none() {
                                s.on_at = Some(Instant::now());
                            }
                            s.heater = on;
                        } else {
                            s.seen.push((p.topic.clone(), payload, p.retain));
                        }
                    }
                    Ok(_) => {}
                    // The broker restarts in some scenarios: try again shortly.
                    Err(_) => tokio::time::sleep(Duration::from_millis(100)).await,
                }
            }
        });
        let (st, c, topic) = (Arc::clone(&state), client.clone(), format!("{prefix}/dev/meter"));
        let meter = tokio::spawn(async move {
            let mut every = tokio::time::interval(Duration::from_millis(100));
            loop {
                every.tick().await;
                let grid = {
                    let mut s = st.lock().unwrap();
                    let grid = HOUSE_W + if s.heater { HEATER_W } else { 0.0 } - s.pv;
                    if grid < 0.0 && s.export_at.is_none() {
                        s.export_at = Some(Instant::now());
                    }
                    grid
                };
                let _ = c.try_publish(&topic, QoS::AtMostOnce, false, format!("{grid:.0}"));
            }
        });
        MqttPlant { client, state, prefix: prefix.to_owned(), tasks: vec![driver, meter] }
    }

    fn set_pv(&self, w: f64) {
        let mut s = self.state.lock().unwrap();
        s.pv = w;
        s.export_at = None;
        s.on_at = None;
    }

    async fn publish(&self, suffix: &str, payload: &str) {
        let topic = format!("{}/{suffix}", self.prefix);
        self.client.publish(topic, QoS::AtLeastOnce, false, payload.as_bytes().to_vec()).await.unwrap();
    }

    fn seen_since(&self, n: usize) -> Vec<(String, String, bool)> {
        self.state.lock().unwrap().seen[n..].to_vec()
    }

    fn seen_count(&self) -> usize {
        self.state.lock().unwrap().seen.len()
    }

    /// Clears every retained topic the controller left under this plant's prefix (an
    /// empty retained payload deletes one): a shared broker such as the one on 1883
    /// would otherwise keep every run's status and state documents for good.
    async fn clear_retained(&self) {
        // Every topic seen: a broker forwards a live publication with its retain flag
        // cleared (MQTT 3.1.1), so the flag cannot tell which were kept, and an empty
        // payload on a topic that holds nothing changes nothing.
        let topics: std::collections::BTreeSet<String> =
            self.state.lock().unwrap().seen.iter().map(|(t, _, _)| t.clone()).collect();
        for t in topics {
            let _ = self.client.publish(t, QoS::AtLeastOnce, true, Vec::new()).await;
        }
        // Let the event loop hand them to the broker before the plant goes.
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
}

impl Drop for MqttPlant {
    fn drop(&mut self) {
        for t in &self.tasks {
            t.abort();
        }
    }
}

async fn until(daemon: &Daemon, what: &str, mut cond: impl FnMut(&Status) -> bool) -> Status {
    let mut rx = daemon.status();
    let deadline = tokio::time::Instant::now() + Duration::from_secs(15);
    loop {
        {
            let s = rx.borrow_and_update();
            if cond(&s) {
                return (**s).clone();
            }
        }
        match tokio::time::timeout_at(deadline, rx.changed()).await {
            Ok(Ok(())) => {}
            _ => panic!("never: {what}; last status {:#?}", rx.borrow()),
        }
    }
}

fn heater(s: &Status) -> &spillway::status::LoadStatus {
    &s.loads[0]
}

/// What every broker runs. `restart` restarts the broker (when the test owns it).
async fn scenario<F, Fut>(label: &str, port: u16, restart: Option<F>)
where
    F: FnOnce() -> Fut,
    Fut: std::future::Future<Output = ()>,
{
    let prefix = unique_prefix(label);
    let plant = MqttPlant::start(port, &prefix).await;
    let site = support::site(&site_yaml(port, &prefix));
    let (logs, _guard) = support::Logs::capture();
    let daemon = Daemon::start(site, Options::default()).await.unwrap();
    until(&daemon, "rules in charge", |s| s.mode == "normal").await;
    // The broker's own health is on the status page.
    let s = until(&daemon, "the broker reported up", |s| s.broker.as_ref().is_some_and(|b| b.up == Some(true))).await;
    assert_eq!(s.broker.unwrap().name, format!("127.0.0.1:{port}"));

    // Export appears; the heater's start rule clears it.
    plant.set_pv(3200.0);
    until(&daemon, "heater on", |s| heater(s).on).await;
    let deadline = Instant::now() + Duration::from_secs(5);
    let (export_at, on_at) = loop {
        let times = {
            let s = plant.state.lock().unwrap();
            (s.export_at, s.on_at)
        };
        if let (Some(e), Some(o)) = times {
            break (e, o);
        }
        assert!(Instant::now() < deadline, "the heater command never reached the plant");
        tokio::time::sleep(Duration::from_millis(20)).await;
    };
    println!(
        "[{label}] export at the meter → heater command at the plant: {} ms (tick 200 ms; ENA G100 Issue 1 allows 5 s)",
        on_at.duration_since(export_at).as_millis()
    );
    let s = until(&daemon, "importing again", |s| s.grid_w.is_some_and(|g| g > 0.0)).await;
    assert!(["start_rule", "running"].contains(&heater(&s).reason.as_str()), "{:?}", heater(&s));

    // An override from the command topic wins over the rule; `auto` hands back.
    plant.publish("ctl/override/water_heater", "off 10min").await;
    let s = until(&daemon, "override off", |s| !heater(s).on).await;
    assert_eq!(heater(&s).reason, "override");
    assert!(heater(&s).r#override.is_some());
    plant.publish("ctl/override/water_heater", "auto").await;
    until(&daemon, "back on by the rule", |s| heater(s).on && heater(s).r#override.is_none()).await;

    // Garbage on the meter topic and a bad override: counted (the meter's against its
    // device, the override's against the broker), ignored.
    plant.publish("dev/meter", "lots").await;
    plant.publish("ctl/override/water_heater", "maybe").await;
    let s = until(&daemon, "malformed counted", |s| {
        s.devices[0].malformed >= 1 && s.broker.as_ref().is_some_and(|b| b.malformed >= 1)
    })
    .await;
    assert_eq!(s.mode, "normal", "still running on the good samples");
    assert!(heater(&s).on);

    // Retained state is there for a dashboard that connects later.
    let seen = plant.seen_since(0);
    let state_topic = format!("{prefix}/ctl/state/water_heater");
    assert!(seen.iter().any(|(t, p, _)| *t == state_topic && p.contains("\"command\":\"on\"")), "{seen:?}");

    if let Some(restart) = restart {
        let n = plant.seen_count();
        let connects = plant.state.lock().unwrap().connects;
        restart().await;
        // Our plant reconnects too; then the daemon has resubscribed if an override
        // reaches it, and republished if a fresh retained state arrives.
        let deadline = Instant::now() + Duration::from_secs(20);
        while plant.state.lock().unwrap().connects == connects {
            assert!(Instant::now() < deadline, "the plant never reconnected");
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let online = format!("{prefix}/ctl/status");
        let deadline = Instant::now() + Duration::from_secs(20);
        while !plant.seen_since(n).iter().any(|(t, p, _)| *t == online && p == "online") {
            assert!(Instant::now() < deadline, "no `online` after the broker restart");
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let deadline = Instant::now() + Duration::from_secs(20);
        loop {
            plant.publish("ctl/override/water_heater", "off 5min").await;
            tokio::time::sleep(Duration::from_millis(300)).await;
            if !heater(&daemon.status().borrow()).on {
                break;
            }
            assert!(Instant::now() < deadline, "the override topic was not subscribed again");
        }
        let republished = plant.seen_since(n).iter().any(|(t, _, _)| *t == state_topic);
        assert!(republished, "state republished after the restart");
        println!("[{label}] broker restarted: resubscribed and republished");
    }

    daemon.shutdown();
    daemon.wait().await;
    // The last word on the wire is the safe state and `offline`. Delivery through a busy
    // broker may take a moment: wait for the stopped state rather than a fixed time (a
    // lost one never comes, and the assertions below then say what was seen instead).
    let site_topic = format!("{prefix}/ctl/state/site");
    let deadline = Instant::now() + Duration::from_secs(5);
    while Instant::now() < deadline
        && !plant
            .seen_since(0)
            .iter()
            .rev()
            .find(|(t, _, _)| *t == site_topic)
            .is_some_and(|x| x.1.contains("\"mode\":\"stopped\""))
    {
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    tokio::time::sleep(Duration::from_millis(100)).await;
    let seen = plant.seen_since(0);
    let status_topic = format!("{prefix}/ctl/status");
    assert_eq!(seen.iter().rev().find(|(t, _, _)| *t == status_topic).map(|x| x.1.as_str()), Some("offline"));
    assert!(!plant.state.lock().unwrap().heater, "heater commanded off at shutdown");
    // The retained site state says the controller stopped, with no stale numbers.
    let last = seen.iter().rev().find(|(t, _, _)| *t == site_topic).map(|x| x.1.clone()).unwrap_or_default();
    let tail: Vec<String> = seen.iter().rev().take(8).map(|(t, p, r)| format!("{t} {p} retain={r}")).collect();
    assert!(
        last.contains("\"mode\":\"stopped\"") && last.contains("\"grid\":null"),
        "{last}\nlast seen, newest first:\n{}\n{}",
        tail.join("\n"),
        logs.text()
    );
    // And the log says so.
    assert!(logs.text().contains("safe states sent to the broker at shutdown"), "{}", logs.text());
    plant.clear_retained().await;
}

/// With the broker gone at shutdown, the safe states cannot be sent: the log says so in
/// a warning instead of staying silent about the heater switched over MQTT.
#[tokio::test]
async fn safe_states_that_cannot_be_sent_at_shutdown_are_warned_about() {
    let broker = Broker::start().await;
    let prefix = unique_prefix("gone");
    let plant = MqttPlant::start(broker.addr.port(), &prefix).await;
    let site = support::site(&site_yaml(broker.addr.port(), &prefix));
    let (logs, _guard) = support::Logs::capture();
    let daemon = Daemon::start(site, Options::default()).await.unwrap();
    until(&daemon, "rules in charge", |s| s.mode == "normal").await;
    plant.set_pv(3200.0);
    until(&daemon, "heater on", |s| heater(s).on).await;
    broker.stop();
    until(&daemon, "the broker noticed gone", |s| s.devices[0].up == Some(false)).await;
    until(&daemon, "the broker reported down", |s| s.broker.as_ref().is_some_and(|b| b.up == Some(false))).await;
    daemon.shutdown();
    daemon.wait().await;
    let text = logs.text();
    let line =
        text.lines().find(|l| l.contains("safe states NOT sent at shutdown")).unwrap_or_else(|| panic!("{text}"));
    assert!(line.contains("WARN") && line.contains("not connected to the broker"), "{line}");
}

#[tokio::test]
async fn through_the_in_process_broker_with_a_restart() {
    let broker = Broker::start().await;
    let b = broker.clone();
    scenario("inproc", broker.addr.port(), Some(|| async move { b.restart().await })).await;
}

/// Stops the daemon while readings pour in (one every millisecond): its last publications
/// (the site state `stopped`, `offline`) still reach the broker. The link used to close
/// its socket 50 ms after its DISCONNECT; a broker still busy with the last publications
/// then failed to acknowledge them into the closed socket and dropped the rest unread
/// (Mosquitto 2.0.11 logs "disconnected due to out of memory"): about one run in six of
/// this file lost the `stopped` state. The link now waits for the broker to hang up.
async fn last_words_while_readings_pour_in(label: &str, port: u16) {
    for round in 0..5 {
        let prefix = unique_prefix(&format!("{label}-flood-{round}"));
        let plant = MqttPlant::start(port, &prefix).await;
        let (c, topic) = (plant.client.clone(), format!("{prefix}/dev/meter"));
        let flood = tokio::spawn(async move {
            let mut every = tokio::time::interval(Duration::from_millis(1));
            loop {
                every.tick().await;
                let _ = c.try_publish(&topic, QoS::AtMostOnce, false, format!("{HOUSE_W:.0}"));
            }
        });
        let (logs, _guard) = support::Logs::capture();
        let daemon = Daemon::start(support::site(&site_yaml(port, &prefix)), Options::default()).await.unwrap();
        until(&daemon, "rules in charge", |s| s.mode == "normal").await;
        let site_topic = format!("{prefix}/ctl/state/site");
        let deadline = Instant::now() + Duration::from_secs(5);
        while !plant.seen_since(0).iter().any(|(t, _, _)| *t == site_topic) {
            assert!(Instant::now() < deadline, "no site state before the stop");
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        daemon.shutdown();
        daemon.wait().await;
        flood.abort();
        // Delivery through a busy broker to a busy plant may take a moment: wait for the
        // last word rather than a fixed time (a lost one never comes).
        let last_state = || {
            let seen = plant.seen_since(0);
            seen.iter().rev().find(|(t, _, _)| *t == site_topic).map(|x| x.1.clone()).unwrap_or_default()
        };
        let deadline = Instant::now() + Duration::from_secs(5);
        while !last_state().contains("\"mode\":\"stopped\"") && Instant::now() < deadline {
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let last = last_state();
        let text = logs.text();
        let lines: Vec<&str> = text
            .lines()
            .filter(|l| l.contains("WARN") || l.contains("ERROR") || l.contains("mqtt") || l.contains("stopping"))
            .filter(|l| !l.contains("mqtt sample"))
            .collect();
        let seen = plant.seen_since(0);
        let tail: Vec<String> = seen.iter().rev().take(6).map(|(t, p, r)| format!("{t} {p} retain={r}")).collect();
        assert!(
            last.contains("\"mode\":\"stopped\""),
            "[{label}] round {round}: the last site state is {last}\nlast seen, newest first:\n{}\nlog:\n{}",
            tail.join("\n"),
            lines.iter().rev().take(30).rev().copied().collect::<Vec<_>>().join("\n")
        );
        plant.clear_retained().await;
    }
}

/// A plug switched on by its own button while the controller holds it off: the stop
/// still sends its safe state (OFF), although the controller's command never changed.
#[tokio::test]
async fn the_stop_sends_every_safe_state_even_one_the_command_already_had() {
    let broker = Broker::start().await;
    let port = broker.addr.port();
    let prefix = unique_prefix("button");
    let plant = MqttPlant::start(port, &prefix).await;
    let daemon = Daemon::start(support::site(&site_yaml(port, &prefix)), Options::default()).await.unwrap();
    until(&daemon, "rules in charge", |s| s.mode == "normal").await;
    tokio::time::sleep(Duration::from_secs(1)).await;
    assert!(!heater(&daemon.status().borrow()).on, "no sun: the heater is held off");
    // The button: the plug closes without a command.
    let before = {
        let mut s = plant.state.lock().unwrap();
        s.heater = true;
        s.heater_commands.len()
    };
    daemon.shutdown();
    daemon.wait().await;
    let deadline = Instant::now() + Duration::from_secs(5);
    loop {
        let (sent, on) = {
            let s = plant.state.lock().unwrap();
            (s.heater_commands[before..].to_vec(), s.heater)
        };
        if sent.iter().any(|p| p == "OFF") {
            assert!(!on, "the plug is off again");
            break;
        }
        assert!(Instant::now() < deadline, "no OFF at the stop: {sent:?}");
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    // The retained state says why the heater is off: the stop, not a lost signal.
    let topic = format!("{prefix}/ctl/state/water_heater");
    let last = || plant.seen_since(0).iter().rev().find(|(t, _, _)| *t == topic).map(|x| x.1.clone());
    while !last().is_some_and(|p| p.contains("\"reason\":\"shutdown\"")) {
        assert!(Instant::now() < deadline, "the last state of the heater: {:?}", last());
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    assert!(last().unwrap().contains("controller stopping: safe state"));
}

/// A reading no house can have (`1e9` W on the meter's topic) is dropped as malformed:
/// taken in, it stood in the day's counters for good (277.8 kWh from one sample) and in
/// every `avg` window for minutes.
#[tokio::test]
async fn an_absurd_power_reading_is_dropped_as_malformed() {
    let broker = Broker::start().await;
    let port = broker.addr.port();
    let prefix = unique_prefix("absurd");
    let plant = MqttPlant::start(port, &prefix).await;
    let daemon = Daemon::start(support::site(&site_yaml(port, &prefix)), Options::default()).await.unwrap();
    until(&daemon, "rules in charge", |s| s.mode == "normal").await;
    for _ in 0..5 {
        plant.publish("dev/meter", "1e9").await;
        plant.publish("dev/meter", "-1e9").await;
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
    let s = until(&daemon, "the readings counted as malformed", |s| s.devices[0].malformed >= 10).await;
    assert!(s.grid_w.is_some_and(|g| g.abs() < 10_000.0), "{:?}", s.grid_w);
    assert!(s.totals.import_wh < 100.0 && s.totals.export_wh < 100.0, "{:?}", s.totals);
    daemon.shutdown();
    daemon.wait().await;
}

#[tokio::test]
async fn the_last_words_reach_the_in_process_broker_while_readings_pour_in() {
    let broker = Broker::start().await;
    last_words_while_readings_pour_in("inproc", broker.addr.port()).await;
}

#[tokio::test]
async fn the_last_words_reach_the_broker_on_1883_while_readings_pour_in() {
    if std::net::TcpStream::connect_timeout(&"127.0.0.1:1883".parse().unwrap(), Duration::from_secs(1)).is_err() {
        return skip("no MQTT broker answers on 127.0.0.1:1883");
    }
    last_words_while_readings_pour_in("1883", 1883).await;
}

struct Mosquitto {
    child: Child,
    port: u16,
    conf: std::path::PathBuf,
}

impl Mosquitto {
    fn start(port: u16) -> Mosquitto {
        let conf = std::env::temp_dir().join(format!("spillway-daemon-mosquitto-{port}.conf"));
        std::fs::write(&conf, format!("listener {port} 127.0.0.1\nallow_anonymous true\nset_tcp_nodelay true\n"))
            .unwrap();
        let mut m = Mosquitto { child: Self::spawn(&conf), port, conf };
        m.wait_listening();
        m
    }

    fn spawn(conf: &std::path::Path) -> Child {
        Process::new(MOSQUITTO).arg("-c").arg(conf).stdout(Stdio::null()).stderr(Stdio::null()).spawn().unwrap()
    }

    fn wait_listening(&mut self) {
        let deadline = Instant::now() + Duration::from_secs(10);
        while std::net::TcpStream::connect(("127.0.0.1", self.port)).is_err() {
            assert!(Instant::now() < deadline, "mosquitto did not listen on {}", self.port);
            std::thread::sleep(Duration::from_millis(20));
        }
    }

    fn restart(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        self.child = Self::spawn(&self.conf);
        self.wait_listening();
    }
}

impl Drop for Mosquitto {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        let _ = std::fs::remove_file(&self.conf);
    }
}

#[tokio::test]
async fn through_a_mosquitto_the_test_starts_with_a_restart() {
    if !std::path::Path::new(MOSQUITTO).exists() {
        return skip(&format!("{MOSQUITTO} is not installed"));
    }
    let port = StdListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port();
    let m = Arc::new(Mutex::new(Mosquitto::start(port)));
    let m2 = Arc::clone(&m);
    scenario("mosquitto", port, Some(|| async move { m2.lock().unwrap().restart() })).await;
    drop(m);
}

#[tokio::test]
async fn through_the_broker_on_1883() {
    if std::net::TcpStream::connect_timeout(&"127.0.0.1:1883".parse().unwrap(), Duration::from_secs(1)).is_err() {
        return skip("no MQTT broker answers on 127.0.0.1:1883");
    }
    scenario::<fn() -> std::future::Ready<()>, _>("1883", 1883, None).await;
}

/// A point published less often than its `stale_after` goes stale between every two
/// readings (a meter reporting every 5 s against the default 2.5 s made the site flap
/// in and out of fail-safe with one line in the log): three such gaps in a row are
/// warned about once, naming the point, the period seen and the setting to change.
#[tokio::test]
async fn a_point_published_less_often_than_its_stale_after_is_warned_about() {
    let broker = Broker::start().await;
    let port = broker.addr.port();
    let prefix = unique_prefix("gaps");
    let plant = MqttPlant::start(port, &prefix).await;
    let yaml = site_yaml(port, &prefix).replace(
        "\nloads:",
        &format!("\n  slow: {{ device: home, topic: {prefix}/dev/slow, unit: W, stale_after: 1500ms }}\nloads:"),
    );
    let (logs, _guard) = support::Logs::capture();
    let daemon = Daemon::start(support::site(&yaml), Options::default()).await.unwrap();
    until(&daemon, "rules in charge", |s| s.mode == "normal").await;
    for _ in 0..5 {
        plant.publish("dev/slow", "120").await;
        tokio::time::sleep(Duration::from_millis(2000)).await;
    }
    daemon.shutdown();
    daemon.wait().await;
    let text = logs.text();
    let warned: Vec<_> = text.lines().filter(|l| l.contains("further apart than the point's stale_after")).collect();
    assert_eq!(warned.len(), 1, "once: {text}");
    assert!(warned[0].contains("slow") && warned[0].contains("every=2 s"), "{}", warned[0]);
    assert!(!text.lines().any(|l| l.contains("further apart") && l.contains("point=grid")), "{text}");
}

/// Each different mistake on an override topic is answered in the log (a person trying
/// forms got one line a minute, the rest silently counted), against the broker, not the
/// meter's device; a retained reading is ignored with one line saying so.
#[tokio::test]
async fn every_different_override_mistake_is_logged_and_a_retained_reading_is_noted() {
    let broker = Broker::start().await;
    let port = broker.addr.port();
    let prefix = unique_prefix("mistakes");
    broker.publish(&format!("{prefix}/dev/meter"), "-3000", true);
    let plant = MqttPlant::start(port, &prefix).await;
    let (logs, _guard) = support::Logs::capture();
    let daemon = Daemon::start(support::site(&site_yaml(port, &prefix)), Options::default()).await.unwrap();
    until(&daemon, "rules in charge", |s| s.mode == "normal").await;
    for bad in ["boost", "on 25h", "on 0s", "boost"] {
        plant.publish("ctl/override/water_heater", bad).await;
    }
    let s = until(&daemon, "four mistakes counted", |s| s.broker.as_ref().is_some_and(|b| b.malformed >= 4)).await;
    assert_eq!(s.devices[0].malformed, 0, "not the meter's: {:?}", s.devices[0]);
    daemon.shutdown();
    daemon.wait().await;
    // Which of them are logged is checked on the key that rate-limits them (a unit test
    // in the control task): a log line shared with the tests beside this one can miss
    // a capture. The retained reading's line is this test's alone.
    let text = logs.text();
    assert_eq!(text.lines().filter(|l| l.contains("a retained reading was ignored")).count(), 1, "{text}");
}

/// Two controllers with one client id (a copy of the site file run beside the service)
/// take the broker session from each other over and over, and each reconnect re-sends
/// the commands: after three connections in a row dropped within seconds, the log says
/// what most often causes it, once.
#[tokio::test]
async fn a_client_id_shared_by_two_controllers_is_named_as_the_likely_cause() {
    let broker = Broker::start().await;
    let port = broker.addr.port();
    let prefix = unique_prefix("shared-id");
    let _plant = MqttPlant::start(port, &prefix).await;
    let yaml = site_yaml(port, &prefix);
    let (logs, _guard) = support::Logs::capture();
    let first = Daemon::start(support::site(&yaml), Options::default()).await.unwrap();
    until(&first, "rules in charge", |s| s.mode == "normal").await;
    let second = Daemon::start(support::site(&yaml), Options::default()).await.unwrap();
    let deadline = Instant::now() + Duration::from_secs(20);
    while !logs.text().contains("within seconds of accepting them") && Instant::now() < deadline {
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    second.shutdown();
    second.wait().await;
    first.shutdown();
    first.wait().await;
    let text = logs.text();
    let warned: Vec<_> = text.lines().filter(|l| l.contains("within seconds of accepting them")).collect();
    assert!(!warned.is_empty(), "{text}");
    assert!(warned.iter().all(|l| l.contains("WARN") && l.contains("same client id")), "{warned:?}");
    assert!(warned.len() <= 2, "once per controller: {warned:?}");
}
