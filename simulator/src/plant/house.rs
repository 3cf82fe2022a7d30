//! Household base load: standby, fridge compressor cycling, a time-of-day activity load
//! with minute-to-minute variation, and seeded appliance events.
//!
//! Everything random is drawn once per local day into a minute table and a sorted list
//! of power changes, so a step costs one table look-up and (rarely) applying a change.

use super::PlantError;
use super::calendar::{DAY_S, Day, parse_window};
use super::config::{ApplianceConfig, Days, HouseConfig, PhaseConfig};
use super::noise::Stream;

/// Invented default hourly shape of the activity load (morning and evening peaks).
const DEFAULT_PROFILE: [f64; 24] = [
    0.35, 0.30, 0.30, 0.30, 0.30, 0.40, 0.80, 1.30, 1.20, 1.10, 1.05, 1.05, 1.10, 1.10, 1.05, 1.05, 1.15, 1.40, 1.70,
    1.80, 1.60, 1.30, 0.90, 0.55,
];

/// One phase of a programme: seconds, watts, duty (0–1), thermostat cycle seconds.
#[derive(Debug, Clone, Copy)]
struct Phase {
    duration_s: f64,
    power_w: f64,
    duty: f64,
    cycle_s: f64,
}

#[derive(Debug, Clone)]
struct Appliance {
    phases: Vec<Phase>,
    per_day: f64,
    window: (u32, u32),
    days: Days,
}

/// The invented built-in appliance set of an ordinary family home.
fn default_appliances() -> Vec<ApplianceConfig> {
    fn one(name: &str, power: f64, minutes: f64, per_day: f64, window: &str) -> ApplianceConfig {
        ApplianceConfig {
            name: name.to_owned(),
            power: Some(power),
            duration: Some(minutes * 60.0),
            duty: 100.0,
            cycle: 600.0,
            phases: Vec::new(),
            per_day,
            window: window.to_owned(),
            days: Days::All,
        }
    }
    fn phase(power: f64, minutes: f64) -> PhaseConfig {
        PhaseConfig { power, duration: minutes * 60.0, duty: 100.0, cycle: 600.0 }
    }
    let mut oven = one("oven", 2400.0, 50.0, 0.6, "17:00-19:00");
    oven.duty = 55.0;
    oven.cycle = 360.0;
    let mut hob = one("hob", 1800.0, 25.0, 1.0, "11:30-19:30");
    hob.duty = 60.0;
    hob.cycle = 180.0;
    let mut iron = one("iron", 1200.0, 25.0, 0.3, "09:00-16:00");
    iron.duty = 50.0;
    iron.cycle = 120.0;
    let mut washer = one("washing machine", 0.0, 0.0, 0.7, "08:00-15:00");
    washer.power = None;
    washer.duration = None;
    washer.phases = vec![phase(2000.0, 15.0), phase(300.0, 60.0), phase(500.0, 10.0)];
    let mut dishwasher = one("dishwasher", 0.0, 0.0, 0.8, "08:00-21:00");
    dishwasher.power = None;
    dishwasher.duration = None;
    dishwasher.phases = vec![phase(1800.0, 20.0), phase(150.0, 40.0), phase(1800.0, 15.0)];
    vec![
        one("kettle", 2200.0, 3.0, 3.0, "06:00-21:00"),
        one("toaster", 900.0, 4.0, 0.7, "06:30-09:00"),
        one("microwave", 1100.0, 4.0, 1.5, "11:00-20:00"),
        one("vacuum cleaner", 1400.0, 20.0, 0.3, "09:00-16:00"),
        oven,
        hob,
        iron,
        washer,
        dishwasher,
    ]
}

fn appliance(cfg: &ApplianceConfig) -> Result<Appliance, PlantError> {
    let bad = |why: String| PlantError::Invalid { what: format!("house appliance \"{}\"", cfg.name), why };
    let window = parse_window(&cfg.window).ok_or_else(|| bad(format!("window `{}` is not HH:MM-HH:MM", cfg.window)))?;
    let phases = if cfg.phases.is_empty() {
        match (cfg.power, cfg.duration) {
            (Some(p), Some(d)) => vec![Phase { duration_s: d, power_w: p, duty: cfg.duty / 100.0, cycle_s: cfg.cycle }],
            _ => return Err(bad("give `power` and `duration`, or `phases`".to_owned())),
        }
    } else {
        cfg.phases
            .iter()
            .map(|p| Phase { duration_s: p.duration, power_w: p.power, duty: p.duty / 100.0, cycle_s: p.cycle })
            .collect()
    };
    for p in &phases {
        if !(p.duration_s > 0.0 && p.power_w >= 0.0 && p.duty > 0.0 && p.duty <= 1.0) {
            return Err(bad("each phase needs a positive duration, a power ≥ 0 and a duty in (0, 100 %]".to_owned()));
        }
        if p.duty < 1.0 && p.cycle_s <= 0.0 {
            return Err(bad("a duty below 100 % needs a positive cycle".to_owned()));
        }
    }
    if !(cfg.per_day >= 0.0) {
        return Err(bad("per_day must be ≥ 0".to_owned()));
    }
    Ok(Appliance { phases, per_day: cfg.per_day, window, days: cfg.days })
}

/// The household's base load.
#[derive(Debug)]
pub struct House {
    standby_w: f64,
    activity_w: f64,
    profile: [f64; 24],
    weekend: f64,
    variability: f64,
    fridge: Option<(f64, f64, f64)>,
    appliances: Vec<Appliance>,
    rng: Stream,
    /// AR(1) state of the activity variation, carried across days.
    wobble: f64,
    /// Activity plus standby per local minute of the current day.
    minute_w: Vec<f64>,
    /// Power changes of the current day (local second, delta W), sorted.
    changes: Vec<(u32, f64)>,
    next: usize,
    /// When the change at `next` is due (`u32::MAX`: none left today).
    next_at: u32,
    events_w: f64,
}

