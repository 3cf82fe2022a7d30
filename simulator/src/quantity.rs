//! Human-friendly quantities in the plant description: `3kW`, `150 L`, `65°C`, `30min`.
//!
//! The plant section sits inside a site file whose other keys are written with units,
//! so the simulator accepts the same style. Each `serde` helper takes either a plain
//! number (already in the base unit named by the helper) or a string with a unit.
//! (The controller crate has its own unit types; the simulator stays independent of it.)

use serde::{Deserializer, de};

/// Unit symbols by dimension, with their factor to the base unit.
const TABLE: &[(&str, Kind, f64)] = &[
    ("W", Kind::Power, 1.0),
    ("kW", Kind::Power, 1e3),
    ("kWp", Kind::Power, 1e3),
    ("Wp", Kind::Power, 1.0),
    ("MW", Kind::Power, 1e6),
    ("Wh", Kind::Energy, 1.0),
    ("kWh", Kind::Energy, 1e3),
    ("MWh", Kind::Energy, 1e6),
    ("°C", Kind::Temperature, 1.0),
    ("degC", Kind::Temperature, 1.0),
    ("%", Kind::Percent, 1.0),
    ("V", Kind::Voltage, 1.0),
    ("A", Kind::Current, 1.0),
    ("ms", Kind::Duration, 1e-3),
    ("s", Kind::Duration, 1.0),
    ("min", Kind::Duration, 60.0),
    ("h", Kind::Duration, 3600.0),
    ("d", Kind::Duration, 86400.0),
    ("L", Kind::Volume, 1.0),
    ("l", Kind::Volume, 1.0),
    ("m³", Kind::Volume, 1000.0),
    ("W/K", Kind::Conductance, 1.0),
    ("°", Kind::Angle, 1.0),
    ("deg", Kind::Angle, 1.0),
    ("m", Kind::Length, 1.0),
    ("m/s", Kind::Speed, 1.0),
];

/// What a quantity measures, each with one base unit.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    /// W
    Power,
    /// Wh
    Energy,
    /// °C
    Temperature,
    /// %
    Percent,
    /// V
    Voltage,
    /// A
    Current,
    /// s
    Duration,
    /// litres
    Volume,
    /// W/K
    Conductance,
    /// degrees
    Angle,
    /// metres
    Length,
    /// m/s
    Speed,
}

impl Kind {
    fn describe(self) -> &'static str {
        match self {
            Kind::Power => "a power such as 3kW or 800W",
            Kind::Energy => "an energy such as 10kWh",
            Kind::Temperature => "a temperature such as 60°C",
            Kind::Percent => "a percentage such as 95%",
            Kind::Voltage => "a voltage such as 230V",
            Kind::Current => "a current such as 16A",
            Kind::Duration => "a duration such as 30s, 5min or 2h",
            Kind::Volume => "a volume such as 150L",
            Kind::Conductance => "a heat-loss coefficient such as 2.2W/K",
            Kind::Angle => "an angle in degrees such as 30°",
            Kind::Length => "a length in metres such as 1400m",
            Kind::Speed => "a speed such as 1.5m/s",
        }
    }
}

/// Parses `text` as a quantity of `kind`, returning the value in the base unit.
pub fn parse(text: &str, kind: Kind) -> Result<f64, String> {
    let text = text.trim();
    let split = text
        .char_indices()
        .find(|&(i, c)| {
            !(c.is_ascii_digit() || c == '.' || c == '_' || c == 'e' && i > 0 || ((c == '-' || c == '+') && i == 0))
        })
        .map_or(text.len(), |(i, _)| i);
    let (number, symbol) = text.split_at(split);
    let number: String = number.chars().filter(|&c| c != '_').collect();
    let value: f64 = number.parse().map_err(|_| format!("expected {}, found `{text}`", kind.describe()))?;
    let symbol = symbol.trim();
    if symbol.is_empty() {
        return Ok(value);
    }
    match TABLE.iter().find(|(s, _, _)| *s == symbol) {
        Some((_, k, factor)) if *k == kind => Ok(value * factor),
        Some(_) => Err(format!("`{text}` has the wrong unit: expected {}", kind.describe())),
        None => Err(format!("unknown unit `{symbol}` in `{text}`: expected {}", kind.describe())),
    }
}

