//! Modbus writes without I/O: which targets are due (changed, or their re-assert
//! period has passed, or the link reconnected), the function codes that write them,
//! and the register sequence of the SunSpec power-limit controls.
//!
//! Function codes: a coil fc 5, several contiguous coils due together fc 15, a
//! one-register value fc 6, a multi-register value fc 16. Only addresses named by
//! the configuration are written (for `limit: sunspec`, the registers listed on
//! [`LimitControl`]).

use std::collections::HashMap;
use std::time::Duration;

use tokio::time::Instant;

use super::{DesiredWrite, DeviceCommands, Level};
use crate::config::model::{ValueType, WordOrder, Write};
use crate::sources::modbus::codec;

/// Identity of a written target on one device.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum TargetKey {
    /// A coil.
    Coil(u16),
    /// A holding register (the first of a multi-register value).
    Register(u16),
    /// The SunSpec power-limit control.
    SunSpecLimit,
}

/// One Modbus write request.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum WriteOp {
    /// fc 5.
    Coil {
        /// Address.
        address: u16,
        /// State.
        value: bool,
    },
    /// fc 15.
    Coils {
        /// First address.
        address: u16,
        /// States from there.
        values: Vec<bool>,
    },
    /// fc 6.
    Register {
        /// Address.
        address: u16,
        /// Word.
        value: u16,
    },
    /// fc 16.
    Registers {
        /// First address.
        address: u16,
        /// Words from there.
        words: Vec<u16>,
    },
}

impl WriteOp {
    /// Its function code.
    pub fn function(&self) -> u8 {
        match self {
            WriteOp::Coil { .. } => 5,
            WriteOp::Coils { .. } => 15,
            WriteOp::Register { .. } => 6,
            WriteOp::Registers { .. } => 16,
        }
    }

    /// Its first address.
    pub fn address(&self) -> u16 {
        match self {
            WriteOp::Coil { address, .. }
            | WriteOp::Coils { address, .. }
            | WriteOp::Register { address, .. }
            | WriteOp::Registers { address, .. } => *address,
        }
    }
}

/// How many refresh periods fit in a revert timer: the SunSpec revert timers are set to
/// `REVERT_FACTOR × inverter.refresh`, so three consecutive refreshes may fail before a
/// timer runs out (`common practice` for watchdog margins).
pub const REVERT_FACTOR: u32 = 4;

/// The registers of an inverter's active-power-limit control, found by discovery.
///
/// Source for every offset: the published SunSpec model definitions (`sunspec/models`
/// `json/model_123.json`, `json/model_704.json`); addresses are model start + offset.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LimitControl {
    /// Model 123 (immediate controls). Writes, in this order, each fc 6:
    /// `WMaxLimPct_RvrtTms` (+7, seconds), `WMaxLimPct` (+5, % of WMax ÷ 10^sf),
    /// `WMaxLim_Ena` (+9, 1 = enabled). `WMaxLimPct_SF` is at +23. When the revert timer
    /// expires the inverter drops the limit (full power), so the link re-writes all
    /// three every `inverter.refresh`, a quarter of the timer.
    Immediate {
        /// `WMaxLimPct`.
        pct: u16,
        /// `WMaxLimPct_RvrtTms`.
        revert_time: u16,
        /// `WMaxLim_Ena`.
        enable: u16,
        /// Value of `WMaxLimPct_SF`.
        sf: i16,
    },
    /// Model 704 (DER AC controls). One fc 16 write of the six contiguous registers
    /// +14..=+19: `WMaxLimPctEna` = 1, `WMaxLimPct` = limit, `WMaxLimPctRvrt` = the
    /// site's safe limit, `WMaxLimPctEnaRvrt` = 1, `WMaxLimPctRvrtTms` (uint32,
    /// seconds). `WMaxLimPct_SF` is at +54. If the controller stops refreshing, the
    /// inverter falls back to the safe limit when the timer runs out: the fail-safe
    /// direction for a no-export site.
    DerControls {
        /// `WMaxLimPctEna` (the first of the six).
        enable: u16,
        /// Value of `WMaxLimPct_SF`.
        sf: i16,
    },
}

/// Which SunSpec model the power limit is written to, given the model ids a device
/// offers: 704 when present, else 123 (the choice [`LimitControl::locate`] makes).
pub fn limit_model(models: &[u16]) -> Option<u16> {
    [704, 123].into_iter().find(|m| models.contains(m))
}

