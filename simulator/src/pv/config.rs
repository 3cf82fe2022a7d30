//! The solar part of a site description: location, arrays of strings of modules,
//! inverter, losses, shading — raw serde input, checked by [`SolarConfig::build`].
//!
//! Every key is documented on its field; quantities take a plain number in the base
//! unit (degrees, metres, W, s, %) or a string with a unit (`30°`, `410Wp`, `5kW`,
//! `14%`, `10%/s`, `-0.37%/K`).

use serde::{Deserialize, Deserializer, de};

use crate::inverter::{DEFAULT_RAMP_PER_S, ETA_NOMINAL};
use crate::quantity;
use crate::transposition::{DEFAULT_ALBEDO, SkyDiffuse};
use crate::weather::{WeatherConfig, WeatherError};

use super::system::PvSystem;
use super::{DEFAULT_GAMMA, FAIMAN_U0, FAIMAN_U1};

/// Errors found while turning a solar configuration into a [`PvSystem`].
#[derive(Debug, thiserror::Error)]
pub enum SolarError {
    /// The time zone is not an IANA name chrono-tz knows.
    #[error("unknown time zone `{name}`: use an IANA name such as `Europe/Berlin`")]
    UnknownTimezone {
        /// The name given.
        name: String,
    },
    /// No array is configured.
    #[error("solar: no arrays configured: add at least one array with one string")]
    NoArrays,
    /// Two arrays share a name.
    #[error("solar: array name `{name}` is used twice")]
    DuplicateArray {
        /// The repeated name.
        name: String,
    },
    /// An array has no strings, or a string no modules.
    #[error("solar: array `{array}` has an empty string list or a string with 0 modules")]
    EmptyArray {
        /// The array.
        array: String,
    },
    /// A shading entry names a module that does not exist.
    #[error("solar: shading entry {index}: {message}")]
    ShadeTarget {
        /// 1-based position in the shading list.
        index: usize,
        /// What is missing.
        message: String,
    },
    /// A shading time is not `HH:MM`.
    #[error("solar: shading entry {index}: time `{text}` is not HH:MM (00:00–24:00)")]
    ShadeTime {
        /// 1-based position in the shading list.
        index: usize,
        /// The text given.
        text: String,
    },
    /// A value lies outside its valid range.
    #[error("{what} = {value} is out of range: expected {expected}")]
    OutOfRange {
        /// The key.
        what: String,
        /// The value given.
        value: f64,
        /// The valid range in words.
        expected: &'static str,
    },
    /// The measured series could not be loaded.
    #[error(transparent)]
    Measured(#[from] WeatherError),
}

/// Where the site is.
///
/// ```yaml
/// site:
///   latitude: 48.14       # degrees north, south negative
///   longitude: 11.58      # degrees east, west negative
///   altitude: 520m        # above sea level (default 0)
///   timezone: Europe/Berlin
/// ```
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LocationConfig {
    /// Latitude, degrees north.
    #[serde(deserialize_with = "quantity::angle")]
    pub latitude: f64,
    /// Longitude, degrees east.
    #[serde(deserialize_with = "quantity::angle")]
    pub longitude: f64,
    /// Altitude above sea level, m.
    #[serde(default, deserialize_with = "quantity::length")]
    pub altitude: f64,
    /// IANA time zone of the site (local times in shading and CSV files use it).
    pub timezone: String,
}

impl LocationConfig {
    /// The parsed time zone.
    pub fn tz(&self) -> Result<chrono_tz::Tz, SolarError> {
        self.timezone.parse().map_err(|_| SolarError::UnknownTimezone { name: self.timezone.clone() })
    }
}

/// Clear-sky model.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum ClearSkyModel {
    /// Ineichen–Perez with the weather's Linke turbidity (beam and diffuse modelled).
    #[default]
    Ineichen,
    /// Haurwitz global irradiance, split into beam and diffuse by Erbs.
    Haurwitz,
}

/// How modules connect to inverters.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Layout {
    /// Series strings, each on its own MPP tracker of one central inverter.
    #[default]
    String,
    /// One module-level inverter per module.
    Module,
}

