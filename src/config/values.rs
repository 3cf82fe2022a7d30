//! Scalar readers for the site file: quantities with units, durations, times of day,
//! windows, names and small enumerations — each reporting a located diagnostic and
//! returning `None` on a bad value, so the loader can carry on and find the next one.

use std::time::Duration;

use chrono::NaiveTime;

use super::model::Window;
use super::yaml::{Diagnostics, Node, Value};
use crate::diag::{Diagnostic, did_you_mean};
use crate::units::{self, Dimension, UnitError};

/// Reads text (a name, a topic, an address). Numbers and booleans are refused so that
/// `payload: on` (a YAML boolean) is caught rather than silently turned into "true".
pub fn text<'n>(node: &'n Node, what: &str, diags: &mut Diagnostics) -> Option<&'n str> {
    match &node.value {
        Value::Str(s) => Some(s.as_str()),
        other => {
            let hint = match other {
                Value::Bool(_) => "quote it: YAML reads on/off/yes/no as booleans",
                Value::Int(_) | Value::Float(_) => "quote it if a number is meant as text",
                _ => "write it as text",
            };
            diags.push(
                Diagnostic::error("C0101", format!("{what} must be text, found {}", other.kind()), node.span.clone())
                    .with_label("expected text")
                    .with_note(hint),
            );
            None
        }
    }
}

/// Reads text where YAML may have turned a word into a boolean or a number
/// (`on` → true, `123` → 123): returns the scalar as written.
pub fn word(node: &Node, what: &str, diags: &mut Diagnostics) -> Option<String> {
    match node.scalar_text() {
        Some(t) => Some(t),
        None => {
            diags.error(
                "C0101",
                format!("{what} must be a single value, found {}", node.value.kind()),
                node.span.clone(),
                "expected a value",
            );
            None
        }
    }
}

/// Reads a quantity of `dimension`, returning it in the base unit. A bare number is
/// accepted only for plain numbers and for zero ("0 is zero in any unit").
pub fn quantity(node: &Node, dimension: Dimension, what: &str, diags: &mut Diagnostics) -> Option<f64> {
    let expected = || format!("expected {} in {}", dimension.describe(), dimension.example_units());
    let (value, found) = match &node.value {
        Value::Int(i) => (*i as f64, Dimension::Scalar),
        Value::Float(f) => (*f, Dimension::Scalar),
        Value::Str(s) => match units::parse_quantity(s) {
            Ok(q) => (q.value, q.dimension),
            Err(UnitError::UnknownUnit(u)) => {
                let mut d = Diagnostic::error("C0301", format!("unknown unit \"{u}\" in {what}"), node.span.clone())
                    .with_label(expected());
                if let Some(s) = crate::rules::suggest_unit(&u) {
                    d = d.with_note(format!("did you mean \"{s}\"?"));
                }
                diags.push(d);
                return None;
            }
            Err(UnitError::NotANumber(_)) => {
                diags.error("C0302", format!("{what} must be a number with a unit"), node.span.clone(), expected());
                return None;
            }
        },
        other => {
            diags.error(
                "C0302",
                format!("{what} must be a number with a unit, found {}", other.kind()),
                node.span.clone(),
                expected(),
            );
            return None;
        }
    };
    if found == dimension || (found == Dimension::Scalar && value == 0.0) {
        return Some(value);
    }
    if found == Dimension::Scalar {
        diags.push(
            Diagnostic::error("C0303", format!("{what} needs a unit"), node.span.clone())
                .with_label(expected())
                .with_note(crate::rules::unit_suggestion(value, dimension).unwrap_or_else(|| {
                    format!("write it as `{}{}`", units::trim_number(value), dimension.base_unit())
                })),
        );
    } else {
        diags.push(
            Diagnostic::error(
                "C0304",
                format!("{what} must be {}, but this is {}", dimension.describe(), found.describe()),
                node.span.clone(),
            )
            .with_label(expected()),
        );
    }
    None
}

