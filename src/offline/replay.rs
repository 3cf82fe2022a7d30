//! A measured time series in place of the modelled PV and household: what a site
//! actually did, replayed against its rules. The file is a CSV with a header:
//!
//! ```text
//! time,pv_w,house_w[,pv_available_w]
//! 2026-05-02T06:00:00+01:00,0,412        (RFC 3339 with offset)
//! 2026-05-02 06:00:30,3,398              (no offset: the site's local time)
//! 1777698060,5,405                       (Unix seconds)
//! ```
//!
//! - `pv_w`: PV AC power as measured; `house_w`: household consumption *without* the
//!   managed loads (they are simulated). `pv_available_w` (optional) is what the array
//!   could have given where the recording was itself curtailed; without it the recorded
//!   PV is taken as the most the array could give.
//! - Samples may be irregular and may have gaps: values are interpolated linearly
//!   between good rows; gaps longer than 15 minutes are reported.
//! - A row that cannot be used (a bad time, a missing or non-numeric value, a time not
//!   after the previous row) is rejected and reported with its line number; the run goes
//!   on without it, and the count is printed. Nothing is dropped silently.
//! - Extra columns are ignored (and named once in the notices).

use std::path::{Path, PathBuf};

use chrono::{DateTime, LocalResult, NaiveDateTime, TimeZone};
use chrono_tz::Tz;
use spillway_sim::plant::{Plant, PlantConfig};
use spillway_sim::pv_output::{PvSample, PvSource};

use super::OfflineError;

/// Longest gap between rows that passes without a notice.
const MAX_GAP_S: f64 = 900.0;

/// A row the loader could not use, or a gap it bridged.
#[derive(Debug, Clone, PartialEq)]
pub struct Notice {
    /// 1-based line number.
    pub line: u64,
    /// What was wrong and what was done.
    pub message: String,
    /// Whether the row was rejected (rather than just noted).
    pub rejected: bool,
}

/// The recorded series, ready to replay.
#[derive(Debug, Clone, PartialEq)]
pub struct Recorded {
    /// The file.
    pub path: PathBuf,
    /// Sample times, ms since the epoch, increasing.
    pub t_ms: Vec<i64>,
    /// PV AC power, W.
    pub pv_w: Vec<f64>,
    /// Household power, W.
    pub house_w: Vec<f64>,
    /// PV available, W (same as `pv_w` when the column is absent).
    pub available_w: Vec<f64>,
    /// Rejected rows and bridged gaps.
    pub notices: Vec<Notice>,
}

/// Unix seconds beyond this (about the year 5138) are taken for milliseconds given by
/// mistake, which would otherwise replay a run thousands of years away.
const MAX_UNIX_S: f64 = 1e11;

#[cfg(test)]
fn parse_time(text: &str, tz: Tz) -> Result<i64, String> {
    parse_time_after(text, tz, None)
}

