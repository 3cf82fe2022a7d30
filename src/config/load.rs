//! Builds the checked [`Site`] from the YAML tree, collecting every diagnostic.
//!
//! Order matters only where names are defined before use: devices, then points, then
//! the rule scope (points + derived signals + load state), then loads and their rules,
//! then the site-wide consistency checks.

use std::collections::HashMap;
use std::ops::Range;
use std::path::Path;
use std::str::FromStr;
use std::time::Duration;

use chrono_tz::Tz;

use super::model::*;
use super::values::{self, is_name};
use super::yaml::{self, Diagnostics, MapReader, Node, Value};
use crate::diag::{self, Diagnostic, did_you_mean};
use crate::rules::{self, Scope, Slot, Type};
use crate::units::{self, Current, Dimension, Energy, Power, Ratio, Temperature, Voltage};

/// Where a serial device's port settings and unit id are written, for C0288 and C0289.
struct SerialSpans {
    link: Range<usize>,
    unit: Range<usize>,
}

/// Specific heat of water, J/(kg·K): 4.186 kJ/(kg·K) near 15 °C (CRC Handbook of
/// Chemistry and Physics; from memory), as the simulator's tank uses.
const WATER_J_PER_KG_K: f64 = 4186.0;

/// What a load's obligations may read: its temperature, its kind (a state of charge,
/// its power), a tank's volume.
#[derive(Clone, Copy)]
struct DutyCtx<'k> {
    has_temperature: bool,
    kind: Option<&'k LoadKind>,
    volume: Option<f64>,
}

/// The text of a site file and the name it is shown under.
#[derive(Debug, Clone)]
pub struct SourceFile {
    /// Path as given by the user (used in diagnostics).
    pub path: String,
    /// The whole file.
    pub text: String,
}

/// A site that loaded, with its warnings and the tree (other layers read their own
/// sections, such as `plant:` and `expect:`, from it).
#[derive(Debug)]
pub struct Loaded {
    /// The checked model.
    pub site: Site,
    /// Warnings found while loading.
    pub warnings: Vec<Diagnostic>,
    /// The file.
    pub source: SourceFile,
    /// The parsed tree.
    pub tree: Node,
    /// The tariff, if the file has one (offline runs price with it).
    pub tariff: Option<super::tariff::Tariff>,
}

/// Why a site file could not be loaded.
#[derive(Debug, thiserror::Error)]
pub enum LoadError {
    /// The file could not be read.
    #[error("cannot read site file {path}: {source}")]
    Io {
        /// The path given.
        path: String,
        /// The operating-system error.
        #[source]
        source: std::io::Error,
    },
    /// The file has errors; every one of them is in `diagnostics`.
    #[error("{} has {} error(s)", file.path, diagnostics.iter().filter(|d| d.is_error()).count())]
    Invalid {
        /// The file.
        file: SourceFile,
        /// Errors and warnings, in the order found.
        diagnostics: Vec<Diagnostic>,
    },
}

impl LoadError {
    /// Renders every diagnostic with carets (coloured for a terminal).
    pub fn render(&self, color: bool) -> String {
        match self {
            LoadError::Io { .. } => format!("error: {self}\n"),
            LoadError::Invalid { file, diagnostics } => diag::render(&file.path, &file.text, diagnostics, color),
        }
    }
}

/// Top-level keys other layers own; the loader accepts them and leaves them alone.
pub const OTHER_SECTIONS: &[&str] = &["plant", "expect", "simulation"];

/// Reads and checks a site file.
pub fn load_file(path: &Path) -> Result<Loaded, LoadError> {
    let io = |source| LoadError::Io { path: path.display().to_string(), source };
    let bytes = std::fs::read(path).map_err(io)?;
    let text = String::from_utf8(bytes).map_err(|e| {
        // Say where, and what to do: an editor that saved Latin-1 or UTF-16 is the usual cause.
        let at = e.utf8_error().valid_up_to();
        let line = e.as_bytes()[..at].iter().filter(|&&b| b == b'\n').count() + 1;
        io(std::io::Error::new(
            std::io::ErrorKind::InvalidData,
            format!("not UTF-8 text (line {line}, byte {at}): save the file as UTF-8"),
        ))
    })?;
    load_str(&path.display().to_string(), &text)
}

/// Checks a site file's text; `path` is only used in messages.
pub fn load_str(path: &str, text: &str) -> Result<Loaded, LoadError> {
    let file = SourceFile { path: path.to_owned(), text: text.to_owned() };
    let tree = match yaml::parse(text) {
        Ok(tree) => tree,
        Err(d) => {
            return Err(LoadError::Invalid { file, diagnostics: vec![*d] });
        }
    };
    let mut diags = Diagnostics::default();
    let mut builder =
        Builder { text, diags: &mut diags, tariff: None, broken_points: Vec::new(), broken_devices: Vec::new() };
    let site = builder.site(&tree);
    let tariff = builder.tariff.take();
    // File order reads best: a user fixes top to bottom.
    diags.list.sort_by_key(|d| d.primary.span.start);
    match site {
        Some(site) if !diags.has_errors() => Ok(Loaded { site, warnings: diags.list, source: file, tree, tariff }),
        _ => {
            if !diags.has_errors() {
                diags.error("C0000", "the site could not be built", 0..0, "");
            }
            Err(LoadError::Invalid { file, diagnostics: diags.list })
        }
    }
}

struct Builder<'t, 'd> {
    text: &'t str,
    diags: &'d mut Diagnostics,
    tariff: Option<super::tariff::Tariff>,
    /// Points whose definition has an error already reported, a refused name included:
    /// what refers to them (rules, loads, site roles) says nothing more, so one typo
    /// gives one error.
    broken_points: Vec<String>,
    /// Devices whose definition has an error already reported, for the same reason: a
    /// device with a mistyped key is still defined, and "no device called" would mislead.
    broken_devices: Vec<String>,
}

/// Raw facts about a point gathered before the model is assembled.
struct PointInfo {
    name_span: Range<usize>,
}

/// The names a rule may use, with their slot and type.
pub struct SiteScope {
    names: HashMap<String, (Slot, Type)>,
}

impl Scope for SiteScope {
    fn lookup(&self, name: &str) -> Option<(Slot, Type)> {
        self.names.get(name).copied()
    }
    fn names(&self) -> Vec<String> {
        let mut v: Vec<String> = self.names.keys().cloned().collect();
        v.sort();
        v
    }
}

const DEFAULT_POLL: Duration = Duration::from_secs(1);
/// The shortest poll: a device asked without pause answers nothing else (and a poll of
/// 0 s would spin a core).
const MIN_POLL: Duration = Duration::from_millis(50);
const POLL_WHY: &str = "a device polled without pause has no time for anything else; 100 ms is already fast";
const DEFAULT_TIMEOUT: Duration = Duration::from_millis(500);
/// Default age at which a point is stale. With the guard deadline below it keeps a
/// failed scheme inside the 5 s of ENA EREC G100 Issue 1 (see `engine` tests).
pub const DEFAULT_STALE_AFTER: Duration = Duration::from_millis(2500);
/// Default time the export guard allows itself before escalating to the safe limit.
pub const DEFAULT_GUARD_DEADLINE: Duration = Duration::from_secs(2);
/// How far under a non-zero export limit the guard holds export, by default: a few times
/// the noise of a household meter's power reading (common practice, no published source),
/// so noise alone does not carry a reading past the limit plus the tolerance.
pub const DEFAULT_GUARD_MARGIN: Power = Power(50.0);
/// The least charge power a battery load starts at by default: below it the setpoint only
/// follows meter noise around zero surplus (common practice: battery inverters do not
/// regulate usefully at a few watts).
pub const DEFAULT_MIN_CHARGE: Power = Power(50.0);

impl Builder<'_, '_> {
    fn site(&mut self, tree: &Node) -> Option<Site> {
        let mut top = MapReader::new(tree, "the site file", self.diags)?;
        top.allow(OTHER_SECTIONS);
        let site_node = top.require("site", self.diags);
        let devices_node = top.get("devices");
        let points_node = top.get("points");
        let inverter_node = top.get("inverter");
        let loads_node = top.get("loads");
        let mqtt_node = top.get("mqtt");
        let tariff_node = top.get("tariff");
        top.finish(self.diags);
        self.tariff = tariff_node.and_then(|n| super::tariff::read(n, self.diags));

        let header = site_node.and_then(|n| self.site_header(n));
        let mqtt = mqtt_node.and_then(|n| self.mqtt(n, header.as_ref().map_or("site", |h| h.name.as_str())));
        let devices = devices_node.map(|n| self.devices(n, mqtt.is_some())).unwrap_or_default();
        let stale_default = header.as_ref().map_or(DEFAULT_STALE_AFTER, |h| h.failsafe.stale_after);
        let (points, point_info) = points_node.map(|n| self.points(n, &devices, stale_default)).unwrap_or_default();
        let roles = self.roles(&points, &point_info);

        // Load names first, so rules may refer to any load's state.
        let load_nodes: Vec<&Node> = match loads_node.map(|n| &n.value) {
            Some(Value::Seq(items)) => items.iter().collect(),
            Some(Value::Null) | None => Vec::new(),
            Some(other) => {
                let span = loads_node.map(|n| n.span.clone()).unwrap_or_default();
                self.diags.error(
                    "C0002",
                    format!("loads must be a list, found {}", other.kind()),
                    span,
                    "expected `- name: …` items",
                );
                Vec::new()
            }
        };
        let mut load_names: Vec<(String, Range<usize>, u32, usize)> = Vec::new();
        for (i, node) in load_nodes.iter().enumerate() {
            let (name, span, priority) = self.load_header(node, i);
            if let Some((_, first, _, _)) = load_names.iter().find(|(n, _, _, _)| *n == name && !name.is_empty()) {
                self.diags.push(
                    Diagnostic::error("C0201", format!("two loads are called \"{name}\""), span.clone())
                        .with_label("second load with this name")
                        .with_secondary(first.clone(), "first one here")
                        .with_note("load names must be unique: rules refer to loads by name"),
                );
            }
            if points.iter().any(|p| p.name == name) {
                self.diags.error(
                    "C0202",
                    format!("load \"{name}\" has the same name as a point"),
                    span.clone(),
                    "rename the load or the point",
                );
            }
            load_names.push((name, span, priority, i));
        }
        // Priority order; equal priorities keep file order.
        let mut order: Vec<usize> = (0..load_nodes.len()).collect();
        order.sort_by_key(|&i| (load_names[i].2, i));
        for w in order.windows(2) {
            let (a, b) = (&load_names[w[0]], &load_names[w[1]]);
            if a.2 == b.2 && !a.0.is_empty() && !b.0.is_empty() {
                self.diags.push(
                    Diagnostic::warning("C0203", format!("loads \"{}\" and \"{}\" share priority {}", a.0, b.0, a.2), b.1.clone())
                        .with_label("same priority")
                        .with_secondary(a.1.clone(), "as this one")
                        .with_note("the one written first in the file goes first; give each load its own priority to make the order explicit"),
                );
            }
        }
        let sorted_names: Vec<String> = order.iter().map(|&i| load_names[i].0.clone()).collect();
        let slots = layout(points.len(), sorted_names.len());
        let scope = scope(&points, &sorted_names, &slots);

        let ctx = LoadCtx { devices: &devices, points: &points, roles: &roles, scope: &scope };
        let mut loads = Vec::new();
        for &i in &order {
            if let Some(load) = self.load(load_nodes[i], &load_names[i], &ctx) {
                loads.push(load);
            }
        }
        let inverter = inverter_node.and_then(|n| self.inverter(n, &devices));
        let header = header?;
        let site = Site {
            name: header.name,
            timezone: header.timezone,
            connection: header.connection,
            import_target: header.import_target,
            guard: header.guard,
            failsafe: header.failsafe,
            tick: header.tick,
            devices,
            points,
            roles,
            loads,
            inverter,
            slots,
            mqtt,
        };
        self.site_checks(&site, &header.spans, inverter_node);
        self.check_loop_gains(&site, &header.spans);
        self.import_rules_beside_a_self_run_battery(&site, &load_nodes, &load_names);
        Some(site)
    }

    fn site_header(&mut self, node: &Node) -> Option<Header> {
        let mut m = MapReader::new(node, "the `site` section", self.diags)?;
        let name =
            m.require("name", self.diags).and_then(|n| values::text(n, "the site name", self.diags)).map(str::to_owned);
        let timezone = m.require("timezone", self.diags).and_then(|n| self.timezone(n));
        let grid_kind = m
            .get("grid")
            .map(|n| values::choice(n, &["tied", "backup", "off"], "`grid`", self.diags))
            .unwrap_or(Some("tied"));
        let export_node = m.get("export");
        let export = export_node.map(|n| self.export_policy(n)).unwrap_or(Some(ExportPolicy::Allowed));
        let import_target_node = m.get("import_target");
        let import_target =
            import_target_node.map(|n| values::quantity(n, Dimension::Power, "the import target", self.diags));
        let tick = m
            .get("tick")
            .map(|n| values::duration(n, "the engine tick", self.diags))
            .unwrap_or(Some(Duration::from_secs(1)));
        let guard_node = m.get("guard");
        let guard = self.guard(guard_node);
        // Where the loop's gains are written, for C0287.
        let gains_span = guard_node.and_then(|n| match &n.value {
            Value::Map(entries) => {
                entries.iter().find(|(k, _)| k.name == "kp" || k.name == "ki").map(|(k, _)| k.span.clone())
            }
            _ => None,
        });
        let failsafe = self.failsafe(m.get("failsafe"));
        let off_grid_node = m.get("off_grid");
        let backup_node = m.get("backup");
        let site_span = m.span();
        m.finish(self.diags);

        let export = export?;
        let connection = match grid_kind? {
            "off" => {
                if let Some(n) = export_node {
                    self.diags.error(
                        "C0204",
                        "an off-grid site has no export policy",
                        n.span.clone(),
                        "remove `export` or set `grid: tied`",
                    );
                }
                // An island has no grid to lose: backup settings would be ignored.
                if let Some(n) = backup_node {
                    self.diags.error(
                        "C0204",
                        "`backup` settings need `grid: backup`",
                        n.span.clone(),
                        "this site is off-grid",
                    );
                }
                Connection::OffGrid(self.off_grid(off_grid_node)?)
            }
            kind => {
                if let Some(n) = off_grid_node {
                    self.diags.error(
                        "C0204",
                        "`off_grid` settings need `grid: off`",
                        n.span.clone(),
                        "this site is grid-connected",
                    );
                }
                let backup = if kind == "backup" { Some(self.backup(backup_node)?) } else { None };
                if kind != "backup"
                    && let Some(n) = backup_node
                {
                    self.diags.error(
                        "C0204",
                        "`backup` settings need `grid: backup`",
                        n.span.clone(),
                        "this site has no backup",
                    );
                }
                Connection::Grid { export, backup }
            }
        };
        let default_target = match export.limit() {
            Some(_) => Power(50.0),
            None => Power::ZERO,
        };
        let import_target = match import_target {
            Some(v) => Power(v?),
            None => default_target,
        };
        let (guard, margin_span) = guard?;
        if let Some(span) = margin_span {
            self.check_guard_margin(&guard, export, span);
        }
        let tick = tick?;
        if tick < Duration::from_millis(100) || tick > Duration::from_secs(60) {
            self.diags.error(
                "C0205",
                "the engine tick must be between 100ms and 60s",
                site_span.clone(),
                "set `tick` in range",
            );
        }
        Some(Header {
            name: name?,
            timezone: timezone?,
            connection,
            import_target,
            guard,
            failsafe: failsafe?,
            tick,
            spans: HeaderSpans {
                site: site_span,
                export: export_node.map(|n| n.span.clone()),
                import_target: import_target_node.map(|n| n.span.clone()),
                gains: gains_span,
            },
        })
    }

