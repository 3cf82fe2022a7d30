//! Stationary battery: energy store with charge/discharge power limits, separate
//! charge and discharge efficiencies, state-of-charge limits, and a reported terminal
//! voltage from an open-circuit-voltage curve plus an IR drop. Also the off-grid
//! charge controller (bulk → absorption → float).
//!
//! Model: the efficiencies carry every conversion loss (inverter and cell), so the
//! stored energy changes by η_c·P_ac while charging and by P_ac/η_d while discharging.
//! Voltage and current are derived for reporting only: I = P_dc / OCV(SoC) and
//! V = OCV(SoC) + I·R (I > 0 charging), which raises the voltage while charging and
//! sags it under load, as a real pack does.

use super::config::{BatteryConfig, Chemistry, OffGridConfig};
use super::{PlantError, clamp};

/// Open-circuit voltage per cell against state of charge (0, 10, …, 100 %).
/// LFP: the flat plateau around 3.3 V with steep ends; lead-acid: the near-linear
/// 1.9–2.12 V rest voltage of a 2 V cell. Both are typical shapes, from memory.
const OCV_LFP: [f64; 11] = [2.80, 3.20, 3.25, 3.27, 3.29, 3.30, 3.31, 3.32, 3.34, 3.36, 3.45];
const OCV_LEAD_ACID: [f64; 11] = [1.88, 1.92, 1.94, 1.97, 1.99, 2.02, 2.04, 2.06, 2.08, 2.10, 2.12];

/// Charge-controller stage of an off-grid battery.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum ChargerState {
    /// No charge controller (grid-tied battery inverter).
    #[default]
    None,
    /// Constant current: all the power the array and limits allow.
    Bulk,
    /// Constant voltage at the absorption voltage.
    Absorption,
    /// Constant voltage at the float voltage.
    Float,
}

impl ChargerState {
    /// Register and topic code: 0 none, 1 bulk, 2 absorption, 3 float.
    pub fn code(self) -> u16 {
        match self {
            ChargerState::None => 0,
            ChargerState::Bulk => 1,
            ChargerState::Absorption => 2,
            ChargerState::Float => 3,
        }
    }

    /// Lower-case name for MQTT payloads.
    pub fn name(self) -> &'static str {
        match self {
            ChargerState::None => "none",
            ChargerState::Bulk => "bulk",
            ChargerState::Absorption => "absorption",
            ChargerState::Float => "float",
        }
    }
}

/// The battery's state and parameters.
#[derive(Debug)]
pub struct Battery {
    capacity_wh: f64,
    max_charge_w: f64,
    max_discharge_w: f64,
    eta_c: f64,
    eta_d: f64,
    min_wh: f64,
    max_wh: f64,
    /// Energy stored now, Wh.
    pub stored_wh: f64,
    cells: f64,
    ocv_table: &'static [f64; 11],
    resistance: f64,
    inv_capacity: f64,
    inv_eta_c: f64,
    inv_eta_d: f64,
    current_a: f64,
    voltage_v: f64,
    ocv_v: f64,
    inv_ocv: f64,
    ocv_at_wh: f64,
    /// The step (1/s) the two thresholds below were worked out for (NaN: none yet).
    rooms_inv_dt: f64,
    /// At or below this charge the charging room is the full rating.
    full_rating_below_wh: f64,
    /// At or above this charge the discharging room is the full rating.
    full_rating_above_wh: f64,
}

