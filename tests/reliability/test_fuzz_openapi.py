"""Schema-driven fuzzing of every operation in the committed OpenAPI document.

schemathesis reads openapi/openapi.json (the committed document, not the live one, so the
document clients read is the one under test), generates valid and invalid requests for every
operation it lists and sends them to the application in-process (WSGI, no sockets). Every
response must

- never be a 5xx (``not_a_server_error``);
- have a documented status code, content type, headers and body schema;
- reject input the document calls invalid with a 4xx (``negative_data_rejection``).

Not checked: that every request the document calls valid is accepted (schemathesis'
``positive_data_acceptance``). Some rules cannot be written in JSON Schema or would make it
unreadable (the epoch grammar, "exactly one of target_epochs or target_range", correlations
that must form a positive semi-definite matrix, limits set at deployment); the document lists
422 for them, and a 422 is a documented answer.

Bounded run (CI): SKYDRIFT_FUZZ_EXAMPLES generated cases per operation (default 300), with
derandomised generation, so every run sends the same requests. Longer run on demand, which
also turns on schemathesis' coverage phase (SKYDRIFT_FUZZ_COVERAGE=1 does that alone)::

    SKYDRIFT_FUZZ_EXAMPLES=3000 .venv/bin/python -m pytest tests/reliability/test_fuzz_openapi.py

(SKYDRIFT_FUZZ_SEED=random draws new requests each run instead of the fixed sequence.)
"""

from __future__ import annotations

import collections
import os
import pathlib

import hypothesis
import pytest
import schemathesis

from service.api import create_app
from service.config import Settings

ROOT = pathlib.Path(__file__).resolve().parents[2]
EXAMPLES = int(os.environ.get("SKYDRIFT_FUZZ_EXAMPLES", "300"))
DERANDOMIZE = os.environ.get("SKYDRIFT_FUZZ_SEED", "fixed") != "random"

#: The application under its default settings (the limits a deployment starts with).
APP = create_app({"SKYDRIFT_SETTINGS": Settings(), "TESTING": True})

schema = schemathesis.openapi.from_path(ROOT / "openapi" / "openapi.json")
schema.app = APP
# schemathesis' coverage phase (boundary values of every keyword, a few hundred extra requests
# per operation) runs in the longer run only, to keep the CI run near one CPU minute; the
# edge values that matter most are sent by test_extremes.py in every run.
schema.config.phases.coverage.enabled = EXAMPLES > 300 or bool(
    os.environ.get("SKYDRIFT_FUZZ_COVERAGE")
)


@schemathesis.serializer("application/vnd.apache.arrow.stream")
def _arrow_body(ctx, value):
    """Arrow IPC stream bodies: the generated value (a string; the document gives no finer
    schema for a binary stream) as its UTF-8 bytes, which are never a valid stream: the
    service must answer them with a documented 4xx. Without a serializer schemathesis skips
    these cases (and warns, which fails the longer run)."""
    if value is None:
        return None
    if isinstance(value, bytes):
        return value
    return str(value).encode("utf-8", "surrogatepass")


#: Requests sent and statuses seen, per operation (checked and printed at the end).
SENT: dict[str, collections.Counter] = collections.defaultdict(collections.Counter)


@schema.parametrize()
@hypothesis.settings(
    max_examples=EXAMPLES,
    derandomize=DERANDOMIZE,
    deadline=None,
    database=None,
    suppress_health_check=list(hypothesis.HealthCheck),
    print_blob=True,
)
def test_every_response_is_documented_and_no_input_gives_5xx(case):
    response = case.call_and_validate(
        excluded_checks=[schemathesis.checks.positive_data_acceptance]
    )
    SENT[case.operation.label][response.status_code] += 1


def test_every_operation_was_fuzzed(request):
    """Runs after the fuzzing above (same module): each operation got its share of requests.

    Operations without any input (no body, no parameters) have a single possible request;
    they are counted but not held to the minimum.
    """
    if request.config.getoption("-k") or not SENT:
        pytest.skip("fuzzing test not run in this session (deselected)")
    floor = min(EXAMPLES, 300)
    short = {}
    for operation in schema.get_all_operations():
        op = operation.ok()
        label = op.label
        has_input = bool(op.body) or any(True for _ in op.iter_parameters())
        sent = sum(SENT[label].values())
        if has_input and sent < floor:
            short[label] = sent
    summary = {label: dict(counts) for label, counts in sorted(SENT.items())}
    print("\nrequests sent per operation (status: count):", summary)
    assert not short, f"operations with fewer than {floor} fuzzed requests: {short}"
