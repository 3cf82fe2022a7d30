//! The control task: owns the engine, the snapshot and the dispatcher; turns link
//! events into samples, overrides and health, ticks the engine, logs every switching
//! with its reason, publishes the status, persists the counters, and runs the
//! shutdown sequence (safe states first, then cancel the links).

use std::collections::{HashMap, VecDeque};
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, watch};
use tokio::time::{Instant, MissedTickBehavior, interval, interval_at};
use tokio_util::sync::CancellationToken;
use tracing::{debug, error, info, trace, warn};

use super::replay_log::{ReplayLog, Written};
use super::{Options, state_file};
use crate::actuators::Dispatcher;
use crate::actuators::mqtt::{limit_word, mode_word};
use crate::config::model::{DeviceId, Site};
use crate::engine::{Decisions, Engine, LimitReason, Mode, SiteCounters, Snapshot};
use crate::sources::{Clock, OverrideAction, SourceEvent};
use crate::status::{self, DeviceHealth, RecentEvent, Status, Totals};
use crate::units::Power;

/// How often a repeated exception or malformed payload is logged again (with the
/// count since), so a device that refuses one register every second does not flood
/// the log.
const REPEAT_LOG: Duration = Duration::from_secs(60);
/// How many switchings and limit changes the status document keeps.
const RECENT: usize = 12;
/// How long a stop waits for the counters to be saved (an earlier save still running
/// included) before it gives up on them.
const SAVE_GRACE: Duration = Duration::from_secs(10);
/// How long a stop then waits for the links to end their last pass, taking their
/// events meanwhile. Each of their requests has its own timeout; with the save's grace
/// this stays under the service's `TimeoutStopSec` (30 s).
const LINKS_GRACE: Duration = Duration::from_secs(10);

/// A save of the counters in progress, on the blocking pool.
type Saving = tokio::task::JoinHandle<Result<(), String>>;

/// The result of the save in progress; pending for ever when there is none (the
/// `select!` branches that use it are disabled then).
async fn pending_save(saving: &mut Option<Saving>) -> Result<Result<(), String>, tokio::task::JoinError> {
    match saving {
        Some(rx) => rx.await,
        None => std::future::pending().await,
    }
}

/// What can be asked of the control task.
#[derive(Debug)]
pub(super) enum Request {
    /// Dispatch the safe states, save the counters, stop everything.
    Shutdown,
    /// A device link's task ended before the daemon stopped (a panic): its device is no
    /// longer read or commanded, so the daemon stops as after an engine failure.
    LinkDied(String),
}

/// What the control task counted, returned when the daemon has stopped.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Summary {
    /// Engine ticks.
    pub ticks: u64,
    /// Load switchings (command changes), the shutdown's included.
    pub switchings: u64,
    /// Samples taken into the snapshot.
    pub samples: u64,
    /// Exception responses reported by the links.
    pub exceptions: u64,
    /// Malformed payloads reported by the links.
    pub malformed: u64,
    /// Overrides set or cleared.
    pub overrides: u64,
    /// Saves of the state file that succeeded.
    pub saves: u64,
    /// Times the site went into fail-safe after having been out of it.
    pub failsafe_entries: u64,
    /// Seconds the grid reading showed export above the limit plus the guard's
    /// tolerance (0 where export is allowed).
    pub export_over_limit_s: f64,
    /// Imported and exported while running, by the engine's counters, Wh.
    pub import_wh: f64,
    pub export_wh: f64,
    /// What the replay log wrote, when one was kept.
    pub replay_log: Option<Written>,
    /// Why the engine failed, if a tick panicked: the daemon then stopped with safe
    /// states instead of running on without a controller.
    pub engine_failed: Option<String>,
}

pub(super) struct Control {
    site: Arc<Site>,
    engine: Engine,
    snapshot: Snapshot,
    dispatcher: Arc<Dispatcher>,
    status: watch::Sender<Arc<Status>>,
    health: Vec<DeviceHealth>,
    clock: Clock,
    state_file: Option<PathBuf>,
    persist_every: Duration,
    fail_at_tick: Option<u64>,
    fail_at_sample: Option<u64>,
    /// Last log time and count since, per repeated-problem key.
    repeats: HashMap<String, (Instant, u64)>,
    last_limit: (Option<Power>, LimitReason),
    was_normal: bool,
    /// The first tick, and whether the site has been told that it is still waiting for
    /// its guard signals' first fresh readings (silent otherwise: it starts in fail-safe).
    first_tick: Option<crate::units::Timestamp>,
    start_wait_warned: bool,
    /// Whether the points that never had a reading have been named (once, after 10 s).
    never_read_checked: bool,
    /// Whether the site has had its guard signals at least once since start: a later
    /// fail-safe is a lost signal, logged as such, not a wait for the first readings.
    ever_fresh: bool,
    recent: VecDeque<RecentEvent>,
    summary: Summary,
    /// Counters since start, for the status document and `/metrics`.
    totals: Totals,
    /// The engine's daily counters at the last tick and when it was, to add their
    /// growth to `totals` (they restart at midnight).
    last_counters: Option<(SiteCounters, crate::units::Timestamp)>,
    /// The PV and household series for `spillway replay`, when asked for.
    replay_log: Option<ReplayLog>,
    /// The largest power reading taken as real, W (see [`power_bound`]).
    power_bound: f64,
    /// The current stretch of export above the limit: since when, its peak (W), and
    /// whether it has been warned about.
    over_limit: Option<(crate::units::Timestamp, f64, bool)>,
    /// Per point: gaps longer than its `stale_after` in a row, and whether warned.
    reading_gaps: Vec<(u32, bool)>,
    /// Per load: whether its command reached it at the last tick (see `watch_delivery`).
    delivered: Vec<bool>,
    /// Per load: a write its device refused, and until when that counts (see
    /// [`REFUSAL_HOLD`]).
    refused: Vec<Option<(crate::units::Timestamp, String)>>,
}

