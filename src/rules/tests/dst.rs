//! Daylight saving time.
