//! The start-up banner: the safety notice every run begins with, the site and its
//! export policy. The README carries the same notice.

use crate::config::model::{Connection, Site};
use crate::status::export_policy;

/// The safety notice, one sentence per line.
pub const SAFETY_NOTICE: &[&str] = &[
    "Switching mains loads, water heaters and pumps, and changing an inverter's settings, can injure people and damage equipment.",
    "Relays and contactors on mains circuits must be installed by a qualified, licensed electrician.",
    "An export-limitation scheme must meet the local grid code and may need the network operator's approval.",
    "This software is no substitute for thermostats, thermal cut-outs, RCDs and other protective devices: they must stay in place.",
    "The hardware must fail safe when the controller stops: relays open or in their safe state, the inverter at a safe limit.",
];

/// The safety notice as it applies to `site`: off-grid there is no export to limit,
/// and without an `inverter:` section Spillway sets no inverter limit to fall back from.
pub fn notice(site: &Site) -> Vec<&'static str> {
    let off_grid = matches!(site.connection, Connection::OffGrid(_));
    SAFETY_NOTICE
        .iter()
        .enumerate()
        .filter(|&(i, _)| !(off_grid && i == EXPORT_SENTENCE))
        .map(|(i, s)| if i == FAIL_SAFE_SENTENCE && site.inverter.is_none() { FAIL_SAFE_WITHOUT_INVERTER } else { s })
        .collect()
}

const EXPORT_SENTENCE: usize = 2;
const FAIL_SAFE_SENTENCE: usize = 4;
const FAIL_SAFE_WITHOUT_INVERTER: &str =
    "The hardware must fail safe when the controller stops: relays open or in their safe state.";

/// The banner as text lines for a terminal.
pub fn lines(site: &Site, version: &str) -> Vec<String> {
    let mut v = vec![format!("spillway {version}: surplus diversion controller"), String::new(), "SAFETY".to_owned()];
    v.extend(notice(site).iter().map(|s| format!("  {s}")));
    v.push(String::new());
    let connection = match site.connection {
        Connection::OffGrid(_) => "off-grid".to_owned(),
        Connection::Grid { .. } => format!("export: {}", export_policy(site)),
    };
    v.push(format!("site: {}   {connection}   loads: {}", site.name, site.loads.len()));
    v
}
