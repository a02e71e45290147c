"""Large JSON bodies in the columns layout (service/api/jsoncolumns.py): the document must be
exactly what orjson reads (the reference: orjson, a general-purpose JSON library, run
here), with the number columns as float64 arrays; anything else is left to orjson."""

import json

import numpy as np
import orjson
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.api import jsoncolumns

NUMBERS = frozenset({"ra_deg", "dec_deg", "parallax_mas"})


@pytest.fixture
def every_size(monkeypatch):
    """The simdjson path for bodies of any size (it is taken from 1 MiB in service)."""
    monkeypatch.setattr(jsoncolumns, "FROM_BYTES", 0)


def plain(obj):
    """The document with arrays as lists, to compare with orjson's reading."""
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, dict):
        return {k: plain(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [plain(v) for v in obj]
    return obj


def same_types(a, b) -> bool:
    """Same values and same JSON types (1 and 1.0 differ: an id 1 must stay an integer)."""
    if isinstance(a, dict):
        return isinstance(b, dict) and list(a) == list(b) and all(same_types(a[k], b[k]) for k in a)
    if isinstance(a, list):
        return isinstance(b, list) and len(a) == len(b) and all(map(same_types, a, b))
    return type(a) is type(b) and a == b


def read_both(text: bytes):
    """(this module's reading, orjson's reading); either may be the exception raised."""
    out = []
    for reader in (lambda t: jsoncolumns.loads(t, NUMBERS), orjson.loads):
        try:
            out.append(reader(text))
        except orjson.JSONDecodeError as exc:
            out.append(type(exc))
    return out


def test_number_columns_become_float_arrays(every_size):
    text = b'{"stars": {"ra_deg": [1.5, 2, -0.0], "id": [7, 8, 9]}, "target_epochs": [2030]}'
    doc = jsoncolumns.loads(text, NUMBERS)
    ra = doc["stars"]["ra_deg"]
    assert isinstance(ra, np.ndarray) and ra.dtype == np.float64 and ra.flags.writeable
    assert ra.tolist() == [1.5, 2.0, -0.0] and np.signbit(ra[2])
    # Not a number column: integer ids stay integers (a float would lose 2**53 + 1).
    assert same_types(doc["stars"]["id"], [7, 8, 9])
    assert same_types(doc["target_epochs"], [2030])


def test_small_bodies_are_orjsons_alone():
    doc = jsoncolumns.loads(b'{"stars": {"ra_deg": [1.5]}}', NUMBERS)
    assert isinstance(doc["stars"]["ra_deg"], list)


# Documents where a quick reading would differ from orjson's; each must come out as orjson
# reads it (lists where it has lists), or fail where orjson fails.
TRICKY = [
    # an array inside a column: simdjson's buffer copy would flatten it to [1.0, 2.0]
    b'{"stars": {"ra_deg": [[1.0], [2.0]]}}',
    # ... hidden by an escaped "[" elsewhere, if escapes were counted as they read
    b'{"stars": {"ra_deg": [[1.0]], "id": ["\\u005b"]}}',
    b'{"stars": {"ra_deg": [1.0, null, 3]}}',
    b'{"stars": {"ra_deg": [1.0, "2"]}}',
    b'{"stars": {"ra_deg": [true, 1.0]}}',
    b'{"stars": {"ra_deg": [1.0, {"a": [1]}]}}',
    b'{"stars": {"ra_deg": 5}}',
    b'{"stars": {"ra_deg": {"x": [1.0]}}}',
    b'{"stars": {"ra_deg": []}}',
    # a member given twice: orjson keeps the last one, at every level
    b'{"stars": {"ra_deg": [1.0]}, "stars": {"ra_deg": [2.0]}}',
    b'{"stars": {"ra_deg": [1.0], "ra_deg": [2.0]}}',
    b'{"stars": {"ra_deg": [1.0]}, "site": {"h": 1, "h": [2]}}',
    b'{"stars": [{"ra_deg": 1.0}]}',
    b'[{"stars": {"ra_deg": [1.0]}}]',
    b'{"stars": {"ra_deg": [1.0]}, "[key": ["[", "]"], "k": "[[["}',
    b'{"stars": {"ra_deg": [1e400]}}',
    b'{"stars": {"ra_deg": [1e-400, 4.9e-324, 1.7976931348623157e308]}}',
    b'{"stars": {"ra_deg": [18446744073709551615, -9223372036854775808]}}',
    b'{"stars": {"ra_deg": [123456789012345678901234567890]}}',
    b'{"stars": {"ra_deg": [NaN]}}',
    b'{"stars": {"ra_deg": [1.0]}} trailing',
    b'{"stars": {"ra_deg": [1.0,]}}',
    b'{"stars": {"ra_deg": [01.0]}}',
    b'{"stars": {"ra_deg": [1.0]}, "note": "\xff"}',
    b'{"stars": {"ra_deg": [1.0]}, "note": "caf\xc3\xa9 \\n \\" \\/"}',
    b"",
    b"null",
]


@pytest.mark.parametrize("text", TRICKY, ids=range(len(TRICKY)))
def test_tricky_documents_read_as_orjson_reads_them(every_size, text):
    assert_reads_as(*read_both(text))


def assert_reads_as(ours, reference):
    """Our reading is orjson's, but for number columns of numbers alone given as arrays."""
    if isinstance(reference, type):  # orjson refused the text: so must we
        assert ours is reference
        return
    if not (isinstance(ours, dict) and isinstance(ours.get("stars"), dict)):
        assert same_types(ours, reference)
        return
    assert same_types(
        {k: v for k, v in ours.items() if k != "stars"},
        {k: v for k, v in reference.items() if k != "stars"},
    )
    assert list(ours["stars"]) == list(reference["stars"])
    for name, column in ours["stars"].items():
        given = reference["stars"][name]
        if isinstance(column, np.ndarray):
            # the column as the table check turns orjson's list into floats
            assert name in NUMBERS
            assert all(type(v) in (int, float) for v in given)
            assert column.tolist() == np.asarray(given, dtype=float).tolist()
        else:
            assert same_types(column, given)


json_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(2**63), 2**64 - 1),
    st.floats(allow_nan=False, allow_infinity=False),
    st.text(alphabet=st.sampled_from('a[]{}",:\\ é\n'), max_size=6),
)
json_values = st.recursive(
    json_scalars,
    lambda inner: (
        st.lists(inner, max_size=4)
        | st.dictionaries(st.sampled_from(["a", "b", "[c"]), inner, max_size=3)
    ),
    max_leaves=12,
)
column = st.one_of(
    st.lists(st.floats(allow_nan=False, allow_infinity=False) | st.integers(-(2**53), 2**53)),
    st.lists(json_values, max_size=5),
    json_values,
)


