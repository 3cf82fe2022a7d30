//! The simulated site: household, loads, tank, battery, EV, grid meter, grid or
//! off-grid supply and faults, stepped in discrete time by the caller.
//!
//! Energy balance, exact by construction (grid power is the residual of each step):
//!
//! ```text
//! PV + import = house + Σ loads + battery charge − battery discharge + export + losses
//! ```
//!
//! where battery charge/discharge are energies into/out of *storage* and `losses` are
//! the battery's conversion losses (AC in − stored while charging, stored − AC out while
//! discharging). Energy outside that balance is reported beside it: `unserved`
//! (demand not met off-grid or in an outage), `pv_spilled` (PV an island could not
//! absorb) and `pv_curtailed` (available PV the inverter held back).

// Configuration checks are written `!(x >= 0.0)` on purpose: NaN must fail them.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod battery;
pub mod calendar;
pub mod config;
pub mod ev;
pub mod faults;
pub mod house;
pub mod meter;
pub mod noise;
pub mod tank;

use chrono_tz::Tz;

use crate::bus::Bus;
use crate::pv_output::PvSource;
use battery::{Battery, ChargeController, ChargerState};
use calendar::Day;
use config::{GarbageMode, LoadKind};
use ev::Ev;
use faults::Faults;
use house::House;
use meter::{Meter, garble};
use noise::{Stream, mix};
use tank::Tank;

pub use config::PlantConfig;

/// Errors building a plant from its configuration.
#[derive(Debug, thiserror::Error)]
pub enum PlantError {
    /// The time zone is not an IANA name chrono-tz knows.
    #[error("unknown time zone \"{0}\": use an IANA name such as Europe/Berlin")]
    TimeZone(String),
    /// A value or combination of values is out of range.
    #[error("{what}: {why}")]
    Invalid {
        /// Where the problem is.
        what: String,
        /// What is wrong, and what would be right.
        why: String,
    },
    /// Two components share a name.
    #[error("the name \"{0}\" is used twice: load, tank, pump and EV names must be unique")]
    DuplicateName(String),
    /// A relay channel named in `wiring` or `faults` does not exist.
    #[error(
        "{place}: no relay channel \"{name}\" (channels are switched load names, and `<load>.<stage>` for stepped loads)"
    )]
    UnknownChannel {
        /// The name given.
        name: String,
        /// The config section that names it.
        place: String,
    },
}

/// `f64::clamp` without its `lo <= hi` check, which costs a compare and a branch on
/// every hot-loop call; the result is the same for every input (signed zeros and NaN
/// included). The bounds must satisfy `lo <= hi`, as they do by construction here.
#[inline(always)]
pub(crate) fn clamp(x: f64, lo: f64, hi: f64) -> f64 {
    let mut x = x;
    if x < lo {
        x = lo;
    }
    if x > hi {
        x = hi;
    }
    x
}

/// Whether two short flag lists differ: a plain loop, a few instructions for the usual
/// one to four relays (`!=` on slices of bytes calls `bcmp`, a library call).
#[inline]
fn differ(a: &[bool], b: &[bool]) -> bool {
    a.len() != b.len() || a.iter().zip(b).any(|(x, y)| x != y)
}

/// The meter's faults among those in force.
fn meter_faults(active: &faults::Active) -> meter::MeterFaults {
    meter::MeterFaults {
        silent: active.meter_silent || active.restarting[0],
        frozen: active.meter_frozen,
        garbage: active.garbage[0],
    }
}

/// What [`Plant::island_supply`] decides for one step.
struct IslandSupply {
    pv: crate::pv_output::AcPower,
    pv_w: f64,
    battery_ac: f64,
    served: f64,
    spilled: f64,
    limit: Option<f64>,
}

/// What actuators set: the plant reads these at every step.
#[derive(Debug, Clone, PartialEq)]
pub struct Controls {
    /// Commanded state of each relay channel ([`Plant::channels`] order); `true` = closed.
    pub relays: Vec<bool>,
    /// Setpoint of each proportional regulator ([`Plant::regulators`] order), 0–100 %.
    pub regulators: Vec<f64>,
    /// Battery power command, W: positive charges, negative discharges.
    pub battery_w: f64,
    /// EV charging current command, A (0 = paused).
    pub ev_current_a: f64,
    /// Inverter active-power limit, W (`None` = no limit).
    pub pv_limit_w: Option<f64>,
}

/// Grid meter reading.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct GridReading {
    /// Grid power, W: import positive, export negative.
    pub power_w: f64,
    /// Meter import counter, Wh.
    pub import_wh: f64,
    /// Meter export counter, Wh.
    pub export_wh: f64,
    /// Phase voltage, V (0 during an outage).
    pub voltage_v: f64,
    /// Frequency, Hz (0 during an outage).
    pub frequency_hz: f64,
    /// When this reading appeared, ms since the epoch (stops advancing when the meter is
    /// silent).
    pub updated_ms: i64,
}

/// PV inverter reading.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct PvReading {
    /// AC output, W.
    pub power_w: f64,
    /// AC power the array could deliver with no limit, W.
    pub available_w: f64,
    /// The limit the inverter obeys now, W.
    pub limit_w: Option<f64>,
    /// Lifetime AC energy, Wh.
    pub energy_wh: f64,
}

/// Tank sensor reading.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct TankReading {
    /// Water temperature, °C.
    pub temp_c: f64,
    /// The element is heating now.
    pub heating: bool,
    /// The thermal cut-out has tripped.
    pub cutout_tripped: bool,
}

/// Battery reading.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct BatteryReading {
    /// State of charge, %.
    pub soc_pct: f64,
    /// Terminal voltage, V.
    pub voltage_v: f64,
    /// Terminal current, A (+ charging).
    pub current_a: f64,
    /// AC power, W (+ charging).
    pub power_w: f64,
    /// Charge-controller stage (off-grid only).
    pub charger: ChargerState,
}

