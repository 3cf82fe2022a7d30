//! Typed physical quantities and instants: the one place where units live.
//!
//! Every quantity is stored in one base unit (W, Wh, °C, %, V, A, s) so that the
//! engine never multiplies by 1000 in the middle of a decision. Text such as
//! `3.2kW` or `5 min` is turned into a [`Quantity`] by [`parse_quantity`]; the rule
//! language and the configuration loader share that parser, so a unit means the
//! same thing everywhere.

use std::fmt;
use std::ops::{Add, AddAssign, Div, Mul, Neg, Sub, SubAssign};
use std::time::Duration;

/// What a number measures. Mixing dimensions is a load-time error.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Dimension {
    /// Watts.
    Power,
    /// Watt-hours.
    Energy,
    /// Degrees Celsius.
    Temperature,
    /// Percent (0–100 for a state of charge or a setpoint).
    Ratio,
    /// Volts.
    Voltage,
    /// Amperes.
    Current,
    /// Seconds.
    Duration,
    /// Litres (a tank's volume).
    Volume,
    /// A plain number with no unit.
    Scalar,
}

impl Dimension {
    /// The base unit every value of this dimension is stored in.
    pub fn base_unit(self) -> &'static str {
        match self {
            Dimension::Power => "W",
            Dimension::Energy => "Wh",
            Dimension::Temperature => "°C",
            Dimension::Ratio => "%",
            Dimension::Voltage => "V",
            Dimension::Current => "A",
            Dimension::Duration => "s",
            Dimension::Volume => "L",
            Dimension::Scalar => "",
        }
    }

    /// A human name for error messages ("a power", "a temperature").
    pub fn describe(self) -> &'static str {
        match self {
            Dimension::Power => "a power",
            Dimension::Energy => "an energy",
            Dimension::Temperature => "a temperature",
            Dimension::Ratio => "a percentage",
            Dimension::Voltage => "a voltage",
            Dimension::Current => "a current",
            Dimension::Duration => "a duration",
            Dimension::Volume => "a volume",
            Dimension::Scalar => "a plain number",
        }
    }

    /// Units accepted for this dimension, for "expected …" hints.
    pub fn example_units(self) -> &'static str {
        match self {
            Dimension::Power => "W, kW or MW",
            Dimension::Energy => "Wh, kWh or MWh",
            Dimension::Temperature => "°C",
            Dimension::Ratio => "%",
            Dimension::Voltage => "V",
            Dimension::Current => "A",
            Dimension::Duration => "ms, s, min, h or d",
            Dimension::Volume => "L",
            Dimension::Scalar => "no unit",
        }
    }
}

impl fmt::Display for Dimension {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.describe())
    }
}

/// One unit symbol the parser understands: its dimension and the factor to the base unit.
struct UnitDef {
    symbol: &'static str,
    dimension: Dimension,
    factor: f64,
}

const UNITS: &[UnitDef] = &[
    UnitDef { symbol: "W", dimension: Dimension::Power, factor: 1.0 },
    UnitDef { symbol: "kW", dimension: Dimension::Power, factor: 1e3 },
    UnitDef { symbol: "MW", dimension: Dimension::Power, factor: 1e6 },
    UnitDef { symbol: "Wh", dimension: Dimension::Energy, factor: 1.0 },
    UnitDef { symbol: "kWh", dimension: Dimension::Energy, factor: 1e3 },
    UnitDef { symbol: "MWh", dimension: Dimension::Energy, factor: 1e6 },
    UnitDef { symbol: "°C", dimension: Dimension::Temperature, factor: 1.0 },
    UnitDef { symbol: "degC", dimension: Dimension::Temperature, factor: 1.0 },
    UnitDef { symbol: "%", dimension: Dimension::Ratio, factor: 1.0 },
    UnitDef { symbol: "V", dimension: Dimension::Voltage, factor: 1.0 },
    UnitDef { symbol: "A", dimension: Dimension::Current, factor: 1.0 },
    UnitDef { symbol: "ms", dimension: Dimension::Duration, factor: 1e-3 },
    UnitDef { symbol: "s", dimension: Dimension::Duration, factor: 1.0 },
    UnitDef { symbol: "min", dimension: Dimension::Duration, factor: 60.0 },
    UnitDef { symbol: "h", dimension: Dimension::Duration, factor: 3600.0 },
    UnitDef { symbol: "d", dimension: Dimension::Duration, factor: 86400.0 },
    UnitDef { symbol: "L", dimension: Dimension::Volume, factor: 1.0 },
];

