//! The report of an offline run, as JSON (every key documented in the README) and as
//! text. Numbers are rounded to a fixed number of decimals so that the same seed gives
//! the same report byte for byte, and so a person is not shown noise.

use std::fmt::Write as _;

use serde::Serialize;

use super::run::RunOutput;
use crate::config::model::{Connection, Site};
use crate::config::tariff::Tariff;

fn r1(v: f64) -> f64 {
    (v * 10.0).round() / 10.0
}
fn r2(v: f64) -> f64 {
    (v * 100.0).round() / 100.0
}
fn r3(v: f64) -> f64 {
    (v * 1000.0).round() / 1000.0
}

/// What was run.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct RunInfo {
    /// Site name.
    pub site: String,
    /// First local day (YYYY-MM-DD).
    pub from: String,
    /// Last local day.
    pub to: String,
    /// Number of days.
    pub days: u32,
    /// Seed.
    pub seed: u64,
    /// Weather used (`clear`, `mixed`, `overcast`, `varied`, the plant's, or a file).
    pub weather: String,
    /// Simulation step, s.
    pub step_s: f64,
}

/// Energy totals, kWh.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct EnergyReport {
    /// PV AC energy delivered.
    pub pv_kwh: f64,
    /// Consumption: household plus managed loads (battery charging not included).
    pub load_kwh: f64,
    /// Household base load alone.
    pub house_kwh: f64,
    /// Imported from the grid.
    pub import_kwh: f64,
    /// Exported to the grid.
    pub export_kwh: f64,
    /// Into managed loads (including a managed battery's charging).
    pub diverted_kwh: f64,
    /// Into battery storage.
    pub battery_charge_kwh: f64,
    /// Out of battery storage.
    pub battery_discharge_kwh: f64,
    /// Battery conversion losses.
    pub losses_kwh: f64,
    /// PV held back by the inverter's limit (not generated).
    pub curtailed_kwh: f64,
    /// Demand the site could not serve: an island's low-voltage disconnect, an outage's
    /// overload trip, or an outage without a battery.
    pub unserved_kwh: f64,
    /// Relative error of PV + import = house + loads + battery in − out + export + losses.
    pub balance_error_pct: f64,
}

/// Export figures.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ExportReport {
    /// The site's export limit, W (`null` when export is allowed).
    pub limit_w: Option<f64>,
    /// Highest export, W.
    pub peak_w: f64,
    /// Seconds with export above the limit plus the guard's tolerance.
    pub seconds_over_limit: f64,
}

/// Percentiles of a set of durations, ms.
#[derive(Debug, Clone, Serialize, PartialEq, Default)]
pub struct Percentiles {
    /// Median.
    pub p50: f64,
    /// 95th percentile.
    pub p95: f64,
    /// Largest.
    pub max: f64,
}

/// Export guard figures.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct GuardReport {
    /// Number of export episodes above the limit plus tolerance.
    pub episodes: usize,
    /// Time from export appearing to its being cleared, ms.
    pub response_ms: Percentiles,
}

/// One obligation's record.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ObligationReport {
    /// The obligation, as a person reads it.
    pub name: String,
    /// Days it was met.
    pub days_met: u32,
    /// Days it was missed.
    pub days_missed: u32,
    /// Days it was neither: a `reach: N%` duty whose state of charge could not be read
    /// at its deadline (the car away).
    pub days_not_judged: u32,
}

/// One load's figures.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct LoadReport {
    /// Load name.
    pub name: String,
    /// Energy drawn, kWh.
    pub energy_kwh: f64,
    /// Part drawn from the grid to meet an obligation, kWh.
    pub grid_topup_kwh: f64,
    /// Hours on.
    pub runtime_h: f64,
    /// On/off and stage changes.
    pub switchings: u32,
    /// Most starts in any rolling hour.
    pub max_starts_per_hour: u32,
    /// Its obligations.
    pub obligations: Vec<ObligationReport>,
}

/// One calendar month.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct MonthReport {
    /// `YYYY-MM`.
    pub month: String,
    /// Imported, kWh.
    pub import_kwh: f64,
    /// Exported, kWh.
    pub export_kwh: f64,
    /// Diverted into managed loads, kWh.
    pub diverted_kwh: f64,
    /// PV, kWh.
    pub pv_kwh: f64,
    /// The tariff block the month's import lands in (`flat` without blocks).
    pub tariff_block: String,
    /// Cost of the month.
    pub cost: f64,
    /// Import of the baseline in that month, kWh.
    pub baseline_import_kwh: f64,
    /// Days of the month the run covered.
    pub days: u32,
    /// Days the calendar month has: more than `days` for a month the run only partly
    /// covers (its figures are not a whole month's).
    pub days_in_month: u32,
}

