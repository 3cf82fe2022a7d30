//! Seeded stochastic clouds: a Markov regime switch (clear / broken / overcast) with an
//! Ornstein–Uhlenbeck process on the clear-sky index inside each regime.
//!
//! The model is our own (no published parameter set is claimed). Its shape follows
//! common practice in the irradiance-variability literature: regimes lasting tens of
//! minutes; inside "broken", a two-state telegraph process (sun visible / cloud
//! shadow) with exponentially distributed dwell times of tens of seconds, smoothed by a
//! first-order relaxation of a few seconds so that cloud edges give ramps of 40–70 % of
//! clear-sky in 10–20 s, and short cloud-edge enhancement above the clear sky. All
//! draws come from one PCG stream, so a seed fixes the weather.

use rand::{Rng, RngCore, SeedableRng};
use rand_pcg::Pcg64Mcg;

use super::WeatherKind;
use crate::sky::within;

/// The sky's state inside a day.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Regime {
    /// Cloudless: clear-sky index 1.
    Clear,
    /// Cumulus: the sun alternates between clear and cloud shadow.
    Broken,
    /// A uniform cloud deck.
    Overcast,
}

/// Parameters of one regime.
struct RegimeSpec {
    /// Mean duration, s.
    mean_duration_s: f64,
    /// Probabilities of the next regime (clear, broken, overcast) on leaving it.
    next: [f64; 3],
}

fn spec(kind: WeatherKind, regime: Regime) -> RegimeSpec {
    match (kind, regime) {
        (WeatherKind::Mixed, Regime::Clear) => RegimeSpec { mean_duration_s: 45.0 * 60.0, next: [0.0, 0.75, 0.25] },
        (WeatherKind::Mixed, Regime::Broken) => RegimeSpec { mean_duration_s: 70.0 * 60.0, next: [0.6, 0.0, 0.4] },
        (WeatherKind::Mixed, Regime::Overcast) => RegimeSpec { mean_duration_s: 40.0 * 60.0, next: [0.3, 0.7, 0.0] },
        // Clear and overcast days stay in their regime.
        _ => RegimeSpec { mean_duration_s: f64::INFINITY, next: [0.0, 0.0, 0.0] },
    }
}

/// Broken-regime telegraph: mean dwell with the sun out and in cloud shadow, s.
const SUN_DWELL_S: f64 = 80.0;
const SHADOW_DWELL_S: f64 = 45.0;
/// Relaxation time of the index toward its current target, s (sets the ramp speed).
const EDGE_TAU_S: f64 = 6.0;
/// Standard deviation of the fast fluctuation around the target (stationary).
const FAST_SIGMA: f64 = 0.02;
/// Overcast deck: mean index, slow wander and its time constant.
const OVERCAST_MEAN: f64 = 0.55;
const OVERCAST_SIGMA: f64 = 0.08;
const OVERCAST_TAU_S: f64 = 900.0;

/// The cloud process. Call [`Clouds::step`] with increasing times.
#[derive(Debug, Clone)]
pub struct Clouds {
    rng: Pcg64Mcg,
    configured: WeatherKind,
    day_kind: WeatherKind,
    day: Option<i64>,
    regime: Regime,
    regime_left_s: f64,
    sun_out: bool,
    dwell_left_s: f64,
    target: f64,
    boost: f64,
    deck: f64,
    kc: f64,
    cached_dt: f64,
    relax: f64,
    relax_noise: f64,
    deck_a: f64,
    deck_noise: f64,
}

impl Clouds {
    /// A cloud process for days of `kind`, seeded.
    pub fn new(kind: WeatherKind, seed: u64) -> Self {
        Clouds {
            rng: Pcg64Mcg::seed_from_u64(seed),
            configured: kind,
            day_kind: kind,
            day: None,
            regime: Regime::Clear,
            regime_left_s: 0.0,
            sun_out: true,
            dwell_left_s: 0.0,
            target: 1.0,
            boost: 0.0,
            deck: OVERCAST_MEAN,
            kc: 1.0,
            cached_dt: f64::NAN,
            relax: 0.0,
            relax_noise: 0.0,
            deck_a: 0.0,
            deck_noise: 0.0,
        }
    }

    /// The kind of the current day (for `Varied`, the one drawn for today).
    pub fn day_kind(&self) -> WeatherKind {
        self.day_kind
    }

    /// The current regime.
    pub fn regime(&self) -> Regime {
        self.regime
    }

    fn uniform(&mut self) -> f64 {
        self.rng.random::<f64>()
    }