/// Looks a unit symbol up: its dimension and the factor that turns it into the base unit.
pub fn unit(symbol: &str) -> Option<(Dimension, f64)> {
    UNITS.iter().find(|u| u.symbol == symbol).map(|u| (u.dimension, u.factor))
}

/// Every unit symbol, for "did you mean" hints and documentation.
pub fn unit_symbols() -> impl Iterator<Item = &'static str> {
    UNITS.iter().map(|u| u.symbol)
}

/// A number with its dimension, in the dimension's base unit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Quantity {
    /// Value in the base unit of `dimension`.
    pub value: f64,
    /// What the value measures.
    pub dimension: Dimension,
}

impl Quantity {
    /// A value already in base units.
    pub fn new(value: f64, dimension: Dimension) -> Self {
        Quantity { value, dimension }
    }
}

impl fmt::Display for Quantity {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        format_quantity(f, self.value, self.dimension)
    }
}

/// Writes a value in the unit a person would choose (2.5 kW, 750 W, 5 min, 58 °C).
fn format_quantity(f: &mut fmt::Formatter<'_>, value: f64, dimension: Dimension) -> fmt::Result {
    let (scaled, symbol) = match dimension {
        Dimension::Power if value.abs() >= 1e6 => (value / 1e6, "MW"),
        Dimension::Power if value.abs() >= 1e3 => (value / 1e3, "kW"),
        Dimension::Energy if value.abs() >= 1e6 => (value / 1e6, "MWh"),
        Dimension::Energy if value.abs() >= 1e3 => (value / 1e3, "kWh"),
        Dimension::Duration if value != 0.0 && value % 86400.0 == 0.0 => (value / 86400.0, "d"),
        Dimension::Duration if value != 0.0 && value % 3600.0 == 0.0 => (value / 3600.0, "h"),
        Dimension::Duration if value != 0.0 && value % 60.0 == 0.0 => (value / 60.0, "min"),
        Dimension::Duration if value != 0.0 && value.abs() < 1.0 => (value * 1e3, "ms"),
        // Whole seconds past a minute: minutes and seconds, so a countdown does not turn
        // from `3 min` into `179 s`.
        Dimension::Duration if value > 60.0 && value.fract() == 0.0 => {
            return write!(f, "{} min {} s", (value / 60.0).floor(), value % 60.0);
        }
        other => (value, other.base_unit()),
    };
    let text = trim_number(scaled);
    if symbol.is_empty() { f.write_str(&text) } else { write!(f, "{text} {symbol}") }
}

