//! Modbus RTU: the CRC against its published check value, a full request/response
//! exchange of the link over a pseudo-terminal pair standing in for the serial line,
//! and several devices sharing one line.
//!
//! This test runs on the real clock: bytes cross a pseudo-terminal through the
//! kernel's tty layer asynchronously, so a paused clock would fire request timeouts
//! before the reply is readable. It waits only for events, never for a fixed time.

mod support;

use std::sync::{Arc, Mutex};
use std::time::Duration;

use spillway::actuators::{ActuatorOptions, Dispatcher};
use spillway::engine::{Command, Decisions, LimitReason, LoadDecision, Mode, Reason};
use spillway::sources::{Clock, ModbusLink, ModbusOptions, SerialLines, SourceEvent};
use spillway::units::{Power, Timestamp};
use support::rtu::{Slave, crc16_modbus, respond, respond_all};
use support::{site, wait_for};
use tokio::sync::mpsc;
use tokio_serial::{SerialPort, SerialStream};
use tokio_util::sync::CancellationToken;

#[test]
fn crc16_modbus_matches_the_catalogue_check_value() {
    // Source: Greg Cook, "Catalogue of parametrised CRC algorithms" (CRC RevEng),
    // CRC-16/MODBUS: width=16 poly=0x8005 init=0xffff refin=true refout=true
    // xorout=0x0000 check=0x4b37 (the CRC of the ASCII bytes "123456789").
    assert_eq!(crc16_modbus(b"123456789"), 0x4B37);
}

#[tokio::test]
async fn a_full_rtu_exchange_over_a_pseudo_terminal() {
    let (master, slave_end) = SerialStream::pair().unwrap();
    let path = slave_end.name().unwrap();
    let slave = Arc::new(Mutex::new(Slave { unit: 7, ..Slave::default() }));
    {
        let mut s = slave.lock().unwrap();
        s.holding.insert(10, 0x0102);
        s.holding.insert(11, (-250i16) as u16);
        s.coils.insert(3, false);
    }
    let responder = tokio::spawn(respond(master, slave.clone()));

    let site = site(&format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  rs485: {{ modbus_rtu: {{ port: {path}, baud: 19200, parity: even }}, unit: 7, poll: 1s, timeout: 1s }}
points:
  a: {{ device: rs485, register: 10, unit: W }}
  b: {{ device: rs485, register: 11, type: i16, unit: W }}
loads:
  - name: pump
    priority: 1
    rated: 1kW
    switch: {{ device: rs485, coil: 3 }}
    start: a > 0W
    stop: a < 0W
"
    ));
    let (id, _) = site.device("rs485").unwrap();
    let link = ModbusLink::new(site.clone(), id, ModbusOptions::default()).unwrap();
    let stats = link.stats();
    let dispatcher = Dispatcher::new(site.clone(), ActuatorOptions::default());
    let (tx, mut events) = mpsc::channel(256);
    let cancel = CancellationToken::new();
    let task = tokio::spawn(link.run(
        dispatcher.device(id).unwrap(),
        tx,
        Clock::anchored(Timestamp(1_780_000_000_000)),
        cancel.clone(),
    ));

    let readback = wait_for(&mut events, Duration::from_secs(10), |e| match e {
        SourceEvent::Readback { values, .. } => Some(values.clone()),
        _ => None,
    })
    .await;
    assert_eq!(readback[0].value, Some(0.0));
    let (a, b) = (site.point("a").unwrap().0, site.point("b").unwrap().0);
    let mut got = (None, None);
    while got.0.is_none() || got.1.is_none() {
        let (p, v) = wait_for(&mut events, Duration::from_secs(10), |e| match e {
            SourceEvent::Sample { point, value, .. } => Some((*point, *value)),
            _ => None,
        })
        .await;
        if p == a {
            got.0 = Some(v);
        } else if p == b {
            got.1 = Some(v);
        }
    }
    assert_eq!(got, (Some(258.0), Some(-250.0)));

    dispatcher.apply(&Decisions {
        now: Timestamp(1_780_000_000_000),
        loads: vec![LoadDecision { command: Command::On, reason: Reason::Started }],
        inverter_limit: None,
        limit_reason: LimitReason::None,
        mode: Mode::Normal,
        surplus: Power::ZERO,
        grid: None,
        switchings: Vec::new(),
    });
    // Wait until the responder has the coil on (it answers before we look).
    let deadline = tokio::time::Instant::now() + Duration::from_secs(10);
    while slave.lock().unwrap().coils.get(&3) != Some(&true) {
        assert!(tokio::time::Instant::now() < deadline, "coil never switched");
        tokio::task::yield_now().await;
        let _ = tokio::time::timeout(Duration::from_millis(20), events.recv()).await;
    }
    cancel.cancel();
    task.await.unwrap();

    let s = slave.lock().unwrap();
    assert_eq!(s.bad_crc, 0, "every frame the link sent carried a valid CRC-16/MODBUS");
    // The frames on the wire, without their CRC: read coil 3 (the start-up read-back),
    // read holding 10..=11 (one request for both points), write coil 3 on (0xFF00).
    // Source: Modbus Application Protocol Specification V1.1b3, §6.1, §6.3, §6.5.
    assert_eq!(s.frames[0], vec![7, 1, 0, 3, 0, 1]);
    assert!(s.frames.contains(&vec![7, 3, 0, 10, 0, 2]));
    assert!(s.frames.contains(&vec![7, 5, 0, 3, 0xFF, 0x00]));
    assert_eq!(stats.counts().timeouts, 0);
    drop(slave_end);
    responder.abort();
}

