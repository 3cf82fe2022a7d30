//! Static reasoning over rules: can a rule ever be true, does one rule imply another,
//! and the always-true/always-false warnings of `compile`.
//!
//! A rule is abstracted into a formula over *variables*: each signal compared with a
//! constant, the clock, the weekday, each window aggregate, and each comparison we
//! cannot reason about (say `pv > load`) as an opaque true/false/unknown atom. The
//! constants compared against a variable cut its domain into cells (the points and the
//! open intervals between them); within a cell every comparison has one answer, so
//! trying one value per cell, over every combination of cells, decides the formula
//! exactly. Unknown is one more cell of every signal, and Kleene logic is applied as
//! the evaluator does.
//!
//! Two abstractions keep the answers sound:
//! - the *free* model over-approximates every reachable state: windows are variables
//!   of their own and a held-for condition may or may not have held long enough. What
//!   it proves impossible is impossible: `Some(false)` from [`satisfiable`], `Some(true)`
//!   from [`implies`].
//! - two models of states that really happen: *steady*, every signal constant for
//!   longer than the rule's horizon (a window equals its signal, a hold equals its
//!   condition), and *start*, the first tick after the engine starts (every window is
//!   unknown, every hold of a non-zero duration not yet held). A witness in either
//!   proves `Some(true)` from [`satisfiable`] or `Some(false)` from [`implies`],
//!   provided the formula has no opaque atom and, in the steady model, no hold over the
//!   clock (which does not stand still).
//!
//! Anything else is `None`.

use std::ops::Range;

use super::describe::describe;
use super::diagnostic::warning;
use super::program::{Cmp, Node, Program};
use super::{Rule, RuleDiagnostic, Type};
use crate::units::Dimension;

/// Most cell combinations tried before answering "cannot tell".
const MAX_CELLS: u64 = 200_000;

const DAY_SECONDS: f64 = 86_400.0;

/// What a variable is, for choosing its cells.
#[derive(Debug, Clone, PartialEq)]
enum Key {
    Slot(u32),
    Clock,
    Weekday,
    /// A window, a hold's "held long enough", or an opaque atom, by its canonical text.
    Text(String),
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum Domain {
    /// Numbers from `lo` to `hi`; `hi` itself excluded when `open_hi`.
    Real { lo: f64, hi: f64, open_hi: bool },
    /// Weekdays 0–6.
    Days,
    /// False or true.
    Flag,
}

#[derive(Debug, Clone)]
struct Var {
    key: Key,
    domain: Domain,
    /// Whether the variable can be unknown.
    unknown: bool,
    /// Constants it is compared with.
    consts: Vec<f64>,
}

/// A rule as a formula over the model's variables.
#[derive(Debug, Clone)]
enum F {
    /// A constant truth: 1, 0 or NaN.
    K(f64),
    Cmp {
        var: usize,
        op: Cmp,
        c: f64,
    },
    InClock {
        var: usize,
        lo: f64,
        hi: f64,
    },
    InDays {
        var: usize,
        lo: f64,
        hi: f64,
    },
    InSet {
        var: usize,
        mask: u8,
    },
    Truthy(usize),
    Not(Box<F>),
    And(Box<F>, Box<F>),
    Or(Box<F>, Box<F>),
    /// Held for long enough (`h`) applies only once the condition is true.
    Hold {
        inner: Box<F>,
        h: usize,
    },
    /// A hold at the first tick: false where its condition is true.
    Fresh(Box<F>),
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Mode {
    Free,
    Steady,
    Start,
}

#[derive(Debug, Default)]
struct Model {
    vars: Vec<Var>,
    /// A steady- or start-model formula met something it could not represent
    /// faithfully, so its states are no longer sure to happen.
    opaque: bool,
}

fn truth(b: bool) -> f64 {
    if b { 1.0 } else { 0.0 }
}

impl Model {
    fn var(&mut self, key: Key, domain: Domain, unknown: bool) -> usize {
        if let Some(i) = self.vars.iter().position(|v| v.key == key) {
            return i;
        }
        self.vars.push(Var { key, domain, unknown, consts: Vec::new() });
        self.vars.len() - 1
    }

