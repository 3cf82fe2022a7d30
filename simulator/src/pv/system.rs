//! The assembled PV system: sun → clear sky → clouds → plane of array → cell
//! temperature → DC (strings or modules) → inverter with its power limit.
//!
//! Speed: everything that changes slowly (sun position, clear-sky irradiance, angles of
//! incidence, air temperature, wind, which modules are shaded) is computed at "knots"
//! every `knot_interval` (60 s by default; up to 15 min apart at night while the sun
//! cannot reach the horizon) and interpolated linearly in between; a 1 s step then costs
//! a cloud update and a few multiplications per array, with no division, allocation or
//! sort. At knot times the values are exact, which is what the reference tests compare.
//!
//! With a measured GHI series the sky is as measured while the sun is up; at night the
//! output is 0 whatever the file says (sensor offsets are common).

use chrono::{DateTime, Datelike, NaiveDate, Offset, TimeZone};
use chrono_tz::Tz;
use serde::Serialize;

use crate::inverter::{ETA_REFERENCE, PowerLimit, PvWattsCurve};
use crate::pv_output::{AcPower, PvSample, PvSource};
use crate::sky::{self, Irradiance, at_least, at_most};
use crate::sun::{Atmosphere, Observer, SunTrack, delta_t_estimate};
use crate::transposition::{Geometry, Plane, Poa, SkyDiffuse};
use crate::weather::{
    Clouds, MeasuredQuantity, MeasuredSeries, RowNotice, WeatherConfig, WeatherKind, Wind, air_temperature,
};

use super::config::{ClearSkyModel, Layout, LocationConfig, SolarConfig, SolarError, parse_clock};
use super::shaded_string_equivalent;

/// A module shaded in a daily window (seconds of the local day).
#[derive(Debug, Clone)]
struct Shade {
    module: usize,
    from_s: f64,
    until_s: f64,
    blocked: f64,
}

impl Shade {
    fn active(&self, tod_s: f64) -> bool {
        if self.from_s <= self.until_s {
            (self.from_s..self.until_s).contains(&tod_s)
        } else {
            tod_s >= self.from_s || tod_s < self.until_s
        }
    }
}

#[derive(Debug, Clone)]
struct StringModel {
    modules: usize,
    module_w: f64,
    shades: Vec<Shade>,
    /// Modules shaded in the current knot interval with the beam fraction blocked
    /// (several windows on one module add up, at most 1), least blocked first.
    shaded_now: Vec<(usize, f64)>,
    /// The module-level inverter curve (used with `Layout::Module`).
    module_curve: PvWattsCurve,
}

#[derive(Debug, Clone)]
struct ArrayModel {
    plane: Plane,
    gamma: f64,
    u0: f64,
    u1: f64,
    strings: Vec<StringModel>,
    nameplate_w: f64,
    /// This array's values at the two knots (which one is "earlier" is `Model::cur`).
    knots: [ArrayKnot; 2],
    /// Whether any of its modules is shaded in the current knot interval.
    shaded_now: bool,
}

/// Per-array values at one knot.
#[derive(Debug, Clone, Copy, Default)]
struct ArrayKnot {
    geometry: Geometry,
    /// 1 / (u0 + u1·wind): the Faiman heat-transfer term, K per W/m².
    heat: f64,
}

/// Slowly varying values at one knot time.
#[derive(Debug, Clone, Copy, Default)]
struct Knot {
    t_ms: i64,
    clear: Irradiance,
    cos_zenith: f64,
    zenith_deg: f64,
    dni_extra: f64,
    inv_dni_extra: f64,
    air_c: f64,
    local_tod_s: f64,
    solar_day: i64,
}

#[derive(Debug, Clone)]
enum Sky {
    Clouds(Clouds),
    Measured(MeasuredSeries),
}

#[derive(Debug, Clone)]
struct Model {
    observer: Observer,
    atmosphere: Atmosphere,
    delta_t: Option<f64>,
    track: Option<SunTrack>,
    tz: Tz,
    clear_sky: ClearSkyModel,
    linke: f64,
    pressure_pa: f64,
    albedo: f64,
    diffuse: SkyDiffuse,
    derate: f64,
    arrays: Vec<ArrayModel>,
    layout: Layout,
    central: PvWattsCurve,
    weather: WeatherConfig,
    sky: Sky,
    wind: Wind,
    knot_ms: i64,
    k0: Knot,
    k1: Knot,
    /// Slot of `k0` in every `ArrayModel::knots` (the other slot holds `k1`).
    cur: usize,
    have_knots: bool,
    inv_span_ms: f64,
    has_shading: bool,
    inv_nameplate_w: f64,
    doy_day: i64,
    doy_extra: f64,
    tz_block: i64,
    tz_offset_s: f64,
    last_kc: f64,
    batch: Batch,
}

