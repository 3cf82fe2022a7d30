//! SunSpec (an open information model for DER over Modbus): the model chain found by
//! discovery, the point layouts of the models Spillway reads and writes, and the
//! registers of the active-power-limit controls (models 123 and 704).
//!
//! Layouts are transcribed from the published model definitions: the SunSpec Alliance
//! `sunspec/models` repository, `json/model_<id>.json`, as shipped in pySunSpec2 1.3.7
//! (`sunspec2/models/json`). Offsets are counted from the model's `ID` register: `ID`
//! at 0, `L` at 1, the first point at 2; a point's address is the model start plus
//! the sum of the sizes before it.

use crate::config::model::ValueType;

use super::codec::Sentinel;

/// The `SunS` marker, two registers ("Su", "nS").
pub const MARKER: [u16; 2] = [0x5375, 0x6E53];
/// Where the marker may be, in the order tried. Source: SunSpec Information Model
/// Specification, "base register" (40000, 50000 or 0; holding registers).
pub const BASES: [u16; 3] = [40000, 50000, 0];
/// The model id that ends the chain.
pub const END_ID: u16 = 0xFFFF;
/// Most models walked before giving up on a chain that never ends.
pub const MAX_MODELS: usize = 64;

/// One step along a device's model chain: `head` is what was read at `addr` (the
/// model's `ID` and `L`). Gives the model as `(id, start, length)` and where the next
/// header starts (`None` past the address space), or `None` at the end marker.
pub fn chain_step(addr: u16, head: &[u16]) -> Option<((u16, u16, u16), Option<u16>)> {
    let id = head.first().copied().unwrap_or(END_ID);
    if id == END_ID {
        return None;
    }
    let len = head.get(1).copied().unwrap_or(0);
    Some(((id, addr, len), addr.checked_add(2).and_then(|x| x.checked_add(len))))
}

/// The device's model chain.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ModelMap {
    /// Address of the marker.
    pub base: u16,
    /// `(id, start, length)` in chain order; `start` is the address of `ID`, `length`
    /// the model's `L` (registers after `L`).
    pub models: Vec<(u16, u16, u16)>,
}

impl ModelMap {
    /// Start address of the first model with this id.
    pub fn start(&self, id: u16) -> Option<(u16, u16)> {
        self.models.iter().find(|(m, _, _)| *m == id).map(|&(_, start, len)| (start, len))
    }

    /// Resolves `model.point` to its registers on this device.
    pub fn resolve(&self, model: u16, point: &str) -> Result<Resolved, String> {
        let Some((start, len)) = self.start(model) else {
            let found: Vec<String> = self.models.iter().map(|m| m.0.to_string()).collect();
            return Err(format!("the device has no SunSpec model {model} (found {})", found.join(", ")));
        };
        let loc = locate(model, point)?;
        if loc.offset + loc.size > len + 2 {
            return Err(format!("model {model} on the device is {len} registers long, too short for {point}"));
        }
        let value_type = loc
            .ty
            .value_type()
            .ok_or_else(|| format!("SunSpec point {model}.{point} is text or padding, not a number"))?;
        Ok(Resolved {
            address: start + loc.offset,
            value_type,
            sentinel: loc.ty.sentinel(),
            scale_factor: loc.sf_offset.map(|o| start + o),
        })
    }
}

/// A SunSpec point on one device.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Resolved {
    /// Absolute address (holding registers).
    pub address: u16,
    /// How to decode it.
    pub value_type: ValueType,
    /// Its "not implemented" value.
    pub sentinel: Sentinel,
    /// Absolute address of its scale factor, if it has one.
    pub scale_factor: Option<u16>,
}

/// A point's place inside its model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Location {
    /// Offset from the model's `ID` register.
    pub offset: u16,
    /// Registers.
    pub size: u16,
    /// Type.
    pub ty: Ty,
    /// Offset of its scale factor.
    pub sf_offset: Option<u16>,
}

