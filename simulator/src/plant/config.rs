//! The `plant:` section of a site file (minus PV): every key, its unit and its default.
//!
//! Values with units go through [`crate::quantity`]; plain numbers are in the base unit
//! (W, Wh, °C, %, s, L, V, A). Unknown keys are errors everywhere.

use serde::{Deserialize, Deserializer, de};

use crate::quantity;

/// A power in a list (`[1kW, 1kW, 500W]`), in W.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Watts(pub f64);

impl<'de> Deserialize<'de> for Watts {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        quantity::power(d).map(Watts)
    }
}

/// The plant's description: household, loads, storage, meter, grid and faults.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlantConfig {
    /// Where the site is (latitude, longitude, altitude, time zone). Needed for the
    /// modelled PV; its time zone is also the plant's.
    #[serde(default)]
    pub location: Option<crate::pv::LocationConfig>,
    /// The PV system: arrays, strings, inverter, losses, shading.
    #[serde(default)]
    pub solar: Option<crate::pv::SolarConfig>,
    /// The sky over the site (clouds, air temperature, wind, or a measured series).
    #[serde(default)]
    pub weather: crate::weather::WeatherConfig,
    /// IANA time zone of the site when there is no `location`; schedules are in local time.
    #[serde(default = "default_timezone")]
    pub timezone: String,
    /// Seed the caller may use when none is given on the command line.
    #[serde(default)]
    pub seed: Option<u64>,
    /// Household base load.
    #[serde(default)]
    pub house: HouseConfig,
    /// Water-heater tank with its element on a relay.
    #[serde(default)]
    pub tank: Option<TankConfig>,
    /// Pool pump on a relay.
    #[serde(default)]
    pub pump: Option<PumpConfig>,
    /// Further loads: heaters, dump loads, stepped heaters, proportional regulators.
    #[serde(default)]
    pub loads: Vec<LoadConfig>,
    /// Stationary battery behind its own inverter.
    #[serde(default)]
    pub battery: Option<BatteryConfig>,
    /// EV charger and the car sessions that use it.
    #[serde(default)]
    pub ev: Option<EvConfig>,
    /// Grid meter at the connection point.
    #[serde(default)]
    pub meter: MeterConfig,
    /// Grid connection (the default when neither `grid` nor `off_grid` is given).
    #[serde(default)]
    pub grid: Option<GridConfig>,
    /// No grid: a charge controller and a low-voltage disconnect instead.
    #[serde(default)]
    pub off_grid: Option<OffGridConfig>,
    /// PV inverter facts the device bus needs.
    #[serde(default)]
    pub inverter: InverterConfig,
    /// Relay-module coils in order: coil 0 switches `wiring[0]`, and so on.
    #[serde(default)]
    pub wiring: Vec<String>,
    /// Scheduled faults.
    #[serde(default)]
    pub faults: Vec<FaultConfig>,
}

impl PlantConfig {
    /// Parses the plant section from YAML text.
    pub fn from_yaml(text: &str) -> Result<PlantConfig, serde_saphyr::Error> {
        serde_saphyr::from_str(text)
    }
}

fn default_timezone() -> String {
    "UTC".to_owned()
}

/// Which days a schedule entry applies to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Days {
    /// Every day.
    #[default]
    All,
    /// Monday to Friday.
    Weekdays,
    /// Saturday and Sunday.
    Weekends,
}

/// Household base load: standby, fridge, a time-of-day activity load and appliance events.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct HouseConfig {
    /// Always-on consumption (routers, clocks, alarm).
    #[serde(default = "d_standby", deserialize_with = "quantity::power")]
    pub standby: f64,
    /// Daily mean of the activity load (lights, electronics, small appliances) on a weekday.
    #[serde(default = "d_activity", deserialize_with = "quantity::power")]
    pub activity: f64,
    /// 24 hourly weights of the activity load (scaled so that their mean is 1).
    #[serde(default)]
    pub profile: Option<Vec<f64>>,
    /// Activity on Saturdays and Sundays relative to weekdays.
    #[serde(default = "d_weekend", deserialize_with = "quantity::percent")]
    pub weekend: f64,
    /// Minute-to-minute variation of the activity load (standard deviation, relative).
    #[serde(default = "d_variability", deserialize_with = "quantity::percent")]
    pub variability: f64,
    /// Fridge compressor cycling; `null` for none.
    #[serde(default = "d_fridge")]
    pub fridge: Option<FridgeConfig>,
    /// Appliance events; absent = a built-in household set, `[]` = none.
    #[serde(default)]
    pub appliances: Option<Vec<ApplianceConfig>>,
}

