//! The decision core: a deterministic state machine, `step(now, &snapshot) -> &Decisions`.
//!
//! It owns no socket, no timer, no thread and no random number generator, and never
//! reads the clock: the live daemon feeds it real time, `simulate` feeds it simulated
//! time, and both get the same decisions for the same inputs.
//!
//! One tick, in order:
//! 1. local calendar (day and month roll-over, obligations judged at midnight);
//! 2. freshness of every point; the site mode (normal, fail-safe, recovering, outage);
//! 3. the value table rules read: points, derived signals, each load's state;
//! 4. loads in priority order, each seeing the surplus left at its priority;
//! 5. the export guard: inverter curtailment when the loads cannot absorb the rest;
//! 6. counters, switchings and reasons.

mod clock;
mod counters;
mod decision;
mod discharge;
mod guard;
mod modulation;
mod obligations;
mod snapshot;

use std::collections::VecDeque;
use std::sync::Arc;
use std::time::Duration;

pub use clock::{LocalDay, SiteClock};
pub use counters::{PersistedLoad, PersistedState, SiteCounters};
pub use decision::{Command, Decisions, LimitReason, LoadDecision, Mode, Reason, Switching};
pub use obligations::ObligationResult;
pub use snapshot::{Quality, Sample, Snapshot};

use crate::config::model::{Connection, LoadId, LoadKind, Obligation, PointId, SafeState, Site};
use crate::rules::{EvalInput, LocalClock, RuleState, Slot, Truth};
use crate::units::{Current, Energy, Power, Ratio, Temperature, Timestamp};
use guard::Guard;
use modulation::Pi;
use obligations::{ObligationState, Situation};

/// After signals return, each load may switch at most once during this period.
const SETTLE: Duration = Duration::from_secs(60);
/// Longest gap between two ticks that is integrated into the energy counters; a longer
/// gap (the daemon was stopped) is not invented as energy.
const MAX_INTEGRATION_GAP: Duration = Duration::from_secs(60);
/// How long a stepped load must see room for the next stage (or lack of room for the
/// current one) before it changes stage (`common practice` for element switching).
const STAGE_HOLD: Duration = Duration::from_secs(30);
/// Least time a stepped load stays at a stage before the next change, so a surplus that
/// swings (broken cloud, a battery moving in and out of float) cannot walk it up and
/// down every half minute (`common practice`: contactors are rated for limited cycling).
const STAGE_DWELL: Duration = Duration::from_secs(120);

/// A time-limited manual command for one load.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Override {
    /// What to do: `On`, `Off`, or a level for modulating loads.
    pub command: Command,
    /// When it expires by itself.
    pub until: Timestamp,
}

/// Mutable state of one load between ticks.
#[derive(Debug, Clone)]
struct LoadState {
    command: Command,
    reason: Reason,
    /// When the load last went from off to on or back.
    changed_at: Timestamp,
    /// When its command last changed at all (a setpoint included).
    command_at: Timestamp,
    starts: VecDeque<Timestamp>,
    runtime_today: Duration,
    energy_today: Energy,
    power: Power,
    start: Option<RuleState>,
    stop: Option<RuleState>,
    inhibit: Option<RuleState>,
    obligations: Vec<ObligationState>,
    /// Stepped loads: since when the surplus has pointed up (+1) or down (−1).
    stage_trend: Option<(i8, Timestamp)>,
    /// Stepped loads: when the stage last changed.
    stage_changed_at: Timestamp,
    /// The fired rule's explanation at the last switching (its state is reset then).
    switched_because: Option<String>,
    /// Batteries: reached the upper state of charge, waiting for the resume level.
    full: bool,
    /// Modulating loads: what the last command draws beyond the controller's share (a
    /// minimum held inside its band), which the site imports on purpose.
    held: Power,
    /// Batteries allowed to discharge: their cover of the house's own import.
    /// (Boxed: most loads have none, and the tick walks these states.)
    cover: Option<Box<discharge::Cover>>,
    /// Settling after recovery: whether this load has used its one switching.
    settled: bool,
    /// Its command cannot reach it (a device it is written through is down): what it
    /// draws is unknown, and it is not counted as drawing its command.
    unreachable: bool,
    override_: Option<Override>,
    /// Points whose staleness sends this load to its safe state.
    deps: Vec<PointId>,
}

/// The engine.
#[derive(Debug, Clone)]
pub struct Engine {
    site: Arc<Site>,
    clock: SiteClock,
    values: Vec<f64>,
    /// Each point's quality at the last tick (why a signal was lost).
    qualities: Vec<Quality>,
    /// Each point's timeouts, in milliseconds.
    timeouts: Vec<snapshot::Timeouts>,
    last_now: Option<Timestamp>,
    day: Option<LocalDay>,
    local: LocalClock,
    loads: Vec<LoadState>,
    pi: Pi,
    guard: Guard,
    counters: SiteCounters,
    mode: Mode,
    /// Failsafe ended at this instant (start of recovery).
    recovered_at: Option<Timestamp>,
    outage_since: Option<Timestamp>,
    float: bool,
    /// Whether any battery may discharge to cover the house (most sites: none).
    covers: bool,
    /// Whether the site has ever left the initial fail-safe.
    ever_normal: bool,
    /// When the modulating loads last jumped to absorb export (once per grid reading).
    jump_at: Option<Timestamp>,
    /// Reused buffer: power of lower-priority loads that cannot be stopped, per load.
    reserved: Vec<Power>,
    guard_points: Vec<PointId>,
    /// The power point (`battery_power`) of a battery that runs itself
    /// ([`Site::self_run_battery`]). Such a battery discharges to cover what the house
    /// would import, so the grid meter stays near zero while a diverted load runs on the
    /// battery. Counting its discharge as import keeps loads off the battery's store: the
    /// surplus and the proportional loads' controller see the import the battery hides.
    /// Its charging is not counted, so the battery fills first and loads get what it
    /// cannot take, which is what its own control does anyway. The export guard reads the
    /// meter alone (the configuration warns, C0272, where the two would fight).
    home_battery: Option<PointId>,
    decisions: Decisions,
    results: Vec<ObligationResult>,
}

impl Engine {
    /// An engine for a checked site. Every load starts off, every signal missing.
    pub fn new(site: Arc<Site>) -> Self {
        let guard_points = guard_points(&site);
        let loads = site
            .loads
            .iter()
            .map(|l| LoadState {
                command: Command::Off,
                reason: Reason::Waiting,
                changed_at: Timestamp::NEVER,
                command_at: Timestamp::NEVER,
                starts: VecDeque::new(),
                runtime_today: Duration::ZERO,
                energy_today: Energy::ZERO,
                power: Power::ZERO,
                start: l.start.as_ref().map(|r| r.rule.new_state()),
                stop: l.stop.as_ref().map(|r| r.rule.new_state()),
                inhibit: l.inhibit.as_ref().map(|r| r.rule.new_state()),
                obligations: vec![ObligationState::default(); l.obligations.len()],
                stage_trend: None,
                stage_changed_at: Timestamp::NEVER,
                switched_because: None,
                full: false,
                held: Power::ZERO,
                unreachable: false,
                cover: matches!(l.kind, LoadKind::Battery { discharge: Some(_), .. }).then(Box::default),
                settled: true,
                override_: None,
                deps: load_deps(&site, l, &guard_points),
            })
            .collect();
        let decisions = Decisions {
            now: Timestamp(0),
            loads: vec![LoadDecision { command: Command::Off, reason: Reason::Waiting }; site.loads.len()],
            inverter_limit: None,
            limit_reason: LimitReason::None,
            mode: Mode::Failsafe,
            surplus: Power::ZERO,
            grid: None,
            switchings: Vec::new(),
        };
        Engine {
            clock: SiteClock::new(site.timezone),
            values: vec![f64::NAN; site.slots.len],
            qualities: vec![Quality::Missing; site.points.len()],
            timeouts: site.points.iter().map(snapshot::Timeouts::of).collect(),
            last_now: None,
            day: None,
            local: LocalClock { seconds_of_day: 0, weekday: chrono::Weekday::Mon },
            loads,
            pi: Pi::new(site.guard.kp, site.guard.ki),
            guard: Guard::default(),
            counters: SiteCounters::default(),
            mode: Mode::Failsafe,
            recovered_at: None,
            outage_since: None,
            float: false,
            covers: site.loads.iter().any(|l| matches!(l.kind, LoadKind::Battery { discharge: Some(_), .. })),
            ever_normal: false,
            jump_at: None,
            reserved: Vec::new(),
            guard_points,
            home_battery: site.self_run_battery(),
            decisions,
            results: Vec::new(),
            site,
        }
    }

