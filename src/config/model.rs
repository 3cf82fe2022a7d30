//! The checked site model: what a site file means once every name, unit and rule
//! has been resolved. Built by [`super::load`], never deserialised directly.
//!
//! Everything downstream (engine, sources, actuators, offline runs) reads this model
//! and nothing else from the file. Identifiers are indexes into the site's vectors.

use std::time::Duration;

use chrono::NaiveTime;
use chrono_tz::Tz;

use crate::rules::{Rule, Slot};
use crate::units::{Current, Dimension, Energy, Power, Ratio, Temperature, Voltage};

/// Index of a device in [`Site::devices`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct DeviceId(pub usize);

/// Index of a point in [`Site::points`]; also the point's slot in the value table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct PointId(pub usize);

/// Index of a load in [`Site::loads`] (which is in priority order).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct LoadId(pub usize);

/// A whole site, checked.
#[derive(Debug, Clone)]
pub struct Site {
    /// A person's name for the site.
    pub name: String,
    /// The site's time zone; time windows and daily counters follow it, DST included.
    pub timezone: Tz,
    /// How the site is connected.
    pub connection: Connection,
    /// The grid power the controller aims for while diverting (a small import).
    pub import_target: Power,
    /// How fast and how hard the export guard acts.
    pub guard: GuardSettings,
    /// What happens when measurements go stale.
    pub failsafe: FailsafeSettings,
    /// The engine's period.
    pub tick: Duration,
    /// Devices the points are read from and the actuators written to.
    pub devices: Vec<Device>,
    /// Named measurements, in file order.
    pub points: Vec<Point>,
    /// Which points play the site-level roles (grid, PV, battery …).
    pub roles: Roles,
    /// Managed loads, highest priority first.
    pub loads: Vec<Load>,
    /// The inverter's active-power limit, when the site may curtail.
    pub inverter: Option<InverterControl>,
    /// Where every name a rule can use lives in the engine's value table.
    pub slots: SlotLayout,
    /// The MQTT connection for sources, actuators, state and overrides.
    pub mqtt: Option<MqttSettings>,
}

impl Site {
    /// The `battery_power` point of a battery that runs itself: on a grid-tied site where
    /// no load is a battery (a battery Spillway commands is a managed load instead), a
    /// battery that is read is one on its own control (a hybrid inverter in
    /// self-consumption mode). Its discharge counts as import for the loads.
    pub fn self_run_battery(&self) -> Option<PointId> {
        let grid_tied = matches!(self.connection, Connection::Grid { .. });
        let battery_load = self.loads.iter().any(|l| matches!(l.kind, LoadKind::Battery { .. }));
        self.roles.battery_power.filter(|_| grid_tied && !battery_load)
    }

    /// The load called `name`.
    pub fn load(&self, name: &str) -> Option<(LoadId, &Load)> {
        self.loads.iter().enumerate().find(|(_, l)| l.name == name).map(|(i, l)| (LoadId(i), l))
    }
    /// The point called `name`.
    pub fn point(&self, name: &str) -> Option<(PointId, &Point)> {
        self.points.iter().enumerate().find(|(_, p)| p.name == name).map(|(i, p)| (PointId(i), p))
    }
    /// The device called `name`.
    pub fn device(&self, name: &str) -> Option<(DeviceId, &Device)> {
        self.devices.iter().enumerate().find(|(_, d)| d.name == name).map(|(i, d)| (DeviceId(i), d))
    }
    /// The export limit: `None` when export is allowed without limit.
    pub fn export_limit(&self) -> Option<Power> {
        match self.connection {
            Connection::Grid { export, .. } => export.limit(),
            Connection::OffGrid(_) => None,
        }
    }
}

/// How a site is connected.
#[derive(Debug, Clone, PartialEq)]
pub enum Connection {
    /// Connected to the grid through a meter.
    Grid {
        /// Whether and how much may be exported.
        export: ExportPolicy,
        /// A battery-backed site that keeps running through a grid outage.
        backup: Option<BackupSettings>,
    },
    /// No grid: surplus is inferred from the battery.
    OffGrid(OffGridSettings),
}

/// What the site may feed into the grid.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ExportPolicy {
    /// Export is fine (loads still soak up surplus when the rules say so).
    Allowed,
    /// Export must stay at or below this power.
    Limited(Power),
    /// No export at all (a limit of 0 W).
    Forbidden,
}

