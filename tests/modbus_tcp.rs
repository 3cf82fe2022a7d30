//! The Modbus TCP link against a tokio-modbus test server on loopback: grouped reads,
//! decoding, scale factors, exceptions, timeouts and reconnects, writes and their
//! re-assertion. Time is tokio's paused clock: no test sleeps for real.

mod support;

use std::sync::Arc;
use std::time::Duration;

use spillway::actuators::{ActuatorOptions, Dispatcher};
use spillway::config::model::{PointId, Site};
use spillway::engine::{Command, Decisions, LimitReason, LoadDecision, Mode, Reason};
use spillway::sources::{Clock, LinkStats, ModbusLink, ModbusOptions, SourceEvent};
use spillway::units::{Power, Ratio, Timestamp};
use support::modbus::{Logged, TestServer};
use support::{drain_for, site, wait_for};
use tokio::sync::mpsc;
use tokio_util::sync::CancellationToken;

const T0: Timestamp = Timestamp(1_780_000_000_000);

struct Bench {
    server: TestServer,
    site: Arc<Site>,
    events: mpsc::Receiver<SourceEvent>,
    stats: Arc<LinkStats>,
    dispatcher: Dispatcher,
    cancel: CancellationToken,
    task: tokio::task::JoinHandle<()>,
}

impl Bench {
    /// Starts a link for device `device` of the site produced by `yaml(port)`.
    async fn start(server: TestServer, yaml: &str, device: &str, actuators: ActuatorOptions) -> Bench {
        let text = yaml.replace("PORT", &server.addr.port().to_string());
        let site = site(&text);
        let (id, _) = site.device(device).unwrap();
        let link = ModbusLink::new(site.clone(), id, ModbusOptions::default()).unwrap();
        let stats = link.stats();
        let dispatcher = Dispatcher::new(site.clone(), actuators);
        let rx = dispatcher.device(id).unwrap();
        let (tx, events) = mpsc::channel(1024);
        let cancel = CancellationToken::new();
        let task = tokio::spawn(link.run(rx, tx, Clock::anchored(T0), cancel.clone()));
        Bench { server, site, events, stats, dispatcher, cancel, task }
    }

    fn point(&self, name: &str) -> PointId {
        self.site.point(name).unwrap().0
    }

    /// The next sample of every named point (waits up to 5 s of tokio time).
    async fn samples(&mut self, names: &[&str]) -> Vec<f64> {
        let ids: Vec<PointId> = names.iter().map(|n| self.point(n)).collect();
        let mut got: Vec<Option<f64>> = vec![None; ids.len()];
        while got.iter().any(Option::is_none) {
            let (p, v) = wait_for(&mut self.events, Duration::from_secs(5), |e| match e {
                SourceEvent::Sample { point, value, .. } => Some((*point, *value)),
                _ => None,
            })
            .await;
            if let Some(i) = ids.iter().position(|x| *x == p) {
                got[i] = Some(v);
            }
        }
        got.into_iter().map(Option::unwrap_or_default).collect()
    }

    fn command(&self, commands: &[Command]) {
        self.dispatcher.apply(&decisions(commands, None));
    }

    async fn stop(self) {
        self.cancel.cancel();
        self.task.await.unwrap();
    }
}

fn decisions(commands: &[Command], limit: Option<Power>) -> Decisions {
    Decisions {
        now: T0,
        loads: commands.iter().map(|c| LoadDecision { command: *c, reason: Reason::Running }).collect(),
        inverter_limit: limit,
        limit_reason: LimitReason::None,
        mode: Mode::Normal,
        surplus: Power::ZERO,
        grid: None,
        switchings: Vec::new(),
    }
}

fn reads(log: &[Logged]) -> Vec<(u8, u16, u16)> {
    log.iter().filter(|l| l.function <= 4).map(|l| (l.function, l.address, l.count)).collect()
}

fn writes(log: &[Logged]) -> Vec<(u8, u16, u16)> {
    log.iter().filter(|l| l.function > 4).map(|l| (l.function, l.address, l.count)).collect()
}

const HEAD: &str = "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter: { modbus_tcp: 127.0.0.1:PORT, unit: 1, poll: 1s, timeout: 500ms }
";