impl Battery {
    /// Builds the battery from its configuration.
    pub fn new(cfg: &BatteryConfig) -> Result<Battery, PlantError> {
        let bad = |why: &str| PlantError::Invalid { what: "battery".to_owned(), why: why.to_owned() };
        if !(cfg.capacity > 0.0) || !(cfg.max_charge >= 0.0) || !(cfg.max_discharge >= 0.0) {
            return Err(bad("capacity must be > 0 and power limits ≥ 0"));
        }
        let pct = |v: f64| (0.0..=100.0).contains(&v);
        let efficiency = |v: f64| v > 0.0 && v <= 100.0;
        if !(efficiency(cfg.charge_efficiency) && efficiency(cfg.discharge_efficiency)) {
            return Err(bad("efficiencies must be in (0, 100 %]"));
        }
        if !(pct(cfg.soc_min) && pct(cfg.soc_max) && pct(cfg.initial_soc)) || cfg.soc_min > cfg.soc_max {
            return Err(bad("states of charge must be within 0–100 % and soc_min ≤ soc_max"));
        }
        let (per_cell, table) = match cfg.chemistry {
            Chemistry::Lfp => (3.2, &OCV_LFP),
            Chemistry::LeadAcid => (2.0, &OCV_LEAD_ACID),
        };
        Ok(Battery {
            capacity_wh: cfg.capacity,
            max_charge_w: cfg.max_charge,
            max_discharge_w: cfg.max_discharge,
            eta_c: cfg.charge_efficiency / 100.0,
            eta_d: cfg.discharge_efficiency / 100.0,
            min_wh: cfg.capacity * cfg.soc_min / 100.0,
            max_wh: cfg.capacity * cfg.soc_max / 100.0,
            stored_wh: cfg.capacity * cfg.initial_soc / 100.0,
            cells: (cfg.nominal_voltage / per_cell).round().max(1.0),
            ocv_table: table,
            resistance: cfg.resistance_ohm.max(0.0),
            inv_capacity: 1.0 / cfg.capacity,
            inv_eta_c: 100.0 / cfg.charge_efficiency,
            inv_eta_d: 100.0 / cfg.discharge_efficiency,
            current_a: 0.0,
            voltage_v: 0.0,
            ocv_v: 0.0,
            inv_ocv: 0.0,
            ocv_at_wh: 0.0,
            rooms_inv_dt: f64::NAN,
            full_rating_below_wh: f64::NEG_INFINITY,
            full_rating_above_wh: f64::INFINITY,
        })
        .map(|mut b| {
            b.ocv_at_wh = b.stored_wh;
            b.ocv_v = b.ocv();
            b.inv_ocv = 1.0 / b.ocv_v;
            b.voltage_v = b.ocv_v;
            b
        })
    }

    /// State of charge, %.
    #[inline]
    pub fn soc_pct(&self) -> f64 {
        100.0 * self.stored_wh * self.inv_capacity
    }

    /// Open-circuit voltage of the pack now.
    pub fn ocv(&self) -> f64 {
        let x = clamp(self.soc_pct() * 0.1, 0.0, 10.0);
        // x is in [0, 10]: 32-bit conversions give the same values as `usize` ones and
        // cost one instruction each (an unsigned 64-bit one takes several on x86-64).
        let i = (x as i32).min(9);
        let f = x - f64::from(i);
        let i = i as usize;
        self.cells * (self.ocv_table[i] * (1.0 - f) + self.ocv_table[i + 1] * f)
    }

    /// Terminal current (A, + charging) over the last step.
    pub fn current_a(&self) -> f64 {
        self.current_a
    }

    /// Terminal voltage over the last step.
    pub fn voltage_v(&self) -> f64 {
        self.voltage_v
    }

    /// Largest AC charging power for a step of 1/`inv_dt` s: the rating, and the
    /// headroom to `soc_max` so a step never overshoots.
    #[inline]
    pub fn charge_room_w(&self, inv_dt: f64) -> f64 {
        // Far from full the room is the rating: a comparison instead of the formula keeps
        // the stored charge's step-to-step dependency chain short (see `prepare_step`).
        if self.stored_wh <= self.full_rating_below_wh && inv_dt == self.rooms_inv_dt {
            return self.max_charge_w;
        }
        let room = (self.max_wh - self.stored_wh).max(0.0) * 3600.0 * self.inv_eta_c * inv_dt;
        self.max_charge_w.min(room)
    }

    /// Largest AC discharging power for a step of 1/`inv_dt` s.
    #[inline]
    pub fn discharge_room_w(&self, inv_dt: f64) -> f64 {
        if self.stored_wh >= self.full_rating_above_wh && inv_dt == self.rooms_inv_dt {
            return self.max_discharge_w;
        }
        let room = (self.stored_wh - self.min_wh).max(0.0) * 3600.0 * self.eta_d * inv_dt;
        self.max_discharge_w.min(room)
    }

    /// Works out, for steps of 1/`inv_dt` s, the charge below which charging (above
    /// which discharging) is limited by the rating alone, so that `charge_room_w` and
    /// `discharge_room_w` return the rating without the formula there. The thresholds
    /// keep a relative margin of 10⁻⁹, far above the formula's rounding (a few 10⁻¹⁶),
    /// so the rating is returned only where the formula gives at least the rating: the
    /// result is the same bit for bit.
    pub fn prepare_step(&mut self, inv_dt: f64) {
        const MARGIN: f64 = 1.0 + 1e-9;
        let per_wh_charge = 3600.0 * self.inv_eta_c * inv_dt;
        let per_wh_discharge = 3600.0 * self.eta_d * inv_dt;
        self.rooms_inv_dt = inv_dt;
        self.full_rating_below_wh = if per_wh_charge > 0.0 && per_wh_charge.is_finite() {
            self.max_wh - self.max_charge_w / per_wh_charge * MARGIN
        } else {
            f64::NEG_INFINITY
        };
        self.full_rating_above_wh = if per_wh_discharge > 0.0 && per_wh_discharge.is_finite() {
            self.min_wh + self.max_discharge_w / per_wh_discharge * MARGIN
        } else {
            f64::INFINITY
        };
    }