    fn constrain(&mut self, var: usize, c: f64) -> usize {
        self.vars[var].consts.push(c);
        var
    }

    fn opaque(&mut self, p: &Program, i: u32, mode: Mode) -> F {
        if mode != Mode::Free {
            self.opaque = true;
        }
        let key = Key::Text(format!("atom {}", describe(p, i)));
        F::Truthy(self.var(key, Domain::Flag, true))
    }

    /// The variable a numeric (or time, or weekday) node stands for, if it is one.
    fn value_var(&mut self, p: &Program, i: u32, mode: Mode) -> Option<usize> {
        let meta = &p.meta[i as usize];
        let domain_of = |ty: Type| match ty {
            Type::Number(Dimension::Ratio) => Domain::Real { lo: 0.0, hi: 100.0, open_hi: false },
            Type::TimeOfDay => Domain::Real { lo: 0.0, hi: DAY_SECONDS, open_hi: true },
            Type::Weekday => Domain::Days,
            Type::Bool => Domain::Flag,
            Type::Number(_) => Domain::Real { lo: f64::NEG_INFINITY, hi: f64::INFINITY, open_hi: true },
        };
        match p.nodes[i as usize] {
            Node::Slot(s) | Node::BoolSlot(s) | Node::RatioSlot(s) | Node::TimeSlot(s) | Node::DaySlot(s) => {
                Some(self.var(Key::Slot(s), domain_of(meta.ty), true))
            }
            Node::Clock => Some(self.var(Key::Clock, domain_of(Type::TimeOfDay), false)),
            Node::Weekday => Some(self.var(Key::Weekday, Domain::Days, false)),
            Node::Agg { input, .. } => match mode {
                // A steady signal's window is the signal itself.
                Mode::Steady if is_slot(&p.nodes[input as usize]) => self.value_var(p, input, mode),
                Mode::Steady => None,
                // Handled by `formula`: a window is unknown at the first tick.
                Mode::Start => None,
                Mode::Free => {
                    let domain = if is_slot(&p.nodes[input as usize]) {
                        domain_of(p.meta[input as usize].ty)
                    } else {
                        domain_of(Type::Number(Dimension::Scalar))
                    };
                    Some(self.var(Key::Text(format!("window {}", describe(p, i))), domain, true))
                }
            },
            _ => None,
        }
    }

