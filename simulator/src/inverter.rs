//! The inverter: PVWatts efficiency curve, AC clipping at the rating, and an
//! active-power limit setpoint followed at a configurable ramp rate.
//!
//! Source for the efficiency curve: Dobos (2014), "PVWatts Version 5 Manual",
//! NREL/TP-6A20-62641, eq. for η(ζ) with η_nom = 0.96 and η_ref = 0.9637, in the form of
//! pvlib 0.16.1 `inverter.pvwatts` (DC input limit = AC rating / η_nom).

use crate::sky::{at_least, within};

/// PVWatts nominal inverter efficiency.
pub const ETA_NOMINAL: f64 = 0.96;
/// PVWatts reference inverter efficiency.
pub const ETA_REFERENCE: f64 = 0.9637;
/// Default ramp of the power-limit setpoint, as a fraction of the AC rating per second.
pub const DEFAULT_RAMP_PER_S: f64 = 0.10;

/// AC output of the PVWatts inverter model for `pdc_w` of DC input, W.
///
/// `pac0_w` is the AC rating; the DC input limit is `pac0_w / eta_nom`. Output is
/// clipped to `[0, pac0_w]`.
pub fn pvwatts_ac(pdc_w: f64, pac0_w: f64, eta_nom: f64, eta_ref: f64) -> f64 {
    PvWattsCurve::new(pac0_w, eta_nom, eta_ref).ac(pdc_w)
}

/// The PVWatts efficiency curve of one inverter with its constants folded, so that a
/// step costs no division: η·P = (η_nom/η_ref)·(0.9858·P − 0.0162·P²/P_dc0 − 0.0059·P_dc0).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PvWattsCurve {
    pac0_w: f64,
    pdc0_w: f64,
    inv_pdc0: f64,
    scale: f64,
}

impl PvWattsCurve {
    /// The curve of an inverter rated `pac0_w` AC.
    pub fn new(pac0_w: f64, eta_nom: f64, eta_ref: f64) -> Self {
        let pdc0_w = pac0_w / eta_nom;
        PvWattsCurve {
            pac0_w,
            pdc0_w,
            inv_pdc0: if pdc0_w > 0.0 { 1.0 / pdc0_w } else { 0.0 },
            scale: eta_nom / eta_ref,
        }
    }

    /// AC output for `pdc_w` of DC input, W, clipped to `[0, rating]`.
    #[inline]
    pub fn ac(&self, pdc_w: f64) -> f64 {
        if pdc_w <= 0.0 || self.pac0_w <= 0.0 {
            return 0.0;
        }
        let ac = self.scale * (pdc_w * (0.9858 - 0.0162 * pdc_w * self.inv_pdc0) - 0.0059 * self.pdc0_w);
        within(ac, 0.0, self.pac0_w)
    }
}

/// Settings of one inverter.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct InverterSpec {
    /// AC rating, W.
    pub rated_ac_w: f64,
    /// Nominal efficiency (PVWatts η_nom).
    pub eta_nominal: f64,
    /// How fast the effective power limit follows a new setpoint, W/s (0 = instantly).
    pub ramp_w_per_s: f64,
}

impl InverterSpec {
    /// An inverter of `rated_ac_w` with the PVWatts defaults and the default ramp.
    pub fn new(rated_ac_w: f64) -> Self {
        InverterSpec { rated_ac_w, eta_nominal: ETA_NOMINAL, ramp_w_per_s: DEFAULT_RAMP_PER_S * rated_ac_w }
    }
}

/// The power-limit follower: it remembers the effective limit between steps.
///
/// The effective limit starts at the rating. A lower setpoint (`Some(w)`, clamped to
/// `[0, rating]`) takes effect at once, as grid codes expect of a power reduction; a
/// higher one or its removal (`None` = back to the rating) is approached at the ramp
/// rate, like an inverter's soft "limit ramp" after curtailment; a ramp of 0 jumps at once.
#[derive(Debug, Clone, PartialEq)]
pub struct PowerLimit {
    rated_w: f64,
    ramp_w_per_s: f64,
    effective_w: f64,
}

impl PowerLimit {
    /// A follower for an inverter of `rated_w` ramping at `ramp_w_per_s` (0 = instant).
    pub fn new(rated_w: f64, ramp_w_per_s: f64) -> Self {
        PowerLimit { rated_w, ramp_w_per_s: ramp_w_per_s.max(0.0), effective_w: rated_w }
    }

    /// Moves the effective limit toward `setpoint` over `dt_s` and returns it, W.
    #[inline]
    pub fn advance(&mut self, setpoint: Option<f64>, dt_s: f64) -> f64 {
        let target = within(setpoint.unwrap_or(self.rated_w), 0.0, self.rated_w);
        if self.ramp_w_per_s == 0.0 || target <= self.effective_w {
            self.effective_w = target;
        } else {
            let step = self.ramp_w_per_s * at_least(dt_s, 0.0);
            let diff = target - self.effective_w;
            self.effective_w += within(diff, -step, step);
        }
        self.effective_w
    }

    /// The effective limit now, W.
    pub fn effective_w(&self) -> f64 {
        self.effective_w
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pvwatts_reaches_nominal_efficiency_near_full_load_and_clips() {
        // Source: PVWatts V5 manual (Dobos 2014): η(ζ=1) = η_nom/η_ref·(0.9858−0.0162−0.0059)
        // = 0.96 exactly at the DC input limit.
        let pac0 = 4000.0;
        let at_limit = pvwatts_ac(pac0 / 0.96, pac0, 0.96, 0.9637);
        assert!((at_limit - pac0).abs() < 0.5, "{at_limit}");
        assert_eq!(pvwatts_ac(2.0 * pac0, pac0, 0.96, 0.9637), pac0);
        assert_eq!(pvwatts_ac(0.0, pac0, 0.96, 0.9637), 0.0);
    }

    #[test]
    fn limit_cuts_at_once_ramps_up_and_zero_ramp_is_instant() {
        let mut l = PowerLimit::new(5000.0, 500.0);
        assert_eq!(l.advance(Some(1000.0), 1.0), 1000.0);
        assert_eq!(l.advance(None, 2.0), 2000.0);
        let mut instant = PowerLimit::new(5000.0, 0.0);
        assert_eq!(instant.advance(Some(-5.0), 1.0), 0.0);
        assert_eq!(instant.advance(Some(9000.0), 1.0), 5000.0);
    }
}
