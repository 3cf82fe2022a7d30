//! The plant seen as devices: Modbus units behind one gateway (SunSpec grid meter,
//! SunSpec PV inverter, relay module, sensor module) and an MQTT topic tree.
//!
//! Transport-free: requests arrive as calls and answers leave as values or
//! [`BusError`]s that map one-to-one onto Modbus exceptions or a timeout, so a server
//! (Modbus TCP, MQTT) wraps this without deciding anything. Reads encode the plant's
//! [`Readings`]; writes set its [`Controls`]. The register map is documented in
//! the top-level README ("The device bus").

pub mod mqtt;
pub mod probe;
pub mod sunspec;

use crate::plant::config::GarbageMode;
use crate::plant::faults::Active;
use crate::plant::noise::mix;
use crate::plant::{Controls, Readings};
use sunspec::{
    COMMON, DER_AC_CONTROLS, IMMEDIATE_CONTROLS, INVERTER_1PH, Image, METER_1PH, METER_WYE, NAMEPLATE, acc32, i16_sf,
    sf, string, u16_sf, u32_words, words_u32,
};

/// Unit id of the SunSpec grid meter.
pub const METER_UNIT: u8 = 1;
/// Unit id of the SunSpec PV inverter.
pub const INVERTER_UNIT: u8 = 2;
/// Unit id of the relay module.
pub const RELAY_UNIT: u8 = 3;
/// Unit id of the sensor module.
pub const SENSOR_UNIT: u8 = 4;
/// Holding-register address of the `SunS` marker on SunSpec units.
pub const SUNSPEC_BASE: u16 = 40000;
/// Inverter holding registers (uint32, W, high word first): available AC power.
pub const AVAILABLE_POWER: u16 = 50000;

/// Relay module holding register: EV current setpoint, 0.1 A (uint16).
pub const HR_EV_CURRENT: u16 = 0;
/// Relay module holding registers 1–2: battery power setpoint, W, int32 high word first
/// (positive charges).
pub const HR_BATTERY_W: u16 = 1;
/// Relay module holding register of regulator 0 (then 11, 12, …): setpoint 0.1 % (0–1000).
pub const HR_REGULATOR: u16 = 10;

/// Sensor module input registers (the README, "The device bus", gives types and scales).
pub mod ir {
    /// Tank temperature, 0.1 °C, int16.
    pub const TANK_TEMP: u16 = 0;
    /// Tank element heating now, 0/1.
    pub const TANK_HEATING: u16 = 1;
    /// Tank thermal cut-out tripped, 0/1.
    pub const TANK_CUTOUT: u16 = 2;
    /// Battery state of charge, 0.1 %, uint16.
    pub const BATTERY_SOC: u16 = 10;
    /// Battery terminal voltage, 0.01 V, uint16.
    pub const BATTERY_VOLTAGE: u16 = 11;
    /// Battery current, 0.1 A, int16 (+ charging).
    pub const BATTERY_CURRENT: u16 = 12;
    /// Battery AC power, W, int16 (+ charging).
    pub const BATTERY_POWER: u16 = 13;
    /// Charger state: 0 none, 1 bulk, 2 absorption, 3 float.
    pub const CHARGER_STATE: u16 = 14;
    /// Loads disconnected (low-voltage disconnect or island overload), 0/1.
    pub const LOADS_DISCONNECTED: u16 = 15;
    /// Grid available, 0/1.
    pub const GRID_AVAILABLE: u16 = 20;
    /// EV plugged in, 0/1.
    pub const EV_PLUGGED: u16 = 30;
    /// EV state of charge, 0.1 %, uint16.
    pub const EV_SOC: u16 = 31;
    /// EV charging current, 0.1 A, uint16.
    pub const EV_CURRENT: u16 = 32;
    /// EV charging power, W, uint16.
    pub const EV_POWER: u16 = 33;
    /// Power of load 0 (then 101, 102, …), W, uint16, in the plant's load order.
    pub const LOAD_POWER: u16 = 100;
}

/// A Modbus table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Table {
    /// Read/write bits (function codes 1, 5, 15).
    Coils,
    /// Read-only bits (function code 2).
    DiscreteInputs,
    /// Read/write registers (function codes 3, 6, 16).
    HoldingRegisters,
    /// Read-only registers (function code 4).
    InputRegisters,
}

impl std::fmt::Display for Table {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Table::Coils => "coils",
            Table::DiscreteInputs => "discrete inputs",
            Table::HoldingRegisters => "holding registers",
            Table::InputRegisters => "input registers",
        })
    }
}