/// The links of every Modbus device of a site, sharing serial lines as the daemon does.
struct Running {
    events: mpsc::Receiver<SourceEvent>,
    stats: Vec<(String, Arc<spillway::sources::LinkStats>)>,
    cancel: CancellationToken,
    tasks: Vec<tokio::task::JoinHandle<()>>,
}

impl Running {
    fn start(site: &Arc<spillway::config::model::Site>) -> Running {
        Self::with(site, ModbusOptions::default())
    }

    fn with(site: &Arc<spillway::config::model::Site>, options: ModbusOptions) -> Running {
        let lines = SerialLines::new();
        let dispatcher = Dispatcher::new(site.clone(), ActuatorOptions::default());
        let (tx, events) = mpsc::channel(1024);
        let cancel = CancellationToken::new();
        let mut stats = Vec::new();
        let mut tasks = Vec::new();
        for (i, d) in site.devices.iter().enumerate() {
            let id = spillway::config::model::DeviceId(i);
            let link = ModbusLink::sharing(site.clone(), id, options, &lines).unwrap();
            stats.push((d.name.clone(), link.stats()));
            let commands = dispatcher.device(id).unwrap();
            let clock = Clock::anchored(Timestamp(1_780_000_000_000));
            tasks.push(tokio::spawn(link.run(commands, tx.clone(), clock, cancel.clone())));
        }
        Running { events, stats, cancel, tasks }
    }

    async fn stop(self) {
        self.cancel.cancel();
        for t in self.tasks {
            t.await.unwrap();
        }
    }
}