impl MonthReport {
    /// Whether the run covered only part of the month.
    pub fn partial(&self) -> bool {
        self.days < self.days_in_month
    }
}

/// Days in a calendar month.
fn days_in_month(year: i32, month: u32) -> u32 {
    let first = chrono::NaiveDate::from_ymd_opt(year, month, 1);
    let next = if month == 12 {
        chrono::NaiveDate::from_ymd_opt(year + 1, 1, 1)
    } else {
        chrono::NaiveDate::from_ymd_opt(year, month + 1, 1)
    };
    match (first, next) {
        (Some(a), Some(b)) => (b - a).num_days() as u32,
        _ => 31,
    }
}

/// Costs under the site's tariff.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct CostReport {
    /// Currency as given in the tariff.
    pub currency: String,
    /// Cost of the run (import − export credit + standing charge).
    pub total: f64,
    /// Cost of the no-diversion baseline.
    pub baseline: f64,
    /// Baseline − run.
    pub savings: f64,
}

/// The no-diversion baseline's energies.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct BaselineReport {
    /// Imported, kWh.
    pub import_kwh: f64,
    /// Exported, kWh.
    pub export_kwh: f64,
    /// Highest export, W.
    pub export_peak_w: f64,
    /// Demand not served, kWh.
    pub unserved_kwh: f64,
}

/// The simulated EV's sessions: what the car lacked of its target when it left.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct EvReport {
    /// Cars that left during the run (a car still plugged in at the end is not counted).
    pub departures: u32,
    /// What they lacked of their target SoC when they left, kWh (in the car).
    pub short_kwh: f64,
    /// The same in the no-diversion baseline, where the car charges whenever plugged in.
    pub baseline_short_kwh: f64,
}

/// The simulated tank's draws: water that came out colder than the tap asked for.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct HotWaterReport {
    /// Litres at the tap that came out below their draw's temperature (the tank was
    /// colder than the tap).
    pub lukewarm_l: f64,
    /// The heat those litres lacked, kWh.
    pub short_kwh: f64,
    /// The same in the no-diversion baseline (its tank on its own thermostat).
    pub baseline_lukewarm_l: f64,
    /// The baseline's heat lacked, kWh.
    pub baseline_short_kwh: f64,
    /// The layers the simulated tank is modelled in (`plant.tank.layers`; 1: one
    /// well-mixed node, which runs lukewarm sooner than a real, stratified tank).
    pub tank_layers: usize,
}

/// The whole report.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Report {
    /// What was run.
    pub run: RunInfo,
    /// Energy totals.
    pub energy: EnergyReport,
    /// Share of PV used on site (1 − export / PV), %.
    pub self_consumption_pct: f64,
    /// Export.
    pub export: ExportReport,
    /// Export guard.
    pub guard: GuardReport,
    /// Managed loads in priority order.
    pub loads: Vec<LoadReport>,
    /// Obligations of all loads, flattened (`load: obligation`).
    pub obligations: Vec<ObligationReport>,
    /// Calendar months.
    pub months: Vec<MonthReport>,
    /// Costs (`null` without a tariff).
    pub cost: Option<CostReport>,
    /// The baseline.
    pub baseline: BaselineReport,
    /// The simulated EV's sessions (`null` without one).
    pub ev: Option<EvReport>,
    /// The simulated tank's draws (`null` without a tank).
    pub hot_water: Option<HotWaterReport>,
    /// Writes the plant refused during the run (a restarting device).
    pub refused_writes: u64,
    /// Whether the text report shows unserved demand: on an off-grid or backed-up site
    /// (where none is worth saying), or wherever there was some.
    #[serde(skip)]
    pub show_unserved: bool,
    /// An off-grid site: the text report has no export to speak of.
    #[serde(skip)]
    pub off_grid: bool,
    /// For replays: the recorded file and what was done with its rows.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub replay: Option<ReplayReport>,
}

/// What a replay made of its recorded file.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ReplayReport {
    /// The CSV file.
    pub file: String,
    /// Rows used.
    pub rows_used: usize,
    /// Rows rejected (each named with its line in `notices`).
    pub rows_rejected: usize,
    /// Hours of the run inside gaps over 15 minutes between rows (interpolated).
    pub bridged_h: f64,
    /// Hours of the run before the first row or after the last (end values held).
    pub outside_h: f64,
    /// Rejected rows and bridged gaps, with line numbers.
    pub notices: Vec<String>,
}

