//! Sliding time windows for `avg`, `min` and `max`, in amortised O(1) per tick.
//!
//! The signal is a step function: each sample holds its value until the next one (a
//! zero-order hold), so the average is time-weighted even when ticks are irregular.
//! Only change points are stored: a signal that stays put costs nothing. Unknown
//! samples end the previous value's step and are left out of the average and of the
//! extremes. The window is unknown until the stored history reaches back to its start.

use std::collections::VecDeque;

/// Which statistic a window computes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub(crate) enum AggKind {
    Avg,
    Min,
    Max,
}

impl AggKind {
    pub(crate) fn name(self) -> &'static str {
        match self {
            AggKind::Avg => "avg",
            AggKind::Min => "min",
            AggKind::Max => "max",
        }
    }

    pub(crate) fn from_name(name: &str) -> Option<AggKind> {
        Some(match name {
            "avg" => AggKind::Avg,
            "min" => AggKind::Min,
            "max" => AggKind::Max,
            _ => return None,
        })
    }
}

/// One window's history and running statistics.
#[derive(Debug, Clone)]
pub(crate) struct Window {
    kind: AggKind,
    /// Change points `(time ms, value)`, oldest first; `NaN` = unknown from then on.
    steps: VecDeque<(i64, f64)>,
    /// Sequence number of `steps[0]`; each stored step gets the next number.
    first_seq: u64,
    /// For `avg`: Σ value·duration and Σ duration (ms) over the completed steps, that is
    /// every stored step but the last, counting known values only.
    area: f64,
    known_ms: i64,
    /// Steps removed since `area` was last summed afresh (bounds rounding drift).
    removed: usize,
    /// For `min`/`max`: candidates `(seq, value)`, values monotonic, so the front is the
    /// extreme of the window.
    extremes: VecDeque<(u64, f64)>,
}

impl Window {
    pub(crate) fn new(kind: AggKind) -> Self {
        Window {
            kind,
            steps: VecDeque::new(),
            first_seq: 0,
            area: 0.0,
            known_ms: 0,
            removed: 0,
            extremes: VecDeque::new(),
        }
    }

    /// Forgets all history (time went backwards), keeping the buffers.
    pub(crate) fn clear(&mut self) {
        self.steps.clear();
        self.extremes.clear();
        self.first_seq = 0;
        self.area = 0.0;
        self.known_ms = 0;
        self.removed = 0;
    }

    /// Records `value` at `now` and drops history older than `span_ms` before `now`.
    /// A second sample at the same instant is ignored: the first one stands.
    pub(crate) fn push(&mut self, now: i64, value: f64, span_ms: i64) {
        // Infinities are not measurements; they would also poison the running sum.
        let value = if value.is_finite() { value } else { f64::NAN };
        match self.steps.back().copied() {
            None => self.append(now, value),
            Some((t_last, v_last)) => {
                if now <= t_last || same(value, v_last) {
                    // Same instant, or the step simply continues.
                } else {
                    if !v_last.is_nan() {
                        let dt = now - t_last;
                        self.area += v_last * dt as f64;
                        self.known_ms += dt;
                    }
                    self.append(now, value);
                }
            }
        }
        self.expire(now - span_ms);
    }

    fn append(&mut self, now: i64, value: f64) {
        let seq = self.first_seq + self.steps.len() as u64;
        self.steps.push_back((now, value));
        if self.kind == AggKind::Avg || value.is_nan() {
            return;
        }
        let dominated = |old: f64| match self.kind {
            AggKind::Max => old <= value,
            _ => old >= value,
        };
        while self.extremes.back().is_some_and(|&(_, old)| dominated(old)) {
            self.extremes.pop_back();
        }
        self.extremes.push_back((seq, value));
    }

    /// Drops steps that end at or before `start`: the first kept step covers `start`.
    fn expire(&mut self, start: i64) {
        while self.steps.len() >= 2 && self.steps[1].0 <= start {
            if let Some((t0, v0)) = self.steps.pop_front() {
                if !v0.is_nan() {
                    let dt = self.steps[0].0 - t0;
                    self.area -= v0 * dt as f64;
                    self.known_ms -= dt;
                }
                self.first_seq += 1;
                self.removed += 1;
            }
        }
        while self.extremes.front().is_some_and(|&(seq, _)| seq < self.first_seq) {
            self.extremes.pop_front();
        }
        if self.kind == AggKind::Avg && (self.removed > self.steps.len() || !self.area.is_finite()) {
            self.resum();
        }
    }

