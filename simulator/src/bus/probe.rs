//! In-process access to what a register or topic holds, without encoding it.
//!
//! An accelerated offline run reads the plant at the addresses a site file names, a
//! few times every simulated second for a whole year; building register images for each
//! read would cost more than the physics. So the run asks the bus once, at set-up, what
//! an address *means* ([`Probe`]), and then reads that value straight from the
//! [`Readings`] and [`Controls`] at full precision. Whether a device answers at all
//! (silent meter, restart) is still asked of the bus each time ([`Bus::answers`]).

use super::sunspec::{COMMON, INVERTER_1PH, METER_1PH, METER_WYE};
use super::{
    AVAILABLE_POWER, Bus, BusError, HR_BATTERY_W, HR_EV_CURRENT, HR_REGULATOR, INVERTER_UNIT, METER_UNIT, RELAY_UNIT,
    SENSOR_UNIT, SUNSPEC_BASE, Table, ir,
};
use crate::plant::{Controls, Readings};

/// What a register, bit or topic of the simulated devices carries.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Probe {
    /// Grid power, W, import positive.
    GridPower,
    /// Meter import counter, Wh.
    GridImportWh,
    /// Meter export counter, Wh.
    GridExportWh,
    /// Grid voltage, V.
    GridVoltage,
    /// Grid frequency, Hz.
    GridFrequency,
    /// Grid current, A (magnitude).
    GridCurrent,
    /// PV inverter AC output, W.
    PvPower,
    /// PV inverter lifetime energy, Wh.
    PvEnergyWh,
    /// PV power available without a limit, W.
    PvAvailable,
    /// Commanded state of a relay channel (a coil), 0/1.
    RelayCommand(usize),
    /// Actual contact of a relay channel (a discrete input), 0/1.
    RelayContact(usize),
    /// EV current setpoint, A.
    EvCurrentSetpoint,
    /// Battery power setpoint, W.
    BatterySetpoint,
    /// Regulator setpoint, %.
    RegulatorSetpoint(usize),
    /// Tank temperature, °C.
    TankTemp,
    /// Tank element heating, 0/1.
    TankHeating,
    /// Tank cut-out tripped, 0/1.
    TankCutout,
    /// Battery state of charge, %.
    BatterySoc,
    /// Battery voltage, V.
    BatteryVoltage,
    /// Battery current, A, + charging.
    BatteryCurrent,
    /// Battery power, W, + charging.
    BatteryPower,
    /// Charger state code (0 none, 1 bulk, 2 absorption, 3 float).
    ChargerState,
    /// Loads disconnected, 0/1.
    LoadsDisconnected,
    /// Grid available, 0/1.
    GridAvailable,
    /// EV plugged in, 0/1.
    EvPlugged,
    /// EV state of charge, %.
    EvSoc,
    /// EV charging current, A.
    EvCurrent,
    /// EV charging power, W.
    EvPower,
    /// A load's own power meter, W (plant load order).
    LoadPower(usize),
}

fn flag(b: bool) -> f64 {
    if b { 1.0 } else { 0.0 }
}

