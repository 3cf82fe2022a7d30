//! The export guard: curtails the inverter when the loads cannot absorb the surplus,
//! holds the grid at its target, releases slowly, and escalates to the safe limit if
//! export persists past the deadline (an inverter that ignores its limit).
//!
//! Cutting is immediate and proportional (the whole excess in one tick); releasing is
//! rate-limited, so a load that starts can take over the power before it is exported.

use std::time::Duration;

use super::decision::{LimitReason, Mode};
use crate::config::model::Site;
use crate::units::{Power, Timestamp};

/// How close to its limit the inverter's output must be to count as held back by it.
fn pinned_margin(rated: Power) -> Power {
    Power((rated.0 * 0.02).max(50.0))
}

/// Guard state between ticks.
#[derive(Debug, Clone, Default)]
pub struct Guard {
    limit: Option<Power>,
    export_since: Option<Timestamp>,
    escalated: bool,
    /// When the limit was last changed: the next change waits for a grid reading
    /// measured after it, so a delayed meter cannot make the guard correct twice.
    acted_at: Option<Timestamp>,
    /// Whether the last change raised the limit (a cut may then follow at once).
    last_raised: bool,
    /// The guard's own changes of the limit since the grid reading in use was measured,
    /// oldest first: when, the limit before (the rating for none), and whether it was a
    /// raise. A reading older than cuts alone may still show export beyond what the cuts
    /// removed; that much is cut at once, without waiting for a reading measured after.
    changes: std::collections::VecDeque<(Timestamp, Power, bool)>,
    /// A raise whose effect the PV readings have not yet shown in full: the inverter
    /// ramps up to a raised limit (often over more than one PV poll), and a grid
    /// reading taken during the ramp shows only part of it. Another raise waits until
    /// the PV has stopped rising, and for a grid reading measured after that.
    raise_pending: bool,
    /// When the PV was last seen settled after a raise (a PV sample's measured time).
    settled_at: Option<Timestamp>,
    /// Recent PV readings, stamped with when each was measured, to carry a late grid
    /// reading forward to now.
    pv_history: std::collections::VecDeque<(Timestamp, Power)>,
    /// The PV last seen producing below its limit (so giving all the array had), and
    /// when: what the array can give, for a site without a `pv_available` point.
    ceiling: Option<(Timestamp, Power)>,
}

impl Guard {
    /// Moves every instant the guard remembers by `ms` (the wall clock was set back by
    /// that much): its timers keep their lengths, and its history stays comparable with
    /// readings stamped by the clock as it now is.
    pub fn shift_time(&mut self, ms: i64) {
        let shift = |t: &mut Timestamp| *t = t.shifted(ms);
        self.export_since.iter_mut().for_each(shift);
        self.acted_at.iter_mut().for_each(shift);
        self.settled_at.iter_mut().for_each(shift);
        self.changes.iter_mut().for_each(|c| shift(&mut c.0));
        self.pv_history.iter_mut().for_each(|p| shift(&mut p.0));
        self.ceiling.iter_mut().for_each(|c| shift(&mut c.0));
    }
}

/// How long a PV reading taken below the limit stands for what the array can give. The
/// sun moves, so the memory is short; our choice, not a standard.
pub const CEILING_MEMORY: Duration = Duration::from_secs(15 * 60);

/// The longest stretch of time one release step may count (see `decide`).
const RELEASE_WINDOW_MAX: Duration = Duration::from_secs(5);

/// The PV history reaches back to the grid reading in use, however late the meter is
/// (a reading is used until it goes stale, so its age is bounded by the point's latency
/// plus its stale timeout); this only bounds the memory if readings stop moving on.
const PV_HISTORY_MAX: Duration = Duration::from_secs(10 * 60);

impl Guard {
    /// Takes `limit` as the limit in force, before any tick (see
    /// [`super::Engine::start_from_safe_limit`]).
    pub fn assume(&mut self, limit: Power) {
        self.limit = Some(limit);
    }

    /// Whether a limit is in force.
    pub fn curtailing(&self) -> bool {
        self.limit.is_some()
    }

