//! Money and energy of offline runs checked by hand, as an owner with a spreadsheet would:
//! a constructed site whose house draws a constant power and has no PV (or a constant
//! recorded PV), priced under flat and two-block tariffs, with each expected figure worked
//! out in the comments beside it. Every case here is constructed for the test; none is a
//! measurement.

use std::path::Path;
use std::sync::Arc;
use std::time::Duration;

use chrono::NaiveDate;
use spillway::config::{self, Loaded};
use spillway::offline::{self, Controller, RunOptions, RunOutput, replay::Recorded};

/// A site with a meter and no managed loads; its plant a house drawing a constant
/// `house_w` (no activity, variation, fridge or appliances) and, without a recording, no
/// PV. `tariff` is the body of the `tariff:` section.
fn flat_site(tz: &str, tariff: &str, house_w: u32) -> String {
    format!(
        "site:
  name: Flat
  timezone: {tz}
  export: allowed

devices:
  meter: {{ modbus_tcp: 127.0.0.1:5020, unit: 1, sunspec: true }}

points:
  grid: {{ device: meter, sunspec: 201.W, stale_after: 5min }}

loads: []

tariff:
{tariff}
plant:
  timezone: {tz}
  house: {{ standby: {house_w}W, activity: 0W, variability: 0%, fridge: null, appliances: [] }}
"
    )
}

fn load(yaml: &str) -> Loaded {
    config::load_str("flat.yaml", yaml).unwrap_or_else(|e| panic!("{}", e.render(false)))
}

fn date(y: i32, m: u32, d: u32) -> NaiveDate {
    NaiveDate::from_ymd_opt(y, m, d).unwrap()
}

/// The site's no-diversion run (it has no loads: rules and baseline are the same house)
/// from `from` for `days`, at `step_s` seconds a step, optionally on a recording.
fn run(loaded: &Loaded, from: NaiveDate, days: u32, step_s: u64, recorded: Option<&Recorded>) -> RunOutput {
    let plant = offline::checked_plant(loaded).unwrap_or_else(|e| panic!("{e}"));
    let mut o = RunOptions::day(from);
    o.days = days;
    o.step = Duration::from_secs(step_s);
    o.controller = Controller::Baseline;
    o.recorded = recorded;
    offline::simulate_once(&Arc::new(loaded.site.clone()), loaded.tariff.as_ref(), &plant, o)
        .unwrap_or_else(|e| panic!("{e}"))
}

/// The report of a run against itself as baseline.
fn report(loaded: &Loaded, out: &RunOutput, from: NaiveDate, days: u32) -> offline::Report {
    let info = offline::report::RunInfo {
        site: "Flat".into(),
        from: from.to_string(),
        to: (from + chrono::Days::new(u64::from(days - 1))).to_string(),
        days,
        seed: 1,
        weather: "clear".into(),
        step_s: 1.0,
    };
    offline::report::build(&loaded.site, loaded.tariff.as_ref(), info, out, out)
}

fn close(a: f64, b: f64, tolerance: f64) -> bool {
    (a - b).abs() <= tolerance
}

const FLAT: &str = "  currency: \"€\"\n  import: 0.20/kWh\n  standing: 0.50/day\n";
const TWO_BLOCKS: &str = "  currency: R\n  blocks:\n    - { up_to: 200kWh, price: 0.10/kWh }\n    - { price: 0.30/kWh }\n  standing: 0.50/day\n";

/// A local month with a clock change has an hour fewer or more, and the house draws in
/// each of them; the standing charge is per local day, 31 of them either way.
#[test]
fn a_month_with_a_clock_change_charges_its_own_hours_and_days() {
    let loaded = load(&flat_site("Europe/Lisbon", FLAT, 1000));
    // Lisbon goes to summer time on 29 March 2026 and back on 25 October 2026 (the EU's
    // last Sundays of March and October, Directive 2000/84/EC). March: 31 × 24 − 1 = 743 h; October: 745 h.
    // At 1 kW: 743 kWh × 0.20 + 31 × 0.50 = 148.60 + 15.50 = 164.10;
    //          745 kWh × 0.20 + 31 × 0.50 = 149.00 + 15.50 = 164.50.
    for (month, kwh, cost) in [(3, 743.0, 164.10), (10, 745.0, 164.50)] {
        let out = run(&loaded, date(2026, month, 1), 31, 60, None);
        assert_eq!(out.months.len(), 1);
        let m = &out.months[0];
        assert!(close(m.import_wh / 1000.0, kwh, 1e-6), "{month}: {} kWh", m.import_wh / 1000.0);
        assert_eq!(m.days, 31);
        assert!(close(m.cost, cost, 1e-6), "{month}: {}", m.cost);
        let r = report(&loaded, &out, date(2026, month, 1), 31);
        assert_eq!(r.cost.as_ref().unwrap().total, cost);
    }
}

