//! Modbus links (TCP and RTU): grouped polling, SunSpec discovery, and the writes of
//! the device's actuators over the same connection.

pub mod codec;
mod link;
pub mod plan;
pub mod probe;
pub mod sunspec;

use std::fmt;
use std::time::Duration;

pub use link::ModbusLink;

use super::BackoffPolicy;

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