/// Available AC power for the steps ahead in the current knot interval, computed in one
/// tight loop by [`Model::available_ac`]. Step by step, each PV evaluation sat between
/// two plant updates and waited on its own dependency chain; in a batch the out-of-order
/// core overlaps consecutive evaluations (only the cloud index is carried from one to
/// the next). Values are bit-for-bit those of stepping one at a time.
#[derive(Debug, Clone, Default)]
struct Batch {
    t0_ms: i64,
    dt_ms: i64,
    dt_s: f64,
    /// Index of the next step to hand out.
    next: usize,
    ac_w: Vec<f64>,
    /// The clouds and clear-sky index before the batch's first step, with the day and
    /// night flag the batch ran under, to replay exactly the steps a caller took if it
    /// leaves the batch early (a time jump, another step length, or `step`).
    clouds_before: Option<Clouds>,
    kc_before: f64,
    night: bool,
    solar_day: i64,
}

/// The most steps computed ahead at once (a night interval at 1 s is 900).
const BATCH_MAX: usize = 1024;

#[derive(Debug, Clone)]
enum Source {
    Model(Box<Model>),
    Replay(MeasuredSeries),
}

/// A PV system ready to step: modelled from configuration, or replaying measured AC.
/// Built by [`SolarConfig::build`]; implements [`PvSource`].
#[derive(Debug, Clone)]
pub struct PvSystem {
    source: Source,
    limit: PowerLimit,
    rated_ac_w: f64,
    nameplate_w: f64,
    tz: Tz,
    notices: Vec<RowNotice>,
}

impl PvSystem {
    pub(super) fn from_config(
        cfg: &SolarConfig,
        location: &LocationConfig,
        weather: &WeatherConfig,
        seed: u64,
    ) -> Result<PvSystem, SolarError> {
        let tz = location.tz()?;
        let rated_ac_w = cfg.rated_ac_w();
        let limit = PowerLimit::new(rated_ac_w, cfg.ramp_w_per_s());
        let mut notices = Vec::new();
        let mut measured = None;
        if let Some(m) = &weather.measured {
            let (series, n) = MeasuredSeries::load(&m.path, tz, m.max_gap)?;
            notices = n;
            measured = Some(series);
        }
        if let Some(series) = measured.as_ref().filter(|s| s.quantity() == MeasuredQuantity::PvAc) {
            return Ok(PvSystem {
                source: Source::Replay(series.clone()),
                limit,
                rated_ac_w,
                nameplate_w: cfg.nameplate_w(),
                tz,
                notices,
            });
        }
        let mut arrays = Vec::new();
        for a in &cfg.arrays {
            let strings = a
                .strings
                .iter()
                .enumerate()
                .map(|(k, s)| StringModel {
                    modules: s.modules,
                    module_w: s.module_power,
                    module_curve: PvWattsCurve::new(
                        cfg.inverter.rated_ac.unwrap_or(s.module_power),
                        cfg.inverter.efficiency,
                        ETA_REFERENCE,
                    ),
                    shaded_now: Vec::new(),
                    shades: cfg
                        .shading
                        .iter()
                        .filter(|sh| sh.array == a.name && sh.string == k + 1)
                        .map(|sh| Shade {
                            module: sh.module - 1,
                            from_s: parse_clock(&sh.from).unwrap_or(0.0),
                            until_s: parse_clock(&sh.until).unwrap_or(0.0),
                            blocked: sh.blocked / 100.0,
                        })
                        .collect(),
                })
                .collect::<Vec<_>>();
            arrays.push(ArrayModel {
                plane: Plane::new(a.tilt, a.azimuth),
                gamma: a.temp_coefficient,
                u0: a.cell_temperature.u0,
                u1: a.cell_temperature.u1,
                nameplate_w: strings.iter().map(|s| s.modules as f64 * s.module_w).sum(),
                strings,
                knots: [ArrayKnot::default(); 2],
                shaded_now: false,
            });
        }
        let pressure_pa = sky::pressure_at_altitude(location.altitude);
        let model = Model {
            observer: Observer {
                latitude_deg: location.latitude,
                longitude_deg: location.longitude,
                elevation_m: location.altitude,
            },
            atmosphere: Atmosphere {
                pressure_hpa: pressure_pa / 100.0,
                temperature_c: weather.air_temp,
                refraction_deg: 0.5667,
            },
            delta_t: cfg.delta_t,
            track: None,
            tz,
            clear_sky: cfg.clear_sky,
            linke: weather.linke_turbidity,
            pressure_pa,
            albedo: cfg.albedo,
            diffuse: cfg.sky_diffuse,
            derate: 1.0 - cfg.losses / 100.0,
            arrays,
            layout: cfg.inverter.layout,
            central: PvWattsCurve::new(rated_ac_w, cfg.inverter.efficiency, ETA_REFERENCE),
            weather: weather.clone(),
            sky: match measured {
                Some(series) => Sky::Measured(series),
                None => Sky::Clouds(Clouds::new(weather.sky, seed)),
            },
            wind: Wind::new(weather.wind, weather.gustiness, seed),
            knot_ms: (cfg.knot_interval * 1000.0).round() as i64,
            k0: Knot::default(),
            k1: Knot::default(),
            cur: 0,
            have_knots: false,
            inv_span_ms: 1.0,
            has_shading: !cfg.shading.is_empty(),
            inv_nameplate_w: 1.0 / cfg.nameplate_w(),
            doy_day: i64::MIN,
            doy_extra: 0.0,
            tz_block: i64::MIN,
            tz_offset_s: 0.0,
            last_kc: 1.0,
            batch: Batch::default(),
        };
        Ok(PvSystem {
            source: Source::Model(Box::new(model)),
            limit,
            rated_ac_w,
            nameplate_w: cfg.nameplate_w(),
            tz,
            notices,
        })
    }

