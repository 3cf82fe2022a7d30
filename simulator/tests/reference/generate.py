"""Reference tables for the simulator's solar chain, computed with pvlib.

Requires: pip install 'pvlib==0.16.1'   (numpy 2.4, pandas 3.1 at the time of writing)
Usage:    python3 generate.py            (writes sites.json and minutes.csv beside it)

For each site-day below it runs, at every minute of the local calendar day:
  pvlib.solarposition.spa_python   (NREL SPA; pressure from alt2pres, temperature = air)
  pvlib.atmosphere.get_relative_airmass('kastenyoung1989') on the apparent zenith,
      get_absolute_airmass with the same pressure
  pvlib.irradiance.get_extra_radiation (Spencer, day of year in UTC)
  pvlib.clearsky.ineichen (Linke turbidity, altitude terms)   and  clearsky.haurwitz
  pvlib.irradiance.get_total_irradiance (model 'haydavies', albedo 0.25; also 'isotropic')
  pvlib.temperature.faiman (u0 = 25, u1 = 6.84)
  pvlib.pvsystem.pvwatts_dc × (1 − losses), pvlib.inverter.pvwatts (η_nom 0.96, η_ref 0.9637)
and writes the daylight minutes (apparent zenith < 90.5°) to minutes.csv and the site
parameters with the whole-day energies (all minutes, rectangle rule) to sites.json.
The Rust tests (tests/solar_reference.rs) read these files; no Python is needed there.
"""

import json
import os

import numpy as np
import pandas as pd
import pvlib

PVLIB_VERSION = "0.16.1"

# Sites in both hemispheres, all seasons, tilts 5°–90°, east/south/west/north faces,
# sea level to 2850 m; two with inverter clipping, two with losses, one DST-change day,
# one midnight-sun day. Scenarios of our own; coordinates are those of the named places.
SITES = [
    dict(id="golden-equinox", lat=39.742476, lon=-105.1786, alt=1830.0, tz="America/Denver",
         date="2025-03-20", tilt=30, azimuth=180, kwp=5.0, ac_kw=4.6, gamma=-0.004, linke=2.5,
         air=10.0, wind=3.0, losses=0.0),
    dict(id="berlin-solstice", lat=52.52, lon=13.405, alt=35.0, tz="Europe/Berlin",
         date="2025-06-21", tilt=35, azimuth=160, kwp=2.25, ac_kw=1.8, gamma=-0.0037, linke=3.5,
         air=22.0, wind=1.0, losses=14.0),
    dict(id="capetown-summer", lat=-33.9249, lon=18.4241, alt=20.0, tz="Africa/Johannesburg",
         date="2025-12-21", tilt=20, azimuth=0, kwp=4.0, ac_kw=4.0, gamma=-0.004, linke=3.0,
         air=24.0, wind=5.0, losses=0.0),
    dict(id="sydney-winter", lat=-33.8688, lon=151.2093, alt=50.0, tz="Australia/Sydney",
         date="2025-06-21", tilt=30, azimuth=0, kwp=6.6, ac_kw=5.0, gamma=-0.0035, linke=3.0,
         air=14.0, wind=2.0, losses=0.0),
    dict(id="johannesburg-spring", lat=-26.2041, lon=28.0473, alt=1753.0, tz="Africa/Johannesburg",
         date="2025-09-22", tilt=25, azimuth=20, kwp=3.0, ac_kw=3.0, gamma=-0.004, linke=2.8,
         air=18.0, wind=2.5, losses=10.0),
    dict(id="singapore-east", lat=1.3521, lon=103.8198, alt=15.0, tz="Asia/Singapore",
         date="2025-03-21", tilt=10, azimuth=90, kwp=5.0, ac_kw=5.0, gamma=-0.0045, linke=4.5,
         air=30.0, wind=1.5, losses=0.0),
    dict(id="reykjavik-winter", lat=64.1466, lon=-21.9426, alt=30.0, tz="Atlantic/Reykjavik",
         date="2025-12-21", tilt=60, azimuth=180, kwp=3.0, ac_kw=3.0, gamma=-0.004, linke=2.0,
         air=-1.0, wind=6.0, losses=0.0),
    dict(id="phoenix-west", lat=33.4484, lon=-112.074, alt=340.0, tz="America/Phoenix",
         date="2025-07-15", tilt=20, azimuth=270, kwp=8.0, ac_kw=7.6, gamma=-0.004, linke=3.2,
         air=38.0, wind=2.0, losses=0.0),
    dict(id="tromso-midnight-sun", lat=69.6492, lon=18.9553, alt=10.0, tz="Europe/Oslo",
         date="2025-06-21", tilt=90, azimuth=180, kwp=2.0, ac_kw=2.0, gamma=-0.004, linke=2.2,
         air=12.0, wind=3.0, losses=0.0),
    dict(id="quito-altitude", lat=-0.1807, lon=-78.4678, alt=2850.0, tz="America/Guayaquil",
         date="2025-12-21", tilt=5, azimuth=0, kwp=3.0, ac_kw=3.0, gamma=-0.004, linke=3.0,
         air=14.0, wind=1.0, losses=0.0),
    dict(id="buenosaires-autumn", lat=-34.6037, lon=-58.3816, alt=25.0, tz="America/Argentina/Buenos_Aires",
         date="2025-04-15", tilt=35, azimuth=315, kwp=4.0, ac_kw=4.0, gamma=-0.004, linke=3.3,
         air=19.0, wind=3.0, losses=0.0),
    dict(id="melbourne-dst-start", lat=-37.8136, lon=144.9631, alt=30.0, tz="Australia/Melbourne",
         date="2025-10-05", tilt=25, azimuth=30, kwp=5.0, ac_kw=5.0, gamma=-0.004, linke=3.0,
         air=16.0, wind=4.0, losses=0.0),
]


