//! The checker: resolves names against the [`Scope`], checks types and units, and
//! lowers the syntax tree into the flat [`Program`] arena in one pass.
//!
//! A type error marks the expression as erroneous (`ty: None`) and checking goes on, so
//! every independent mistake is reported at once; anything built on an erroneous part
//! stays silent instead of adding a follow-up error.

use std::ops::Range;

use crate::diag::did_you_mean;
use crate::units::Dimension;

use super::diagnostic::{error, warning};
use super::format;
use super::parser::{BinOp, Expr, ExprKind};
use super::program::{Arith, Cmp, Meta, Node, Program};
use super::window::AggKind;
use super::{RuleDiagnostic, Scope, Slot, Type};

/// Longest `for` hold accepted.
const MAX_HOLD_MS: i64 = 366 * 86_400_000;
/// Longest window accepted: a window stores every change of its signal, so this bounds
/// memory (a week of one-second ticks is about 10 MB per window).
const MAX_WINDOW_MS: i64 = 7 * 86_400_000;

/// Built-in names: the scope never defines them.
pub(crate) const BUILTINS: [&str; 2] = ["clock", "weekday"];

/// The checked form of one expression.
#[derive(Debug, Clone)]
struct Val {
    node: u32,
    /// `None` when the expression has an error already reported.
    ty: Option<Type>,
    span: Range<usize>,
    /// The value of a number written without a unit.
    bare: Option<f64>,
    /// Whether the node is a literal (`Const` straight from the text).
    literal: bool,
    /// The name, when the expression is a plain name.
    name: Option<String>,
}

/// Checks `expr` (from `text`) and builds its program. Diagnostics go to `diags`; the
/// program is `None` when any of them is an error.
pub(crate) fn check(
    text: &str,
    expr: &Expr,
    scope: &dyn Scope,
    expected: Type,
    diags: &mut Vec<RuleDiagnostic>,
) -> Option<Program> {
    let mut c = Checker {
        text,
        scope,
        nodes: Vec::new(),
        meta: Vec::new(),
        diags,
        holds: 0,
        windows: Vec::new(),
        slots: Vec::new(),
        errors: 0,
    };
    let root = c.expr(expr);
    c.expect_root(&root, expected);
    if c.errors > 0 {
        return None;
    }
    let mut slots = c.slots;
    slots.sort();
    slots.dedup();
    let horizon_ms = horizon(&c.nodes);
    Some(Program {
        source: text.to_owned(),
        nodes: c.nodes,
        meta: c.meta,
        root: root.node,
        holds: c.holds,
        windows: c.windows,
        slots,
        horizon_ms,
    })
}

/// The longest chain of nested holds and windows, in ms.
fn horizon(nodes: &[Node]) -> i64 {
    let mut h = vec![0i64; nodes.len()];
    for (i, n) in nodes.iter().enumerate() {
        let below = n.children().map(|c| h[c as usize]).max().unwrap_or(0);
        h[i] = match *n {
            Node::Hold { ms, .. } | Node::Agg { ms, .. } => below.saturating_add(ms),
            _ => below,
        };
    }
    h.iter().copied().max().unwrap_or(0)
}

/// "a power", "a time of day", "a condition".
pub(crate) fn type_name(t: Type) -> &'static str {
    match t {
        Type::Bool => "a condition",
        Type::Number(d) => d.describe(),
        Type::TimeOfDay => "a time of day",
        Type::Weekday => "a weekday",
    }
}

struct Checker<'a> {
    text: &'a str,
    scope: &'a dyn Scope,
    nodes: Vec<Node>,
    meta: Vec<Meta>,
    diags: &'a mut Vec<RuleDiagnostic>,
    holds: u32,
    windows: Vec<AggKind>,
    slots: Vec<Slot>,
    errors: usize,
}

