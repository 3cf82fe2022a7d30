//! Modbus links (TCP and RTU): grouped polling, SunSpec discovery, and the writes of
//! the device's actuators over the same connection.

pub mod codec;
mod link;
pub mod plan;
pub mod probe;
pub mod serial;
pub mod sunspec;

use std::fmt;
use std::io;
use std::time::Duration;

use tokio_modbus::client::Context;

pub use link::ModbusLink;
pub use serial::SerialLines;

use super::BackoffPolicy;
use crate::config::model::Link;

/// Tuning of a Modbus link.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ModbusOptions {
    /// Reconnect delays.
    pub backoff: BackoffPolicy,
    /// Longest wait for a TCP connection or for opening a serial port.
    pub connect_timeout: Duration,
}

impl Default for ModbusOptions {
    fn default() -> Self {
        ModbusOptions { backoff: BackoffPolicy::default(), connect_timeout: Duration::from_secs(3) }
    }
}

/// Why a Modbus link cannot be built for a device.
#[derive(Debug, thiserror::Error, PartialEq, Eq)]
pub enum ModbusError {
    /// The device id is not in the site.
    #[error("device #{0} is not in the site")]
    NoSuchDevice(usize),
    /// The device is reached over MQTT, not Modbus.
    #[error("device \"{0}\" is an MQTT device: give it to the MQTT link")]
    NotModbus(String),
}

/// A Modbus exception code, shown by its name in the Modbus specification.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct ExceptionName(pub u8);

impl ExceptionName {
    /// The name. Source: Modbus Application Protocol Specification V1.1b3, §7
    /// "MODBUS Exception Responses" (codes 01–0B).
    pub fn name(self) -> &'static str {
        match self.0 {
            0x01 => "IllegalFunction",
            0x02 => "IllegalDataAddress",
            0x03 => "IllegalDataValue",
            0x04 => "ServerDeviceFailure",
            0x05 => "Acknowledge",
            0x06 => "ServerDeviceBusy",
            0x08 => "MemoryParityError",
            0x0A => "GatewayPathUnavailable",
            0x0B => "GatewayTargetDeviceFailedToRespond",
            _ => "Unknown",
        }
    }

    /// The code and its meaning as a person reads them: `0x0B (gateway target device
    /// failed to respond)`. Same source as [`ExceptionName::name`].
    pub fn phrase(self) -> String {
        let meaning = match self.0 {
            0x01 => "illegal function",
            0x02 => "illegal data address",
            0x03 => "illegal data value",
            0x04 => "server device failure",
            0x05 => "acknowledge",
            0x06 => "server device busy",
            0x08 => "memory parity error",
            0x0A => "gateway path unavailable",
            0x0B => "gateway target device failed to respond",
            _ => "not a code the Modbus specification defines",
        };
        format!("0x{:02X} ({meaning})", self.0)
    }

    /// Whether the exception answers the request rather than reports on the device:
    /// 0x01–0x03 (a function, address or value the device does not have) and 0x05
    /// (accepted, still working). A device that sends one has looked the request up.
    /// Common practice; the codes' meanings are the specification's (above).
    pub fn is_about_request(self) -> bool {
        matches!(self.0, 0x01..=0x03 | 0x05)
    }

    /// What to check when a device answers nothing but this exception, for unit `unit`.
    /// The readings are common practice: 0x0A/0x0B come from a gateway on behalf of the
    /// device behind it, 0x04/0x06 from a device that is up but not itself (restarting,
    /// busy), 0x01–0x03 from a device asked for something it does not have.
    pub fn advice(self, unit: u8) -> String {
        match self.0 {
            0x0B => format!(
                "check the device behind the gateway: its power, its wiring to the gateway and its unit id ({unit})"
            ),
            0x0A => format!("the gateway has no path to unit {unit}: check the gateway's settings and the unit id"),
            0x04 | 0x06 => {
                "the device reports a failure or is busy (restarting?): check the device; Spillway keeps asking"
                    .to_owned()
            }
            0x01..=0x03 => format!(
                "check unit id {unit} and the points' registers, tables and types against the device's register map"
            ),
            _ => "check the device and its unit id".to_owned(),
        }
    }
}

impl ExceptionName {
    /// What a device that answers every request with this exception is told, the same
    /// words in the daemon's down reason and in `spillway read`: `answers every request
    /// with exception 0x0B (gateway target device failed to respond): check …`.
    pub fn every_request(self, unit: u8) -> String {
        format!("answers every request with exception {}: {}", self.phrase(), self.advice(unit))
    }

    /// One answer's exception as `read` shows it: by name, and for an exception about
    /// the device rather than the request, with what to check.
    pub fn answer(self, unit: u8) -> String {
        if self.is_about_request() {
            format!("exception {self}")
        } else {
            format!("exception {self} {}: {}", self.phrase(), self.advice(unit))
        }
    }
}

impl From<tokio_modbus::ExceptionCode> for ExceptionName {
    fn from(code: tokio_modbus::ExceptionCode) -> Self {
        ExceptionName(u8::from(code))
    }
}

impl fmt::Display for ExceptionName {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.name() {
            "Unknown" => write!(f, "exception 0x{:02X}", self.0),
            n => f.write_str(n),
        }
    }
}

/// Opens a device's Modbus transport for its unit: a TCP connection, or the device's
/// place on its serial line (shared with the other devices on the port, each request
/// then under `limit`); the callers bound the wait with their own connect timeout.
async fn connect(link: &Link, lines: &SerialLines, limit: Duration) -> io::Result<Context> {
    match link {
        Link::ModbusTcp { host, port, unit } => {
            let addr = tokio::net::lookup_host((host.as_str(), *port))
                .await?
                .next()
                .ok_or_else(|| io::Error::other(format!("{host} has no address")))?;
            let stream = tokio::net::TcpStream::connect(addr).await?;
            // Request and response are small; do not let Nagle hold a write back.
            stream.set_nodelay(true)?;
            Ok(tokio_modbus::client::tcp::attach_slave(stream, tokio_modbus::Slave(*unit)))
        }
        Link::ModbusRtu { unit, .. } => match lines.line(link) {
            Some(line) => line.attach(*unit, limit).await,
            None => Err(io::Error::other("not a serial link")),
        },
        Link::Mqtt => Err(io::Error::other("not a Modbus device")),
    }
}
