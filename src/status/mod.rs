//! The live state of a running site as one serialisable document: what `GET /api/status`
//! returns, what the status page and the demo's terminal view show.
//!
//! Built by the daemon's control task after every tick from the engine, the snapshot and
//! the links' health; read by anyone through a `watch` channel. Nothing here decides or
//! does I/O (the HTTP server is in [`http`]). Numbers are in base units named in the key
//! (`_w`, `_wh`, `_s`, `_c`), grid import positive; unknown values are `null`.

pub mod http;
pub mod metrics;

use std::time::Duration;

use serde::Serialize;

use crate::actuators::mqtt::{limit_word, mode_word};
use crate::config::model::{Connection, ExportPolicy, Load, LoadId, Obligation, PointId, Site};
use crate::engine::{Command, Engine, LimitReason, Quality, Snapshot};
use crate::units::{Power, Timestamp, format_duration, trim_number};

/// The whole document.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Status {
    /// Site name.
    pub site: String,
    /// Instant of the last tick (RFC 3339, UTC); `null` before the first tick.
    pub time: Option<String>,
    /// `starting` before the first tick, then `normal`, `failsafe`, `recovering`,
    /// `outage`, and `stopped` once the safe states have been dispatched at shutdown.
    pub mode: String,
    /// The export policy as a phrase: `forbidden`, `limited to 1.5 kW`, `allowed`,
    /// `off-grid`.
    pub export_policy: String,
    /// Grid power, import positive; `null` when the meter is stale.
    pub grid_w: Option<f64>,
    /// PV power; `null` when the site has no PV point or it is stale.
    pub pv_w: Option<f64>,
    /// The rest of the household (PV + grid − managed loads − a self-run battery's
    /// charging); `null` unless PV, grid and that battery's reading are fresh.
    pub house_w: Option<f64>,
    /// Surplus the engine saw: export plus what the managed loads draw plus the
    /// headroom hidden by curtailment.
    pub surplus_w: Option<f64>,
    /// The inverter's power limit; `null` when the site has no limit control.
    pub inverter: Option<InverterStatus>,
    /// Managed loads in priority order.
    pub loads: Vec<LoadStatus>,
    /// Energy counters since local midnight.
    pub today: TodayStatus,
    /// Every configured point with its latest value.
    pub points: Vec<PointStatus>,
    /// Device links.
    pub devices: Vec<DeviceStatus>,
    /// The MQTT broker connection, when the site has `mqtt:` (its `name` is the
    /// broker's address; `malformed` counts payloads no device claims, such as bad
    /// overrides on a site without MQTT devices).
    pub broker: Option<DeviceStatus>,
    /// The latest switchings and limit changes, newest last.
    pub recent: Vec<RecentEvent>,
    /// Counters since the daemon started.
    pub totals: Totals,
    /// The replay log (`run --replay-log`), when one is kept.
    pub replay_log: Option<ReplayLogStatus>,
}

/// How the replay log is doing.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct ReplayLogStatus {
    /// The CSV file.
    pub file: String,
    /// Rows appended since the daemon started.
    pub rows_written: u64,
    /// Rows waiting in memory because the file cannot be written (0 while it can).
    pub rows_waiting: u64,
    /// Why the last write failed, while writing fails; `null` while it works.
    pub error: Option<String>,
}

/// Counters since the daemon started (from zero at every start): what `/metrics`
/// exposes as counters.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct Totals {
    /// Engine ticks.
    pub ticks: u64,
    /// Times the site went into fail-safe after having been out of it.
    pub failsafe_entries: u64,
    /// Seconds the grid reading showed export above the limit plus the guard's
    /// tolerance (0 on a site whose export is allowed).
    pub export_over_limit_s: f64,
    /// How long export has been above the limit plus tolerance without a break, s;
    /// `null` while it is within the limit. Logged as a warning once it outlasts what
    /// the guard needs to clear it.
    pub over_limit_now_s: Option<f64>,
    /// Imported, by the engine's counters.
    pub import_wh: f64,
    /// Exported, by the engine's counters.
    pub export_wh: f64,
    /// Drawn by the managed loads, by the engine's counters.
    pub diverted_wh: f64,
    /// Switchings per load, in priority order (shown as each load's `switchings`).
    #[serde(skip)]
    pub load_switchings: Vec<u64>,
}