fn d_standby() -> f64 {
    60.0
}
fn d_activity() -> f64 {
    500.0
}
fn d_weekend() -> f64 {
    115.0
}
fn d_variability() -> f64 {
    20.0
}
fn d_fridge() -> Option<FridgeConfig> {
    Some(FridgeConfig { power: 110.0, on: 12.0 * 60.0, period: 40.0 * 60.0 })
}

impl Default for HouseConfig {
    fn default() -> Self {
        HouseConfig {
            standby: d_standby(),
            activity: d_activity(),
            profile: None,
            weekend: d_weekend(),
            variability: d_variability(),
            fridge: d_fridge(),
            appliances: None,
        }
    }
}

/// A compressor that runs `on` out of every `period`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FridgeConfig {
    /// Compressor power.
    #[serde(deserialize_with = "quantity::power")]
    pub power: f64,
    /// Run time per cycle.
    #[serde(deserialize_with = "quantity::duration")]
    pub on: f64,
    /// Cycle length.
    #[serde(deserialize_with = "quantity::duration")]
    pub period: f64,
}

/// An appliance used a random number of times a day at random times inside a window.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ApplianceConfig {
    /// Label (for reports only).
    pub name: String,
    /// Power of a single-phase programme (with `duration`).
    #[serde(default, deserialize_with = "quantity::opt_power")]
    pub power: Option<f64>,
    /// Length of a single-phase programme (with `power`).
    #[serde(default, deserialize_with = "quantity::opt_duration")]
    pub duration: Option<f64>,
    /// Share of time a thermostat keeps the element on (oven, iron).
    #[serde(default = "d_duty", deserialize_with = "quantity::percent")]
    pub duty: f64,
    /// Thermostat cycle length when `duty` < 100 %.
    #[serde(default = "d_cycle", deserialize_with = "quantity::duration")]
    pub cycle: f64,
    /// A multi-phase programme instead of `power` + `duration` (washing machine).
    #[serde(default)]
    pub phases: Vec<PhaseConfig>,
    /// Mean number of uses a day (fractions are chances: 0.5 = every other day).
    #[serde(default = "d_per_day")]
    pub per_day: f64,
    /// Local time window for start times, `HH:MM-HH:MM`.
    #[serde(default = "d_window")]
    pub window: String,
    /// Days the appliance is used.
    #[serde(default)]
    pub days: Days,
}

fn d_duty() -> f64 {
    100.0
}
fn d_cycle() -> f64 {
    600.0
}
fn d_per_day() -> f64 {
    1.0
}
fn d_window() -> String {
    "07:00-21:00".to_owned()
}

/// One phase of an appliance programme.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PhaseConfig {
    /// Power while on.
    #[serde(deserialize_with = "quantity::power")]
    pub power: f64,
    /// Length of the phase.
    #[serde(deserialize_with = "quantity::duration")]
    pub duration: f64,
    /// Share of the phase the element is on.
    #[serde(default = "d_duty", deserialize_with = "quantity::percent")]
    pub duty: f64,
    /// Thermostat cycle length when `duty` < 100 %.
    #[serde(default = "d_cycle", deserialize_with = "quantity::duration")]
    pub cycle: f64,
}

