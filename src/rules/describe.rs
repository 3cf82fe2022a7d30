//! Writing a compiled rule back as text: [`describe`] gives the canonical form with
//! explicit grouping and normalised units, [`explain`] says why the rule is what it is
//! at the last tick, with the values it saw.

use std::fmt::Write as _;

use super::format;
use super::program::{Arith, NOT_HOLDING, Node, Program, RuleState};
use super::{Truth, Type};

/// Binding strength, loosest first; used to decide where parentheses go.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Level {
    Or,
    And,
    Not,
    For,
    Compare,
    Sum,
    Product,
    Negation,
    Atom,
}

fn level(node: &Node) -> Level {
    match node {
        Node::Or(..) => Level::Or,
        Node::And(..) => Level::And,
        Node::Not(_) => Level::Not,
        Node::Hold { .. } => Level::For,
        Node::Cmp(..) | Node::InClock(..) | Node::InDays(..) | Node::InSet(..) => Level::Compare,
        Node::Arith(Arith::Add | Arith::Sub, ..) => Level::Sum,
        Node::Arith(Arith::Mul | Arith::Div, ..) => Level::Product,
        Node::Neg(_) => Level::Negation,
        Node::Const(c) if *c < 0.0 => Level::Negation,
        _ => Level::Atom,
    }
}

/// The canonical text of node `i`.
pub(crate) fn describe(p: &Program, i: u32) -> String {
    let mut out = String::new();
    write_node(p, i, &mut out);
    out
}

fn write_child(p: &Program, child: u32, parens: bool, out: &mut String) {
    if parens {
        out.push('(');
        write_node(p, child, out);
        out.push(')');
    } else {
        write_node(p, child, out);
    }
}

/// A constant of node `i`'s type, as rule text.
fn constant(p: &Program, i: u32, c: f64) -> String {
    match p.meta[i as usize].ty {
        Type::Bool => if c == 1.0 { "true" } else { "false" }.to_owned(),
        Type::Number(d) => format::literal(c, d),
        Type::TimeOfDay => format::time_of_day(c),
        Type::Weekday => format::weekday(c).to_owned(),
    }
}

fn write_node(p: &Program, i: u32, out: &mut String) {
    let node = p.nodes[i as usize];
    let child_level = |c: u32| level(&p.nodes[c as usize]);
    match node {
        Node::Const(c) => out.push_str(&constant(p, i, c)),
        Node::Slot(_) | Node::BoolSlot(_) | Node::RatioSlot(_) | Node::TimeSlot(_) | Node::DaySlot(_) => {
            out.push_str(p.meta[i as usize].name.as_deref().unwrap_or("?"));
        }
        Node::Clock => out.push_str("clock"),
        Node::Weekday => out.push_str("weekday"),
        Node::Neg(a) => {
            out.push('-');
            write_child(p, a, child_level(a) < Level::Atom, out);
        }
        Node::Not(a) => {
            out.push_str("not ");
            write_child(p, a, child_level(a) < Level::Atom, out);
        }
        Node::And(a, b) | Node::Or(a, b) => {
            let here = level(&node);
            // Same-operator chains flatten (both are associative); a different
            // operator below gets parentheses, so `and` inside `or` is explicit.
            for (k, c) in [a, b].into_iter().enumerate() {
                if k == 1 {
                    out.push_str(if here == Level::And { " and " } else { " or " });
                }
                let l = child_level(c);
                write_child(p, c, l < Level::Not && l != here, out);
            }
        }
        Node::Hold { input, ms, .. } => {
            write_child(p, input, child_level(input) < Level::Atom, out);
            out.push_str(" for ");
            out.push_str(&format::duration_literal(ms));
        }
        Node::Cmp(op, a, b) => {
            write_child(p, a, child_level(a) <= Level::Compare, out);
            let _ = write!(out, " {} ", op.symbol());
            write_child(p, b, child_level(b) <= Level::Compare, out);
        }
        Node::Arith(op, a, b) => {
            let here = level(&node);
            write_child(p, a, child_level(a) < here, out);
            out.push_str(match op {
                Arith::Add => " + ",
                Arith::Sub => " - ",
                Arith::Mul => " * ",
                Arith::Div => " / ",
            });
            // `a - (b - c)` and `a / (b * c)` need their parentheses to read back the same.
            write_child(p, b, child_level(b) <= here, out);
        }
        Node::InClock(x, lo, hi) | Node::InDays(x, lo, hi) => {
            write_child(p, x, child_level(x) <= Level::Compare, out);
            out.push_str(" in ");
            write_child(p, lo, child_level(lo) <= Level::Compare, out);
            out.push_str("..");
            write_child(p, hi, child_level(hi) <= Level::Compare, out);
        }
        Node::InSet(x, mask) => {
            write_child(p, x, child_level(x) <= Level::Compare, out);
            out.push_str(" in ");
            out.push_str(&day_list(mask));
        }
        Node::Agg { kind, input, ms, .. } => {
            let _ = write!(out, "{}(", kind.name());
            write_node(p, input, out);
            let _ = write!(out, ", {})", format::duration_literal(ms));
        }
    }
}

