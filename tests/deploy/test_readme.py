"""The README's deployment section lists every setting the code reads."""

import pathlib
import re

ROOT = pathlib.Path(__file__).resolve().parents[2]


def test_every_setting_in_the_readme_table():
    readme = (ROOT / "README.md").read_text()
    rows = set(re.findall(r"^\| `([A-Z_]+)` \|", readme, flags=re.M))
    code = ""
    for path in [ROOT / "deploy" / "gunicorn.conf.py", *sorted((ROOT / "service").rglob("*.py"))]:
        code += path.read_text()
    names = set(re.findall(r"\bSKYDRIFT_[A-Z_]*[A-Z]\b", code)) - {"SKYDRIFT_SETTINGS"}
    names.add("PROMETHEUS_MULTIPROC_DIR")
    missing = sorted(names - rows)
    assert not missing, f"settings missing from the README's settings table: {missing}"
