//! Grid meter: reports the mean grid power over each period with seeded noise, a
//! reporting delay, energy counters, and the silent, frozen and garbage faults.

use std::collections::VecDeque;

use super::GridReading;
use super::config::{GarbageMode, MeterConfig};
use super::noise::{NormalBatch, Stream, mix};

/// One meter report.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Report {
    /// When the report becomes visible, ms since the epoch.
    pub visible_ms: i64,
    /// Mean grid power over the period, W (import positive).
    pub w: f64,
    /// Import counter at the end of the period, Wh.
    pub import_wh: f64,
    /// Export counter at the end of the period, Wh.
    pub export_wh: f64,
}

/// The meter's state.
#[derive(Debug)]
pub struct Meter {
    period_ms: i64,
    inv_period: f64,
    delay_ms: i64,
    noise_w: f64,
    noise: NormalBatch,
    acc_w_ms: f64,
    acc_ms: i64,
    next_report_ms: i64,
    /// Reports made but not yet visible. With a delay shorter than the period (the usual
    /// meter) at most one waits, in `pending`; a longer delay queues them in `queue`.
    pending: Report,
    /// When `pending` becomes visible (`i64::MAX`: nothing waits there). A plain time
    /// rather than an `Option`, so the per-step check is one comparison.
    pending_at: i64,
    queue: VecDeque<Report>,
    /// While frozen: the reading every report repeats (the last one made before).
    frozen: Option<Report>,
    /// The report shown now.
    pub shown: Report,
}

impl Meter {
    /// A meter whose first period starts at `start_ms`.
    pub fn new(cfg: &MeterConfig, rng: Stream, start_ms: i64) -> Meter {
        let period_ms = ((cfg.period * 1000.0).round() as i64).max(1);
        let delay_ms = ((cfg.delay * 1000.0).round() as i64).max(0);
        Meter {
            period_ms,
            inv_period: 1.0 / period_ms as f64,
            delay_ms,
            noise_w: cfg.noise.max(0.0),
            noise: NormalBatch::new(rng),
            acc_w_ms: 0.0,
            acc_ms: 0,
            next_report_ms: start_ms + period_ms,
            pending: Report::default(),
            pending_at: i64::MAX,
            queue: VecDeque::with_capacity((delay_ms / period_ms + 2) as usize),
            frozen: None,
            shown: Report { visible_ms: start_ms, ..Report::default() },
        }
    }

    /// Integrates `grid_w` over a step ending at `end_ms` of `dt_ms`. `counters` are the
    /// true import and export energies at `end_ms`. A silent meter measures but does not
    /// report; a frozen one reports on time but repeats its last reading; a garbage fault
    /// corrupts what it reports. A report that becomes visible is also written to `out`
    /// (the grid reading), straight from registers: copying `shown` afterwards would
    /// read back what was just stored, a store-forwarding stall in the hot loop.
    #[inline]
    pub fn step(
        &mut self,
        end_ms: i64,
        dt_ms: i64,
        grid_w: f64,
        counters: (f64, f64),
        faults: MeterFaults,
        out: Option<&mut GridReading>,
    ) {
        let MeterFaults { silent, frozen, garbage } = faults;
        let mut out = out;
        // Reports made earlier that are visible by now.
        if self.pending_at <= end_ms {
            self.show(self.pending, out.as_deref_mut());
            self.pending_at = i64::MAX;
        }
        if !self.queue.is_empty() {
            self.show_queued(end_ms, out.as_deref_mut());
        }
        self.acc_w_ms += grid_w * dt_ms as f64;
        self.acc_ms += dt_ms;
        if end_ms < self.next_report_ms {
            return;
        }
        // A whole period (the usual case) divides by a precomputed reciprocal.
        let mut w = if self.acc_ms == self.period_ms {
            self.acc_w_ms * self.inv_period
        } else {
            self.acc_w_ms / self.acc_ms.max(1) as f64
        };
        if self.noise_w > 0.0 {
            w += self.noise_w * self.noise.draw();
        }
        if let Some(mode) = garbage {
            w = garble(mode, w, end_ms as u64);
        }
        let mut report = Report { visible_ms: end_ms + self.delay_ms, w, import_wh: counters.0, export_wh: counters.1 };
        if frozen {
            let last = self.last_made();
            let held = *self.frozen.get_or_insert(last);
            report = Report { visible_ms: report.visible_ms, ..held };
        } else if self.frozen.is_some() {
            self.frozen = None;
        }
        if !silent {
            if self.delay_ms == 0 {
                self.show(report, out);
            } else if self.pending_at == i64::MAX && self.queue.is_empty() && self.delay_ms < self.period_ms {
                // Steps that end on the period leave at most one report waiting: the one
                // before became visible `delay` after it was made, and was shown above.
                // Irregular steps can make two reports closer than a period; the later
                // ones then queue behind this one, which stays the oldest.
                self.pending = report;
                self.pending_at = report.visible_ms;
            } else {
                if self.queue.len() == self.queue.capacity() {
                    self.queue.pop_front();
                }
                self.queue.push_back(report);
            }
        }
        self.acc_w_ms = 0.0;
        self.acc_ms = 0;
        while self.next_report_ms <= end_ms {
            self.next_report_ms += self.period_ms;
        }
    }

