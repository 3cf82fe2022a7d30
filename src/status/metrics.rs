//! `GET /metrics`: the status document in the OpenMetrics text format, for Prometheus
//! and anything else that scrapes it. Rendered with `prometheus-client` from the same
//! snapshot `/api/status` serves, at each scrape, so the two never disagree and the
//! control loop does no extra work per tick.
//!
//! Names carry their unit (`spillway_grid_watts`, `spillway_grid_import_joules_total`);
//! energy is in joules and time in seconds, as OpenMetrics asks (1 kWh = 3.6 MJ). A value
//! the site does not know at the moment (a stale meter, no limit in force) is left out
//! rather than given as a number it is not. Counters count from the daemon's start.

use std::borrow::Cow;
use std::fmt;
use std::sync::atomic::AtomicU64;

use prometheus_client::encoding::text::encode;
use prometheus_client::metrics::counter::Counter;
use prometheus_client::metrics::family::Family;
use prometheus_client::metrics::gauge::Gauge;
use prometheus_client::registry::{Metric, Registry, Unit};

use super::Status;

/// The media type of the exposition (OpenMetrics 1.0 text).
pub const CONTENT_TYPE: &str = "application/openmetrics-text; version=1.0.0; charset=utf-8";

/// Every mode the document can report, so a dashboard sees each as 0 or 1.
const MODES: [&str; 6] = ["starting", "normal", "failsafe", "recovering", "outage", "stopped"];

const WATTS: &str = "watts";
const JOULES_PER_WH: f64 = 3600.0;