    /// A battery that runs itself pays for a load before the meter shows import, so a rule
    /// that waits for `import` never sees a load running on the battery; `surplus` does
    /// (its discharge counts there).
    /// Gains written into `guard` that make the modulating loads ring or oscillate (C0287).
    /// The loop acts on a meter reading that describes the plant `latency` ago: a
    /// command takes effect at the next tick and is seen `floor(latency / tick) + 1`
    /// ticks after it was issued. The velocity-form PI is run on that linear loop
    /// against a step of export; gains whose error has not died down to 5 % of the step
    /// 60 ticks later are warned about, the defaults too where the meter is slow. (A pure
    /// integral loop whose reading is `n + 1` ticks behind, `z^(n+1) − z^n + K = 0`, is
    /// stable only for K < 2·sin(π / (2(2n + 1))): 2 for a reading one tick behind, 1
    /// for two, 0.62 for three — the roots of that polynomial, checked numerically.)
    fn check_loop_gains(&mut self, site: &Site, spans: &HeaderSpans) {
        let span = spans.gains.clone().unwrap_or(spans.site.clone());
        if !site.loads.iter().any(|l| l.kind.is_modulating()) {
            return;
        }
        let latency = site.roles.grid.map_or(Duration::ZERO, |g| site.points[g.0].latency);
        let tick_s = site.tick.as_secs_f64();
        let late = (latency.as_secs_f64() / tick_s).floor() as usize + 1;
        let (kp, k) = (site.guard.kp, site.guard.ki * tick_s);
        let residual = loop_residual(kp, k, late);
        if residual > 0.05 {
            let how = if residual > 1.0 { "oscillate, growing" } else { "ring for more than a minute of ticks" };
            let which = if spans.gains.is_some() { "these gains" } else { "the default gains" };
            let remedy = if spans.gains.is_some() && latency < Duration::from_secs(2) {
                "the defaults (kp 0.1, ki 0.5) settle; lower kp first, then ki"
            } else {
                "lower `guard.kp` first, then `guard.ki` (halving ki for each further tick of the meter's latency), or give the grid point a faster meter"
            };
            self.diags.push(
                Diagnostic::warning("C0287", format!("with {which} the modulating loads {how}"), span)
                    .with_label(format!("kp {kp}, ki {} per second, the meter {} ms late", site.guard.ki, latency.as_millis()))
                    .with_note(format!(
                        "the meter shows a change {late} tick(s) after it is commanded; after a step of export the loop leaves {}% of it 60 ticks later: {remedy}",
                        if residual > 9.99 { ">999 ".to_owned() } else { format!("{:.0} ", residual * 100.0) }
                    )),
            );
        }
    }

    fn import_rules_beside_a_self_run_battery(
        &mut self,
        site: &Site,
        nodes: &[&Node],
        names: &[(String, Range<usize>, u32, usize)],
    ) {
        let Some(battery) = site.self_run_battery() else { return };
        let import = site.slots.site.import;
        for load in &site.loads {
            let Some(&(_, _, _, i)) = names.iter().find(|(n, _, _, _)| *n == load.name) else { continue };
            let Value::Map(entries) = &nodes[i].value else { continue };
            for (key, rule) in [("start", &load.start), ("stop", &load.stop)] {
                let Some(rule) = rule else { continue };
                if !rule.rule.slots().contains(&import) {
                    continue;
                }
                let span =
                    entries.iter().find(|(k, _)| k.name == key).map_or(nodes[i].span.clone(), |(_, n)| n.span.clone());
                self.diags.push(
                    Diagnostic::warning(
                        "C0274",
                        format!("load \"{}\": its {key} rule reads `import`, which a battery on its own control hides", load.name),
                        span,
                    )
                    .with_label("the meter shows no import while the battery pays for this load")
                    .with_note(format!(
                        "`{}` reads a battery no load commands: it covers the load from its store before any import shows. `surplus` counts its discharge as import; write the rule in `surplus` (e.g. `surplus < 500W for 1min`)",
                        site.points[battery.0].name
                    )),
                );
            }
        }
    }

    /// A margin the user set: it must leave export above zero, and should clear the
    /// tolerance, or meter noise alone reads as export past the limit.
    fn check_guard_margin(&mut self, guard: &GuardSettings, export: ExportPolicy, span: Range<usize>) {
        match export {
            ExportPolicy::Limited(limit) if guard.margin.0 >= limit.0 => self.diags.error(
                "C0269",
                "the guard margin is not below the export limit",
                span,
                format!("export is held `margin` under the limit ({limit}); use a margin smaller than the limit"),
            ),
            ExportPolicy::Limited(_) if guard.margin.0 < guard.tolerance.0 => self.diags.push(
                Diagnostic::warning("C0270", "the guard margin is smaller than its tolerance", span)
                    .with_label("export is held closer to the limit than the meter's noise")
                    .with_note(format!(
                        "meter noise will read as export past the limit and set off the guard's escalation; a margin of at least the tolerance ({}) avoids it",
                        guard.tolerance
                    )),
            ),
            ExportPolicy::Limited(_) => {}
            ExportPolicy::Allowed | ExportPolicy::Forbidden => self.diags.push(
                Diagnostic::warning("C0270", "`guard.margin` applies only to a non-zero export limit", span)
                    .with_label("ignored here")
                    .with_note(
                        "a no-export site is held at `import_target` (at least the tolerance) instead; with export allowed there is no limit to hold under",
                    ),
            ),
        }
    }

    fn timezone(&mut self, node: &Node) -> Option<Tz> {
        let text = values::text(node, "the time zone", self.diags)?;
        match Tz::from_str(text) {
            Ok(tz) => Some(tz),
            Err(_) => {
                let mut d = Diagnostic::error("C0206", format!("unknown time zone \"{text}\""), node.span.clone())
                    .with_label("expected an IANA zone such as Europe/Lisbon");
                if let Some(s) = did_you_mean(text, chrono_tz::TZ_VARIANTS.iter().map(|t| t.name())) {
                    d = d.with_note(format!("did you mean \"{s}\"?"));
                }
                self.diags.push(d);
                None
            }
        }
    }

    fn export_policy(&mut self, node: &Node) -> Option<ExportPolicy> {
        match &node.value {
            Value::Str(s) if s == "allowed" => Some(ExportPolicy::Allowed),
            Value::Str(s) if s == "forbidden" => Some(ExportPolicy::Forbidden),
            // A bare number: 0 is "no export" as in any unit; another number needs one.
            Value::Str(s) if units::parse_quantity(s).is_ok() => self.export_limit(node),
            Value::Int(_) | Value::Float(_) => self.export_limit(node),
            _ => {
                self.diags.push(
                    Diagnostic::error(
                        "C0207",
                        "`export` must be allowed, forbidden or a power limit",
                        node.span.clone(),
                    )
                    .with_label("expected `allowed`, `forbidden` or a power such as 600W"),
                );
                None
            }
        }
    }

    /// A power limit on export; 0 (with or without a unit) is no export at all.
    fn export_limit(&mut self, node: &Node) -> Option<ExportPolicy> {
        let limit = values::quantity(node, Dimension::Power, "the export limit", self.diags)?;
        if limit < 0.0 {
            self.diags.error(
                "C0207",
                "the export limit cannot be negative",
                node.span.clone(),
                "use `forbidden` for no export at all",
            );
            return None;
        }
        Some(if limit == 0.0 { ExportPolicy::Forbidden } else { ExportPolicy::Limited(Power(limit)) })
    }

    /// The guard settings, and the span of `margin` when it was given (its checks need
    /// the export limit, which is read beside it).
    fn guard(&mut self, node: Option<&Node>) -> Option<(GuardSettings, Option<Range<usize>>)> {
        let mut g = GuardSettings {
            tolerance: Power(10.0),
            margin: DEFAULT_GUARD_MARGIN,
            deadline: DEFAULT_GUARD_DEADLINE,
            release_rate: Power(200.0),
            kp: 0.1,
            ki: 0.5,
        };
        let Some(node) = node else { return Some((g, None)) };
        let mut m = MapReader::new(node, "the `guard` section", self.diags)?;
        let mut ok = true;
        if let Some(n) = m.get("tolerance") {
            // The least import a no-export site is held at is the tolerance, and limit
            // changes under half of it are not written: a large one wastes the array.
            ok &= values::quantity_in(
                n,
                Dimension::Power,
                (0.0, 250.0),
                "the guard tolerance",
                "0 W and 250 W",
                "it is meter noise, and the least import a no-export site is held at; to allow some export, set `export:` to a power",
                self.diags,
            )
            .map(|v| g.tolerance = Power(v))
            .is_some();
        }
        let margin_node = m.get("margin");
        match margin_node {
            Some(n) => {
                ok &= values::quantity_in(
                    n,
                    Dimension::Power,
                    (0.0, 10_000.0),
                    "the guard margin",
                    "0 W and 10 kW",
                    "it is how far under a non-zero export limit export is held",
                    self.diags,
                )
                .map(|v| g.margin = Power(v))
                .is_some();
            }
            // A wide tolerance widens the default margin with it: the hold band then
            // still ends at the limit.
            None => g.margin = g.margin.max(g.tolerance),
        }
        if let Some(n) = m.get("deadline") {
            ok &= values::duration(n, "the guard deadline", self.diags).map(|v| g.deadline = v).is_some();
        }
        if let Some(n) = m.get("release_rate") {
            ok &= values::positive(n, Dimension::Power, "the release rate (per second)", self.diags)
                .map(|v| g.release_rate = Power(v))
                .is_some();
        }
        // A negative gain turns the loop's correction round: it would chase export.
        let gain_note = "a negative gain drives the loads the wrong way; 0 turns that term off";
        if let Some(n) = m.get("kp") {
            ok &= values::quantity_in(n, Dimension::Scalar, (0.0, 100.0), "kp", "0 and 100", gain_note, self.diags)
                .map(|v| g.kp = v)
                .is_some();
        }
        if let Some(n) = m.get("ki") {
            ok &= values::quantity_in(n, Dimension::Scalar, (0.0, 100.0), "ki", "0 and 100", gain_note, self.diags)
                .map(|v| g.ki = v)
                .is_some();
        }
        m.finish(self.diags);
        ok.then_some((g, margin_node.map(|n| n.span.clone())))
    }

    fn failsafe(&mut self, node: Option<&Node>) -> Option<FailsafeSettings> {
        let mut f = FailsafeSettings { stale_after: DEFAULT_STALE_AFTER, recovery_hold: Duration::from_secs(10) };
        let Some(node) = node else { return Some(f) };
        let mut m = MapReader::new(node, "the `failsafe` section", self.diags)?;
        let mut ok = true;
        if let Some(n) = m.get("stale_after") {
            ok &= values::duration(n, "the stale timeout", self.diags).map(|v| f.stale_after = v).is_some();
        }
        if let Some(n) = m.get("recovery_hold") {
            ok &= values::duration(n, "the recovery hold", self.diags).map(|v| f.recovery_hold = v).is_some();
        }
        m.finish(self.diags);
        ok.then_some(f)
    }

    fn off_grid(&mut self, node: Option<&Node>) -> Option<OffGridSettings> {
        let Some(node) = node else {
            self.diags.error(
                "C0208",
                "an off-grid site needs an `off_grid` section",
                0..0,
                "add `off_grid:` under `site:` with at least `float_voltage`",
            );
            return None;
        };
        let mut m = MapReader::new(node, "the `off_grid` section", self.diags)?;
        let float_voltage = m
            .require("float_voltage", self.diags)
            .and_then(|n| values::positive(n, Dimension::Voltage, "the float voltage", self.diags));
        let at_least_zero = |n: &Node, dimension, what: &str, diags: &mut super::yaml::Diagnostics| {
            let range = if dimension == Dimension::Voltage { "0 V and 1000 V" } else { "0 W and 1 MW" };
            let max = if dimension == Dimension::Voltage { 1000.0 } else { 1e6 };
            values::quantity_in(
                n,
                dimension,
                (0.0, max),
                what,
                range,
                "a negative value turns its meaning round",
                diags,
            )
        };
        let hysteresis = m
            .get("float_hysteresis")
            .map_or(Some(0.8), |n| at_least_zero(n, Dimension::Voltage, "the float hysteresis", self.diags));
        let full_soc = m.get("full_soc").map_or(Some(98.0), |n| {
            values::quantity_in(
                n,
                Dimension::Ratio,
                (0.0, 100.0),
                "the full state of charge",
                "0 % and 100 %",
                "a state of charge is a percentage of the capacity",
                self.diags,
            )
        });
        let acceptance = m
            .get("charge_acceptance")
            .map_or(Some(2000.0), |n| at_least_zero(n, Dimension::Power, "the charge acceptance", self.diags));
        let headroom = m
            .get("float_headroom")
            .map_or(Some(500.0), |n| at_least_zero(n, Dimension::Power, "the float headroom", self.diags));
        m.finish(self.diags);
        Some(OffGridSettings {
            float_voltage: Voltage(float_voltage?),
            float_hysteresis: Voltage(hysteresis?),
            full_soc: Ratio(full_soc?),
            charge_acceptance: Power(acceptance?),
            float_headroom: Power(headroom?),
        })
    }

    fn backup(&mut self, node: Option<&Node>) -> Option<BackupSettings> {
        let mut b = BackupSettings { shed_interval: Duration::ZERO };
        let Some(node) = node else { return Some(b) };
        let mut m = MapReader::new(node, "the `backup` section", self.diags)?;
        if let Some(n) = m.get("shed_interval") {
            b.shed_interval = values::duration(n, "the shed interval", self.diags)?;
        }
        m.finish(self.diags);
        Some(b)
    }