/// The longest duration a site file may give: no setting of a controller that decides
/// every second means anything beyond a year, and a bound keeps the arithmetic on
/// durations (sums, multiples) from overflowing.
pub const MAX_DURATION: Duration = Duration::from_secs(366 * 86_400);

/// Reads a non-negative duration of at most [`MAX_DURATION`].
pub fn duration(node: &Node, what: &str, diags: &mut Diagnostics) -> Option<Duration> {
    let seconds = quantity(node, Dimension::Duration, what, diags)?;
    if seconds < 0.0 || seconds.is_nan() {
        diags.error("C0305", format!("{what} cannot be negative"), node.span.clone(), "expected a duration ≥ 0");
        return None;
    }
    match Duration::try_from_secs_f64(seconds) {
        Ok(d) if d <= MAX_DURATION => Some(d),
        _ => {
            diags.error("C0305", format!("{what} is longer than a year"), node.span.clone(), "expected at most 366 d");
            None
        }
    }
}

/// Reads a positive, finite power/energy/etc., rejecting negatives.
pub fn positive(node: &Node, dimension: Dimension, what: &str, diags: &mut Diagnostics) -> Option<f64> {
    let v = quantity(node, dimension, what, diags)?;
    if v <= 0.0 || !v.is_finite() {
        diags.error(
            "C0305",
            format!("{what} must be greater than zero"),
            node.span.clone(),
            "expected a positive value",
        );
        return None;
    }
    Some(v)
}

/// Why a text is not a date: not written `YYYY-MM-DD`, or written so but naming a day
/// the calendar does not have (`2026-02-30`), which deserves its own words — "must be
/// YYYY-MM-DD" would tell the user to write what they did write.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum DateError {
    /// Not of the form `YYYY-MM-DD`.
    NotADate,
    /// Of that form, but no such day: why (`February 2026 has 28 days`).
    NoSuchDay(String),
}

impl std::fmt::Display for DateError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            DateError::NotADate => f.write_str("not a date in the form YYYY-MM-DD, e.g. 2026-06-21"),
            DateError::NoSuchDay(why) => write!(f, "no such date: {why}"),
        }
    }
}

/// Parses a local date, `YYYY-MM-DD`.
pub fn parse_date(text: &str) -> Result<chrono::NaiveDate, DateError> {
    let text = text.trim();
    if let Ok(d) = chrono::NaiveDate::parse_from_str(text, "%Y-%m-%d") {
        return Ok(d);
    }
    let parts: Vec<&str> = text.split('-').collect();
    let numbers: Option<Vec<u32>> = match parts.as_slice() {
        [y, m, d] if y.len() == 4 && (1..=2).contains(&m.len()) && (1..=2).contains(&d.len()) => {
            parts.iter().map(|p| p.parse::<u32>().ok().filter(|_| p.bytes().all(|b| b.is_ascii_digit()))).collect()
        }
        _ => None,
    };
    let Some(&[year, month, day]) = numbers.as_deref() else { return Err(DateError::NotADate) };
    let Some(first) = chrono::NaiveDate::from_ymd_opt(year as i32, month, 1) else {
        return Err(DateError::NoSuchDay(format!("there is no month {month:02} (months run from 01 to 12)")));
    };
    let days = first.checked_add_months(chrono::Months::new(1)).map_or(31, |next| (next - first).num_days());
    if day == 0 {
        return Err(DateError::NoSuchDay("days of the month count from 01".to_owned()));
    }
    Err(DateError::NoSuchDay(format!("{} {year} has {days} days", first.format("%B"))))
}

/// Parses `HH:MM` or `HH:MM:SS`; `24:00` is the end of the day (midnight).
pub fn parse_time_of_day(text: &str) -> Option<NaiveTime> {
    let text = text.trim();
    if text == "24:00" {
        return Some(NaiveTime::MIN);
    }
    NaiveTime::parse_from_str(text, "%H:%M").or_else(|_| NaiveTime::parse_from_str(text, "%H:%M:%S")).ok()
}