/// Water-heater tank: one well-mixed node, or `layers` stacked ones (stratified).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TankConfig {
    /// Name of the tank's relay channel and load.
    #[serde(default = "d_tank_name")]
    pub name: String,
    /// Water volume.
    #[serde(deserialize_with = "quantity::volume")]
    pub volume: f64,
    /// Element rating.
    #[serde(deserialize_with = "quantity::power")]
    pub element: f64,
    /// Standing-loss coefficient UA.
    #[serde(default = "d_ua", deserialize_with = "quantity::conductance")]
    pub ua: f64,
    /// Air temperature around the tank.
    #[serde(default = "d_ambient", deserialize_with = "quantity::temperature")]
    pub ambient: f64,
    /// Cold-water inflow temperature.
    #[serde(default = "d_cold", deserialize_with = "quantity::temperature")]
    pub cold: f64,
    /// Water temperature at the start.
    #[serde(default = "d_initial", deserialize_with = "quantity::temperature")]
    pub initial: f64,
    /// Mechanical thermostat.
    #[serde(default)]
    pub thermostat: ThermostatConfig,
    /// Thermal cut-out: trips at this temperature and stays open (manual reset).
    #[serde(default = "d_cutout", deserialize_with = "quantity::temperature")]
    pub cutout: f64,
    /// Hot-water draws; absent = a built-in family pattern, `[]` = none.
    #[serde(default)]
    pub draws: Option<Vec<DrawConfig>>,
    /// Tap flow rate while drawing, litres per minute.
    #[serde(default = "d_flow")]
    pub flow_l_per_min: f64,
    /// Each draw starts up to this much earlier or later than scheduled (seeded).
    #[serde(default, deserialize_with = "quantity::duration")]
    pub jitter: f64,
    /// Horizontal layers of equal volume: 1 is one well-mixed node; more keep hot water
    /// at the top while cold inflow fills from the bottom (a stratified tank).
    #[serde(default = "d_layers")]
    pub layers: u32,
    /// Height of the element (and the thermostat and cut-out beside it) above the
    /// tank's bottom, as a share of its height (layered tanks only; absent = 10 %).
    #[serde(default, deserialize_with = "quantity::opt_percent")]
    pub element_at: Option<f64>,
    /// Height of the temperature the plant reports (its sensor), as a share of the
    /// tank's height; absent = beside the thermostat (layered tanks only).
    #[serde(default, deserialize_with = "quantity::opt_percent")]
    pub sensor_at: Option<f64>,
}

fn d_layers() -> u32 {
    1
}
fn d_tank_name() -> String {
    "tank".to_owned()
}
fn d_ua() -> f64 {
    2.0
}
fn d_ambient() -> f64 {
    20.0
}
fn d_cold() -> f64 {
    18.0
}
fn d_initial() -> f64 {
    50.0
}
fn d_cutout() -> f64 {
    85.0
}
fn d_flow() -> f64 {
    8.0
}

/// Setpoint and deadband of the tank's own thermostat.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ThermostatConfig {
    /// The element is cut when the water reaches this temperature.
    #[serde(default = "d_setpoint", deserialize_with = "quantity::temperature")]
    pub setpoint: f64,
    /// The element is allowed again below `setpoint − deadband`.
    #[serde(default = "d_deadband", deserialize_with = "quantity::temperature")]
    pub deadband: f64,
}

fn d_setpoint() -> f64 {
    60.0
}
fn d_deadband() -> f64 {
    5.0
}

impl Default for ThermostatConfig {
    fn default() -> Self {
        ThermostatConfig { setpoint: d_setpoint(), deadband: d_deadband() }
    }
}

/// A scheduled hot-water draw: `volume` of mixed water at `temperature` from the tap.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DrawConfig {
    /// Local start time `HH:MM`.
    pub at: String,
    /// Volume delivered at the tap (mixed with cold water).
    #[serde(deserialize_with = "quantity::volume")]
    pub volume: f64,
    /// Tap temperature.
    #[serde(default = "d_tap", deserialize_with = "quantity::temperature")]
    pub temperature: f64,
    /// Days the draw happens.
    #[serde(default)]
    pub days: Days,
}

fn d_tap() -> f64 {
    40.0
}

/// Pool pump.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PumpConfig {
    /// Name of the pump's relay channel and load.
    #[serde(default = "d_pump_name")]
    pub name: String,
    /// Rated electrical power.
    #[serde(deserialize_with = "quantity::power")]
    pub rated: f64,
}

fn d_pump_name() -> String {
    "pump".to_owned()
}

/// How a load is driven.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum LoadKind {
    /// On/off on one relay at `rated` power.
    #[default]
    Switched,
    /// Several stages, each on its own relay (`stages`).
    Stepped,
    /// A proportional regulator (phase angle / burst fire): power = setpoint % × `rated`.
    Regulated,
}

/// A heater, dump load or other load.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LoadConfig {
    /// Unique name (relay channel, register and topic names derive from it).
    pub name: String,
    /// How the load is driven.
    #[serde(default)]
    pub kind: LoadKind,
    /// Rated power (switched and regulated loads).
    #[serde(default, deserialize_with = "quantity::opt_power")]
    pub rated: Option<f64>,
    /// Stage powers (stepped loads); stage `n` is relay channel `<name>.<n>` (from 1).
    #[serde(default)]
    pub stages: Vec<Watts>,
    /// The tank (by its `tank.name`) whose water this regulated load heats: its power goes
    /// into the tank at the element's height, and the tank's thermostat and cut-out open
    /// its circuit as they do the relay-driven element's. `None`: it heats nothing the
    /// plant models.
    #[serde(default)]
    pub heats: Option<String>,
}