    fn mqtt(&mut self, node: &Node, site_name: &str) -> Option<MqttSettings> {
        let mut m = MapReader::new(node, "the `mqtt` section", self.diags)?;
        let broker = m
            .require("broker", self.diags)
            .and_then(|n| values::text(n, "the broker address", self.diags).map(|t| (t, n.span.clone())));
        let client_id =
            m.get("client_id").and_then(|n| values::text(n, "the client id", self.diags)).map(str::to_owned);
        let username = m.get("username").and_then(|n| values::text(n, "the user name", self.diags)).map(str::to_owned);
        let password_env = m
            .get("password_env")
            .and_then(|n| values::text(n, "the password variable", self.diags))
            .map(|s| Secret::Env(s.to_owned()));
        let password_file = m
            .get("password_file")
            .and_then(|n| values::text(n, "the password file", self.diags))
            .map(|s| Secret::File(s.to_owned()));
        let tls = match m.get("tls") {
            None => None,
            Some(n) => match &n.value {
                Value::Bool(true) => Some(TlsSettings { ca_file: None }),
                Value::Bool(false) => None,
                _ => {
                    let mut t = MapReader::new(n, "the `tls` section", self.diags)?;
                    let ca =
                        t.get("ca_file").and_then(|n| values::text(n, "the CA file", self.diags)).map(str::to_owned);
                    t.finish(self.diags);
                    Some(TlsSettings { ca_file: ca })
                }
            },
        };
        let slug: String =
            site_name.to_lowercase().chars().map(|c| if c.is_ascii_alphanumeric() { c } else { '-' }).collect();
        let prefix_node = m.get("topic_prefix");
        let topic_prefix = prefix_node
            .and_then(|n| values::text(n, "the topic prefix", self.diags))
            .map_or_else(|| format!("spillway/{slug}"), |s| s.trim_end_matches('/').to_owned());
        // The prefix begins topics Spillway publishes and subscribes to: a wildcard
        // in it makes the broker refuse the publishes and drop the connection, which
        // looked like a broker that cannot be reached.
        if let Some(n) = prefix_node
            && (topic_prefix.is_empty() || topic_prefix.contains(['+', '#']))
        {
            self.diags.error(
                "C0218",
                if topic_prefix.is_empty() {
                    "the topic prefix is empty".to_owned()
                } else {
                    format!("the topic prefix \"{topic_prefix}\" contains a wildcard")
                },
                n.span.clone(),
                format!("the topics Spillway publishes start with it: name one, e.g. spillway/{slug}"),
            );
        }
        let qos = m.get("qos").map_or(Some(Qos::AtLeastOnce), |n| self.qos(n));
        let keep_alive = m
            .get("keep_alive")
            .map_or(Some(Duration::from_secs(30)), |n| values::duration(n, "the keep-alive", self.diags));
        let discovery = match m.get("discovery") {
            None => Some(None),
            Some(n) => self.discovery(n),
        };
        m.finish(self.diags);
        let (broker, broker_span) = broker?;
        let (host, port) = match split_host_port(broker, 1883) {
            Some(hp) => hp,
            None => {
                self.diags.error(
                    "C0209",
                    format!("broker \"{broker}\" is not host or host:port"),
                    broker_span,
                    "expected e.g. 127.0.0.1:1883",
                );
                return None;
            }
        };
        if username.is_none() && (password_env.is_some() || password_file.is_some()) {
            self.diags.error(
                "C0209",
                "an MQTT password without a `username`",
                node.span.clone(),
                "the broker is sent a password only with a user name: add `username`, or remove the password",
            );
        }
        if password_env.is_some() && password_file.is_some() {
            self.diags.error(
                "C0209",
                "give the MQTT password by `password_env` or `password_file`, not both",
                node.span.clone(),
                "choose one",
            );
        }
        Some(MqttSettings {
            host,
            port,
            client_id: client_id.unwrap_or_else(|| format!("spillway-{slug}")),
            username,
            password: password_env.or(password_file),
            tls,
            topic_prefix,
            qos: qos?,
            keep_alive: keep_alive?,
            discovery: discovery?,
        })
    }

    /// `mqtt.discovery`: `true`, `false`, or `{ prefix, boost }`. `None` on an error,
    /// `Some(None)` when discovery is off.
    fn discovery(&mut self, node: &Node) -> Option<Option<Discovery>> {
        let mut d = Discovery { prefix: "homeassistant".to_owned(), boost: Duration::from_secs(3600) };
        match &node.value {
            Value::Bool(true) => return Some(Some(d)),
            Value::Bool(false) => return Some(None),
            _ => {}
        }
        let mut m = MapReader::new(node, "the `discovery` section", self.diags)?;
        let prefix = m.get("prefix");
        let boost = m.get("boost");
        m.finish(self.diags);
        // Both keys are checked before giving up, so one run reports both mistakes.
        let mut ok = true;
        if let Some(n) = prefix {
            match values::text(n, "the discovery prefix", self.diags).map(|t| t.trim_end_matches('/')) {
                Some(text) if !text.is_empty() && !text.contains(['+', '#']) && !text.starts_with('/') => {
                    d.prefix = text.to_owned();
                }
                Some(text) => {
                    self.diags.error(
                        "C0268",
                        format!("discovery prefix \"{text}\" is not a topic prefix"),
                        n.span.clone(),
                        "expected a topic without wildcards, e.g. homeassistant",
                    );
                    ok = false;
                }
                None => ok = false,
            }
        }
        if let Some(n) = boost {
            match values::duration(n, "the boost", self.diags) {
                Some(b) if (Duration::from_secs(60)..=MAX_OVERRIDE).contains(&b) => d.boost = b,
                Some(b) => {
                    self.diags.error(
                        "C0268",
                        format!("a boost of {} is outside 1 min to 24 h", units::format_duration(b)),
                        n.span.clone(),
                        "an override lasts at least a minute and at most a day",
                    );
                    ok = false;
                }
                None => ok = false,
            }
        }
        ok.then_some(Some(d))
    }

    fn qos(&mut self, node: &Node) -> Option<Qos> {
        match values::integer(node, 0, 2, "the QoS", self.diags)? {
            0 => Some(Qos::AtMostOnce),
            1 => Some(Qos::AtLeastOnce),
            _ => Some(Qos::ExactlyOnce),
        }
    }

    fn devices(&mut self, node: &Node, have_mqtt: bool) -> Vec<Device> {
        let Some(m) = MapReader::new(node, "the `devices` section", self.diags) else {
            return Vec::new();
        };
        let mut devices = Vec::new();
        let mut serial = Vec::new();
        for (key, dnode) in m.into_named_entries() {
            if !is_name(&key.name) {
                self.diags.error(
                    "C0105",
                    format!("device name \"{}\" is not a usable name", key.name),
                    key.span.clone(),
                    "use lowercase letters, digits and _",
                );
                self.broken_devices.push(key.name.clone());
                continue;
            }
            match self.device(&key.name, dnode, have_mqtt) {
                Some((d, spans)) => {
                    if let Some(spans) = spans {
                        serial.push((devices.len(), spans));
                    }
                    devices.push(d);
                }
                None => self.broken_devices.push(key.name.clone()),
            }
        }
        self.shared_ports(&devices, &serial);
        devices
    }

    /// Devices on one serial port share its line: they must agree on its framing (C0288)
    /// and each needs a unit id of its own there (C0289). `serial` holds, for each RTU
    /// device, its index and the spans of its `modbus_rtu` value and of its `unit`.
    fn shared_ports(&mut self, devices: &[Device], serial: &[(usize, SerialSpans)]) {
        for (k, (i, spans)) in serial.iter().enumerate() {
            let Link::ModbusRtu { path, unit, .. } = &devices[*i].link else { continue };
            // The first earlier device on the same port is the one to compare with.
            let Some((j, first)) = serial[..k].iter().find(|(j, _)| {
                matches!(&devices[*j].link, Link::ModbusRtu { path: p, .. } if crate::config::model::same_port(p, path))
            }) else {
                continue;
            };
            let (a, b) = (&devices[*j], &devices[*i]);
            let (fa, fb) = (a.link.serial_framing(), b.link.serial_framing());
            if fa != fb {
                self.diags.push(
                    Diagnostic::error(
                        "C0288",
                        format!(
                            "device \"{}\" is on serial port {path} with {}, but device \"{}\" on the same port has {}",
                            b.name,
                            fb.unwrap_or_default(),
                            a.name,
                            fa.unwrap_or_default()
                        ),
                        spans.link.clone(),
                    )
                    .with_label("settings differ from the port's first device")
                    .with_secondary(first.link.clone(), format!("\"{}\" sets the port up like this", a.name))
                    .with_note(
                        "the devices of one RS-485 line share it and must all be set to one baud rate, parity and stop bits: set the devices alike and write the same `modbus_rtu` for each",
                    ),
                );
            }
            let twin = serial[..k].iter().find(|(j, _)| {
                matches!(&devices[*j].link, Link::ModbusRtu { path: p, unit: u, .. }
                    if crate::config::model::same_port(p, path) && u == unit)
            });
            if let Some((j, other)) = twin {
                self.diags.push(
                    Diagnostic::error(
                        "C0289",
                        format!(
                            "devices \"{}\" and \"{}\" are both unit {unit} on serial port {path}",
                            devices[*j].name, b.name
                        ),
                        spans.unit.clone(),
                    )
                    .with_label(format!("unit {unit} again"))
                    .with_secondary(other.unit.clone(), format!("\"{}\" is unit {unit}", devices[*j].name))
                    .with_note(
                        "both would answer one request and garble the line: give each device on a line its own unit id (set on the device itself) and write it as its `unit`",
                    ),
                );
            }
        }
    }

    fn device(&mut self, name: &str, node: &Node, have_mqtt: bool) -> Option<(Device, Option<SerialSpans>)> {
        let what = format!("device \"{name}\"");
        let mut m = MapReader::new(node, &what, self.diags)?;
        let tcp = m.get("modbus_tcp");
        let rtu = m.get("modbus_rtu");
        // `mqtt: true` is the MQTT transport (its address is the site's broker);
        // `mqtt: false` says the device is not one, so it is no transport at all.
        let mqtt_node = m.get("mqtt");
        let mqtt = mqtt_node.map_or(Some(false), |n| values::boolean(n, "`mqtt` on a device", self.diags));
        let unit = m.get("unit").map(|n| values::integer(n, 0, 255, "the Modbus unit id", self.diags).map(|u| u as u8));
        let poll = m.get("poll").map_or(Some(DEFAULT_POLL), |n| {
            values::duration_at_least(n, "the poll period", MIN_POLL, POLL_WHY, self.diags)
        });
        let timeout = m.get("timeout").map_or(Some(DEFAULT_TIMEOUT), |n| {
            values::duration_at_least(
                n,
                "the request timeout",
                Duration::from_millis(10),
                "no device answers in no time: every request would fail",
                self.diags,
            )
        });
        let sunspec = m.get("sunspec").map_or(Some(false), |n| values::boolean(n, "`sunspec`", self.diags));
        let span = m.span();
        let serial_spans = rtu
            .map(|n| SerialSpans { link: n.span.clone(), unit: m.key_span("unit").unwrap_or_else(|| n.span.clone()) });
        m.finish(self.diags);
        let mqtt = mqtt?;
        let given = [tcp.is_some(), rtu.is_some(), mqtt].iter().filter(|b| **b).count();
        if given != 1 {
            let d = Diagnostic::error(
                "C0210",
                format!("{what} needs exactly one of `modbus_tcp`, `modbus_rtu` or `mqtt`"),
                span,
            );
            self.diags.push(if given == 0 {
                // The transport and its address are one key: say so with the shapes.
                d.with_label(if mqtt_node.is_some() { "`mqtt: false` is no transport" } else { "no transport given" }).with_note(
                    "give one, with its address as the value: `modbus_tcp: 192.168.1.50:502`, `modbus_rtu: { port: /dev/ttyUSB0, baud: 9600 }` or `mqtt: true`",
                )
            } else {
                d.with_label("more than one transport given")
            });
            return None;
        }
        let unit = match unit {
            Some(u) => u?,
            None => 1,
        };
        let link = if let Some(n) = tcp {
            let text = values::text(n, "the Modbus TCP address", self.diags)?;
            let Some((host, port)) = split_host_port(text, 502) else {
                self.diags.error(
                    "C0211",
                    format!("\"{text}\" is not host or host:port"),
                    n.span.clone(),
                    "expected e.g. 192.168.1.20:502",
                );
                return None;
            };
            Link::ModbusTcp { host, port, unit }
        } else if let Some(n) = rtu {
            self.rtu(n, unit)?
        } else {
            if !have_mqtt {
                self.diags.error(
                    "C0212",
                    format!("{what} uses MQTT but the file has no `mqtt` section"),
                    span.clone(),
                    "add `mqtt: {broker: host:port}` at the top level",
                );
            }
            Link::Mqtt
        };
        if sunspec == Some(true) && matches!(link, Link::Mqtt) {
            self.diags.error(
                "C0213",
                format!("{what}: SunSpec needs a Modbus device"),
                span,
                "remove `sunspec` or use modbus_tcp/modbus_rtu",
            );
        }
        let device = Device { name: name.to_owned(), link, poll: poll?, timeout: timeout?, sunspec: sunspec? };
        Some((device, serial_spans))
    }

    fn rtu(&mut self, node: &Node, unit: u8) -> Option<Link> {
        let mut m = MapReader::new(node, "`modbus_rtu`", self.diags)?;
        let path = m
            .require("port", self.diags)
            .and_then(|n| values::text(n, "the serial port", self.diags))
            .map(str::to_owned);
        let baud =
            m.get("baud").map_or(Some(9600), |n| values::integer(n, 300, 4_000_000, "the baud rate", self.diags));
        let parity = m
            .get("parity")
            .map_or(Some("none"), |n| values::choice(n, &["none", "even", "odd"], "the parity", self.diags));
        let stop_bits = m.get("stop_bits").map_or(Some(1), |n| values::integer(n, 1, 2, "the stop bits", self.diags));
        m.finish(self.diags);
        Some(Link::ModbusRtu {
            path: path?,
            baud: baud? as u32,
            parity: match parity? {
                "even" => Parity::Even,
                "odd" => Parity::Odd,
                _ => Parity::None,
            },
            stop_bits: stop_bits? as u8,
            unit,
        })
    }

    fn points(&mut self, node: &Node, devices: &[Device], stale_default: Duration) -> (Vec<Point>, Vec<PointInfo>) {
        let mut points = Vec::new();
        let mut info = Vec::new();
        let Some(m) = MapReader::new(node, "the `points` section", self.diags) else {
            return (points, info);
        };
        for (key, pnode) in m.into_named_entries() {
            // A refused name is still a point the file defines: it joins the broken
            // points, so what refers to it (a load's `temperature`, a rule) adds nothing.
            if !is_name(&key.name) {
                self.diags.error(
                    "C0105",
                    format!("point name \"{}\" is not a usable name", key.name),
                    key.span.clone(),
                    "use lowercase letters, digits and _",
                );
                self.broken_points.push(key.name.clone());
                continue;
            }
            if crate::rules::is_reserved_word(&key.name) {
                self.diags.push(
                    Diagnostic::error("C0105", format!("point name \"{}\" is a word of the rule language", key.name), key.span.clone())
                        .with_label("a rule could never name it")
                        .with_note("`and`, `or`, `not`, `for`, `in`, `true`, `false` and the weekdays `mon` … `sun` are taken: pick another name"),
                );
                self.broken_points.push(key.name.clone());
                continue;
            }
            if SITE_SIGNALS.iter().any(|(n, _, _)| *n == key.name) || key.name == "clock" || key.name == "weekday" {
                self.diags.error(
                    "C0214",
                    format!("\"{}\" is computed by Spillway and cannot be a point", key.name),
                    key.span.clone(),
                    "choose another name",
                );
                self.broken_points.push(key.name.clone());
                continue;
            }
            match self.point(&key.name, pnode, devices, stale_default) {
                Some(p) => {
                    points.push(p);
                    info.push(PointInfo { name_span: key.span.clone() });
                }
                None => self.broken_points.push(key.name.clone()),
            }
        }
        (points, info)
    }

