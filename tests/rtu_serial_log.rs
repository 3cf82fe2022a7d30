//! The log of a serial device that stays silent: the port's opening is logged once,
//! not a connection per retry. A test binary of its own: log capture is per thread, but
//! tracing caches per call site whether anyone listens, and a test running beside it
//! on another thread could hit these call sites first with nobody listening.

mod support;

use std::sync::{Arc, Mutex};
use std::time::Duration;

use spillway::actuators::{ActuatorOptions, Dispatcher};
use spillway::config::model::DeviceId;
use spillway::sources::{BackoffPolicy, Clock, ModbusLink, ModbusOptions, SerialLines};
use spillway::units::Timestamp;
use support::rtu::{Slave, respond_all};
use support::{Logs, site};
use tokio::sync::mpsc;
use tokio_serial::{SerialPort, SerialStream};
use tokio_util::sync::CancellationToken;

#[tokio::test]
async fn a_silent_serial_device_logs_the_port_opening_once_not_a_connection_per_retry() {
    // The meter is set to unit 2; the only device on the line is unit 1: every request
    // goes unanswered and the link retries. Opening a serial port says nothing about
    // the device, so it is logged as the port opening, once, not as a connection.
    let (logs, _guard) = Logs::capture();
    let (master, slave_end) = SerialStream::pair().unwrap();
    let path = slave_end.name().unwrap();
    let other = Arc::new(Mutex::new(Slave { unit: 1, ..Slave::default() }));
    let responder = tokio::spawn(respond_all(master, vec![other]));
    let site = site(&format!(
        "
site:
  name: Bench
  timezone: Europe/Lisbon
  export: allowed
devices:
  meter: {{ modbus_rtu: {{ port: {path}, baud: 19200 }}, unit: 2, poll: 1s, timeout: 50ms }}
points:
  meter_w: {{ device: meter, register: 100, unit: W }}
"
    ));
    let fast = ModbusOptions {
        backoff: BackoffPolicy { initial: Duration::from_millis(20), max: Duration::from_millis(40) },
        ..ModbusOptions::default()
    };
    let dispatcher = Dispatcher::new(site.clone(), ActuatorOptions::default());
    let link = ModbusLink::sharing(site.clone(), DeviceId(0), fast, &SerialLines::new()).unwrap();
    let stats = link.stats();
    let (tx, mut events) = mpsc::channel(1024);
    let cancel = CancellationToken::new();
    let clock = Clock::anchored(Timestamp(1_780_000_000_000));
    let task = tokio::spawn(link.run(dispatcher.device(DeviceId(0)).unwrap(), tx, clock, cancel.clone()));
    let deadline = tokio::time::Instant::now() + Duration::from_secs(20);
    while stats.counts().timeouts < 4 {
        assert!(tokio::time::Instant::now() < deadline, "the link never retried: {}", stats.counts());
        let _ = tokio::time::timeout(Duration::from_millis(20), events.recv()).await;
    }
    cancel.cancel();
    task.await.unwrap();
    let text = logs.text();
    let opened = text.lines().filter(|l| l.contains(" INFO ") && l.contains("serial port opened")).count();
    assert_eq!(opened, 1, "{text}");
    assert!(!text.contains("modbus device connected"), "{text}");
    drop(slave_end);
    responder.abort();
}