/// As [`parse_time`]; a local time that occurs twice (the repeated hour of an autumn DST
/// change) is the first occurrence unless that is not after `previous` (the last row's
/// time), so a recording that runs through the repeated hour reads in order.
fn parse_time_after(text: &str, tz: Tz, previous: Option<i64>) -> Result<i64, String> {
    let t = text.trim();
    if let Ok(secs) = t.parse::<f64>() {
        if !secs.is_finite() || secs.abs() > MAX_UNIX_S {
            return Err(format!("time \"{t}\" is too large for Unix seconds (milliseconds? divide by 1000)"));
        }
        return Ok((secs * 1000.0).round() as i64);
    }
    if let Ok(dt) = DateTime::parse_from_rfc3339(t) {
        return Ok(dt.timestamp_millis());
    }
    for fmt in ["%Y-%m-%d %H:%M:%S", "%Y-%m-%d %H:%M", "%Y-%m-%dT%H:%M:%S", "%Y-%m-%dT%H:%M"] {
        if let Ok(naive) = NaiveDateTime::parse_from_str(t, fmt) {
            return match tz.from_local_datetime(&naive) {
                LocalResult::Single(dt) => Ok(dt.timestamp_millis()),
                // The repeated hour of an autumn DST change: the first occurrence, or
                // the second when the recording is already past the first.
                LocalResult::Ambiguous(a, b) => Ok(match previous {
                    Some(p) if a.timestamp_millis() <= p => b.timestamp_millis(),
                    _ => a.timestamp_millis(),
                }),
                LocalResult::None => Err(format!(
                    "local time \"{t}\" does not exist in {tz} (the clocks went forward): give RFC 3339 with an offset or Unix seconds"
                )),
            };
        }
    }
    // A day the calendar lacks (2026-02-30 12:00) is written right: say what is wrong.
    if let Some(Err(no_day @ crate::config::values::DateError::NoSuchDay(_))) =
        t.get(..10).map(crate::config::values::parse_date)
    {
        return Err(format!("time \"{t}\": {no_day}"));
    }
    Err(format!("time \"{t}\" is not RFC 3339, YYYY-MM-DD HH:MM[:SS] or Unix seconds"))
}

impl Recorded {
    /// Reads a recorded series; the site's time zone places times without an offset.
    pub fn from_csv(path: &Path, tz: Tz) -> Result<Recorded, OfflineError> {
        let fail = |message: String| OfflineError::Recorded { path: path.to_path_buf(), message };
        let text = std::fs::read_to_string(path).map_err(|e| fail(format!("cannot read the file: {e}")))?;
        let mut reader = csv::ReaderBuilder::new()
            .comment(Some(b'#'))
            .trim(csv::Trim::All)
            .flexible(true)
            .from_reader(text.as_bytes());
        let headers = reader.headers().map_err(|e| fail(format!("no header line: {e}")))?.clone();
        let col = |name: &str| headers.iter().position(|h| h == name);
        let (Some(ct), Some(cp), Some(ch)) = (col("time"), col("pv_w"), col("house_w")) else {
            // A spreadsheet set to a decimal comma saves `;` between columns: the whole
            // header then reads as one column, and the names in it are right.
            let separator = [(';', "`;`"), ('\t', "tabs")]
                .into_iter()
                .find(|(c, _)| headers.iter().any(|h| h.contains(*c)))
                .map_or(String::new(), |(_, name)| {
                    format!("; this header separates them with {name}: the columns must be separated by commas")
                });
            return Err(fail(format!(
                "the header must name the columns time, pv_w and house_w (found: {}){separator}",
                headers.iter().collect::<Vec<_>>().join(", ")
            )));
        };
        let ca = col("pv_available_w");
        let mut rec = Recorded {
            path: path.to_path_buf(),
            t_ms: Vec::new(),
            pv_w: Vec::new(),
            house_w: Vec::new(),
            available_w: Vec::new(),
            notices: Vec::new(),
        };
        let known = ["time", "pv_w", "house_w", "pv_available_w"];
        let extra: Vec<&str> = headers.iter().filter(|h| !known.contains(h)).collect();
        if !extra.is_empty() {
            rec.notices.push(Notice {
                line: 1,
                message: format!("ignoring column(s) {}", extra.join(", ")),
                rejected: false,
            });
        }
        for result in reader.records() {
            let record = match result {
                Ok(r) => r,
                Err(e) => {
                    let line = e.position().map_or(0, |p| p.line());
                    rec.notices.push(Notice { line, message: format!("unreadable row: {e}"), rejected: true });
                    continue;
                }
            };
            let line = record.position().map_or(0, |p| p.line());
            let reject =
                |rec: &mut Recorded, why: String| rec.notices.push(Notice { line, message: why, rejected: true });
            let field = |i: usize| record.get(i).unwrap_or("").trim();
            let t = match parse_time_after(field(ct), tz, rec.t_ms.last().copied()) {
                Ok(t) => t,
                Err(why) => {
                    reject(&mut rec, why);
                    continue;
                }
            };
            let number = |i: usize, name: &str| -> Result<f64, String> {
                match field(i).parse::<f64>() {
                    Ok(v) if v.is_finite() && v >= 0.0 => Ok(v),
                    Ok(v) => Err(format!("{name} {v} is not a power ≥ 0")),
                    Err(_) => Err(format!("{name} \"{}\" is not a number", field(i))),
                }
            };
            let values = (|| -> Result<(f64, f64, Option<f64>), String> {
                let avail = match ca {
                    Some(i) if !field(i).is_empty() => Some(number(i, "pv_available_w")?),
                    _ => None,
                };
                Ok((number(cp, "pv_w")?, number(ch, "house_w")?, avail))
            })();
            let (pv, house, avail) = match values {
                Ok(v) => v,
                Err(why) => {
                    reject(&mut rec, why);
                    continue;
                }
            };
            if let Some(&last) = rec.t_ms.last() {
                if t <= last {
                    reject(&mut rec, "time is not after the previous row's".to_owned());
                    continue;
                }
                let gap = (t - last) as f64 / 1000.0;
                if gap > MAX_GAP_S {
                    rec.notices.push(Notice {
                        line,
                        message: format!(
                            "gap of {} before this row, bridged by interpolation",
                            crate::units::format_duration(std::time::Duration::from_secs_f64(gap))
                        ),
                        rejected: false,
                    });
                }
            }
            rec.t_ms.push(t);
            rec.pv_w.push(pv);
            rec.house_w.push(house);
            rec.available_w.push(avail.unwrap_or(pv).max(pv));
        }
        if rec.t_ms.len() < 2 {
            return Err(fail(format!("only {} usable row(s): a replay needs at least two", rec.t_ms.len())));
        }
        Ok(rec)
    }

