//! The rule lexer: text to tokens with byte spans. Numbers leave it with their unit
//! already resolved into base units, times of day as seconds since midnight.
//!
//! Lexing never stops at a bad unit or a bad time: it reports the problem, emits an
//! [`Tok::Invalid`] placeholder and goes on, so one run finds every such mistake. Only a
//! character that belongs to no token at all stops it.

use std::ops::Range;

use crate::diag::did_you_mean;
use crate::units::{self, Dimension};

use super::RuleDiagnostic;
use super::diagnostic::{error, unit_list};

/// Longest rule we accept, in tokens. Real rules have a few dozen; the cap keeps every
/// recursive pass (parser, checker, describe) far from the stack limit.
pub(crate) const MAX_TOKENS: usize = 256;

/// One lexical token.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Tok {
    /// A name, possibly dotted (`tank.on`), lowercased.
    Name(String),
    /// A number in base units; `bare` when written without a unit.
    Number {
        value: f64,
        dimension: Dimension,
        bare: bool,
    },
    /// A time of day, seconds since midnight (`24:00` is 86400).
    Time(u32),
    /// A weekday, 0 = Monday.
    Day(u8),
    True,
    False,
    And,
    Or,
    Not,
    For,
    In,
    LParen,
    RParen,
    LBracket,
    RBracket,
    Comma,
    DotDot,
    Lt,
    Le,
    Gt,
    Ge,
    EqEq,
    Ne,
    Plus,
    Minus,
    Star,
    Slash,
    /// A value whose text was already reported (bad unit, bad time); it parses as an
    /// operand of unknown type so that no follow-up error is reported about it.
    Invalid,
    Eof,
}

/// A token and where it is.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Token {
    pub tok: Tok,
    pub span: Range<usize>,
}

/// Weekday spellings, Monday first.
pub(crate) const WEEKDAYS: [&str; 7] = ["mon", "tue", "wed", "thu", "fri", "sat", "sun"];

/// The words that cannot be names.
pub(crate) const KEYWORDS: [&str; 7] = ["and", "or", "not", "for", "in", "true", "false"];

/// Lexes `text`. Returns the tokens (always ending in `Eof`) and whether lexing had to
/// stop early; diagnostics go to `diags`.
pub(crate) fn lex(text: &str, diags: &mut Vec<RuleDiagnostic>) -> (Vec<Token>, bool) {
    let mut lexer = Lexer { text, pos: 0, tokens: Vec::new(), diags };
    let complete = lexer.run();
    let end = text.len();
    lexer.tokens.push(Token { tok: Tok::Eof, span: end..end });
    (lexer.tokens, complete)
}

struct Lexer<'a, 'd> {
    text: &'a str,
    pos: usize,
    tokens: Vec<Token>,
    diags: &'d mut Vec<RuleDiagnostic>,
}

fn is_name_start(c: char) -> bool {
    c.is_ascii_alphabetic() || c == '_'
}

fn is_name_char(c: char) -> bool {
    c.is_ascii_alphanumeric() || c == '_'
}

impl Lexer<'_, '_> {
    fn peek(&self) -> Option<char> {
        self.text[self.pos..].chars().next()
    }

    fn peek_at(&self, offset: usize) -> Option<char> {
        self.text.get(self.pos + offset..)?.chars().next()
    }

    fn push(&mut self, tok: Tok, start: usize) {
        self.tokens.push(Token { tok, span: start..self.pos });
    }