/// Reads a time of day (an instant: a deadline, a moment to check).
pub fn time_of_day(node: &Node, what: &str, diags: &mut Diagnostics) -> Option<NaiveTime> {
    // As an instant, 24:00 would be read as 00:00, the start of the day: the opposite
    // of what it says. (As a window's end it is fine, and means the end of the day.)
    if matches!(&node.value, Value::Str(s) if s.trim() == "24:00") {
        diags.push(
            Diagnostic::error("C0306", format!("{what} cannot be 24:00"), node.span.clone())
                .with_label("this would be midnight at the start of the day")
                .with_note("write \"23:59\" for the end of the day"),
        );
        return None;
    }
    let parsed = match &node.value {
        Value::Str(s) => parse_time_of_day(s),
        _ => None,
    };
    if parsed.is_none() {
        diags.push(
            Diagnostic::error("C0306", format!("{what} must be a time of day such as \"17:00\""), node.span.clone())
                .with_label("expected HH:MM (24-hour clock)"),
        );
    }
    parsed
}

/// Reads a window `HH:MM..HH:MM` (half-open; wraps over midnight if the start is later).
pub fn window(node: &Node, what: &str, diags: &mut Diagnostics) -> Option<Window> {
    let parsed = match &node.value {
        Value::Str(s) => s.split_once("..").and_then(|(a, b)| {
            let w = Window { start: parse_time_of_day(a)?, end: parse_time_of_day(b)? };
            // `00:00..24:00` is the whole day (a window whose start and end coincide).
            Some((w, w.start == NaiveTime::MIN && b.trim() == "24:00"))
        }),
        _ => None,
    };
    match parsed {
        Some((w, true)) => Some(w),
        Some((w, false)) if w.start == w.end => {
            diags.error(
                "C0307",
                format!("{what} is empty: it starts and ends at the same time"),
                node.span.clone(),
                "start and end must differ",
            );
            None
        }
        Some((w, false)) => Some(w),
        None => {
            diags.push(
                Diagnostic::error(
                    "C0307",
                    format!("{what} must be a window such as \"15:00..17:00\""),
                    node.span.clone(),
                )
                .with_label("expected HH:MM..HH:MM"),
            );
            None
        }
    }
}

/// Reads a boolean.
pub fn boolean(node: &Node, what: &str, diags: &mut Diagnostics) -> Option<bool> {
    match &node.value {
        Value::Bool(b) => Some(*b),
        other => {
            diags.error(
                "C0102",
                format!("{what} must be true or false, found {}", other.kind()),
                node.span.clone(),
                "expected true or false",
            );
            None
        }
    }
}

/// Reads a whole number in `[min, max]`.
pub fn integer(node: &Node, min: i64, max: i64, what: &str, diags: &mut Diagnostics) -> Option<i64> {
    match &node.value {
        Value::Int(i) if (min..=max).contains(i) => Some(*i),
        Value::Int(i) => {
            diags.error(
                "C0103",
                format!("{what} is {i}, outside {min}..={max}"),
                node.span.clone(),
                format!("expected {min} to {max}"),
            );
            None
        }
        other => {
            diags.error(
                "C0103",
                format!("{what} must be a whole number, found {}", other.kind()),
                node.span.clone(),
                "expected a whole number",
            );
            None
        }
    }
}

/// Reads a duration of at least `min` (a poll of 0 s would query a device without pause).
pub fn duration_at_least(
    node: &Node,
    what: &str,
    min: Duration,
    why: &str,
    diags: &mut Diagnostics,
) -> Option<Duration> {
    let d = duration(node, what, diags)?;
    if d >= min {
        return Some(d);
    }
    diags.push(
        Diagnostic::error(
            "C0106",
            format!("{what} must be at least {}", crate::units::format_duration(min)),
            node.span.clone(),
        )
        .with_label("too short")
        .with_note(why.to_owned()),
    );
    None
}

