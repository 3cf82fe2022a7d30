//! Charts of a run, as SVG: for up to a few weeks, the power flows over time (house and
//! each diverted load stacked, PV as a line above them, the grid below zero when
//! exporting, the battery, the inverter limit, and the tank temperature on its own
//! axis); for longer runs, monthly bars of import, export and diverted energy against
//! the tariff's block thresholds.

use std::path::Path;

use plotters::coord::Shift;
use plotters::prelude::*;

use super::OfflineError;
use super::report::Report;
use super::run::{RunOutput, Trace};
use crate::config::model::Site;
use crate::config::tariff::Tariff;

/// Colours: calm, distinguishable, readable on white (our own palette).
const HOUSE: RGBColor = RGBColor(170, 170, 170);
const PV: RGBColor = RGBColor(230, 160, 0);
const GRID: RGBColor = RGBColor(200, 40, 40);
const EXPORT: RGBColor = RGBColor(40, 150, 70);
const BATTERY: RGBColor = RGBColor(110, 70, 170);
const LIMIT: RGBColor = RGBColor(90, 90, 90);
const TANK: RGBColor = RGBColor(220, 90, 40);
const LOADS: [RGBColor; 6] = [
    RGBColor(60, 120, 200),
    RGBColor(80, 180, 200),
    RGBColor(150, 200, 90),
    RGBColor(240, 120, 150),
    RGBColor(120, 100, 200),
    RGBColor(200, 170, 80),
];

fn err(e: impl std::fmt::Display) -> OfflineError {
    OfflineError::Chart(e.to_string())
}

/// Writes the chart that suits the run's length.
pub fn write(
    path: &Path,
    site: &Site,
    tariff: Option<&Tariff>,
    report: &Report,
    run: &RunOutput,
) -> Result<(), OfflineError> {
    let svg = if run.months.len() > 1 && report.run.days > 45 {
        monthly(site, tariff, report)?
    } else {
        let trace = run.trace.as_ref().ok_or_else(|| err("no time series was recorded"))?;
        flows(site, report, trace)?
    };
    std::fs::write(path, svg).map_err(|source| OfflineError::Write { path: path.to_path_buf(), source })
}

fn title(report: &Report, what: &str) -> String {
    let r = &report.run;
    if r.from == r.to {
        format!("{} — {what}, {} ({} weather)", r.site, r.from, r.weather)
    } else {
        format!("{} — {what}, {} to {} ({} weather)", r.site, r.from, r.to, r.weather)
    }
}

/// Power flows over time.
pub fn flows(site: &Site, report: &Report, trace: &Trace) -> Result<String, OfflineError> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (1200, 640)).into_drawing_area();
        root.fill(&WHITE).map_err(err)?;
        draw_flows(&root, site, report, trace)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}

