//! Commissioning reads: every point of one Modbus device read once, with the raw
//! registers beside the decoded value, for an installer checking the wiring
//! (`spillway read`). One request per point, so a wrong address shows up on the point
//! that has it; SunSpec points are found by walking the device's model chain first.
//!
//! The coils and holding registers the site's loads write on the device (its
//! actuators) are read back too, so a relay module with no points of its own is still
//! asked something: whether it answers is what `read` reports on it.
//!
//! It writes nothing. Every request runs under the device's timeout; a transport error
//! ends the probe of that device (the points not yet read say so).

use std::time::Duration;

use tokio::time::timeout;
use tokio_modbus::ExceptionCode;
use tokio_modbus::client::{Context, Reader};

use super::ExceptionName;
use super::codec::{self, Sentinel};
use super::plan::{self, Decoded, PointSpec, ScaleSpec, Words};
use super::serial::LineFault;
use super::sunspec::{self, ModelMap};
use crate::actuators::targets_of;
use crate::config::model::{DeviceId, Link, PointId, PointRead, Scale, Site, Table, WordOrder, Write};

/// One point as read.
#[derive(Debug, Clone, PartialEq)]
pub struct PointReading {
    /// Which point.
    pub point: PointId,
    /// Where it was read: `holding 40087 ×2`, `coil 3`, `holding 40084 ×1 + scale 40085`
    /// (a scale factor read from its own register, whose word ends `raw`).
    pub origin: String,
    /// The words read (bits as 0/1), the scale-factor register last when there is one.
    pub raw: Vec<u16>,
    /// The value in the point's base unit, or why there is none.
    pub value: Result<f64, String>,
}

/// What probing a device found.
#[derive(Debug, Clone, PartialEq)]
pub struct DeviceProbe {
    /// The SunSpec model chain, as (model id, start address), when the device has one.
    pub models: Vec<(u16, u16)>,
    /// Each of the device's points, in file order.
    pub points: Vec<PointReading>,
    /// Each coil and holding register the site writes on the device, read back (a
    /// SunSpec limit, found through the model chain, and MQTT targets are not).
    pub targets: Vec<TargetReading>,
    /// Whether any request drew a normal answer (not an exception, not silence).
    pub answered: bool,
}

/// An actuator target as read back.
#[derive(Debug, Clone, PartialEq)]
pub struct TargetReading {
    /// The target, as the site file gives it.
    pub write: Write,
    /// Where it was read: `coil 0`, `holding 10 ×2`.
    pub origin: String,
    /// The words read (a coil as 0/1).
    pub raw: Vec<u16>,
    /// What it holds in the unit it is written in (a coil 1.0/0.0; a register decoded
    /// with the target's type and multiplied by its scale), or why there is nothing.
    pub value: Result<f64, String>,
}

/// Why a device could not be probed at all.
#[derive(Debug, thiserror::Error)]
pub enum ProbeError {
    /// The device is not a Modbus device of the site.
    #[error("device #{0} is not a Modbus device of the site")]
    NotModbus(usize),
    /// No connection.
    #[error("cannot connect to {target}: {reason}")]
    Connect {
        /// `host:port` or the serial path.
        target: String,
        /// Why.
        reason: String,
    },
}