/// What a read returns.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Data {
    /// Coils or discrete inputs.
    Bits(Vec<bool>),
    /// Holding or input registers.
    Registers(Vec<u16>),
}

/// A failed request, as a Modbus client would see it.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum BusError {
    /// No answer: a silent device or an unknown unit id (the client's timeout fires).
    #[error("unit {unit} does not answer: the request timed out")]
    Timeout {
        /// Unit addressed.
        unit: u8,
    },
    /// Modbus exception 1: the unit has no such table (or cannot write it).
    #[error("unit {unit}: illegal function, it has no writable or readable {table}")]
    IllegalFunction {
        /// Unit addressed.
        unit: u8,
        /// Table addressed.
        table: Table,
    },
    /// Modbus exception 2: an address in the range does not exist or is not writable.
    #[error("unit {unit}: illegal data address, {table} {address} (+{count}) is outside the map or read-only")]
    IllegalDataAddress {
        /// Unit addressed.
        unit: u8,
        /// Table addressed.
        table: Table,
        /// First address.
        address: u16,
        /// Number of items.
        count: u16,
    },
    /// Modbus exception 3: a count or written value is out of range.
    #[error("unit {unit}: illegal data value, {what}")]
    IllegalDataValue {
        /// Unit addressed.
        unit: u8,
        /// What is out of range.
        what: String,
    },
    /// Modbus exception 4: the device is rebooting.
    #[error("unit {unit}: server device failure, the device is restarting")]
    ServerDeviceFailure {
        /// Unit addressed.
        unit: u8,
    },
    /// MQTT: no command topic of that name.
    #[error("unknown command topic \"{0}\": see the topic tree in the README, \"The device bus\"")]
    UnknownTopic(String),
    /// MQTT: the payload does not parse for that topic.
    #[error("topic \"{topic}\": cannot use payload \"{payload}\", expected {expected}")]
    BadPayload {
        /// Topic.
        topic: String,
        /// Payload received.
        payload: String,
        /// What would have been accepted.
        expected: &'static str,
    },
}

/// The fixed facts of the site that shape the register map.
#[derive(Debug, Clone)]
pub struct Layout {
    /// Relay channel names ([`Controls::relays`] order).
    pub channels: Vec<String>,
    /// Regulator names ([`Controls::regulators`] order).
    pub regulators: Vec<String>,
    /// Load names (per-load meters).
    pub loads: Vec<String>,
    /// Coil `i` of the relay module switches channel `wiring[i]`.
    pub wiring: Vec<usize>,
    /// Grid meter phases (1 → model 201, 3 → model 203).
    pub meter_phases: u8,
    /// Inverter `WMax`, W.
    pub inverter_rating_w: f64,
    /// A battery is fitted.
    pub has_battery: bool,
    /// The battery takes a power setpoint (it is not on its own self-consumption control).
    pub battery_setpoint: bool,
    /// An EV charger is fitted.
    pub has_ev: bool,
    /// A tank is fitted.
    pub has_tank: bool,
    /// No grid (so no grid meter on unit 1).
    pub off_grid: bool,
}

/// Offsets (from the data start) of the control points that act.
mod off {
    pub const C123_CONN_RVRT: usize = 1;
    pub const C123_CONN: usize = 2;
    pub const C123_PCT: usize = 3;
    pub const C123_RVRT: usize = 5;
    pub const C123_ENA: usize = 7;
    pub const C123_PCT_SF: usize = 21;
    pub const C123_PF_SF: usize = 22;
    pub const C123_VAR_SF: usize = 23;
    pub const C704_ENA: usize = 12;
    pub const C704_PCT: usize = 13;
    pub const C704_RVRT_PCT: usize = 14;
    pub const C704_RVRT_ENA: usize = 15;
    pub const C704_RVRT_TMS: usize = 16;
    pub const C704_RVRT_REM: usize = 18;
    pub const C704_SF: usize = 51;
}

/// Register state of the inverter's control models and their reversion timers.
#[derive(Debug, Clone)]
struct InverterControls {
    m123: Vec<u16>,
    m704: Vec<u16>,
    lim123_until: Option<i64>,
    conn_until: Option<(i64, u16)>,
    lim704_until: Option<i64>,
}