    /// Problems found in a measured CSV (bad rows with line numbers, long gaps). Empty
    /// for a modelled sky.
    pub fn notices(&self) -> &[RowNotice] {
        &self.notices
    }

    /// Total AC rating, W.
    pub fn rated_ac_w(&self) -> f64 {
        self.rated_ac_w
    }

    /// DC nameplate, W.
    pub fn nameplate_w(&self) -> f64 {
        self.nameplate_w
    }

    /// The site's time zone.
    pub fn tz(&self) -> Tz {
        self.tz
    }

    /// The kind of the current day (`None` for a measured or replayed series).
    pub fn day_kind(&self) -> Option<WeatherKind> {
        match &self.source {
            Source::Model(m) => match &m.sky {
                Sky::Clouds(c) => Some(c.day_kind()),
                Sky::Measured(_) => None,
            },
            Source::Replay(_) => None,
        }
    }
}

impl Model {
    fn extraterrestrial(&mut self, t_s: f64) -> f64 {
        let day = (t_s / 86_400.0).floor() as i64;
        if day != self.doy_day {
            self.doy_day = day;
            self.doy_extra = sky::extraterrestrial(sky::day_of_year_utc(t_s));
        }
        self.doy_extra
    }

    fn local_offset_s(&mut self, t_s: f64) -> f64 {
        // Time-zone rules change at most a few times a year, on quarter hours.
        let block = (t_s / 900.0).floor() as i64;
        if block != self.tz_block {
            self.tz_block = block;
            self.tz_offset_s = DateTime::from_timestamp(t_s.floor() as i64, 0).map_or(0.0, |utc| {
                f64::from(self.tz.offset_from_utc_datetime(&utc.naive_utc()).fix().local_minus_utc())
            });
        }
        self.tz_offset_s
    }

