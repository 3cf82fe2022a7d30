//! `spillway simulate`: the site's rules against its simulated plant for a day, a month
//! or a year, with a no-diversion baseline on the same weather, reported as text or JSON.

use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::Context as _;
use chrono::NaiveDate;
use indicatif::{ProgressBar, ProgressStyle};
use spillway::config::{self, LoadError};
use spillway::offline::{self, Controller, RunOptions, report};
use spillway_sim::weather::{MeasuredConfig, WeatherKind};

/// Arguments shared by `simulate`, `compare`, `replay` and `sweep`.
#[derive(Debug, Clone, clap::Args)]
pub struct RunArgs {
    /// Number of days (default: the site's `simulation.days`, else 7; `sweep`: 365;
    /// `replay`: the recording's days).
    #[arg(long, conflicts_with = "to")]
    pub days: Option<u32>,
    /// First day, YYYY-MM-DD (default: the site's `simulation.from`, else today;
    /// `replay`: the recording's first day).
    #[arg(long, value_parser = parse_date)]
    pub from: Option<NaiveDate>,
    /// Last day (inclusive), YYYY-MM-DD.
    #[arg(long, requires = "from", value_parser = parse_date)]
    pub to: Option<NaiveDate>,
    /// Seed of the weather, household and meter noise (default: the site's, else 1).
    #[arg(long)]
    pub seed: Option<u64>,
    /// Weather: clear, mixed, overcast, varied, or a CSV of measured irradiance (not for
    /// `replay`, whose recording replaces the modelled PV).
    #[arg(long)]
    pub weather: Option<String>,
    /// Simulation step (1s, 500ms, 2s); at most the points' stale timeout.
    #[arg(long, default_value = "1s", value_parser = parse_duration)]
    pub step: Duration,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Parses a date flag, saying whether it is not written YYYY-MM-DD or names a day that
/// does not exist (`2026-02-30`).
pub fn parse_date(text: &str) -> Result<NaiveDate, String> {
    config::values::parse_date(text).map_err(|e| e.to_string())
}

/// Parses a positive duration: `1s`, `500ms`, `2min`.
pub fn parse_duration(text: &str) -> Result<Duration, String> {
    match super::parse_duration(text)? {
        d if d.is_zero() => Err(format!("`{text}` must be longer than zero")),
        d => Ok(d),
    }
}

/// Output format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    /// For a person.
    Text,
    /// For a program.
    Json,
}

/// A loaded site with what offline runs need.
pub struct Prepared {
    pub loaded: config::Loaded,
    pub site: Arc<spillway::config::model::Site>,
    pub plant: offline::PlantSection,
    pub from: NaiveDate,
    pub days: u32,
    pub seed: u64,
    pub sky: Option<WeatherKind>,
    pub weather_label: String,
}

/// Loads a site and resolves the run's dates, seed and weather. Config errors are
/// printed; `Ok(None)` means "exit 1".
pub fn prepare(path: &Path, args: &RunArgs) -> anyhow::Result<Option<Prepared>> {
    prepare_for(path, args, true)
}

