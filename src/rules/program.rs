//! A compiled rule: a flat arena of nodes in evaluation order, and its evaluator.
//!
//! The checker emits nodes children-first, so one forward pass over the arena evaluates
//! the whole rule with no recursion and no allocation: each node reads its operands
//! from the values already computed in this tick. Every node runs every tick, so
//! held-for timers and windows sample continuously, whatever `and`/`or` would have
//! short-circuited.

use std::ops::Range;

use super::window::{AggKind, Window};
use super::{EvalInput, Slot, Type};

/// An arithmetic operator.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Arith {
    Add,
    Sub,
    Mul,
    Div,
}

/// A comparison operator.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub(crate) enum Cmp {
    Lt,
    Le,
    Gt,
    Ge,
    Eq,
    Ne,
}

impl Cmp {
    pub(crate) fn symbol(self) -> &'static str {
        match self {
            Cmp::Lt => "<",
            Cmp::Le => "<=",
            Cmp::Gt => ">",
            Cmp::Ge => ">=",
            Cmp::Eq => "==",
            Cmp::Ne => "!=",
        }
    }

    /// The operator with its operands swapped: `a < b` is `b > a`.
    pub(crate) fn mirrored(self) -> Cmp {
        match self {
            Cmp::Lt => Cmp::Gt,
            Cmp::Le => Cmp::Ge,
            Cmp::Gt => Cmp::Lt,
            Cmp::Ge => Cmp::Le,
            other => other,
        }
    }

    /// Compares two known numbers.
    pub(crate) fn holds(self, a: f64, b: f64) -> bool {
        match self {
            Cmp::Lt => a < b,
            Cmp::Le => a <= b,
            Cmp::Gt => a > b,
            Cmp::Ge => a >= b,
            Cmp::Eq => a == b,
            Cmp::Ne => a != b,
        }
    }
}

/// One node. Operands are indices of earlier nodes.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Node {
    /// A literal: number in base units, seconds of day, weekday 0–6, or 0/1.
    Const(f64),
    /// A numeric (or time, or weekday) value from the engine's table.
    Slot(u32),
    /// A boolean from the engine's table: any non-zero number is true.
    BoolSlot(u32),
    /// A percentage from the engine's table, clamped into 0–100 %.
    RatioSlot(u32),
    /// A time of day from the engine's table; unknown outside 0 ≤ t < 86400 s.
    TimeSlot(u32),
    /// A weekday from the engine's table; unknown unless a whole number 0–6.
    DaySlot(u32),
    /// The local time of day, seconds since midnight.
    Clock,
    /// The local weekday, 0 = Monday.
    Weekday,
    Neg(u32),
    Not(u32),
    Arith(Arith, u32, u32),
    Cmp(Cmp, u32, u32),
    And(u32, u32),
    Or(u32, u32),
    /// `x in lo..hi` for times of day: half-open, wrapping over midnight.
    InClock(u32, u32, u32),
    /// `x in lo..hi` for weekdays: inclusive, wrapping over the week's end.
    InDays(u32, u32, u32),
    /// `x in [days]`: bit `d` set for weekday `d`.
    InSet(u32, u8),
    /// `input for ms`; `timer` indexes the state's hold timers.
    Hold {
        input: u32,
        ms: i64,
        timer: u32,
    },
    /// `kind(input, ms)`; `window` indexes the state's windows.
    Agg {
        kind: AggKind,
        input: u32,
        ms: i64,
        window: u32,
    },
}

impl Node {
    /// The operands of this node, in order.
    pub(crate) fn children(&self) -> impl Iterator<Item = u32> {
        let (a, b, c) = match *self {
            Node::Const(_)
            | Node::Slot(_)
            | Node::BoolSlot(_)
            | Node::RatioSlot(_)
            | Node::TimeSlot(_)
            | Node::DaySlot(_)
            | Node::Clock
            | Node::Weekday => (None, None, None),
            Node::Neg(x) | Node::Not(x) | Node::InSet(x, _) => (Some(x), None, None),
            Node::Hold { input, .. } | Node::Agg { input, .. } => (Some(input), None, None),
            Node::Arith(_, x, y) | Node::Cmp(_, x, y) | Node::And(x, y) | Node::Or(x, y) => (Some(x), Some(y), None),
            Node::InClock(x, y, z) | Node::InDays(x, y, z) => (Some(x), Some(y), Some(z)),
        };
        a.into_iter().chain(b).chain(c)
    }
}