fn percentiles(values: &[f64]) -> Percentiles {
    if values.is_empty() {
        return Percentiles::default();
    }
    let mut v = values.to_vec();
    v.sort_by(f64::total_cmp);
    let at = |q: f64| v[((v.len() - 1) as f64 * q).round() as usize];
    Percentiles { p50: r1(at(0.5)), p95: r1(at(0.95)), max: r1(v[v.len() - 1]) }
}

/// A run's cost as on a bill: each month rounded to the cent and the total the sum of the
/// rounded months, so the printed months add up to the printed total (and the savings to
/// the difference of two printed totals). `simulate`, `compare` and `sweep` all print it.
pub fn billed(r: &RunOutput) -> f64 {
    if r.months.is_empty() { r2(r.cost) } else { r2(r.months.iter().map(|m| r2(m.cost)).sum()) }
}

/// Builds the report of a run and its baseline.
pub fn build(site: &Site, tariff: Option<&Tariff>, info: RunInfo, run: &RunOutput, baseline: &RunOutput) -> Report {
    let f = &run.flows;
    let kwh = |wh: f64| r3(wh / 1000.0);
    let loads_wh: f64 = f.loads.iter().map(|l| l.wh).sum();
    let sources = f.pv.wh + f.grid_import.wh + f.battery_discharge.wh;
    let sinks = f.house.wh + loads_wh + f.battery_charge.wh + f.grid_export.wh + f.losses.wh;
    let balance_error_pct = if sources > 0.0 { r3((sources - sinks) / sources * 100.0) } else { 0.0 };
    let energy = EnergyReport {
        pv_kwh: kwh(f.pv.wh),
        load_kwh: kwh(f.house.wh + loads_wh),
        house_kwh: kwh(f.house.wh),
        import_kwh: kwh(f.grid_import.wh),
        export_kwh: kwh(f.grid_export.wh),
        diverted_kwh: kwh(run.diverted_wh),
        battery_charge_kwh: kwh(f.battery_charge.wh),
        battery_discharge_kwh: kwh(f.battery_discharge.wh),
        losses_kwh: kwh(f.losses.wh),
        curtailed_kwh: kwh(f.pv_curtailed.wh),
        unserved_kwh: kwh(f.unserved.wh),
        balance_error_pct,
    };
    let self_consumption_pct = if f.pv.wh > 0.0 { r1((1.0 - f.grid_export.wh / f.pv.wh) * 100.0) } else { 0.0 };
    let mut all_obligations = Vec::new();
    let loads = site
        .loads
        .iter()
        .zip(&run.loads)
        .map(|(l, fig)| {
            let obligations: Vec<ObligationReport> = l
                .obligations
                .iter()
                .zip(&fig.obligations)
                .map(|(o, (met, missed))| ObligationReport {
                    name: o.describe(),
                    days_met: *met,
                    days_missed: *missed,
                    days_not_judged: info.days.saturating_sub(met + missed),
                })
                .collect();
            for o in &obligations {
                all_obligations.push(ObligationReport { name: format!("{}: {}", l.name, o.name), ..o.clone() });
            }
            LoadReport {
                name: l.name.clone(),
                energy_kwh: kwh(fig.energy_wh),
                grid_topup_kwh: kwh(fig.grid_topup_wh),
                runtime_h: r2(fig.runtime_s / 3600.0),
                switchings: fig.switchings,
                max_starts_per_hour: fig.max_starts_per_hour,
                obligations,
            }
        })
        .collect();
    let months = run
        .months
        .iter()
        .map(|m| {
            let baseline_import =
                baseline.months.iter().find(|b| (b.year, b.month) == (m.year, m.month)).map_or(0.0, |b| b.import_wh);
            MonthReport {
                month: format!("{:04}-{:02}", m.year, m.month),
                import_kwh: kwh(m.import_wh),
                export_kwh: kwh(m.export_wh),
                diverted_kwh: kwh(m.diverted_wh),
                pv_kwh: kwh(m.pv_wh),
                tariff_block: tariff
                    .map_or_else(|| "flat".to_owned(), |t| t.block_label(t.block_index(m.import_wh / 1000.0))),
                cost: r2(m.cost),
                baseline_import_kwh: kwh(baseline_import),
                days: m.days,
                days_in_month: days_in_month(m.year, m.month),
            }
        })
        .collect();
    let cost = tariff.map(|t| {
        let (total, base) = (billed(run), billed(baseline));
        CostReport { currency: t.currency.clone(), total, baseline: base, savings: r2(base - total) }
    });
    Report {
        run: info,
        energy,
        self_consumption_pct,
        export: ExportReport {
            limit_w: site.export_limit().map(|l| l.0),
            peak_w: r1(run.export_peak_w),
            seconds_over_limit: r1(run.seconds_over_limit),
        },
        guard: GuardReport {
            episodes: run.export_episodes_ms.len(),
            response_ms: percentiles(&run.export_episodes_ms),
        },
        loads,
        obligations: all_obligations,
        months,
        cost,
        baseline: BaselineReport {
            import_kwh: kwh(baseline.flows.grid_import.wh),
            export_kwh: kwh(baseline.flows.grid_export.wh),
            export_peak_w: r1(baseline.export_peak_w),
            unserved_kwh: kwh(baseline.flows.unserved.wh),
        },
        ev: run.ev_departures.map(|(departures, short_wh)| EvReport {
            departures,
            short_kwh: kwh(short_wh),
            baseline_short_kwh: kwh(baseline.ev_departures.map_or(0.0, |(_, wh)| wh)),
        }),
        hot_water: run.hot_water_short.map(|(lukewarm_l, short_wh)| {
            let (base_l, base_wh) = baseline.hot_water_short.unwrap_or_default();
            HotWaterReport {
                lukewarm_l: r1(lukewarm_l),
                short_kwh: kwh(short_wh),
                baseline_lukewarm_l: r1(base_l),
                baseline_short_kwh: kwh(base_wh),
                tank_layers: run.tank_layers.unwrap_or(1),
            }
        }),
        refused_writes: run.refused_writes,
        off_grid: matches!(site.connection, Connection::OffGrid(_)),
        show_unserved: !matches!(site.connection, Connection::Grid { backup: None, .. })
            || run.flows.unserved.wh > 0.0
            || baseline.flows.unserved.wh > 0.0,
        replay: None,
    }
}