#[tokio::test]
async fn devices_on_one_serial_port_share_its_line_and_are_asked_in_turn() {
    // One RS-485 line: a meter (unit 1), a relay module (unit 3) and a sensor (unit 4)
    // answer; a fourth device (unit 5) is configured but absent. The port opens once
    // (tokio-serial opens it exclusively: a second open fails), every present device
    // is read, and the absent one goes down alone.
    let (master, slave_end) = SerialStream::pair().unwrap();
    let path = slave_end.name().unwrap();
    let unit = |u: u8| Arc::new(Mutex::new(Slave { unit: u, ..Slave::default() }));
    let (meter, relays, sensor) = (unit(1), unit(3), unit(4));
    meter.lock().unwrap().holding.insert(100, 1234);
    relays.lock().unwrap().coils.insert(0, true);
    sensor.lock().unwrap().holding.insert(0, 215);
    let responder = tokio::spawn(respond_all(master, vec![meter.clone(), relays.clone(), sensor.clone()]));
    let port = format!("{{ port: {path}, baud: 19200, parity: even }}");
    let site = site(&format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter:   {{ modbus_rtu: {port}, unit: 1, poll: 1s, timeout: 300ms }}
  relays:  {{ modbus_rtu: {port}, unit: 3, timeout: 300ms }}
  sensors: {{ modbus_rtu: {port}, unit: 4, poll: 1s, timeout: 300ms }}
  spare:   {{ modbus_rtu: {port}, unit: 5, poll: 1s, timeout: 300ms }}
points:
  meter_w: {{ device: meter, register: 100, unit: W }}
  tank: {{ device: sensors, register: 0, table: input, type: i16, scale: 0.1, unit: °C }}
  other: {{ device: spare, register: 0, unit: W }}
loads:
  - name: heater
    priority: 1
    rated: 1kW
    switch: {{ device: relays, coil: 0 }}
    start: meter_w > 0W
    stop: meter_w < 0W
"
    ));
    let mut run = Running::start(&site);
    let (meter_w, tank) = (site.point("meter_w").unwrap().0, site.point("tank").unwrap().0);
    let spare = site.device("spare").unwrap().0;
    let (mut got_meter, mut got_tank, mut readback, mut spare_down) = (None, None, None, None);
    while got_meter.is_none() || got_tank.is_none() || readback.is_none() || spare_down.is_none() {
        let ev = wait_for(&mut run.events, Duration::from_secs(20), |e| Some(e.clone())).await;
        match ev {
            SourceEvent::Sample { point, value, .. } if point == meter_w => got_meter = Some(value),
            SourceEvent::Sample { point, value, .. } if point == tank => got_tank = Some(value),
            SourceEvent::Readback { values, .. } => readback = Some(values[0].value),
            SourceEvent::DeviceDown { device, reason } => {
                assert_eq!(device, spare, "only the absent device goes down: {reason}");
                spare_down = Some(reason);
            }
            _ => {}
        }
    }
    assert_eq!(got_meter, Some(1234.0));
    assert!((got_tank.unwrap() - 21.5).abs() < 1e-9);
    assert_eq!(readback, Some(Some(1.0)), "the relay module's coil read back through the shared line");
    assert_eq!(spare_down.as_deref(), Some("no answer within 300 ms"));
    for (name, s) in &run.stats {
        assert_eq!(s.counts().transport_errors, 0, "{name}: the port opened once, for all of them");
    }
    run.stop().await;
    // Every frame on the line carried a valid CRC, and named its own device's unit.
    let m = meter.lock().unwrap();
    assert_eq!(m.bad_crc, 0);
    let units: std::collections::BTreeSet<u8> = m.frames.iter().map(|f| f[0]).collect();
    assert_eq!(units, [1, 3, 4, 5].into_iter().collect());
    drop(slave_end);
    responder.abort();
}

#[tokio::test]
async fn answers_with_bad_checksums_are_reported_as_such_not_as_silence() {
    // A device whose answers arrive with a checksum that does not match them, as a
    // line at the wrong baud rate or parity or with swapped A/B wires delivers them.
    // The link counts them as malformed and says what to check; `spillway read`'s
    // probe says the same.
    let (master, slave_end) = SerialStream::pair().unwrap();
    let path = slave_end.name().unwrap();
    let meter = Arc::new(Mutex::new(Slave { unit: 1, corrupt_answers: true, ..Slave::default() }));
    meter.lock().unwrap().holding.insert(100, 1234);
    let responder = tokio::spawn(respond_all(master, vec![meter.clone()]));
    let site = site(&format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter: {{ modbus_rtu: {{ port: {path}, baud: 19200 }}, unit: 1, poll: 1s, timeout: 200ms }}
points:
  meter_w: {{ device: meter, register: 100, unit: W }}
"
    ));
    let advice = "answers with bad checksums: check baud, parity, stop bits, the A/B polarity and termination";
    let meter_id = site.device("meter").unwrap().0;
    let probed = spillway::sources::modbus::probe::probe(&site, meter_id, Duration::from_secs(3)).await.unwrap();
    assert_eq!(probed.points[0].value, Err(advice.to_owned()));

    let mut run = Running::start(&site);
    let reason = wait_for(&mut run.events, Duration::from_secs(20), |e| match e {
        SourceEvent::DeviceDown { reason, .. } => Some(reason.clone()),
        _ => None,
    })
    .await;
    assert_eq!(reason, advice);
    let counts = run.stats[0].1.counts();
    assert!(counts.malformed >= 1, "{counts}");
    assert_eq!(counts.timeouts, 0, "a garbled answer is not silence: {counts}");
    run.stop().await;
    drop(slave_end);
    responder.abort();
}

