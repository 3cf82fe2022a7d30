//! SunSpec information-model layouts the simulated devices expose, point by point in
//! the order of the published model definitions (sunspec/models, `json/model_<id>.json`),
//! and the encoders for their value types.
//!
//! A model block on the wire is `ID`, `L` (number of data registers), then the points.
//! Offsets here count from the first data register, as in the specification's tables.

/// A point's value type, which fixes its size and its "not implemented" value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ty {
    /// int16.
    I16,
    /// uint16 or enum16.
    U16,
    /// sunssf (a scale-factor exponent, int16).
    Sf,
    /// acc32 (an accumulator).
    Acc32,
    /// uint32.
    U32,
    /// int32.
    I32,
    /// bitfield32.
    Bits32,
    /// pad.
    Pad,
    /// string of this many registers.
    Str(u16),
}

impl Ty {
    /// Size in registers.
    pub const fn size(self) -> u16 {
        match self {
            Ty::I16 | Ty::U16 | Ty::Sf | Ty::Pad => 1,
            Ty::Acc32 | Ty::U32 | Ty::I32 | Ty::Bits32 => 2,
            Ty::Str(n) => n,
        }
    }

    /// The registers of an unimplemented point (SunSpec's "not implemented" values).
    pub fn unimplemented(self) -> &'static [u16] {
        match self {
            Ty::I16 | Ty::Sf | Ty::Pad => &[0x8000],
            Ty::U16 => &[0xFFFF],
            Ty::Acc32 => &[0, 0],
            Ty::U32 | Ty::Bits32 => &[0xFFFF, 0xFFFF],
            Ty::I32 => &[0x8000, 0x0000],
            Ty::Str(_) => &[],
        }
    }
}

/// One point of a model: name, type, and whether a client may write it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Point {
    /// Point name as in the model definition (group points as `Group.Point`).
    pub name: &'static str,
    /// Value type.
    pub ty: Ty,
    /// Writable by a client (access `RW`).
    pub writable: bool,
}

impl Point {
    /// Size in registers.
    pub const fn size(&self) -> u16 {
        self.ty.size()
    }
}

const fn p(name: &'static str, ty: Ty, writable: bool) -> Point {
    Point { name, ty, writable }
}

/// A SunSpec model layout.
#[derive(Debug, Clone, Copy)]
pub struct Model {
    /// Model ID.
    pub id: u16,
    /// Points in order.
    pub points: &'static [Point],
}

impl Model {
    /// Model length `L`: the number of data registers after `ID` and `L`.
    pub const fn len(&self) -> u16 {
        let mut n = 0;
        let mut i = 0;
        while i < self.points.len() {
            n += self.points[i].size();
            i += 1;
        }
        n
    }

    /// Whether the model has no data registers (never, for the models here).
    pub const fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Offset of a point from the first data register.
    pub fn offset(&self, name: &str) -> Option<u16> {
        let mut off = 0;
        for p in self.points {
            if p.name == name {
                return Some(off);
            }
            off += p.size();
        }
        None
    }

    /// For every data offset, whether a client may write it: a table built at compile
    /// time so a write is checked without walking the point list (`N` must be
    /// [`Model::len`]).
    pub const fn writable_offsets<const N: usize>(&self) -> [bool; N] {
        let mut map = [false; N];
        let (mut i, mut off) = (0, 0);
        while i < self.points.len() {
            let p = self.points[i];
            let mut k = 0;
            while k < p.size() {
                map[(off + k) as usize] = p.writable;
                k += 1;
            }
            off += p.size();
            i += 1;
        }
        assert!(off as usize == N, "N must be the model's length");
        map
    }

    /// The point that covers data offset `off`, with the point's own start offset.
    pub fn point_at(&self, off: u16) -> Option<(Point, u16)> {
        let mut start = 0;
        for p in self.points {
            if off < start + p.size() {
                return Some((*p, start));
            }
            start += p.size();
        }
        None
    }
}

/// Model 1, common: identification strings.
pub const COMMON: Model = Model {
    id: 1,
    points: &[
        p("Mn", Ty::Str(16), false),
        p("Md", Ty::Str(16), false),
        p("Opt", Ty::Str(8), false),
        p("Vr", Ty::Str(8), false),
        p("SN", Ty::Str(16), false),
        p("DA", Ty::U16, false),
        p("Pad", Ty::Pad, false),
    ],
};