    /// Lexes everything; false when an unexpected character stopped it.
    fn run(&mut self) -> bool {
        while let Some(c) = self.peek() {
            let start = self.pos;
            if self.tokens.len() >= MAX_TOKENS {
                self.diags.push(
                    error(
                        "R0114",
                        format!("the rule is too long (more than {MAX_TOKENS} tokens)"),
                        start..self.text.len(),
                    )
                    .label("the rule is cut here")
                    .note("split it over several loads or simplify it"),
                );
                return false;
            }
            if c.is_whitespace() {
                self.pos += c.len_utf8();
                continue;
            }
            if c.is_ascii_digit() {
                self.number();
                continue;
            }
            if is_name_start(c) {
                self.word();
                continue;
            }
            let two = self.text.get(start..start + 2).unwrap_or("");
            let (tok, len) = match two {
                "<=" => (Tok::Le, 2),
                ">=" => (Tok::Ge, 2),
                "==" => (Tok::EqEq, 2),
                "!=" => (Tok::Ne, 2),
                ".." => (Tok::DotDot, 2),
                "&&" => (Tok::And, self.misspelt(start, 2, "write `and`")),
                "||" => (Tok::Or, self.misspelt(start, 2, "write `or`")),
                "=>" => (Tok::Ge, self.misspelt(start, 2, "write `>=`")),
                "=<" => (Tok::Le, self.misspelt(start, 2, "write `<=`")),
                _ => match c {
                    '<' => (Tok::Lt, 1),
                    '>' => (Tok::Gt, 1),
                    '(' => (Tok::LParen, 1),
                    ')' => (Tok::RParen, 1),
                    '[' => (Tok::LBracket, 1),
                    ']' => (Tok::RBracket, 1),
                    ',' => (Tok::Comma, 1),
                    '+' => (Tok::Plus, 1),
                    '-' => (Tok::Minus, 1),
                    '*' => (Tok::Star, 1),
                    '/' => (Tok::Slash, 1),
                    '=' => (Tok::EqEq, self.misspelt(start, 1, "write `==` to compare")),
                    '!' => (Tok::Not, self.misspelt(start, 1, "write `not`")),
                    '&' => (Tok::And, self.misspelt(start, 1, "write `and`")),
                    '|' => (Tok::Or, self.misspelt(start, 1, "write `or`")),
                    _ => {
                        let end = start + c.len_utf8();
                        let mut d = error("R0101", format!("unexpected character `{c}`"), start..end)
                            .label("not part of the rule language");
                        if c == '.' && self.peek_at(1).is_some_and(|c| c.is_ascii_digit()) {
                            d = d.note("write a leading zero: `0.5`");
                        } else if c == '"' || c == '\'' {
                            d = d.note("names are written without quotes");
                        } else if c == 'º' || c == 'ª' {
                            // The ordinal indicator sits where ° does on some keyboards.
                            d = d.note("that is the ordinal sign `º`: write the degree sign, `60°C`, or `60degC`");
                        }
                        self.diags.push(d);
                        return false;
                    }
                },
            };
            self.pos += len;
            self.push(tok, start);
        }
        true
    }

    /// Reports an operator from another language; the caller carries on as if it were
    /// ours, so the rest of the rule is still checked. Returns the operator's length.
    fn misspelt(&mut self, start: usize, len: usize, help: &str) -> usize {
        let written = &self.text[start..start + len];
        self.diags.push(
            error("R0101", format!("`{written}` is not an operator here"), start..start + len)
                .label("unknown operator")
                .note(help),
        );
        len
    }

    fn take_digits(&mut self) -> usize {
        let start = self.pos;
        while let Some(c) = self.peek() {
            let digit_separator = c == '_' && self.peek_at(1).is_some_and(|c| c.is_ascii_digit());
            if c.is_ascii_digit() || (digit_separator && self.pos > start) {
                self.pos += 1;
            } else {
                break;
            }
        }
        self.pos - start
    }

