//! One Modbus device's task: connect, discover (SunSpec), read back actuator state,
//! then poll the point groups and write the actuators, until cancelled.
//!
//! Every request runs under `tokio::time::timeout(device.timeout)`. A timeout or a
//! transport error drops the connection (a late reply would poison the next request's
//! transaction id) and reconnects after a capped, jittered backoff. An exception
//! response is counted, reported by name, and costs only the block that drew it.

use std::future::Future;
use std::io;
use std::sync::Arc;
use std::time::Duration;

use tokio::sync::{mpsc, watch};
use tokio::time::{Instant, sleep, sleep_until, timeout};
use tokio_modbus::ExceptionCode;
use tokio_modbus::client::{Client, Context, Reader, Writer};
use tokio_util::sync::CancellationToken;
use tracing::{debug, info, warn};

use super::codec::{self, Sentinel};
use super::plan::{self, Block, Decoded, Group, PointSpec, ScaleSpec, Words};
use super::serial::LineFault;
use super::sunspec::{self, ModelMap};
use super::{ModbusError, ModbusOptions, SerialLines};
use crate::actuators::modbus::{LimitContext, LimitControl, WriteOp, WriteTracker};
use crate::actuators::{DeviceCommands, targets_of};
use crate::config::model::{
    Device, DeviceId, Link, PointId, PointRead, Scale, Site, SunSpecRead, Table, WordOrder, Write,
};
use crate::sources::{Backoff, Clock, Counter, LinkStats, Readback, SourceEvent, modbus::ExceptionName};

/// A Modbus device: its points, its actuator targets, its connection.
#[derive(Debug)]
pub struct ModbusLink {
    site: Arc<Site>,
    device: DeviceId,
    options: ModbusOptions,
    stats: Arc<LinkStats>,
    /// The serial lines of the site: devices on one port share its line.
    lines: Arc<SerialLines>,
}

/// Why a session ended.
enum Fail {
    /// Timeout or transport error: reconnect.
    Transport(String),
    /// The cancellation token fired in the middle of a request: the connection is
    /// unusable and the safe states still have to be written.
    Cancelled,
    /// The cancellation token fired between requests and the safe states were written
    /// (or their failure logged) on the live connection.
    Stopped,
    /// Nobody listens to the events any more.
    Closed,
}

/// What survives reconnects.
struct State {
    groups: Vec<(Group, Instant)>,
    static_points: Vec<PointSpec>,
    sunspec_points: Vec<(PointId, SunSpecRead)>,
    map: Option<ModelMap>,
    limit_wanted: bool,
    limit: Option<LimitContext>,
    tracker: WriteTracker,
    readback_done: bool,
    commands: Arc<DeviceCommands>,
    watching: bool,
    /// What was last reported: `Some(true)` after an answer, `Some(false)` after a
    /// lost connection or a run of nothing but exceptions.
    up: Option<bool>,
    answered: bool,
    /// Since when every request of this session drew an exception.
    refusing: Option<Refusing>,
}

/// A run of requests answered only with exceptions (a restarting device answers 0x04,
/// a gateway whose device behind it is silent 0x0B): the connection is fine, the device
/// is not.
struct Refusing {
    since: Instant,
    at: crate::units::Timestamp,
    latest: ExceptionName,
    mixed: bool,
}

impl ModbusLink {
    /// A link for one Modbus device of the site, alone on its serial line if it has
    /// one. Devices that share a port need [`ModbusLink::sharing`].
    pub fn new(site: Arc<Site>, device: DeviceId, options: ModbusOptions) -> Result<Self, ModbusError> {
        Self::sharing(site, device, options, &SerialLines::new())
    }

    /// A link for one Modbus device of the site; an RTU device takes its place on the
    /// line of its port in `lines`, shared with the other devices there.
    pub fn sharing(
        site: Arc<Site>,
        device: DeviceId,
        options: ModbusOptions,
        lines: &Arc<SerialLines>,
    ) -> Result<Self, ModbusError> {
        let d = site.devices.get(device.0).ok_or(ModbusError::NoSuchDevice(device.0))?;
        if matches!(d.link, Link::Mqtt) {
            return Err(ModbusError::NotModbus(d.name.clone()));
        }
        Ok(ModbusLink { site, device, options, stats: LinkStats::shared(), lines: Arc::clone(lines) })
    }

    /// The device this link serves.
    pub fn device(&self) -> DeviceId {
        self.device
    }

    /// The link's counters.
    pub fn stats(&self) -> Arc<LinkStats> {
        Arc::clone(&self.stats)
    }

    fn dev(&self) -> &Device {
        &self.site.devices[self.device.0]
    }