/// EV charger reading.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct EvReading {
    /// A car is plugged in.
    pub plugged: bool,
    /// Car state of charge, % (of the last car plugged in).
    pub soc_pct: f64,
    /// Charging current, A.
    pub current_a: f64,
    /// Charging power, W.
    pub power_w: f64,
}

/// What meters and sensors report now, with noise, delay and faults applied.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Readings {
    /// Grid meter (`None` off-grid).
    pub grid: Option<GridReading>,
    /// The grid is up (always `false` off-grid).
    pub grid_available: bool,
    /// PV inverter.
    pub pv: PvReading,
    /// Tank sensors.
    pub tank: Option<TankReading>,
    /// Battery.
    pub battery: Option<BatteryReading>,
    /// EV charger.
    pub ev: Option<EvReading>,
    /// Each load's own power meter ([`Plant::loads`] order), W.
    pub loads_w: Vec<f64>,
    /// Each relay's actual contact state ([`Plant::channels`] order).
    pub contacts: Vec<bool>,
    /// Off-grid low-voltage disconnect (or an outage overload) has dropped the loads.
    pub loads_disconnected: bool,
}

/// One energy flow: power now and energy so far.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Flow {
    /// Power over the last step, W.
    pub w: f64,
    /// Energy since the start, Wh.
    pub wh: f64,
}

impl Flow {
    #[inline]
    fn add(&mut self, w: f64, dt_h: f64) {
        self.w = w;
        self.wh += w * dt_h;
    }
}

/// Physical truth for energy accounting (see the module docs for the balance).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Flows {
    /// PV AC energy delivered.
    pub pv: Flow,
    /// Household base load served.
    pub house: Flow,
    /// Each load served ([`Plant::loads`] order).
    pub loads: Vec<Flow>,
    /// Into battery storage.
    pub battery_charge: Flow,
    /// Out of battery storage.
    pub battery_discharge: Flow,
    /// From the grid.
    pub grid_import: Flow,
    /// To the grid.
    pub grid_export: Flow,
    /// Battery conversion losses.
    pub losses: Flow,
    /// Demand not served (outside the balance).
    pub unserved: Flow,
    /// PV an island could not absorb (outside the balance).
    pub pv_spilled: Flow,
    /// Available PV held back by the inverter's limit (outside the balance).
    pub pv_curtailed: Flow,
}

impl Flows {
    /// Sources minus sinks of the balance, Wh: zero up to rounding.
    pub fn balance_error_wh(&self) -> f64 {
        let loads: f64 = self.loads.iter().map(|f| f.wh).sum();
        self.pv.wh + self.grid_import.wh - self.house.wh - loads - self.battery_charge.wh + self.battery_discharge.wh
            - self.grid_export.wh
            - self.losses.wh
    }

    /// Total energy of all loads, Wh.
    pub fn loads_wh(&self) -> f64 {
        self.loads.iter().map(|f| f.wh).sum()
    }
}

/// How one load is driven.
#[derive(Debug)]
enum Drive {
    Tank {
        channel: usize,
        rated: f64,
    },
    Switched {
        channel: usize,
        rated: f64,
    },
    Stepped {
        first: usize,
        stages: Vec<f64>,
    },
    /// `heats_tank`: its power goes into the tank, and only while the tank's thermostat
    /// and cut-out let the element heat (`plant.loads[].heats`).
    Regulated {
        index: usize,
        rated: f64,
        heats_tank: bool,
    },
    Ev,
}

/// Island-mode state of an off-grid site.
#[derive(Debug)]
struct OffGrid {
    disconnect_pct: f64,
    reconnect_pct: f64,
}

/// The grid connection's state.
#[derive(Debug)]
struct Grid {
    voltage: f64,
    frequency: f64,
    /// Outage windows, ms.
    outages: Vec<(i64, i64)>,
    next_change_ms: i64,
}

/// A battery inverter's own self-consumption control: it measures the site's net power
/// at its own current transformer and follows it with a first-order lag, one step late.
#[derive(Debug, Clone, Copy)]
struct OwnControl {
    /// Time constant, s (0: follows the last step's net power at once).
    response_s: f64,
    /// Share of the gap closed in one step, for the current step length.
    alpha: f64,
    /// Power it will ask of the battery next step, W, charging positive.
    command_w: f64,
}

/// The simulated site.
pub struct Plant {
    tz: Tz,
    now_ms: i64,
    day: Day,
    pv: Box<dyn PvSource>,
    house: House,
    tank: Option<Tank>,
    battery: Option<Battery>,
    /// The battery's own self-consumption control, when it has one (else it follows the
    /// setpoint written to it).
    own_control: Option<OwnControl>,
    charger: Option<ChargeController>,
    ev: Option<Ev>,
    drives: Vec<Drive>,
    load_names: Vec<String>,
    /// Loads besides the tank's own element whose power heats the tank (regulated loads
    /// with `heats`), by index in [`Plant::loads`] order; usually none.
    tank_heaters: Vec<usize>,
    meter: Meter,
    grid: Option<Grid>,
    off_grid: Option<OffGrid>,
    faults: Faults,
    /// The meter's share of `faults.active`, kept with it (see `apply_faults`).
    meter_faults: meter::MeterFaults,
    flows: Flows,
    bus: Bus,
    /// Channels wired to a coil of the relay module.
    wired: Vec<bool>,
    load_w: Vec<f64>,
    /// Every load is the tank or a plain switched one: its demand changes only with a
    /// contact or the thermostat, so `load_w` is kept between steps.
    loads_switched_only: bool,
    /// The tank's thermostat call when `load_w` was last computed (`None`: never).
    heat_call: Option<bool>,
    /// The relay commands the contacts were last worked out from.
    relays_applied: Vec<bool>,
    /// The contacts must be worked out again: a fault has started or ended since.
    contacts_stale: bool,
    /// The battery flows were all zero last step.
    battery_flows_quiet: bool,
    /// The unserved and spilled flows were both zero last step.
    island_flows_quiet: bool,
    /// Every load's demand is zero (kept with `load_w`).
    loads_off: bool,
    /// The loads' flows and shown powers were written as zero last step.
    load_flows_quiet: bool,
    grid_available: bool,
    disconnected: bool,
    /// The PV inverter's own export limitation (W of export it allows), if switched on.
    export_limiter: Option<f64>,
    seed: u64,
    /// Last step length: (requested s, ms, s, h, 1/s), recomputed only when it changes.
    step_len: (f64, i64, f64, f64, f64),
    /// A recorded household load replacing the modelled one (W at an instant, ms).
    house_replay: Option<Box<dyn FnMut(i64) -> f64 + Send>>,
}

