//! The server's clock: simulated time runs `speed` times faster than the wall clock and
//! the plant advances in fixed simulated steps, so the physics is the same whatever the
//! speed or the machine's load (only the instants at which requests land differ).

use std::sync::Arc;
use std::time::Duration;

use tokio::time::{Instant, MissedTickBehavior};
use tokio_util::sync::CancellationToken;

use super::{ServeError, Shared};

/// Fastest wall-clock tick: at high speeds several steps are taken per tick.
const MIN_TICK: Duration = Duration::from_millis(10);

/// Most steps taken under one lock of the plant before requests get a turn.
const BATCH: u32 = 2_000;

/// How simulated time follows the wall clock.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SimClock {
    /// Simulated seconds per wall-clock second.
    pub speed: f64,
    /// Simulated step, ms.
    pub step_ms: i64,
}

impl SimClock {
    /// A clock at `speed` (> 0, ≤ 1e6) with a simulated `step` (1 ms–1 h), or the
    /// default step for the speed (see [`SimClock::default_step`]).
    pub fn new(speed: f64, step: Option<Duration>) -> Result<SimClock, ServeError> {
        if !(speed > 0.0 && speed <= 1e6) {
            return Err(ServeError::Options(format!("speed {speed} is outside (0, 1000000]")));
        }
        let step = step.unwrap_or_else(|| SimClock::default_step(speed));
        let step_ms = i64::try_from(step.as_millis()).unwrap_or(i64::MAX);
        if !(1..=3_600_000).contains(&step_ms) || !step.subsec_nanos().is_multiple_of(1_000_000) {
            return Err(ServeError::Options(format!("step {step:?} must be whole milliseconds between 1 ms and 1 h")));
        }
        Ok(SimClock { speed, step_ms })
    }

    /// Default simulated step: 100 ms × speed, kept between 100 ms and 1 s. At speed 1
    /// the plant moves every 100 ms, so a controller's reaction is measured finely; at
    /// 10× and beyond it steps by 1 s, the step the plant's models are built for.
    pub fn default_step(speed: f64) -> Duration {
        let ms = (100.0 * speed).round().clamp(100.0, 1000.0);
        Duration::from_millis(ms as u64)
    }

    /// Simulated ms that correspond to `wall` of real time (whole ms, rounded down; the
    /// nanosecond added keeps 0.3 s × 10 from landing just under 3000 ms).
    pub fn sim_elapsed_ms(&self, wall: Duration) -> i64 {
        (wall.as_secs_f64() * self.speed * 1000.0 + 1e-6).floor() as i64
    }

    /// Wall time between two ticks of the clock task: one step's worth, at least 10 ms.
    pub fn tick(&self) -> Duration {
        Duration::from_secs_f64(self.step_ms as f64 / 1000.0 / self.speed).max(MIN_TICK)
    }
}

/// Steps the plant until cancelled: at each tick, every whole step up to the simulated
/// instant the wall clock has reached since `t0` (`span.0` in simulated time), but not
/// past `span.1`, then announces the new time.
pub(super) async fn run(
    shared: Arc<Shared>,
    clock: SimClock,
    t0: Instant,
    span: (i64, i64),
    cancel: CancellationToken,
) {
    let (sim0_ms, hold_at_ms) = span;
    let mut ticker = tokio::time::interval_at(t0 + clock.tick(), clock.tick());
    // Behind schedule (a busy machine), the next tick catches up on every step owed,
    // since the target comes from the elapsed wall time, not from the tick count.
    ticker.set_missed_tick_behavior(MissedTickBehavior::Delay);
    let dt_s = clock.step_ms as f64 / 1000.0;
    loop {
        // Cancel safety: both branches are cancel safe (a tick lost at shutdown is moot).
        tokio::select! {
            biased;
            () = cancel.cancelled() => return,
            _ = ticker.tick() => {}
        }
        let target = sim0_ms.saturating_add(clock.sim_elapsed_ms(t0.elapsed())).min(hold_at_ms);
        loop {
            let (now, behind) = {
                let mut plant = shared.plant();
                let mut n = 0;
                while plant.now_ms() + clock.step_ms <= target && n < BATCH {
                    plant.step(dt_s);
                    n += 1;
                }
                (plant.now_ms(), plant.now_ms() + clock.step_ms <= target)
            };
            shared.updates.send_replace(now);
            if !behind || cancel.is_cancelled() {
                break;
            }
            tokio::task::yield_now().await;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn default_steps_follow_the_speed() {
        let step = |speed| SimClock::new(speed, None).map(|c| c.step_ms).unwrap_or(-1);
        assert_eq!(step(1.0), 100);
        assert_eq!(step(0.5), 100);
        assert_eq!(step(5.0), 500);
        assert_eq!(step(10.0), 1000);
        assert_eq!(step(3600.0), 1000);
    }

    #[test]
    fn simulated_time_is_speed_times_wall_time() {
        let c = SimClock::new(60.0, None).unwrap();
        assert_eq!(c.sim_elapsed_ms(Duration::from_secs(2)), 120_000);
        assert_eq!(c.tick(), Duration::from_secs_f64(1.0 / 60.0));
        let fast = SimClock::new(10_000.0, None).unwrap();
        assert_eq!(fast.tick(), MIN_TICK);
        assert_eq!(SimClock::new(1.0, None).unwrap().tick(), Duration::from_millis(100));
    }

    #[test]
    fn bad_clocks_are_refused() {
        assert!(SimClock::new(0.0, None).is_err());
        assert!(SimClock::new(f64::NAN, None).is_err());
        assert!(SimClock::new(1.0, Some(Duration::from_micros(1500))).is_err());
        assert!(SimClock::new(1.0, Some(Duration::from_secs(7200))).is_err());
    }
}
