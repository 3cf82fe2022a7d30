//! A site's own expectations, written by its owner or installer in the site file and
//! checked by `spillway test` against named simulated days — an installer can keep them
//! in their own CI.
//!
//! ```yaml
//! expect:
//!   days:
//!     - { name: clear-june, weather: clear, date: 2026-06-21, seed: 1 }
//!     - { name: grey-march, weather: overcast, date: 2026-03-10 }
//!   checks:
//!     - name: no export
//!       always: export <= 10W         # a rule that must hold at every tick …
//!       grace: 5s                     # … except for at most this long in a row
//!     - name: hot by five
//!       at: "17:00"                   # a rule checked once a day at a local time
//!       check: tank_temp >= 60°C
//!       days: [clear-june]            # only on these days (default: all)
//!     - name: calm pump
//!       switchings: pool_pump         # at most N switchings in any rolling window
//!       at_most: 4
//!       per: 1h
//!     - name: duties done
//!       obligations_met: true         # every obligation of every load met that day
//!     - name: little export
//!       export_over_limit: 2min       # at most this long above the export limit
//!     - name: hot showers
//!       lukewarm_at_most: 20L         # at most this much hot water colder than asked for
//! ```

use std::collections::VecDeque;
use std::fmt::Write as _;
use std::sync::Arc;
use std::time::Duration;

use chrono::NaiveDate;
use serde::Serialize;
use spillway_sim::weather::WeatherKind;

use super::OfflineError;
use super::run::{Controller, RunOptions, simulate_once};
use crate::config::Loaded;
use crate::config::model::{LoadId, Site};
use crate::config::values;
use crate::config::yaml::{Diagnostics, MapReader, Node, Value};
use crate::diag::Diagnostic;
use crate::engine::Engine;
use crate::rules::{self, Rule, RuleState, Truth};
use crate::units::Timestamp;

/// A named simulated day.
#[derive(Debug, Clone, PartialEq)]
pub struct TestDay {
    /// Its name.
    pub name: String,
    /// The local date.
    pub date: NaiveDate,
    /// The sky (`None`: the plant's).
    pub sky: Option<WeatherKind>,
    /// Seed.
    pub seed: u64,
}

/// What a check asks.
#[derive(Debug, Clone)]
pub enum CheckKind {
    /// A rule true at every tick, but for `grace` in a row.
    Always {
        /// The rule.
        rule: Rule,
        /// Longest run of ticks it may be false.
        grace: Duration,
    },
    /// A rule true at a local time each day.
    At {
        /// Seconds after local midnight.
        seconds_of_day: u32,
        /// The rule.
        rule: Rule,
    },
    /// A load switches at most `at_most` times in any window of `per`.
    Switchings {
        /// The load.
        load: LoadId,
        /// Most switchings allowed.
        at_most: u32,
        /// The window.
        per: Duration,
    },
    /// Every obligation met.
    ObligationsMet,
    /// At most this long with export above the limit plus tolerance.
    ExportOverLimit(Duration),
    /// At most this many litres of hot water colder than their draw asked for.
    LukewarmAtMost(f64),
}

/// One check.
#[derive(Debug, Clone)]
pub struct Check {
    /// Its name.
    pub name: String,
    /// What it asks.
    pub kind: CheckKind,
    /// The days it applies to (empty: all).
    pub days: Vec<String>,
}

/// The `expect:` section.
#[derive(Debug, Clone, Default)]
pub struct Expectations {
    /// Named days.
    pub days: Vec<TestDay>,
    /// Checks.
    pub checks: Vec<Check>,
    /// What reads but cannot work as written (a check time a test day lacks).
    pub warnings: Vec<Diagnostic>,
}

