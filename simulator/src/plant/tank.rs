//! Water-heater tank: element power in, standing loss UA·(T − T_ambient) out, hot-water
//! draws replaced by cold inflow, a mechanical thermostat and a latching thermal cut-out.
//!
//! By default the tank is one well-mixed node. With `layers` > 1 it is the multi-node
//! (one-dimensional, fixed-inlet) model of a stratified tank (Duffie & Beckman, *Solar
//! Engineering of Thermal Processes*, § 8.4): equal horizontal layers, hot water drawn
//! from the top while cold water enters at the bottom and every layer takes the water of
//! the one below (plug flow, which on a grid of N layers is the tanks-in-series model),
//! the element heating its own layer, and any layer warmer than the one above it mixed
//! with it at once (buoyancy), which keeps the profile stable and conserves energy.

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
/// The most layers a stratified tank may have.
pub const MAX_LAYERS: u32 = 50;
/// Height of the element above a layered tank's bottom when `element_at` is not given,
/// % of the tank's height.
pub const DEFAULT_ELEMENT_AT_PCT: f64 = 10.0;

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
    /// Water temperature the plant reports, °C: the whole node's, or with layers the
    /// sensor's layer.
    pub temp_c: f64,
    /// A stratified tank's layers (`None`: one well-mixed node).
    layered: Option<Layers>,
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
        if !(1..=MAX_LAYERS).contains(&cfg.layers) {
            return Err(bad(format!("`layers` must be 1 to {MAX_LAYERS} (it is {})", cfg.layers)));
        }
        if cfg.layers == 1
            && let Some(key) = [("element_at", cfg.element_at), ("sensor_at", cfg.sensor_at)]
                .iter()
                .find_map(|(key, v)| v.map(|_| key))
        {
            return Err(bad(format!(
                "`{key}` places something at a height, but a tank of one layer has one temperature throughout: set `layers` (e.g. 8) or leave `{key}` out"
            )));
        }
        // The element sits low in most water heaters (`common practice`).
        let element_at = cfg.element_at.unwrap_or(DEFAULT_ELEMENT_AT_PCT);
        let heights = [("element_at", element_at), ("sensor_at", cfg.sensor_at.unwrap_or(element_at))];
        if let Some((key, v)) = heights.iter().find(|(_, v)| !(0.0..=100.0).contains(v)) {
            return Err(bad(format!("`{key}` must be 0 to 100 % of the tank's height (it is {v} %)")));
        }
        let n = cfg.layers as usize;
        // Layers are counted from the top; a height is counted from the bottom.
        let layer_at = |height_pct: f64| n - 1 - ((height_pct / 100.0 * n as f64) as usize).min(n - 1);
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
            layered: (n > 1).then(|| {
                Layers::new(
                    n,
                    cfg.initial - cfg.ambient,
                    layer_at(element_at),
                    layer_at(cfg.sensor_at.unwrap_or(element_at)),
                )
            }),
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
        if self.layered.is_some() {
            self.step_layers(element_w, dt, sec);
            return;
        }
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

    /// [`Tank::step`] for a layered tank.
    #[inline]
    fn step_layers(&mut self, element_w: f64, dt: f64, sec: u32) {
        if sec >= self.draw_from {
            self.draw_layers(dt, sec);
        }
        let Some(layers) = self.layered.as_mut() else { return };
        // Each layer holds 1/N of the water and of the loss area, so each cools with the
        // same time constant as the whole tank; the element's layer heats against it.
        if self.ua > 0.0 {
            if dt != self.cached_dt {
                self.cached_dt = dt;
                self.cached_k = (-self.ua * dt / self.heat_capacity).exp();
            }
            layers.cool(self.cached_k);
        }
        if element_w > 0.0 {
            let n = layers.dev.len() as f64;
            // The element's share on top of its layer's own cooling (the update is
            // linear): T_eq − T_a = P/(UA/N), approached by (1 − k) of the way.
            let rise = if self.ua > 0.0 {
                element_w * n * self.inv_ua * (1.0 - self.cached_k)
            } else {
                element_w * dt * n / self.heat_capacity
            };
            layers.heat(rise);
        }
        // The element's layer is always the bottom of the mixed block (what
        // `temp_at(element)` reads, without its range check); the sensor sits beside the
        // thermostat unless placed elsewhere.
        let at_thermostat = self.ambient + layers.scale * layers.block;
        self.temp_c =
            if layers.sensor == layers.element { at_thermostat } else { layers.temp_at(layers.sensor, self.ambient) };
        if at_thermostat >= self.setpoint {
            self.thermostat_closed = false;
        } else if at_thermostat <= self.setpoint - self.deadband {
            self.thermostat_closed = true;
        }
        if at_thermostat >= self.cutout {
            self.tripped = true;
        }
    }

    /// [`Tank::draw`] for a layered tank: the tap mixes the top layer's water with cold;
    /// the hot volume leaves the top and every layer takes the water of the one below,
    /// the bottom one cold inflow.
    fn draw_layers(&mut self, dt: f64, sec: u32) {
        let Some(layers) = self.layered.as_mut() else { return };
        while let Some(&(start, end, tap)) = self.today.get(self.next_draw) {
            if sec >= end {
                self.next_draw += 1;
                continue;
            }
            if sec >= start {
                layers.settle();
                let top = self.ambient + layers.dev[0];
                let hot_share = if top > tap && top > self.cold {
                    ((tap - self.cold) / (top - self.cold)).clamp(0.0, 1.0)
                } else {
                    1.0
                };
                let hot_l = (self.flow_lps * dt * hot_share).min(self.volume_l);
                if top < tap {
                    self.lukewarm_l += hot_l;
                    self.short_wh += hot_l * self.heat_capacity / self.volume_l * (tap - top) / 3600.0;
                }
                layers.shift_up(hot_l / self.volume_l, self.cold - self.ambient);
                self.drawn_l += hot_l;
            }
            break;
        }
        self.draw_from = self.today.get(self.next_draw).map_or(u32::MAX, |d| d.0);
    }

    /// Temperature of the water a tap gets, °C: the top layer's (the whole node's for a
    /// one-node tank).
    pub fn top_c(&self) -> f64 {
        self.layered.as_ref().map_or(self.temp_c, |l| l.temp_at(0, self.ambient))
    }

    /// Horizontal layers the tank is modelled in (1: one well-mixed node).
    pub fn layers(&self) -> usize {
        self.layered.as_ref().map_or(1, |l| l.dev.len())
    }

    /// The layers' temperatures, top first (one entry for a well-mixed tank), °C.
    pub fn profile(&self) -> Vec<f64> {
        match &self.layered {
            None => vec![self.temp_c],
            Some(l) => (0..l.dev.len()).map(|i| l.temp_at(i, self.ambient)).collect(),
        }
    }

    /// Mean water temperature, °C: the tank's heat content above 0 °C over m·c.
    pub fn mean_c(&self) -> f64 {
        let profile = self.profile();
        profile.iter().sum::<f64>() / profile.len() as f64
    }
}

