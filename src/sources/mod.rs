//! Protocol links: Modbus (TCP, RTU, SunSpec) and MQTT — bytes in, [`SourceEvent`]s out.
//!
//! Each link is a struct with an async `run` method that the daemon spawns; the library
//! spawns nothing. A link reads its points, turns registers and payloads into samples in
//! base units, writes the desired state of the actuators on its transport (one
//! connection per device carries both directions), reconnects with capped backoff, and
//! decides nothing: what to write comes in on a `watch` channel (latest wins), what was
//! seen leaves as events on an `mpsc` channel.
//!
//! Time stamps come from an injected [`Clock`], so tests on a paused tokio clock stay
//! deterministic.

pub mod backoff;
pub mod clock;
pub mod modbus;
pub mod mqtt;

use std::fmt;
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use crate::config::model::{DeviceId, PointId};
use crate::units::Timestamp;

pub use backoff::{Backoff, BackoffPolicy};
pub use clock::Clock;
pub use modbus::{ExceptionName, ModbusLink, ModbusOptions, SerialLines};
pub use mqtt::{MqttLink, MqttOptions, OverrideAction, OverrideRequest};

/// Everything a link reports. One closed set, so the daemon's event loop is one `match`.
#[derive(Debug, Clone, PartialEq)]
pub enum SourceEvent {
    /// A measurement in the point's base unit (booleans 1.0/0.0). `NaN` means the
    /// device said "not implemented" or the value could not be decoded: the point is
    /// missing from now on, rather than stale only after its timeout.
    Sample {
        /// Which point.
        point: PointId,
        /// Value in base units.
        value: f64,
        /// When it was read (the link's clock at the response).
        at: Timestamp,
    },
    /// The link (re)connected.
    DeviceUp {
        /// Which device (for MQTT: every MQTT device of the site, one event each).
        device: DeviceId,
    },
    /// The link is down; it will retry after the backoff it names.
    DeviceDown {
        /// Which device.
        device: DeviceId,
        /// Why, as a lowercase fragment.
        reason: String,
    },
    /// The MQTT broker connection is up (reported whether or not the site has MQTT
    /// devices: overrides and state travel over it too).
    BrokerUp,
    /// The MQTT broker connection is down; it will retry after its backoff.
    BrokerDown {
        /// Why, as a lowercase fragment.
        reason: String,
    },
    /// The device answered with a Modbus exception; counted, the link goes on.
    Exception {
        /// Which device.
        device: DeviceId,
        /// The request's function code.
        function: u8,
        /// First address of the request.
        address: u16,
        /// The exception, by its Modbus name.
        code: ExceptionName,
    },
    /// A payload or register block that could not be understood; counted and ignored.
    Malformed {
        /// Which device (for MQTT: the site's first MQTT device; `None` when the
        /// site has none and the payload came to an override topic).
        device: Option<DeviceId>,
        /// Where it came from: a topic, or `holding 40000+2`.
        origin: String,
        /// What was wrong.
        detail: String,
    },
    /// A point that cannot be read on this device (SunSpec model or point absent).
    Unresolved {
        /// Which point.
        point: PointId,
        /// Why.
        reason: String,
    },
    /// SunSpec discovery found the device's model chain.
    Discovered {
        /// Which device.
        device: DeviceId,
        /// The `SunS` marker's address.
        base: u16,
        /// Models in chain order: id and start address (of the ID register).
        models: Vec<(u16, u16)>,
    },
    /// Actuator state read back at start-up, before anything was commanded.
    Readback {
        /// Which device.
        device: DeviceId,
        /// What each configured actuator target holds now.
        values: Vec<Readback>,
    },
    /// A person asked for a load override (MQTT command topic).
    Override(OverrideRequest),
}

/// One actuator target's state as found on the device.
#[derive(Debug, Clone, PartialEq)]
pub struct Readback {
    /// The target, as `coil 3` or `holding 40010`.
    pub target: String,
    /// The raw value found (coils 1.0/0.0, registers decoded with the target's type
    /// and multiplied by its scale); `None` if the read failed.
    pub value: Option<f64>,
}

impl fmt::Display for Readback {
    /// `coil 2 on`, `holding 10 25`, `coil 3 not read`.
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.value {
            None => write!(f, "{} not read", self.target),
            Some(v) if self.target.starts_with("coil") => {
                write!(f, "{} {}", self.target, if v != 0.0 { "on" } else { "off" })
            }
            Some(v) => write!(f, "{} {}", self.target, crate::units::trim_number(v)),
        }
    }
}

/// Read-back values as one line for the log: `coil 2 on, holding 10 25`.
pub fn readback_text(values: &[Readback]) -> String {
    values.iter().map(ToString::to_string).collect::<Vec<_>>().join(", ")
}

/// Counters of one link, shared with whoever wants to show them.
#[derive(Debug, Default)]
pub struct LinkStats {
    requests: AtomicU64,
    exceptions: AtomicU64,
    timeouts: AtomicU64,
    transport_errors: AtomicU64,
    connects: AtomicU64,
    malformed: AtomicU64,
    samples: AtomicU64,
    writes: AtomicU64,
}

/// A copy of a link's counters at one moment.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct LinkCounts {
    /// Requests sent (Modbus) or messages published (MQTT).
    pub requests: u64,
    /// Modbus exception responses received.
    pub exceptions: u64,
    /// Requests that ran into their timeout.
    pub timeouts: u64,
    /// Transport errors (connection refused, reset, broker gone).
    pub transport_errors: u64,
    /// Successful connections, the first one included.
    pub connects: u64,
    /// Payloads or values that could not be understood.
    pub malformed: u64,
    /// Samples emitted.
    pub samples: u64,
    /// Writes sent to actuators.
    pub writes: u64,
}

impl LinkStats {
    /// A fresh set of counters behind an `Arc`.
    pub fn shared() -> Arc<LinkStats> {
        Arc::new(LinkStats::default())
    }

    /// The counters now.
    pub fn counts(&self) -> LinkCounts {
        let get = |a: &AtomicU64| a.load(Ordering::Relaxed);
        LinkCounts {
            requests: get(&self.requests),
            exceptions: get(&self.exceptions),
            timeouts: get(&self.timeouts),
            transport_errors: get(&self.transport_errors),
            connects: get(&self.connects),
            malformed: get(&self.malformed),
            samples: get(&self.samples),
            writes: get(&self.writes),
        }
    }

    pub(crate) fn count(&self, which: Counter) {
        let a = match which {
            Counter::Request => &self.requests,
            Counter::Exception => &self.exceptions,
            Counter::Timeout => &self.timeouts,
            Counter::TransportError => &self.transport_errors,
            Counter::Connect => &self.connects,
            Counter::Malformed => &self.malformed,
            Counter::Sample => &self.samples,
            Counter::Write => &self.writes,
        };
        a.fetch_add(1, Ordering::Relaxed);
    }
}

/// Which counter to bump.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Counter {
    Request,
    Exception,
    Timeout,
    TransportError,
    Connect,
    Malformed,
    Sample,
    Write,
}

impl fmt::Display for LinkCounts {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{} requests, {} exceptions, {} timeouts, {} transport errors, {} connects, {} malformed, {} samples, {} writes",
            self.requests,
            self.exceptions,
            self.timeouts,
            self.transport_errors,
            self.connects,
            self.malformed,
            self.samples,
            self.writes
        )
    }
}
