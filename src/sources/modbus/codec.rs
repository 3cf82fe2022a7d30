//! Register words to numbers and back: the value types, word orders, scale factors and
//! SunSpec "not implemented" sentinels.

use crate::config::model::{ValueType, WordOrder};

/// A value that SunSpec reserves to mean "not implemented" for a point's type.
///
/// Source: SunSpec Information Model Specification, "unimplemented" values per type, as
/// carried by the reference library pySunSpec2 1.3.7 (`sunspec2/mb.py`,
/// `SUNS_UNIMPL_*`). Accumulators (`acc16/32/64`) reserve 0, which is also a real
/// reading of a counter after a reset; we do not treat it as missing.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sentinel {
    /// No value is reserved (plain Modbus points, accumulators).
    None,
    /// `uint16`, `enum16`, `bitfield16`: 0xFFFF.
    U16Max,
    /// `int16`: 0x8000.
    I16Min,
    /// `uint32`, `enum32`, `bitfield32`: 0xFFFFFFFF.
    U32Max,
    /// `int32`: 0x80000000.
    I32Min,
    /// `uint64`: all ones.
    U64Max,
    /// `float32`: NaN (0x7FC00000).
    F32Nan,
    /// A value the site file names (`missing:` on a register point).
    Raw(u64),
}

impl Sentinel {
    /// The sentinel of a plain Modbus point: the one its `missing:` names, else none.
    pub fn of(read: &crate::config::model::ModbusRead) -> Sentinel {
        read.missing.map_or(Sentinel::None, Sentinel::Raw)
    }
}

/// The SunSpec scale-factor sentinel (`sunssf` 0x8000).
pub const SUNSSF_UNIMPLEMENTED: i16 = i16::MIN;

/// Joins words into one integer, most significant word first.
fn join(words: &[u16], order: WordOrder) -> u64 {
    let fold = |acc: u64, w: &u16| (acc << 16) | u64::from(*w);
    match order {
        WordOrder::HighFirst => words.iter().fold(0, fold),
        WordOrder::LowFirst => words.iter().rev().fold(0, fold),
    }
}

/// Decodes a value from its registers; `None` when the words hold the sentinel or too
/// few words were given.
pub fn decode(words: &[u16], ty: ValueType, order: WordOrder, sentinel: Sentinel) -> Option<f64> {
    let n = usize::from(ty.registers());
    let words = words.get(..n)?;
    let bits = join(words, order);
    let missing = match sentinel {
        Sentinel::None => false,
        Sentinel::U16Max => bits == 0xFFFF,
        Sentinel::I16Min => bits == 0x8000,
        Sentinel::U32Max => bits == 0xFFFF_FFFF,
        Sentinel::I32Min => bits == 0x8000_0000,
        Sentinel::U64Max => bits == u64::MAX,
        Sentinel::F32Nan => f32::from_bits(bits as u32).is_nan(),
        Sentinel::Raw(raw) => bits == raw,
    };
    if missing {
        return None;
    }
    let v = match ty {
        ValueType::U16 => bits as u16 as f64,
        ValueType::I16 => bits as u16 as i16 as f64,
        ValueType::U32 => bits as u32 as f64,
        ValueType::I32 => bits as u32 as i32 as f64,
        ValueType::U64 => bits as f64,
        ValueType::F32 => f64::from(f32::from_bits(bits as u32)),
        ValueType::Bool => {
            if bits != 0 {
                1.0
            } else {
                0.0
            }
        }
    };
    v.is_finite().then_some(v)
}

/// Whether the words hold the largest magnitude the type can encode: a measurement
/// pinned there is a saturated reading or a fault (a meter clipping at the register's
/// full scale, a register of all ones), not a value (`common practice`: devices clamp
/// what their register cannot hold). Signed types count both ends (less one at the
/// bottom, where SunSpec keeps its "not implemented"); floats and bits never.
pub fn at_full_scale(words: &[u16], ty: ValueType, order: WordOrder) -> bool {
    let Some(words) = words.get(..usize::from(ty.registers())) else { return false };
    let bits = join(words, order);
    match ty {
        ValueType::U16 => bits == 0xFFFF,
        ValueType::I16 => matches!(bits as u16 as i16, i16::MAX | -32767 | i16::MIN),
        ValueType::U32 => bits == 0xFFFF_FFFF,
        ValueType::I32 => matches!(bits as u32 as i32, i32::MAX | -2_147_483_647 | i32::MIN),
        ValueType::U64 => bits == u64::MAX,
        ValueType::F32 | ValueType::Bool => false,
    }
}

