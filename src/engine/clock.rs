//! The site's local calendar, computed from `now` without touching the system clock.
//!
//! Converting an instant to local time through the time-zone database for every tick
//! would dominate an accelerated year; instead the UTC offset is looked up once and
//! reused until the next quarter hour of UTC, which is finer than any real DST
//! transition (all fall on quarter hours), so DST changes are seen at the right tick.

use chrono::{Datelike, Offset, TimeZone, Weekday};
use chrono_tz::Tz;

use crate::rules::LocalClock;
use crate::units::Timestamp;

const QUARTER_HOUR_MS: i64 = 15 * 60 * 1000;
const DAY_MS: i64 = 86_400_000;

/// Local date of an instant, as numbers cheap to compare.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LocalDay {
    /// Days since 1970-01-01 in local time.
    pub day: i64,
    /// Calendar year.
    pub year: i32,
    /// Calendar month, 1–12.
    pub month: u32,
    /// Day of the month, 1–31.
    pub day_of_month: u32,
}

/// Local time of the current tick and the cached offset behind it.
#[derive(Debug, Clone)]
pub struct SiteClock {
    tz: Tz,
    offset_ms: i64,
    valid_until: i64,
    valid_from: i64,
    day: Option<LocalDay>,
    /// The current local day's change of the wall clock, if it has one: its instant (ms),
    /// the wall time just before it (seconds of day) and the jump (s, + forward).
    change: Option<(i64, u32, i32)>,
}

impl SiteClock {
    /// A clock for a time zone; the first [`SiteClock::at`] fills the cache.
    pub fn new(tz: Tz) -> Self {
        SiteClock { tz, offset_ms: 0, valid_until: i64::MIN, valid_from: i64::MAX, day: None, change: None }
    }

    fn offset_ms_at(&self, t: i64) -> i64 {
        let utc = Timestamp(t).to_utc();
        i64::from(self.tz.offset_from_utc_datetime(&utc.naive_utc()).fix().local_minus_utc()) * 1000
    }

    /// The change of the wall clock on local day `day`, looked for once a day, a quarter
    /// hour of UTC at a time (as the cache above, finer than any real transition).
    fn change_on(&self, day: i64) -> Option<(i64, u32, i32)> {
        let reach = 15 * 3600 * 1000;
        let (mut t, end) = (day * DAY_MS - reach, (day + 1) * DAY_MS + reach);
        let mut before = self.offset_ms_at(t);
        while t < end {
            let next = t + QUARTER_HOUR_MS;
            let after = self.offset_ms_at(next);
            let wall = next + before;
            if after != before && wall.div_euclid(DAY_MS) == day {
                let jump = i32::try_from((after - before) / 1000).unwrap_or(0);
                return Some((next, (wall.rem_euclid(DAY_MS) / 1000) as u32, jump));
            }
            (t, before) = (next, after);
        }
        None
    }

    /// The change of the wall clock still ahead of `now` on its local day: the wall time
    /// just before it (seconds of day) and the jump (s, + forward). Call after
    /// [`SiteClock::day`] for `now`.
    pub fn change_ahead(&self, now: Timestamp) -> Option<(u32, i32)> {
        self.change.filter(|(at, ..)| now.0 < *at).map(|(_, wall, jump)| (wall, jump))
    }

    fn refresh(&mut self, now: i64) {
        if now >= self.valid_from && now < self.valid_until {
            return;
        }
        self.offset_ms = self.offset_ms_at(now);
        self.valid_from = now - now.rem_euclid(QUARTER_HOUR_MS);
        self.valid_until = self.valid_from + QUARTER_HOUR_MS;
    }

    /// Local clock at `now`.
    pub fn at(&mut self, now: Timestamp) -> LocalClock {
        self.refresh(now.0);
        let local = now.0 + self.offset_ms;
        let day = local.div_euclid(DAY_MS);
        let ms_of_day = local.rem_euclid(DAY_MS);
        // 1970-01-01 was a Thursday.
        let weekday = Weekday::try_from(((day + 3).rem_euclid(7)) as u8).unwrap_or(Weekday::Mon);
        LocalClock { seconds_of_day: (ms_of_day / 1000) as u32, weekday }
    }