    /// The formula for the boolean node `i`.
    fn formula(&mut self, p: &Program, i: u32, mode: Mode) -> F {
        let node = p.nodes[i as usize];
        if mode == Mode::Start
            && matches!(node, Node::Cmp(..) | Node::InClock(..) | Node::InDays(..) | Node::InSet(..))
            && node.children().any(|c| reads_window(p, c))
        {
            return F::K(f64::NAN);
        }
        match node {
            Node::Const(c) => F::K(c),
            Node::BoolSlot(_) => match self.value_var(p, i, mode) {
                Some(v) => F::Truthy(v),
                None => self.opaque(p, i, mode),
            },
            Node::Not(a) => F::Not(Box::new(self.formula(p, a, mode))),
            Node::And(a, b) => F::And(Box::new(self.formula(p, a, mode)), Box::new(self.formula(p, b, mode))),
            Node::Or(a, b) => F::Or(Box::new(self.formula(p, a, mode)), Box::new(self.formula(p, b, mode))),
            Node::Hold { input, .. } => match mode {
                Mode::Free => {
                    let inner = self.formula(p, input, mode);
                    let key = Key::Text(format!("held {}", describe(p, i)));
                    let h = self.var(key, Domain::Flag, false);
                    F::Hold { inner: Box::new(inner), h }
                }
                Mode::Steady if reads_clock(p, input) => self.opaque(p, i, mode),
                Mode::Steady => self.formula(p, input, mode),
                Mode::Start => {
                    let inner = self.formula(p, input, mode);
                    match p.nodes[i as usize] {
                        Node::Hold { ms: 0, .. } => inner,
                        _ => F::Fresh(Box::new(inner)),
                    }
                }
            },
            Node::Cmp(op, a, b) => match (constant(p, a), constant(p, b)) {
                (Some(x), Some(y)) => F::K(truth(op.holds(x, y))),
                (None, Some(c)) => match self.value_var(p, a, mode) {
                    Some(v) => F::Cmp { var: self.constrain(v, c), op, c },
                    None => self.opaque(p, i, mode),
                },
                (Some(c), None) => match self.value_var(p, b, mode) {
                    Some(v) => F::Cmp { var: self.constrain(v, c), op: op.mirrored(), c },
                    None => self.opaque(p, i, mode),
                },
                (None, None) => self.opaque(p, i, mode),
            },
            Node::InClock(x, lo, hi) | Node::InDays(x, lo, hi) => {
                let clock = matches!(p.nodes[i as usize], Node::InClock(..));
                let (Some(lo_c), Some(hi_c)) = (constant(p, lo), constant(p, hi)) else {
                    return self.opaque(p, i, mode);
                };
                if let Some(xc) = constant(p, x) {
                    return F::K(truth(in_range(clock, xc, lo_c, hi_c)));
                }
                let Some(v) = self.value_var(p, x, mode) else {
                    return self.opaque(p, i, mode);
                };
                self.constrain(v, lo_c);
                self.constrain(v, hi_c);
                if clock { F::InClock { var: v, lo: lo_c, hi: hi_c } } else { F::InDays { var: v, lo: lo_c, hi: hi_c } }
            }
            Node::InSet(x, mask) => {
                if let Some(xc) = constant(p, x) {
                    return F::K(truth(in_set(xc, mask)));
                }
                match self.value_var(p, x, mode) {
                    Some(v) => F::InSet { var: v, mask },
                    None => self.opaque(p, i, mode),
                }
            }
            _ => self.opaque(p, i, mode),
        }
    }