impl InverterControls {
    /// Power-on state: connected, no limit, no timers.
    fn power_on() -> InverterControls {
        // Every stored point starts at 0 except: connected, limits at 100.00 %, and
        // the scale factors (which are read-only).
        let mut m123 = vec![0u16; usize::from(IMMEDIATE_CONTROLS.len())];
        m123[off::C123_CONN] = 1;
        m123[off::C123_PCT] = 10_000;
        m123[off::C123_PCT_SF] = sf(-2);
        m123[off::C123_PF_SF] = sf(-3);
        m123[off::C123_VAR_SF] = sf(-2);
        let mut m704 = vec![0u16; usize::from(DER_AC_CONTROLS.len())];
        m704[off::C704_PCT] = 10_000;
        m704[off::C704_RVRT_PCT] = 10_000;
        // PF_SF, WMaxLimPct_SF, WSet_SF, WSetPct_SF, VarSet_SF, VarSetPct_SF.
        for (k, s) in [-3i16, -2, 0, -2, 0, -2].iter().enumerate() {
            m704[off::C704_SF + k] = sf(*s);
        }
        InverterControls { m123, m704, lim123_until: None, conn_until: None, lim704_until: None }
    }

    fn next_deadline(&self) -> i64 {
        [self.lim123_until, self.conn_until.map(|c| c.0), self.lim704_until]
            .into_iter()
            .flatten()
            .min()
            .unwrap_or(i64::MAX)
    }

    /// The active-power limit in W these registers ask for.
    fn limit_w(&self, wmax: f64) -> Option<f64> {
        let mut limit: Option<f64> = None;
        let mut take = |w: f64| limit = Some(limit.map_or(w, |l| l.min(w)));
        if self.m123[off::C123_CONN] == 0 {
            take(0.0);
        }
        if self.m123[off::C123_ENA] == 1 {
            take(f64::from(self.m123[off::C123_PCT]) / 100.0 / 100.0 * wmax);
        }
        if self.m704[off::C704_ENA] == 1 {
            let scale = 10f64.powi(i32::from(self.m704[off::C704_SF + 1] as i16));
            take(f64::from(self.m704[off::C704_PCT]) * scale / 100.0 * wmax);
        }
        limit
    }
}

/// The device bus of one plant.
#[derive(Debug)]
pub struct Bus {
    pub(crate) controls: Controls,
    pub(crate) readings: Readings,
    layout: Layout,
    now_ms: i64,
    inverter: InverterControls,
    next_deadline_ms: i64,
    faults: Active,
}

fn bounds(unit: u8, table: Table, address: u16, count: u16, max: u16) -> Result<(), BusError> {
    if count == 0 || count > max {
        return Err(BusError::IllegalDataValue { unit, what: format!("count {count} is outside 1..={max}") });
    }
    if u32::from(address) + u32::from(count) > 65_536 {
        return Err(BusError::IllegalDataAddress { unit, table, address, count });
    }
    Ok(())
}

impl Bus {
    pub(crate) fn new(layout: Layout, controls: Controls, readings: Readings, now_ms: i64) -> Bus {
        Bus {
            controls,
            readings,
            layout,
            now_ms,
            inverter: InverterControls::power_on(),
            next_deadline_ms: i64::MAX,
            faults: Active::default(),
        }
    }

    /// The site facts behind the register map.
    pub fn layout(&self) -> &Layout {
        &self.layout
    }

    /// The readings the devices report.
    pub fn readings(&self) -> &Readings {
        &self.readings
    }

    /// The controls the devices hold.
    pub fn controls(&self) -> &Controls {
        &self.controls
    }

    pub(crate) fn set_faults(&mut self, active: &Active) {
        self.faults = active.clone();
    }

    /// Advances the devices' clocks: the inverter's reversion timers.
    #[inline]
    pub(crate) fn tick(&mut self, now_ms: i64) {
        self.now_ms = now_ms;
        if now_ms >= self.next_deadline_ms {
            self.expire();
        }
    }

    fn expire(&mut self) {
        let now = self.now_ms;
        let inv = &mut self.inverter;
        if inv.lim123_until.is_some_and(|t| now >= t) {
            // Model 123: when WMaxLimPct_RvrtTms runs out, the limit is dropped.
            inv.m123[off::C123_ENA] = 0;
            inv.lim123_until = None;
        }
        if let Some((t, back)) = inv.conn_until
            && now >= t
        {
            inv.m123[off::C123_CONN] = back;
            inv.conn_until = None;
        }
        if inv.lim704_until.is_some_and(|t| now >= t) {
            // Model 704: the inverter applies its reversion limit by itself.
            inv.m704[off::C704_PCT] = inv.m704[off::C704_RVRT_PCT];
            inv.m704[off::C704_ENA] = 1;
            inv.lim704_until = None;
        }
        self.inverter_changed();
    }

