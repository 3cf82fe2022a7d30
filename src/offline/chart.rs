//! Charts of a run, as SVG: for up to a few weeks, the power flows over time (house and
//! each diverted load stacked, PV as a line above them, the grid below zero when
//! exporting, the battery, the inverter limit, and the tank temperature on its own
//! axis); for longer runs, monthly bars of import, export and diverted energy against
//! the tariff's block thresholds.

use std::path::Path;

use plotters::coord::Shift;
use plotters::coord::ranged1d::{DefaultFormatting, KeyPointHint, Ranged};
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};

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
/// Hot water that came out colder than asked for: a cold blue against the tank's orange.
const LUKEWARM: RGBColor = RGBColor(30, 110, 200);
const LOADS: [RGBColor; 6] = [
    RGBColor(60, 120, 200),
    RGBColor(80, 180, 200),
    RGBColor(150, 200, 90),
    RGBColor(240, 120, 150),
    RGBColor(120, 100, 200),
    RGBColor(200, 170, 80),
];

/// Width of the monthly chart's right margin, where the block thresholds are named.
const BLOCK_LABEL_PX: u32 = 96;

/// Most month labels on the monthly chart's axis (more months label every k-th).
const MAX_MONTH_LABELS: usize = 14;

/// A monthly series whose largest month is below this fraction of the axis is not drawn.
const VISIBLE_FRACTION: f64 = 0.005;

/// PV below this is "the array is not producing": no inverter limit is drawn there.
const PV_SHOWN_W: f64 = 10.0;

/// Most samples a flows chart needs: about two per pixel of its 1200 px width.
const MAX_TRACE_SAMPLES: u64 = 2400;

/// The sampling interval of the time series behind a flows chart of `days` days (the
/// chart averages over it): the shortest of 1, 2, 5, 10, 15, 20, 30 or 60 minutes (each
/// divides an hour) that keeps the run within `MAX_TRACE_SAMPLES` samples — one minute
/// for one day, two for two or three days, five for four to eight days (a week), coarser
/// for longer runs.
pub fn trace_interval(days: u32) -> std::time::Duration {
    let needed_min = (u64::from(days) * 1440).div_ceil(MAX_TRACE_SAMPLES);
    let minutes = [1, 2, 5, 10, 15, 20, 30, 60].into_iter().find(|&m| m >= needed_min).unwrap_or(60);
    std::time::Duration::from_secs(minutes * 60)
}

/// A linear f64 axis with tick marks where we put them. (plotters' own `with_key_points`
/// wrapper loses the f64 label formatter, so `configure_mesh` refuses it.) The sweep's
/// two panels share one, so a value sits at the same x in both.
pub struct Ticked {
    range: std::ops::Range<f64>,
    bold: Vec<f64>,
    light: Vec<f64>,
}

impl Ticked {
    /// An axis over `range` with labelled (`bold`) and unlabelled (`light`) ticks.
    pub fn new(range: std::ops::Range<f64>, bold: Vec<f64>, light: Vec<f64>) -> Self {
        Ticked { range, bold, light }
    }
}

impl Ranged for Ticked {
    type ValueType = f64;
    type FormatOption = DefaultFormatting;

    fn map(&self, v: &f64, limit: (i32, i32)) -> i32 {
        let span = self.range.end - self.range.start;
        if span == 0.0 {
            return (limit.0 + limit.1) / 2;
        }
        let fraction = (v - self.range.start) / span;
        limit.0 + (fraction * f64::from(limit.1 - limit.0)).round() as i32
    }

    fn key_points<H: KeyPointHint>(&self, hint: H) -> Vec<f64> {
        if hint.weight().allow_light_points() { self.light.clone() } else { self.bold.clone() }
    }

    fn range(&self) -> std::ops::Range<f64> {
        self.range.clone()
    }
}

/// Where a time axis has its tick marks, in hours after its first sample.
struct TimeAxis {
    bold: Vec<f64>,
    light: Vec<f64>,
    day_labels: bool,
}