/// Encodes a register value (already divided by the target's scale) into words:
/// integers are rounded and saturate at the type's range, so a setpoint above a
/// register's range is written as its largest value rather than wrapping.
pub fn encode(value: f64, ty: ValueType, order: WordOrder) -> Vec<u16> {
    let r = value.round();
    let (bits, n): (u64, usize) = match ty {
        ValueType::U16 | ValueType::Bool => (r.clamp(0.0, 65535.0) as u64, 1),
        ValueType::I16 => (r.clamp(-32768.0, 32767.0) as i16 as u16 as u64, 1),
        ValueType::U32 => (r.clamp(0.0, u32::MAX as f64) as u32 as u64, 2),
        ValueType::I32 => (r.clamp(i32::MIN as f64, i32::MAX as f64) as i32 as u32 as u64, 2),
        ValueType::U64 => (r.max(0.0) as u64, 4),
        ValueType::F32 => (u64::from((value as f32).to_bits()), 2),
    };
    let mut words: Vec<u16> = (0..n).rev().map(|i| (bits >> (16 * i)) as u16).collect();
    if order == WordOrder::LowFirst {
        words.reverse();
    }
    words
}

/// `value × 10^sf` for a SunSpec scale factor; `None` for the sentinel or a factor
/// outside the specification's range −10..=10.
pub fn apply_sunssf(value: f64, sf: i16) -> Option<f64> {
    if sf == SUNSSF_UNIMPLEMENTED || !(-10..=10).contains(&sf) {
        return None;
    }
    // Divide for negative factors: 1234 / 10 is exactly 123.4, 1234 × 0.1 is not.
    Some(if sf < 0 { value / 10f64.powi(-i32::from(sf)) } else { value * 10f64.powi(i32::from(sf)) })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn encode_then_decode_round_trips_every_type_and_order() {
        for ty in [ValueType::U16, ValueType::I16, ValueType::U32, ValueType::I32, ValueType::U64, ValueType::F32] {
            for order in [WordOrder::HighFirst, WordOrder::LowFirst] {
                let v = if matches!(ty, ValueType::I16 | ValueType::I32) { -1234.0 } else { 1234.0 };
                let w = encode(v, ty, order);
                assert_eq!(w.len(), usize::from(ty.registers()));
                assert_eq!(decode(&w, ty, order, Sentinel::None), Some(v), "{ty:?} {order:?}");
            }
        }
    }

    #[test]
    fn sentinels_and_scale_factors() {
        assert_eq!(decode(&[0x8000], ValueType::I16, WordOrder::HighFirst, Sentinel::I16Min), None);
        assert_eq!(decode(&[0x8000], ValueType::I16, WordOrder::HighFirst, Sentinel::None), Some(-32768.0));
        // Full scale: both ends of a signed register, all ones of an unsigned one.
        for (w, ty, full) in [
            (&[0x7FFF][..], ValueType::I16, true),
            (&[0x8001], ValueType::I16, true),
            (&[0x7FFE], ValueType::I16, false),
            (&[0xFFFF], ValueType::U16, true),
            (&[0xFFFE], ValueType::U16, false),
            (&[0x7FFF, 0xFFFF], ValueType::I32, true),
            (&[0x0000, 0x7FFF], ValueType::I32, false),
            (&[0x7FFF, 0xFFFF], ValueType::F32, false),
        ] {
            assert_eq!(at_full_scale(w, ty, WordOrder::HighFirst), full, "{w:?} {ty:?}");
        }
        assert_eq!(apply_sunssf(1234.0, -1), Some(123.4));
        assert_eq!(apply_sunssf(1234.0, i16::MIN), None);
        assert_eq!(apply_sunssf(1.0, 11), None);
        assert_eq!(encode(70000.0, ValueType::U16, WordOrder::HighFirst), vec![0xFFFF]);
    }

    /// A site's own `missing:` value: only those bits mean "no reading".
    #[test]
    fn a_named_missing_value_is_no_reading() {
        let raw = Sentinel::Raw(0xFFFF);
        assert_eq!(decode(&[0xFFFF], ValueType::U16, WordOrder::HighFirst, raw), None);
        assert_eq!(decode(&[0xFFFE], ValueType::U16, WordOrder::HighFirst, raw), Some(65534.0));
        let wide = Sentinel::Raw(0x0001_0002);
        assert_eq!(decode(&[2, 1], ValueType::U32, WordOrder::LowFirst, wide), None);
        assert_eq!(decode(&[1, 2], ValueType::U32, WordOrder::LowFirst, wide), Some(131_073.0));
    }
}
