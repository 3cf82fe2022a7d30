//! Weather for the solar chain: the sky (stochastic clouds on the clear-sky index, or a
//! measured CSV), air temperature with a diurnal profile, and wind.

mod clouds;
mod measured;

use std::path::PathBuf;

use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use rand_pcg::Pcg64Mcg;
use serde::Deserialize;

use crate::quantity;

pub use clouds::{Clouds, Regime};
pub use measured::{MeasuredQuantity, MeasuredSeries, RowNotice};

/// What kind of days the cloud model produces.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum WeatherKind {
    /// Cloudless days: clear-sky index exactly 1 (haze is the Linke turbidity's job).
    #[default]
    Clear,
    /// Regimes of clear sky, broken cumulus and overcast switching through the day.
    Mixed,
    /// A cloud deck all day (clear-sky index wandering around 0.55).
    Overcast,
    /// Each day drawn at random: 35 % clear, 40 % mixed, 25 % overcast.
    Varied,
}

/// Errors of the weather layer.
#[derive(Debug, thiserror::Error)]
pub enum WeatherError {
    /// The measured file could not be read.
    #[error("cannot read measured series {path}: {source}")]
    Read {
        /// The file.
        path: String,
        /// The I/O error.
        source: std::io::Error,
    },
    /// The CSV header is not one of the two accepted forms.
    #[error("measured series header is `{found}`: expected `time,ghi_w_m2` or `time,pv_ac_w`")]
    Header {
        /// The header as found.
        found: String,
    },
    /// The CSV could not be parsed at all.
    #[error("measured series is not readable CSV: {0}")]
    Csv(String),
    /// Fewer than two usable rows remained.
    #[error("measured series has {rows} usable row(s), at least 2 are needed; {}", notices.join("; "))]
    TooFewRows {
        /// Usable rows.
        rows: usize,
        /// Why the others were rejected.
        notices: Vec<String>,
    },
    /// An error above, in a named file.
    #[error("{path}: {inner}")]
    InFile {
        /// The file.
        path: String,
        /// The error.
        inner: Box<WeatherError>,
    },
}

impl WeatherError {
    fn in_file(self, path: &std::path::Path) -> WeatherError {
        WeatherError::InFile { path: path.display().to_string(), inner: Box::new(self) }
    }
}

fn default_linke() -> f64 {
    3.0
}
fn default_air_temp() -> f64 {
    20.0
}
fn default_swing() -> f64 {
    10.0
}
fn default_wind() -> f64 {
    1.0
}
fn default_gustiness() -> f64 {
    0.3
}
fn default_max_gap() -> f64 {
    900.0
}

/// The weather section of a site description.
///
/// ```yaml
/// weather:
///   sky: mixed              # clear | mixed | overcast | varied (default clear)
///   linke_turbidity: 3.0    # Ineichen–Perez clear-sky turbidity (default 3.0)
///   air_temp: 18°C          # daily mean air temperature (default 20°C)
///   air_temp_swing: 10°C    # peak-to-trough on a clear day, 0 = constant (default 10°C)
///   wind: 2m/s              # mean wind speed (default 1m/s)
///   gustiness: 0.3          # wind standard deviation / mean, 0 = steady (default 0.3)
///   measured:               # optional: a CSV replaces the modelled sky (or the PV output)
///     path: data/june.csv
///     max_gap: 15min        # longer gaps are reported (still interpolated)
/// ```
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct WeatherConfig {
    /// Kind of days the cloud model makes.
    #[serde(default)]
    pub sky: WeatherKind,
    /// Linke turbidity for the Ineichen–Perez clear sky.
    #[serde(default = "default_linke")]
    pub linke_turbidity: f64,
    /// Daily mean air temperature, °C.
    #[serde(default = "default_air_temp", deserialize_with = "quantity::temperature")]
    pub air_temp: f64,
    /// Peak-to-trough daily swing of the air temperature on a clear day, K.
    #[serde(default = "default_swing", deserialize_with = "quantity::temperature")]
    pub air_temp_swing: f64,
    /// Mean wind speed, m/s.
    #[serde(default = "default_wind", deserialize_with = "quantity::speed")]
    pub wind: f64,
    /// Standard deviation of the wind speed relative to its mean.
    #[serde(default = "default_gustiness")]
    pub gustiness: f64,
    /// A measured series in place of the model.
    #[serde(default)]
    pub measured: Option<MeasuredConfig>,
}