    /// The raw value of `missing:` as the register bits of `ty`: `0xFFFF` or `65535`,
    /// and for a signed type its negative too (`-32768` is `0x8000` in an `i16`).
    fn missing_value(&mut self, n: &Node, ty: ValueType, what: &str) -> Option<u64> {
        let width = 16 * u32::from(ty.registers());
        if let Value::Str(t) = &n.value
            && u64::from_str_radix(t.trim_start_matches("0x"), 16).is_ok()
        {
            self.diags.push(
                Diagnostic::error("C0280", format!("{what}: `missing: {t}` is text"), n.span.clone())
                    .with_label("a hexadecimal number?")
                    .with_note(format!("write it as 0x{}, or in decimal", t.trim_start_matches("0x").to_uppercase())),
            );
            return None;
        }
        let v = values::integer(n, i64::MIN, i64::MAX, "the missing value", self.diags)?;
        let fits = if width >= 64 { true } else { v < (1i64 << width) && v >= -(1i64 << (width - 1)) };
        if !fits {
            self.diags.error(
                "C0280",
                format!("{what}: `missing: {v}` does not fit the point's {width}-bit registers"),
                n.span.clone(),
                "give the raw register value that means no reading, e.g. 0xFFFF",
            );
            return None;
        }
        let mask = if width >= 64 { u64::MAX } else { (1u64 << width) - 1 };
        Some((v as u64) & mask)
    }

    fn point(&mut self, name: &str, node: &Node, devices: &[Device], stale_default: Duration) -> Option<Point> {
        let what = format!("point \"{name}\"");
        let mut m = MapReader::new(node, &what, self.diags)?;
        let device_node = m.require("device", self.diags);
        let register = m.get("register");
        let coil = m.get("coil");
        let discrete = m.get("discrete");
        let sunspec = m.get("sunspec");
        let topic = m.get("topic");
        let table = m.get("table");
        let type_node = m.get("type");
        let order_node = m.get("word_order");
        let scale_node = m.get("scale");
        let json = m.get("json");
        let qos = m.get("qos");
        let unit_node = m.get("unit");
        let poll = m.get("poll");
        let stale = m.get("stale_after");
        let latency_node = m.get("latency");
        let frozen_node = m.get("frozen_after");
        let missing_node = m.get("missing");
        let span = m.span();
        m.finish(self.diags);

        let (device_id, device) = self.device_ref(device_node?, devices)?;
        let sources = [register, coil, discrete, sunspec, topic].iter().filter(|n| n.is_some()).count();
        if sources != 1 {
            self.diags.push(
                Diagnostic::error(
                    "C0215",
                    format!("{what} needs exactly one of `register`, `coil`, `discrete`, `sunspec` or `topic`"),
                    span.clone(),
                )
                .with_label(if sources == 0 {
                    "where is it read from?"
                } else {
                    "more than one source given"
                }),
            );
            return None;
        }
        let is_mqtt = matches!(device.link, Link::Mqtt);
        if is_mqtt != topic.is_some() {
            let n = topic.or(register).or(coil).or(discrete).or(sunspec)?;
            self.diags.error(
                "C0216",
                format!(
                    "{what}: device \"{}\" is {}",
                    device.name,
                    if is_mqtt {
                        "an MQTT device: read points by `topic`"
                    } else {
                        "a Modbus device: `topic` needs an MQTT device"
                    }
                ),
                n.span.clone(),
                "wrong kind of source for this device",
            );
            return None;
        }
        // The unit decides the dimension; bits are booleans.
        let bit = coil.is_some() || discrete.is_some();
        let (dimension, unit_factor, boolean) = match unit_node {
            Some(n) if matches!(&n.value, Value::Str(s) if s == "bool") => (Dimension::Scalar, 1.0, true),
            Some(n) => {
                let text = values::word(n, "the unit", self.diags)?;
                match units::unit(text.trim()) {
                    Some((d, f)) => (d, f, false),
                    None if text.trim() == "1" || text.trim() == "none" => (Dimension::Scalar, 1.0, false),
                    None => {
                        let mut d =
                            Diagnostic::error("C0301", format!("unknown unit \"{text}\" for {what}"), n.span.clone())
                                .with_label("expected W, kW, Wh, kWh, °C, %, V, A, s, bool or none");
                        if let Some(s) = crate::rules::suggest_unit(text.trim())
                            .or_else(|| did_you_mean(&text, units::unit_symbols()))
                        {
                            d = d.with_note(format!("did you mean \"{s}\"?"));
                        }
                        self.diags.push(d);
                        return None;
                    }
                }
            }
            None if bit => (Dimension::Scalar, 1.0, true),
            None => match sunspec.and_then(|n| n.scalar_text()).as_deref().and_then(sunspec_default_unit) {
                Some(d) => (d, 1.0, false),
                None => {
                    self.diags.push(
                        Diagnostic::error("C0217", format!("{what} needs a `unit`"), span.clone())
                            .with_label("add e.g. `unit: W`")
                            .with_note("the unit tells rules what the value measures, so `tank_temp > 3kW` is caught at load time"),
                    );
                    return None;
                }
            },
        };
        // Keys that belong to another kind of source would be ignored without a word;
        // an ignored `scale: -1` on a grid meter reverses the sign the guard relies on.
        let misplaced: &[(&str, Option<&Node>)] = if topic.is_some() {
            &[("table", table), ("type", type_node), ("word_order", order_node), ("missing", missing_node)]
        } else if sunspec.is_some() {
            &[
                ("table", table),
                ("type", type_node),
                ("word_order", order_node),
                ("json", json),
                ("qos", qos),
                ("missing", missing_node),
            ]
        } else if bit {
            &[("json", json), ("qos", qos), ("missing", missing_node)]
        } else {
            &[("json", json), ("qos", qos)]
        };
        let kind = if topic.is_some() {
            "an MQTT point"
        } else if sunspec.is_some() {
            "a SunSpec point"
        } else {
            "a Modbus point"
        };
        let mut misplaced_found = false;
        for (key, node) in misplaced {
            if let Some(n) = node {
                self.diags.error(
                    "C0260",
                    format!("{what}: `{key}` does not apply to {kind}"),
                    n.span.clone(),
                    if sunspec.is_some() && !matches!(*key, "json" | "qos") {
                        "the SunSpec model gives it: remove it"
                    } else {
                        "remove it"
                    },
                );
                misplaced_found = true;
            }
        }
        if misplaced_found {
            return None;
        }
        // A topic's or a SunSpec point's `scale` is a plain factor on top of the unit
        // (e.g. -1 for a meter that counts export as positive).
        let mut unit_factor = unit_factor;
        if (topic.is_some() || sunspec.is_some())
            && let Some(n) = scale_node
        {
            match self.scale(n)? {
                Scale::Factor(f) => unit_factor *= f,
                Scale::Register { .. } => {
                    self.diags.error(
                        "C0261",
                        format!("{what}: {kind} takes a plain `scale` factor, not a register"),
                        n.span.clone(),
                        if sunspec.is_some() {
                            "the SunSpec scale factor is found automatically"
                        } else {
                            "an MQTT payload has no registers"
                        },
                    );
                    return None;
                }
            }
        }
        let read = if let Some(n) = topic {
            let topic = values::text(n, "the topic", self.diags)?;
            if topic.contains(['+', '#']) {
                self.diags.error("C0218", "a point's topic cannot contain wildcards", n.span.clone(), "name one topic");
                return None;
            }
            let payload = match json {
                Some(j) => {
                    let ptr = values::text(j, "the JSON pointer", self.diags)?;
                    if !(ptr.is_empty() || ptr.starts_with('/')) {
                        self.diags.push(
                            Diagnostic::error("C0219", format!("\"{ptr}\" is not a JSON pointer"), j.span.clone())
                                .with_label("a JSON pointer starts with /")
                                .with_note("e.g. `/ENERGY/Power` for {\"ENERGY\": {\"Power\": 512}}"),
                        );
                        return None;
                    }
                    Payload::Json(ptr.to_owned())
                }
                None => Payload::Plain,
            };
            let qos = match qos {
                Some(q) => self.qos(q)?,
                None => Qos::AtLeastOnce,
            };
            PointRead::Mqtt(MqttRead { topic: topic.to_owned(), payload, qos })
        } else if let Some(n) = sunspec {
            if !device.sunspec {
                self.diags.error(
                    "C0220",
                    format!("{what}: device \"{}\" is not marked `sunspec: true`", device.name),
                    n.span.clone(),
                    "SunSpec points need a SunSpec device",
                );
                return None;
            }
            let text = values::word(n, "the SunSpec point", self.diags)?;
            let Some((model, point)) = text.split_once('.').and_then(|(m, p)| Some((m.parse::<u16>().ok()?, p))) else {
                self.diags.error(
                    "C0221",
                    format!("\"{text}\" is not MODEL.POINT"),
                    n.span.clone(),
                    "expected e.g. 203.W or 103.W",
                );
                return None;
            };
            PointRead::SunSpec(SunSpecRead { model, point: point.to_owned() })
        } else {
            let (table, address_node) = if let Some(n) = coil {
                (Table::Coil, n)
            } else if let Some(n) = discrete {
                (Table::DiscreteInput, n)
            } else {
                let table = match table {
                    Some(t) => match values::choice(t, &["holding", "input"], "the register table", self.diags)? {
                        "input" => Table::InputRegister,
                        _ => Table::HoldingRegister,
                    },
                    None => Table::HoldingRegister,
                };
                (table, register?)
            };
            let address = values::integer(address_node, 0, 65535, "the address", self.diags)? as u16;
            let value_type = match type_node {
                Some(t) if bit => {
                    self.diags.error(
                        "C0222",
                        "coils and discrete inputs are bits: they take no `type`",
                        t.span.clone(),
                        "remove `type`",
                    );
                    return None;
                }
                Some(t) => self.value_type(t)?,
                None if bit => ValueType::Bool,
                None => ValueType::U16,
            };
            let word_order = match order_node {
                Some(o) => match values::choice(o, &["high_first", "low_first"], "the word order", self.diags)? {
                    "low_first" => WordOrder::LowFirst,
                    _ => WordOrder::HighFirst,
                },
                None => WordOrder::HighFirst,
            };
            let scale = match scale_node {
                None => Scale::Factor(1.0),
                Some(s) => self.scale(s)?,
            };
            let missing = match missing_node {
                Some(n) => Some(self.missing_value(n, value_type, &what)?),
                None => None,
            };
            // Power at the grid connection and a battery's flow run both ways; an
            // unsigned register reads one way only. On `grid` that blinds the export
            // guard (export never shows, or import never does) and hides the surplus.
            let two_way = matches!(name, "grid" | "battery_power" | "battery_current");
            if two_way && matches!(value_type, ValueType::U16 | ValueType::U32 | ValueType::U64) {
                let negative_scale = matches!(scale, Scale::Factor(f) if f < 0.0);
                let never = if name == "grid" {
                    if negative_scale { "import" } else { "export" }
                } else if negative_scale {
                    "charging"
                } else {
                    "discharging"
                };
                let type_name = format!("{value_type:?}").to_lowercase();
                let message =
                    format!("{what} is read as `{type_name}`, which has no negative values: it can never show {never}");
                let at = type_node.map_or_else(|| span.clone(), |t| t.span.clone());
                let d = if name == "grid" {
                    Diagnostic::error("C0285", message, at)
                } else {
                    Diagnostic::warning("C0285", message, at)
                }
                .with_label(if type_node.is_some() { "unsigned" } else { "no `type`: u16, unsigned" })
                .with_note(format!(
                    "{name} flows both ways (the sign says which): give it the register's signed type, `type: i16`, `i32` or `f32`, as the device's register map gives it{}",
                    if name == "grid" { "; read unsigned, the export guard could not see export" } else { "" }
                ));
                self.diags.push(d);
                if name == "grid" {
                    return None;
                }
            }
            let end = u32::from(address) + u32::from(value_type.registers()) - 1;
            if end > 65535 {
                self.diags.error(
                    "C0223",
                    format!("{what} runs past the last register (65535)"),
                    address_node.span.clone(),
                    "address + length too large",
                );
                return None;
            }
            PointRead::Modbus(ModbusRead { table, address, value_type, word_order, scale, missing })
        };
        let poll = match poll {
            Some(n) => values::duration_at_least(n, "the poll period", MIN_POLL, POLL_WHY, self.diags)?,
            None => device.poll,
        };
        let stale_after = match stale {
            Some(n) => values::duration(n, "the stale timeout", self.diags)?,
            None => stale_default.max(poll * 2),
        };
        if stale_after <= poll {
            self.diags.push(
                Diagnostic::error(
                    "C0224",
                    format!(
                        "{what} goes stale ({}) before it is polled again ({})",
                        units::format_duration(stale_after),
                        units::format_duration(poll)
                    ),
                    span,
                )
                .with_label("stale_after must be longer than the poll period")
                .with_note("allow at least one missed poll: stale_after ≥ 2 × poll is common practice"),
            );
            return None;
        }
        let latency = match latency_node {
            Some(n) => values::duration(n, "the latency", self.diags)?,
            None => Duration::ZERO,
        };
        if latency >= stale_after {
            self.diags.error(
                "C0258",
                format!(
                    "{what}: a latency of {} is not shorter than its stale timeout",
                    units::format_duration(latency)
                ),
                latency_node.map_or(span.clone(), |n| n.span.clone()),
                "latency must be below stale_after",
            );
            return None;
        }
        let frozen_after = match frozen_node {
            Some(n) => Some(self.frozen_after(n, &what, boolean, poll)?),
            None => None,
        };
        Some(Point {
            latency,
            frozen_after,
            name: name.to_owned(),
            device: device_id,
            read,
            dimension,
            boolean,
            unit_factor,
            poll,
            stale_after,
        })
    }

    /// `frozen_after`: how long a measurement may repeat exactly before it counts as
    /// stale. At least two polls (one repeat proves nothing), and only for measurements:
    /// an on/off value may rightly stay put for days.
    fn frozen_after(&mut self, n: &Node, what: &str, boolean: bool, poll: Duration) -> Option<Duration> {
        let d = values::duration(n, "the frozen timeout", self.diags)?;
        if boolean {
            self.diags.error(
                "C0265",
                format!("{what} is an on/off value: `frozen_after` is for measurements"),
                n.span.clone(),
                "an on/off value may rightly stay the same for days",
            );
            return None;
        }
        if d < poll * 2 {
            self.diags.push(
                Diagnostic::error(
                    "C0266",
                    format!(
                        "{what}: frozen_after ({}) is shorter than two polls ({})",
                        units::format_duration(d),
                        units::format_duration(poll * 2)
                    ),
                    n.span.clone(),
                )
                .with_label("a value read once or twice proves nothing by repeating")
                .with_note("a live meter's reading changes in the last digit within seconds; 30s to 2min is typical"),
            );
            return None;
        }
        Some(d)
    }

    fn value_type(&mut self, node: &Node) -> Option<ValueType> {
        Some(
            match values::choice(node, &["u16", "i16", "u32", "i32", "u64", "f32"], "the register type", self.diags)? {
                "i16" => ValueType::I16,
                "u32" => ValueType::U32,
                "i32" => ValueType::I32,
                "u64" => ValueType::U64,
                "f32" => ValueType::F32,
                _ => ValueType::U16,
            },
        )
    }