fn draw_flows(
    root: &DrawingArea<SVGBackend<'_>, Shift>,
    site: &Site,
    report: &Report,
    trace: &Trace,
) -> Result<(), OfflineError> {
    if trace.t_ms.len() < 2 {
        return Err(err("the run is too short to chart"));
    }
    let tz = site.timezone;
    let t0 = trace.t_ms[0];
    let hours: Vec<f64> = trace.t_ms.iter().map(|t| (t - t0) as f64 / 3_600_000.0).collect();
    let span_h = hours.last().copied().unwrap_or(24.0).max(1.0);
    let kw = |w: f64| w / 1000.0;
    // Stacked consumption: house, then each load in priority order.
    let n = hours.len();
    let mut stack: Vec<Vec<f64>> = Vec::new();
    let mut base = trace.house_w.iter().map(|w| kw(*w)).collect::<Vec<_>>();
    stack.push(base.clone());
    for (_, series) in &trace.loads {
        base = base.iter().zip(series).map(|(b, w)| b + kw(*w)).collect();
        stack.push(base.clone());
    }
    let top = stack.last().cloned().unwrap_or_default();
    let pv: Vec<f64> = trace.pv_w.iter().map(|w| kw(*w)).collect();
    let grid: Vec<f64> = trace.grid_w.iter().map(|w| kw(*w)).collect();
    let battery: Vec<f64> = trace.battery_w.iter().map(|w| kw(*w)).collect();
    let y_max = top.iter().chain(&pv).chain(&grid).cloned().fold(1.0, f64::max) * 1.12;
    let y_min = grid.iter().chain(&battery).cloned().fold(0.0, f64::min).min(-0.2) * 1.15;
    let has_tank = trace.tank_c.iter().any(|t| t.is_finite());

    let local_start = crate::units::Timestamp(t0).to_utc().with_timezone(&tz);
    let label_hour = |h: &f64| {
        let t = local_start + chrono::Duration::seconds((*h * 3600.0) as i64);
        if span_h > 30.0 { t.format("%a %d %Hh").to_string() } else { t.format("%H:%M").to_string() }
    };

    let mut chart = ChartBuilder::on(root)
        .caption(title(report, "power flows"), ("sans-serif", 22))
        .margin(14)
        .x_label_area_size(36)
        .y_label_area_size(56)
        .right_y_label_area_size(if has_tank { 56 } else { 10 })
        .build_cartesian_2d(0.0..span_h, y_min..y_max)
        .map_err(err)?
        .set_secondary_coord(0.0..span_h, 0.0..90.0);
    chart
        .configure_mesh()
        .x_labels(if span_h > 30.0 { 8 } else { 12 })
        .x_label_formatter(&label_hour)
        .y_desc("power (kW)")
        .y_label_formatter(&|v| format!("{v:.1}"))
        .light_line_style(RGBColor(235, 235, 235))
        .draw()
        .map_err(err)?;
    if has_tank {
        chart
            .configure_secondary_axes()
            .y_desc("tank temperature (°C)")
            .y_label_formatter(&|v| format!("{v:.0}"))
            .draw()
            .map_err(err)?;
    }
    // Stacked areas, from the top down so lower layers paint over.
    let mut layers: Vec<(String, RGBColor, &Vec<f64>)> = Vec::new();
    layers.push(("house".to_owned(), HOUSE, &stack[0]));
    for (i, (name, _)) in trace.loads.iter().enumerate() {
        layers.push((name.clone(), LOADS[i % LOADS.len()], &stack[i + 1]));
    }
    for (name, colour, series) in layers.iter().rev() {
        let pts: Vec<(f64, f64)> = hours.iter().cloned().zip(series.iter().cloned()).collect();
        let colour = *colour;
        chart
            .draw_series(AreaSeries::new(pts, 0.0, colour.mix(0.75)).border_style(colour.stroke_width(1)))
            .map_err(err)?
            .label(name.clone())
            .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], colour.filled()));
    }
    // Grid: import above zero in red, export below zero in green.
    let exported: Vec<(f64, f64)> = hours.iter().cloned().zip(grid.iter().map(|g| g.min(0.0))).collect();
    chart
        .draw_series(AreaSeries::new(exported, 0.0, EXPORT.mix(0.35)).border_style(EXPORT.stroke_width(1)))
        .map_err(err)?
        .label("export")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], EXPORT.mix(0.6).filled()));
    chart
        .draw_series(LineSeries::new(hours.iter().cloned().zip(grid.iter().cloned()), GRID.stroke_width(1)))
        .map_err(err)?
        .label("grid (import +)")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 14, y)], GRID.stroke_width(2)));
    if battery.iter().any(|b| b.abs() > 1e-3) {
        chart
            .draw_series(LineSeries::new(hours.iter().cloned().zip(battery.iter().cloned()), BATTERY.stroke_width(2)))
            .map_err(err)?
            .label("battery (charging +)")
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 14, y)], BATTERY.stroke_width(2)));
    }
    if trace.limit_w.iter().any(|l| l.is_finite()) {
        let segments: Vec<(f64, f64)> =
            hours.iter().zip(&trace.limit_w).filter(|(_, l)| l.is_finite()).map(|(h, l)| (*h, kw(*l))).collect();
        chart
            .draw_series(segments.iter().map(|&(h, l)| Circle::new((h, l), 1, LIMIT.filled())))
            .map_err(err)?
            .label("inverter limit")
            .legend(|(x, y)| Circle::new((x + 7, y), 2, LIMIT.filled()));
    }
    chart
        .draw_series(LineSeries::new(hours.iter().cloned().zip(pv.iter().cloned()), PV.stroke_width(3)))
        .map_err(err)?
        .label("PV")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 14, y)], PV.stroke_width(3)));
    if has_tank {
        let pts: Vec<(f64, f64)> =
            hours.iter().cloned().zip(trace.tank_c.iter().cloned()).filter(|(_, t)| t.is_finite()).collect();
        chart
            .draw_secondary_series(LineSeries::new(pts, ShapeStyle::from(&TANK).stroke_width(2)))
            .map_err(err)?
            .label("tank °C")
            .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 14, y)], TANK.stroke_width(2)));
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::UpperLeft)
        .background_style(WHITE.mix(0.85))
        .border_style(RGBColor(200, 200, 200))
        .label_font(("sans-serif", 13))
        .draw()
        .map_err(err)?;
    let _ = n;
    Ok(())
}