#[tokio::test(start_paused = true)]
async fn contiguous_points_are_read_in_one_request_per_block() {
    let server = TestServer::start().await;
    server.set_holding(1, 100, &[7; 12]); // 100..=111, the gap 104..=109 included
    server.set_holding(1, 300, &[9]);
    server.set_input(1, 0, &[5]);
    let yaml = format!(
        "{HEAD}points:
  a: {{ device: meter, register: 100, unit: W }}
  b: {{ device: meter, register: 101, type: u32, unit: W }}
  c: {{ device: meter, register: 103, type: i16, unit: W }}
  d: {{ device: meter, register: 110, type: u16, unit: W }}
  e: {{ device: meter, register: 300, unit: W }}
  f: {{ device: meter, register: 0, table: input, unit: W }}
"
    );
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    let v = b.samples(&["a", "b", "c", "d", "e", "f"]).await;
    assert_eq!(v, vec![7.0, f64::from(7u32 << 16 | 7), 7.0, 7.0, 9.0, 5.0]);
    // Six points, three requests: holding 100..=110 (a 6-register gap is joined),
    // holding 300 alone (too far), input 0 (another table).
    let log = b.server.take_log();
    assert_eq!(reads(&log), vec![(4, 0, 1), (3, 100, 11), (3, 300, 1)]);
    // The next poll, one period later, asks the same three again.
    b.samples(&["a", "b", "c", "d", "e", "f"]).await;
    assert_eq!(reads(&b.server.take_log()), vec![(4, 0, 1), (3, 100, 11), (3, 300, 1)]);
    assert_eq!(b.stats.counts().requests, 6);
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn every_type_and_word_order_decodes() {
    // (type, word order, registers, expected). Integer rows are plain two's-complement
    // arithmetic; the f32 rows use IEEE 754 binary32: 12.5 = 0x41480000 and
    // -0.15625 = 0xBE200000 (Source: IEEE Std 754-2008, §3.4 binary interchange format).
    let table: &[(&str, &str, &[u16], f64)] = &[
        ("u16", "high_first", &[0xFFFE], 65534.0),
        ("i16", "high_first", &[0xFFFE], -2.0),
        ("i16", "high_first", &[0x7FFF], 32767.0),
        ("u32", "high_first", &[0x0001, 0x0002], 65538.0),
        ("u32", "low_first", &[0x0002, 0x0001], 65538.0),
        ("i32", "high_first", &[0xFFFF, 0xFFFE], -2.0),
        ("i32", "low_first", &[0xFFFE, 0xFFFF], -2.0),
        ("i32", "high_first", &[0x8000, 0x0000], -2_147_483_648.0),
        ("u64", "high_first", &[0, 0, 0x0001, 0x0002], 65538.0),
        ("u64", "low_first", &[0x0002, 0x0001, 0, 0], 65538.0),
        ("u64", "high_first", &[0x0001, 0, 0, 0], 281_474_976_710_656.0),
        ("f32", "high_first", &[0x4148, 0x0000], 12.5),
        ("f32", "low_first", &[0x0000, 0x4148], 12.5),
        ("f32", "high_first", &[0xBE20, 0x0000], -0.15625),
    ];
    let server = TestServer::start().await;
    let mut yaml = format!("{HEAD}points:\n");
    let mut names = Vec::new();
    for (i, (ty, order, words, _)) in table.iter().enumerate() {
        // Far apart so that each row is its own request and cannot bleed into another.
        let addr = 1000 + 200 * i as u16;
        server.set_holding(1, addr, words);
        yaml.push_str(&format!(
            "  p{i}: {{ device: meter, register: {addr}, type: {ty}, word_order: {order}, unit: none }}\n"
        ));
        names.push(format!("p{i}"));
    }
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    let names: Vec<&str> = names.iter().map(String::as_str).collect();
    let got = b.samples(&names).await;
    for ((ty, order, words, want), got) in table.iter().zip(got) {
        assert_eq!(got, *want, "{ty} {order} {words:04X?}");
    }
    b.stop().await;
}

/// A power reading pinned at its register's full scale (a meter clipping, or a fault
/// writing all ones) is dropped as malformed, not taken in: one such spike drove a
/// battery and cut the inverter to nothing in an installer's walk-through. Full scale
/// is both ends of a signed register (less SunSpec's 0x8000) and all ones of an
/// unsigned one; the same raw words on a point that is not a power still decode.
#[tokio::test(start_paused = true)]
async fn a_power_at_its_registers_full_scale_is_dropped_as_malformed() {
    let server = TestServer::start().await;
    server.set_holding(1, 100, &[0x7FFF]);
    server.set_holding(1, 300, &[0x8001]);
    server.set_holding(1, 500, &[0xFFFF]);
    server.set_holding(1, 700, &[0x7FFE]);
    server.set_holding(1, 900, &[0x7FFF]);
    let yaml = format!(
        "{HEAD}points:
  high: {{ device: meter, register: 100, type: i16, unit: W }}
  low: {{ device: meter, register: 300, type: i16, unit: W }}
  ones: {{ device: meter, register: 500, unit: W }}
  fine: {{ device: meter, register: 700, type: i16, unit: W }}
  count: {{ device: meter, register: 900, type: i16, unit: none }}
"
    );
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    let evs = drain_for(&mut b.events, Duration::from_millis(900)).await;
    let mut dropped: Vec<&str> = evs
        .iter()
        .filter_map(|e| match e {
            SourceEvent::Malformed { origin, detail, .. } if detail.contains("full scale") => Some(origin.as_str()),
            _ => None,
        })
        .collect();
    dropped.sort_unstable();
    assert_eq!(dropped, ["high", "low", "ones"]);
    let sampled: Vec<PointId> = evs
        .iter()
        .filter_map(|e| match e {
            SourceEvent::Sample { point, .. } => Some(*point),
            _ => None,
        })
        .collect();
    assert!(sampled.contains(&b.point("fine")) && sampled.contains(&b.point("count")), "{evs:?}");
    assert!(!sampled.contains(&b.point("high")));
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn scale_factor_registers_apply_ten_to_the_power() {
    let server = TestServer::start().await;
    // 1234 × 10^-1, 5 × 10^2, and a scale factor the device does not implement.
    server.set_holding(1, 200, &[1234, (-1i16) as u16, 5, 2, 77, 0x8000]);
    let yaml = format!(
        "{HEAD}points:
  w: {{ device: meter, register: 200, type: i16, scale: {{ register: 201 }}, unit: W }}
  k: {{ device: meter, register: 202, scale: {{ register: 203 }}, unit: kW }}
  n: {{ device: meter, register: 204, scale: {{ register: 205 }}, unit: W }}
  c: {{ device: meter, register: 200, scale: 0.5, unit: W }}
"
    );
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    let v = b.samples(&["w", "k", "n", "c"]).await;
    assert_eq!(v[0], 123.4);
    assert_eq!(v[1], 500_000.0, "5 × 10^2 kW in W");
    assert!(v[2].is_nan(), "sunssf 0x8000 means not implemented");
    assert_eq!(v[3], 617.0);
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn exception_responses_are_named_counted_and_survived() {
    use tokio_modbus::ExceptionCode;
    let server = TestServer::start().await;
    server.set_holding(1, 100, &[1]);
    server.set_holding(1, 300, &[2]);
    server.set_holding(1, 500, &[3]);
    server.with(|s| {
        s.exceptions.insert((3, 300), ExceptionCode::IllegalDataAddress);
        s.exceptions.insert((3, 500), ExceptionCode::ServerDeviceBusy);
    });
    let yaml = format!(
        "{HEAD}points:
  ok: {{ device: meter, register: 100, unit: W }}
  bad: {{ device: meter, register: 300, unit: W }}
  busy: {{ device: meter, register: 500, unit: W }}
"
    );
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    for round in 0..2 {
        let evs = drain_for(&mut b.events, Duration::from_millis(900)).await;
        let mut names: Vec<String> = evs
            .iter()
            .filter_map(|e| match e {
                SourceEvent::Exception { code, function: 3, .. } => Some(code.to_string()),
                _ => None,
            })
            .collect();
        names.sort();
        assert_eq!(names, ["IllegalDataAddress", "ServerDeviceBusy"], "round {round}");
        let ok = b.point("ok");
        assert!(
            evs.iter().any(|e| matches!(e, SourceEvent::Sample { point, value, .. } if *point == ok && *value == 1.0))
        );
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    assert_eq!(b.stats.counts().exceptions, 4);
    assert_eq!(b.stats.counts().connects, 1, "exceptions never cost the connection");
    b.stop().await;
}

/// A gateway answers for a device behind it that has gone quiet with exception 0x0B
/// ("gateway target device failed to respond"; Modbus Application Protocol V1.1b3, §7):
/// the connection stays, every request fails. After twice the poll period of nothing
/// but exceptions the device is down, with the exception named; the first answer brings
/// it back.
#[tokio::test(start_paused = true)]
async fn a_device_that_answers_only_with_exceptions_is_down_until_it_answers() {
    let server = TestServer::start().await;
    server.set_holding(1, 100, &[7]);
    let yaml = format!(
        "{HEAD}  behind: {{ modbus_tcp: 127.0.0.1:PORT, unit: 9, poll: 1s, timeout: 500ms }}
points:
  a: {{ device: behind, register: 100, unit: W }}
  b: {{ device: behind, register: 300, unit: W }}
"
    );
    let mut b = Bench::start(server, &yaml, "behind", ActuatorOptions::default()).await;
    let started = tokio::time::Instant::now();
    let evs = drain_for(&mut b.events, Duration::from_millis(1500)).await;
    assert!(!evs.iter().any(|e| matches!(e, SourceEvent::DeviceUp { .. })), "up on exceptions alone: {evs:?}");
    let reason = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::DeviceDown { reason, .. } => Some(reason.clone()),
        _ => None,
    })
    .await;
    let after = started.elapsed();
    println!("down after {} ms: {reason}", after.as_millis());
    assert!(after >= Duration::from_secs(2) && after < Duration::from_secs(4), "{after:?}");
    assert!(
        reason
            .starts_with("answers every request with exception 0x0B (gateway target device failed to respond) since "),
        "{reason}"
    );
    assert!(reason.contains("check the device behind the gateway"), "{reason}");
    assert_eq!(b.stats.counts().connects, 1, "the connection itself is fine");

    // The device behind the gateway answers again.
    b.server.set_holding(9, 100, &[8]);
    b.server.set_holding(9, 300, &[9]);
    wait_for(&mut b.events, Duration::from_secs(3), |e| matches!(e, SourceEvent::DeviceUp { .. }).then_some(())).await;
    assert_eq!(b.samples(&["a", "b"]).await, vec![8.0, 9.0]);
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn a_block_refused_across_a_gap_is_split_into_its_runs() {
    let server = TestServer::start().await;
    server.set_holding(1, 100, &[11]);
    server.set_holding(1, 105, &[12]); // 101..=104 are a hole in the map
    let yaml = format!(
        "{HEAD}points:
  a: {{ device: meter, register: 100, unit: W }}
  b: {{ device: meter, register: 105, unit: W }}
"
    );
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    let code = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::Exception { code, .. } => Some(code.to_string()),
        _ => None,
    })
    .await;
    assert_eq!(code, "IllegalDataAddress");
    assert_eq!(b.samples(&["a", "b"]).await, vec![11.0, 12.0]);
    assert_eq!(reads(&b.server.take_log()), vec![(3, 100, 6), (3, 100, 1), (3, 105, 1)]);
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn a_timeout_drops_the_connection_and_reconnects_with_backoff() {
    let server = TestServer::start().await;
    server.set_holding(1, 100, &[42]);
    let yaml = format!("{HEAD}points:\n  a: {{ device: meter, register: 100, unit: W }}\n");
    let mut b = Bench::start(server, &yaml, "meter", ActuatorOptions::default()).await;
    assert_eq!(b.samples(&["a"]).await, vec![42.0]);

    b.server.set_silent(true);
    let reason = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::DeviceDown { reason, .. } => Some(reason.clone()),
        _ => None,
    })
    .await;
    assert_eq!(reason, "no answer within 500 ms");
    let down_at = tokio::time::Instant::now();
    // Twenty seconds of silence: the server still accepts connections, every request
    // times out. With 0.5 s doubling (jitter 50–100 %) plus 0.5 s per timeout there is
    // room for at most six attempts; without backoff there would be about forty.
    let evs = drain_for(&mut b.events, Duration::from_secs(20)).await;
    assert!(!evs.iter().any(|e| matches!(e, SourceEvent::Sample { .. })), "no samples while silent");
    // A connection that is accepted proves nothing: the device is up when it answers.
    assert!(!evs.iter().any(|e| matches!(e, SourceEvent::DeviceUp { .. })), "up while silent: {evs:?}");
    let c = b.stats.counts();
    assert!((3..=6).contains(&c.connects), "{c}");
    assert!(c.timeouts >= 3, "{c}");

    b.server.set_holding(1, 100, &[43]);
    b.server.set_silent(false);
    wait_for(&mut b.events, Duration::from_secs(40), |e| matches!(e, SourceEvent::DeviceUp { .. }).then_some(())).await;
    assert!(down_at.elapsed() > Duration::from_secs(20));
    assert_eq!(b.samples(&["a"]).await, vec![43.0]);
    b.stop().await;
}