/// Where `point` sits in `model`, by the published layout.
pub fn locate(model: u16, point: &str) -> Result<Location, String> {
    let defs = layout(model).ok_or_else(|| {
        format!("SunSpec model {model} is not one Spillway knows (1, 101-103, 120, 121, 123, 201-204, 704)")
    })?;
    let mut offsets = Vec::with_capacity(defs.len());
    let mut at = 2u16;
    for (name, ty, _) in defs {
        offsets.push((*name, at, *ty));
        at += ty.size();
    }
    let find = |n: &str| offsets.iter().find(|(name, _, _)| *name == n);
    let Some(&(_, offset, ty)) = find(point) else {
        let names: Vec<&str> = defs.iter().map(|d| d.0).collect();
        let hint = crate::diag::did_you_mean(point, names.iter().copied())
            .map_or(String::new(), |s| format!("; did you mean {s}?"));
        return Err(format!("SunSpec model {model} has no point {point}{hint}"));
    };
    let sf_offset = defs.iter().find(|d| d.0 == point).and_then(|d| d.2).and_then(find).map(|&(_, o, _)| o);
    Ok(Location { offset, size: ty.size(), ty, sf_offset })
}

/// The published layout of a model (points after `ID` and `L`).
pub fn layout(model: u16) -> Option<&'static [Def]> {
    Some(match model {
        1 => M1,
        101..=103 => M10X,
        120 => M120,
        121 => M121,
        123 => M123,
        201 => M201,
        202..=204 => M20X,
        704 => M704,
        _ => return None,
    })
}

/// SunSpec point types used by these models.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ty {
    /// `uint16`.
    U16,
    /// `int16`.
    I16,
    /// `uint32`.
    U32,
    /// `int32`.
    I32,
    /// `acc32` (a counter).
    Acc32,
    /// `enum16`.
    Enum16,
    /// `bitfield32`.
    Bitfield32,
    /// `sunssf`, a scale factor (i16 power of ten).
    Sf,
    /// `pad`.
    Pad,
    /// `string` of this many registers.
    Str(u16),
}

impl Ty {
    /// Registers taken.
    pub fn size(self) -> u16 {
        match self {
            Ty::U32 | Ty::I32 | Ty::Acc32 | Ty::Bitfield32 => 2,
            Ty::Str(n) => n,
            _ => 1,
        }
    }

    /// The Modbus value type that decodes it, if it is a number.
    pub fn value_type(self) -> Option<ValueType> {
        Some(match self {
            Ty::U16 | Ty::Enum16 => ValueType::U16,
            Ty::I16 | Ty::Sf => ValueType::I16,
            Ty::U32 | Ty::Acc32 | Ty::Bitfield32 => ValueType::U32,
            Ty::I32 => ValueType::I32,
            Ty::Pad | Ty::Str(_) => return None,
        })
    }

    /// Its "not implemented" value.
    pub fn sentinel(self) -> Sentinel {
        match self {
            Ty::U16 | Ty::Enum16 => Sentinel::U16Max,
            Ty::I16 | Ty::Sf => Sentinel::I16Min,
            Ty::U32 | Ty::Bitfield32 => Sentinel::U32Max,
            Ty::I32 => Sentinel::I32Min,
            Ty::Acc32 | Ty::Pad | Ty::Str(_) => Sentinel::None,
        }
    }
}

/// One point of a layout: name, type, name of its scale factor.
pub type Def = (&'static str, Ty, Option<&'static str>);

use Ty::*;

/// Model 1: Common.
const M1: &[Def] = &[
    ("Mn", Str(16), None),
    ("Md", Str(16), None),
    ("Opt", Str(8), None),
    ("Vr", Str(8), None),
    ("SN", Str(16), None),
    ("DA", U16, None),
    ("Pad", Pad, None),
];

