//! `sweep`: one site file run again and again with one setting varied — the array size,
//! a rule's threshold — to answer "how big an array, and is it worth it?".
//!
//! The setting is named by a path into the site file: map keys separated by dots; in a
//! list, an index or the `name` of an item (`loads.water_heater.min_on`,
//! `plant.solar.arrays.roof.strings.0.modules`). A path ending in `#n` picks the n-th
//! number of a rule (`loads.water_heater.start#1`). Values are written into the file's
//! text as `FROM` was written (same unit), and each variant is loaded and checked like
//! any site file, so a sweep cannot produce a site `check` would refuse.

use std::ops::Range;

use super::OfflineError;
use crate::config::yaml::{self, Node, Value};
use crate::units::{self, trim_number};

/// One `--vary` specification.
#[derive(Debug, Clone, PartialEq)]
pub struct Vary {
    /// Path into the site file.
    pub path: Vec<String>,
    /// Which number of a rule (1-based), for paths ending in `#n`.
    pub number: Option<usize>,
    /// The values, in the unit of `FROM`.
    pub values: Vec<f64>,
    /// The unit as written in `FROM` (may be empty).
    pub unit: String,
    /// `TO` as written, in the unit of `FROM`.
    pub to: f64,
}

impl Vary {
    /// Each value as text, as it will be written into the file.
    pub fn texts(&self) -> Vec<String> {
        self.values.iter().map(|v| format!("{}{}", trim_number(*v), self.unit)).collect()
    }

    /// A warning when the steps from `FROM` pass `TO` by without landing on it, so the
    /// last value run is not the `TO` the user wrote.
    pub fn warning(&self) -> Option<String> {
        let last = *self.values.last()?;
        let step = self.values.get(1).map_or(0.0, |second| second - self.values[0]);
        ((self.to - last).abs() > 1e-9 * self.to.abs().max(1.0)).then(|| {
            let n = |v: f64| format!("{}{}", trim_number(v), self.unit);
            format!(
                "--vary {}: steps of {} from {} do not reach {}; the last value run is {}",
                self.key(),
                n(step),
                n(self.values[0]),
                n(self.to),
                n(last)
            )
        })
    }

    /// The path as written.
    pub fn key(&self) -> String {
        let mut k = self.path.join(".");
        if let Some(n) = self.number {
            k.push_str(&format!("#{n}"));
        }
        k
    }
}

/// Splits `3.2kW` into (3.2, "kW"). The unit is kept as written, whatever it is (the
/// site's `kW` and `°C`, or the plant's `L`, `Wp`, `°`, `/day`): each variant is checked
/// like any site file before it runs, which catches a wrong one.
fn split_unit(text: &str) -> Option<(f64, String)> {
    let number_end = text
        .char_indices()
        .find(|&(i, c)| !(c.is_ascii_digit() || c == '.' || c == '_' || ((c == '-' || c == '+') && i == 0)))
        .map_or(text.len(), |(i, _)| i);
    let number: String = text[..number_end].chars().filter(|&c| c != '_').collect();
    let value: f64 = number.parse().ok().filter(|v: &f64| v.is_finite())?;
    Some((value, text[number_end..].trim().to_owned()))
}

