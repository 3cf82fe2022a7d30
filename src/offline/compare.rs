//! Two rule sets on the same plant, weather and seed, side by side: energies, costs,
//! switchings, obligations and export, with the better value marked in each row.

use std::fmt::Write as _;

use serde::Serialize;

use super::report::Report;

/// Which side is better in a row.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Better {
    /// The first file.
    A,
    /// The second file.
    B,
    /// Equal (or not comparable).
    Same,
}

/// One row of the comparison.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Row {
    /// What is compared.
    pub label: String,
    /// Unit of the values.
    pub unit: String,
    /// Value for the first file (`None`: it has no such load or obligation).
    pub a: Option<f64>,
    /// Value for the second file (likewise).
    pub b: Option<f64>,
    /// Which is better.
    pub better: Better,
}

/// The whole comparison.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Comparison {
    /// Name of the first file.
    pub a: String,
    /// Name of the second file.
    pub b: String,
    /// Rows.
    pub rows: Vec<Row>,
}

/// Which direction is better for a figure.
#[derive(Clone, Copy)]
enum Goal {
    Lower,
    Higher,
}

fn row(label: impl Into<String>, unit: &str, a: f64, b: f64, goal: Goal) -> Row {
    let tolerance = 1e-9 + 1e-6 * a.abs().max(b.abs());
    let better = if (a - b).abs() <= tolerance {
        Better::Same
    } else {
        match (goal, a < b) {
            (Goal::Lower, true) | (Goal::Higher, false) => Better::A,
            _ => Better::B,
        }
    };
    Row { label: label.into(), unit: unit.to_owned(), a: Some(a), b: Some(b), better }
}

/// A row of a load or obligation that only one of the files has: shown, not compared.
fn one_sided(label: impl Into<String>, unit: &str, a: Option<f64>, b: Option<f64>) -> Row {
    Row { label: label.into(), unit: unit.to_owned(), a, b, better: Better::Same }
}