/// Tick marks of a time axis in hours after the first sample `t0_ms`, on whole local
/// hours (so they follow daylight-saving changes): bold with a label at local midnights
/// for runs longer than 30 h (light every 6 h), otherwise every 2 h (light every hour).
fn time_axis(tz: chrono_tz::Tz, t0_ms: i64, span_h: f64) -> TimeAxis {
    use chrono::Timelike;
    let day_labels = span_h > 30.0;
    let (bold_every, light_every) = if day_labels { (24, 6) } else { (2, 1) };
    let (mut bold, mut light) = (Vec::new(), Vec::new());
    // Every UTC quarter hour is looked at, so zones with half- and quarter-hour offsets
    // get their ticks on whole local hours too.
    const QUARTER_MS: i64 = 900_000;
    let end_ms = t0_ms + (span_h * 3_600_000.0) as i64;
    let mut t = t0_ms - t0_ms.rem_euclid(QUARTER_MS);
    while t <= end_ms {
        let local = crate::units::Timestamp(t).to_utc().with_timezone(&tz);
        let h = (t - t0_ms) as f64 / 3_600_000.0;
        if t >= t0_ms && local.minute() == 0 {
            if local.hour().is_multiple_of(bold_every) {
                bold.push(h);
            } else if local.hour().is_multiple_of(light_every) {
                light.push(h);
            }
        }
        t += QUARTER_MS;
    }
    TimeAxis { bold, light, day_labels }
}

/// `2026-06` → `Jun 2026` (anything else is shown as it is).
fn month_label(month: &str) -> String {
    chrono::NaiveDate::parse_from_str(&format!("{month}-01"), "%Y-%m-%d")
        .map_or_else(|_| month.to_owned(), |d| d.format("%b %Y").to_string())
}

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

/// Width of a flows chart, and the height of its plot (the legend adds rows below).
const FLOWS_SIZE: (u32, u32) = (1200, 640);
/// Legends sit in rows below their plot (the flows and monthly charts here, the sweep's
/// panels in `spillway sweep`): entries per row, and each row's height in pixels.
const LEGEND_COLUMNS: usize = 4;
/// See [`LEGEND_COLUMNS`].
pub const LEGEND_ROW_PX: u32 = 22;

/// Power flows over time, with the legend in rows below the plot, where it hides nothing.
pub fn flows(site: &Site, report: &Report, trace: &Trace) -> Result<String, OfflineError> {
    // The canvas is sized before the series are drawn, and which series there are (a
    // battery, a limit, a layered tank, cold showers) is decided while drawing them. So
    // draw once with room for every entry the chart can have, and again with the rows
    // the legend turned out to need unless that first drawing already fits.
    let most = (trace.loads.len() + 9).div_ceil(LEGEND_COLUMNS);
    let (svg, entries) = flows_with_legend_rows(site, report, trace, most)?;
    let rows = entries.div_ceil(LEGEND_COLUMNS);
    if rows == most { Ok(svg) } else { Ok(flows_with_legend_rows(site, report, trace, rows)?.0) }
}

/// The flows chart with `rows` rows of legend below the plot, and the legend's count.
fn flows_with_legend_rows(
    site: &Site,
    report: &Report,
    trace: &Trace,
    rows: usize,
) -> Result<(String, usize), OfflineError> {
    let mut svg = String::new();
    let entries;
    {
        let (width, plot_h) = FLOWS_SIZE;
        let height = plot_h + 8 + rows as u32 * LEGEND_ROW_PX;
        let root = SVGBackend::with_string(&mut svg, (width, height)).into_drawing_area();
        root.fill(&WHITE).map_err(err)?;
        let (plot, strip) = root.split_vertically(plot_h);
        let legend = draw_flows(&plot, site, report, trace)?;
        draw_legend(&strip, &legend)?;
        entries = legend.len();
        root.present().map_err(err)?;
    }
    Ok((svg, entries))
}

/// How a legend entry shows its series.
pub enum Glyph {
    /// A filled area.
    Swatch(RGBAColor),
    /// A line of this width.
    Line(RGBColor, u32),
    /// A dashed line.
    Dashes(RGBColor),
    /// Dots.
    Dot(RGBColor),
    /// Triangular marks.
    Mark(RGBColor),
}