type Labels = [(&'static str, String); 1];
type GaugeF = Gauge<f64, AtomicU64>;
type CounterF = Counter<f64, AtomicU64>;

/// The document as OpenMetrics text.
pub fn render(status: &Status) -> Result<String, fmt::Error> {
    let mut r = Registry::with_prefix_and_labels(
        "spillway",
        [(Cow::Borrowed("site"), Cow::Owned(escape(&status.site)))].into_iter(),
    );
    site(&mut r, status);
    loads(&mut r, status);
    links(&mut r, status);
    let mut out = String::new();
    encode(&mut out, &r)?;
    Ok(out)
}

fn gauge(v: f64) -> GaugeF {
    let g = GaugeF::default();
    g.set(v);
    g
}

fn counter(v: f64) -> CounterF {
    let c = CounterF::default();
    c.inc_by(v.max(0.0));
    c
}

fn watts(r: &mut Registry, name: &str, help: &str, value: Option<f64>) {
    if let Some(v) = value {
        r.register_with_unit(name, help, Unit::Other(WATTS.into()), gauge(v));
    }
}

/// A gauge per label value; `None` values are left out, and an empty family is not
/// registered at all.
fn gauges(
    r: &mut Registry,
    name: &str,
    help: &str,
    unit: Option<Unit>,
    label: &'static str,
    items: impl IntoIterator<Item = (String, Option<f64>)>,
) {
    let f = Family::<Labels, GaugeF>::default();
    let mut any = false;
    for (key, value) in items {
        if let Some(v) = value {
            f.get_or_create(&[(label, escape(&key))]).set(v);
            any = true;
        }
    }
    if any {
        register(r, name, help, unit, f);
    }
}

/// A counter per label value.
fn counters(
    r: &mut Registry,
    name: &str,
    help: &str,
    label: &'static str,
    items: impl IntoIterator<Item = (String, f64)>,
) {
    let f = Family::<Labels, CounterF>::default();
    let mut any = false;
    for (key, value) in items {
        f.get_or_create(&[(label, escape(&key))]).inc_by(value.max(0.0));
        any = true;
    }
    if any {
        register(r, name, help, None, f);
    }
}

/// A label value escaped as the OpenMetrics text format asks (`\\`, `\"`, `\n`):
/// `prometheus-client` 0.24 writes label values as they are, and a site name is free
/// text.
fn escape(value: &str) -> String {
    let mut out = String::with_capacity(value.len());
    for c in value.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '"' => out.push_str("\\\""),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
    out
}

fn register(r: &mut Registry, name: &str, help: &str, unit: Option<Unit>, metric: impl Metric) {
    match unit {
        Some(u) => r.register_with_unit(name, help, u, metric),
        None => r.register(name, help, metric),
    }
}

fn site(r: &mut Registry, s: &Status) {
    gauges(
        r,
        "mode",
        "1 for the mode the site is in (normal, failsafe, recovering, outage; starting before the first tick, stopped at shutdown), 0 for the others",
        None,
        "mode",
        MODES.iter().map(|m| ((*m).to_owned(), Some(if s.mode == *m { 1.0 } else { 0.0 }))),
    );
    watts(r, "grid", "grid power at the meter, import positive (absent while the meter is stale)", s.grid_w);
    watts(r, "pv", "PV inverter output (absent without a fresh PV reading)", s.pv_w);
    watts(
        r,
        "house",
        "the rest of the household: PV + grid − managed loads − a self-run battery's charging (absent unless all are fresh)",
        s.house_w,
    );
    watts(r, "surplus", "surplus the engine saw: export + managed loads on + PV held back by curtailment", s.surplus_w);
    if let Some(inv) = &s.inverter {
        watts(r, "inverter_rated", "the inverter's rated AC power (100 % of a limit)", Some(inv.rated_w));
        watts(r, "inverter_limit", "the inverter's active-power limit (absent while unlimited)", inv.limit_w);
        r.register(
            "inverter_limited",
            "1 while an active-power limit is in force",
            gauge(if inv.limit_w.is_some() { 1.0 } else { 0.0 }),
        );
    }
    let t = &s.totals;
    r.register_with_unit(
        "grid_import",
        "energy imported since start",
        Unit::Joules,
        counter(t.import_wh * JOULES_PER_WH),
    );
    r.register_with_unit(
        "grid_export",
        "energy exported since start",
        Unit::Joules,
        counter(t.export_wh * JOULES_PER_WH),
    );
    r.register_with_unit(
        "diverted",
        "energy drawn by the managed loads since start",
        Unit::Joules,
        counter(t.diverted_wh * JOULES_PER_WH),
    );
    r.register_with_unit(
        "export_over_limit",
        "time the grid reading showed export above the limit plus the guard's tolerance, since start",
        Unit::Seconds,
        counter(t.export_over_limit_s),
    );
    r.register(
        "failsafe_entries",
        "times the site went into fail-safe (a guard signal lost) after having been out of it",
        counter(t.failsafe_entries as f64),
    );
    r.register("ticks", "engine ticks since start", counter(t.ticks as f64));
    if let Some(log) = &s.replay_log {
        r.register(
            "replay_log_rows_written",
            "rows appended to the replay log since start",
            counter(log.rows_written as f64),
        );
        r.register(
            "replay_log_rows_waiting",
            "replay-log rows kept in memory because the file cannot be written (0 while it can)",
            gauge(log.rows_waiting as f64),
        );
    }
}

fn loads(r: &mut Registry, s: &Status) {
    let each = |f: &dyn Fn(&super::LoadStatus) -> f64| -> Vec<(String, Option<f64>)> {
        s.loads.iter().map(|l| (l.name.clone(), Some(f(l)))).collect()
    };
    gauges(r, "load_on", "1 while the load's command draws power", None, "load", each(&|l| f64::from(u8::from(l.on))));
    gauges(
        r,
        "load_power",
        "power the load draws: measured where it has a fresh power point, else what its command implies",
        Some(Unit::Other(WATTS.into())),
        "load",
        each(&|l| l.power_w),
    );
    gauges(
        r,
        "load_runtime_today",
        "run time since local midnight",
        Some(Unit::Seconds),
        "load",
        each(&|l| l.runtime_today_s),
    );
    counters(
        r,
        "load_switchings",
        "on/off and stage changes since start",
        "load",
        s.loads.iter().map(|l| (l.name.clone(), l.switchings as f64)),
    );
}

fn links(r: &mut Registry, s: &Status) {
    gauges(
        r,
        "point_fresh",
        "1 while the point's latest reading is fresh, 0 while it is stale, missing or frozen",
        None,
        "point",
        s.points.iter().map(|p| (p.name.clone(), Some(if p.quality == "fresh" { 1.0 } else { 0.0 }))),
    );
    gauges(
        r,
        "point_age",
        "age of the point's latest reading (absent before the first)",
        Some(Unit::Seconds),
        "point",
        s.points.iter().map(|p| (p.name.clone(), p.age_s)),
    );
    let devices = || s.devices.iter().chain(&s.broker);
    gauges(
        r,
        "device_up",
        "1 while the device answers (or the MQTT broker is connected), 0 while it is down as `down_reason` on the status page says (absent before its first report)",
        None,
        "device",
        devices().map(|d| (d.name.clone(), d.up.map(|u| f64::from(u8::from(u))))),
    );
    counters(
        r,
        "device_exceptions",
        "Modbus exception responses since start",
        "device",
        devices().map(|d| (d.name.clone(), d.exceptions as f64)),
    );
    counters(
        r,
        "device_malformed",
        "readings or payloads that could not be understood, since start",
        "device",
        devices().map(|d| (d.name.clone(), d.malformed as f64)),
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Label values are escaped as OpenMetrics asks (`\"`, `\\`, `\n`), so a site or load
    /// name cannot break the exposition.
    #[test]
    fn names_with_quotes_and_newlines_are_escaped_and_unknowns_left_out() {
        let status = Status {
            site: "Rose \"Mead\"\\\nEast".to_owned(),
            mode: "normal".to_owned(),
            grid_w: None,
            ..Status::default()
        };
        let text = render(&status).unwrap();
        assert!(text.contains(r#"site="Rose \"Mead\"\\\nEast""#), "{text}");
        assert!(!text.contains("spillway_grid_watts{"), "unknown grid power is left out:\n{text}");
        assert!(!text.contains("spillway_surplus_watts{"), "an unknown surplus is left out:\n{text}");
        let known = render(&Status { surplus_w: Some(250.0), ..status.clone() }).unwrap();
        assert!(known.contains("spillway_surplus_watts{"), "{known}");
        assert!(text.ends_with("# EOF\n"));
        assert!(!text.contains("replay_log"), "no replay log, no replay-log metrics:\n{text}");
        let logging = Status {
            replay_log: Some(super::super::ReplayLogStatus {
                file: "site.csv".to_owned(),
                rows_written: 12,
                rows_waiting: 3,
                error: Some("disk full".to_owned()),
            }),
            ..status.clone()
        };
        let text = render(&logging).unwrap();
        assert!(text.contains("spillway_replay_log_rows_written_total{site=") && text.contains("} 12"), "{text}");
        assert!(text.contains("spillway_replay_log_rows_waiting{site="), "{text}");
        for line in text.lines() {
            assert!(line.starts_with('#') || line.starts_with("spillway_"), "{line}");
        }
    }
}