impl Checker<'_> {
    fn report(&mut self, d: RuleDiagnostic) {
        if d.is_error() {
            self.errors += 1;
        }
        self.diags.push(d);
    }

    fn push(&mut self, node: Node, ty: Option<Type>, span: Range<usize>) -> u32 {
        // Rules are capped at a few hundred tokens, far below u32::MAX nodes.
        let index = u32::try_from(self.nodes.len()).unwrap_or(u32::MAX);
        self.nodes.push(node);
        self.meta.push(Meta { span, ty: ty.unwrap_or(Type::Bool), name: None });
        index
    }

    fn val(&mut self, node: Node, ty: Option<Type>, span: Range<usize>) -> Val {
        let node = self.push(node, ty, span.clone());
        Val { node, ty, span, bare: None, literal: false, name: None }
    }

    fn literal(&mut self, value: f64, ty: Type, span: Range<usize>, bare: bool) -> Val {
        let mut v = self.val(Node::Const(value), Some(ty), span);
        v.literal = true;
        v.bare = bare.then_some(value);
        v
    }

    /// An erroneous value (already reported).
    fn invalid(&mut self, span: Range<usize>) -> Val {
        self.val(Node::Const(f64::NAN), None, span)
    }

    fn text(&self, span: &Range<usize>) -> &str {
        self.text.get(span.clone()).unwrap_or("")
    }

    /// "`surplus` is a power" or "this is a power".
    fn is_label(&self, v: &Val, t: Type) -> String {
        match &v.name {
            Some(n) => format!("`{n}` is {}", type_name(t)),
            None => format!("this is {}", type_name(t)),
        }
    }

    fn expr(&mut self, e: &Expr) -> Val {
        let span = e.span.clone();
        match &e.kind {
            ExprKind::Number { value, dimension, bare } => self.literal(*value, Type::Number(*dimension), span, *bare),
            ExprKind::Time(s) => self.literal(f64::from(*s), Type::TimeOfDay, span, false),
            ExprKind::Day(d) => self.literal(f64::from(*d), Type::Weekday, span, false),
            ExprKind::Bool(b) => self.literal(if *b { 1.0 } else { 0.0 }, Type::Bool, span, false),
            ExprKind::Invalid => self.invalid(span),
            ExprKind::Name(name) => self.name(name, span),
            ExprKind::Call { name, name_span, args } => self.call(name, name_span, args, span),
            ExprKind::Neg(inner) => self.neg(inner, span),
            ExprKind::Not(inner) => {
                let v = self.expr(inner);
                let keyword = span.start..span.start + "not".len();
                self.need_bool(&v, "`not` applies to a condition", &keyword);
                let ty = v.ty.map(|_| Type::Bool);
                self.val(Node::Not(v.node), ty, span)
            }
            ExprKind::Binary { op, op_span, lhs, rhs } => {
                let l = self.expr(lhs);
                let r = self.expr(rhs);
                match op {
                    BinOp::And | BinOp::Or => {
                        let what = format!("`{}` joins conditions", op.symbol());
                        let ok_l = self.need_bool(&l, &what, op_span);
                        let ok_r = self.need_bool(&r, &what, op_span);
                        let node = if *op == BinOp::And { Node::And(l.node, r.node) } else { Node::Or(l.node, r.node) };
                        let ty = (ok_l && ok_r).then_some(Type::Bool);
                        self.val(node, ty, span)
                    }
                    BinOp::Add | BinOp::Sub | BinOp::Mul | BinOp::Div => self.arith(*op, op_span, l, r, span),
                    _ => self.compare(*op, op_span, l, r, span),
                }
            }
            ExprKind::For(cond, duration) => {
                let v = self.expr(cond);
                // `for` is the keyword between the condition and the duration.
                let keyword = self.text(&(cond.span.end..duration.span.start)).find("for").map_or(span.clone(), |at| {
                    let start = cond.span.end + at;
                    start..start + "for".len()
                });
                let ok = self.need_bool(&v, "`for` holds a condition", &keyword);
                let ms = self.duration(duration, "hold time", MAX_HOLD_MS);
                match (ok, ms) {
                    (true, Some(ms)) => {
                        if ms == 0 {
                            self.report(
                                warning("R0404", "holding for 0 s has no effect", duration.span.clone())
                                    .label("zero duration")
                                    .secondary(cond.span.clone(), "counts at once, with no hold")
                                    .note("remove `for 0s`, or give a real hold time such as `for 30s`"),
                            );
                        }
                        let timer = self.holds;
                        self.holds += 1;
                        let node = Node::Hold { input: v.node, ms, timer };
                        self.val(node, Some(Type::Bool), span)
                    }
                    _ => self.invalid(span),
                }
            }
            ExprKind::InRange(x, lo, hi) => self.in_range(x, lo, hi, span),
            ExprKind::InList(x, items) => self.in_list(x, items, span),
        }
    }

    fn name(&mut self, name: &str, span: Range<usize>) -> Val {
        let found = match name {
            "clock" => Some((Node::Clock, Type::TimeOfDay, None)),
            "weekday" => Some((Node::Weekday, Type::Weekday, None)),
            _ => self.scope.lookup(name).map(|(slot, ty)| {
                // Signals with a bounded domain are read through a node that keeps them
                // inside it, so that evaluation agrees with the static analysis.
                let node = match ty {
                    Type::Bool => Node::BoolSlot(slot.0),
                    Type::Number(Dimension::Ratio) => Node::RatioSlot(slot.0),
                    Type::TimeOfDay => Node::TimeSlot(slot.0),
                    Type::Weekday => Node::DaySlot(slot.0),
                    Type::Number(_) => Node::Slot(slot.0),
                };
                (node, ty, Some(slot))
            }),
        };
        let Some((node, ty, slot)) = found else {
            self.unknown_name(name, &span);
            let mut v = self.invalid(span);
            v.name = Some(name.to_owned());
            return v;
        };
        if let Some(slot) = slot {
            self.slots.push(slot);
        }
        let mut v = self.val(node, Some(ty), span);
        self.meta[v.node as usize].name = Some(name.into());
        v.name = Some(name.to_owned());
        v
    }

    fn unknown_name(&mut self, name: &str, span: &Range<usize>) {
        if let Some(kind) = AggKind::from_name(name) {
            let f = kind.name();
            self.report(
                error("R0203", format!("`{f}` is a function"), span.clone())
                    .label("needs arguments")
                    .note(format!("write `{f}(surplus, 5min)`: a signal and a window")),
            );
            return;
        }
        let mut names = self.scope.names();
        names.extend(BUILTINS.iter().map(|&b| b.to_owned()));
        let mut d = error("R0201", format!("unknown name `{name}`"), span.clone()).label("not defined for this site");
        let full_days = ["monday", "tuesday", "wednesday", "thursday", "friday", "saturday", "sunday"];
        if full_days.contains(&name) {
            d = d.note("write weekdays with three letters: mon, tue, wed, thu, fri, sat, sun");
        } else if let Some(better) = did_you_mean(name, names.iter().map(String::as_str)) {
            d = d.note(format!("did you mean `{better}`?"));
        } else if !names.is_empty() && names.len() <= 12 {
            names.sort();
            d = d.note(format!("names defined here: {}", names.join(", ")));
        }
        self.report(d);
    }

    fn call(&mut self, name: &str, name_span: &Range<usize>, args: &[Expr], span: Range<usize>) -> Val {
        let Some(kind) = AggKind::from_name(name) else {
            let d = if self.scope.lookup(name).is_some() || BUILTINS.contains(&name) {
                error("R0202", format!("`{name}` is not a function"), name_span.clone())
                    .label("a value, not a function")
                    .note("the functions are avg, min and max, as in `avg(surplus, 5min)`")
            } else {
                let mut d =
                    error("R0202", format!("unknown function `{name}`"), name_span.clone()).label("no such function");
                let alias = match name {
                    "average" | "mean" => Some("avg"),
                    "minimum" => Some("min"),
                    "maximum" => Some("max"),
                    _ => did_you_mean(name, ["avg", "min", "max"]),
                };
                if let Some(better) = alias {
                    d = d.note(format!("did you mean `{better}`?"));
                }
                d.note("the functions are avg, min and max, as in `avg(surplus, 5min)`")
            };
            self.report(d);
            for a in args {
                self.expr(a);
            }
            return self.invalid(span);
        };
        let f = kind.name();
        let [signal, window] = args else {
            self.report(
                error("R0204", format!("`{f}` takes 2 arguments, found {}", args.len()), span.clone())
                    .label("wrong number of arguments")
                    .note(format!("write `{f}(signal, window)`, as in `{f}(surplus, 5min)`")),
            );
            return self.invalid(span);
        };
        let v = self.expr(signal);
        let ms = self.duration(window, "window", MAX_WINDOW_MS);
        let ok = match v.ty {
            Some(Type::Number(_)) => true,
            Some(t) => {
                self.report(
                    error("R0310", format!("`{f}` needs a number, found {}", type_name(t)), v.span.clone())
                        .label(self.is_label(&v, t))
                        .note(format!("{f} works on measured values such as powers and temperatures")),
                );
                false
            }
            None => false,
        };
        match (ok, ms) {
            (true, Some(0)) => {
                self.report(
                    error("R0312", "a window of 0 s holds no history", window.span.clone())
                        .label("zero window")
                        .note(format!("give the window a length, as in `{f}(surplus, 5min)`")),
                );
                self.invalid(span)
            }
            (true, Some(ms)) => {
                let index = u32::try_from(self.windows.len()).unwrap_or(u32::MAX);
                self.windows.push(kind);
                let node = Node::Agg { kind, input: v.node, ms, window: index };
                self.val(node, v.ty, span)
            }
            _ => self.invalid(span),
        }
    }

    /// A duration literal for `for` or a window, in ms.
    fn duration(&mut self, e: &Expr, what: &str, max_ms: i64) -> Option<i64> {
        let mut inner = e;
        let mut negative = false;
        while let ExprKind::Neg(x) = &inner.kind {
            negative = !negative;
            inner = x;
        }
        match &inner.kind {
            ExprKind::Invalid => None,
            ExprKind::Number { value, dimension: Dimension::Duration, .. } => {
                let ms = (value * 1000.0).round();
                if negative && ms != 0.0 {
                    self.report(
                        error("R0305", format!("a {what} cannot be negative"), e.span.clone())
                            .label("negative duration"),
                    );
                    return None;
                }
                // Bounded by `max_ms` before the cast, so it fits in an i64.
                if ms > max_ms as f64 {
                    self.report(
                        error("R0305", format!("this {what} is too long"), e.span.clone())
                            .label(format!("longer than {}", format::duration_ms(max_ms)))
                            .note(format!("a {what} can be at most {}", format::duration_ms(max_ms))),
                    );
                    return None;
                }
                Some(ms as i64)
            }
            ExprKind::Number { value, dimension, bare } => {
                let value = if negative { -value } else { *value };
                let mut d = if *bare {
                    error("R0304", format!("expected a duration for the {what}, found a plain number"), e.span.clone())
                        .label("needs a unit")
                        .note(format::unit_suggestion(value, Dimension::Duration).unwrap_or_default())
                } else {
                    error(
                        "R0304",
                        format!("expected a duration for the {what}, found {}", dimension.describe()),
                        e.span.clone(),
                    )
                    .label(format!("this is {}", dimension.describe()))
                };
                d = d.note(format!("durations are written with {}", Dimension::Duration.example_units()));
                self.report(d);
                None
            }
            _ => {
                self.report(
                    error("R0305", format!("the {what} must be a duration literal"), e.span.clone())
                        .label("not a literal")
                        .note("write the duration itself, as in `30s` or `5 min`"),
                );
                None
            }
        }
    }

    fn neg(&mut self, inner: &Expr, span: Range<usize>) -> Val {
        let v = self.expr(inner);
        match v.ty {
            Some(Type::Number(_)) if v.literal => {
                // Fold `-250W` into one literal so it reads back as written.
                if let Node::Const(c) = self.nodes[v.node as usize] {
                    self.nodes[v.node as usize] = Node::Const(-c);
                }
                self.meta[v.node as usize].span = span.clone();
                Val { span, bare: v.bare.map(|b| -b), ..v }
            }
            Some(Type::Number(_)) | None => {
                let ty = v.ty;
                self.val(Node::Neg(v.node), ty, span)
            }
            Some(t) => {
                self.report(
                    error("R0311", format!("cannot negate {}", type_name(t)), span.clone())
                        .label(self.is_label(&v, t))
                        .note(if t == Type::Bool {
                            "write `not` to negate a condition"
                        } else {
                            "only numbers can be negated"
                        }),
                );
                self.invalid(span)
            }
        }
    }

    /// Reports a non-condition where a condition is needed; true when fine.
    fn need_bool(&mut self, v: &Val, why: &str, op_span: &Range<usize>) -> bool {
        match v.ty {
            Some(Type::Bool) => true,
            None => false,
            Some(t) => {
                let text = self.text(&v.span).to_owned();
                let help = match t {
                    Type::Number(d) => {
                        format!("compare it with a threshold, as in `{text} > {}`", format::example_threshold(d))
                    }
                    Type::TimeOfDay => format!("compare it, as in `{text} >= 16:00`"),
                    Type::Weekday => format!("compare it, as in `{text} == sat`"),
                    Type::Bool => String::new(),
                };
                self.report(
                    error("R0302", format!("expected a condition, found {}", type_name(t)), v.span.clone())
                        .label(self.is_label(v, t))
                        .secondary(op_span.clone(), why.to_owned())
                        .note(help),
                );
                false
            }
        }
    }

    fn arith(&mut self, op: BinOp, op_span: &Range<usize>, l: Val, r: Val, span: Range<usize>) -> Val {
        let arith = match op {
            BinOp::Add => Arith::Add,
            BinOp::Sub => Arith::Sub,
            BinOp::Mul => Arith::Mul,
            _ => Arith::Div,
        };
        let node = Node::Arith(arith, l.node, r.node);
        let (Some(lt), Some(rt)) = (l.ty, r.ty) else {
            return self.val(node, None, span);
        };
        let (Type::Number(a), Type::Number(b)) = (lt, rt) else {
            let (bad, t) = if matches!(lt, Type::Number(_)) { (&r, rt) } else { (&l, lt) };
            let note = match t {
                Type::TimeOfDay => "compare times of day directly, as in `clock >= 16:00`",
                Type::Bool => "combine conditions with `and`, `or` and `not`",
                _ => "arithmetic works on numbers only",
            };
            self.report(
                error("R0311", format!("cannot do arithmetic with {}", type_name(t)), bad.span.clone())
                    .label(self.is_label(bad, t))
                    .secondary(op_span.clone(), "arithmetic operator")
                    .note(note),
            );
            return self.val(node, None, span);
        };
        let result = match arith {
            Arith::Add | Arith::Sub if a == b => Some(a),
            Arith::Add | Arith::Sub => {
                if let Some(d) = self.bare_against(&l, &r, a, b) {
                    self.report(d);
                } else {
                    let verb = if arith == Arith::Add {
                        format!("cannot add {} to {}", b.describe(), a.describe())
                    } else {
                        format!("cannot subtract {} from {}", b.describe(), a.describe())
                    };
                    self.report(
                        error("R0301", verb, r.span.clone())
                            .label(self.is_label(&r, rt))
                            .secondary(l.span.clone(), self.is_label(&l, lt))
                            .note("both sides of `+` and `-` must measure the same thing"),
                    );
                }
                None
            }
            Arith::Mul if a == Dimension::Scalar => Some(b),
            Arith::Mul if b == Dimension::Scalar => Some(a),
            Arith::Div if b == Dimension::Scalar => Some(a),
            Arith::Div if a == b => Some(Dimension::Scalar),
            _ => {
                let verb = if arith == Arith::Mul {
                    format!("cannot multiply {} by {}", a.describe(), b.describe())
                } else {
                    format!("cannot divide {} by {}", a.describe(), b.describe())
                };
                self.report(
                    error("R0306", verb, span.clone())
                        .label("no unit for the result")
                        .secondary(l.span.clone(), self.is_label(&l, lt))
                        .secondary(r.span.clone(), self.is_label(&r, rt))
                        .note("a quantity can be scaled by a plain number, or divided by one of the same kind to give a plain number"),
                );
                None
            }
        };
        self.val(node, result.map(Type::Number), span)
    }

    /// A number written without a unit against a dimensioned value, if that is the
    /// problem: "`3000` has no unit but `surplus` is a power".
    fn bare_against(&self, l: &Val, r: &Val, a: Dimension, b: Dimension) -> Option<RuleDiagnostic> {
        let (bare, value, other, dim) = match (l.bare, r.bare) {
            (_, Some(v)) if b == Dimension::Scalar && a != Dimension::Scalar => (r, v, l, a),
            (Some(v), _) if a == Dimension::Scalar && b != Dimension::Scalar => (l, v, r, b),
            _ => return None,
        };
        let whose = match &other.name {
            Some(n) => format!("`{n}`"),
            None => "the other side".to_owned(),
        };
        let number = self.text(&bare.span).to_owned();
        let mut d =
            error("R0303", format!("`{number}` has no unit but {whose} is {}", dim.describe()), bare.span.clone())
                .label("needs a unit")
                .secondary(other.span.clone(), self.is_label(other, Type::Number(dim)));
        if let Some(help) = format::unit_suggestion(value, dim) {
            d = d.note(help);
        }
        Some(d)
    }

    fn compare(&mut self, op: BinOp, op_span: &Range<usize>, l: Val, r: Val, span: Range<usize>) -> Val {
        let cmp = match op {
            BinOp::Lt => Cmp::Lt,
            BinOp::Le => Cmp::Le,
            BinOp::Gt => Cmp::Gt,
            BinOp::Ge => Cmp::Ge,
            BinOp::Eq => Cmp::Eq,
            _ => Cmp::Ne,
        };
        let node = Node::Cmp(cmp, l.node, r.node);
        let (Some(lt), Some(rt)) = (l.ty, r.ty) else {
            return self.val(node, None, span);
        };
        let equality = matches!(cmp, Cmp::Eq | Cmp::Ne);
        let ok = match (lt, rt) {
            (Type::Number(a), Type::Number(b)) if a == b => true,
            // The bare literal 0 compares with any dimension: `grid < 0`.
            (Type::Number(_), Type::Number(_)) if l.bare == Some(0.0) || r.bare == Some(0.0) => true,
            (Type::Number(a), Type::Number(b)) => {
                let d = self.bare_against(&l, &r, a, b).unwrap_or_else(|| self.mismatch(&l, lt, &r, rt));
                self.report(d);
                false
            }
            (Type::TimeOfDay, Type::TimeOfDay) => true,
            (Type::Weekday, Type::Weekday) | (Type::Bool, Type::Bool) if equality => true,
            (Type::Weekday, Type::Weekday) | (Type::Bool, Type::Bool) => {
                let note = if lt == Type::Weekday {
                    "weekdays have no order here: write `weekday in mon..fri` or `weekday == sat`"
                } else {
                    "conditions compare only with `==` and `!=`"
                };
                self.report(
                    error(
                        "R0309",
                        format!("`{}` cannot order {}s", cmp.symbol(), &type_name(lt)[2..]),
                        op_span.clone(),
                    )
                    .label("an ordering comparison")
                    .note(note),
                );
                false
            }
            _ => {
                let d = self.mismatch(&l, lt, &r, rt);
                self.report(d);
                false
            }
        };
        self.val(node, ok.then_some(Type::Bool), span)
    }

    fn mismatch(&self, l: &Val, lt: Type, r: &Val, rt: Type) -> RuleDiagnostic {
        let mut d = error("R0301", format!("cannot compare {} with {}", type_name(lt), type_name(rt)), r.span.clone())
            .label(self.is_label(r, rt))
            .secondary(l.span.clone(), self.is_label(l, lt));
        match (lt, r.bare) {
            (Type::Number(d0), _) if d0 != Dimension::Scalar => {
                d = d.note(format!("{} is written in {}", d0.describe(), d0.example_units()));
            }
            (Type::TimeOfDay, Some(v)) if (0.0..=24.0).contains(&v) && v.fract() == 0.0 => {
                d = d.note(format!("write a time of day as `{:02}:00`", v as u32));
            }
            (Type::TimeOfDay, _) => d = d.note("write a time of day as HH:MM, as in `16:00`"),
            _ => {}
        }
        d
    }

    fn in_range(&mut self, x: &Expr, lo: &Expr, hi: &Expr, span: Range<usize>) -> Val {
        let xv = self.expr(x);
        let lov = self.expr(lo);
        let hiv = self.expr(hi);
        let Some(t) = xv.ty else {
            return self.invalid(span);
        };
        if !matches!(t, Type::TimeOfDay | Type::Weekday) {
            let text = self.text(&xv.span).to_owned();
            self.report(
                error(
                    "R0307",
                    format!("`in` needs a time of day or a weekday, found {}", type_name(t)),
                    xv.span.clone(),
                )
                .label(self.is_label(&xv, t))
                .note(format!(
                    "for numbers, write two comparisons: `{text} >= {lo} and {text} < {hi}`",
                    lo = self.text(&lov.span),
                    hi = self.text(&hiv.span)
                )),
            );
            return self.invalid(span);
        }
        let mut ok = true;
        for b in [&lov, &hiv] {
            match b.ty {
                Some(bt) if bt == t => {}
                None => ok = false,
                Some(bt) => {
                    ok = false;
                    let d = error(
                        "R0307",
                        format!("a range over {} cannot end at {}", type_name(t), type_name(bt)),
                        b.span.clone(),
                    )
                    .label(self.is_label(b, bt))
                    .secondary(xv.span.clone(), self.is_label(&xv, t))
                    .note(if t == Type::TimeOfDay {
                        "write a range of times as `10:00..16:00`"
                    } else {
                        "write a range of weekdays as `mon..fri`"
                    });
                    self.report(d);
                }
            }
        }
        if !ok {
            return self.invalid(span);
        }
        let node = if t == Type::TimeOfDay {
            Node::InClock(xv.node, lov.node, hiv.node)
        } else {
            Node::InDays(xv.node, lov.node, hiv.node)
        };
        self.val(node, Some(Type::Bool), span)
    }

    fn in_list(&mut self, x: &Expr, items: &[Expr], span: Range<usize>) -> Val {
        let xv = self.expr(x);
        let Some(t) = xv.ty else {
            return self.invalid(span);
        };
        if t != Type::Weekday {
            let note = if t == Type::TimeOfDay {
                "a time of day takes a range, as in `clock in 10:00..16:00`".to_owned()
            } else {
                "lists hold weekdays, as in `weekday in [sat, sun]`".to_owned()
            };
            self.report(
                error("R0307", format!("a list needs a weekday on the left, found {}", type_name(t)), xv.span.clone())
                    .label(self.is_label(&xv, t))
                    .note(note),
            );
            return self.invalid(span);
        }
        let mut mask = 0u8;
        let mut ok = true;
        for item in items {
            match &item.kind {
                ExprKind::Day(d) => mask |= 1 << d,
                ExprKind::Invalid => ok = false,
                _ => {
                    ok = false;
                    self.report(
                        error("R0307", "a list of weekdays holds weekday names only", item.span.clone())
                            .label("not a weekday name")
                            .note("write weekdays as mon, tue, wed, thu, fri, sat, sun"),
                    );
                }
            }
        }
        if !ok {
            return self.invalid(span);
        }
        self.val(Node::InSet(xv.node, mask), Some(Type::Bool), span)
    }

    fn expect_root(&mut self, root: &Val, expected: Type) {
        let Some(t) = root.ty else { return };
        if t == expected {
            return;
        }
        if let (Type::Number(want), Type::Number(Dimension::Scalar)) = (expected, t)
            && let Some(v) = root.bare
        {
            let mut d = error(
                "R0303",
                format!("expected {}, found a number without a unit", want.describe()),
                root.span.clone(),
            )
            .label("needs a unit");
            if let Some(help) = format::unit_suggestion(v, want) {
                d = d.note(help);
            }
            self.report(d);
            return;
        }
        let text = self.text(&root.span).to_owned();
        let mut d = if expected == Type::Bool {
            error("R0308", format!("a rule must be a condition, found {}", type_name(t)), root.span.clone())
        } else {
            error("R0308", format!("expected {}, found {}", type_name(expected), type_name(t)), root.span.clone())
        }
        .label(self.is_label(root, t));
        if expected == Type::Bool
            && let Type::Number(dim) = t
        {
            d = d.note(format!("compare it with a threshold, as in `{text} > {}`", format::example_threshold(dim)));
        }
        self.report(d);
    }
}