/// What an installer must know about the inverter's limit control on this site: `Err`
/// with a warning when the site's export is limited but the limit is written to model
/// 123, which drops the limit (full power) when its revert timer runs out, so a
/// controller that stops leaves the site exporting; `Ok` with a one-line description
/// otherwise. `None` when the device offers neither model.
pub fn limit_model_note(site: &crate::config::model::Site, models: &[u16]) -> Option<Result<String, String>> {
    let model = limit_model(models)?;
    let refresh = site.inverter.as_ref().map_or(Duration::from_secs(10), |i| i.refresh);
    let revert = crate::units::format_duration(refresh * REVERT_FACTOR);
    Some(match model {
        704 => {
            let safe = site.inverter.as_ref().map_or(0.0, |i| i.safe_limit.0);
            Ok(format!(
                "power limit: model 704; if Spillway stops refreshing it, the inverter falls back to {} W \
                 by itself after {revert}",
                crate::units::trim_number(safe)
            ))
        }
        _ if site.export_limit().is_some() => Err(format!(
            "power limit: model 123 only; if Spillway stops refreshing it, the inverter drops the limit after \
             {revert} and may export at full power. On a site whose export is limited, use an inverter with \
             model 704 or fit an independent export limiter, as the local grid code requires"
        )),
        _ => Ok(format!(
            "power limit: model 123; if Spillway stops refreshing it, the inverter returns to full power after \
             {revert} (export is allowed on this site)"
        )),
    })
}

impl std::fmt::Display for LimitControl {
    /// `model 123, WMaxLimPct at holding 40154, scale factor -1`.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match *self {
            LimitControl::Immediate { pct, sf, .. } => {
                write!(f, "model 123, WMaxLimPct at holding {pct}, scale factor {sf}")
            }
            LimitControl::DerControls { enable, sf } => {
                write!(f, "model 704, WMaxLimPctEna at holding {enable}, scale factor {sf}")
            }
        }
    }
}

impl LimitControl {
    /// Finds the power-limit control on a device's SunSpec map: model 704 when present
    /// (it fails safe), else model 123. Returns the control with a scale factor of 0 and
    /// the address of its `WMaxLimPct_SF` register, which the caller reads and applies
    /// with [`LimitControl::with_sf`].
    pub fn locate(map: &crate::sources::modbus::sunspec::ModelMap) -> Option<(LimitControl, Option<u16>)> {
        use crate::sources::modbus::sunspec;
        let at = |model: u16, point: &str| -> Option<u16> {
            let (start, _) = map.start(model)?;
            Some(start + sunspec::locate(model, point).ok()?.offset)
        };
        if map.start(704).is_some() {
            let enable = at(704, "WMaxLimPctEna")?;
            Some((LimitControl::DerControls { enable, sf: 0 }, at(704, "WMaxLimPct_SF")))
        } else if map.start(123).is_some() {
            let control = LimitControl::Immediate {
                pct: at(123, "WMaxLimPct")?,
                revert_time: at(123, "WMaxLimPct_RvrtTms")?,
                enable: at(123, "WMaxLim_Ena")?,
                sf: 0,
            };
            Some((control, at(123, "WMaxLimPct_SF")))
        } else {
            None
        }
    }

    /// The same control with its scale factor read from the device.
    pub fn with_sf(self, sf: i16) -> LimitControl {
        match self {
            LimitControl::DerControls { enable, .. } => LimitControl::DerControls { enable, sf },
            LimitControl::Immediate { pct, revert_time, enable, .. } => {
                LimitControl::Immediate { pct, revert_time, enable, sf }
            }
        }
    }

    /// The writes that set the limit to `pct` % of rated power.
    pub fn ops(&self, pct: f64, safe_pct: f64, refresh: Duration) -> Vec<WriteOp> {
        let secs = (refresh.as_secs_f64() * f64::from(REVERT_FACTOR)).ceil().max(1.0);
        let raw = |p: f64, sf: i16| -> u16 {
            let v = p.clamp(0.0, 100.0) / 10f64.powi(i32::from(sf));
            v.round().clamp(0.0, 65534.0) as u16
        };
        match *self {
            LimitControl::Immediate { pct: at_pct, revert_time, enable, sf } => vec![
                WriteOp::Register { address: revert_time, value: secs.min(65535.0) as u16 },
                WriteOp::Register { address: at_pct, value: raw(pct, sf) },
                WriteOp::Register { address: enable, value: 1 },
            ],
            LimitControl::DerControls { enable, sf } => {
                let t = secs.min(f64::from(u32::MAX)) as u32;
                vec![WriteOp::Registers {
                    address: enable,
                    words: vec![1, raw(pct, sf), raw(safe_pct, sf), 1, (t >> 16) as u16, t as u16],
                }]
            }
        }
    }
}

/// Writes that are due together, and what to remember once they succeeded.
#[derive(Debug, Clone, PartialEq)]
pub struct Batch {
    /// Requests, in order.
    pub ops: Vec<WriteOp>,
    /// Targets written and the encoded value each now holds.
    pub marks: Vec<(TargetKey, Vec<u16>)>,
    /// Who asked (for logs).
    pub origin: String,
}