/// As [`prepare`]; `uses_weather` is false for a replay, whose recording replaces the
/// modelled sky, so a measured weather file of the plant is neither read nor reported.
pub fn prepare_for(path: &Path, args: &RunArgs, uses_weather: bool) -> anyhow::Result<Option<Prepared>> {
    let loaded = match config::load_file(path) {
        Ok(l) => l,
        Err(e @ LoadError::Invalid { .. }) => {
            eprint!("{}", e.render(super::color()));
            eprintln!("{e}");
            return Ok(None);
        }
        Err(e) => return Err(e.into()),
    };
    if !loaded.warnings.is_empty() && !args.quiet {
        eprint!(
            "{}",
            spillway::diag::render(&loaded.source.path, &loaded.source.text, &loaded.warnings, super::color())
        );
    }
    // Problems of the site file are checked problems (exit 1), as under `check`; the
    // plant is built and bound once here so they show before any run.
    let checked = offline::simulation_defaults(&loaded).and_then(|d| Ok((d, offline::checked_plant(&loaded)?)));
    let (defaults, mut plant) = match checked {
        Ok(c) => c,
        Err(e) => {
            eprintln!("error: {e}");
            return Ok(None);
        }
    };
    if !args.quiet {
        for note in offline::plausible::notes(&loaded, &plant) {
            eprintln!("{}: {note}", loaded.source.path);
        }
    }
    let from = args.from.or(defaults.from).unwrap_or_else(|| chrono::Utc::now().date_naive());
    let days = match (args.to, args.days) {
        (Some(to), _) => {
            let d = (to - from).num_days() + 1;
            anyhow::ensure!(d >= 1, "--to {to} is before --from {from}");
            d as u32
        }
        (None, Some(d)) => d,
        (None, None) => defaults.days.unwrap_or(7),
    };
    anyhow::ensure!(days >= 1, "--days must be at least 1");
    let max = offline::run::MAX_DAYS;
    anyhow::ensure!(days <= max, "a run lasts at most {max} days (ten years), not {days}");
    let seed = args.seed.or(defaults.seed).or(plant.seed).unwrap_or(1);
    let (sky, weather_label) = match args.weather.as_deref() {
        // The words `--weather` and the plant's `weather.sky` take, not the Rust names.
        None => (
            None,
            match plant.weather.sky {
                WeatherKind::Clear => "clear",
                WeatherKind::Mixed => "mixed",
                WeatherKind::Overcast => "overcast",
                WeatherKind::Varied => "varied",
            }
            .to_owned(),
        ),
        Some("clear") => (Some(WeatherKind::Clear), "clear".to_owned()),
        Some("mixed") => (Some(WeatherKind::Mixed), "mixed".to_owned()),
        Some("overcast") => (Some(WeatherKind::Overcast), "overcast".to_owned()),
        Some("varied") => (Some(WeatherKind::Varied), "varied".to_owned()),
        Some(file) => {
            let p = PathBuf::from(file);
            anyhow::ensure!(p.exists(), "--weather {file}: no such file (or use clear, mixed, overcast or varied)");
            plant.weather.measured = Some(MeasuredConfig { path: p, max_gap: 900.0 });
            (None, format!("measured ({file})"))
        }
    };
    let mut weather_label = weather_label;
    if sky.is_none()
        && uses_weather
        && let Some(m) = &plant.weather.measured
    {
        weather_label = format!("measured ({})", m.path.display());
        report_measured(&m.path, m.max_gap, &loaded.site, from, days)?;
    }
    let site = Arc::new(loaded.site.clone());
    Ok(Some(Prepared { loaded, site, plant, from, days, seed, sky, weather_label }))
}

/// Reads a measured weather series once before the runs, to show what the plant would
/// otherwise keep to itself: each row it skipped or changed (with its line), and how much
/// of the run the series does not cover (the sky is then dark, not measured).
fn report_measured(
    path: &Path,
    max_gap_s: f64,
    site: &spillway::config::model::Site,
    from: NaiveDate,
    days: u32,
) -> anyhow::Result<()> {
    let (series, notices) = spillway_sim::weather::MeasuredSeries::load(path, site.timezone, max_gap_s)
        .with_context(|| format!("measured weather {}", path.display()))?;
    for n in &notices {
        eprintln!("{}:{}: {}", path.display(), n.line, n.message);
    }
    if !notices.is_empty() {
        eprintln!("{}: {} row notice(s)", path.display(), notices.len());
    }
    let (first_s, last_s) = series.span_s();
    let midnight = |d: NaiveDate| spillway_sim::pv::local_midnight_ms(site.timezone, d).map(|ms| ms as f64 / 1000.0);
    if let (Some(start), Some(end)) = (midnight(from), midnight(from + chrono::Days::new(u64::from(days)))) {
        let covered = (last_s.min(end) - first_s.max(start)).max(0.0);
        let outside_h = (end - start - covered) / 3600.0;
        if outside_h > 1.0 {
            eprintln!(
                "{}: warning: {outside_h:.1} h of the run lie outside the series: the measured quantity is 0 there",
                path.display()
            );
        }
    }
    Ok(())
}

/// A progress bar that appears only once a run has taken more than a second.
pub struct Progress {
    bar: std::sync::Mutex<Option<ProgressBar>>,
    started: Instant,
    quiet: bool,
    label: String,
}

impl Progress {
    pub fn new(quiet: bool, label: &str) -> Self {
        Progress { bar: std::sync::Mutex::new(None), started: Instant::now(), quiet, label: label.to_owned() }
    }

