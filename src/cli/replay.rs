//! `spillway replay SITE.yaml RECORDED.csv`: a measured PV and household series in
//! place of the modelled ones, the same report as `simulate`.

use std::path::Path;
use std::process::ExitCode;

use anyhow::Context as _;
use spillway::offline::{self, Controller, RunOptions, replay::Recorded, report};

use super::simulate::{Format, Prepared, Progress, RunArgs, prepare_for};

pub fn run(site: &Path, csv: &Path, args: &RunArgs, format: Format, chart: Option<&Path>) -> anyhow::Result<ExitCode> {
    // Accepted silently, it would look as if it changed something.
    anyhow::ensure!(
        args.weather.is_none(),
        "--weather does not apply to replay: the recording replaces the modelled PV and household load"
    );
    let Some(mut p) = prepare_for(site, args, false)? else { return Ok(ExitCode::from(1)) };
    if let Some(file) = chart {
        super::simulate::check_writable(file)?;
    }
    let Recording { recorded, notices, coverage, warnings } = load_recording(csv, &mut p, args)?;
    // The text report's last line gives these hours with what they mean; said on stderr
    // as well, they read twice on a terminal. A JSON report is for a program: the person
    // running it sees them here (and the program in `replay.notices`).
    if format == Format::Json {
        for w in &warnings {
            eprintln!("{}: warning: {w}", csv.display());
        }
    }
    let rejected = recorded.rejected();
    let progress = Progress::new(args.quiet, "replaying");
    let options = |controller: Controller| {
        let mut o = RunOptions::day(p.from);
        o.days = p.days;
        o.seed = p.seed;
        o.step = args.step;
        o.controller = controller;
        o.recorded = Some(&recorded);
        o
    };
    let chart_days = chart.map(|_| (p.from, p.from + chrono::Days::new(u64::from(p.days - 1))));
    let (run, baseline) = std::thread::scope(|s| {
        let base = s.spawn(|| {
            offline::simulate_once(&p.site, p.loaded.tariff.as_ref(), &p.plant, options(Controller::Baseline))
        });
        let mut main = options(Controller::Spillway);
        main.trace = chart_days;
        main.trace_every = offline::chart::trace_interval(p.days);
        (offline::simulate_once(&p.site, p.loaded.tariff.as_ref(), &p.plant, main), base.join())
    });
    progress.finish();
    let run = run.context("replay failed")?;
    let baseline = baseline.map_err(|_| anyhow::anyhow!("the baseline panicked"))?.context("baseline replay failed")?;
    let info = report::RunInfo {
        site: p.site.name.clone(),
        from: p.from.to_string(),
        to: (p.from + chrono::Days::new(u64::from(p.days - 1))).to_string(),
        days: p.days,
        seed: p.seed,
        weather: p.weather_label.clone(),
        step_s: args.step.as_secs_f64(),
    };
    let mut report = report::build(&p.site, p.loaded.tariff.as_ref(), info, &run, &baseline);
    report.replay = Some(report::ReplayReport {
        file: csv.display().to_string(),
        rows_used: recorded.t_ms.len(),
        rows_rejected: rejected,
        bridged_h: coverage.bridged_h,
        outside_h: coverage.outside_h,
        notices,
    });
    match format {
        Format::Json => println!("{}", report.to_json()),
        Format::Text => print!("{}", report.to_text()),
    }
    if let Some(file) = chart {
        offline::chart::write(file, &p.site, p.loaded.tariff.as_ref(), &report, &run)?;
    }
    Ok(ExitCode::SUCCESS)
}

/// A recording loaded for a run (`replay`, `compare --recorded`).
pub(super) struct Recording {
    /// The rows.
    pub recorded: Recorded,
    /// Its rejected rows and bridged gaps, and warnings about hours it does not measure.
    pub notices: Vec<String>,
    /// What it covers of the run.
    pub coverage: Coverage,
    /// More than an hour of the run outside the recording or in its gaps (also in
    /// `notices`), for the caller to print once.
    pub warnings: Vec<String>,
}

/// Reads `csv` in `p`'s time zone, prints its rejected rows and gaps (each with its line
/// number), returns a warning for more than an hour of the run it does not measure, and
/// lets it decide what the command line does not: the first day unless `--from`, the
/// number of days unless `--days` or `--to`. Sets `p`'s weather label.
pub(super) fn load_recording(csv: &Path, p: &mut Prepared, args: &RunArgs) -> anyhow::Result<Recording> {
    let recorded = Recorded::from_csv(csv, p.site.timezone)?;
    let rejected = recorded.rejected();
    for n in &recorded.notices {
        eprintln!("{}:{}: {}{}", csv.display(), n.line, if n.rejected { "rejected: " } else { "note: " }, n.message);
    }
    if rejected > 0 {
        eprintln!("{}: {rejected} row(s) rejected, {} used", csv.display(), recorded.t_ms.len());
    }
    let array_w = p.plant.solar.as_ref().map_or(0.0, |s| s.nameplate_w());
    let kw_suspects = recorded.kw_suspects(array_w);
    for w in &kw_suspects {
        eprintln!("{}: warning: {w}", csv.display());
    }
    let (first, last) = recorded.span_ms();
    let tz = p.site.timezone;
    let day = |ms: i64| spillway::units::Timestamp(ms).to_utc().with_timezone(&tz).date_naive();
    let recorded_days = ((day(last) - day(first)).num_days() + 1).max(1) as u32;
    if args.from.is_none() {
        p.from = day(first);
    }
    if args.days.is_none() && args.to.is_none() {
        p.days = recorded_days;
    }
    let mut notices: Vec<String> = recorded.notices.iter().map(|n| format!("line {}: {}", n.line, n.message)).collect();
    notices.extend(kw_suspects);
    let coverage = coverage(&recorded, tz, p.from, p.days);
    // The report counts those hours as if they had been measured: call them out.
    let warnings = report::coverage_warnings(coverage.outside_h, coverage.bridged_h);
    notices.extend(warnings.iter().cloned());
    p.weather_label = format!("recorded ({})", csv.display());
    Ok(Recording { recorded, notices, coverage, warnings })
}

/// How much of a run the recording does not measure.
pub(super) struct Coverage {
    /// Hours before the first row or after the last.
    pub outside_h: f64,
    /// Hours inside gaps of over 15 minutes between rows.
    pub bridged_h: f64,
}

/// What the recording covers of the run's local days `[from, from + days)`.
fn coverage(recorded: &Recorded, tz: chrono_tz::Tz, from: chrono::NaiveDate, days: u32) -> Coverage {
    let (first, last) = recorded.span_ms();
    let bounds = spillway_sim::pv::local_midnight_ms(tz, from)
        .zip(spillway_sim::pv::local_midnight_ms(tz, from + chrono::Days::new(u64::from(days))));
    let Some((start, end)) = bounds else { return Coverage { outside_h: 0.0, bridged_h: 0.0 } };
    let covered = (last.min(end) - first.max(start)).max(0);
    let hours = |ms: i64| ms as f64 / 3_600_000.0;
    Coverage { outside_h: hours((end - start) - covered), bridged_h: hours(recorded.bridged_ms(start, end)) }
}