/// What was last written to each target and when.
#[derive(Debug, Default, Clone)]
pub struct WriteTracker {
    written: HashMap<TargetKey, (Vec<u16>, Instant)>,
}

/// Percent values the SunSpec control needs besides the desired limit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LimitContext {
    /// The control found on the device.
    pub control: LimitControl,
    /// The site's safe limit in % of the device's own base (`WMax`).
    pub safe_pct: f64,
    /// Converts a percentage of the site's `inverter.rated` into one of the device's
    /// `WMax` (rated ÷ WMax; 1 when the device does not say).
    pub rated_to_device: f64,
    /// How many of the device's seconds pass in one of ours: 1 on a real site; the
    /// clock speed in the demo, whose simulated inverter counts its revert timer in
    /// simulated seconds while our refresh period shrank to wall time.
    pub device_seconds_per_second: f64,
}

impl LimitContext {
    /// The writes that set `pct_of_rated` (% of the site's rating), refreshed every
    /// `refresh` of our time.
    pub fn ops(&self, pct_of_rated: f64, refresh: Duration) -> Vec<WriteOp> {
        let pct = (pct_of_rated * self.rated_to_device).clamp(0.0, 100.0);
        self.control.ops(pct, self.safe_pct, refresh.mul_f64(self.device_seconds_per_second.max(1.0)))
    }
}

impl WriteTracker {
    /// Forgets every write: after a reconnect the device may have rebooted, so all
    /// targets are written again.
    pub fn forget_all(&mut self) {
        self.written.clear();
    }

    /// Records a batch as written at `now`.
    pub fn mark(&mut self, batch: &Batch, now: Instant) {
        for (k, v) in &batch.marks {
            self.written.insert(k.clone(), (v.clone(), now));
        }
    }

    /// The batches due at `now`. `limit` is `None` while the SunSpec control is not
    /// known (the limit waits for discovery).
    pub fn due(&self, commands: &DeviceCommands, now: Instant, limit: Option<&LimitContext>) -> Vec<Batch> {
        if !commands.commanded {
            return Vec::new();
        }
        let is_due = |key: &TargetKey, enc: &[u16], refresh: Duration| match self.written.get(key) {
            Some((v, at)) => v != enc || now.saturating_duration_since(*at) >= refresh,
            None => true,
        };
        let mut coils: Vec<(u16, bool, &DesiredWrite)> = Vec::new();
        let mut out = Vec::new();
        for w in &commands.writes {
            match &w.target {
                Write::Coil { address, .. } => {
                    let on = w.level.number() != 0.0;
                    if is_due(&TargetKey::Coil(*address), &[u16::from(on)], w.refresh) {
                        coils.push((*address, on, w));
                    }
                }
                Write::Register { address, value_type, word_order, scale, .. } => {
                    let words = register_words(w.level, *value_type, *word_order, *scale);
                    let key = TargetKey::Register(*address);
                    if is_due(&key, &words, w.refresh) {
                        let op = if words.len() == 1 {
                            WriteOp::Register { address: *address, value: words[0] }
                        } else {
                            WriteOp::Registers { address: *address, words: words.clone() }
                        };
                        out.push(Batch { ops: vec![op], marks: vec![(key, words)], origin: w.origin.clone() });
                    }
                }
                Write::SunSpecLimit { .. } => {
                    let Some(ctx) = limit else { continue };
                    let ops = ctx.ops(w.level.number(), w.refresh);
                    // Remember the encoded request so a changed limit is written at once.
                    let enc: Vec<u16> = ops
                        .iter()
                        .flat_map(|op| match op {
                            WriteOp::Register { value, .. } => vec![*value],
                            WriteOp::Registers { words, .. } => words.clone(),
                            _ => Vec::new(),
                        })
                        .collect();
                    if is_due(&TargetKey::SunSpecLimit, &enc, w.refresh) {
                        out.push(Batch { ops, marks: vec![(TargetKey::SunSpecLimit, enc)], origin: w.origin.clone() });
                    }
                }
                Write::Mqtt { .. } => {}
            }
        }
        // Contiguous coils due together go in one fc 15 request.
        coils.sort_by_key(|c| c.0);
        let mut i = 0;
        while i < coils.len() {
            let mut j = i + 1;
            while j < coils.len() && coils[j].0 == coils[j - 1].0.wrapping_add(1) {
                j += 1;
            }
            let run = &coils[i..j];
            let op = if run.len() == 1 {
                WriteOp::Coil { address: run[0].0, value: run[0].1 }
            } else {
                WriteOp::Coils { address: run[0].0, values: run.iter().map(|c| c.1).collect() }
            };
            let mut origins: Vec<&str> = run.iter().map(|c| c.2.origin.as_str()).collect();
            origins.dedup();
            out.insert(
                0,
                Batch {
                    ops: vec![op],
                    marks: run.iter().map(|c| (TargetKey::Coil(c.0), vec![u16::from(c.1)])).collect(),
                    origin: origins.join(", "),
                },
            );
            i = j;
        }
        out
    }