impl Plant {
    /// Builds the plant. `pv` supplies the array's output; `start_ms` is the first instant
    /// (ms since the Unix epoch, UTC); `seed` drives every random draw.
    pub fn new(cfg: &PlantConfig, pv: Box<dyn PvSource>, start_ms: i64, seed: u64) -> Result<Plant, PlantError> {
        let tz_name = cfg.location.as_ref().map_or(cfg.timezone.as_str(), |l| l.timezone.as_str());
        let tz: Tz = tz_name.parse().map_err(|_| PlantError::TimeZone(tz_name.to_owned()))?;
        let invalid = |what: &str, why: &str| PlantError::Invalid { what: what.to_owned(), why: why.to_owned() };
        if cfg.grid.is_some() && cfg.off_grid.is_some() {
            return Err(invalid("plant", "give `grid` or `off_grid`, not both"));
        }
        if cfg.off_grid.is_some() && cfg.battery.is_none() {
            return Err(invalid("off_grid", "an off-grid site needs a `battery`"));
        }
        if let Some(b) = &cfg.battery {
            if b.control == config::BatteryControl::SelfConsumption && cfg.off_grid.is_some() {
                return Err(invalid(
                    "battery",
                    "`control: self_consumption` is for a grid-tied battery; off-grid, the battery always balances the island (remove `control`)",
                ));
            }
            if !(b.response >= 0.0 && b.response.is_finite()) {
                return Err(invalid("battery", "`response` must be a duration ≥ 0 s"));
            }
        }
        if !(cfg.meter.phases == 1 || cfg.meter.phases == 3) || !(cfg.meter.period > 0.0) {
            return Err(invalid("meter", "phases must be 1 or 3 and the period > 0"));
        }
        if !(cfg.inverter.rating > 0.0) {
            return Err(invalid("inverter", "rating must be > 0"));
        }
        // Powers and capacities that cannot be negative: a negative one runs, and gives
        // reports that read as if the controller had failed.
        let mut non_negative: Vec<(&str, &str, f64)> = vec![
            ("house", "standby", cfg.house.standby),
            ("house", "activity", cfg.house.activity),
            ("house", "weekend", cfg.house.weekend),
            ("house", "variability", cfg.house.variability),
        ];
        if let Some(p) = &cfg.pump {
            non_negative.push(("pump", "rated", p.rated));
        }
        if let Some(b) = &cfg.battery {
            non_negative.extend([
                ("battery", "capacity", b.capacity),
                ("battery", "max_charge", b.max_charge),
                ("battery", "max_discharge", b.max_discharge),
            ]);
        }
        if let Some(e) = &cfg.ev {
            non_negative.extend([
                ("ev", "capacity", e.capacity),
                ("ev", "min_current", e.min_current),
                ("ev", "max_current", e.max_current),
                ("ev", "step", e.step),
                ("ev", "voltage", e.voltage),
            ]);
        }
        for (section, key, v) in non_negative {
            if !(v >= 0.0 && v.is_finite()) {
                return Err(invalid(section, &format!("`{key}` must be ≥ 0 (it is {v})")));
            }
        }

        let mut channels: Vec<String> = Vec::new();
        let mut regulators: Vec<String> = Vec::new();
        let mut drives = Vec::new();
        let mut load_names: Vec<String> = Vec::new();
        fn add_name(names: &mut Vec<String>, name: &str) -> Result<(), PlantError> {
            if names.iter().any(|n| n == name) {
                return Err(PlantError::DuplicateName(name.to_owned()));
            }
            names.push(name.to_owned());
            Ok(())
        }
        let tank = match &cfg.tank {
            Some(t) => {
                add_name(&mut load_names, &t.name)?;
                drives.push(Drive::Tank { channel: channels.len(), rated: t.element });
                channels.push(t.name.clone());
                Some(Tank::new(t, Stream::new(seed, 2))?)
            }
            None => None,
        };
        if let Some(p) = &cfg.pump {
            add_name(&mut load_names, &p.name)?;
            drives.push(Drive::Switched { channel: channels.len(), rated: p.rated.max(0.0) });
            channels.push(p.name.clone());
        }
        let mut tank_heaters = Vec::new();
        for l in &cfg.loads {
            add_name(&mut load_names, &l.name)?;
            let what = format!("load \"{}\"", l.name);
            let heats_tank = match (&l.heats, l.kind, &cfg.tank) {
                (None, _, _) => false,
                (Some(_), LoadKind::Switched | LoadKind::Stepped, _) => {
                    return Err(invalid(
                        &what,
                        "`heats` is only for kind: regulated (a relay-switched element is the tank's own, switched on its channel `tank.name`)",
                    ));
                }
                (Some(t), LoadKind::Regulated, Some(tank)) if *t == tank.name => true,
                (Some(t), LoadKind::Regulated, Some(tank)) => {
                    return Err(invalid(
                        &what,
                        &format!("`heats: {t}` names no tank: the plant's tank is \"{}\" (`tank.name`)", tank.name),
                    ));
                }
                (Some(t), LoadKind::Regulated, None) => {
                    return Err(invalid(&what, &format!("`heats: {t}`, but the plant has no `tank`")));
                }
            };
            match l.kind {
                LoadKind::Switched | LoadKind::Regulated => {
                    let rated = l.rated.filter(|r| *r >= 0.0).ok_or_else(|| invalid(&what, "needs `rated` (≥ 0)"))?;
                    if !l.stages.is_empty() {
                        return Err(invalid(&what, "`stages` is only for kind: stepped"));
                    }
                    if l.kind == LoadKind::Switched {
                        drives.push(Drive::Switched { channel: channels.len(), rated });
                        channels.push(l.name.clone());
                    } else {
                        if heats_tank {
                            tank_heaters.push(drives.len());
                        }
                        drives.push(Drive::Regulated { index: regulators.len(), rated, heats_tank });
                        regulators.push(l.name.clone());
                    }
                }
                LoadKind::Stepped => {
                    if l.stages.is_empty() || l.rated.is_some() {
                        return Err(invalid(&what, "a stepped load needs `stages` (and no `rated`)"));
                    }
                    drives.push(Drive::Stepped {
                        first: channels.len(),
                        stages: l.stages.iter().map(|s| s.0.max(0.0)).collect(),
                    });
                    for n in 1..=l.stages.len() {
                        channels.push(format!("{}.{n}", l.name));
                    }
                }
            }
        }
        let ev = match &cfg.ev {
            Some(e) => {
                add_name(&mut load_names, &e.name)?;
                drives.push(Drive::Ev);
                Some(Ev::new(e, Stream::new(seed, 3))?)
            }
            None => None,
        };
        let mut seen: Vec<&str> = Vec::new();
        let mut wiring = Vec::with_capacity(cfg.wiring.len());
        for name in &cfg.wiring {
            let ch = channels
                .iter()
                .position(|c| c == name)
                .ok_or_else(|| PlantError::UnknownChannel { name: name.clone(), place: "wiring".to_owned() })?;
            if seen.contains(&name.as_str()) {
                return Err(invalid("wiring", &format!("channel \"{name}\" is wired to two coils")));
            }
            seen.push(name);
            wiring.push(ch);
        }
        let mut wired = vec![false; channels.len()];
        for &ch in &wiring {
            wired[ch] = true;
        }
        let faults = Faults::new(&cfg.faults, start_ms, |n| channels.iter().position(|c| c == n), channels.len())?;

        let battery = cfg.battery.as_ref().map(Battery::new).transpose()?;
        let own_control = cfg
            .battery
            .as_ref()
            .filter(|b| b.control == config::BatteryControl::SelfConsumption)
            .map(|b| OwnControl { response_s: b.response, alpha: 1.0, command_w: 0.0 });
        let charger = cfg.off_grid.as_ref().map(ChargeController::new).transpose()?;
        let off_grid =
            cfg.off_grid.as_ref().map(|o| OffGrid { disconnect_pct: o.disconnect_soc, reconnect_pct: o.reconnect_soc });
        let grid = if cfg.off_grid.is_some() {
            None
        } else {
            let g = cfg.grid.clone().unwrap_or_default();
            let mut outages: Vec<(i64, i64)> = g
                .outages
                .iter()
                .map(|w| {
                    let s = w.start.resolve(start_ms);
                    (s, s + (w.duration * 1000.0).round() as i64)
                })
                .collect();
            outages.sort_unstable();
            Some(Grid { voltage: g.voltage, frequency: g.frequency, outages, next_change_ms: i64::MIN })
        };

        let n_loads = load_names.len();
        let loads_switched_only = drives.iter().all(|d| matches!(d, Drive::Tank { .. } | Drive::Switched { .. }));
        let controls = Controls {
            relays: vec![false; channels.len()],
            regulators: vec![0.0; regulators.len()],
            battery_w: 0.0,
            ev_current_a: 0.0,
            pv_limit_w: None,
        };
        let readings = Readings {
            grid: (cfg.off_grid.is_none()).then(GridReading::default),
            tank: tank.as_ref().map(|_| TankReading::default()),
            battery: battery.as_ref().map(|_| BatteryReading::default()),
            ev: ev.as_ref().map(|_| EvReading::default()),
            loads_w: vec![0.0; n_loads],
            contacts: vec![false; channels.len()],
            ..Readings::default()
        };
        let bus = Bus::new(
            crate::bus::Layout {
                channels,
                regulators,
                loads: load_names.clone(),
                wiring,
                meter_phases: cfg.meter.phases,
                inverter_rating_w: cfg.inverter.rating,
                has_battery: battery.is_some(),
                battery_setpoint: battery.is_some() && own_control.is_none(),
                has_ev: ev.is_some(),
                has_tank: tank.is_some(),
                off_grid: off_grid.is_some(),
            },
            controls,
            readings,
            start_ms,
        );
        let mut plant = Plant {
            tz,
            now_ms: start_ms,
            day: Day::containing(tz, start_ms),
            pv,
            house: House::new(&cfg.house, Stream::new(seed, 1))?,
            tank,
            battery,
            own_control,
            charger,
            ev,
            drives,
            load_names,
            tank_heaters,
            meter: Meter::new(&cfg.meter, Stream::new(seed, 4), start_ms),
            grid,
            off_grid,
            meter_faults: meter_faults(&faults.active),
            faults,
            flows: Flows { loads: vec![Flow::default(); n_loads], ..Flows::default() },
            bus,
            wired,
            load_w: vec![0.0; n_loads],
            loads_switched_only,
            relays_applied: Vec::new(),
            contacts_stale: true,
            heat_call: None,
            battery_flows_quiet: false,
            island_flows_quiet: false,
            loads_off: true,
            load_flows_quiet: false,
            grid_available: cfg.off_grid.is_none(),
            disconnected: false,
            export_limiter: cfg.inverter.export_limit.map(|w| w.max(0.0)),
            seed,
            step_len: (f64::NAN, 0, 0.0, 0.0, 0.0),
            house_replay: None,
        };
        plant.begin_day();
        plant.update_grid_state();
        plant.bus.set_faults(&plant.faults.active);
        plant.refresh_readings(0.0);
        if let (Some(_), Some(g)) = (&plant.grid, &mut plant.bus.readings.grid) {
            let shown = plant.meter.shown;
            g.power_w = shown.w;
            g.import_wh = shown.import_wh;
            g.export_wh = shown.export_wh;
            g.updated_ms = shown.visible_ms;
        }
        Ok(plant)
    }