/// Monthly bars of import, export and diverted energy with the tariff's block thresholds.
pub fn monthly(_site: &Site, tariff: Option<&Tariff>, report: &Report) -> Result<String, OfflineError> {
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (1200, 600)).into_drawing_area();
        root.fill(&WHITE).map_err(err)?;
        let months = &report.months;
        let n = months.len();
        let thresholds = tariff.map(Tariff::block_thresholds).unwrap_or_default();
        let y_max = months
            .iter()
            .flat_map(|m| [m.import_kwh, m.export_kwh, m.diverted_kwh, m.baseline_import_kwh])
            .chain(thresholds.iter().cloned())
            .fold(10.0, f64::max)
            * 1.15;
        let mut chart = ChartBuilder::on(&root)
            .caption(title(report, "energy per month"), ("sans-serif", 22))
            .margin(14)
            .x_label_area_size(36)
            .y_label_area_size(60)
            .build_cartesian_2d(0.0..n as f64, 0.0..y_max)
            .map_err(err)?;
        let labels: Vec<String> = months.iter().map(|m| m.month.clone()).collect();
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(n.max(1))
            .x_label_formatter(&|x| labels.get(x.floor() as usize).cloned().unwrap_or_default())
            .y_desc("energy (kWh)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(err)?;
        let bar = |i: usize, slot: usize, value: f64, colour: RGBColor| {
            let x0 = i as f64 + 0.1 + slot as f64 * 0.2;
            Rectangle::new([(x0, 0.0), (x0 + 0.18, value)], colour.filled())
        };
        let series: [(&str, RGBColor, Box<dyn Fn(&super::report::MonthReport) -> f64>); 4] = [
            ("import", GRID, Box::new(|m| m.import_kwh)),
            ("import without diversion", RGBColor(240, 170, 170), Box::new(|m| m.baseline_import_kwh)),
            ("export", EXPORT, Box::new(|m| m.export_kwh)),
            ("diverted", LOADS[0], Box::new(|m| m.diverted_kwh)),
        ];
        for (slot, (name, colour, get)) in series.iter().enumerate() {
            let c = *colour;
            chart
                .draw_series(months.iter().enumerate().map(|(i, m)| bar(i, slot, get(m), c)))
                .map_err(err)?
                .label(*name)
                .legend(move |(x, y)| Rectangle::new([(x, y - 5), (x + 14, y + 5)], c.filled()));
        }
        for (k, t) in thresholds.iter().enumerate() {
            chart
                .draw_series(LineSeries::new([(0.0, *t), (n as f64, *t)], LIMIT.stroke_width(1)))
                .map_err(err)?
                .label(if k == 0 { "tariff block thresholds" } else { "" })
                .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 14, y)], LIMIT.stroke_width(1)));
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::UpperRight)
            .background_style(WHITE.mix(0.85))
            .border_style(RGBColor(200, 200, 200))
            .label_font(("sans-serif", 13))
            .draw()
            .map_err(err)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}
