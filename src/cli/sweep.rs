//! `spillway sweep SITE.yaml --vary KEY=FROM..TO:STEP`: one run (a year by default) per
//! value, spread over the machine's cores; a table and a chart of import, export,
//! savings and the array's simple payback.

use std::path::Path;
use std::process::ExitCode;
use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};

use anyhow::Context as _;
use serde::Serialize;
use spillway::config;
use spillway::offline::{self, Controller, RunOptions, sweep};

use super::simulate::{Format, RunArgs};

/// One value's results.
#[derive(Debug, Clone, Serialize)]
struct Point {
    value: String,
    pv_kwp: f64,
    pv_kwh: f64,
    import_kwh: f64,
    export_kwh: f64,
    diverted_kwh: f64,
    self_consumption_pct: f64,
    cost: Option<f64>,
    savings_vs_no_diversion: Option<f64>,
    savings_vs_no_pv: Option<f64>,
    payback_years: Option<f64>,
    /// Where export is limited: time over the limit plus the tolerance, s (a gain or a
    /// threshold that looks harmless in energy can show here).
    seconds_over_limit: Option<f64>,
    /// On/off and stage changes of every load together: relay and contactor wear.
    switchings: u32,
    /// With a simulated tank: litres that came out colder than asked for (the no-PV
    /// reference's tank sits on its thermostat, so its savings include this shortfall).
    hot_water_lukewarm_l: Option<f64>,
    /// With a simulated EV: what the cars lacked of their target when they left, kWh.
    ev_short_kwh: Option<f64>,
}

#[derive(Debug, Serialize)]
struct SweepReport {
    key: String,
    from: String,
    days: u32,
    seed: u64,
    currency: Option<String>,
    array_cost_per_kwp: Option<f64>,
    no_pv_cost: Option<f64>,
    points: Vec<Point>,
}

fn r(v: f64, d: i32) -> f64 {
    let f = 10f64.powi(d);
    (v * f).round() / f
}

