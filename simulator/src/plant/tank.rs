//! Water-heater tank as a single well-mixed node (no stratification): element power in,
//! standing loss UA·(T − T_ambient) out, hot-water draws replaced by cold inflow, a
//! mechanical thermostat and a latching thermal cut-out.

use super::PlantError;
use super::calendar::{Day, parse_clock};
use super::config::{Days, DrawConfig, TankConfig};
use super::noise::Stream;

/// Specific heat of liquid water, J/(kg·K): the value near 15 °C tabulated in physics
/// handbooks (e.g. the CRC Handbook of Chemistry and Physics; from memory). It varies by
/// under 0.2 % between 20 and 60 °C, so one constant serves the whole tank range.
pub const WATER_C: f64 = 4186.0;
/// Density of water taken as 1 kg per litre (`common practice`; 0.983 kg/L at 60 °C).
pub const WATER_KG_PER_L: f64 = 1.0;

#[derive(Debug, Clone)]
struct Draw {
    at: u32,
    volume_l: f64,
    tap_c: f64,
    days: Days,
}

/// The tank's state and parameters.
#[derive(Debug)]
pub struct Tank {
    volume_l: f64,
    /// Heat capacity m·c, J/K.
    heat_capacity: f64,
    ua: f64,
    ambient: f64,
    cold: f64,
    setpoint: f64,
    deadband: f64,
    cutout: f64,
    flow_lps: f64,
    jitter_s: f64,
    draws: Vec<Draw>,
    rng: Stream,
    /// Water temperature, °C.
    pub temp_c: f64,
    /// Thermostat contact closed (calls for heat).
    thermostat_closed: bool,
    /// Cut-out has tripped (stays open for the rest of the run).
    pub tripped: bool,
    /// Today's draws: (start, end) local seconds, tap temperature.
    today: Vec<(u32, u32, f64)>,
    next_draw: usize,
    /// Start of the draw at `next_draw` (`u32::MAX`: none left today): before it, a
    /// step skips the draw loop.
    draw_from: u32,
    /// exp(−dt/τ) for the last dt, recomputed only when dt changes.
    cached_dt: f64,
    cached_k: f64,
    inv_ua: f64,
    /// Hot water drawn so far, litres at tank temperature.
    pub drawn_l: f64,
    /// Water that came out of the tap colder than the draw asked for (the whole tank
    /// below the tap temperature), litres at the tap.
    pub lukewarm_l: f64,
    /// The heat those litres lacked to reach their tap temperature, Wh.
    pub short_wh: f64,
}

fn default_draws() -> Vec<DrawConfig> {
    let d = |at: &str, volume: f64, temperature: f64| DrawConfig {
        at: at.to_owned(),
        volume,
        temperature,
        days: Days::All,
    };
    // An invented family pattern: showers morning and evening, dishes, hand washing.
    vec![
        d("06:30", 50.0, 40.0),
        d("07:10", 35.0, 40.0),
        d("12:30", 10.0, 45.0),
        d("18:45", 15.0, 50.0),
        d("20:15", 60.0, 40.0),
        d("21:00", 35.0, 40.0),
    ]
}

impl Tank {
    /// Builds the tank from its configuration.
    pub fn new(cfg: &TankConfig, rng: Stream) -> Result<Tank, PlantError> {
        let bad = |why: String| PlantError::Invalid { what: format!("tank \"{}\"", cfg.name), why };
        // Each key on its own, so the message names the one that is wrong.
        let checks = [
            ("volume", cfg.volume, cfg.volume > 0.0, "> 0"),
            ("element", cfg.element, cfg.element >= 0.0, "≥ 0"),
            ("ua", cfg.ua, cfg.ua >= 0.0, "≥ 0"),
            ("thermostat.deadband", cfg.thermostat.deadband, cfg.thermostat.deadband >= 0.0, "≥ 0"),
            ("flow_l_per_min", cfg.flow_l_per_min, cfg.flow_l_per_min > 0.0, "> 0"),
        ];
        if let Some((key, v, _, rule)) = checks.iter().find(|c| !c.2) {
            return Err(bad(format!("`{key}` must be {rule} (it is {v})")));
        }
        let defaults;
        let list = match &cfg.draws {
            Some(l) => l,
            None => {
                defaults = default_draws();
                &defaults
            }
        };
        let draws = list
            .iter()
            .map(|d| {
                let at = parse_clock(&d.at).ok_or_else(|| bad(format!("draw time `{}` is not HH:MM", d.at)))?;
                if !(d.volume >= 0.0) {
                    return Err(bad("draw volume must be ≥ 0".to_owned()));
                }
                Ok(Draw { at, volume_l: d.volume, tap_c: d.temperature, days: d.days })
            })
            .collect::<Result<Vec<_>, _>>()?;
        Ok(Tank {
            volume_l: cfg.volume,
            heat_capacity: cfg.volume * WATER_KG_PER_L * WATER_C,
            ua: cfg.ua,
            ambient: cfg.ambient,
            cold: cfg.cold,
            setpoint: cfg.thermostat.setpoint,
            deadband: cfg.thermostat.deadband,
            cutout: cfg.cutout,
            flow_lps: cfg.flow_l_per_min / 60.0,
            jitter_s: cfg.jitter,
            draws,
            rng,
            temp_c: cfg.initial,
            thermostat_closed: cfg.initial < cfg.thermostat.setpoint,
            tripped: cfg.initial >= cfg.cutout,
            today: Vec::with_capacity(16),
            next_draw: 0,
            draw_from: u32::MAX,
            cached_dt: f64::NAN,
            cached_k: 1.0,
            inv_ua: if cfg.ua > 0.0 { 1.0 / cfg.ua } else { 0.0 },
            drawn_l: 0.0,
            lukewarm_l: 0.0,
            short_wh: 0.0,
        })
    }

