//! Rules on days of 23 and 25 hours. The engine turns each instant into a
//! [`LocalClock`] (wall-clock time and weekday in the site's zone); here chrono-tz does
//! it, as the engine will, and the rules must count real time for holds and windows
//! while reading the wall clock for time-of-day windows.
//!
//! Source for the transition instants: Directive 2000/84/EC of the European Parliament
//! (summer time starts on the last Sunday of March and ends on the last Sunday of
//! October, both at 01:00 UTC), as encoded for Europe/Berlin in the IANA tz database
//! shipped with chrono-tz.

use chrono::{DateTime, Datelike, NaiveDate, TimeZone, Timelike, Utc};
use chrono_tz::Europe::Berlin;

use crate::rules::tests::support::{NAMES, rule};
use crate::rules::{EvalInput, LocalClock, Rule};
use crate::units::Timestamp;

/// Minutes of `date` (local, Europe/Berlin) during which `rule` is true, evaluated
/// every minute from local midnight to the next local midnight; also the day's length
/// in minutes.
fn minutes_true(text: &str, date: NaiveDate) -> (u32, u32) {
    let r: Rule = rule(text);
    let mut state = r.new_state();
    let values = vec![f64::NAN; NAMES.len()];
    let midnight = |d: NaiveDate| -> DateTime<Utc> {
        Berlin
            .from_local_datetime(&d.and_hms_opt(0, 0, 0).unwrap_or_default())
            .single()
            .map(|t| t.with_timezone(&Utc))
            .unwrap_or_default()
    };
    let (start, end) = (midnight(date), midnight(date.succ_opt().unwrap_or(date)));
    let mut t = start;
    let (mut true_minutes, mut minutes) = (0, 0);
    while t < end {
        let local = t.with_timezone(&Berlin);
        let input = EvalInput {
            values: &values,
            now: Timestamp::from_utc(t),
            local: LocalClock { seconds_of_day: local.num_seconds_from_midnight(), weekday: local.weekday() },
        };
        if r.eval(&input, &mut state).is_true() {
            true_minutes += 1;
        }
        minutes += 1;
        t += chrono::Duration::minutes(1);
    }
    (true_minutes, minutes)
}

/// 2026-03-29, the last Sunday of March: clocks jump from 02:00 to 03:00.
fn spring() -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 3, 29).unwrap_or_default()
}

/// 2026-10-25, the last Sunday of October: 02:00–03:00 happens twice.
fn autumn() -> NaiveDate {
    NaiveDate::from_ymd_opt(2026, 10, 25).unwrap_or_default()
}

#[test]
fn days_around_the_changes_are_23_and_25_hours_long() {
    assert_eq!(minutes_true("true", spring()), (23 * 60, 23 * 60));
    assert_eq!(minutes_true("true", autumn()), (25 * 60, 25 * 60));
}

#[test]
fn a_midday_window_lasts_six_hours_on_both_days() {
    for day in [spring(), autumn()] {
        assert_eq!(minutes_true("clock in 10:00..16:00", day).0, 6 * 60, "{day}");
    }
}

#[test]
fn a_window_across_the_change_follows_the_wall_clock() {
    // 01:00..04:00 on the wall: two real hours in spring (02:00–03:00 never happens),
    // four in autumn (it happens twice).
    assert_eq!(minutes_true("clock in 01:00..04:00", spring()).0, 2 * 60);
    assert_eq!(minutes_true("clock in 01:00..04:00", autumn()).0, 4 * 60);
    // Wrapping over midnight is unaffected: 22:00..02:00 within one local day is
    // 00:00–02:00 plus 22:00–24:00.
    assert_eq!(minutes_true("clock in 22:00..02:00", spring()).0, 4 * 60);
    assert_eq!(minutes_true("clock in 22:00..02:00", autumn()).0, 4 * 60);
}

#[test]
fn holds_count_real_time_not_wall_clock_time() {
    // Held for 150 real minutes inside 01:00..04:00: impossible in spring (two real
    // hours), true from the second 02:30 in autumn until 04:00, 90 minutes.
    let text = "(clock in 01:00..04:00) for 150min";
    assert_eq!(minutes_true(text, spring()).0, 0);
    assert_eq!(minutes_true(text, autumn()).0, 90);
}

#[test]
fn the_weekday_covers_the_whole_long_or_short_day() {
    assert_eq!(minutes_true("weekday == sun", spring()).0, 23 * 60);
    assert_eq!(minutes_true("weekday == sun", autumn()).0, 25 * 60);
    assert_eq!(minutes_true("weekday in [sat, sun]", autumn()).0, 25 * 60);
}