/// A switching or a change of the inverter limit, for people watching.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RecentEvent {
    /// When (RFC 3339, UTC).
    pub time: String,
    /// What happened, as a sentence (`water_heater off → on: started: ...`).
    pub text: String,
}

/// The inverter limit and why.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct InverterStatus {
    /// The limit; `null` when unlimited.
    pub limit_w: Option<f64>,
    /// Rated AC power (100 %).
    pub rated_w: f64,
    /// `none`, `export_guard`, `escalated`, `failsafe`.
    pub reason: String,
    /// The reason as a sentence.
    pub why: String,
}

/// One load.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LoadStatus {
    /// Name.
    pub name: String,
    /// Priority (1 first).
    pub priority: u32,
    /// `switched`, `stepped`, `proportional`, `charger`, `battery`.
    pub kind: String,
    /// The command as the engine prints it: `off`, `on`, `stage 2`, `45 %`, `16 A`,
    /// `charge 1.2 kW`.
    pub command: String,
    /// Whether the command draws power.
    pub on: bool,
    /// Power: measured where the load has a power point that is fresh, else what the
    /// command implies.
    pub power_w: f64,
    /// Whether `power_w` is measured.
    pub power_measured: bool,
    /// Stable reason code (`start_rule`, `min_on`, `failsafe`, ...).
    pub reason: String,
    /// The engine's explanation with the rule's current values; while the command
    /// cannot reach the load, followed by why (` — not delivered: …`).
    pub why: String,
    /// Whether the command can reach the load: `false` while a device it is written
    /// through is down (a relay module that does not answer, the MQTT broker lost), so
    /// the load may still be doing what it was last told.
    pub delivered: bool,
    /// An active override.
    pub r#override: Option<OverrideStatus>,
    /// Run time since local midnight, seconds.
    pub runtime_today_s: f64,
    /// Energy since local midnight.
    pub energy_today_wh: f64,
    /// Progress of the load's obligations.
    pub obligations: Vec<ObligationStatus>,
    /// On/off and stage changes since the daemon started.
    pub switchings: u64,
}

/// An override in force.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct OverrideStatus {
    /// The forced command.
    pub command: String,
    /// When it ends (RFC 3339, UTC).
    pub until: String,
}

/// Progress of one obligation today.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ObligationStatus {
    /// What it asks (`run 5 h a day`, `reach 60 °C by 17:00`).
    pub what: String,
    /// Progress as a phrase (`3.2 h of 5 h`, `54.1 °C of 60 °C`, `last cycle 2026-…`).
    pub progress: String,
    /// Progress as a fraction 0–1 where that makes sense: run time and state of charge.
    /// `null` for temperatures (45 °C of 55 °C is not 82 % of the way from cold water)
    /// and cycles.
    pub fraction: Option<f64>,
}

/// Energy since local midnight.
#[derive(Debug, Clone, Default, PartialEq, Serialize)]
pub struct TodayStatus {
    /// Imported.
    pub import_wh: f64,
    /// Exported.
    pub export_wh: f64,
    /// Drawn by the managed loads.
    pub diverted_wh: f64,
}

/// One point.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PointStatus {
    /// Name.
    pub name: String,
    /// Latest value in its base unit; `null` when never received or not a number.
    pub value: Option<f64>,
    /// The base unit (`W`, `°C`, `%`, ... ; empty for plain numbers and booleans).
    pub unit: String,
    /// `fresh`, `stale`, `missing` or `frozen`.
    pub quality: String,
    /// Age of the latest value in seconds; `null` when missing.
    pub age_s: Option<f64>,
}

/// One device link.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DeviceStatus {
    /// Name.
    pub name: String,
    /// `true` connected, `false` down, `null` not yet known.
    pub up: Option<bool>,
    /// Why it is down.
    pub down_reason: Option<String>,
    /// Modbus exception responses received.
    pub exceptions: u64,
    /// Payloads or register blocks that could not be understood.
    pub malformed: u64,
}