    /// Lays out today's draws.
    pub fn begin_day(&mut self, day: &Day) {
        self.today.clear();
        for d in &self.draws {
            if !day.matches(d.days) {
                continue;
            }
            let shift = (self.rng.uniform() * 2.0 - 1.0) * self.jitter_s;
            let start = (f64::from(d.at) + shift).clamp(0.0, 86_399.0) as u32;
            // Hot water is drawn for as long as the tap runs: the mixed volume at the tap flow.
            let end = (f64::from(start) + d.volume_l / self.flow_lps).min(86_399.0) as u32;
            if end > start {
                self.today.push((start, end, d.tap_c));
            }
        }
        self.today.sort_by_key(|d| d.0);
        self.next_draw = 0;
        self.draw_from = self.today.first().map_or(u32::MAX, |d| d.0);
    }

    /// Whether the thermostat and the cut-out let the element heat.
    #[inline]
    pub fn calls_for_heat(&self) -> bool {
        self.thermostat_closed && !self.tripped
    }

    /// Advances by `dt` seconds with `element_w` of heating at local second `sec`.
    #[inline]
    pub fn step(&mut self, element_w: f64, dt: f64, sec: u32) {
        if sec >= self.draw_from {
            self.draw(dt, sec);
        }
        // Heating against standing loss: exact for constant power over the step,
        // T(dt) = T_eq + (T − T_eq)·exp(−UA·dt/(m·c)) with T_eq = T_a + P/UA.
        if self.ua > 0.0 {
            if dt != self.cached_dt {
                self.cached_dt = dt;
                self.cached_k = (-self.ua * dt / self.heat_capacity).exp();
            }
            let t_eq = self.ambient + element_w * self.inv_ua;
            self.temp_c = t_eq + (self.temp_c - t_eq) * self.cached_k;
        } else {
            self.temp_c += element_w * dt / self.heat_capacity;
        }
        if self.temp_c >= self.setpoint {
            self.thermostat_closed = false;
        } else if self.temp_c <= self.setpoint - self.deadband {
            self.thermostat_closed = true;
        }
        if self.temp_c >= self.cutout {
            self.tripped = true;
        }
    }

    /// Hot-water draws at local second `sec`: the tap mixes hot with cold to reach its
    /// temperature; the hot volume leaves the node and the same volume of cold water
    /// comes in.
    fn draw(&mut self, dt: f64, sec: u32) {
        while let Some(&(start, end, tap)) = self.today.get(self.next_draw) {
            if sec >= end {
                self.next_draw += 1;
                continue;
            }
            if sec >= start {
                let hot_share = if self.temp_c > tap && self.temp_c > self.cold {
                    ((tap - self.cold) / (self.temp_c - self.cold)).clamp(0.0, 1.0)
                } else {
                    1.0
                };
                let hot_l = (self.flow_lps * dt * hot_share).min(self.volume_l);
                if self.temp_c < tap {
                    // No mixing left to do: the tap gets the tank as it is, and the
                    // person at it gets water short of what they asked for.
                    self.lukewarm_l += hot_l;
                    self.short_wh += hot_l * self.heat_capacity / self.volume_l * (tap - self.temp_c) / 3600.0;
                }
                self.temp_c -= hot_l / self.volume_l * (self.temp_c - self.cold);
                self.drawn_l += hot_l;
            }
            break;
        }
        self.draw_from = self.today.get(self.next_draw).map_or(u32::MAX, |d| d.0);
    }
}