    /// The site this engine runs.
    pub fn site(&self) -> &Arc<Site> {
        &self.site
    }

    /// Whether a load's command can reach it (its devices are up); the daemon says so
    /// before each tick. See the `unreachable` field for what it changes.
    pub fn set_reachable(&mut self, load: LoadId, reachable: bool) {
        if let Some(l) = self.loads.get_mut(load.0) {
            l.unreachable = !reachable;
        }
    }

    /// Sets a manual override; it expires by itself at `until` and never defeats an
    /// inhibit rule, the fail-safe or the export guard.
    pub fn set_override(&mut self, load: LoadId, command: Command, until: Timestamp) {
        if let Some(l) = self.loads.get_mut(load.0) {
            l.override_ = Some(Override { command, until });
        }
    }

    /// Removes a load's override.
    pub fn clear_override(&mut self, load: LoadId) {
        if let Some(l) = self.loads.get_mut(load.0) {
            l.override_ = None;
        }
    }

    /// The active override of a load.
    pub fn override_of(&self, load: LoadId) -> Option<Override> {
        self.loads.get(load.0).and_then(|l| l.override_)
    }

    /// Site counters (today and this month).
    pub fn counters(&self) -> SiteCounters {
        self.counters
    }

    /// A load's run time and energy today.
    pub fn load_today(&self, load: LoadId) -> (Duration, Energy) {
        self.loads.get(load.0).map_or((Duration::ZERO, Energy::ZERO), |l| (l.runtime_today, l.energy_today))
    }

    /// Obligation verdicts emitted since the last call (at local midnights).
    pub fn take_obligation_results(&mut self) -> Vec<ObligationResult> {
        std::mem::take(&mut self.results)
    }

    /// What to write when the controller stops or loses its inputs: every load in its
    /// safe state (`hold` keeps the last command) and the inverter at its safe limit.
    pub fn safe_decisions(&self, now: Timestamp) -> Decisions {
        let mut d = self.decisions.clone();
        d.now = now;
        for ((out, l), st) in d.loads.iter_mut().zip(&self.site.loads).zip(&self.loads) {
            let command = match l.safe_state {
                SafeState::Off => Command::Off,
                SafeState::On => full_command(&l.kind),
                SafeState::Hold => st.command,
            };
            *out = LoadDecision { command, reason: Reason::Failsafe };
        }
        d.inverter_limit = self.site.inverter.as_ref().map(|i| i.safe_limit);
        d.limit_reason = if d.inverter_limit.is_some() { LimitReason::Failsafe } else { LimitReason::None };
        d.mode = Mode::Failsafe;
        d.switchings.clear();
        d
    }

    /// The last decisions.
    pub fn decisions(&self) -> &Decisions {
        &self.decisions
    }