/// Formats a number with at most three decimals and no trailing zeros.
pub fn trim_number(value: f64) -> String {
    let mut text = format!("{value:.3}");
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

/// Why a piece of text is not a quantity.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
pub enum UnitError {
    /// The text does not start with a number.
    #[error("expected a number followed by a unit, found `{0}`")]
    NotANumber(String),
    /// The number is followed by a symbol that is not a unit.
    #[error("unknown unit `{0}`")]
    UnknownUnit(String),
}

/// Parses `3.2kW`, `3.2 kW`, `-250 W`, `58°C`, `5min`, `10 %` or a bare number.
///
/// A bare number has [`Dimension::Scalar`]; the caller decides whether that is allowed.
pub fn parse_quantity(text: &str) -> Result<Quantity, UnitError> {
    let text = text.trim();
    let number_end = text
        .char_indices()
        .find(|&(i, c)| !(c.is_ascii_digit() || c == '.' || c == '_' || ((c == '-' || c == '+') && i == 0)))
        .map_or(text.len(), |(i, _)| i);
    let (number, rest) = text.split_at(number_end);
    let number: String = number.chars().filter(|&c| c != '_').collect();
    let value: f64 = number.parse().map_err(|_| UnitError::NotANumber(text.to_owned()))?;
    let symbol = rest.trim();
    if symbol.is_empty() {
        return Ok(Quantity::new(value, Dimension::Scalar));
    }
    let (dimension, factor) = unit(symbol).ok_or_else(|| UnitError::UnknownUnit(symbol.to_owned()))?;
    Ok(Quantity::new(value * factor, dimension))
}

macro_rules! quantity_type {
    ($(#[$doc:meta])* $name:ident, $dimension:expr) => {
        $(#[$doc])*
        #[derive(Debug, Clone, Copy, PartialEq, PartialOrd, Default)]
        pub struct $name(pub f64);

        impl $name {
            /// Zero in this quantity.
            pub const ZERO: $name = $name(0.0);
            /// The dimension this type carries.
            pub const DIMENSION: Dimension = $dimension;

            /// The raw value in the base unit.
            pub fn value(self) -> f64 {
                self.0
            }
            /// The larger of two values.
            pub fn max(self, other: Self) -> Self {
                $name(self.0.max(other.0))
            }
            /// The smaller of two values.
            pub fn min(self, other: Self) -> Self {
                $name(self.0.min(other.0))
            }
            /// Limits the value to `[lo, hi]`.
            pub fn clamp(self, lo: Self, hi: Self) -> Self {
                $name(self.0.clamp(lo.0, hi.0))
            }
            /// The absolute value.
            pub fn abs(self) -> Self {
                $name(self.0.abs())
            }
            /// This value as a dimensioned [`Quantity`].
            pub fn quantity(self) -> Quantity {
                Quantity::new(self.0, $dimension)
            }
        }

        impl Add for $name {
            type Output = $name;
            fn add(self, rhs: $name) -> $name {
                $name(self.0 + rhs.0)
            }
        }
        impl Sub for $name {
            type Output = $name;
            fn sub(self, rhs: $name) -> $name {
                $name(self.0 - rhs.0)
            }
        }
        impl AddAssign for $name {
            fn add_assign(&mut self, rhs: $name) {
                self.0 += rhs.0;
            }
        }
        impl SubAssign for $name {
            fn sub_assign(&mut self, rhs: $name) {
                self.0 -= rhs.0;
            }
        }
        impl Neg for $name {
            type Output = $name;
            fn neg(self) -> $name {
                $name(-self.0)
            }
        }
        impl Mul<f64> for $name {
            type Output = $name;
            fn mul(self, rhs: f64) -> $name {
                $name(self.0 * rhs)
            }
        }
        impl Div<f64> for $name {
            type Output = $name;
            fn div(self, rhs: f64) -> $name {
                $name(self.0 / rhs)
            }
        }
        impl fmt::Display for $name {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                format_quantity(f, self.0, $dimension)
            }
        }
        impl std::iter::Sum for $name {
            fn sum<I: Iterator<Item = $name>>(iter: I) -> $name {
                $name(iter.map(|v| v.0).sum())
            }
        }
    };
}

quantity_type!(
    /// Electrical power in watts. At the grid point, import is positive.
    Power,
    Dimension::Power
);
quantity_type!(
    /// Energy in watt-hours.
    Energy,
    Dimension::Energy
);
quantity_type!(
    /// Temperature in degrees Celsius.
    Temperature,
    Dimension::Temperature
);
quantity_type!(
    /// A percentage: a state of charge or a setpoint, 0–100.
    Ratio,
    Dimension::Ratio
);
quantity_type!(
    /// Electrical potential in volts.
    Voltage,
    Dimension::Voltage
);
quantity_type!(
    /// Electrical current in amperes.
    Current,
    Dimension::Current
);

impl Power {
    /// Energy delivered at this power over `dt`.
    pub fn over(self, dt: Duration) -> Energy {
        Energy(self.0 * dt.as_secs_f64() / 3600.0)
    }
}

/// An instant: milliseconds since 1970-01-01T00:00:00Z.
///
/// The engine receives instants as inputs and never reads a clock; plain integers keep
/// its hot path free of calendar arithmetic. Convert at the edges with [`Timestamp::to_utc`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash, Default)]
pub struct Timestamp(pub i64);

impl Timestamp {
    /// Earlier than any real measurement: the time of a sample that never arrived.
    pub const NEVER: Timestamp = Timestamp(i64::MIN / 4);

    /// From whole milliseconds since the Unix epoch.
    pub fn from_millis(ms: i64) -> Self {
        Timestamp(ms)
    }
    /// Milliseconds since the Unix epoch.
    pub fn millis(self) -> i64 {
        self.0
    }
    /// From a chrono UTC time.
    pub fn from_utc(t: chrono::DateTime<chrono::Utc>) -> Self {
        Timestamp(t.timestamp_millis())
    }
    /// As a chrono UTC time (the epoch for out-of-range values).
    pub fn to_utc(self) -> chrono::DateTime<chrono::Utc> {
        chrono::DateTime::from_timestamp_millis(self.0).unwrap_or_default()
    }
    /// Time elapsed since `earlier`, zero if `earlier` is later.
    pub fn since(self, earlier: Timestamp) -> Duration {
        Duration::from_millis(u64::try_from(self.0.saturating_sub(earlier.0)).unwrap_or(0))
    }
    /// This instant moved by `ms` (either way), except [`Timestamp::NEVER`], which stays
    /// never: for re-basing stored instants when the wall clock is set back.
    pub fn shifted(self, ms: i64) -> Timestamp {
        if self == Timestamp::NEVER { self } else { Timestamp(self.0.saturating_add(ms)) }
    }
    /// This instant moved forward by `d`.
    pub fn plus(self, d: Duration) -> Timestamp {
        Timestamp(self.0.saturating_add(i64::try_from(d.as_millis()).unwrap_or(i64::MAX)))
    }
    /// This instant moved back by `d`.
    pub fn minus(self, d: Duration) -> Timestamp {
        Timestamp(self.0.saturating_sub(i64::try_from(d.as_millis()).unwrap_or(i64::MAX)))
    }
}

impl fmt::Display for Timestamp {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}", self.to_utc().format("%Y-%m-%dT%H:%M:%S%.3fZ"))
    }
}

