//! The rule language: text such as `surplus > 3.2kW for 30s and tank_temp < 58°C`
//! compiled, against the names a site defines, into a [`Rule`] the engine evaluates
//! every tick.
//!
//! CONTRACT (kept stable for `config` and `engine`; the bodies are the rules
//! module's own business):
//!
//! - [`compile`] checks a rule against a [`Scope`] and returns a [`Rule`] or every
//!   [`RuleDiagnostic`] found, each with a byte span *inside the rule text*; the
//!   config loader maps those spans into the YAML file.
//! - [`Rule::eval`] is pure apart from the caller-owned [`RuleState`]: no I/O, no
//!   clock, no allocation in steady state, always terminates.
//! - Values are `f64` in base units (see `crate::units`); `NaN` means unknown (a
//!   stale or missing signal), and unknown propagates with Kleene logic.

use std::ops::Range;

use crate::units::{Dimension, Timestamp};

/// Where a name's value lives in the engine's value table.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub struct Slot(pub u32);

/// The static type of an expression.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Type {
    /// True or false (a load's `on`, a comparison).
    Bool,
    /// A number of some dimension (power, temperature, …).
    Number(Dimension),
    /// A time of day in the site's time zone (`17:00`).
    TimeOfDay,
    /// A day of the week (`mon` … `sun`).
    Weekday,
}

/// The names a rule may use, and what they are. Built by the config loader from the
/// site's points, the engine's derived signals and each load's state.
pub trait Scope {
    /// The slot and type of `name`, or `None` if the site has no such name.
    fn lookup(&self, name: &str) -> Option<(Slot, Type)>;
    /// Every name in scope, for "did you mean" suggestions.
    fn names(&self) -> Vec<String>;
}

/// How bad a diagnostic is.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum Severity {
    /// Worth a look; loading goes on.
    Warning,
    /// The rule cannot be used.
    Error,
}

/// One finding about a rule's text, located by byte ranges inside that text.
#[derive(Debug, Clone, PartialEq)]
pub struct RuleDiagnostic {
    /// Error or warning.
    pub severity: Severity,
    /// A stable code such as `R0101`, documented in `docs/rules.md`.
    pub code: &'static str,
    /// Lowercase fragment, no trailing period: `unknown name "tank_tmp"`.
    pub message: String,
    /// The exact offending text, as a byte range into the rule source.
    pub span: Range<usize>,
    /// What the primary span is labelled with (`expected a power`).
    pub label: String,
    /// Further labelled spans (`this is a temperature`).
    pub secondary: Vec<(Range<usize>, String)>,
    /// Notes and help (`did you mean "tank_temp"?`).
    pub notes: Vec<String>,
}

/// Three-valued truth: a rule over a stale signal is neither true nor false.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Truth {
    /// Definitely true.
    True,
    /// Definitely false.
    False,
    /// Depends on an unknown value.
    Unknown,
}

impl Truth {
    /// True only when definitely true.
    pub fn is_true(self) -> bool {
        self == Truth::True
    }
}

/// The local calendar position of `now`, computed once per tick by the engine.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LocalClock {
    /// Seconds since local midnight (0..86400; a DST day may be shorter or longer).
    pub seconds_of_day: u32,
    /// Day of the week in the site's time zone.
    pub weekday: chrono::Weekday,
}

/// Everything a rule can see at one tick.
#[derive(Debug, Clone, Copy)]
pub struct EvalInput<'a> {
    /// Values by [`Slot`], base units, `NaN` = unknown, booleans as 0.0/1.0.
    pub values: &'a [f64],
    /// The instant being decided.
    pub now: Timestamp,
    /// `now` in the site's time zone.
    pub local: LocalClock,
}
mod placeholder;
pub use placeholder::*;