    /// Runs until `cancel` fires (or `events` is closed). Writes nothing until
    /// `commands` says `commanded`, and not before the actuator read-back. When
    /// cancelled between requests it makes one last pass over the latest commands,
    /// so a daemon that set the safe states before cancelling gets them written.
    pub async fn run(
        self,
        mut commands: watch::Receiver<Arc<DeviceCommands>>,
        events: mpsc::Sender<SourceEvent>,
        clock: Clock,
        cancel: CancellationToken,
    ) {
        let mut st = self.initial_state();
        let mut backoff = Backoff::new(self.options.backoff, &self.dev().name);
        loop {
            let connected = tokio::select! {
                biased;
                // Cancel-safe: dropping a pending connect just closes the socket.
                () = cancel.cancelled() => {
                    self.last_attempt(&mut st, &mut commands, &events, &clock).await;
                    return;
                }
                r = timeout(self.options.connect_timeout, self.connect()) => r,
            };
            let reason = match connected {
                Ok(Ok(mut ctx)) => {
                    self.stats.count(Counter::Connect);
                    if self.on_line() {
                        // The port is the line's: it logs its opening, once (`serial.rs`).
                        // Attaching to it says nothing about the device.
                        debug!(device = %self.dev().name, "on its serial line");
                    } else {
                        info!(device = %self.dev().name, "modbus device connected");
                    }
                    st.answered = false;
                    st.refusing = None;
                    let r = self.session(&mut ctx, &mut st, &mut commands, &events, &clock, &cancel).await;
                    // Best effort; the transport may already be gone.
                    let _ = timeout(Duration::from_millis(100), ctx.disconnect()).await;
                    match r {
                        Fail::Stopped | Fail::Closed => return,
                        // Stopped mid-request (a slow device): that connection is spoilt,
                        // so the safe states go out on a fresh one.
                        Fail::Cancelled => {
                            self.last_attempt(&mut st, &mut commands, &events, &clock).await;
                            return;
                        }
                        Fail::Transport(reason) => reason,
                    }
                }
                Ok(Err(e)) => {
                    self.stats.count(Counter::TransportError);
                    format!("cannot connect: {e}")
                }
                Err(_) => {
                    self.stats.count(Counter::Timeout);
                    format!("cannot connect within {}", crate::units::format_duration(self.options.connect_timeout))
                }
            };
            if st.answered {
                backoff.reset();
            }
            let delay = backoff.next_delay();
            if st.up != Some(false) {
                st.up = Some(false);
                warn!(device = %self.dev().name, %reason, retry_in_ms = delay.as_millis() as u64, "modbus device down");
                let ev = SourceEvent::DeviceDown { device: self.device, reason: reason.clone() };
                if events.send(ev).await.is_err() {
                    return;
                }
            } else {
                debug!(device = %self.dev().name, %reason, retry_in_ms = delay.as_millis() as u64, "modbus reconnect failed");
            }
            tokio::select! {
                biased;
                // Both cancel-safe: a token and a sleep.
                () = cancel.cancelled() => {
                    self.last_attempt(&mut st, &mut commands, &events, &clock).await;
                    return;
                }
                () = sleep(delay) => {}
            }
        }
    }

    fn initial_state(&self) -> State {
        let mut static_points = Vec::new();
        let mut sunspec_points = Vec::new();
        for (i, p) in self.site.points.iter().enumerate() {
            if p.device != self.device {
                continue;
            }
            match &p.read {
                PointRead::Modbus(m) => static_points.push(PointSpec {
                    point: PointId(i),
                    table: m.table,
                    address: m.address,
                    value_type: m.value_type,
                    word_order: m.word_order,
                    scale: match m.scale {
                        Scale::Factor(f) => ScaleSpec::Factor(f),
                        Scale::Register { table, address } => ScaleSpec::Register { table, address },
                    },
                    sentinel: Sentinel::of(m),
                    unit_factor: p.unit_factor,
                    boolean: p.boolean,
                    poll: p.poll,
                }),
                PointRead::SunSpec(s) => sunspec_points.push((PointId(i), s.clone())),
                PointRead::Mqtt(_) => {}
            }
        }
        let limit_wanted = self
            .site
            .inverter
            .as_ref()
            .is_some_and(|ic| matches!(ic.limit, Write::SunSpecLimit { device } if device == self.device));
        let now = Instant::now();
        State {
            groups: plan::plan(&static_points).into_iter().map(|g| (g, now)).collect(),
            static_points,
            sunspec_points,
            map: None,
            limit_wanted,
            limit: None,
            tracker: WriteTracker::default(),
            readback_done: false,
            commands: Arc::new(DeviceCommands::default()),
            watching: true,
            up: None,
            answered: false,
            refusing: None,
        }
    }

