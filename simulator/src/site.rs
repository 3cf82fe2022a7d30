//! A whole simulated site from its `plant:` section: the PV system built from
//! `location`, `solar` and `weather`, and the household, loads, storage and meters of
//! the plant around it. This is what `spillway simulate`, `spillway-sim serve` and the
//! demo start from.

use crate::plant::{Plant, PlantConfig, PlantError};
use crate::pv::SolarError;
use crate::pv_output::{PvSample, PvSource};
use crate::weather::WeatherKind;

/// How to start a site.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SiteOptions {
    /// First instant, ms since the Unix epoch (UTC).
    pub start_ms: i64,
    /// Seed for every random draw (clouds, household, noise).
    pub seed: u64,
    /// Overrides the configured sky (`--weather clear|mixed|overcast`).
    pub sky: Option<WeatherKind>,
}

/// Why a site could not be built.
#[derive(Debug, thiserror::Error)]
pub enum SiteError {
    /// The plant has `solar` but no `location`.
    #[error("plant: `solar` needs a `location` (latitude, longitude, altitude, timezone)")]
    NoLocation,
    /// The PV system is invalid.
    #[error("plant.solar: {0}")]
    Solar(#[from] SolarError),
    /// The rest of the plant is invalid.
    #[error("plant: {0}")]
    Plant(#[from] PlantError),
}

/// A site without PV (a plant section with no `solar`): the array produces nothing.
struct NoPv;

impl PvSource for NoPv {
    fn step(&mut self, _t_ms: i64, _dt_s: f64, _limit_w: Option<f64>) -> PvSample {
        PvSample { clear_sky_index: 1.0, ..PvSample::default() }
    }
}

/// Builds the plant with its modelled PV system.
pub fn build(cfg: &PlantConfig, options: &SiteOptions) -> Result<Plant, SiteError> {
    let mut cfg = cfg.clone();
    let pv: Box<dyn PvSource> = match (&cfg.solar, &cfg.location) {
        (Some(solar), Some(location)) => {
            let mut weather = cfg.weather.clone();
            if let Some(sky) = options.sky {
                weather.sky = sky;
                weather.measured = None;
            }
            // The bus reports the PV inverter's own rating (SunSpec WMax).
            cfg.inverter.rating = solar.rated_ac_w();
            Box::new(solar.build(location, &weather, options.seed)?)
        }
        (Some(_), None) => return Err(SiteError::NoLocation),
        (None, _) => Box::new(NoPv),
    };
    Ok(Plant::new(&cfg, pv, options.start_ms, options.seed)?)
}

/// Parses a `plant:` section given on its own (a plant file for `spillway-sim`).
pub fn from_yaml(text: &str) -> Result<PlantConfig, serde_saphyr::Error> {
    PlantConfig::from_yaml(text)
}

/// Reads the `plant:` section out of a whole site file (the other sections are ignored).
pub fn from_site_yaml(text: &str) -> Result<Option<PlantConfig>, serde_saphyr::Error> {
    #[derive(serde::Deserialize)]
    struct SiteFile {
        #[serde(default)]
        plant: Option<PlantConfig>,
    }
    let file: SiteFile = serde_saphyr::from_str(text)?;
    Ok(file.plant)
}