/// Models 101, 102 and 103: single-phase, split-phase and three-phase inverter (one layout).
const M10X: &[Def] = &[
    ("A", U16, Some("A_SF")),
    ("AphA", U16, Some("A_SF")),
    ("AphB", U16, Some("A_SF")),
    ("AphC", U16, Some("A_SF")),
    ("A_SF", Sf, None),
    ("PPVphAB", U16, Some("V_SF")),
    ("PPVphBC", U16, Some("V_SF")),
    ("PPVphCA", U16, Some("V_SF")),
    ("PhVphA", U16, Some("V_SF")),
    ("PhVphB", U16, Some("V_SF")),
    ("PhVphC", U16, Some("V_SF")),
    ("V_SF", Sf, None),
    ("W", I16, Some("W_SF")),
    ("W_SF", Sf, None),
    ("Hz", U16, Some("Hz_SF")),
    ("Hz_SF", Sf, None),
    ("VA", I16, Some("VA_SF")),
    ("VA_SF", Sf, None),
    ("VAr", I16, Some("VAr_SF")),
    ("VAr_SF", Sf, None),
    ("PF", I16, Some("PF_SF")),
    ("PF_SF", Sf, None),
    ("WH", Acc32, Some("WH_SF")),
    ("WH_SF", Sf, None),
    ("DCA", U16, Some("DCA_SF")),
    ("DCA_SF", Sf, None),
    ("DCV", U16, Some("DCV_SF")),
    ("DCV_SF", Sf, None),
    ("DCW", I16, Some("DCW_SF")),
    ("DCW_SF", Sf, None),
    ("TmpCab", I16, Some("Tmp_SF")),
    ("TmpSnk", I16, Some("Tmp_SF")),
    ("TmpTrns", I16, Some("Tmp_SF")),
    ("TmpOt", I16, Some("Tmp_SF")),
    ("Tmp_SF", Sf, None),
    ("St", Enum16, None),
    ("StVnd", Enum16, None),
    ("Evt1", Bitfield32, None),
    ("Evt2", Bitfield32, None),
    ("EvtVnd1", Bitfield32, None),
    ("EvtVnd2", Bitfield32, None),
    ("EvtVnd3", Bitfield32, None),
    ("EvtVnd4", Bitfield32, None),
];

/// Model 120: Nameplate ratings (read-only). `WRtg` is what a `WMaxLimPct` percentage
/// is taken of when the device has no model 121.
const M120: &[Def] = &[
    ("DERTyp", Enum16, None),
    ("WRtg", U16, Some("WRtg_SF")),
    ("WRtg_SF", Sf, None),
    ("VARtg", U16, Some("VARtg_SF")),
    ("VARtg_SF", Sf, None),
    ("VArRtgQ1", I16, Some("VArRtg_SF")),
    ("VArRtgQ2", I16, Some("VArRtg_SF")),
    ("VArRtgQ3", I16, Some("VArRtg_SF")),
    ("VArRtgQ4", I16, Some("VArRtg_SF")),
    ("VArRtg_SF", Sf, None),
    ("ARtg", U16, Some("ARtg_SF")),
    ("ARtg_SF", Sf, None),
    ("PFRtgQ1", I16, Some("PFRtg_SF")),
    ("PFRtgQ2", I16, Some("PFRtg_SF")),
    ("PFRtgQ3", I16, Some("PFRtg_SF")),
    ("PFRtgQ4", I16, Some("PFRtg_SF")),
    ("PFRtg_SF", Sf, None),
    ("WHRtg", U16, Some("WHRtg_SF")),
    ("WHRtg_SF", Sf, None),
    ("AhrRtg", U16, Some("AhrRtg_SF")),
    ("AhrRtg_SF", Sf, None),
    ("MaxChaRte", U16, Some("MaxChaRte_SF")),
    ("MaxChaRte_SF", Sf, None),
    ("MaxDisChaRte", U16, Some("MaxDisChaRte_SF")),
    ("MaxDisChaRte_SF", Sf, None),
    ("Pad", Pad, None),
];

/// Model 121: Basic Settings. `WMax` is the power a `WMaxLimPct` percentage is taken of.
const M121: &[Def] = &[
    ("WMax", U16, Some("WMax_SF")),
    ("VRef", U16, Some("VRef_SF")),
    ("VRefOfs", I16, Some("VRefOfs_SF")),
    ("VMax", U16, Some("VMinMax_SF")),
    ("VMin", U16, Some("VMinMax_SF")),
    ("VAMax", U16, Some("VAMax_SF")),
    ("VArMaxQ1", I16, Some("VArMax_SF")),
    ("VArMaxQ2", I16, Some("VArMax_SF")),
    ("VArMaxQ3", I16, Some("VArMax_SF")),
    ("VArMaxQ4", I16, Some("VArMax_SF")),
    ("WGra", U16, Some("WGra_SF")),
    ("PFMinQ1", I16, Some("PFMin_SF")),
    ("PFMinQ2", I16, Some("PFMin_SF")),
    ("PFMinQ3", I16, Some("PFMin_SF")),
    ("PFMinQ4", I16, Some("PFMin_SF")),
    ("VArAct", Enum16, None),
    ("ClcTotVA", Enum16, None),
    ("MaxRmpRte", U16, Some("MaxRmpRte_SF")),
    ("ECPNomHz", U16, Some("ECPNomHz_SF")),
    ("ConnPh", Enum16, None),
    ("WMax_SF", Sf, None),
    ("VRef_SF", Sf, None),
    ("VRefOfs_SF", Sf, None),
    ("VMinMax_SF", Sf, None),
    ("VAMax_SF", Sf, None),
    ("VArMax_SF", Sf, None),
    ("WGra_SF", Sf, None),
    ("PFMin_SF", Sf, None),
    ("MaxRmpRte_SF", Sf, None),
    ("ECPNomHz_SF", Sf, None),
];