/// The key a malformed input is rate-limited under: a device's garbage once a minute
/// per topic or point; each different mistake on an override topic (a person or an
/// automation trying forms) on its own, so that every correction gets its answer.
fn malformed_log_key(origin: &str, detail: &str) -> String {
    if origin.contains("/override/") { format!("mal/{origin}/{detail}") } else { format!("mal/{origin}") }
}

/// How long a refused write counts as a command not delivered: the load targets'
/// re-write period (10 s) and a little for its answer. A refusal of the re-write
/// renews it; a re-write that goes through lets it lapse.
const REFUSAL_HOLD: Duration = Duration::from_secs(12);

/// The largest power a reading of this site may show: ten times its largest rating
/// (the inverter, a load, all loads together), and at least 100 kW, so that a house on
/// a large three-phase supply is never cut short.
fn power_bound(site: &Site) -> f64 {
    let inverter = site.inverter.as_ref().map_or(0.0, |i| i.rated.0);
    let loads: f64 = site.loads.iter().map(|l| l.kind.max_power().0).sum();
    (10.0 * inverter.max(loads)).max(100_000.0)
}

impl Control {
    pub(super) fn new(
        engine: Engine,
        snapshot: Snapshot,
        dispatcher: Arc<Dispatcher>,
        status: watch::Sender<Arc<Status>>,
        replay_log: Option<ReplayLog>,
        options: &Options,
    ) -> Control {
        let site = Arc::clone(engine.site());
        Control {
            // One slot per device, and one more for the MQTT broker (`status::build`
            // reads it as the broker's health).
            health: vec![DeviceHealth::default(); site.devices.len() + 1],
            engine,
            snapshot,
            dispatcher,
            status,
            clock: options.clock,
            state_file: options.state_file.clone(),
            persist_every: options.persist_every,
            fail_at_tick: options.fail_at_tick,
            fail_at_sample: options.fail_at_sample,
            repeats: HashMap::new(),
            last_limit: (None, LimitReason::None),
            was_normal: false,
            first_tick: None,
            start_wait_warned: false,
            never_read_checked: false,
            ever_fresh: false,
            recent: VecDeque::with_capacity(RECENT),
            summary: Summary::default(),
            totals: Totals { load_switchings: vec![0; site.loads.len()], ..Totals::default() },
            last_counters: None,
            replay_log,
            power_bound: power_bound(&site),
            over_limit: None,
            reading_gaps: vec![(0, false); site.points.len()],
            delivered: vec![true; site.loads.len()],
            refused: vec![None; site.loads.len()],
            site,
        }
    }

    pub(super) async fn run(
        mut self,
        mut events: mpsc::Receiver<SourceEvent>,
        mut requests: mpsc::Receiver<Request>,
        cancel: CancellationToken,
    ) -> Summary {
        let mut tick = interval(self.site.tick);
        // A late tick (a busy machine) is taken late and the rhythm moves on from
        // there, rather than firing a burst of catch-up ticks.
        tick.set_missed_tick_behavior(MissedTickBehavior::Delay);
        let mut persist = interval_at(Instant::now() + self.persist_every, self.persist_every);
        persist.set_missed_tick_behavior(MissedTickBehavior::Delay);
        let mut events_open = true;
        // A save of the counters in progress: its result arrives here.
        let mut saving: Option<Saving> = None;
        loop {
            tokio::select! {
                biased;
                // Cancel-safe: a token. Reached only when something other than this
                // task cancelled (it cancels itself after the shutdown sequence).
                () = cancel.cancelled() => break,
                // Cancel-safe: an mpsc receive loses nothing when another branch wins.
                r = requests.recv() => match r {
                    Some(Request::Shutdown) | None => break,
                    Some(Request::LinkDied(why)) => {
                        error!(error = %why, "a device link died: stopping with safe states (a bug: please report it with this log)");
                        self.summary.engine_failed = Some(why);
                        break;
                    }
                },
                // Cancel-safe: an interval tick is not consumed until it completes.
                _ = tick.tick() => {
                    if let Err(why) = self.guarded_tick() {
                        error!(
                            error = %why,
                            "the engine failed: stopping with safe states (a bug: please report it with this log)"
                        );
                        self.summary.engine_failed = Some(why);
                        break;
                    }
                }
                // Cancel-safe: as above. The save runs on the blocking pool and is never
                // awaited here: a disk that hangs must not hold up the ticks.
                _ = persist.tick() => match saving {
                    None => saving = self.start_save(false),
                    Some(_) => {
                        if let Some(repeated) = self.should_log("save-pending".to_owned()) {
                            warn!(repeated, "the last save of the counters has not finished (a slow or failing disk): this one is skipped");
                        }
                    }
                },
                // Cancel-safe: a join handle, polled through a reference.
                r = pending_save(&mut saving), if saving.is_some() => {
                    saving = None;
                    self.saved(r);
                }
                // Cancel-safe: an mpsc receive.
                ev = events.recv(), if events_open => match ev {
                    Some(ev) => self.event(ev),
                    None => events_open = false,
                },
            }
        }
        self.shut_down(&cancel, &mut events, saving).await;
        // What an installer watching a commissioning run wants at the end.
        self.summary.failsafe_entries = self.totals.failsafe_entries;
        self.summary.export_over_limit_s = self.totals.export_over_limit_s;
        self.summary.import_wh = self.totals.import_wh;
        self.summary.export_wh = self.totals.export_wh;
        if let Some(log) = self.replay_log.take() {
            // Joining the writer thread waits on the disk: not on the runtime's thread.
            self.summary.replay_log = tokio::task::spawn_blocking(move || log.finish()).await.ok();
        }
        self.summary
    }