    /// What rules saw at the last tick: the value table, the instant and local time.
    pub fn eval_input(&self) -> EvalInput<'_> {
        EvalInput { values: &self.values, now: self.decisions.now, local: self.local }
    }

    /// The value of a slot at the last tick (NaN when unknown).
    pub fn value(&self, slot: Slot) -> f64 {
        self.values.get(slot.0 as usize).copied().unwrap_or(f64::NAN)
    }

    /// The guard signals that are not fresh at the last tick, each with what is wrong
    /// (`point "grid" is frozen (the same reading for over 1 min)`): why the site is in
    /// fail-safe.
    pub fn lost_guard_signals(&self) -> Vec<String> {
        self.guard_points
            .iter()
            .filter(|p| self.qualities.get(p.0).is_some_and(|q| *q != Quality::Fresh))
            .map(|p| self.point_problem(p.0))
            .collect()
    }

    /// What is wrong with a point that is not fresh, in words.
    fn point_problem(&self, point: usize) -> String {
        let Some(p) = self.site.points.get(point) else {
            return format!("point #{point} is stale or missing");
        };
        match (self.qualities.get(point), p.frozen_after) {
            (Some(Quality::Frozen), Some(f)) => format!(
                "point \"{}\" is frozen (the same reading for over {})",
                p.name,
                crate::units::format_duration(f)
            ),
            (Some(q @ (Quality::Stale | Quality::Missing)), _) => format!("point \"{}\" is {}", p.name, q.word()),
            _ => format!("point \"{}\" is stale or missing", p.name),
        }
    }

    /// A sentence saying why a load is where it is, with the rule's current values.
    pub fn explain(&self, load: LoadId) -> String {
        let (Some(state), Some(l)) = (self.loads.get(load.0), self.site.loads.get(load.0)) else {
            return String::new();
        };
        let input = EvalInput { values: &self.values, now: self.decisions.now, local: self.local };
        let rule_detail = |rt: &Option<crate::config::model::RuleText>, st: &Option<RuleState>| match (rt, st) {
            (Some(r), Some(s)) => Some(r.rule.explain(&input, s)),
            _ => None,
        };
        let base = match state.reason {
            Reason::SignalLost { point } => {
                format!("safe state: {}", self.point_problem(point))
            }
            Reason::Failsafe => {
                let lost = self.lost_guard_signals();
                if lost.is_empty() { Reason::Failsafe.to_string() } else { format!("safe state: {}", lost.join(", ")) }
            }
            Reason::Obligation { index } => {
                format!(
                    "on from the grid: obligation \"{}\" is behind",
                    l.obligations.get(index).map_or(String::new(), |o| o.describe())
                )
            }
            Reason::KeepingForDuty { index } => {
                format!(
                    "not discharging: keeping its charge for \"{}\"",
                    l.obligations.get(index).map_or(String::new(), |o| o.describe())
                )
            }
            // In the site's local time, as the log says it (`until 19:45:40 WET`), not
            // as an RFC 3339 instant in UTC.
            Reason::Override { until } => {
                let local = until.to_utc().with_timezone(&self.site.timezone);
                format!("override until {}", local.format("%H:%M:%S %Z"))
            }
            other => other.to_string(),
        };
        let detail = match state.reason {
            Reason::Started | Reason::Stopped if state.switched_because.is_some() => state.switched_because.clone(),
            Reason::Started | Reason::Waiting | Reason::MinOff { .. } => rule_detail(&l.start, &state.start),
            Reason::Stopped | Reason::Running | Reason::MinOn { .. } => rule_detail(&l.stop, &state.stop),
            Reason::Inhibited => rule_detail(&l.inhibit, &state.inhibit),
            _ => None,
        };
        match detail {
            Some(d) if !d.is_empty() => format!("{base} ({d})"),
            _ => base,
        }
    }

    /// Counters to persist.
    pub fn persisted(&self) -> PersistedState {
        let day = self.day.map_or(0, |d| d.day);
        let month = self.day.map_or(0, |d| i64::from(d.year) * 12 + i64::from(d.month));
        PersistedState {
            day,
            month,
            import_today_wh: self.counters.import_today.0,
            export_today_wh: self.counters.export_today.0,
            import_month_wh: self.counters.import_month.0,
            export_month_wh: self.counters.export_month.0,
            diverted_today_wh: self.counters.diverted_today.0,
            loads: self
                .site
                .loads
                .iter()
                .zip(&self.loads)
                .map(|(l, s)| PersistedLoad {
                    name: l.name.clone(),
                    runtime_today_s: s.runtime_today.as_secs_f64(),
                    energy_today_wh: s.energy_today.0,
                    last_cycle_ms: s.obligations.iter().map(|o| o.last_cycle.map(|t| t.0)).collect(),
                    judged_today: s.obligations.iter().map(|o| o.judged_today).collect(),
                    met_today: s.obligations.iter().map(|o| o.met_today).collect(),
                    on: s.command.is_on(),
                    changed_ms: (s.changed_at != Timestamp::NEVER).then_some(s.changed_at.0),
                    starts_ms: s.starts.iter().map(|t| t.0).collect(),
                })
                .collect(),
        }
    }

    /// Restores counters saved by [`Engine::persisted`], if they belong to the local day
    /// (and month) of `now`; stale counters are dropped, cycle history is always kept.
    pub fn restore(&mut self, saved: &PersistedState, now: Timestamp) {
        let (day, _) = self.clock.day(now);
        self.day = Some(day);
        let month = i64::from(day.year) * 12 + i64::from(day.month);
        if saved.month == month {
            self.counters.import_month = Energy(saved.import_month_wh);
            self.counters.export_month = Energy(saved.export_month_wh);
        }
        let same_day = saved.day == day.day;
        if same_day {
            self.counters.import_today = Energy(saved.import_today_wh);
            self.counters.export_today = Energy(saved.export_today_wh);
            self.counters.diverted_today = Energy(saved.diverted_today_wh);
        }
        for p in &saved.loads {
            let Some((id, _)) = self.site.load(&p.name) else {
                continue;
            };
            let s = &mut self.loads[id.0];
            if same_day {
                // A local day holds at most 25 h (the day the clocks go back): a damaged
                // file must not panic the start.
                s.runtime_today =
                    Duration::try_from_secs_f64(p.runtime_today_s.clamp(0.0, 25.0 * 3600.0)).unwrap_or_default();
                s.energy_today = Energy(p.energy_today_wh);
                // A deadline already judged today keeps its verdict.
                for (i, o) in s.obligations.iter_mut().enumerate() {
                    o.judged_today = p.judged_today.get(i).copied().unwrap_or(false);
                    o.met_today = p.met_today.get(i).copied().unwrap_or(false);
                }
            }
            for (o, last) in s.obligations.iter_mut().zip(&p.last_cycle_ms) {
                o.last_cycle = last.map(Timestamp);
            }
            // A restart must not let a contactor cycle faster than its settings allow
            // (a service restarting in a loop, an automation restarting it): the starts
            // of the last hour count against `max_starts_per_hour`, and `min_off` runs
            // from the last switch — from now for a load that was on, since the stop or
            // the start has just switched it off.
            let hour = Duration::from_secs(3600);
            s.starts = p.starts_ms.iter().map(|&t| Timestamp(t)).filter(|&t| t <= now && now.since(t) < hour).collect();
            s.changed_at = match p.changed_ms.map(Timestamp) {
                _ if p.on => now,
                Some(t) if t <= now => t,
                _ => s.changed_at,
            };
        }
    }

    /// The wall clock was set back by `-ms` (NTP correcting a board without a real-time
    /// clock, a person setting it): every instant the engine remembers moves with it, so
    /// a minimum on-time, a start cap, a hold of the guard or an override keeps its
    /// length instead of waiting out the step. (The rules' own timers and windows start
    /// afresh on a step back; readings stamped before it look stale until re-read.)
    /// Cold and out of line: it runs once in a blue moon, and the tick stays as it was.
    #[cold]
    #[inline(never)]
    fn shift_time(&mut self, ms: i64) {
        let shift = |t: &mut Timestamp| *t = t.shifted(ms);
        self.last_now.iter_mut().for_each(shift);
        self.recovered_at.iter_mut().for_each(shift);
        self.outage_since.iter_mut().for_each(shift);
        self.jump_at.iter_mut().for_each(shift);
        self.guard.shift_time(ms);
        for s in &mut self.loads {
            shift(&mut s.changed_at);
            shift(&mut s.command_at);
            shift(&mut s.stage_changed_at);
            s.starts.iter_mut().for_each(shift);
            s.stage_trend.iter_mut().for_each(|t| shift(&mut t.1));
            s.override_.iter_mut().for_each(|o| shift(&mut o.until));
            for o in &mut s.obligations {
                o.hot_since.iter_mut().for_each(shift);
                o.last_tick.iter_mut().for_each(|t| shift(&mut t.0));
                o.last_cycle.iter_mut().for_each(shift);
            }
            if let Some(c) = s.cover.as_mut() {
                c.shift_time(ms);
            }
        }
    }

    /// Starts the export guard from the inverter's safe limit instead of from "no
    /// limit". A live inverter's limit is not known at start, and a stop, a fail-safe or
    /// a SunSpec model 704 reversion leaves it at its safe limit: a limit the engine took
    /// for absent would be given back in one write, and a no-export site would export
    /// until the guard cut again (2–5 s, measured against `spillway-sim serve` on most
    /// restarts, whenever the first readings came before the first tick). From the safe
    /// limit it is given back gently, as after a fail-safe. The daemon calls this before
    /// its first tick; offline runs start with the plant's inverter unlimited and do not.
    /// Nothing changes on a site without an inverter limit or an export limit.
    pub fn start_from_safe_limit(&mut self) {
        if let (Some(inv), Some(_)) = (&self.site.inverter, self.site.export_limit()) {
            self.guard.assume(inv.safe_limit);
        }
    }

    /// One tick: decide every load and the inverter limit for `now`.
    pub fn step(&mut self, now: Timestamp, snapshot: &Snapshot) -> &Decisions {
        let dt = match self.last_now {
            Some(prev) if now > prev => now.since(prev),
            // The wall clock was set back.
            Some(prev) if now < prev => {
                self.shift_time(now.0 - prev.0);
                Duration::ZERO
            }
            _ => Duration::ZERO,
        };
        self.last_now = Some(now);
        self.local = self.clock.at(now);
        self.calendar(now);

        // Freshness: stale, missing or frozen values become NaN, which rules read as
        // unknown.
        for (i, t) in self.timeouts.iter().enumerate() {
            let s = snapshot.samples.get(i).copied().unwrap_or(Sample::MISSING);
            let q = s.quality_within(now, t);
            self.qualities[i] = q;
            self.values[i] = if q == Quality::Fresh { s.value } else { f64::NAN };
        }
        let guard_ok = self.guard_points.iter().all(|p| self.values[p.0].is_finite());
        self.update_mode(now, guard_ok);
        // The site is borrowed from `self.site`, and borrowed again after each call that
        // needs all of `self`: cloning the `Arc` for the tick took two atomic operations,
        // which wait for every pending store (≈ 5 % of a simulated run).
        let site = &*self.site;

        // Power each load draws now: its own meter if fresh, otherwise as commanded. A
        // battery covering the house counts negative: its discharge is import as far as
        // the other loads' surplus goes.
        let mut managed = Power::ZERO;
        for (l, s) in site.loads.iter().zip(self.loads.iter_mut()) {
            s.power = match l.power.map(|p| self.values[p.0]) {
                Some(v) if v.is_finite() => Power(v.max(0.0)),
                // A load the command cannot reach may be on or off: counting it as
                // drawing its command would hand that power to the loads below it as
                // surplus that may not exist (a relay module that stopped answering
                // with its load off). Counted as drawing nothing, the surplus errs low.
                _ if s.unreachable => Power::ZERO,
                _ => s.command.power(&l.kind),
            };
            managed += s.power;
        }
        let covering =
            self.covers && self.loads.iter().any(|s| s.cover.as_ref().is_some_and(|c| c.power > Power::ZERO));
        let diverted = if covering { self.loads.iter().map(|s| s.power.max(Power::ZERO)).sum() } else { managed };

        // Site flows.
        let grid = site.roles.grid.map(|p| self.values[p.0]).filter(|v| v.is_finite()).map(Power);
        // When the grid reading was measured: a correction is made once per new reading,
        // never twice on the same (delayed) one.
        let grid_at = site.roles.grid.map_or(Timestamp::NEVER, |p| snapshot.get(p).at.minus(site.points[p.0].latency));
        let pv_at = site.roles.pv.map_or(now, |p| snapshot.get(p).at.minus(site.points[p.0].latency));
        let hidden = self.guard.hidden_headroom(site, &self.values, now);
        // Import as far as the loads are concerned: what the meter shows plus what a home
        // battery is discharging to hide (a stale battery reading adds nothing).
        let grid_for_loads = match self.home_battery.map(|p| self.values[p.0]) {
            Some(b) if b < 0.0 => grid.map(|g| g - Power(b)),
            _ => grid,
        };
        let base_surplus = match site.connection {
            Connection::Grid { .. } => grid_for_loads.map(|g| managed - g),
            Connection::OffGrid(_) => self.off_grid_surplus(managed),
        };
        let site = &*self.site;
        let site_surplus = base_surplus.map(|s| s + hidden);
        self.counters.integrate(grid, diverted, dt.min(MAX_INTEGRATION_GAP));
        for (l, s) in site.loads.iter().zip(self.loads.iter_mut()) {
            let _ = l;
            let dt = dt.min(MAX_INTEGRATION_GAP);
            if s.command.is_on() {
                s.runtime_today += dt;
            }
            s.energy_today += s.power.max(Power::ZERO).over(dt);
        }
        self.write_derived(now, grid, site_surplus);
        let site = &*self.site;

        // Loads, highest priority first.
        let input_local = self.local;
        let clock_change = self.clock.change_ahead(now);
        let pi_target = site.import_target;
        let mut u_total = match (grid, grid_for_loads) {
            (Some(real), Some(g)) if self.mode == Mode::Normal || self.mode == Mode::Outage => {
                let modulating_now: Power = site
                    .loads
                    .iter()
                    .zip(&self.loads)
                    .filter(|(l, _)| l.kind.is_modulating())
                    .map(|(_, s)| s.power)
                    .sum();
                let cap: Power = site.loads.iter().filter(|l| l.kind.is_modulating()).map(|l| l.kind.max_power()).sum();
                // Import that loads held at their minimum cause on purpose is not an error
                // to wind the total down by: with it counted, the total keeps measuring the
                // power the loads could have, so a load inside its band pauses when that
                // falls below the band, not whenever the import has lasted a few seconds.
                let held: Power = self.loads.iter().map(|s| s.held).sum();
                let u = self.pi.update(pi_target - g + held, modulating_now, cap, dt);
                // Export beyond the limit: the loads take all they can at once (the guard
                // curtails only the rest), rather than ramping while export persists.
                match site.export_limit() {
                    Some(limit) if -real > limit && self.jump_at.is_none_or(|t| grid_at > t) => {
                        let jump = (modulating_now + (pi_target - g)).min(cap).max(u);
                        self.pi.set_output(jump);
                        self.jump_at = Some(now);
                        jump
                    }
                    _ => u,
                }
            }
            _ => {
                self.pi.reset();
                Power::ZERO
            }
        };
        // Export beyond the limit now: no deadband delays a load taking more of it.
        let over_limit = matches!((site.export_limit(), grid), (Some(limit), Some(g)) if -g > limit);
        self.reserved_lower(now);
        let site = &*self.site;
        let reserved = std::mem::take(&mut self.reserved);
        let mut used = Power::ZERO;
        let mut switchings = std::mem::take(&mut self.decisions.switchings);
        switchings.clear();
        let mut absorbable = Power::ZERO;
        let mut new_power = Power::ZERO;
        // Indexes several parallel vectors (site loads, their states, reservations).
        #[allow(clippy::needless_range_loop)]
        for i in 0..site.loads.len() {
            let surplus_i = site_surplus.map(|s| s - used - reserved[i]);
            self.values[site.slots.site.surplus.0 as usize] = surplus_i.map_or(f64::NAN, |p| p.0);
            let input = EvalInput { values: &self.values, now, local: input_local };
            let (command, reason, headroom) = decide(
                site,
                i,
                &mut self.loads[i],
                &input,
                self.mode,
                surplus_i,
                &mut u_total,
                now,
                self.recovered_at,
                self.outage_since,
                clock_change,
                over_limit,
            );
            absorbable += headroom;
            let st = &mut self.loads[i];
            let was_on = st.command.is_on();
            // A switching is a change of state a relay or contactor sees: on/off or a
            // stage. A modulating load moving its setpoint is following, not switching,
            // and a battery has no relay at all: its charge starting and stopping (and
            // turning into a discharge) is its setpoint following the surplus.
            let switched = (command.is_on() != was_on && !matches!(site.loads[i].kind, LoadKind::Battery { .. }))
                || matches!((command, st.command), (Command::Stage(a), Command::Stage(b)) if a != b);
            if switched {
                switchings.push(Switching { load: LoadId(i), from: st.command, to: command, reason });
            }
            if command.is_on() != was_on {
                st.changed_at = now;
                if command.is_on() {
                    st.starts.push_back(now);
                }
                if self.recovered_at.is_some_and(|r| now.since(r) < SETTLE + site.failsafe.recovery_hold) {
                    st.settled = true;
                }
                // Say why in the words of the rule that fired, before its state is reset
                // (a switching is rare: the allocation is not on the tick's hot path).
                let l = &site.loads[i];
                let fired = match reason {
                    Reason::Started => l.start.as_ref().zip(st.start.as_ref()),
                    Reason::Stopped => l.stop.as_ref().zip(st.stop.as_ref()),
                    _ => None,
                };
                st.switched_because = fired.map(|(r, state)| {
                    r.rule.explain(&EvalInput { values: &self.values, now, local: input_local }, state)
                });
                // A new state of the load: its opposite rule starts afresh.
                reset_rule_states(site, i, st);
            }
            if command != st.command {
                st.command_at = now;
            }
            st.command = command;
            st.reason = reason;
            let p = command.power(&site.loads[i].kind);
            if command.is_on() {
                used += p;
            }
            new_power += expected_draw(site, i, st, p, &self.values, snapshot);
        }
        self.reserved = reserved;
        if self.covers {
            new_power += self.cover_house(grid.map(|g| (g, grid_at)), hidden);
            self.record_cover(now);
        }
        let site = &*self.site;
        // Export guard on the power the loads will draw after this tick's commands.
        let delta_loads = new_power - managed;
        let (limit, limit_reason) = self.guard.decide(
            site,
            &self.values,
            grid.map(|g| (g, grid_at)),
            pv_at,
            delta_loads,
            absorbable,
            self.mode,
            now,
            dt,
        );

        let d = &mut self.decisions;
        d.now = now;
        for (out, st) in d.loads.iter_mut().zip(&self.loads) {
            *out = LoadDecision { command: st.command, reason: st.reason };
        }
        d.inverter_limit = limit;
        d.limit_reason = limit_reason;
        d.mode = self.mode;
        d.surplus = site_surplus.unwrap_or(Power::ZERO);
        d.grid = grid;
        d.switchings = switchings;
        &self.decisions
    }

    /// Batteries allowed to discharge that are not charging cover the house's own import
    /// (see [`discharge`]), in normal operation only: a safe state, an override, an
    /// inhibit rule, a lost signal or an outage keep the decision as it was. Runs after
    /// the loads are decided (a discharge is not surplus for anyone this tick) and
    /// returns the power it adds to the loads' total: the discharges, negative.
    ///
    /// `held_back` is the PV the inverter is being held back from (the guard's hidden
    /// headroom): import the array could cover is not the house's to be paid by the
    /// battery. Without it, a discharge on a curtailed site only displaced PV: the guard
    /// cut the inverter by what the battery gave, the meter still read the import
    /// target, and every reading of noise above it raised the discharge, until the
    /// battery was emptying at noon under a curtailed array and each of its steps
    /// exported for a reading or two.
    fn cover_house(&mut self, reading: Option<(Power, Timestamp)>, held_back: Power) -> Power {
        let site = &*self.site;
        let leave = site.import_target.max(discharge::MARGIN) + held_back;
        let pv_now = site.roles.pv.map(|p| self.values[p.0]).filter(|v| v.is_finite()).map(Power);
        let mut added = Power::ZERO;
        for (l, st) in site.loads.iter().zip(self.loads.iter_mut()) {
            let (Some(cover), LoadKind::Battery { discharge: Some(d), soc, .. }) = (&mut st.cover, &l.kind) else {
                continue;
            };
            // Not charging, and held off charging at most by its own limits.
            let idle = matches!(
                st.reason,
                Reason::Waiting
                    | Reason::Stopped
                    | Reason::BelowMinimum { .. }
                    | Reason::Following { .. }
                    | Reason::Full
                    | Reason::MinOff { .. }
                    | Reason::StartsCapped { .. }
            );
            let before = st.command.power(&l.kind);
            // Inside a `reach: N%` duty's grid window, before its deadline, the charge is
            // being kept for the deadline: covering the house would give away what the
            // grid then has to put back, a point at a time.
            let sod = self.local.seconds_of_day;
            let keeping = l.obligations.iter().position(|o| {
                matches!(o, Obligation::ChargeBy { grid_window: Some(w), by, .. }
                    if w.contains(sod) && sod < chrono::Timelike::num_seconds_from_midnight(by))
            });
            let p = if self.mode != Mode::Normal || !idle || before > Power::ZERO || keeping.is_some() {
                if let Some(index) = keeping
                    && self.mode == Mode::Normal
                    && idle
                    && before <= Power::ZERO
                {
                    st.reason = Reason::KeepingForDuty { index };
                }
                cover.stop();
                Power::ZERO
            } else {
                cover.update(d, self.values[soc.0], reading, pv_now, leave, self.local.seconds_of_day)
            };
            if p > Power::ZERO {
                st.command = Command::Charge(-p);
                st.reason = Reason::CoveringHouse { power: p };
            } else if before < Power::ZERO {
                // A decision that kept the last command (a `hold` safe state, settling, a
                // minimum off-time) must not keep a discharge nobody is steering any more.
                st.command = Command::Off;
            }
            if st.command.power(&l.kind) != before {
                st.command_at = self.last_now.unwrap_or(Timestamp::NEVER);
            }
            added += st.command.power(&l.kind) - before;
        }
        added
    }

    /// Records, for each battery covering the house, this tick's discharge and what the
    /// other managed loads are to draw: measured where they have a fresh meter, else as
    /// now commanded (a late grid reading is matched with them, see [`discharge`]).
    fn record_cover(&mut self, now: Timestamp) {
        let site = &*self.site;
        let values = &self.values;
        let pv = site.roles.pv.map(|p| values[p.0]).filter(|v| v.is_finite()).map(Power);
        let drawn = |l: &crate::config::model::Load, s: &LoadState| match l.power.map(|p| values[p.0]) {
            Some(v) if v.is_finite() => Power(v.max(0.0)),
            _ => s.command.power(&l.kind).max(Power::ZERO),
        };
        let total: Power = site.loads.iter().zip(&self.loads).map(|(l, s)| drawn(l, s)).sum();
        for (l, s) in site.loads.iter().zip(self.loads.iter_mut()) {
            let own = drawn(l, s);
            if let Some(cover) = &mut s.cover {
                cover.record(now, own, total - own, pv);
            }
        }
    }

    fn calendar(&mut self, now: Timestamp) {
        let (day, _) = self.clock.day(now);
        let Some(previous) = self.day else {
            self.day = Some(day);
            return;
        };
        // A date earlier than the day in progress is the wall clock set back across
        // midnight (NTP correcting a guessed time): the day in progress goes on, and
        // is judged once, when the clock passes its end.
        if day.day <= previous.day {
            return;
        }
        let new_month = (previous.year, previous.month) != (day.year, day.month);
        self.counters.roll_over(new_month);
        for (i, (l, s)) in self.site.loads.iter().zip(self.loads.iter_mut()).enumerate() {
            for (j, (ob, st)) in l.obligations.iter().zip(s.obligations.iter_mut()).enumerate() {
                if let Some(met) = st.end_of_day(ob, s.runtime_today, now) {
                    self.results.push(ObligationResult { load: LoadId(i), index: j, day: previous.day, met });
                }
            }
            s.runtime_today = Duration::ZERO;
            s.energy_today = Energy::ZERO;
        }
        self.day = Some(day);
    }

    fn update_mode(&mut self, now: Timestamp, guard_ok: bool) {
        let site = &self.site;
        let outage = site.roles.grid_available.map(|p| self.values[p.0]).filter(|v| v.is_finite()).map(|v| v < 0.5);
        let backup = matches!(site.connection, Connection::Grid { backup: Some(_), .. });
        self.mode = if !guard_ok {
            self.recovered_at = None;
            Mode::Failsafe
        } else {
            // Returning from a fail-safe is held calm; the very first fresh data at
            // start-up is not a return (every load starts off anyway).
            if matches!(self.mode, Mode::Failsafe) && self.ever_normal {
                self.recovered_at = Some(now);
                for l in &mut self.loads {
                    l.settled = false;
                }
            }
            match self.recovered_at {
                Some(r) if now.since(r) < site.failsafe.recovery_hold => Mode::Recovering,
                _ => match (backup, outage) {
                    (true, Some(true)) => Mode::Outage,
                    (true, None) if self.outage_since.is_some() => Mode::Outage,
                    _ => Mode::Normal,
                },
            }
        };
        if self.mode != Mode::Failsafe {
            self.ever_normal = true;
        }
        match (self.mode, self.outage_since) {
            (Mode::Outage, None) => self.outage_since = Some(now),
            (Mode::Normal, Some(_)) => self.outage_since = None,
            _ => {}
        }
    }

    fn off_grid_surplus(&mut self, managed: Power) -> Option<Power> {
        let Connection::OffGrid(og) = &self.site.connection else {
            return None;
        };
        let r = &self.site.roles;
        let v = |p: Option<PointId>| p.map(|p| self.values[p.0]).filter(|v| v.is_finite());
        let voltage = v(r.battery_voltage)?;
        let battery = match v(r.battery_power) {
            Some(p) => p,
            None => v(r.battery_current)? * voltage,
        };
        let soc_full = v(r.battery_soc).is_some_and(|s| s >= og.full_soc.0);
        if voltage >= og.float_voltage.0 || soc_full {
            self.float = true;
        } else if voltage < og.float_voltage.0 - og.float_hysteresis.0 {
            self.float = false;
        }
        // In float the charge controller is holding PV back: assume some headroom. Below
        // float the battery has first call on the power, up to its acceptance.
        let adjust = if self.float { og.float_headroom } else { -og.charge_acceptance };
        Some(managed + Power(battery) + adjust)
    }

    fn write_derived(&mut self, now: Timestamp, grid: Option<Power>, site_surplus: Option<Power>) {
        let s = &self.site.slots.site;
        let nan_or = |p: Option<Power>| p.map_or(f64::NAN, |p| p.0);
        let off_grid = matches!(self.site.connection, Connection::OffGrid(_));
        let (import, export) = match (grid, off_grid) {
            (_, true) => (Some(Power::ZERO), Some(Power::ZERO)),
            (Some(g), _) => (Some(g.max(Power::ZERO)), Some((-g).max(Power::ZERO))),
            (None, _) => (None, None),
        };
        let v = &mut self.values;
        v[s.site_surplus.0 as usize] = nan_or(site_surplus);
        v[s.import.0 as usize] = nan_or(import);
        v[s.export.0 as usize] = nan_or(export);
        v[s.import_today.0 as usize] = self.counters.import_today.0;
        v[s.export_today.0 as usize] = self.counters.export_today.0;
        v[s.import_month.0 as usize] = self.counters.import_month.0;
        v[s.export_month.0 as usize] = self.counters.export_month.0;
        v[s.diverted_today.0 as usize] = self.counters.diverted_today.0;
        v[s.curtailed.0 as usize] = if self.guard.curtailing() { 1.0 } else { 0.0 };
        for (ls, st) in self.site.slots.loads.iter().zip(&self.loads) {
            v[ls.on.0 as usize] = if st.command.is_on() { 1.0 } else { 0.0 };
            v[ls.power.0 as usize] = st.power.0;
            v[ls.runtime_today.0 as usize] = st.runtime_today.as_secs_f64();
            v[ls.energy_today.0 as usize] = st.energy_today.0;
            v[ls.since_change.0 as usize] =
                if st.changed_at == Timestamp::NEVER { 1e9 } else { now.since(st.changed_at).as_secs_f64() };
        }
    }

    /// For each load, the power of lower-priority loads that cannot be stopped now
    /// (minimum on-time, obligation, override): it is not surplus for this load.
    fn reserved_lower(&mut self, now: Timestamp) {
        let n = self.loads.len();
        let mut reserved = std::mem::take(&mut self.reserved);
        reserved.clear();
        reserved.resize(n, Power::ZERO);
        let mut acc = Power::ZERO;
        for i in (0..n).rev() {
            reserved[i] = acc;
            let st = &self.loads[i];
            let l = &self.site.loads[i];
            let locked = st.command.is_on()
                && !l.kind.is_modulating()
                && (now.since(st.changed_at) < l.min_on
                    || matches!(st.reason, Reason::Obligation { .. } | Reason::Override { .. } | Reason::Settling));
            if locked {
                acc += st.power;
            }
        }
        self.reserved = reserved;
    }
}