/// Model 123: Immediate Controls.
const M123: &[Def] = &[
    ("Conn_WinTms", U16, None),
    ("Conn_RvrtTms", U16, None),
    ("Conn", Enum16, None),
    ("WMaxLimPct", U16, Some("WMaxLimPct_SF")),
    ("WMaxLimPct_WinTms", U16, None),
    ("WMaxLimPct_RvrtTms", U16, None),
    ("WMaxLimPct_RmpTms", U16, None),
    ("WMaxLim_Ena", Enum16, None),
    ("OutPFSet", I16, Some("OutPFSet_SF")),
    ("OutPFSet_WinTms", U16, None),
    ("OutPFSet_RvrtTms", U16, None),
    ("OutPFSet_RmpTms", U16, None),
    ("OutPFSet_Ena", Enum16, None),
    ("VArWMaxPct", I16, Some("VArPct_SF")),
    ("VArMaxPct", I16, Some("VArPct_SF")),
    ("VArAvalPct", I16, Some("VArPct_SF")),
    ("VArPct_WinTms", U16, None),
    ("VArPct_RvrtTms", U16, None),
    ("VArPct_RmpTms", U16, None),
    ("VArPct_Mod", Enum16, None),
    ("VArPct_Ena", Enum16, None),
    ("WMaxLimPct_SF", Sf, None),
    ("OutPFSet_SF", Sf, None),
    ("VArPct_SF", Sf, None),
];