    async fn connect(&self) -> io::Result<Context> {
        super::connect(&self.dev().link, &self.lines, self.dev().timeout).await
    }

    /// Whether the device is on a serial line, which times each exchange itself (the
    /// wait for the line, while the other devices on it are asked, is not the device's).
    fn on_line(&self) -> bool {
        matches!(self.dev().link, Link::ModbusRtu { .. })
    }

    /// One connection's life. Returns why it ended.
    async fn session(
        &self,
        ctx: &mut Context,
        st: &mut State,
        commands: &mut watch::Receiver<Arc<DeviceCommands>>,
        events: &mpsc::Sender<SourceEvent>,
        clock: &Clock,
        cancel: &CancellationToken,
    ) -> Fail {
        match self.session_inner(ctx, st, commands, events, clock, cancel).await {
            Ok(never) => match never {},
            Err(f) => f,
        }
    }

    async fn session_inner(
        &self,
        ctx: &mut Context,
        st: &mut State,
        commands: &mut watch::Receiver<Arc<DeviceCommands>>,
        events: &mpsc::Sender<SourceEvent>,
        clock: &Clock,
        cancel: &CancellationToken,
    ) -> Result<std::convert::Infallible, Fail> {
        let io = Io { link: self, events, cancel, clock };
        if self.dev().sunspec && st.map.is_none() {
            self.discover(ctx, st, &io).await?;
            if let Some(limit) = &mut st.limit {
                limit.device_seconds_per_second = clock.speed();
            }
        }
        // The device is reported up by its first answer (`Io::call`), not by the
        // connection: a gateway, or a server whose device is silent, accepts one too.
        if !st.readback_done {
            self.readback(ctx, st, &io).await?;
            st.readback_done = true;
        }
        // A reconnect may mean the device rebooted: write every target again.
        st.tracker.forget_all();
        if st.watching {
            st.commands = Arc::clone(&commands.borrow_and_update());
        }
        let mut first_pass = true;
        loop {
            self.write_due(ctx, st, &io).await?;
            let now = Instant::now();
            for gi in 0..st.groups.len() {
                if st.groups[gi].1 <= now {
                    self.poll_group(ctx, st, gi, &io, clock).await?;
                    let (g, next) = &mut st.groups[gi];
                    *next += g.period;
                    if *next <= Instant::now() {
                        *next = Instant::now() + g.period;
                    }
                }
            }
            let wake = st
                .groups
                .iter()
                .map(|g| g.1)
                .chain(st.tracker.next_refresh(&st.commands))
                .min()
                .unwrap_or_else(|| Instant::now() + Duration::from_secs(3600));
            if std::mem::take(&mut first_pass) && st.up != Some(true) && st.refusing.is_none() {
                // Nothing was asked of the device yet (nothing to read, nothing to
                // write): the connection is all there is to go by.
                st.up = Some(true);
                io.emit(SourceEvent::DeviceUp { device: self.device }).await?;
            }
            tokio::select! {
                biased;
                // All three branches are cancel-safe: nothing is lost when one of the
                // others completes first.
                () = cancel.cancelled() => {
                    self.final_writes(ctx, st, commands, events, clock).await;
                    return Err(Fail::Stopped);
                }
                changed = commands.changed(), if st.watching => match changed {
                    Ok(()) => st.commands = Arc::clone(&commands.borrow_and_update()),
                    Err(_) => st.watching = false,
                },
                () = sleep_until(wake) => {}
            }
        }
    }

    /// On shutdown while not connected: one more connection, to write the safe states
    /// the daemon has just dispatched, and a warning if the device still cannot be
    /// reached (it then keeps what it had, or does what its hardware does alone).
    async fn last_attempt(
        &self,
        st: &mut State,
        commands: &mut watch::Receiver<Arc<DeviceCommands>>,
        events: &mpsc::Sender<SourceEvent>,
        clock: &Clock,
    ) {
        // A device with nothing to write (a meter) has no safe state to deliver.
        let has_writes = {
            let c = commands.borrow();
            c.commanded && !c.writes.is_empty()
        };
        if !has_writes {
            return;
        }
        match timeout(self.options.connect_timeout, self.connect()).await {
            Ok(Ok(mut ctx)) => {
                self.final_writes(&mut ctx, st, commands, events, clock).await;
                let _ = timeout(Duration::from_millis(100), ctx.disconnect()).await;
            }
            Ok(Err(e)) => warn!(
                device = %self.dev().name,
                reason = %e,
                "safe state NOT written at shutdown: the device cannot be reached; it keeps what it had, or does what its hardware does without a controller"
            ),
            Err(_) => warn!(
                device = %self.dev().name,
                "safe state NOT written at shutdown: no connection within the timeout; it keeps what it had, or does what its hardware does without a controller"
            ),
        }
    }

