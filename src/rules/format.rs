//! Writing values back as rule text: exact for `describe` (the text parses back to the
//! same number), rounded for `explain` (a person reads it).

use crate::units::{self, Dimension, Quantity};

use super::lexer::WEEKDAYS;

/// The unit a person would choose for `value` (in base units) and its factor.
fn preferred_unit(value: f64, dimension: Dimension) -> (&'static str, f64) {
    let a = value.abs();
    match dimension {
        Dimension::Power if a >= 1e6 => ("MW", 1e6),
        Dimension::Power if a >= 1e3 => ("kW", 1e3),
        Dimension::Energy if a >= 1e6 => ("MWh", 1e6),
        Dimension::Energy if a >= 1e3 => ("kWh", 1e3),
        Dimension::Duration if a != 0.0 && value % 86400.0 == 0.0 => ("d", 86400.0),
        Dimension::Duration if a != 0.0 && value % 3600.0 == 0.0 => ("h", 3600.0),
        Dimension::Duration if a != 0.0 && value % 60.0 == 0.0 => ("min", 60.0),
        Dimension::Duration if a != 0.0 && a < 1.0 => ("ms", 1e-3),
        other => (other.base_unit(), 1.0),
    }
}

/// `value` as a literal that lexes back to exactly `value`: `3.2 kW`, `-250 W`, `5 min`,
/// `58 °C`, `80 %`, `3` (a plain number).
pub(crate) fn literal(value: f64, dimension: Dimension) -> String {
    let (symbol, factor) = preferred_unit(value, dimension);
    let (number, symbol) = match exact_scaled(value, factor) {
        Some(text) => (text, symbol),
        // The preferred unit cannot say it exactly: fall back to the base unit, where
        // Rust's shortest round-trip formatting is exact by construction.
        None => (plain(value), dimension.base_unit()),
    };
    if symbol.is_empty() { number } else { format!("{number} {symbol}") }
}

/// A decimal rendering of `value / factor` that, multiplied back by `factor` the way the
/// lexer does, gives `value` again.
fn exact_scaled(value: f64, factor: f64) -> Option<String> {
    if factor == 1.0 {
        return Some(plain(value));
    }
    let scaled = value / factor;
    (0..=9).find_map(|decimals| {
        let text = trim(format!("{scaled:.decimals$}"));
        let back: f64 = text.parse().ok()?;
        (back * factor == value).then_some(text)
    })
}

/// Shortest exact decimal of a base-unit value, never in exponent notation.
fn plain(value: f64) -> String {
    let text = format!("{value}");
    if text == "-0" { "0".to_owned() } else { text }
}

fn trim(mut text: String) -> String {
    if text.contains('.') {
        while text.ends_with('0') {
            text.pop();
        }
        if text.ends_with('.') {
            text.pop();
        }
    }
    if text == "-0" { "0".to_owned() } else { text }
}

/// A value for a person: rounded to three decimals in the preferred unit.
pub(crate) fn approx(value: f64, dimension: Dimension) -> String {
    if value.is_nan() {
        return "unknown".to_owned();
    }
    if value.is_infinite() {
        let sign = if value < 0.0 { "-" } else { "" };
        let unit = dimension.base_unit();
        return if unit.is_empty() { format!("{sign}infinite") } else { format!("{sign}infinite {unit}") };
    }
    Quantity::new(value, dimension).to_string()
}

/// `09:30`; seconds are shown only when there are some (`09:30:15`).
pub(crate) fn time_of_day(seconds: f64) -> String {
    if !seconds.is_finite() {
        return "unknown".to_owned();
    }
    // Times of day are small non-negative numbers; the cast saturates outside that.
    let total = seconds.max(0.0).floor() as u64;
    let (h, m, s) = (total / 3600, total / 60 % 60, total % 60);
    if s == 0 { format!("{h:02}:{m:02}") } else { format!("{h:02}:{m:02}:{s:02}") }
}

/// `mon` … `sun` for 0 … 6.
pub(crate) fn weekday(value: f64) -> &'static str {
    if !(0.0..7.0).contains(&value) {
        return "unknown";
    }
    // In range by the check above.
    WEEKDAYS[value as usize]
}