    /// A warning when a column looks written in kW although it is read in W: the largest
    /// PV value under 50 while it would, in kW, be between a fifth and one and a half
    /// times the site's array (`array_w`, 0 when the plant has none), or the largest
    /// household value under 20 (a house draws more than 20 W at some moment of any
    /// recording: a fridge alone does). Values in W that small are all but impossible,
    /// so false alarms are too.
    pub fn kw_suspects(&self, array_w: f64) -> Vec<String> {
        let max = |v: &[f64]| v.iter().copied().fold(0.0, f64::max);
        let mut out = Vec::new();
        let pv = max(&self.pv_w);
        if pv > 0.0 && pv < 50.0 && array_w > 0.0 && (0.2 * array_w..=1.5 * array_w).contains(&(pv * 1000.0)) {
            out.push(format!(
                "the largest pv_w is {}, which looks like kW (the array is {} kW): pv_w is read in W, so multiply the column by 1000",
                crate::units::trim_number(pv),
                crate::units::trim_number(array_w / 1000.0)
            ));
        }
        let house = max(&self.house_w);
        if house > 0.0 && house < 20.0 {
            out.push(format!(
                "the largest house_w is {}, which looks like kW: house_w is read in W, so multiply the column by 1000",
                crate::units::trim_number(house)
            ));
        }
        out
    }

    /// Rows rejected.
    pub fn rejected(&self) -> usize {
        self.notices.iter().filter(|n| n.rejected).count()
    }

    /// First and last instants, ms.
    pub fn span_ms(&self) -> (i64, i64) {
        (self.t_ms[0], self.t_ms[self.t_ms.len() - 1])
    }

    /// Milliseconds of `[start_ms, end_ms)` that fall in gaps between rows longer than
    /// 15 minutes: interpolated there, not measured.
    pub fn bridged_ms(&self, start_ms: i64, end_ms: i64) -> i64 {
        self.t_ms
            .windows(2)
            .filter(|w| (w[1] - w[0]) as f64 / 1000.0 > MAX_GAP_S)
            .map(|w| (w[1].min(end_ms) - w[0].max(start_ms)).max(0))
            .sum()
    }