    #[cold]
    #[inline(never)]
    fn fill_knot(&mut self, t_ms: i64, which: bool, span_s: f64) {
        let t_s = t_ms as f64 / 1000.0;
        let track = self.track.get_or_insert_with(|| {
            let dt = self.delta_t.unwrap_or_else(|| {
                DateTime::from_timestamp(t_s as i64, 0).map_or(69.0, |d| delta_t_estimate(d.year(), d.month()))
            });
            SunTrack::new(&self.observer, &self.atmosphere, dt)
        });
        let sun = track.at(t_s);
        let dni_extra = self.extraterrestrial(t_s);
        let offset = self.local_offset_s(t_s);
        let cos_z = sun.zenith_deg.to_radians().cos();
        let clear = if cos_z <= 0.0 {
            Irradiance::default()
        } else {
            match self.clear_sky {
                ClearSkyModel::Ineichen => {
                    let am = sky::relative_airmass(sun.zenith_deg).map(|r| sky::absolute_airmass(r, self.pressure_pa));
                    sky::ineichen(sun.zenith_deg, am, self.linke, self.observer.elevation_m, dni_extra)
                }
                ClearSkyModel::Haurwitz => sky::erbs(sky::haurwitz_ghi(sun.zenith_deg), sun.zenith_deg, dni_extra),
            }
        };
        let solar_s = t_s + self.observer.longitude_deg * 240.0;
        let solar_hour = crate::sun::wrap(solar_s / 3600.0, 24.0);
        let kind = match &self.sky {
            Sky::Clouds(c) => c.day_kind(),
            Sky::Measured(_) => WeatherKind::Clear,
        };
        let air_c = air_temperature(&self.weather, kind, solar_hour);
        let wind = self.wind.step(span_s);
        let slot = if which { self.cur ^ 1 } else { self.cur };
        for a in &mut self.arrays {
            a.knots[slot] = ArrayKnot { geometry: a.plane.geometry(&sun), heat: 1.0 / (a.u0 + a.u1 * wind) };
        }
        let knot = if which { &mut self.k1 } else { &mut self.k0 };
        knot.t_ms = t_ms;
        knot.clear = clear;
        knot.cos_zenith = cos_z;
        knot.zenith_deg = sun.zenith_deg;
        knot.dni_extra = dni_extra;
        knot.inv_dni_extra = if dni_extra > 0.0 { 1.0 / dni_extra } else { 0.0 };
        knot.air_c = air_c;
        knot.local_tod_s = crate::sun::wrap(t_s + offset, 86_400.0);
        knot.solar_day = (solar_s / 86_400.0).floor() as i64;
    }

    /// How many knot intervals the next knot may lie ahead of one with the sun at
    /// `zenith_deg`: 1 by day; at night, as many as the sun needs to climb back to 91°
    /// at a bound of 0.3°/min (it never moves faster than 0.25°/min), at most 15 min.
    /// Knots stay on the regular grid, so dawn is sampled exactly as by day.
    fn knots_ahead(&self, zenith_deg: f64) -> i64 {
        let minutes = ((zenith_deg - 91.0) / 0.3).floor();
        if minutes < 1.0 {
            return 1;
        }
        let ahead_ms = (minutes.min(15.0) * 60_000.0) as i64;
        (ahead_ms / self.knot_ms).max(1)
    }

    /// Which modules are shaded from `k0` on. Windows are given in whole minutes and
    /// knots fall on whole minutes of the local clock (the knot interval divides a
    /// minute by default), so evaluating them per knot is exact.
    #[cold]
    fn update_shading(&mut self) {
        let tod = self.k0.local_tod_s;
        for a in &mut self.arrays {
            for s in &mut a.strings {
                s.shaded_now.clear();
                for sh in s.shades.iter().filter(|sh| sh.active(tod)) {
                    match s.shaded_now.iter_mut().find(|(m, _)| *m == sh.module) {
                        Some((_, b)) => *b = (*b + sh.blocked).min(1.0),
                        None => s.shaded_now.push((sh.module, sh.blocked.min(1.0))),
                    }
                }
                s.shaded_now.sort_by(|x, y| x.1.total_cmp(&y.1));
            }
            a.shaded_now = a.strings.iter().any(|s| !s.shaded_now.is_empty());
        }
    }

    #[inline]
    fn ensure_knots(&mut self, t_ms: i64) {
        if self.have_knots && t_ms >= self.k0.t_ms && t_ms < self.k1.t_ms {
            return;
        }
        let start = t_ms.div_euclid(self.knot_ms) * self.knot_ms;
        if self.have_knots && self.k1.t_ms == start {
            std::mem::swap(&mut self.k0, &mut self.k1);
            self.cur ^= 1;
        } else {
            // A jump (first step, or a step longer than the knot spacing): start afresh.
            self.fill_knot(start, false, self.knot_ms as f64 / 1000.0);
            self.have_knots = true;
        }
        if self.has_shading {
            self.update_shading();
        }
        let next = self.k0.t_ms + self.knots_ahead(self.k0.zenith_deg) * self.knot_ms;
        let span_s = (next - self.k0.t_ms) as f64 / 1000.0;
        self.fill_knot(next, true, span_s);
        self.inv_span_ms = 1.0 / (next - self.k0.t_ms) as f64;
    }