/// Points of the AC meter models 201–204 (single phase, split phase, wye and delta
/// share this layout).
const METER_POINTS: &[Point] = &[
    p("A", Ty::I16, false),
    p("AphA", Ty::I16, false),
    p("AphB", Ty::I16, false),
    p("AphC", Ty::I16, false),
    p("A_SF", Ty::Sf, false),
    p("PhV", Ty::I16, false),
    p("PhVphA", Ty::I16, false),
    p("PhVphB", Ty::I16, false),
    p("PhVphC", Ty::I16, false),
    p("PPV", Ty::I16, false),
    p("PPVphAB", Ty::I16, false),
    p("PPVphBC", Ty::I16, false),
    p("PPVphCA", Ty::I16, false),
    p("V_SF", Ty::Sf, false),
    p("Hz", Ty::I16, false),
    p("Hz_SF", Ty::Sf, false),
    p("W", Ty::I16, false),
    p("WphA", Ty::I16, false),
    p("WphB", Ty::I16, false),
    p("WphC", Ty::I16, false),
    p("W_SF", Ty::Sf, false),
    p("VA", Ty::I16, false),
    p("VAphA", Ty::I16, false),
    p("VAphB", Ty::I16, false),
    p("VAphC", Ty::I16, false),
    p("VA_SF", Ty::Sf, false),
    p("VAR", Ty::I16, false),
    p("VARphA", Ty::I16, false),
    p("VARphB", Ty::I16, false),
    p("VARphC", Ty::I16, false),
    p("VAR_SF", Ty::Sf, false),
    p("PF", Ty::I16, false),
    p("PFphA", Ty::I16, false),
    p("PFphB", Ty::I16, false),
    p("PFphC", Ty::I16, false),
    p("PF_SF", Ty::Sf, false),
    p("TotWhExp", Ty::Acc32, false),
    p("TotWhExpPhA", Ty::Acc32, false),
    p("TotWhExpPhB", Ty::Acc32, false),
    p("TotWhExpPhC", Ty::Acc32, false),
    p("TotWhImp", Ty::Acc32, false),
    p("TotWhImpPhA", Ty::Acc32, false),
    p("TotWhImpPhB", Ty::Acc32, false),
    p("TotWhImpPhC", Ty::Acc32, false),
    p("TotWh_SF", Ty::Sf, false),
    p("TotVAhExp", Ty::Acc32, false),
    p("TotVAhExpPhA", Ty::Acc32, false),
    p("TotVAhExpPhB", Ty::Acc32, false),
    p("TotVAhExpPhC", Ty::Acc32, false),
    p("TotVAhImp", Ty::Acc32, false),
    p("TotVAhImpPhA", Ty::Acc32, false),
    p("TotVAhImpPhB", Ty::Acc32, false),
    p("TotVAhImpPhC", Ty::Acc32, false),
    p("TotVAh_SF", Ty::Sf, false),
    p("TotVArhImpQ1", Ty::Acc32, false),
    p("TotVArhImpQ1PhA", Ty::Acc32, false),
    p("TotVArhImpQ1PhB", Ty::Acc32, false),
    p("TotVArhImpQ1PhC", Ty::Acc32, false),
    p("TotVArhImpQ2", Ty::Acc32, false),
    p("TotVArhImpQ2PhA", Ty::Acc32, false),
    p("TotVArhImpQ2PhB", Ty::Acc32, false),
    p("TotVArhImpQ2PhC", Ty::Acc32, false),
    p("TotVArhExpQ3", Ty::Acc32, false),
    p("TotVArhExpQ3PhA", Ty::Acc32, false),
    p("TotVArhExpQ3PhB", Ty::Acc32, false),
    p("TotVArhExpQ3PhC", Ty::Acc32, false),
    p("TotVArhExpQ4", Ty::Acc32, false),
    p("TotVArhExpQ4PhA", Ty::Acc32, false),
    p("TotVArhExpQ4PhB", Ty::Acc32, false),
    p("TotVArhExpQ4PhC", Ty::Acc32, false),
    p("TotVArh_SF", Ty::Sf, false),
    p("Evt", Ty::Bits32, false),
];

/// Model 201, single-phase meter.
pub const METER_1PH: Model = Model { id: 201, points: METER_POINTS };

/// Model 203, wye-connected three-phase meter.
pub const METER_WYE: Model = Model { id: 203, points: METER_POINTS };