impl ExportPolicy {
    /// The power export must stay under, if any.
    pub fn limit(self) -> Option<Power> {
        match self {
            ExportPolicy::Allowed => None,
            ExportPolicy::Limited(p) => Some(p),
            ExportPolicy::Forbidden => Some(Power::ZERO),
        }
    }
}

/// Behaviour of a battery-backed site during a grid outage.
#[derive(Debug, Clone, PartialEq)]
pub struct BackupSettings {
    /// While the grid is down, loads marked `shed` are switched off lowest priority
    /// first, one every this often (0 = all at once).
    pub shed_interval: Duration,
}

/// How an off-grid site judges that its battery can spare power.
#[derive(Debug, Clone, PartialEq)]
pub struct OffGridSettings {
    /// Battery voltage at or above which the charger is in absorption/float.
    pub float_voltage: Voltage,
    /// Hysteresis below `float_voltage` before leaving float.
    pub float_hysteresis: Voltage,
    /// State of charge at or above which the battery counts as full.
    pub full_soc: Ratio,
    /// Power the battery would accept while not yet full (reserved for it).
    pub charge_acceptance: Power,
    /// Power assumed to be held back by the charge controller while in float.
    pub float_headroom: Power,
}

/// Export guard tuning.
#[derive(Debug, Clone, PartialEq)]
pub struct GuardSettings {
    /// Export at or below this power (above the limit) is treated as measurement noise.
    pub tolerance: Power,
    /// How far under a non-zero export limit the guard holds export once it curtails: far
    /// enough that meter noise does not carry the reading past limit + tolerance.
    pub margin: Power,
    /// If export persists this long after the guard acted, it escalates to the safe limit.
    pub deadline: Duration,
    /// How fast a curtailment is released once import returns (W per second).
    pub release_rate: Power,
    /// PI gains for proportional loads holding the grid at the import target.
    pub kp: f64,
    /// Integral gain, per second.
    pub ki: f64,
}

/// Fail-safe tuning.
#[derive(Debug, Clone, PartialEq)]
pub struct FailsafeSettings {
    /// Default age after which a point counts as stale.
    pub stale_after: Duration,
    /// How long after recovery loads are held before rules take over again, so that a
    /// returning meter does not cause a burst of switchings.
    pub recovery_hold: Duration,
}

/// Which points play site-level roles. Points take a role by their reserved name.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Roles {
    /// Grid power at the connection point, import positive (`grid`).
    pub grid: Option<PointId>,
    /// PV AC output (`pv`).
    pub pv: Option<PointId>,
    /// What the PV could produce if not curtailed (`pv_available`).
    pub pv_available: Option<PointId>,
    /// Battery state of charge (`battery_soc`).
    pub battery_soc: Option<PointId>,
    /// Battery voltage (`battery_voltage`).
    pub battery_voltage: Option<PointId>,
    /// Battery current, charging positive (`battery_current`).
    pub battery_current: Option<PointId>,
    /// Battery power, charging positive (`battery_power`).
    pub battery_power: Option<PointId>,
    /// 1 while the grid is up (`grid_available`).
    pub grid_available: Option<PointId>,
}

/// The reserved point names that take a role, with their dimension.
pub const ROLE_NAMES: &[(&str, Dimension)] = &[
    ("grid", Dimension::Power),
    ("pv", Dimension::Power),
    ("pv_available", Dimension::Power),
    ("battery_soc", Dimension::Ratio),
    ("battery_voltage", Dimension::Voltage),
    ("battery_current", Dimension::Current),
    ("battery_power", Dimension::Power),
    ("grid_available", Dimension::Scalar),
];

/// A device: where points are read and actuators written.
#[derive(Debug, Clone, PartialEq)]
pub struct Device {
    /// The device's name in the site file.
    pub name: String,
    /// How to reach it.
    pub link: Link,
    /// How often its points are read unless a point says otherwise.
    pub poll: Duration,
    /// How long one request may take before it counts as failed.
    pub timeout: Duration,
    /// Whether the device speaks the SunSpec information model (points and the
    /// inverter limit may then be named by model and point).
    pub sunspec: bool,
}