/// Draws `entries` in rows of [`LEGEND_COLUMNS`] across `area`, left to right.
pub fn draw_legend(area: &DrawingArea<SVGBackend<'_>, Shift>, entries: &[(String, Glyph)]) -> Result<(), OfflineError> {
    let (width, _) = area.dim_in_pixel();
    let left = 70; // under the plot, past the power axis's labels
    let column = (width as i32 - left - 70) / LEGEND_COLUMNS as i32;
    let font = ("sans-serif", 13).into_font().color(&BLACK).pos(Pos::new(HPos::Left, VPos::Center));
    for (i, (label, glyph)) in entries.iter().enumerate() {
        let x = left + column * (i % LEGEND_COLUMNS) as i32;
        let y = 4 + (LEGEND_ROW_PX as i32) * (i / LEGEND_COLUMNS) as i32 + LEGEND_ROW_PX as i32 / 2;
        match glyph {
            Glyph::Swatch(c) => area.draw(&Rectangle::new([(x, y - 5), (x + 14, y + 5)], c.filled())),
            Glyph::Line(c, w) => area.draw(&PathElement::new(vec![(x, y), (x + 14, y)], c.stroke_width(*w))),
            Glyph::Dashes(c) => area
                .draw(&PathElement::new(vec![(x, y), (x + 5, y)], c.stroke_width(2)))
                .and_then(|_| area.draw(&PathElement::new(vec![(x + 9, y), (x + 14, y)], c.stroke_width(2)))),
            Glyph::Dot(c) => area.draw(&Circle::new((x + 7, y), 2, c.filled())),
            Glyph::Mark(c) => area.draw(&TriangleMarker::new((x + 7, y), 4, c.filled())),
        }
        .map_err(err)?;
        area.draw(&Text::new(label.clone(), (x + 20, y), font.clone())).map_err(err)?;
    }
    Ok(())
}