/// Compares two reports of runs on the same plant, weather and seed.
pub fn compare(a_name: &str, a: &Report, b_name: &str, b: &Report) -> Comparison {
    use Goal::{Higher, Lower};
    let mut rows = vec![
        row("import", "kWh", a.energy.import_kwh, b.energy.import_kwh, Lower),
        row("export", "kWh", a.energy.export_kwh, b.energy.export_kwh, Lower),
        row("diverted into loads", "kWh", a.energy.diverted_kwh, b.energy.diverted_kwh, Higher),
        row("self-consumption", "%", a.self_consumption_pct, b.self_consumption_pct, Higher),
        row("PV curtailed", "kWh", a.energy.curtailed_kwh, b.energy.curtailed_kwh, Lower),
        row("export peak", "W", a.export.peak_w, b.export.peak_w, Lower),
    ];
    // The guard's rows only where there is a limit to hold (A's plant and site; B's on it).
    if a.export.limit_w.is_some() || b.export.limit_w.is_some() {
        rows.push(row(
            "time over the export limit",
            "s",
            a.export.seconds_over_limit,
            b.export.seconds_over_limit,
            Lower,
        ));
        rows.push(row("guard response p95", "ms", a.guard.response_ms.p95, b.guard.response_ms.p95, Lower));
    }
    // Off-grid, in an outage: diversion must not cost the house its supply.
    if a.show_unserved || b.show_unserved {
        rows.insert(5, row("unserved demand", "kWh", a.energy.unserved_kwh, b.energy.unserved_kwh, Lower));
    }
    // Savings bought by sending the car away emptier are no savings.
    if let (Some(ea), Some(eb)) = (&a.ev, &b.ev) {
        rows.push(row("EV short of its target when it left", "kWh", ea.short_kwh, eb.short_kwh, Lower));
    }
    if let (Some(ha), Some(hb)) = (&a.hot_water, &b.hot_water) {
        rows.push(row("hot water colder than asked for", "L", ha.lukewarm_l, hb.lukewarm_l, Lower));
    }
    if let (Some(ca), Some(cb)) = (&a.cost, &b.cost) {
        rows.push(row("cost", &ca.currency, ca.total, cb.total, Lower));
        rows.push(row("savings against no diversion", &ca.currency, ca.savings, cb.savings, Higher));
    }
    // Loads and obligations by name: those of A in its order, then those only B has. One
    // that only one file has keeps its rows, with nothing on the other side, so a rule set
    // that adds or drops a duty shows it rather than losing it.
    let names = |ours: Vec<&String>, theirs: Vec<&String>| -> Vec<String> {
        let mut all: Vec<String> = ours.iter().map(|n| (*n).clone()).collect();
        all.extend(theirs.iter().filter(|n| !ours.contains(n)).map(|n| (*n).clone()));
        all
    };
    type LoadFigure = fn(&super::report::LoadReport) -> f64;
    let load_figures: [(&str, &str, LoadFigure, Goal); 3] = [
        ("energy", "kWh", |l| l.energy_kwh, Higher),
        ("from the grid", "kWh", |l| l.grid_topup_kwh, Lower),
        ("switchings", "", |l| f64::from(l.switchings), Lower),
    ];
    for name in names(a.loads.iter().map(|l| &l.name).collect(), b.loads.iter().map(|l| &l.name).collect()) {
        let (la, lb) = (a.loads.iter().find(|l| l.name == name), b.loads.iter().find(|l| l.name == name));
        for (what, unit, get, goal) in load_figures {
            let label = format!("{name}: {what}");
            rows.push(match (la, lb) {
                (Some(la), Some(lb)) => row(label, unit, get(la), get(lb), goal),
                _ => one_sided(label, unit, la.map(get), lb.map(get)),
            });
        }
    }
    let obligation_names =
        names(a.obligations.iter().map(|o| &o.name).collect(), b.obligations.iter().map(|o| &o.name).collect());
    for name in obligation_names {
        let missed = |r: &Report| r.obligations.iter().find(|o| o.name == name).map(|o| f64::from(o.days_missed));
        let label = format!("{name}: days missed");
        rows.push(match (missed(a), missed(b)) {
            (Some(ma), Some(mb)) => row(label, "", ma, mb, Lower),
            (ma, mb) => one_sided(label, "", ma, mb),
        });
    }
    Comparison { a: a_name.to_owned(), b: b_name.to_owned(), rows }
}