/// The transport to a device.
#[derive(Debug, Clone, PartialEq)]
pub enum Link {
    /// Modbus over TCP.
    ModbusTcp {
        /// Host name or address.
        host: String,
        /// TCP port (502 by default).
        port: u16,
        /// Modbus unit identifier.
        unit: u8,
    },
    /// Modbus RTU over a serial line.
    ModbusRtu {
        /// Serial device path (`/dev/ttyUSB0`).
        path: String,
        /// Baud rate.
        baud: u32,
        /// Parity.
        parity: Parity,
        /// Stop bits (1 or 2).
        stop_bits: u8,
        /// Modbus unit identifier.
        unit: u8,
    },
    /// Topics on the site's MQTT broker.
    Mqtt,
}

impl Link {
    /// A serial link's settings as a person reads them: `19200 Bd, even parity, 1 stop
    /// bit` (Modbus RTU always sends 8 data bits). `None` for other links.
    pub fn serial_framing(&self) -> Option<String> {
        match self {
            Link::ModbusRtu { baud, parity, stop_bits, .. } => {
                let p = match parity {
                    Parity::None => "no",
                    Parity::Even => "even",
                    Parity::Odd => "odd",
                };
                let s = if *stop_bits == 1 { "" } else { "s" };
                Some(format!("{baud} Bd, {p} parity, {stop_bits} stop bit{s}"))
            }
            _ => None,
        }
    }

    /// The Modbus unit identifier, for Modbus links.
    pub fn modbus_unit(&self) -> Option<u8> {
        match self {
            Link::ModbusTcp { unit, .. } | Link::ModbusRtu { unit, .. } => Some(*unit),
            Link::Mqtt => None,
        }
    }
}

/// Whether two serial port paths name one port: the same text, or two paths (a
/// `/dev/serial/by-id/…` link and the `/dev/ttyUSB0` it points to) that resolve to the
/// same file where both exist.
pub fn same_port(a: &str, b: &str) -> bool {
    if a == b {
        return true;
    }
    match (std::fs::canonicalize(a), std::fs::canonicalize(b)) {
        (Ok(x), Ok(y)) => x == y,
        _ => false,
    }
}

/// Serial parity.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Parity {
    /// No parity bit.
    None,
    /// Even parity.
    Even,
    /// Odd parity.
    Odd,
}

/// A named measurement.
#[derive(Debug, Clone, PartialEq)]
pub struct Point {
    /// The point's name; rules refer to it by this name.
    pub name: String,
    /// The device it is read from.
    pub device: DeviceId,
    /// Where on the device.
    pub read: PointRead,
    /// What the value measures (`Scalar` for booleans).
    pub dimension: Dimension,
    /// True for on/off values (coils, discrete inputs, `unit: bool`): rules see a boolean.
    pub boolean: bool,
    /// Factor from the configured unit to the base unit (1000 for `kW`).
    pub unit_factor: f64,
    /// How often to read it.
    pub poll: Duration,
    /// Age after which the value counts as stale.
    pub stale_after: Duration,
    /// How old the information is when a reading arrives: the meter's averaging period
    /// plus its reporting delay. The export guard waits for a reading taken wholly after
    /// its last correction before correcting again, so a slow meter cannot make it
    /// correct twice for the same excess.
    pub latency: Duration,
    /// A value that repeats exactly for this long counts as stale: a gateway that keeps
    /// serving its last reading after the meter behind it died, or a meter whose
    /// measurement has hung, answers every poll and would otherwise look alive.
    pub frozen_after: Option<Duration>,
}

/// Where a point's value comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum PointRead {
    /// A Modbus register, coil or discrete input.
    Modbus(ModbusRead),
    /// A point of a SunSpec model, found by discovery at start-up.
    SunSpec(SunSpecRead),
    /// An MQTT topic.
    Mqtt(MqttRead),
}

/// The four Modbus data tables.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Table {
    /// Coils (read fc 1, write fc 5/15).
    Coil,
    /// Discrete inputs (read fc 2).
    DiscreteInput,
    /// Input registers (read fc 4).
    InputRegister,
    /// Holding registers (read fc 3, write fc 6/16).
    HoldingRegister,
}

/// How register words encode a value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ValueType {
    /// One register, unsigned.
    U16,
    /// One register, two's complement.
    I16,
    /// Two registers, unsigned.
    U32,
    /// Two registers, two's complement.
    I32,
    /// Four registers, unsigned.
    U64,
    /// Two registers, IEEE 754 single precision.
    F32,
    /// A coil or discrete input.
    Bool,
}

