//! The no-diversion baseline a run is compared with: the same house on the same weather,
//! as it would run without Spillway. Water heaters (loads with a temperature point) sit
//! on their own thermostats with the relay closed (a proportional one whose regulator
//! heats the simulated tank at 100 %); loads with a daily run obligation run
//! on a fixed timer from 10:00; chargers charge at full current whenever a car is
//! plugged in; batteries, regulators and dump loads stay idle. Where the site limits
//! export and has a curtailable inverter, the inverter keeps to the limit with its own
//! export limitation (`Plant::set_export_limiter`, set by the run), as it would have to
//! without Spillway; elsewhere it is never curtailed.

use std::time::Duration;

use crate::config::model::{LoadId, LoadKind, Obligation, Site};
use crate::engine::{Command, Decisions, LimitReason, LoadDecision, Mode, Reason, SiteClock, Switching};
use crate::units::{Power, Timestamp};

/// When timer loads start (local time).
const TIMER_START_S: u32 = 10 * 3600;

/// The baseline controller.
pub struct Baseline {
    decisions: Decisions,
    /// Per load: a proportional load whose regulator heats the simulated tank.
    tank_heaters: Vec<bool>,
}

impl Baseline {
    /// A baseline for a site; everything off until the first decision. `tank_heaters`
    /// marks the proportional loads whose regulator heats the simulated tank (per load,
    /// in site order; missing entries count as `false`).
    pub fn new(site: &Site, tank_heaters: &[bool]) -> Self {
        Baseline {
            tank_heaters: tank_heaters.to_vec(),
            decisions: Decisions {
                now: Timestamp(0),
                loads: vec![LoadDecision { command: Command::Off, reason: Reason::Waiting }; site.loads.len()],
                inverter_limit: None,
                limit_reason: LimitReason::None,
                mode: Mode::Normal,
                surplus: Power::ZERO,
                grid: None,
                switchings: Vec::new(),
            },
        }
    }

    /// The last commands.
    pub fn decisions(&self) -> &Decisions {
        &self.decisions
    }

    /// The commands at `now`.
    pub fn decide(&mut self, site: &Site, now: Timestamp, clock: &mut SiteClock) -> &Decisions {
        let local = clock.at(now);
        let d = &mut self.decisions;
        d.now = now;
        d.switchings.clear();
        for (i, (load, out)) in site.loads.iter().zip(d.loads.iter_mut()).enumerate() {
            let timer = load.obligations.iter().find_map(|o| match o {
                Obligation::RunDaily { duration, .. } => Some(*duration),
                _ => None,
            });
            let heats_tank = self.tank_heaters.get(i).copied().unwrap_or(false);
            let command = match (&load.kind, load.temperature, timer) {
                (LoadKind::Switched { .. }, Some(_), _) => Command::On,
                (LoadKind::Proportional { .. }, Some(_), _) if heats_tank => Command::On,
                (LoadKind::Switched { .. }, None, Some(run)) => {
                    if on_timer(local.seconds_of_day, run) {
                        Command::On
                    } else {
                        Command::Off
                    }
                }
                (LoadKind::Charger { max, .. }, _, _) => Command::Current(*max),
                _ => Command::Off,
            };
            if command.is_on() != out.command.is_on() {
                d.switchings.push(Switching {
                    load: LoadId(i),
                    from: out.command,
                    to: command,
                    reason: Reason::Running,
                });
            }
            *out = LoadDecision { command, reason: if command.is_on() { Reason::Running } else { Reason::Waiting } };
        }
        &self.decisions
    }
}

fn on_timer(seconds_of_day: u32, run: Duration) -> bool {
    let len = run.as_secs().min(86_400) as u32;
    let end = TIMER_START_S + len;
    if end <= 86_400 {
        (TIMER_START_S..end).contains(&seconds_of_day)
    } else {
        seconds_of_day >= TIMER_START_S || seconds_of_day < end - 86_400
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_timer_runs_from_ten_for_the_obligations_hours() {
        let five_h = Duration::from_secs(5 * 3600);
        assert!(!on_timer(9 * 3600, five_h));
        assert!(on_timer(10 * 3600, five_h));
        assert!(on_timer(14 * 3600 + 3599, five_h));
        assert!(!on_timer(15 * 3600, five_h));
        let long = Duration::from_secs(16 * 3600);
        assert!(on_timer(3600, long), "wraps past midnight");
    }
}