/// Open-circuit voltage curve family.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Chemistry {
    /// Lithium iron phosphate (3.2 V nominal cells).
    #[default]
    Lfp,
    /// Lead-acid (2 V nominal cells).
    LeadAcid,
}

/// Stationary battery.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BatteryConfig {
    /// Usable energy between 0 and 100 % state of charge.
    #[serde(deserialize_with = "quantity::energy")]
    pub capacity: f64,
    /// Largest AC charging power.
    #[serde(deserialize_with = "quantity::power")]
    pub max_charge: f64,
    /// Largest AC discharging power.
    #[serde(deserialize_with = "quantity::power")]
    pub max_discharge: f64,
    /// Stored energy per AC energy in.
    #[serde(default = "d_eff", deserialize_with = "quantity::percent")]
    pub charge_efficiency: f64,
    /// AC energy out per stored energy.
    #[serde(default = "d_eff", deserialize_with = "quantity::percent")]
    pub discharge_efficiency: f64,
    /// Lowest state of charge the inverter discharges to.
    #[serde(default = "d_soc_min", deserialize_with = "quantity::percent")]
    pub soc_min: f64,
    /// Highest state of charge the inverter charges to.
    #[serde(default = "d_soc_max", deserialize_with = "quantity::percent")]
    pub soc_max: f64,
    /// State of charge at the start.
    #[serde(default = "d_soc_initial", deserialize_with = "quantity::percent")]
    pub initial_soc: f64,
    /// Nominal pack voltage (selects the cell count for the voltage curve).
    #[serde(default = "d_nominal_v", deserialize_with = "quantity::voltage")]
    pub nominal_voltage: f64,
    /// Voltage curve family.
    #[serde(default)]
    pub chemistry: Chemistry,
    /// Pack internal resistance in ohms (for the reported terminal voltage).
    #[serde(default = "d_resistance")]
    pub resistance_ohm: f64,
    /// What sets the battery's power: a setpoint written to it, or its own
    /// self-consumption control.
    #[serde(default)]
    pub control: BatteryControl,
    /// Self-consumption control only: the time constant with which the battery inverter
    /// follows the site's net power, after one step's measurement delay.
    #[serde(default = "d_battery_response", deserialize_with = "quantity::duration")]
    pub response: f64,
}

/// What sets a grid-tied battery's power.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BatteryControl {
    /// The setpoint written to it (Spillway's battery load, over the relay module's
    /// registers or `sim/battery/power/set`); idle while nothing writes one.
    #[default]
    Setpoint,
    /// Its own inverter charges from what would be exported and discharges to cover what
    /// would be imported, holding the grid meter near zero within its limits and states
    /// of charge; it takes no setpoint.
    SelfConsumption,
}

fn d_eff() -> f64 {
    95.0
}
fn d_soc_min() -> f64 {
    10.0
}
fn d_soc_max() -> f64 {
    100.0
}
fn d_soc_initial() -> f64 {
    50.0
}
fn d_nominal_v() -> f64 {
    51.2
}
fn d_resistance() -> f64 {
    0.03
}
fn d_battery_response() -> f64 {
    // Our own figure for a hybrid inverter following its own grid CT: a couple of
    // seconds (common practice, no source).
    2.0
}

/// EV charger and the car.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EvConfig {
    /// Name of the charger's load.
    #[serde(default = "d_ev_name")]
    pub name: String,
    /// Car battery size.
    #[serde(deserialize_with = "quantity::energy")]
    pub capacity: f64,
    /// Below this current the car does not charge.
    #[serde(default = "d_min_a", deserialize_with = "quantity::current")]
    pub min_current: f64,
    /// Largest current.
    #[serde(default = "d_max_a", deserialize_with = "quantity::current")]
    pub max_current: f64,
    /// Current resolution; commands are rounded down to a multiple of it.
    #[serde(default = "d_step_a", deserialize_with = "quantity::current")]
    pub step: f64,
    /// Phases used (1 or 3).
    #[serde(default = "d_phases")]
    pub phases: u8,
    /// Phase voltage.
    #[serde(default = "d_voltage", deserialize_with = "quantity::voltage")]
    pub voltage: f64,
    /// Energy into the car battery per energy drawn.
    #[serde(default = "d_ev_eff", deserialize_with = "quantity::percent")]
    pub efficiency: f64,
    /// The car stops charging at this state of charge.
    #[serde(default = "d_soc_max", deserialize_with = "quantity::percent")]
    pub target_soc: f64,
    /// When the car is plugged in; absent = a built-in commuter pattern.
    #[serde(default)]
    pub sessions: Option<Vec<SessionConfig>>,
    /// A car that left short of `target_soc` comes back that much emptier (its next
    /// session's SoC less what it lacked); off, every session starts at its own SoC.
    #[serde(default)]
    pub carry_shortfall: bool,
}