/// Reads every point of `device` once.
pub async fn probe(site: &Site, device: DeviceId, connect_timeout: Duration) -> Result<DeviceProbe, ProbeError> {
    let dev = site.devices.get(device.0).ok_or(ProbeError::NotModbus(device.0))?;
    let target = match &dev.link {
        Link::ModbusTcp { host, port, unit } => format!("{host}:{port} unit {unit}"),
        Link::ModbusRtu { path, unit, .. } => format!("{path} unit {unit}"),
        Link::Mqtt => return Err(ProbeError::NotModbus(device.0)),
    };
    let lines = super::SerialLines::new();
    let mut ctx = match timeout(connect_timeout, super::connect(&dev.link, &lines, dev.timeout)).await {
        Ok(Ok(ctx)) => ctx,
        Ok(Err(e)) => return Err(ProbeError::Connect { target, reason: e.to_string() }),
        Err(_) => return Err(ProbeError::Connect { target, reason: "no connection within the timeout".to_owned() }),
    };
    // On a serial line the line times each exchange itself (`serial.rs`) and tells
    // silence from a garbled answer; the outer timeout here is only a backstop.
    let outer =
        if matches!(dev.link, Link::ModbusRtu { .. }) { dev.timeout * 2 + Duration::from_secs(1) } else { dev.timeout };
    let unit = dev.link.modbus_unit().unwrap_or_default();
    let mut p = Prober { ctx: &mut ctx, limit: dev.timeout, outer, unit, dead: None, answered: false };
    let map = if dev.sunspec { p.discover().await } else { Ok(None) };
    let models = match &map {
        Ok(Some(m)) => m.models.iter().map(|&(id, start, _)| (id, start)).collect(),
        _ => Vec::new(),
    };
    let mut points = Vec::new();
    for (i, pt) in site.points.iter().enumerate() {
        if pt.device != device {
            continue;
        }
        let id = PointId(i);
        let spec = match &pt.read {
            PointRead::Modbus(m) => Ok(PointSpec {
                point: id,
                table: m.table,
                address: m.address,
                value_type: m.value_type,
                word_order: m.word_order,
                scale: match m.scale {
                    Scale::Factor(f) => ScaleSpec::Factor(f),
                    Scale::Register { table, address } => ScaleSpec::Register { table, address },
                },
                sentinel: Sentinel::of(m),
                unit_factor: pt.unit_factor,
                boolean: pt.boolean,
                poll: pt.poll,
            }),
            PointRead::SunSpec(s) => match &map {
                Ok(Some(m)) => m.resolve(s.model, &s.point).map(|r| PointSpec {
                    point: id,
                    table: Table::HoldingRegister,
                    address: r.address,
                    value_type: r.value_type,
                    word_order: WordOrder::HighFirst,
                    scale: r.scale_factor.map_or(ScaleSpec::Factor(1.0), |a| ScaleSpec::Register {
                        table: Table::HoldingRegister,
                        address: a,
                    }),
                    sentinel: r.sentinel,
                    unit_factor: pt.unit_factor,
                    boolean: pt.boolean,
                    poll: pt.poll,
                }),
                Ok(None) => Err("the device has no SunSpec map".to_owned()),
                Err(e) => Err(e.clone()),
            },
            PointRead::Mqtt(_) => continue,
        };
        points.push(match spec {
            Ok(spec) => p.read_point(&spec).await,
            Err(reason) => {
                PointReading { point: id, origin: "sunspec".to_owned(), raw: Vec::new(), value: Err(reason) }
            }
        });
    }
    let mut targets = Vec::new();
    for t in targets_of(site, device) {
        let (table, address, count) = match &t {
            Write::Coil { address, .. } => (Table::Coil, *address, 1),
            Write::Register { address, value_type, .. } => (Table::HoldingRegister, *address, value_type.registers()),
            Write::SunSpecLimit { .. } | Write::Mqtt { .. } => continue,
        };
        let origin = match table {
            Table::Coil => format!("coil {address}"),
            _ if count > 1 => format!("holding {address} ×{count}"),
            _ => format!("holding {address}"),
        };
        let (raw, value) = match p.read(table, address, count).await {
            Ok(Ok(w)) => {
                let value = match &t {
                    Write::Register { value_type, word_order, scale, .. } => {
                        codec::decode(&w, *value_type, *word_order, Sentinel::None)
                            .map(|v| v * scale)
                            .ok_or_else(|| "not a number".to_owned())
                    }
                    _ => w.first().map(|b| f64::from(*b)).ok_or_else(|| "no bit in the answer".to_owned()),
                };
                (w, value)
            }
            Ok(Err(code)) => (Vec::new(), Err(ExceptionName::from(code).answer(p.unit))),
            Err(why) => (Vec::new(), Err(why)),
        };
        targets.push(TargetReading { write: t, origin, raw, value });
    }
    let answered = p.answered;
    // Best effort; the transport may already be gone.
    let _ = timeout(Duration::from_millis(100), tokio_modbus::client::Client::disconnect(&mut ctx)).await;
    Ok(DeviceProbe { models, points, targets, answered })
}

struct Prober<'a> {
    ctx: &'a mut Context,
    limit: Duration,
    /// The wait for one request: `limit`, longer on a serial line (which applies
    /// `limit` itself).
    outer: Duration,
    /// The device's unit id, for the advice on an exception.
    unit: u8,
    /// Set after a timeout or transport error: the connection cannot be trusted.
    dead: Option<String>,
    /// Set by the first normal answer.
    answered: bool,
}

