"""Document every error an operation can answer, as problem+json, in the OpenAPI document.

The error handlers (``errors.py``) answer every failure as ``application/problem+json``; this
apispec plugin makes the generated document say so, for every operation of every blueprint,
without each view listing them:

- every operation: ``default`` (any other error) as problem+json;
- operations with a request body: 400 (body is not valid JSON), 413 (body or batch larger
  than the configured limits), 415 (the body is not JSON, or is compressed) and 422 (a field
  is invalid), all problem+json;
- every operation: 403 (a browser origin outside SKYDRIFT_CORS_ORIGINS); every operation
  but the probes (/health, /ready): 401 (bearer token, when tokens are set), 429 (rate
  limits) and 503 (request time limit), as service/api/access.py answers them; the bearer
  scheme is declared, optional, since tokens are the operator's choice;
- operations with query options and no body: 422 (an invalid or unknown option);
- operations with a path parameter: 404 (no such item, e.g. an unknown abbreviation).

The schema-driven fuzzing tests (tests/reliability) check every response against this.
"""

from __future__ import annotations

from apispec import BasePlugin

from .access import PROBE_PATHS  # never behind a token, a rate limit or the time limit

PROBLEM_MIMETYPE = "application/problem+json"

#: Responses every operation with a request body can give: status -> (component, text).
BODY_ERRORS = {
    "400": (
        "ProblemInvalidJson",
        "The body cannot be read as its Content-Type says: not valid JSON (the detail says "
        "where, line and column, and why), CSV that is not UTF-8 text, or not an Arrow IPC "
        "stream.",
    ),
    "413": (
        "ProblemTooLarge",
        "The body, or the number of stars, epochs or results it asks for, exceeds the "
        "configured limits (settings SKYDRIFT_MAX_BODY_BYTES, SKYDRIFT_MAX_STARS, "
        "SKYDRIFT_MAX_EPOCHS, SKYDRIFT_MAX_RESULTS) or a limit of the operation itself "
        "(stars of a crossing search, Monte Carlo samples); errors names the field.",
    ),
    "415": (
        "ProblemUnsupportedMediaType",
        "The Content-Type is not one this operation takes (application/json; text/csv and "
        "application/vnd.apache.arrow.stream where its request body lists them), or the body "
        "is compressed (Content-Encoding is not accepted).",
    ),
    "422": ("ProblemInvalidField", "One or more fields are invalid; each is listed."),
}


#: Responses of the access checks (access.py): status -> (component, text).
ACCESS_ERRORS = {
    "401": (
        "ProblemUnauthorized",
        "Only when the operator set bearer tokens (SKYDRIFT_AUTH_TOKENS): the Authorization "
        "header is missing or its token is not accepted (WWW-Authenticate: Bearer).",
    ),
    "403": (
        "ProblemForbidden",
        "Only when the operator set SKYDRIFT_CORS_ORIGINS: the request comes from a browser "
        "origin outside that list.",
    ),
    "429": (
        "ProblemTooManyRequests",
        "Too many requests from this client (SKYDRIFT_RATE_LIMIT), or too many failed "
        "authentications from this address (SKYDRIFT_AUTH_FAILURE_LIMIT); Retry-After gives "
        "the seconds to wait.",
    ),
    "503": (
        "ProblemUnavailable",
        "The request ran past the time limit (SKYDRIFT_REQUEST_TIMEOUT_S) and was abandoned; "
        "try again later or with fewer stars.",
    ),
}

#: Other responses: status -> (component, text).
OTHER_ERRORS = {
    "404": ("ProblemNotFound", "No such item (the path parameter names nothing known)."),
    "422": ("ProblemInvalidField", BODY_ERRORS["422"][1]),
}


#: The security scheme of the bearer tokens (RFC 6750), declared in components.
BEARER_SCHEME = {
    "type": "http",
    "scheme": "bearer",
    "description": "Authorization: Bearer <token>, required only when the operator set "
    "SKYDRIFT_AUTH_TOKENS or SKYDRIFT_AUTH_TOKENS_FILE; otherwise no credentials.",
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
        components = {**BODY_ERRORS, **ACCESS_ERRORS, **OTHER_ERRORS}
        for component, description in dict(components.values()).items():
            spec.components.response(component, problem_response(description))
        spec.components.security_scheme("bearerToken", BEARER_SCHEME)

    def operation_helper(self, path=None, operations=None, parameters=None, **kwargs):
        rule = kwargs.get("rule")
        route = rule.rule if rule is not None else (path or "")
        path_params = bool(rule is not None and rule.arguments)
        for method, operation in (operations or {}).items():
            if not isinstance(operation, dict):
                continue
            responses = operation.setdefault("responses", {})
            if "requestBody" in operation or method in ("post", "put", "patch"):
                for status, (component, _) in BODY_ERRORS.items():
                    responses[status] = component
            elif route not in PROBE_PATHS:
                responses.setdefault("422", OTHER_ERRORS["422"][0])
            if path_params:
                responses.setdefault("404", OTHER_ERRORS["404"][0])
            responses.setdefault("403", ACCESS_ERRORS["403"][0])
            if route in PROBE_PATHS:
                operation.setdefault("security", [])
                continue
            for status in ("401", "429", "503"):
                responses.setdefault(status, ACCESS_ERRORS[status][0])
            # Optional: the operator decides whether tokens are required.
            operation.setdefault("security", [{"bearerToken": []}, {}])