    /// Recomputes the running sum from the stored steps, amortised over the removals.
    fn resum(&mut self) {
        let mut area = 0.0;
        let mut known = 0;
        for (a, b) in self.steps.iter().zip(self.steps.iter().skip(1)) {
            if !a.1.is_nan() {
                area += a.1 * (b.0 - a.0) as f64;
                known += b.0 - a.0;
            }
        }
        self.area = area;
        self.known_ms = known;
        self.removed = 0;
    }

    /// The statistic over `[now - span_ms, now]`, `NaN` while the history does not reach
    /// back to the window's start or no part of the window is known.
    pub(crate) fn value(&self, now: i64, span_ms: i64) -> f64 {
        let start = now - span_ms;
        let Some(&(t0, v0)) = self.steps.front() else {
            return f64::NAN;
        };
        if t0 > start {
            return f64::NAN;
        }
        match self.kind {
            AggKind::Avg => {
                let mut area = self.area;
                let mut known = self.known_ms;
                if let Some(&(t_last, v_last)) = self.steps.back()
                    && !v_last.is_nan()
                {
                    let dt = now - t_last;
                    area += v_last * dt as f64;
                    known += dt;
                }
                if !v0.is_nan() {
                    let dt = start - t0;
                    area -= v0 * dt as f64;
                    known -= dt;
                }
                if known <= 0 { f64::NAN } else { area / known as f64 }
            }
            AggKind::Min | AggKind::Max => self.extremes.front().map_or(f64::NAN, |&(_, v)| v),
        }
    }

    #[cfg(test)]
    pub(crate) fn capacities(&self) -> [usize; 2] {
        [self.steps.capacity(), self.extremes.capacity()]
    }

    /// How much history the window has at `now`, in ms (for explanations).
    pub(crate) fn history_ms(&self, now: i64) -> i64 {
        self.steps.front().map_or(0, |&(t0, _)| (now - t0).max(0))
    }
}

/// Equal values, or both unknown: the step continues.
fn same(a: f64, b: f64) -> bool {
    a == b || (a.is_nan() && b.is_nan())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Pushes `(t_s, value)` samples into a window of `span_s` and returns its value at
    /// the last sample.
    fn run(kind: AggKind, span_s: i64, samples: &[(i64, f64)]) -> f64 {
        let mut w = Window::new(kind);
        let mut last = 0;
        for &(t, v) in samples {
            w.push(t * 1000, v, span_s * 1000);
            last = t;
        }
        w.value(last * 1000, span_s * 1000)
    }

    #[test]
    fn average_weights_each_value_by_how_long_it_held() {
        // 1 kW for 8 s then 3 kW for 2 s: (8·1 + 2·3) / 10 = 1.4 kW.
        let v = run(AggKind::Avg, 10, &[(0, 1000.0), (8, 3000.0), (10, 3000.0)]);
        assert!((v - 1400.0).abs() < 1e-9, "{v}");
    }

    #[test]
    fn extremes_forget_values_that_left_the_window() {
        let samples: Vec<(i64, f64)> = (0..20).map(|t| (t, if t == 3 { 9.0 } else { 1.0 })).collect();
        assert_eq!(run(AggKind::Max, 5, &samples[..8]), 9.0);
        assert_eq!(run(AggKind::Max, 5, &samples), 1.0);
        assert_eq!(run(AggKind::Min, 5, &samples[..8]), 1.0);
    }

    #[test]
    fn running_sum_matches_a_fresh_sum_after_many_ticks() {
        let mut w = Window::new(AggKind::Avg);
        for t in 0..10_000i64 {
            let v = ((t * 7919) % 1000) as f64;
            w.push(t * 1000, v, 60_000);
        }
        let now = 9_999_000;
        let incremental = w.value(now, 60_000);
        w.resum();
        let fresh = w.value(now, 60_000);
        assert!((incremental - fresh).abs() < 1e-6, "{incremental} {fresh}");
    }
}
