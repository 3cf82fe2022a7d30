//! One offline run: the plant stepped in simulated time, its devices read through the
//! site's points, the engine (or the no-diversion baseline) deciding each tick, the
//! decisions written back through the site's actuators, and every figure a report needs
//! accumulated on the way — without allocating per step.

use std::collections::VecDeque;
use std::sync::Arc;
use std::time::Duration;

use chrono::NaiveDate;
use spillway_sim::plant::{Flows, Plant};
use spillway_sim::site::{self, SiteOptions};
use spillway_sim::weather::WeatherKind;

use super::OfflineError;
use super::baseline::Baseline;
use super::bind::Binding;
use crate::config::model::{LoadKind, Site, Write};
use crate::config::tariff::Tariff;
use crate::engine::{Engine, SiteClock, Snapshot};
use crate::units::Timestamp;

/// Watches a run after every engine tick.
pub type Observer<'a> = dyn FnMut(&Engine, &Plant) + 'a;

/// Who decides.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Controller {
    /// The site's rules through the engine.
    Spillway,
    /// No diversion: tanks on their thermostats, pumps on a fixed timer, chargers at full
    /// current when a car is plugged in, batteries and dump loads idle, no curtailment.
    Baseline,
}

/// What to run.
pub struct RunOptions<'a> {
    /// First local day.
    pub from: NaiveDate,
    /// Number of local days.
    pub days: u32,
    /// Seed of every random draw.
    pub seed: u64,
    /// Overrides the plant's sky.
    pub sky: Option<WeatherKind>,
    /// Simulation step.
    pub step: Duration,
    /// Who decides.
    pub controller: Controller,
    /// Record a time series for charts between these local days (inclusive), every
    /// `trace_every`.
    pub trace: Option<(NaiveDate, NaiveDate)>,
    /// Sampling interval of the trace.
    pub trace_every: Duration,
    /// Called now and then with the fraction done (for a progress bar).
    pub progress: Option<&'a (dyn Fn(f64) + Sync)>,
    /// Called after every engine tick (site expectations watch the run through it).
    pub observer: Option<&'a mut Observer<'a>>,
    /// A recorded PV and household series in place of the modelled ones.
    pub recorded: Option<&'a super::replay::Recorded>,
    /// The plant is another site's (`compare` runs B's rules on A's plant): a load whose
    /// writes that plant would refuse still runs, each refused write counted, rather than
    /// refusing the run (`compare` warns of loads without a namesake instead).
    pub foreign_plant: bool,
}

impl<'a> RunOptions<'a> {
    /// Defaults: one day from `from`, seed 1, 1 s steps, the site's rules, no trace.
    pub fn day(from: NaiveDate) -> RunOptions<'a> {
        RunOptions {
            from,
            days: 1,
            seed: 1,
            sky: None,
            step: Duration::from_secs(1),
            controller: Controller::Spillway,
            trace: None,
            trace_every: Duration::from_secs(60),
            progress: None,
            observer: None,
            recorded: None,
            foreign_plant: false,
        }
    }
}

/// Per-load figures of a run.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LoadFigures {
    /// Energy drawn (the plant's own accounting), Wh.
    pub energy_wh: f64,
    /// Grid energy it drew while an obligation held it on: each step its energy, up to the
    /// site's import in that step (shared out in priority order), Wh. An obligation that
    /// holds a load on in full sun draws little from the grid, and counts little.
    pub grid_topup_wh: f64,
    /// Time on, s.
    pub runtime_s: f64,
    /// On/off and stage changes.
    pub switchings: u32,
    /// Most starts in any rolling hour.
    pub max_starts_per_hour: u32,
    /// Obligation verdicts: (met, missed) days per obligation.
    pub obligations: Vec<(u32, u32)>,
}

/// A calendar month of a run.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MonthFigures {
    /// Year.
    pub year: i32,
    /// Month 1–12.
    pub month: u32,
    /// Imported, Wh.
    pub import_wh: f64,
    /// Exported, Wh.
    pub export_wh: f64,
    /// Into managed loads, Wh.
    pub diverted_wh: f64,
    /// PV, Wh.
    pub pv_wh: f64,
    /// Cost under the tariff (import − export credit + standing charge).
    pub cost: f64,
    /// Local days of the month the run covered (fewer than the month's own at either
    /// end of a run that does not start or end with it).
    pub days: u32,
}