/// What the daemon knows about a device besides the engine.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct DeviceHealth {
    /// Connected (`None` before the first report).
    pub up: Option<bool>,
    /// Why it went down.
    pub down_reason: Option<String>,
    /// Exception responses so far.
    pub exceptions: u64,
    /// Malformed payloads so far.
    pub malformed: u64,
}

/// The export policy as a phrase.
pub fn export_policy(site: &Site) -> String {
    match &site.connection {
        Connection::Grid { export: ExportPolicy::Forbidden, .. } => "forbidden".to_owned(),
        Connection::Grid { export: ExportPolicy::Limited(p), .. } => format!("limited to {p}"),
        Connection::Grid { export: ExportPolicy::Allowed, .. } => "allowed".to_owned(),
        Connection::OffGrid(_) => "off-grid".to_owned(),
    }
}

/// The document before the first tick: every load off, nothing measured yet.
pub fn starting(engine: &Engine, snapshot: &Snapshot) -> Status {
    let mut s = build(engine, snapshot, &[], &[], &Totals::default());
    s.time = None;
    s.mode = "starting".to_owned();
    s.points.iter_mut().for_each(|p| p.age_s = None);
    s
}

/// The rest of the household, W: PV + grid − managed loads − what a battery on its own
/// control charges (its discharge adds). `None` unless every term is fresh: a battery
/// whose reading is lost leaves the house unknown, not off by the battery's power.
/// `battery` is `None` on a site without such a battery, `Some(None)` when its reading
/// is not fresh.
pub fn house_power(pv: Option<f64>, grid: Option<f64>, managed: f64, battery: Option<Option<f64>>) -> Option<f64> {
    let battery = battery.unwrap_or(Some(0.0))?;
    Some((pv? + grid? - managed - battery).max(0.0).round())
}

/// Whether the engine's surplus rests on fresh readings: the grid meter on a grid-tied
/// site, the battery's signals off-grid (lost ones put the site in fail-safe). While
/// it does not, the surplus is unknown (`null`), not 0 W.
pub fn surplus_known(site: &Site, d: &crate::engine::Decisions) -> bool {
    match site.connection {
        Connection::Grid { .. } => d.grid.is_some(),
        Connection::OffGrid(_) => d.mode != crate::engine::Mode::Failsafe,
    }
}

/// Why a load's command cannot reach it, if it cannot: the first device it is written
/// through that is down, with the reason the link gave.
pub fn not_delivered(site: &Site, load: &Load, command: Command, health: &[DeviceHealth]) -> Option<String> {
    crate::actuators::load_levels(load, command).into_iter().find_map(|(target, _)| {
        let device = target.device();
        let h = health.get(device.0)?;
        (h.up == Some(false)).then(|| {
            let name = site.devices.get(device.0).map_or("?", |d| d.name.as_str());
            match &h.down_reason {
                Some(reason) => format!("device \"{name}\" is down ({reason})"),
                None => format!("device \"{name}\" is down"),
            }
        })
    })
}