/// Reads the `expect:` section (absent → empty). Errors are located diagnostics.
pub fn read(loaded: &Loaded) -> Result<Expectations, Vec<Diagnostic>> {
    let mut out = Expectations::default();
    let Value::Map(top) = &loaded.tree.value else { return Ok(out) };
    let Some((_, node)) = top.iter().find(|(k, _)| k.name == "expect") else { return Ok(out) };
    let mut d = Diagnostics::default();
    let text = &loaded.source.text;
    if let Some(mut m) = MapReader::new(node, "the `expect` section", &mut d) {
        let days = m.get("days");
        let checks = m.get("checks");
        m.finish(&mut d);
        // A mapping or a word where a list belongs would otherwise be skipped in silence.
        for (node, what, example) in [
            (days, "`expect.days`", "- { name: clear-june, weather: clear, date: 2026-06-21 }"),
            (checks, "`expect.checks`", "- { name: no export, always: export <= 200W }"),
        ] {
            if let Some(n) = node
                && !matches!(n.value, Value::Seq(_))
            {
                d.error("C0608", format!("{what} is a list"), n.span.clone(), format!("one item per line: {example}"));
            }
        }
        // Every day that has a name, read or not: a check naming a day whose own error is
        // already reported is no news ("no test day called" would mislead).
        let mut day_names: Vec<String> = Vec::new();
        if let Some(Value::Seq(items)) = days.map(|n| &n.value) {
            for item in items {
                let (name, day) = read_day(item, &mut d);
                let Some(name) = name else { continue };
                if unique(day_names.iter(), &name, "test days", item, &mut d) {
                    day_names.push(name);
                    out.days.extend(day);
                }
            }
        }
        if let Some(Value::Seq(items)) = checks.map(|n| &n.value) {
            for item in items {
                if let Some(c) = read_check(item, &loaded.site, text, &day_names, &mut d)
                    && unique(out.checks.iter().map(|o| &o.name), &c.name, "checks", item, &mut d)
                {
                    out.warnings.extend(missing_moments(&c, &out.days, loaded.site.timezone, item));
                    out.checks.push(c);
                }
            }
        }
    }
    if d.has_errors() { Err(d.list) } else { Ok(out) }
}

/// An `at:` check on a test day whose clocks skip its time (the spring change) can
/// never be checked there, and fails as never checked: said at load time, per day.
fn missing_moments(c: &Check, days: &[TestDay], tz: chrono_tz::Tz, item: &Node) -> Vec<Diagnostic> {
    use chrono::TimeZone;
    let CheckKind::At { seconds_of_day, .. } = &c.kind else { return Vec::new() };
    let Some(time) = chrono::NaiveTime::from_num_seconds_from_midnight_opt(*seconds_of_day, 0) else {
        return Vec::new();
    };
    days.iter()
        .filter(|day| c.days.is_empty() || c.days.contains(&day.name))
        .filter(|day| matches!(tz.from_local_datetime(&day.date.and_time(time)), chrono::LocalResult::None))
        .map(|day| {
            Diagnostic::warning(
                "C0611",
                format!(
                    "check \"{}\" at {} never comes on test day \"{}\" ({}): the clocks go forward over it in {}",
                    c.name,
                    time.format("%H:%M"),
                    day.name,
                    day.date,
                    tz.name()
                ),
                item.span.clone(),
            )
            .with_label("a time that day does not have")
            .with_note("it would fail as never checked: pick a time outside the change, or another day")
        })
        .collect()
}

/// Whether `name` is new among `taken`; reports the second of two items of one name.
fn unique<'a>(
    mut taken: impl Iterator<Item = &'a String>,
    name: &str,
    what: &str,
    item: &Node,
    d: &mut Diagnostics,
) -> bool {
    if taken.any(|t| t == name) {
        d.error("C0609", format!("two {what} are called \"{name}\""), item.span.clone(), "give each its own name");
        return false;
    }
    true
}