/// Model 201: single-phase meter.
const M201: &[Def] = &[
    ("A", I16, Some("A_SF")),
    ("AphA", I16, Some("A_SF")),
    ("AphB", I16, Some("A_SF")),
    ("AphC", I16, Some("A_SF")),
    ("A_SF", Sf, None),
    ("PhV", I16, Some("V_SF")),
    ("PhVphA", I16, Some("V_SF")),
    ("PhVphB", I16, Some("V_SF")),
    ("PhVphC", I16, Some("V_SF")),
    ("PPV", I16, Some("V_SF")),
    ("PPVphAB", I16, Some("V_SF")),
    ("PPVphBC", I16, Some("V_SF")),
    ("PPVphCA", I16, Some("V_SF")),
    ("V_SF", Sf, None),
    ("Hz", I16, Some("Hz_SF")),
    ("Hz_SF", Sf, None),
    ("W", I16, Some("W_SF")),
    ("WphA", I16, Some("W_SF")),
    ("WphB", I16, Some("W_SF")),
    ("WphC", I16, Some("W_SF")),
    ("W_SF", Sf, None),
    ("VA", I16, Some("VA_SF")),
    ("VAphA", I16, Some("VA_SF")),
    ("VAphB", I16, Some("VA_SF")),
    ("VAphC", I16, Some("VA_SF")),
    ("VA_SF", Sf, None),
    ("VAR", I16, Some("VAR_SF")),
    ("VARphA", I16, Some("VAR_SF")),
    ("VARphB", I16, Some("VAR_SF")),
    ("VARphC", I16, Some("VAR_SF")),
    ("VAR_SF", Sf, None),
    ("PF", I16, Some("PF_SF")),
    ("PFphA", I16, Some("PF_SF")),
    ("PFphB", I16, Some("PF_SF")),
    ("PFphC", I16, Some("PF_SF")),
    ("PF_SF", Sf, None),
    ("TotWhExp", Acc32, Some("TotWh_SF")),
    ("TotWhExpPhA", Acc32, Some("TotWh_SF")),
    ("TotWhExpPhB", Acc32, Some("TotWh_SF")),
    ("TotWhExpPhC", Acc32, Some("TotWh_SF")),
    ("TotWhImp", Acc32, Some("TotWh_SF")),
    ("TotWhImpPhA", Acc32, Some("TotWh_SF")),
    ("TotWhImpPhB", Acc32, Some("TotWh_SF")),
    ("TotWhImpPhC", Acc32, Some("TotWh_SF")),
    ("TotWh_SF", Sf, None),
    ("TotVAhExp", Acc32, Some("TotVAh_SF")),
    ("TotVAhExpPhA", Acc32, Some("TotVAh_SF")),
    ("TotVAhExpPhB", Acc32, Some("TotVAh_SF")),
    ("TotVAhExpPhC", Acc32, Some("TotVAh_SF")),
    ("TotVAhImp", Acc32, Some("TotVAh_SF")),
    ("TotVAhImpPhA", Acc32, Some("TotVAh_SF")),
    ("TotVAhImpPhB", Acc32, Some("TotVAh_SF")),
    ("TotVAhImpPhC", Acc32, Some("TotVAh_SF")),
    ("TotVAh_SF", Sf, None),
    ("TotVArhImpQ1", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ1PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ1PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ1PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArh_SF", Sf, None),
    ("Evt", Bitfield32, None),
];

/// Models 202, 203 and 204: split-phase, three-phase wye and delta meter (one layout).
const M20X: &[Def] = &[
    ("A", I16, Some("A_SF")),
    ("AphA", I16, Some("A_SF")),
    ("AphB", I16, Some("A_SF")),
    ("AphC", I16, Some("A_SF")),
    ("A_SF", Sf, None),
    ("PhV", I16, Some("V_SF")),
    ("PhVphA", I16, Some("V_SF")),
    ("PhVphB", I16, Some("V_SF")),
    ("PhVphC", I16, Some("V_SF")),
    ("PPV", I16, Some("V_SF")),
    ("PhVphAB", I16, Some("V_SF")),
    ("PhVphBC", I16, Some("V_SF")),
    ("PhVphCA", I16, Some("V_SF")),
    ("V_SF", Sf, None),
    ("Hz", I16, Some("Hz_SF")),
    ("Hz_SF", Sf, None),
    ("W", I16, Some("W_SF")),
    ("WphA", I16, Some("W_SF")),
    ("WphB", I16, Some("W_SF")),
    ("WphC", I16, Some("W_SF")),
    ("W_SF", Sf, None),
    ("VA", I16, Some("VA_SF")),
    ("VAphA", I16, Some("VA_SF")),
    ("VAphB", I16, Some("VA_SF")),
    ("VAphC", I16, Some("VA_SF")),
    ("VA_SF", Sf, None),
    ("VAR", I16, Some("VAR_SF")),
    ("VARphA", I16, Some("VAR_SF")),
    ("VARphB", I16, Some("VAR_SF")),
    ("VARphC", I16, Some("VAR_SF")),
    ("VAR_SF", Sf, None),
    ("PF", I16, Some("PF_SF")),
    ("PFphA", I16, Some("PF_SF")),
    ("PFphB", I16, Some("PF_SF")),
    ("PFphC", I16, Some("PF_SF")),
    ("PF_SF", Sf, None),
    ("TotWhExp", Acc32, Some("TotWh_SF")),
    ("TotWhExpPhA", Acc32, Some("TotWh_SF")),
    ("TotWhExpPhB", Acc32, Some("TotWh_SF")),
    ("TotWhExpPhC", Acc32, Some("TotWh_SF")),
    ("TotWhImp", Acc32, Some("TotWh_SF")),
    ("TotWhImpPhA", Acc32, Some("TotWh_SF")),
    ("TotWhImpPhB", Acc32, Some("TotWh_SF")),
    ("TotWhImpPhC", Acc32, Some("TotWh_SF")),
    ("TotWh_SF", Sf, None),
    ("TotVAhExp", Acc32, Some("TotVAh_SF")),
    ("TotVAhExpPhA", Acc32, Some("TotVAh_SF")),
    ("TotVAhExpPhB", Acc32, Some("TotVAh_SF")),
    ("TotVAhExpPhC", Acc32, Some("TotVAh_SF")),
    ("TotVAhImp", Acc32, Some("TotVAh_SF")),
    ("TotVAhImpPhA", Acc32, Some("TotVAh_SF")),
    ("TotVAhImpPhB", Acc32, Some("TotVAh_SF")),
    ("TotVAhImpPhC", Acc32, Some("TotVAh_SF")),
    ("TotVAh_SF", Sf, None),
    ("TotVArhImpQ1", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ1PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ1PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ1PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhImpQ2PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ3PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4PhA", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4PhB", Acc32, Some("TotVArh_SF")),
    ("TotVArhExpQ4PhC", Acc32, Some("TotVArh_SF")),
    ("TotVArh_SF", Sf, None),
    ("Evt", Bitfield32, None),
];

/// Model 704: DER AC Controls.
const M704: &[Def] = &[
    ("PFWInjEna", Enum16, None),
    ("PFWInjEnaRvrt", Enum16, None),
    ("PFWInjRvrtTms", U32, None),
    ("PFWInjRvrtRem", U32, None),
    ("PFWAbsEna", Enum16, None),
    ("PFWAbsEnaRvrt", Enum16, None),
    ("PFWAbsRvrtTms", U32, None),
    ("PFWAbsRvrtRem", U32, None),
    ("WMaxLimPctEna", Enum16, None),
    ("WMaxLimPct", U16, Some("WMaxLimPct_SF")),
    ("WMaxLimPctRvrt", U16, Some("WMaxLimPct_SF")),
    ("WMaxLimPctEnaRvrt", Enum16, None),
    ("WMaxLimPctRvrtTms", U32, None),
    ("WMaxLimPctRvrtRem", U32, None),
    ("WSetEna", Enum16, None),
    ("WSetMod", Enum16, None),
    ("WSet", I32, Some("WSet_SF")),
    ("WSetRvrt", I32, Some("WSet_SF")),
    ("WSetPct", I16, Some("WSetPct_SF")),
    ("WSetPctRvrt", I16, Some("WSetPct_SF")),
    ("WSetEnaRvrt", Enum16, None),
    ("WSetRvrtTms", U32, None),
    ("WSetRvrtRem", U32, None),
    ("VarSetEna", Enum16, None),
    ("VarSetMod", Enum16, None),
    ("VarSetPri", Enum16, None),
    ("VarSet", I32, Some("VarSet_SF")),
    ("VarSetRvrt", I32, Some("VarSet_SF")),
    ("VarSetPct", I16, Some("VarSetPct_SF")),
    ("VarSetPctRvrt", I16, Some("VarSetPct_SF")),
    ("VarSetEnaRvrt", Enum16, None),
    ("VarSetRvrtTms", U32, None),
    ("VarSetRvrtRem", U32, None),
    ("WRmp", U16, None),
    ("WRmpRef", Enum16, None),
    ("VarRmp", U16, None),
    ("AntiIslEna", Enum16, None),
    ("PF_SF", Sf, None),
    ("WMaxLimPct_SF", Sf, None),
    ("WSet_SF", Sf, None),
    ("WSetPct_SF", Sf, None),
    ("VarSet_SF", Sf, None),
    ("VarSetPct_SF", Sf, None),
    ("PFWInj.PF", U16, Some("PF_SF")),
    ("PFWInj.Ext", Enum16, None),
    ("PFWInjRvrt.PF", U16, Some("PF_SF")),
    ("PFWInjRvrt.Ext", Enum16, None),
    ("PFWAbs.PF", U16, Some("PF_SF")),
    ("PFWAbs.Ext", Enum16, None),
    ("PFWAbsRvrt.PF", U16, Some("PF_SF")),
    ("PFWAbsRvrt.Ext", Enum16, None),
];

#[cfg(test)]
mod tests {
    use super::*;

    /// SunSpec Information Model Specification: each model is `ID`, `L` and `L`
    /// registers; the chain ends with `ID` 0xFFFF.
    #[test]
    fn a_chain_step_reads_one_header_and_finds_the_next() {
        assert_eq!(chain_step(40002, &[1, 66]), Some(((1, 40002, 66), Some(40070))));
        assert_eq!(chain_step(40070, &[END_ID, 0]), None);
        // A device that answers the end marker with its ID alone.
        assert_eq!(chain_step(40070, &[END_ID]), None);
        // A length that runs past the address space leaves no next header.
        assert_eq!(chain_step(65530, &[101, 50]), Some(((101, 65530, 50), None)));
    }
}