fn reset_rule_states(site: &Site, i: usize, st: &mut LoadState) {
    let l = &site.loads[i];
    if let (Some(r), Some(s)) = (&l.start, st.start.as_mut()) {
        *s = r.rule.new_state();
    }
    if let (Some(r), Some(s)) = (&l.stop, st.stop.as_mut()) {
        *s = r.rule.new_state();
    }
}

/// Points whose loss puts the whole site in fail-safe.
fn guard_points(site: &Site) -> Vec<PointId> {
    let r = &site.roles;
    match &site.connection {
        Connection::Grid { export, .. } => match export.limit() {
            Some(_) => r.grid.into_iter().collect(),
            None => Vec::new(),
        },
        Connection::OffGrid(_) => {
            [r.battery_voltage, r.battery_current.or(r.battery_power)].into_iter().flatten().collect()
        }
    }
}

/// Points a load's rules and obligations read, directly or through derived signals.
fn load_deps(site: &Site, load: &crate::config::model::Load, guard_points: &[PointId]) -> Vec<PointId> {
    let n = site.points.len() as u32;
    let s = &site.slots.site;
    let flow_slots = [s.surplus, s.site_surplus, s.import, s.export];
    let flow_points: Vec<PointId> = match &site.connection {
        Connection::Grid { .. } => site.roles.grid.into_iter().collect(),
        Connection::OffGrid(_) => guard_points.to_vec(),
    };
    let mut deps = Vec::new();
    for rt in [&load.start, &load.stop, &load.inhibit].into_iter().flatten() {
        for slot in rt.rule.slots() {
            if slot.0 < n {
                deps.push(PointId(slot.0 as usize));
            } else if flow_slots.contains(slot) {
                deps.extend(flow_points.iter().copied());
            }
        }
    }

    if let Some(t) = load.temperature
        && load.obligations.iter().any(|o| matches!(o, Obligation::ReachBy { .. } | Obligation::Cycle { .. }))
    {
        deps.push(t);
    }
    // A charger's car SoC is not a dependency: many chargers read nothing while the car
    // is away, and a silent SoC only keeps its `reach: N%` duty from forcing a top-up
    // (and the day from counting as met); surplus charging goes on.
    if let LoadKind::Battery { soc, .. } = &load.kind {
        deps.push(*soc);
    }
    deps.sort();
    deps.dedup();
    deps
}