/// Model 101, single-phase inverter.
pub const INVERTER_1PH: Model = Model {
    id: 101,
    points: &[
        p("A", Ty::U16, false),
        p("AphA", Ty::U16, false),
        p("AphB", Ty::U16, false),
        p("AphC", Ty::U16, false),
        p("A_SF", Ty::Sf, false),
        p("PPVphAB", Ty::U16, false),
        p("PPVphBC", Ty::U16, false),
        p("PPVphCA", Ty::U16, false),
        p("PhVphA", Ty::U16, false),
        p("PhVphB", Ty::U16, false),
        p("PhVphC", Ty::U16, false),
        p("V_SF", Ty::Sf, false),
        p("W", Ty::I16, false),
        p("W_SF", Ty::Sf, false),
        p("Hz", Ty::U16, false),
        p("Hz_SF", Ty::Sf, false),
        p("VA", Ty::I16, false),
        p("VA_SF", Ty::Sf, false),
        p("VAr", Ty::I16, false),
        p("VAr_SF", Ty::Sf, false),
        p("PF", Ty::I16, false),
        p("PF_SF", Ty::Sf, false),
        p("WH", Ty::Acc32, false),
        p("WH_SF", Ty::Sf, false),
        p("DCA", Ty::U16, false),
        p("DCA_SF", Ty::Sf, false),
        p("DCV", Ty::U16, false),
        p("DCV_SF", Ty::Sf, false),
        p("DCW", Ty::I16, false),
        p("DCW_SF", Ty::Sf, false),
        p("TmpCab", Ty::I16, false),
        p("TmpSnk", Ty::I16, false),
        p("TmpTrns", Ty::I16, false),
        p("TmpOt", Ty::I16, false),
        p("Tmp_SF", Ty::Sf, false),
        p("St", Ty::U16, false),
        p("StVnd", Ty::U16, false),
        p("Evt1", Ty::Bits32, false),
        p("Evt2", Ty::Bits32, false),
        p("EvtVnd1", Ty::Bits32, false),
        p("EvtVnd2", Ty::Bits32, false),
        p("EvtVnd3", Ty::Bits32, false),
        p("EvtVnd4", Ty::Bits32, false),
    ],
};

/// Model 123, immediate inverter controls (every `RW` point is writable; the
/// connection and active-power-limit points act, the others are stored only).
pub const IMMEDIATE_CONTROLS: Model = Model {
    id: 123,
    points: &[
        p("Conn_WinTms", Ty::U16, true),
        p("Conn_RvrtTms", Ty::U16, true),
        p("Conn", Ty::U16, true),
        p("WMaxLimPct", Ty::U16, true),
        p("WMaxLimPct_WinTms", Ty::U16, true),
        p("WMaxLimPct_RvrtTms", Ty::U16, true),
        p("WMaxLimPct_RmpTms", Ty::U16, true),
        p("WMaxLim_Ena", Ty::U16, true),
        p("OutPFSet", Ty::I16, true),
        p("OutPFSet_WinTms", Ty::U16, true),
        p("OutPFSet_RvrtTms", Ty::U16, true),
        p("OutPFSet_RmpTms", Ty::U16, true),
        p("OutPFSet_Ena", Ty::U16, true),
        p("VArWMaxPct", Ty::I16, true),
        p("VArMaxPct", Ty::I16, true),
        p("VArAvalPct", Ty::I16, true),
        p("VArPct_WinTms", Ty::U16, true),
        p("VArPct_RvrtTms", Ty::U16, true),
        p("VArPct_RmpTms", Ty::U16, true),
        p("VArPct_Mod", Ty::U16, true),
        p("VArPct_Ena", Ty::U16, true),
        p("WMaxLimPct_SF", Ty::Sf, false),
        p("OutPFSet_SF", Ty::Sf, false),
        p("VArPct_SF", Ty::Sf, false),
    ],
};