/// The layers of a stratified tank, held so that a step costs the same however many
/// layers there are: cooling scales every layer's difference from the ambient air by the
/// same factor, so that factor is kept once (`scale`) rather than applied to each layer;
/// and the water the element has mixed (its layer and those above it that heating has
/// merged with it, all at one temperature) is kept as one value (`block`), so heating
/// touches one number. Only a draw works layer by layer.
#[derive(Debug)]
struct Layers {
    /// Each layer's difference from the ambient air, top first, K, times `scale` —
    /// except the mixed block's entries, which `block` holds.
    dev: Vec<f64>,
    /// The common cooling factor of every layer.
    scale: f64,
    /// The element's (and thermostat's) layer, and the sensor's.
    element: usize,
    sensor: usize,
    /// The mixed block runs from this layer down to the element's, at `block` (times
    /// `scale`).
    block_top: usize,
    block: f64,
    /// Scratch space of [`mix_inversions`].
    blocks: Vec<(f64, usize)>,
}

impl Layers {
    fn new(n: usize, dev: f64, element: usize, sensor: usize) -> Layers {
        // A tank at one temperature: everything above the element is one block.
        Layers {
            dev: vec![dev; n],
            scale: 1.0,
            element,
            sensor,
            block_top: 0,
            block: dev,
            blocks: Vec::with_capacity(n),
        }
    }

    /// Layer `i`'s temperature, °C.
    #[inline]
    fn temp_at(&self, i: usize, ambient: f64) -> f64 {
        let dev = if (self.block_top..=self.element).contains(&i) { self.block } else { self.dev[i] };
        ambient + self.scale * dev
    }

    /// Cools every layer towards the ambient air by the factor `k`.
    #[inline]
    fn cool(&mut self, k: f64) {
        self.scale *= k;
        // Keep the stored differences in range (a tank left unheated for weeks).
        if self.scale < 1e-3 {
            self.settle();
        }
    }

    /// Raises the element's layer by `rise` K and mixes it with the water above it that
    /// it is now warmer than (warm water rises): the block shares the heat, and takes in
    /// each layer above that is colder than it.
    #[inline]
    fn heat(&mut self, rise: f64) {
        let mut size = (self.element - self.block_top + 1) as f64;
        self.block += rise / (size * self.scale);
        while self.block_top > 0 && self.dev[self.block_top - 1] < self.block {
            self.block_top -= 1;
            self.block = (size * self.block + self.dev[self.block_top]) / (size + 1.0);
            size += 1.0;
        }
    }

    /// Writes the block and the cooling factor into every layer's entry.
    fn settle(&mut self) {
        let block = self.block;
        self.dev[self.block_top..=self.element].fill(block);
        for d in &mut self.dev {
            *d *= self.scale;
        }
        self.block *= self.scale;
        self.scale = 1.0;
    }

