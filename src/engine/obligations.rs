//! Daily and periodic duties of a load: run N hours a day, reach a temperature or a
//! state of charge by a time, hold a high temperature every so often. Met from surplus where the rules
//! manage it; forced on from the grid inside the permitted window where they did not;
//! reported as met or missed at the end of each local day.

use std::time::Duration;

use crate::config::model::{LoadId, Obligation};
use crate::units::{Temperature, Timestamp};

/// Progress of one obligation.
#[derive(Debug, Clone, Default)]
pub struct ObligationState {
    /// ReachBy, ChargeBy: the target was seen at the deadline today.
    pub met_today: bool,
    /// ReachBy, ChargeBy: the level was read at all in the minute before the deadline.
    pub judged_today: bool,
    /// ReachBy, ChargeBy: currently heating or charging from the grid (hysteresis).
    pub forcing: bool,
    /// ReachBy, ChargeBy: the instant and local time of day of the last tick seen today.
    pub last_tick: Option<(Timestamp, u32)>,
    /// Cycle: since when the temperature has been at or above the target.
    pub hot_since: Option<Timestamp>,
    /// Cycle: when the last cycle completed (`None` = never, so it is due).
    pub last_cycle: Option<Timestamp>,
}

/// A day's verdict on one obligation, emitted at local midnight.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ObligationResult {
    /// The load.
    pub load: LoadId,
    /// Index into the load's obligations.
    pub index: usize,
    /// Local day (days since 1970-01-01, local time) judged.
    pub day: i64,
    /// Whether it was met.
    pub met: bool,
}

/// Hysteresis below a temperature target before forced heating restarts, and how close
/// to the target a tank must be at its deadline to count as having reached it: one
/// deadband, so that a tank topped up to the target and cooling a little is never both
/// "not worth reheating" and "missed" (`common practice`: thermostat deadbands are 1–3 K).
const RESTART_BELOW: f64 = 1.0;
const MET_TOLERANCE: f64 = RESTART_BELOW;
/// The same for a state of charge, in percentage points: a battery management system
/// reports SoC in whole or tenth percents and a car's charge limit stops within a
/// point of it (`common practice`), so a car that stopped at 79.6 % of an 80 % target
/// has met it, and a battery does not restart a grid charge for a 0.2 % sag.
const SOC_RESTART_BELOW: f64 = 1.0;
const SOC_MET_TOLERANCE: f64 = SOC_RESTART_BELOW;

/// What an obligation asks of its load this tick.
pub struct Demand {
    /// Force the load on from the grid.
    pub force_on: bool,
}

/// Inputs an obligation looks at.
pub struct Situation {
    /// Now.
    pub now: Timestamp,
    /// Seconds since local midnight.
    pub seconds_of_day: u32,
    /// The load's run time today.
    pub runtime_today: Duration,
    /// The load's temperature point, if fresh.
    pub temperature: Option<Temperature>,
    /// The load's state of charge (%), if it has one and it is fresh.
    pub soc: Option<f64>,
    /// A change of the wall clock still ahead today (clocks going forward or back): the
    /// wall time just before it and the jump in seconds (+ forward).
    pub clock_change: Option<(u32, i32)>,
}

impl Situation {
    /// Real seconds from now to wall time `t` (seconds of day, up to 86 400) today: an
    /// hour fewer than on the wall past a jump forward ahead, an hour more past a jump
    /// back (a wall time in the repeated hour is taken at its first pass).
    fn until(&self, t: u32) -> u32 {
        let (sod, t) = (i64::from(self.seconds_of_day), i64::from(t));
        let real = match self.clock_change {
            Some((wall, jump)) if t >= i64::from(wall) => (t - i64::from(jump)).max(i64::from(wall)) - sod,
            _ => t - sod,
        };
        u32::try_from(real.max(0)).unwrap_or(0)
    }
}

fn seconds(t: chrono::NaiveTime) -> u32 {
    chrono::Timelike::num_seconds_from_midnight(&t)
}

/// Real seconds from now to the end of `window` if now is inside it.
fn time_left_in(window: &crate::config::model::Window, s: &Situation) -> Option<u32> {
    let sod = s.seconds_of_day;
    if !window.contains(sod) {
        return None;
    }
    let end = seconds(window.end);
    // Only today's part: the run time counts per local day and starts again at
    // midnight, so a window over midnight (22:00..06:00) gives today its morning and
    // its evening. Counting the next morning in the evening's time left postponed the
    // evening's start until midnight, which then reset what was missing.
    Some(if end > sod { s.until(end) } else { s.until(86_400) })
}