/// A test day's name (when it has one) and the day (when all of it reads): a day with a
/// bad value is still named, so what refers to it does not report it missing.
fn read_day(node: &Node, d: &mut Diagnostics) -> (Option<String>, Option<TestDay>) {
    let Some(mut m) = MapReader::new(node, "a test day", d) else { return (None, None) };
    let name = m.require("name", d).and_then(|n| values::text(n, "the day's name", d)).map(str::to_owned);
    let date = m.require("date", d).and_then(|n| {
        // An empty date, or a list, is reported like any value of the wrong shape: a day
        // without its date is not run, and must not vanish in silence.
        let t = values::word(n, "the day's date", d)?;
        match values::parse_date(&t) {
            Ok(date) => Some(date),
            Err(values::DateError::NotADate) => {
                d.error("C0601", "`date` must be YYYY-MM-DD", n.span.clone(), "e.g. 2026-06-21");
                None
            }
            Err(values::DateError::NoSuchDay(why)) => {
                d.error("C0601", format!("there is no date {}", t.trim()), n.span.clone(), why);
                None
            }
        }
    });
    let sky = match m.get("weather") {
        None => Some(None),
        Some(n) => values::choice(n, &["clear", "mixed", "overcast", "varied"], "the weather", d).map(|w| {
            Some(match w {
                "clear" => WeatherKind::Clear,
                "mixed" => WeatherKind::Mixed,
                "overcast" => WeatherKind::Overcast,
                _ => WeatherKind::Varied,
            })
        }),
    };
    let seed = m.get("seed").map_or(Some(1), |n| values::integer(n, 0, i64::MAX, "the seed", d).map(|s| s as u64));
    m.finish(d);
    let day = match (&name, date, sky, seed) {
        (Some(name), Some(date), Some(sky), Some(seed)) => Some(TestDay { name: name.clone(), date, sky, seed }),
        _ => None,
    };
    (name, day)
}

fn rule(node: &Node, site: &Site, text: &str, d: &mut Diagnostics) -> Option<Rule> {
    let src = values::word(node, "a rule", d)?;
    let map = crate::config::yaml::map_text(text, node, &src);
    let scope = crate::config::load::site_scope(site);
    match rules::compile(&src, &scope) {
        Ok(c) => Some(c.rule),
        Err(errors) => {
            for e in &errors {
                d.push(rules::to_diagnostic_mapped(e, &map));
            }
            None
        }
    }
}

/// A volume of water in litres (`20L`, `20 L`; a bare number only for 0), read like every
/// other quantity of the site file, so a bare `5` is refused as `rated: 1100` is.
fn litres(node: &Node, d: &mut Diagnostics) -> Option<f64> {
    let v = values::quantity(node, crate::units::Dimension::Volume, "`lukewarm_at_most`", d)?;
    if v < 0.0 || v.is_nan() {
        d.error(
            "C0610",
            "`lukewarm_at_most` cannot be negative",
            node.span.clone(),
            "e.g. `lukewarm_at_most: 20L` (0L: not a drop colder than asked for)",
        );
        return None;
    }
    Some(v)
}