    /// Surplus hidden by the curtailment: what the inverter could add if released.
    /// Known exactly when the site has a `pv_available` point. Otherwise, while the
    /// inverter sits at its limit, the array is assumed able to give what it was last
    /// seen giving below a limit (within [`CEILING_MEMORY`], and only while that
    /// reading is not disproved by the array holding a higher limit since), else the
    /// rest of the inverter's rating. Without that memory, a load started on the
    /// rating's guess at dusk finds too little, is stopped by its stop rule, and starts
    /// again on the same guess after its `min_off`, all evening. Either guess errs
    /// towards import, never export: the guard still holds the grid. Called once per
    /// tick, before [`Guard::decide`]: it also takes this tick's PV reading in.
    pub fn hidden_headroom(&mut self, site: &Site, values: &[f64], now: Timestamp) -> Power {
        let value = |p: Option<crate::config::model::PointId>| p.map(|p| values[p.0]).filter(|v| v.is_finite());
        let Some(inv) = &site.inverter else {
            // Spillway cannot curtail, but an inverter may hold itself back (its own export
            // limitation, with its own current transformer): what it reports it could give
            // beyond what it gives is surplus a load may take, since that inverter
            // releases it as the load starts. Grid-tied only: off-grid, the charge
            // controller's throttling is already the float headroom.
            let grid_tied = matches!(site.connection, crate::config::model::Connection::Grid { .. });
            return match (value(site.roles.pv_available), value(site.roles.pv)) {
                (Some(avail), Some(pv)) if grid_tied => Power((avail - pv).max(0.0)),
                _ => Power::ZERO,
            };
        };
        let pv = value(site.roles.pv).map(Power);
        let margin = pinned_margin(inv.rated);
        if let Some(p) = pv {
            match self.limit {
                // Below its limit (or with none) the array gives all it has.
                None => self.ceiling = Some((now, p)),
                Some(l) if p < l - margin => self.ceiling = Some((now, p)),
                // Holding a limit above the remembered reading: that reading was a cloud
                // or a ramp, not what the array can give.
                Some(l) if self.ceiling.is_some_and(|(_, c)| l > c + margin) => self.ceiling = None,
                Some(_) => {}
            }
        }
        if self.ceiling.is_some_and(|(t, _)| now.since(t) > CEILING_MEMORY) {
            self.ceiling = None;
        }
        let Some(limit) = self.limit else {
            return Power::ZERO;
        };
        if let (Some(avail), Some(pv)) = (value(site.roles.pv_available), pv) {
            return Power((avail - pv.0).max(0.0));
        }
        match pv {
            Some(pv) if pv >= limit - margin => {
                let rest_of_rating = (inv.rated - limit).max(Power::ZERO);
                match self.ceiling {
                    Some((_, c)) => rest_of_rating.min((c - limit).max(Power::ZERO)),
                    None => rest_of_rating,
                }
            }
            _ => Power::ZERO,
        }
    }

