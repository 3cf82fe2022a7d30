//! The fail-safe test (`spillway failsafe-test`): proof, for the commissioning record,
//! that the scheme fails safe when the grid meter's data link drops, and returns calmly.
//!
//! The controller runs on the live site exactly as `spillway run` does; nothing here
//! decides or commands. The installer disconnects the grid meter's data link when told
//! (unplugs its cable, powers off its gateway) and reconnects it when told; the test
//! times what follows from the status document the daemon publishes after every tick:
//! when the last reading was measured, when the site went into fail-safe, when the
//! inverter limit was ordered to its safe value, when the inverter's own PV reading fell
//! to it, when each load that was on was switched off; then, with the link back, how
//! long until the rules are in charge again and whether export showed on the way back.
//! Export in the safe state itself is judged too: the meter's readings after its link
//! returns, while the safe state still holds (the recovery hold), show what the safe
//! state exports; on a site with no inverter to curtail, the safe state is the loads off
//! and the PV free, so that export stood from the safe state on, and where no such
//! reading came it is estimated from the last reading before the loss less the loads
//! switched off.
//!
//! Times come from the engine's clock at one tick's resolution. The PV reading is the
//! physical proof that the inverter obeyed; without a PV point only the command is seen.

use std::sync::Arc;
use std::time::Duration;

use tokio::sync::watch;

use super::Daemon;
use crate::config::model::Site;
use crate::status::Status;
use crate::units::Timestamp;

/// How long to wait at each step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FailsafeTestOptions {
    /// For fresh readings after the start, and for the rules to be in charge.
    pub ready_within: Duration,
    /// How long the site must run normally before the disconnection is asked for.
    pub settle: Duration,
    /// For the installer to disconnect (and later reconnect) the link.
    pub wait: Duration,
    /// How long the grid is watched for export once the rules are back in charge.
    pub watch_after: Duration,
    /// The bound the verdict holds the time to safe state to (ENA EREC G100 Issue 1:
    /// 5 s).
    pub within: Duration,
}

impl Default for FailsafeTestOptions {
    fn default() -> Self {
        FailsafeTestOptions {
            ready_within: Duration::from_secs(120),
            settle: Duration::from_secs(10),
            wait: Duration::from_secs(120),
            watch_after: Duration::from_secs(60),
            within: Duration::from_secs(5),
        }
    }
}

/// Where the test stands, for the person running it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FailsafePhase {
    /// Readings are fresh and the rules in charge: disconnect the link now.
    Disconnect,
    /// The site is in its safe state: reconnect the link now.
    Reconnect,
}

/// What the test measured.
#[derive(Debug, Clone, PartialEq)]
pub struct FailsafeReport {
    /// When the last grid reading before the loss arrived.
    pub last_reading: Timestamp,
    /// When the site went into fail-safe.
    pub failsafe_at: Timestamp,
    /// When the inverter limit was ordered to its safe value (`None`: the site has no
    /// limit control, or it never was).
    pub limit_at: Option<Timestamp>,
    /// When the inverter's own reading that showed it at the safe limit arrived
    /// (`None`: no PV reading, or it never fell within the wait).
    pub pv_safe_at: Option<Timestamp>,
    /// Whether the site has a fresh PV reading to watch at all.
    pub pv_watched: bool,
    /// Each load that was on when the link dropped, and when it was switched off.
    pub loads_off: Vec<(String, Option<Timestamp>)>,
    /// When the rules were in charge again after the reconnection.
    pub back_at: Timestamp,
    /// Export above the limit plus tolerance seen while watching after the return.
    pub export_after: Option<ExportSeen>,
    /// Export above the limit plus tolerance while the site was in its safe state.
    pub export_in_failsafe: Option<FailsafeExport>,
    /// Grid readings that arrived while the safe state still held (after the link's
    /// return, before the rules were in charge): what the safe state was judged on.
    pub safe_state_readings: usize,
    /// Whether the site has an inverter limit the fail-safe orders down; without one
    /// (warning C0254) nothing curtails the PV in fail-safe.
    pub curtailable: bool,
    /// The site's export limit (W).
    pub limit_w: f64,
    /// The verdict's bound.
    pub within: Duration,
}

