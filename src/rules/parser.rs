//! The rule parser: tokens to a syntax tree, by recursive descent with one function per
//! precedence level (see the grammar in `docs/rules.md`).
//!
//! The tree keeps every span so that the checker can point at the exact text. Parsing
//! stops at the first syntax error: after one, the rest of the rule rarely means what
//! its writer thought, and a cascade of guesses helps nobody.

use std::ops::Range;

use crate::units::Dimension;

use super::RuleDiagnostic;
use super::diagnostic::error;
use super::lexer::{Tok, Token};

/// Deepest nesting of parentheses, brackets and calls we accept.
const MAX_DEPTH: usize = 32;

/// A binary operator.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum BinOp {
    Or,
    And,
    Lt,
    Le,
    Gt,
    Ge,
    Eq,
    Ne,
    Add,
    Sub,
    Mul,
    Div,
}

impl BinOp {
    pub(crate) fn symbol(self) -> &'static str {
        match self {
            BinOp::Or => "or",
            BinOp::And => "and",
            BinOp::Lt => "<",
            BinOp::Le => "<=",
            BinOp::Gt => ">",
            BinOp::Ge => ">=",
            BinOp::Eq => "==",
            BinOp::Ne => "!=",
            BinOp::Add => "+",
            BinOp::Sub => "-",
            BinOp::Mul => "*",
            BinOp::Div => "/",
        }
    }
}

/// A syntax tree node and the text it covers.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Expr {
    pub kind: ExprKind,
    pub span: Range<usize>,
}

#[derive(Debug, Clone, PartialEq)]
pub(crate) enum ExprKind {
    /// A number in base units; `bare` when written without a unit.
    Number {
        value: f64,
        dimension: Dimension,
        bare: bool,
    },
    Time(u32),
    Day(u8),
    Bool(bool),
    Name(String),
    /// `name(args)`; `name_span` covers the function name.
    Call {
        name: String,
        name_span: Range<usize>,
        args: Vec<Expr>,
    },
    Neg(Box<Expr>),
    Not(Box<Expr>),
    Binary {
        op: BinOp,
        op_span: Range<usize>,
        lhs: Box<Expr>,
        rhs: Box<Expr>,
    },
    /// `cond for duration`.
    For(Box<Expr>, Box<Expr>),
    /// `x in lo..hi`.
    InRange(Box<Expr>, Box<Expr>, Box<Expr>),
    /// `x in [a, b, …]`.
    InList(Box<Expr>, Vec<Expr>),
    /// Text the lexer already reported.
    Invalid,
}

/// Parses a whole rule. Lexer tokens must end in `Eof`.
/// The error is boxed: diagnostics are large and the happy path should not pay for them.
pub(crate) fn parse(text: &str, tokens: &[Token]) -> PResult {
    let mut p = Parser { text, tokens, pos: 0, depth: 0 };
    if p.peek() == &Tok::Eof {
        return fail(
            error("R0109", "the rule is empty", 0..text.len())
                .label("nothing here")
                .note("write a condition such as `surplus > 3kW`"),
        );
    }
    let expr = p.or_expr()?;
    if p.peek() != &Tok::Eof {
        let t = p.token();
        let d = match t.tok {
            Tok::RParen => error("R0106", "unmatched `)`", t.span.clone())
                .label("no `(` opens this")
                .secondary(expr.span.clone(), "the rule so far"),
            _ => {
                let d = error(
                    "R0108",
                    format!("expected `and`, `or` or the end of the rule, found {}", p.describe(t)),
                    t.span.clone(),
                )
                .label("unexpected here")
                .secondary(expr.span.clone(), "this is a complete condition");
                // `surplus > 3kW held 30s`, `… during 30s`: a word of the writer's own for
                // a hold. Say how ours is spelt rather than only to join conditions.
                let next = p.tokens.get(p.pos + 1).map(|n| &n.tok);
                match (&t.tok, next) {
                    (Tok::Name(word), Some(Tok::Number { dimension: Dimension::Duration, .. })) => {
                        let duration = &p.text[p.tokens[p.pos + 1].span.clone()];
                        let condition = &p.text[expr.span.clone()];
                        let condition = if condition.chars().count() <= 40 { condition } else { "CONDITION" };
                        d.note(format!(
                            "to require a condition for a time, write `for`: `{condition} for {duration}` (not `{word}`)"
                        ))
                    }
                    _ => d.note("join conditions with `and` or `or`"),
                }
            }
        };
        return fail(d);
    }
    Ok(expr)
}