/// `days` are the names of every test day, those with an error of their own included.
fn read_check(node: &Node, site: &Site, text: &str, days: &[String], d: &mut Diagnostics) -> Option<Check> {
    let mut m = MapReader::new(node, "a check", d)?;
    let name = m.require("name", d).and_then(|n| values::text(n, "the check's name", d)).map(str::to_owned);
    let always = m.get("always");
    let grace = m.get("grace");
    let at = m.get("at");
    let check = m.get("check");
    let switchings = m.get("switchings");
    let at_most = m.get("at_most");
    let per = m.get("per");
    let obligations = m.get("obligations_met");
    let export = m.get("export_over_limit");
    let lukewarm = m.get("lukewarm_at_most");
    let days_node = m.get("days");
    let span = m.span();
    m.finish(d);
    let kinds = [
        always.is_some(),
        at.is_some(),
        switchings.is_some(),
        obligations.is_some(),
        export.is_some(),
        lukewarm.is_some(),
    ];
    if kinds.iter().filter(|k| **k).count() != 1 {
        d.error(
            "C0602",
            "a check is exactly one of `always`, `at`, `switchings`, `obligations_met`, `export_over_limit` or `lukewarm_at_most`",
            span,
            "what does this check ask?",
        );
        return None;
    }
    // A key of another kind of check would be ignored: say so instead.
    let mut misplaced = false;
    for (key, node, belongs) in [
        ("grace", grace, always.is_some()),
        ("check", check, at.is_some()),
        ("at_most", at_most, switchings.is_some()),
        ("per", per, switchings.is_some()),
    ] {
        if let Some(n) = node
            && !belongs
        {
            let owner = match key {
                "grace" => "`always`",
                "check" => "`at`",
                _ => "`switchings`",
            };
            d.error(
                "C0607",
                format!("`{key}` belongs to an {owner} check"),
                n.span.clone(),
                "remove it, or make the check that kind",
            );
            misplaced = true;
        }
    }
    if misplaced {
        return None;
    }
    let kind = if let Some(n) = always {
        let grace = match grace {
            Some(g) => values::duration(g, "the grace", d)?,
            None => Duration::ZERO,
        };
        CheckKind::Always { rule: rule(n, site, text, d)?, grace }
    } else if let Some(n) = at {
        let t = values::time_of_day(n, "`at`", d)?;
        let Some(c) = check else {
            d.error("C0603", "an `at` check needs `check:` (the rule to hold then)", span, "add `check: …`");
            return None;
        };
        CheckKind::At { seconds_of_day: chrono::Timelike::num_seconds_from_midnight(&t), rule: rule(c, site, text, d)? }
    } else if let Some(n) = switchings {
        let load_name = values::text(n, "the load", d)?;
        let Some((id, _)) = site.load(load_name) else {
            d.error("C0604", format!("no load called \"{load_name}\""), n.span.clone(), "name a load of this site");
            return None;
        };
        let at_most = at_most.map_or(Some(4), |n| values::integer(n, 0, 100_000, "`at_most`", d).map(|v| v as u32))?;
        let per = per.map_or(Some(Duration::from_secs(3600)), |n| values::duration(n, "`per`", d))?;
        if per.is_zero() {
            let at = span.clone();
            d.error("C0607", "`per` of 0 s counts nothing, so the check could never fail", at, "e.g. `per: 1h`");
            return None;
        }
        CheckKind::Switchings { load: id, at_most, per }
    } else if let Some(n) = obligations {
        if !values::boolean(n, "`obligations_met`", d)? {
            d.error(
                "C0605",
                "`obligations_met: false` checks nothing",
                n.span.clone(),
                "write `true` or remove the check",
            );
            return None;
        }
        CheckKind::ObligationsMet
    } else if let Some(n) = lukewarm {
        CheckKind::LukewarmAtMost(litres(n, d)?)
    } else {
        CheckKind::ExportOverLimit(values::duration(export?, "`export_over_limit`", d)?)
    };
    let mut names = Vec::new();
    if let Some(n) = days_node {
        match &n.value {
            Value::Seq(items) if items.is_empty() => d.error(
                "C0606",
                "an empty `days` list",
                n.span.clone(),
                "remove `days` to run the check on every test day, or name the days",
            ),
            Value::Seq(items) => {
                for i in items {
                    let Some(t) = values::text(i, "a day's name", d) else { continue };
                    if !days.iter().any(|day| day == t) {
                        d.error(
                            "C0606",
                            format!("no test day called \"{t}\""),
                            i.span.clone(),
                            "name a day under `expect.days`",
                        );
                    }
                    names.push(t.to_owned());
                }
            }
            _ => d.error("C0606", "`days` is a list of day names", n.span.clone(), "e.g. [clear-june]"),
        }
    }
    Some(Check { name: name?, kind, days: names })
}

/// One check's verdict on one day.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Verdict {
    /// The day.
    pub day: String,
    /// The check.
    pub check: String,
    /// Whether it held.
    pub passed: bool,
    /// When it first failed (local time), if it did.
    pub at: Option<String>,
    /// What the rule saw and why the engine held the loads where they were.
    pub detail: String,
}