/// The document after a tick.
pub fn build(
    engine: &Engine,
    snapshot: &Snapshot,
    health: &[DeviceHealth],
    recent: &[RecentEvent],
    totals: &Totals,
) -> Status {
    let site = engine.site();
    let d = engine.decisions();
    let now = d.now;
    let fresh = |id: Option<PointId>| -> Option<f64> {
        let id = id?;
        let p = site.points.get(id.0)?;
        let s = snapshot.get(id);
        (s.quality(now, p) == Quality::Fresh).then_some(s.value)
    };
    let persisted = engine.persisted();
    let loads: Vec<LoadStatus> = site
        .loads
        .iter()
        .enumerate()
        .map(|(i, l)| {
            let id = LoadId(i);
            let ld = d.loads.get(i).copied();
            let command = ld.map(|x| x.command);
            let measured = fresh(l.power);
            let implied = command.map_or(Power::ZERO, |c| c.power(&l.kind)).0;
            let (runtime, energy) = engine.load_today(id);
            let temperature = fresh(l.temperature);
            let soc = fresh(l.kind.soc_point());
            let last_cycles = persisted.loads.get(i).map(|p| p.last_cycle_ms.as_slice()).unwrap_or(&[]);
            let undelivered = not_delivered(site, l, command.unwrap_or(Command::Off), health);
            let mut why = engine.explain(id);
            if let Some(cause) = &undelivered {
                why.push_str(" — not delivered: ");
                why.push_str(cause);
            }
            LoadStatus {
                name: l.name.clone(),
                priority: l.priority,
                kind: l.kind.word().to_owned(),
                command: command.map_or_else(|| "off".to_owned(), |c| c.to_string()),
                on: command.is_some_and(|c| c.is_on()),
                power_w: measured.unwrap_or(implied).round(),
                power_measured: measured.is_some(),
                reason: ld.map_or("waiting", |x| x.reason.code()).to_owned(),
                why,
                delivered: undelivered.is_none(),
                r#override: engine
                    .override_of(id)
                    .map(|o| OverrideStatus { command: o.command.to_string(), until: o.until.to_string() }),
                runtime_today_s: runtime.as_secs_f64().round(),
                energy_today_wh: energy.0.round(),
                obligations: l
                    .obligations
                    .iter()
                    .enumerate()
                    .map(|(k, ob)| obligation(ob, runtime, temperature, soc, last_cycles.get(k).copied().flatten()))
                    .collect(),
                switchings: totals.load_switchings.get(i).copied().unwrap_or(0),
            }
        })
        .collect();
    let counters = engine.counters();
    let pv = fresh(site.roles.pv);
    let managed: f64 = loads.iter().map(|l: &LoadStatus| l.power_w).sum();
    let house = house_power(pv, d.grid.map(|g| g.0), managed, site.self_run_battery().map(|b| fresh(Some(b))));
    Status {
        site: site.name.clone(),
        time: Some(now.to_string()),
        mode: mode_word(d.mode).to_owned(),
        export_policy: export_policy(site),
        grid_w: d.grid.map(|g| g.0.round()),
        pv_w: pv.map(f64::round),
        house_w: house,
        surplus_w: surplus_known(site, d).then(|| d.surplus.0.round()),
        inverter: site.inverter.as_ref().map(|ic| InverterStatus {
            limit_w: d.inverter_limit.map(|p| p.0.round()),
            rated_w: ic.rated.0,
            reason: limit_word(d.limit_reason).to_owned(),
            why: limit_why(d.limit_reason).to_owned(),
        }),
        loads,
        today: TodayStatus {
            import_wh: counters.import_today.0.round(),
            export_wh: counters.export_today.0.round(),
            diverted_wh: counters.diverted_today.0.round(),
        },
        points: points(site, snapshot, now),
        devices: devices(site, health),
        broker: site.mqtt.as_ref().map(|m| {
            let h = health.get(site.devices.len()).cloned().unwrap_or_default();
            DeviceStatus {
                name: format!("{}:{}", m.host, m.port),
                up: h.up,
                down_reason: h.down_reason,
                exceptions: 0,
                malformed: h.malformed,
            }
        }),
        recent: recent.to_vec(),
        totals: Totals { load_switchings: Vec::new(), ..totals.clone() },
        replay_log: None,
    }
}

/// Marks a document as the shutdown's: safe states dispatched, controller stopping.
pub fn stopped(mut status: Status) -> Status {
    status.mode = "stopped".to_owned();
    status
}

fn points(site: &Site, snapshot: &Snapshot, now: Timestamp) -> Vec<PointStatus> {
    site.points
        .iter()
        .enumerate()
        .map(|(i, p)| {
            let s = snapshot.get(PointId(i));
            let q = s.quality(now, p);
            PointStatus {
                name: p.name.clone(),
                value: (!s.value.is_nan()).then_some(s.value),
                unit: if p.boolean { String::new() } else { p.dimension.base_unit().to_owned() },
                quality: q.word().to_owned(),
                age_s: (s.at != Timestamp::NEVER).then(|| (now.0 - s.at.0).max(0) as f64 / 1000.0),
            }
        })
        .collect()
}