    fn inverter_changed(&mut self) {
        self.next_deadline_ms = self.inverter.next_deadline();
        self.controls.pv_limit_w = self.inverter.limit_w(self.layout.inverter_rating_w);
    }

    /// The relay module rebooted: coils open, setpoints zero.
    pub(crate) fn reset_relay_module(&mut self) {
        for &ch in &self.layout.wiring {
            self.controls.relays[ch] = false;
        }
        self.controls.regulators.iter_mut().for_each(|r| *r = 0.0);
        self.controls.ev_current_a = 0.0;
        self.controls.battery_w = 0.0;
    }

    /// The inverter rebooted: its control registers are at their power-on state.
    pub(crate) fn reset_inverter(&mut self) {
        self.inverter = InverterControls::power_on();
        self.inverter_changed();
    }

    pub(crate) fn check_unit(&self, unit: u8) -> Result<(), BusError> {
        let idx = match unit {
            METER_UNIT if !self.layout.off_grid => 0,
            INVERTER_UNIT => 1,
            RELAY_UNIT => 2,
            SENSOR_UNIT => 3,
            _ => return Err(BusError::Timeout { unit }),
        };
        if idx == 0 && self.faults.meter_silent {
            return Err(BusError::Timeout { unit });
        }
        if self.faults.restarting[idx] {
            return Err(BusError::ServerDeviceFailure { unit });
        }
        Ok(())
    }

    /// Reads `count` items from `address` of a unit's table.
    pub fn read(&self, unit: u8, table: Table, address: u16, count: u16) -> Result<Data, BusError> {
        self.check_unit(unit)?;
        let is_bits = matches!(table, Table::Coils | Table::DiscreteInputs);
        bounds(unit, table, address, count, if is_bits { 2000 } else { 125 })?;
        let bad_address = BusError::IllegalDataAddress { unit, table, address, count };
        let (first, words) = match (unit, table) {
            (METER_UNIT, Table::HoldingRegisters) => (SUNSPEC_BASE, self.meter_image()),
            (INVERTER_UNIT, Table::HoldingRegisters) if address >= AVAILABLE_POWER => {
                let w = self.readings.pv.available_w;
                let raw = if w.is_finite() { w.clamp(0.0, 4e9).round() as u32 } else { u32::MAX };
                (AVAILABLE_POWER, u32_words(raw).to_vec())
            }
            (INVERTER_UNIT, Table::HoldingRegisters) => (SUNSPEC_BASE, self.inverter_image()),
            (RELAY_UNIT, Table::Coils) | (RELAY_UNIT, Table::DiscreteInputs) => {
                let n = self.layout.wiring.len() as u32;
                if u32::from(address) + u32::from(count) > n {
                    return Err(bad_address);
                }
                let bits = self.layout.wiring[address as usize..(address + count) as usize]
                    .iter()
                    .enumerate()
                    .map(|(k, &ch)| {
                        let bit =
                            if table == Table::Coils { self.controls.relays[ch] } else { self.readings.contacts[ch] };
                        match self.faults.garbage[2] {
                            Some(GarbageMode::Random) => {
                                mix(self.now_ms as u64 ^ (u64::from(address) + k as u64)) & 1 == 1
                            }
                            _ => bit,
                        }
                    })
                    .collect();
                return Ok(Data::Bits(bits));
            }
            (RELAY_UNIT, Table::HoldingRegisters) => (0, self.relay_registers()),
            (SENSOR_UNIT, Table::InputRegisters) => (0, self.sensor_registers()),
            _ => return Err(BusError::IllegalFunction { unit, table }),
        };
        let end = u32::from(first) + words.len() as u32;
        if address < first || u32::from(address) + u32::from(count) > end {
            return Err(bad_address);
        }
        let at = (address - first) as usize;
        let mut out = words[at..at + count as usize].to_vec();
        if let Some(mode) = self.faults.garbage[usize::from(unit) - 1] {
            // Garbage on the wire: on top of the corrupted readings, the relay module's
            // registers (which carry no readings) and any random-mode unit scramble.
            for (k, word) in out.iter_mut().enumerate() {
                let h = mix(self.now_ms as u64 ^ (u64::from(unit) << 32) ^ (u64::from(address) + k as u64));
                *word = match (mode, unit) {
                    (GarbageMode::Random, _) => h as u16,
                    (GarbageMode::Nan, RELAY_UNIT) => 0x8000,
                    (GarbageMode::Spike, RELAY_UNIT) => 0x7FFF,
                    _ => *word,
                };
            }
        }
        Ok(Data::Registers(out))
    }