    /// Applies `ac_w` (+ charging, − discharging; already within the rooms) for `dt` s.
    /// Returns (power into storage, power out of storage, conversion loss), all ≥ 0.
    #[inline]
    pub fn apply(&mut self, ac_w: f64, dt: f64) -> (f64, f64, f64) {
        let (into, out, loss) = if ac_w >= 0.0 {
            let into = ac_w * self.eta_c;
            (into, 0.0, ac_w - into)
        } else {
            let out = -ac_w * self.inv_eta_d;
            (0.0, out, out + ac_w)
        };
        let stored = self.stored_wh + (into - out) * dt * (1.0 / 3600.0);
        // The rooms keep the charge within its limits, so the clamp almost never acts: a
        // branch keeps the min/max off the step-to-step dependency chain.
        self.stored_wh =
            if stored >= 0.0 && stored <= self.capacity_wh { stored } else { clamp(stored, 0.0, self.capacity_wh) };
        // Reported terminal values: I = P_dc / OCV, V = OCV + I·R. The OCV is
        // re-read from the curve only after the charge moves by 0.01 % of capacity
        // (under 1 mV on these curves), which keeps the division off most steps.
        if (self.stored_wh - self.ocv_at_wh).abs() > self.capacity_wh * 1e-4 {
            self.ocv_at_wh = self.stored_wh;
            self.ocv_v = self.ocv();
            self.inv_ocv = 1.0 / self.ocv_v;
        }
        self.current_a = (into - out) * self.inv_ocv;
        self.voltage_v = self.ocv_v + self.current_a * self.resistance;
        (into, out, loss)
    }

    /// Charging efficiency (stored per AC in).
    pub fn eta_c(&self) -> f64 {
        self.eta_c
    }

    /// Pack internal resistance, ohms.
    pub fn resistance(&self) -> f64 {
        self.resistance
    }
}

/// The off-grid charge controller: a three-stage charger that decides how much
/// charging power the battery may take, and so how far the array must be throttled.
#[derive(Debug)]
pub struct ChargeController {
    absorption_v: f64,
    float_v: f64,
    rebulk_v: f64,
    absorption_s: f64,
    /// Current stage.
    pub state: ChargerState,
    in_absorption_s: f64,
}

impl ChargeController {
    /// Builds the controller from the off-grid configuration.
    pub fn new(cfg: &OffGridConfig) -> Result<ChargeController, PlantError> {
        if !(cfg.rebulk_voltage < cfg.float_voltage && cfg.float_voltage <= cfg.absorption_voltage) {
            return Err(PlantError::Invalid {
                what: "off_grid".to_owned(),
                why: "voltages must satisfy rebulk < float ≤ absorption".to_owned(),
            });
        }
        Ok(ChargeController {
            absorption_v: cfg.absorption_voltage,
            float_v: cfg.float_voltage,
            rebulk_v: cfg.rebulk_voltage,
            absorption_s: cfg.absorption_time,
            state: ChargerState::Bulk,
            in_absorption_s: 0.0,
        })
    }

    /// Largest AC charging power the controller allows now: the battery's own room in
    /// bulk; in absorption and float, the power that holds the terminal voltage at the
    /// stage's target, I = (V_target − OCV)/R.
    pub fn charge_limit_w(&self, battery: &Battery, inv_dt: f64) -> f64 {
        let room = battery.charge_room_w(inv_dt);
        let target = match self.state {
            ChargerState::Absorption => self.absorption_v,
            ChargerState::Float => self.float_v,
            _ => return room,
        };
        let r = battery.resistance().max(1e-6);
        let amps = ((target - battery.ocv()) / r).max(0.0);
        (amps * target / battery.eta_c()).min(room)
    }

    /// Moves between stages after a step of `dt` s; `room_w` is the battery's charge room.
    pub fn update(&mut self, battery: &Battery, dt: f64, room_w: f64) {
        let v = battery.voltage_v();
        match self.state {
            ChargerState::Bulk | ChargerState::None => {
                if v >= self.absorption_v || room_w <= 0.0 {
                    self.state = ChargerState::Absorption;
                    self.in_absorption_s = 0.0;
                }
            }
            ChargerState::Absorption => {
                self.in_absorption_s += dt;
                if self.in_absorption_s >= self.absorption_s || room_w <= 0.0 {
                    self.state = ChargerState::Float;
                }
            }
            ChargerState::Float => {
                if v <= self.rebulk_v {
                    self.state = ChargerState::Bulk;
                }
            }
        }
    }
}
