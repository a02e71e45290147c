"""The service, the bare constant endpoint, and a naive astropy AltAz endpoint.

For HTTP benchmarks only (never deployed). ``POST /bench/naive_altaz`` is the route a user
would take without Skydrift: per request, build an astropy SkyCoord for one star, apply its
space motion to the instant and transform it to AltAz at the site.
"""

from __future__ import annotations

import warnings

from flask import jsonify, request

from benchmarks.http_app import app


@app.post("/bench/naive_altaz")
def naive_altaz():
    import astropy.units as u
    from astropy.coordinates import AltAz, EarthLocation, SkyCoord
    from astropy.time import Time

    body = request.get_json()
    s = body["stars"][0]
    site = body["site"]
    atm = body.get("atmosphere") or {}
    c = SkyCoord(
        ra=s["ra_deg"] * u.deg,
        dec=s["dec_deg"] * u.deg,
        distance=(1000.0 / s["parallax_mas"]) * u.pc,
        pm_ra_cosdec=s["pm_ra_cosdec_mas_yr"] * u.mas / u.yr,
        pm_dec=s["pm_dec_mas_yr"] * u.mas / u.yr,
        radial_velocity=s["radial_velocity_km_s"] * u.km / u.s,
        obstime=Time(body["catalogue_epoch"], format="jyear", scale="tdb"),
    )
    t = Time(body["instants"][0], scale="utc")
    loc = EarthLocation.from_geodetic(
        site["longitude_deg"] * u.deg, site["latitude_deg"] * u.deg, site["height_m"] * u.m
    )
    frame = AltAz(
        obstime=t,
        location=loc,
        pressure=atm.get("pressure_hpa", 0.0) * u.hPa,
        temperature=atm.get("temperature_c", 10.0) * u.deg_C,
        relative_humidity=atm.get("relative_humidity", 0.5),
        obswl=atm.get("wavelength_um", 0.55) * u.micron,
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # IERS/ERFA notices about table ages
        aa = c.apply_space_motion(new_obstime=t).transform_to(frame)
    return jsonify({"azimuth_deg": float(aa.az.deg), "altitude_deg": float(aa.alt.deg)})