/// What the evaluator does not need but describe, explain and analysis do.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Meta {
    /// The text this node came from.
    pub span: Range<usize>,
    /// Its type.
    pub ty: Type,
    /// The name, for slots.
    pub name: Option<Box<str>>,
}

/// The compiled form of one rule.
#[derive(Debug, Clone)]
pub(crate) struct Program {
    pub source: String,
    pub nodes: Vec<Node>,
    pub meta: Vec<Meta>,
    pub root: u32,
    pub holds: u32,
    pub windows: Vec<AggKind>,
    pub slots: Vec<Slot>,
    pub horizon_ms: i64,
}

/// Seconds in a day on the wall clock.
const DAY_SECONDS: u32 = 86_400;

/// No hold in progress.
pub(crate) const NOT_HOLDING: i64 = i64::MIN;

/// The mutable side of a rule: timers, windows, the last values of every node.
#[derive(Debug, Clone)]
pub struct RuleState {
    /// Each node's value at the last tick (read by `explain`).
    pub(crate) values: Vec<f64>,
    /// For each `for`: when its condition became true, or [`NOT_HOLDING`].
    pub(crate) holds: Vec<i64>,
    pub(crate) windows: Vec<Window>,
    /// The instant of the last tick, ms.
    pub(crate) last_now: Option<i64>,
}

impl RuleState {
    pub(crate) fn new(p: &Program) -> Self {
        RuleState {
            values: vec![f64::NAN; p.nodes.len()],
            holds: vec![NOT_HOLDING; p.holds as usize],
            windows: p.windows.iter().map(|&k| Window::new(k)).collect(),
            last_now: None,
        }
    }

    fn fits(&self, p: &Program) -> bool {
        self.values.len() == p.nodes.len()
            && self.holds.len() == p.holds as usize
            && self.windows.len() == p.windows.len()
    }

    /// The capacity of every buffer, to check that steady-state ticks do not grow them.
    #[cfg(test)]
    pub(crate) fn capacities(&self) -> Vec<usize> {
        let mut c = vec![self.values.capacity(), self.holds.capacity()];
        c.extend(self.windows.iter().flat_map(Window::capacities));
        c
    }

    /// Forgets timers and history, keeping the buffers' capacity.
    fn restart(&mut self) {
        self.holds.fill(NOT_HOLDING);
        for w in &mut self.windows {
            w.clear();
        }
        self.values.fill(f64::NAN);
        self.last_now = None;
    }
}

/// Kleene truth as a number: true 1, false 0, unknown NaN.
fn truth(b: bool) -> f64 {
    if b { 1.0 } else { 0.0 }
}