    pub fn update(&self, fraction: f64) {
        if self.quiet || self.started.elapsed() < Duration::from_secs(1) {
            return;
        }
        let Ok(mut guard) = self.bar.lock() else { return };
        let bar = guard.get_or_insert_with(|| {
            let b = ProgressBar::new(1000);
            if let Ok(style) = ProgressStyle::with_template("{msg} [{bar:40}] {percent:>3}% {elapsed}") {
                b.set_style(style.progress_chars("=> "));
            }
            b.set_message(self.label.clone());
            b
        });
        bar.set_position((fraction.clamp(0.0, 1.0) * 1000.0) as u64);
    }

    pub fn finish(&self) {
        if let Ok(mut g) = self.bar.lock()
            && let Some(b) = g.take()
        {
            b.finish_and_clear();
        }
    }
}

/// Runs the rules and the baseline and builds the report.
pub fn run_pair(
    p: &Prepared,
    step: Duration,
    progress: &Progress,
    chart_days: Option<(NaiveDate, NaiveDate)>,
) -> anyhow::Result<(report::Report, offline::RunOutput)> {
    let halves = |offset: f64| move |f: f64| progress.update(offset + f / 2.0);
    let first = halves(0.0);
    let second = halves(0.5);
    fn options<'a>(
        p: &Prepared,
        step: Duration,
        controller: Controller,
        progress: &'a (dyn Fn(f64) + Sync),
    ) -> RunOptions<'a> {
        let mut o = RunOptions::day(p.from);
        o.days = p.days;
        o.seed = p.seed;
        o.sky = p.sky;
        o.step = step;
        o.controller = controller;
        o.progress = Some(progress);
        o
    }
    // The baseline is independent of the rules: run it beside the main run when the
    // machine has a second core.
    let (run, baseline) = std::thread::scope(|scope| {
        let base = scope.spawn(|| {
            offline::simulate_once(
                &p.site,
                p.loaded.tariff.as_ref(),
                &p.plant,
                options(p, step, Controller::Baseline, &second),
            )
        });
        let mut main = options(p, step, Controller::Spillway, &first);
        main.trace = chart_days;
        main.trace_every = offline::chart::trace_interval(p.days);
        let run = offline::simulate_once(&p.site, p.loaded.tariff.as_ref(), &p.plant, main);
        let baseline = base.join().map_err(|_| anyhow::anyhow!("the baseline run panicked"));
        (run, baseline)
    });
    let run = run.context("simulation failed")?;
    let baseline = baseline?.context("baseline simulation failed")?;
    progress.finish();
    let to = p.from + chrono::Days::new(u64::from(p.days - 1));
    let info = report::RunInfo {
        site: p.site.name.clone(),
        from: p.from.to_string(),
        to: to.to_string(),
        days: p.days,
        seed: p.seed,
        weather: p.weather_label.clone(),
        step_s: step.as_secs_f64(),
    };
    let report = report::build(&p.site, p.loaded.tariff.as_ref(), info, &run, &baseline);
    Ok((report, run))
}

pub fn run(path: &Path, args: &RunArgs, format: Format, chart: Option<&Path>) -> anyhow::Result<ExitCode> {
    let Some(p) = prepare(path, args)? else { return Ok(ExitCode::from(1)) };
    if let Some(file) = chart {
        check_writable(file)?;
    }
    let progress = Progress::new(args.quiet, "simulating");
    let chart_days = chart.map(|_| (p.from, p.from + chrono::Days::new(u64::from(p.days - 1))));
    let (report, run) = run_pair(&p, args.step, &progress, chart_days)?;
    // The report first: a chart that fails to write after all cannot take it along.
    match format {
        Format::Json => println!("{}", report.to_json()),
        Format::Text => print!("{}", report.to_text()),
    }
    if let Some(file) = chart {
        offline::chart::write(file, &p.site, p.loaded.tariff.as_ref(), &report, &run)?;
        if !args.quiet {
            eprintln!("chart written to {}", file.display());
        }
    }
    Ok(ExitCode::SUCCESS)
}

/// Fails before a run if `path` cannot be written, so a long simulation is not thrown
/// away at its end for a mistyped directory. Leaves no file behind when it created one
/// to find out, and never truncates one that exists.
pub fn check_writable(path: &Path) -> anyhow::Result<()> {
    let existed = path.exists();
    std::fs::OpenOptions::new()
        .append(true)
        .create(true)
        .open(path)
        .with_context(|| format!("cannot write the chart to {} (checked before the run)", path.display()))?;
    if !existed {
        let _ = std::fs::remove_file(path);
    }
    Ok(())
}