    /// Reads registers (holding or input), for callers that know the table holds them.
    pub fn read_registers(&self, unit: u8, table: Table, address: u16, count: u16) -> Result<Vec<u16>, BusError> {
        match self.read(unit, table, address, count)? {
            Data::Registers(r) => Ok(r),
            Data::Bits(_) => Err(BusError::IllegalFunction { unit, table }),
        }
    }

    /// Reads bits (coils or discrete inputs).
    pub fn read_bits(&self, unit: u8, table: Table, address: u16, count: u16) -> Result<Vec<bool>, BusError> {
        match self.read(unit, table, address, count)? {
            Data::Bits(b) => Ok(b),
            Data::Registers(_) => Err(BusError::IllegalFunction { unit, table }),
        }
    }

    /// Writes one coil (function code 5).
    pub fn write_coil(&mut self, unit: u8, address: u16, value: bool) -> Result<(), BusError> {
        self.write_coils(unit, address, &[value])
    }

    /// Writes coils (function code 15). A stuck relay accepts the write; its contact
    /// does not follow (see the discrete inputs).
    pub fn write_coils(&mut self, unit: u8, address: u16, values: &[bool]) -> Result<(), BusError> {
        self.check_unit(unit)?;
        let table = Table::Coils;
        bounds(unit, table, address, values.len() as u16, 1968)?;
        if unit != RELAY_UNIT {
            return Err(BusError::IllegalFunction { unit, table });
        }
        let end = usize::from(address) + values.len();
        if end > self.layout.wiring.len() {
            return Err(BusError::IllegalDataAddress { unit, table, address, count: values.len() as u16 });
        }
        for (k, &v) in values.iter().enumerate() {
            let ch = self.layout.wiring[usize::from(address) + k];
            self.controls.relays[ch] = v;
        }
        Ok(())
    }

    /// Writes one holding register (function code 6).
    pub fn write_register(&mut self, unit: u8, address: u16, value: u16) -> Result<(), BusError> {
        self.write_registers(unit, address, &[value])
    }

    /// Writes holding registers (function code 16). Only writable addresses are
    /// accepted; the whole request is rejected if any address is not.
    pub fn write_registers(&mut self, unit: u8, address: u16, values: &[u16]) -> Result<(), BusError> {
        self.check_unit(unit)?;
        let table = Table::HoldingRegisters;
        let count = values.len() as u16;
        bounds(unit, table, address, count, 123)?;
        let bad_address = BusError::IllegalDataAddress { unit, table, address, count };
        match unit {
            METER_UNIT => Err(bad_address),
            INVERTER_UNIT => self.write_inverter(address, values).ok_or(bad_address)?,
            RELAY_UNIT => self.write_relay_registers(address, values).ok_or(bad_address)?,
            _ => Err(BusError::IllegalFunction { unit, table }),
        }
    }

    /// Data start addresses of the inverter's control models.
    fn control_starts() -> (u16, u16) {
        let m123 = SUNSPEC_BASE + 2 + (2 + COMMON.len()) + (2 + INVERTER_1PH.len()) + 2;
        let m704 = m123 + IMMEDIATE_CONTROLS.len() + 2;
        (m123, m704)
    }