/// A top-up that knows its pace starts when the time left is this many times what the
/// missing points (or kelvins) take at full power, plus the slack below: charging loses
/// 10–15 % between the meter and the cells, a battery or a car tapers its current near
/// full, and a tank loses heat while it heats (`from memory`), so the bare arithmetic
/// would arrive late.
const LATE_START_MARGIN: f64 = 1.25;
const LATE_START_SLACK: Duration = Duration::from_secs(10 * 60);

/// What a `reach` duty aims at.
struct Goal<'a> {
    target: f64,
    by: chrono::NaiveTime,
    grid_window: Option<&'a crate::config::model::Window>,
    band: Band,
    /// Time per point (a state of charge) or per kelvin (a tank) at full power, where
    /// known.
    pace: Option<Duration>,
}

/// How close to a target counts as there, and how far below it a grid top-up restarts.
#[derive(Clone, Copy)]
struct Band {
    met_within: f64,
    restart_below: f64,
}

impl Band {
    const TEMPERATURE: Band = Band { met_within: MET_TOLERANCE, restart_below: RESTART_BELOW };
    const SOC: Band = Band { met_within: SOC_MET_TOLERANCE, restart_below: SOC_RESTART_BELOW };
}

impl ObligationState {
    /// A level (a temperature, a state of charge) to reach by a deadline: judged in the
    /// last minute before it; topped up from the grid inside the window while below it,
    /// with hysteresis. Returns whether to force the load on.
    fn reach(&mut self, level: Option<f64>, goal: Goal<'_>, s: &Situation) -> bool {
        let (now, sod) = (s.now, s.seconds_of_day);
        let Goal { target, by, grid_window, band, pace } = goal;
        let deadline = seconds(by);
        // The wall clock jumped over the deadline's whole last minute while less than a
        // minute passed (clocks going forward): the level now is the level at it.
        let skipped = self.last_tick.take().is_some_and(|(then, then_sod)| {
            now > then && now.since(then) <= Duration::from_secs(60) && then_sod + 60 < deadline && sod > deadline
        });
        self.last_tick = Some((now, sod));
        if let Some(v) = level
            && ((sod <= deadline && sod + 60 >= deadline) || skipped)
        {
            // Judged in the last minute before the deadline.
            self.judged_today = true;
            if v >= target - band.met_within {
                self.met_today = true;
            }
        }
        let in_window = grid_window.is_some_and(|w| w.contains(sod)) && sod < deadline;
        match (in_window, level) {
            (true, Some(v)) => {
                if v >= target {
                    self.forcing = false;
                } else if !self.forcing && v < target - band.restart_below {
                    // Where the pace is known, start just late enough to get there.
                    self.forcing = match (pace, grid_window.and_then(|w| time_left_in(w, s))) {
                        (Some(pace), Some(left)) => {
                            let left = Duration::from_secs(u64::from(left.min(s.until(deadline))));
                            // An absurd reading can ask for more than a `Duration` holds.
                            let need =
                                Duration::try_from_secs_f64(pace.as_secs_f64() * (target - v) * LATE_START_MARGIN)
                                    .unwrap_or(Duration::MAX);
                            left <= need.saturating_add(LATE_START_SLACK)
                        }
                        _ => true,
                    };
                }
                self.forcing
            }
            _ => {
                self.forcing = false;
                false
            }
        }
    }

