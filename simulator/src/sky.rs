//! Irradiance above the array: extraterrestrial irradiance, air mass, clear-sky models
//! (Ineichen–Perez, Haurwitz), the Erbs decomposition of a global value, and the split
//! of a cloudy global value into beam and diffuse used by the cloud model.
//!
//! Each published formula is written in the form pvlib uses (pvlib 0.16.1:
//! `irradiance.get_extra_radiation(method="spencer")`, `atmosphere.get_relative_airmass
//! (model="kastenyoung1989")`, `atmosphere.alt2pres`, `clearsky.ineichen`,
//! `clearsky.haurwitz`, `irradiance.erbs`) so the reference tables compare like with like.

/// `max(x, lo)` as one instruction: unlike `f64::max` it does not special-case NaN
/// (the per-second path never produces one, and the reference tests would catch it).
#[inline(always)]
pub(crate) fn at_least(x: f64, lo: f64) -> f64 {
    if x > lo { x } else { lo }
}

/// `min(x, hi)` as one instruction (see [`at_least`]).
#[inline(always)]
pub(crate) fn at_most(x: f64, hi: f64) -> f64 {
    if x < hi { x } else { hi }
}

/// `clamp(x, lo, hi)` without NaN handling or the `lo <= hi` assertion.
#[inline(always)]
pub(crate) fn within(x: f64, lo: f64, hi: f64) -> f64 {
    at_most(at_least(x, lo), hi)
}

/// Solar constant used with Spencer's orbit factor, W/m² (as in pvlib).
pub const SOLAR_CONSTANT_W_M2: f64 = 1366.1;

/// Global, direct-normal and diffuse-horizontal irradiance, W/m².
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Irradiance {
    /// Global horizontal irradiance.
    pub ghi: f64,
    /// Direct normal irradiance.
    pub dni: f64,
    /// Diffuse horizontal irradiance.
    pub dhi: f64,
}

/// Extraterrestrial normal irradiance on day `day_of_year` (1 = 1 January), W/m².
///
/// Source: Spencer (1971), "Fourier series representation of the position of the sun",
/// orbit-eccentricity factor, with a solar constant of 1366.1 W/m².
pub fn extraterrestrial(day_of_year: u32) -> f64 {
    let b = 2.0 * std::f64::consts::PI / 365.0 * (f64::from(day_of_year) - 1.0);
    SOLAR_CONSTANT_W_M2
        * (1.00011 + 0.034221 * b.cos() + 0.00128 * b.sin() + 0.000719 * (2.0 * b).cos() + 0.000077 * (2.0 * b).sin())
}

/// Relative optical air mass for an (apparent) zenith angle in degrees, `None` with the
/// sun below the horizon.
///
/// Source: Kasten & Young (1989), "Revised optical air mass tables and approximation
/// formula", Applied Optics 28(22).
pub fn relative_airmass(zenith_deg: f64) -> Option<f64> {
    if zenith_deg.is_nan() || zenith_deg > 90.0 {
        return None;
    }
    Some(1.0 / (zenith_deg.to_radians().cos() + 0.50572 * (96.07995 - zenith_deg).powf(-1.6364)))
}

/// Mean air pressure at an altitude, Pa (standard atmosphere, as pvlib's `alt2pres`).
pub fn pressure_at_altitude(altitude_m: f64) -> f64 {
    100.0 * ((44_331.514 - altitude_m) / 11_880.516).powf(1.0 / 0.190_263_2)
}

/// Pressure-corrected (absolute) air mass.
pub fn absolute_airmass(relative: f64, pressure_pa: f64) -> f64 {
    relative * pressure_pa / 101_325.0
}

/// Clear-sky irradiance by Ineichen & Perez with Linke turbidity `linke` at a site
/// `altitude_m` above sea level.
///
/// Source: Ineichen & Perez (2002), "A new airmass independent formulation for the Linke
/// turbidity coefficient", Solar Energy 73(3); with the altitude terms and the beam
/// correction as implemented in pvlib `clearsky.ineichen` (no Perez enhancement).
/// `airmass_absolute` is `None` (sun down) → all zero.
pub fn ineichen(
    apparent_zenith_deg: f64,
    airmass_absolute: Option<f64>,
    linke: f64,
    altitude_m: f64,
    dni_extra: f64,
) -> Irradiance {
    let cos_z = apparent_zenith_deg.to_radians().cos().max(0.0);
    let Some(am) = airmass_absolute else {
        return Irradiance::default();
    };
    if cos_z <= 0.0 {
        return Irradiance::default();
    }
    let fh1 = (-altitude_m / 8000.0).exp();
    let fh2 = (-altitude_m / 1250.0).exp();
    let cg1 = 5.09e-5 * altitude_m + 0.868;
    let cg2 = 3.92e-5 * altitude_m + 0.0387;
    let ghi = cg1 * dni_extra * cos_z * (-cg2 * am * (fh1 + fh2 * (linke - 1.0))).exp().max(0.0);
    let b = 0.664 + 0.163 / fh1;
    let bnci = dni_extra * (b * (-0.09 * am * (linke - 1.0)).exp()).max(0.0);
    let bnci_2 = ghi * ((1.0 - (0.1 - 0.2 * (-linke).exp()) / (0.1 + 0.882 / fh1)) / cos_z).clamp(0.0, 1e20);
    let dni = bnci.min(bnci_2);
    Irradiance { ghi, dni, dhi: ghi - dni * cos_z }
}

