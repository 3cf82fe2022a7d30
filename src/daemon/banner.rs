//! The start-up banner: the safety notice every run begins with, the site and its
//! export policy. The README carries the same notice.

use crate::config::model::Site;
use crate::status::export_policy;

/// The safety notice, one sentence per line.
pub const SAFETY_NOTICE: &[&str] = &[
    "Switching mains loads, water heaters and pumps, and changing an inverter's settings, can injure people and damage equipment.",
    "Relays and contactors on mains circuits must be installed by a qualified, licensed electrician.",
    "An export-limitation scheme must meet the local grid code and may need the network operator's approval.",
    "This software is no substitute for thermostats, thermal cut-outs, RCDs and other protective devices: they must stay in place.",
    "The hardware must fail safe when the controller stops: relays open or in their safe state, the inverter at a safe limit.",
];

/// The banner as text lines for a terminal.
pub fn lines(site: &Site, version: &str) -> Vec<String> {
    let mut v = vec![format!("spillway {version}: surplus diversion controller"), String::new(), "SAFETY".to_owned()];
    v.extend(SAFETY_NOTICE.iter().map(|s| format!("  {s}")));
    v.push(String::new());
    v.push(format!("site: {}   export: {}   loads: {}", site.name, export_policy(site), site.loads.len()));
    v
}