/// Everything one run measured.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RunOutput {
    /// The plant's energy accounts at the end.
    pub flows: Flows,
    /// Per site load, in priority order.
    pub loads: Vec<LoadFigures>,
    /// Highest export, W.
    pub export_peak_w: f64,
    /// Time with export above the limit plus the guard's tolerance, s.
    pub seconds_over_limit: f64,
    /// Durations of export episodes above the limit + tolerance, ms (the guard's response).
    pub export_episodes_ms: Vec<f64>,
    /// Months.
    pub months: Vec<MonthFigures>,
    /// Total cost under the tariff.
    pub cost: f64,
    /// Simulated seconds.
    pub seconds: f64,
    /// Writes the plant refused (a restarting relay module, for instance).
    pub refused_writes: u64,
    /// The recorded time series, if asked for.
    pub trace: Option<Trace>,
    /// Energy into managed loads, Wh.
    pub diverted_wh: f64,
    /// With a simulated EV: cars that left during the run, and what they lacked of their
    /// target SoC when they left, Wh.
    pub ev_departures: Option<(u32, f64)>,
    /// With a simulated tank: litres that came out of the tap colder than asked for, and
    /// the heat they lacked, Wh.
    pub hot_water_short: Option<(f64, f64)>,
    /// With a simulated tank: the layers it is modelled in (1: one well-mixed node).
    pub tank_layers: Option<usize>,
}

/// A time series for charts: one sample per `every`, averaged powers.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Trace {
    /// Sample instants, ms.
    pub t_ms: Vec<i64>,
    /// PV AC, W.
    pub pv_w: Vec<f64>,
    /// Household base load, W.
    pub house_w: Vec<f64>,
    /// Grid, W (import positive).
    pub grid_w: Vec<f64>,
    /// Battery, W (charging positive).
    pub battery_w: Vec<f64>,
    /// Tank temperature at its sensor, °C (NaN without a tank).
    pub tank_c: Vec<f64>,
    /// Temperature at the tank's top, what a tap gets, °C (NaN without a tank; the same
    /// as `tank_c` for a one-node tank).
    pub tank_top_c: Vec<f64>,
    /// Hot water that came out of the tap colder than its draw asked for during the
    /// sample, litres (0 without a tank).
    pub lukewarm_l: Vec<f64>,
    /// Per site load: its name and power, W.
    pub loads: Vec<(String, Vec<f64>)>,
    /// Inverter limit, W (NaN when none).
    pub limit_w: Vec<f64>,
}

/// Where a site load's energy shows in the plant's accounts.
#[derive(Debug, Clone, Copy)]
enum PlantSide {
    Load(usize),
    Battery,
    None,
}

fn plant_side(
    site: &Site,
    plant: &Plant,
    bind: &super::SimBind,
    ev_name: Option<&str>,
    load: &crate::config::model::Load,
) -> PlantSide {
    let relay_unit = |w: &Write| match w {
        Write::Coil { device, address } | Write::Register { device, address, .. } => site
            .devices
            .get(device.0)
            .and_then(|d| d.link.modbus_unit())
            .map(|u| (u, *address, matches!(w, Write::Coil { .. }))),
        _ => None,
    };
    let by_name = |name: &str| plant.load(name).map_or(PlantSide::None, PlantSide::Load);
    let channel_load = |address: u16| -> PlantSide {
        let wiring = &plant.bus().layout().wiring;
        let Some(&ch) = wiring.get(usize::from(address)) else { return PlantSide::None };
        let name = &plant.channels()[ch];
        by_name(name.split('.').next().unwrap_or(name))
    };
    // A load bound by name (`simulation.bind`): its first control says which it is.
    if let Some(first) = bind.load(&load.name).and_then(|c| c.iter().flatten().next()) {
        return match first.as_str() {
            "ev/current" => ev_name.map_or(PlantSide::None, by_name),
            "battery/power" => PlantSide::Battery,
            c => match c.strip_prefix("relay/").or_else(|| c.strip_prefix("regulator/")) {
                Some(name) => by_name(name.split('.').next().unwrap_or(name)),
                None => PlantSide::None,
            },
        };
    }
    let first_write = match &load.kind {
        LoadKind::Switched { switch, .. } => Some(switch),
        LoadKind::Stepped { command, .. } => match command {
            crate::config::model::StageCommand::Relays(r) => r.first(),
            crate::config::model::StageCommand::Register(w) => Some(w),
        },
        LoadKind::Proportional { setpoint, .. } | LoadKind::Charger { setpoint, .. } => Some(setpoint),
        LoadKind::Battery { .. } => return PlantSide::Battery,
    };
    match first_write.and_then(relay_unit) {
        Some((_, address, true)) => channel_load(address),
        Some((_, spillway_sim::bus::HR_EV_CURRENT, false)) => ev_name.map_or(PlantSide::None, by_name),
        Some((_, a, false)) if a >= spillway_sim::bus::HR_REGULATOR => {
            let k = usize::from(a - spillway_sim::bus::HR_REGULATOR);
            plant.regulators().get(k).map_or(PlantSide::None, |n| by_name(n))
        }
        _ => PlantSide::None,
    }
}