/// Writes a duration the way a person reads it: `7200 s` → `2 h`, `300 s` → `5 min`,
/// `179 s` → `2 min 59 s`, `0.25 s` → `250 ms`.
pub fn format_duration(d: Duration) -> String {
    Quantity::new(d.as_secs_f64(), Dimension::Duration).to_string()
}

/// [`format_duration`] of a countdown or a time held, to the whole second (up to the
/// next one, so a hold still running never reads `0 s left`): reasons change every tick,
/// and `190.001 s left` is noise to a person.
pub fn format_whole_seconds(d: Duration) -> String {
    let secs = d.as_secs() + u64::from(d.subsec_nanos() > 0);
    format_duration(Duration::from_secs(secs))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(text: &str, value: f64, dimension: Dimension) {
        let q = parse_quantity(text).unwrap();
        assert_eq!(q.dimension, dimension, "{text}");
        assert!((q.value - value).abs() < 1e-9, "{text}: {} != {value}", q.value);
    }

    /// Reasons read durations to the whole second, in one form: a countdown once went
    /// from `(3 min left)` to `(179 s left)`, and printed `190.001 s left`.
    #[test]
    fn durations_are_written_in_one_form_and_countdowns_to_the_whole_second() {
        let s = Duration::from_secs;
        assert_eq!(format_duration(s(180)), "3 min");
        assert_eq!(format_duration(s(179)), "2 min 59 s");
        assert_eq!(format_duration(s(59)), "59 s");
        assert_eq!(format_duration(s(5400)), "90 min");
        assert_eq!(format_duration(s(7200)), "2 h");
        assert_eq!(format_duration(Duration::from_millis(250)), "250 ms");
        assert_eq!(format_duration(Duration::from_millis(1500)), "1.5 s");
        assert_eq!(format_whole_seconds(Duration::from_millis(190_001)), "3 min 11 s");
        assert_eq!(format_whole_seconds(Duration::from_millis(179_400)), "3 min");
        assert_eq!(format_whole_seconds(Duration::from_millis(200)), "1 s");
        assert_eq!(format_whole_seconds(Duration::ZERO), "0 s");
    }

    #[test]
    fn parses_numbers_with_units_into_base_units() {
        check("3.2kW", 3200.0, Dimension::Power);
        check("3.2 kW", 3200.0, Dimension::Power);
        check("-250W", -250.0, Dimension::Power);
        check("58°C", 58.0, Dimension::Temperature);
        check("5min", 300.0, Dimension::Duration);
        check("1.5 h", 5400.0, Dimension::Duration);
        check("250ms", 0.25, Dimension::Duration);
        check("12 kWh", 12000.0, Dimension::Energy);
        check("80%", 80.0, Dimension::Ratio);
        check("16A", 16.0, Dimension::Current);
        check("51.2V", 51.2, Dimension::Voltage);
        check("1_500 W", 1500.0, Dimension::Power);
        check("42", 42.0, Dimension::Scalar);
    }

    #[test]
    fn rejects_unknown_units_and_non_numbers() {
        assert_eq!(parse_quantity("3 kw"), Err(UnitError::UnknownUnit("kw".into())));
        assert!(matches!(parse_quantity("kW"), Err(UnitError::NotANumber(_))));
    }

    #[test]
    fn displays_in_the_unit_a_person_would_choose() {
        assert_eq!(Power(3200.0).to_string(), "3.2 kW");
        assert_eq!(Power(250.0).to_string(), "250 W");
        assert_eq!(Energy(12_500.0).to_string(), "12.5 kWh");
        assert_eq!(format_duration(Duration::from_secs(300)), "5 min");
        assert_eq!(format_duration(Duration::from_secs(7200)), "2 h");
        assert_eq!(format_duration(Duration::from_secs(45)), "45 s");
        assert_eq!(Temperature(58.0).to_string(), "58 °C");
    }

    #[test]
    fn power_over_time_is_energy() {
        assert_eq!(Power(3000.0).over(Duration::from_secs(1800)), Energy(1500.0));
    }
}