impl Prober<'_> {
    /// One read; the outer error is "no usable answer", the inner the exception.
    async fn read(
        &mut self,
        table: Table,
        address: u16,
        count: u16,
    ) -> Result<Result<Vec<u16>, ExceptionCode>, String> {
        if let Some(why) = &self.dead {
            return Err(format!("not read: {why}"));
        }
        let bits = |r: Result<Vec<bool>, ExceptionCode>| {
            r.map(|v| v.iter().take(usize::from(count)).map(|b| u16::from(*b)).collect())
        };
        let ctx = &mut *self.ctx;
        let limit = self.outer;
        let r = match table {
            Table::Coil => timeout(limit, ctx.read_coils(address, count)).await.map(|r| r.map(bits)),
            Table::DiscreteInput => timeout(limit, ctx.read_discrete_inputs(address, count)).await.map(|r| r.map(bits)),
            Table::HoldingRegister => timeout(limit, ctx.read_holding_registers(address, count)).await,
            Table::InputRegister => timeout(limit, ctx.read_input_registers(address, count)).await,
        };
        let why = match r {
            Ok(Ok(r)) => {
                self.answered |= r.is_ok();
                return Ok(r);
            }
            // Connected, and silent: a gateway asked for a unit id it does not have
            // often says nothing at all, so that is the first thing to check.
            Err(_) => self.silent(),
            Ok(Err(e)) => match LineFault::of(&e) {
                Some(LineFault::NoAnswer(_)) => self.silent(),
                // Bytes came back but no valid frame: baud, parity or wiring.
                Some(f) => f.to_string(),
                None => format!("transport error: {e}"),
            },
        };
        self.dead = Some(why.clone());
        Err(why)
    }

    fn silent(&self) -> String {
        format!(
            "no answer within {}: check the device's `unit` id (a gateway often stays silent for a unit it does not have), then its wiring and `timeout`",
            crate::units::format_duration(self.limit)
        )
    }

    /// Finds the SunSpec model chain (`Ok(None)`: no marker at any base).
    async fn discover(&mut self) -> Result<Option<ModelMap>, String> {
        let mut base = None;
        // The exception every base drew, if each drew one about the device (a gateway
        // whose device is silent answers 0x0B to everything): that, not a missing
        // marker, is what to report.
        let mut refused: Option<ExceptionName> = None;
        let mut all_refused = true;
        for b in sunspec::BASES {
            match self.read(Table::HoldingRegister, b, 2).await? {
                Ok(w) if w == sunspec::MARKER => {
                    base = Some(b);
                    break;
                }
                Err(code) if !ExceptionName::from(code).is_about_request() => refused = Some(code.into()),
                _ => all_refused = false,
            }
        }
        let Some(base) = base else {
            return Err(match refused {
                Some(e) if all_refused => e.every_request(self.unit),
                _ => "no SunSpec marker (SunS) at holding register 40000, 50000 or 0".to_owned(),
            });
        };
        let mut models = Vec::new();
        let mut addr = base.checked_add(2);
        while let Some(a) = addr {
            if models.len() >= sunspec::MAX_MODELS {
                break;
            }
            let head = match self.read(Table::HoldingRegister, a, 2).await? {
                Ok(w) => w,
                Err(_) => break,
            };
            let Some((model, next)) = sunspec::chain_step(a, &head) else { break };
            models.push(model);
            addr = next;
        }
        Ok(Some(ModelMap { base, models }))
    }

    async fn read_point(&mut self, spec: &PointSpec) -> PointReading {
        let count = spec.value_type.registers();
        let mut origin = match spec.table {
            Table::Coil => format!("coil {}", spec.address),
            Table::DiscreteInput => format!("discrete {}", spec.address),
            Table::HoldingRegister => format!("holding {} ×{count}", spec.address),
            Table::InputRegister => format!("input {} ×{count}", spec.address),
        };
        let fail = |origin: String, raw: Vec<u16>, why: String| PointReading {
            point: spec.point,
            origin,
            raw,
            value: Err(why),
        };
        let mut raw = match self.read(spec.table, spec.address, count).await {
            Ok(Ok(w)) => w,
            Ok(Err(code)) => return fail(origin, Vec::new(), ExceptionName::from(code).answer(self.unit)),
            Err(why) => return fail(origin, Vec::new(), why),
        };
        let mut words = Words::default();
        words.insert(spec.table, spec.address, &raw);
        if let ScaleSpec::Register { table, address } = spec.scale {
            // The raw words then end with the scale factor's: say where it came from.
            origin.push_str(&format!(" + scale {address}"));
            match self.read(table, address, 1).await {
                Ok(Ok(w)) => {
                    words.insert(table, address, &w);
                    raw.extend(w);
                }
                Ok(Err(code)) => {
                    return fail(
                        origin,
                        raw,
                        format!("scale factor at {address}: {}", ExceptionName::from(code).answer(self.unit)),
                    );
                }
                Err(why) => return fail(origin, raw, why),
            }
        }
        let value = match plan::decode_point(spec, &words) {
            Decoded::Value(v) => Ok(v),
            Decoded::Missing => Err("the device reports it as not implemented".to_owned()),
            Decoded::NotRead => Err("not read".to_owned()),
        };
        PointReading { point: spec.point, origin, raw, value }
    }
}
