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
pub fn from_yaml(text: &str) -> Result<PlantConfig, PlantYamlError> {
    PlantConfig::from_yaml(text).map_err(PlantYamlError::from)
}

/// A plant description that does not parse: the YAML reader's message, with its line and
/// column, in the words of the file (see [`plain_words`]).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct PlantYamlError(String);

impl From<serde_saphyr::Error> for PlantYamlError {
    fn from(e: serde_saphyr::Error) -> Self {
        PlantYamlError(plain_words(&e.to_string()))
    }
}

/// The YAML reader's messages in the words of the site file: it speaks of Rust types
/// ("invalid u64", "use Option<String>") and parser states ("expected sequence start"),
/// which say nothing to the person who wrote the file.
pub fn plain_words(message: &str) -> String {
    const PLAIN: &[(&str, &str)] = &[
        ("invalid u64", "expected a whole number of 0 or more"),
        ("invalid u32", "expected a whole number of 0 or more"),
        ("invalid u16", "expected a whole number of 0 or more"),
        ("invalid u8", "expected a whole number of 0 or more"),
        ("invalid usize", "expected a whole number of 0 or more"),
        ("invalid i64", "expected a whole number"),
        ("invalid i32", "expected a whole number"),
        ("invalid f64", "expected a number"),
        ("invalid bool", "expected true or false"),
        ("cannot deserialize null into string; use Option<String>", "expected a text, found nothing"),
        ("expected sequence start", "expected a list (items on lines starting `- `, or `[a, b]`)"),
        ("expected mapping start", "expected a map of `key: value` entries (or `{ key: value }`)"),
    ];
    // The message may repeat under its caret: every occurrence, whole phrases only
    // ("invalid u64" must not rewrite "invalid u64s").
    let mut out = message.to_owned();
    for (jargon, plain) in PLAIN {
        let mut from = 0;
        while let Some(at) = out[from..].find(jargon).map(|i| i + from) {
            let end = at + jargon.len();
            if out[end..].starts_with(|c: char| c.is_alphanumeric()) {
                from = end;
            } else {
                out.replace_range(at..end, plain);
                from = at + plain.len();
            }
        }
    }
    let untagged = "data did not match any variant of untagged enum";
    while let Some(at) = out.find(untagged) {
        let end = out[at..].find('\n').map_or(out.len(), |i| i + at);
        out.replace_range(at..end, "the value has the wrong shape here (see the README's plant keys)");
    }
    out
}

/// Reads the `plant:` section out of a whole site file (the other sections are ignored).
pub fn from_site_yaml(text: &str) -> Result<Option<PlantConfig>, PlantYamlError> {
    #[derive(serde::Deserialize)]
    struct SiteFile {
        #[serde(default)]
        plant: Option<PlantConfig>,
    }
    let file: SiteFile = serde_saphyr::from_str(text)?;
    Ok(file.plant)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A plant file's mistakes read in the file's words: what was expected, what was
    /// found, and where; never a Rust type or a parser state.
    #[test]
    fn plant_file_mistakes_are_named_in_plain_words() {
        let cases = [
            ("seed: seven\n", "expected a whole number of 0 or more"),
            ("tank: { volume: [], element: 3kW }\n", "expected a volume such as 150L, found a list"),
            ("tank: { volume: 150L, element: ~ }\n", "expected a power such as 3kW or 800W, found nothing"),
            ("tank: { volume: true, element: 3kW }\n", "expected a volume such as 150L, found `true`"),
            ("tank: { volume: 150L, element: { kW: 3 } }\n", "expected a power such as 3kW or 800W, found a map"),
            ("tank: 5\n", "expected a map of `key: value` entries"),
            ("loads: { name: heater }\n", "expected a list (items on lines starting `- `, or `[a, b]`)"),
        ];
        for (yaml, says) in cases {
            let m = from_yaml(yaml).err().unwrap_or_else(|| panic!("{yaml:?} was accepted")).to_string();
            assert!(m.contains(says) && m.contains("line 1"), "{yaml:?}: {m}");
            for jargon in ["u64", "untagged", "Option<", "mapping start", "sequence start"] {
                assert!(!m.contains(jargon), "{yaml:?}: {m}");
            }
        }
        assert_eq!(plain_words("invalid u64s"), "invalid u64s", "whole phrases only");
    }
}