impl ValueType {
    /// How many 16-bit registers the type spans (1 for bits).
    pub fn registers(self) -> u16 {
        match self {
            ValueType::U16 | ValueType::I16 | ValueType::Bool => 1,
            ValueType::U32 | ValueType::I32 | ValueType::F32 => 2,
            ValueType::U64 => 4,
        }
    }
}

/// Order of the 16-bit words of a multi-register value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum WordOrder {
    /// Most significant word first (Modbus convention, SunSpec).
    HighFirst,
    /// Least significant word first (some meters).
    LowFirst,
}

/// How a raw register value becomes the point's value.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Scale {
    /// Multiply by a constant.
    Factor(f64),
    /// Multiply by 10^sf, sf an i16 read from this register (SunSpec scale factors).
    Register {
        /// Table of the scale-factor register.
        table: Table,
        /// Address of the scale-factor register.
        address: u16,
    },
}

/// A point read from Modbus.
#[derive(Debug, Clone, PartialEq)]
pub struct ModbusRead {
    /// Which table.
    pub table: Table,
    /// Zero-based address (the protocol address, not a 4xxxx reference).
    pub address: u16,
    /// How the registers encode the value.
    pub value_type: ValueType,
    /// Word order for multi-register types.
    pub word_order: WordOrder,
    /// Raw value to configured unit.
    pub scale: Scale,
    /// A raw value (the register bits) that means "no reading": a charger that shows
    /// 0xFFFF for the SoC of a car it does not have.
    pub missing: Option<u64>,
}

/// A point named by SunSpec model and point name (`103.W`, `203.W`).
#[derive(Debug, Clone, PartialEq)]
pub struct SunSpecRead {
    /// Model number (1, 101–103, 201–204, …).
    pub model: u16,
    /// Point name as in the published model (`W`, `PhVphA`, `TotWhImp`).
    pub point: String,
}

/// MQTT quality of service.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Qos {
    /// At most once.
    AtMostOnce,
    /// At least once.
    AtLeastOnce,
    /// Exactly once.
    ExactlyOnce,
}

/// How an MQTT payload encodes a value.
#[derive(Debug, Clone, PartialEq)]
pub enum Payload {
    /// The payload is a plain number (`21.5`) or a word like `ON`/`OFF`/`true`.
    Plain,
    /// The payload is JSON; the value is at this JSON pointer (`/ENERGY/Power`).
    Json(String),
}

/// A point read from an MQTT topic.
#[derive(Debug, Clone, PartialEq)]
pub struct MqttRead {
    /// Topic to subscribe to (no wildcards).
    pub topic: String,
    /// Payload encoding.
    pub payload: Payload,
    /// Subscription QoS.
    pub qos: Qos,
}

/// Where a command is written.
#[derive(Debug, Clone, PartialEq)]
pub enum Write {
    /// A Modbus coil (fc 5).
    Coil {
        /// Device.
        device: DeviceId,
        /// Coil address.
        address: u16,
    },
    /// A Modbus holding register (fc 6, or 16 for multi-register types).
    Register {
        /// Device.
        device: DeviceId,
        /// Register address.
        address: u16,
        /// Encoding.
        value_type: ValueType,
        /// Word order.
        word_order: WordOrder,
        /// Register value = command value / scale.
        scale: f64,
    },
    /// An MQTT publication.
    Mqtt {
        /// Device (for its name in logs).
        device: DeviceId,
        /// Topic to publish to.
        topic: String,
        /// Payload for on (switches).
        on: String,
        /// Payload for off (switches).
        off: String,
        /// Payload template for values; `{value}` is replaced by the number.
        value: String,
        /// Retain flag.
        retain: bool,
        /// Publication QoS.
        qos: Qos,
    },
    /// The SunSpec inverter's active-power limit (models 123 and 704).
    SunSpecLimit {
        /// Device.
        device: DeviceId,
    },
}

impl Write {
    /// The device written to.
    pub fn device(&self) -> DeviceId {
        match self {
            Write::Coil { device, .. }
            | Write::Register { device, .. }
            | Write::Mqtt { device, .. }
            | Write::SunSpecLimit { device } => *device,
        }
    }
}