    /// One representative value per cell of each variable.
    fn cells(&self) -> Vec<Vec<f64>> {
        self.vars.iter().map(cells_of).collect()
    }
}

fn cells_of(v: &Var) -> Vec<f64> {
    let mut reps = match v.domain {
        Domain::Flag => vec![0.0, 1.0],
        Domain::Days => (0..7).map(f64::from).collect(),
        Domain::Real { lo, hi, open_hi } => {
            let inside = |c: f64| c >= lo && (c < hi || (!open_hi && c <= hi));
            let mut points: Vec<f64> = v.consts.iter().copied().filter(|&c| inside(c)).collect();
            if lo.is_finite() {
                points.push(lo);
            }
            if hi.is_finite() && !open_hi {
                points.push(hi);
            }
            points.sort_by(f64::total_cmp);
            points.dedup();
            let mut reps = Vec::with_capacity(points.len() * 2 + 2);
            match (points.first(), points.last()) {
                (Some(&first), Some(&last)) => {
                    if lo.is_infinite() {
                        reps.push(first - 1.0 - first.abs());
                    }
                    for w in points.windows(2) {
                        reps.push(w[0]);
                        reps.push(w[0] + (w[1] - w[0]) / 2.0);
                    }
                    reps.push(last);
                    if last < hi {
                        reps.push(if hi.is_infinite() { last + 1.0 + last.abs() } else { last + (hi - last) / 2.0 });
                    }
                }
                _ => reps.push(0.0),
            }
            reps
        }
    };
    if v.unknown {
        reps.push(f64::NAN);
    }
    reps
}

fn in_range(clock: bool, x: f64, lo: f64, hi: f64) -> bool {
    match (clock, lo <= hi) {
        (true, true) => lo <= x && x < hi,
        (true, false) => x >= lo || x < hi,
        (false, true) => lo <= x && x <= hi,
        (false, false) => x >= lo || x <= hi,
    }
}

fn in_set(x: f64, mask: u8) -> bool {
    // In 0..7 by the check, so the shift is in range.
    (0.0..7.0).contains(&x) && mask & (1 << (x as u32)) != 0
}

/// The value of a node that reads no signal, clock, timer or window.
pub(crate) fn constant(p: &Program, i: u32) -> Option<f64> {
    Some(match p.nodes[i as usize] {
        Node::Const(c) => c,
        Node::Neg(a) => -constant(p, a)?,
        Node::Arith(op, a, b) => {
            let (a, b) = (constant(p, a)?, constant(p, b)?);
            match op {
                super::program::Arith::Add => a + b,
                super::program::Arith::Sub => a - b,
                super::program::Arith::Mul => a * b,
                super::program::Arith::Div => a / b,
            }
        }
        _ => return None,
    })
}

/// A numeric signal read straight from the engine's table.
fn is_slot(n: &Node) -> bool {
    matches!(n, Node::Slot(_) | Node::RatioSlot(_))
}

/// Whether the numeric subtree `i` reads a window (an aggregate operand, possibly
/// inside arithmetic); a boolean operand such as `tank.on` is not looked into.
fn reads_window(p: &Program, i: u32) -> bool {
    match p.nodes[i as usize] {
        Node::Agg { .. } => true,
        Node::Neg(a) => reads_window(p, a),
        Node::Arith(_, a, b) => reads_window(p, a) || reads_window(p, b),
        _ => false,
    }
}

fn reads_clock(p: &Program, i: u32) -> bool {
    matches!(p.nodes[i as usize], Node::Clock | Node::Weekday)
        || p.nodes[i as usize].children().any(|c| reads_clock(p, c))
}

fn kleene_and(a: f64, b: f64) -> f64 {
    if a == 0.0 || b == 0.0 {
        0.0
    } else if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        1.0
    }
}

fn kleene_or(a: f64, b: f64) -> f64 {
    if a == 1.0 || b == 1.0 {
        1.0
    } else if a.is_nan() || b.is_nan() {
        f64::NAN
    } else {
        0.0
    }
}

fn eval(f: &F, vals: &[f64]) -> f64 {
    match f {
        F::K(c) => *c,
        F::Cmp { var, op, c } => {
            let x = vals[*var];
            if x.is_nan() { x } else { truth(op.holds(x, *c)) }
        }
        F::InClock { var, lo, hi } | F::InDays { var, lo, hi } => {
            let x = vals[*var];
            if x.is_nan() { x } else { truth(in_range(matches!(f, F::InClock { .. }), x, *lo, *hi)) }
        }
        F::InSet { var, mask } => {
            let x = vals[*var];
            if x.is_nan() { x } else { truth(in_set(x, *mask)) }
        }
        F::Truthy(var) => {
            let x = vals[*var];
            if x.is_nan() { x } else { truth(x != 0.0) }
        }
        F::Not(a) => 1.0 - eval(a, vals),
        F::And(a, b) => kleene_and(eval(a, vals), eval(b, vals)),
        F::Or(a, b) => kleene_or(eval(a, vals), eval(b, vals)),
        F::Hold { inner, h } => {
            let v = eval(inner, vals);
            if v == 1.0 { vals[*h] } else { v }
        }
        F::Fresh(inner) => {
            let v = eval(inner, vals);
            if v == 1.0 { 0.0 } else { v }
        }
    }
}

/// Calls `visit` with the variable values of every cell combination; false when there
/// are too many to try. `visit` returns false to stop early.
fn each_cell(model: &Model, mut visit: impl FnMut(&[f64]) -> bool) -> bool {
    let cells = model.cells();
    let total = cells.iter().try_fold(1u64, |acc, c| acc.checked_mul(c.len() as u64));
    if total.is_none_or(|t| t > MAX_CELLS) {
        return false;
    }
    let mut index = vec![0usize; cells.len()];
    let mut vals: Vec<f64> = cells.iter().map(|c| c[0]).collect();
    loop {
        if !visit(&vals) {
            return true;
        }
        // Advance the odometer.
        let mut k = 0;
        loop {
            if k == cells.len() {
                return true;
            }
            index[k] += 1;
            if index[k] < cells[k].len() {
                vals[k] = cells[k][index[k]];
                break;
            }
            index[k] = 0;
            vals[k] = cells[k][0];
            k += 1;
        }
    }
}

/// What a formula can be: ever true, and always true whenever its signals are known.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Outcome {
    can_be_true: bool,
    always_true_when_known: bool,
}

