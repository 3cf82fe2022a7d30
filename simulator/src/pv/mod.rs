//! The PV generator: cell temperature (Faiman), DC power (PVWatts), series strings with a
//! simplified bypass-diode model, and the assembled [`PvSystem`] behind the
//! [`crate::pv_output::PvSource`] seam.
//!
//! Sources: Faiman (2008), "Assessing the outdoor operating temperature of photovoltaic
//! modules", Progress in Photovoltaics 16(4) (defaults u0 = 25 W/m²K, u1 = 6.84 W s/m³K
//! as in IEC 61853-2 and pvlib `temperature.faiman`); Dobos (2014), "PVWatts Version 5
//! Manual", NREL/TP-6A20-62641 (DC model, pvlib `pvsystem.pvwatts_dc`).

mod config;
mod system;

pub use config::{
    ArrayConfig, ClearSkyModel, InverterConfig, Layout, LocationConfig, ShadeConfig, SolarConfig, SolarError,
    StringConfig, TemperatureModel,
};
pub use system::{DaySummary, LayoutGap, PvSystem, layout_gap, local_midnight_ms, simulate_day};

/// Faiman default constant heat-transfer coefficient, W/(m²·K).
pub const FAIMAN_U0: f64 = 25.0;
/// Faiman default wind-dependent heat-transfer coefficient, W·s/(m³·K).
pub const FAIMAN_U1: f64 = 6.84;
/// PVWatts default temperature coefficient of power, 1/K.
pub const DEFAULT_GAMMA: f64 = -0.004;

/// Cell temperature by Faiman, °C.
pub fn faiman(poa_w_m2: f64, air_c: f64, wind_m_s: f64, u0: f64, u1: f64) -> f64 {
    air_c + poa_w_m2 / (u0 + u1 * wind_m_s.max(0.0))
}

/// PVWatts DC power, W: nameplate `pdc0_w` at 1000 W/m² and 25 °C, temperature
/// coefficient `gamma` (1/K).
pub fn pvwatts_dc(poa_w_m2: f64, cell_c: f64, pdc0_w: f64, gamma: f64) -> f64 {
    poa_w_m2 * 0.001 * pdc0_w * (1.0 + gamma * (cell_c - 25.0))
}

/// Irradiance-equivalent output of a series string of modules whose effective
/// irradiances are `irr` (W/m²): the string delivers `result / 1000 × module rating ×
/// temperature factor`. `irr` is reordered.
///
/// Simplified bypass-diode model (our own, documented here): a module's current is
/// proportional to its irradiance, and a string carries one current. Running the string
/// at the current of its k-th brightest module, the k brightest modules deliver their
/// share while every dimmer module's bypass diode conducts and that module contributes
/// nothing (its diode drop is neglected). The inverter's MPP tracker picks the best k:
/// `max over k of k · G₍ₖ₎`. With no bypass diodes (k = n forced) a string would be
/// dragged down to n · G_min; with one dim module the tracker either accepts that or
/// bypasses the module and loses its share, whichever is larger.
pub fn string_equivalent_irradiance(irr: &mut [f64]) -> f64 {
    irr.sort_unstable_by(|a, b| b.total_cmp(a));
    irr.iter().enumerate().map(|(i, g)| (i + 1) as f64 * g.max(0.0)).fold(0.0, f64::max)
}

/// [`string_equivalent_irradiance`] for a string of `modules` where every module sees
/// `global` except those in `shaded`, which lose `blocked × beam`; `shaded` lists
/// (module, blocked) pairs sorted by `blocked` ascending. The order of the modules'
/// irradiances is then known without sorting: the unshaded ones first, then the shaded
/// ones in list order, so the per-second path needs no allocation or sort.
#[inline]
pub fn shaded_string_equivalent(modules: usize, global: f64, beam: f64, shaded: &[(usize, f64)]) -> f64 {
    let clear = modules - shaded.len();
    let mut best = clear as f64 * global.max(0.0);
    for (j, &(_, blocked)) in shaded.iter().enumerate() {
        let k = (clear + j + 1) as f64;
        best = best.max(k * (global - blocked * beam).max(0.0));
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn string_is_limited_by_its_weakest_module_or_bypasses_it() {
        // Equal modules: the sum.
        assert_eq!(string_equivalent_irradiance(&mut [800.0; 10]), 8000.0);
        // One module at 95 %: running all ten at 760 (7600) beats bypassing it (9 × 800 = 7200).
        let mut mild = [800.0; 10];
        mild[3] = 760.0;
        assert_eq!(string_equivalent_irradiance(&mut mild), 7600.0);
        // One module at 20 %: its diode conducts, the string loses that module's share.
        let mut deep = [800.0; 10];
        deep[0] = 160.0;
        assert_eq!(string_equivalent_irradiance(&mut deep), 7200.0);
    }

    #[test]
    fn presorted_shading_matches_the_general_string_model() {
        let shaded = [(4, 0.2), (1, 0.6), (7, 1.0)];
        for (global, beam) in [(900.0, 700.0), (300.0, 50.0), (150.0, 140.0)] {
            let mut irr = [global; 10];
            for &(m, b) in &shaded {
                irr[m] -= b * beam;
            }
            let general = string_equivalent_irradiance(&mut irr);
            let fast = shaded_string_equivalent(10, global, beam, &shaded);
            assert!((general - fast).abs() < 1e-9, "{global}/{beam}: {general} vs {fast}");
        }
    }

    #[test]
    fn faiman_and_pvwatts_match_hand_values() {
        // Source: pvlib 0.16.1 temperature.faiman(1000, 20, 1) = 20 + 1000/31.84.
        assert!((faiman(1000.0, 20.0, 1.0, FAIMAN_U0, FAIMAN_U1) - 51.407_035).abs() < 1e-5);
        // PVWatts at STC gives the nameplate.
        assert_eq!(pvwatts_dc(1000.0, 25.0, 4000.0, DEFAULT_GAMMA), 4000.0);
    }
}