    /// The local day of `now`, and whether it differs from the previous call's.
    pub fn day(&mut self, now: Timestamp) -> (LocalDay, bool) {
        self.refresh(now.0);
        let day = (now.0 + self.offset_ms).div_euclid(DAY_MS);
        match self.day {
            Some(d) if d.day == day => (d, false),
            previous => {
                let date = chrono::DateTime::from_timestamp_millis(day * DAY_MS).unwrap_or_default().date_naive();
                let d = LocalDay { day, year: date.year(), month: date.month(), day_of_month: date.day() };
                self.day = Some(d);
                self.change = self.change_on(day);
                (d, previous.is_some())
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::TimeZone;

    fn ts(tz: Tz, y: i32, mo: u32, d: u32, h: u32, mi: u32) -> Timestamp {
        Timestamp::from_utc(tz.with_ymd_and_hms(y, mo, d, h, mi, 0).single().unwrap().with_timezone(&chrono::Utc))
    }

    #[test]
    fn local_time_follows_dst_in_spring_and_autumn() {
        let tz: Tz = "Europe/Lisbon".parse().unwrap();
        let mut c = SiteClock::new(tz);
        // 2026-03-29: Lisbon moves from 01:00 WET to 02:00 WEST. 00:30 UTC is 00:30 local,
        // 01:30 UTC is 02:30 local (source: the IANA tz database via chrono-tz).
        let before = Timestamp::from_utc(chrono::Utc.with_ymd_and_hms(2026, 3, 29, 0, 30, 0).unwrap());
        let after = Timestamp::from_utc(chrono::Utc.with_ymd_and_hms(2026, 3, 29, 1, 30, 0).unwrap());
        assert_eq!(c.at(before).seconds_of_day, 30 * 60);
        assert_eq!(c.at(after).seconds_of_day, (2 * 60 + 30) * 60);
        // 2026-10-25: back from 02:00 WEST to 01:00 WET; 01:30 UTC is 01:30 local.
        let autumn = Timestamp::from_utc(chrono::Utc.with_ymd_and_hms(2026, 10, 25, 1, 30, 0).unwrap());
        assert_eq!(c.at(autumn).seconds_of_day, (60 + 30) * 60);
    }

    #[test]
    fn the_days_change_of_the_wall_clock_is_known_until_it_happens() {
        let tz: Tz = "Europe/Lisbon".parse().unwrap();
        let mut c = SiteClock::new(tz);
        let utc = |mo, d, h, mi| Timestamp::from_utc(chrono::Utc.with_ymd_and_hms(2026, mo, d, h, mi, 0).unwrap());
        // 2026-03-29: at 01:00 UTC, 01:00 WET jumps to 02:00 WEST; 2026-10-25: at 01:00
        // UTC, 02:00 WEST goes back to 01:00 WET (source: the IANA tz database via
        // chrono-tz).
        for (now, ahead) in [
            (utc(3, 29, 0, 30), Some((3600, 3600))),
            (utc(3, 29, 1, 0), None),
            (utc(10, 24, 23, 30), Some((7200, -3600))),
            (utc(10, 25, 1, 0), None),
            (utc(6, 15, 0, 30), None),
        ] {
            c.day(now);
            assert_eq!(c.change_ahead(now), ahead, "{now}");
        }
    }

    #[test]
    fn weekday_and_day_change_at_local_midnight() {
        let tz: Tz = "Australia/Adelaide".parse().unwrap();
        let mut c = SiteClock::new(tz);
        let sat_late = ts(tz, 2026, 12, 5, 23, 59);
        let sun_early = ts(tz, 2026, 12, 6, 0, 1);
        assert_eq!(c.at(sat_late).weekday, Weekday::Sat);
        let (d1, _) = c.day(sat_late);
        assert_eq!(c.at(sun_early).weekday, Weekday::Sun);
        let (d2, changed) = c.day(sun_early);
        assert!(changed);
        assert_eq!(d2.day, d1.day + 1);
        assert_eq!((d2.month, d2.day_of_month), (12, 6));
    }
}
