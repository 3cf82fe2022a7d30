"""Times pvlib on the chain the simulator runs: a clear-sky year at 1-minute resolution
(NREL SPA, Ineichen–Perez, Hay–Davies, Faiman, PVWatts DC and inverter), for comparison
with `cargo bench -p spillway-sim --bench solar`.

Requires: pip install 'pvlib==0.16.1'
Usage:    python3 bench_pvlib.py        (prints steps/s for the whole chain and for SPA)
"""

import time

import pandas as pd
import pvlib

PVLIB_VERSION = "0.16.1"


def chain(times, lat, lon, alt, tilt, azimuth, kwp):
    pressure = pvlib.atmosphere.alt2pres(alt)
    t0 = time.perf_counter()
    sp = pvlib.solarposition.spa_python(times, lat, lon, altitude=alt, pressure=pressure,
                                        temperature=20.0, delta_t=69.0)
    t_spa = time.perf_counter() - t0
    zen = sp["apparent_zenith"]
    am = pvlib.atmosphere.get_absolute_airmass(
        pvlib.atmosphere.get_relative_airmass(zen, model="kastenyoung1989"), pressure)
    dni_extra = pvlib.irradiance.get_extra_radiation(times, method="spencer")
    cs = pvlib.clearsky.ineichen(zen, am, 3.0, altitude=alt, dni_extra=dni_extra).fillna(0.0)
    poa = pvlib.irradiance.get_total_irradiance(tilt, azimuth, zen, sp["azimuth"], cs["dni"],
                                                cs["ghi"], cs["dhi"], dni_extra=dni_extra,
                                                albedo=0.25, model="haydavies").fillna(0.0)
    tcell = pvlib.temperature.faiman(poa["poa_global"], 20.0, 1.0)
    dc = pvlib.pvsystem.pvwatts_dc(poa["poa_global"], tcell, kwp * 1000.0, -0.004)
    ac = pvlib.inverter.pvwatts(dc, kwp * 1000.0 / 0.96)
    total = time.perf_counter() - t0
    return total, t_spa, float(ac.sum()) / 60.0 / 1000.0


def main():
    assert pvlib.__version__ == PVLIB_VERSION, pvlib.__version__
    times = pd.date_range("2025-01-01", "2026-01-01", freq="1min", inclusive="left", tz="Europe/Rome")
    best = None
    for _ in range(3):
        run = chain(times, 45.46, 9.19, 120.0, 30.0, 180.0, 8.0)
        best = run if best is None or run[0] < best[0] else best
    total, t_spa, kwh = best
    n = len(times)
    print(f"pvlib {pvlib.__version__}: {n} one-minute steps (clear-sky year, 8 kWp, {kwh:.0f} kWh AC)")
    print(f"  whole chain: {total:.3f} s = {n / total / 1e6:.2f} M steps/s")
    print(f"  of which SPA (numpy): {t_spa:.3f} s = {n / t_spa / 1e6:.2f} M steps/s")


if __name__ == "__main__":
    main()