fn d_ev_name() -> String {
    "ev".to_owned()
}
fn d_min_a() -> f64 {
    6.0
}
fn d_max_a() -> f64 {
    16.0
}
fn d_step_a() -> f64 {
    1.0
}
fn d_phases() -> u8 {
    1
}
fn d_voltage() -> f64 {
    230.0
}
fn d_ev_eff() -> f64 {
    90.0
}

/// A recurring plug-in session.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SessionConfig {
    /// Local arrival time `HH:MM`.
    pub arrive: String,
    /// Local departure time `HH:MM` (the next day when not after `arrive`).
    pub depart: String,
    /// Car state of charge on arrival.
    #[serde(deserialize_with = "quantity::percent")]
    pub soc: f64,
    /// Arrival state of charge varies by up to ± this much (seeded).
    #[serde(default, deserialize_with = "quantity::percent")]
    pub spread: f64,
    /// Days the session starts on.
    #[serde(default)]
    pub days: Days,
}

/// Grid meter at the connection point.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MeterConfig {
    /// A new reading (the mean over the period) every `period`.
    #[serde(default = "d_period", deserialize_with = "quantity::duration")]
    pub period: f64,
    /// A reading becomes visible this long after its period ends.
    #[serde(default, deserialize_with = "quantity::duration")]
    pub delay: f64,
    /// Standard deviation of the measurement noise on power.
    #[serde(default, deserialize_with = "quantity::power")]
    pub noise: f64,
    /// 1 (SunSpec model 201) or 3 (model 203, wye).
    #[serde(default = "d_phases")]
    pub phases: u8,
}

fn d_period() -> f64 {
    1.0
}

impl Default for MeterConfig {
    fn default() -> Self {
        MeterConfig { period: d_period(), delay: 0.0, noise: 0.0, phases: 1 }
    }
}

/// Grid connection.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct GridConfig {
    /// Phase voltage.
    #[serde(default = "d_voltage", deserialize_with = "quantity::voltage")]
    pub voltage: f64,
    /// Frequency in Hz.
    #[serde(default = "d_frequency")]
    pub frequency: f64,
    /// Outages: the battery inverter (if any) islands and supplies the house.
    #[serde(default)]
    pub outages: Vec<Window>,
}

fn d_frequency() -> f64 {
    50.0
}

impl Default for GridConfig {
    fn default() -> Self {
        GridConfig { voltage: d_voltage(), frequency: d_frequency(), outages: Vec::new() }
    }
}

/// Off-grid charge controller and low-voltage disconnect.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OffGridConfig {
    /// Bulk charging ends when the terminal voltage reaches this.
    #[serde(deserialize_with = "quantity::voltage")]
    pub absorption_voltage: f64,
    /// Voltage held after absorption.
    #[serde(deserialize_with = "quantity::voltage")]
    pub float_voltage: f64,
    /// Back to bulk when the terminal voltage falls to this.
    #[serde(deserialize_with = "quantity::voltage")]
    pub rebulk_voltage: f64,
    /// Longest absorption phase.
    #[serde(default = "d_absorption_time", deserialize_with = "quantity::duration")]
    pub absorption_time: f64,
    /// Loads are disconnected at this state of charge ...
    #[serde(default = "d_disconnect", deserialize_with = "quantity::percent")]
    pub disconnect_soc: f64,
    /// ... and reconnected at this one.
    #[serde(default = "d_reconnect", deserialize_with = "quantity::percent")]
    pub reconnect_soc: f64,
}

fn d_absorption_time() -> f64 {
    7200.0
}
fn d_disconnect() -> f64 {
    12.0
}
fn d_reconnect() -> f64 {
    35.0
}