/// How long a load's own meter may take to show a new command: a charger ramps to a
/// new current within seconds (IEC 61851-1 gives the car 5 s to follow a change of the
/// pilot signal, `from memory`), a relay and a heater at once.
const DRAW_SETTLES: Duration = Duration::from_secs(5);

/// What the grid will see load `i` draw under its new command `commanded`, for the
/// export guard. A load with its own fresh meter that has read it since the command
/// settled already shows what it does with it: a charger commanded on with no car or a
/// full one, a heater whose thermostat has cut, draw nothing. Counting their command
/// told the guard 3.7 kW were coming, and it let that much PV out as export, for as
/// long as the command stood.
fn expected_draw(
    site: &Site,
    i: usize,
    st: &LoadState,
    commanded: Power,
    values: &[f64],
    snapshot: &Snapshot,
) -> Power {
    let Some(p) = site.loads[i].power else {
        return commanded;
    };
    let measured = values[p.0];
    let taken = snapshot.get(p).at.minus(site.points[p.0].latency);
    if measured.is_finite() && st.command_at != Timestamp::NEVER && taken >= st.command_at.plus(DRAW_SETTLES) {
        Power(measured.max(0.0))
    } else {
        commanded
    }
}

fn truth(
    rule: &Option<crate::config::model::RuleText>,
    state: &mut Option<RuleState>,
    input: &EvalInput<'_>,
) -> Option<Truth> {
    match (rule, state.as_mut()) {
        (Some(r), Some(s)) => Some(r.rule.eval(input, s)),
        _ => None,
    }
}

