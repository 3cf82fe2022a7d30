//! Capped exponential backoff with deterministic jitter, for reconnecting links.
//!
//! The jitter spreads reconnects of many links after a shared outage (a switch that
//! rebooted) without a random number generator: it is derived from a seed (the
//! device's name) and the attempt number, so a test sees the same delays every run.

use std::time::Duration;

/// Limits of a backoff.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BackoffPolicy {
    /// Delay before the first retry.
    pub initial: Duration,
    /// Longest delay.
    pub max: Duration,
}

impl Default for BackoffPolicy {
    /// 0.5 s doubling to 10 s (`common practice` for field-bus reconnects, capped low:
    /// while a lost meter holds the site in fail-safe, the wait after its return is PV
    /// thrown away, and a reconnect every 10 s costs a dead device nothing).
    fn default() -> Self {
        BackoffPolicy { initial: Duration::from_millis(500), max: Duration::from_secs(10) }
    }
}

/// The state of one link's backoff.
#[derive(Debug, Clone)]
pub struct Backoff {
    policy: BackoffPolicy,
    seed: u64,
    attempt: u32,
}

impl Backoff {
    /// A backoff whose jitter is derived from `seed_text` (e.g. the device name).
    pub fn new(policy: BackoffPolicy, seed_text: &str) -> Self {
        // FNV-1a: a stable hash, unlike std's randomly keyed one.
        let seed =
            seed_text.bytes().fold(0xcbf2_9ce4_8422_2325u64, |h, b| (h ^ u64::from(b)).wrapping_mul(0x0100_0000_01b3));
        Backoff { policy, seed, attempt: 0 }
    }

    /// The delay before the next retry; each call doubles the base delay up to the cap.
    /// The delay lies between half and all of the base ("equal jitter").
    pub fn next_delay(&mut self) -> Duration {
        let base = self.policy.initial.saturating_mul(1u32 << self.attempt.min(20)).min(self.policy.max);
        let r = splitmix64(self.seed ^ u64::from(self.attempt));
        self.attempt = self.attempt.saturating_add(1);
        let frac = (r >> 11) as f64 / (1u64 << 53) as f64; // [0, 1)
        base.mul_f64(0.5 + 0.5 * frac)
    }

    /// Retries so far since the last success.
    pub fn attempts(&self) -> u32 {
        self.attempt
    }

    /// Back to the initial delay after a success.
    pub fn reset(&mut self) {
        self.attempt = 0;
    }
}

/// SplitMix64's output function (Steele, Lea, Flood 2014): a cheap, well-mixed hash.
fn splitmix64(x: u64) -> u64 {
    let mut z = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn delays_double_to_the_cap_with_bounded_repeatable_jitter() {
        let mut b = Backoff::new(BackoffPolicy::default(), "meter");
        let delays: Vec<Duration> = (0..10).map(|_| b.next_delay()).collect();
        let mut again = Backoff::new(BackoffPolicy::default(), "meter");
        assert_eq!(delays, (0..10).map(|_| again.next_delay()).collect::<Vec<_>>());
        for (i, d) in delays.iter().enumerate() {
            let base = Duration::from_millis(500 * (1 << i)).min(Duration::from_secs(10));
            assert!(*d >= base / 2 && *d <= base, "attempt {i}: {d:?} vs {base:?}");
        }
        let mut other = Backoff::new(BackoffPolicy::default(), "inverter");
        assert_ne!(delays[0], other.next_delay());
        b.reset();
        assert!(b.next_delay() <= Duration::from_millis(500));
    }
}