/// Parses `KEY=FROM..TO:STEP`.
pub fn parse_vary(spec: &str) -> Result<Vary, OfflineError> {
    let bad = |why: &str| {
        OfflineError::Options(format!(
            "--vary {spec}: {why} (expected KEY=FROM..TO:STEP, e.g. plant.solar.arrays.0.strings.0.modules=8..20:2)"
        ))
    };
    let (key, range) = spec.split_once('=').ok_or_else(|| bad("no `=`"))?;
    let (span, step) = range.rsplit_once(':').ok_or_else(|| bad("no `:STEP`"))?;
    let (from, to) = span.split_once("..").ok_or_else(|| bad("no `FROM..TO`"))?;
    let (from_v, unit) = split_unit(from.trim()).ok_or_else(|| bad("FROM is not a number with an optional unit"))?;
    let (to_v, to_unit) = split_unit(to.trim()).ok_or_else(|| bad("TO is not a number"))?;
    let (step_v, step_unit) = split_unit(step.trim()).ok_or_else(|| bad("STEP is not a number"))?;
    // A part without a unit beside parts with one is not read in their unit: `500` as a
    // step of a kW range is more likely 500 W than 500 kW, and taken as kW it would run
    // FROM alone. Rules and site keys refuse such bare numbers too.
    let parts = [("FROM", from.trim(), &unit), ("TO", to.trim(), &to_unit), ("STEP", step.trim(), &step_unit)];
    if let Some(&(_, _, with)) = parts.iter().find(|(_, _, u)| !u.is_empty()) {
        if let Some(&(name, text, _)) = parts.iter().find(|(_, _, u)| u.is_empty()) {
            let others: Vec<&str> = parts.iter().filter(|(_, _, u)| !u.is_empty()).map(|(n, _, _)| *n).collect();
            return Err(bad(&format!(
                "{name} `{text}` needs a unit: {} {} in {with}, so write {name} in {with} too",
                others.join(" and "),
                if others.len() > 1 { "are" } else { "is" }
            )));
        }
        if parts.iter().any(|(_, _, u)| u != &with) {
            let written: Vec<String> = parts.iter().map(|(n, t, _)| format!("{n} `{t}`")).collect();
            return Err(bad(&format!(
                "FROM, TO and STEP must be written in one unit, found {}; write all three in {with}",
                written.join(", ")
            )));
        }
    }
    if step_v <= 0.0 || to_v < from_v {
        return Err(bad("STEP must be positive and TO not below FROM"));
    }
    let n = ((to_v - from_v) / step_v + 1e-9).floor() as usize + 1;
    // A range whose step is wider than the range runs FROM alone: surely not what a
    // range from one value to another meant.
    if n == 1 && to_v > from_v {
        return Err(bad(&format!(
            "STEP {step} is wider than the range {from}..{to}, so only FROM would run; use a smaller STEP (or FROM..FROM for one value)",
            step = step.trim(),
            from = from.trim(),
            to = to.trim()
        )));
    }
    if n > 64 {
        return Err(bad("more than 64 values; use a larger STEP"));
    }
    let values = (0..n).map(|i| from_v + step_v * i as f64).collect();
    let (path, number) = match key.trim().split_once('#') {
        Some((p, n)) => {
            (p, Some(n.parse::<usize>().ok().filter(|n| *n >= 1).ok_or_else(|| bad("`#n` needs a number from 1"))?))
        }
        None => (key.trim(), None),
    };
    if path.is_empty() {
        return Err(bad("empty KEY"));
    }
    // The run's dates and seed come from the base file and the command line, so varying
    // them would give identical rows.
    if path == "plant.seed" || path == "simulation" || path.starts_with("simulation.") {
        return Err(bad("the dates and the seed are the same for every value: use --from, --days and --seed"));
    }
    Ok(Vary { path: path.split('.').map(str::to_owned).collect(), number, values, unit, to: to_v })
}

fn find<'n>(node: &'n Node, path: &[String]) -> Option<&'n Node> {
    let Some((first, rest)) = path.split_first() else { return Some(node) };
    let next = match &node.value {
        Value::Map(entries) => entries.iter().find(|(k, _)| &k.name == first).map(|(_, v)| v),
        Value::Seq(items) => match first.parse::<usize>() {
            Ok(i) => items.get(i),
            Err(_) => items.iter().find(|item| match &item.value {
                Value::Map(e) => {
                    e.iter().any(|(k, v)| k.name == "name" && matches!(&v.value, Value::Str(s) if s == first))
                }
                _ => false,
            }),
        },
        _ => None,
    }?;
    find(next, rest)
}

/// Whole paths (dotted, a list item by its `name` or index) of the nodes whose path ends
/// in `tail`: what a `--vary` path written without its section (`guard.kp` for
/// `site.guard.kp`) meant.
fn paths_ending_in(node: &Node, at: &mut Vec<String>, tail: &[String], found: &mut Vec<String>) {
    if at.len() > tail.len() && at.ends_with(tail) {
        found.push(at.join("."));
    }
    match &node.value {
        Value::Map(entries) => {
            for (k, v) in entries {
                at.push(k.name.clone());
                paths_ending_in(v, at, tail, found);
                at.pop();
            }
        }
        Value::Seq(items) => {
            for (i, item) in items.iter().enumerate() {
                let name = match &item.value {
                    Value::Map(e) => e.iter().find_map(|(k, v)| match &v.value {
                        Value::Str(s) if k.name == "name" => Some(s.clone()),
                        _ => None,
                    }),
                    _ => None,
                };
                at.push(name.unwrap_or_else(|| i.to_string()));
                paths_ending_in(item, at, tail, found);
                at.pop();
            }
        }
        _ => {}
    }
}

