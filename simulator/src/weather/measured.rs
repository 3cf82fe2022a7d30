//! A measured time series in place of the modelled sky or PV output: a CSV file of
//! timestamps with global horizontal irradiance or PV AC power, interpolated linearly.
//!
//! Format (header required, `#` starts a comment line):
//! ```text
//! time,ghi_w_m2            (or: time,pv_ac_w)
//! 2025-06-01T06:00:00+02:00,12.5
//! 2025-06-01 06:01,14.0    (no offset: local time in the site's time zone)
//! 1748750520,15.2          (Unix seconds)
//! ```
//! Irregular sampling and gaps are fine: values are interpolated between neighbouring
//! good rows. Every row that cannot be used, and every gap longer than the configured
//! limit, is reported with its line number; nothing is dropped silently.

use std::fmt;
use std::path::Path;

use chrono::{DateTime, LocalResult, NaiveDateTime, TimeZone};
use chrono_tz::Tz;

use super::WeatherError;

/// What the measured column holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MeasuredQuantity {
    /// Global horizontal irradiance, W/m² (column `ghi_w_m2`).
    Ghi,
    /// PV AC power, W (column `pv_ac_w`).
    PvAc,
}

impl MeasuredQuantity {
    fn column(self) -> &'static str {
        match self {
            MeasuredQuantity::Ghi => "ghi_w_m2",
            MeasuredQuantity::PvAc => "pv_ac_w",
        }
    }
}

/// A row the loader could not use as it stands, or a gap it bridged.
#[derive(Debug, Clone, PartialEq)]
pub struct RowNotice {
    /// 1-based line number in the file.
    pub line: u64,
    /// What was wrong and what the loader did.
    pub message: String,
}

impl fmt::Display for RowNotice {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "line {}: {}", self.line, self.message)
    }
}

/// A measured series, ready to be sampled at increasing times.
#[derive(Debug, Clone)]
pub struct MeasuredSeries {
    quantity: MeasuredQuantity,
    times_s: Vec<f64>,
    values: Vec<f64>,
    cursor: usize,
}

fn parse_time(text: &str, tz: Tz) -> Result<f64, String> {
    let text = text.trim();
    if let Ok(t) = DateTime::parse_from_rfc3339(text) {
        return Ok(t.timestamp_millis() as f64 / 1000.0);
    }
    if let Ok(s) = text.parse::<f64>()
        && s.is_finite()
    {
        return Ok(s);
    }
    let naive = ["%Y-%m-%d %H:%M:%S", "%Y-%m-%dT%H:%M:%S", "%Y-%m-%d %H:%M", "%Y-%m-%dT%H:%M"]
        .iter()
        .find_map(|f| NaiveDateTime::parse_from_str(text, f).ok())
        .ok_or_else(|| format!("cannot read time `{text}`: use RFC 3339, `YYYY-MM-DD HH:MM[:SS]` or Unix seconds"))?;
    match tz.from_local_datetime(&naive) {
        LocalResult::Single(t) => Ok(t.timestamp_millis() as f64 / 1000.0),
        LocalResult::Ambiguous(..) => {
            Err(format!("local time `{text}` occurs twice in {tz} (end of daylight saving): add a UTC offset"))
        }
        LocalResult::None => Err(format!("local time `{text}` does not exist in {tz} (start of daylight saving)")),
    }
}

impl MeasuredSeries {
    /// Reads a CSV file; see the module documentation for the format.
    pub fn load(path: &Path, tz: Tz, max_gap_s: f64) -> Result<(Self, Vec<RowNotice>), WeatherError> {
        let text = std::fs::read_to_string(path)
            .map_err(|source| WeatherError::Read { path: path.display().to_string(), source })?;
        Self::parse(&text, tz, max_gap_s).map_err(|e| e.in_file(path))
    }