pub fn run(
    path: &Path,
    vary: &str,
    mut args: RunArgs,
    format: Format,
    chart: Option<&Path>,
    jobs: Option<usize>,
) -> anyhow::Result<ExitCode> {
    let vary = sweep::parse_vary(vary)?;
    if let Some(w) = vary.warning() {
        eprintln!("warning: {w}");
    }
    if args.days.is_none() && args.to.is_none() {
        args.days = Some(365);
    }
    let Some(base) = super::simulate::prepare(path, &args)? else { return Ok(ExitCode::from(1)) };
    if let Some(file) = chart {
        super::simulate::check_writable(file)?;
    }
    let text = base.loaded.source.text.clone();
    let values = vary.texts();
    // Check every variant before spending minutes on runs.
    let mut variants = Vec::new();
    for v in &values {
        let t = sweep::substitute(&text, &vary, v)?;
        match config::load_str(&format!("{} [{}={v}]", path.display(), vary.key()), &t) {
            Ok(l) => {
                // The plant too, as `check` does: a bad plant value found in a worker
                // would discard every other value's finished year.
                if let Err(e) = offline::checked_plant(&l) {
                    eprintln!("error: {}={v}: the plant is not valid with this value: {e}", vary.key());
                    return Ok(ExitCode::from(1));
                }
                variants.push((v.clone(), l));
            }
            Err(e) => {
                eprint!("{}", e.render(super::color()));
                return Ok(ExitCode::from(1));
            }
        }
    }
    let tariff = base.loaded.tariff.clone();
    let options = |controller: Controller| {
        let mut o = RunOptions::day(base.from);
        o.days = base.days;
        o.seed = base.seed;
        o.sky = base.sky;
        o.step = args.step;
        o.controller = controller;
        o
    };
    // The reference without PV (the original file's house), for the array's payback.
    let mut no_pv_plant = base.plant.clone();
    no_pv_plant.solar = None;
    let jobs = jobs.unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get())).max(1);
    let next = AtomicUsize::new(0);
    let results: Mutex<Vec<Option<anyhow::Result<Point>>>> = Mutex::new((0..variants.len()).map(|_| None).collect());
    let no_pv = Mutex::new(None);
    let done = AtomicUsize::new(0);
    let total = variants.len() + 1;
    if !args.quiet {
        eprintln!(
            "sweeping {} over {} value(s), {} day(s) each, on {jobs} core(s)",
            vary.key(),
            variants.len(),
            base.days
        );
    }
    std::thread::scope(|s| {
        for _ in 0..jobs {
            s.spawn(|| {
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    if i > variants.len() {
                        break;
                    }
                    if i == variants.len() {
                        let out = offline::simulate_once(
                            &base.site,
                            tariff.as_ref(),
                            &no_pv_plant,
                            options(Controller::Baseline),
                        );
                        if let Ok(mut g) = no_pv.lock() {
                            *g = Some(out.map(|o| offline::report::billed(&o)));
                        }
                    } else {
                        let (value, loaded) = &variants[i];
                        let point = (|| -> anyhow::Result<Point> {
                            let plant = offline::plant_section(loaded)?;
                            let site = std::sync::Arc::new(loaded.site.clone());
                            let run = offline::simulate_once(
                                &site,
                                loaded.tariff.as_ref(),
                                &plant,
                                options(Controller::Spillway),
                            )?;
                            let baseline = offline::simulate_once(
                                &site,
                                loaded.tariff.as_ref(),
                                &plant,
                                options(Controller::Baseline),
                            )?;
                            let f = &run.flows;
                            let kwp = plant.solar.as_ref().map_or(0.0, |s| s.nameplate_w() / 1000.0);
                            Ok(Point {
                                value: value.clone(),
                                pv_kwp: r(kwp, 2),
                                pv_kwh: r(f.pv.wh / 1000.0, 1),
                                import_kwh: r(f.grid_import.wh / 1000.0, 1),
                                export_kwh: r(f.grid_export.wh / 1000.0, 1),
                                diverted_kwh: r(run.diverted_wh / 1000.0, 1),
                                self_consumption_pct: if f.pv.wh > 0.0 {
                                    r((1.0 - f.grid_export.wh / f.pv.wh) * 100.0, 1)
                                } else {
                                    0.0
                                },
                                // As `simulate` prints them: months rounded to the cent, summed.
                                cost: loaded.tariff.as_ref().map(|_| offline::report::billed(&run)),
                                savings_vs_no_diversion: loaded
                                    .tariff
                                    .as_ref()
                                    .map(|_| r(offline::report::billed(&baseline) - offline::report::billed(&run), 2)),
                                savings_vs_no_pv: None,
                                payback_years: None,
                                seconds_over_limit: site.export_limit().map(|_| r(run.seconds_over_limit, 0)),
                                switchings: run.loads.iter().map(|l| l.switchings).sum(),
                                hot_water_lukewarm_l: run.hot_water_short.map(|(l, _)| r(l, 0)),
                                ev_short_kwh: run.ev_departures.map(|(_, wh)| r(wh / 1000.0, 1)),
                            })
                        })();
                        if let Ok(mut g) = results.lock() {
                            g[i] = Some(point);
                        }
                    }
                    let d = done.fetch_add(1, Ordering::Relaxed) + 1;
                    if !args.quiet {
                        eprintln!("  {d}/{total} done");
                    }
                }
            });
        }
    });
    let no_pv_cost = no_pv
        .into_inner()
        .map_err(|_| anyhow::anyhow!("a sweep worker panicked"))?
        .transpose()
        .context("the no-PV reference failed")?;
    let mut points = Vec::new();
    for p in results.into_inner().map_err(|_| anyhow::anyhow!("a sweep worker panicked"))? {
        points.push(p.ok_or_else(|| anyhow::anyhow!("a sweep value was not run"))??);
    }
    let year_factor = 365.0 / f64::from(base.days);
    let cost_per_kwp = tariff.as_ref().and_then(|t| t.array_cost_per_kwp);
    for p in &mut points {
        if let (Some(c), Some(n)) = (p.cost, no_pv_cost) {
            let saved = r(n - c, 2);
            p.savings_vs_no_pv = Some(saved);
            if let Some(cpk) = cost_per_kwp
                && saved > 0.0
                && p.pv_kwp > 0.0
            {
                p.payback_years = Some(r(p.pv_kwp * cpk / (saved * year_factor), 1));
            }
        }
    }
    let report = SweepReport {
        key: vary.key(),
        from: base.from.to_string(),
        days: base.days,
        seed: base.seed,
        currency: tariff.as_ref().map(|t| t.currency.clone()),
        array_cost_per_kwp: cost_per_kwp,
        no_pv_cost: no_pv_cost.map(|c| r(c, 2)),
        points,
    };
    match format {
        Format::Json => println!("{}", serde_json::to_string_pretty(&report)?),
        Format::Text => print!("{}", to_text(&report)),
    }
    if let Some(file) = chart {
        std::fs::write(file, chart_svg(&report)?).with_context(|| format!("cannot write {}", file.display()))?;
    }
    Ok(ExitCode::SUCCESS)
}