    fn begin_day(&mut self) {
        self.day = Day::containing(self.tz, self.now_ms);
        self.house.begin_day(&self.day);
        if let Some(t) = &mut self.tank {
            t.begin_day(&self.day);
        }
        if let Some(e) = &mut self.ev {
            e.begin_day(&self.day);
        }
    }

    /// Whether the grid is up now, and when that next changes; the grid's readings
    /// (availability, voltage, frequency) change only here.
    fn update_grid_state(&mut self) {
        let r = &mut self.bus.readings;
        let Some(g) = &mut self.grid else {
            self.grid_available = false;
            r.grid_available = false;
            return;
        };
        let t = self.now_ms;
        let mut up = true;
        let mut next = i64::MAX;
        for &(s, e) in &g.outages {
            if s > t {
                next = next.min(s);
            } else if e > t {
                up = false;
                next = next.min(e);
            }
        }
        g.next_change_ms = next;
        self.grid_available = up;
        r.grid_available = up;
        if let Some(reading) = &mut r.grid {
            reading.voltage_v = if up { g.voltage } else { 0.0 };
            reading.frequency_hz = if up { g.frequency } else { 0.0 };
        }
    }

    /// Applies fault edges: a restarting device's outputs go to their power-on state
    /// when the reboot begins and again when it ends.
    fn apply_faults(&mut self) {
        let edges = self.faults.update(self.now_ms);
        if edges[faults::device_index(config::Device::Relays)] {
            self.bus.reset_relay_module();
        }
        if edges[faults::device_index(config::Device::Inverter)] {
            self.bus.reset_inverter();
        }
        self.bus.set_faults(&self.faults.active);
        self.meter_faults = meter_faults(&self.faults.active);
        self.contacts_stale = true;
    }

