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
use std::sync::Arc;
use std::time::Duration;

use crate::units::{Dimension, Timestamp};

mod analysis;
mod check;
mod describe;
mod diagnostic;
pub(crate) mod format;
mod lexer;
mod parser;
mod program;
mod window;

#[cfg(test)]
mod tests;

pub use analysis::{implies, satisfiable};

/// The unit a mistyped symbol most likely means (`m` → `min`, `sec` → `s`, `kw` → `kW`),
/// the same advice in site files as in rules.
pub fn suggest_unit(symbol: &str) -> Option<&'static str> {
    lexer::suggest_unit(symbol)
}

/// How to write a bare number as a quantity of `dimension` ("write 95%" for 0.95).
pub fn unit_suggestion(value: f64, dimension: crate::units::Dimension) -> Option<String> {
    format::unit_suggestion(value, dimension)
}

/// Whether a word is taken by the rule language itself (`and`, `in`, `true`, a weekday
/// such as `sat`), so a signal of that name could never be written in a rule.
pub fn is_reserved_word(s: &str) -> bool {
    lexer::KEYWORDS.contains(&s) || lexer::WEEKDAYS.contains(&s)
}
pub use diagnostic::{to_diagnostic, to_diagnostic_mapped};
pub use program::RuleState;

use program::Program;

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

/// A rule that passed every check, and the warnings found on the way.
#[derive(Debug, Clone)]
pub struct Compiled {
    /// The rule, ready to evaluate.
    pub rule: Rule,
    /// Findings that do not stop the rule from being used (codes `R04xx`).
    pub warnings: Vec<RuleDiagnostic>,
}

/// A compiled rule: immutable and cheap to clone or share between threads; the mutable
/// side of an evaluation lives in a [`RuleState`].
#[derive(Debug, Clone)]
pub struct Rule {
    program: Arc<Program>,
}

/// Compiles a rule, which must be a condition, against the names of `scope`.
///
/// On failure the vector holds every error found (and any warnings), sorted by
/// position, each with its span inside `text`.
pub fn compile(text: &str, scope: &dyn Scope) -> Result<Compiled, Vec<RuleDiagnostic>> {
    compile_as(text, scope, Type::Bool)
}

/// Compiles an expression of the `expected` type: [`Type::Bool`] for a rule, or a
/// number such as `Type::Number(Dimension::Power)` for a computed signal (read it with
/// [`Rule::value`]). Same checks as [`compile`].
pub fn compile_as(text: &str, scope: &dyn Scope, expected: Type) -> Result<Compiled, Vec<RuleDiagnostic>> {
    let mut diags = Vec::new();
    let (tokens, complete) = lexer::lex(text, &mut diags);
    let program = if complete {
        match parser::parse(text, &tokens) {
            Ok(expr) => check::check(text, &expr, scope, expected, &mut diags),
            Err(d) => {
                diags.push(*d);
                None
            }
        }
    } else {
        None
    };
    let program = match program {
        Some(p) if !diags.iter().any(RuleDiagnostic::is_error) => p,
        _ => {
            diags.sort_by_key(|d| (d.span.start, d.span.end));
            return Err(diags);
        }
    };
    analysis::lint(&program, &mut diags);
    diags.sort_by_key(|d| (d.span.start, d.span.end));
    Ok(Compiled { rule: Rule { program: Arc::new(program) }, warnings: diags })
}

impl Rule {
    pub(crate) fn program(&self) -> &Program {
        &self.program
    }

    /// The text the rule was compiled from.
    pub fn source(&self) -> &str {
        &self.program.source
    }

    /// The rule's type: [`Type::Bool`] for rules from [`compile`].
    pub fn ty(&self) -> Type {
        self.program.meta[self.program.root as usize].ty
    }

    /// Fresh timers and windows for evaluating this rule.
    pub fn new_state(&self) -> RuleState {
        RuleState::new(&self.program)
    }

    /// Evaluates the rule at one engine tick. Call it once per tick, with `now` never
    /// going backwards: held-for timers and windows sample here. A second call at the
    /// same instant re-evaluates without adding a sample; time going backwards restarts
    /// every timer and window. Never allocates once the windows have grown to their
    /// steady size.
    pub fn eval(&self, input: &EvalInput<'_>, state: &mut RuleState) -> Truth {
        describe::truth_of(self.program.run(input, state))
    }

    /// Like [`Rule::eval`], for an expression from [`compile_as`]: the value in base
    /// units, `NaN` when unknown (for a condition: 1.0, 0.0 or `NaN`).
    pub fn value(&self, input: &EvalInput<'_>, state: &mut RuleState) -> f64 {
        self.program.run(input, state)
    }

    /// Every slot the rule reads, sorted, without repeats.
    pub fn slots(&self) -> &[Slot] {
        &self.program.slots
    }

    /// The canonical text: explicit grouping, normalised units, one space around
    /// operators; `surplus > 3.2kW for 30s` becomes `(surplus > 3.2 kW) for 30 s`. It
    /// compiles back to the same rule.
    pub fn describe(&self) -> String {
        describe::describe(&self.program, self.program.root)
    }

    /// Why the rule is what it is after the last [`Rule::eval`], with the values it saw:
    /// `surplus 2.1 kW is not > 3.2 kW`, `surplus > 3.2 kW held 12 s of 30 s`.
    ///
    /// Reads only what that evaluation left in `state`; `input` is accepted so callers
    /// pass the tick they are explaining, and is not re-evaluated.
    pub fn explain(&self, _input: &EvalInput<'_>, state: &RuleState) -> String {
        describe::explain(&self.program, state)
    }

    /// The longest chain of nested windows and holds: how much history the rule needs
    /// before every part of it can be known.
    pub fn horizon(&self) -> Duration {
        Duration::from_millis(u64::try_from(self.program.horizon_ms).unwrap_or(0))
    }
}