    /// Unit-variance noise for the fast fluctuation: triangular (sum of two uniforms
    /// from one 64-bit draw), several times cheaper than a Gaussian; the shape of the
    /// regimes and ramps matters here, not the tails of the noise.
    #[inline]
    fn noise(&mut self) -> f64 {
        let bits = self.rng.next_u64();
        let u1 = (bits >> 32) as f64 * (1.0 / 4_294_967_296.0);
        let u2 = (bits & 0xffff_ffff) as f64 * (1.0 / 4_294_967_296.0);
        (u1 + u2 - 1.0) * 6f64.sqrt()
    }

    fn exponential(&mut self, mean: f64) -> f64 {
        -mean * (1.0 - self.uniform()).ln()
    }

    fn start_day(&mut self, day: i64) {
        self.day = Some(day);
        self.day_kind = match self.configured {
            WeatherKind::Varied => {
                let u = self.uniform();
                if u < 0.35 {
                    WeatherKind::Clear
                } else if u < 0.75 {
                    WeatherKind::Mixed
                } else {
                    WeatherKind::Overcast
                }
            }
            k => k,
        };
        let regime = match self.day_kind {
            WeatherKind::Overcast => Regime::Overcast,
            WeatherKind::Mixed => {
                let u = self.uniform();
                if u < 0.3 {
                    Regime::Clear
                } else if u < 0.75 {
                    Regime::Broken
                } else {
                    Regime::Overcast
                }
            }
            WeatherKind::Clear | WeatherKind::Varied => Regime::Clear,
        };
        self.enter(regime);
    }

    fn enter(&mut self, regime: Regime) {
        self.regime = regime;
        let mean = spec(self.day_kind, regime).mean_duration_s;
        self.regime_left_s = if mean.is_finite() { self.exponential(mean) } else { f64::INFINITY };
        self.sun_out = true;
        self.dwell_left_s = 0.0;
    }

    fn leave(&mut self) {
        let next = spec(self.day_kind, self.regime).next;
        let u = self.uniform();
        let regime = if u < next[0] {
            Regime::Clear
        } else if u < next[0] + next[1] {
            Regime::Broken
        } else {
            Regime::Overcast
        };
        self.enter(regime);
    }

    fn set_dt(&mut self, dt: f64) {
        if dt != self.cached_dt {
            self.cached_dt = dt;
            self.relax = (-dt / EDGE_TAU_S).exp();
            self.relax_noise = FAST_SIGMA * (1.0 - self.relax * self.relax).sqrt();
            self.deck_a = (-dt / OVERCAST_TAU_S).exp();
            self.deck_noise = OVERCAST_SIGMA * (1.0 - self.deck_a * self.deck_a).sqrt();
        }
    }

    /// Advances by `dt_s` and returns the clear-sky index for the step. `solar_day`
    /// numbers the day; a new number starts a new day (and, for `Varied`, draws its kind).
    #[inline]
    pub fn step(&mut self, solar_day: i64, dt_s: f64) -> f64 {
        self.step_inlined(solar_day, dt_s)
    }

    /// [`Clouds::step`], always inlined: the PV batch loop runs it beside the rest of
    /// each step's chain, so that the cloud index's step-to-step dependency overlaps
    /// with work that does not depend on it.
    #[inline(always)]
    pub(crate) fn step_inlined(&mut self, solar_day: i64, dt_s: f64) -> f64 {
        if self.day != Some(solar_day) {
            self.start_day(solar_day);
        }
        if self.day_kind == WeatherKind::Clear {
            self.kc = 1.0;
            return 1.0;
        }
        self.set_dt(dt_s);
        self.regime_left_s -= dt_s;
        if self.regime_left_s <= 0.0 {
            self.leave();
        }
        let z = self.noise();
        match self.regime {
            Regime::Clear => {
                self.target = 1.0;
                self.kc = 1.0 + (self.kc - 1.0) * self.relax;
                return self.kc;
            }
            Regime::Broken => {
                self.dwell_left_s -= dt_s;
                if self.dwell_left_s <= 0.0 {
                    self.sun_out = !self.sun_out;
                    if self.sun_out {
                        self.dwell_left_s = self.exponential(SUN_DWELL_S);
                        // Cloud-edge enhancement: briefly above the clear sky as the
                        // sun emerges, decaying with the edge time constant.
                        self.target = 1.0;
                        self.boost = 0.05 + 0.1 * self.uniform();
                    } else {
                        self.dwell_left_s = self.exponential(SHADOW_DWELL_S);
                        self.target = 0.2 + 0.25 * self.uniform();
                    }
                }
            }
            Regime::Overcast => {
                self.deck = OVERCAST_MEAN + (self.deck - OVERCAST_MEAN) * self.deck_a + self.deck_noise * self.noise();
                self.target = self.deck.clamp(0.15, 0.9);
            }
        }
        self.boost *= self.relax;
        let target = self.target + self.boost;
        self.kc = within(target + (self.kc - target) * self.relax + self.relax_noise * z, 0.05, 1.4);
        self.kc
    }
}