impl Default for WeatherConfig {
    fn default() -> Self {
        WeatherConfig {
            sky: WeatherKind::Clear,
            linke_turbidity: default_linke(),
            air_temp: default_air_temp(),
            air_temp_swing: default_swing(),
            wind: default_wind(),
            gustiness: default_gustiness(),
            measured: None,
        }
    }
}

impl WeatherConfig {
    /// Clear sky with constant air temperature and wind (what `pv-day` uses).
    pub fn steady_clear(air_temp_c: f64, wind_m_s: f64, linke: f64) -> Self {
        WeatherConfig {
            sky: WeatherKind::Clear,
            linke_turbidity: linke,
            air_temp: air_temp_c,
            air_temp_swing: 0.0,
            wind: wind_m_s,
            gustiness: 0.0,
            measured: None,
        }
    }
}

/// A measured CSV in place of the modelled sky or PV output.
#[derive(Debug, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MeasuredConfig {
    /// The CSV file (relative paths are taken as given, from the working directory).
    pub path: PathBuf,
    /// Gaps between good rows longer than this are reported, s (default 15 min).
    #[serde(default = "default_max_gap", deserialize_with = "quantity::duration")]
    pub max_gap: f64,
}

/// How much of the clear-day temperature swing each kind of day keeps (clouds damp the
/// diurnal cycle; `common practice`, values ours).
fn swing_factor(kind: WeatherKind) -> f64 {
    match kind {
        WeatherKind::Clear | WeatherKind::Varied => 1.0,
        WeatherKind::Mixed => 0.7,
        WeatherKind::Overcast => 0.4,
    }
}

/// Air temperature at local mean solar hour `solar_hour` (0–24): a cosine peaking at
/// 15:00 solar time (`common practice` for the afternoon maximum), °C.
pub fn air_temperature(cfg: &WeatherConfig, day_kind: WeatherKind, solar_hour: f64) -> f64 {
    let phase = 2.0 * std::f64::consts::PI * (solar_hour - 15.0) / 24.0;
    cfg.air_temp + 0.5 * cfg.air_temp_swing * swing_factor(day_kind) * phase.cos()
}

/// Wind speed: an Ornstein–Uhlenbeck process around the mean (time constant 10 min),
/// never negative. Seeded separately from the clouds.
#[derive(Debug, Clone)]
pub struct Wind {
    rng: Pcg64Mcg,
    mean: f64,
    sigma: f64,
    value: f64,
}

impl Wind {
    /// Wind around `mean` m/s with relative standard deviation `gustiness`.
    pub fn new(mean: f64, gustiness: f64, seed: u64) -> Self {
        Wind {
            rng: Pcg64Mcg::seed_from_u64(seed ^ 0x5749_4e44),
            mean: mean.max(0.0),
            sigma: (gustiness * mean).abs(),
            value: mean.max(0.0),
        }
    }

    /// Advances by `dt_s` and returns the speed, m/s.
    pub fn step(&mut self, dt_s: f64) -> f64 {
        if self.sigma == 0.0 {
            return self.mean;
        }
        let a = (-dt_s / 600.0).exp();
        let z: f64 = StandardNormal.sample(&mut self.rng);
        self.value = self.mean + (self.value - self.mean) * a + self.sigma * (1.0 - a * a).sqrt() * z;
        self.value = self.value.max(0.0);
        self.value
    }
}