/// The step that opens a month is that month's: with 1-minute steps, a run over the end
/// of March once put 00:00–00:01 of 1 April into March's import (24.017 and 23.983 kWh
/// for two days of 24 kWh) while its money went to April.
#[test]
fn the_step_that_opens_a_month_counts_in_that_month() {
    let loaded = load(&flat_site("UTC", FLAT, 1000));
    // 1 kW for 31 March and 1 April: 24.000 kWh each; 24 × 0.20 + 0.50 = 5.30 each.
    for step_s in [1, 60] {
        let out = run(&loaded, date(2026, 3, 31), 2, step_s, None);
        let kwh: Vec<f64> = out.months.iter().map(|m| m.import_wh / 1000.0).collect();
        assert_eq!(out.months.len(), 2);
        assert!(kwh.iter().all(|k| close(*k, 24.0, 1e-6)), "step {step_s} s: {kwh:?} kWh");
        assert!(out.months.iter().all(|m| close(m.cost, 5.30, 1e-6) && m.days == 1), "{:?}", out.months);
    }
}

/// An import that crosses a block bound pays the lower block's price up to the bound and
/// the next block's beyond it. The block was once looked up once a minute, so a step (or
/// the rest of a minute) that crossed it was priced wholly at one block.
#[test]
fn an_import_that_crosses_a_block_bound_pays_each_block_its_share() {
    let tariff = "  blocks:\n    - { up_to: 10.01kWh, price: 0.10/kWh }\n    - { price: 0.30/kWh }\n";
    let loaded = load(&flat_site("UTC", tariff, 1000));
    // 1 kW for one day: 24 kWh, the bound reached at 10:00:36.
    // 10.01 kWh × 0.10 + 13.99 kWh × 0.30 = 1.001 + 4.197 = 5.198
    // (it was 5.200 at 1-minute steps: the step 10:00–10:01 all at 0.30; 5.19667 at 1 s
    // steps: the minute 10:00 all at 0.10).
    for step_s in [1, 60] {
        let out = run(&loaded, date(2026, 6, 1), 1, step_s, None);
        assert!(close(out.cost, 5.198, 1e-6), "step {step_s} s: {}", out.cost);
    }
}

/// Blocks start again with each calendar month, and a month the run covers in part gets
/// the whole of its first block: the README's "its import is not a month's, nor its
/// tariff block" (a judgement, stated). The standing charge counts the days covered.
#[test]
fn blocks_start_again_each_month_and_a_partial_month_keeps_its_whole_first_block() {
    let loaded = load(&flat_site("UTC", TWO_BLOCKS, 1000));
    // From 20 January for 20 days: 12 days of January, 8 of February, 24 kWh a day.
    // January: 288 kWh = 200 × 0.10 + 88 × 0.30 + 12 × 0.50 = 20.00 + 26.40 + 6.00 = 52.40
    // February: 192 kWh = 192 × 0.10 + 8 × 0.50 = 19.20 + 4.00 = 23.20
    // Total 75.60.
    let out = run(&loaded, date(2026, 1, 20), 20, 60, None);
    let r = report(&loaded, &out, date(2026, 1, 20), 20);
    let months: Vec<(&str, f64, &str, f64, u32, u32)> = r
        .months
        .iter()
        .map(|m| (m.month.as_str(), m.import_kwh, m.tariff_block.as_str(), m.cost, m.days, m.days_in_month))
        .collect();
    assert_eq!(
        months,
        [
            ("2026-01", 288.0, "block 2: above 200 kWh", 52.40, 12, 31),
            ("2026-02", 192.0, "block 1: 0–200 kWh", 23.20, 8, 28),
        ]
    );
    let cost = r.cost.as_ref().unwrap();
    assert_eq!((cost.currency.as_str(), cost.total, cost.baseline, cost.savings), ("R", 75.60, 75.60, 0.0));
    let text = r.to_text();
    assert!(text.contains("(2026-01: 12 of its 31 days in the run)"), "{text}");
    assert!(text.contains("cost R75.60 against R75.60 without diversion: saves R0.00"), "{text}");
}