    /// On shutdown: one last pass over the latest commands (the daemon puts the safe
    /// states there before it cancels), each request still under its timeout.
    async fn final_writes(
        &self,
        ctx: &mut Context,
        st: &mut State,
        commands: &mut watch::Receiver<Arc<DeviceCommands>>,
        events: &mpsc::Sender<SourceEvent>,
        clock: &Clock,
    ) {
        if st.watching {
            st.commands = Arc::clone(&commands.borrow_and_update());
        }
        let live = CancellationToken::new();
        let io = Io { link: self, events, cancel: &live, clock };
        // A device with nothing to write (a meter) has no safe state to report.
        let has_writes = st.commands.commanded && !st.commands.writes.is_empty();
        // A SunSpec limit whose control was never found cannot be written at all.
        let limit_unknown = st.limit.is_none()
            && st.commands.writes.iter().any(|w| matches!(w.target, crate::config::model::Write::SunSpecLimit { .. }));
        match self.write_due(ctx, st, &io).await {
            Ok(0) if !limit_unknown => {
                if has_writes {
                    info!(device = %self.dev().name, "safe state written at shutdown");
                }
            }
            Ok(refused) if refused > 0 => warn!(
                device = %self.dev().name,
                refused,
                "safe state NOT written at shutdown: the device refused it (exception response); it keeps what it had, or does what its hardware does without a controller"
            ),
            Ok(_) => warn!(
                device = %self.dev().name,
                "safe limit NOT written at shutdown: the inverter's SunSpec limit control was never found; it keeps what it had"
            ),
            Err(_) => warn!(
                device = %self.dev().name,
                "safe state NOT written at shutdown: the device did not answer; it keeps what it had, or does what its hardware does without a controller"
            ),
        }
    }

    async fn discover(&self, ctx: &mut Context, st: &mut State, io: &Io<'_>) -> Result<(), Fail> {
        let mut base = None;
        // As in `probe.rs`: every base refused with an exception about the device (a
        // gateway's 0x0B) is reported as that exception, not as a missing marker.
        let mut refused: Option<ExceptionName> = None;
        let mut all_refused = true;
        for b in sunspec::BASES {
            match io.call(ctx.read_holding_registers(b, 2), st).await? {
                Ok(w) if w == sunspec::MARKER => {
                    base = Some(b);
                    break;
                }
                Ok(_) => all_refused = false,
                Err(code) => {
                    let e = ExceptionName::from(code);
                    debug!(device = %self.dev().name, base = b, code = %e, "no SunSpec marker here");
                    if e.is_about_request() {
                        all_refused = false;
                    } else {
                        refused = Some(e);
                    }
                }
            }
        }
        let Some(base) = base else {
            let unit = self.dev().link.modbus_unit().unwrap_or_default();
            return Err(Fail::Transport(match refused {
                Some(e) if all_refused => e.every_request(unit),
                _ => "no SunSpec marker (SunS) at holding register 40000, 50000 or 0".to_owned(),
            }));
        };
        let mut models = Vec::new();
        let mut addr = base.checked_add(2);
        while let Some(a) = addr {
            if models.len() >= sunspec::MAX_MODELS {
                break;
            }
            let head = match io.call(ctx.read_holding_registers(a, 2), st).await? {
                Ok(w) => w,
                // Some devices answer the end marker's length with an exception.
                Err(_) => match io.call(ctx.read_holding_registers(a, 1), st).await? {
                    Ok(w) => w,
                    Err(_) => break,
                },
            };
            let Some((model, next)) = sunspec::chain_step(a, &head) else { break };
            models.push(model);
            addr = next;
        }
        let map = ModelMap { base, models };
        let ids: Vec<String> = map.models.iter().map(|m| m.0.to_string()).collect();
        info!(device = %self.dev().name, base, models = %ids.join(", "), "SunSpec map found");
        io.emit(SourceEvent::Discovered {
            device: self.device,
            base,
            models: map.models.iter().map(|&(id, start, _)| (id, start)).collect(),
        })
        .await?;
        // Resolve the SunSpec points and plan them with the plain ones.
        let mut points = st.static_points.clone();
        for (id, read) in &st.sunspec_points {
            let p = &self.site.points[id.0];
            match map.resolve(read.model, &read.point) {
                Ok(r) => points.push(PointSpec {
                    point: *id,
                    table: Table::HoldingRegister,
                    address: r.address,
                    value_type: r.value_type,
                    word_order: WordOrder::HighFirst,
                    scale: r.scale_factor.map_or(ScaleSpec::Factor(1.0), |a| ScaleSpec::Register {
                        table: Table::HoldingRegister,
                        address: a,
                    }),
                    sentinel: r.sentinel,
                    unit_factor: p.unit_factor,
                    boolean: p.boolean,
                    poll: p.poll,
                }),
                Err(reason) => {
                    warn!(point = %p.name, device = %self.dev().name, %reason, "SunSpec point unavailable");
                    io.emit(SourceEvent::Unresolved { point: *id, reason }).await?;
                }
            }
        }
        let now = Instant::now();
        st.groups = plan::plan(&points).into_iter().map(|g| (g, now)).collect();
        if st.limit_wanted {
            st.limit = self.limit_control(ctx, &map, st, io).await?;
        }
        st.map = Some(map);
        Ok(())
    }