/// Clear-sky global horizontal irradiance by Haurwitz, W/m².
///
/// Source: Haurwitz (1945), "Insolation in relation to cloudiness and cloud density",
/// Journal of Meteorology 2; coefficients as in pvlib `clearsky.haurwitz`.
pub fn haurwitz_ghi(apparent_zenith_deg: f64) -> f64 {
    let cos_z = apparent_zenith_deg.to_radians().cos();
    if cos_z <= 0.0 {
        return 0.0;
    }
    1098.0 * cos_z * (-0.059 / cos_z).exp()
}

/// Splits a global horizontal value into beam and diffuse by Erbs et al.
///
/// Source: Erbs, Klein & Duffie (1982), "Estimation of the diffuse radiation fraction for
/// hourly, daily and monthly-average global radiation", Solar Energy 28(4); limits
/// (cos z ≥ 0.065, clearness index ≤ 1, no beam past 87°) as in pvlib `irradiance.erbs`.
pub fn erbs(ghi: f64, zenith_deg: f64, dni_extra: f64) -> Irradiance {
    let cos_z = zenith_deg.to_radians().cos();
    let kt = (ghi / (dni_extra * cos_z.max(0.065))).clamp(0.0, 1.0);
    let df = if kt <= 0.22 {
        1.0 - 0.09 * kt
    } else if kt <= 0.8 {
        0.9511 - 0.1604 * kt + 4.388 * kt.powi(2) - 16.638 * kt.powi(3) + 12.336 * kt.powi(4)
    } else {
        0.165
    };
    let dhi = df * ghi;
    let dni = (ghi - dhi) / cos_z;
    if zenith_deg > 87.0 || ghi < 0.0 || dni.is_nan() || dni < 0.0 {
        return Irradiance { ghi, dni: 0.0, dhi: ghi };
    }
    Irradiance { ghi, dni, dhi }
}

/// Clear-sky index below which no beam reaches the ground in [`cloudy`].
pub const BEAM_CUTOFF_INDEX: f64 = 0.25;

/// Irradiance under clouds, from the clear-sky components and a clear-sky index `kc`
/// (global = kc · clear global).
///
/// A simple model of our own (no published source): the beam fraction of the clear-sky
/// beam falls linearly from 1 at kc = 1 to 0 at kc = [`BEAM_CUTOFF_INDEX`] (a thick
/// cloud in front of the sun); the rest of the global value is diffuse. Above kc = 1
/// (cloud-edge enhancement) the beam stays whole and the extra is diffuse. The diffuse
/// part is never negative for any kc ≥ 0, and kc = 1 returns the clear sky unchanged.
#[inline]
pub fn cloudy(clear: &Irradiance, cos_zenith: f64, kc: f64) -> Irradiance {
    let kc = at_least(kc, 0.0);
    let beam_share = within((kc - BEAM_CUTOFF_INDEX) * (1.0 / (1.0 - BEAM_CUTOFF_INDEX)), 0.0, 1.0);
    let ghi = kc * clear.ghi;
    let dni = clear.dni * beam_share;
    Irradiance { ghi, dni, dhi: at_least(ghi - dni * at_least(cos_zenith, 0.0), 0.0) }
}

/// Day of the year (1–366) of a UTC Unix time.
pub fn day_of_year_utc(unix_s: f64) -> u32 {
    use chrono::Datelike;
    chrono::DateTime::from_timestamp(unix_s.floor() as i64, 0).map_or(1, |t| t.ordinal())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn cloudy_keeps_clear_sky_at_unit_index_and_diffuse_non_negative() {
        let clear = Irradiance { ghi: 800.0, dni: 850.0, dhi: 800.0 - 850.0 * 0.8 };
        let same = cloudy(&clear, 0.8, 1.0);
        assert!((same.ghi - 800.0).abs() < 1e-9 && (same.dni - 850.0).abs() < 1e-9);
        for i in 0..=150 {
            let kc = f64::from(i) / 100.0;
            let c = cloudy(&clear, 0.8, kc);
            assert!(c.dhi >= 0.0 && c.dni >= 0.0, "kc {kc}: {c:?}");
            assert!((c.ghi - (c.dhi + c.dni * 0.8)).abs() < 1e-9, "closure at kc {kc}");
        }
    }

    #[test]
    fn air_mass_matches_kasten_young_and_is_none_below_horizon() {
        // Source: pvlib 0.16.1 atmosphere.get_relative_airmass(z, "kastenyoung1989"):
        // 0.999712 at 0°, 1.994293 at 60°, 37.919608 at 90°.
        for (z, am) in [(0.0, 0.999_712), (60.0, 1.994_293), (90.0, 37.919_608)] {
            assert!((relative_airmass(z).unwrap() - am).abs() < 1e-5, "z {z}");
        }
        assert!(relative_airmass(90.5).is_none());
    }
}