/// Draws the flows on `root` and returns the legend's entries, in drawing order.
fn draw_flows(
    root: &DrawingArea<SVGBackend<'_>, Shift>,
    site: &Site,
    report: &Report,
    trace: &Trace,
) -> Result<Vec<(String, Glyph)>, OfflineError> {
    let mut legend: Vec<(String, Glyph)> = Vec::new();
    if trace.t_ms.len() < 2 {
        return Err(err("the run is too short to chart"));
    }
    let tz = site.timezone;
    let t0 = trace.t_ms[0];
    let hours: Vec<f64> = trace.t_ms.iter().map(|t| (t - t0) as f64 / 3_600_000.0).collect();
    let span_h = hours.last().copied().unwrap_or(24.0).max(1.0);
    let kw = |w: f64| w / 1000.0;
    // Stacked consumption: house, then each load in priority order.
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

    let axis = time_axis(tz, t0, span_h);
    let day_labels = axis.day_labels;
    // A day's label ("Tue 07 Jul") needs about 90 px; the plot is about 1,100 px wide.
    // Every day keeps its gridline, but over a month only every few days is named, or
    // the labels run into each other.
    let days = (span_h / 24.0).ceil().max(1.0);
    let label_every = (days * 90.0 / 1100.0).ceil().max(1.0) as i64;
    let label_hour = |h: &f64| {
        let t = crate::units::Timestamp(t0 + (*h * 3_600_000.0).round() as i64).to_utc().with_timezone(&tz);
        if !day_labels {
            return t.format("%H:%M").to_string();
        }
        let day = (*h / 24.0).round() as i64;
        if day % label_every == 0 { t.format("%a %d %b").to_string() } else { String::new() }
    };

    let mut chart = ChartBuilder::on(root)
        .caption(title(report, "power flows"), ("sans-serif", 22))
        .margin(14)
        .x_label_area_size(36)
        .y_label_area_size(56)
        .right_y_label_area_size(if has_tank { 56 } else { 10 })
        .build_cartesian_2d(Ticked::new(0.0..span_h, axis.bold, axis.light), y_min..y_max)
        .map_err(err)?
        .set_secondary_coord(0.0..span_h, 0.0..90.0);
    chart
        .configure_mesh()
        .x_label_formatter(&label_hour)
        .y_desc("power (kW)")
        .y_label_formatter(&|v| format!("{v:.1}"))
        .light_line_style(RGBColor(235, 235, 235))
        .bold_line_style(RGBColor(200, 200, 200))
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
            .map_err(err)?;
        legend.push((name.clone(), Glyph::Swatch(colour.to_rgba())));
    }
    // Grid: import above zero in red, export below zero in green.
    let exported: Vec<(f64, f64)> = hours.iter().cloned().zip(grid.iter().map(|g| g.min(0.0))).collect();
    chart
        .draw_series(AreaSeries::new(exported, 0.0, EXPORT.mix(0.35)).border_style(EXPORT.stroke_width(1)))
        .map_err(err)?;
    legend.push(("export".to_owned(), Glyph::Swatch(EXPORT.mix(0.6))));
    chart
        .draw_series(LineSeries::new(hours.iter().cloned().zip(grid.iter().cloned()), GRID.stroke_width(1)))
        .map_err(err)?;
    legend.push(("grid (import +)".to_owned(), Glyph::Line(GRID, 2)));
    if battery.iter().any(|b| b.abs() > 1e-3) {
        chart
            .draw_series(LineSeries::new(hours.iter().cloned().zip(battery.iter().cloned()), BATTERY.stroke_width(2)))
            .map_err(err)?;
        legend.push(("battery (charging +)".to_owned(), Glyph::Line(BATTERY, 2)));
    }
    if trace.limit_w.iter().any(|l| l.is_finite()) {
        // Only while the array produces: a limit held overnight says nothing.
        let segments: Vec<(f64, f64)> = hours
            .iter()
            .zip(&trace.limit_w)
            .zip(&trace.pv_w)
            .filter(|((_, l), pv)| l.is_finite() && **pv > PV_SHOWN_W)
            .map(|((h, l), _)| (*h, kw(*l)))
            .collect();
        chart.draw_series(segments.iter().map(|&(h, l)| Circle::new((h, l), 1, LIMIT.filled()))).map_err(err)?;
        legend.push(("inverter limit".to_owned(), Glyph::Dot(LIMIT)));
    }
    chart
        .draw_series(LineSeries::new(hours.iter().cloned().zip(pv.iter().cloned()), PV.stroke_width(3)))
        .map_err(err)?;
    legend.push(("PV".to_owned(), Glyph::Line(PV, 3)));
    if has_tank {
        // A layered tank's top, what the taps get, beside its sensor's reading (which may
        // sit low, where the inflow chills it); for one node the two are the same line.
        let top: &[f64] = if trace.tank_top_c.len() == trace.tank_c.len() { &trace.tank_top_c } else { &trace.tank_c };
        let layered = top.iter().zip(&trace.tank_c).any(|(a, b)| (a - b).abs() > 0.05);
        let pts: Vec<(f64, f64)> =
            hours.iter().cloned().zip(trace.tank_c.iter().cloned()).filter(|(_, t)| t.is_finite()).collect();
        chart.draw_secondary_series(LineSeries::new(pts, ShapeStyle::from(&TANK).stroke_width(2))).map_err(err)?;
        let label = if layered { "tank °C (at its sensor)" } else { "tank °C" };
        legend.push((label.to_owned(), Glyph::Line(TANK, 2)));
        if layered {
            let pts: Vec<(f64, f64)> =
                hours.iter().cloned().zip(top.iter().cloned()).filter(|(_, t)| t.is_finite()).collect();
            chart
                .draw_secondary_series(DashedLineSeries::new(pts, 6, 4, ShapeStyle::from(&TANK).stroke_width(2)))
                .map_err(err)?;
            legend.push(("tank top °C (what the taps get)".to_owned(), Glyph::Dashes(TANK)));
        }
        // Where a draw got water colder than it asked for, a mark on the line of what the
        // taps get (a sample with less than half a litre of it is left unmarked).
        let cold: Vec<(f64, f64)> = hours
            .iter()
            .zip(top)
            .zip(&trace.lukewarm_l)
            .filter(|((_, t), l)| t.is_finite() && **l >= 0.5)
            .map(|((h, t), _)| (*h, *t))
            .collect();
        if !cold.is_empty() {
            chart
                .draw_secondary_series(cold.iter().map(|&(h, t)| TriangleMarker::new((h, t), 4, LUKEWARM.filled())))
                .map_err(err)?;
            legend.push(("hot water colder than asked for".to_owned(), Glyph::Mark(LUKEWARM)));
        }
    }
    Ok(legend)
}

