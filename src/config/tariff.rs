//! The site's electricity tariff: what imported energy costs and exported energy earns,
//! read from the `tariff:` section. Used by offline runs to price a run and its
//! no-diversion baseline; the engine never looks at money.
//!
//! ```yaml
//! tariff:
//!   currency: "€"
//!   import: 0.24/kWh            # flat price (also the price outside time-of-use windows)
//!   export: 0.00/kWh            # credit for exported energy
//!   standing: 0.40/day          # fixed charge
//!   time_of_use:                # optional: prices by time of day
//!     - { window: "17:00..21:00", price: 0.39/kWh, days: weekdays }
//!   blocks:                     # optional, instead of `import`: monthly block tariff
//!     - { up_to: 350kWh, price: 0.18/kWh }
//!     - { price: 0.31/kWh }
//!   array_cost: 900/kWp         # installed cost of PV, for `sweep` payback
//! ```

use super::model::Window;
use super::values;
use super::yaml::{Diagnostics, MapReader, Node, Value};
use crate::diag::Diagnostic;
use crate::units::Dimension;

/// Which days a time-of-use window applies on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DaySet {
    /// Every day.
    All,
    /// Monday to Friday.
    Weekdays,
    /// Saturday and Sunday.
    Weekends,
}

impl DaySet {
    /// Whether the set contains a weekday.
    pub fn contains(self, day: chrono::Weekday) -> bool {
        let weekend = matches!(day, chrono::Weekday::Sat | chrono::Weekday::Sun);
        match self {
            DaySet::All => true,
            DaySet::Weekdays => !weekend,
            DaySet::Weekends => weekend,
        }
    }
}

/// A time-of-use price.
#[derive(Debug, Clone, PartialEq)]
pub struct TouPeriod {
    /// When it applies.
    pub window: Window,
    /// On which days.
    pub days: DaySet,
    /// Price per kWh imported.
    pub price: f64,
}

/// One block of a monthly block tariff.
#[derive(Debug, Clone, PartialEq)]
pub struct Block {
    /// Upper bound of monthly import for this block, kWh (`None`: the last block).
    pub up_to_kwh: Option<f64>,
    /// Price per kWh inside the block.
    pub price: f64,
}

/// How import is priced.
#[derive(Debug, Clone, PartialEq)]
pub enum ImportPrice {
    /// One price, with optional time-of-use windows overriding it.
    Flat {
        /// Price per kWh.
        price: f64,
        /// Windows with their own price.
        time_of_use: Vec<TouPeriod>,
    },
    /// Monthly blocks: each kWh is priced by the block the month's import has reached.
    Blocks(Vec<Block>),
}

/// A tariff.
#[derive(Debug, Clone, PartialEq)]
pub struct Tariff {
    /// Symbol or code printed with amounts.
    pub currency: String,
    /// Import pricing.
    pub import: ImportPrice,
    /// Credit per kWh exported.
    pub export_credit: f64,
    /// Fixed charge per day.
    pub standing_per_day: f64,
    /// Installed cost of PV per kWp, for payback estimates.
    pub array_cost_per_kwp: Option<f64>,
}

impl Tariff {
    /// Price per kWh of import at a local time, given the month's import so far.
    pub fn import_price(&self, seconds_of_day: u32, weekday: chrono::Weekday, month_import_kwh: f64) -> f64 {
        match &self.import {
            ImportPrice::Flat { price, time_of_use } => time_of_use
                .iter()
                .find(|p| p.days.contains(weekday) && p.window.contains(seconds_of_day))
                .map_or(*price, |p| p.price),
            ImportPrice::Blocks(blocks) => blocks[self.block_index(month_import_kwh)].price,
        }
    }