    /// Moves a share `fraction` of the tank's volume up through the layers: out at the
    /// top, inflow `inflow_dev` K from the ambient in at the bottom, in steps of at most a
    /// fifth of a layer so the explicit update stays close to the continuous
    /// tanks-in-series flow (and never overshoots). Call [`Layers::settle`] first.
    fn shift_up(&mut self, fraction: f64, inflow_dev: f64) {
        let n = self.dev.len() as f64;
        let layers_moved = fraction * n;
        let parts = (layers_moved / 0.2).ceil().max(1.0);
        let share = layers_moved / parts;
        for _ in 0..parts as u32 {
            let mut below = inflow_dev;
            for t in self.dev.iter_mut().rev() {
                let old = *t;
                *t += share * (below - old);
                below = old;
            }
        }
        // Inflow warmer than a cold tank's bottom rises through it.
        mix_inversions(&mut self.dev, &mut self.blocks);
        // The element's block is what the mixing left level with it.
        self.block_top = self.element;
        while self.block_top > 0 && self.dev[self.block_top - 1] == self.dev[self.element] {
            self.block_top -= 1;
        }
        self.block = self.dev[self.element];
    }
}

/// Mixes any layer warmer than the one above it with it, until the tank's temperature
/// never rises with depth: warm water rises and mixes (buoyancy). Layers hold equal
/// masses, so a mixed block takes their mean and the heat content is unchanged. This is
/// the pool-adjacent-violators algorithm (a monotone fit by running block means).
fn mix_inversions(layers: &mut [f64], blocks: &mut Vec<(f64, usize)>) {
    if layers.windows(2).all(|w| w[0] >= w[1]) {
        return;
    }
    // Blocks of equal temperature as (sum, count), from the bottom up: a block colder
    // than the block under it is stable; a warmer one below merges with it.
    blocks.clear();
    for &t in layers.iter().rev() {
        let mut block = (t, 1usize);
        while let Some(&(sum, count)) = blocks.last() {
            // The block below (pushed earlier) is warmer than this one above it: mix.
            if sum / count as f64 > block.0 / block.1 as f64 {
                blocks.pop();
                block = (block.0 + sum, block.1 + count);
            } else {
                break;
            }
        }
        blocks.push(block);
    }
    let mut i = layers.len();
    for &(sum, count) in blocks.iter() {
        let mean = sum / count as f64;
        for t in &mut layers[i - count..i] {
            *t = mean;
        }
        i -= count;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// The same physics done the plain way: every layer cooled every step, the element's
    /// layer heated, then any inversion mixed out.
    fn reference(n: usize, dev: f64, element: usize, ops: &[(u8, f64)]) -> Vec<f64> {
        let mut t = vec![dev; n];
        let mut scratch = Vec::new();
        for &(op, x) in ops {
            match op {
                0 => t.iter_mut().for_each(|d| *d *= x),
                1 => {
                    t[element] += x;
                    mix_inversions(&mut t, &mut scratch);
                }
                _ => {
                    // The same explicit steps as `shift_up`.
                    let moved = x * n as f64;
                    let parts = (moved / 0.2).ceil().max(1.0);
                    for _ in 0..parts as u32 {
                        let mut below = -10.0;
                        for d in t.iter_mut().rev() {
                            let old = *d;
                            *d += moved / parts * (below - old);
                            below = old;
                        }
                    }
                    mix_inversions(&mut t, &mut scratch);
                }
            }
        }
        t
    }

    proptest! {
        /// Keeping the cooling factor once and the element's mixed water as one value
        /// gives the layers the plain computation gives, whatever the order of cooling,
        /// heating and draws.
        #[test]
        fn held_layers_match_the_plain_computation(
            n in 2usize..12,
            element_share in 0.0f64..1.0,
            ops in proptest::collection::vec((0u8..3, 0.0f64..1.0), 1..400),
        ) {
            let element = ((element_share * n as f64) as usize).min(n - 1);
            // Cooling by up to 5 % a step (so the held factor is written back now and then),
            // rises up to 2 K, draws up to a third of the tank.
            let ops: Vec<(u8, f64)> = ops
                .into_iter()
                .map(|(op, x)| match op {
                    0 => (0, 1.0 - x * 0.05),
                    1 => (1, 2.0 * x),
                    _ => (2, x / 3.0),
                })
                .collect();
            let mut layers = Layers::new(n, 30.0, element, 0);
            for &(op, x) in &ops {
                match op {
                    0 => layers.cool(x),
                    1 => layers.heat(x),
                    _ => {
                        layers.settle();
                        layers.shift_up(x, -10.0);
                    }
                }
            }
            let fast: Vec<f64> = (0..n).map(|i| layers.temp_at(i, 0.0)).collect();
            let plain = reference(n, 30.0, element, &ops);
            for (a, b) in fast.iter().zip(&plain) {
                prop_assert!((a - b).abs() < 1e-9, "{fast:?} vs {plain:?}");
            }
        }
    }
}
