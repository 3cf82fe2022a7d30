//! Local calendar for the plant: one day at a time, so the hot path never calls chrono.
//!
//! A [`Day`] is built once per local day (DST-aware through chrono-tz) and turns an
//! instant into local seconds since midnight with one subtraction and a division.

use chrono::{Datelike, Duration, NaiveDate, NaiveTime, Offset, TimeZone, Weekday};
use chrono_tz::Tz;

use super::config::Days;

/// Seconds in a nominal day.
pub const DAY_S: u32 = 86_400;

/// One local day.
#[derive(Debug, Clone, Copy)]
pub struct Day {
    /// The local date.
    pub date: NaiveDate,
    /// Local midnight, ms since the epoch.
    pub start_ms: i64,
    /// The next local midnight, ms since the epoch.
    pub end_ms: i64,
    /// When the UTC offset changes inside the day (`i64::MAX` if it does not).
    shift_at_ms: i64,
    /// Offset change at `shift_at_ms`, seconds (+3600 when clocks go forward).
    shift_s: i64,
}

fn offset_s(tz: Tz, t_ms: i64) -> i64 {
    let utc = chrono::DateTime::from_timestamp_millis(t_ms).unwrap_or_default().naive_utc();
    i64::from(tz.offset_from_utc_datetime(&utc).fix().local_minus_utc())
}

/// The first instant of the local date (midnight, or the first valid time after a gap).
fn local_start_ms(tz: Tz, date: NaiveDate) -> i64 {
    let mut time = NaiveTime::MIN;
    for _ in 0..4 {
        if let Some(t) = tz.from_local_datetime(&date.and_time(time)).earliest() {
            return t.timestamp_millis();
        }
        time += Duration::minutes(30);
    }
    // No valid local time in the first two hours: fall back to the UTC midnight.
    date.and_time(NaiveTime::MIN).and_utc().timestamp_millis()
}

impl Day {
    /// The local day that contains `t_ms`.
    pub fn containing(tz: Tz, t_ms: i64) -> Day {
        let utc = chrono::DateTime::from_timestamp_millis(t_ms).unwrap_or_default();
        let date = utc.with_timezone(&tz).date_naive();
        let start_ms = local_start_ms(tz, date);
        let next = date.succ_opt().unwrap_or(date);
        let end_ms = local_start_ms(tz, next).max(start_ms + 1000);
        let (o0, o1) = (offset_s(tz, start_ms), offset_s(tz, end_ms - 1));
        let (shift_at_ms, shift_s) = if o0 == o1 {
            (i64::MAX, 0)
        } else {
            // Bisect to the millisecond the offset changes.
            let (mut lo, mut hi) = (start_ms, end_ms - 1);
            while hi - lo > 1 {
                let mid = lo + (hi - lo) / 2;
                if offset_s(tz, mid) == o0 {
                    lo = mid;
                } else {
                    hi = mid;
                }
            }
            (hi, o1 - o0)
        };
        Day { date, start_ms, end_ms, shift_at_ms, shift_s }
    }

    /// Local clock seconds since midnight at `t_ms` (0 ..= 86 399).
    #[inline]
    pub fn local_sec(&self, t_ms: i64) -> u32 {
        // The day contains `t_ms` in the hot loop: an unsigned division by a constant
        // is a multiply and a shift, `div_euclid` several more instructions.
        let since = t_ms - self.start_ms;
        let mut s = if since >= 0 { (since as u64 / 1000) as i64 } else { since.div_euclid(1000) };
        if t_ms >= self.shift_at_ms {
            s += self.shift_s;
        }
        s.clamp(0, i64::from(DAY_S) - 1) as u32
    }

    /// The instant at local clock second `sec` of this day (approximate inside a DST
    /// change: the offset at midnight applies before the change, the new one after).
    pub fn instant_ms(&self, sec: u32) -> i64 {
        let naive = self.start_ms + i64::from(sec) * 1000;
        if naive >= self.shift_at_ms { naive - self.shift_s * 1000 } else { naive }
    }

    /// Day of the week.
    pub fn weekday(&self) -> Weekday {
        self.date.weekday()
    }

    /// Whether a schedule entry for `days` applies today.
    pub fn matches(&self, days: Days) -> bool {
        let weekend = matches!(self.weekday(), Weekday::Sat | Weekday::Sun);
        match days {
            Days::All => true,
            Days::Weekdays => !weekend,
            Days::Weekends => weekend,
        }
    }

    /// A number unique to the date, for seeding the day's random draws.
    pub fn ordinal(&self) -> u64 {
        self.date.num_days_from_ce() as u64
    }
}

/// Parses a local clock time `HH:MM` or `HH:MM:SS` into seconds since midnight.
pub fn parse_clock(text: &str) -> Option<u32> {
    let mut parts = text.trim().split(':');
    let h: u32 = parts.next()?.trim().parse().ok()?;
    let m: u32 = parts.next()?.trim().parse().ok()?;
    let s: u32 = match parts.next() {
        Some(p) => p.trim().parse().ok()?,
        None => 0,
    };
    if parts.next().is_some() || h > 24 || m > 59 || s > 59 || (h == 24 && (m > 0 || s > 0)) {
        return None;
    }
    Some(h * 3600 + m * 60 + s)
}

/// Parses a window `HH:MM-HH:MM` into (start, end) seconds; end after start.
pub fn parse_window(text: &str) -> Option<(u32, u32)> {
    let (a, b) = text.split_once('-')?;
    let (a, b) = (parse_clock(a)?, parse_clock(b)?);
    (b > a).then_some((a, b))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clock_and_window_parse() {
        assert_eq!(parse_clock("07:30"), Some(27_000));
        assert_eq!(parse_clock("24:00"), Some(86_400));
        assert_eq!(parse_clock("7:5:9"), Some(25_509));
        assert_eq!(parse_clock("25:00"), None);
        assert_eq!(parse_window("06:00-08:30"), Some((21_600, 30_600)));
        assert_eq!(parse_window("08:00-06:00"), None);
    }

    #[test]
    fn dst_days_keep_the_local_clock() {
        let tz: Tz = "Europe/Berlin".parse().unwrap();
        // 2025-03-30: clocks go from 02:00 to 03:00 local (01:00 UTC).
        let day = Day::containing(tz, 1_743_300_000_000); // 2025-03-30T02:00Z
        assert_eq!(day.end_ms - day.start_ms, 23 * 3_600_000);
        // 12:00 local = 10:00 UTC on that day.
        let noon_utc = 1_743_328_800_000; // 2025-03-30T10:00Z
        assert_eq!(day.local_sec(noon_utc), 12 * 3600);
        assert_eq!(day.instant_ms(12 * 3600), noon_utc);
        assert_eq!(day.weekday(), Weekday::Sun);
    }
}