/// The longest run, in days (the same bound as `simulation.days` in the site file).
pub const MAX_DAYS: u32 = 3660;

/// Runs the plant once under one controller.
pub fn simulate_once(
    site: &Arc<Site>,
    tariff: Option<&Tariff>,
    plant_cfg: &super::PlantSection,
    mut options: RunOptions<'_>,
) -> Result<RunOutput, OfflineError> {
    if options.days == 0 {
        return Err(OfflineError::Options("the run must last at least one day".into()));
    }
    if options.days > MAX_DAYS {
        return Err(OfflineError::Options(format!("a run lasts at most {MAX_DAYS} days (ten years)")));
    }
    if options.step.is_zero() || options.step > Duration::from_secs(60) {
        return Err(OfflineError::Options("--step must be between 1ms and 60s".into()));
    }
    if !options.step.subsec_nanos().is_multiple_of(1_000_000) {
        return Err(OfflineError::Options(format!(
            "--step must be a whole number of milliseconds, not {:?}",
            options.step
        )));
    }
    if options.trace.is_some() && !options.trace_every.as_millis().is_multiple_of(options.step.as_millis()) {
        return Err(OfflineError::Options(format!(
            "with --chart, the step must divide the chart's averaging interval ({}): use e.g. 1s, 2s or 5s",
            crate::units::format_duration(options.trace_every)
        )));
    }
    // Readings are refreshed once a step: a step longer than a point's stale timeout
    // would leave it stale between steps, and the whole run would be spent in fail-safe.
    if let Some(p) = site.points.iter().filter(|p| options.step > p.stale_after).min_by_key(|p| p.stale_after) {
        return Err(OfflineError::Options(format!(
            "a step of {} is longer than point `{}`'s stale timeout ({}): every reading would go stale between steps and the site would run in fail-safe; use a shorter --step (1 s is the default) or raise its `stale_after`",
            crate::units::format_duration(options.step),
            p.name,
            crate::units::format_duration(p.stale_after)
        )));
    }
    let tz = site.timezone;
    let start_ms = midnight(tz, options.from)?;
    let end_date = options.from + chrono::Days::new(u64::from(options.days));
    let end_ms = midnight(tz, end_date)?;
    let mut plant = match options.recorded {
        Some(rec) => rec.build_plant(plant_cfg, start_ms, options.seed)?,
        None => site::build(plant_cfg, &SiteOptions { start_ms, seed: options.seed, sky: options.sky })?,
    };
    // Without Spillway, a site whose export is limited and whose inverter can be
    // curtailed would still have to keep to its limit: the baseline's inverter holds it
    // with its own export limitation, rather than exporting what the site may not.
    if options.controller == Controller::Baseline
        && let (Some(allowed), Some(_)) = (site.export_limit(), &site.inverter)
    {
        let own = plant.export_limiter().map_or(allowed.0, |own| own.min(allowed.0));
        plant.set_export_limiter(Some(own));
    }
    let mut binding = Binding::new(site, &plant, &plant_cfg.bind, !options.foreign_plant)?;
    let mut engine = Engine::new(Arc::clone(site));
    let mut snapshot = Snapshot::empty(site);
    let ev_name = plant_cfg.ev.as_ref().map(|e| e.name.as_str());
    let sides: Vec<PlantSide> =
        site.loads.iter().map(|l| plant_side(site, &plant, &plant_cfg.bind, ev_name, l)).collect();
    // A proportional load driving a regulator that heats the tank is its water heater: the
    // baseline leaves it on its thermostat, as it does a relay-switched one.
    let tank_heaters: Vec<bool> =
        sides.iter().map(|s| matches!(s, PlantSide::Load(k) if plant.heats_tank(*k))).collect();
    let mut baseline = Baseline::new(site, &tank_heaters);

    let step_ms = i64::try_from(options.step.as_millis()).unwrap_or(1000).max(1);
    let tick_ms = i64::try_from(site.tick.as_millis()).unwrap_or(1000).max(step_ms);
    let step_s = step_ms as f64 / 1000.0;
    let step_h = step_s / 3600.0;
    let limit = site.export_limit().map_or(f64::INFINITY, |l| l.0) + site.guard.tolerance.0;

    let mut out = RunOutput { loads: vec![LoadFigures::default(); site.loads.len()], ..RunOutput::default() };
    for (f, l) in out.loads.iter_mut().zip(&site.loads) {
        f.obligations = vec![(0, 0); l.obligations.len()];
    }
    let mut starts: Vec<VecDeque<i64>> = vec![VecDeque::new(); site.loads.len()];
    let mut clock = SiteClock::new(tz);
    let mut month: Option<(i32, u32)> = None;
    let mut month_fig = MonthFigures::default();
    let mut month_base = Flows::default();
    let mut episode_start: Option<i64> = None;
    let mut next_tick = start_ms;
    let mut decided = false;
    let mut last_load_energy: Vec<f64> = vec![0.0; site.loads.len()];
    let mut standing_day: Option<i64> = None;
    let mut counted_day: Option<i64> = None;
    let mut next_calendar = start_ms;
    let mut price = 0.0;

    // Trace.
    let trace_window = match options.trace {
        Some((a, b)) => Some((midnight(tz, a)?, midnight(tz, b + chrono::Days::new(1))?)),
        None => None,
    };
    let trace_every = i64::try_from(options.trace_every.as_millis()).unwrap_or(60_000).max(step_ms);
    let mut trace = trace_window.map(|_| Trace {
        loads: site.loads.iter().map(|l| (l.name.clone(), Vec::new())).collect(),
        ..Trace::default()
    });
    let mut acc = TraceAcc::new(site.loads.len());

    let total = (end_ms - start_ms) as f64;
    let mut next_progress = start_ms;
    let mut now = start_ms;
    while now < end_ms {
        // Measurements as they stand at `now`, then a decision on the engine's tick.
        binding.read(plant.bus(), now, &mut snapshot);
        if now >= next_tick {
            next_tick += tick_ms;
            match options.controller {
                Controller::Spillway => {
                    engine.step(Timestamp(now), &snapshot);
                    if let Some(obs) = options.observer.as_mut() {
                        obs(&engine, &plant);
                    }
                    for r in engine.take_obligation_results() {
                        let f = &mut out.loads[r.load.0].obligations[r.index];
                        if r.met {
                            f.0 += 1;
                        } else {
                            f.1 += 1;
                        }
                    }
                }
                Controller::Baseline => {
                    baseline.decide(site, Timestamp(now), &mut clock);
                }
            }
            let d = match options.controller {
                Controller::Spillway => engine.decisions(),
                Controller::Baseline => baseline.decisions(),
            };
            for s in &d.switchings {
                out.loads[s.load.0].switchings += 1;
                if s.to.is_on() && !s.from.is_on() {
                    let q = &mut starts[s.load.0];
                    q.push_back(now);
                    while q.front().is_some_and(|t| now - t >= 3_600_000) {
                        q.pop_front();
                    }
                    let f = &mut out.loads[s.load.0];
                    f.max_starts_per_hour = f.max_starts_per_hour.max(q.len() as u32);
                }
            }
            binding.write(site, d, &mut plant);
            decided = true;
        }
        let decisions = match (decided, options.controller) {
            (false, _) => None,
            (true, Controller::Spillway) => Some(engine.decisions()),
            (true, Controller::Baseline) => Some(baseline.decisions()),
        };

        // Months, days and prices, in local time, before the step they cover: a month
        // closes on the flows as they stand at its last instant, so the step that opens
        // the next month is the next month's, in energy as in money. The calendar and the
        // price are looked up once a simulated minute (time-of-use prices change on minute
        // boundaries at the finest; block prices follow the month's import step by step).
        if now >= next_calendar {
            next_calendar = now - now.rem_euclid(60_000) + 60_000;
            let local = clock.at(Timestamp(now));
            let (day, _) = clock.day(Timestamp(now));
            if month != Some((day.year, day.month)) {
                // The first month counts from the run's start (zero flows); later ones
                // from where the previous one closed.
                if let Some((y, m)) = month {
                    out.months.push(close_month(y, m, &month_fig, plant.flows(), &month_base, &sides));
                    month_base = plant.flows().clone();
                }
                month = Some((day.year, day.month));
                month_fig = MonthFigures::default();
            }
            if counted_day != Some(day.day) {
                counted_day = Some(day.day);
                month_fig.days += 1;
            }
            if let Some(t) = tariff {
                price = t.import_price(local.seconds_of_day, local.weekday, 0.0);
                if standing_day != Some(day.day) {
                    standing_day = Some(day.day);
                    month_fig.cost += t.standing_per_day;
                    out.cost += t.standing_per_day;
                }
            }
        }
        let import_before_wh = plant.flows().grid_import.wh;

        // Physics over [now, now + step) with the commands just written.
        plant.step(step_s);
        let flows = plant.flows();

        // Export and the guard's response, on the plant's truth.
        let export = flows.grid_export.w;
        out.export_peak_w = out.export_peak_w.max(export);
        if export > limit {
            out.seconds_over_limit += step_s;
            episode_start.get_or_insert(now);
        } else if let Some(t0) = episode_start.take() {
            out.export_episodes_ms.push((now - t0) as f64);
        }

        // Loads: run time, and grid top-up energy while an obligation holds them on: what
        // the site imported for it. Without the obligation the load would have been off,
        // so the import falls by the load's power at most; the rest of what it drew was
        // PV that would have been curtailed or exported.
        if let Some(d) = decisions {
            let mut import_left = flows.grid_import.w * step_h;
            for (i, (ld, side)) in d.loads.iter().zip(&sides).enumerate() {
                let e = match side {
                    PlantSide::Load(k) => flows.loads.get(*k).map_or(0.0, |f| f.wh),
                    PlantSide::Battery => flows.battery_charge.wh,
                    PlantSide::None => 0.0,
                };
                let de = e - last_load_energy[i];
                last_load_energy[i] = e;
                let f = &mut out.loads[i];
                if ld.command.is_on() {
                    f.runtime_s += step_s;
                }
                if ld.reason.is_grid_topup() {
                    let from_grid = de.min(import_left).max(0.0);
                    import_left -= from_grid;
                    f.grid_topup_wh += from_grid;
                }
            }
        }

        // Money: this step's import, priced from where the month's import stood before it
        // (under blocks, the part of a step that crosses a bound at each block's price).
        if let Some(t) = tariff {
            let import_kwh = flows.grid_import.w * step_h / 1000.0;
            let month_import_kwh = (import_before_wh - month_base.grid_import.wh) / 1000.0;
            let cost = t.import_cost(price, month_import_kwh, import_kwh) - export * t.export_credit * step_h / 1000.0;
            month_fig.cost += cost;
            out.cost += cost;
        }

        // Trace for charts.
        if let (Some(tr), Some((a, b))) = (trace.as_mut(), trace_window)
            && now >= a
            && now < b
        {
            let limit_w = decisions.and_then(|d| d.inverter_limit).map_or(f64::NAN, |p| p.0);
            acc.add(flows, &plant, &sides, limit_w);
            if (now - a + step_ms) % trace_every == 0 {
                acc.flush(tr, now + step_ms - trace_every / 2);
            }
        }

        now += step_ms;
        if let Some(p) = options.progress
            && now >= next_progress
        {
            next_progress = now + 86_400_000;
            p((now - start_ms) as f64 / total);
        }
    }
    if let Some((y, m)) = month {
        out.months.push(close_month(y, m, &month_fig, plant.flows(), &month_base, &sides));
    }
    if let Some(t0) = episode_start {
        out.export_episodes_ms.push((now - t0) as f64);
    }
    // Obligations of the last day are judged at its end.
    if options.controller == Controller::Spillway {
        engine.step(Timestamp(end_ms), &snapshot);
        for r in engine.take_obligation_results() {
            let f = &mut out.loads[r.load.0].obligations[r.index];
            if r.met {
                f.0 += 1;
            } else {
                f.1 += 1;
            }
        }
    }
    for (i, side) in sides.iter().enumerate() {
        out.loads[i].energy_wh = match side {
            PlantSide::Load(k) => plant.flows().loads.get(*k).map_or(0.0, |f| f.wh),
            PlantSide::Battery => plant.flows().battery_charge.wh,
            PlantSide::None => 0.0,
        };
    }
    out.diverted_wh = out.loads.iter().map(|l| l.energy_wh).sum();
    out.flows = plant.flows().clone();
    out.ev_departures = plant.ev_departures();
    out.hot_water_short = plant.hot_water_short();
    out.tank_layers = plant.tank().map(|t| t.layers());
    out.seconds = (end_ms - start_ms) as f64 / 1000.0;
    out.refused_writes = binding.refused_writes;
    out.trace = trace;
    Ok(out)
}