const RELAYS: &str = "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  relays: { modbus_tcp: 127.0.0.1:PORT, unit: 3, poll: 1s, timeout: 500ms }
points:
  grid: { device: relays, register: 50, type: i16, unit: W }
  battery_soc: { device: relays, register: 60, unit: '%' }
loads:
  - name: heater
    priority: 1
    rated: 2kW
    switch: { device: relays, coil: 2 }
    start: grid < 0W
    stop: grid > 100W
  - name: elements
    priority: 2
    kind: stepped
    stages: [1kW, 2kW, 3kW]
    switch: [{ device: relays, coil: 4 }, { device: relays, coil: 5 }, { device: relays, coil: 6 }]
    start: grid < 0W
    stop: grid > 100W
  - name: dimmer
    priority: 3
    kind: proportional
    rated: 1kW
    setpoint: { device: relays, register: 10, scale: 0.1 }
    enable: { device: relays, coil: 7 }
    start: grid < 0W
    stop: grid > 100W
  - name: battery
    priority: 4
    kind: battery
    max_charge: 3kW
    soc_max: 95%
    soc_resume: 90%
    soc: battery_soc
    setpoint: { device: relays, register: 12, type: u32 }
";

fn relays_server(server: &TestServer) {
    server.add_coils(3, 0, 16);
    server.set_holding(3, 0, &[0; 20]);
    server.set_holding(3, 50, &[0]);
    server.set_holding(3, 60, &[80]);
}