/// Reads a quantity of `dimension` that must lie in `[min, max]` (in the dimension's
/// base unit: W, V, %, s …). `range` says the bounds in the user's words ("0 W to 250 W"),
/// `why` what they protect.
#[allow(clippy::too_many_arguments)]
pub fn quantity_in(
    node: &Node,
    dimension: Dimension,
    (min, max): (f64, f64),
    what: &str,
    range: &str,
    why: &str,
    diags: &mut Diagnostics,
) -> Option<f64> {
    let v = quantity(node, dimension, what, diags)?;
    if (min..=max).contains(&v) {
        return Some(v);
    }
    diags.push(
        Diagnostic::error("C0106", format!("{what} must lie between {range}"), node.span.clone())
            .with_label("out of range")
            .with_note(why.to_owned()),
    );
    None
}

/// Reads a plain number (no unit).
pub fn number(node: &Node, what: &str, diags: &mut Diagnostics) -> Option<f64> {
    quantity(node, Dimension::Scalar, what, diags)
}

/// Reads one of a fixed set of words. YAML booleans are read as `on`/`off`.
pub fn choice<'c>(node: &Node, choices: &[&'c str], what: &str, diags: &mut Diagnostics) -> Option<&'c str> {
    let written = match &node.value {
        Value::Str(s) => s.clone(),
        Value::Bool(true) => "on".to_owned(),
        Value::Bool(false) => "off".to_owned(),
        other => other.kind().to_owned(),
    };
    if let Some(c) = choices.iter().find(|c| **c == written) {
        return Some(c);
    }
    let mut d = Diagnostic::error("C0104", format!("{what} cannot be \"{written}\""), node.span.clone())
        .with_label(format!("expected one of: {}", choices.join(", ")));
    if let Some(s) = did_you_mean(&written, choices.iter().copied()) {
        d = d.with_note(format!("did you mean \"{s}\"?"));
    }
    diags.push(d);
    None
}

/// Reads a name (`[a-z_][a-z0-9_]*`): load, point and device names appear in rules.
pub fn name<'n>(node: &'n Node, what: &str, diags: &mut Diagnostics) -> Option<&'n str> {
    let s = text(node, what, diags)?;
    if is_name(s) && crate::rules::is_reserved_word(s) {
        diags.push(
            Diagnostic::error("C0105", format!("{what} \"{s}\" is a word of the rule language"), node.span.clone())
                .with_label("a rule could never name it")
                .with_note("`and`, `or`, `not`, `for`, `in`, `true`, `false` and the weekdays `mon` … `sun` are taken: pick another name"),
        );
        None
    } else if is_name(s) {
        Some(s)
    } else {
        diags.push(
            Diagnostic::error("C0105", format!("{what} \"{s}\" is not a usable name"), node.span.clone())
                .with_label("use lowercase letters, digits and _")
                .with_note(
                    "names appear in rules, so they start with a lowercase letter or _ and contain only a-z, 0-9 and _",
                ),
        );
        None
    }
}

/// Whether `s` is a valid name for a load, point or device.
pub fn is_name(s: &str) -> bool {
    let mut chars = s.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_lowercase() || c == '_')
        && chars.all(|c| c.is_ascii_lowercase() || c.is_ascii_digit() || c == '_')
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_date_in_the_right_form_that_does_not_exist_says_so() {
        assert_eq!(parse_date("2026-06-21").unwrap().to_string(), "2026-06-21");
        assert_eq!(parse_date("2026-02-30").unwrap_err().to_string(), "no such date: February 2026 has 28 days");
        assert_eq!(parse_date("2028-02-30").unwrap_err().to_string(), "no such date: February 2028 has 29 days");
        assert_eq!(parse_date("2026-04-31").unwrap_err().to_string(), "no such date: April 2026 has 30 days");
        assert_eq!(
            parse_date("2026-13-01").unwrap_err().to_string(),
            "no such date: there is no month 13 (months run from 01 to 12)"
        );
        assert_eq!(
            parse_date("2026-06-00").unwrap_err(),
            DateError::NoSuchDay("days of the month count from 01".into())
        );
        for not_a_date in ["21/06/2026", "2026-06", "tomorrow", "2026-06-21T10:00"] {
            assert_eq!(parse_date(not_a_date), Err(DateError::NotADate), "{not_a_date}");
        }
    }
}