fn devices(site: &Site, health: &[DeviceHealth]) -> Vec<DeviceStatus> {
    site.devices
        .iter()
        .enumerate()
        .map(|(i, dev)| {
            let h = health.get(i).cloned().unwrap_or_default();
            DeviceStatus {
                name: dev.name.clone(),
                up: h.up,
                down_reason: h.down_reason,
                exceptions: h.exceptions,
                malformed: h.malformed,
            }
        })
        .collect()
}

fn limit_why(reason: LimitReason) -> &'static str {
    match reason {
        LimitReason::None => "not limited",
        LimitReason::ExportGuard => "export guard: the loads cannot take all the PV, so the inverter is held back",
        LimitReason::Escalated => "export guard: export outlasted the deadline, held at the safe limit",
        LimitReason::Failsafe => "fail-safe: a guard signal is lost (stale, missing or frozen), held at the safe limit",
    }
}

fn obligation(
    ob: &Obligation,
    runtime: Duration,
    temperature: Option<f64>,
    soc: Option<f64>,
    last_cycle_ms: Option<i64>,
) -> ObligationStatus {
    let what = ob.describe();
    match ob {
        Obligation::RunDaily { duration, .. } => {
            let fraction = if duration.is_zero() { 1.0 } else { runtime.as_secs_f64() / duration.as_secs_f64() };
            ObligationStatus {
                what,
                progress: format!("{} of {}", format_duration(runtime), format_duration(*duration)),
                fraction: Some(fraction.clamp(0.0, 1.0)),
            }
        }
        Obligation::ReachBy { target, .. } => match temperature {
            Some(t) => ObligationStatus {
                what,
                progress: format!("{} °C of {target}", trim_number((t * 10.0).round() / 10.0)),
                fraction: None,
            },
            None => ObligationStatus { what, progress: "temperature unknown".to_owned(), fraction: None },
        },
        Obligation::ChargeBy { soc: target, .. } => match soc {
            Some(v) => ObligationStatus {
                what,
                progress: format!("{} % of {target}", trim_number((v * 10.0).round() / 10.0)),
                fraction: Some(if target.0 > 0.0 { (v / target.0).clamp(0.0, 1.0) } else { 1.0 }),
            },
            None => ObligationStatus { what, progress: "state of charge unknown".to_owned(), fraction: None },
        },
        Obligation::Cycle { .. } => ObligationStatus {
            what,
            progress: match last_cycle_ms {
                Some(ms) => format!("last cycle {}", Timestamp(ms)),
                None => "no cycle recorded yet".to_owned(),
            },
            fraction: None,
        },
    }
}

#[cfg(test)]
mod tests {
    use super::house_power;

    #[test]
    fn the_house_is_what_pv_and_grid_feed_less_the_managed_loads_and_a_charging_battery() {
        // 3 kW of PV, 200 W exported, a 1 kW tank on: the house draws 1.8 kW.
        assert_eq!(house_power(Some(3000.0), Some(-200.0), 1000.0, None), Some(1800.0));
        // The same with a self-run battery charging 1.5 kW: the house is 300 W.
        assert_eq!(house_power(Some(3000.0), Some(-200.0), 1000.0, Some(Some(1500.0))), Some(300.0));
        // At night the battery discharges 600 W and the meter reads 50 W of import.
        assert_eq!(house_power(Some(0.0), Some(50.0), 0.0, Some(Some(-600.0))), Some(650.0));
        // Any term unknown leaves the house unknown, the battery's included.
        assert_eq!(house_power(Some(3000.0), Some(-200.0), 1000.0, Some(None)), None);
        assert_eq!(house_power(None, Some(-200.0), 0.0, None), None);
        assert_eq!(house_power(Some(3000.0), None, 0.0, None), None);
        // Readings taken at different moments can disagree by a little: never below zero.
        assert_eq!(house_power(Some(100.0), Some(-150.0), 0.0, None), Some(0.0));
    }
}