    /// Cost of `kwh` imported at once, the month's import before it being
    /// `month_import_kwh` and the flat (or time-of-use) price then `price`. Under blocks
    /// each part is priced by the block it falls in, so an import that crosses a bound
    /// pays the lower block's price up to the bound and the next block's beyond it, as
    /// the month's import read off the meter would be billed.
    pub fn import_cost(&self, price: f64, month_import_kwh: f64, kwh: f64) -> f64 {
        let ImportPrice::Blocks(blocks) = &self.import else { return price * kwh };
        let end = month_import_kwh + kwh;
        let (mut at, mut cost) = (month_import_kwh, 0.0);
        for b in blocks {
            let top = b.up_to_kwh.unwrap_or(f64::INFINITY).min(end);
            if top > at {
                cost += (top - at) * b.price;
                at = top;
            }
        }
        cost
    }

    /// Index of the block a month's import lands in (0 for non-block tariffs).
    pub fn block_index(&self, month_import_kwh: f64) -> usize {
        match &self.import {
            ImportPrice::Blocks(blocks) => blocks
                .iter()
                .position(|b| b.up_to_kwh.is_none_or(|u| month_import_kwh < u))
                .unwrap_or(blocks.len().saturating_sub(1)),
            ImportPrice::Flat { .. } => 0,
        }
    }

    /// A label for a block ("block 2: 350–600 kWh").
    pub fn block_label(&self, index: usize) -> String {
        match &self.import {
            ImportPrice::Blocks(blocks) => {
                let lower = if index == 0 { 0.0 } else { blocks[index - 1].up_to_kwh.unwrap_or(0.0) };
                match blocks.get(index).and_then(|b| b.up_to_kwh) {
                    Some(u) => format!("block {}: {lower:.0}–{u:.0} kWh", index + 1),
                    None => format!("block {}: above {lower:.0} kWh", index + 1),
                }
            }
            ImportPrice::Flat { .. } => "flat".to_owned(),
        }
    }

    /// The block thresholds in kWh (empty for flat tariffs), for charts.
    pub fn block_thresholds(&self) -> Vec<f64> {
        match &self.import {
            ImportPrice::Blocks(blocks) => blocks.iter().filter_map(|b| b.up_to_kwh).collect(),
            ImportPrice::Flat { .. } => Vec::new(),
        }
    }
}

/// Reads a price: `0.24/kWh`, `0.24` (per kWh), `0.40/day`, `900/kWp`.
fn price(node: &Node, per: &str, what: &str, diags: &mut Diagnostics) -> Option<f64> {
    let text = match &node.value {
        Value::Int(i) => return Some(*i as f64),
        Value::Float(f) => return Some(*f),
        Value::Str(s) => s.trim().to_owned(),
        other => {
            diags.error(
                "C0401",
                format!("{what} must be a price, found {}", other.kind()),
                node.span.clone(),
                format!("expected e.g. 0.25/{per}"),
            );
            return None;
        }
    };
    let number = text.strip_suffix(&format!("/{per}")).unwrap_or(&text).trim();
    match number.parse::<f64>() {
        Ok(v) if v.is_finite() => Some(v),
        _ => {
            diags.push(
                Diagnostic::error("C0401", format!("{what} \"{text}\" is not a price per {per}"), node.span.clone())
                    .with_label(format!("expected a number, optionally followed by /{per}")),
            );
            None
        }
    }
}