    fn scale(&mut self, node: &Node) -> Option<Scale> {
        match &node.value {
            Value::Int(_) | Value::Float(_) => {
                let factor = values::number(node, "the scale", self.diags)?;
                if factor == 0.0 || !factor.is_finite() {
                    self.diags.error(
                        "C0259",
                        "a scale of 0 would make every reading 0",
                        node.span.clone(),
                        "expected a non-zero factor, e.g. 0.1, or -1 for a meter that counts export as positive",
                    );
                    return None;
                }
                Some(Scale::Factor(factor))
            }
            Value::Map(_) => {
                let mut m = MapReader::new(node, "the scale", self.diags)?;
                let address = m
                    .require("register", self.diags)
                    .and_then(|n| values::integer(n, 0, 65535, "the scale-factor register", self.diags));
                let table = m.get("table").map_or(Some("holding"), |n| {
                    values::choice(n, &["holding", "input"], "the register table", self.diags)
                });
                m.finish(self.diags);
                Some(Scale::Register {
                    table: if table? == "input" { Table::InputRegister } else { Table::HoldingRegister },
                    address: address? as u16,
                })
            }
            _ => {
                self.diags.error(
                    "C0225",
                    "`scale` must be a number or `{register: N}`",
                    node.span.clone(),
                    "expected e.g. 0.1, or {register: 40084} for a SunSpec scale factor",
                );
                None
            }
        }
    }