    /// Advances the physics by `dt_s` seconds with the current controls.
    pub fn step(&mut self, dt_s: f64) {
        if dt_s != self.step_len.0 {
            let dt_ms = ((dt_s * 1000.0).round() as i64).max(1);
            let dt = dt_ms as f64 / 1000.0;
            self.step_len = (dt_s, dt_ms, dt, dt / 3600.0, 1.0 / dt);
            if let Some(b) = &mut self.battery {
                b.prepare_step(1.0 / dt);
            }
            if let Some(o) = &mut self.own_control {
                o.alpha = if o.response_s > 0.0 { 1.0 - (-dt / o.response_s).exp() } else { 1.0 };
            }
        }
        let (_, dt_ms, dt, dt_h, inv_dt) = self.step_len;
        let t = self.now_ms;
        if t >= self.day.end_ms {
            self.begin_day();
        }
        if t >= self.faults.next_change_ms {
            self.apply_faults();
        }
        if self.grid.as_ref().is_some_and(|g| t >= g.next_change_ms) {
            self.update_grid_state();
        }
        if let Some(ev) = &mut self.ev {
            ev.update_sessions(t);
        }
        let sec = self.day.local_sec(t);

        // Demand, with the relay module's outputs forced off while it reboots.
        let relays_down = self.faults.active.restarting[2];
        // A contact follows its relay's command unless a fault holds it: it can change
        // only when a command or a fault does, which is seldom, so most steps skip this.
        let mut contacts_changed = false;
        if self.contacts_stale || differ(&self.bus.controls.relays, &self.relays_applied) {
            let controls = &self.bus.controls;
            let stuck = &self.faults.active.stuck;
            let readings = &mut self.bus.readings;
            for (((contact, &commanded), &wired), &stuck) in
                readings.contacts.iter_mut().zip(&controls.relays).zip(&self.wired).zip(stuck)
            {
                let closed = stuck.unwrap_or(commanded && !(relays_down && wired));
                contacts_changed |= closed != *contact;
                *contact = closed;
            }
            self.relays_applied.clone_from(&controls.relays);
            self.contacts_stale = false;
        }
        let house_w = match &mut self.house_replay {
            Some(recorded) => recorded(t).max(0.0),
            None => self.house.power(sec),
        };
        // Switched loads and the tank draw what they drew last step unless a contact or
        // the tank's thermostat has changed since: most steps skip the drive loop.
        let heat_call = self.tank.as_ref().is_some_and(Tank::calls_for_heat);
        if !self.loads_switched_only || contacts_changed || Some(heat_call) != self.heat_call {
            self.heat_call = Some(heat_call);
            self.update_load_demand(dt, relays_down);
        }
        // Summed in load order whatever the count; the usual one or two loads without a
        // loop.
        let demand = match self.load_w.as_slice() {
            [] => house_w,
            [a] => house_w + a,
            [a, b] => house_w + a + b,
            all => all.iter().fold(house_w, |d, w| d + w),
        };
        let controls = &self.bus.controls;

        // Supply.
        // A setpoint lives in the relay module, which forgets it while it reboots; a battery
        // on its own control answers to nothing Spillway writes.
        let battery_cmd = match &self.own_control {
            Some(o) => o.command_w,
            None if relays_down => 0.0,
            None => controls.battery_w,
        };
        let mut limit = controls.pv_limit_w;
        if self.faults.active.restarting[1] {
            limit = Some(0.0);
        }
        let island = !self.grid_available;
        let (charge_room, discharge_room) = match &self.battery {
            Some(b) => {
                let c = match &self.charger {
                    Some(cc) => cc.charge_limit_w(b, inv_dt),
                    None => b.charge_room_w(inv_dt),
                };
                (c, b.discharge_room_w(inv_dt))
            }
            None => (0.0, 0.0),
        };
        let (mut served, mut spilled) = (1.0, 0.0);
        let (pv_sample, pv_w, battery_ac, grid_w);
        if island {
            let s = self.island_supply(t, dt, demand, limit, charge_room, discharge_room);
            (pv_sample, pv_w, battery_ac, grid_w) = (s.pv, s.pv_w, s.battery_ac, 0.0);
            (served, spilled, limit) = (s.served, s.spilled, s.limit);
        } else {
            let cmd = if battery_cmd.is_finite() { battery_cmd } else { 0.0 };
            battery_ac = clamp(cmd, -discharge_room, charge_room);
            if let Some(allowed) = self.export_limiter {
                // Its own current transformer sees this step's demand and battery: the PV
                // may cover them plus the allowed export, cut at once, released at the
                // inverter's ramp.
                let own = (demand + battery_ac + allowed).max(0.0);
                limit = Some(limit.map_or(own, |l| l.min(own)));
            }
            pv_sample = self.pv.step_ac(t, dt, limit);
            pv_w = pv_sample.ac_w.max(0.0);
            grid_w = demand + battery_ac - pv_w;
        }
        if let Some(o) = &mut self.own_control {
            // What its CT shows with the battery taken out: the power that would be
            // exported (positive) or imported (negative). Island steps leave it where the
            // island put the battery, so it resumes from there when the grid returns.
            let target = if island { battery_ac } else { pv_w - demand };
            o.command_w += (target - o.command_w) * o.alpha;
        }

        // Physics.
        let (into, out, loss) = match &mut self.battery {
            Some(b) => b.apply(battery_ac, dt),
            None => (0.0, 0.0, 0.0),
        };
        if let (Some(cc), Some(b)) = (&mut self.charger, &self.battery) {
            cc.update(b, dt, b.charge_room_w(inv_dt));
        }
        let unserved = (1.0 - served) * demand;
        let f = &mut self.flows;
        f.pv.add(pv_w, dt_h);
        f.house.add(house_w * served, dt_h);
        let shown = &mut self.bus.readings.loads_w;
        // Most of the night every load is off: while they stay off there is nothing to add.
        if !(self.loads_off && self.load_flows_quiet) {
            for ((flow, shown), &w) in f.loads.iter_mut().zip(shown.iter_mut()).zip(&self.load_w) {
                let w = w * served;
                flow.add(w, dt_h);
                *shown = w;
            }
            self.load_flows_quiet = self.loads_off;
        }
        // The tank is always the first load and the EV the last. A regulated load that
        // heats the tank adds its power to the element's (on the same element: the relay
        // bypasses the regulator, or one of them drives it).
        if let Some(tank) = &mut self.tank {
            let heat_w = match self.tank_heaters.as_slice() {
                [] => self.load_w[0],
                heaters => heaters.iter().fold(self.load_w[0], |w, &k| w + self.load_w[k]),
            };
            tank.step(heat_w * served, dt, sec);
        }
        if let Some(ev) = &mut self.ev {
            ev.charge(self.load_w[self.load_w.len() - 1] * served, dt);
        }
        f.grid_import.add(grid_w.max(0.0), dt_h);
        f.grid_export.add((-grid_w).max(0.0), dt_h);
        f.pv_curtailed.add((pv_sample.available_ac_w - pv_sample.ac_w).max(0.0), dt_h);
        // Battery flows are zero without a battery (and at rest), unserved and spilled ones
        // while the grid is up: while a group stays zero, adding 0 W changes nothing and
        // is skipped.
        let battery_quiet = self.battery.is_none() || (into == 0.0 && out == 0.0 && loss == 0.0);
        if !(battery_quiet && self.battery_flows_quiet) {
            f.battery_charge.add(into, dt_h);
            f.battery_discharge.add(out, dt_h);
            f.losses.add(loss, dt_h);
            self.battery_flows_quiet = battery_quiet;
        }
        let island_quiet = !island || (unserved == 0.0 && spilled == 0.0);
        if !(island_quiet && self.island_flows_quiet) {
            f.unserved.add(unserved, dt_h);
            f.pv_spilled.add(spilled, dt_h);
            self.island_flows_quiet = island_quiet;
        }

        if let (Some(og), Some(b)) = (&self.off_grid, &self.battery) {
            let soc = b.soc_pct();
            if !self.disconnected && soc <= og.disconnect_pct {
                self.disconnected = true;
            } else if self.disconnected && soc >= og.reconnect_pct {
                self.disconnected = false;
            }
        }

        self.now_ms = t + dt_ms;
        // The devices' clock reads the end of the step, so requests between steps and
        // timers that expire now act before the next step.
        self.bus.tick(self.now_ms);
        let shown = self.bus.readings.grid.as_mut().filter(|_| self.grid.is_some());
        self.meter.step(self.now_ms, dt_ms, grid_w, (f.grid_import.wh, f.grid_export.wh), self.meter_faults, shown);
        self.bus.readings.pv.limit_w = limit;
        self.bus.readings.pv.available_w = pv_sample.available_ac_w;
        self.refresh_readings(battery_ac);
        if served == 0.0 && demand > 0.0 {
            self.bus.readings.loads_disconnected = true;
        }
    }