    /// A tick that cannot take the daemon down with it: a panic in the engine is caught
    /// here, so the caller can still send the safe states, save the counters and stop,
    /// rather than leave the links running with no controller behind them.
    fn guarded_tick(&mut self) -> Result<(), String> {
        std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| self.tick())).map_err(|payload| {
            payload
                .downcast_ref::<&str>()
                .map(|s| (*s).to_owned())
                .or_else(|| payload.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "a panic without a message".to_owned())
        })
    }

    /// One engine tick and everything that follows from it.
    fn tick(&mut self) {
        if self.fail_at_tick == Some(self.summary.ticks + 1) {
            panic!("fail point: tick {}", self.summary.ticks + 1);
        }
        let now = self.clock.now();
        // A load written through a device that is down is not counted as drawing its
        // command (see `Engine::set_reachable`).
        for (i, l) in self.site.loads.iter().enumerate() {
            let command = self.engine.decisions().loads.get(i).map_or(crate::engine::Command::Off, |d| d.command);
            let refused = self.refused.get(i).and_then(Option::as_ref).is_some_and(|(until, _)| now < *until);
            let reachable = !refused && status::not_delivered(&self.site, l, command, &self.health).is_none();
            self.engine.set_reachable(crate::config::model::LoadId(i), reachable);
        }
        self.engine.step(now, &self.snapshot);
        self.summary.ticks += 1;
        let d = self.engine.decisions();
        for s in &d.switchings {
            self.summary.switchings += 1;
            if let Some(n) = self.totals.load_switchings.get_mut(s.load.0) {
                *n += 1;
            }
            let name = self.site.loads.get(s.load.0).map_or("?", |l| l.name.as_str());
            let why = self.engine.explain(s.load);
            push_recent(&mut self.recent, d.now, format!("{name} {} → {}: {why}", s.from, s.to));
            info!(
                load = %name,
                from = %s.from,
                to = %s.to,
                reason = s.reason.code(),
                why = %why,
                surplus_w = d.surplus.0.round(),
                grid_w = d.grid.map(|g| g.0.round()),
                "load switched"
            );
        }
        if let Some(text) = log_limit(&mut self.last_limit, d) {
            push_recent(&mut self.recent, d.now, text);
        }
        if log_mode(&mut self.was_normal, d.mode, &self.engine) {
            self.totals.failsafe_entries += 1;
        }
        let first = *self.first_tick.get_or_insert(d.now);
        self.ever_fresh |= d.mode != Mode::Failsafe;
        if d.mode == Mode::Failsafe
            && !self.ever_fresh
            && !self.start_wait_warned
            && d.now.0 - first.0 >= START_WAIT_WARN_MS
        {
            // A site that never had its readings stays in fail-safe without a change of
            // mode to log; an installer watching the start needs to hear why nothing runs.
            self.start_wait_warned = true;
            let lost = self.engine.lost_guard_signals().join(", ");
            push_recent(&mut self.recent, d.now, format!("still in fail-safe since start: {lost}"));
            warn!(
                lost = %lost,
                waited_s = (d.now.0 - first.0) / 1000,
                "no fresh readings since start: {} until they come; check the device links logged above",
                safe_states(&self.site)
            );
        }
        if !self.never_read_checked && d.now.0 - first.0 >= START_WAIT_WARN_MS {
            // A mistyped topic or register leaves its point without a single reading,
            // which no change of mode shows where the point guards nothing (a site that
            // may export has no guard signals): name them once.
            self.never_read_checked = true;
            let never: Vec<String> = self
                .site
                .points
                .iter()
                .enumerate()
                .filter(|(i, _)| {
                    self.snapshot.get(crate::config::model::PointId(*i)).at == crate::units::Timestamp::NEVER
                })
                .map(|(_, p)| format!("\"{}\"", p.name))
                .collect();
            if !never.is_empty() {
                let list = never.join(", ");
                push_recent(&mut self.recent, d.now, format!("no reading at all since start: {list}"));
                warn!(
                    points = %list,
                    waited_s = (d.now.0 - first.0) / 1000,
                    "no reading at all since start from these points: check their topics or addresses (and the device links logged above; a retained MQTT message is not taken as a reading); rules read them as unknown"
                );
            }
        }
        trace!(
            mode = mode_word(d.mode),
            surplus_w = d.surplus.0,
            grid_w = d.grid.map(|g| g.0),
            limit_w = d.inverter_limit.map(|p| p.0),
            commands = ?d.loads.iter().map(|l| l.command.to_string()).collect::<Vec<_>>(),
            "tick"
        );
        self.dispatcher.apply_explained(d, &self.engine.lost_guard_signals());
        for r in self.engine.take_obligation_results() {
            let load = self.site.loads.get(r.load.0);
            let what = load.and_then(|l| l.obligations.get(r.index)).map(|o| o.describe()).unwrap_or_default();
            let name = load.map_or("?", |l| l.name.as_str());
            if r.met {
                info!(load = %name, obligation = %what, day = r.day, "obligation met");
            } else {
                warn!(load = %name, obligation = %what, day = r.day, "obligation missed");
            }
        }
        self.count(now);
        self.recent.make_contiguous();
        let mut doc =
            status::build(&self.engine, &self.snapshot, &self.health, self.recent.as_slices().0, &self.totals);
        // A write the device refused (the device otherwise up) is a command not carried
        // out until a re-write goes through: said as a device down is.
        for (l, refused) in doc.loads.iter_mut().zip(&self.refused) {
            if let Some((until, why)) = refused
                && now < *until
                && l.delivered
            {
                l.delivered = false;
                l.why.push_str(" — not delivered: ");
                l.why.push_str(why);
            }
        }
        self.watch_delivery(&doc);
        if let Some(log) = &mut self.replay_log {
            let d = self.engine.decisions();
            let available = self.site.roles.pv_available.and_then(|id| {
                let p = self.site.points.get(id.0)?;
                let s = self.snapshot.get(id);
                (s.quality(d.now, p) == crate::engine::Quality::Fresh).then_some(s.value)
            });
            let curtailed = d.limit_reason != LimitReason::None;
            log.sample(d.now, doc.pv_w, doc.house_w, available, curtailed, !d.switchings.is_empty());
        }
        doc.replay_log = self.replay_log.as_ref().map(ReplayLog::status);
        self.status.send_replace(Arc::new(doc));
    }

    /// Adds this tick to the counters since start: the growth of the engine's daily
    /// energy counters (all of the new day's after midnight), and the time the grid
    /// reading showed export above the limit plus tolerance.
    fn count(&mut self, now: crate::units::Timestamp) {
        self.totals.ticks += 1;
        let c = self.engine.counters();
        if let Some((before, at)) = self.last_counters {
            let grown = |now: crate::units::Energy, before: crate::units::Energy| {
                if now.0 >= before.0 { now.0 - before.0 } else { now.0 }
            };
            self.totals.import_wh += grown(c.import_today, before.import_today);
            self.totals.export_wh += grown(c.export_today, before.export_today);
            self.totals.diverted_wh += grown(c.diverted_today, before.diverted_today);
            let d = self.engine.decisions();
            let over = match (d.grid, self.site.export_limit()) {
                (Some(grid), Some(limit)) if -grid.0 > limit.0 + self.site.guard.tolerance.0 => Some(-grid.0),
                _ => None,
            };
            if over.is_some() {
                // Capped like the engine's integration: a stopped clock is not export.
                self.totals.export_over_limit_s += now.since(at).min(Duration::from_secs(60)).as_secs_f64();
            }
            self.watch_over_limit(now, over);
        }
        self.last_counters = Some((c, now));
    }

    /// A load whose command cannot reach it (a device it is written through is down:
    /// a relay module that does not answer, the MQTT broker lost) may still be doing
    /// what it was last told — a fail-safe "off" included. Said once when it starts and
    /// once when commands reach it again; the status shows it while it lasts.
    fn watch_delivery(&mut self, doc: &Status) {
        let now = self.engine.decisions().now;
        for (i, l) in doc.loads.iter().enumerate() {
            let Some(was) = self.delivered.get_mut(i) else { continue };
            if *was == l.delivered {
                continue;
            }
            *was = l.delivered;
            if l.delivered {
                info!(load = %l.name, command = %l.command, "commands reach the load again: its command is written");
                push_recent(&mut self.recent, now, format!("{}: commands reach it again", l.name));
            } else {
                let cause = l.why.split(" — not delivered: ").nth(1).unwrap_or("a device is down");
                warn!(
                    load = %l.name,
                    command = %l.command,
                    "the load's command does not reach it ({cause}): it may still be doing what it was last told until the device is back"
                );
                push_recent(&mut self.recent, now, format!("{}: command not delivered ({cause})", l.name));
            }
        }
    }

    /// A point whose readings keep arriving further apart than its `stale_after` (an
    /// MQTT meter publishing every 5 s against the default 2.5 s) goes stale between
    /// every two of them, and a site that needs it flaps in and out of fail-safe with
    /// one line in the log. Three such gaps in a row are warned about once, with the
    /// period seen and the setting that fixes it.
    fn watch_reading_gaps(&mut self, point: crate::config::model::PointId, at: crate::units::Timestamp) {
        let Some(p) = self.site.points.get(point.0) else { return };
        let previous = self.snapshot.get(point).at;
        let Some(gaps) = self.reading_gaps.get_mut(point.0) else { return };
        if previous == crate::units::Timestamp::NEVER || at <= previous {
            return;
        }
        let gap = at.since(previous);
        if gap <= p.stale_after {
            gaps.0 = 0;
            return;
        }
        gaps.0 += 1;
        if gaps.0 >= 3 && !gaps.1 {
            gaps.1 = true;
            warn!(
                point = %p.name,
                every = %crate::units::format_duration(Duration::from_secs_f64(gap.as_secs_f64().round())),
                stale_after = %crate::units::format_duration(p.stale_after),
                "readings arrive further apart than the point's stale_after: it goes stale between them (and the site fails safe each time if it needs the point); give the point `poll:` set to its reporting period (its stale_after is then twice that) or a `stale_after` above it"
            );
        }
    }

    /// Export past the limit for longer than the guard takes to clear it is warned
    /// about once per stretch, with what the site can and cannot do about it (no
    /// inverter to curtail, the inverter already at its floor, the loads waiting on
    /// their timers), and its end is logged. Without this a site whose loads were full
    /// and which had no inverter to curtail exported for minutes with nothing in the log.
    fn watch_over_limit(&mut self, now: crate::units::Timestamp, export_w: Option<f64>) {
        let Some(export_w) = export_w else {
            if let Some((since, peak, warned)) = self.over_limit.take()
                && warned
            {
                info!(
                    lasted = %crate::units::format_duration(now.since(since)),
                    peak = %Power(peak),
                    "export back within the limit"
                );
            }
            self.totals.over_limit_now_s = None;
            return;
        };
        let (since, peak, warned) = self.over_limit.get_or_insert((now, export_w, false));
        *peak = peak.max(export_w);
        let lasted = now.since(*since);
        self.totals.over_limit_now_s = Some(lasted.as_secs_f64());
        // The guard's own reaction (its deadline, then an escalation, then a meter
        // reading) stays well under this; anything longer is something it cannot fix.
        let patience = (self.site.guard.deadline * 3).max(Duration::from_secs(10));
        if *warned || lasted < patience {
            return;
        }
        *warned = true;
        let d = self.engine.decisions();
        let cause = match (&self.site.inverter, d.inverter_limit) {
            (None, _) => "no inverter the guard may curtail (C0254): only the loads can take it, and they are full or waiting on their timers".to_owned(),
            (Some(_), Some(limit)) if limit.0 <= 0.0 => {
                "the inverter is already held at 0 W: export comes from elsewhere (a second inverter or a battery Spillway does not command, or an inverter ignoring its limit)".to_owned()
            }
            (Some(_), Some(limit)) => format!("the inverter is held at {limit} and the export stays: check that it obeys its limit"),
            (Some(_), None) => "the inverter holds no limit: check that the limit is written and obeyed (the status page's inverter row)".to_owned(),
        };
        warn!(
            export = %Power(export_w),
            limit = %self.site.export_limit().unwrap_or(Power::ZERO),
            lasted = %crate::units::format_duration(lasted),
            "export above the limit for longer than the guard needs to clear it: {cause}"
        );
        push_recent(
            &mut self.recent,
            now,
            format!("export above the limit for {}: {cause}", crate::units::format_duration(lasted)),
        );
    }

    fn event(&mut self, ev: SourceEvent) {
        match ev {
            SourceEvent::Sample { point, value, at } => {
                self.summary.samples += 1;
                if self.fail_at_sample == Some(self.summary.samples) {
                    panic!("fail point: sample {}", self.summary.samples);
                }
                trace!(point = point.0, value, "sample");
                if let Some(p) = self.site.points.get(point.0)
                    && p.dimension == crate::units::Dimension::Power
                    && value.abs() > self.power_bound
                {
                    // A reading no site of this size can have (a full-scale register,
                    // `1e9` on a topic): one such sample would stand in the counters
                    // for good and in every `avg` window for minutes, and could start a
                    // load on grid power. Dropped as malformed; the point ages to
                    // stale if nothing better comes.
                    let detail = format!(
                        "{} is beyond what this site can draw or give ({} at most, ten times its largest rating): dropped",
                        Power(value),
                        Power(self.power_bound)
                    );
                    self.event(SourceEvent::Malformed { device: Some(p.device), origin: p.name.clone(), detail });
                    return;
                }
                self.watch_reading_gaps(point, at);
                self.snapshot.set(point, value, at);
            }
            SourceEvent::DeviceUp { device } => {
                if let Some(h) = self.health.get_mut(device.0) {
                    h.up = Some(true);
                    h.down_reason = None;
                }
            }
            SourceEvent::DeviceDown { device, reason } => {
                if let Some(h) = self.health.get_mut(device.0) {
                    h.up = Some(false);
                    h.down_reason = Some(reason);
                }
            }
            SourceEvent::BrokerUp => {
                if let Some(h) = self.health.last_mut() {
                    h.up = Some(true);
                    h.down_reason = None;
                }
            }
            SourceEvent::BrokerDown { reason } => {
                if let Some(h) = self.health.last_mut() {
                    h.up = Some(false);
                    h.down_reason = Some(reason);
                }
            }
            SourceEvent::Exception { device, function, address, code } => {
                self.summary.exceptions += 1;
                let total = self.health.get_mut(device.0).map_or(0, |h| {
                    h.exceptions += 1;
                    h.exceptions
                });
                let key = format!("exc/{}/{function}/{address}/{}", device.0, code.0);
                if let Some(repeated) = self.should_log(key) {
                    // A refused write is a switching order not carried out: not something
                    // ignored. Say what it was for and where the mistake usually is.
                    if matches!(function, 5 | 6 | 15 | 16) {
                        let table = if matches!(function, 5 | 15) { "coil" } else { "register" };
                        let name = self.device_name(device).to_owned();
                        let target = super::commission::refused_write(&self.site, device, function, address);
                        let check = match target.as_ref().map(|t| &t.write) {
                            // The limit's register comes from the device's SunSpec map,
                            // not from the site file.
                            Some(crate::config::model::Write::SunSpecLimit { .. }) => format!(
                                "that the inverter takes limit writes (its SunSpec model 123 or 704 controls, often enabled in its own settings) and the `unit` of device \"{name}\""
                            ),
                            _ => format!(
                                "the {table} address {address} and the `unit` of device \"{name}\" in the site file, against the device's documentation"
                            ),
                        };
                        if let Some(load) = target.as_ref().and_then(|t| t.load)
                            && let Some(slot) = self.refused.get_mut(load)
                        {
                            // Until the next re-write has had its answer: a refusal again
                            // renews it, a write that goes through lets it lapse.
                            let until = self.engine.decisions().now.plus(REFUSAL_HOLD);
                            *slot = Some((until, format!("device \"{name}\" refused the write ({code})")));
                        }
                        let what = target.map_or_else(|| "no load of the site file".to_owned(), |t| t.what);
                        warn!(
                            device = %name,
                            function,
                            address,
                            code = %code,
                            written_for = %what,
                            exceptions_total = total,
                            repeated,
                            %check,
                            "write refused by the device"
                        );
                    } else {
                        warn!(
                            device = %self.device_name(device),
                            function,
                            address,
                            code = %code,
                            exceptions_total = total,
                            repeated,
                            "exception response ignored"
                        );
                    }
                }
            }
            SourceEvent::Malformed { device, origin, detail } => {
                self.summary.malformed += 1;
                // Without a device (an override topic on a site with no MQTT devices)
                // it counts against the broker.
                let slot = device.map_or(self.site.devices.len(), |d| d.0);
                let total = self.health.get_mut(slot).map_or(0, |h| {
                    h.malformed += 1;
                    h.malformed
                });
                // A device's garbage is logged once a minute per topic; each different
                // mistake on an override topic (a person or an automation trying forms)
                // is logged, so that every correction gets its answer.
                if let Some(repeated) = self.should_log(malformed_log_key(&origin, &detail)) {
                    warn!(
                        device = %device.map_or("-", |d| self.device_name(d)),
                        %origin,
                        %detail,
                        malformed_total = total,
                        repeated,
                        "malformed input ignored"
                    );
                }
            }
            SourceEvent::Override(req) => {
                self.summary.overrides += 1;
                let name = self.site.loads.get(req.load.0).map_or("?", |l| l.name.as_str()).to_owned();
                match req.action {
                    OverrideAction::Set { command, until, .. } => {
                        info!(load = %name, command = %command, %until, "override set");
                        self.engine.set_override(req.load, command, until);
                    }
                    OverrideAction::Clear => {
                        info!(load = %name, "override cleared");
                        self.engine.clear_override(req.load);
                    }
                }
            }
            SourceEvent::Unresolved { point, reason } => {
                debug!(point = point.0, %reason, "point unresolved");
            }
            SourceEvent::Discovered { device, base, models } => {
                debug!(device = %self.device_name(device), base, ?models, "SunSpec models");
            }
            SourceEvent::Readback { device, values } => {
                debug!(device = %self.device_name(device), ?values, "actuator read-back");
            }
        }
    }

    fn device_name(&self, device: DeviceId) -> &str {
        self.site.devices.get(device.0).map_or("?", |d| d.name.as_str())
    }

    /// Whether to log a repeated problem now; the count of repeats since the last line.
    fn should_log(&mut self, key: String) -> Option<u64> {
        let now = Instant::now();
        // Keys are topics, devices and override mistakes: bounded in practice, but a
        // flood of distinct override payloads must not grow the map for ever.
        if self.repeats.len() >= 4096 {
            self.repeats.clear();
        }
        match self.repeats.get_mut(&key) {
            None => {
                self.repeats.insert(key, (now, 0));
                Some(0)
            }
            Some((last, count)) => {
                *count += 1;
                if now.saturating_duration_since(*last) >= REPEAT_LOG {
                    let n = *count;
                    *last = now;
                    *count = 0;
                    Some(n)
                } else {
                    None
                }
            }
        }
    }

    /// Starts a save of the counters on the blocking pool (fsync can take seconds on
    /// an SD card, and a failing one may never answer: neither the ticks nor a stop
    /// wait on it beyond a grace). `None` when there is no state file.
    fn start_save(&self, stopping: bool) -> Option<Saving> {
        let path = self.state_file.clone()?;
        let counters = self.engine.persisted();
        let site = self.site.name.clone();
        let now = self.clock.now();
        Some(tokio::task::spawn_blocking(move || {
            state_file::write(&path, &site, &counters, now, stopping).map_err(|e| e.to_string())
        }))
    }

    /// Logs and counts a save's result; returns whether the counters were saved.
    fn saved(&mut self, r: Result<Result<(), String>, tokio::task::JoinError>) -> bool {
        match r {
            Ok(Ok(())) => {
                self.summary.saves += 1;
                debug!("counters saved");
                true
            }
            Ok(Err(e)) => {
                warn!(error = %e, "counters not saved; will retry");
                false
            }
            Err(e) => {
                warn!(error = %e, "counters not saved; will retry");
                false
            }
        }
    }

    /// Safe states to every actuator, then the links cancelled (their last pass writes
    /// what is dispatched here), then the counters saved. The links' events are drained
    /// meanwhile, so none of them waits on a full channel instead of making its last
    /// pass; a save that hangs is given up after [`SAVE_GRACE`], so the stop ends well
    /// within the service's `TimeoutStopSec` (30 s) whatever the disk does.
    async fn shut_down(
        &mut self,
        cancel: &CancellationToken,
        events: &mut mpsc::Receiver<SourceEvent>,
        mut saving: Option<Saving>,
    ) {
        let now = self.clock.now();
        let safe = self.engine.safe_decisions(now);
        let current = self.engine.decisions();
        for (i, (l, (was, to))) in self.site.loads.iter().zip(current.loads.iter().zip(&safe.loads)).enumerate() {
            if was.command != to.command {
                self.summary.switchings += 1;
                info!(
                    load = %l.name,
                    from = %was.command,
                    to = %to.command,
                    reason = "shutdown",
                    why = "controller stopping: safe state",
                    "load switched"
                );
            } else {
                debug!(load = %l.name, command = %to.command, index = i, "already in its safe state");
            }
        }
        if let Some(ic) = &self.site.inverter {
            info!(limit = %ic.safe_limit, "inverter limit: its safe value is sent for shutdown");
        }
        self.dispatcher.apply_stopped(&safe);
        let commands: Vec<String> = safe.loads.iter().map(|l| l.command.to_string()).collect();
        info!(commands = %commands.join(", "), "safe states handed to the links (each says whether its device took them)");
        push_recent(&mut self.recent, now, "controller stopping: safe states dispatched".to_owned());
        self.recent.make_contiguous();
        let doc = status::stopped(status::build(
            &self.engine,
            &self.snapshot,
            &self.health,
            self.recent.as_slices().0,
            &self.totals,
        ));
        let mut doc = with_safe(doc, &safe, &self.site);
        doc.replay_log = self.replay_log.as_ref().map(ReplayLog::status);
        self.status.send_replace(Arc::new(doc));
        cancel.cancel();
        let deadline = Instant::now() + SAVE_GRACE;
        let mut links_done = false;
        let mut hung = false;
        // An earlier save still running: the last one waits for it (two on the same
        // temporary file would race), and is not started if it never ends.
        if saving.is_some() {
            loop {
                tokio::select! {
                    // Cancel-safe: all three (a join handle by reference, an mpsc receive, a sleep).
                    r = pending_save(&mut saving) => {
                        self.saved(r);
                        break;
                    }
                    ev = events.recv(), if !links_done => links_done = ev.is_none(),
                    () = tokio::time::sleep_until(deadline) => {
                        hung = true;
                        break;
                    }
                }
            }
        }
        let mut last = if hung { None } else { self.start_save(true) };
        let had_file = self.state_file.is_some();
        let mut result = None;
        while last.is_some() {
            tokio::select! {
                r = pending_save(&mut last) => {
                    last = None;
                    result = Some(self.saved(r));
                }
                ev = events.recv(), if !links_done => links_done = ev.is_none(),
                () = tokio::time::sleep_until(deadline) => {
                    hung = true;
                    break;
                }
            }
        }
        match result {
            Some(true) => info!(saves = self.summary.saves, "counters saved"),
            _ if hung => error!(
                saves = self.summary.saves,
                waited_s = SAVE_GRACE.as_secs(),
                "counters NOT saved at shutdown: the state file's disk did not finish a save within the grace; today's run times since the last save are lost"
            ),
            Some(false) | None if had_file => error!(
                saves = self.summary.saves,
                "counters NOT saved at shutdown (see the warning above): today's run times since the last save are lost"
            ),
            _ => info!("no state file"),
        }
        // The links end after their last pass; until then their events are taken, so
        // none is held up on a full channel (one that found it closed would end without
        // its last pass).
        let deadline = Instant::now().max(deadline) + LINKS_GRACE;
        while !links_done {
            tokio::select! {
                ev = events.recv() => links_done = ev.is_none(),
                () = tokio::time::sleep_until(deadline) => break,
            }
        }
    }
}