/// `[sat, sun]`: the days of a weekday set, Monday first.
fn day_list(mask: u8) -> String {
    let days: Vec<&str> = (0..7u8).filter(|d| mask & (1 << d) != 0).map(|d| format::weekday(f64::from(d))).collect();
    format!("[{}]", days.join(", "))
}

/// A rule value as three-valued truth: NaN is unknown, any other non-zero is true.
pub(crate) fn truth_of(v: f64) -> Truth {
    if v.is_nan() {
        Truth::Unknown
    } else if v != 0.0 {
        Truth::True
    } else {
        Truth::False
    }
}

/// Why the rule is what it is, from the values the last tick left in `state`.
pub(crate) fn explain(p: &Program, state: &RuleState) -> String {
    if state.last_now.is_none() || state.values.len() != p.nodes.len() {
        return "not evaluated yet".to_owned();
    }
    let mut out = String::new();
    Explainer { p, state }.node(p.root, &mut out);
    out
}

struct Explainer<'a> {
    p: &'a Program,
    state: &'a RuleState,
}

impl Explainer<'_> {
    fn value(&self, i: u32) -> f64 {
        self.state.values[i as usize]
    }

    /// A value for people: `2.1 kW`, `09:30`, `sat`, `true`.
    fn show(&self, i: u32) -> String {
        let v = self.value(i);
        if v.is_nan() {
            return "unknown".to_owned();
        }
        match self.p.meta[i as usize].ty {
            Type::Bool => if v != 0.0 { "true" } else { "false" }.to_owned(),
            Type::Number(d) => format::approx(v, d),
            Type::TimeOfDay => format::time_of_day(v),
            Type::Weekday => format::weekday(v).to_owned(),
        }
    }

    /// An operand with its value: `surplus 2.1 kW`, `avg(surplus, 5 min) = 2.9 kW`, or
    /// just `3.2 kW` for a constant.
    fn operand(&self, i: u32) -> String {
        let text = describe(self.p, i);
        match self.p.nodes[i as usize] {
            Node::Const(_) => text,
            Node::Slot(_)
            | Node::BoolSlot(_)
            | Node::RatioSlot(_)
            | Node::TimeSlot(_)
            | Node::DaySlot(_)
            | Node::Clock
            | Node::Weekday => format!("{text} {}", self.show(i)),
            _ => format!("{text} = {}", self.show(i)),
        }
    }

    /// `describe`, in parentheses unless it is a single comparison or atom.
    fn grouped(&self, i: u32) -> String {
        let text = describe(self.p, i);
        if level(&self.p.nodes[i as usize]) >= Level::Compare { text } else { format!("({text})") }
    }

    fn node(&self, i: u32, out: &mut String) {
        let p = self.p;
        let t = truth_of(self.value(i));
        match p.nodes[i as usize] {
            Node::Const(_) => out.push_str(&self.show(i)),
            Node::BoolSlot(_)
            | Node::Slot(_)
            | Node::RatioSlot(_)
            | Node::TimeSlot(_)
            | Node::DaySlot(_)
            | Node::Clock
            | Node::Weekday => {
                let _ = write!(out, "{} is {}", describe(p, i), self.show(i));
            }
            Node::Not(a) => self.node(a, out),
            Node::And(..) | Node::Or(..) => {
                let is_and = matches!(p.nodes[i as usize], Node::And(..));
                let mut parts = Vec::new();
                p.chain(i, &mut parts);
                // Show the operands that decide the result: the false ones of a false
                // `and`, the true ones of a true `or`, the unknown ones of an unknown
                // result; all of them otherwise.
                let deciding: Vec<u32> = parts
                    .iter()
                    .copied()
                    .filter(|&c| {
                        let ct = truth_of(self.value(c));
                        match (is_and, t) {
                            (true, Truth::False) => ct == Truth::False,
                            (false, Truth::True) => ct == Truth::True,
                            (_, Truth::Unknown) => ct == Truth::Unknown,
                            _ => true,
                        }
                    })
                    .collect();
                let shown = if deciding.is_empty() { &parts } else { &deciding };
                let joiner = if !is_and && t == Truth::True { " or " } else { " and " };
                for (k, &c) in shown.iter().enumerate() {
                    if k > 0 {
                        out.push_str(joiner);
                    }
                    self.node(c, out);
                }
            }
            Node::Hold { input, ms, timer } => {
                if truth_of(self.value(input)) != Truth::True {
                    self.node(input, out);
                    return;
                }
                let since = self.state.holds.get(timer as usize).copied().unwrap_or(NOT_HOLDING);
                let held = match (since, self.state.last_now) {
                    (s, Some(now)) if s != NOT_HOLDING => now.saturating_sub(s),
                    _ => 0,
                };
                let _ = write!(
                    out,
                    "{} held {} of {}",
                    self.grouped(input),
                    format::whole_seconds_ms(held),
                    format::duration_ms(ms)
                );
            }
            Node::Cmp(op, a, b) => {
                let (va, vb) = (self.value(a), self.value(b));
                if va.is_nan() || vb.is_nan() {
                    let unknown: Vec<String> =
                        [a, b].into_iter().filter(|&c| self.value(c).is_nan()).map(|c| self.unknown(c)).collect();
                    out.push_str(&unknown.join(" and "));
                    return;
                }
                let not = if t == Truth::True { "" } else { "is not " };
                let _ = write!(out, "{} {not}{} {}", self.operand(a), op.symbol(), self.operand(b));
            }
            Node::InClock(x, lo, hi) | Node::InDays(x, lo, hi) => {
                if t == Truth::Unknown {
                    out.push_str(&self.unknown(x));
                    return;
                }
                let not = if t == Truth::True { "" } else { "not " };
                let _ = write!(out, "{} is {not}in {}..{}", self.operand(x), describe(p, lo), describe(p, hi));
            }
            Node::InSet(x, mask) => {
                if t == Truth::Unknown {
                    out.push_str(&self.unknown(x));
                    return;
                }
                let not = if t == Truth::True { "" } else { "not " };
                let _ = write!(out, "{} is {not}in {}", self.operand(x), day_list(mask));
            }
            Node::Neg(_) | Node::Arith(..) | Node::Agg { .. } => {
                let _ = write!(out, "{} = {}", describe(p, i), self.show(i));
            }
        }
    }

    /// Why an operand is unknown: `surplus is unknown`, or a window still filling.
    fn unknown(&self, i: u32) -> String {
        let p = self.p;
        if let Node::Agg { input, ms, window, .. } = p.nodes[i as usize]
            && !self.value(input).is_nan()
            && let (Some(w), Some(now)) = (self.state.windows.get(window as usize), self.state.last_now)
        {
            let have = w.history_ms(now);
            if have < ms {
                return format!(
                    "{} is unknown: {} of {} of history so far",
                    describe(p, i),
                    format::whole_seconds_ms(have),
                    format::duration_ms(ms)
                );
            }
        }
        // Point at the unknown leaf when there is one: `surplus is unknown`.
        let mut leaf = i;
        loop {
            let next = p.nodes[leaf as usize].children().find(|&c| self.value(c).is_nan());
            match next {
                Some(c) if !matches!(p.nodes[leaf as usize], Node::Agg { .. }) => leaf = c,
                _ => break,
            }
        }
        format!("{} is unknown", describe(p, leaf))
    }
}
