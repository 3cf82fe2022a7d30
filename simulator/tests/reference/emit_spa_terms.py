"""Writes simulator/src/sun/terms.rs: the periodic-term tables of the NREL Solar
Position Algorithm (Reda & Andreas, NREL/TP-560-34302, rev. 2008, Table A4.2 for the
Earth heliocentric longitude, latitude and radius vector, Table A4.3 for nutation).

The values are taken from pvlib's transcription of the same tables (`pvlib.spa`,
pvlib==0.16.1) so that no digit is retyped by hand; the row counts are checked
against the paper's (64/34/20/7/3/1, 5/2, 40/10/6/2/1, 63).

Usage: python3 emit_spa_terms.py > ../../src/sun/terms.rs && cargo fmt -p spillway-sim
"""

import pvlib
from pvlib import spa

EXPECTED = {
    "L0": 64, "L1": 34, "L2": 20, "L3": 7, "L4": 3, "L5": 1,
    "B0": 5, "B1": 2,
    "R0": 40, "R1": 10, "R2": 6, "R3": 2, "R4": 1,
}


def main():
    assert pvlib.__version__ == "0.16.1", pvlib.__version__
    out = []
    out.append("//! Periodic terms of the NREL Solar Position Algorithm (generated, do not edit).")
    out.append("//!")
    out.append("//! Source: Reda & Andreas, NREL/TP-560-34302 (rev. 2008), Table A4.2 (Earth")
    out.append("//! heliocentric longitude L0..L5, latitude B0..B1, radius vector R0..R4; columns A, B, C")
    out.append("//! of `A cos(B + C x)`) and Table A4.3 (nutation: multipliers of X0..X4 and the")
    out.append("//! coefficients a, b, c, d). Written by `tests/reference/emit_spa_terms.py` from the")
    out.append("//! transcription in pvlib 0.16.1 (`pvlib.spa`).")
    out.append("")
    out.append("// Phases such as 3.14 and 3.142 are the paper's rounded values, not π.")
    out.append("#![allow(clippy::approx_constant)]")
    out.append("")
    for name, rows in EXPECTED.items():
        arr = getattr(spa, name)
        assert arr.shape == (rows, 3), (name, arr.shape)
        out.append(f"pub(super) const {name}: [[f64; 3]; {rows}] = [")
        for a, b, c in arr:
            out.append(f"    [{float(a)!r}, {float(b)!r}, {float(c)!r}],")
        out.append("];")
        out.append("")
    abcd = spa.NUTATION_ABCD_ARRAY
    y = spa.NUTATION_YTERM_ARRAY
    assert abcd.shape == (63, 4) and y.shape == (63, 5)
    out.append("/// Multipliers of X0..X4 (mean elongation of the moon, mean anomaly of the sun,")
    out.append("/// mean anomaly of the moon, argument of latitude of the moon, ascending node).")
    out.append("pub(super) const NUTATION_Y: [[i8; 5]; 63] = [")
    for row in y:
        out.append("    [" + ", ".join(str(int(v)) for v in row) + "],")
    out.append("];")
    out.append("")
    out.append("/// Coefficients a, b, c, d: Δψ += (a + b·JCE) sin(arg), Δε += (c + d·JCE) cos(arg),")
    out.append("/// in units of 0.0001″.")
    out.append("pub(super) const NUTATION_ABCD: [[f64; 4]; 63] = [")
    for row in abcd:
        out.append("    [" + ", ".join(repr(float(v)) for v in row) + "],")
    out.append("];")
    print("\n".join(out))


if __name__ == "__main__":
    main()