/// A value as written in the plant section: a plain number, or a text with a unit.
pub(crate) enum NumberOrText {
    Number(f64),
    Text(String),
}

impl NumberOrText {
    /// Reads one. A list, a map or nothing is refused in plain words naming `expected`
    /// (e.g. "a power such as 3kW or 800W"). (`.nan` and `.inf` never get here: the YAML
    /// reader refuses non-finite numbers.)
    pub(crate) fn read<'de, D: Deserializer<'de>>(d: D, expected: &'static str) -> Result<Self, D::Error> {
        struct Reader(&'static str);
        impl Reader {
            fn refuse<E: de::Error>(&self, found: &str) -> E {
                E::custom(format!("expected {}, found {found}", self.0))
            }
        }
        impl<'de> de::Visitor<'de> for Reader {
            type Value = NumberOrText;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str(self.0)
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> Result<NumberOrText, E> {
                Ok(NumberOrText::Number(v))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> Result<NumberOrText, E> {
                Ok(NumberOrText::Number(v as f64))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> Result<NumberOrText, E> {
                Ok(NumberOrText::Number(v as f64))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> Result<NumberOrText, E> {
                Ok(NumberOrText::Text(v.to_owned()))
            }
            fn visit_bool<E: de::Error>(self, v: bool) -> Result<NumberOrText, E> {
                Err(self.refuse(&format!("`{v}`")))
            }
            fn visit_unit<E: de::Error>(self) -> Result<NumberOrText, E> {
                Err(self.refuse("nothing"))
            }
            fn visit_none<E: de::Error>(self) -> Result<NumberOrText, E> {
                Err(self.refuse("nothing"))
            }
            fn visit_seq<A: de::SeqAccess<'de>>(self, _: A) -> Result<NumberOrText, A::Error> {
                Err(self.refuse("a list"))
            }
            fn visit_map<A: de::MapAccess<'de>>(self, _: A) -> Result<NumberOrText, A::Error> {
                Err(self.refuse("a map"))
            }
        }
        d.deserialize_any(Reader(expected))
    }
}

fn deserialize_kind<'de, D: Deserializer<'de>>(d: D, kind: Kind) -> Result<f64, D::Error> {
    match NumberOrText::read(d, kind.describe())? {
        NumberOrText::Number(v) => Ok(v),
        NumberOrText::Text(t) => parse(&t, kind).map_err(de::Error::custom),
    }
}

macro_rules! helpers {
    ($($name:ident, $opt:ident => $kind:expr;)*) => {$(
        /// serde `deserialize_with` helper for this quantity (plain numbers are in the base unit).
        pub fn $name<'de, D: Deserializer<'de>>(d: D) -> Result<f64, D::Error> {
            deserialize_kind(d, $kind)
        }
        /// The same for an optional field (use with `#[serde(default)]`).
        pub fn $opt<'de, D: Deserializer<'de>>(d: D) -> Result<Option<f64>, D::Error> {
            deserialize_kind(d, $kind).map(Some)
        }
    )*};
}

helpers! {
    power, opt_power => Kind::Power;
    energy, opt_energy => Kind::Energy;
    temperature, opt_temperature => Kind::Temperature;
    percent, opt_percent => Kind::Percent;
    voltage, opt_voltage => Kind::Voltage;
    current, opt_current => Kind::Current;
    duration, opt_duration => Kind::Duration;
    volume, opt_volume => Kind::Volume;
    conductance, opt_conductance => Kind::Conductance;
    angle, opt_angle => Kind::Angle;
    length, opt_length => Kind::Length;
    speed, opt_speed => Kind::Speed;
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_values_with_units_into_base_units() {
        assert_eq!(parse("3kW", Kind::Power), Ok(3000.0));
        assert_eq!(parse("4.5 kWp", Kind::Power), Ok(4500.0));
        assert_eq!(parse("150L", Kind::Volume), Ok(150.0));
        assert_eq!(parse("30min", Kind::Duration), Ok(1800.0));
        assert_eq!(parse("800", Kind::Power), Ok(800.0));
    }

    #[test]
    fn names_the_expected_unit_when_wrong() {
        let e = parse("3kWh", Kind::Power).unwrap_err();
        assert!(e.contains("expected a power"), "{e}");
    }
}