impl House {
    /// Builds the household from its configuration.
    pub fn new(cfg: &HouseConfig, rng: Stream) -> Result<House, PlantError> {
        let bad = |why: &str| PlantError::Invalid { what: "house".to_owned(), why: why.to_owned() };
        let mut profile = DEFAULT_PROFILE;
        if let Some(p) = &cfg.profile {
            profile = p.as_slice().try_into().map_err(|_| bad("profile needs 24 hourly weights"))?;
        }
        if profile.iter().any(|w| !(*w >= 0.0)) {
            return Err(bad("profile weights must be ≥ 0"));
        }
        let mean = profile.iter().sum::<f64>() / 24.0;
        if mean > 0.0 {
            profile.iter_mut().for_each(|w| *w /= mean);
        }
        let fridge = match &cfg.fridge {
            Some(f) if f.period > 0.0 && f.on >= 0.0 && f.on <= f.period => Some((f.power, f.on, f.period)),
            Some(_) => return Err(bad("fridge needs 0 ≤ on ≤ period and a positive period")),
            None => None,
        };
        let defaults;
        let list = match &cfg.appliances {
            Some(list) => list,
            None => {
                defaults = default_appliances();
                &defaults
            }
        };
        Ok(House {
            standby_w: cfg.standby,
            activity_w: cfg.activity,
            profile,
            weekend: cfg.weekend / 100.0,
            variability: cfg.variability / 100.0,
            fridge,
            appliances: list.iter().map(appliance).collect::<Result<_, _>>()?,
            rng,
            wobble: 0.0,
            minute_w: vec![0.0; (DAY_S / 60) as usize],
            changes: Vec::with_capacity(512),
            next: 0,
            next_at: u32::MAX,
            events_w: 0.0,
        })
    }

    /// Draws the day's minute table and events.
    pub fn begin_day(&mut self, day: &Day) {
        let weekend = !day.matches(Days::Weekdays);
        let scale = self.activity_w * if weekend { self.weekend } else { 1.0 };
        // AR(1) with a 20-minute correlation time; stationary standard deviation = variability.
        let phi: f64 = (-1.0f64 / 20.0).exp();
        let innovation = self.variability * (1.0 - phi * phi).sqrt();
        for (m, slot) in self.minute_w.iter_mut().enumerate() {
            let hour = m as f64 / 60.0;
            let h0 = hour.floor() as usize % 24;
            let frac = hour - hour.floor();
            let shape = self.profile[h0] * (1.0 - frac) + self.profile[(h0 + 1) % 24] * frac;
            self.wobble = phi * self.wobble + innovation * self.rng.normal();
            *slot = self.standby_w + (scale * shape * (1.0 + self.wobble)).max(0.0);
        }

        self.changes.clear();
        let last = DAY_S - 1;
        if let Some((power, on, period)) = self.fridge {
            // Each cycle is a little longer or shorter (±10 %), as door openings make it.
            let mut t = self.rng.uniform() * period;
            while t < f64::from(last) {
                let start = t as u32;
                let end = ((t + on) as u32).min(last);
                if end > start {
                    self.changes.push((start, power));
                    self.changes.push((end, -power));
                }
                t += period * (0.9 + 0.2 * self.rng.uniform());
            }
        }
        for a in &self.appliances {
            if !day.matches(a.days) {
                continue;
            }
            let whole = a.per_day.floor();
            let count = whole as u32 + u32::from(self.rng.uniform() < a.per_day - whole);
            for _ in 0..count {
                let span = f64::from(a.window.1 - a.window.0);
                let mut t = f64::from(a.window.0) + self.rng.uniform() * span;
                for p in &a.phases {
                    let end = t + p.duration_s;
                    if p.duty >= 1.0 {
                        push_on(&mut self.changes, t, end, p.power_w, last);
                    } else {
                        let mut c = t;
                        while c < end {
                            push_on(&mut self.changes, c, (c + p.duty * p.cycle_s).min(end), p.power_w, last);
                            c += p.cycle_s;
                        }
                    }
                    t = end;
                }
            }
        }
        self.changes.sort_by_key(|c| c.0);
        self.next = 0;
        self.next_at = self.changes.first().map_or(u32::MAX, |c| c.0);
        self.events_w = 0.0;
    }

    /// Household power at local second `sec` of the current day.
    #[inline]
    pub fn power(&mut self, sec: u32) -> f64 {
        if sec >= self.next_at {
            self.apply_changes(sec);
        }
        self.minute_w[(sec / 60) as usize] + self.events_w.max(0.0)
    }

    fn apply_changes(&mut self, sec: u32) {
        while let Some(&(at, delta)) = self.changes.get(self.next) {
            if at > sec {
                break;
            }
            self.events_w += delta;
            self.next += 1;
        }
        self.next_at = self.changes.get(self.next).map_or(u32::MAX, |c| c.0);
    }
}

/// Adds an on-interval [start, end) clipped to the day, so every event ends the same day.
fn push_on(changes: &mut Vec<(u32, f64)>, start: f64, end: f64, power: f64, last: u32) {
    let (s, e) = ((start as u32).min(last), (end as u32).min(last));
    if e > s && power > 0.0 {
        changes.push((s, power));
        changes.push((e, -power));
    }
}