    #[inline]
    fn show(&mut self, report: Report, out: Option<&mut GridReading>) {
        self.shown = report;
        if let Some(g) = out {
            g.power_w = report.w;
            g.import_wh = report.import_wh;
            g.export_wh = report.export_wh;
            g.updated_ms = report.visible_ms;
        }
    }

    /// The last report made: the newest still waiting (the queue holds newer ones than
    /// `pending`), or the one shown.
    fn last_made(&self) -> Report {
        let pending = (self.pending_at != i64::MAX).then_some(self.pending);
        self.queue.back().copied().or(pending).unwrap_or(self.shown)
    }

    /// Shows the queued reports that are visible at `end_ms` (a delay of a period or more).
    #[cold]
    fn show_queued(&mut self, end_ms: i64, mut out: Option<&mut GridReading>) {
        while let Some(&front) = self.queue.front() {
            if front.visible_ms > end_ms {
                break;
            }
            self.show(front, out.as_deref_mut());
            self.queue.pop_front();
        }
    }
}

/// The meter's faults in force during a step.
#[derive(Debug, Clone, Copy, Default)]
pub struct MeterFaults {
    /// Reports nothing (a dead link or a rebooting meter).
    pub silent: bool,
    /// Reports on time, repeating the last reading.
    pub frozen: bool,
    /// Corrupts what it reports.
    pub garbage: Option<GarbageMode>,
}

/// Corrupts a value the way a faulty device would, reproducibly from `salt`.
pub fn garble(mode: GarbageMode, value: f64, salt: u64) -> f64 {
    let h = mix(salt ^ value.to_bits());
    match mode {
        GarbageMode::Nan => f64::NAN,
        GarbageMode::Spike => {
            if h & 1 == 0 {
                1e6
            } else {
                -1e6
            }
        }
        GarbageMode::Random => ((h >> 11) as f64 / (1u64 << 53) as f64 - 0.5) * 100_000.0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// What a meter shows at the end of each step, worked out the plain way: a report is
    /// made at the first step end on or after each period boundary (none while silent),
    /// every report is kept, and the newest one visible by a step's end is shown. The
    /// meter's `pending` slot and queue must give the same, whatever the steps.
    fn check(period: f64, delay: f64, steps_ms: &[i64]) {
        let cfg = MeterConfig { period, delay, noise: 0.0, phases: 1 };
        let (period_ms, delay_ms) = ((period * 1000.0) as i64, (delay * 1000.0) as i64);
        let start = 1_000_000;
        let mut meter = Meter::new(&cfg, Stream::new(1, 4), start);
        let mut reading = GridReading { updated_ms: start, ..GridReading::default() };
        // (visible at, import counter) of every report made.
        let mut made: Vec<(i64, f64)> = Vec::new();
        let mut next_report = start + period_ms;
        let mut shown = (start, 0.0);
        let mut t = start;
        for (i, &dt) in steps_ms.iter().cycle().take(5_000).enumerate() {
            t += dt;
            let silent = (1_500..1_600).contains(&i);
            let counter = i as f64 + 1.0;
            let faults = MeterFaults { silent, ..MeterFaults::default() };
            meter.step(t, dt, 100.0, (counter, 0.0), faults, Some(&mut reading));
            if t >= next_report {
                if !silent {
                    made.push((t + delay_ms, counter));
                }
                while next_report <= t {
                    next_report += period_ms;
                }
            }
            if let Some(r) = made.iter().rev().find(|r| r.0 <= t) {
                shown = *r;
            }
            let what = format!("step {i} ending at {t} (period {period} s, delay {delay} s, steps {steps_ms:?})");
            assert_eq!((meter.shown.visible_ms, meter.shown.import_wh), shown, "{what}");
            assert_eq!((reading.updated_ms, reading.import_wh), shown, "{what}");
        }
    }

    #[test]
    fn reports_show_in_order_with_regular_and_irregular_steps() {
        for (period, delay) in [(1.0, 0.0), (1.0, 0.5), (1.0, 0.999), (1.0, 1.0), (1.0, 2.5), (5.0, 0.5)] {
            for steps in [&[1000][..], &[700], &[250, 999, 1, 1000, 1300], &[100], &[4000, 10, 10]] {
                check(period, delay, steps);
            }
        }
    }
}