#[tokio::test]
async fn a_port_held_by_another_process_is_named_as_in_use() {
    // `spillway read` while the controller runs: the port is held (here by an open of
    // our own, which takes the same exclusive lock). The reason says what holds it
    // most likely, and how to stop it.
    let (_master, slave_end) = SerialStream::pair().unwrap();
    let path = slave_end.name().unwrap();
    let held = SerialStream::open(&tokio_serial::new(&path, 19200)).unwrap();
    let site = site(&format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter: {{ modbus_rtu: {{ port: {path}, baud: 19200 }}, unit: 1 }}
points:
  meter_w: {{ device: meter, register: 100, unit: W }}
"
    ));
    let meter = site.device("meter").unwrap().0;
    let err = spillway::sources::modbus::probe::probe(&site, meter, Duration::from_secs(3)).await.unwrap_err();
    assert_eq!(
        err.to_string(),
        format!(
            "cannot connect to {path} unit 1: the serial port is in use — is the controller running? (`systemctl stop spillway`)"
        )
    );
    drop(held);
}

#[test]
fn check_and_the_record_show_each_serial_device_with_its_parity_and_stop_bits() {
    // The commissioning record (`read --record`) embeds the same description.
    let site = site(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter: { modbus_rtu: { port: /dev/ttyUSB0, baud: 19200, parity: even }, unit: 1 }
  relays: { modbus_rtu: { port: /dev/ttyUSB1, stop_bits: 2 }, unit: 3 }
points:
  meter_w: { device: meter, register: 100, unit: W }
loads:
  - name: heater
    priority: 1
    rated: 1kW
    switch: { device: relays, coil: 0 }
    start: meter_w > 0W
    stop: meter_w < 0W
",
    );
    let text = spillway::config::describe::describe(&site);
    assert!(text.contains("Modbus RTU /dev/ttyUSB0 19200 Bd, even parity, 1 stop bit, unit 1"), "{text}");
    assert!(text.contains("Modbus RTU /dev/ttyUSB1 9600 Bd, no parity, 2 stop bits, unit 3"), "{text}");
}

#[tokio::test]
async fn read_names_the_exception_a_device_answers_and_what_to_check() {
    // A gateway whose device behind it is silent answers exception 0x0B to every
    // request, SunSpec discovery's included; a busy device answers 0x06. `read` names
    // the exception with the daemon's advice instead of "no SunSpec marker".
    // Codes and meanings: Modbus Application Protocol Specification V1.1b3, §7.
    let (master, slave_end) = SerialStream::pair().unwrap();
    let path = slave_end.name().unwrap();
    let gateway = Arc::new(Mutex::new(Slave { unit: 1, refuse_all: Some(0x0B), ..Slave::default() }));
    let busy = Arc::new(Mutex::new(Slave { unit: 2, refuse_all: Some(0x06), ..Slave::default() }));
    let responder = tokio::spawn(respond_all(master, vec![gateway, busy]));
    let site = site(&format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter: {{ modbus_rtu: {{ port: {path}, baud: 19200 }}, unit: 1, sunspec: true }}
  sensor: {{ modbus_rtu: {{ port: {path}, baud: 19200 }}, unit: 2 }}
points:
  meter_w: {{ device: meter, sunspec: 201.W }}
  temp: {{ device: sensor, register: 0, unit: °C }}
"
    ));
    let probe = |name: &str| {
        let id = site.device(name).unwrap().0;
        let site = site.clone();
        async move { spillway::sources::modbus::probe::probe(&site, id, Duration::from_secs(3)).await.unwrap() }
    };
    let meter = probe("meter").await;
    assert_eq!(
        meter.points[0].value,
        Err("answers every request with exception 0x0B (gateway target device failed to respond): check the device behind the gateway: its power, its wiring to the gateway and its unit id (1)".to_owned())
    );
    let sensor = probe("sensor").await;
    assert_eq!(
        sensor.points[0].value,
        Err("exception ServerDeviceBusy 0x06 (server device busy): the device reports a failure or is busy (restarting?): check the device; Spillway keeps asking".to_owned())
    );
    drop(slave_end);
    responder.abort();
}