/// A managed load.
#[derive(Debug, Clone)]
pub struct Load {
    /// Name, unique in the site.
    pub name: String,
    /// Priority as written (1 = first); `Site::loads` is sorted by it.
    pub priority: u32,
    /// What kind of load and how it is commanded.
    pub kind: LoadKind,
    /// Its own power meter, if it has one (otherwise its rated/commanded power is assumed).
    pub power: Option<PointId>,
    /// The temperature its obligations watch (a tank's sensor).
    pub temperature: Option<PointId>,
    /// The tank's volume, litres, if given: lets a temperature `reach` top-up start
    /// just late enough.
    pub volume: Option<f64>,
    /// Condition to start (switched/stepped) or to enable (proportional).
    pub start: Option<RuleText>,
    /// Condition to stop.
    pub stop: Option<RuleText>,
    /// Condition that forces the load off whatever else holds (over-temperature,
    /// a fault input); beats overrides and obligations.
    pub inhibit: Option<RuleText>,
    /// Minimum time on once started.
    pub min_on: Duration,
    /// Minimum time off once stopped.
    pub min_off: Duration,
    /// At most this many starts in any rolling hour.
    pub max_starts_per_hour: Option<u32>,
    /// Daily and periodic duties.
    pub obligations: Vec<Obligation>,
    /// State to take when a signal the load depends on goes stale.
    pub safe_state: SafeState,
    /// Whether the load is shed during a grid outage on a backed-up site.
    pub shed_on_outage: bool,
}

/// A compiled rule together with the text it came from.
#[derive(Debug, Clone)]
pub struct RuleText {
    /// The compiled rule.
    pub rule: Rule,
    /// Where it was written (`loads[0].start`), for logs and reasons.
    pub origin: String,
}

/// What a load is and how it is commanded.
#[derive(Debug, Clone, PartialEq)]
pub enum LoadKind {
    /// On or off.
    Switched {
        /// Power drawn when on.
        rated: Power,
        /// The relay.
        switch: Write,
    },
    /// Several stages, each adding power (three elements of a heater).
    Stepped {
        /// Power drawn at each stage, cumulative and increasing (stage 1 = `stages[0]`).
        stages: Vec<Power>,
        /// One relay per stage (stage n closes the first n), or one register taking the stage number.
        command: StageCommand,
    },
    /// A continuously variable load driven by a setpoint in percent (a power regulator).
    Proportional {
        /// Power at 100 %.
        rated: Power,
        /// Lowest non-zero setpoint (below it the load is off).
        min: Ratio,
        /// Setpoint resolution.
        step: Ratio,
        /// Where the setpoint is written.
        setpoint: Write,
        /// An enable relay, if the device has one.
        enable: Option<Write>,
    },
    /// A charger commanded in amperes (an EV charger that cannot go below its minimum).
    Charger {
        /// Watts per ampere (voltage × phases).
        watts_per_amp: f64,
        /// Minimum charging current.
        min: Current,
        /// Maximum charging current.
        max: Current,
        /// Current resolution.
        step: Current,
        /// Where the current is written.
        setpoint: Write,
        /// An enable relay or contactor, if separate.
        enable: Option<Write>,
        /// Whether the charger may hold its minimum current on grid power when the
        /// surplus falls below it (rather than pausing).
        hold_min_from_grid: bool,
        /// The car's state of charge, where the charger (or the car) reports it: what a
        /// `reach: 80%` obligation watches.
        soc: Option<PointId>,
        /// The car's usable battery capacity, if given: lets a `reach: N%` top-up start
        /// just late enough.
        car_capacity: Option<Energy>,
    },
    /// A battery charged with a power setpoint within state-of-charge limits.
    Battery {
        /// Largest charge power.
        max_charge: Power,
        /// Least charge power worth starting at; once charging, it goes on down to half of
        /// it (so meter noise around zero surplus does not toggle it every few seconds).
        min_charge: Power,
        /// State of charge at which charging stops.
        soc_max: Ratio,
        /// State of charge below which charging may resume after reaching `soc_max`.
        soc_resume: Ratio,
        /// The state-of-charge point.
        soc: PointId,
        /// Usable capacity, if given: lets a `reach: N%` top-up start just late enough.
        capacity: Option<Energy>,
        /// Where the charge power is written (W).
        setpoint: Write,
        /// Whether, and how far, it may discharge to cover the house's own import.
        discharge: Option<Discharge>,
    },
}

/// A commanded battery's discharge: it covers what the house itself imports (never
/// what a managed load draws), down to a floor of charge, inside an optional window.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Discharge {
    /// Largest discharge power.
    pub max: Power,
    /// State of charge at which discharging stops; it resumes 5 points above it.
    pub soc_min: Ratio,
    /// Time of day it may discharge (all day if absent).
    pub window: Option<Window>,
}