    /// The supply of an island step (off-grid, or a grid outage): the PV follows the
    /// demand and the battery's room, the battery forms the island, and an overload trips
    /// the loads. Kept out of `step`, whose grid-tied path is the hot one.
    #[inline(never)]
    fn island_supply(
        &mut self,
        t: i64,
        dt: f64,
        demand: f64,
        limit: Option<f64>,
        charge_room: f64,
        discharge_room: f64,
    ) -> IslandSupply {
        let mut served = 1.0;
        let mut spilled = 0.0;
        if self.disconnected || self.battery.is_none() {
            served = 0.0;
        }
        // A grid-tied inverter without a battery to form the island stops (anti-islanding).
        let cap = if self.battery.is_none() { 0.0 } else { served * demand + charge_room };
        let lim = limit.map_or(cap, |l| l.min(cap)).max(0.0);
        let pv_sample = self.pv.step_ac(t, dt, Some(lim));
        let mut pv = pv_sample.ac_w.max(0.0);
        if pv > cap {
            spilled = pv - cap;
            pv = cap;
        }
        let mut net = pv - served * demand;
        if net < 0.0 && -net > discharge_room {
            // Overload: the island inverter trips and every load drops for this step.
            served = 0.0;
            net = pv;
            if net > charge_room {
                spilled += net - charge_room;
                net = charge_room;
                pv = charge_room;
            }
        }
        IslandSupply { pv: pv_sample, pv_w: pv, battery_ac: net, served, spilled, limit: Some(lim) }
    }