    /// `None` when an address is not writable; otherwise the result of the write.
    fn write_inverter(&mut self, address: u16, values: &[u16]) -> Option<Result<(), BusError>> {
        // Called on every limit change (each second in a long offline run), so the
        // writable points are looked up in tables built at compile time.
        const W123: [bool; IMMEDIATE_CONTROLS.len() as usize] = IMMEDIATE_CONTROLS.writable_offsets();
        const W704: [bool; DER_AC_CONTROLS.len() as usize] = DER_AC_CONTROLS.writable_offsets();
        let (s123, s704) = Bus::control_starts();
        let locate = |a: u16| -> Option<(bool, usize)> {
            let (map, is123, o) = if (s123..s123 + IMMEDIATE_CONTROLS.len()).contains(&a) {
                (&W123[..], true, usize::from(a - s123))
            } else if (s704..s704 + DER_AC_CONTROLS.len()).contains(&a) {
                (&W704[..], false, usize::from(a - s704))
            } else {
                return None;
            };
            map[o].then_some((is123, o))
        };
        // Two passes over the addresses (check everything, then write) rather than a
        // table of targets: zeroing a 123-entry table cost more than the whole write.
        let targets = || (0..values.len()).map(|k| locate(address.wrapping_add(k as u16)));
        if values.len() > 123 || targets().any(|t| t.is_none()) {
            return None;
        }
        let targets = || targets().flatten();
        let unit = INVERTER_UNIT;
        let invalid = |what: String| Some(Err(BusError::IllegalDataValue { unit, what }));
        for ((is123, o), &v) in targets().zip(values) {
            let enum01 = if is123 {
                [off::C123_CONN, off::C123_ENA].contains(&o)
            } else {
                [off::C704_ENA, off::C704_RVRT_ENA].contains(&o)
            };
            if enum01 && v > 1 {
                return invalid(format!("{v} for an enable or connect point, expected 0 or 1"));
            }
            let pct = if is123 { o == off::C123_PCT } else { [off::C704_PCT, off::C704_RVRT_PCT].contains(&o) };
            if pct && v > 10_000 {
                return invalid(format!("{v} for a power-limit percentage, expected 0..=10000 (0.01 %)"));
            }
        }
        let now = self.now_ms;
        let inv = &mut self.inverter;
        let before_conn = inv.m123[off::C123_CONN];
        let (mut lim123, mut conn, mut lim704) = (false, false, false);
        for ((is123, o), &v) in targets().zip(values) {
            if is123 {
                inv.m123[o] = v;
                lim123 |= [off::C123_PCT, off::C123_RVRT, off::C123_ENA].contains(&o);
                conn |= o == off::C123_CONN;
            } else {
                inv.m704[o] = v;
                lim704 |= (off::C704_ENA..off::C704_RVRT_REM).contains(&o);
            }
        }
        if lim123 {
            let secs = inv.m123[off::C123_RVRT];
            inv.lim123_until = (inv.m123[off::C123_ENA] == 1 && secs > 0).then(|| now + i64::from(secs) * 1000);
        }
        if conn {
            let secs = inv.m123[off::C123_CONN_RVRT];
            inv.conn_until = (secs > 0).then(|| (now + i64::from(secs) * 1000, before_conn));
        }
        if lim704 {
            let secs = words_u32(inv.m704[off::C704_RVRT_TMS], inv.m704[off::C704_RVRT_TMS + 1]);
            inv.lim704_until = (inv.m704[off::C704_RVRT_ENA] == 1 && secs > 0).then(|| now + i64::from(secs) * 1000);
        }
        self.inverter_changed();
        Some(Ok(()))
    }

    fn write_relay_registers(&mut self, address: u16, values: &[u16]) -> Option<Result<(), BusError>> {
        let unit = RELAY_UNIT;
        let mut regs = self.relay_registers();
        let end = usize::from(address) + values.len();
        for a in usize::from(address)..end {
            let ok = match a as u16 {
                HR_EV_CURRENT => self.layout.has_ev,
                1 | 2 => self.layout.battery_setpoint,
                r => r >= HR_REGULATOR && usize::from(r - HR_REGULATOR) < self.layout.regulators.len(),
            };
            if !ok || a >= regs.len() {
                return None;
            }
        }
        regs[usize::from(address)..end].copy_from_slice(values);
        let touches = |a: u16| (usize::from(address)..end).contains(&usize::from(a));
        if touches(HR_EV_CURRENT) && regs[0] > 1000 {
            return Some(Err(BusError::IllegalDataValue {
                unit,
                what: format!("EV current {} is above 1000 (100.0 A)", regs[0]),
            }));
        }
        for k in 0..self.layout.regulators.len() {
            let a = HR_REGULATOR + k as u16;
            if touches(a) && regs[usize::from(a)] > 1000 {
                return Some(Err(BusError::IllegalDataValue {
                    unit,
                    what: format!("regulator setpoint {} is above 1000 (100.0 %)", regs[usize::from(a)]),
                }));
            }
        }
        if touches(HR_EV_CURRENT) {
            self.controls.ev_current_a = f64::from(regs[0]) / 10.0;
        }
        if touches(1) || touches(2) {
            self.controls.battery_w = f64::from(words_u32(regs[1], regs[2]) as i32);
        }
        for k in 0..self.layout.regulators.len() {
            let a = HR_REGULATOR + k as u16;
            if touches(a) {
                self.controls.regulators[k] = f64::from(regs[usize::from(a)]) / 10.0;
            }
        }
        Some(Ok(()))
    }