    /// What the obligation demands now. Called once per tick, before the rules.
    pub fn demand(&mut self, ob: &Obligation, s: &Situation) -> Demand {
        match ob {
            Obligation::RunDaily { duration, grid_window } => {
                let missing = duration.saturating_sub(s.runtime_today);
                let force_on = match grid_window.and_then(|w| time_left_in(&w, s)) {
                    // Start just late enough to need only what is missing (plus a minute of margin).
                    Some(left) => {
                        !missing.is_zero() && Duration::from_secs(u64::from(left)) <= missing + Duration::from_secs(60)
                    }
                    None => false,
                };
                Demand { force_on }
            }
            Obligation::ReachBy { target, by, grid_window, pace } => {
                let goal = Goal {
                    target: target.0,
                    by: *by,
                    grid_window: grid_window.as_ref(),
                    band: Band::TEMPERATURE,
                    pace: *pace,
                };
                Demand { force_on: self.reach(s.temperature.map(|t| t.0), goal, s) }
            }
            Obligation::ChargeBy { soc, by, grid_window, pace } => {
                let goal =
                    Goal { target: soc.0, by: *by, grid_window: grid_window.as_ref(), band: Band::SOC, pace: *pace };
                Demand { force_on: self.reach(s.soc, goal, s) }
            }
            Obligation::Cycle { target, hold, every, grid_window } => {
                match s.temperature {
                    Some(t) if t.0 >= target.0 => {
                        let since = *self.hot_since.get_or_insert(s.now);
                        if s.now.since(since) >= *hold {
                            self.last_cycle = Some(s.now);
                        }
                    }
                    _ => self.hot_since = None,
                }
                let due = self.last_cycle.is_none_or(|last| s.now.since(last) >= *every);
                let in_window = grid_window.is_some_and(|w| w.contains(s.seconds_of_day));
                Demand { force_on: due && in_window }
            }
        }
    }