fn to_text(rep: &SweepReport) -> String {
    use std::fmt::Write as _;
    let mut o = String::new();
    let cur = rep.currency.clone().unwrap_or_default();
    let _ = writeln!(o, "sweep of {} — {} day(s) from {}, seed {}", rep.key, rep.days, rep.from, rep.seed);
    if let Some(c) = rep.no_pv_cost {
        let _ = writeln!(o, "cost of the same house without PV or diversion: {cur}{c:.2}");
    }
    // The service the runs fell short of, where the site has a tank or a car: headings
    // padded to the width of their columns, or nothing.
    let lukewarm = rep.points.iter().any(|p| p.hot_water_lukewarm_l.is_some());
    let ev = rep.points.iter().any(|p| p.ev_short_kwh.is_some());
    let lukewarm_head = if lukewarm { "  lukewarm L" } else { "" };
    let ev_head = if ev { "    EV short" } else { "" };
    let over = rep.points.iter().any(|p| p.seconds_over_limit.is_some());
    let over_head = if over { "  over limit" } else { "" };
    let _ = writeln!(
        o,
        "\n{:>10} {:>7} {:>9} {:>9} {:>8} {:>9} {:>7} {:>10} {:>11} {:>11} {:>8}{over_head} {:>10}{lukewarm_head}{ev_head}",
        "value",
        "kWp",
        "PV kWh",
        "import",
        "export",
        "diverted",
        "self %",
        "cost",
        "saves/div",
        "saves/noPV",
        "payback",
        "switchings"
    );
    let money = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{cur}{v:.0}"));
    for p in &rep.points {
        let _ = write!(
            o,
            "{:>10} {:>7.2} {:>9.0} {:>9.0} {:>8.0} {:>9.0} {:>7.1} {:>10} {:>11} {:>11} {:>8}",
            p.value,
            p.pv_kwp,
            p.pv_kwh,
            p.import_kwh,
            p.export_kwh,
            p.diverted_kwh,
            p.self_consumption_pct,
            money(p.cost),
            money(p.savings_vs_no_diversion),
            money(p.savings_vs_no_pv),
            p.payback_years.map_or("-".to_owned(), |y| format!("{y:.1} y"))
        );
        if over {
            let _ = write!(o, " {:>11}", p.seconds_over_limit.map_or("-".to_owned(), |s| format!("{s:.0} s")));
        }
        let _ = write!(o, " {:>10}", p.switchings);
        if lukewarm {
            let _ = write!(o, " {:>11}", p.hot_water_lukewarm_l.map_or("-".to_owned(), |l| format!("{l:.0}")));
        }
        if ev {
            let _ = write!(o, " {:>11}", p.ev_short_kwh.map_or("-".to_owned(), |k| format!("{k:.0}")));
        }
        let _ = writeln!(o);
    }
    if lukewarm || ev {
        let mut what = Vec::new();
        if lukewarm {
            what.push("lukewarm L: hot water that came out colder than asked for");
        }
        if ev {
            what.push("EV short: what the car lacked of its target when it left, kWh");
        }
        let _ = writeln!(
            o,
            "\n({}. The no-PV reference heats on its thermostat and charges any car whenever it is plugged in: savings against it include these shortfalls)",
            what.join("; ")
        );
    }
    if rep.array_cost_per_kwp.is_none() {
        let _ = writeln!(o, "\n(no payback: give `tariff.array_cost` per kWp in the site file)");
    } else if !rep.days.is_multiple_of(365) && rep.points.iter().any(|p| p.payback_years.is_some()) {
        // Savings follow the seasons: a summer month scaled to a year flatters the array,
        // a winter month condemns it. Say so beside the figure an installer may quote.
        let _ = writeln!(
            o,
            "\n(payback scales these {} days' savings to 365 days; savings follow the seasons, so quote a payback only from whole years, as the default runs)",
            rep.days
        );
    }
    o
}