impl Comparison {
    /// As JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_default()
    }

    /// As a table; `◀` marks the better value.
    pub fn to_text(&self) -> String {
        let mut o = String::new();
        let width = self.rows.iter().map(|r| r.label.chars().count()).max().unwrap_or(10).max(10);
        let _ = writeln!(o, "A = {}\nB = {}\n", self.a, self.b);
        let _ = writeln!(o, "{:<width$}  {:>14}  {:>14}", "", "A", "B");
        let (mut wins_a, mut wins_b) = (0, 0);
        for r in &self.rows {
            // One number of decimals and one unit per row, so the two sides line up and
            // read alike: watts and times whole (a tenth of a watt is noise), a response
            // time of minutes in seconds rather than six-digit milliseconds (JSON keeps
            // the row's own unit).
            let whole = [r.a, r.b].iter().flatten().all(|v| v.fract() == 0.0);
            let largest = [r.a, r.b].iter().flatten().fold(0.0_f64, |m, v| m.max(v.abs()));
            let (scale, unit, decimals) = match r.unit.as_str() {
                "ms" if largest >= 10_000.0 => (0.001, "s", 1),
                "W" | "ms" | "s" => (1.0, r.unit.as_str(), 0),
                u => (1.0, u, if whole { 0 } else { 2 }),
            };
            let fmt = |v: Option<f64>| {
                let Some(v) = v else { return "—".to_owned() };
                let text = format!("{:.decimals$}", v * scale);
                if unit.is_empty() { text } else { format!("{text} {unit}") }
            };
            // Two values that print alike are not told apart here (2.797 and 2.799 kWh
            // both read 2.80): a mark between them would point at nothing a reader can
            // see. The JSON keeps the comparison of the values themselves.
            let better = if fmt(r.a) == fmt(r.b) { Better::Same } else { r.better };
            let (ma, mb) = match better {
                Better::A => ("◀", " "),
                Better::B => (" ", "◀"),
                Better::Same => (" ", " "),
            };
            wins_a += usize::from(better == Better::A);
            wins_b += usize::from(better == Better::B);
            let _ = writeln!(o, "{:<width$}  {:>14}{ma} {:>14}{mb}", r.label, fmt(r.a), fmt(r.b));
        }
        let _ = writeln!(o, "\nbetter in {wins_a} row(s) for A, {wins_b} for B (◀ marks the better value)");
        o
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_better_value_is_marked_by_the_figures_direction() {
        assert_eq!(row("import", "kWh", 1.0, 2.0, Goal::Lower).better, Better::A);
        assert_eq!(row("diverted", "kWh", 1.0, 2.0, Goal::Higher).better, Better::B);
        assert_eq!(row("x", "", 3.0, 3.0, Goal::Lower).better, Better::Same);
    }

    #[test]
    fn both_sides_of_a_row_have_the_same_decimals() {
        let c = Comparison {
            a: "a.yaml".into(),
            b: "b.yaml".into(),
            rows: vec![
                row("import", "kWh", 28.4, 31.0, Goal::Lower),
                row("export peak", "W", 2893.6, 1723.0, Goal::Lower),
                row("guard response p95", "ms", 1_654_000.0, 543_000.0, Goal::Lower),
                row("switchings", "", 4.0, 6.0, Goal::Lower),
            ],
        };
        let text = c.to_text();
        assert!(text.contains("28.40 kWh") && text.contains("31.00 kWh"), "{text}");
        assert!(text.contains("2894 W") && text.contains("1723 W"), "watts whole: {text}");
        assert!(text.contains("1654.0 s") && text.contains("543.0 s"), "minutes of response in seconds: {text}");
        assert!(text.contains(" 4◀") && text.contains(" 6 "), "{text}");
    }

    #[test]
    fn values_that_print_alike_get_no_mark_in_the_text() {
        let c = Comparison {
            a: "a.yaml".into(),
            b: "b.yaml".into(),
            rows: vec![
                row("import", "kWh", 2.797, 2.799, Goal::Lower),
                row("export peak", "W", 1200.2, 1199.9, Goal::Lower),
                row("cost", "€", 1.21, 1.20, Goal::Lower),
            ],
        };
        let text = c.to_text();
        let line = |label: &str| text.lines().find(|l| l.starts_with(label)).unwrap().to_owned();
        assert!(line("import").contains("2.80 kWh") && !line("import").contains('◀'), "{text}");
        assert!(!line("export peak").contains('◀'), "{text}");
        assert!(line("cost").ends_with("1.20 €◀"), "{text}");
        assert!(text.contains("better in 0 row(s) for A, 1 for B"), "{text}");
        // The JSON compares the values themselves.
        let json: serde_json::Value = serde_json::from_str(&c.to_json()).unwrap();
        assert_eq!(json["rows"][0]["better"], "a", "{json}");
    }

    #[test]
    fn a_row_only_one_side_has_is_shown_without_a_mark() {
        let c = Comparison {
            a: "a.yaml".into(),
            b: "b.yaml".into(),
            rows: vec![one_sided("tank: reach 55 °C by 16:00: days missed", "", None, Some(2.0))],
        };
        let text = c.to_text();
        let line = text.lines().find(|l| l.starts_with("tank:")).unwrap();
        assert!(line.contains("—") && line.trim_end().ends_with('2') && !line.contains('◀'), "{text}");
        assert!(text.contains("better in 0 row(s) for A, 0 for B"), "{text}");
        let json: serde_json::Value = serde_json::from_str(&c.to_json()).unwrap();
        assert!(json["rows"][0]["a"].is_null() && json["rows"][0]["better"] == "same", "{json}");
    }
}