    /// Judges the day that just ended and resets the daily part of the state. `None`
    /// for a state of charge that could not be read at its deadline: a car that was not
    /// there (a charger knows a car's SoC only while it is plugged in) owed nothing. A
    /// tank sensor that is silent at the deadline, by contrast, is a day missed.
    pub fn end_of_day(&mut self, ob: &Obligation, runtime_today: Duration, now: Timestamp) -> Option<bool> {
        let met = match ob {
            Obligation::RunDaily { duration, .. } => runtime_today >= *duration,
            Obligation::ReachBy { .. } => self.met_today,
            Obligation::ChargeBy { .. } if !self.judged_today => {
                self.forcing = false;
                self.last_tick = None;
                return None;
            }
            Obligation::ChargeBy { .. } => self.met_today,
            Obligation::Cycle { every, .. } => {
                // Met as long as the cycle is not overdue by more than a day.
                self.last_cycle.is_some_and(|last| now.since(last) <= *every + Duration::from_secs(86_400))
            }
        };
        self.met_today = false;
        self.judged_today = false;
        self.forcing = false;
        self.last_tick = None;
        Some(met)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::model::Window;
    use chrono::NaiveTime;

    fn t(h: u32, m: u32) -> NaiveTime {
        NaiveTime::from_hms_opt(h, m, 0).unwrap()
    }

    fn at(sod: u32, runtime_h: f64, temp: Option<f64>) -> Situation {
        Situation {
            now: Timestamp(i64::from(sod) * 1000),
            seconds_of_day: sod,
            runtime_today: Duration::from_secs_f64(runtime_h * 3600.0),
            temperature: temp.map(Temperature),
            soc: None,
            clock_change: None,
        }
    }

    #[test]
    fn daily_run_starts_from_grid_just_late_enough_to_finish_in_the_window() {
        let ob = Obligation::RunDaily {
            duration: Duration::from_secs(5 * 3600),
            grid_window: Some(Window { start: t(16, 0), end: t(21, 0) }),
        };
        let mut s = ObligationState::default();
        // 2 h done: 3 h missing, so it must start by 18:00 (minus the minute of margin).
        assert!(!s.demand(&ob, &at(17 * 3600, 2.0, None)).force_on);
        assert!(s.demand(&ob, &at(18 * 3600 - 30, 2.0, None)).force_on);
        // Done: no forcing.
        assert!(!s.demand(&ob, &at(20 * 3600, 5.0, None)).force_on);
        assert_eq!(s.end_of_day(&ob, Duration::from_secs(4 * 3600), Timestamp(0)), Some(false));
        assert_eq!(s.end_of_day(&ob, Duration::from_secs(5 * 3600), Timestamp(0)), Some(true));
    }

    /// A window over midnight: today's morning part first, then the rest in the evening
    /// before the day's run time starts again at midnight.
    #[test]
    fn daily_run_in_a_window_over_midnight_uses_both_of_todays_parts() {
        let ob = Obligation::RunDaily {
            duration: Duration::from_secs(8 * 3600),
            grid_window: Some(Window { start: t(22, 0), end: t(6, 0) }),
        };
        let mut s = ObligationState::default();
        assert!(s.demand(&ob, &at(0, 0.0, None)).force_on, "8 h missing, 6 h of morning left");
        assert!(!s.demand(&ob, &at(12 * 3600, 6.0, None)).force_on, "outside the window");
        assert!(!s.demand(&ob, &at(21 * 3600, 6.0, None)).force_on);
        assert!(s.demand(&ob, &at(22 * 3600, 6.0, None)).force_on, "2 h missing, 2 h left before midnight");
        assert!(!s.demand(&ob, &at(22 * 3600, 8.0, None)).force_on, "done");
    }

    /// With its pace known (a 58 kWh car on a 3.68 kW charger: 9.5 min a point), a
    /// state-of-charge top-up starts just late enough: 25 points missing take 236 min,
    /// 305 min with the margin and the slack, so from 10:00 to 16:00 it starts at 10:55.
    #[test]
    fn a_soc_top_up_with_a_known_pace_starts_just_late_enough() {
        let pace = Duration::from_secs_f64(58_000.0 / 100.0 / 3680.0 * 3600.0);
        let ob = Obligation::ChargeBy {
            soc: crate::units::Ratio(80.0),
            by: t(16, 0),
            grid_window: Some(Window { start: t(10, 0), end: t(16, 0) }),
            pace: Some(pace),
        };
        let at_soc = |sod: u32, soc: f64| Situation { soc: Some(soc), ..at(sod, 0.0, None) };
        let mut s = ObligationState::default();
        assert!(!s.demand(&ob, &at_soc(10 * 3600 + 54 * 60, 55.0)).force_on, "10:54: there is time");
        assert!(s.demand(&ob, &at_soc(10 * 3600 + 56 * 60, 55.0)).force_on, "10:56: it must start");
        // Started, it runs to the target even if surplus charging got it ahead.
        assert!(s.demand(&ob, &at_soc(12 * 3600, 75.0)).force_on);
        assert!(!s.demand(&ob, &at_soc(13 * 3600, 80.0)).force_on);
        // A car that surplus charged to 70 %: 10 points, 95 min, 128 min with the margin
        // and the slack, so not before 13:52.
        let mut s = ObligationState::default();
        assert!(!s.demand(&ob, &at_soc(13 * 3600 + 51 * 60, 70.0)).force_on);
        assert!(s.demand(&ob, &at_soc(13 * 3600 + 53 * 60, 70.0)).force_on);
        // Without a pace it starts when the window opens.
        let bare = Obligation::ChargeBy {
            soc: crate::units::Ratio(80.0),
            by: t(16, 0),
            grid_window: Some(Window { start: t(10, 0), end: t(16, 0) }),
            pace: None,
        };
        assert!(ObligationState::default().demand(&bare, &at_soc(10 * 3600, 55.0)).force_on);
    }

    /// A 250 L tank on a 3.6 kW element (1 K in 250 × 4186 / 3600 s) to be at 55 °C by
    /// 16:00, from the grid from 13:00.
    fn tank_250_l_at_55_by_four() -> Obligation {
        Obligation::ReachBy {
            target: Temperature(55.0),
            by: t(16, 0),
            grid_window: Some(Window { start: t(13, 0), end: t(16, 0) }),
            pace: Some(Duration::from_secs_f64(250.0 * 4186.0 / 3600.0)),
        }
    }

    /// A 250 L tank with a 3.6 kW element heats 1 K in 250 × 4186 / 3600 = 290.7 s. From
    /// 45 °C to 55 °C by 16:00: 48.4 min, 70.6 with the margin and the slack, so the
    /// top-up starts at 14:49 rather than when the window opens at 13:00.
    #[test]
    fn a_tank_top_up_with_a_known_volume_starts_just_late_enough() {
        let ob = tank_250_l_at_55_by_four();
        let mut s = ObligationState::default();
        assert!(!s.demand(&ob, &at(13 * 3600, 0.0, Some(45.0))).force_on, "13:00: time enough");
        assert!(!s.demand(&ob, &at(14 * 3600 + 48 * 60, 0.0, Some(45.0))).force_on, "14:48");
        assert!(s.demand(&ob, &at(14 * 3600 + 50 * 60, 0.0, Some(45.0))).force_on, "14:50: it must start");
        assert!(!s.demand(&ob, &at(15 * 3600 + 40 * 60, 0.0, Some(55.0))).force_on, "there");
    }

    /// A fresh reading that is finite but absurd (a garbled float register, a payload of
    /// `-1e30`) asks for more time than a `Duration` holds: the top-up starts, and the
    /// tick goes on instead of panicking the control task.
    #[test]
    fn an_absurd_level_with_a_known_pace_forces_the_top_up_without_panicking() {
        let ob = tank_250_l_at_55_by_four();
        let mut s = ObligationState::default();
        assert!(s.demand(&ob, &at(13 * 3600, 0.0, Some(-1e30))).force_on);
    }

    #[test]
    fn reach_by_heats_in_the_window_with_hysteresis_and_judges_at_the_deadline() {
        let ob = Obligation::ReachBy {
            target: Temperature(60.0),
            by: t(17, 0),
            grid_window: Some(Window { start: t(15, 0), end: t(17, 0) }),
            pace: None,
        };
        let mut s = ObligationState::default();
        assert!(!s.demand(&ob, &at(14 * 3600, 0.0, Some(50.0))).force_on, "before the window");
        assert!(s.demand(&ob, &at(15 * 3600, 0.0, Some(50.0))).force_on);
        assert!(!s.demand(&ob, &at(16 * 3600, 0.0, Some(60.0))).force_on, "reached");
        assert!(!s.demand(&ob, &at(16 * 3600 + 60, 0.0, Some(59.5))).force_on, "within the restart deadband");
        assert!(s.demand(&ob, &at(16 * 3600 + 120, 0.0, Some(58.8))).force_on, "below the deadband");
        let _ = s.demand(&ob, &at(17 * 3600 - 30, 0.0, Some(59.1)));
        assert_eq!(s.end_of_day(&ob, Duration::ZERO, Timestamp(0)), Some(true));
    }

    /// On the day the clocks go forward the wall clock skips an hour: in Lisbon on
    /// 2026-03-29, 01:00 WET is followed at once by 02:00 WEST (the IANA tz database via
    /// chrono-tz). A deadline inside that hour (`by: "01:30"`) has no last minute on the
    /// wall; the level read at the jump, a second after 00:59:59, is the level at the
    /// deadline. A tick late in real time is still not judged.
    #[test]
    fn a_deadline_in_the_hour_the_clocks_skip_is_judged_at_the_jump() {
        let ob = Obligation::ReachBy {
            target: Temperature(60.0),
            by: t(1, 30),
            grid_window: Some(Window { start: t(0, 0), end: t(1, 30) }),
            pace: None,
        };
        let tick = |s: &mut ObligationState, now_s: i64, sod: u32| {
            let at = Situation { now: Timestamp(now_s * 1000), seconds_of_day: sod, ..at(sod, 0.0, Some(60.5)) };
            s.demand(&ob, &at);
        };
        let mut s = ObligationState::default();
        tick(&mut s, 10_000, 3598);
        tick(&mut s, 10_001, 3599);
        tick(&mut s, 10_002, 7200);
        assert_eq!(s.end_of_day(&ob, Duration::ZERO, Timestamp(0)), Some(true));
        // The same wall-clock jump after a real gap of two minutes (ticks stopped): not
        // judged, as any deadline whose last minute saw no reading.
        let mut s = ObligationState::default();
        tick(&mut s, 10_000, 3599);
        tick(&mut s, 10_120, 7200);
        assert_eq!(s.end_of_day(&ob, Duration::ZERO, Timestamp(0)), Some(false));
    }

    #[test]
    fn cycle_is_due_until_the_temperature_is_held_long_enough() {
        let ob = Obligation::Cycle {
            target: Temperature(60.0),
            hold: Duration::from_secs(600),
            every: Duration::from_secs(7 * 86_400),
            grid_window: Some(Window { start: t(11, 0), end: t(15, 0) }),
        };
        let mut s = ObligationState::default();
        assert!(s.demand(&ob, &at(12 * 3600, 0.0, Some(55.0))).force_on, "never done: due");
        assert!(s.demand(&ob, &at(12 * 3600 + 60, 0.0, Some(60.5))).force_on, "hot, not held yet");
        assert!(!s.demand(&ob, &at(12 * 3600 + 700, 0.0, Some(60.5))).force_on, "held 10 min: done");
    }
}