impl Program {
    /// One tick: evaluates every node and returns the root's value.
    pub(crate) fn run(&self, input: &EvalInput<'_>, state: &mut RuleState) -> f64 {
        if !state.fits(self) {
            // A state made for another rule: start afresh rather than misread it.
            *state = RuleState::new(self);
        }
        let now = input.now.millis();
        if state.last_now.is_some_and(|last| now < last) {
            // Time went backwards (a clock was set): no timer or window can be trusted.
            state.restart();
        }
        // The contract says 0..86400; clamping keeps a stray 86400 (or more) inside the
        // day, where the static analysis assumes the clock is.
        let clock = f64::from(input.local.seconds_of_day.min(DAY_SECONDS - 1));
        let weekday = f64::from(input.local.weekday.num_days_from_monday());
        let v = &mut state.values;
        for (i, node) in self.nodes.iter().enumerate() {
            let x = match *node {
                Node::Const(c) => c,
                Node::Slot(s) => input.values.get(s as usize).copied().unwrap_or(f64::NAN),
                Node::BoolSlot(s) => {
                    let raw = input.values.get(s as usize).copied().unwrap_or(f64::NAN);
                    if raw.is_nan() { raw } else { truth(raw != 0.0) }
                }
                Node::RatioSlot(s) => {
                    // NaN passes through `clamp` unchanged.
                    let raw = input.values.get(s as usize).copied().unwrap_or(f64::NAN);
                    raw.clamp(0.0, 100.0)
                }
                Node::TimeSlot(s) => {
                    let raw = input.values.get(s as usize).copied().unwrap_or(f64::NAN);
                    if (0.0..f64::from(DAY_SECONDS)).contains(&raw) { raw } else { f64::NAN }
                }
                Node::DaySlot(s) => {
                    let raw = input.values.get(s as usize).copied().unwrap_or(f64::NAN);
                    if (0.0..7.0).contains(&raw) && raw.fract() == 0.0 { raw } else { f64::NAN }
                }
                Node::Clock => clock,
                Node::Weekday => weekday,
                Node::Neg(a) => -v[a as usize],
                Node::Not(a) => 1.0 - v[a as usize],
                Node::Arith(op, a, b) => {
                    let (a, b) = (v[a as usize], v[b as usize]);
                    match op {
                        Arith::Add => a + b,
                        Arith::Sub => a - b,
                        Arith::Mul => a * b,
                        Arith::Div => a / b,
                    }
                }
                Node::Cmp(op, a, b) => {
                    let (a, b) = (v[a as usize], v[b as usize]);
                    if a.is_nan() || b.is_nan() { f64::NAN } else { truth(op.holds(a, b)) }
                }
                Node::And(a, b) => {
                    let (a, b) = (v[a as usize], v[b as usize]);
                    if a == 0.0 || b == 0.0 {
                        0.0
                    } else if a.is_nan() || b.is_nan() {
                        f64::NAN
                    } else {
                        1.0
                    }
                }
                Node::Or(a, b) => {
                    let (a, b) = (v[a as usize], v[b as usize]);
                    if a == 1.0 || b == 1.0 {
                        1.0
                    } else if a.is_nan() || b.is_nan() {
                        f64::NAN
                    } else {
                        0.0
                    }
                }
                Node::InClock(x, lo, hi) => {
                    let (x, lo, hi) = (v[x as usize], v[lo as usize], v[hi as usize]);
                    if x.is_nan() || lo.is_nan() || hi.is_nan() {
                        f64::NAN
                    } else if lo <= hi {
                        truth(lo <= x && x < hi)
                    } else {
                        truth(x >= lo || x < hi)
                    }
                }
                Node::InDays(x, lo, hi) => {
                    let (x, lo, hi) = (v[x as usize], v[lo as usize], v[hi as usize]);
                    if x.is_nan() || lo.is_nan() || hi.is_nan() {
                        f64::NAN
                    } else if lo <= hi {
                        truth(lo <= x && x <= hi)
                    } else {
                        truth(x >= lo || x <= hi)
                    }
                }
                Node::InSet(x, mask) => {
                    let x = v[x as usize];
                    if (0.0..7.0).contains(&x) {
                        // In 0..7 by the check above.
                        truth(mask & (1 << (x as u32)) != 0)
                    } else if x.is_nan() {
                        f64::NAN
                    } else {
                        0.0
                    }
                }
                Node::Hold { input, ms, timer } => {
                    let x = v[input as usize];
                    let since = &mut state.holds[timer as usize];
                    if x == 1.0 {
                        if *since == NOT_HOLDING {
                            *since = now;
                        }
                        truth(now.saturating_sub(*since) >= ms)
                    } else {
                        *since = NOT_HOLDING;
                        x
                    }
                }
                Node::Agg { input, ms, window, .. } => {
                    let w = &mut state.windows[window as usize];
                    w.push(now, v[input as usize], ms);
                    w.value(now, ms)
                }
            };
            v[i] = x;
        }
        state.last_now = Some(now);
        v[self.root as usize]
    }

    /// The operands of a chain of the same `and` or `or` rooted at `i`, left to right
    /// (`a and b and c` gives a, b, c); any other node is a chain of itself.
    pub(crate) fn chain(&self, i: u32, out: &mut Vec<u32>) {
        let node = self.nodes[i as usize];
        match node {
            Node::And(a, b) | Node::Or(a, b) => {
                for c in [a, b] {
                    let same = std::mem::discriminant(&self.nodes[c as usize]) == std::mem::discriminant(&node);
                    if same {
                        self.chain(c, out);
                    } else {
                        out.push(c);
                    }
                }
            }
            _ => out.push(i),
        }
    }
}