fn time_left(now: Timestamp, since: Timestamp, hold: Duration) -> Option<Duration> {
    if since == Timestamp::NEVER {
        return None;
    }
    let elapsed = now.since(since);
    (elapsed < hold).then(|| hold - elapsed)
}

/// Decides one load. Returns its command, the reason, and how much more power it could
/// absorb immediately (for the export guard).
#[allow(clippy::too_many_arguments)]
fn decide(
    site: &Site,
    i: usize,
    st: &mut LoadState,
    input: &EvalInput<'_>,
    mode: Mode,
    surplus: Option<Power>,
    u_total: &mut Power,
    now: Timestamp,
    recovered_at: Option<Timestamp>,
    outage_since: Option<Timestamp>,
    clock_change: Option<(u32, i32)>,
    over_limit: bool,
) -> (Command, Reason, Power) {
    let l = &site.loads[i];
    // Set again by `modulate` for a load it keeps above its share this tick.
    st.held = Power::ZERO;
    // Rules are evaluated every tick so that held-for timers and windows stay current.
    // Only the rule that can act is evaluated: the start rule while off, the stop rule
    // while on. The other one's state is reset whenever the load switches, so skipping
    // it changes nothing and halves the work of a tick.
    let inhibit = truth(&l.inhibit, &mut st.inhibit, input);
    let (start, stop) = if st.command.is_on() {
        (None, truth(&l.stop, &mut st.stop, input))
    } else {
        (truth(&l.start, &mut st.start, input), None)
    };
    // An expired override hands the load back to its rules as if from off, so a boost
    // does not linger just because the stop rule is not true.
    let mut is_on = st.command.is_on();
    if let Some(o) = st.override_
        && o.until <= now
    {
        st.override_ = None;
        is_on = false;
    }
    let safe = |st: &LoadState| match l.safe_state {
        SafeState::Off => Command::Off,
        SafeState::On => full_command(&l.kind),
        SafeState::Hold => st.command,
    };

    // 1. Safety first: fail-safe, lost signals, inhibit.
    if mode == Mode::Failsafe {
        return (safe(st), Reason::Failsafe, Power::ZERO);
    }
    if let Some(p) = st.deps.iter().find(|p| !input.values[p.0].is_finite()) {
        return (safe(st), Reason::SignalLost { point: p.0 }, Power::ZERO);
    }
    if mode == Mode::Recovering {
        let left = recovered_at.map_or(Duration::ZERO, |r| site.failsafe.recovery_hold.saturating_sub(now.since(r)));
        return (safe(st), Reason::Recovering { left }, Power::ZERO);
    }
    if inhibit == Some(Truth::True) {
        return (Command::Off, Reason::Inhibited, Power::ZERO);
    }
    // 2. Grid outage: shed lowest priorities first, one per interval.
    if mode == Mode::Outage && l.shed_on_outage {
        let interval = match &site.connection {
            Connection::Grid { backup: Some(b), .. } => b.shed_interval,
            _ => Duration::ZERO,
        };
        let rank = site.loads.iter().skip(i + 1).filter(|o| o.shed_on_outage).count() as u32;
        let since = outage_since.map_or(Duration::ZERO, |o| now.since(o));
        if interval.is_zero() || since >= interval * rank {
            return (Command::Off, Reason::Shed, Power::ZERO);
        }
    }
    // 3. A person's override.
    if let Some(o) = st.override_ {
        let command = match (o.command, &l.kind) {
            (Command::On, k) => full_command(k),
            (c, _) => c,
        };
        // Off is obeyed at once. A start waits out `min_off` and the starts cap like any
        // other, so an automation that toggles the override cannot chatter a contactor
        // or a compressor; the override stays and takes effect when they allow.
        if command.is_on()
            && !is_on
            && let Some(reason) = start_blocked(l, st, now)
        {
            return (st.command, reason, Power::ZERO);
        }
        return (command, Reason::Override { until: o.until }, Power::ZERO);
    }
    // 4. Obligations that must be met from the grid now.
    let temperature = l.temperature.map(|p| input.values[p.0]).filter(|v| v.is_finite()).map(Temperature);
    let soc = l.kind.soc_point().map(|p| input.values[p.0]).filter(|v| v.is_finite());
    let situation = Situation {
        now,
        seconds_of_day: input.local.seconds_of_day,
        runtime_today: st.runtime_today,
        temperature,
        soc,
        clock_change,
    };
    let mut forced = None;
    for (j, (ob, os)) in l.obligations.iter().zip(st.obligations.iter_mut()).enumerate() {
        if os.demand(ob, &situation).force_on && forced.is_none() {
            forced = Some(j);
        }
    }
    if let Some(j) = forced {
        // A top-up that would start the load keeps to the same anti-chatter limits as
        // the rules: an inhibit rule that trips on the import the top-up causes would
        // otherwise switch the relay every tick.
        if !is_on && let Some(reason) = start_blocked(l, st, now) {
            return (st.command, reason, Power::ZERO);
        }
        let command = if l.kind.is_modulating() { full_command(&l.kind) } else { on_command(&l.kind, st.command) };
        return (command, Reason::Obligation { index: j }, Power::ZERO);
    }
    // A grid top-up that is no longer needed hands the load back to its rules as if off.
    if matches!(st.reason, Reason::Obligation { .. }) {
        is_on = false;
    }

    // 5. The rules, with hysteresis and anti-chatter limits.
    let settling = recovered_at.is_some_and(|r| now.since(r) < site.failsafe.recovery_hold + SETTLE) && st.settled;
    let enabled = if is_on {
        match stop {
            Some(Truth::True) => match time_left(now, st.changed_at, l.min_on) {
                Some(left) => Err(Reason::MinOn { left }),
                None if settling => Err(Reason::Settling),
                None => Ok(false),
            },
            _ => Ok(true),
        }
    } else {
        match start {
            Some(Truth::True) | None if start.is_some() || l.kind.is_modulating() => {
                if let Some(reason) = start_blocked(l, st, now) {
                    Err(reason)
                } else if settling {
                    Err(Reason::Settling)
                } else {
                    Ok(true)
                }
            }
            _ => Ok(false),
        }
    };
    let keep = |st: &LoadState, reason| (st.command, reason, Power::ZERO);
    match (&l.kind, enabled) {
        (_, Err(reason)) => keep(st, reason),
        (LoadKind::Switched { .. }, Ok(true)) => {
            (Command::On, if is_on { Reason::Running } else { Reason::Started }, Power::ZERO)
        }
        (LoadKind::Switched { .. } | LoadKind::Stepped { .. }, Ok(false)) => {
            (Command::Off, if is_on { Reason::Stopped } else { Reason::Waiting }, Power::ZERO)
        }
        (LoadKind::Stepped { stages, .. }, Ok(true)) => {
            let stage = step_stage(stages, st, surplus, now);
            (Command::Stage(stage), if is_on { Reason::Running } else { Reason::Started }, Power::ZERO)
        }
        (kind, Ok(enabled)) => {
            // What holds a running load at its minimum, when the share does not: the
            // minimum on-time while it lasts (worded as for a switched load).
            let min_on_left = if is_on { time_left(now, st.changed_at, l.min_on) } else { None };
            modulate(kind, st, enabled, input, u_total, Running { is_on, min_on_left, over_limit })
        }
    }
}

