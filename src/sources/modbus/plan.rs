//! Read planning: a device's points grouped by table and poll period into as few
//! requests as the protocol allows, and the decoding of each point from the words read.

use std::collections::HashMap;
use std::time::Duration;

use super::codec::{self, Sentinel};
use crate::config::model::{PointId, Table, ValueType, WordOrder};

/// Most registers one read may ask for (fc 3/4). Source: Modbus Application Protocol
/// Specification V1.1b3, §6.3 and §6.4 (quantity of registers 1 to 125).
pub const MAX_REGISTERS: u16 = 125;
/// Most bits one read may ask for (fc 1/2). Source: same specification, §6.1 and §6.2
/// (quantity of coils / inputs 1 to 2000).
pub const MAX_BITS: u16 = 2000;
/// Unused registers a request may span to join two runs. Small, because a device may
/// have holes in its map that answer IllegalDataAddress (`common practice`); a block
/// that does is split back into its runs (see [`Block::split`]).
pub const MAX_GAP_REGISTERS: u16 = 8;
/// Unused bits a request may span to join two runs.
pub const MAX_GAP_BITS: u16 = 32;

/// How a point's raw value is scaled.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ScaleSpec {
    /// A constant factor.
    Factor(f64),
    /// × 10^sf with sf an i16 in this register (SunSpec `sunssf`).
    Register {
        /// Table of the scale-factor register.
        table: Table,
        /// Its address.
        address: u16,
    },
}

/// A point resolved to registers on its device.
#[derive(Debug, Clone, PartialEq)]
pub struct PointSpec {
    /// Which point.
    pub point: PointId,
    /// Table read.
    pub table: Table,
    /// First address.
    pub address: u16,
    /// Encoding.
    pub value_type: ValueType,
    /// Word order.
    pub word_order: WordOrder,
    /// Scale from raw to the configured unit.
    pub scale: ScaleSpec,
    /// SunSpec "not implemented" value, if any.
    pub sentinel: Sentinel,
    /// Configured unit to base unit.
    pub unit_factor: f64,
    /// An on/off point: any non-zero value reads as 1.
    pub boolean: bool,
    /// How often to read it.
    pub poll: Duration,
}

impl PointSpec {
    fn len(&self) -> u16 {
        self.value_type.registers()
    }
}

/// One read request.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Block {
    /// Table read.
    pub table: Table,
    /// First address.
    pub start: u16,
    /// Registers or bits.
    pub count: u16,
    /// The contiguous runs this block joined (more than one when it spans a gap).
    pub runs: Vec<(u16, u16)>,
}

impl Block {
    /// The block's runs as separate blocks (after a device refused the gap).
    pub fn split(&self) -> Vec<Block> {
        self.runs
            .iter()
            .map(|&(start, count)| Block { table: self.table, start, count, runs: vec![(start, count)] })
            .collect()
    }
}

/// Points polled at one period, and the blocks that read them.
#[derive(Debug, Clone, PartialEq)]
pub struct Group {
    /// Poll period.
    pub period: Duration,
    /// Points decoded after each poll.
    pub points: Vec<PointSpec>,
    /// Requests of one poll.
    pub blocks: Vec<Block>,
}

/// Groups points by poll period and plans the fewest reads per table.
pub fn plan(points: &[PointSpec]) -> Vec<Group> {
    let mut periods: Vec<Duration> = points.iter().map(|p| p.poll).collect();
    periods.sort();
    periods.dedup();
    periods
        .into_iter()
        .map(|period| {
            let members: Vec<PointSpec> = points.iter().filter(|p| p.poll == period).cloned().collect();
            let mut ranges: Vec<(Table, u16, u16)> = Vec::new();
            for p in &members {
                ranges.push((p.table, p.address, p.len()));
                if let ScaleSpec::Register { table, address } = p.scale {
                    ranges.push((table, address, 1));
                }
            }
            Group { period, blocks: blocks(ranges), points: members }
        })
        .collect()
}

/// Merges `(table, start, len)` ranges into blocks within the protocol's limits.
fn blocks(mut ranges: Vec<(Table, u16, u16)>) -> Vec<Block> {
    ranges.sort();
    let mut out: Vec<Block> = Vec::new();
    for (table, start, len) in ranges {
        let end = u32::from(start) + u32::from(len); // exclusive
        let (limit, gap) = match table {
            Table::Coil | Table::DiscreteInput => (MAX_BITS, MAX_GAP_BITS),
            Table::InputRegister | Table::HoldingRegister => (MAX_REGISTERS, MAX_GAP_REGISTERS),
        };
        if let Some(b) = out.last_mut().filter(|b| b.table == table) {
            let b_end = u32::from(b.start) + u32::from(b.count);
            let joins = u32::from(start) <= b_end + u32::from(gap);
            let new_end = b_end.max(end);
            if joins && new_end - u32::from(b.start) <= u32::from(limit) {
                b.count = (new_end - u32::from(b.start)) as u16;
                // Extend the last run when touching or overlapping, else start a new one.
                match b.runs.last_mut() {
                    Some(r) if u32::from(start) <= u32::from(r.0) + u32::from(r.1) => {
                        let r_end = (u32::from(r.0) + u32::from(r.1)).max(end);
                        r.1 = (r_end - u32::from(r.0)) as u16;
                    }
                    _ => b.runs.push((start, len)),
                }
                continue;
            }
        }
        out.push(Block { table, start, count: len, runs: vec![(start, len)] });
    }
    out
}

