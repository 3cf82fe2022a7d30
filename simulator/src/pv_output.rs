//! The seam between the solar chain and the rest of the plant: what a PV system
//! delivers in one step, given the active-power limit it is asked to obey.

/// One step of a PV system's output. Powers in W, irradiance in W/m², temperature in °C.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct PvSample {
    /// AC power delivered after losses, clipping and the active-power limit.
    pub ac_w: f64,
    /// AC power the system could deliver with no limit set (clipping still applies).
    pub available_ac_w: f64,
    /// DC power at the inverter input.
    pub dc_w: f64,
    /// Plane-of-array irradiance (first array, or area-weighted mean).
    pub poa_w_m2: f64,
    /// Global horizontal irradiance including clouds.
    pub ghi_w_m2: f64,
    /// Cell temperature (first array).
    pub cell_temp_c: f64,
    /// Clear-sky index applied this step (1 = clear).
    pub clear_sky_index: f64,
}

/// Anything that produces PV power step by step: the modelled array, a replayed CSV,
/// or a fixed profile in a test. `Send` so that a plant can be served from a task of a
/// multi-threaded runtime (`spillway_sim::serve`).
pub trait PvSource: Send {
    /// Advances over `[t_ms, t_ms + dt_s)` and returns the output for that step.
    /// `limit_w` is the inverter's active-power limit (`None` = no limit).
    fn step(&mut self, t_ms: i64, dt_s: f64, limit_w: Option<f64>) -> PvSample;

    /// [`step`](PvSource::step) for a caller that needs only the AC powers (the plant).
    /// A source may override it to skip the rest of the sample; the powers must be the
    /// ones `step` gives.
    #[inline]
    fn step_ac(&mut self, t_ms: i64, dt_s: f64, limit_w: Option<f64>) -> AcPower {
        let s = self.step(t_ms, dt_s, limit_w);
        AcPower { ac_w: s.ac_w, available_ac_w: s.available_ac_w }
    }
}

/// The AC side of a [`PvSample`]: small enough to come back in registers, which matters
/// once a step: a 56-byte sample returned through memory and read back at once costs a
/// store-forwarding stall in the plant's hot loop.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct AcPower {
    /// AC power delivered, W.
    pub ac_w: f64,
    /// AC power available with no limit set, W.
    pub available_ac_w: f64,
}