    /// Finds the power-limit control: model 704 when present, else model 123.
    async fn limit_control(
        &self,
        ctx: &mut Context,
        map: &ModelMap,
        st: &mut State,
        io: &Io<'_>,
    ) -> Result<Option<LimitContext>, Fail> {
        let Some(ic) = &self.site.inverter else {
            return Ok(None);
        };
        // A limit percentage is of the device's WMax, which may differ from the site
        // file's rating: read it, and take the percentage of what the device says.
        let rated = ic.rated.0.max(1.0);
        let base = match self.device_wmax(ctx, map, st, io).await? {
            Some(wmax) if (wmax - rated).abs() > 0.02 * rated => {
                warn!(
                    device = %self.dev().name,
                    wmax_w = wmax,
                    rated_w = rated,
                    "the inverter's WMax differs from the site's inverter.rated: limits are written as a \
                     percentage of WMax; set inverter.rated to match"
                );
                wmax
            }
            Some(wmax) => wmax,
            None => rated,
        };
        let safe_pct = (ic.safe_limit.0 / base * 100.0).clamp(0.0, 100.0);
        let (found, control_sf) = match LimitControl::locate(map) {
            Some((control, sf_at)) => (Some(control), sf_at),
            None if map.start(704).is_some() || map.start(123).is_some() => (None, None),
            None => {
                warn!(device = %self.dev().name, "no SunSpec model 123 or 704: the inverter limit cannot be written");
                io.emit(SourceEvent::Malformed {
                    device: Some(self.device),
                    origin: "inverter limit".to_owned(),
                    detail: "the device has no SunSpec model 123 or 704 to write a power limit to".to_owned(),
                })
                .await?;
                return Ok(None);
            }
        };
        let mut sf = 0i16;
        if let Some(a) = control_sf {
            match io.call(ctx.read_holding_registers(a, 1), st).await? {
                Ok(w) => match w.first().map(|v| *v as i16) {
                    Some(codec::SUNSSF_UNIMPLEMENTED) | None => {
                        warn!(device = %self.dev().name, "WMaxLimPct_SF not implemented: using 0");
                    }
                    Some(v) if (-10..=10).contains(&v) => sf = v,
                    Some(v) => {
                        warn!(device = %self.dev().name, sf = v, "WMaxLimPct_SF out of range: using 0");
                    }
                },
                Err(code) => {
                    io.exception(3, a, code).await?;
                }
            }
        }
        let control = found.map(|c| c.with_sf(sf));
        match &control {
            Some(c) => info!(device = %self.dev().name, control = %c, "SunSpec power-limit control"),
            None => info!(device = %self.dev().name, "SunSpec power-limit control not found in models 123/704"),
        }
        let ids: Vec<u16> = map.models.iter().map(|&(id, _, _)| id).collect();
        if let Some(Err(warning)) = crate::actuators::modbus::limit_model_note(&self.site, &ids) {
            warn!(device = %self.dev().name, "{warning}");
        }
        Ok(control.map(|control| LimitContext {
            control,
            safe_pct,
            rated_to_device: rated / base,
            device_seconds_per_second: 1.0,
        }))
    }

