//! A small site scope and a tick-by-tick runner for the rule tests.

use chrono::Weekday;

use crate::rules::{
    Compiled, EvalInput, LocalClock, Rule, RuleDiagnostic, RuleState, Scope, Slot, Truth, Type, compile,
};
use crate::units::{Dimension, Timestamp};

/// The names of an imagined site with a water tank, a battery and an EV.
pub(crate) const NAMES: &[(&str, Type)] = &[
    ("surplus", Type::Number(Dimension::Power)),
    ("grid", Type::Number(Dimension::Power)),
    ("import", Type::Number(Dimension::Power)),
    ("pv", Type::Number(Dimension::Power)),
    ("load", Type::Number(Dimension::Power)),
    ("tank_temp", Type::Number(Dimension::Temperature)),
    ("soc", Type::Number(Dimension::Ratio)),
    ("tank.on", Type::Bool),
    ("tank.power", Type::Number(Dimension::Power)),
    ("tank.runtime_today", Type::Number(Dimension::Duration)),
    ("tank.energy_today", Type::Number(Dimension::Energy)),
    ("battery.voltage", Type::Number(Dimension::Voltage)),
    ("ev.current", Type::Number(Dimension::Current)),
    ("pool.on", Type::Bool),
    ("cycles", Type::Number(Dimension::Scalar)),
    ("sunset", Type::TimeOfDay),
    ("pool.runtime_today", Type::Number(Dimension::Duration)),
    ("battery.current", Type::Number(Dimension::Current)),
];

/// A scope over [`NAMES`]: slot `i` is the `i`-th name.
pub(crate) struct Site;

impl Scope for Site {
    fn lookup(&self, name: &str) -> Option<(Slot, Type)> {
        let i = NAMES.iter().position(|(n, _)| *n == name)?;
        Some((Slot(i as u32), NAMES[i].1))
    }

    fn names(&self) -> Vec<String> {
        NAMES.iter().map(|(n, _)| (*n).to_owned()).collect()
    }
}

pub(crate) fn slot(name: &str) -> usize {
    NAMES.iter().position(|(n, _)| *n == name).unwrap_or_else(|| panic!("no test name {name}"))
}

pub(crate) fn compiled(text: &str) -> Compiled {
    match compile(text, &Site) {
        Ok(c) => c,
        Err(d) => panic!("{text}: {d:#?}"),
    }
}

pub(crate) fn rule(text: &str) -> Rule {
    compiled(text).rule
}

pub(crate) fn errors(text: &str) -> Vec<RuleDiagnostic> {
    match compile(text, &Site) {
        Ok(c) => panic!("{text} compiled to {}", c.rule.describe()),
        Err(d) => d,
    }
}

pub(crate) fn codes(d: &[RuleDiagnostic]) -> Vec<&'static str> {
    d.iter().map(|d| d.code).collect()
}

/// A rule evaluated tick by tick; time starts on a Monday at midnight.
pub(crate) struct Run {
    pub rule: Rule,
    pub state: RuleState,
    pub values: Vec<f64>,
    pub now_ms: i64,
    pub clock: LocalClock,
}

/// 2026-06-01 00:00:00 UTC, a Monday.
pub(crate) const MONDAY_MIDNIGHT_MS: i64 = 1_780_272_000_000;

impl Run {
    pub(crate) fn new(text: &str) -> Run {
        Run::from_rule(rule(text))
    }

    pub(crate) fn from_rule(rule: Rule) -> Run {
        let state = rule.new_state();
        Run {
            rule,
            state,
            values: vec![f64::NAN; NAMES.len()],
            now_ms: MONDAY_MIDNIGHT_MS,
            clock: LocalClock { seconds_of_day: 0, weekday: Weekday::Mon },
        }
    }

    pub(crate) fn set(&mut self, name: &str, value: f64) -> &mut Run {
        self.values[slot(name)] = value;
        self
    }

    fn input(&self) -> EvalInput<'_> {
        input(&self.values, self.now_ms, self.clock)
    }

    /// Evaluates at `t` seconds after the start, with the clock following along.
    pub(crate) fn at(&mut self, t: f64) -> Truth {
        self.now_ms = MONDAY_MIDNIGHT_MS + (t * 1000.0).round() as i64;
        let secs = (self.now_ms - MONDAY_MIDNIGHT_MS) / 1000;
        self.clock = LocalClock {
            seconds_of_day: (secs % 86_400) as u32,
            weekday: [Weekday::Mon, Weekday::Tue, Weekday::Wed, Weekday::Thu, Weekday::Fri, Weekday::Sat, Weekday::Sun]
                [(secs / 86_400 % 7) as usize],
        };
        let input = EvalInput { values: &self.values, now: Timestamp::from_millis(self.now_ms), local: self.clock };
        self.rule.eval(&input, &mut self.state)
    }

    /// The value of a numeric expression at `t` (for `compile_as` rules).
    pub(crate) fn value_at(&mut self, t: f64) -> f64 {
        self.at(t);
        let input = input(&self.values, self.now_ms, self.clock);
        // A second evaluation at the same instant reads the same value.
        self.rule.value(&input, &mut self.state)
    }

    pub(crate) fn explain(&self) -> String {
        self.rule.explain(&self.input(), &self.state)
    }
}

fn input(values: &[f64], now_ms: i64, local: LocalClock) -> EvalInput<'_> {
    EvalInput { values, now: Timestamp::from_millis(now_ms), local }
}
