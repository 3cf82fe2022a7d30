//! What the engine decides each tick: a command and a reason for every load, the
//! inverter limit, and the switchings that happened, each with its cause.

use std::fmt;
use std::time::Duration;

use crate::config::model::{LoadId, LoadKind};
use crate::units::{Current, Power, Ratio, Timestamp, format_whole_seconds};

/// A command for one load.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Command {
    /// Off (setpoint 0, relays open).
    Off,
    /// On (switched loads).
    On,
    /// Stage n of a stepped load (1-based; 0 is `Off`).
    Stage(u8),
    /// Setpoint of a proportional load.
    Setpoint(Ratio),
    /// Charging current of a charger.
    Current(Current),
    /// Charge power of a battery.
    Charge(Power),
}

impl Command {
    /// Whether the load draws power under this command.
    pub fn is_on(self) -> bool {
        match self {
            Command::Off => false,
            Command::On => true,
            Command::Stage(n) => n > 0,
            Command::Setpoint(r) => r.0 > 0.0,
            Command::Current(a) => a.0 > 0.0,
            Command::Charge(p) => p.0 > 0.0,
        }
    }

    /// Power the load draws under this command, by its kind.
    pub fn power(self, kind: &LoadKind) -> Power {
        match (self, kind) {
            (Command::Off, _) => Power::ZERO,
            (Command::On, LoadKind::Switched { rated, .. }) => *rated,
            (Command::Stage(n), LoadKind::Stepped { stages, .. }) if n > 0 => {
                stages.get(usize::from(n) - 1).copied().unwrap_or_default()
            }
            (Command::Setpoint(r), LoadKind::Proportional { rated, .. }) => *rated * (r.0 / 100.0),
            (Command::Current(a), LoadKind::Charger { watts_per_amp, .. }) => Power(a.0 * watts_per_amp),
            (Command::Charge(p), LoadKind::Battery { .. }) => p,
            (Command::On, other) => other.max_power(),
            _ => Power::ZERO,
        }
    }
}

impl fmt::Display for Command {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Command::Off => f.write_str("off"),
            Command::On => f.write_str("on"),
            Command::Stage(n) => write!(f, "stage {n}"),
            Command::Setpoint(r) => write!(f, "{r}"),
            Command::Current(a) => write!(f, "{a}"),
            Command::Charge(p) if p.0 < 0.0 => write!(f, "discharge {}", -*p),
            Command::Charge(p) => write!(f, "charge {p}"),
        }
    }
}

/// Why a load is where it is. Ordered roughly by precedence: a safety reason beats an
/// override, an override beats an obligation, an obligation beats the rules.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Reason {
    /// A signal it depends on is stale, missing or frozen: held in its safe state.
    SignalLost {
        /// Point index of the first stale signal.
        point: usize,
    },
    /// The site is in fail-safe (a guard signal is stale, missing or frozen).
    Failsafe,
    /// Fresh data returned; held a little longer so the return is calm.
    Recovering {
        /// Time left in the hold.
        left: Duration,
    },
    /// Its inhibit rule is true.
    Inhibited,
    /// Shed during a grid outage.
    Shed,
    /// Forced by a person until the given instant.
    Override {
        /// When the override ends.
        until: Timestamp,
    },
    /// Run from the grid to meet an obligation.
    Obligation {
        /// Index into the load's obligations.
        index: usize,
    },
    /// Started by its start rule this tick.
    Started,
    /// Stopped by its stop rule this tick.
    Stopped,
    /// On; its stop rule is not true.
    Running,
    /// Off; its start rule is not true.
    Waiting,
    /// Kept on by the minimum on-time although the stop rule is true.
    MinOn {
        /// Time left.
        left: Duration,
    },
    /// Kept off by the minimum off-time although the start rule is true.
    MinOff {
        /// Time left.
        left: Duration,
    },
    /// Kept off: the starts-per-hour cap is reached.
    StartsCapped {
        /// The cap.
        cap: u32,
    },
    /// Kept at its state after a recovery so it switches at most once in the settle period.
    Settling,
    /// A modulating load following the surplus.
    Following {
        /// Power allocated to it.
        power: Power,
    },
    /// A modulating load whose allocation is below its minimum.
    BelowMinimum {
        /// Power it could have.
        available: Power,
        /// Power it needs to run at all.
        minimum: Power,
    },
    /// A modulating load kept at its minimum with less than that available: a running
    /// charger until its stop rule ends the session (or from the grid with
    /// `below_min: hold`), a proportional load inside its band. The minimum on-time,
    /// where it is what holds the load, is [`Reason::MinOn`] instead.
    AtMinimum {
        /// Power it could have.
        available: Power,
        /// Power it draws at its minimum.
        minimum: Power,
    },
    /// A battery at its upper state-of-charge limit.
    Full,
    /// A battery discharging to cover the house's own import.
    CoveringHouse {
        /// The discharge.
        power: Power,
    },
    /// A battery that would cover the house, keeping its charge instead for its own
    /// `reach: N%` duty, inside the duty's grid window before the deadline.
    KeepingForDuty {
        /// Index into the load's obligations.
        index: usize,
    },
}