fn outcome(model: &Model, f: &F) -> Option<Outcome> {
    let mut o = Outcome { can_be_true: false, always_true_when_known: true };
    let complete = each_cell(model, |vals| {
        let v = eval(f, vals);
        if v == 1.0 {
            o.can_be_true = true;
        } else if !vals.iter().any(|x| x.is_nan()) {
            o.always_true_when_known = false;
        }
        true
    });
    complete.then_some(o)
}

/// Whether the rule can ever be true: `Some(false)` means never.
pub fn satisfiable(a: &Rule) -> Option<bool> {
    let p = a.program();
    let mut free = Model::default();
    let f = free.formula(p, p.root, Mode::Free);
    if !outcome(&free, &f)?.can_be_true {
        return Some(false);
    }
    for mode in [Mode::Steady, Mode::Start] {
        let mut real = Model::default();
        let f = real.formula(p, p.root, mode);
        if !real.opaque && outcome(&real, &f).is_some_and(|o| o.can_be_true) {
            return Some(true);
        }
    }
    None
}

/// Whether every state that makes `a` true makes `b` true: `Some(true)` proven,
/// `Some(false)` with a state that can happen, `None` when it cannot tell.
pub fn implies(a: &Rule, b: &Rule) -> Option<bool> {
    let (pa, pb) = (a.program(), b.program());
    let mut free = Model::default();
    let fa = free.formula(pa, pa.root, Mode::Free);
    let fb = free.formula(pb, pb.root, Mode::Free);
    let mut proven = true;
    let complete = each_cell(&free, |vals| {
        if eval(&fa, vals) == 1.0 && eval(&fb, vals) != 1.0 {
            proven = false;
            return false;
        }
        true
    });
    if complete && proven {
        return Some(true);
    }
    for mode in [Mode::Steady, Mode::Start] {
        let mut real = Model::default();
        let fa = real.formula(pa, pa.root, mode);
        let fb = real.formula(pb, pb.root, mode);
        if real.opaque {
            continue;
        }
        let mut counterexample = false;
        each_cell(&real, |vals| {
            counterexample = eval(&fa, vals) == 1.0 && eval(&fb, vals) != 1.0;
            !counterexample
        });
        if counterexample {
            return Some(false);
        }
    }
    None
}

/// The free-model outcome of node `i` alone, or of two nodes joined by `and`/`or`.
fn outcome_of(p: &Program, nodes: &[u32], and: bool) -> Option<Outcome> {
    let mut m = Model::default();
    let mut f: Option<F> = None;
    for &n in nodes {
        let g = m.formula(p, n, Mode::Free);
        f = Some(match f {
            None => g,
            Some(prev) if and => F::And(Box::new(prev), Box::new(g)),
            Some(prev) => F::Or(Box::new(prev), Box::new(g)),
        });
    }
    outcome(&m, &f?)
}

/// The always-true and never-true warnings (R04xx) for a checked program.
pub(crate) fn lint(p: &Program, diags: &mut Vec<RuleDiagnostic>) {
    if p.meta[p.root as usize].ty == Type::Bool {
        lint_node(p, p.root, diags);
    }
}

fn span(p: &Program, i: u32) -> Range<usize> {
    p.meta[i as usize].span.clone()
}

fn lint_node(p: &Program, i: u32, diags: &mut Vec<RuleDiagnostic>) {
    match p.nodes[i as usize] {
        Node::Hold { input, ms, .. } => {
            if let Some(run) = longest_clock_run(p, input)
                && run > 0
                && ms >= run * 1000
            {
                diags.push(hold_outlasts_clock(p, i, input, ms, run));
            }
            lint_node(p, input, diags)
        }
        Node::Not(a) => lint_node(p, a, diags),
        Node::And(..) | Node::Or(..) => lint_chain(p, i, diags),
        Node::Cmp(..) | Node::InClock(..) | Node::InDays(..) | Node::InSet(..) => {
            let Some(o) = outcome_of(p, &[i], true) else {
                return;
            };
            if !o.can_be_true {
                diags.push(constant_atom(p, i, false));
            } else if o.always_true_when_known {
                diags.push(constant_atom(p, i, true));
            }
        }
        _ => {}
    }
}