struct Parser<'a> {
    text: &'a str,
    tokens: &'a [Token],
    pos: usize,
    depth: usize,
}

type PResult = Result<Expr, Box<RuleDiagnostic>>;

fn fail<T>(d: RuleDiagnostic) -> Result<T, Box<RuleDiagnostic>> {
    Err(Box::new(d))
}

fn join(a: &Range<usize>, b: &Range<usize>) -> Range<usize> {
    a.start.min(b.start)..a.end.max(b.end)
}

impl Parser<'_> {
    fn token(&self) -> &Token {
        // The token list always ends in Eof and the parser never moves past it.
        &self.tokens[self.pos.min(self.tokens.len() - 1)]
    }

    fn peek(&self) -> &Tok {
        &self.token().tok
    }

    fn bump(&mut self) -> Token {
        let t = self.token().clone();
        if t.tok != Tok::Eof {
            self.pos += 1;
        }
        t
    }

    /// `` `and` ``, `the name "tank"`, `the end of the rule`: for "found …" messages.
    fn describe(&self, t: &Token) -> String {
        match &t.tok {
            Tok::Eof => "the end of the rule".to_owned(),
            Tok::Name(n) => format!("the name `{n}`"),
            Tok::Number { .. } => format!("the number `{}`", &self.text[t.span.clone()]),
            _ => format!("`{}`", &self.text[t.span.clone()]),
        }
    }

    fn enter(&mut self, span: Range<usize>) -> Result<(), Box<RuleDiagnostic>> {
        self.depth += 1;
        if self.depth > MAX_DEPTH {
            return fail(
                error("R0113", "the rule nests too deeply", span)
                    .label(format!("more than {MAX_DEPTH} levels of nesting"))
                    .note("simplify the rule"),
            );
        }
        Ok(())
    }

    /// Where to point for token `t`: the end of the rule is shown as its last
    /// character, so the caret is visible.
    fn at(&self, t: &Token) -> Range<usize> {
        if t.tok == Tok::Eof {
            let end = self.text.trim_end().len();
            let start = self.text[..end].char_indices().last().map_or(0, |(i, _)| i);
            start..end
        } else {
            t.span.clone()
        }
    }

    /// The error for a missing operand.
    fn expected_operand(&self, what: &str) -> RuleDiagnostic {
        let t = self.token();
        let found = self.describe(t);
        let span = self.at(t);
        let label =
            if t.tok == Tok::Eof { format!("expected {what} after this") } else { format!("expected {what} here") };
        error("R0105", format!("expected {what}, found {found}"), span).label(label)
    }

    fn or_expr(&mut self) -> PResult {
        let mut lhs = self.and_expr()?;
        while self.peek() == &Tok::Or {
            let op = self.bump();
            let rhs = self.and_expr()?;
            lhs = binary(BinOp::Or, op.span, lhs, rhs);
        }
        Ok(lhs)
    }

    fn and_expr(&mut self) -> PResult {
        let mut lhs = self.not_expr()?;
        while self.peek() == &Tok::And {
            let op = self.bump();
            let rhs = self.not_expr()?;
            lhs = binary(BinOp::And, op.span, lhs, rhs);
        }
        Ok(lhs)
    }

    fn not_expr(&mut self) -> PResult {
        if self.peek() == &Tok::Not {
            let op = self.bump();
            self.enter(op.span.clone())?;
            let inner = self.not_expr()?;
            self.depth -= 1;
            let span = join(&op.span, &inner.span);
            return Ok(Expr { kind: ExprKind::Not(Box::new(inner)), span });
        }
        self.for_expr()
    }

    fn for_expr(&mut self) -> PResult {
        let mut cond = self.cmp_expr()?;
        while self.peek() == &Tok::For {
            self.bump();
            if matches!(self.peek(), Tok::Eof | Tok::And | Tok::Or | Tok::RParen) {
                return fail(
                    self.expected_operand("a duration").note("write how long the condition must hold, as in `for 30s`"),
                );
            }
            let duration = self.unary()?;
            let span = join(&cond.span, &duration.span);
            cond = Expr { kind: ExprKind::For(Box::new(cond), Box::new(duration)), span };
        }
        Ok(cond)
    }

    fn cmp_op(tok: &Tok) -> Option<BinOp> {
        Some(match tok {
            Tok::Lt => BinOp::Lt,
            Tok::Le => BinOp::Le,
            Tok::Gt => BinOp::Gt,
            Tok::Ge => BinOp::Ge,
            Tok::EqEq => BinOp::Eq,
            Tok::Ne => BinOp::Ne,
            _ => return None,
        })
    }

    fn cmp_expr(&mut self) -> PResult {
        let lhs = self.sum()?;
        let expr = if let Some(op) = Self::cmp_op(self.peek()) {
            let op_tok = self.bump();
            let rhs = self.sum()?;
            binary(op, op_tok.span, lhs, rhs)
        } else if self.peek() == &Tok::In {
            self.bump();
            self.membership(lhs)?
        } else {
            return Ok(lhs);
        };
        if Self::cmp_op(self.peek()).is_some() || self.peek() == &Tok::In {
            let t = self.token();
            return fail(
                error("R0107", "comparisons cannot be chained", t.span.clone())
                    .label("a second comparison")
                    .secondary(expr.span.clone(), "this is already a comparison")
                    .note("join two comparisons with `and`, as in `x > 1kW and x < 3kW`"),
            );
        }
        Ok(expr)
    }

    /// After `in`: `lo..hi` or `[a, b, …]`.
    fn membership(&mut self, lhs: Expr) -> PResult {
        if self.peek() == &Tok::LBracket {
            let open = self.bump();
            self.enter(open.span.clone())?;
            let mut items = Vec::new();
            loop {
                if self.peek() == &Tok::RBracket && !items.is_empty() {
                    break;
                }
                items.push(self.sum()?);
                if self.peek() == &Tok::Comma {
                    self.bump();
                    continue;
                }
                break;
            }
            if self.peek() != &Tok::RBracket {
                let t = self.token();
                return fail(
                    error("R0106", format!("expected `,` or `]`, found {}", self.describe(t)), self.at(t))
                        .label("the list is not closed")
                        .secondary(open.span, "the list starts here"),
                );
            }
            let close = self.bump();
            self.depth -= 1;
            let span = join(&lhs.span, &close.span);
            return Ok(Expr { kind: ExprKind::InList(Box::new(lhs), items), span });
        }
        if self.peek() == &Tok::Eof {
            return fail(
                self.expected_operand("a range or a list")
                    .note("write `clock in 10:00..16:00` or `weekday in [sat, sun]`"),
            );
        }
        let lo = self.sum()?;
        if self.peek() != &Tok::DotDot {
            let t = self.token();
            return fail(
                error("R0105", format!("expected `..` in a range, found {}", self.describe(t)), self.at(t))
                    .label("expected `..` here")
                    .secondary(lo.span.clone(), "the range starts here")
                    .note("write a range as `10:00..16:00` or `mon..fri`, a list as `[sat, sun]`"),
            );
        }
        self.bump();
        let hi = self.sum()?;
        let span = join(&lhs.span, &hi.span);
        Ok(Expr { kind: ExprKind::InRange(Box::new(lhs), Box::new(lo), Box::new(hi)), span })
    }

    fn sum(&mut self) -> PResult {
        let mut lhs = self.product()?;
        loop {
            let op = match self.peek() {
                Tok::Plus => BinOp::Add,
                Tok::Minus => BinOp::Sub,
                _ => return Ok(lhs),
            };
            let op_tok = self.bump();
            let rhs = self.product()?;
            lhs = binary(op, op_tok.span, lhs, rhs);
        }
    }

    fn product(&mut self) -> PResult {
        let mut lhs = self.unary()?;
        loop {
            let op = match self.peek() {
                Tok::Star => BinOp::Mul,
                Tok::Slash => BinOp::Div,
                _ => return Ok(lhs),
            };
            let op_tok = self.bump();
            let rhs = self.unary()?;
            lhs = binary(op, op_tok.span, lhs, rhs);
        }
    }

    fn unary(&mut self) -> PResult {
        if self.peek() == &Tok::Minus {
            let op = self.bump();
            self.enter(op.span.clone())?;
            let inner = self.unary()?;
            self.depth -= 1;
            let span = join(&op.span, &inner.span);
            return Ok(Expr { kind: ExprKind::Neg(Box::new(inner)), span });
        }
        self.atom()
    }

    fn atom(&mut self) -> PResult {
        let t = self.token().clone();
        let kind = match &t.tok {
            Tok::Number { value, dimension, bare } => {
                ExprKind::Number { value: *value, dimension: *dimension, bare: *bare }
            }
            Tok::Time(s) => ExprKind::Time(*s),
            Tok::Day(d) => ExprKind::Day(*d),
            Tok::True => ExprKind::Bool(true),
            Tok::False => ExprKind::Bool(false),
            Tok::Invalid => {
                self.bump();
                if self.peek() == &Tok::LParen {
                    // `Avg(…)`: the name was reported; read its arguments so that the
                    // parenthesis does not cause a second error.
                    let call = self.call(String::new(), t.span)?;
                    return Ok(Expr { kind: ExprKind::Invalid, span: call.span });
                }
                return Ok(Expr { kind: ExprKind::Invalid, span: t.span });
            }
            Tok::Name(name) => {
                self.bump();
                if self.peek() == &Tok::LParen {
                    return self.call(name.clone(), t.span);
                }
                return Ok(Expr { kind: ExprKind::Name(name.clone()), span: t.span });
            }
            Tok::LParen => {
                self.bump();
                self.enter(t.span.clone())?;
                let inner = self.or_expr()?;
                if self.peek() != &Tok::RParen {
                    let found = self.token();
                    return fail(
                        error("R0106", format!("expected `)`, found {}", self.describe(found)), self.at(found))
                            .label("expected `)` here")
                            .secondary(t.span, "this `(` is not closed"),
                    );
                }
                self.bump();
                self.depth -= 1;
                return Ok(inner);
            }
            _ => {
                return fail(
                    self.expected_operand("a value")
                        .note("a value is a name, a number with its unit, a time such as 10:00, a weekday, or `(`…`)`"),
                );
            }
        };
        self.bump();
        Ok(Expr { kind, span: t.span })
    }

    /// After `name`, at `(`.
    fn call(&mut self, name: String, name_span: Range<usize>) -> PResult {
        let open = self.bump();
        self.enter(open.span.clone())?;
        let mut args = Vec::new();
        if self.peek() != &Tok::RParen {
            loop {
                args.push(self.or_expr()?);
                if self.peek() == &Tok::Comma {
                    self.bump();
                    continue;
                }
                break;
            }
        }
        if self.peek() != &Tok::RParen {
            let t = self.token();
            return fail(
                error("R0106", format!("expected `,` or `)`, found {}", self.describe(t)), self.at(t))
                    .label("expected `)` here")
                    .secondary(open.span, "this `(` is not closed"),
            );
        }
        let close = self.bump();
        self.depth -= 1;
        Ok(Expr { span: join(&name_span, &close.span), kind: ExprKind::Call { name, name_span, args } })
    }
}

fn binary(op: BinOp, op_span: Range<usize>, lhs: Expr, rhs: Expr) -> Expr {
    Expr {
        span: join(&lhs.span, &rhs.span),
        kind: ExprKind::Binary { op, op_span, lhs: Box::new(lhs), rhs: Box::new(rhs) },
    }
}
