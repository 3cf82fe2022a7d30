//! Plane-of-array irradiance: angle of incidence, beam, sky diffuse (Hay–Davies or
//! isotropic) and ground-reflected components on a tilted surface.
//!
//! Sources: Hay & Davies (1980), "Calculation of the solar radiation incident on an
//! inclined surface", Proc. First Canadian Solar Radiation Data Workshop; Liu & Jordan
//! (1963) for the isotropic sky and the ground term. Written as pvlib 0.16.1
//! `irradiance.haydavies` / `isotropic` / `get_ground_diffuse` / `get_total_irradiance`
//! (the projection ratio uses cos z ≥ 0.01745, i.e. z ≤ 89°, as pvlib does).

use serde::Deserialize;

use crate::sky::{Irradiance, at_least};
use crate::sun::SunPosition;

/// Default ground albedo (as in pvlib and common practice for grass/soil).
pub const DEFAULT_ALBEDO: f64 = 0.25;

/// Which sky-diffuse model transposes the diffuse horizontal irradiance.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum SkyDiffuse {
    /// Hay–Davies: a circumsolar part weighted by the anisotropy index DNI/DNI_extra.
    #[default]
    HayDavies,
    /// Isotropic sky (Liu & Jordan).
    Isotropic,
}

/// A plane's orientation with its trigonometry precomputed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Plane {
    /// Tilt from horizontal, degrees (0 = flat, 90 = vertical).
    pub tilt_deg: f64,
    /// Azimuth the plane faces, degrees clockwise from north (180 = south).
    pub azimuth_deg: f64,
    sin_tilt: f64,
    cos_tilt: f64,
}

/// Plane-of-array irradiance components, W/m².
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Poa {
    /// Beam on the plane.
    pub beam: f64,
    /// Sky diffuse on the plane.
    pub sky_diffuse: f64,
    /// Ground-reflected on the plane.
    pub ground: f64,
}

impl Poa {
    /// Total plane-of-array irradiance.
    pub fn global(&self) -> f64 {
        self.beam + self.sky_diffuse + self.ground
    }
}

/// The sun-dependent geometry of one plane at one instant, enough to transpose any
/// irradiance at that instant with a handful of multiplications.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Geometry {
    /// cos(angle of incidence), not clipped (negative = sun behind the plane).
    pub cos_aoi: f64,
    /// cos(zenith) of the sun.
    pub cos_zenith: f64,
    /// Beam projection ratio Rb = max(cos aoi, 0) / max(cos z, 0.01745) (Hay–Davies).
    pub projection_ratio: f64,
}

impl Plane {
    /// A plane with `tilt_deg` and `azimuth_deg` (clockwise from north).
    pub fn new(tilt_deg: f64, azimuth_deg: f64) -> Self {
        let t = tilt_deg.to_radians();
        Plane { tilt_deg, azimuth_deg, sin_tilt: t.sin(), cos_tilt: t.cos() }
    }

    /// Geometry for a sun position.
    pub fn geometry(&self, sun: &SunPosition) -> Geometry {
        let z = sun.zenith_deg.to_radians();
        let (sin_z, cos_z) = z.sin_cos();
        let cos_aoi = (self.cos_tilt * cos_z
            + self.sin_tilt * sin_z * (sun.azimuth_deg - self.azimuth_deg).to_radians().cos())
        .clamp(-1.0, 1.0);
        Geometry { cos_aoi, cos_zenith: cos_z, projection_ratio: cos_aoi.max(0.0) / cos_z.max(0.017_45) }
    }

    /// Angle of incidence, degrees.
    pub fn aoi_deg(&self, sun: &SunPosition) -> f64 {
        self.geometry(sun).cos_aoi.acos().to_degrees()
    }

    /// Transposes `irr` onto the plane (`g` from [`Plane::geometry`], or interpolated
    /// between two such values).
    pub fn poa(&self, g: &Geometry, irr: &Irradiance, dni_extra: f64, albedo: f64, model: SkyDiffuse) -> Poa {
        let inv = if dni_extra > 0.0 { 1.0 / dni_extra } else { 0.0 };
        self.poa_with_inverse(g, irr, inv, albedo, model)
    }

    /// [`Plane::poa`] with `1 / dni_extra` given, for callers that keep it (the
    /// per-second path avoids divisions).
    #[inline]
    pub fn poa_with_inverse(
        &self,
        g: &Geometry,
        irr: &Irradiance,
        inv_dni_extra: f64,
        albedo: f64,
        model: SkyDiffuse,
    ) -> Poa {
        let beam = at_least(irr.dni * g.cos_aoi, 0.0);
        let view_sky = 0.5 * (1.0 + self.cos_tilt);
        let sky_diffuse = match model {
            SkyDiffuse::Isotropic => irr.dhi * view_sky,
            SkyDiffuse::HayDavies => {
                let ai = irr.dni * inv_dni_extra;
                at_least(irr.dhi * (1.0 - ai) * view_sky, 0.0) + at_least(irr.dhi * ai * g.projection_ratio, 0.0)
            }
        };
        let ground = irr.ghi * albedo * (1.0 - self.cos_tilt) * 0.5;
        Poa { beam, sky_diffuse, ground }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flat_plane_sees_the_horizontal_values() {
        let p = Plane::new(0.0, 180.0);
        let sun = SunPosition { zenith_deg: 40.0, true_zenith_deg: 40.0, azimuth_deg: 150.0 };
        let g = p.geometry(&sun);
        let irr = Irradiance { ghi: 700.0, dni: 650.0, dhi: 700.0 - 650.0 * 40f64.to_radians().cos() };
        for model in [SkyDiffuse::HayDavies, SkyDiffuse::Isotropic] {
            let poa = p.poa(&g, &irr, 1360.0, 0.25, model);
            assert!((poa.global() - 700.0).abs() < 1e-6, "{model:?}: {poa:?}");
            assert_eq!(poa.ground, 0.0);
        }
    }
}