/// Faiman heat-transfer coefficients.
#[derive(Debug, Clone, Copy, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TemperatureModel {
    /// Constant coefficient u0, W/(m²·K) (default 25).
    #[serde(default = "default_u0")]
    pub u0: f64,
    /// Wind coefficient u1, W·s/(m³·K) (default 6.84).
    #[serde(default = "default_u1")]
    pub u1: f64,
}

impl Default for TemperatureModel {
    fn default() -> Self {
        TemperatureModel { u0: FAIMAN_U0, u1: FAIMAN_U1 }
    }
}

fn default_u0() -> f64 {
    FAIMAN_U0
}
fn default_u1() -> f64 {
    FAIMAN_U1
}
fn default_gamma() -> f64 {
    DEFAULT_GAMMA
}
fn default_albedo() -> f64 {
    DEFAULT_ALBEDO
}
fn default_losses() -> f64 {
    14.0
}
fn default_knot() -> f64 {
    60.0
}
fn default_efficiency() -> f64 {
    ETA_NOMINAL
}

/// One series string of identical modules.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct StringConfig {
    /// Number of modules in series.
    pub modules: usize,
    /// Nameplate of one module at STC, W (`410Wp`).
    #[serde(deserialize_with = "quantity::power")]
    pub module_power: f64,
}

/// A group of strings sharing one orientation.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ArrayConfig {
    /// Name, used by shading entries and reports.
    pub name: String,
    /// Tilt from horizontal, degrees (0–90).
    #[serde(deserialize_with = "quantity::angle")]
    pub tilt: f64,
    /// Azimuth the modules face, degrees clockwise from north (180 = south).
    #[serde(deserialize_with = "quantity::angle")]
    pub azimuth: f64,
    /// The strings.
    pub strings: Vec<StringConfig>,
    /// Temperature coefficient of power, 1/K (`-0.4%/K` or `-0.004`; default −0.4 %/K).
    #[serde(default = "default_gamma", deserialize_with = "per_kelvin")]
    pub temp_coefficient: f64,
    /// Faiman coefficients (default u0 = 25, u1 = 6.84).
    #[serde(default)]
    pub cell_temperature: TemperatureModel,
}

/// The inverter(s).
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InverterConfig {
    /// `string` (central inverter, one MPPT per string) or `module` (module-level).
    #[serde(default)]
    pub layout: Layout,
    /// AC rating of each inverter: the central one (default: the DC nameplate), or each
    /// module's (default: the module's nameplate).
    #[serde(default, deserialize_with = "quantity::opt_power")]
    pub rated_ac: Option<f64>,
    /// PVWatts nominal efficiency (`96%` or `0.96`; default 96 %).
    #[serde(default = "default_efficiency", deserialize_with = "fraction")]
    pub efficiency: f64,
    /// Ramp of the active-power limit: `10%/s` of the total rating (default), `400W/s`,
    /// or 0 for an instant response.
    #[serde(default, deserialize_with = "ramp")]
    pub ramp: Option<Ramp>,
}

impl Default for InverterConfig {
    fn default() -> Self {
        InverterConfig { layout: Layout::String, rated_ac: None, efficiency: ETA_NOMINAL, ramp: None }
    }
}

/// A ramp rate for the power-limit setpoint.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Ramp {
    /// W/s.
    WattsPerSecond(f64),
    /// Fraction of the total AC rating per second.
    FractionPerSecond(f64),
}

/// A module shaded during a daily window.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ShadeConfig {
    /// Array name.
    pub array: String,
    /// String number within the array, from 1.
    pub string: usize,
    /// Module number within the string, from 1.
    pub module: usize,
    /// Start of the window, local time `HH:MM`.
    pub from: String,
    /// End of the window, local time `HH:MM` (may be earlier than `from`: across midnight).
    pub until: String,
    /// Fraction of the beam blocked (`80%` or 80), diffuse light still reaches it.
    #[serde(deserialize_with = "quantity::percent")]
    pub blocked: f64,
}