/// Words (or bits as 0/1) read in one poll, by table and address.
#[derive(Debug, Default, Clone)]
pub struct Words(HashMap<(Table, u16), u16>);

impl Words {
    /// Records a block's words.
    pub fn insert(&mut self, table: Table, start: u16, words: &[u16]) {
        for (i, w) in words.iter().enumerate() {
            self.0.insert((table, start.wrapping_add(i as u16)), *w);
        }
    }

    /// `len` words from `start`, if all were read.
    pub fn get(&self, table: Table, start: u16, len: u16) -> Option<Vec<u16>> {
        (0..len).map(|i| self.0.get(&(table, start.wrapping_add(i))).copied()).collect()
    }
}

/// What decoding a point produced.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Decoded {
    /// A value in base units.
    Value(f64),
    /// The device reports the point or its scale factor as not implemented.
    Missing,
    /// Its registers were not read this time (the block failed).
    NotRead,
}

/// Whether a point's registers in this poll sit at their type's full scale (see
/// [`codec::at_full_scale`]).
pub fn at_full_scale(p: &PointSpec, words: &Words) -> bool {
    words.get(p.table, p.address, p.len()).is_some_and(|w| codec::at_full_scale(&w, p.value_type, p.word_order))
}

/// Decodes one point from the words of a poll: raw × scale × unit factor.
pub fn decode_point(p: &PointSpec, words: &Words) -> Decoded {
    let Some(w) = words.get(p.table, p.address, p.len()) else {
        return Decoded::NotRead;
    };
    let Some(raw) = codec::decode(&w, p.value_type, p.word_order, p.sentinel) else {
        return Decoded::Missing;
    };
    let scaled = match p.scale {
        ScaleSpec::Factor(f) => Some(raw * f),
        ScaleSpec::Register { table, address } => {
            let Some(sf) = words.get(table, address, 1) else {
                return Decoded::NotRead;
            };
            codec::apply_sunssf(raw, sf[0] as i16)
        }
    };
    match scaled {
        Some(v) if p.boolean => Decoded::Value(f64::from(u8::from(v != 0.0))),
        Some(v) => Decoded::Value(v * p.unit_factor),
        None => Decoded::Missing,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(point: usize, table: Table, address: u16, ty: ValueType, poll: u64) -> PointSpec {
        PointSpec {
            point: PointId(point),
            table,
            address,
            value_type: ty,
            word_order: WordOrder::HighFirst,
            scale: ScaleSpec::Factor(1.0),
            sentinel: Sentinel::None,
            unit_factor: 1.0,
            boolean: false,
            poll: Duration::from_secs(poll),
        }
    }

    #[test]
    fn contiguous_points_share_a_request_and_far_ones_do_not() {
        let h = Table::HoldingRegister;
        let pts = vec![
            spec(0, h, 100, ValueType::U16, 1),
            spec(1, h, 101, ValueType::U32, 1),
            spec(2, h, 105, ValueType::I16, 1), // gap of 2: joined
            spec(3, h, 300, ValueType::U16, 1), // far: own request
            spec(4, Table::InputRegister, 100, ValueType::U16, 1),
            spec(5, h, 100, ValueType::U16, 5), // other period
        ];
        let groups = plan(&pts);
        assert_eq!(groups.len(), 2);
        let g = &groups[0];
        let got: Vec<(Table, u16, u16)> = g.blocks.iter().map(|b| (b.table, b.start, b.count)).collect();
        assert_eq!(got, vec![(Table::InputRegister, 100, 1), (h, 100, 6), (h, 300, 1)]);
        assert_eq!(g.blocks[1].runs, vec![(100, 3), (105, 1)]);
        assert_eq!(g.blocks[1].split().len(), 2);
    }

    #[test]
    fn a_block_never_exceeds_125_registers_or_2000_bits() {
        let h = Table::HoldingRegister;
        let pts: Vec<PointSpec> = (0..300)
            .map(|i| spec(i, h, i as u16, ValueType::U16, 1))
            .chain((0..2500).map(|i| spec(1000 + i, Table::Coil, i as u16, ValueType::Bool, 1)))
            .collect();
        let g = &plan(&pts)[0];
        let counts: Vec<(Table, u16)> = g.blocks.iter().map(|b| (b.table, b.count)).collect();
        assert_eq!(counts, vec![(Table::Coil, 2000), (Table::Coil, 500), (h, 125), (h, 125), (h, 50)]);
    }
}