/// Reads the `tariff:` section.
pub fn read(node: &Node, diags: &mut Diagnostics) -> Option<Tariff> {
    let mut m = MapReader::new(node, "the `tariff` section", diags)?;
    let currency = m.get("currency").and_then(|n| values::text(n, "the currency", diags)).unwrap_or("").to_owned();
    let import = m.get("import").map(|n| price(n, "kWh", "the import price", diags));
    let export = m.get("export").map_or(Some(0.0), |n| price(n, "kWh", "the export credit", diags));
    let standing = m.get("standing").map_or(Some(0.0), |n| price(n, "day", "the standing charge", diags));
    let cost = m.get("array_cost").map(|n| price(n, "kWp", "the array cost", diags));
    let tou_node = m.get("time_of_use");
    let blocks_node = m.get("blocks");
    let span = m.span();
    m.finish(diags);

    // Every part is read whatever is wrong with the others, so that one run reports all
    // of the section's mistakes (the loader puts them in file order).
    let blocks = blocks_node.map(|b| read_blocks(b, diags));
    let tou = tou_node.map(|n| read_tou(n, diags));
    if let (Some(_), Some(b)) = (&import, blocks_node) {
        diags.error(
            "C0402",
            "give either a flat `import` price or `blocks`, not both",
            b.span.clone(),
            "blocks replace the flat price",
        );
    }
    // With a flat price as well, the windows are not the mistake: the blocks are.
    if let (None, Some(_), Some(n)) = (&import, blocks_node, tou_node) {
        diags.error(
            "C0402",
            "time-of-use windows need a flat `import` price",
            n.span.clone(),
            "not combined with blocks",
        );
    }
    let import_price = match (import, blocks) {
        (Some(p), None) => ImportPrice::Flat { price: p?, time_of_use: tou.unwrap_or(Some(Vec::new()))? },
        (None, Some(b)) if tou_node.is_none() => ImportPrice::Blocks(b?),
        (None, None) => {
            diags.error("C0403", "the tariff needs an `import` price or `blocks`", span, "how is import priced?");
            return None;
        }
        // Both, or blocks with time-of-use windows: reported above.
        _ => return None,
    };
    Some(Tariff {
        currency,
        import: import_price,
        export_credit: export?,
        standing_per_day: standing?,
        array_cost_per_kwp: match cost {
            Some(c) => Some(c?),
            None => None,
        },
    })
}

fn read_tou(node: &Node, diags: &mut Diagnostics) -> Option<Vec<TouPeriod>> {
    let Value::Seq(items) = &node.value else {
        diags.error(
            "C0404",
            "`time_of_use` is a list of windows",
            node.span.clone(),
            "expected `- { window: …, price: … }`",
        );
        return None;
    };
    // Every window is read, a bad one included, so each reports its own mistakes.
    let mut out = Vec::new();
    let mut all_good = true;
    for item in items {
        let Some(mut m) = MapReader::new(item, "a time-of-use window", diags) else {
            all_good = false;
            continue;
        };
        let window = m.require("window", diags).and_then(|n| values::window(n, "the window", diags));
        let p = m.require("price", diags).and_then(|n| price(n, "kWh", "the price", diags));
        let days =
            m.get("days").map_or(Some("all"), |n| values::choice(n, &["all", "weekdays", "weekends"], "`days`", diags));
        m.finish(diags);
        let (Some(window), Some(price), Some(days)) = (window, p, days) else {
            all_good = false;
            continue;
        };
        let days = match days {
            "weekdays" => DaySet::Weekdays,
            "weekends" => DaySet::Weekends,
            _ => DaySet::All,
        };
        out.push(TouPeriod { window, price, days });
    }
    all_good.then_some(out)
}