    /// The plant with the recorded PV and house in place of the modelled ones.
    pub fn build_plant(&self, cfg: &PlantConfig, start_ms: i64, seed: u64) -> Result<Plant, OfflineError> {
        let pv = ReplayPv {
            series: Cursor::new(self.t_ms.clone(), vec![self.pv_w.clone(), self.available_w.clone()]),
            limit: None,
        };
        let mut cfg = cfg.clone();
        if let Some(solar) = &cfg.solar {
            cfg.inverter.rating = solar.rated_ac_w();
        }
        let mut plant = Plant::new(&cfg, Box::new(pv), start_ms, seed).map_err(spillway_sim::site::SiteError::Plant)?;
        let mut house = Cursor::new(self.t_ms.clone(), vec![self.house_w.clone()]);
        plant.replay_house(Box::new(move |t| house.at(t)[0]));
        Ok(plant)
    }
}

/// Linear interpolation over increasing times, visited in increasing order.
struct Cursor {
    t: Vec<i64>,
    columns: Vec<Vec<f64>>,
    i: usize,
    out: Vec<f64>,
}

impl Cursor {
    fn new(t: Vec<i64>, columns: Vec<Vec<f64>>) -> Self {
        let n = columns.len();
        Cursor { t, columns, i: 0, out: vec![0.0; n] }
    }

    /// Values at `t_ms`; before the first row and after the last, the end values.
    fn at(&mut self, t_ms: i64) -> &[f64] {
        while self.i + 1 < self.t.len() && self.t[self.i + 1] <= t_ms {
            self.i += 1;
        }
        while self.i > 0 && self.t[self.i] > t_ms {
            self.i -= 1;
        }
        let (i, t) = (self.i, &self.t);
        for (out, col) in self.out.iter_mut().zip(&self.columns) {
            *out = if t_ms <= t[0] {
                col[0]
            } else if i + 1 >= t.len() {
                col[t.len() - 1]
            } else {
                let f = (t_ms - t[i]) as f64 / (t[i + 1] - t[i]) as f64;
                col[i] + (col[i + 1] - col[i]) * f
            };
        }
        &self.out
    }
}

/// The recorded PV as a source that obeys the inverter's limit (a cut applies at once).
struct ReplayPv {
    series: Cursor,
    limit: Option<f64>,
}

