"""Document every error an operation can answer, as problem+json, in the OpenAPI document.

The error handlers (``errors.py``) answer every failure as ``application/problem+json``; this
apispec plugin makes the generated document say so, for every operation of every blueprint,
without each view listing them:

- every operation: ``default`` (any other error) as problem+json;
- operations with a request body: 400 (body is not valid JSON), 413 (body or batch larger
  than the configured limits), 415 (the body is not JSON, or is compressed) and 422 (a field
  is invalid), all problem+json.

The schema-driven fuzzing tests (tests/reliability) check every response against this.
"""

from __future__ import annotations

from apispec import BasePlugin

PROBLEM_MIMETYPE = "application/problem+json"

#: Responses every operation with a request body can give: status -> (component, text).
BODY_ERRORS = {
    "400": (
        "ProblemInvalidJson",
        "The request body is not valid JSON; the detail says where (line and column) and why.",
    ),
    "413": (
        "ProblemTooLarge",
        "The body, or the number of stars, epochs or results it asks for, exceeds the "
        "configured limits (settings SKYDRIFT_MAX_BODY_BYTES, SKYDRIFT_MAX_STARS, "
        "SKYDRIFT_MAX_RESULTS).",
    ),
    "415": (
        "ProblemUnsupportedMediaType",
        "The body is not JSON (send Content-Type: application/json), or is compressed "
        "(Content-Encoding is not accepted).",
    ),
    "422": ("ProblemInvalidField", "One or more fields are invalid; each is listed."),
}


def problem_response(description: str) -> dict:
    """An OpenAPI response object: problem+json with the Problem schema."""
    return {
        "description": description,
        "content": {PROBLEM_MIMETYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}},
    }


class ProblemResponsesPlugin(BasePlugin):
    """apispec plugin adding the problem+json error responses to every operation."""

    def init_spec(self, spec):
        super().init_spec(spec)
        self.spec = spec
        for component, description in BODY_ERRORS.values():
            spec.components.response(component, problem_response(description))

    def operation_helper(self, path=None, operations=None, **kwargs):
        for method, operation in (operations or {}).items():
            if not isinstance(operation, dict):
                continue
            responses = operation.setdefault("responses", {})
            if "requestBody" in operation or method in ("post", "put", "patch"):
                for status, (component, _) in BODY_ERRORS.items():
                    responses[status] = component