/// Model 704, DER AC controls (the active-power-limit points act, with the reversion
/// limit applied when the reversion timer expires; the others are stored only).
pub const DER_AC_CONTROLS: Model = Model {
    id: 704,
    points: &[
        p("PFWInjEna", Ty::U16, true),
        p("PFWInjEnaRvrt", Ty::U16, true),
        p("PFWInjRvrtTms", Ty::U32, true),
        p("PFWInjRvrtRem", Ty::U32, false),
        p("PFWAbsEna", Ty::U16, true),
        p("PFWAbsEnaRvrt", Ty::U16, true),
        p("PFWAbsRvrtTms", Ty::U32, true),
        p("PFWAbsRvrtRem", Ty::U32, false),
        p("WMaxLimPctEna", Ty::U16, true),
        p("WMaxLimPct", Ty::U16, true),
        p("WMaxLimPctRvrt", Ty::U16, true),
        p("WMaxLimPctEnaRvrt", Ty::U16, true),
        p("WMaxLimPctRvrtTms", Ty::U32, true),
        p("WMaxLimPctRvrtRem", Ty::U32, false),
        p("WSetEna", Ty::U16, true),
        p("WSetMod", Ty::U16, true),
        p("WSet", Ty::I32, true),
        p("WSetRvrt", Ty::I32, true),
        p("WSetPct", Ty::I16, true),
        p("WSetPctRvrt", Ty::I16, true),
        p("WSetEnaRvrt", Ty::U16, true),
        p("WSetRvrtTms", Ty::U32, true),
        p("WSetRvrtRem", Ty::U32, false),
        p("VarSetEna", Ty::U16, true),
        p("VarSetMod", Ty::U16, true),
        p("VarSetPri", Ty::U16, true),
        p("VarSet", Ty::I32, true),
        p("VarSetRvrt", Ty::I32, true),
        p("VarSetPct", Ty::I16, true),
        p("VarSetPctRvrt", Ty::I16, true),
        p("VarSetEnaRvrt", Ty::U16, true),
        p("VarSetRvrtTms", Ty::U32, true),
        p("VarSetRvrtRem", Ty::U32, false),
        p("WRmp", Ty::U16, true),
        p("WRmpRef", Ty::U16, true),
        p("VarRmp", Ty::U16, true),
        p("AntiIslEna", Ty::U16, true),
        p("PF_SF", Ty::Sf, false),
        p("WMaxLimPct_SF", Ty::Sf, false),
        p("WSet_SF", Ty::Sf, false),
        p("WSetPct_SF", Ty::Sf, false),
        p("VarSet_SF", Ty::Sf, false),
        p("VarSetPct_SF", Ty::Sf, false),
        p("PFWInj.PF", Ty::U16, true),
        p("PFWInj.Ext", Ty::U16, true),
        p("PFWInjRvrt.PF", Ty::U16, true),
        p("PFWInjRvrt.Ext", Ty::U16, true),
        p("PFWAbs.PF", Ty::U16, true),
        p("PFWAbs.Ext", Ty::U16, true),
        p("PFWAbsRvrt.PF", Ty::U16, true),
        p("PFWAbsRvrt.Ext", Ty::U16, true),
    ],
};

/// Model 120, nameplate ratings (all read-only). Only `DERTyp` and `WRtg` are served;
/// `WRtg` is the power that a `WMaxLimPct` percentage is taken of when the device has
/// no model 121 (as here).
pub const NAMEPLATE: Model = Model {
    id: 120,
    points: &[
        p("DERTyp", Ty::U16, false),
        p("WRtg", Ty::U16, false),
        p("WRtg_SF", Ty::Sf, false),
        p("VARtg", Ty::U16, false),
        p("VARtg_SF", Ty::Sf, false),
        p("VArRtgQ1", Ty::I16, false),
        p("VArRtgQ2", Ty::I16, false),
        p("VArRtgQ3", Ty::I16, false),
        p("VArRtgQ4", Ty::I16, false),
        p("VArRtg_SF", Ty::Sf, false),
        p("ARtg", Ty::U16, false),
        p("ARtg_SF", Ty::Sf, false),
        p("PFRtgQ1", Ty::I16, false),
        p("PFRtgQ2", Ty::I16, false),
        p("PFRtgQ3", Ty::I16, false),
        p("PFRtgQ4", Ty::I16, false),
        p("PFRtg_SF", Ty::Sf, false),
        p("WHRtg", Ty::U16, false),
        p("WHRtg_SF", Ty::Sf, false),
        p("AhrRtg", Ty::U16, false),
        p("AhrRtg_SF", Ty::Sf, false),
        p("MaxChaRte", Ty::U16, false),
        p("MaxChaRte_SF", Ty::Sf, false),
        p("MaxDisChaRte", Ty::U16, false),
        p("MaxDisChaRte_SF", Ty::Sf, false),
        p("Pad", Ty::Pad, false),
    ],
};