/// Export above the limit plus tolerance over a watched stretch.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ExportSeen {
    /// The highest export (W).
    pub peak_w: f64,
    /// The longest stretch above the limit.
    pub longest: Duration,
    /// How long was watched.
    pub watched: Duration,
    /// The export stood from the first status watched to the last: the whole watch.
    pub whole: bool,
    /// Still exporting when the watch ended.
    pub to_the_end: bool,
}

/// Export while the site was in its safe state.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FailsafeExport {
    /// The highest export (W): measured, or estimated (see `measured`).
    pub peak_w: f64,
    /// How long it lasted: on a site with nothing to curtail, from the safe state to
    /// the last reading above the limit before the rules took charge (nothing changed
    /// the PV's way out meanwhile); else the stretch the readings showed.
    pub lasted: Duration,
    /// Seen in the meter's readings after its return, while the safe state held; else
    /// estimated from the last reading before the loss less the loads switched off.
    pub measured: bool,
}

impl FailsafeReport {
    /// From the last reading to the last of the safe-state events seen (fail-safe,
    /// limit ordered, PV at the safe limit, loads off).
    pub fn time_to_safe(&self) -> Duration {
        let mut last = self.failsafe_at;
        for t in [self.limit_at, self.pv_safe_at].into_iter().flatten() {
            last = last.max(t);
        }
        for t in self.loads_off.iter().filter_map(|(_, t)| *t) {
            last = last.max(t);
        }
        last.since(self.last_reading)
    }

    /// Every safe-state event was seen, within the bound, and no export outlasted the
    /// bound after the return.
    ///
    /// Export above the limit in the safe state for the bound or longer fails too: a
    /// no-export site must stop exporting within it (ENA EREC G100 Issue 1: 5 s), and a
    /// safe state that exports has not.
    pub fn passed(&self) -> bool {
        let all_seen = self.loads_off.iter().all(|(_, t)| t.is_some())
            && (!self.pv_watched || self.pv_safe_at.is_some())
            && (!self.curtailable || self.limit_at.is_some());
        all_seen
            && self.time_to_safe() <= self.within
            && self.export_in_failsafe.is_none_or(|e| e.lasted < self.within)
            && self.export_after.is_none_or(|e| e.longest < self.within)
    }

    /// The moment the safe state was complete.
    pub fn safe_at(&self) -> Timestamp {
        self.last_reading.plus(self.time_to_safe())
    }
}

/// Why the test could not be run to its end.
#[derive(Debug, thiserror::Error)]
pub enum FailsafeTestError {
    /// The site has nothing the fail-safe guards.
    #[error(
        "the site's export is allowed, so losing the grid meter has no fail-safe to test (only loads that read it go to their safe states); this test is for sites whose export is limited or forbidden"
    )]
    NothingGuarded,
    /// The rules never took charge after the start.
    #[error(
        "the site never had fresh readings with the rules in charge within {0:?}: check the devices with `spillway read`"
    )]
    NeverReady(Duration),
    /// The disconnection was not seen.
    #[error(
        "no fail-safe within {0:?} of asking for the disconnection: the grid reading stayed fresh — was the grid meter's link disconnected?"
    )]
    NotDisconnected(Duration),
    /// The rules did not take charge again after the reconnection.
    #[error("still in fail-safe {0:?} after asking for the reconnection: check the meter's link and `spillway read`")]
    NotReconnected(Duration),
    /// The daemon stopped under the test.
    #[error("the controller stopped during the test")]
    Stopped,
}