    /// The power a limit percentage is taken of: model 121's `WMax`, else model 120's
    /// `WRtg`, in W; `None` when the device has neither or does not implement them.
    async fn device_wmax(
        &self,
        ctx: &mut Context,
        map: &ModelMap,
        st: &mut State,
        io: &Io<'_>,
    ) -> Result<Option<f64>, Fail> {
        for (model, point) in [(121, "WMax"), (120, "WRtg")] {
            let Ok(loc) = map.resolve(model, point) else { continue };
            let Some(sf_at) = loc.scale_factor else { continue };
            let mut words = [0u16; 2];
            for (i, a) in [loc.address, sf_at].into_iter().enumerate() {
                match io.call(ctx.read_holding_registers(a, 1), st).await? {
                    Ok(w) if !w.is_empty() => words[i] = w[0],
                    Ok(_) => return Ok(None),
                    Err(code) => {
                        io.exception(3, a, code).await?;
                        return Ok(None);
                    }
                }
            }
            let (value, sf) = (words[0], words[1] as i16);
            if value == u16::MAX || sf == codec::SUNSSF_UNIMPLEMENTED || !(-10..=10).contains(&sf) || value == 0 {
                continue;
            }
            let w = f64::from(value) * 10f64.powi(i32::from(sf));
            info!(device = %self.dev().name, model, point, w, "inverter power base for limits");
            return Ok(Some(w));
        }
        Ok(None)
    }

    async fn readback(&self, ctx: &mut Context, st: &mut State, io: &Io<'_>) -> Result<(), Fail> {
        let mut values = Vec::new();
        for t in targets_of(&self.site, self.device) {
            let (target, value) = match &t {
                Write::Coil { address, .. } => (
                    format!("coil {address}"),
                    match io.call(ctx.read_coils(*address, 1), st).await? {
                        Ok(b) => b.first().map(|b| f64::from(u8::from(*b))),
                        Err(code) => {
                            io.exception(1, *address, code).await?;
                            None
                        }
                    },
                ),
                Write::Register { address, value_type, word_order, scale, .. } => (
                    format!("holding {address}"),
                    match io.call(ctx.read_holding_registers(*address, value_type.registers()), st).await? {
                        Ok(w) => codec::decode(&w, *value_type, *word_order, Sentinel::None).map(|v| v * scale),
                        Err(code) => {
                            io.exception(3, *address, code).await?;
                            None
                        }
                    },
                ),
                Write::SunSpecLimit { .. } => {
                    let reg = match st.limit.map(|l| l.control) {
                        Some(LimitControl::Immediate { pct, sf, .. }) => Some((pct, sf)),
                        Some(LimitControl::DerControls { enable, sf }) => Some((enable + 1, sf)),
                        None => None,
                    };
                    let value = match reg {
                        Some((a, sf)) => match io.call(ctx.read_holding_registers(a, 1), st).await? {
                            Ok(w) => w.first().and_then(|v| codec::apply_sunssf(f64::from(*v), sf)),
                            Err(code) => {
                                io.exception(3, a, code).await?;
                                None
                            }
                        },
                        None => None,
                    };
                    ("sunspec limit %".to_owned(), value)
                }
                Write::Mqtt { .. } => continue,
            };
            values.push(Readback { target, value });
        }
        if values.is_empty() {
            return Ok(());
        }
        info!(device = %self.dev().name, values = %crate::sources::readback_text(&values), "actuator state read back");
        io.emit(SourceEvent::Readback { device: self.device, values }).await
    }

    /// Writes every target that is due. Returns how many batches the device refused
    /// with an exception response (each is retried at its refresh period).
    async fn write_due(&self, ctx: &mut Context, st: &mut State, io: &Io<'_>) -> Result<u32, Fail> {
        let mut refused = 0;
        let batches = st.tracker.due(&st.commands, Instant::now(), st.limit.as_ref());
        for batch in batches {
            for op in &batch.ops {
                self.stats.count(Counter::Write);
                debug!(device = %self.dev().name, origin = %batch.origin, ?op, "modbus write");
                let r = match op {
                    WriteOp::Coil { address, value } => io.call(ctx.write_single_coil(*address, *value), st).await?,
                    WriteOp::Coils { address, values } => {
                        io.call(ctx.write_multiple_coils(*address, values), st).await?
                    }
                    WriteOp::Register { address, value } => {
                        io.call(ctx.write_single_register(*address, *value), st).await?
                    }
                    WriteOp::Registers { address, words } => {
                        io.call(ctx.write_multiple_registers(*address, words), st).await?
                    }
                };
                if let Err(code) = r {
                    refused += 1;
                    io.exception(op.function(), op.address(), code).await?;
                    // The rest of the batch would not make sense without this part.
                    break;
                }
            }
            // Marked even after an exception, so a refused write is retried at its
            // refresh period rather than on every wake-up.
            st.tracker.mark(&batch, Instant::now());
        }
        Ok(refused)
    }