struct Watch {
    state: Option<RuleState>,
    false_since: Option<Timestamp>,
    failed: Option<(Timestamp, String)>,
    done_today: bool,
    /// An `always` rule was true or false at least once (not unknown all day).
    known: bool,
    recent: VecDeque<Timestamp>,
}

fn reasons(engine: &Engine, site: &Site) -> String {
    let mut s = String::new();
    for i in 0..site.loads.len() {
        let _ = write!(s, "{}{}: {}", if i > 0 { "; " } else { "" }, site.loads[i].name, engine.explain(LoadId(i)));
    }
    let d = engine.decisions();
    if let Some(l) = d.inverter_limit {
        let _ = write!(s, "; inverter limited to {l} ({})", d.limit_reason);
    }
    s
}

/// Runs every test day and checks every applicable check.
pub fn run(
    site: &Arc<Site>,
    loaded: &Loaded,
    plant: &super::PlantSection,
    exp: &Expectations,
    step: Duration,
) -> Result<Vec<Verdict>, OfflineError> {
    let mut verdicts = Vec::new();
    for day in &exp.days {
        let checks: Vec<&Check> =
            exp.checks.iter().filter(|c| c.days.is_empty() || c.days.contains(&day.name)).collect();
        let mut watches: Vec<Watch> = checks
            .iter()
            .map(|c| Watch {
                state: match &c.kind {
                    CheckKind::Always { rule, .. } | CheckKind::At { rule, .. } => Some(rule.new_state()),
                    _ => None,
                },
                false_since: None,
                failed: None,
                done_today: false,
                known: false,
                recent: VecDeque::new(),
            })
            .collect();
        let tz = site.timezone;
        let local = |t: Timestamp| t.to_utc().with_timezone(&tz).format("%H:%M:%S").to_string();
        let mut observer = |engine: &Engine, _plant: &spillway_sim::plant::Plant| {
            let input = engine.eval_input();
            for (c, w) in checks.iter().zip(watches.iter_mut()) {
                if w.failed.is_some() {
                    continue;
                }
                match &c.kind {
                    CheckKind::Always { rule, grace } => {
                        let Some(state) = w.state.as_mut() else { continue };
                        match rule.eval(&input, state) {
                            Truth::True => {
                                w.known = true;
                                w.false_since = None;
                            }
                            Truth::False => {
                                w.known = true;
                                let since = *w.false_since.get_or_insert(input.now);
                                if input.now.since(since) >= *grace {
                                    let why = format!("{} — {}", rule.explain(&input, state), reasons(engine, site));
                                    w.failed = Some((since, why));
                                }
                            }
                            // Not yet known (a window still filling, a stale point): it
                            // neither holds nor breaks the rule. A rule never known all
                            // day fails at the end.
                            Truth::Unknown => {}
                        }
                    }
                    CheckKind::At { seconds_of_day, rule } => {
                        let Some(state) = w.state.as_mut() else { continue };
                        let truth = rule.eval(&input, state);
                        if !w.done_today && input.local.seconds_of_day >= *seconds_of_day {
                            w.done_today = true;
                            if !truth.is_true() {
                                let why = format!("{} — {}", rule.explain(&input, state), reasons(engine, site));
                                w.failed = Some((input.now, why));
                            }
                        }
                    }
                    CheckKind::Switchings { load, at_most, per } => {
                        for s in &engine.decisions().switchings {
                            if s.load != *load {
                                continue;
                            }
                            w.recent.push_back(input.now);
                            while w.recent.front().is_some_and(|t| input.now.since(*t) >= *per) {
                                w.recent.pop_front();
                            }
                            if w.recent.len() as u32 > *at_most {
                                let why = format!(
                                    "{} switchings within {}; last: {}",
                                    w.recent.len(),
                                    crate::units::format_duration(*per),
                                    s.reason
                                );
                                w.failed = Some((input.now, why));
                            }
                        }
                    }
                    CheckKind::ObligationsMet | CheckKind::ExportOverLimit(_) | CheckKind::LukewarmAtMost(_) => {}
                }
            }
        };
        let mut options = RunOptions::day(day.date);
        options.seed = day.seed;
        options.sky = day.sky;
        options.step = step;
        options.controller = Controller::Spillway;
        options.observer = Some(&mut observer);
        let out = simulate_once(site, loaded.tariff.as_ref(), plant, options)?;
        for (c, w) in checks.iter().zip(&watches) {
            let (passed, at, detail) = match &c.kind {
                CheckKind::ObligationsMet => {
                    let missed: Vec<String> = site
                        .loads
                        .iter()
                        .zip(&out.loads)
                        .flat_map(|(l, f)| {
                            l.obligations
                                .iter()
                                .zip(&f.obligations)
                                .filter(|(_, (_, missed))| *missed > 0)
                                .map(|(o, _)| format!("{}: {}", l.name, o.describe()))
                        })
                        .collect();
                    (
                        missed.is_empty(),
                        None,
                        if missed.is_empty() { "all met".to_owned() } else { format!("missed: {}", missed.join(", ")) },
                    )
                }
                CheckKind::ExportOverLimit(max) => {
                    let over = Duration::from_secs_f64(out.seconds_over_limit);
                    (
                        over <= *max,
                        None,
                        format!(
                            "{} above the limit (allowed {})",
                            crate::units::format_duration(over),
                            crate::units::format_duration(*max)
                        ),
                    )
                }
                CheckKind::LukewarmAtMost(max) => match out.hot_water_short {
                    Some((litres, short_wh)) => (
                        litres <= *max,
                        None,
                        format!(
                            "{litres:.0} L came out colder than asked for, {:.2} kWh short (allowed {max} L)",
                            short_wh / 1000.0
                        ),
                    ),
                    None => (false, None, "the plant has no tank: add `plant.tank`, or remove the check".to_owned()),
                },
                // A check time after the day's last tick (a long `--step`) is never
                // reached: that is no pass.
                CheckKind::At { seconds_of_day, .. } if w.failed.is_none() && !w.done_today => (
                    false,
                    None,
                    format!(
                        "never checked: no tick at or after {} before the day ended (a shorter --step reaches it)",
                        {
                            let t = *seconds_of_day;
                            format!("{:02}:{:02}:{:02}", t / 3600, t / 60 % 60, t % 60)
                        }
                    ),
                ),
                CheckKind::Always { .. } if w.failed.is_none() && !w.known => {
                    (false, None, "the rule was unknown all day (its signals never fresh)".to_owned())
                }
                _ => match &w.failed {
                    Some((t, why)) => (false, Some(local(*t)), why.clone()),
                    None => (true, None, String::new()),
                },
            };
            verdicts.push(Verdict { day: day.name.clone(), check: c.name.clone(), passed, at, detail });
        }
    }
    Ok(verdicts)
}

/// The verdicts as a table.
pub fn to_text(verdicts: &[Verdict]) -> String {
    let mut o = String::new();
    let dw = verdicts.iter().map(|v| v.day.chars().count()).max().unwrap_or(3).max(3);
    let cw = verdicts.iter().map(|v| v.check.chars().count()).max().unwrap_or(5).max(5);
    let _ = writeln!(o, "{:<dw$}  {:<cw$}  result  when      detail", "day", "check");
    for v in verdicts {
        let detail = if v.detail.chars().count() > 160 {
            format!("{}…", v.detail.chars().take(160).collect::<String>())
        } else {
            v.detail.clone()
        };
        let _ = writeln!(
            o,
            "{:<dw$}  {:<cw$}  {:<6}  {:<8}  {}",
            v.day,
            v.check,
            if v.passed { "pass" } else { "FAIL" },
            v.at.as_deref().unwrap_or(""),
            detail
        );
    }
    let failed = verdicts.iter().filter(|v| !v.passed).count();
    let _ = writeln!(o, "\n{} check(s), {} passed, {} failed", verdicts.len(), verdicts.len() - failed, failed);
    o
}