/// PV inverter facts the device bus needs (the PV model itself is configured elsewhere).
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InverterConfig {
    /// AC rating: SunSpec `WMax`, the 100 % of percentage limits.
    #[serde(default = "d_rating", deserialize_with = "quantity::power")]
    pub rating: f64,
    /// The inverter's own export limitation: with its own current transformer at the
    /// grid connection it holds export at this power (`0W`: no export), whatever any
    /// controller does. None: it has none.
    #[serde(default, deserialize_with = "quantity::opt_power")]
    pub export_limit: Option<f64>,
}

fn d_rating() -> f64 {
    5000.0
}

impl Default for InverterConfig {
    fn default() -> Self {
        InverterConfig { rating: d_rating(), export_limit: None }
    }
}

/// When something starts: a duration after the simulation start (`36h`) or an RFC 3339 time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum When {
    /// Seconds after the start.
    After(f64),
    /// Milliseconds since the Unix epoch.
    At(i64),
}

impl When {
    /// The instant in ms since the epoch for a run that starts at `start_ms`.
    pub fn resolve(self, start_ms: i64) -> i64 {
        match self {
            When::After(s) => start_ms + (s * 1000.0).round() as i64,
            When::At(ms) => ms,
        }
    }
}

impl<'de> Deserialize<'de> for When {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        use quantity::NumberOrText;
        let expected = "a duration after the start such as 36h, or an RFC 3339 time such as 2025-01-15T10:00:00+02:00";
        match NumberOrText::read(d, expected)? {
            NumberOrText::Number(s) => Ok(When::After(s)),
            NumberOrText::Text(t) => {
                if let Ok(at) = chrono::DateTime::parse_from_rfc3339(t.trim()) {
                    return Ok(When::At(at.timestamp_millis()));
                }
                quantity::parse(&t, quantity::Kind::Duration)
                    .map(When::After)
                    .map_err(|_| {
                        de::Error::custom(format!(
                            "expected a duration after the start such as 36h, or an RFC 3339 time such as 2025-01-15T10:00:00+02:00, found `{t}`"
                        ))
                    })
            }
        }
    }
}

/// A time window: `start` and `duration`.
#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Window {
    /// When it begins.
    pub start: When,
    /// How long it lasts.
    #[serde(deserialize_with = "quantity::duration")]
    pub duration: f64,
}

/// A device on the bus, by role.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Device {
    /// Unit 1, the grid meter.
    Meter,
    /// Unit 2, the PV inverter.
    Inverter,
    /// Unit 3, the relay module.
    Relays,
    /// Unit 4, the sensor module.
    Sensors,
}

/// What a corrupted device reports.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GarbageMode {
    /// Not-a-number (SunSpec "not implemented" on the wire).
    Nan,
    /// Absurd spikes (±1 MW, a full-scale register on the wire).
    Spike,
    /// Random values (random words on the wire).
    Random,
}

/// A scheduled fault.
#[derive(Debug, Clone, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum FaultConfig {
    /// The grid meter stops reporting: readings freeze, Modbus requests time out.
    MeterSilent {
        /// When it begins.
        start: When,
        /// How long it lasts.
        #[serde(deserialize_with = "quantity::duration")]
        duration: f64,
    },
    /// The grid meter's reading hangs while its gateway keeps answering: every report
    /// repeats the last value (and energy counters) with a fresh time, so the link looks
    /// alive and only the repetition gives it away.
    MeterFrozen {
        /// When it begins.
        start: When,
        /// How long it lasts.
        #[serde(deserialize_with = "quantity::duration")]
        duration: f64,
    },
    /// A device reboots: no service for `duration`, then its registers and coils are at
    /// their power-on state.
    DeviceRestart {
        /// Which device.
        device: Device,
        /// When it begins.
        start: When,
        /// How long the reboot takes.
        #[serde(deserialize_with = "quantity::duration")]
        duration: f64,
    },
    /// A relay contact welds or jams: coil writes are accepted but the contact stays put.
    RelayStuck {
        /// The relay channel (a load name, or `<load>.<stage>`).
        channel: String,
        /// The contact is stuck closed (`true`) or open (`false`).
        closed: bool,
        /// When it begins.
        start: When,
        /// How long it lasts.
        #[serde(deserialize_with = "quantity::duration")]
        duration: f64,
    },
    /// A device reports garbage.
    Garbage {
        /// Which device.
        device: Device,
        /// What kind of garbage.
        mode: GarbageMode,
        /// When it begins.
        start: When,
        /// How long it lasts.
        #[serde(deserialize_with = "quantity::duration")]
        duration: f64,
    },
}