/// Runs the test against a running daemon; `phase` is told when to disconnect and
/// reconnect the grid meter's link.
pub async fn run(
    daemon: &Daemon,
    site: &Site,
    options: FailsafeTestOptions,
    mut phase: impl FnMut(FailsafePhase),
) -> Result<FailsafeReport, FailsafeTestError> {
    let Some(limit) = site.export_limit() else {
        return Err(FailsafeTestError::NothingGuarded);
    };
    let grid_point = site.roles.grid.map(|p| site.points[p.0].name.clone()).ok_or(FailsafeTestError::NothingGuarded)?;
    let pv_point = site.roles.pv.map(|p| site.points[p.0].name.clone());
    let safe_limit = site.inverter.as_ref().map(|i| i.safe_limit.0);
    let pv_margin = site.inverter.as_ref().map_or(50.0, |i| (i.rated.0 * 0.02).max(50.0));
    let over_limit = limit.0 + site.guard.tolerance.0;
    let mut rx = daemon.status();

    // 1. Fresh readings, the rules in charge, for `settle` without a break.
    let mut normal_since: Option<Timestamp> = None;
    next_until(&mut rx, options.ready_within, FailsafeTestError::NeverReady(options.ready_within), |s| {
        let (Some(now), true) = (time(s), s.mode == "normal") else {
            normal_since = None;
            return false;
        };
        let since = *normal_since.get_or_insert(now);
        now.since(since) >= options.settle
    })
    .await?;

    // 2. The disconnection: from the last fresh status, what happens after the loss.
    phase(FailsafePhase::Disconnect);
    let mut before = Arc::clone(&rx.borrow());
    let mut last_reading = None;
    let mut failsafe_at = None;
    let mut limit_at = None;
    let mut pv_safe_at = None;
    let mut loads_off: Vec<(String, Option<Timestamp>)> = Vec::new();
    let pv_watched = before.pv_w.is_some() && safe_limit.is_some();
    let lost = FailsafeTestError::NotDisconnected(options.wait);
    next_until(&mut rx, options.wait, lost, |s| {
        let Some(now) = time(s) else { return false };
        if last_reading.is_none() {
            match s.points.iter().find(|p| p.name == grid_point) {
                Some(p) if p.quality != "fresh" => {
                    let age = p.age_s.unwrap_or(0.0);
                    last_reading = Some(Timestamp(now.0 - (age * 1000.0).round() as i64));
                    loads_off = before.loads.iter().filter(|l| l.on).map(|l| (l.name.clone(), None)).collect();
                }
                _ => {
                    before = Arc::new(s.clone());
                    return false;
                }
            }
        }
        if failsafe_at.is_none() && s.mode == "failsafe" {
            failsafe_at = Some(now);
        }
        if limit_at.is_none()
            && let (Some(inv), Some(safe)) = (&s.inverter, safe_limit)
            && inv.limit_w.is_some_and(|l| l <= safe + 0.5)
        {
            limit_at = Some(now);
        }
        if pv_safe_at.is_none()
            && let (Some(pv), Some(safe)) = (s.pv_w, safe_limit)
            && pv <= safe + pv_margin
        {
            // When that PV reading arrived, not when this tick saw it: the poll's own
            // delay is not the inverter's.
            let age = pv_point.as_ref().and_then(|n| s.points.iter().find(|p| p.name == *n)).and_then(|p| p.age_s);
            pv_safe_at = Some(Timestamp(now.0 - (age.unwrap_or(0.0) * 1000.0).round() as i64));
        }
        for (name, off) in &mut loads_off {
            if off.is_none() && s.loads.iter().any(|l| l.name == *name && !l.on) {
                *off = Some(now);
            }
        }
        // Done once every event that can be seen has been, or the wait runs out below.
        failsafe_at.is_some()
            && (safe_limit.is_none() || limit_at.is_some())
            && (!pv_watched || pv_safe_at.is_some())
            && loads_off.iter().all(|(_, t)| t.is_some())
    })
    .await
    .or_else(|e| if failsafe_at.is_some() { Ok(()) } else { Err(e) })?;
    let (Some(last_reading), Some(failsafe_at)) = (last_reading, failsafe_at) else {
        return Err(FailsafeTestError::NotDisconnected(options.wait));
    };

    // 3. The reconnection: the rules in charge again, then a watch for export. The
    // readings that come before the rules take charge are the safe state's own.
    phase(FailsafePhase::Reconnect);
    let mut back_at = None;
    let mut safe_readings = 0usize;
    let mut safe_peak: Option<f64> = None;
    let mut safe_over: Option<(Timestamp, Timestamp)> = None;
    next_until(&mut rx, options.wait, FailsafeTestError::NotReconnected(options.wait), |s| {
        if s.mode == "normal" {
            back_at = time(s);
            return true;
        }
        if let (Some(now), Some(g)) = (time(s), s.grid_w) {
            safe_readings += 1;
            if -g > over_limit {
                safe_peak = Some(safe_peak.map_or(-g, |p: f64| p.max(-g)));
                let first = safe_over.map_or(now, |(f, _)| f);
                safe_over = Some((first, now));
            }
        }
        false
    })
    .await?;
    let back_at = back_at.ok_or(FailsafeTestError::NotReconnected(options.wait))?;
    let curtailable = safe_limit.is_some();
    let mut report = FailsafeReport {
        last_reading,
        failsafe_at,
        limit_at,
        pv_safe_at,
        pv_watched,
        loads_off,
        back_at,
        export_after: None,
        export_in_failsafe: None,
        safe_state_readings: safe_readings,
        curtailable,
        limit_w: limit.0,
        within: options.within,
    };
    let safe_at = report.safe_at();
    report.export_in_failsafe = match (safe_peak, safe_over) {
        (Some(peak_w), Some((first, last))) => Some(FailsafeExport {
            peak_w,
            // Nothing on the site could curtail the PV: the export found at the
            // return is the safe state's, and stood since it was reached.
            lasted: if curtailable { last.since(first) } else { last.since(safe_at) },
            measured: true,
        }),
        _ if safe_readings > 0 || curtailable => None,
        // No reading while the safe state held: what the loads that went off were
        // taking from the PV is what the grid got instead.
        _ => {
            let taken: f64 = before.loads.iter().filter(|l| l.on).map(|l| l.power_w.max(0.0)).sum();
            before.grid_w.map(|g| taken - g).filter(|e| *e > over_limit).map(|peak_w| FailsafeExport {
                peak_w,
                lasted: back_at.since(safe_at),
                measured: false,
            })
        }
    };
    let mut peak: Option<f64> = None;
    let mut longest = Duration::ZERO;
    let mut since: Option<Timestamp> = None;
    let mut below = false;
    let watch_end = back_at.plus(options.watch_after);
    let watching = next_until(&mut rx, options.watch_after + Duration::from_secs(5), FailsafeTestError::Stopped, |s| {
        let Some(now) = time(s) else { return false };
        match s.grid_w {
            Some(g) if -g > over_limit => {
                peak = Some(peak.map_or(-g, |p: f64| p.max(-g)));
                let start = *since.get_or_insert(now);
                longest = longest.max(now.since(start));
            }
            _ => {
                since = None;
                below = true;
            }
        }
        now >= watch_end
    })
    .await;
    if let Err(FailsafeTestError::Stopped) = watching
        && daemon_stopped(&rx)
    {
        return Err(FailsafeTestError::Stopped);
    }
    report.export_after = peak.map(|peak_w| ExportSeen {
        peak_w,
        longest,
        watched: options.watch_after,
        whole: !below,
        to_the_end: since.is_some(),
    });
    Ok(report)
}