    /// Each load's demand from its drive: contacts, regulator setpoints, the tank's
    /// thermostat and the EV's session. Loads are off while the relay module reboots.
    #[inline(never)]
    fn update_load_demand(&mut self, dt: f64, relays_down: bool) {
        let controls = &self.bus.controls;
        let contacts = &self.bus.readings.contacts;
        for (w, drive) in self.load_w.iter_mut().zip(&self.drives) {
            *w = match drive {
                Drive::Tank { channel, rated } => match &self.tank {
                    Some(tank) if contacts[*channel] && tank.calls_for_heat() => *rated,
                    _ => 0.0,
                },
                Drive::Switched { channel, rated } => {
                    if contacts[*channel] {
                        *rated
                    } else {
                        0.0
                    }
                }
                Drive::Stepped { first, stages } => {
                    stages.iter().enumerate().filter(|(k, _)| contacts[first + k]).map(|(_, p)| p).sum()
                }
                Drive::Regulated { index, rated, heats_tank } => {
                    let pct = if relays_down { 0.0 } else { controls.regulators[*index] };
                    let pct = if pct.is_finite() { pct.clamp(0.0, 100.0) } else { 0.0 };
                    // The tank's thermostat and cut-out sit in the element's circuit: open,
                    // the regulator passes no current whatever its setpoint.
                    match (&self.tank, heats_tank) {
                        (Some(tank), true) if !tank.calls_for_heat() => 0.0,
                        _ => rated * pct / 100.0,
                    }
                }
                Drive::Ev => match &mut self.ev {
                    Some(ev) => {
                        let cmd = if relays_down { 0.0 } else { controls.ev_current_a };
                        ev.power_w(cmd, dt)
                    }
                    None => 0.0,
                },
            };
        }
        self.loads_off = self.load_w.iter().all(|w| *w == 0.0);
    }

    /// Copies the state into the readings, with faults applied (per-load powers are
    /// copied in `step`).
    #[inline(always)]
    fn refresh_readings(&mut self, battery_ac: f64) {
        let f = &self.flows;
        let r = &mut self.bus.readings;
        // The grid's availability, voltage and frequency are set by `update_grid_state`,
        // its power and counters by the meter (see `Meter::step`).
        r.pv.power_w = f.pv.w;
        r.pv.energy_wh = f.pv.wh;
        if let (Some(t), Some(tr)) = (&self.tank, &mut r.tank) {
            tr.temp_c = t.temp_c;
            // The tank is always load 0; a regulated load may heat it too.
            tr.heating = f.loads[0].w > 0.0 || self.tank_heaters.iter().any(|&k| f.loads[k].w > 0.0);
            tr.cutout_tripped = t.tripped;
        }
        if let (Some(b), Some(br)) = (&self.battery, &mut r.battery) {
            br.soc_pct = b.soc_pct();
            br.voltage_v = b.voltage_v();
            br.current_a = b.current_a();
            br.power_w = battery_ac;
            br.charger = self.charger.as_ref().map_or(ChargerState::None, |c| c.state);
        }
        if let (Some(e), Some(er)) = (&self.ev, &mut r.ev) {
            er.plugged = e.plugged;
            er.soc_pct = e.soc_pct();
            er.current_a = e.current_a;
            // The EV is always the last load.
            er.power_w = f.loads.last().map_or(0.0, |l| l.w);
        }
        r.loads_disconnected = self.disconnected;

        // Faulty sensors and inverters report garbage (the meter garbles at the source).
        let garbage = self.faults.active.garbage;
        if garbage[1].is_some() || garbage[3].is_some() {
            self.garble_readings();
        }
    }

    /// Corrupts the PV and sensor readings under a garbage fault.
    #[cold]
    #[inline(never)]
    fn garble_readings(&mut self) {
        let garbage = self.faults.active.garbage;
        let r = &mut self.bus.readings;
        let salt = self.now_ms as u64 ^ self.seed;
        let g = |mode: Option<GarbageMode>, v: &mut f64, k: u64| {
            if let Some(m) = mode {
                *v = garble(m, *v, mix(salt ^ k));
            }
        };
        g(garbage[1], &mut r.pv.power_w, 1);
        g(garbage[1], &mut r.pv.available_w, 2);
        if let Some(t) = &mut r.tank {
            g(garbage[3], &mut t.temp_c, 3);
        }
        if let Some(b) = &mut r.battery {
            g(garbage[3], &mut b.soc_pct, 4);
            g(garbage[3], &mut b.voltage_v, 5);
            g(garbage[3], &mut b.current_a, 6);
        }
    }