    /// Parses CSV text; naive local times are read in `tz`; gaps longer than
    /// `max_gap_s` are reported (and still interpolated).
    pub fn parse(text: &str, tz: Tz, max_gap_s: f64) -> Result<(Self, Vec<RowNotice>), WeatherError> {
        let mut reader = csv::ReaderBuilder::new()
            .comment(Some(b'#'))
            .flexible(true)
            .trim(csv::Trim::All)
            .from_reader(text.as_bytes());
        let header = reader.headers().map_err(|e| WeatherError::Csv(e.to_string()))?.clone();
        let columns: Vec<&str> = header.iter().collect();
        let quantity = match columns.as_slice() {
            ["time", "ghi_w_m2"] => MeasuredQuantity::Ghi,
            ["time", "pv_ac_w"] => MeasuredQuantity::PvAc,
            _ => {
                return Err(WeatherError::Header { found: columns.join(",") });
            }
        };
        let mut notices = Vec::new();
        let mut times_s: Vec<f64> = Vec::new();
        let mut values = Vec::new();
        let mut lines: Vec<u64> = Vec::new();
        let mut negatives = 0usize;
        let mut first_negative = 0;
        for record in reader.records() {
            let record = match record {
                Ok(r) => r,
                Err(e) => {
                    let line = e.position().map_or(0, |p| p.line());
                    notices.push(RowNotice { line, message: format!("unreadable row skipped: {e}") });
                    continue;
                }
            };
            let line = record.position().map_or(0, |p| p.line());
            if record.len() != 2 {
                notices.push(RowNotice {
                    line,
                    message: format!("expected 2 fields, found {}: row skipped", record.len()),
                });
                continue;
            }
            let t = match parse_time(&record[0], tz) {
                Ok(t) => t,
                Err(message) => {
                    notices.push(RowNotice { line, message: format!("{message}: row skipped") });
                    continue;
                }
            };
            let v: f64 = match record[1].parse::<f64>() {
                Ok(v) if v.is_finite() => v,
                _ => {
                    notices.push(RowNotice {
                        line,
                        message: format!(
                            "cannot read {} value `{}`: row skipped (the gap is interpolated)",
                            quantity.column(),
                            &record[1]
                        ),
                    });
                    continue;
                }
            };
            if let Some(&last) = times_s.last() {
                if t <= last {
                    let what = if t == last { "repeats" } else { "goes back before" };
                    notices.push(RowNotice {
                        line,
                        message: format!(
                            "time {what} the previous row (line {}): row skipped",
                            lines.last().copied().unwrap_or(0)
                        ),
                    });
                    continue;
                }
                if t - last > max_gap_s {
                    notices.push(RowNotice {
                        line,
                        message: format!(
                            "gap of {:.0} min since line {}: interpolated across it",
                            (t - last) / 60.0,
                            lines.last().copied().unwrap_or(0)
                        ),
                    });
                }
            }
            let v = if v < 0.0 {
                if negatives == 0 {
                    first_negative = line;
                }
                negatives += 1;
                0.0
            } else {
                v
            };
            times_s.push(t);
            values.push(v);
            lines.push(line);
        }
        if negatives > 0 {
            notices.push(RowNotice {
                line: first_negative,
                message: format!("{negatives} negative value(s) read as 0 (sensor offset at night?), the first here"),
            });
        }
        if times_s.len() < 2 {
            return Err(WeatherError::TooFewRows {
                rows: times_s.len(),
                notices: notices.iter().map(ToString::to_string).collect(),
            });
        }
        Ok((MeasuredSeries { quantity, times_s, values, cursor: 0 }, notices))
    }

    /// What the series measures.
    pub fn quantity(&self) -> MeasuredQuantity {
        self.quantity
    }

    /// First and last time covered, Unix seconds.
    pub fn span_s(&self) -> (f64, f64) {
        (self.times_s.first().copied().unwrap_or(0.0), self.times_s.last().copied().unwrap_or(0.0))
    }

    /// The value at `t_s` (linear interpolation; 0 outside the covered span). Fast for
    /// increasing times; any order works.
    pub fn value_at(&mut self, t_s: f64) -> f64 {
        let n = self.times_s.len();
        let (first, last) = self.span_s();
        if n < 2 || t_s < first || t_s > last {
            return 0.0;
        }
        if self.times_s[self.cursor] > t_s {
            self.cursor = self.times_s.partition_point(|&x| x <= t_s).saturating_sub(1);
        }
        while self.cursor + 2 < n && self.times_s[self.cursor + 1] <= t_s {
            self.cursor += 1;
        }
        let i = self.cursor.min(n - 2);
        let (t0, t1) = (self.times_s[i], self.times_s[i + 1]);
        let f = ((t_s - t0) / (t1 - t0)).clamp(0.0, 1.0);
        self.values[i] + (self.values[i + 1] - self.values[i]) * f
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reports_bad_rows_with_line_numbers_and_interpolates_the_rest() {
        let text = "# a comment\ntime,ghi_w_m2\n\
                    2025-06-01T10:00:00Z,100\n\
                    2025-06-01T10:00:30Z,oops\n\
                    2025-06-01T10:01:00Z,150\n\
                    2025-06-01T10:00:45Z,120\n\
                    garbage,1\n\
                    2025-06-01 12:01,200\n\
                    1748779380,-3\n";
        let (mut s, notices) = MeasuredSeries::parse(text, chrono_tz::UTC, 900.0).unwrap();
        let line_of = |needle: &str| notices.iter().find(|n| n.message.contains(needle)).map(|n| n.line);
        assert_eq!(line_of("cannot read ghi_w_m2"), Some(4), "{notices:?}");
        assert_eq!(line_of("goes back"), Some(6), "{notices:?}");
        assert_eq!(line_of("cannot read time"), Some(7), "{notices:?}");
        assert_eq!(line_of("gap of 120 min since line 5"), Some(8), "{notices:?}");
        assert_eq!(line_of("negative"), Some(9), "{notices:?}");
        assert_eq!(s.quantity(), MeasuredQuantity::Ghi);
        let t0 = DateTime::parse_from_rfc3339("2025-06-01T10:00:00Z").unwrap().timestamp() as f64;
        assert_eq!(s.value_at(t0), 100.0);
        assert!((s.value_at(t0 + 60.0 * 61.0) - 175.0).abs() < 1e-9);
        assert!((s.value_at(t0 + 60.0 * 122.0) - 100.0).abs() < 1e-9);
        assert_eq!(s.value_at(t0 - 1.0), 0.0);
    }
}