impl Reason {
    /// A short machine-friendly word for logs and JSON.
    pub fn code(&self) -> &'static str {
        match self {
            Reason::SignalLost { .. } => "signal_lost",
            Reason::Failsafe => "failsafe",
            Reason::Recovering { .. } => "recovering",
            Reason::Inhibited => "inhibited",
            Reason::Shed => "shed",
            Reason::Override { .. } => "override",
            Reason::Obligation { .. } => "obligation",
            Reason::Started => "start_rule",
            Reason::Stopped => "stop_rule",
            Reason::Running => "running",
            Reason::Waiting => "waiting",
            Reason::MinOn { .. } => "min_on",
            Reason::MinOff { .. } => "min_off",
            Reason::StartsCapped { .. } => "starts_capped",
            Reason::Settling => "settling",
            Reason::Following { .. } => "following_surplus",
            Reason::BelowMinimum { .. } => "below_minimum",
            Reason::AtMinimum { .. } => "at_minimum",
            Reason::Full => "full",
            Reason::CoveringHouse { .. } => "covering_house",
            Reason::KeepingForDuty { .. } => "keeping_for_duty",
        }
    }

    /// Whether the load is drawing grid power on purpose (for reports of grid top-up).
    pub fn is_grid_topup(&self) -> bool {
        matches!(self, Reason::Obligation { .. })
    }
}

/// A load's decision.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LoadDecision {
    /// The command to write.
    pub command: Command,
    /// Why.
    pub reason: Reason,
}

/// A load switching on or off or changing stage, for the log ("every switching is
/// logged with its cause"). Setpoint changes of modulating loads are not switchings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Switching {
    /// Which load.
    pub load: LoadId,
    /// Previous command.
    pub from: Command,
    /// New command.
    pub to: Command,
    /// Why.
    pub reason: Reason,
}

/// Why the inverter is limited.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LimitReason {
    /// Not limited.
    None,
    /// Export above the limit and no load can take more.
    ExportGuard,
    /// Export persisted past the guard deadline: the safe limit.
    Escalated,
    /// A guard signal is stale, missing or frozen.
    Failsafe,
}

impl LimitReason {
    /// The word for it wherever a person or a program reads it (status page, JSON, MQTT,
    /// `spillway test`): one spelling everywhere, never the Rust name.
    pub fn word(self) -> &'static str {
        match self {
            LimitReason::None => "none",
            LimitReason::ExportGuard => "export_guard",
            LimitReason::Escalated => "escalated",
            LimitReason::Failsafe => "failsafe",
        }
    }
}

impl fmt::Display for LimitReason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.word())
    }
}

/// The site-level state of the tick.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mode {
    /// Rules in charge.
    Normal,
    /// A guard signal is lost: everything in its safe state.
    Failsafe,
    /// Fresh data returned; loads held for the recovery period.
    Recovering,
    /// The grid is down on a backed-up site.
    Outage,
}

/// Everything decided in one tick.
#[derive(Debug, Clone, PartialEq)]
pub struct Decisions {
    /// The tick's instant.
    pub now: Timestamp,
    /// Per load, in `Site::loads` order.
    pub loads: Vec<LoadDecision>,
    /// The inverter's active-power limit (`None` = unlimited).
    pub inverter_limit: Option<Power>,
    /// Why the inverter is limited.
    pub limit_reason: LimitReason,
    /// Site mode.
    pub mode: Mode,
    /// Site surplus this tick (export + managed loads on + curtailed headroom).
    pub surplus: Power,
    /// Grid power used (import positive), if fresh.
    pub grid: Option<Power>,
    /// Loads that switched on or off or changed stage this tick.
    pub switchings: Vec<Switching>,
}

/// A share of the controller's total to the watt: it is a controller's output, and
/// `288.08 W available` reads as more precise than any meter behind it.
fn whole_watts(p: Power) -> Power {
    Power(p.0.round())
}

impl fmt::Display for Reason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Reason::SignalLost { point } => write!(f, "safe state: signal #{point} is stale"),
            Reason::Failsafe => f.write_str("safe state: a guard signal is lost (stale, missing or frozen)"),
            Reason::Recovering { left } => {
                write!(f, "held in safe state after signals returned ({} left)", format_whole_seconds(*left))
            }
            Reason::Inhibited => f.write_str("off: inhibit rule is true"),
            Reason::Shed => f.write_str("off: shed during a grid outage"),
            Reason::Override { until } => write!(f, "override until {until}"),
            Reason::Obligation { index } => {
                write!(f, "on from the grid for obligation #{}", index + 1)
            }
            Reason::Started => f.write_str("started: start rule is true"),
            Reason::Stopped => f.write_str("stopped: stop rule is true"),
            Reason::Running => f.write_str("on: stop rule not true"),
            Reason::Waiting => f.write_str("off: start rule not true"),
            Reason::MinOn { left } => write!(f, "held on: minimum on-time ({} left)", format_whole_seconds(*left)),
            Reason::MinOff { left } => write!(f, "held off: minimum off-time ({} left)", format_whole_seconds(*left)),
            Reason::StartsCapped { cap } => write!(f, "held off: {cap} starts in the last hour"),
            Reason::Settling => f.write_str("held: settling after signals returned"),
            Reason::Following { power } => write!(f, "following the surplus at {power}"),
            Reason::BelowMinimum { available, minimum } => {
                write!(f, "paused: {} available, needs {minimum}", whole_watts(*available))
            }
            Reason::AtMinimum { available, minimum } => {
                write!(f, "held at its minimum, {minimum}: {} available", whole_watts(*available))
            }
            Reason::Full => f.write_str("off: at its upper state of charge"),
            Reason::CoveringHouse { power } => write!(f, "discharging {power} to cover the house's own import"),
            Reason::KeepingForDuty { index } => {
                write!(f, "not discharging: keeping its charge for obligation #{}", index + 1)
            }
        }
    }
}