    fn relay_registers(&self) -> Vec<u16> {
        let c = &self.controls;
        let mut regs = vec![0u16; usize::from(HR_REGULATOR) + self.layout.regulators.len()];
        regs[0] = u16_sf(c.ev_current_a, -1);
        let w = if c.battery_w.is_finite() {
            c.battery_w.round().clamp(f64::from(i32::MIN), f64::from(i32::MAX)) as i32
        } else {
            0
        };
        regs[1..3].copy_from_slice(&u32_words(w as u32));
        for (k, pct) in c.regulators.iter().enumerate() {
            regs[usize::from(HR_REGULATOR) + k] = u16_sf(*pct, -1);
        }
        regs
    }

    fn sensor_registers(&self) -> Vec<u16> {
        let r = &self.readings;
        let mut regs = vec![0u16; usize::from(ir::LOAD_POWER) + self.layout.loads.len()];
        let flag = |b: bool| u16::from(b);
        match &r.tank {
            Some(t) => {
                regs[0] = i16_sf(t.temp_c, -1);
                regs[1] = flag(t.heating);
                regs[2] = flag(t.cutout_tripped);
            }
            None => regs[0..3].copy_from_slice(&[0x8000, 0xFFFF, 0xFFFF]),
        }
        match &r.battery {
            Some(b) => {
                regs[10] = u16_sf(b.soc_pct, -1);
                regs[11] = u16_sf(b.voltage_v, -2);
                regs[12] = i16_sf(b.current_a, -1);
                regs[13] = i16_sf(b.power_w, 0);
                regs[14] = b.charger.code();
            }
            None => regs[10..15].copy_from_slice(&[0xFFFF, 0xFFFF, 0x8000, 0x8000, 0]),
        }
        regs[15] = flag(r.loads_disconnected);
        regs[20] = flag(r.grid_available);
        match &r.ev {
            Some(e) => {
                regs[30] = flag(e.plugged);
                // A charger knows a car's SoC only while the car is plugged in.
                regs[31] = if e.plugged { u16_sf(e.soc_pct, -1) } else { 0xFFFF };
                regs[32] = u16_sf(e.current_a, -1);
                regs[33] = u16_sf(e.power_w, 0);
            }
            None => regs[30..34].copy_from_slice(&[0xFFFF; 4]),
        }
        for (k, w) in r.loads_w.iter().enumerate() {
            regs[usize::from(ir::LOAD_POWER) + k] = u16_sf(*w, 0);
        }
        regs
    }

    fn common(img: &mut Image, model: &str, serial: &str, unit: u8) {
        let c = img.model(&COMMON);
        img.set(c, &COMMON, "Mn", &string("Spillway", 16));
        img.set(c, &COMMON, "Md", &string(model, 16));
        img.set(c, &COMMON, "Vr", &string(env!("CARGO_PKG_VERSION"), 8));
        img.set(c, &COMMON, "SN", &string(serial, 16));
        img.set(c, &COMMON, "DA", &[u16::from(unit)]);
    }

    /// Holding registers of the grid meter from 40000.
    fn meter_image(&self) -> Vec<u16> {
        let g = self.readings.grid.unwrap_or_default();
        let three = self.layout.meter_phases == 3;
        let model = if three { &METER_WYE } else { &METER_1PH };
        let mut img = Image::new();
        Bus::common(&mut img, "simulated grid meter", "SIM-METER-1", METER_UNIT);
        let m = img.model(model);
        let amps = if g.voltage_v > 0.0 { g.power_w.abs() / g.voltage_v } else { 0.0 };
        let n = if three { 3.0 } else { 1.0 };
        let set = |img: &mut Image, name: &str, words: &[u16]| img.set(m, model, name, words);
        set(&mut img, "A", &[i16_sf(amps, -2)]);
        set(&mut img, "AphA", &[i16_sf(amps / n, -2)]);
        set(&mut img, "A_SF", &[sf(-2)]);
        set(&mut img, "PhV", &[i16_sf(g.voltage_v, -1)]);
        set(&mut img, "PhVphA", &[i16_sf(g.voltage_v, -1)]);
        set(&mut img, "V_SF", &[sf(-1)]);
        set(&mut img, "Hz", &[i16_sf(g.frequency_hz, -2)]);
        set(&mut img, "Hz_SF", &[sf(-2)]);
        set(&mut img, "W", &[i16_sf(g.power_w, 0)]);
        set(&mut img, "WphA", &[i16_sf(g.power_w / n, 0)]);
        set(&mut img, "W_SF", &[sf(0)]);
        set(&mut img, "TotWhExp", &acc32(g.export_wh));
        set(&mut img, "TotWhImp", &acc32(g.import_wh));
        set(&mut img, "TotWh_SF", &[sf(0)]);
        if three {
            let ll = g.voltage_v * 3f64.sqrt();
            for ph in ["B", "C"] {
                set(&mut img, &format!("Aph{ph}"), &[i16_sf(amps / n, -2)]);
                set(&mut img, &format!("PhVph{ph}"), &[i16_sf(g.voltage_v, -1)]);
                set(&mut img, &format!("Wph{ph}"), &[i16_sf(g.power_w / n, 0)]);
            }
            for name in ["PPV", "PPVphAB", "PPVphBC", "PPVphCA"] {
                set(&mut img, name, &[i16_sf(ll, -1)]);
            }
            for ph in ["A", "B", "C"] {
                set(&mut img, &format!("TotWhExpPh{ph}"), &acc32(g.export_wh / n));
                set(&mut img, &format!("TotWhImpPh{ph}"), &acc32(g.import_wh / n));
            }
        }
        // Evt bit 2 is Power_Failure.
        let evt: u32 = if self.readings.grid_available { 0 } else { 1 << 2 };
        set(&mut img, "Evt", &u32_words(evt));
        img.end();
        img.regs
    }