/// The solar part of a site.
///
/// ```yaml
/// solar:
///   arrays:
///     - name: south
///       tilt: 30°
///       azimuth: 180°
///       temp_coefficient: -0.37%/K
///       cell_temperature: { u0: 25, u1: 6.84 }
///       strings:
///         - { modules: 8, module_power: 410Wp }
///   inverter: { layout: string, rated_ac: 3kW, efficiency: 96%, ramp: 10%/s }
///   losses: 14%             # DC derate: soiling, wiring, mismatch, … (default 14 %)
///   albedo: 0.25
///   sky_diffuse: hay-davies # or isotropic
///   clear_sky: ineichen     # or haurwitz
///   delta_t: 69s            # TT − UT; default: Espenak–Meeus estimate for the year
///   knot_interval: 60s      # sun and clear sky computed this often, interpolated between
///   shading:
///     - { array: south, string: 1, module: 3, from: "07:30", until: "09:15", blocked: 80% }
/// ```
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SolarConfig {
    /// The arrays.
    pub arrays: Vec<ArrayConfig>,
    /// The inverter (default: one central inverter rated at the DC nameplate).
    #[serde(default)]
    pub inverter: InverterConfig,
    /// DC system losses as a derate, percent (default 14, the PVWatts default).
    #[serde(default = "default_losses", deserialize_with = "quantity::percent")]
    pub losses: f64,
    /// Ground albedo (default 0.25).
    #[serde(default = "default_albedo")]
    pub albedo: f64,
    /// Sky-diffuse transposition model (default Hay–Davies).
    #[serde(default)]
    pub sky_diffuse: SkyDiffuse,
    /// Clear-sky model (default Ineichen–Perez).
    #[serde(default)]
    pub clear_sky: ClearSkyModel,
    /// ΔT = TT − UT, s (default: estimated from the simulated year).
    #[serde(default, deserialize_with = "quantity::opt_duration")]
    pub delta_t: Option<f64>,
    /// Interval at which sun position, clear sky, air temperature, wind and the shading
    /// windows are evaluated, with linear interpolation in between, s (default 60, range
    /// 1–600). Keep it a divisor of 60 s for minute-exact shading windows.
    #[serde(default = "default_knot", deserialize_with = "quantity::duration")]
    pub knot_interval: f64,
    /// Shaded modules.
    #[serde(default)]
    pub shading: Vec<ShadeConfig>,
}

impl SolarConfig {
    /// A single array of `kwp` in one string of 1 kWp modules (what `pv-day` builds).
    pub fn single_array(tilt_deg: f64, azimuth_deg: f64, kwp: f64) -> Self {
        SolarConfig {
            arrays: vec![ArrayConfig {
                name: "array".into(),
                tilt: tilt_deg,
                azimuth: azimuth_deg,
                strings: vec![StringConfig { modules: 1, module_power: kwp * 1000.0 }],
                temp_coefficient: DEFAULT_GAMMA,
                cell_temperature: TemperatureModel::default(),
            }],
            inverter: InverterConfig::default(),
            losses: 0.0,
            albedo: DEFAULT_ALBEDO,
            sky_diffuse: SkyDiffuse::HayDavies,
            clear_sky: ClearSkyModel::Ineichen,
            delta_t: None,
            knot_interval: default_knot(),
            shading: Vec::new(),
        }
    }

    /// Checks the configuration and builds the PV system for `location` under `weather`,
    /// with `seed` fixing the clouds and wind.
    ///
    /// With `weather.measured` set, the CSV is loaded now: a `ghi_w_m2` series replaces
    /// the cloud model (beam and diffuse by Erbs), a `pv_ac_w` series replaces the whole
    /// chain (the inverter limit and ramp still apply). Rows the loader could not use are
    /// listed by [`PvSystem::notices`]; print them.
    pub fn build(&self, location: &LocationConfig, weather: &WeatherConfig, seed: u64) -> Result<PvSystem, SolarError> {
        self.check(location)?;
        PvSystem::from_config(self, location, weather, seed)
    }

    /// DC nameplate of all arrays, W.
    pub fn nameplate_w(&self) -> f64 {
        self.arrays.iter().flat_map(|a| &a.strings).map(|s| s.modules as f64 * s.module_power).sum()
    }