/// Export earns its credit, and the energies balance: a recorded constant 3 kW of PV
/// against a constant 1 kW house exports 2 kW all day.
#[test]
fn a_constant_surplus_is_credited_and_the_energies_balance() {
    let dir = std::env::temp_dir().join(format!("spillway-tariff-by-hand-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let csv = dir.join("constant.csv");
    // Constructed: 3000 W of PV and 1000 W of house from midnight to midnight.
    std::fs::write(&csv, "time,pv_w,house_w\n2026-06-01 00:00,3000,1000\n2026-06-02 00:00,3000,1000\n").unwrap();
    let tariff = "  currency: \"€\"\n  import: 0.20/kWh\n  export: 0.05/kWh\n  standing: 0.50/day\n";
    let loaded = load(&flat_site("UTC", tariff, 1000));
    let rec = Recorded::from_csv(Path::new(&csv), loaded.site.timezone).unwrap();
    let out = run(&loaded, date(2026, 6, 1), 1, 1, Some(&rec));
    let r = report(&loaded, &out, date(2026, 6, 1), 1);
    let e = &r.energy;
    // PV 72 kWh = house 24 + export 48; no import.
    assert_eq!((e.pv_kwh, e.house_kwh, e.import_kwh, e.export_kwh), (72.0, 24.0, 0.0, 48.0), "{e:?}");
    assert_eq!(e.balance_error_pct, 0.0);
    // Self-consumption (1 − 48 / 72) × 100 = 33.3 %.
    assert_eq!(r.self_consumption_pct, 33.3);
    // 0 × 0.20 − 48 × 0.05 + 0.50 = −2.40 + 0.50 = −1.90: a credit.
    assert_eq!(r.cost.as_ref().unwrap().total, -1.90);
    let _ = std::fs::remove_dir_all(&dir);
}

/// Runs the `spillway` binary with `args` and reads its JSON report.
fn spillway_json(args: &[&str]) -> serde_json::Value {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_spillway")).args(args).output().unwrap();
    assert!(out.status.success(), "{args:?}: {}", String::from_utf8_lossy(&out.stderr));
    serde_json::from_slice(&out.stdout).unwrap_or_else(|e| panic!("{e}: {}", String::from_utf8_lossy(&out.stdout)))
}

/// `sweep` prints the same cost as `simulate` for the same site and days: the sum of the
/// months each rounded to the cent, as on a bill. It once printed the unrounded total,
/// a cent or more off what `simulate` printed for the same run.
#[test]
fn sweep_prints_the_cost_simulate_prints() {
    let dir = std::env::temp_dir().join(format!("spillway-tariff-sweep-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let path = dir.join("flat.yaml");
    // 1 kW at 0.100025/kWh, January to March 2026 (UTC, 90 days):
    //   January 744 kWh → 74.4186 → 74.42; February 672 kWh → 67.2168 → 67.22;
    //   March 744 kWh → 74.42. Billed 216.06; unrounded 216.0540 → 216.05.
    let tariff = "  currency: \"€\"\n  import: 0.100025/kWh\n  array_cost: 1000/kWp\n";
    std::fs::write(&path, flat_site("UTC", tariff, 1000)).unwrap();
    let file = path.to_str().unwrap();
    let common = ["--from", "2026-01-01", "--days", "90", "--step", "60s", "--quiet", "--report", "json"];
    let simulate: Vec<&str> = ["simulate", file].into_iter().chain(common).collect();
    let sim = spillway_json(&simulate);
    assert_eq!(sim["cost"]["total"], 216.06, "{}", sim["cost"]);
    let sweep: Vec<&str> = ["sweep", file, "--vary", "plant.house.standby=1000W..1000W:1W", "--jobs", "1"]
        .into_iter()
        .chain(common)
        .collect();
    let swept = spillway_json(&sweep);
    let point = &swept["points"][0];
    assert_eq!(point["cost"], sim["cost"]["total"], "{point}");
    assert_eq!(point["savings_vs_no_diversion"], sim["cost"]["savings"], "{point}");
    // Without PV, the no-PV reference is the same house: it costs the same, saves nothing.
    assert_eq!((&swept["no_pv_cost"], &point["savings_vs_no_pv"]), (&sim["cost"]["total"], &serde_json::json!(0.0)));
    // Nor has it an array to pay back (a rounding cent once gave it a payback of 0.0 y).
    assert!(point["payback_years"].is_null(), "{point}");
    let _ = std::fs::remove_dir_all(&dir);
}