fn relays_yaml() -> String {
    RELAYS.to_owned()
}

#[tokio::test(start_paused = true)]
async fn reads_back_first_then_writes_only_the_configured_addresses() {
    let server = TestServer::start().await;
    relays_server(&server);
    server.unit(3, |u| {
        u.coils.insert(2, true);
    });
    server.set_holding(3, 10, &[250]);
    let mut b = Bench::start(server, &relays_yaml(), "relays", ActuatorOptions::default()).await;

    let values = wait_for(&mut b.events, Duration::from_secs(5), |e| match e {
        SourceEvent::Readback { values, .. } => Some(values.clone()),
        _ => None,
    })
    .await;
    // The log line is for a person commissioning the site, not Rust's Debug text
    // (checked on the text the line carries: a captured log can miss a callsite that a
    // test running beside this one reached first).
    assert_eq!(
        spillway::sources::readback_text(&values),
        "coil 2 on, coil 4 off, coil 5 off, coil 6 off, holding 10 25, coil 7 off, holding 12 0"
    );
    let found: Vec<(String, Option<f64>)> = values.into_iter().map(|r| (r.target, r.value)).collect();
    assert_eq!(
        found,
        vec![
            ("coil 2".to_owned(), Some(1.0)),
            ("coil 4".to_owned(), Some(0.0)),
            ("coil 5".to_owned(), Some(0.0)),
            ("coil 6".to_owned(), Some(0.0)),
            ("holding 10".to_owned(), Some(25.0)),
            ("coil 7".to_owned(), Some(0.0)),
            ("holding 12".to_owned(), Some(0.0)),
        ]
    );
    drain_for(&mut b.events, Duration::from_secs(3)).await;
    assert!(writes(&b.server.take_log()).is_empty(), "nothing is written before the engine has decided");

    b.command(&[Command::Off, Command::Stage(2), Command::Setpoint(Ratio(45.0)), Command::Charge(Power(1500.0))]);
    drain_for(&mut b.events, Duration::from_millis(500)).await;
    let mut w = writes(&b.server.take_log());
    w.sort();
    // fc 5 for the lone coil, fc 15 for the three stage relays and the enable (4..=7
    // are contiguous), fc 6 for the 45 % setpoint ÷ 0.1, fc 16 for the u32 charge power.
    assert_eq!(w, vec![(5, 2, 1), (6, 10, 1), (15, 4, 4), (16, 12, 2)]);
    let s = &b.server;
    assert_eq!([2, 4, 5, 6, 7].map(|c| s.coil(3, c).unwrap()), [false, true, true, false, true]);
    assert_eq!(s.holding(3, 10), Some(450));
    assert_eq!((s.holding(3, 12), s.holding(3, 13)), (Some(0), Some(1500)));
    for unconfigured in [0, 1, 3, 8, 9] {
        assert_eq!(s.coil(3, unconfigured), Some(false));
    }

    // Unchanged commands are not written again before the re-assert period.
    b.command(&[Command::Off, Command::Stage(2), Command::Setpoint(Ratio(45.0)), Command::Charge(Power(1500.0))]);
    drain_for(&mut b.events, Duration::from_secs(5)).await;
    assert!(writes(&b.server.take_log()).is_empty());
    // A change writes only what changed.
    b.command(&[Command::On, Command::Stage(2), Command::Setpoint(Ratio(45.0)), Command::Charge(Power(1500.0))]);
    drain_for(&mut b.events, Duration::from_millis(500)).await;
    assert_eq!(writes(&b.server.take_log()), vec![(5, 2, 1)]);
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn a_rebooted_relay_module_gets_its_state_back() {
    let server = TestServer::start().await;
    relays_server(&server);
    // The daemon's own default: the README promises a re-write every 10 s.
    let options = ActuatorOptions::default();
    let mut b = Bench::start(server, &relays_yaml(), "relays", options).await;
    b.command(&[Command::On, Command::Stage(3), Command::Off, Command::Off]);
    drain_for(&mut b.events, Duration::from_secs(1)).await;
    assert_eq!(b.server.coil(3, 2), Some(true));

    // A power cycle drops the connection and clears the coils: the link reconnects
    // and writes every target again.
    b.server.reboot();
    assert_eq!(b.server.coil(3, 2), Some(false));
    wait_for(&mut b.events, Duration::from_secs(5), |e| matches!(e, SourceEvent::DeviceUp { .. }).then_some(())).await;
    drain_for(&mut b.events, Duration::from_millis(500)).await;
    assert_eq!([2, 4, 5, 6].map(|c| b.server.coil(3, c).unwrap()), [true, true, true, true]);

    // A module behind a gateway that rebooted without dropping TCP: the periodic
    // re-assert (10 s by default) restores it.
    b.server.unit(3, |u| u.coils.values_mut().for_each(|c| *c = false));
    b.server.take_log();
    drain_for(&mut b.events, Duration::from_secs(11)).await;
    assert_eq!(b.server.coil(3, 2), Some(true));
    let w = writes(&b.server.take_log());
    assert!(w.contains(&(5, 2, 1)) && w.contains(&(15, 4, 4)), "{w:?}");
    assert_eq!(b.stats.counts().connects, 2);
    b.stop().await;
}

#[tokio::test(start_paused = true)]
async fn commands_set_just_before_cancelling_are_still_written() {
    let server = TestServer::start().await;
    relays_server(&server);
    let mut b = Bench::start(server, &relays_yaml(), "relays", ActuatorOptions::default()).await;
    b.command(&[Command::On, Command::Stage(1), Command::Off, Command::Off]);
    drain_for(&mut b.events, Duration::from_secs(1)).await;
    assert_eq!(b.server.coil(3, 2), Some(true));
    // The daemon's shutdown: safe states first, then cancel, then await the task.
    b.command(&[Command::Off, Command::Off, Command::Off, Command::Off]);
    b.cancel.cancel();
    b.task.await.unwrap();
    assert_eq!([2, 4, 5, 6].map(|c| b.server.coil(3, c).unwrap()), [false; 4]);
}