    fn device_ref<'a>(&mut self, node: &Node, devices: &'a [Device]) -> Option<(DeviceId, &'a Device)> {
        let name = values::text(node, "the device", self.diags)?;
        match devices.iter().position(|d| d.name == name) {
            Some(i) => Some((DeviceId(i), &devices[i])),
            // Its own error is already reported.
            None if self.broken_devices.iter().any(|b| b == name) => None,
            None => {
                let mut d = Diagnostic::error("C0226", format!("no device called \"{name}\""), node.span.clone())
                    .with_label("unknown device");
                if let Some(s) = did_you_mean(name, devices.iter().map(|d| d.name.as_str())) {
                    d = d.with_note(format!("did you mean \"{s}\"?"));
                } else if devices.is_empty() {
                    d = d.with_note("define it under `devices:` first");
                }
                self.diags.push(d);
                None
            }
        }
    }

    fn roles(&mut self, points: &[Point], info: &[PointInfo]) -> Roles {
        let mut roles = Roles::default();
        for (i, p) in points.iter().enumerate() {
            let Some((_, dim)) = ROLE_NAMES.iter().find(|(n, _)| *n == p.name) else {
                continue;
            };
            let expected_bool = p.name == "grid_available";
            if (expected_bool && !p.boolean) || (!expected_bool && (p.dimension != *dim || p.boolean)) {
                self.diags.error(
                    "C0227",
                    format!(
                        "point \"{}\" takes a site role and must be {}",
                        p.name,
                        if expected_bool { "a boolean (`unit: bool`)".to_owned() } else { dim.describe().to_owned() }
                    ),
                    info[i].name_span.clone(),
                    "wrong unit for this role",
                );
                continue;
            }
            let id = Some(PointId(i));
            if p.frozen_after.is_some() && matches!(p.name.as_str(), "pv" | "pv_available") {
                self.diags.push(
                    Diagnostic::warning(
                        "C0267",
                        format!("point \"{}\" has `frozen_after`, but a PV reading stays at 0 W all night", p.name),
                        info[i].name_span.clone(),
                    )
                    .with_label("every night this point would count as lost")
                    .with_note("set `frozen_after` on the grid meter, whose reading always moves"),
                );
            }
            match p.name.as_str() {
                "grid" => roles.grid = id,
                "pv" => roles.pv = id,
                "pv_available" => roles.pv_available = id,
                "battery_soc" => roles.battery_soc = id,
                "battery_voltage" => roles.battery_voltage = id,
                "battery_current" => roles.battery_current = id,
                "battery_power" => roles.battery_power = id,
                _ => roles.grid_available = id,
            }
        }
        roles
    }

    /// Name, span and priority of a load, read before the load itself.
    fn load_header(&mut self, node: &Node, index: usize) -> (String, Range<usize>, u32) {
        let Value::Map(entries) = &node.value else {
            return (String::new(), node.span.clone(), u32::MAX);
        };
        let name = entries.iter().find(|(k, _)| k.name == "name");
        let priority = entries.iter().find(|(k, _)| k.name == "priority");
        let (name, span) = match name {
            Some((_, n)) => (values::name(n, "the load name", self.diags).unwrap_or("").to_owned(), n.span.clone()),
            None => {
                self.diags.error(
                    "C0004",
                    format!("load #{} has no `name`", index + 1),
                    node.span.clone(),
                    "add `name:`",
                );
                (String::new(), node.span.clone())
            }
        };
        let priority = priority
            .and_then(|(_, n)| values::integer(n, 1, 1000, "the priority", self.diags))
            .map_or(u32::MAX / 2 + index as u32, |p| p as u32);
        (name, span, priority)
    }

    fn load(&mut self, node: &Node, header: &(String, Range<usize>, u32, usize), ctx: &LoadCtx<'_>) -> Option<Load> {
        let (name, name_span, priority, _) = header;
        if name.is_empty() {
            return None;
        }
        let what = format!("load \"{name}\"");
        let mut m = MapReader::new(node, &what, self.diags)?;
        m.allow(&["name", "priority"]);
        let kind_word = m.get("kind").map_or(Some("switched"), |n| {
            let kinds: Vec<&'static str> = KIND_KEYS.iter().map(|(k, _)| *k).collect();
            values::choice(n, &kinds, "the load kind", self.diags)
        });
        let kind = match kind_word {
            Some(k) => {
                let kind = self.load_kind(k, &mut m, &what, ctx);
                // Reading a kind stops at its first error: the keys it did not reach are
                // its own, not unknown ones (one mistake, one error).
                if kind.is_none() {
                    m.allow(kind_keys(k));
                }
                kind
            }
            // Which kind was meant cannot be known: the keys of every kind are accepted,
            // and only a key no load has is reported.
            None => {
                for (_, keys) in KIND_KEYS {
                    m.allow(keys);
                }
                None
            }
        };
        let power = m
            .get("power")
            .and_then(|n| self.point_ref(n, ctx.points, Some(Dimension::Power), "the load's power meter"));
        let temperature_node = m.get("temperature");
        let temperature = temperature_node
            .and_then(|n| self.point_ref(n, ctx.points, Some(Dimension::Temperature), "the load's temperature"));
        let volume = match m.get("volume") {
            Some(n) if temperature_node.is_none() => {
                self.diags.push(
                    Diagnostic::error("C0281", format!("{what} has a `volume` but no `temperature`"), n.span.clone())
                        .with_label("the volume of what?")
                        .with_note("`volume` is a tank's, for its temperature duties: add `temperature: <point>`, or remove it"),
                );
                None
            }
            Some(n) => values::positive(n, Dimension::Volume, "the tank's volume", self.diags),
            None => None,
        };
        // A `temperature` that names a missing or wrong point has its own error; the
        // obligations need not add that there is none.
        let temperature_given = temperature_node.is_some();
        let start_node = m.get("start");
        let start = start_node.and_then(|n| self.rule(n, ctx.scope, &format!("{name}.start")));
        let stop_node = m.get("stop");
        let stop = stop_node.and_then(|n| self.rule(n, ctx.scope, &format!("{name}.stop")));
        let inhibit = m.get("inhibit").and_then(|n| self.rule(n, ctx.scope, &format!("{name}.inhibit")));
        let min_on_node = m.get("min_on");
        let min_on =
            min_on_node.map_or(Some(Duration::ZERO), |n| values::duration(n, "the minimum on-time", self.diags));
        let min_off_node = m.get("min_off");
        let min_off =
            min_off_node.map_or(Some(Duration::ZERO), |n| values::duration(n, "the minimum off-time", self.diags));
        let starts_node = m.get("max_starts_per_hour");
        let max_starts =
            starts_node.map(|n| values::integer(n, 1, 3600, "the starts-per-hour cap", self.diags).map(|v| v as u32));
        let safe_state = m.get("safe_state").map_or(Some(SafeState::Off), |n| {
            values::choice(n, &["off", "on", "hold"], "the safe state", self.diags).map(|s| match s {
                "on" => SafeState::On,
                "hold" => SafeState::Hold,
                _ => SafeState::Off,
            })
        });
        let shed = m.get("shed_on_outage").map_or(Some(true), |n| values::boolean(n, "`shed_on_outage`", self.diags));
        let obligations_node = m.get("obligations");
        let load_span = m.span();
        m.finish(self.diags);

        // Loads without rules get plain hysteresis on their own surplus.
        let (start, stop) = match (&kind, start_node.is_none(), stop_node.is_none()) {
            (Some(k), no_start, no_stop) if no_start || no_stop => {
                let (s, t) = default_rules(k);
                let start = if no_start {
                    s.and_then(|text| self.default_rule(&text, ctx.scope, &format!("{name}.start (default)")))
                } else {
                    start
                };
                let stop = if no_stop {
                    t.and_then(|text| self.default_rule(&text, ctx.scope, &format!("{name}.stop (default)")))
                } else {
                    stop
                };
                (start, stop)
            }
            _ => (start, stop),
        };
        let obligations = obligations_node
            .map(|n| {
                let ctx = DutyCtx { has_temperature: temperature_given, kind: kind.as_ref(), volume };
                self.obligations(n, &ctx, &what)
            })
            .unwrap_or(Some(Vec::new()));
        // A temperature target the inhibit rule forbids can never be met: the load is
        // forced off before the water gets there (within the 1 K the target allows).
        if let (Some(obs), Some(inh), Some(t), Some(n)) = (&obligations, &inhibit, temperature, obligations_node)
            && let Some(point) = ctx.points.get(t.0)
        {
            for ob in obs {
                let target = match ob {
                    Obligation::ReachBy { target, .. } | Obligation::Cycle { target, .. } => target.0,
                    Obligation::RunDaily { .. } | Obligation::ChargeBy { .. } => continue,
                };
                let reached = format!("{} >= {}°C", point.name, units::trim_number(target - 1.0));
                let blocked =
                    rules::compile(&reached, ctx.scope).is_ok_and(|r| rules::implies(&r.rule, &inh.rule) == Some(true));
                if blocked {
                    self.diags.push(
                        Diagnostic::warning(
                            "C0264",
                            format!("{what}: the inhibit rule stops the load before `{}` can be met", ob.describe()),
                            n.span.clone(),
                        )
                        .with_label("cannot be met")
                        .with_note(format!(
                            "inhibit: {}, true before {} is within 1 K of the target",
                            inh.rule.describe(),
                            point.name
                        ))
                        .with_note("lower the target, or raise the inhibit threshold above it"),
                    );
                }
            }
        }
        let min_on = min_on?;
        let min_off = min_off?;
        let day = Duration::from_secs(86_400);
        for (value, node, word) in [(min_on, min_on_node, "on"), (min_off, min_off_node, "off")] {
            if value > day
                && let Some(n) = node
            {
                self.diags.push(
                    Diagnostic::error(
                        "C0228",
                        format!(
                            "{what}: a minimum {word}-time of {} is longer than a day",
                            units::format_duration(value)
                        ),
                        n.span.clone(),
                    )
                    .with_label("longer than 24 h")
                    .with_note(
                        "the load could switch at most once a day; this is almost certainly a unit slip (min vs h)",
                    ),
                );
            }
        }
        let max_starts = match max_starts {
            Some(v) => Some(v?),
            None => None,
        };
        if let (Some(cap), Some(n)) = (max_starts, starts_node) {
            let cycle = (min_on + min_off).as_secs_f64();
            if cycle > 0.0 && cycle <= 86_400.0 && f64::from(cap) > (3600.0 / cycle).ceil() {
                self.diags.push(
                    Diagnostic::warning(
                        "C0229",
                        format!("{what}: the cap of {cap} starts per hour can never be reached"),
                        n.span.clone(),
                    )
                    .with_label("unreachable")
                    .with_note(format!(
                        "min_on + min_off = {} allows at most {} starts an hour",
                        units::format_duration(min_on + min_off),
                        (3600.0 / cycle).ceil()
                    )),
                );
            }
        }
        // Hysteresis sanity: a stop rule that holds whenever the start rule holds makes the
        // load chatter; a start rule that can never hold leaves it off for ever.
        // A start rule that can never hold implies anything; C0231 says what is wrong then.
        if let (Some(start), Some(stop)) = (&start, &stop)
            && rules::satisfiable(&start.rule) != Some(false)
            && rules::implies(&start.rule, &stop.rule) == Some(true)
        {
            self.diags.push(
                Diagnostic::error("C0230", format!("{what}: the stop rule is true whenever the start rule is"), name_span.clone())
                    .with_label("this load would stop as soon as it starts")
                    .with_note(format!("start: {}", start.rule.describe()))
                    .with_note(format!("stop:  {}", stop.rule.describe()))
                    .with_note("leave a gap between the thresholds (hysteresis), e.g. start above 3.2 kW surplus, stop on 250 W import"),
            );
        }
        for (rule, word) in [(&start, "start"), (&stop, "stop")] {
            if let Some(r) = rule
                && rules::satisfiable(&r.rule) == Some(false)
            {
                self.diags.push(
                    Diagnostic::warning(
                        "C0231",
                        format!("{what}: the {word} rule can never be true"),
                        name_span.clone(),
                    )
                    .with_label(format!("{word} never fires"))
                    .with_note(r.rule.describe()),
                );
            }
        }
        let kind = kind?;
        if let LoadKind::Battery { soc, .. } = &kind
            && ctx.points.get(soc.0).is_none()
        {
            return None;
        }
        let _ = load_span;
        Some(Load {
            name: name.clone(),
            priority: *priority,
            kind,
            power,
            temperature,
            volume,
            start,
            stop,
            inhibit,
            min_on,
            min_off,
            max_starts_per_hour: max_starts,
            obligations: obligations?,
            safe_state: safe_state?,
            shed_on_outage: shed?,
        })
    }

    /// Reads the keys of `kind`; those are listed in [`KIND_KEYS`] too.
    fn load_kind(&mut self, kind: &str, m: &mut MapReader<'_>, what: &str, ctx: &LoadCtx<'_>) -> Option<LoadKind> {
        match kind {
            "switched" => {
                let rated = m
                    .require("rated", self.diags)
                    .and_then(|n| values::positive(n, Dimension::Power, "the rated power", self.diags));
                let switch =
                    m.require("switch", self.diags).and_then(|n| self.write(n, ctx.devices, WriteKind::Switch));
                Some(LoadKind::Switched { rated: Power(rated?), switch: switch? })
            }
            "stepped" => {
                let stages_node = m.require("stages", self.diags)?;
                let stages = self.stages(stages_node, what)?;
                let command = match (m.get("switch"), m.get("stage_register")) {
                    (Some(n), None) => {
                        let Value::Seq(items) = &n.value else {
                            self.diags.error(
                                "C0232",
                                format!("{what}: `switch` of a stepped load is a list, one relay per stage"),
                                n.span.clone(),
                                "expected a list",
                            );
                            return None;
                        };
                        if items.len() != stages.len() {
                            self.diags.error(
                                "C0232",
                                format!("{what} has {} stages but {} relays", stages.len(), items.len()),
                                n.span.clone(),
                                "give one relay per stage",
                            );
                            return None;
                        }
                        let writes: Vec<Option<Write>> =
                            items.iter().map(|i| self.write(i, ctx.devices, WriteKind::Switch)).collect();
                        StageCommand::Relays(writes.into_iter().collect::<Option<Vec<_>>>()?)
                    }
                    (None, Some(n)) => StageCommand::Register(self.write(n, ctx.devices, WriteKind::Value)?),
                    _ => {
                        self.diags.error(
                            "C0232",
                            format!("{what} needs either `switch` (a relay per stage) or `stage_register`"),
                            m.span(),
                            "how are the stages commanded?",
                        );
                        return None;
                    }
                };
                Some(LoadKind::Stepped { stages, command })
            }
            "proportional" => {
                let rated = m
                    .require("rated", self.diags)
                    .and_then(|n| values::positive(n, Dimension::Power, "the rated power", self.diags));
                let setpoint =
                    m.require("setpoint", self.diags).and_then(|n| self.write(n, ctx.devices, WriteKind::Value));
                let min = m
                    .get("min")
                    .map_or(Some(0.0), |n| values::quantity(n, Dimension::Ratio, "the minimum setpoint", self.diags));
                let step = m
                    .get("step")
                    .map_or(Some(1.0), |n| values::positive(n, Dimension::Ratio, "the setpoint step", self.diags));
                let enable = m.get("enable").and_then(|n| self.write(n, ctx.devices, WriteKind::Switch));
                let (min, step) = (min?, step?);
                if !(0.0..100.0).contains(&min) {
                    self.diags.error(
                        "C0233",
                        format!("{what}: the minimum setpoint must be 0–100 %"),
                        m.span(),
                        "out of range",
                    );
                    return None;
                }
                Some(LoadKind::Proportional {
                    rated: Power(rated?),
                    min: Ratio(min),
                    step: Ratio(step),
                    setpoint: setpoint?,
                    enable,
                })
            }
            "charger" => {
                let volts = m
                    .get("voltage")
                    .map_or(Some(230.0), |n| values::positive(n, Dimension::Voltage, "the supply voltage", self.diags));
                let phases =
                    m.get("phases").map_or(Some(1), |n| values::integer(n, 1, 3, "the number of phases", self.diags));
                let min_node = m.require("min_current", self.diags);
                let min =
                    min_node.and_then(|n| values::positive(n, Dimension::Current, "the minimum current", self.diags));
                let max = m
                    .require("max_current", self.diags)
                    .and_then(|n| values::positive(n, Dimension::Current, "the maximum current", self.diags));
                let step = m
                    .get("step")
                    .map_or(Some(1.0), |n| values::positive(n, Dimension::Current, "the current step", self.diags));
                let setpoint =
                    m.require("setpoint", self.diags).and_then(|n| self.write(n, ctx.devices, WriteKind::Value));
                let enable = m.get("enable").and_then(|n| self.write(n, ctx.devices, WriteKind::Switch));
                let below = m
                    .get("below_min")
                    .map_or(Some("pause"), |n| values::choice(n, &["pause", "hold"], "`below_min`", self.diags));
                // Both read before either may return: a key left unread is reported as
                // unknown, on top of the error that stopped here.
                let soc = m
                    .get("soc")
                    .map(|n| self.point_ref(n, ctx.points, Some(Dimension::Ratio), "the car's state of charge"));
                let car_capacity = m
                    .get("car_capacity")
                    .map(|n| values::positive(n, Dimension::Energy, "the car's capacity", self.diags).map(Energy));
                let soc = match soc {
                    Some(p) => Some(p?),
                    None => None,
                };
                let car_capacity = match car_capacity {
                    Some(c) => Some(c?),
                    None => None,
                };
                let (min, max) = (min?, max?);
                if min > max {
                    self.diags.error(
                        "C0234",
                        format!("{what}: minimum current {min} A is above the maximum {max} A"),
                        min_node.map(|n| n.span.clone()).unwrap_or_default(),
                        "min_current > max_current",
                    );
                    return None;
                }
                Some(LoadKind::Charger {
                    watts_per_amp: volts? * phases? as f64,
                    min: Current(min),
                    max: Current(max),
                    step: Current(step?),
                    setpoint: setpoint?,
                    enable,
                    hold_min_from_grid: below? == "hold",
                    soc,
                    car_capacity,
                })
            }
            _ => {
                let max_charge = m
                    .require("max_charge", self.diags)
                    .and_then(|n| values::positive(n, Dimension::Power, "the maximum charge power", self.diags));
                let min_charge = m.get("min_charge").map_or(Some(DEFAULT_MIN_CHARGE.0), |n| {
                    values::quantity(n, Dimension::Power, "the minimum charge power", self.diags)
                });
                let soc = match m.get("soc") {
                    Some(n) => self.point_ref(n, ctx.points, Some(Dimension::Ratio), "the state of charge"),
                    None => match ctx.roles.battery_soc {
                        Some(id) => Some(id),
                        None => {
                            self.diags.error(
                                "C0235",
                                format!("{what} needs a state-of-charge point"),
                                m.span(),
                                "add `soc: <point>` or a `battery_soc` point",
                            );
                            None
                        }
                    },
                };
                let capacity = match m.get("capacity") {
                    Some(n) => values::positive(n, Dimension::Energy, "the battery's capacity", self.diags)
                        .map(|e| Some(Energy(e))),
                    None => Some(None),
                };
                let soc_max_node = m.get("soc_max");
                let soc_max = soc_max_node.map_or(Some(100.0), |n| {
                    values::quantity(n, Dimension::Ratio, "the maximum state of charge", self.diags)
                });
                let soc_resume = m
                    .get("soc_resume")
                    .map(|n| values::quantity(n, Dimension::Ratio, "the resume state of charge", self.diags));
                let setpoint =
                    m.require("setpoint", self.diags).and_then(|n| self.write(n, ctx.devices, WriteKind::Value));
                let soc_max = soc_max?;
                let soc_resume = match soc_resume {
                    Some(v) => v?,
                    None => (soc_max - 5.0).max(0.0),
                };
                if soc_resume >= soc_max || !(0.0..=100.0).contains(&soc_max) {
                    self.diags.error(
                        "C0236",
                        format!("{what}: charging resumes at {soc_resume} % but stops at {soc_max} %"),
                        soc_max_node.map(|n| n.span.clone()).unwrap_or_else(|| m.span()),
                        "soc_resume must be below soc_max, both within 0–100 %",
                    );
                    return None;
                }
                let discharge = match m.get("discharge") {
                    Some(n) => Some(self.discharge(n, what, soc_resume)?),
                    None => None,
                };
                // A discharge is a negative setpoint: an unsigned register would write
                // it as 0, and the battery would never discharge, without a word.
                if discharge.is_some()
                    && let Some(Write::Register { value_type, .. }) = &setpoint
                    && matches!(value_type, ValueType::U16 | ValueType::U32 | ValueType::U64 | ValueType::Bool)
                {
                    self.diags.error(
                        "C0276",
                        format!(
                            "{what}: `discharge` needs a signed setpoint register, not {}",
                            format!("{value_type:?}").to_lowercase()
                        ),
                        m.span(),
                        "a discharge is written as a negative power: give the setpoint `type: i16` or `type: i32` (or `f32`)",
                    );
                    return None;
                }
                let (max_charge, min_charge) = (max_charge?, min_charge?);
                if !(0.0..=max_charge).contains(&min_charge) {
                    self.diags.error(
                        "C0271",
                        format!("{what}: the minimum charge power {} is outside 0 … max_charge", Power(min_charge)),
                        m.span(),
                        "min_charge must lie between 0 W and max_charge",
                    );
                    return None;
                }
                Some(LoadKind::Battery {
                    max_charge: Power(max_charge),
                    min_charge: Power(min_charge),
                    soc_max: Ratio(soc_max),
                    soc_resume: Ratio(soc_resume),
                    soc: soc?,
                    capacity: capacity?,
                    setpoint: setpoint?,
                    discharge,
                })
            }
        }
    }

    /// A battery's `discharge:` mapping: `{ max: 3kW, soc_min: 20%, window: "16:00..23:00" }`.
    fn discharge(&mut self, node: &Node, what: &str, soc_resume: f64) -> Option<Discharge> {
        let mut m = MapReader::new(node, format!("{what}: discharge"), self.diags)?;
        let max = m
            .require("max", self.diags)
            .and_then(|n| values::positive(n, Dimension::Power, "the maximum discharge power", self.diags));
        let soc_min_node = m.get("soc_min");
        let soc_min = soc_min_node
            .map_or(Some(20.0), |n| values::quantity(n, Dimension::Ratio, "the lowest state of charge", self.diags));
        let window = match m.get("window") {
            Some(n) => Some(values::window(n, "the discharge window", self.diags)),
            None => None,
        };
        let span = m.span();
        m.finish(self.diags);
        let window = match window {
            Some(w) => Some(w?),
            None => None,
        };
        let (max, soc_min) = (max?, soc_min?);
        // Charging resumes below `soc_resume` and discharging stops at `soc_min`: with the
        // floor at or above the resume level the two would hand the battery back and forth.
        if !(0.0..100.0).contains(&soc_min) || soc_min + Discharge::RESUME_BAND_PCT > soc_resume {
            self.diags.error(
                "C0273",
                format!("{what}: discharging stops at {soc_min} % but charging resumes at {soc_resume} %"),
                soc_min_node.map_or(span, |n| n.span.clone()),
                format!(
                    "soc_min must lie within 0–100 % and at least {} points below soc_resume",
                    Discharge::RESUME_BAND_PCT
                ),
            );
            return None;
        }
        Some(Discharge { max: Power(max), soc_min: Ratio(soc_min), window })
    }

    fn stages(&mut self, node: &Node, what: &str) -> Option<Vec<Power>> {
        let Value::Seq(items) = &node.value else {
            self.diags.error(
                "C0237",
                format!("{what}: `stages` is a list of powers"),
                node.span.clone(),
                "expected e.g. [1kW, 2kW, 3kW]",
            );
            return None;
        };
        let mut out = Vec::new();
        for item in items {
            let p = values::positive(item, Dimension::Power, "a stage's power", self.diags)?;
            if let Some(prev) = out.last()
                && p <= Power::value(*prev)
            {
                self.diags.error(
                    "C0237",
                    format!("{what}: stage powers must increase (each stage is the total at that stage)"),
                    item.span.clone(),
                    "not above the previous stage",
                );
                return None;
            }
            out.push(Power(p));
        }
        if out.is_empty() {
            self.diags.error("C0237", format!("{what} has no stages"), node.span.clone(), "list at least one stage");
            return None;
        }
        Some(out)
    }

    fn point_ref(
        &mut self,
        node: &Node,
        points: &[Point],
        dimension: Option<Dimension>,
        what: &str,
    ) -> Option<PointId> {
        let name = values::text(node, what, self.diags)?;
        let Some(i) = points.iter().position(|p| p.name == name) else {
            if self.is_broken(name) {
                return None;
            }
            let mut d = Diagnostic::error("C0238", format!("no point called \"{name}\""), node.span.clone())
                .with_label(format!("{what} must name a point"));
            if let Some(s) = did_you_mean(name, points.iter().map(|p| p.name.as_str())) {
                d = d.with_note(format!("did you mean \"{s}\"?"));
            }
            self.diags.push(d);
            return None;
        };
        if let Some(dim) = dimension
            && points[i].dimension != dim
        {
            self.diags.error(
                "C0239",
                format!(
                    "point \"{name}\" is {}, but {what} must be {}",
                    points[i].dimension.describe(),
                    dim.describe()
                ),
                node.span.clone(),
                "wrong kind of point",
            );
            return None;
        }
        Some(PointId(i))
    }

    fn rule(&mut self, node: &Node, scope: &SiteScope, origin: &str) -> Option<RuleText> {
        let text = values::word(node, "a rule", self.diags)?;
        let map = yaml::map_text(self.text, node, &text);
        match rules::compile(&text, scope) {
            Ok(compiled) => {
                for w in &compiled.warnings {
                    self.diags.push(rules::to_diagnostic_mapped(w, &map));
                }
                Some(RuleText { rule: compiled.rule, origin: origin.to_owned() })
            }
            Err(errors) => {
                // A name that is unknown only because its point's definition failed is
                // no news: that error is already reported.
                let news: Vec<&rules::RuleDiagnostic> = errors
                    .iter()
                    .filter(|e| !(e.code == "R0201" && text.get(e.span.clone()).is_some_and(|n| self.is_broken(n))))
                    .collect();
                for e in news {
                    self.diags.push(rules::to_diagnostic_mapped(e, &map));
                }
                None
            }
        }
    }

    /// Whether `name` is a point whose definition has an error already reported.
    fn is_broken(&self, name: &str) -> bool {
        self.broken_points.iter().any(|b| b == name)
    }

    fn default_rule(&mut self, text: &str, scope: &SiteScope, origin: &str) -> Option<RuleText> {
        match rules::compile(text, scope) {
            Ok(c) => Some(RuleText { rule: c.rule, origin: origin.to_owned() }),
            Err(errors) => {
                // A default rule that does not compile is a bug in Spillway, not in the file.
                for e in errors {
                    self.diags.error(
                        "C0999",
                        format!("internal: default rule `{text}` does not compile: {}", e.message),
                        0..0,
                        "please report this",
                    );
                }
                None
            }
        }
    }

    fn write(&mut self, node: &Node, devices: &[Device], kind: WriteKind) -> Option<Write> {
        let mut m = MapReader::new(node, "an actuator", self.diags)?;
        let device_node = m.require("device", self.diags);
        let coil = m.get("coil");
        let register = m.get("register");
        let topic = m.get("topic");
        let type_node = m.get("type");
        let order = m.get("word_order");
        let scale = m.get("scale");
        let on = m.get("on");
        let off = m.get("off");
        let payload = m.get("payload");
        let retain = m.get("retain");
        let qos = m.get("qos");
        let span = m.span();
        m.finish(self.diags);
        let (device_id, device) = self.device_ref(device_node?, devices)?;
        let is_mqtt = matches!(device.link, Link::Mqtt);
        let targets = [coil, register, topic].iter().filter(|t| t.is_some()).count();
        if targets != 1 {
            self.diags.error(
                "C0240",
                "an actuator needs exactly one of `coil`, `register` or `topic`",
                span,
                "where is the command written?",
            );
            return None;
        }
        if let Some(n) = topic {
            if !is_mqtt {
                self.diags.error(
                    "C0241",
                    format!("device \"{}\" is not an MQTT device", device.name),
                    n.span.clone(),
                    "`topic` needs an MQTT device",
                );
                return None;
            }
            let topic = values::text(n, "the command topic", self.diags)?.to_owned();
            if topic.contains(['+', '#']) {
                self.diags.error("C0218", "a command topic cannot contain wildcards", n.span.clone(), "name one topic");
                return None;
            }
            let on = on.map_or(Some("ON".to_owned()), |n| {
                values::word(n, "the on payload", self.diags)
                    .map(|s| if s == "true" && matches!(n.value, Value::Bool(_)) { "ON".to_owned() } else { s })
            });
            let off = off.map_or(Some("OFF".to_owned()), |n| {
                values::word(n, "the off payload", self.diags)
                    .map(|s| if s == "false" && matches!(n.value, Value::Bool(_)) { "OFF".to_owned() } else { s })
            });
            let value = payload.map_or(Some("{value}".to_owned()), |n| {
                values::text(n, "the payload template", self.diags).map(str::to_owned)
            });
            let retain = retain.map_or(Some(false), |n| {
                let r = values::boolean(n, "`retain`", self.diags);
                if r == Some(true) {
                    // A retained command outlives the controller: a device that
                    // reconnects while no controller runs takes the last one it finds.
                    self.diags.push(
                        Diagnostic::warning("C0284", "a retained command outlives the controller", n.span.clone())
                            .with_label("retained")
                            .with_note("a device that reconnects after a crash, with no controller running, takes the last command the broker kept (ON, say) and switches on; Spillway repeats its commands anyway, so leave `retain` out unless the device needs it"),
                    );
                }
                r
            });
            let qos = match qos {
                Some(q) => {
                    let level = self.qos(q)?;
                    if level == Qos::AtMostOnce {
                        // Commands are repeated while running, so a lost one is sent again;
                        // the safe state at shutdown is sent once.
                        self.diags.push(
                            Diagnostic::warning("C0283", "a command at QoS 0 may be lost on the way", q.span.clone())
                                .with_label("at most once")
                                .with_note("commands are repeated while Spillway runs, but the safe state it sends when it stops goes once: use QoS 1 (the default) for a relay or a setpoint"),
                        );
                    }
                    level
                }
                None => Qos::AtLeastOnce,
            };
            let value = value?;
            if kind == WriteKind::Value && !value.contains("{value}") {
                self.diags.error(
                    "C0242",
                    "the payload template has no `{value}`",
                    payload.map_or(span, |n| n.span.clone()),
                    "the setpoint goes where `{value}` is",
                );
                return None;
            }
            return Some(Write::Mqtt { device: device_id, topic, on: on?, off: off?, value, retain: retain?, qos });
        }
        if is_mqtt {
            let n = coil.or(register)?;
            self.diags.error(
                "C0241",
                format!("device \"{}\" is an MQTT device", device.name),
                n.span.clone(),
                "use `topic` for MQTT devices",
            );
            return None;
        }
        if let Some(n) = coil {
            if kind == WriteKind::Value {
                self.diags.error("C0243", "a setpoint cannot be written to a coil", n.span.clone(), "use `register`");
                return None;
            }
            let address = values::integer(n, 0, 65535, "the coil address", self.diags)? as u16;
            return Some(Write::Coil { device: device_id, address });
        }
        let n = register?;
        let address = values::integer(n, 0, 65535, "the register address", self.diags)? as u16;
        let value_type = match type_node {
            Some(t) => self.value_type(t)?,
            None => ValueType::U16,
        };
        let word_order = match order {
            Some(o) => match values::choice(o, &["high_first", "low_first"], "the word order", self.diags)? {
                "low_first" => WordOrder::LowFirst,
                _ => WordOrder::HighFirst,
            },
            None => WordOrder::HighFirst,
        };
        let scale = match scale {
            Some(s) => values::positive(s, Dimension::Scalar, "the scale", self.diags)?,
            None => 1.0,
        };
        Some(Write::Register { device: device_id, address, value_type, word_order, scale })
    }

    fn inverter(&mut self, node: &Node, devices: &[Device]) -> Option<InverterControl> {
        let mut m = MapReader::new(node, "the `inverter` section", self.diags)?;
        let rated = m
            .require("rated", self.diags)
            .and_then(|n| values::positive(n, Dimension::Power, "the inverter's rated power", self.diags));
        let limit_node = m.require("limit", self.diags);
        let unit =
            m.get("limit_unit").map_or(Some("%"), |n| values::choice(n, &["%", "W"], "the limit unit", self.diags));
        let safe_node = m.get("safe_limit");
        let safe = safe_node.map_or(Some(0.0), |n| values::quantity(n, Dimension::Power, "the safe limit", self.diags));
        let refresh = m.get("refresh").map_or(Some(Duration::from_secs(10)), |n| {
            values::duration_at_least(
                n,
                "the refresh period",
                Duration::from_secs(1),
                "the limit is re-written this often even when unchanged; more often only wears the inverter's memory",
                self.diags,
            )
        });
        m.finish(self.diags);
        let limit = match limit_node {
            Some(n) if matches!(&n.value, Value::Str(s) if s == "sunspec") => {
                let Some(i) = devices.iter().position(|d| d.sunspec) else {
                    self.diags.error(
                        "C0244",
                        "`limit: sunspec` needs a device with `sunspec: true`",
                        n.span.clone(),
                        "no SunSpec device",
                    );
                    return None;
                };
                if devices.iter().filter(|d| d.sunspec).count() > 1 {
                    self.diags.error(
                        "C0244",
                        "several SunSpec devices: say which one is the inverter",
                        n.span.clone(),
                        "write `limit: {device: NAME, sunspec: true}`",
                    );
                    return None;
                }
                Write::SunSpecLimit { device: DeviceId(i) }
            }
            Some(n) if matches!(&n.value, Value::Map(e) if e.iter().any(|(k, _)| k.name == "sunspec")) => {
                let mut lm = MapReader::new(n, "the inverter limit", self.diags)?;
                let dev = lm.require("device", self.diags).and_then(|d| self.device_ref(d, devices));
                let marked =
                    lm.get("sunspec").and_then(|s| values::boolean(s, "`sunspec`", self.diags).map(|b| (b, s)));
                lm.finish(self.diags);
                if let Some((false, s)) = marked {
                    self.diags.error(
                        "C0244",
                        "`sunspec: false` in the limit: a register limit names its register instead",
                        s.span.clone(),
                        "write `limit: {device: NAME, register: N}`, or `sunspec: true`",
                    );
                    return None;
                }
                let (id, d) = dev?;
                if !d.sunspec {
                    self.diags.error(
                        "C0244",
                        format!("device \"{}\" is not marked `sunspec: true`", d.name),
                        n.span.clone(),
                        "",
                    );
                    return None;
                }
                Write::SunSpecLimit { device: id }
            }
            Some(n) => self.write(n, devices, WriteKind::Value)?,
            None => return None,
        };
        let (rated, safe) = (rated?, safe?);
        if safe < 0.0 || safe > rated {
            self.diags.error(
                "C0245",
                "the safe limit must lie between 0 W and the rated power",
                safe_node.map(|n| n.span.clone()).unwrap_or_default(),
                "out of range",
            );
            return None;
        }
        Some(InverterControl {
            rated: Power(rated),
            limit,
            limit_unit: if unit? == "W" { LimitUnit::Watts } else { LimitUnit::Percent },
            safe_limit: Power(safe),
            refresh: refresh?,
        })
    }

    fn obligations(&mut self, node: &Node, ctx: &DutyCtx<'_>, what: &str) -> Option<Vec<Obligation>> {
        let Value::Seq(items) = &node.value else {
            self.diags.error("C0246", "`obligations` is a list", node.span.clone(), "expected `- run: 6h` style items");
            return None;
        };
        let mut out = Vec::new();
        let mut ok = true;
        for item in items {
            match self.obligation(item, ctx, what) {
                Some(o) => out.push(o),
                None => ok = false,
            }
        }
        ok.then_some(out)
    }

    fn obligation(&mut self, node: &Node, ctx: &DutyCtx<'_>, what: &str) -> Option<Obligation> {
        let DutyCtx { has_temperature, kind, volume } = *ctx;
        let mut m = MapReader::new(node, "an obligation", self.diags)?;
        let run = m.get("run");
        let reach = m.get("reach");
        let cycle = m.get("cycle");
        let by = m.get("by");
        let every = m.get("every");
        let hold = m.get("hold");
        let window_node = m.get("grid_window");
        let span = m.span();
        m.finish(self.diags);
        let grid_window = match window_node {
            Some(n) => Some(values::window(n, "the grid window", self.diags)?),
            None => None,
        };
        let kinds = [run, reach, cycle].iter().filter(|k| k.is_some()).count();
        if kinds != 1 {
            self.diags.error(
                "C0247",
                "an obligation is exactly one of `run`, `reach` or `cycle`",
                span,
                "e.g. `run: 6h`, `reach: 60°C` or `cycle: 60°C`",
            );
            return None;
        }
        let needs_temp = |this: &mut Self, n: &Node| {
            if !has_temperature {
                this.diags.error(
                    "C0248",
                    format!("{what} has a temperature obligation but no `temperature` point"),
                    n.span.clone(),
                    "add `temperature: <point>` to the load",
                );
            }
        };
        if let Some(n) = run {
            let d = values::duration(n, "the daily run time", self.diags)?;
            if d > Duration::from_secs(86_400) || d.is_zero() {
                self.diags.error(
                    "C0249",
                    "the daily run time must be between 0 and 24 h",
                    n.span.clone(),
                    "out of range",
                );
                return None;
            }
            if let Some(w) = grid_window {
                let len = window_len(&w);
                if d > len {
                    self.diags.push(
                        Diagnostic::warning(
                            "C0250",
                            format!(
                                "{what}: {} cannot be made up inside a {} grid window",
                                units::format_duration(d),
                                units::format_duration(len)
                            ),
                            n.span.clone(),
                        )
                        .with_label("longer than the window")
                        .with_note("on a day without sun the obligation will be missed"),
                    );
                }
            }
            return Some(Obligation::RunDaily { duration: d, grid_window });
        }
        if let Some(n) = reach {
            // `reach: 80%` is a state of charge, anything else a temperature; a bare
            // number on a load that has a state of charge and no temperature is taken
            // for a state of charge missing its `%` (so the error says so).
            let is_soc = match &n.value {
                Value::Str(t) => units::parse_quantity(t).is_ok_and(|q| q.dimension == Dimension::Ratio),
                Value::Int(_) | Value::Float(_) => !has_temperature && kind.is_some_and(|k| k.soc_point().is_some()),
                _ => false,
            };
            let target = if is_soc {
                self.soc_target(n, kind, what)
            } else {
                needs_temp(self, n);
                values::quantity(n, Dimension::Temperature, "the target temperature", self.diags)
            };
            let Some(by_node) = by else {
                self.diags.error(
                    "C0251",
                    "a `reach` obligation needs `by` (a time of day)",
                    span,
                    "add `by: \"17:00\"`",
                );
                return None;
            };
            let by = values::time_of_day(by_node, "`by`", self.diags)?;
            // The top-up runs only in the part of the window before the deadline (the day
            // is judged there); a window wholly after it never runs.
            let deadline = chrono::Timelike::num_seconds_from_midnight(&by);
            if let (Some(w), Some(wn)) = (grid_window, window_node)
                && !(0..deadline).step_by(60).any(|sod| w.contains(sod))
            {
                self.diags.push(
                    Diagnostic::warning(
                        "C0282",
                        format!(
                            "{what}: the grid window {}..{} has no time before the deadline {}",
                            w.start.format("%H:%M"),
                            w.end.format("%H:%M"),
                            by.format("%H:%M")
                        ),
                        wn.span.clone(),
                    )
                    .with_label("never used")
                    .with_note("a top-up runs from local midnight up to `by`: put the window before it"),
                );
            }
            let target = target?;
            return Some(if is_soc {
                // Time per percentage point at the load's full power, where its capacity
                // is known.
                let pace = kind
                    .and_then(|k| Some((k.capacity()?, k.max_power())))
                    .and_then(|(c, p)| (p.0 > 0.0).then(|| Duration::from_secs_f64(c.0 / 100.0 / p.0 * 3600.0)));
                Obligation::ChargeBy { soc: Ratio(target), by, grid_window, pace }
            } else {
                // Time per kelvin at the load's full power: m·c / P, c of water 4.186
                // kJ/(kg·K) (CRC Handbook of Chemistry and Physics, near 15 °C; from
                // memory), a litre taken as a kilogram.
                let pace = volume.zip(kind.map(LoadKind::max_power)).and_then(|(litres, p)| {
                    (p.0 > 0.0).then(|| Duration::from_secs_f64(litres * WATER_J_PER_KG_K / p.0))
                });
                Obligation::ReachBy { target: Temperature(target), by, grid_window, pace }
            });
        }
        let n = cycle?;
        needs_temp(self, n);
        let target = values::quantity(n, Dimension::Temperature, "the cycle temperature", self.diags)?;
        let every = match every {
            Some(e) => values::duration(e, "`every`", self.diags)?,
            None => Duration::from_secs(7 * 86_400),
        };
        let hold = match hold {
            Some(h) => values::duration(h, "`hold`", self.diags)?,
            None => Duration::ZERO,
        };
        if every < Duration::from_secs(3600) {
            self.diags.error("C0252", "a cycle repeats at most hourly", span, "`every` is too short");
            return None;
        }
        // The hold is counted inside the window: a longer one can only come from surplus.
        if let Some(w) = grid_window
            && hold > window_len(&w)
        {
            self.diags.push(
                Diagnostic::warning(
                    "C0250",
                    format!(
                        "{what}: a hold of {} cannot fit inside a {} grid window",
                        units::format_duration(hold),
                        units::format_duration(window_len(&w))
                    ),
                    span.clone(),
                )
                .with_label("longer than the window")
                .with_note("on a day without sun the cycle will not be completed"),
            );
        }
        Some(Obligation::Cycle { target: Temperature(target), hold, every, grid_window })
    }

    /// The target of a `reach: N%` obligation: a state of charge the load can read
    /// (a battery's `soc`, a charger's `soc`) and, for a battery, one its own limit
    /// lets it reach.
    fn soc_target(&mut self, n: &Node, kind: Option<&LoadKind>, what: &str) -> Option<f64> {
        let target = values::quantity(n, Dimension::Ratio, "the target state of charge", self.diags)?;
        if !(0.0..=100.0).contains(&target) || target == 0.0 {
            self.diags.error(
                "C0277",
                "a state of charge to reach lies above 0 and at most 100 %",
                n.span.clone(),
                "out of range",
            );
            return None;
        }
        match kind {
            // The kind had an error of its own, already reported.
            None => None,
            Some(LoadKind::Battery { soc_max, .. }) if target > soc_max.0 => {
                self.diags.push(
                    Diagnostic::error(
                        "C0278",
                        format!(
                            "{what}: the obligation asks for {} %, above the battery's `soc_max` of {soc_max}",
                            units::trim_number(target)
                        ),
                        n.span.clone(),
                    )
                    .with_label("can never be met")
                    .with_note("charging stops at `soc_max`: lower the target or raise `soc_max`"),
                );
                None
            }
            Some(k) if k.soc_point().is_some() => Some(target),
            Some(k) => {
                let note = match k {
                    LoadKind::Charger { .. } => {
                        "add `soc: <point>` to the charger: the car's state of charge, as the charger or the car reports it"
                    }
                    _ => {
                        "a state-of-charge target suits a `battery` or a `charger` with a `soc` point; a heater's is a temperature (`reach: 60°C`)"
                    }
                };
                self.diags.push(
                    Diagnostic::error(
                        "C0279",
                        format!("{what} has a state-of-charge obligation but no state-of-charge point"),
                        n.span.clone(),
                    )
                    .with_label("nothing to read it on")
                    .with_note(note),
                );
                None
            }
        }
    }

    fn site_checks(&mut self, site: &Site, spans: &HeaderSpans, inverter_node: Option<&Node>) {
        let inverter_written = inverter_node.is_some();
        let site_span = spans.site.clone();
        match &site.connection {
            Connection::Grid { export, backup } => {
                if export.limit().is_some() && site.roles.grid.is_none() && !self.is_broken("grid") {
                    self.diags.push(
                        Diagnostic::error(
                            "C0253",
                            "limiting export needs a grid meter",
                            spans.export.clone().unwrap_or(site_span.clone()),
                        )
                        .with_label("export is limited here")
                        .with_note("define a point called `grid` (import positive) under `points:`"),
                    );
                }
                if matches!(export, ExportPolicy::Forbidden | ExportPolicy::Limited(_))
                    && !inverter_written
                    && !site.loads.is_empty()
                {
                    self.diags.push(
                        Diagnostic::warning("C0254", "export is limited but the inverter cannot be curtailed", spans.export.clone().unwrap_or(site_span.clone()))
                            .with_label("only the loads can hold the limit")
                            .with_note("add an `inverter:` section with a power-limit actuator, or the limit will be broken whenever the loads are full; if the inverter limits its own export instead, read what it could give as the point `pv_available`, or the loads will never see the surplus it holds back"),
                    );
                }
                // A battery that is read but not commanded runs its own control: it holds
                // the meter at zero, the guard holds it at the import target, and the two
                // fight (simulated: a zero-export house's battery drained by its own
                // import target and never charged from the PV the guard held back).
                if matches!(export, ExportPolicy::Forbidden | ExportPolicy::Limited(_))
                    && inverter_written
                    && site.self_run_battery().is_some()
                {
                    self.diags.push(
                        Diagnostic::warning(
                            "C0272",
                            "a battery on its own control and the export guard will fight",
                            spans.export.clone().unwrap_or(site_span.clone()),
                        )
                        .with_label("export is limited here, and a `battery_power` point names a battery no load commands")
                        .with_note("a self-consumption battery holds the meter at zero while the guard holds it at `import_target`: the battery pays the target while the PV is curtailed and cannot charge from PV the guard holds back. On a limited site, let Spillway command the battery as a load (`kind: battery`), or, with a hybrid inverter that limits export itself and charges its battery first, leave export limiting to it (no `inverter:` section; read `pv_available`)"),
                    );
                }
                // Grid codes bound how long export may outlast a fault: ENA EREC G100
                // Issue 1 (Great Britain) allows 5 s for a lost meter or an export
                // excursion. Slower settings may be right elsewhere: a warning, not an error.
                if export.limit().is_some() {
                    const G100: Duration = Duration::from_secs(5);
                    let lost = site.roles.grid.map(|p| site.points[p.0].stale_after + site.tick);
                    let slow: Vec<String> = [
                        lost.filter(|d| *d > G100).map(|d| {
                            format!(
                                "a lost grid meter is noticed after {} (its stale_after + one tick)",
                                units::format_duration(d)
                            )
                        }),
                        (site.guard.deadline > G100).then(|| {
                            format!(
                                "export is escalated to the safe limit after {} (guard.deadline)",
                                units::format_duration(site.guard.deadline)
                            )
                        }),
                    ]
                    .into_iter()
                    .flatten()
                    .collect();
                    if !slow.is_empty() {
                        let mut d = Diagnostic::warning(
                            "C0263",
                            "slower than 5 s to act on a fault of a limited-export site",
                            spans.export.clone().unwrap_or(site_span.clone()),
                        )
                        .with_label("export is limited here");
                        for s in slow {
                            d = d.with_note(s);
                        }
                        self.diags.push(d.with_note("ENA EREC G100 (GB) allows 5 s; check what your grid code asks"));
                    }
                }
                // The safe limit is what the inverter holds while the meter is lost: above
                // the export limit, a silent meter means export past it.
                if let (Some(limit), Some(inv)) = (export.limit(), &site.inverter)
                    && inv.safe_limit.0 > limit.0.max(0.0)
                {
                    let span = inverter_node
                        .and_then(|n| match &n.value {
                            Value::Map(entries) => {
                                entries.iter().find(|(k, _)| k.name == "safe_limit").map(|(_, v)| v.span.clone())
                            }
                            _ => None,
                        })
                        .unwrap_or(site_span.clone());
                    self.diags.push(
                        Diagnostic::warning("C0262", "the safe limit is above the export limit", span)
                            .with_label(format!("{} while the meter is lost", inv.safe_limit))
                            .with_note(format!(
                                "with the meter silent the site may export up to {} less the house load; grid codes usually want the inverter at the export limit or below then ({})",
                                inv.safe_limit, limit
                            )),
                    );
                }
                if backup.is_some() && site.roles.grid_available.is_none() && !self.is_broken("grid_available") {
                    self.diags.push(
                        Diagnostic::error("C0255", "a backup site needs a `grid_available` point", site_span.clone())
                            .with_label("grid: backup")
                            .with_note("define a boolean point `grid_available` (1 while the grid is up)"),
                    );
                }
                if let (Some(limit), Some(span)) = (export.limit(), spans.import_target.clone())
                    && site.import_target.0 < -limit.0
                {
                    self.diags.error(
                        "C0256",
                        "the import target lies beyond the export limit",
                        span,
                        "a negative target exports; keep it above −limit",
                    );
                }
                // A no-export site held at (almost) zero import reads the meter's noise
                // as export many times an hour: in simulation, a zero-export house with
                // `import_target: 0W` counted 1,113 export episodes in a clear day,
                // 94 with 50 W.
                if let (Some(limit), Some(span)) = (export.limit(), spans.import_target.clone())
                    && limit.0 == 0.0
                    && (0.0..30.0).contains(&site.import_target.0)
                {
                    self.diags.push(
                        Diagnostic::warning(
                            "C0286",
                            format!(
                                "export is forbidden and the import target is only {}: the meter's noise around it will read as export",
                                site.import_target
                            ),
                            span,
                        )
                        .with_label("close to zero")
                        .with_note("hold a few tens of watts of import on a no-export site (`common practice`; the default is 50 W): `import_target: 50W`"),
                    );
                }
            }
            Connection::OffGrid(_) => {
                let missing_voltage = site.roles.battery_voltage.is_none() && !self.is_broken("battery_voltage");
                let missing_flow = site.roles.battery_current.is_none()
                    && site.roles.battery_power.is_none()
                    && !self.is_broken("battery_current")
                    && !self.is_broken("battery_power");
                if missing_voltage || missing_flow {
                    self.diags.push(
                        Diagnostic::error("C0257", "an off-grid site needs battery signals", site_span.clone())
                            .with_label("grid: off")
                            .with_note("define points `battery_voltage` and `battery_current` (or `battery_power`), charging positive; `battery_soc` is used when present"),
                    );
                }
                // Covering the house is measured at the grid meter, which an island lacks.
                for l in &site.loads {
                    if matches!(l.kind, LoadKind::Battery { discharge: Some(_), .. }) {
                        self.diags.push(
                            Diagnostic::warning(
                                "C0275",
                                format!("load \"{}\": `discharge` does nothing off-grid", l.name),
                                site_span.clone(),
                            )
                            .with_label("grid: off")
                            .with_note("off-grid, the battery forms the island and covers the house by itself; remove `discharge`"),
                        );
                    }
                }
            }
        }
    }
}