impl Probe {
    /// The value now, in the unit named by the variant; `None` when the component is absent.
    #[inline]
    pub fn value(self, r: &Readings, c: &Controls) -> Option<f64> {
        Some(match self {
            Probe::GridPower => r.grid?.power_w,
            Probe::GridImportWh => r.grid?.import_wh,
            Probe::GridExportWh => r.grid?.export_wh,
            Probe::GridVoltage => r.grid?.voltage_v,
            Probe::GridFrequency => r.grid?.frequency_hz,
            Probe::GridCurrent => {
                let g = r.grid?;
                if g.voltage_v > 0.0 { g.power_w.abs() / g.voltage_v } else { 0.0 }
            }
            Probe::PvPower => r.pv.power_w,
            Probe::PvEnergyWh => r.pv.energy_wh,
            Probe::PvAvailable => r.pv.available_w,
            Probe::RelayCommand(ch) => flag(*c.relays.get(ch)?),
            Probe::RelayContact(ch) => flag(*r.contacts.get(ch)?),
            Probe::EvCurrentSetpoint => c.ev_current_a,
            Probe::BatterySetpoint => c.battery_w,
            Probe::RegulatorSetpoint(k) => *c.regulators.get(k)?,
            Probe::TankTemp => r.tank?.temp_c,
            Probe::TankHeating => flag(r.tank?.heating),
            Probe::TankCutout => flag(r.tank?.cutout_tripped),
            Probe::BatterySoc => r.battery?.soc_pct,
            Probe::BatteryVoltage => r.battery?.voltage_v,
            Probe::BatteryCurrent => r.battery?.current_a,
            Probe::BatteryPower => r.battery?.power_w,
            Probe::ChargerState => f64::from(r.battery?.charger.code()),
            Probe::LoadsDisconnected => flag(r.loads_disconnected),
            Probe::GridAvailable => flag(r.grid_available),
            Probe::EvPlugged => flag(r.ev?.plugged),
            // A charger knows a car's SoC only while the car is plugged in.
            Probe::EvSoc => r.ev.filter(|e| e.plugged)?.soc_pct,
            Probe::EvCurrent => r.ev?.current_a,
            Probe::EvPower => r.ev?.power_w,
            Probe::LoadPower(k) => *r.loads_w.get(k)?,
        })
    }

    /// The Modbus unit of the device that reports it.
    pub fn unit(self) -> u8 {
        match self {
            Probe::GridPower
            | Probe::GridImportWh
            | Probe::GridExportWh
            | Probe::GridVoltage
            | Probe::GridFrequency
            | Probe::GridCurrent => METER_UNIT,
            Probe::PvPower | Probe::PvEnergyWh | Probe::PvAvailable => INVERTER_UNIT,
            Probe::RelayCommand(_)
            | Probe::RelayContact(_)
            | Probe::EvCurrentSetpoint
            | Probe::BatterySetpoint
            | Probe::RegulatorSetpoint(_) => RELAY_UNIT,
            _ => SENSOR_UNIT,
        }
    }
}

/// First data register of the model that follows the common model (meter or inverter).
const fn second_model_data() -> u16 {
    SUNSPEC_BASE + 2 + (2 + COMMON.len()) + 2
}

impl Bus {
    /// Whether a unit answers now (a silent meter times out, a restarting device fails).
    #[inline]
    pub fn answers(&self, unit: u8) -> Result<(), BusError> {
        self.check_unit(unit)
    }

