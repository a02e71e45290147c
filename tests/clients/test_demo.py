"""`make demo`: the invented scenario end to end through the client, against the live service."""

import os
import subprocess
import sys

from tests.conftest import DEMO, ROOT


def test_demo_scenario_end_to_end(live_service, tmp_path):
    env = dict(os.environ, SKYDRIFT_URL=live_service, SKYDRIFT_DEMO_OUT=str(tmp_path))
    out = subprocess.run(
        [sys.executable, str(DEMO / "run.py")],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert out.returncode == 0, out.stderr
    text = out.stdout
    for heading in ("Observed places", "Constellations tonight", "Velocities", "Charts in"):
        assert heading in text
    assert "advisory" in text.lower()  # the safety figures are said to be advisory
    # The limits behind below_horizon_limit and within_sun_avoidance are shown beside the
    # flags: the demo site's horizon limit (shared/demo/observatory.json, 15 deg) and the
    # built-in Sun-avoidance placeholder (SKYDRIFT_SUN_AVOIDANCE_DEG default, 30 deg).
    assert "horizon limit 15.0 deg" in text
    assert "Sun avoidance 30.0 deg" in text
    assert "KRC 0017 crosses from Tau into Ari" in text
    # The tracking rates' table: an equatorial mount's hour-angle rate beside the
    # alt-azimuth rates, about the Earth's 15.04 arcsec/s for KRC 0017 (63 deg up).
    lines = text.splitlines()
    at = next(i for i, line in enumerate(lines) if "ha_rate" in line)
    row = next(line for line in lines[at:] if line.startswith("KRC 0017 "))
    column = lines[at].split().index("ha_rate") + 1  # the id "KRC 0017" is two words
    assert abs(float(row.split()[column]) - 15.04) < 0.05
    # A night's track of KRC 0017 from a range of instants: 13 hourly rows, 18:00 to 06:00,
    # rising and setting (up to 70 deg; below the site's limit of 15 deg at 06:00).
    at = next(i for i, line in enumerate(lines) if "through the night" in line)
    rows = lines[at + 4 : at + 17]
    assert [r[11:16] for r in rows] == [f"{h % 24:02d}:00" for h in range(18, 31)]
    altitudes = [float(r.split()[2]) for r in rows]
    assert max(altitudes) > 60.0 and altitudes[0] < altitudes[5] and altitudes[-1] < 15.0
    assert "below_horizon_limit" in rows[-1] and "below_horizon_limit" not in rows[6]
    for name in ("field.svg", "field.png", "track_krc_0017.svg", "track_krc_0017.png"):
        assert (tmp_path / name).stat().st_size > 1000