impl Discharge {
    /// The band above `soc_min` a discharge stopped by it waits out before resuming, so a
    /// battery resting at its floor does not flick between charge and discharge.
    pub const RESUME_BAND_PCT: f64 = 5.0;
}

impl LoadKind {
    /// The most the load can draw.
    pub fn max_power(&self) -> Power {
        match self {
            LoadKind::Switched { rated, .. } | LoadKind::Proportional { rated, .. } => *rated,
            LoadKind::Stepped { stages, .. } => stages.last().copied().unwrap_or_default(),
            LoadKind::Charger { watts_per_amp, max, .. } => Power(watts_per_amp * max.0),
            LoadKind::Battery { max_charge, .. } => *max_charge,
        }
    }
    /// The usable capacity behind the state of charge, where the site file gives it.
    pub fn capacity(&self) -> Option<Energy> {
        match self {
            LoadKind::Battery { capacity, .. } => *capacity,
            LoadKind::Charger { car_capacity, .. } => *car_capacity,
            _ => None,
        }
    }
    /// The state-of-charge point a `reach: N%` obligation watches: a battery's `soc`,
    /// a charger's car SoC where it has one.
    pub fn soc_point(&self) -> Option<PointId> {
        match self {
            LoadKind::Battery { soc, .. } => Some(*soc),
            LoadKind::Charger { soc, .. } => *soc,
            _ => None,
        }
    }
    /// True for loads whose power the engine sets continuously.
    pub fn is_modulating(&self) -> bool {
        matches!(self, LoadKind::Proportional { .. } | LoadKind::Charger { .. } | LoadKind::Battery { .. })
    }
    /// A short word for the kind (`switched`, `stepped`, …).
    pub fn word(&self) -> &'static str {
        match self {
            LoadKind::Switched { .. } => "switched",
            LoadKind::Stepped { .. } => "stepped",
            LoadKind::Proportional { .. } => "proportional",
            LoadKind::Charger { .. } => "charger",
            LoadKind::Battery { .. } => "battery",
        }
    }
}

/// How a stepped load receives its stage.
#[derive(Debug, Clone, PartialEq)]
pub enum StageCommand {
    /// One relay per stage; stage n closes the first n.
    Relays(Vec<Write>),
    /// One register that takes the stage number (0 = off).
    Register(Write),
}

/// State a load takes when its signals are lost.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum SafeState {
    /// Switch off (the default).
    Off,
    /// Switch on (a circulation pump that must keep running).
    On,
    /// Keep the last command.
    Hold,
}

/// A time-of-day window in the site's time zone, half-open, wrapping over midnight
/// when `start > end`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Window {
    /// First instant inside.
    pub start: NaiveTime,
    /// First instant after.
    pub end: NaiveTime,
}

impl Window {
    /// Whether a time of day (seconds since local midnight) is inside. A window whose
    /// start and end coincide is the whole day (`00:00..24:00`; the loader refuses any
    /// other such window as empty).
    pub fn contains(&self, seconds_of_day: u32) -> bool {
        use chrono::Timelike;
        let s = self.start.num_seconds_from_midnight();
        let e = self.end.num_seconds_from_midnight();
        if s < e { (s..e).contains(&seconds_of_day) } else { seconds_of_day >= s || seconds_of_day < e }
    }
}

/// A duty a load must fulfil, from surplus where possible and from the grid inside
/// its window where not.
#[derive(Debug, Clone, PartialEq)]
pub enum Obligation {
    /// Run at least this long each local day (a pool pump's filtration hours).
    RunDaily {
        /// Run time required per day.
        duration: Duration,
        /// When grid power may be used to make up the shortfall; the load starts late
        /// enough in the window to need only what is missing.
        grid_window: Option<Window>,
    },
    /// Reach a temperature by a time of day (a hot tank by evening).
    ReachBy {
        /// Target temperature on the load's `temperature` point.
        target: Temperature,
        /// Deadline (local time).
        by: NaiveTime,
        /// When grid power may be used.
        grid_window: Option<Window>,
        /// How long the load takes to heat the tank by one kelvin at full power, where
        /// its volume is known: the top-up then starts just late enough.
        pace: Option<Duration>,
    },
    /// Reach a state of charge by a time of day (a car charged for the morning, a
    /// battery charged for the evening peak), on the load's `soc` point.
    ChargeBy {
        /// Target state of charge, %.
        soc: Ratio,
        /// Deadline (local time).
        by: NaiveTime,
        /// When grid power may be used.
        grid_window: Option<Window>,
        /// How long the load takes to add one percentage point at full power, where its
        /// capacity is known: the top-up then starts just late enough. Without it, it
        /// starts when the window opens.
        pace: Option<Duration>,
    },
    /// Hold a high temperature periodically (anti-Legionella cycle).
    Cycle {
        /// Temperature to reach.
        target: Temperature,
        /// How long to hold it.
        hold: Duration,
        /// How often the cycle must happen.
        every: Duration,
        /// When grid power may be used once the cycle is due.
        grid_window: Option<Window>,
    },
}