    async fn poll_group(
        &self,
        ctx: &mut Context,
        st: &mut State,
        gi: usize,
        io: &Io<'_>,
        clock: &Clock,
    ) -> Result<(), Fail> {
        let blocks = st.groups[gi].0.blocks.clone();
        let mut words = Words::default();
        let mut split: Vec<usize> = Vec::new();
        for (bi, b) in blocks.iter().enumerate() {
            match self.read_block(ctx, b, st, io).await? {
                Ok(w) => words.insert(b.table, b.start, &w),
                Err(code) => {
                    io.exception(function_of(b.table), b.start, code).await?;
                    if code == ExceptionCode::IllegalDataAddress && b.runs.len() > 1 {
                        split.push(bi);
                    }
                }
            }
        }
        if !split.is_empty() {
            let g = &mut st.groups[gi].0;
            let mut nb = Vec::new();
            for (bi, b) in g.blocks.iter().enumerate() {
                if split.contains(&bi) {
                    nb.extend(b.split());
                } else {
                    nb.push(b.clone());
                }
            }
            info!(device = %self.dev().name, blocks = nb.len(), "read block refused across a gap: split into its runs");
            g.blocks = nb;
        }
        let at = clock.now();
        let points = st.groups[gi].0.points.clone();
        for p in &points {
            // A power pinned at its register's full scale is a clipped reading or a
            // fault (a meter's spike): taken in, it drove the battery and cut the
            // inverter to nothing, and stood in the day's export. Dropped as malformed.
            let point = &self.site.points[p.point.0];
            if point.dimension == crate::units::Dimension::Power && !p.boolean && plan::at_full_scale(p, &words) {
                io.emit(SourceEvent::Malformed {
                    device: Some(self.device),
                    origin: point.name.clone(),
                    detail: "the reading sits at its register's full scale (a clipped reading or a fault): dropped"
                        .to_owned(),
                })
                .await?;
                continue;
            }
            let value = match plan::decode_point(p, &words) {
                Decoded::Value(v) => v,
                Decoded::Missing => f64::NAN,
                Decoded::NotRead => continue,
            };
            self.stats.count(Counter::Sample);
            io.emit(SourceEvent::Sample { point: p.point, value, at }).await?;
        }
        Ok(())
    }

    async fn read_block(
        &self,
        ctx: &mut Context,
        b: &Block,
        st: &mut State,
        io: &Io<'_>,
    ) -> Result<Result<Vec<u16>, ExceptionCode>, Fail> {
        let bits = |r: Result<Vec<bool>, ExceptionCode>| {
            r.map(|v| v.iter().take(usize::from(b.count)).map(|x| u16::from(*x)).collect())
        };
        Ok(match b.table {
            Table::Coil => bits(io.call(ctx.read_coils(b.start, b.count), st).await?),
            Table::DiscreteInput => bits(io.call(ctx.read_discrete_inputs(b.start, b.count), st).await?),
            Table::InputRegister => io.call(ctx.read_input_registers(b.start, b.count), st).await?,
            Table::HoldingRegister => io.call(ctx.read_holding_registers(b.start, b.count), st).await?,
        })
    }
}

impl ModbusLink {
    /// How long a device may answer nothing but exceptions before it counts as down:
    /// twice its longest poll period, so that every point was asked twice; for a device
    /// with nothing to read, 20 s: two of the actuators' default re-assertions (10 s,
    /// `ActuatorOptions`), its only requests then.
    fn down_after(&self, st: &State) -> Duration {
        st.groups.iter().map(|(g, _)| g.period).max().unwrap_or(Duration::from_secs(10)) * 2
    }

    /// `answers every request with exception 0x04 (server device failure) since …: …`
    fn refusing_reason(&self, r: &Refusing) -> String {
        let unit = self.dev().link.modbus_unit().unwrap_or_default();
        let since = r.at.to_utc().with_timezone(&self.site.timezone).format("%Y-%m-%d %H:%M:%S %Z");
        if r.mixed {
            format!(
                "answers every request with an exception (the latest {}) since {since}: check the device and its unit id ({unit})",
                r.latest.phrase()
            )
        } else {
            format!(
                "answers every request with exception {} since {since}: {}",
                r.latest.phrase(),
                r.latest.advice(unit)
            )
        }
    }
}

fn function_of(table: Table) -> u8 {
    match table {
        Table::Coil => 1,
        Table::DiscreteInput => 2,
        Table::HoldingRegister => 3,
        Table::InputRegister => 4,
    }
}

/// The session's request and event plumbing.
struct Io<'a> {
    link: &'a ModbusLink,
    events: &'a mpsc::Sender<SourceEvent>,
    cancel: &'a CancellationToken,
    clock: &'a Clock,
}

