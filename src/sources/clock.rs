//! The links' clock: wall time on a real site, or tokio time anchored to an instant so
//! tests on a paused clock (`start_paused = true`) get exact, repeatable time stamps.

use std::time::{SystemTime, UNIX_EPOCH};

use crate::units::Timestamp;

/// Where a link's time stamps come from.
#[derive(Debug, Clone, Copy)]
pub enum Clock {
    /// The system's wall clock.
    System,
    /// `at` at the tokio instant `origin`, advancing with tokio time (which a test can
    /// pause and advance by hand).
    Anchored {
        /// The tokio instant of the anchor.
        origin: tokio::time::Instant,
        /// The time stamp at the anchor.
        at: Timestamp,
    },
    /// Like `Anchored`, but `speed` times faster than tokio time: follows a simulator
    /// running an accelerated clock (`spillway demo --speed 10`).
    Scaled {
        /// The tokio instant of the anchor.
        origin: tokio::time::Instant,
        /// The time stamp at the anchor.
        at: Timestamp,
        /// Simulated seconds per second.
        speed: f64,
    },
}

impl Clock {
    /// A clock anchored at `at` now (tokio time).
    pub fn anchored(at: Timestamp) -> Clock {
        Clock::Anchored { origin: tokio::time::Instant::now(), at }
    }

    /// The time now.
    /// How fast this clock runs against wall time (1 except for a scaled clock).
    pub fn speed(&self) -> f64 {
        match self {
            Clock::Scaled { speed, .. } => *speed,
            Clock::System | Clock::Anchored { .. } => 1.0,
        }
    }

    pub fn now(&self) -> Timestamp {
        match self {
            Clock::System => {
                let ms = SystemTime::now().duration_since(UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64);
                Timestamp(ms)
            }
            Clock::Anchored { origin, at } => {
                let elapsed = tokio::time::Instant::now().saturating_duration_since(*origin);
                at.plus(elapsed)
            }
            Clock::Scaled { origin, at, speed } => {
                let elapsed = tokio::time::Instant::now().saturating_duration_since(*origin);
                at.plus(elapsed.mul_f64(speed.max(0.0)))
            }
        }
    }
}

#[cfg(test)]
mod tests {

    use super::*;
    use std::time::Duration;

    #[tokio::test(start_paused = true)]
    async fn anchored_clock_follows_paused_tokio_time() {
        let c = Clock::anchored(Timestamp(1_000_000));
        assert_eq!(c.now(), Timestamp(1_000_000));
        tokio::time::advance(Duration::from_millis(1500)).await;
        assert_eq!(c.now(), Timestamp(1_001_500));
    }

    #[tokio::test(start_paused = true)]
    async fn a_scaled_clock_runs_faster_by_its_speed() {
        let c = Clock::Scaled { origin: tokio::time::Instant::now(), at: Timestamp(0), speed: 10.0 };
        tokio::time::advance(Duration::from_millis(1500)).await;
        assert_eq!(c.now(), Timestamp(15_000));
    }
}