impl Obligation {
    /// A short name for reports (`run 6 h`, `reach 60 °C by 17:00`).
    pub fn describe(&self) -> String {
        match self {
            Obligation::RunDaily { duration, .. } => {
                format!("run {} a day", crate::units::format_duration(*duration))
            }
            Obligation::ReachBy { target, by, .. } => {
                format!("reach {target} by {}", by.format("%H:%M"))
            }
            Obligation::ChargeBy { soc, by, .. } => {
                format!("reach {soc} by {}", by.format("%H:%M"))
            }
            Obligation::Cycle { target, hold, every, .. } => format!(
                "hold {target} for {} every {}",
                crate::units::format_duration(*hold),
                crate::units::format_duration(*every)
            ),
        }
    }
    /// The window in which grid power may be used.
    pub fn grid_window(&self) -> Option<Window> {
        match self {
            Obligation::RunDaily { grid_window, .. }
            | Obligation::ReachBy { grid_window, .. }
            | Obligation::ChargeBy { grid_window, .. }
            | Obligation::Cycle { grid_window, .. } => *grid_window,
        }
    }
}

/// The inverter's active-power limit control.
#[derive(Debug, Clone, PartialEq)]
pub struct InverterControl {
    /// Rated AC power (100 %).
    pub rated: Power,
    /// Where the limit is written.
    pub limit: Write,
    /// How the written value is expressed.
    pub limit_unit: LimitUnit,
    /// Limit applied by the fail-safe (0 W on a no-export site).
    pub safe_limit: Power,
    /// How often the limit is re-written even when unchanged (keeps a revert timer from expiring).
    pub refresh: Duration,
}

/// Unit of the inverter's limit register.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LimitUnit {
    /// Percent of rated power.
    Percent,
    /// Watts.
    Watts,
}

/// The MQTT connection.
#[derive(Debug, Clone, PartialEq)]
pub struct MqttSettings {
    /// Broker host.
    pub host: String,
    /// Broker port.
    pub port: u16,
    /// Client identifier.
    pub client_id: String,
    /// User name, if the broker wants one.
    pub username: Option<String>,
    /// Password (read from the environment variable or file the site names).
    pub password: Option<Secret>,
    /// TLS, with an optional CA certificate file.
    pub tls: Option<TlsSettings>,
    /// Prefix of the state, availability and override topics (`spillway/<site>`).
    pub topic_prefix: String,
    /// Default QoS for subscriptions and publications.
    pub qos: Qos,
    /// Keep-alive interval.
    pub keep_alive: Duration,
    /// Home Assistant MQTT discovery documents to publish, if asked for.
    pub discovery: Option<Discovery>,
}

/// The longest override accepted (over MQTT, and for a discovery boost button).
pub const MAX_OVERRIDE: Duration = Duration::from_secs(24 * 3600);

/// Home Assistant MQTT discovery (`mqtt.discovery`): retained documents that make each
/// load's power, reason and buttons, and the site's flows, appear in Home Assistant.
#[derive(Debug, Clone, PartialEq)]
pub struct Discovery {
    /// Home Assistant's discovery prefix (`homeassistant` unless changed there).
    pub prefix: String,
    /// How long a press of a load's boost button forces it on.
    pub boost: Duration,
}

/// Where a secret comes from; read at start-up, never stored in the model.
#[derive(Debug, Clone, PartialEq)]
pub enum Secret {
    /// An environment variable.
    Env(String),
    /// A file holding the secret.
    File(String),
}

/// TLS settings for MQTT.
#[derive(Debug, Clone, PartialEq)]
pub struct TlsSettings {
    /// PEM file with the CA certificate(s) to trust; the system roots when absent.
    pub ca_file: Option<String>,
}