/// A duration in milliseconds, for people: `30 s`, `5 min`, `1.5 h` stays `90 min`.
pub(crate) fn duration_ms(ms: i64) -> String {
    units::format_duration(std::time::Duration::from_millis(u64::try_from(ms).unwrap_or(0)))
}

/// A time held or gathered so far, in milliseconds, to the whole second.
pub(crate) fn whole_seconds_ms(ms: i64) -> String {
    let secs = u64::try_from(ms.saturating_add(500) / 1000).unwrap_or(0);
    units::format_duration(std::time::Duration::from_secs(secs))
}

/// A duration in milliseconds as an exact literal.
pub(crate) fn duration_literal(ms: i64) -> String {
    // Durations are stored in whole milliseconds, exact in f64 far beyond any window.
    literal(ms as f64 / 1000.0, Dimension::Duration)
}

/// How to write `value` with a unit of `dimension`, for "write 3000W or 3kW" help.
pub(crate) fn unit_suggestion(value: f64, dimension: Dimension) -> Option<String> {
    let n = units::trim_number;
    let a = value.abs();
    Some(match dimension {
        Dimension::Power if a >= 1000.0 => {
            format!("write {}W or {}kW", n(value), n(value / 1000.0))
        }
        Dimension::Power => format!("write {}W", n(value)),
        Dimension::Energy if a >= 1000.0 => {
            format!("write {}Wh or {}kWh", n(value), n(value / 1000.0))
        }
        Dimension::Energy => format!("write {}Wh or {}kWh", n(value), n(value / 1000.0)),
        Dimension::Temperature => format!("write {}°C", n(value)),
        Dimension::Ratio if a > 0.0 && a <= 1.0 => {
            format!("write {}% (percentages run from 0 to 100)", n(value * 100.0))
        }
        Dimension::Ratio => format!("write {}%", n(value)),
        Dimension::Voltage => format!("write {}V", n(value)),
        Dimension::Current => format!("write {}A", n(value)),
        Dimension::Duration if a >= 60.0 && value % 60.0 == 0.0 => {
            format!("write {}s or {}min", n(value), n(value / 60.0))
        }
        Dimension::Duration => format!("write {}s", n(value)),
        Dimension::Volume => format!("write {}L", n(value)),
        Dimension::Scalar => return None,
    })
}

/// A typical threshold of `dimension`, for "compare it, as in …" help.
pub(crate) fn example_threshold(dimension: Dimension) -> &'static str {
    match dimension {
        Dimension::Power => "3kW",
        Dimension::Energy => "5kWh",
        Dimension::Temperature => "58°C",
        Dimension::Ratio => "80%",
        Dimension::Voltage => "51V",
        Dimension::Current => "10A",
        Dimension::Duration => "1h",
        Dimension::Volume => "200L",
        Dimension::Scalar => "1",
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn literals_use_the_unit_a_person_would_choose_and_stay_exact() {
        assert_eq!(literal(3200.0, Dimension::Power), "3.2 kW");
        assert_eq!(literal(-250.0, Dimension::Power), "-250 W");
        assert_eq!(literal(300.0, Dimension::Duration), "5 min");
        assert_eq!(literal(5400.0, Dimension::Duration), "90 min");
        assert_eq!(literal(0.25, Dimension::Duration), "250 ms");
        assert_eq!(literal(58.0, Dimension::Temperature), "58 °C");
        assert_eq!(literal(80.0, Dimension::Ratio), "80 %");
        assert_eq!(literal(3.0, Dimension::Scalar), "3");
        assert_eq!(literal(0.1 + 0.2, Dimension::Scalar), "0.30000000000000004");
        // 3200.1 W is not exactly 3.2001 kW in binary, so it stays in watts.
        let odd = 3200.1;
        let text = literal(odd, Dimension::Power);
        assert!(text == "3.2001 kW" || text == "3200.1 W", "{text}");
    }

    #[test]
    fn times_and_weekdays_read_naturally() {
        assert_eq!(time_of_day(9.0 * 3600.0 + 30.0 * 60.0), "09:30");
        assert_eq!(time_of_day(86400.0), "24:00");
        assert_eq!(time_of_day(61.0), "00:01:01");
        assert_eq!(weekday(5.0), "sat");
        assert_eq!(weekday(f64::NAN), "unknown");
    }
}