/// Why a load that is off may not start now, if it may not: its minimum off-time, or
/// its cap on starts per hour (rolling). Rules and grid top-ups both keep to these.
fn start_blocked(l: &crate::config::model::Load, st: &mut LoadState, now: Timestamp) -> Option<Reason> {
    if let Some(left) = time_left(now, st.changed_at, l.min_off) {
        return Some(Reason::MinOff { left });
    }
    let cap = l.max_starts_per_hour?;
    while st.starts.front().is_some_and(|t| now.since(*t) >= Duration::from_secs(3600)) {
        st.starts.pop_front();
    }
    (st.starts.len() as u32 >= cap).then_some(Reason::StartsCapped { cap })
}

/// Full power for a kind (safe state `on`, boosts, obligations).
fn full_command(kind: &LoadKind) -> Command {
    match kind {
        LoadKind::Switched { .. } => Command::On,
        LoadKind::Stepped { stages, .. } => Command::Stage(stages.len() as u8),
        LoadKind::Proportional { .. } => Command::Setpoint(Ratio(100.0)),
        LoadKind::Charger { max, .. } => Command::Current(*max),
        LoadKind::Battery { max_charge, .. } => Command::Charge(*max_charge),
    }
}

/// Turning a load on keeps a stepped load's current stage, or starts at stage 1.
fn on_command(kind: &LoadKind, current: Command) -> Command {
    match (kind, current) {
        (LoadKind::Stepped { .. }, Command::Stage(n)) if n > 0 => Command::Stage(n),
        (LoadKind::Stepped { .. }, _) => Command::Stage(1),
        (k, _) => full_command(k),
    }
}

/// Stepped loads climb a stage when the surplus covers the next stage for
/// [`STAGE_HOLD`], and drop one when it no longer covers the current stage as long.
fn step_stage(stages: &[crate::units::Power], st: &mut LoadState, surplus: Option<Power>, now: Timestamp) -> u8 {
    let current = match st.command {
        Command::Stage(n) if n > 0 => n,
        _ => return 1,
    };
    let Some(surplus) = surplus else {
        return current;
    };
    let idx = usize::from(current) - 1;
    // A band around each threshold so a surplus hovering at a stage boundary does not
    // flip the stage back and forth.
    let margin = (stages[idx] * 0.1).max(Power(100.0));
    let trend: i8 = if idx + 1 < stages.len() && surplus >= stages[idx + 1] + margin {
        1
    } else if current > 1 && surplus < stages[idx] - margin {
        -1
    } else {
        0
    };
    if trend == 0 {
        st.stage_trend = None;
        return current;
    }
    match st.stage_trend {
        Some((t, since))
            if t == trend && now.since(since) >= STAGE_HOLD && now.since(st.stage_changed_at) >= STAGE_DWELL =>
        {
            st.stage_trend = None;
            st.stage_changed_at = now;
            (i16::from(current) + i16::from(trend)) as u8
        }
        Some((t, _)) if t == trend => current,
        _ => {
            st.stage_trend = Some((trend, now));
            current
        }
    }
}

