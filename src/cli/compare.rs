//! `spillway compare A.yaml B.yaml`: two rule sets on the same plant (A's `plant:`
//! section), weather and seed, side by side; with `--recorded FILE.csv`, on a recorded
//! PV and household series in place of the modelled ones.

use std::path::Path;
use std::process::ExitCode;

use anyhow::Context as _;
use spillway::offline::{self, Controller, RunOptions, compare, replay::Recorded, report};

use super::replay::load_recording;
use super::simulate::{Format, Prepared, Progress, RunArgs, prepare_for};

/// Where B's site does not match A's (whose plant both run on): another time zone, and
/// loads of either side with no namesake on the other (their rows have one side only).
fn mismatches(a: &Prepared, b: &Prepared) -> Vec<String> {
    let mut out = Vec::new();
    if a.site.timezone != b.site.timezone {
        out.push(format!(
            "B's time zone is {} but both run on A's plant in {}: B's time windows fall at other hours of A's day",
            b.site.timezone, a.site.timezone
        ));
    }
    let names = |p: &Prepared| p.site.loads.iter().map(|l| l.name.clone()).collect::<Vec<_>>();
    let (la, lb) = (names(a), names(b));
    let only_b: Vec<&str> = lb.iter().filter(|n| !la.contains(n)).map(String::as_str).collect();
    let only_a: Vec<&str> = la.iter().filter(|n| !lb.contains(n)).map(String::as_str).collect();
    if !only_b.is_empty() {
        out.push(format!(
            "B's loads {} have no namesake in A: on A's plant they may find nothing to drive (their rows show B's side only)",
            only_b.join(", ")
        ));
    }
    if !only_a.is_empty() {
        out.push(format!(
            "A's loads {} have no namesake in B: B's rules never run them (their rows show A's side only)",
            only_a.join(", ")
        ));
    }
    if b.loaded.tariff.is_some() && b.loaded.tariff != a.loaded.tariff {
        out.push(
            "B's tariff differs from A's and is not used: both sides and the baseline are priced with A's, so the table compares rules, not tariffs (run `simulate` on each file to price each with its own)"
                .to_owned(),
        );
    }
    out
}

fn options<'a>(p: &Prepared, args: &RunArgs, controller: Controller, recorded: Option<&'a Recorded>) -> RunOptions<'a> {
    let mut o = RunOptions::day(p.from);
    o.days = p.days;
    o.seed = p.seed;
    o.sky = p.sky;
    o.step = args.step;
    o.controller = controller;
    o.recorded = recorded;
    o
}

pub fn run(
    a_path: &Path,
    b_path: &Path,
    recorded: Option<&Path>,
    args: &RunArgs,
    format: Format,
) -> anyhow::Result<ExitCode> {
    // As for `replay`: accepted silently, it would look as if it changed something.
    anyhow::ensure!(
        recorded.is_none() || args.weather.is_none(),
        "--weather does not apply with --recorded: the recording replaces the modelled PV and household load"
    );
    let uses_weather = recorded.is_none();
    let Some(mut a) = prepare_for(a_path, args, uses_weather)? else { return Ok(ExitCode::from(1)) };
    let Some(mut b) = prepare_for(b_path, args, uses_weather)? else { return Ok(ExitCode::from(1)) };
    let recording = match recorded {
        Some(csv) => {
            let r = load_recording(csv, &mut a, args)?;
            for w in &r.warnings {
                eprintln!("{}: warning: {w}", csv.display());
            }
            Some(r.recorded)
        }
        None => None,
    };
    let recording = recording.as_ref();
    // Same plant, dates, seed and weather for both: A's. B's rules must fit that plant;
    // say where they do not, since the table can only set like against like.
    for w in mismatches(&a, &b) {
        eprintln!("warning: {w}");
    }
    b.plant = a.plant.clone();
    b.from = a.from;
    b.days = a.days;
    b.seed = a.seed;
    b.sky = a.sky;
    b.weather_label = a.weather_label.clone();
    let progress = Progress::new(args.quiet, "comparing");
    let (ra, rb, base) = std::thread::scope(|s| {
        let hb = s.spawn(|| {
            // B's loads may find nothing to drive on A's plant (warned of above).
            let mut o = options(&b, args, Controller::Spillway, recording);
            o.foreign_plant = true;
            // Priced as A is: the savings are reckoned against A's baseline.
            offline::simulate_once(&b.site, a.loaded.tariff.as_ref(), &b.plant, o)
        });
        let ra = offline::simulate_once(
            &a.site,
            a.loaded.tariff.as_ref(),
            &a.plant,
            options(&a, args, Controller::Spillway, recording),
        );
        progress.update(0.5);
        let base = offline::simulate_once(
            &a.site,
            a.loaded.tariff.as_ref(),
            &a.plant,
            options(&a, args, Controller::Baseline, recording),
        );
        (ra, hb.join(), base)
    });
    progress.finish();
    let ra = ra.context("simulating A failed")?;
    let rb = rb.map_err(|_| anyhow::anyhow!("simulating B panicked"))?.context("simulating B failed")?;
    let base = base.context("the baseline failed")?;
    let to = a.from + chrono::Days::new(u64::from(a.days - 1));
    let info = |p: &Prepared| report::RunInfo {
        site: p.site.name.clone(),
        from: a.from.to_string(),
        to: to.to_string(),
        days: a.days,
        seed: a.seed,
        weather: a.weather_label.clone(),
        step_s: args.step.as_secs_f64(),
    };
    let rep_a = report::build(&a.site, a.loaded.tariff.as_ref(), info(&a), &ra, &base);
    let rep_b = report::build(&b.site, a.loaded.tariff.as_ref(), info(&b), &rb, &base);
    let cmp = compare::compare(&a_path.display().to_string(), &rep_a, &b_path.display().to_string(), &rep_b);
    match format {
        Format::Json => println!("{}", cmp.to_json()),
        Format::Text => {
            println!(
                "{} to {} ({} day(s)), weather {}, seed {}, plant of A\n",
                a.from, to, a.days, a.weather_label, a.seed
            );
            print!("{}", cmp.to_text());
        }
    }
    Ok(ExitCode::SUCCESS)
}