    /// When the next periodic re-assert falls due (`None` if nothing was written).
    pub fn next_refresh(&self, commands: &DeviceCommands) -> Option<Instant> {
        commands
            .writes
            .iter()
            .filter_map(|w| {
                let key = match &w.target {
                    Write::Coil { address, .. } => TargetKey::Coil(*address),
                    Write::Register { address, .. } => TargetKey::Register(*address),
                    Write::SunSpecLimit { .. } => TargetKey::SunSpecLimit,
                    Write::Mqtt { .. } => return None,
                };
                self.written.get(&key).map(|(_, at)| *at + w.refresh)
            })
            .min()
    }
}

/// The words a register target holds for a level: level ÷ scale, encoded.
pub fn register_words(level: Level, ty: ValueType, order: WordOrder, scale: f64) -> Vec<u16> {
    let scale = if scale == 0.0 { 1.0 } else { scale };
    codec::encode(level.number() / scale, ty, order)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ctx(rated_to_device: f64, speed: f64) -> LimitContext {
        LimitContext {
            control: LimitControl::DerControls { enable: 100, sf: -2 },
            safe_pct: 0.0,
            rated_to_device,
            device_seconds_per_second: speed,
        }
    }

    fn words(ops: &[WriteOp]) -> Vec<u16> {
        match ops {
            [WriteOp::Registers { words, .. }] => words.clone(),
            other => panic!("one block write expected: {other:?}"),
        }
    }

    fn sunspec_site(export: &str) -> crate::config::model::Site {
        let text = format!(
            "
site: {{ name: T, timezone: UTC, export: {export} }}
devices:
  inv: {{ modbus_tcp: 127.0.0.1:1502, unit: 1, sunspec: true }}
points:
  grid: {{ device: inv, sunspec: 201.W }}
inverter:
  rated: 4kW
  limit: {{ device: inv, sunspec: true }}
  safe_limit: 200W
"
        );
        crate::config::load_str("t.yaml", &text).map_err(|e| e.render(false)).unwrap().site
    }

    #[test]
    fn model_704_is_preferred_because_it_falls_back_to_the_safe_limit_by_itself() {
        assert_eq!(limit_model(&[1, 101, 120, 123, 704]), Some(704));
        assert_eq!(limit_model(&[1, 101, 123]), Some(123));
        assert_eq!(limit_model(&[1, 101]), None);
        let note = limit_model_note(&sunspec_site("forbidden"), &[1, 101, 123, 704]).unwrap().unwrap();
        assert!(note.contains("model 704") && note.contains("200 W") && note.contains("40 s"), "{note}");
    }

    #[test]
    fn model_123_alone_on_a_site_that_may_not_export_is_a_warning() {
        // Model 123 drops its limit when the revert timer runs out (SunSpec model 123,
        // `WMaxLimPct_RvrtTms`): a controller that stops leaves the inverter at full power.
        for export in ["forbidden", "1kW"] {
            let warning = limit_model_note(&sunspec_site(export), &[1, 101, 123]).unwrap().unwrap_err();
            assert!(warning.contains("full power") && warning.contains("model 704"), "{warning}");
        }
        let note = limit_model_note(&sunspec_site("allowed"), &[1, 101, 123]).unwrap().unwrap();
        assert!(note.contains("export is allowed"), "{note}");
        assert!(limit_model_note(&sunspec_site("forbidden"), &[1, 101]).is_none());
    }

    #[test]
    fn the_percentage_is_converted_to_the_devices_own_base() {
        // 50 % of a 5 kW site rating on an inverter whose WMax is 4 kW: 62.5 %.
        let w = words(&ctx(5.0 / 4.0, 1.0).ops(50.0, Duration::from_secs(10)));
        assert_eq!(w[1], 6250);
        // Never above 100 % of the device.
        assert_eq!(words(&ctx(2.0, 1.0).ops(80.0, Duration::from_secs(10)))[1], 10_000);
    }

    #[test]
    fn the_revert_timer_is_counted_in_the_devices_seconds() {
        // A real site: 4 × a 10 s refresh.
        let w = words(&ctx(1.0, 1.0).ops(50.0, Duration::from_secs(10)));
        assert_eq!((w[4], w[5]), (0, 40));
        // The demo at 20×: our refresh shrank to 0.5 s of wall time, but the simulated
        // inverter counts simulated seconds, so its timer must still be 40 s.
        let w = words(&ctx(1.0, 20.0).ops(50.0, Duration::from_millis(500)));
        assert_eq!((w[4], w[5]), (0, 40));
    }
}
