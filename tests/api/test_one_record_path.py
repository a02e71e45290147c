"""One star record is read by a short path (StarTableField._one_plain_record) when all its
values pass their checks; anything amiss goes the general way, which names the fault. The
short path must accept only what the general way accepts, and give the same table."""

import math
import zlib

import marshmallow as ma
import numpy as np
import pytest

from service.api import charts, constellations, frames, observed, propagation, velocity
from service.api.tables import MAX_ID_LENGTH, StarTableField


def _star_table_fields():
    found = {}
    for module in (charts, constellations, frames, observed, propagation, velocity):
        for obj in vars(module).values():
            if isinstance(obj, type) and issubclass(obj, ma.Schema):
                for name, fld in obj._declared_fields.items():
                    if isinstance(fld, StarTableField):
                        found[id(fld)] = (f"{module.__name__}.{obj.__name__}.{name}", fld)
    return sorted(found.values(), key=lambda item: item[0])


FIELDS = _star_table_fields()


def test_every_star_table_of_the_service_is_covered():
    # Nine request schemas hold a star table (propagation, velocity and observables, frames,
    # observed, constellation lookup and crossings, two charts); a new one is found too.
    assert len(FIELDS) >= 9


def _valid_value(spec, rng):
    if spec.kind == "id":
        return ["KRC 0001", 17, None, "x" * MAX_ID_LENGTH][rng.integers(4)]
    lo = -1e3 if spec.lo is None else spec.lo
    hi = 1e3 if spec.hi is None else spec.hi
    lo, hi = max(lo, -1e3), min(hi, 1e3)
    value = float(rng.uniform(lo, hi))
    if rng.random() < 0.1:
        value = int(round(value)) if lo <= round(value) <= hi else value
    if rng.random() < 0.15:
        value = lo if spec.lo_inclusive else value  # a bound itself, where it is taken
    return value


#: Values that some check refuses somewhere (or, for a nullable column, takes as unknown).
ODD_VALUES = [None, True, False, "12.5", "x", [], {}, 10**400, 2**70, -1e10 - 1, 1e10 + 1,
              -91.0, 91.0, 360.0, -1.5, 1.5, 0.0, -0.0, 1e-300, "y" * (MAX_ID_LENGTH + 1),
              12.5, 2.0**64]  # fmt: skip


#: Identifiers: too long, no string or integer (an integer beyond 64 bits reads as a float),
#: and some that are taken.
ODD_IDS = ["y" * (MAX_ID_LENGTH + 1), 1.5, True, 2.0**64, [], None, "", -(2**63)]


def _records(fld, rng, n):
    """Valid records of this table (optional columns sometimes left out), then each with
    one to three of its values replaced by odd ones, a column dropped or an unknown one
    added."""
    out = []
    for _ in range(n):
        rec = {}
        for spec in fld.specs:
            if spec.required or rng.random() < 0.5:
                rec[spec.name] = _valid_value(spec, rng)
        out.append(rec)
    for base in list(out):
        rec = dict(base)
        for _ in range(rng.integers(1, 4)):
            what = rng.random()
            names = list(rec) or [fld.specs[0].name]
            if what < 0.6:
                rec[str(rng.choice(names))] = ODD_VALUES[rng.integers(len(ODD_VALUES))]
            elif what < 0.7:
                rec["id"] = ODD_IDS[rng.integers(len(ODD_IDS))]
            elif what < 0.85:
                rec.pop(str(rng.choice(names)), None)
            else:
                rec["paralax_mas"] = 10.0
        out.append(rec)
    return out


def _same(a, b) -> bool:
    if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
        a, b = np.asarray(a), np.asarray(b)
        return a.dtype == b.dtype and a.shape == b.shape and np.array_equal(a, b, equal_nan=True)
    if isinstance(a, tuple | list):
        return len(a) == len(b) and all(_same(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, dict):
        return a.keys() == b.keys() and all(_same(a[k], b[k]) for k in a)
    if isinstance(a, float) and math.isnan(a):
        return isinstance(b, float) and math.isnan(b)
    return type(a) is type(b) and a == b


def _compare_one(fld, rec) -> str:
    """Read one record both ways: "taken" (both give the same table), "refused" (the general
    way refuses it and the short path stepped aside) or "general only" (the short path
    stepped aside from a record the general way takes); fails where they disagree."""
    short = fld._one_plain_record(rec)
    try:
        general = fld._records_table([rec], frozenset())
    except ma.ValidationError:
        assert short is None, rec  # the short path accepted a refused record
        return "refused"
    if short is None:
        return "general only"  # the general way read it; nothing to compare
    assert _same(dict(short.columns), dict(general.columns)), rec
    assert _same(short.ids, general.ids), rec
    assert (short.size, short.form, short.given, short.lines) == (
        general.size,
        general.form,
        general.given,
        general.lines,
    ), rec
    assert _same(short.derived, general.derived), rec
    return "taken"


@pytest.mark.parametrize(("where", "fld"), FIELDS, ids=[w for w, _ in FIELDS])
def test_one_record_path_gives_the_general_table_or_steps_aside(where, fld):
    rng = np.random.default_rng(zlib.crc32(where.encode()))  # the same records in every run
    outcomes = [_compare_one(fld, rec) for rec in _records(fld, rng, 200)]
    taken, refused = outcomes.count("taken"), outcomes.count("refused")
    # Both kinds were met: the short path is taken for clean records, and the odd values
    # were refused by the general way often enough to test that the short one refuses them.
    assert taken >= 50 and refused >= 50, (where, taken, refused)


@pytest.mark.parametrize(("where", "fld"), FIELDS, ids=[w for w, _ in FIELDS])
def test_one_record_path_at_every_bound(where, fld):
    # Each bounded column of a clean record set to its bound and to the floats on either
    # side of it, one column at a time: an exclusive bound (the radial velocity's +-c) is
    # met only here, the random records above almost never land on it.
    rng = np.random.default_rng(zlib.crc32(where.encode()))
    for _ in range(100):  # a clean record: one the short path takes
        base = {spec.name: _valid_value(spec, rng) for spec in fld.specs if spec.required}
        if _compare_one(fld, base) == "taken":
            break
    else:
        pytest.fail(f"no clean record of {where} was taken by the short path")
    seen = set()
    for spec in fld.specs:
        if spec.kind == "id":
            continue
        for bound in (spec.lo, spec.hi):
            if bound is None:
                continue
            b = float(bound)
            for value in (b, math.nextafter(b, -math.inf), math.nextafter(b, math.inf)):
                seen.add(_compare_one(fld, {**base, spec.name: value}))
    assert {"taken", "refused"} <= seen, (where, seen)


def test_one_record_path_is_taken_by_a_one_star_request():
    # The telescope's request: one clean record goes the short way (else its cost is back).
    fld = dict(FIELDS)["service.api.propagation.PropagationRequestSchema.stars"]
    rec = {"id": "KRC 0017", "ra_deg": 55.5, "dec_deg": 19.6, "parallax_mas": 161.3,
           "pm_ra_cosdec_mas_yr": -2871.2, "pm_dec_mas_yr": 2602.5,
           "radial_velocity_km_s": -41.7}  # fmt: skip
    table = fld._one_plain_record(rec)
    assert table is not None and table.size == 1 and table.columns["ra_deg"][0] == 55.5