    /// Adds a fault while the plant runs (a `When::After` start counts from now). One
    /// that starts now is in force at once, before the next step.
    pub fn inject_fault(&mut self, fault: &config::FaultConfig) -> Result<(), PlantError> {
        self.faults.add(fault, self.now_ms, |n| self.bus.layout().channels.iter().position(|c| c == n))?;
        self.apply_faults();
        Ok(())
    }

    /// Replaces the modelled household load with a recorded one: `source(t_ms)` gives
    /// the household's power in W at each step (used by `spillway replay`).
    pub fn replay_house(&mut self, source: Box<dyn FnMut(i64) -> f64 + Send>) {
        self.house_replay = Some(source);
    }

    /// The current instant, ms since the Unix epoch.
    pub fn now_ms(&self) -> i64 {
        self.now_ms
    }

    /// What the actuators set.
    pub fn controls_mut(&mut self) -> &mut Controls {
        &mut self.bus.controls
    }

    /// The controls as set now.
    pub fn controls(&self) -> &Controls {
        &self.bus.controls
    }

    /// What meters and sensors report now.
    pub fn readings(&self) -> &Readings {
        &self.bus.readings
    }

    /// Physical truth for energy accounting.
    pub fn flows(&self) -> &Flows {
        &self.flows
    }

    /// With an EV: the cars that have left so far, and the energy they lacked of their
    /// target SoC when they left, Wh. A car still plugged in is not counted yet.
    pub fn ev_departures(&self) -> Option<(u32, f64)> {
        self.ev.as_ref().map(|e| (e.departures, e.short_wh))
    }

    /// The device bus (Modbus units and MQTT topics).
    pub fn bus(&self) -> &Bus {
        &self.bus
    }

    /// The device bus, for writes.
    pub fn bus_mut(&mut self) -> &mut Bus {
        &mut self.bus
    }

    /// Relay channel names, in [`Controls::relays`] order.
    pub fn channels(&self) -> &[String] {
        self.bus.layout().channels.as_slice()
    }

    /// Regulator names, in [`Controls::regulators`] order.
    pub fn regulators(&self) -> &[String] {
        self.bus.layout().regulators.as_slice()
    }

    /// Load names, in [`Flows::loads`] and [`Readings::loads_w`] order.
    pub fn loads(&self) -> &[String] {
        &self.load_names
    }

    /// The power a relay channel switches when it closes, W: a tank's element, a
    /// switched load's rating, one stage of a stepped load. `None` for no such channel.
    pub fn channel_rated_w(&self, channel: usize) -> Option<f64> {
        self.drives.iter().find_map(|d| match d {
            Drive::Tank { channel: c, rated } | Drive::Switched { channel: c, rated } => {
                (*c == channel).then_some(*rated)
            }
            Drive::Stepped { first, stages } => channel.checked_sub(*first).and_then(|k| stages.get(k)).copied(),
            Drive::Regulated { .. } | Drive::Ev => None,
        })
    }

    /// Whether a load (by index in [`Plant::loads`] order) is a regulated load that heats
    /// the tank (`heats`).
    pub fn heats_tank(&self, load: usize) -> bool {
        self.tank_heaters.contains(&load)
    }

    /// A regulator's power at 100 %, W, and whether it heats the tank (`heats`); `None`
    /// for no such regulator.
    pub fn regulator_rated_w(&self, regulator: usize) -> Option<(f64, bool)> {
        self.drives.iter().find_map(|d| match d {
            Drive::Regulated { index, rated, heats_tank } => (*index == regulator).then_some((*rated, *heats_tank)),
            _ => None,
        })
    }

    /// Index of a relay channel by name.
    pub fn channel(&self, name: &str) -> Option<usize> {
        self.channels().iter().position(|c| c == name)
    }

    /// Index of a regulator by name.
    pub fn regulator(&self, name: &str) -> Option<usize> {
        self.regulators().iter().position(|c| c == name)
    }

    /// Index of a load by name.
    pub fn load(&self, name: &str) -> Option<usize> {
        self.load_names.iter().position(|c| c == name)
    }

    /// The tank's true water temperature (physics, not the sensor's reading, which a
    /// fault may garble), °C: the whole tank's, or a layered tank's at its sensor.
    pub fn tank_temp_c(&self) -> Option<f64> {
        self.tank.as_ref().map(|t| t.temp_c)
    }

    /// The water-heater tank, for its layers' temperatures and mean.
    pub fn tank(&self) -> Option<&Tank> {
        self.tank.as_ref()
    }

    /// Hot water drawn from the tank so far, litres at tank temperature.
    pub fn hot_water_drawn_l(&self) -> Option<f64> {
        self.tank.as_ref().map(|t| t.drawn_l)
    }

    /// With a tank: the litres that came out of the tap colder than their draw asked
    /// for (the tank below the tap temperature), and the heat they lacked, Wh.
    pub fn hot_water_short(&self) -> Option<(f64, f64)> {
        self.tank.as_ref().map(|t| (t.lukewarm_l, t.short_wh))
    }

    /// Switches the PV inverter's own export limitation on (`Some(W of export allowed)`)
    /// or off: an inverter with its own current transformer at the grid connection,
    /// holding export at the limit with no controller at all (a site without Spillway;
    /// the offline baseline of a site whose export is limited). Off unless the plant's
    /// `inverter.export_limit` sets it.
    pub fn set_export_limiter(&mut self, allowed_w: Option<f64>) {
        self.export_limiter = allowed_w.map(|w| w.max(0.0));
    }

    /// The PV inverter's own export limitation, W of export allowed (None: none).
    pub fn export_limiter(&self) -> Option<f64> {
        self.export_limiter
    }

    /// The battery's true stored energy, Wh.
    pub fn battery_stored_wh(&self) -> Option<f64> {
        self.battery.as_ref().map(|b| b.stored_wh)
    }
}
