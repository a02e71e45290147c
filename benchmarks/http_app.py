"""The service plus two baseline endpoints, for HTTP benchmarks only (never deployed).

- ``POST /bench/constant``: returns a constant; the ceiling of the stack (gunicorn, Flask,
  JSON) for one request.
- ``POST /bench/naive``: the route a user would take without Skydrift: build an astropy
  SkyCoord for one star and call ``apply_space_motion`` per request.
"""

from __future__ import annotations

import warnings

from flask import jsonify, request

from service.api import create_app

app = create_app()


@app.post("/bench/constant")
def constant():
    request.get_data()
    return jsonify({"ok": True})


@app.post("/bench/naive")
def naive():
    import astropy.units as u
    from astropy.coordinates import SkyCoord
    from astropy.time import Time

    body = request.get_json()
    s = body["stars"][0]
    c = SkyCoord(
        ra=s["ra_deg"] * u.deg,
        dec=s["dec_deg"] * u.deg,
        distance=(1000.0 / s["parallax_mas"]) * u.pc,
        pm_ra_cosdec=s["pm_ra_cosdec_mas_yr"] * u.mas / u.yr,
        pm_dec=s["pm_dec_mas_yr"] * u.mas / u.yr,
        radial_velocity=s["radial_velocity_km_s"] * u.km / u.s,
        obstime=Time(body["catalogue_epoch"], format="jyear", scale="tdb"),
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ERFA "dubious year" for far epochs
        m = c.apply_space_motion(
            new_obstime=Time(body["target_epochs"][0], format="jyear", scale="tdb")
        )
    return jsonify(
        {
            "ra_deg": float(m.ra.deg),
            "dec_deg": float(m.dec.deg),
            "parallax_mas": float(1000.0 / m.distance.to_value(u.pc)),
            "pm_ra_cosdec_mas_yr": float(m.pm_ra_cosdec.to_value(u.mas / u.yr)),
            "pm_dec_mas_yr": float(m.pm_dec.to_value(u.mas / u.yr)),
            "radial_velocity_km_s": float(m.radial_velocity.to_value(u.km / u.s)),
        }
    )