    /// A number, a number with a unit, or a time of day.
    fn number(&mut self) {
        let start = self.pos;
        let int_len = self.take_digits();
        if self.peek() == Some(':') && self.peek_at(1).is_some_and(|c| c.is_ascii_digit()) {
            self.time(start, int_len);
            return;
        }
        if self.peek() == Some('.') && self.peek_at(1).is_some_and(|c| c.is_ascii_digit()) {
            self.pos += 1;
            self.take_digits();
        }
        let number_end = self.pos;
        let digits: String = self.text[start..number_end].chars().filter(|&c| c != '_').collect();
        // Too many digits parse to infinity, reported below with the unit.
        let value: f64 = digits.parse().unwrap_or(f64::INFINITY);
        // The unit, attached (`3kW`) or after blanks (`3 kW`).
        let mut unit_start = self.pos;
        while let Some(c) = self.text[unit_start..].chars().next() {
            if c == ' ' || c == '\t' {
                unit_start += 1;
            } else {
                break;
            }
        }
        let attached = unit_start == self.pos;
        let unit_end = unit_end(self.text, unit_start);
        let symbol = &self.text[unit_start..unit_end];
        let is_unit = !symbol.is_empty()
            && (attached
                || (!KEYWORDS.contains(&symbol)
                    && !WEEKDAYS.contains(&symbol)
                    && symbol.chars().count() <= 5
                    && !self.text[unit_end..].chars().next().is_some_and(|c| is_name_char(c) || c == '.')));
        if !is_unit {
            self.pos = number_end;
            if !value.is_finite() {
                self.too_large(start);
                return;
            }
            self.push(Tok::Number { value, dimension: Dimension::Scalar, bare: true }, start);
            return;
        }
        self.pos = unit_end;
        match units::unit(symbol) {
            Some((_, factor)) if !(value * factor).is_finite() => self.too_large(start),
            Some((dimension, factor)) => {
                self.push(Tok::Number { value: value * factor, dimension, bare: false }, start)
            }
            None => {
                let mut d = error("R0102", format!("unknown unit `{symbol}`"), unit_start..unit_end)
                    .label("not a unit")
                    .secondary(start..number_end, "after this number");
                if let Some(better) = suggest_unit(symbol) {
                    d = d.note(format!("did you mean `{better}`?"));
                }
                self.diags.push(d.note(format!("known units: {}", unit_list())));
                self.push(Tok::Invalid, start);
            }
        }
    }

    /// Reports a number (with its unit) that does not fit in an f64.
    fn too_large(&mut self, start: usize) {
        self.diags.push(error("R0104", "this number is too large", start..self.pos).label("not a finite number"));
        self.push(Tok::Invalid, start);
    }

    /// `HH:MM`, already past the hour digits.
    fn time(&mut self, start: usize, hour_len: usize) {
        self.pos += 1; // ':'
        let minute_start = self.pos;
        let minute_len = self.take_digits();
        let span = start..self.pos;
        let hour_text = &self.text[start..start + hour_len];
        let minute_text = &self.text[minute_start..self.pos];
        let hour: u32 = hour_text.parse().unwrap_or(u32::MAX);
        let minute: u32 = minute_text.parse().unwrap_or(u32::MAX);
        let problem = if hour_len > 2 || hour_text.contains('_') {
            Some(format!("`{hour_text}` is not an hour"))
        } else if minute_len != 2 || minute_text.contains('_') {
            Some("minutes are written with two digits".to_owned())
        } else if hour > 24 {
            Some(format!("hour {hour} is out of range"))
        } else if minute > 59 {
            Some(format!("minute {minute} is out of range"))
        } else if hour == 24 && minute != 0 {
            Some("no time of day is later than 24:00".to_owned())
        } else {
            None
        };
        match problem {
            None => self.push(Tok::Time(hour * 3600 + minute * 60), start),
            Some(message) => {
                self.diags.push(
                    error("R0103", format!("invalid time of day: {message}"), span)
                        .label("not a time of day")
                        .note("times of day are HH:MM on a 24-hour clock, from 00:00 to 24:00"),
                );
                self.push(Tok::Invalid, start);
            }
        }
    }