    /// Available AC power for the step `[t_ms, t_ms + dt_s)`, served from a batch
    /// computed ahead (see [`Batch`]); the same value `produce` gives.
    #[inline]
    fn available_ac(&mut self, t_ms: i64, dt_s: f64) -> f64 {
        let b = &mut self.batch;
        if b.next < b.ac_w.len() && dt_s == b.dt_s && t_ms == b.t0_ms + b.next as i64 * b.dt_ms {
            let w = b.ac_w[b.next];
            b.next += 1;
            return w;
        }
        self.fill_batch(t_ms, dt_s)
    }

    /// Starts a batch at `t_ms` running to the next knot, and returns its first value.
    /// A measured sky, or a step that is not whole milliseconds, is stepped one at a time.
    #[inline(never)]
    fn fill_batch(&mut self, t_ms: i64, dt_s: f64) -> f64 {
        self.leave_batch();
        let dt_ms = (dt_s * 1000.0).round() as i64;
        if !matches!(self.sky, Sky::Clouds(_)) || dt_ms <= 0 || dt_ms as f64 != dt_s * 1000.0 {
            return self.produce(t_ms, dt_s).0;
        }
        self.ensure_knots(t_ms);
        let steps = ((self.k1.t_ms - t_ms + dt_ms - 1) / dt_ms).clamp(1, BATCH_MAX as i64) as usize;
        let mut b = std::mem::take(&mut self.batch);
        b.ac_w.clear();
        b.t0_ms = t_ms;
        b.dt_ms = dt_ms;
        b.dt_s = dt_s;
        b.kc_before = self.last_kc;
        b.night = self.k0.clear.ghi <= 0.0 && self.k1.clear.ghi <= 0.0;
        b.solar_day = self.k0.solar_day;
        b.clouds_before = match &self.sky {
            Sky::Clouds(c) => Some(c.clone()),
            Sky::Measured(_) => None,
        };
        let plain = !b.night && self.layout == Layout::String && matches!(self.arrays.as_slice(), [a] if !a.shaded_now);
        if plain {
            b.ac_w.resize(steps, 0.0);
            self.fill_plain(&mut b.ac_w, t_ms, dt_ms, dt_s);
        } else if b.night {
            // What `produce` gives between two knots with the sun down: nothing, with the
            // clouds left where they are.
            b.ac_w.resize(steps, 0.0);
        } else {
            for i in 0..steps {
                b.ac_w.push(self.produce(t_ms + i as i64 * dt_ms, dt_s).0);
            }
        }
        b.next = 1;
        let first = b.ac_w[0];
        self.batch = b;
        first
    }

    /// The batch of the common site (one unshaded array on a string inverter, clouds, the
    /// sun up): `produce`'s chain, the same operations in the same order, with nothing
    /// from the sample that is not needed and the cloud step inlined. Only the cloud
    /// index is carried from one step to the next, so the core overlaps its dependency
    /// chain with the rest of the step and with the steps around it.
    fn fill_plain(&mut self, out: &mut [f64], t_ms: i64, dt_ms: i64, dt_s: f64) {
        let Sky::Clouds(clouds) = &mut self.sky else {
            unreachable!("fill_plain runs under clouds only");
        };
        let day = self.k0.solar_day;
        let (k0, k1) = (&self.k0, &self.k1);
        let array = &self.arrays[0];
        let (a0, a1) = (&array.knots[self.cur & 1], &array.knots[(self.cur ^ 1) & 1]);
        let optics = (self.albedo, self.diffuse, self.derate);
        let mut kc = self.last_kc;
        // Written in place rather than pushed: no capacity check a step.
        for (i, ac) in out.iter_mut().enumerate() {
            kc = clouds.step_inlined(day, dt_s);
            let f = (t_ms + i as i64 * dt_ms - k0.t_ms) as f64 * self.inv_span_ms;
            let air_c = lerp(k0.air_c, k1.air_c, f);
            let (clear, cos_z) = clear_sky_at(k0, k1, f);
            let irr = sky::cloudy(&clear, cos_z, kc);
            let (_, global, _, per_irr) = array_at(array, (a0, a1), f, &irr, cos_z, air_c, k0.inv_dni_extra, optics);
            // `produce` sums into 0.0 first; 0.0 + x differs from x only for x = −0,
            // which `at_least` turns into +0 either way.
            let dc = at_least(global * array.nameplate_w * per_irr, 0.0);
            *ac = self.central.ac(dc);
        }
        self.last_kc = kc;
    }