    /// Holding registers of the PV inverter from 40000.
    fn inverter_image(&self) -> Vec<u16> {
        let pv = &self.readings.pv;
        let g = self.readings.grid.unwrap_or_default();
        let volts = if self.layout.off_grid { 230.0 } else { g.voltage_v };
        let hz = if self.layout.off_grid { 50.0 } else { g.frequency_hz };
        let mut img = Image::new();
        Bus::common(&mut img, "simulated PV inverter", "SIM-PV-1", INVERTER_UNIT);
        let model = &INVERTER_1PH;
        let m = img.model(model);
        let set = |img: &mut Image, name: &str, words: &[u16]| img.set(m, model, name, words);
        let w_sf = if self.layout.inverter_rating_w > 32_000.0 { 1 } else { 0 };
        let amps = if volts > 0.0 { pv.power_w / volts } else { 0.0 };
        set(&mut img, "A", &[u16_sf(amps, -2)]);
        set(&mut img, "AphA", &[u16_sf(amps, -2)]);
        set(&mut img, "A_SF", &[sf(-2)]);
        set(&mut img, "PhVphA", &[u16_sf(volts, -1)]);
        set(&mut img, "V_SF", &[sf(-1)]);
        set(&mut img, "W", &[i16_sf(pv.power_w, w_sf)]);
        set(&mut img, "W_SF", &[sf(w_sf)]);
        set(&mut img, "Hz", &[u16_sf(hz, -2)]);
        set(&mut img, "Hz_SF", &[sf(-2)]);
        set(&mut img, "WH", &acc32(pv.energy_wh));
        set(&mut img, "WH_SF", &[sf(0)]);
        // A fixed, invented cabinet temperature: the point is mandatory.
        set(&mut img, "TmpCab", &[i16_sf(35.0, -1)]);
        set(&mut img, "Tmp_SF", &[sf(-1)]);
        let throttled = pv.limit_w.is_some_and(|l| pv.available_w > l + 0.01 * self.layout.inverter_rating_w);
        let state = if pv.available_w.is_nan() || pv.available_w <= 0.0 {
            2 // SLEEPING
        } else if throttled {
            5 // THROTTLED
        } else {
            4 // MPPT
        };
        set(&mut img, "St", &[state]);
        set(&mut img, "Evt1", &[0, 0]);
        set(&mut img, "Evt2", &[0, 0]);
        let inv = &self.inverter;
        img.regs.push(IMMEDIATE_CONTROLS.id);
        img.regs.push(IMMEDIATE_CONTROLS.len());
        img.regs.extend_from_slice(&inv.m123);
        img.regs.push(DER_AC_CONTROLS.id);
        img.regs.push(DER_AC_CONTROLS.len());
        let s704 = img.regs.len();
        img.regs.extend_from_slice(&inv.m704);
        let rem_s = inv.lim704_until.map_or(0, |t| ((t - self.now_ms).max(0) + 999) / 1000) as u32;
        let at = s704 + off::C704_RVRT_REM;
        img.regs[at..at + 2].copy_from_slice(&u32_words(rem_s));
        // Model 120 last, so the control models keep their addresses.
        let n = img.model(&NAMEPLATE);
        img.set(n, &NAMEPLATE, "DERTyp", &[4]); // 4 = PV
        img.set(n, &NAMEPLATE, "WRtg", &[u16_sf(self.layout.inverter_rating_w, w_sf)]);
        img.set(n, &NAMEPLATE, "WRtg_SF", &[sf(w_sf)]);
        img.end();
        img.regs
    }
}