fn read_blocks(node: &Node, diags: &mut Diagnostics) -> Option<Vec<Block>> {
    let Value::Seq(items) = &node.value else {
        diags.error(
            "C0405",
            "`blocks` is a list",
            node.span.clone(),
            "expected `- { up_to: 350kWh, price: 0.18/kWh }`",
        );
        return None;
    };
    // Every block is read, a bad one included, so each reports its own mistakes; a bound
    // is compared with the highest good bound before it.
    let mut out: Vec<Block> = Vec::new();
    let mut all_good = true;
    let mut highest: Option<f64> = None;
    for (i, item) in items.iter().enumerate() {
        let Some(mut m) = MapReader::new(item, "a tariff block", diags) else {
            all_good = false;
            continue;
        };
        let up_to_node = m.get("up_to");
        let up_to = up_to_node.map(|n| values::positive(n, Dimension::Energy, "the block's upper bound", diags));
        let p = m.require("price", diags).and_then(|n| price(n, "kWh", "the price", diags));
        m.finish(diags);
        let up_to_kwh = match up_to {
            Some(Some(v)) => Some(v / 1000.0),
            Some(None) => {
                all_good = false;
                continue;
            }
            None => None,
        };
        let last = i + 1 == items.len();
        match (up_to_kwh, last) {
            (None, false) => {
                diags.error("C0405", "only the last block may be open-ended", item.span.clone(), "add `up_to:`");
                all_good = false;
            }
            (Some(_), true) => {
                diags.error(
                    "C0405",
                    "the last block must be open-ended",
                    up_to_node.map_or(item.span.clone(), |n| n.span.clone()),
                    "remove `up_to` from the last block",
                );
                all_good = false;
            }
            _ => {}
        }
        if let Some(u) = up_to_kwh {
            if let Some(prev) = highest
                && u <= prev
            {
                diags.error(
                    "C0405",
                    "block bounds must increase",
                    up_to_node.map_or(item.span.clone(), |n| n.span.clone()),
                    format!("not above the previous block's {}kWh", crate::units::trim_number(prev)),
                );
                all_good = false;
            }
            highest = Some(highest.map_or(u, |h: f64| h.max(u)));
        }
        match p {
            Some(price) => out.push(Block { up_to_kwh, price }),
            None => all_good = false,
        }
    }
    if items.is_empty() {
        diags.error("C0405", "`blocks` is empty", node.span.clone(), "list at least one block");
        return None;
    }
    all_good.then_some(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::config::yaml;

    fn tariff(text: &str) -> Tariff {
        let node = yaml::parse(text).unwrap();
        let mut d = Diagnostics::default();
        let t = read(&node, &mut d);
        assert!(!d.has_errors(), "{:?}", d.list);
        t.unwrap()
    }

    #[test]
    fn block_prices_follow_the_months_import() {
        let t = tariff(
            "currency: R\nblocks:\n  - { up_to: 350kWh, price: 0.18/kWh }\n  - { up_to: 600kWh, price: 0.26 }\n  - { price: 0.34/kWh }\n",
        );
        assert_eq!(t.import_price(0, chrono::Weekday::Mon, 100.0), 0.18);
        assert_eq!(t.import_price(0, chrono::Weekday::Mon, 350.0), 0.26);
        assert_eq!(t.import_price(0, chrono::Weekday::Mon, 900.0), 0.34);
        assert_eq!(t.block_label(1), "block 2: 350–600 kWh");
    }

    /// Constructed: 30 kWh at once from 340 kWh into the month crosses the 350 kWh bound:
    /// 10 × 0.18 + 20 × 0.26 = 1.80 + 5.20 = 7.00; from 590 kWh, 20 kWh crosses 600:
    /// 10 × 0.26 + 10 × 0.34 = 6.00.
    #[test]
    fn an_import_across_a_block_bound_pays_each_block_its_share() {
        let t = tariff(
            "blocks:\n  - { up_to: 350kWh, price: 0.18/kWh }\n  - { up_to: 600kWh, price: 0.26 }\n  - { price: 0.34/kWh }\n",
        );
        assert!((t.import_cost(0.0, 340.0, 30.0) - 7.00).abs() < 1e-9);
        assert!((t.import_cost(0.0, 590.0, 20.0) - 6.00).abs() < 1e-9);
        assert!((t.import_cost(0.0, 100.0, 300.0) - (250.0 * 0.18 + 50.0 * 0.26)).abs() < 1e-9);
        assert_eq!(t.import_cost(0.0, 100.0, 0.0), 0.0);
        let flat = tariff("import: 0.24/kWh\n");
        assert!((flat.import_cost(0.24, 1000.0, 2.0) - 0.48).abs() < 1e-12);
    }

    #[test]
    fn time_of_use_windows_override_the_flat_price_on_their_days() {
        let t = tariff(
            "import: 0.24/kWh\ntime_of_use:\n  - { window: \"17:00..21:00\", price: 0.39/kWh, days: weekdays }\n",
        );
        assert_eq!(t.import_price(18 * 3600, chrono::Weekday::Tue, 0.0), 0.39);
        assert_eq!(t.import_price(18 * 3600, chrono::Weekday::Sat, 0.0), 0.24);
        assert_eq!(t.import_price(12 * 3600, chrono::Weekday::Tue, 0.0), 0.24);
    }
}