    /// Ends the batch. If some of its steps were not taken, the clouds went further than
    /// the caller: put them back and replay the steps taken, so that what follows is
    /// what stepping one at a time would have given.
    fn leave_batch(&mut self) {
        let b = &mut self.batch;
        if b.next < b.ac_w.len()
            && let (Some(before), Sky::Clouds(clouds)) = (b.clouds_before.take(), &mut self.sky)
        {
            *clouds = before;
            self.last_kc = b.kc_before;
            if !b.night {
                for _ in 0..b.next {
                    self.last_kc = clouds.step(b.solar_day, b.dt_s);
                }
            }
        }
        b.ac_w.clear();
        b.next = 0;
    }

    /// DC power (after the derate) and available AC power at `t_ms`, and the sample
    /// fields that describe the sky. Inlined into both callers: the batch reads only the
    /// AC power, and the optimiser then drops the sample's stores entirely.
    #[inline(always)]
    fn produce(&mut self, t_ms: i64, dt_s: f64) -> (f64, PvSample) {
        self.ensure_knots(t_ms);
        // No division on the per-step path: `inv_span_ms` is kept with the knots.
        let f = (t_ms - self.k0.t_ms) as f64 * self.inv_span_ms;
        let (k0, k1) = (&self.k0, &self.k1);
        let air_c = lerp(k0.air_c, k1.air_c, f);
        if k0.clear.ghi <= 0.0 && k1.clear.ghi <= 0.0 {
            let sample = PvSample { cell_temp_c: air_c, clear_sky_index: self.last_kc, ..PvSample::default() };
            return (0.0, sample);
        }
        let (clear, cos_z) = clear_sky_at(k0, k1, f);
        let dni_extra = k0.dni_extra;
        let (irr, kc) = match &mut self.sky {
            Sky::Clouds(c) => {
                let kc = c.step(k0.solar_day, dt_s);
                (sky::cloudy(&clear, cos_z, kc), kc)
            }
            Sky::Measured(series) => {
                let ghi = series.value_at(t_ms as f64 * 0.001);
                let kc = if clear.ghi > 1.0 { ghi / clear.ghi } else { 1.0 };
                let zenith = lerp(k0.zenith_deg, k1.zenith_deg, f);
                (sky::erbs(ghi, zenith, dni_extra), kc)
            }
        };
        self.last_kc = kc;
        let mut dc_total = 0.0;
        let mut ac_total = 0.0;
        let mut poa_weighted = 0.0;
        let mut first_cell = f64::NAN;
        let (c0, c1) = (self.cur & 1, (self.cur ^ 1) & 1);
        let optics = (self.albedo, self.diffuse, self.derate);
        for array in &self.arrays {
            let knots = (&array.knots[c0], &array.knots[c1]);
            let (poa, global, cell, per_irr) = array_at(array, knots, f, &irr, cos_z, air_c, k0.inv_dni_extra, optics);
            if first_cell.is_nan() {
                first_cell = cell;
            }
            poa_weighted += global * array.nameplate_w;
            if self.layout == Layout::String && !array.shaded_now {
                // Every string sees the same irradiance: one product for the array.
                dc_total += global * array.nameplate_w * per_irr;
                continue;
            }
            for s in &array.strings {
                match self.layout {
                    Layout::String => {
                        let equivalent = shaded_string_equivalent(s.modules, global, poa.beam, &s.shaded_now);
                        dc_total += equivalent * s.module_w * per_irr;
                    }
                    Layout::Module => {
                        let unshaded_dc = global * s.module_w * per_irr;
                        let unshaded_ac = s.module_curve.ac(unshaded_dc);
                        for &(_, blocked) in &s.shaded_now {
                            let dc = at_least(global - blocked * poa.beam, 0.0) * s.module_w * per_irr;
                            dc_total += dc;
                            ac_total += s.module_curve.ac(dc);
                        }
                        let clean = (s.modules - s.shaded_now.len()) as f64;
                        dc_total += clean * unshaded_dc;
                        ac_total += clean * unshaded_ac;
                    }
                }
            }
        }
        let dc_total = at_least(dc_total, 0.0);
        if self.layout == Layout::String {
            ac_total = self.central.ac(dc_total);
        }
        let sample = PvSample {
            dc_w: dc_total,
            poa_w_m2: poa_weighted * self.inv_nameplate_w,
            ghi_w_m2: irr.ghi,
            cell_temp_c: first_cell,
            clear_sky_index: kc,
            ..PvSample::default()
        };
        (ac_total, sample)
    }
}