/// Byte range of the n-th number (with its unit) inside a rule's text.
fn nth_number(text: &str, n: usize) -> Option<Range<usize>> {
    let bytes = text.as_bytes();
    let mut found = 0;
    let mut i = 0;
    while i < bytes.len() {
        let starts_number = bytes[i].is_ascii_digit()
            && (i == 0 || !(bytes[i - 1].is_ascii_alphanumeric() || bytes[i - 1] == b'_' || bytes[i - 1] == b':'));
        if !starts_number {
            i += 1;
            continue;
        }
        let start = i;
        while i < bytes.len() && (bytes[i].is_ascii_digit() || bytes[i] == b'.') {
            i += 1;
        }
        // A time of day (17:00) is not a number to vary.
        if i < bytes.len() && bytes[i] == b':' {
            while i < bytes.len() && (bytes[i].is_ascii_digit() || bytes[i] == b':') {
                i += 1;
            }
            continue;
        }
        // Its unit, attached or after one blank.
        let mut j = i;
        if j < bytes.len()
            && bytes[j] == b' '
            && j + 1 < bytes.len()
            && !bytes[j + 1].is_ascii_digit()
            && units::unit_symbols().any(|u| text[j + 1..].starts_with(u))
        {
            j += 1;
        }
        let unit_len = units::unit_symbols().filter(|u| text[j..].starts_with(u)).map(str::len).max().unwrap_or(0);
        let end = if unit_len > 0 { j + unit_len } else { i };
        found += 1;
        if found == n {
            return Some(start..end);
        }
        i = end.max(i);
    }
    None
}