def day_minutes(site):
    start = pd.Timestamp(site["date"], tz=site["tz"])
    end = (pd.Timestamp(site["date"]) + pd.Timedelta(days=1)).tz_localize(site["tz"])
    return pd.date_range(start=start, end=end, freq="1min", inclusive="left")


def run_site(site):
    times = day_minutes(site)
    pressure = pvlib.atmosphere.alt2pres(site["alt"])
    delta_t = float(pvlib.spa.calculate_deltat(times[0].tz_convert("UTC").year,
                                               times[0].tz_convert("UTC").month))
    sp = pvlib.solarposition.spa_python(times, site["lat"], site["lon"], altitude=site["alt"],
                                        pressure=pressure, temperature=site["air"],
                                        delta_t=delta_t, atmos_refract=0.5667)
    zen = sp["apparent_zenith"]
    am_rel = pvlib.atmosphere.get_relative_airmass(zen, model="kastenyoung1989")
    am_abs = pvlib.atmosphere.get_absolute_airmass(am_rel, pressure)
    doy = times.tz_convert("UTC").day_of_year.to_numpy()
    dni_extra = pd.Series(pvlib.irradiance.get_extra_radiation(doy, method="spencer"), index=times)
    cs = pvlib.clearsky.ineichen(zen, am_abs, site["linke"], altitude=site["alt"],
                                 dni_extra=dni_extra).fillna(0.0)
    haurwitz = pvlib.clearsky.haurwitz(zen)["ghi"].fillna(0.0)
    poa = pvlib.irradiance.get_total_irradiance(site["tilt"], site["azimuth"], zen, sp["azimuth"],
                                                cs["dni"], cs["ghi"], cs["dhi"], dni_extra=dni_extra,
                                                albedo=0.25, model="haydavies").fillna(0.0)
    poa_iso = pvlib.irradiance.get_total_irradiance(site["tilt"], site["azimuth"], zen, sp["azimuth"],
                                                    cs["dni"], cs["ghi"], cs["dhi"], albedo=0.25,
                                                    model="isotropic").fillna(0.0)
    tcell = pvlib.temperature.faiman(poa["poa_global"], site["air"], site["wind"], u0=25.0, u1=6.84)
    dc = pvlib.pvsystem.pvwatts_dc(poa["poa_global"], tcell, site["kwp"] * 1000.0, site["gamma"])
    dc = dc * (1.0 - site["losses"] / 100.0)
    ac = pvlib.inverter.pvwatts(dc, site["ac_kw"] * 1000.0 / 0.96, eta_inv_nom=0.96, eta_inv_ref=0.9637)
    frame = pd.DataFrame({
        "unix_s": (times.tz_convert("UTC").as_unit("s").asi8).astype(np.int64),
        "apparent_zenith": zen, "azimuth": sp["azimuth"],
        "ghi": cs["ghi"], "dni": cs["dni"], "dhi": cs["dhi"], "ghi_haurwitz": haurwitz,
        "poa": poa["poa_global"], "poa_isotropic": poa_iso["poa_global"],
        "cell_temp": tcell, "dc_w": dc, "ac_w": ac,
    })
    hours = 1.0 / 60.0
    energies = dict(
        ghi_kwh_m2=float(frame["ghi"].sum() * hours / 1000.0),
        poa_kwh_m2=float(frame["poa"].sum() * hours / 1000.0),
        dc_kwh=float(frame["dc_w"].sum() * hours / 1000.0),
        ac_kwh=float(frame["ac_w"].sum() * hours / 1000.0),
        peak_ac_w=float(frame["ac_w"].max()),
    )
    meta = dict(site, pressure_pa=float(pressure), delta_t=delta_t, minutes=len(times), **energies)
    daylight = frame[frame["apparent_zenith"] < 90.5].copy()
    daylight.insert(0, "site", site["id"])
    return meta, daylight


def main():
    assert pvlib.__version__ == PVLIB_VERSION, f"expected pvlib {PVLIB_VERSION}, have {pvlib.__version__}"
    here = os.path.dirname(os.path.abspath(__file__))
    metas, frames = [], []
    for site in SITES:
        meta, frame = run_site(site)
        metas.append(meta)
        frames.append(frame)
    with open(os.path.join(here, "sites.json"), "w") as f:
        json.dump({"generator": "simulator/tests/reference/generate.py",
                   "library": f"pvlib-python {PVLIB_VERSION}",
                   "albedo": 0.25, "faiman_u0": 25.0, "faiman_u1": 6.84,
                   "eta_inv_nom": 0.96, "eta_inv_ref": 0.9637, "atmos_refract": 0.5667,
                   "sites": metas}, f, indent=1)
        f.write("\n")
    table = pd.concat(frames)
    with open(os.path.join(here, "minutes.csv"), "w") as f:
        f.write(f"# pvlib-python {PVLIB_VERSION} reference, written by generate.py; one row per daylight minute\n")
        table.to_csv(f, index=False, float_format="%.6f", lineterminator="\n")


if __name__ == "__main__":
    main()