/// Linear interpolation from `a` (at the earlier knot) to `b`, at fraction `f`.
#[inline(always)]
fn lerp(a: f64, b: f64, f: f64) -> f64 {
    a + (b - a) * f
}

/// The clear sky and cos(zenith) at fraction `f` between two knots.
#[inline(always)]
fn clear_sky_at(k0: &Knot, k1: &Knot, f: f64) -> (Irradiance, f64) {
    let clear = Irradiance {
        ghi: lerp(k0.clear.ghi, k1.clear.ghi, f),
        dni: lerp(k0.clear.dni, k1.clear.dni, f),
        dhi: lerp(k0.clear.dhi, k1.clear.dhi, f),
    };
    (clear, lerp(k0.cos_zenith, k1.cos_zenith, f))
}

/// One array under the sky `irr` at fraction `f` between its knots: plane-of-array
/// irradiance, its global value, the cell temperature, and W of DC per (W/m²) of
/// irradiance per W of nameplate. `optics` is (albedo, sky-diffuse model, derate).
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn array_at(
    array: &ArrayModel,
    (a0, a1): (&ArrayKnot, &ArrayKnot),
    f: f64,
    irr: &Irradiance,
    cos_z: f64,
    air_c: f64,
    inv_dni_extra: f64,
    (albedo, diffuse, derate): (f64, SkyDiffuse, f64),
) -> (Poa, f64, f64, f64) {
    let g = Geometry {
        cos_aoi: lerp(a0.geometry.cos_aoi, a1.geometry.cos_aoi, f),
        cos_zenith: cos_z,
        projection_ratio: lerp(a0.geometry.projection_ratio, a1.geometry.projection_ratio, f),
    };
    let poa = array.plane.poa_with_inverse(&g, irr, inv_dni_extra, albedo, diffuse);
    let global = poa.global();
    let cell = air_c + global * lerp(a0.heat, a1.heat, f);
    let per_irr = 0.001 * (1.0 + array.gamma * (cell - 25.0)) * derate;
    (poa, global, cell, per_irr)
}

impl PvSystem {
    /// One step: the sample with its AC powers. Inlined into both trait methods, so
    /// that `step_ac` (the plant's call) drops the sample's other fields.
    #[inline(always)]
    fn advance(&mut self, t_ms: i64, dt_s: f64, limit_w: Option<f64>) -> PvSample {
        let (available, mut sample) = match &mut self.source {
            Source::Model(m) => {
                m.leave_batch();
                m.produce(t_ms, dt_s)
            }
            Source::Replay(series) => {
                let ac = series.value_at(t_ms as f64 / 1000.0).min(self.rated_ac_w);
                (ac, PvSample { dc_w: ac / crate::inverter::ETA_NOMINAL, clear_sky_index: 1.0, ..PvSample::default() })
            }
        };
        let limit = self.limit.advance(limit_w, dt_s);
        sample.available_ac_w = available;
        sample.ac_w = at_most(available, limit);
        sample
    }
}

impl PvSource for PvSystem {
    /// Output for the step starting at `t_ms` (UTC Unix milliseconds), evaluated at its
    /// start; the limit follower advances by `dt_s`.
    fn step(&mut self, t_ms: i64, dt_s: f64, limit_w: Option<f64>) -> PvSample {
        self.advance(t_ms, dt_s, limit_w)
    }