/// Where every rule-visible name lives in the engine's value table.
///
/// Layout: points first (slot = point index), then the site's derived signals, then
/// for each load its state attributes. The engine writes the table each tick; rules
/// read it.
#[derive(Debug, Clone, PartialEq)]
pub struct SlotLayout {
    /// Number of slots in all.
    pub len: usize,
    /// Derived site signals.
    pub site: SiteSlots,
    /// Per load, in `Site::loads` order.
    pub loads: Vec<LoadSlots>,
}

/// Derived signals the engine computes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SiteSlots {
    /// Surplus available to the load whose rule is being evaluated.
    pub surplus: Slot,
    /// Surplus of the whole site: export plus the power of every managed load that is on.
    pub site_surplus: Slot,
    /// Import, 0 when exporting.
    pub import: Slot,
    /// Export, 0 when importing.
    pub export: Slot,
    /// Energy imported today.
    pub import_today: Slot,
    /// Energy exported today.
    pub export_today: Slot,
    /// Energy imported this calendar month.
    pub import_month: Slot,
    /// Energy exported this calendar month.
    pub export_month: Slot,
    /// Energy diverted into managed loads today.
    pub diverted_today: Slot,
    /// 1 while the inverter is being curtailed.
    pub curtailed: Slot,
}

/// State attributes of one load.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LoadSlots {
    /// 1 when on (any stage, any setpoint above zero).
    pub on: Slot,
    /// Power drawn now (metered, or rated/commanded).
    pub power: Slot,
    /// Time on today.
    pub runtime_today: Slot,
    /// Energy drawn today.
    pub energy_today: Slot,
    /// Time since the last switch on or off.
    pub since_change: Slot,
}

/// The names of the derived site signals, their dimension and doc line, in
/// [`SiteSlots`] order. Shared by the loader's scope and the documentation.
pub const SITE_SIGNALS: &[(&str, Dimension, &str)] = &[
    ("surplus", Dimension::Power, "surplus available to this load at its priority"),
    ("site_surplus", Dimension::Power, "export plus the power of every managed load now on"),
    ("import", Dimension::Power, "grid import now, 0 while exporting"),
    ("export", Dimension::Power, "grid export now, 0 while importing"),
    ("import_today", Dimension::Energy, "energy imported since local midnight"),
    ("export_today", Dimension::Energy, "energy exported since local midnight"),
    ("import_month", Dimension::Energy, "energy imported this calendar month"),
    ("export_month", Dimension::Energy, "energy exported this calendar month"),
    ("diverted_today", Dimension::Energy, "energy drawn by managed loads since local midnight"),
    ("curtailed", Dimension::Scalar, "1 while the inverter is being curtailed"),
];

/// Per-load attribute names (`tank.on`), their type and doc line, in [`LoadSlots`] order.
/// `None` dimension means a boolean.
pub const LOAD_ATTRIBUTES: &[(&str, Option<Dimension>, &str)] = &[
    ("on", None, "true while the load is on"),
    ("power", Some(Dimension::Power), "power drawn now (metered, or as commanded)"),
    ("runtime_today", Some(Dimension::Duration), "time on since local midnight"),
    ("energy_today", Some(Dimension::Energy), "energy drawn since local midnight"),
    ("since_change", Some(Dimension::Duration), "time since it last switched"),
];

#[cfg(test)]
mod tests {
    use super::*;

    fn window(a: (u32, u32), b: (u32, u32)) -> Window {
        let t = |(h, m)| chrono::NaiveTime::from_hms_opt(h, m, 0).unwrap();
        Window { start: t(a), end: t(b) }
    }

    #[test]
    fn windows_ending_at_midnight_and_the_whole_day() {
        // "20:00..24:00": 24:00 is read as 00:00, so the window wraps to the end of the day.
        let evening = window((20, 0), (0, 0));
        assert!(evening.contains(20 * 3600) && evening.contains(86_399) && !evening.contains(0));
        // "00:00..24:00": start and end coincide, the whole day.
        let day = window((0, 0), (0, 0));
        assert!(day.contains(0) && day.contains(43_200) && day.contains(86_399));
        // An ordinary window is half-open.
        let w = window((15, 0), (17, 0));
        assert!(w.contains(15 * 3600) && !w.contains(17 * 3600));
    }
}