    /// A keyword, a weekday, or a (dotted) name.
    fn word(&mut self) {
        let start = self.pos;
        loop {
            while self.peek().is_some_and(is_name_char) {
                self.pos += 1;
            }
            if self.peek() == Some('.') && self.peek_at(1).is_some_and(is_name_start) {
                self.pos += 1;
                continue;
            }
            break;
        }
        let word = &self.text[start..self.pos];
        if self.peek() == Some('.') && self.peek_at(1) != Some('.') {
            self.pos += 1;
            self.diags.push(
                error("R0111", format!("expected an attribute name after `{word}.`"), start..self.pos)
                    .label("incomplete name")
                    .note("attributes look like `tank.on` or `tank.runtime_today`"),
            );
            self.push(Tok::Invalid, start);
            return;
        }
        let tok = match word {
            "and" => Tok::And,
            "or" => Tok::Or,
            "not" => Tok::Not,
            "for" => Tok::For,
            "in" => Tok::In,
            "true" => Tok::True,
            "false" => Tok::False,
            _ => {
                if let Some(day) = WEEKDAYS.iter().position(|&d| d == word) {
                    // `position` over seven items always fits in a u8.
                    Tok::Day(u8::try_from(day).unwrap_or(0))
                } else if word.chars().any(|c| c.is_ascii_uppercase()) {
                    let lower = word.to_ascii_lowercase();
                    let d = if units::unit(word).is_some() {
                        error("R0112", format!("the unit `{word}` must follow a number"), start..self.pos)
                            .label("a unit on its own")
                            .note(format!("write a number before it, as in `3{word}`"))
                    } else {
                        error("R0110", format!("names are lowercase: `{word}`"), start..self.pos)
                            .label("uppercase letters")
                            .note(format!("write `{lower}`"))
                    };
                    self.diags.push(d);
                    Tok::Invalid
                } else {
                    Tok::Name(word.to_owned())
                }
            }
        };
        self.push(tok, start);
    }
}

/// Where a unit symbol starting at `start` ends: `%`, or an optional `°` and letters.
fn unit_end(text: &str, start: usize) -> usize {
    let rest = &text[start..];
    if rest.starts_with('%') {
        return start + 1;
    }
    let mut end = start;
    let mut chars = rest.chars().peekable();
    if chars.peek() == Some(&'°') {
        end += '°'.len_utf8();
        chars.next();
    }
    for c in chars {
        if c.is_ascii_alphabetic() {
            end += 1;
        } else {
            break;
        }
    }
    end
}

/// A known unit close to `symbol`: case slips first, then common spellings, then
/// edit distance.
pub(crate) fn suggest_unit(symbol: &str) -> Option<&'static str> {
    if let Some(s) = units::unit_symbols().find(|s| s.eq_ignore_ascii_case(symbol)) {
        return Some(s);
    }
    let lower = symbol.to_ascii_lowercase();
    let alias = match lower.as_str() {
        "sec" | "secs" | "second" | "seconds" => Some("s"),
        "m" | "mins" | "minute" | "minutes" => Some("min"),
        "hr" | "hrs" | "hour" | "hours" => Some("h"),
        "day" | "days" => Some("d"),
        "watt" | "watts" => Some("W"),
        "kilowatt" | "kilowatts" => Some("kW"),
        "kilowatt-hour" | "kilowatt-hours" | "kilowatthour" | "kilowatthours" => Some("kWh"),
        "c" | "°" | "deg" | "degc" | "degree" | "degrees" | "celsius" | "centigrade" => Some("°C"),
        "pct" | "percent" => Some("%"),
        "volt" | "volts" => Some("V"),
        "amp" | "amps" | "ampere" | "amperes" => Some("A"),
        _ => None,
    };
    alias.or_else(|| did_you_mean(symbol, units::unit_symbols()))
}

#[cfg(test)]
mod tests {
    use super::suggest_unit;

    #[test]
    fn spelt_out_units_get_their_symbol() {
        for (written, symbol) in [
            ("watts", "W"),
            ("Kilowatts", "kW"),
            ("kilowatt-hours", "kWh"),
            ("celsius", "°C"),
            ("centigrade", "°C"),
            ("degrees", "°C"),
            ("volts", "V"),
            ("amps", "A"),
            ("minutes", "min"),
            ("KW", "kW"),
        ] {
            assert_eq!(suggest_unit(written), Some(symbol), "{written}");
        }
        assert_eq!(suggest_unit("furlongs"), None);
    }
}