    fn step_ac(&mut self, t_ms: i64, dt_s: f64, limit_w: Option<f64>) -> AcPower {
        let Source::Model(m) = &mut self.source else {
            let s = self.advance(t_ms, dt_s, limit_w);
            return AcPower { ac_w: s.ac_w, available_ac_w: s.available_ac_w };
        };
        let available = m.available_ac(t_ms, dt_s);
        let limit = self.limit.advance(limit_w, dt_s);
        AcPower { ac_w: at_most(available, limit), available_ac_w: available }
    }
}

/// Energies of one simulated day.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize)]
pub struct DaySummary {
    /// Global horizontal irradiation, kWh/m².
    pub ghi_kwh_m2: f64,
    /// Plane-of-array irradiation (nameplate-weighted over arrays), kWh/m².
    pub poa_kwh_m2: f64,
    /// DC energy after losses, kWh.
    pub dc_kwh: f64,
    /// AC energy delivered, kWh.
    pub ac_kwh: f64,
    /// Highest AC power in a step, W.
    pub peak_ac_w: f64,
}

/// UTC Unix milliseconds of local midnight starting `date` (01:00 where midnight is
/// skipped by a daylight-saving change).
pub fn local_midnight_ms(tz: Tz, date: NaiveDate) -> Option<i64> {
    [0, 1].iter().find_map(|&h| {
        date.and_hms_opt(h, 0, 0).and_then(|n| tz.from_local_datetime(&n).earliest()).map(|t| t.timestamp_millis())
    })
}

/// Runs `system` through the local calendar day `date` at `step_s` with no power limit,
/// calling `each` with every step's start time (ms) and sample. Energies are sums of
/// power × step (rectangle rule, samples at step starts).
pub fn simulate_day(
    system: &mut PvSystem,
    date: NaiveDate,
    step_s: f64,
    mut each: impl FnMut(i64, &PvSample),
) -> DaySummary {
    let tz = system.tz();
    let start = local_midnight_ms(tz, date).unwrap_or(0);
    let end = date.succ_opt().and_then(|d| local_midnight_ms(tz, d)).unwrap_or(start + 86_400_000);
    let step_ms = (step_s * 1000.0).round().max(1.0) as i64;
    let hours = step_ms as f64 / 3_600_000.0;
    let mut s = DaySummary::default();
    let mut t = start;
    while t < end {
        let sample = system.step(t, step_ms as f64 / 1000.0, None);
        s.ghi_kwh_m2 += sample.ghi_w_m2 * hours / 1000.0;
        s.poa_kwh_m2 += sample.poa_w_m2 * hours / 1000.0;
        s.dc_kwh += sample.dc_w * hours / 1000.0;
        s.ac_kwh += sample.ac_w * hours / 1000.0;
        s.peak_ac_w = s.peak_ac_w.max(sample.ac_w);
        each(t, &sample);
        t += step_ms;
    }
    s
}

/// Yield of one day with the same modules on a central string inverter and on
/// module-level inverters.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct LayoutGap {
    /// AC energy with series strings on a central inverter, kWh.
    pub string_kwh: f64,
    /// AC energy with one inverter per module, kWh.
    pub module_kwh: f64,
    /// `module_kwh − string_kwh`, kWh.
    pub gap_kwh: f64,
    /// The gap relative to the module-level yield, percent.
    pub gap_percent: f64,
}

/// Compares the string and module-level layouts of `cfg` over `date` (same weather seed;
/// both with their default ratings, so the total AC rating equals the DC nameplate).
pub fn layout_gap(
    cfg: &SolarConfig,
    location: &LocationConfig,
    weather: &WeatherConfig,
    seed: u64,
    date: NaiveDate,
    step_s: f64,
) -> Result<LayoutGap, SolarError> {
    let run = |layout: Layout| -> Result<f64, SolarError> {
        let mut c = cfg.clone();
        c.inverter.layout = layout;
        c.inverter.rated_ac = None;
        let mut system = c.build(location, weather, seed)?;
        Ok(simulate_day(&mut system, date, step_s, |_, _| {}).ac_kwh)
    };
    let string_kwh = run(Layout::String)?;
    let module_kwh = run(Layout::Module)?;
    let gap_kwh = module_kwh - string_kwh;
    Ok(LayoutGap {
        string_kwh,
        module_kwh,
        gap_kwh,
        gap_percent: if module_kwh > 0.0 { 100.0 * gap_kwh / module_kwh } else { 0.0 },
    })
}