fn lint_chain(p: &Program, i: u32, diags: &mut Vec<RuleDiagnostic>) {
    let is_and = matches!(p.nodes[i as usize], Node::And(..));
    let mut parts = Vec::new();
    p.chain(i, &mut parts);
    let Some(whole) = outcome_of(p, &[i], true) else {
        return;
    };
    let alone: Vec<Option<Outcome>> = parts.iter().map(|&c| outcome_of(p, &[c], true)).collect();
    let never = |o: &Option<Outcome>| o.is_some_and(|o| !o.can_be_true);
    let always = |o: &Option<Outcome>| o.is_some_and(|o| o.can_be_true && o.always_true_when_known);
    // The result of the chain is forced by its own operator's "absorbing" value: never
    // true for `and`, always true for `or`. Otherwise look inside each operand.
    let forced = if is_and { !whole.can_be_true } else { whole.can_be_true && whole.always_true_when_known };
    if !forced {
        for &c in &parts {
            lint_node(p, c, diags);
        }
        return;
    }
    let culprit = if is_and { never } else { always };
    if alone.iter().any(culprit) {
        for (&c, o) in parts.iter().zip(&alone) {
            if culprit(o) {
                lint_node(p, c, diags);
            }
        }
        return;
    }
    for (k, &x) in parts.iter().enumerate() {
        for &y in &parts[k + 1..] {
            let pair = outcome_of(p, &[x, y], is_and);
            if culprit(&pair) {
                diags.push(pair_warning(p, x, y, is_and));
                return;
            }
        }
    }
    let (code, message, label) = if is_and {
        ("R0403", "this condition can never be true", "never true")
    } else {
        ("R0405", "this condition is always true when its signals are known", "always true")
    };
    diags.push(warning(code, message, span(p, i)).label(label));
}

fn pair_warning(p: &Program, x: u32, y: u32, is_and: bool) -> RuleDiagnostic {
    let (dx, dy) = (describe(p, x), describe(p, y));
    if is_and {
        warning("R0403", format!("`{dx}` and `{dy}` can never both be true"), span(p, y))
            .label("contradicts the other condition")
            .secondary(span(p, x), "this condition")
            .note("no value satisfies both, so the whole `and` is never true")
    } else {
        warning("R0405", format!("`{dx}` or `{dy}` is always true when its signals are known"), span(p, y))
            .label("covers what the other condition leaves out")
            .secondary(span(p, x), "this condition")
    }
}

/// The warning for a single comparison or membership that is always true or false.
fn constant_atom(p: &Program, i: u32, always: bool) -> RuleDiagnostic {
    let text = describe(p, i);
    let verdict = if always { "always true" } else { "never true" };
    let node = p.nodes[i as usize];
    let operands: Vec<u32> = node.children().collect();
    if operands.iter().all(|&c| constant(p, c).is_some()) {
        return warning("R0401", format!("`{text}` compares constants and is {verdict}"), span(p, i))
            .label(verdict)
            .note("compare a signal with a constant, as in `surplus > 3kW`");
    }
    match node {
        Node::InClock(..) | Node::InDays(..) | Node::InSet(..) => {
            let note = match (node, always) {
                (Node::InClock(..), false) => "a range of times is half-open: `10:00..10:00` holds no time",
                (Node::InClock(..), true) => "the range covers the whole day",
                (_, false) => "the range or list holds no day",
                (_, true) => "the range or list holds every day of the week",
            };
            warning("R0406", format!("`{text}` is {verdict}"), span(p, i)).label(verdict).note(note)
        }
        _ => {
            let var = operands.iter().copied().find(|&c| constant(p, c).is_none()).unwrap_or(i);
            let range = match p.meta[var as usize].ty {
                Type::Number(Dimension::Ratio) => "a percentage runs from 0 % to 100 %",
                Type::TimeOfDay => "a time of day runs from 00:00 to 24:00",
                Type::Weekday => "a weekday is one of mon … sun",
                _ => "no value can change that",
            };
            let message = if always {
                format!("`{text}` is always true when `{}` is known", describe(p, var))
            } else {
                format!("`{text}` can never be true")
            };
            warning("R0402", message, span(p, i)).label(verdict).note(range)
        }
    }
}