/// The site file's text with the varied setting set to `value`.
pub fn substitute(text: &str, vary: &Vary, value: &str) -> Result<String, OfflineError> {
    let tree = yaml::parse(text).map_err(|d| OfflineError::Options(d.message.clone()))?;
    let node = find(&tree, &vary.path).ok_or_else(|| {
        let wanted = vary.path.join(".");
        let mut found = Vec::new();
        paths_ending_in(&tree, &mut Vec::new(), &vary.path, &mut found);
        OfflineError::Options(match found.as_slice() {
            [] => format!(
                "--vary: the site file has no `{wanted}`; a setting left at its default must be written into the file (at any value) before it can be varied"
            ),
            [one] => format!("--vary: the site file has no `{wanted}` at its top level; did you mean `{one}`?"),
            more => format!(
                "--vary: the site file has no `{wanted}` at its top level; it has {}: name one by its whole path",
                more.iter().map(|p| format!("`{p}`")).collect::<Vec<_>>().join(", ")
            ),
        })
    })?;
    let range = match vary.number {
        None => {
            if matches!(node.value, Value::Map(_) | Value::Seq(_)) {
                return Err(OfflineError::Options(format!(
                    "--vary: `{}` is a section, not a value",
                    vary.path.join(".")
                )));
            }
            node.span.clone()
        }
        Some(n) => {
            let rule = node
                .scalar_text()
                .ok_or_else(|| OfflineError::Options(format!("--vary: `{}` is not a rule", vary.path.join("."))))?;
            let at = yaml::locate_text(text, node, &rule);
            let r = nth_number(&rule, n)
                .ok_or_else(|| OfflineError::Options(format!("--vary: the rule `{rule}` has no number #{n}")))?;
            at + r.start..at + r.end
        }
    };
    let mut out = String::with_capacity(text.len() + value.len());
    out.push_str(&text[..range.start]);
    out.push_str(value);
    out.push_str(&text[range.end..]);
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parses_a_range_in_the_unit_of_from() {
        let v = parse_vary("loads.tank.start#1=2.5kW..4kW:0.5kW").unwrap();
        assert_eq!(v.texts(), ["2.5kW", "3kW", "3.5kW", "4kW"]);
        assert_eq!(v.number, Some(1));
        assert_eq!(parse_vary("a.b=8..12:2").unwrap().texts(), ["8", "10", "12"]);
        // The plant's own units, kept as written.
        assert_eq!(parse_vary("plant.tank.volume=100L..150L:50L").unwrap().texts(), ["100L", "150L"]);
        assert_eq!(parse_vary("plant.solar.arrays.0.tilt=10°..40°:15°").unwrap().texts(), ["10°", "25°", "40°"]);
        assert!(parse_vary("plant.seed=1..2:1").unwrap_err().to_string().contains("use --from, --days and --seed"));
        assert!(parse_vary("a=1..2").is_err());
        assert!(parse_vary("a=1kW..2h:1kW").is_err());
    }

    #[test]
    fn a_range_part_without_the_unit_of_the_others_is_refused() {
        let err = parse_vary("loads.water_heater.start#1=2kW..3kW:500").unwrap_err().to_string();
        assert!(err.contains("STEP `500` needs a unit: FROM and TO are in kW, so write STEP in kW too"), "{err}");
        let err = parse_vary("a=2..3kW:0.5kW").unwrap_err().to_string();
        assert!(err.contains("FROM `2` needs a unit: TO and STEP are in kW"), "{err}");
        let err = parse_vary("a=2kW..3:0.5kW").unwrap_err().to_string();
        assert!(err.contains("TO `3` needs a unit"), "{err}");
        let err = parse_vary("a=2kW..3000W:500W").unwrap_err().to_string();
        assert!(err.contains("must be written in one unit, found FROM `2kW`, TO `3000W`, STEP `500W`"), "{err}");
        // Bare throughout is a plain number (modules, layers).
        assert_eq!(parse_vary("a=1..9:4").unwrap().texts(), ["1", "5", "9"]);
    }

    #[test]
    fn a_step_wider_than_the_range_is_refused_and_a_missed_to_is_warned_about() {
        let err = parse_vary("a=2kW..3kW:5kW").unwrap_err().to_string();
        assert!(err.contains("STEP 5kW is wider than the range 2kW..3kW, so only FROM would run"), "{err}");
        // One value on purpose.
        let one = parse_vary("a=2kW..2kW:1kW").unwrap();
        assert_eq!((one.texts(), one.warning()), (vec!["2kW".to_owned()], None));
        let short = parse_vary("a=2kW..3kW:0.4kW").unwrap();
        assert_eq!(short.texts(), ["2kW", "2.4kW", "2.8kW"]);
        assert_eq!(
            short.warning().as_deref(),
            Some("--vary a: steps of 0.4kW from 2kW do not reach 3kW; the last value run is 2.8kW")
        );
        assert_eq!(parse_vary("a=2.5kW..4kW:0.5kW").unwrap().warning(), None);
        assert_eq!(parse_vary("a=0.1..0.3:0.1").unwrap().warning(), None);
    }

    #[test]
    fn substitutes_a_value_or_a_rules_number_in_place() {
        let text =
            "loads:\n  - name: tank\n    min_on: 5min\n    start: surplus > 3.1kW for 20s and tank_temp < 60°C\n";
        let on = parse_vary("loads.tank.min_on=10min..10min:1min").unwrap();
        assert!(substitute(text, &on, "10min").unwrap().contains("min_on: 10min"));
        let threshold = parse_vary("loads.tank.start#1=2kW..2kW:1kW").unwrap();
        assert!(substitute(text, &threshold, "2.5kW").unwrap().contains("start: surplus > 2.5kW for 20s"));
        let temp = parse_vary("loads.tank.start#3=55°C..55°C:1°C").unwrap();
        assert!(substitute(text, &temp, "55°C").unwrap().contains("tank_temp < 55°C"));
        assert!(substitute(text, &parse_vary("loads.pump.min_on=1min..1min:1min").unwrap(), "1min").is_err());
        // A setting at its default is not in the file: the error says to write it in.
        let unwritten = parse_vary("loads.tank.min_off=1min..2min:1min").unwrap();
        let err = substitute(text, &unwritten, "1min").unwrap_err().to_string();
        assert!(err.contains("must be written into the file"), "{err}");
    }

    /// `guard.kp` is a setting of the `site` section: the path written without its
    /// section is answered with the whole one, the README's tables naming keys within
    /// their section.
    #[test]
    fn a_path_without_its_section_is_answered_with_the_whole_path() {
        let text = "site:\n  name: A\n  guard: { kp: 0.1, ki: 0.5 }\nloads:\n  - name: tank\n    min_on: 5min\n  - name: pump\n    min_on: 1h\n";
        let err = substitute(text, &parse_vary("guard.kp=0..1:0.5").unwrap(), "0.5").unwrap_err().to_string();
        assert!(err.contains("did you mean `site.guard.kp`?"), "{err}");
        let err = substitute(text, &parse_vary("min_on=1h..2h:1h").unwrap(), "1h").unwrap_err().to_string();
        assert!(err.contains("it has `loads.tank.min_on`, `loads.pump.min_on`: name one by its whole path"), "{err}");
    }
}