/// The instant of a local midnight, ms.
pub fn midnight(tz: chrono_tz::Tz, date: NaiveDate) -> Result<i64, OfflineError> {
    spillway_sim::pv::local_midnight_ms(tz, date)
        .ok_or_else(|| OfflineError::Options(format!("{date} has no local midnight in {}", tz.name())))
}

fn managed_wh(flows: &Flows, sides: &[PlantSide]) -> f64 {
    sides
        .iter()
        .map(|s| match s {
            PlantSide::Load(k) => flows.loads.get(*k).map_or(0.0, |f| f.wh),
            PlantSide::Battery => flows.battery_charge.wh,
            PlantSide::None => 0.0,
        })
        .sum()
}

fn close_month(
    year: i32,
    month: u32,
    fig: &MonthFigures,
    flows: &Flows,
    base: &Flows,
    sides: &[PlantSide],
) -> MonthFigures {
    MonthFigures {
        year,
        month,
        import_wh: flows.grid_import.wh - base.grid_import.wh,
        export_wh: flows.grid_export.wh - base.grid_export.wh,
        diverted_wh: managed_wh(flows, sides) - managed_wh(base, sides),
        pv_wh: flows.pv.wh - base.pv.wh,
        cost: fig.cost,
        days: fig.days,
    }
}