impl Report {
    /// The report as pretty JSON (stable key order, rounded numbers).
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"))
    }

    /// The report as text for a person.
    pub fn to_text(&self) -> String {
        let mut o = String::new();
        let r = &self.run;
        let _ = writeln!(
            o,
            "{} — {} to {} ({} day(s)), weather {}, seed {}, step {} s",
            r.site, r.from, r.to, r.days, r.weather, r.seed, r.step_s
        );
        let e = &self.energy;
        let _ = writeln!(o, "\nenergy (kWh)");
        let _ = writeln!(
            o,
            "  PV {:>10.1}   import {:>8.1}   export {:>8.1}   self-consumption {:.1} %",
            e.pv_kwh, e.import_kwh, e.export_kwh, self.self_consumption_pct
        );
        let _ = writeln!(
            o,
            "  house {:>7.1}   diverted {:>6.1}   battery in/out {:.1}/{:.1}   curtailed {:.1}",
            e.house_kwh, e.diverted_kwh, e.battery_charge_kwh, e.battery_discharge_kwh, e.curtailed_kwh
        );
        if self.show_unserved {
            let _ = writeln!(
                o,
                "  unserved {:.1} (demand the site could not meet; {:.1} without diversion)",
                e.unserved_kwh, self.baseline.unserved_kwh
            );
        }
        let x = &self.export;
        match x.limit_w {
            Some(l) => {
                let hours = if x.seconds_over_limit >= 3600.0 {
                    format!(" ({:.1} h)", x.seconds_over_limit / 3600.0)
                } else {
                    String::new()
                };
                let _ = writeln!(
                    o,
                    "\nexport (limit {l} W): peak {:.0} W, {:.0} s{hours} over the limit + tolerance",
                    x.peak_w, x.seconds_over_limit
                );
                let g = &self.guard;
                let _ = writeln!(
                    o,
                    "guard: {} episode(s), cleared in p50 {}, p95 {}, max {}",
                    g.episodes,
                    response(g.response_ms.p50),
                    response(g.response_ms.p95),
                    response(g.response_ms.max)
                );
            }
            // Off-grid there is no grid to export to (JSON keeps the zeros).
            None if self.off_grid => {}
            // Nothing to hold export under: no guard to report on (JSON keeps the zeros).
            None => {
                let _ = writeln!(o, "\nexport (no limit): peak {:.0} W", x.peak_w);
            }
        }
        // Name columns widen for long names, so the figures stay in their columns.
        let width = |names: &mut dyn Iterator<Item = &String>, least: usize| {
            names.map(|n| n.chars().count()).max().unwrap_or(0).max(least)
        };
        let w = width(&mut self.loads.iter().map(|l| &l.name), 16);
        let pad = " ".repeat(w - 16);
        let _ = writeln!(o, "\nloads{pad}                 kWh   from grid   hours   switchings   max starts/h");
        for l in &self.loads {
            let _ = writeln!(
                o,
                "  {:<w$} {:>8.1} {:>11.1} {:>7.1} {:>12} {:>14}",
                l.name, l.energy_kwh, l.grid_topup_kwh, l.runtime_h, l.switchings, l.max_starts_per_hour
            );
        }
        if !self.obligations.is_empty() {
            let w = width(&mut self.obligations.iter().map(|ob| &ob.name), 42);
            let pad = " ".repeat(w - 42);
            // A third column only where a day went unjudged (a car away at a SoC duty's
            // deadline), so that the usual table stays as it was.
            let unjudged = self.obligations.iter().any(|ob| ob.days_not_judged > 0);
            let head = if unjudged { "   met   missed   not judged" } else { "   met   missed" };
            let _ = writeln!(o, "\nobligations{pad}                                {head}");
            for ob in &self.obligations {
                let _ = write!(o, "  {:<w$} {:>5} {:>8}", ob.name, ob.days_met, ob.days_missed);
                let _ = if unjudged { writeln!(o, " {:>12}", ob.days_not_judged) } else { writeln!(o) };
            }
        }
        if self.months.len() > 1 || self.cost.is_some() {
            let _ = writeln!(o, "\nmonth      import kWh   baseline   export   diverted   block                 cost");
            for m in &self.months {
                let _ = writeln!(
                    o,
                    "  {}  {:>10.1} {:>10.1} {:>8.1} {:>10.1}   {:<20} {:>7.2}",
                    m.month, m.import_kwh, m.baseline_import_kwh, m.export_kwh, m.diverted_kwh, m.tariff_block, m.cost
                );
            }
            // A month the run covered only in part is not a month's figures (nor its
            // tariff block): say so where there is more than one month to compare.
            if self.months.len() > 1 {
                for m in self.months.iter().filter(|m| m.partial()) {
                    let _ = writeln!(o, "  ({}: {} of its {} days in the run)", m.month, m.days, m.days_in_month);
                }
            }
        }
        if self.ev.is_some() || self.hot_water.is_some() {
            let _ = writeln!(o);
        }
        match &self.hot_water {
            Some(hw) if hw.lukewarm_l == 0.0 && hw.baseline_lukewarm_l == 0.0 => {
                let _ = writeln!(o, "hot water: every draw came out as hot as asked for, also without diversion");
            }
            Some(hw) => {
                // Two decimals: a few lukewarm litres lack only hundredths of a kWh,
                // which one decimal would print as a puzzling "0.0 kWh short".
                let _ = writeln!(
                    o,
                    "hot water: {:.0} L came out colder than asked for, {:.2} kWh short ({:.0} L, {:.2} kWh without diversion)",
                    hw.lukewarm_l, hw.short_kwh, hw.baseline_lukewarm_l, hw.baseline_short_kwh
                );
            }
            None => {}
        }
        if let Some(ev) = &self.ev {
            let _ = writeln!(
                o,
                "EV: {} departure(s), {:.1} kWh short of the car's target when it left ({:.1} without diversion)",
                ev.departures, ev.short_kwh, ev.baseline_short_kwh
            );
        }
        if let Some(c) = &self.cost {
            // Rules that top up from the grid can cost more than no diversion at all;
            // "saves €-1.83" reads as a typo, so a loss is worded as one.
            let verdict = if c.savings < -0.005 { "costs" } else { "saves" };
            let more = if c.savings < -0.005 { " more" } else { "" };
            let _ = writeln!(
                o,
                "\ncost {}{:.2} against {}{:.2} without diversion: {verdict} {}{:.2}{more}",
                c.currency,
                c.total,
                c.currency,
                c.baseline,
                c.currency,
                c.savings.abs()
            );
            // The baseline charges the car whenever it is plugged in; rules that charge
            // it only from surplus send it away emptier, and that energy is bought
            // elsewhere. Say so beside the savings it flatters.
            if let Some(ev) = self.ev.as_ref().filter(|ev| ev.short_kwh > ev.baseline_short_kwh + 0.05) {
                let _ = writeln!(
                    o,
                    "note: the car left with {:.1} kWh less than without diversion; the savings leave out buying that energy",
                    ev.short_kwh - ev.baseline_short_kwh
                );
            }
            // Likewise a tank the rules let go cold: cheaper, and colder showers.
            if let Some(hw) = self.hot_water.as_ref().filter(|hw| hw.short_kwh > hw.baseline_short_kwh + 0.05) {
                let _ = writeln!(
                    o,
                    "note: hot water came out colder than asked for, {:.0} L more than without diversion and {:.1} kWh of heat short; the savings include that heat not bought",
                    hw.lukewarm_l - hw.baseline_lukewarm_l,
                    hw.short_kwh - hw.baseline_short_kwh,
                );
                if hw.tank_layers == 1 {
                    let _ = writeln!(
                        o,
                        "      the tank is simulated as one well-mixed node, which runs lukewarm sooner than a real one; `plant.tank.layers: 8` models its stratification"
                    );
                }
            }
        }
        let b = &self.baseline;
        let _ = writeln!(
            o,
            "baseline (no diversion): import {:.1} kWh, export {:.1} kWh, export peak {:.0} W",
            b.import_kwh, b.export_kwh, b.export_peak_w
        );
        if let Some(r) = &self.replay {
            let _ = write!(o, "replayed {}: {} row(s) used, {} rejected", r.file, r.rows_used, r.rows_rejected);
            // Hours the report counts that the recording did not measure: a few in
            // passing; more as a warning saying what they mean (the only one a text
            // report's reader gets: `replay` keeps stderr quiet about them then).
            let mut parts = Vec::new();
            if (0.05..=COVERAGE_WARN_H).contains(&r.bridged_h) {
                parts.push(format!("{:.1} h in gaps over 15 min", r.bridged_h));
            }
            if (0.05..=COVERAGE_WARN_H).contains(&r.outside_h) {
                parts.push(format!("{:.1} h outside the recording", r.outside_h));
            }
            if !parts.is_empty() {
                let _ = write!(o, "; not measured: {}", parts.join(", "));
            }
            let _ = writeln!(o);
            for w in coverage_warnings(r.outside_h, r.bridged_h) {
                let _ = writeln!(o, "warning: {w}");
            }
        }
        if self.refused_writes > 0 {
            let _ = writeln!(
                o,
                "note: the plant refused {} write(s) (a device restarting, or an address its devices do not take)",
                self.refused_writes
            );
        }
        o
    }
}