/// The keys each kind of load reads (in `Builder::load_kind`), beside the keys every
/// load has. A load whose kind fails to read, or whose `kind` is unknown, accepts them
/// without calling them unknown: its own error says what is wrong.
const KIND_KEYS: &[(&str, &[&str])] = &[
    ("switched", &["rated", "switch"]),
    ("stepped", &["stages", "switch", "stage_register"]),
    ("proportional", &["rated", "setpoint", "min", "step", "enable"]),
    (
        "charger",
        &[
            "voltage",
            "phases",
            "min_current",
            "max_current",
            "step",
            "setpoint",
            "enable",
            "below_min",
            "soc",
            "car_capacity",
        ],
    ),
    ("battery", &["max_charge", "min_charge", "soc", "capacity", "soc_max", "soc_resume", "setpoint", "discharge"]),
];

/// The keys of one kind of load (none for a word that is no kind).
fn kind_keys(kind: &str) -> &'static [&'static str] {
    KIND_KEYS.iter().find(|(k, _)| *k == kind).map_or(&[], |(_, keys)| keys)
}

#[derive(Clone, Copy, PartialEq, Eq)]
enum WriteKind {
    Switch,
    Value,
}

struct LoadCtx<'a> {
    devices: &'a [Device],
    points: &'a [Point],
    roles: &'a Roles,
    scope: &'a SiteScope,
}

