//! Modbus RTU: the CRC against its published check value, and a full request/response
//! exchange of the link over a pseudo-terminal pair standing in for the serial line.
//!
//! This test runs on the real clock: bytes cross a pseudo-terminal through the
//! kernel's tty layer asynchronously, so a paused clock would fire request timeouts
//! before the reply is readable. It waits only for events, never for a fixed time.

mod support;

use std::sync::{Arc, Mutex};
use std::time::Duration;

use spillway::actuators::{ActuatorOptions, Dispatcher};
use spillway::engine::{Command, Decisions, LimitReason, LoadDecision, Mode, Reason};
use spillway::sources::{Clock, ModbusLink, ModbusOptions, SourceEvent};
use spillway::units::{Power, Timestamp};
use support::rtu::{Slave, crc16_modbus, respond};
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