/// Local times at which a summer-time change can repeat an hour: every zone in the IANA
/// database turns its clocks back between 23:00 and 03:00 local time, so a stretch of
/// the day that overlaps 22:00–04:00 may last up to an hour longer on that night (our
/// margin, wider than the changes themselves).
const REPEATABLE: [(f64, f64); 2] = [(0.0, 4.0 * 3600.0), (22.0 * 3600.0, DAY_SECONDS)];

/// The longest stretch, in whole seconds, during which the condition `i` can stay true
/// when the local clock bounds it; `None` when it does not read the clock, could be
/// true all day, or is too large to analyse. An upper bound: every other signal is left
/// free to take whatever value makes the condition true, and a stretch over the hours
/// a summer-time change may repeat gets an extra hour.
fn longest_clock_run(p: &Program, i: u32) -> Option<i64> {
    let mut m = Model::default();
    let f = m.formula(p, i, Mode::Free);
    let clock = m.vars.iter().position(|v| v.key == Key::Clock)?;
    // The clock's cells as `cells_of` lays them out: each constant (from 00:00) as a
    // point, then the open stretch up to the next one, the last up to 24:00.
    let mut points: Vec<f64> =
        m.vars[clock].consts.iter().copied().filter(|c| (0.0..DAY_SECONDS).contains(c)).collect();
    points.push(0.0);
    points.sort_by(f64::total_cmp);
    points.dedup();
    // (from, to, whole seconds of the clock inside): the clock reads whole seconds.
    let mut cells: Vec<(f64, f64, i64)> = Vec::with_capacity(points.len() * 2);
    for (k, &a) in points.iter().enumerate() {
        let b = points.get(k + 1).copied().unwrap_or(DAY_SECONDS);
        cells.push((a, a, i64::from(a.fract() == 0.0)));
        cells.push((a, b, ((b.ceil() - a.floor()) as i64 - 1).max(0)));
    }
    let reps = cells_of(&m.vars[clock]);
    if reps.len() != cells.len() {
        return None;
    }
    let mut possible = vec![false; cells.len()];
    let complete = each_cell(&m, |vals| {
        if eval(&f, vals) == 1.0
            && let Some(k) = reps.iter().position(|&r| r == vals[clock])
        {
            possible[k] = true;
        }
        true
    });
    let start = possible.iter().position(|ok| !ok)?;
    if !complete {
        return None;
    }
    // Runs of cells where it can be true, around the clock (23:59:59 is followed by
    // 00:00:00), starting after a cell where it cannot.
    let n = cells.len();
    let (mut longest, mut run, mut repeatable) = (0i64, 0i64, false);
    for step in 1..=n {
        let k = (start + step) % n;
        if possible[k] {
            let (a, b, secs) = cells[k];
            run += secs;
            repeatable |= REPEATABLE.iter().any(|&(lo, hi)| a < hi && (b > lo || (a == b && a >= lo)));
        } else {
            run = 0;
            repeatable = false;
        }
        longest = longest.max(run + if repeatable { 3600 } else { 0 });
    }
    Some(longest)
}

/// The warning for a hold longer than the clock lets its condition last.
fn hold_outlasts_clock(p: &Program, hold: u32, input: u32, ms: i64, run_s: i64) -> RuleDiagnostic {
    let d = |ms: i64| crate::units::format_duration(std::time::Duration::from_millis(ms.max(0) as u64));
    warning(
        "R0407",
        format!(
            "`{}` is true for at most {} at a time, so holding it for {} never fires",
            describe(p, input),
            d(run_s * 1000),
            d(ms)
        ),
        span(p, hold),
    )
    .label("never true")
    .note("a time of day such as `clock == 10:00` lasts one second; hold a range such as `clock in 10:00..10:05` for less than its length, or drop the hold")
}