    /// What `address` of a unit's table carries, for in-process reading; `None` for an
    /// address outside the map or one that carries no reading (scale factors, names).
    pub fn probe(&self, unit: u8, table: Table, address: u16) -> Option<Probe> {
        let data = second_model_data();
        match (unit, table) {
            (METER_UNIT, Table::HoldingRegisters) if !self.layout().off_grid => {
                let model = if self.layout().meter_phases == 3 { &METER_WYE } else { &METER_1PH };
                let (point, _) = model.point_at(address.checked_sub(data)?)?;
                Some(match point.name {
                    "W" => Probe::GridPower,
                    "TotWhImp" => Probe::GridImportWh,
                    "TotWhExp" => Probe::GridExportWh,
                    "PhV" | "PhVphA" => Probe::GridVoltage,
                    "Hz" => Probe::GridFrequency,
                    "A" => Probe::GridCurrent,
                    _ => return None,
                })
            }
            (INVERTER_UNIT, Table::HoldingRegisters) if address >= AVAILABLE_POWER => {
                (address <= AVAILABLE_POWER + 1).then_some(Probe::PvAvailable)
            }
            (INVERTER_UNIT, Table::HoldingRegisters) => {
                let (point, _) = INVERTER_1PH.point_at(address.checked_sub(data)?)?;
                Some(match point.name {
                    "W" => Probe::PvPower,
                    "WH" => Probe::PvEnergyWh,
                    _ => return None,
                })
            }
            (RELAY_UNIT, Table::Coils) => {
                self.layout().wiring.get(usize::from(address)).map(|&ch| Probe::RelayCommand(ch))
            }
            (RELAY_UNIT, Table::DiscreteInputs) => {
                self.layout().wiring.get(usize::from(address)).map(|&ch| Probe::RelayContact(ch))
            }
            (RELAY_UNIT, Table::HoldingRegisters) => match address {
                HR_EV_CURRENT => Some(Probe::EvCurrentSetpoint),
                a if a == HR_BATTERY_W || a == HR_BATTERY_W + 1 => Some(Probe::BatterySetpoint),
                a if a >= HR_REGULATOR && usize::from(a - HR_REGULATOR) < self.layout().regulators.len() => {
                    Some(Probe::RegulatorSetpoint(usize::from(a - HR_REGULATOR)))
                }
                _ => None,
            },
            (SENSOR_UNIT, Table::InputRegisters) => Some(match address {
                ir::TANK_TEMP => Probe::TankTemp,
                ir::TANK_HEATING => Probe::TankHeating,
                ir::TANK_CUTOUT => Probe::TankCutout,
                ir::BATTERY_SOC => Probe::BatterySoc,
                ir::BATTERY_VOLTAGE => Probe::BatteryVoltage,
                ir::BATTERY_CURRENT => Probe::BatteryCurrent,
                ir::BATTERY_POWER => Probe::BatteryPower,
                ir::CHARGER_STATE => Probe::ChargerState,
                ir::LOADS_DISCONNECTED => Probe::LoadsDisconnected,
                ir::GRID_AVAILABLE => Probe::GridAvailable,
                ir::EV_PLUGGED => Probe::EvPlugged,
                ir::EV_SOC => Probe::EvSoc,
                ir::EV_CURRENT => Probe::EvCurrent,
                ir::EV_POWER => Probe::EvPower,
                a if a >= ir::LOAD_POWER && usize::from(a - ir::LOAD_POWER) < self.layout().loads.len() => {
                    Probe::LoadPower(usize::from(a - ir::LOAD_POWER))
                }
                _ => return None,
            }),
            _ => None,
        }
    }

    /// What an MQTT state topic (`sim/...`) carries.
    pub fn probe_topic(&self, topic: &str) -> Option<Probe> {
        let rest = topic.strip_prefix(super::mqtt::PREFIX)?.strip_prefix('/')?;
        let layout = self.layout();
        Some(match rest {
            "meter/power" => Probe::GridPower,
            "meter/import_energy" => Probe::GridImportWh,
            "meter/export_energy" => Probe::GridExportWh,
            "meter/voltage" => Probe::GridVoltage,
            "meter/frequency" => Probe::GridFrequency,
            "grid/available" => Probe::GridAvailable,
            "inverter/power" => Probe::PvPower,
            "inverter/available" => Probe::PvAvailable,
            "inverter/energy" => Probe::PvEnergyWh,
            "tank/temperature" => Probe::TankTemp,
            "tank/heating" => Probe::TankHeating,
            "tank/cutout" => Probe::TankCutout,
            "battery/soc" => Probe::BatterySoc,
            "battery/voltage" => Probe::BatteryVoltage,
            "battery/current" => Probe::BatteryCurrent,
            "battery/power" => Probe::BatteryPower,
            "battery/charger" => Probe::ChargerState,
            "loads/disconnected" => Probe::LoadsDisconnected,
            "ev/plugged" => Probe::EvPlugged,
            "ev/soc" => Probe::EvSoc,
            "ev/current" => Probe::EvCurrent,
            "ev/power" => Probe::EvPower,
            other => {
                if let Some(name) = other.strip_prefix("load/").and_then(|s| s.strip_suffix("/power")) {
                    return layout.loads.iter().position(|l| l == name).map(Probe::LoadPower);
                }
                if let Some(name) = other.strip_prefix("relay/").and_then(|s| s.strip_suffix("/state")) {
                    return layout.channels.iter().position(|c| c == name).map(Probe::RelayContact);
                }
                return None;
            }
        })
    }
}