@settings(max_examples=300, deadline=None)
@given(
    stars=st.dictionaries(st.sampled_from(sorted(NUMBERS) + ["id"]), column, max_size=4),
    others=st.dictionaries(st.sampled_from(["layout", "target_epochs", "x["]), json_values),
    indent=st.booleans(),
)
def test_random_documents_read_as_orjson_reads_them(stars, others, indent):
    # Written by the standard library, escapes (\\u) and all, spaced or not.
    text = json.dumps({"stars": stars, **others}, indent=2 if indent else None).encode()
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(jsoncolumns, "FROM_BYTES", 0)
        assert_reads_as(*read_both(text))


@pytest.fixture
def from_10_kb(monkeypatch):
    """The simdjson path from 10 kB (in service from 1 MiB; the tests allow 1,000 stars)."""
    monkeypatch.setattr(jsoncolumns, "FROM_BYTES", 10_000)


def test_large_body_answers_as_a_small_one(client, monkeypatch, from_10_kb):
    """Through the API: 1,000 stars in columns (over the size, so the simdjson path) give
    the answer the orjson path gives for the same body, byte for byte."""
    rng = np.random.default_rng(3)
    n = 1_000
    cols = {
        "id": [f"KV-{i}" for i in range(n)],
        "ra_deg": rng.uniform(0, 360, n).tolist(),
        "dec_deg": rng.uniform(-90, 90, n).tolist(),
        "parallax_mas": [None if i % 7 == 0 else 10.0 for i in range(n)],  # a list: nulls
        "pm_ra_cosdec_mas_yr": rng.normal(0, 30, n).tolist(),
        "pm_dec_mas_yr": rng.integers(-50, 50, n).tolist(),  # integers
    }
    body = orjson.dumps({"stars": cols, "catalogue_epoch": "J2016.0", "target_epochs": [2030.5]})
    assert len(body) > jsoncolumns.FROM_BYTES
    fast = client.post("/v1/propagation", data=body, content_type="application/json")
    assert fast.status_code == 200, fast.get_json()
    calls = []
    real = jsoncolumns._with_number_columns
    monkeypatch.setattr(jsoncolumns, "_with_number_columns", lambda *a: calls.append(1) or real(*a))
    again = client.post("/v1/propagation", data=body, content_type="application/json")
    assert calls == [1]  # the simdjson path was taken
    monkeypatch.setattr(jsoncolumns, "FROM_BYTES", 1 << 40)
    slow = client.post("/v1/propagation", data=body, content_type="application/json")
    assert fast.data == again.data == slow.data


def test_large_body_with_an_array_in_a_column_is_refused_by_name(client, from_10_kb):
    n = 1_000
    cols = {"ra_deg": [[1.0]] * n, "dec_deg": [0.5] * n}
    body = orjson.dumps({"stars": cols, "catalogue_epoch": "J2016.0", "target_epochs": [2030]})
    assert len(body) > jsoncolumns.FROM_BYTES
    r = client.post("/v1/propagation", data=body, content_type="application/json")
    assert r.status_code == 422
    assert "stars.ra_deg[0]" in json.dumps(r.get_json())