/// The lower panel's title: with the table's caveat where a payback was scaled up from a
/// run shorter (or longer) than whole years.
fn payback_caption(rep: &SweepReport) -> String {
    let title = "savings per run and simple payback of the array";
    if rep.array_cost_per_kwp.is_some()
        && !rep.days.is_multiple_of(365)
        && rep.points.iter().any(|p| p.payback_years.is_some())
    {
        format!("{title} (payback scales the savings of {} days to a year: quote one only from whole years)", rep.days)
    } else {
        title.to_owned()
    }
}

fn chart_svg(rep: &SweepReport) -> anyhow::Result<String> {
    use plotters::prelude::*;
    use spillway::offline::chart::{Glyph, LEGEND_ROW_PX, Ticked, draw_legend};
    let mut svg = String::new();
    {
        // Two panels, each with its legend in a row below it, where it covers no line.
        let strip = LEGEND_ROW_PX + 8;
        let root = SVGBackend::with_string(&mut svg, (1100, 720 + 2 * strip)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| anyhow::anyhow!("{e}"))?;
        let (top, bottom) = root.split_vertically(400 + strip);
        let (top, top_legend) = top.split_vertically(400);
        let (bottom, bottom_legend) = bottom.split_vertically(320);
        let mut legend: Vec<(String, Glyph)> = Vec::new();
        let n = rep.points.len();
        let xs: Vec<f64> = (0..n).map(|i| i as f64).collect();
        // Both panels share one x axis: the same range, a tick at each value run, and the
        // same label areas on both sides (the lower panel's payback axis on the right),
        // so a value sits at the same x in both.
        let x_axis = || Ticked::new(-0.3..(n as f64 - 0.7), xs.clone(), Vec::new());
        const RIGHT_AXIS_PX: u32 = 60;
        let labels: Vec<String> = rep.points.iter().map(|p| p.value.clone()).collect();
        let energy_max =
            rep.points.iter().flat_map(|p| [p.import_kwh, p.export_kwh, p.diverted_kwh]).fold(1.0, f64::max) * 1.15;
        let mut c = ChartBuilder::on(&top)
            .caption(format!("sweep of {} — energy per run ({} days)", rep.key, rep.days), ("sans-serif", 20))
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(60)
            .right_y_label_area_size(RIGHT_AXIS_PX)
            .build_cartesian_2d(x_axis(), 0.0..energy_max)
            .map_err(|e| anyhow::anyhow!("{e}"))?;
        // The varied setting's own name under the axis (`modules`, `min_on`, `start#1`).
        let x_desc = rep.key.rsplit('.').next().unwrap_or(&rep.key).to_owned();
        c.configure_mesh()
            .x_label_formatter(&|x| labels.get(x.round() as usize).cloned().unwrap_or_default())
            .x_desc(x_desc.clone())
            .y_desc("kWh")
            .draw()
            .map_err(|e| anyhow::anyhow!("{e}"))?;
        type Pick = fn(&Point) -> f64;
        let series: [(&str, RGBColor, Pick); 3] = [
            ("import", RGBColor(200, 40, 40), |p| p.import_kwh),
            ("export", RGBColor(40, 150, 70), |p| p.export_kwh),
            ("diverted", RGBColor(60, 120, 200), |p| p.diverted_kwh),
        ];
        for (name, colour, get) in series {
            // A dot at each value run: the lines between them are not runs.
            c.draw_series(
                LineSeries::new(xs.iter().cloned().zip(rep.points.iter().map(get)), colour.stroke_width(3))
                    .point_size(4),
            )
            .map_err(|e| anyhow::anyhow!("{e}"))?;
            legend.push((name.to_owned(), Glyph::Line(colour, 3)));
        }
        draw_legend(&top_legend, &legend)?;
        legend.clear();
        let money_max = rep
            .points
            .iter()
            .flat_map(|p| [p.savings_vs_no_pv.unwrap_or(0.0), p.savings_vs_no_diversion.unwrap_or(0.0)])
            .fold(1.0, f64::max)
            * 1.15;
        let payback_max = rep.points.iter().filter_map(|p| p.payback_years).fold(1.0, f64::max) * 1.2;
        let mut b = ChartBuilder::on(&bottom)
            .caption(payback_caption(rep), ("sans-serif", 18))
            .margin(12)
            .x_label_area_size(44)
            .y_label_area_size(60)
            .right_y_label_area_size(RIGHT_AXIS_PX)
            .build_cartesian_2d(x_axis(), 0.0..money_max)
            .map_err(|e| anyhow::anyhow!("{e}"))?
            .set_secondary_coord(-0.3..(n as f64 - 0.7), 0.0..payback_max);
        b.configure_mesh()
            .x_label_formatter(&|x| labels.get(x.round() as usize).cloned().unwrap_or_default())
            .x_desc(x_desc)
            .y_desc(format!("savings ({})", rep.currency.clone().unwrap_or_default()))
            .draw()
            .map_err(|e| anyhow::anyhow!("{e}"))?;
        b.configure_secondary_axes().y_desc("payback (years)").draw().map_err(|e| anyhow::anyhow!("{e}"))?;
        let gold = RGBColor(230, 160, 0);
        let violet = RGBColor(110, 70, 170);
        b.draw_series(
            LineSeries::new(
                xs.iter().cloned().zip(rep.points.iter().map(|p| p.savings_vs_no_pv.unwrap_or(0.0))),
                gold.stroke_width(3),
            )
            .point_size(4),
        )
        .map_err(|e| anyhow::anyhow!("{e}"))?;
        legend.push(("savings against no PV".to_owned(), Glyph::Line(gold, 3)));
        b.draw_series(
            LineSeries::new(
                xs.iter().cloned().zip(rep.points.iter().map(|p| p.savings_vs_no_diversion.unwrap_or(0.0))),
                RGBColor(60, 120, 200).stroke_width(2),
            )
            .point_size(4),
        )
        .map_err(|e| anyhow::anyhow!("{e}"))?;
        legend.push(("savings from diversion".to_owned(), Glyph::Line(RGBColor(60, 120, 200), 2)));
        b.draw_secondary_series(
            LineSeries::new(
                xs.iter()
                    .cloned()
                    .zip(rep.points.iter().map(|p| p.payback_years.unwrap_or(f64::NAN)))
                    .filter(|(_, y)| y.is_finite()),
                violet.stroke_width(2),
            )
            .point_size(4),
        )
        .map_err(|e| anyhow::anyhow!("{e}"))?;
        legend.push(("payback (years, right axis)".to_owned(), Glyph::Line(violet, 2)));
        draw_legend(&bottom_legend, &legend)?;
        root.present().map_err(|e| anyhow::anyhow!("{e}"))?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn point(value: &str, import_kwh: f64) -> Point {
        Point {
            value: value.into(),
            pv_kwp: 2.0,
            pv_kwh: 2500.0,
            import_kwh,
            export_kwh: 0.0,
            diverted_kwh: 900.0,
            self_consumption_pct: 100.0,
            cost: Some(500.0),
            savings_vs_no_diversion: Some(80.0),
            savings_vs_no_pv: Some(300.0),
            payback_years: Some(5.5),
            seconds_over_limit: None,
            switchings: 40,
            hot_water_lukewarm_l: None,
            ev_short_kwh: None,
        }
    }

    fn report(days: u32) -> SweepReport {
        SweepReport {
            key: "plant.solar.arrays.0.strings.0.modules".into(),
            from: "2026-01-01".into(),
            days,
            seed: 1,
            currency: Some("€".into()),
            array_cost_per_kwp: Some(850.0),
            no_pv_cost: Some(900.0),
            points: vec![point("4", 3000.0), point("6", 2600.0), point("8", 2300.0)],
        }
    }

    #[test]
    fn shortfalls_get_their_columns_only_where_the_site_has_a_tank_or_a_car() {
        let plain = to_text(&report(365));
        assert!(!plain.contains("lukewarm L") && !plain.contains("EV short"), "{plain}");
        let mut rep = report(365);
        for p in &mut rep.points {
            p.hot_water_lukewarm_l = Some(120.0);
        }
        let text = to_text(&rep);
        assert!(text.contains("lukewarm L") && !text.contains("EV short"), "{text}");
        let row = text.lines().find(|l| l.trim_start().starts_with("4 ")).unwrap();
        assert!(row.trim_end().ends_with("120"), "{row}");
    }

    /// A gain that looks harmless in energy can wear the relays or leak export: both
    /// have their column, the time over the limit only where export is limited.
    #[test]
    fn switchings_and_time_over_the_export_limit_have_their_columns() {
        let plain = to_text(&report(365));
        assert!(plain.contains("switchings") && !plain.contains("over limit"), "{plain}");
        let mut rep = report(365);
        rep.points[0].seconds_over_limit = Some(397.0);
        rep.points[0].switchings = 38_800;
        let text = to_text(&rep);
        let head = text.lines().find(|l| l.contains("payback")).unwrap();
        let row = text.lines().find(|l| l.trim_start().starts_with("4 ")).unwrap();
        assert!(head.trim_end().ends_with("over limit switchings"), "{head}");
        assert!(row.trim_end().ends_with("397 s      38800"), "{row}");
        // Each column ends where its heading does (counted in characters: `€` is three
        // bytes).
        let row: Vec<char> = row.chars().collect();
        for word in ["over limit", "switchings"] {
            let end = head[..head.find(word).unwrap()].chars().count() + word.chars().count();
            assert!(row[end - 1] != ' ' && row.get(end).is_none_or(|c| *c == ' '), "{word}:\n{head}\n{row:?}");
        }
    }

    #[test]
    fn a_payback_from_less_than_a_year_says_it_was_scaled() {
        let note = "payback scales these 30 days' savings to 365 days";
        assert!(to_text(&report(30)).contains(note), "{}", to_text(&report(30)));
        assert!(!to_text(&report(365)).contains("payback scales"), "a whole year needs no note");
        let mut no_cost = report(30);
        no_cost.array_cost_per_kwp = None;
        assert!(!to_text(&no_cost).contains("payback scales"), "no payback, nothing to qualify");
    }

    #[test]
    fn the_chart_names_the_varied_setting_and_marks_each_value_run() {
        let svg = chart_svg(&report(365)).unwrap();
        // plotters writes each text on its own line between the tags.
        let axis_names = svg.lines().filter(|l| l.trim() == "modules").count();
        assert_eq!(axis_names, 2, "under both x axes");
        // A dot per value on each of the six lines.
        assert!(svg.matches("<circle").count() >= 6 * 3, "{} circles", svg.matches("<circle").count());
        // Each panel's legend sits below it: the energy legend under the first panel's
        // axis name, the savings legend under the second's.
        let at = |text: &str| svg.find(&format!("\n{text}\n")).unwrap_or_else(|| panic!("no {text:?}"));
        let first_axis = svg.find("\nmodules\n").unwrap();
        let second_axis = svg.rfind("\nmodules\n").unwrap();
        assert!(first_axis < at("import") && at("diverted") < at("savings per run and simple payback of the array"));
        assert!(second_axis < at("savings against no PV") && second_axis < at("payback (years, right axis)"));
    }

    /// The x of every `<text>` whose content is `label`, in document order.
    fn text_xs(svg: &str, label: &str) -> Vec<f64> {
        let needle = format!(">\n{label}\n</text>");
        let mut out = Vec::new();
        let mut from = 0;
        while let Some(i) = svg[from..].find(&needle) {
            let end = from + i;
            let start = svg[..end].rfind("<text").unwrap();
            let x = &svg[start..end][svg[start..end].find(" x=\"").unwrap() + 4..];
            out.push(x[..x.find('"').unwrap()].parse().unwrap());
            from = end + needle.len();
        }
        out
    }

    #[test]
    fn both_panels_put_each_value_at_the_same_x() {
        let mut rep = report(365);
        rep.points = ["10", "12", "14", "16", "18", "20"].iter().map(|v| point(v, 2000.0)).collect();
        let svg = chart_svg(&rep).unwrap();
        for value in ["10", "16", "20"] {
            let xs = text_xs(&svg, value);
            assert_eq!(xs.len(), 2, "{value}: one label under each panel, {xs:?}");
            assert!((xs[0] - xs[1]).abs() < 0.5, "{value} at {xs:?}");
        }
    }

    #[test]
    fn the_chart_says_a_payback_from_less_than_a_year_was_scaled() {
        let note = "payback scales the savings of 30 days to a year";
        assert!(chart_svg(&report(30)).unwrap().contains(note));
        assert!(!chart_svg(&report(365)).unwrap().contains("payback scales"));
    }
}