impl PvSource for ReplayPv {
    fn step(&mut self, t_ms: i64, _dt_s: f64, limit_w: Option<f64>) -> PvSample {
        self.limit = limit_w;
        let v = self.series.at(t_ms);
        let (pv, available) = (v[0], v[1]);
        let ac = limit_w.map_or(available, |l| available.min(l.max(0.0)));
        PvSample { ac_w: ac, available_ac_w: available.max(pv), dc_w: ac, clear_sky_index: 1.0, ..PvSample::default() }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_cursor_interpolates_between_rows_and_holds_at_the_ends() {
        let mut c = Cursor::new(vec![0, 1000, 3000], vec![vec![0.0, 10.0, 30.0]]);
        assert_eq!(c.at(-5)[0], 0.0);
        assert_eq!(c.at(500)[0], 5.0);
        assert_eq!(c.at(2000)[0], 20.0);
        assert_eq!(c.at(5000)[0], 30.0);
    }

    fn csv(name: &str, text: &str) -> Result<Recorded, OfflineError> {
        let dir = std::env::temp_dir().join(format!("spillway-replay-unit-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join(name);
        std::fs::write(&path, text).unwrap();
        let tz: Tz = "Europe/Lisbon".parse().unwrap();
        let out = Recorded::from_csv(&path, tz);
        std::fs::remove_file(&path).ok();
        out
    }

    #[test]
    fn a_header_split_by_semicolons_or_tabs_is_told_to_use_commas() {
        for (text, name) in [("time;pv_w;house_w\n1,2,3\n", "`;`"), ("time\tpv_w\thouse_w\n", "tabs")] {
            let e = csv("sep.csv", text).unwrap_err().to_string();
            assert!(e.contains("must name the columns time, pv_w and house_w"), "{e}");
            assert!(
                e.contains(&format!("this header separates them with {name}: the columns must be separated by commas")),
                "{e}"
            );
        }
        // A header that is simply wrong gets no such hint.
        let e = csv("wrong.csv", "when,pv,house\n").unwrap_err().to_string();
        assert!(!e.contains("separated by commas"), "{e}");
    }

    #[test]
    fn columns_that_look_like_kilowatts_are_warned_about() {
        let rows = |pv: [f64; 3], house: [f64; 3]| {
            let mut t = String::from("time,pv_w,house_w\n");
            for (i, (p, h)) in pv.iter().zip(house).enumerate() {
                t.push_str(&format!("2026-05-02 1{i}:00,{p},{h}\n"));
            }
            csv("kw.csv", &t).unwrap()
        };
        // A 4 kWp array recorded in kW.
        let kw = rows([0.5, 3.2, 1.1], [0.4, 0.9, 2.5]);
        let w = kw.kw_suspects(4000.0);
        assert_eq!(w.len(), 2, "{w:?}");
        assert!(w[0].starts_with("the largest pv_w is 3.2, which looks like kW (the array is 4 kW)"), "{w:?}");
        assert!(w[1].starts_with("the largest house_w is 2.5, which looks like kW"), "{w:?}");
        // In W, no warning; nor for a dark day's few watts, far below the array in kW.
        assert!(rows([500.0, 3200.0, 1100.0], [400.0, 900.0, 2500.0]).kw_suspects(4000.0).is_empty());
        assert!(rows([0.0, 0.3, 0.1], [400.0, 900.0, 2500.0]).kw_suspects(4000.0).is_empty());
        // No array in the plant: nothing to compare the PV with.
        assert!(rows([0.5, 3.2, 1.1], [400.0, 900.0, 2500.0]).kw_suspects(0.0).is_empty());
    }

    #[test]
    fn a_row_on_a_day_the_calendar_lacks_says_so() {
        let tz: Tz = "Europe/Lisbon".parse().unwrap();
        let e = parse_time("2026-02-30 12:00", tz).unwrap_err();
        assert_eq!(e, "time \"2026-02-30 12:00\": no such date: February 2026 has 28 days");
    }

    #[test]
    fn times_are_read_in_three_forms() {
        let tz: Tz = "Europe/Lisbon".parse().unwrap();
        assert_eq!(parse_time("1777698060", tz), Ok(1_777_698_060_000));
        assert_eq!(parse_time("2026-05-02T06:00:00+01:00", tz), parse_time("2026-05-02 06:00:00", tz));
        assert!(parse_time("soon", tz).unwrap_err().contains("is not RFC 3339"));
    }

    /// Times that parse but cannot be meant say why: milliseconds given as seconds (a run
    /// in the year 58331), and a local time skipped by the spring DST change.
    #[test]
    fn milliseconds_and_times_skipped_by_dst_are_named_as_such() {
        let tz: Tz = "Europe/Lisbon".parse().unwrap();
        assert!(parse_time("1777698060000", tz).unwrap_err().contains("milliseconds?"));
        let e = parse_time("2026-03-29 01:30:00", tz).unwrap_err();
        assert!(e.contains("does not exist in Europe/Lisbon (the clocks went forward)"), "{e}");
        // The repeated hour of 2026-10-25 (01:00–02:00 twice): the second pass reads as
        // the second occurrence once the recording is past the first.
        let first = parse_time("2026-10-25 01:30:00", tz).unwrap();
        let later_row = parse_time("2026-10-25 01:50:00", tz).unwrap();
        let second = parse_time_after("2026-10-25 01:10:00", tz, Some(later_row)).unwrap();
        assert_eq!(second - first, 3_600_000 - 20 * 60_000, "one hour later, less the 20 min");
    }
}
