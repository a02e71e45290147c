"""Generate the invented demo catalogue (seeded, reproducible): shared/demo/catalogue.json.

The Kestrel Ridge Catalogue (KRC) is fictional: 30 made-up stars with plausible astrometry
at epoch J2016.0, chosen to exercise every path of the service: nearby fast movers, distant
slow ones, stars without radial velocity, one without parallax, one with a negative parallax,
and stars with full uncertainties and correlations.

Run: python shared/demo/make_catalogue.py
"""

import json
import pathlib

import numpy as np

A_KM_S = 4.740470463533348  # 1 au per Julian year in km/s (IAU 2012 au)

rng = np.random.default_rng(20161)
stars = []
for k in range(30):
    ra = float(rng.uniform(0.0, 360.0))
    dec = float(np.degrees(np.arcsin(rng.uniform(-0.95, 0.95))))
    plx = float(np.exp(rng.uniform(np.log(2.0), np.log(250.0))))
    vt = float(rng.uniform(10.0, 90.0))
    pa = float(rng.uniform(0.0, 2 * np.pi))
    pm = vt * plx / A_KM_S
    star = {
        "id": f"KRC {k + 1:04d}",
        "ra_deg": round(ra, 9),
        "dec_deg": round(dec, 9),
        "parallax_mas": round(plx, 4),
        "pm_ra_cosdec_mas_yr": round(pm * np.sin(pa), 4),
        "pm_dec_mas_yr": round(pm * np.cos(pa), 4),
        "radial_velocity_km_s": round(float(rng.normal(0.0, 35.0)), 2),
    }
    if k % 3 == 0:
        base = float(rng.uniform(0.01, 0.08))
        star.update(
            ra_error_mas=round(base, 4),
            dec_error_mas=round(base * 0.9, 4),
            parallax_error_mas=round(base * 1.2, 4),
            pm_ra_cosdec_error_mas_yr=round(base * 1.1, 4),
            pm_dec_error_mas_yr=round(base, 4),
            radial_velocity_error_km_s=round(float(rng.uniform(0.1, 1.5)), 2),
            correlation_ra_dec=round(float(rng.uniform(-0.3, 0.3)), 3),
            correlation_ra_pm_ra=round(float(rng.uniform(-0.2, 0.2)), 3),
            correlation_dec_pm_dec=round(float(rng.uniform(-0.2, 0.2)), 3),
            correlation_parallax_pm_ra=round(float(rng.uniform(-0.2, 0.2)), 3),
        )
    stars.append(star)

# Paths the service must handle, on purpose:
stars[4]["radial_velocity_km_s"] = None  # radial velocity unknown
stars[7]["radial_velocity_km_s"] = None
stars[10]["parallax_mas"] = None  # parallax unknown
stars[13]["parallax_mas"] = -0.35  # negative parallax, as catalogues have
stars[13]["radial_velocity_km_s"] = None
# A nearby fast mover (invented): 6.2 pc, about 3.9 arcsec/yr.
stars[16].update(
    parallax_mas=161.3,
    pm_ra_cosdec_mas_yr=-2871.2,
    pm_dec_mas_yr=2602.5,
    radial_velocity_km_s=-41.7,
)

catalogue = {
    "name": "Kestrel Ridge Catalogue (fictional)",
    "catalogue_epoch": "J2016.0",
    "frame": "ICRS",
    "note": "Invented demo data; these stars do not exist.",
    "stars": stars,
}
out = pathlib.Path(__file__).with_name("catalogue.json")
out.write_text(json.dumps(catalogue, indent=1) + "\n")
print(f"wrote {out} with {len(stars)} stars")

# The same catalogue as CSV (header = field names with units; empty cell = unknown), the
# form the command line and the CSV endpoints read.
names = list(dict.fromkeys(k for s in stars for k in s))
lines = [",".join(names)]
for s in stars:
    lines.append(",".join("" if s.get(k) is None else str(s[k]) for k in names))
csv_out = pathlib.Path(__file__).with_name("catalogue.csv")
csv_out.write_text("\n".join(lines) + "\n")
print(f"wrote {csv_out}")