/// Monthly bars of import, export and diverted energy with the tariff's block thresholds.
pub fn monthly(_site: &Site, tariff: Option<&Tariff>, report: &Report) -> Result<String, OfflineError> {
    let mut svg = String::new();
    {
        // At most five legend entries (four series and the block thresholds): two rows.
        let (width, plot_h) = (1200, 600);
        let root = SVGBackend::with_string(&mut svg, (width, plot_h + 8 + 2 * LEGEND_ROW_PX)).into_drawing_area();
        root.fill(&WHITE).map_err(err)?;
        let (plot, strip) = root.split_vertically(plot_h);
        let mut legend: Vec<(String, Glyph)> = Vec::new();
        let months = &report.months;
        let n = months.len();
        let thresholds = tariff.map(Tariff::block_thresholds).unwrap_or_default();
        let y_max = months
            .iter()
            .flat_map(|m| [m.import_kwh, m.export_kwh, m.diverted_kwh, m.baseline_import_kwh])
            .chain(thresholds.iter().cloned())
            .fold(10.0, f64::max)
            * 1.15;
        // One labelled tick at the middle of each month's group (every k-th month on
        // long runs).
        let every = n.div_ceil(MAX_MONTH_LABELS).max(1);
        let centres: Vec<f64> = (0..n).step_by(every).map(|i| i as f64 + 0.5).collect();
        let mut chart = ChartBuilder::on(&plot)
            .caption(title(report, "energy per month"), ("sans-serif", 22))
            .margin(14)
            .x_label_area_size(36)
            .y_label_area_size(60)
            // The block thresholds are named in a margin right of the bars, where they
            // cover none of them (a margin, not a label area: a right label area repeats
            // the energy axis there, under the block names).
            .margin_right(if thresholds.is_empty() { 14 } else { BLOCK_LABEL_PX })
            .build_cartesian_2d(Ticked::new(0.0..n as f64, centres, Vec::new()), 0.0..y_max)
            .map_err(err)?;
        // A month the run covered only in part says how many days it had: its bars are
        // not a month's.
        let labels: Vec<String> =
            months
                .iter()
                .map(|m| {
                    if m.partial() {
                        format!("{} ({} d)", month_label(&m.month), m.days)
                    } else {
                        month_label(&m.month)
                    }
                })
                .collect();
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_label_formatter(&|x| labels.get(x.floor() as usize).cloned().unwrap_or_default())
            .y_desc("energy (kWh)")
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(err)?;
        type Pick = fn(&super::report::MonthReport) -> f64;
        let series: [(&str, RGBColor, Pick); 4] = [
            ("import", GRID, |m| m.import_kwh),
            ("import without diversion", RGBColor(240, 170, 170), |m| m.baseline_import_kwh),
            ("export", EXPORT, |m| m.export_kwh),
            ("diverted", LOADS[0], |m| m.diverted_kwh),
        ];
        // A series too small to see in any month (export at a zero-export site, a few Wh
        // while the guard responds) gets no slot, only a legend line giving its largest
        // month, so each month's bars stay together.
        let largest: Vec<f64> = series.iter().map(|(_, _, get)| months.iter().map(get).fold(0.0, f64::max)).collect();
        let shown: Vec<bool> = largest.iter().map(|m| *m >= VISIBLE_FRACTION * y_max).collect();
        let slots = shown.iter().filter(|s| **s).count().max(1);
        let width = 0.8 / slots as f64;
        let mut slot = 0;
        for (((name, colour, get), shown), largest) in series.iter().zip(&shown).zip(&largest) {
            let c = *colour;
            if !shown {
                legend.push((format!("{name}: at most {largest:.1} kWh a month"), Glyph::Swatch(c.mix(0.3))));
                continue;
            }
            let x_of = |i: usize| i as f64 + 0.1 + slot as f64 * width;
            chart
                .draw_series(
                    months
                        .iter()
                        .enumerate()
                        .map(|(i, m)| Rectangle::new([(x_of(i), 0.0), (x_of(i) + width * 0.9, get(m))], c.filled())),
                )
                .map_err(err)?;
            legend.push(((*name).to_owned(), Glyph::Swatch(c.to_rgba())));
            slot += 1;
        }
        // Block thresholds: one legend entry, and each line says where its block starts.
        for (k, t) in thresholds.iter().enumerate() {
            chart.draw_series(LineSeries::new([(0.0, *t), (n as f64, *t)], LIMIT.stroke_width(1))).map_err(err)?;
            if k == 0 {
                legend.push(("tariff block thresholds".to_owned(), Glyph::Line(LIMIT, 1)));
            }
            // Where the block starts, in the right margin at the line's height.
            let (x, y) = chart.backend_coord(&(n as f64, *t));
            let style =
                TextStyle::from(("sans-serif", 12).into_font()).color(&LIMIT).pos(Pos::new(HPos::Left, VPos::Center));
            plot.draw(&Text::new(format!("block {}", k + 2), (x + 6, y - 7), style.clone())).map_err(err)?;
            plot.draw(&Text::new(format!("from {t:.0} kWh"), (x + 6, y + 7), style)).map_err(err)?;
        }
        draw_legend(&strip, &legend)?;
        root.present().map_err(err)?;
    }
    Ok(svg)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::offline::report::{self, RunInfo};
    use crate::offline::run::MonthFigures;

    fn example() -> crate::config::Loaded {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("config/zero-export-house.yaml");
        crate::config::load_file(&path).unwrap_or_else(|e| panic!("{}", e.render(false)))
    }

    fn info(site: &Site, days: u32) -> RunInfo {
        RunInfo {
            site: site.name.clone(),
            from: "2026-01-01".into(),
            to: "2026-12-31".into(),
            days,
            seed: 1,
            weather: "mixed".into(),
            step_s: 1.0,
        }
    }

    #[test]
    fn longer_runs_are_sampled_more_coarsely_on_whole_minutes() {
        let minutes = |days| trace_interval(days).as_secs() / 60;
        assert_eq!(minutes(1), 1);
        assert_eq!(minutes(3), 2);
        assert_eq!(minutes(7), 5);
        assert_eq!(minutes(45), 30);
        assert_eq!(minutes(1000), 60);
        for days in 1..=60 {
            assert!(u64::from(days) * 1440 / minutes(days) <= MAX_TRACE_SAMPLES, "{days} days");
            assert_eq!(60 % minutes(days), 0);
        }
    }

    #[test]
    fn day_ticks_fall_on_local_midnights_across_a_dst_change_and_in_half_hour_zones() {
        // Europe/Lisbon leaves summer time on 2026-10-25 (a 25 h day); Australia/Adelaide
        // is UTC+10:30 in summer (source: the IANA tz database through chrono-tz).
        for (zone, start) in [("Europe/Lisbon", "2026-10-24"), ("Australia/Adelaide", "2026-12-05")] {
            let tz: chrono_tz::Tz = zone.parse().unwrap();
            let date = chrono::NaiveDate::parse_from_str(start, "%Y-%m-%d").unwrap();
            let t0 = crate::offline::run::midnight(tz, date).unwrap() + 30_000;
            let axis = time_axis(tz, t0, 71.0);
            assert!(axis.day_labels);
            assert_eq!(axis.bold.len(), 2, "{zone}: {:?}", axis.bold);
            for h in &axis.bold {
                let t = crate::units::Timestamp(t0 + (h * 3_600_000.0).round() as i64).to_utc().with_timezone(&tz);
                assert_eq!(t.format("%H:%M").to_string(), "00:00", "{zone}");
            }
            let light_per_day = axis.light.len() as f64 / 3.0;
            assert!((2.5..=3.0).contains(&light_per_day), "{zone}: {light_per_day}");
        }
        let tz: chrono_tz::Tz = "Europe/Lisbon".parse().unwrap();
        let jan = chrono::NaiveDate::from_ymd_opt(2026, 1, 15).unwrap();
        let axis = time_axis(tz, crate::offline::run::midnight(tz, jan).unwrap(), 24.0);
        assert!(!axis.day_labels);
        assert_eq!(axis.bold.len(), 13, "00:00 to 24:00 every 2 h");
        assert_eq!(axis.light.len(), 12);
    }

    #[test]
    fn month_labels_read_as_words() {
        assert_eq!(month_label("2026-06"), "Jun 2026");
        assert_eq!(month_label("not a month"), "not a month");
    }

    #[test]
    fn monthly_bars_leave_out_a_series_too_small_to_see_and_name_each_block() {
        let loaded = example();
        let site = &loaded.site;
        let month = |m, import_wh, export_wh| MonthFigures {
            year: 2026,
            month: m,
            import_wh,
            export_wh,
            diverted_wh: 300_000.0,
            pv_wh: 500_000.0,
            cost: 40.0,
            days: 28,
        };
        let run = RunOutput { months: (1..=12).map(|m| month(m, 250_000.0, 120.0)).collect(), ..RunOutput::default() };
        let baseline =
            RunOutput { months: (1..=12).map(|m| month(m, 480_000.0, 0.0)).collect(), ..RunOutput::default() };
        let r = report::build(site, loaded.tariff.as_ref(), info(site, 365), &run, &baseline);
        let svg = monthly(site, loaded.tariff.as_ref(), &r).unwrap();
        assert!(svg.contains("export: at most 0.1 kWh a month"), "the tiny export has no bars");
        assert!(svg.contains("from 200 kWh") && svg.contains("from 450 kWh"));
        assert_eq!(svg.matches("tariff block thresholds").count(), 1, "one legend entry for all blocks");
        assert!(svg.contains("Jan 2026") && svg.contains("Dec 2026"));
        // Three series of twelve bars (import, import without diversion, diverted).
        let bars = svg.matches("<rect").count();
        assert!((36..=36 + 12).contains(&bars), "{bars} rectangles");
    }

    /// The block labels stand right of the last month's bars, where they cover none, and
    /// a month the run covered in part says how many days it had.
    #[test]
    fn block_labels_cover_no_bar_and_a_partial_month_says_its_days() {
        let loaded = example();
        let site = &loaded.site;
        let month = |m, days| MonthFigures {
            year: 2026,
            month: m,
            import_wh: 300_000.0,
            export_wh: 0.0,
            diverted_wh: 250_000.0,
            pv_wh: 500_000.0,
            cost: 40.0,
            days,
        };
        let run = RunOutput { months: vec![month(1, 31), month(2, 28), month(3, 16)], ..RunOutput::default() };
        let r = report::build(site, loaded.tariff.as_ref(), info(site, 75), &run, &run);
        let svg = monthly(site, loaded.tariff.as_ref(), &r).unwrap();
        assert!(svg.contains("Mar 2026 (16 d)") && svg.contains("Jan 2026") && !svg.contains("Jan 2026 ("), "{svg}");
        // Right edges of the bars, and where the block labels start.
        let attr = |tag: &str, name: &str| -> f64 {
            let v = &tag[tag.find(&format!(" {name}=\"")).unwrap() + name.len() + 3..];
            v[..v.find('"').unwrap()].parse().unwrap()
        };
        let bars_end = svg
            .split("<rect")
            .skip(1)
            .filter(|t| t.contains("width") && attr(t, "width") < 200.0)
            .map(|t| attr(t, "x") + attr(t, "width"))
            .fold(0.0, f64::max);
        for label in ["block 2", "from 200 kWh", "from 450 kWh"] {
            let end = svg.find(&format!(">\n{label}\n</text>")).unwrap_or_else(|| panic!("no {label:?}"));
            let start = svg[..end].rfind("<text").unwrap();
            assert!(attr(&svg[start..end], "x") > bars_end, "{label} over the bars (they end at {bars_end})");
        }
    }

    /// The flows chart of `trace` for a day of the example site.
    fn flows_svg(trace: &Trace) -> String {
        let loaded = example();
        let site = &loaded.site;
        let r = report::build(site, None, info(site, 1), &RunOutput::default(), &RunOutput::default());
        flows(site, &r, trace).unwrap()
    }

    /// Four samples an hour apart of a quiet night: no PV, 300 W of house from the grid,
    /// no tank, no limit (tests set what they look at).
    fn four_hours() -> Trace {
        Trace {
            t_ms: (0..4).map(|h| 1_781_481_600_000 + h * 3_600_000).collect(),
            pv_w: vec![0.0; 4],
            house_w: vec![300.0; 4],
            grid_w: vec![300.0; 4],
            battery_w: vec![0.0; 4],
            tank_c: vec![f64::NAN; 4],
            tank_top_c: vec![f64::NAN; 4],
            lukewarm_l: vec![0.0; 4],
            loads: Vec::new(),
            limit_w: vec![f64::NAN; 4],
        }
    }

    #[test]
    fn a_months_day_labels_do_not_run_into_each_other() {
        // 30 days, a sample every 3 h: every day keeps its gridline, but a label of about
        // 90 px needs that much room, so only every third day is named.
        let n = 30 * 8;
        let trace = Trace {
            t_ms: (0..n).map(|i| 1_781_481_600_000 + i as i64 * 3 * 3_600_000).collect(),
            pv_w: vec![0.0; n],
            house_w: vec![300.0; n],
            grid_w: vec![300.0; n],
            battery_w: vec![0.0; n],
            tank_c: vec![f64::NAN; n],
            tank_top_c: vec![f64::NAN; n],
            lukewarm_l: vec![0.0; n],
            loads: Vec::new(),
            limit_w: vec![f64::NAN; n],
        };
        let svg = flows_svg(&trace);
        let xs: Vec<f64> = svg
            .split("<text x=\"")
            .skip(1)
            .filter_map(|t| {
                let x: f64 = t.split('"').next()?.parse().ok()?;
                let label = t.split('>').nth(1)?.split('<').next()?.trim();
                let b = label.as_bytes();
                (b.len() == 10 && b[3] == b' ' && b[6] == b' ').then_some(x)
            })
            .collect();
        assert!(xs.len() >= 8 && xs.len() <= 11, "{} day labels", xs.len());
        assert!(xs.windows(2).all(|w| w[1] - w[0] >= 90.0), "{xs:?}");
    }

    #[test]
    fn the_inverter_limit_is_drawn_only_while_the_array_produces() {
        // Four samples an hour apart: two at night, two in sunshine, all with a limit.
        let trace = Trace {
            pv_w: vec![0.0, 0.0, 2500.0, 3000.0],
            grid_w: vec![300.0, 300.0, -100.0, 0.0],
            limit_w: vec![2000.0; 4],
            ..four_hours()
        };
        let svg = flows_svg(&trace);
        // Two limit dots plus the legend's.
        assert_eq!(svg.matches("<circle").count(), 3, "{svg}");
    }

    #[test]
    fn draws_colder_than_asked_for_are_marked_on_the_tank_line() {
        let trace = |lukewarm_l: Vec<f64>| Trace {
            tank_c: vec![45.0, 41.0, 38.0, 37.0],
            tank_top_c: vec![45.0, 41.0, 38.0, 37.0],
            lukewarm_l,
            ..four_hours()
        };
        let label = "hot water colder than asked for";
        assert!(!flows_svg(&trace(vec![0.0, 0.0, 0.2, 0.0])).contains(label), "under half a litre");
        let svg = flows_svg(&trace(vec![0.0, 0.0, 12.0, 6.0]));
        assert!(svg.contains(label), "{svg}");
        // Two marks plus the legend's, in the marks' own colour (LUKEWARM).
        assert_eq!(svg.matches("fill=\"#1E6EC8\"").count(), 3, "{svg}");
        assert!(!svg.contains("tank top"), "one node: the top is the sensor's line");
    }

    #[test]
    fn a_layered_tank_shows_its_top_beside_its_sensor() {
        // After a shower the sensor low in the tank reads the inflow's chill; the top
        // stays hot.
        let trace =
            Trace { tank_c: vec![60.0, 20.0, 19.0, 19.0], tank_top_c: vec![60.0, 60.0, 59.5, 59.0], ..four_hours() };
        let svg = flows_svg(&trace);
        assert!(svg.contains("tank top °C (what the taps get)"), "{svg}");
    }

    /// The flows chart's legend lies below its plot, where it covers no data: every
    /// label's text sits lower than the plot's height, in rows of four.
    #[test]
    fn the_legend_sits_below_the_plot() {
        let trace = Trace {
            pv_w: vec![0.0, 1500.0, 2500.0, 0.0],
            limit_w: vec![2000.0; 4],
            tank_c: vec![60.0, 20.0, 19.0, 19.0],
            tank_top_c: vec![60.0, 60.0, 59.5, 59.0],
            loads: vec![("water_heater".to_owned(), vec![0.0, 1000.0, 2000.0, 0.0])],
            ..four_hours()
        };
        let svg = flows_svg(&trace);
        // The y of the <text> element that shows `label`.
        let text_y = |label: &str| -> f64 {
            let end = svg.find(&format!(">\n{label}\n</text>")).unwrap_or_else(|| panic!("no {label:?} in {svg}"));
            let start = svg[..end].rfind("<text").unwrap();
            let y = &svg[start..end][svg[start..end].find(" y=\"").unwrap() + 4..];
            y[..y.find('"').unwrap()].parse().unwrap()
        };
        let labels =
            ["water_heater", "house", "export", "grid (import +)", "inverter limit", "PV", "tank °C (at its sensor)"];
        for label in labels {
            assert!(text_y(label) > f64::from(FLOWS_SIZE.1), "{label} at y {}", text_y(label));
        }
        // Rows of four: the fifth entry starts the second row.
        assert_eq!(text_y("grid (import +)"), text_y("water_heater"));
        assert!(text_y("inverter limit") > text_y("water_heater") + 10.0);
        // Eight entries (the heater, house, export, grid, limit, PV and the tank's two
        // lines) need two rows, and the canvas has just those below the plot.
        let height = |svg: &str| -> u32 {
            let h = &svg[svg.find("height=\"").unwrap() + 8..];
            h[..h.find('"').unwrap()].parse().unwrap()
        };
        assert_eq!(height(&svg), FLOWS_SIZE.1 + 8 + 2 * LEGEND_ROW_PX);
        assert_eq!(
            height(&flows_svg(&four_hours())),
            FLOWS_SIZE.1 + 8 + LEGEND_ROW_PX,
            "house, export, grid, PV: one row"
        );
    }
}