/// Hours of a replay outside its recording or in its gaps beyond which they are warned
/// about: an hour is noise (a recording rarely starts exactly at midnight).
pub const COVERAGE_WARN_H: f64 = 1.0;

/// The warnings for hours a replay counts that its recording did not measure.
pub fn coverage_warnings(outside_h: f64, bridged_h: f64) -> Vec<String> {
    let mut out = Vec::new();
    if outside_h > COVERAGE_WARN_H {
        out.push(format!(
            "{outside_h:.1} h of the run lie outside the recording: its first and last values are held there, not measured"
        ));
    }
    if bridged_h > COVERAGE_WARN_H {
        out.push(format!(
            "{bridged_h:.1} h of the run fall in gaps of over 15 min between rows: interpolated there, not measured"
        ));
    }
    out
}

/// A guard response time for the text report: milliseconds up to 10 s, then seconds,
/// minutes or hours (a site with nothing to curtail clears export only when the sun or
/// the house does, after minutes or hours; JSON keeps milliseconds).
fn response(ms: f64) -> String {
    let s = (ms / 1000.0).round() as i64;
    if ms < 10_000.0 {
        format!("{ms:.0} ms")
    } else if s < 600 {
        format!("{:.1} s", ms / 1000.0)
    } else if s < 3600 {
        format!("{} min {} s", s / 60, s % 60)
    } else {
        format!("{} h {} min", s / 3600, s % 3600 / 60)
    }
}

#[cfg(test)]
mod tests {
    #[test]
    fn guard_response_times_read_as_durations_beyond_ten_seconds() {
        assert_eq!(super::response(1000.0), "1000 ms");
        assert_eq!(super::response(9999.0), "9999 ms");
        assert_eq!(super::response(11_000.0), "11.0 s");
        assert_eq!(super::response(1_654_000.0), "27 min 34 s");
        assert_eq!(super::response(11_953_000.0), "3 h 19 min");
    }
}
