//! The PI controller that holds the grid at the import target by throttling the
//! modulating loads (power regulators, chargers, batteries) as one total.
//!
//! Velocity form, `u += kp·Δe + ki·dt·e`, with two clamps that make it wind-up free:
//! the total stays within `[0, capacity]`, and never exceeds what the loads draw now
//! plus the room measured at the grid — so a charger paused below its minimum current
//! does not let the integrator run away while nothing follows it.

use std::time::Duration;

use crate::units::Power;

/// PI state.
#[derive(Debug, Clone)]
pub struct Pi {
    kp: f64,
    ki: f64,
    u: Power,
    last_error: Option<Power>,
}

impl Pi {
    /// A controller with proportional gain `kp` and integral gain `ki` (per second).
    pub fn new(kp: f64, ki: f64) -> Self {
        Pi { kp, ki, u: Power::ZERO, last_error: None }
    }

    /// Forgets the state (fail-safe, lost grid measurement).
    pub fn reset(&mut self) {
        self.u = Power::ZERO;
        self.last_error = None;
    }

    /// Sets the output directly (a feed-forward jump); the next update continues from it.
    pub fn set_output(&mut self, u: Power) {
        self.u = u;
        // The jump is not a change of error the proportional term should answer.
        self.last_error = None;
    }

    /// One update. `error` is `import_target − grid` (positive: room to absorb more),
    /// `drawn` what the modulating loads draw now, `capacity` the most they can draw.
    pub fn update(&mut self, error: Power, drawn: Power, capacity: Power, dt: Duration) -> Power {
        let dt_s = dt.as_secs_f64();
        if dt_s > 0.0 {
            let de = error - self.last_error.unwrap_or(error);
            self.u += de * self.kp + error * (self.ki * dt_s);
        }
        self.last_error = Some(error);
        let ceiling = (drawn + error.max(Power::ZERO)).min(capacity);
        self.u = self.u.clamp(Power::ZERO, ceiling.max(Power::ZERO));
        self.u
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A plant where the grid reads the base load minus PV plus what the loads drew at
    /// the previous tick (one measurement period of delay).
    fn run(kp: f64, ki: f64, export: f64, ticks: usize) -> Vec<f64> {
        let mut pi = Pi::new(kp, ki);
        let mut drawn = 0.0;
        let mut grid = Vec::new();
        for _ in 0..ticks {
            let g = -export + drawn;
            grid.push(g);
            let u = pi.update(Power(40.0 - g), Power(drawn), Power(3000.0), Duration::from_secs(1));
            drawn = u.0;
        }
        grid
    }

    #[test]
    fn holds_the_grid_at_the_import_target_without_overshooting_into_import() {
        let grid = run(0.1, 0.5, 1500.0, 40);
        let last = *grid.last().unwrap();
        assert!((last - 40.0).abs() < 1.0, "settles at the target: {last}");
        let peak_import = grid.iter().cloned().fold(f64::MIN, f64::max);
        assert!(peak_import < 40.0 + 150.0, "little overshoot: {peak_import}");
    }

    #[test]
    fn does_not_wind_up_when_the_loads_are_at_their_capacity() {
        let mut pi = Pi::new(0.1, 0.5);
        for _ in 0..100 {
            pi.update(Power(5000.0), Power(3000.0), Power(3000.0), Duration::from_secs(1));
        }
        // Export gone: the total comes down at once instead of unwinding a huge integral.
        let u = pi.update(Power(-500.0), Power(3000.0), Power(3000.0), Duration::from_secs(1));
        assert!(u.0 < 3000.0, "{u}");
    }
}
