//! The engine's input: the latest value of every point and when it was measured.
//!
//! Sources overwrite samples (latest value wins); the engine judges freshness itself
//! from each sample's age, so staleness is an input to the decision, never an exception.

use crate::config::model::{PointId, Site};
use crate::units::Timestamp;

/// One measurement: value in the point's base unit, and when it was taken.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sample {
    /// Value in base units (booleans 1.0/0.0).
    pub value: f64,
    /// When it was measured; [`Timestamp::NEVER`] if it never arrived.
    pub at: Timestamp,
}

impl Sample {
    /// A sample that never arrived.
    pub const MISSING: Sample = Sample { value: f64::NAN, at: Timestamp::NEVER };
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

    /// Records a measurement.
    pub fn set(&mut self, point: PointId, value: f64, at: Timestamp) {
        if let Some(s) = self.samples.get_mut(point.0) {
            *s = Sample { value, at };
        }
    }

    /// The sample of a point.
    pub fn get(&self, point: PointId) -> Sample {
        self.samples.get(point.0).copied().unwrap_or(Sample::MISSING)
    }
}
