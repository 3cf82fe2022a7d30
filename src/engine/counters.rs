//! Energy and run-time counters that reset at local midnight and month start, and the
//! persisted form the daemon writes to disk so a restart mid-day loses nothing.

use std::time::Duration;

use serde::{Deserialize, Serialize};

use crate::units::{Energy, Power};

/// Site-wide energy counters.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct SiteCounters {
    /// Imported since local midnight.
    pub import_today: Energy,
    /// Exported since local midnight.
    pub export_today: Energy,
    /// Imported this calendar month.
    pub import_month: Energy,
    /// Exported this calendar month.
    pub export_month: Energy,
    /// Drawn by managed loads since local midnight.
    pub diverted_today: Energy,
}

impl SiteCounters {
    /// Adds one tick of grid power (`None`: no fresh grid reading, or no grid at all,
    /// as off-grid) and of diverted power, which counts whether or not the grid is read:
    /// an off-grid site's dump loads divert with no meter to show it.
    pub fn integrate(&mut self, grid: Option<Power>, diverted: Power, dt: Duration) {
        match grid {
            Some(g) if g.0 >= 0.0 => {
                let e = g.over(dt);
                self.import_today += e;
                self.import_month += e;
            }
            Some(g) => {
                let e = (-g).over(dt);
                self.export_today += e;
                self.export_month += e;
            }
            None => {}
        }
        self.diverted_today += diverted.over(dt);
    }

    /// Clears the daily counters (and the monthly ones on a new month).
    pub fn roll_over(&mut self, new_month: bool) {
        self.import_today = Energy::ZERO;
        self.export_today = Energy::ZERO;
        self.diverted_today = Energy::ZERO;
        if new_month {
            self.import_month = Energy::ZERO;
            self.export_month = Energy::ZERO;
        }
    }
}

/// What survives a restart: written atomically by the daemon, read back at start-up.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct PersistedState {
    /// Local day (days since 1970-01-01, local time) the counters belong to.
    pub day: i64,
    /// Calendar month (year × 12 + month) the monthly counters belong to.
    pub month: i64,
    /// Site counters in Wh.
    pub import_today_wh: f64,
    /// Wh exported today.
    pub export_today_wh: f64,
    /// Wh imported this month.
    pub import_month_wh: f64,
    /// Wh exported this month.
    pub export_month_wh: f64,
    /// Wh diverted today.
    pub diverted_today_wh: f64,
    /// Per load, by name.
    pub loads: Vec<PersistedLoad>,
}

/// A load's counters.
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
pub struct PersistedLoad {
    /// Load name (matched on restore; loads renamed or removed are dropped).
    pub name: String,
    /// Seconds on today.
    pub runtime_today_s: f64,
    /// Wh drawn today.
    pub energy_today_wh: f64,
    /// Milliseconds since the epoch of the last completed high-temperature cycle, per obligation.
    pub last_cycle_ms: Vec<Option<i64>>,
    /// Per obligation: whether a `reach` duty's level was read at its deadline today
    /// (absent in files written before it was kept: none judged).
    #[serde(default)]
    pub judged_today: Vec<bool>,
    /// Per obligation: whether a `reach` duty was seen at its target at the deadline today.
    #[serde(default)]
    pub met_today: Vec<bool>,
    /// Whether its command drew power when saved (every load is in its safe state
    /// after a start, so one that was on has just been switched off).
    #[serde(default)]
    pub on: bool,
    /// Milliseconds since the epoch of its last switch on or off, if any.
    #[serde(default)]
    pub changed_ms: Option<i64>,
    /// Its starts in the hour before the save (the `max_starts_per_hour` window), ms.
    #[serde(default)]
    pub starts_ms: Vec<i64>,
}