/// Averages powers over a trace interval.
struct TraceAcc {
    n: f64,
    pv: f64,
    house: f64,
    grid: f64,
    battery: f64,
    tank: f64,
    tank_top: f64,
    loads: Vec<f64>,
    limit: f64,
    /// The plant's lukewarm litres so far at the last step, and at the last sample
    /// (`None` before the trace's first step).
    lukewarm_now: f64,
    lukewarm_before: Option<f64>,
}

impl TraceAcc {
    fn new(loads: usize) -> Self {
        TraceAcc {
            n: 0.0,
            pv: 0.0,
            house: 0.0,
            grid: 0.0,
            battery: 0.0,
            tank: 0.0,
            tank_top: 0.0,
            loads: vec![0.0; loads],
            limit: f64::NAN,
            lukewarm_now: 0.0,
            lukewarm_before: None,
        }
    }

    fn add(&mut self, f: &Flows, plant: &Plant, sides: &[PlantSide], limit_w: f64) {
        self.n += 1.0;
        self.pv += f.pv.w;
        self.house += f.house.w;
        self.grid += f.grid_import.w - f.grid_export.w;
        self.battery += f.battery_charge.w - f.battery_discharge.w;
        self.tank += plant.tank_temp_c().unwrap_or(f64::NAN);
        self.tank_top += plant.tank().map_or(f64::NAN, |t| t.top_c());
        self.lukewarm_now = plant.hot_water_short().map_or(0.0, |(litres, _)| litres);
        // The trace may start days into the run: count from its first step.
        self.lukewarm_before.get_or_insert(self.lukewarm_now);
        for (acc, side) in self.loads.iter_mut().zip(sides) {
            *acc += match side {
                PlantSide::Load(k) => f.loads.get(*k).map_or(0.0, |x| x.w),
                PlantSide::Battery => f.battery_charge.w,
                PlantSide::None => 0.0,
            };
        }
        self.limit = limit_w;
    }

    fn flush(&mut self, t: &mut Trace, at_ms: i64) {
        if self.n == 0.0 {
            return;
        }
        let n = self.n;
        t.t_ms.push(at_ms);
        t.pv_w.push(self.pv / n);
        t.house_w.push(self.house / n);
        t.grid_w.push(self.grid / n);
        t.battery_w.push(self.battery / n);
        t.tank_c.push(self.tank / n);
        t.tank_top_c.push(self.tank_top / n);
        t.lukewarm_l.push(self.lukewarm_now - self.lukewarm_before.unwrap_or(self.lukewarm_now));
        t.limit_w.push(self.limit);
        for ((_, series), acc) in t.loads.iter_mut().zip(&self.loads) {
            series.push(acc / n);
        }
        let loads = self.loads.len();
        let lukewarm = self.lukewarm_now;
        *self = TraceAcc::new(loads);
        (self.lukewarm_now, self.lukewarm_before) = (lukewarm, Some(lukewarm));
    }
}