/// The stopped document shows what was dispatched, not the last tick's commands.
fn with_safe(mut doc: Status, safe: &Decisions, site: &Site) -> Status {
    for ((l, d), load) in doc.loads.iter_mut().zip(&safe.loads).zip(&site.loads) {
        l.command = d.command.to_string();
        l.on = d.command.is_on();
        l.power_w = if l.power_measured { l.power_w } else { d.command.power(&load.kind).0 };
        l.reason = "shutdown".to_owned();
        l.why = "controller stopping: safe state".to_owned();
    }
    if let Some(inv) = &mut doc.inverter {
        inv.limit_w = safe.inverter_limit.map(|p| p.0);
        inv.reason = limit_word(safe.limit_reason).to_owned();
        inv.why = "controller stopping: safe limit".to_owned();
    }
    doc
}

/// Logs a change of the inverter limit; returns a sentence for the status when the
/// change is one a person should see.
fn log_limit(last: &mut (Option<Power>, LimitReason), d: &Decisions) -> Option<String> {
    let now = (d.inverter_limit, d.limit_reason);
    let before = *last;
    *last = now;
    if now == before {
        return None;
    }
    let fmt = |p: Option<Power>| p.map_or_else(|| "none".to_owned(), |p| p.to_string());
    // The guard releases a curtailment step by step: log its start, its end and
    // changes of reason at INFO, the steps in between at DEBUG.
    if now.1 != before.1 || now.0.is_some() != before.0.is_some() {
        if now.0 == before.0 {
            // Same limit, another reason (the guard's cut becomes the fail-safe's).
            info!(
                limit = %fmt(now.0),
                from = limit_word(before.1),
                reason = limit_word(now.1),
                grid_w = d.grid.map(|g| g.0.round()),
                "inverter limit kept, for another reason"
            );
        } else {
            info!(
                from = %fmt(before.0),
                to = %fmt(now.0),
                reason = limit_word(now.1),
                grid_w = d.grid.map(|g| g.0.round()),
                "inverter limit changed"
            );
        }
        Some(if now.0 == before.0 {
            format!("inverter limit {} ({} → {})", fmt(now.0), limit_word(before.1), limit_word(now.1))
        } else {
            format!("inverter limit {} → {} ({})", fmt(before.0), fmt(now.0), limit_word(now.1))
        })
    } else {
        debug!(from = %fmt(before.0), to = %fmt(now.0), reason = limit_word(now.1), "inverter limit adjusted");
        None
    }
}