struct Header {
    name: String,
    timezone: Tz,
    connection: Connection,
    import_target: Power,
    guard: GuardSettings,
    failsafe: FailsafeSettings,
    tick: Duration,
    spans: HeaderSpans,
}

struct HeaderSpans {
    site: Range<usize>,
    export: Option<Range<usize>>,
    import_target: Option<Range<usize>>,
    /// The first of `guard.kp` and `guard.ki` written in the file.
    gains: Option<Range<usize>>,
}

/// The largest error, as a share of a step of export, between 60 and 120 ticks after
/// the step, of the velocity-form PI (`u += kp·Δe + k·e`, as the engine's modulation
/// loop) acting on a reading `late` ticks behind its commands. Clamps and load limits
/// are left out: they keep a real site from running away, not from hunting.
fn loop_residual(kp: f64, k: f64, late: usize) -> f64 {
    let mut u = vec![0.0; late];
    let mut last_error = None;
    let mut worst: f64 = 0.0;
    for tick in 0..120 {
        // The export seen: the step of 1, less what the loads took `late` ticks ago.
        let error = 1.0 - u[u.len() - late];
        let change = last_error.map_or(0.0, |l| error - l);
        let next = u[u.len() - 1] + kp * change + k * error;
        u.push(next);
        last_error = Some(error);
        if tick >= 60 {
            worst = worst.max(error.abs());
        }
        if !worst.is_finite() || worst > 1e6 {
            return f64::INFINITY;
        }
    }
    worst
}

fn window_len(w: &Window) -> Duration {
    let s = w.start.signed_duration_since(chrono::NaiveTime::MIN).num_seconds();
    let e = w.end.signed_duration_since(chrono::NaiveTime::MIN).num_seconds();
    let len = if s < e { e - s } else { 86_400 - s + e };
    Duration::from_secs(len as u64)
}

fn split_host_port(text: &str, default_port: u16) -> Option<(String, u16)> {
    let text = text.trim();
    if text.is_empty() {
        return None;
    }
    if let Some(rest) = text.strip_prefix('[') {
        // [::1]:502
        let (host, after) = rest.split_once(']')?;
        let port = match after.strip_prefix(':') {
            Some(p) => p.parse().ok()?,
            None if after.is_empty() => default_port,
            None => return None,
        };
        return Some((host.to_owned(), port));
    }
    match text.rsplit_once(':') {
        Some((host, port)) if !host.contains(':') => Some((host.to_owned(), port.parse().ok()?)),
        Some(_) => Some((text.to_owned(), default_port)), // bare IPv6
        None => Some((text.to_owned(), default_port)),
    }
}

/// The unit of common SunSpec points, so `sunspec: 203.W` needs no `unit`.
fn sunspec_default_unit(text: &str) -> Option<Dimension> {
    let point = text.split_once('.')?.1;
    match point {
        "W" | "WphA" | "WphB" | "WphC" | "VA" | "VAR" | "WMax" => Some(Dimension::Power),
        "PhV" | "PhVphA" | "PhVphB" | "PhVphC" | "PPV" | "DCV" => Some(Dimension::Voltage),
        "A" | "AphA" | "AphB" | "AphC" | "DCA" => Some(Dimension::Current),
        "TotWhImp" | "TotWhExp" | "WH" => Some(Dimension::Energy),
        "TmpCab" | "TmpSnk" | "TmpTrns" | "TmpOt" => Some(Dimension::Temperature),
        _ => None,
    }
}

/// Lays out the value table: points, then site signals, then each load's attributes.
fn layout(points: usize, loads: usize) -> SlotLayout {
    let mut next = points as u32;
    let mut take = || {
        let s = Slot(next);
        next += 1;
        s
    };
    let site = SiteSlots {
        surplus: take(),
        site_surplus: take(),
        import: take(),
        export: take(),
        import_today: take(),
        export_today: take(),
        import_month: take(),
        export_month: take(),
        diverted_today: take(),
        curtailed: take(),
    };
    let loads = (0..loads)
        .map(|_| LoadSlots {
            on: take(),
            power: take(),
            runtime_today: take(),
            energy_today: take(),
            since_change: take(),
        })
        .collect();
    SlotLayout { len: next as usize, site, loads }
}

/// The scope of a checked site: what its rules (and its owner's expectations) may name.
pub fn site_scope(site: &Site) -> SiteScope {
    let names: Vec<String> = site.loads.iter().map(|l| l.name.clone()).collect();
    scope(&site.points, &names, &site.slots)
}

fn scope(points: &[Point], load_names: &[String], slots: &SlotLayout) -> SiteScope {
    let mut names = HashMap::new();
    for (i, p) in points.iter().enumerate() {
        let ty = if p.boolean { Type::Bool } else { Type::Number(p.dimension) };
        names.insert(p.name.clone(), (Slot(i as u32), ty));
    }
    let site = [
        slots.site.surplus,
        slots.site.site_surplus,
        slots.site.import,
        slots.site.export,
        slots.site.import_today,
        slots.site.export_today,
        slots.site.import_month,
        slots.site.export_month,
        slots.site.diverted_today,
        slots.site.curtailed,
    ];
    for ((name, dim, _), slot) in SITE_SIGNALS.iter().zip(site) {
        let ty = if *name == "curtailed" { Type::Bool } else { Type::Number(*dim) };
        names.insert((*name).to_owned(), (slot, ty));
    }
    for (name, ls) in load_names.iter().zip(&slots.loads) {
        let attr_slots = [ls.on, ls.power, ls.runtime_today, ls.energy_today, ls.since_change];
        for ((attr, dim, _), slot) in LOAD_ATTRIBUTES.iter().zip(attr_slots) {
            let ty = dim.map_or(Type::Bool, Type::Number);
            names.insert(format!("{name}.{attr}"), (slot, ty));
        }
    }
    SiteScope { names }
}

/// Start and stop rules for a load that has none: start when the surplus at its
/// priority covers it with a margin for 30 s, stop when it has imported a good part
/// of its power for 30 s. Modulating loads without rules are always enabled.
fn default_rules(kind: &LoadKind) -> (Option<String>, Option<String>) {
    let rule = |op: &str, p: Power, hold: &str| Some(format!("surplus {op} {}W for {hold}", p.0.round() as i64));
    let pair = |on: Power, hold: &str| {
        (rule(">=", on + Power(100.0), hold), rule("<", (on - Power(250.0)).max(on * 0.5), hold))
    };
    match kind {
        LoadKind::Switched { rated, .. } => pair(*rated, "30s"),
        LoadKind::Stepped { stages, .. } => pair(stages.first().copied().unwrap_or_default(), "30s"),
        LoadKind::Charger { watts_per_amp, min, .. } => {
            let min_power = Power(min.0 * watts_per_amp);
            (rule(">=", min_power, "1min"), rule("<", min_power * 0.75, "2min"))
        }
        LoadKind::Proportional { .. } | LoadKind::Battery { .. } => (None, None),
    }
}