    /// Decides the inverter limit for this tick. `delta_loads` is how much more the
    /// loads will draw after this tick's commands; `absorbable` is how much more the
    /// modulating loads could still take.
    #[allow(clippy::too_many_arguments)]
    pub fn decide(
        &mut self,
        site: &Site,
        values: &[f64],
        grid: Option<(Power, Timestamp)>,
        pv_measured_at: Timestamp,
        delta_loads: Power,
        absorbable: Power,
        mode: Mode,
        now: Timestamp,
        dt: Duration,
    ) -> (Option<Power>, LimitReason) {
        let (Some(inv), Some(export_limit)) = (&site.inverter, site.export_limit()) else {
            self.limit = None;
            return (None, LimitReason::None);
        };
        if mode == Mode::Failsafe {
            // The fail-safe set the limit: after it, the guard waits for a reading
            // measured after the last forced tick (one taken before the meter went
            // silent, served again as it returns, must not count).
            self.acted_at = Some(now);
            self.limit = Some(inv.safe_limit);
            self.changes.clear();
            self.last_raised = false;
            self.raise_pending = false;
            self.export_since = None;
            self.escalated = false;
            return (self.limit, LimitReason::Failsafe);
        }
        let Some((grid, measured_at)) = grid else {
            return (self.limit, if self.limit.is_some() { LimitReason::ExportGuard } else { LimitReason::None });
        };
        // `measured_at` is when the reading's information starts (arrival − latency):
        // only a reading wholly after the last correction can show its effect.
        let fresh_reading = self.acted_at.is_none_or(|t| measured_at > t);
        let tolerance = site.guard.tolerance;
        // Hold a no-export site at its small import; a limited one its margin under the
        // limit. The margin keeps meter noise from reading as export past the limit: held
        // within the tolerance of it, noise alone set off cuts and escalations.
        let target =
            if export_limit.0 <= 0.0 { site.import_target.max(tolerance) } else { -export_limit + site.guard.margin };

        // Escalation: export above limit + tolerance for longer than the deadline.
        if -grid > export_limit + tolerance {
            let since = *self.export_since.get_or_insert(now);
            if now.since(since) >= site.guard.deadline {
                self.escalated = true;
            }
        } else {
            self.export_since = None;
            self.escalated = false;
        }
        // Escalating cuts to the safe limit, never up to it: where the safe limit is the
        // export limit itself (a limited site's usual choice), the guard may already
        // hold the inverter below it, and "escalating" gave power back into the very
        // export it answered. Below the safe limit, the guard's own cuts go on instead.
        if self.escalated && self.limit.is_none_or(|l| l >= inv.safe_limit) {
            self.limit = Some(inv.safe_limit);
            return (self.limit, LimitReason::Escalated);
        }

        let pv = site.roles.pv.map(|p| values[p.0]).filter(|v| v.is_finite()).map(Power);
        // The grid reading describes the site as it was at `measured_at`; the inverter's
        // own reading is current. Whatever the PV did since then shows at the meter only
        // later, so carry the reading forward: more PV now means less import now.
        let pv_change = match pv {
            Some(p) => {
                if self.pv_history.back().is_none_or(|(t, _)| pv_measured_at > *t) {
                    // A raise has settled once the PV reaches the limit, or stops rising
                    // between two samples both measured after the raise.
                    if self.raise_pending && self.acted_at.is_some_and(|a| pv_measured_at > a) {
                        let margin = pinned_margin(inv.rated);
                        let at_limit = p >= self.limit.unwrap_or(inv.rated) - margin;
                        let flat = self
                            .pv_history
                            .back()
                            .is_some_and(|(t, prev)| self.acted_at.is_some_and(|a| *t > a) && p <= *prev + margin);
                        if at_limit || flat {
                            self.raise_pending = false;
                            self.settled_at = Some(pv_measured_at);
                        }
                    }
                    self.pv_history.push_back((pv_measured_at, p));
                }
                // Samples measured before the reading are never needed again: the next
                // reading is measured later still. The newest sample always stays.
                while self.pv_history.len() > 1
                    && self.pv_history.front().is_some_and(|(t, _)| *t < measured_at || now.since(*t) > PV_HISTORY_MAX)
                {
                    self.pv_history.pop_front();
                }
                // The PV as the grid reading saw it: the first PV sample measured at or
                // after the reading. A change between two PV samples may have happened
                // before the reading or after it; counting it as already in the reading
                // is what keeps the guard from correcting its own raise twice (the
                // inverter follows a raised limit within a PV poll, long before the next
                // PV sample shows it). A cloud that clears in that gap is cut one reading
                // later; while curtailed, the limit's ceiling caps what it can add.
                let then = self.pv_history.iter().find(|(t, _)| *t >= measured_at).or(self.pv_history.back());
                then.map_or(Power::ZERO, |(_, old)| p - *old)
            }
            None => Power::ZERO,
        };
        // A reading measured before the guard's last cuts shows export the cuts have
        // since removed: credit it with them. What it shows beyond that is new (a load
        // ending, a cloud clearing) and is cut now; waiting for a reading measured after
        // a cut (often a trim of a few watts) let such export stand until the deadline
        // and escalate. The credit is the cuts' full size, so it errs towards cutting
        // too little (the next reading corrects), never too much. Only when every change
        // since the reading was a cut: a raise's ramp shows in the PV carry-forward and
        // would be cut back as if it were new export. After a fail-safe no change is
        // recorded, and the guard waits for a reading measured after it, as it must.
        while self.changes.front().is_some_and(|(t, _, _)| *t < measured_at || now.since(*t) > PV_HISTORY_MAX) {
            self.changes.pop_front();
        }
        let unseen_cut = match self.changes.front() {
            Some((_, before, _)) if !fresh_reading && self.changes.iter().all(|(_, _, raised)| !raised) => {
                Some((*before - self.limit.unwrap_or(inv.rated)).max(Power::ZERO))
            }
            _ => None,
        };
        let expected = grid + delta_loads - pv_change + unseen_cut.unwrap_or(Power::ZERO);
        // The release rate is per second of time since the limit last moved: a change
        // waits for a reading measured after the last one, so counting only this tick
        // would slow the release by the meter's latency. Capped, so a limit that sat
        // still for long is not given back in one leap.
        let since_change = self.acted_at.map_or(dt, |t| now.since(t)).min(RELEASE_WINDOW_MAX).max(dt);
        let rate = site.guard.release_rate * since_change.as_secs_f64();
        // A cut right after a release may act on a reading that predates the release: it
        // then cuts too little, never too much, so it need not wait. Everything else does.
        let cut_needed = match self.limit {
            None => expected < -export_limit,
            Some(_) => expected < target - tolerance,
        };
        // On a reading older than a cut, only export past the limit itself counts: the
        // hold band is for fresh readings, or every noisy reading would trim the limit
        // again before the last trim could show, and the limit would drift down.
        let breach = expected < -(export_limit + tolerance);
        let may_act = fresh_reading || (cut_needed && self.last_raised) || (unseen_cut.is_some() && breach);
        if !may_act {
            return (self.limit, if self.limit.is_some() { LimitReason::ExportGuard } else { LimitReason::None });
        }
        // Without a PV reading there is no ramp to watch: raises wait only for a fresh
        // grid reading, as before.
        let may_raise = pv.is_none() || (!self.raise_pending && self.settled_at.is_none_or(|s| measured_at >= s));
        let before = self.limit;
        let next = match self.limit {
            // Engage only on export beyond the limit that the loads could not take.
            None if expected < -export_limit => Some(pv.unwrap_or(inv.rated) - (target - expected)),
            None => None,
            Some(current) => {
                let base = pv.map_or(current, |p| p.min(current));
                if expected < target - tolerance {
                    // Cut the whole excess at once.
                    Some(base - (target - expected))
                } else if expected > target + tolerance && !may_raise {
                    Some(current)
                } else if expected > target + tolerance {
                    // Importing more than the target: give the PV back gently — but no
                    // further than the PV could use now. Behind a cloud the array makes
                    // less than the limit; raising the limit then would only let the sun's
                    // return surge into export, so the limit stays a ceiling just above
                    // what the site consumes. A release never lowers the limit, though:
                    // following the consumption down would rewrite the inverter at every
                    // wobble of the house load (all night long, with no sun at all).
                    let excess = expected - target;
                    let raised = current + rate.min(excess);
                    Some(match pv {
                        Some(p) => raised.min(p + excess + tolerance * 2.0).max(current),
                        None => raised,
                    })
                } else if may_raise && absorbable.0 > 0.0 && pv.is_none_or(|p| p >= current - pinned_margin(inv.rated))
                {
                    // At the target, the inverter held at its limit, and a modulating load
                    // could take more: probe upwards, never by more than would push the
                    // grid past the export limit.
                    let step = rate.min(absorbable).min((expected + export_limit).max(Power::ZERO));
                    Some(current + step)
                } else {
                    Some(current)
                }
            }
        };
        self.limit = match next {
            Some(l) if l >= inv.rated => None,
            // Changes within half the tolerance are noise: keeping the limit saves the
            // inverter a write and the loop a wobble. Never wider than half a second's
            // release, or a slow release would be swallowed for good and the limit
            // never climb back.
            Some(l) if before.is_some_and(|b| (l - b).abs() < (tolerance * 0.5).min(site.guard.release_rate * 0.5)) => {
                before
            }
            Some(l) => Some(l.clamp(Power::ZERO, inv.rated)),
            None => None,
        };
        if self.limit != before {
            self.acted_at = Some(now);
            self.last_raised = match (before, self.limit) {
                (Some(b), Some(l)) => l > b,
                (Some(_), None) => true,
                _ => false,
            };
            self.raise_pending = self.last_raised && pv.is_some();
            self.changes.push_back((now, before.unwrap_or(inv.rated), self.last_raised));
        }
        (self.limit, if self.limit.is_some() { LimitReason::ExportGuard } else { LimitReason::None })
    }
}