/// How long after start a site still waiting for its guard signals says so.
const START_WAIT_WARN_MS: i64 = 10_000;

/// What fail-safe holds on this site: the inverter is named only where Spillway sets
/// its limit (off-grid sites and sites without an `inverter:` section have none).
fn safe_states(site: &Site) -> &'static str {
    if site.inverter.is_some() {
        "loads in their safe states, the inverter at its safe limit"
    } else {
        "loads in their safe states"
    }
}

/// Logs a change of mode; returns whether the site just went into fail-safe.
fn log_mode(was_normal: &mut bool, mode: Mode, engine: &Engine) -> bool {
    match mode {
        Mode::Normal if !*was_normal => {
            *was_normal = true;
            info!("signals fresh: rules in charge");
        }
        Mode::Failsafe if *was_normal => {
            *was_normal = false;
            let lost = engine.lost_guard_signals().join(", ");
            warn!(lost = %lost, "fail-safe: a guard signal is lost; {}", safe_states(engine.site()));
            return true;
        }
        Mode::Outage if *was_normal => {
            *was_normal = false;
            warn!("grid outage: shedding loads marked for it");
        }
        _ => {}
    }
    false
}

fn push_recent(recent: &mut VecDeque<RecentEvent>, at: crate::units::Timestamp, text: String) {
    if recent.len() == RECENT {
        recent.pop_front();
    }
    recent.push_back(RecentEvent { time: at.to_string(), text });
}

#[cfg(test)]
mod tests {
    use super::malformed_log_key;

    /// A device's garbage shares one key per topic (logged once a minute); each
    /// different mistake on an override topic has its own (each answered).
    #[test]
    fn each_different_override_mistake_has_its_own_log_key() {
        let meter = |d: &str| malformed_log_key("home/meter", d);
        assert_eq!(meter("\"abc\" is not a number"), meter("\"1.5kW\" is not a number"));
        let o = |d: &str| malformed_log_key("spillway/home/override/pump", d);
        assert_ne!(o("\"boost\" is not on, off or auto"), o("an override lasts at most 24 h"));
        assert_eq!(o("an override lasts at most 24 h"), o("an override lasts at most 24 h"));
    }
}
