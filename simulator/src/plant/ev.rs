//! EV charger and car: recurring plug-in sessions, a car battery, and the charging
//! rules of the trade: below the minimum current the car does not charge, commands are
//! rounded down to the charger's step, and charging stops at the car's target.
//! (No taper near full: the car takes the commanded current until the target.)

use super::PlantError;
use super::calendar::{Day, parse_clock};
use super::config::{Days, EvConfig, SessionConfig};
use super::noise::Stream;

#[derive(Debug, Clone)]
struct Session {
    arrive: u32,
    depart: u32,
    soc: f64,
    spread: f64,
    days: Days,
}

fn default_sessions() -> Vec<SessionConfig> {
    // An invented commuter: home on weekday evenings, around the house on weekend days.
    vec![
        SessionConfig {
            arrive: "17:45".to_owned(),
            depart: "07:15".to_owned(),
            soc: 45.0,
            spread: 15.0,
            days: Days::Weekdays,
        },
        SessionConfig {
            arrive: "10:30".to_owned(),
            depart: "16:30".to_owned(),
            soc: 55.0,
            spread: 15.0,
            days: Days::Weekends,
        },
    ]
}

/// The charger and the car.
#[derive(Debug)]
pub struct Ev {
    capacity_wh: f64,
    min_a: f64,
    max_a: f64,
    step_a: f64,
    /// Watts per ampere (phase voltage × phases).
    w_per_a: f64,
    eta: f64,
    target_wh: f64,
    sessions: Vec<Session>,
    rng: Stream,
    /// Upcoming (arrival ms, departure ms, SoC fraction), sorted by arrival.
    upcoming: Vec<(i64, i64, f64)>,
    /// A car is plugged in.
    pub plugged: bool,
    depart_ms: i64,
    /// Energy in the car battery, Wh.
    pub stored_wh: f64,
    /// Current drawn last step, A.
    pub current_a: f64,
    /// Cars that have left (or been replaced by the next arrival).
    pub departures: u32,
    /// What those cars lacked of their target when they left, Wh (from the car's side
    /// of the charger: what they would still have had to take in).
    pub short_wh: f64,
    /// Whether a car comes back emptier by what it lacked when it left.
    carry_shortfall: bool,
    /// What the last car lacked when it left, Wh, to take off its next arrival.
    owed_wh: f64,
}

impl Ev {
    /// Builds the charger from its configuration.
    pub fn new(cfg: &EvConfig, rng: Stream) -> Result<Ev, PlantError> {
        let bad = |why: String| PlantError::Invalid { what: format!("ev \"{}\"", cfg.name), why };
        if !(cfg.capacity > 0.0) || !(cfg.min_current > 0.0) || cfg.max_current < cfg.min_current {
            return Err(bad("capacity and min_current must be > 0, max_current ≥ min_current".to_owned()));
        }
        if !(cfg.step > 0.0) || !(cfg.phases == 1 || cfg.phases == 3) {
            return Err(bad("step must be > 0 and phases 1 or 3".to_owned()));
        }
        let defaults;
        let list = match &cfg.sessions {
            Some(l) => l,
            None => {
                defaults = default_sessions();
                &defaults
            }
        };
        let sessions = list
            .iter()
            .map(|s| {
                let arrive =
                    parse_clock(&s.arrive).ok_or_else(|| bad(format!("arrive `{}` is not HH:MM", s.arrive)))?;
                let depart =
                    parse_clock(&s.depart).ok_or_else(|| bad(format!("depart `{}` is not HH:MM", s.depart)))?;
                Ok(Session { arrive, depart, soc: s.soc / 100.0, spread: s.spread / 100.0, days: s.days })
            })
            .collect::<Result<Vec<_>, PlantError>>()?;
        Ok(Ev {
            capacity_wh: cfg.capacity,
            min_a: cfg.min_current,
            max_a: cfg.max_current,
            step_a: cfg.step,
            w_per_a: cfg.voltage * f64::from(cfg.phases),
            eta: cfg.efficiency / 100.0,
            target_wh: cfg.capacity * cfg.target_soc / 100.0,
            sessions,
            rng,
            upcoming: Vec::with_capacity(8),
            plugged: false,
            depart_ms: i64::MIN,
            stored_wh: 0.0,
            current_a: 0.0,
            departures: 0,
            short_wh: 0.0,
            carry_shortfall: cfg.carry_shortfall,
            owed_wh: 0.0,
        })
    }

    /// Schedules the sessions that start today.
    pub fn begin_day(&mut self, day: &Day) {
        for s in &self.sessions {
            if !day.matches(s.days) {
                continue;
            }
            let arrive_ms = day.instant_ms(s.arrive);
            let stay_s = if s.depart > s.arrive { s.depart - s.arrive } else { s.depart + 86_400 - s.arrive };
            let soc = (s.soc + (self.rng.uniform() * 2.0 - 1.0) * s.spread).clamp(0.0, 1.0);
            self.upcoming.push((arrive_ms, arrive_ms + i64::from(stay_s) * 1000, soc));
        }
        self.upcoming.sort_by_key(|u| u.0);
    }

    /// Plugs and unplugs cars at `t_ms`.
    #[inline]
    pub fn update_sessions(&mut self, t_ms: i64) {
        if self.plugged && t_ms >= self.depart_ms {
            self.unplug();
        }
        while let Some(&(arrive, depart, soc)) = self.upcoming.first() {
            if arrive > t_ms {
                break;
            }
            self.upcoming.remove(0);
            if depart > t_ms {
                // A car that arrives while another is still plugged replaces it.
                if self.plugged {
                    self.unplug();
                }
                self.plugged = true;
                self.depart_ms = depart;
                self.stored_wh = (soc * self.capacity_wh - self.owed_wh).max(0.0);
                self.owed_wh = 0.0;
            }
        }
    }

    /// The car leaves: what it lacks of its target is counted against the run.
    fn unplug(&mut self) {
        self.plugged = false;
        self.departures += 1;
        let short = (self.target_wh - self.stored_wh).max(0.0);
        self.short_wh += short;
        if self.carry_shortfall {
            self.owed_wh = short;
        }
    }

    /// Power drawn at commanded current `cmd_a` for a step of `dt` s.
    #[inline]
    pub fn power_w(&mut self, cmd_a: f64, dt: f64) -> f64 {
        self.current_a = 0.0;
        if !self.plugged || self.stored_wh >= self.target_wh || !(cmd_a >= self.min_a) {
            return 0.0;
        }
        let amps = ((cmd_a.min(self.max_a) / self.step_a + 1e-9).floor() * self.step_a).min(self.max_a);
        if amps < self.min_a {
            return 0.0;
        }
        // The last step before the target takes only what is left.
        let room_w = (self.target_wh - self.stored_wh) * 3600.0 / (self.eta * dt);
        let w = (amps * self.w_per_a).min(room_w);
        self.current_a = w / self.w_per_a;
        w
    }

    /// Charges the car with `w` drawn over `dt` s.
    #[inline]
    pub fn charge(&mut self, w: f64, dt: f64) {
        self.stored_wh = (self.stored_wh + w * self.eta * dt / 3600.0).min(self.capacity_wh);
        if w <= 0.0 {
            self.current_a = 0.0;
        }
    }

    /// Car state of charge, %.
    pub fn soc_pct(&self) -> f64 {
        100.0 * self.stored_wh / self.capacity_wh
    }
}