impl Io<'_> {
    /// One request under the device's timeout. The outer error ends the session; the
    /// inner one is the device's exception.
    async fn call<T>(
        &self,
        request: impl Future<Output = tokio_modbus::Result<T>>,
        st: &mut State,
    ) -> Result<Result<T, ExceptionCode>, Fail> {
        let link = self.link;
        link.stats.count(Counter::Request);
        let limit = link.dev().timeout;
        let timed = async {
            if link.on_line() {
                // The line times the exchange itself (`serial.rs`).
                Ok(request.await)
            } else {
                timeout(limit, request).await
            }
        };
        let r = tokio::select! {
            biased;
            // Dropping a request mid-flight poisons the connection; we are leaving anyway.
            () = self.cancel.cancelled() => return Err(Fail::Cancelled),
            r = timed => r,
        };
        match r {
            Err(_) => {
                link.stats.count(Counter::Timeout);
                Err(Fail::Transport(format!("no answer within {}", crate::units::format_duration(limit))))
            }
            Ok(Err(e)) => match LineFault::of(&e) {
                Some(f @ LineFault::NoAnswer(_)) => {
                    link.stats.count(Counter::Timeout);
                    Err(Fail::Transport(f.to_string()))
                }
                // Bytes came back, but no valid frame: the line, not the device's
                // silence. Counted as malformed, with what to check.
                Some(f @ LineFault::Garbled { .. }) => {
                    link.stats.count(Counter::Malformed);
                    Err(Fail::Transport(f.to_string()))
                }
                _ => {
                    link.stats.count(Counter::TransportError);
                    Err(Fail::Transport(format!("transport error: {e}")))
                }
            },
            Ok(Ok(r)) => {
                st.answered = true;
                match &r {
                    // Exceptions 1–3 (and 5, "acknowledge") answer the request itself:
                    // the device looked it up, so it is there. A register it lacks
                    // shows on that point, not on the device.
                    Err(code) if !ExceptionName::from(*code).is_about_request() => self.refused(st, *code).await,
                    _ => self.answered(st).await,
                }
                Ok(r)
            }
        }
    }

    /// A request was answered: the device is up (again).
    async fn answered(&self, st: &mut State) {
        st.refusing = None;
        if st.up == Some(true) {
            return;
        }
        if st.up == Some(false) {
            info!(device = %self.link.dev().name, "modbus device answers again");
        }
        st.up = Some(true);
        // A closed channel ends the session at the next `emit`.
        let _ = self.events.send(SourceEvent::DeviceUp { device: self.link.device }).await;
    }

    /// A request drew an exception about the device (failure, busy, a gateway's
    /// "no answer from the target"). Once every request has done so for twice the
    /// device's longest poll period (each of its points asked at least twice), the
    /// device is down: it answers, but gives nothing.
    async fn refused(&self, st: &mut State, code: ExceptionCode) {
        let code = ExceptionName::from(code);
        let now = Instant::now();
        let r = st.refusing.get_or_insert_with(|| Refusing {
            since: now,
            at: self.clock.now(),
            latest: code,
            mixed: false,
        });
        if r.latest != code {
            r.mixed = true;
            r.latest = code;
        }
        let since = r.since;
        if st.up == Some(false) || now.duration_since(since) < self.link.down_after(st) {
            return;
        }
        let Some(r) = &st.refusing else { return };
        let reason = self.link.refusing_reason(r);
        st.up = Some(false);
        warn!(device = %self.link.dev().name, %reason, "modbus device down");
        let _ = self.events.send(SourceEvent::DeviceDown { device: self.link.device, reason }).await;
    }

    async fn emit(&self, ev: SourceEvent) -> Result<(), Fail> {
        self.events.send(ev).await.map_err(|_| Fail::Closed)
    }

    async fn exception(&self, function: u8, address: u16, code: ExceptionCode) -> Result<(), Fail> {
        let link = self.link;
        link.stats.count(Counter::Exception);
        let code = ExceptionName::from(code);
        // The controller logs exceptions, once per kind and then rate-limited (a device
        // that refuses one register answers so at every poll). At shutdown nobody may be
        // listening any more: the refusal is then logged here, and the caller still
        // needs to know it was a refusal, not a lost line.
        debug!(device = %link.dev().name, function, address, %code, "modbus exception response");
        if self.emit(SourceEvent::Exception { device: link.device, function, address, code }).await.is_err() {
            warn!(device = %link.dev().name, function, address, %code, "modbus exception response");
        }
        Ok(())
    }
}