/// Waits for status documents until `done` says so; `err` when `limit` (tokio time)
/// passes first or the daemon stops.
async fn next_until(
    rx: &mut watch::Receiver<Arc<Status>>,
    limit: Duration,
    err: FailsafeTestError,
    mut done: impl FnMut(&Status) -> bool,
) -> Result<(), FailsafeTestError> {
    let deadline = tokio::time::Instant::now() + limit;
    loop {
        let doc = Arc::clone(&rx.borrow_and_update());
        if doc.mode == "stopped" {
            return Err(FailsafeTestError::Stopped);
        }
        if done(&doc) {
            return Ok(());
        }
        match tokio::time::timeout_at(deadline, rx.changed()).await {
            Ok(Ok(())) => {}
            Ok(Err(_)) => return Err(FailsafeTestError::Stopped),
            Err(_) => return Err(err),
        }
    }
}

fn daemon_stopped(rx: &watch::Receiver<Arc<Status>>) -> bool {
    rx.borrow().mode == "stopped" || rx.has_changed().is_err()
}

/// The engine's time of a status document.
fn time(s: &Status) -> Option<Timestamp> {
    let t = chrono::DateTime::parse_from_rfc3339(s.time.as_deref()?).ok()?;
    Some(Timestamp(t.timestamp_millis()))
}