    /// Number of modules.
    pub fn module_count(&self) -> usize {
        self.arrays.iter().flat_map(|a| &a.strings).map(|s| s.modules).sum()
    }

    /// Total AC rating, W.
    pub fn rated_ac_w(&self) -> f64 {
        match self.inverter.layout {
            Layout::String => self.inverter.rated_ac.unwrap_or_else(|| self.nameplate_w()),
            Layout::Module => self
                .arrays
                .iter()
                .flat_map(|a| &a.strings)
                .map(|s| s.modules as f64 * self.inverter.rated_ac.unwrap_or(s.module_power))
                .sum(),
        }
    }

    /// Ramp of the limit setpoint, W/s.
    pub fn ramp_w_per_s(&self) -> f64 {
        match self.inverter.ramp {
            None => DEFAULT_RAMP_PER_S * self.rated_ac_w(),
            Some(Ramp::WattsPerSecond(w)) => w,
            Some(Ramp::FractionPerSecond(f)) => f * self.rated_ac_w(),
        }
    }

    fn check(&self, location: &LocationConfig) -> Result<(), SolarError> {
        let range = |what: &str, v: f64, lo: f64, hi: f64, expected: &'static str| {
            if v.is_finite() && (lo..=hi).contains(&v) {
                Ok(())
            } else {
                Err(SolarError::OutOfRange { what: what.to_string(), value: v, expected })
            }
        };
        range("site.latitude", location.latitude, -90.0, 90.0, "-90 to 90 degrees")?;
        range("site.longitude", location.longitude, -180.0, 180.0, "-180 to 180 degrees")?;
        range("site.altitude", location.altitude, -500.0, 9000.0, "-500 m to 9000 m")?;
        location.tz()?;
        if self.arrays.is_empty() {
            return Err(SolarError::NoArrays);
        }
        for (i, a) in self.arrays.iter().enumerate() {
            if self.arrays[..i].iter().any(|b| b.name == a.name) {
                return Err(SolarError::DuplicateArray { name: a.name.clone() });
            }
            if a.strings.is_empty() || a.strings.iter().any(|s| s.modules == 0) {
                return Err(SolarError::EmptyArray { array: a.name.clone() });
            }
            let key = |k: &str| format!("solar.arrays[{}].{k}", a.name);
            range(&key("tilt"), a.tilt, 0.0, 90.0, "0 to 90 degrees")?;
            range(&key("azimuth"), a.azimuth, 0.0, 360.0, "0 to 360 degrees clockwise from north")?;
            range(&key("temp_coefficient"), a.temp_coefficient, -0.02, 0.0, "-2 %/K to 0")?;
            range(&key("cell_temperature.u0"), a.cell_temperature.u0, 1.0, 200.0, "1 to 200 W/m²K")?;
            range(&key("cell_temperature.u1"), a.cell_temperature.u1, 0.0, 100.0, "0 to 100 W·s/m³K")?;
            for s in &a.strings {
                range(&key("strings.module_power"), s.module_power, 1.0, 1e6, "1 W to 1 MW")?;
            }
        }
        range("solar.losses", self.losses, 0.0, 99.0, "0 % to 99 %")?;
        range("solar.albedo", self.albedo, 0.0, 1.0, "0 to 1")?;
        range("solar.knot_interval", self.knot_interval, 1.0, 600.0, "1 s to 600 s")?;
        range("solar.inverter.efficiency", self.inverter.efficiency, 0.5, 1.0, "50 % to 100 %")?;
        if let Some(r) = self.inverter.rated_ac {
            range("solar.inverter.rated_ac", r, 1.0, 1e9, "a positive power")?;
        }
        if let Some(dt) = self.delta_t {
            range("solar.delta_t", dt, -100.0, 1000.0, "-100 s to 1000 s")?;
        }
        range("solar.inverter.ramp", self.ramp_w_per_s(), 0.0, f64::INFINITY, "0 or a positive rate")?;
        for (i, s) in self.shading.iter().enumerate() {
            let index = i + 1;
            let target = |message: String| SolarError::ShadeTarget { index, message };
            let array = self
                .arrays
                .iter()
                .find(|a| a.name == s.array)
                .ok_or_else(|| target(format!("no array named `{}`", s.array)))?;
            let string = s.string.checked_sub(1).and_then(|k| array.strings.get(k)).ok_or_else(|| {
                target(format!("array `{}` has strings 1 to {}, not {}", s.array, array.strings.len(), s.string))
            })?;
            if s.module == 0 || s.module > string.modules {
                return Err(target(format!(
                    "string {} of `{}` has modules 1 to {}, not {}",
                    s.string, s.array, string.modules, s.module
                )));
            }
            parse_clock(&s.from).ok_or_else(|| SolarError::ShadeTime { index, text: s.from.clone() })?;
            parse_clock(&s.until).ok_or_else(|| SolarError::ShadeTime { index, text: s.until.clone() })?;
            range(&format!("solar.shading[{index}].blocked"), s.blocked, 0.0, 100.0, "0 % to 100 %")?;
        }
        Ok(())
    }
}