/// Where a modulating load stands, beyond its share, when it is decided.
#[derive(Debug, Clone, Copy)]
struct Running {
    /// It is on.
    is_on: bool,
    /// What is left of its minimum on-time, while on.
    min_on_left: Option<Duration>,
    /// The site exports beyond its limit now.
    over_limit: bool,
}

/// Proportional loads, chargers and batteries take their share of the PI controller's
/// total in priority order. Returns the command, reason and remaining headroom.
fn modulate(
    kind: &LoadKind,
    st: &mut LoadState,
    enabled: bool,
    input: &EvalInput<'_>,
    u_total: &mut Power,
    at: Running,
) -> (Command, Reason, Power) {
    let Running { is_on, min_on_left, over_limit } = at;
    // Why a load draws its minimum although its share is less.
    let held = |available: Power, minimum: Power| match min_on_left {
        Some(left) => Reason::MinOn { left },
        None => Reason::AtMinimum { available, minimum },
    };
    let max = kind.max_power();
    if !enabled {
        return (Command::Off, if is_on { Reason::Stopped } else { Reason::Waiting }, Power::ZERO);
    }
    if let LoadKind::Battery { soc, soc_max, soc_resume, .. } = kind {
        let soc_now = input.values[soc.0];
        if soc_now >= soc_max.0 {
            st.full = true;
        } else if soc_now <= soc_resume.0 {
            st.full = false;
        }
        if st.full {
            return (Command::Off, Reason::Full, Power::ZERO);
        }
    }
    let share = u_total.min(max).max(Power::ZERO);
    *u_total -= share;
    let (command, drawn, reason) = match kind {
        LoadKind::Proportional { rated, min, step, .. } => {
            let pct = quantize(share.0 / rated.0 * 100.0, step.0).min(100.0);
            // The lowest setpoint it runs at: its `min`, else one step.
            let lowest = if min.0 > 0.0 { min.0 } else { step.0 }.max(f64::EPSILON);
            let minimum = *rated * (lowest / 100.0);
            if pct >= lowest {
                (
                    Command::Setpoint(Ratio(pct)),
                    *rated * (pct / 100.0),
                    Reason::Following { power: *rated * (pct / 100.0) },
                )
            } else if is_on && share >= run_floor(minimum, true) && lowest > f64::EPSILON {
                // Inside its band: it cannot run below its minimum, so it stays there,
                // importing at most half of it, rather than pause on every dip.
                (Command::Setpoint(Ratio(lowest)), minimum, held(share, minimum))
            } else {
                (Command::Off, Power::ZERO, Reason::BelowMinimum { available: share, minimum })
            }
        }
        LoadKind::Charger { watts_per_amp, min, max: max_a, step, hold_min_from_grid, .. } => {
            let demand = share.0 / watts_per_amp;
            let amps = match st.command {
                // Running: a step is taken only once the demand has passed it by a margin,
                // except upwards while the site exports beyond its limit.
                Command::Current(now) if now.0 >= min.0 => {
                    hold_step(now.0, demand, step.0, over_limit).unwrap_or_else(|| quantize(demand, step.0))
                }
                _ => quantize(demand, step.0),
            }
            .min(max_a.0);
            let min_power = Power(min.0 * watts_per_amp);
            if amps >= min.0 {
                (
                    Command::Current(Current(amps)),
                    Power(amps * watts_per_amp),
                    Reason::Following { power: Power(amps * watts_per_amp) },
                )
            } else if is_on || *hold_min_from_grid {
                // Running chargers hold their minimum until the stop rule ends the session,
                // so a passing cloud does not cycle the contactor.
                (Command::Current(*min), min_power, held(share, min_power))
            } else {
                (Command::Off, Power::ZERO, Reason::BelowMinimum { available: share, minimum: min_power })
            }
        }
        LoadKind::Battery { min_charge, .. } => {
            let p = share;
            // Start at the minimum, go on down to half of it: around zero surplus the
            // share follows the meter's noise, and a setpoint of a few watts toggled the
            // battery on and off every few seconds.
            let floor = run_floor(*min_charge, is_on);
            if p.0 < 1.0 {
                (Command::Charge(Power::ZERO), Power::ZERO, Reason::Following { power: Power::ZERO })
            } else if p < floor {
                (Command::Charge(Power::ZERO), Power::ZERO, Reason::BelowMinimum { available: p, minimum: *min_charge })
            } else {
                (Command::Charge(p), p, Reason::Following { power: p })
            }
        }
        LoadKind::Switched { .. } | LoadKind::Stepped { .. } => (Command::Off, Power::ZERO, Reason::Waiting),
    };
    // What was taken beyond the share (a held minimum) is not left for others.
    // Only a proportional load's held minimum is fed back to the controller: fed back
    // for a charger held at its 6 A too, it let the loads below it (a battery) take
    // power that was import, and the battery/EV example's 30 days spent 3,775 s over its
    // export limit instead of 2,097.
    st.held = match kind {
        LoadKind::Proportional { .. } => (drawn - share).max(Power::ZERO),
        _ => Power::ZERO,
    };
    if drawn > share {
        *u_total = (*u_total - (drawn - share)).max(Power::ZERO);
    }
    (command, reason, (max - drawn).max(Power::ZERO))
}

/// What share of its minimum a running modulating load goes on down to before it
/// pauses: it starts at its minimum and runs on down to half of it, so meter noise
/// around the minimum does not pause and start it every few seconds (`common practice`:
/// hysteresis; the half was first the battery's, whose inverter regulates down there).
const RUN_BAND: f64 = 0.5;

/// The least share a modulating load with minimum `minimum` runs on: the minimum to
/// start, [`RUN_BAND`] of it once running.
fn run_floor(minimum: Power, is_on: bool) -> Power {
    if is_on { minimum * RUN_BAND } else { minimum }
}

/// How far past a step, in steps, the demand of a running charger must go before it
/// moves off its current step: it holds step `c` while the demand stays within
/// `c − STEP_MARGIN … c + 1 + STEP_MARGIN` steps, ±(½ + `STEP_MARGIN`) of a step around
/// the middle of the step. A 1 A step of a 230 V charger is 230 W, too coarse to hold a
/// 50 W import target: without the margin it hunted between two steps every few
/// seconds in a steady surplus, each change a setpoint write (`common practice`:
/// deadband on a quantised output).
const STEP_MARGIN: f64 = 0.25;

/// The step a running quantised setpoint keeps, if it keeps it: `current` while the
/// continuous `demand` stays inside its deadband. Never while the site exports beyond
/// its limit and the demand is above the step (`raise_now`): export there is taken at
/// once.
fn hold_step(current: f64, demand: f64, step: f64, raise_now: bool) -> Option<f64> {
    if step <= 0.0 {
        return None;
    }
    let low = current - STEP_MARGIN * step;
    let high = if raise_now { current + step } else { current + (1.0 + STEP_MARGIN) * step };
    (demand >= low && demand < high).then_some(current)
}

/// Rounds down to the resolution `step` (rounding down never over-absorbs into import).
fn quantize(value: f64, step: f64) -> f64 {
    if step <= 0.0 {
        return value.max(0.0);
    }
    ((value / step) + 1e-9).floor().max(0.0) * step
}

#[cfg(test)]
mod tests;
