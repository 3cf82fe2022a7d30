//! The engine's input: the latest value of every point, when it was measured, and since
//! when it has read exactly that value.
//!
//! Sources overwrite samples (latest value wins); the engine judges freshness itself
//! from each sample's age, so staleness is an input to the decision, never an exception.

use crate::config::model::{Point, PointId, Site};
use crate::units::Timestamp;

/// How far ahead of `now` a sample's time may lie before it is distrusted (a source
/// with a clock set wrong); beyond it the sample counts as stale.
const FUTURE_SLACK_MS: i64 = 5_000;

/// One measurement: value in the point's base unit, and when it was taken.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sample {
    /// Value in base units (booleans 1.0/0.0).
    pub value: f64,
    /// When it was measured; [`Timestamp::NEVER`] if it never arrived.
    pub at: Timestamp,
    /// When the point first read this exact value (the start of a run of identical
    /// readings); [`Timestamp::NEVER`] if it never arrived.
    pub since: Timestamp,
}

impl Sample {
    /// A sample that never arrived.
    pub const MISSING: Sample = Sample { value: f64::NAN, at: Timestamp::NEVER, since: Timestamp::NEVER };

    /// How usable this sample of `point` is at `now`.
    ///
    /// A sample is *missing* if it never arrived or is not a number, *stale* once older
    /// than the point's `stale_after` (or dated more than 5 s ahead of `now`), and
    /// *frozen* once the point has read exactly the same value for longer than its
    /// `frozen_after`: a gateway that keeps answering with the last reading of a meter
    /// that died looks alive to every poll.
    pub fn quality(&self, now: Timestamp, point: &Point) -> Quality {
        self.quality_within(now, &Timeouts::of(point))
    }

    /// [`Sample::quality`] with the point's timeouts already in milliseconds (the
    /// engine judges every point at every tick).
    #[inline]
    pub(crate) fn quality_within(&self, now: Timestamp, t: &Timeouts) -> Quality {
        if self.at == Timestamp::NEVER || !self.value.is_finite() {
            return Quality::Missing;
        }
        // Ages are whole milliseconds, so `age > timeout` compares the same in ms as in
        // the `Duration`s the site file gives (a timeout's sub-millisecond rest is floored).
        let age = now.0.saturating_sub(self.at.0).max(0);
        if self.at.0 > now.0.saturating_add(FUTURE_SLACK_MS) || age > t.stale_ms {
            return Quality::Stale;
        }
        if self.at.0.saturating_sub(self.since.0).max(0) > t.frozen_ms { Quality::Frozen } else { Quality::Fresh }
    }
}

/// A point's timeouts in whole milliseconds (floored).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Timeouts {
    stale_ms: i64,
    /// `i64::MAX` when the point has no `frozen_after`.
    frozen_ms: i64,
}

impl Timeouts {
    pub(crate) fn of(point: &Point) -> Timeouts {
        let ms = |d: std::time::Duration| i64::try_from(d.as_millis()).unwrap_or(i64::MAX);
        Timeouts { stale_ms: ms(point.stale_after), frozen_ms: point.frozen_after.map_or(i64::MAX, ms) }
    }
}

/// How usable a sample is at a given instant.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Quality {
    /// Younger than the point's stale timeout.
    Fresh,
    /// Older than the stale timeout.
    Stale,
    /// Never received (or not a number).
    Missing,
    /// Read exactly the same for longer than the point's `frozen_after`.
    Frozen,
}

impl Quality {
    /// The word the status page and explanations use.
    pub fn word(self) -> &'static str {
        match self {
            Quality::Fresh => "fresh",
            Quality::Stale => "stale",
            Quality::Missing => "missing",
            Quality::Frozen => "frozen",
        }
    }
}

/// The latest sample of every point of a site, indexed by [`PointId`].
#[derive(Debug, Clone, PartialEq)]
pub struct Snapshot {
    /// One sample per point, in `Site::points` order.
    pub samples: Vec<Sample>,
}

impl Snapshot {
    /// A snapshot with every point missing.
    pub fn empty(site: &Site) -> Self {
        Snapshot { samples: vec![Sample::MISSING; site.points.len()] }
    }

    /// Records a measurement. A value identical to the last one (bit for bit) continues
    /// the run of identical readings; any other value starts a new one.
    #[inline]
    pub fn set(&mut self, point: PointId, value: f64, at: Timestamp) {
        if let Some(s) = self.samples.get_mut(point.0) {
            let repeat = s.since != Timestamp::NEVER && s.value.to_bits() == value.to_bits();
            let since = if repeat { s.since } else { at };
            *s = Sample { value, at, since };
        }
    }

    /// The sample of a point.
    pub fn get(&self, point: PointId) -> Sample {
        self.samples.get(point.0).copied().unwrap_or(Sample::MISSING)
    }
}