/// `HH:MM` → seconds of the day (24:00 allowed as the end of the day).
pub(super) fn parse_clock(text: &str) -> Option<f64> {
    let (h, m) = text.trim().split_once(':')?;
    let (h, m): (u32, u32) = (h.parse().ok()?, m.parse().ok()?);
    if m >= 60 || h > 24 || (h == 24 && m != 0) {
        return None;
    }
    Some(f64::from(h * 3600 + m * 60))
}

use crate::quantity::NumberOrText;

/// Splits `text` into a number and the unit after it.
fn number_and_unit(text: &str) -> Option<(f64, &str)> {
    let t = text.trim();
    let end = t
        .char_indices()
        .find(|&(i, c)| !(c.is_ascii_digit() || c == '.' || (i == 0 && (c == '-' || c == '+'))))
        .map_or(t.len(), |(i, _)| i);
    let value = t[..end].parse().ok()?;
    Some((value, t[end..].trim()))
}

/// A temperature coefficient: `-0.4%/K` or a plain number per kelvin.
fn per_kelvin<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    match NumberOrText::read(d, "a temperature coefficient such as -0.4%/K")? {
        NumberOrText::Number(v) => Ok(v),
        NumberOrText::Text(t) => match number_and_unit(&t) {
            Some((v, "%/K" | "%/°C")) => Ok(v / 100.0),
            Some((v, "/K" | "")) => Ok(v),
            _ => Err(de::Error::custom(format!("expected a temperature coefficient such as -0.4%/K, found `{t}`"))),
        },
    }
}

/// A fraction: `96%` or `0.96`.
fn fraction<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
    match NumberOrText::read(d, "a fraction such as 96%")? {
        NumberOrText::Number(v) => Ok(v),
        NumberOrText::Text(t) => match number_and_unit(&t) {
            Some((v, "%")) => Ok(v / 100.0),
            Some((v, "")) => Ok(v),
            _ => Err(de::Error::custom(format!("expected a fraction such as 96%, found `{t}`"))),
        },
    }
}

/// A ramp: `10%/s`, `400W/s`, `2kW/s` or a plain number in W/s.
fn ramp<'de, D: Deserializer<'de>>(d: D) -> Result<Option<Ramp>, D::Error> {
    let r = match NumberOrText::read(d, "a ramp such as 10%/s or 400W/s (0 = instant)")? {
        NumberOrText::Number(v) => Ramp::WattsPerSecond(v),
        NumberOrText::Text(t) => match number_and_unit(&t) {
            Some((v, "%/s")) => Ramp::FractionPerSecond(v / 100.0),
            Some((v, "W/s" | "")) => Ramp::WattsPerSecond(v),
            Some((v, "kW/s")) => Ramp::WattsPerSecond(v * 1000.0),
            _ => {
                return Err(de::Error::custom(format!(
                    "expected a ramp such as 10%/s or 400W/s (0 = instant), found `{t}`"
                )));
            }
        },
    };
    Ok(Some(r))
}