/// `SunS`, the marker at the base address.
pub const MARKER: [u16; 2] = [0x5375, 0x6E53];
/// The end model's ID (followed by length 0).
pub const END_ID: u16 = 0xFFFF;
/// Not implemented: int16 and sunssf.
pub const NI_I16: u16 = 0x8000;
/// Not implemented: uint16 and enum16.
pub const NI_U16: u16 = 0xFFFF;

/// A SunSpec register image under construction: a model block at a time.
#[derive(Debug, Default)]
pub struct Image {
    /// Registers from the base address.
    pub regs: Vec<u16>,
}

impl Image {
    /// Starts an image with the `SunS` marker.
    pub fn new() -> Image {
        Image { regs: MARKER.to_vec() }
    }

    /// Appends a model block with every point "not implemented" (strings empty) and
    /// returns the index of the block's first data register.
    pub fn model(&mut self, m: &Model) -> usize {
        self.regs.push(m.id);
        self.regs.push(m.len());
        let start = self.regs.len();
        for p in m.points {
            match p.ty {
                Ty::Str(n) => self.regs.extend(std::iter::repeat_n(0, n as usize)),
                ty => self.regs.extend_from_slice(ty.unimplemented()),
            }
        }
        start
    }

    /// Appends the end model.
    pub fn end(&mut self) {
        self.regs.push(END_ID);
        self.regs.push(0);
    }

    /// Sets a point of the model whose data starts at `start`.
    pub fn set(&mut self, start: usize, m: &Model, name: &str, words: &[u16]) {
        if let Some(off) = m.offset(name) {
            let at = start + off as usize;
            self.regs[at..at + words.len()].copy_from_slice(words);
        }
    }
}

/// `v` as an int16 scaled by 10^`sf` (v = raw × 10^sf); NaN → not implemented,
/// out-of-range values saturate.
pub fn i16_sf(v: f64, sf: i16) -> u16 {
    if !v.is_finite() {
        return NI_I16;
    }
    let raw = (v / 10f64.powi(i32::from(sf))).round();
    raw.clamp(-32767.0, 32767.0) as i16 as u16
}

/// `v` as a uint16 scaled by 10^`sf`; NaN → not implemented, saturating at 0 and 65534.
pub fn u16_sf(v: f64, sf: i16) -> u16 {
    if !v.is_finite() {
        return NI_U16;
    }
    (v / 10f64.powi(i32::from(sf))).round().clamp(0.0, 65534.0) as u16
}

/// A scale factor register.
pub fn sf(v: i16) -> u16 {
    v as u16
}

/// An acc32 accumulator (wraps at 2³²; NaN → 0, "not accumulated"), high word first.
pub fn acc32(v: f64) -> [u16; 2] {
    let raw = if v.is_finite() && v > 0.0 { (v.round() as u64 & 0xFFFF_FFFF) as u32 } else { 0 };
    u32_words(raw)
}

/// A 32-bit value as two registers, high word first (SunSpec word order).
pub fn u32_words(v: u32) -> [u16; 2] {
    [(v >> 16) as u16, v as u16]
}

/// Two registers (high word first) as a 32-bit value.
pub fn words_u32(hi: u16, lo: u16) -> u32 {
    (u32::from(hi) << 16) | u32::from(lo)
}

/// An ASCII string in `n` registers, two characters each, NUL-padded.
pub fn string(text: &str, n: usize) -> Vec<u16> {
    let mut bytes: Vec<u8> = text.bytes().take(2 * n).collect();
    bytes.resize(2 * n, 0);
    bytes.chunks(2).map(|c| u16::from_be_bytes([c[0], c[1]])).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The compile-time writable tables say what walking the point list says.
    #[test]
    fn writable_offsets_agree_with_the_point_list() {
        fn check<const N: usize>(m: &Model) {
            let map: [bool; N] = m.writable_offsets();
            for (off, &w) in map.iter().enumerate() {
                let (point, _) = m.point_at(off as u16).expect("offset inside the model");
                assert_eq!(w, point.writable, "model {} offset {off} ({})", m.id, point.name);
            }
        }
        check::<{ IMMEDIATE_CONTROLS.len() as usize }>(&IMMEDIATE_CONTROLS);
        check::<{ DER_AC_CONTROLS.len() as usize }>(&DER_AC_CONTROLS);
        check::<{ INVERTER_1PH.len() as usize }>(&INVERTER_1PH);
    }
}
