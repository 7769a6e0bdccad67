"""The OpenAPI description: the real request and response bodies, problem answers, bearer security.

The handlers read their bodies themselves (strict JSON, size limits, see
:mod:`.body`), so FastAPI cannot infer the bodies; this module describes them
and replaces FastAPI's default 200/422 entries with what the service really
answers. Operations not listed here keep what FastAPI generated, plus the
problem answers every ``/v1`` route can give.
"""

from __future__ import annotations

from typing import Any

from fastapi.openapi.utils import get_openapi

__all__ = ["install_openapi", "REQUEST_BODIES", "SUCCESS"]

_NUM = {"type": ["number", "null"]}
_INT = {"type": "integer"}
_TIME = {"type": ["string", "null"]}
_OBJ: dict[str, Any] = {"type": "object"}

PROBLEM = {
    "type": "object",
    "required": ["type", "title", "status", "detail"],
    "properties": {
        "type": {"type": "string"},
        "title": {"type": "string"},
        "status": {"type": "integer", "minimum": 400, "maximum": 599},
        "detail": {"type": "string"},
        "instance": {"type": "string"},
        "errors": {"type": "array", "items": {"type": "object", "required": ["pointer", "reason"],
                                              "properties": {"pointer": {"type": "string"},
                                                             "reason": {"type": "string"}}}},
    },
}

_NUMBER_ROW = {"oneOf": [{"type": "array", "items": {"type": "number"}, "maxItems": 129},
                         {"type": "object", "additionalProperties": {"type": "number"}}]}
_OBSERVATION = {
    "type": "object",
    "required": ["x", "y"],
    "properties": {
        "x": _NUMBER_ROW,
        "y": {"type": "number"},
        "time": {"oneOf": [{"type": "string", "format": "date-time"}, {"type": "number"}, {"type": "null"}]},
        "key": {"type": ["string", "null"], "maxLength": 200},
    },
}
CONFIG = {
    "type": "object",
    "required": ["features"],
    "additionalProperties": False,
    "properties": {
        "features": {"type": "array", "items": {"type": "string", "minLength": 1, "maxLength": 128},
                     "minItems": 1, "maxItems": 128, "uniqueItems": True},
        "intercept": {"type": "boolean", "default": True},
        "forgetting": {"type": "number", "exclusiveMinimum": 0, "maximum": 1, "default": 1.0},
        "half_life": {"type": ["number", "null"], "exclusiveMinimum": 0, "default": None},
        "ridge": {"type": "number", "minimum": 0, "default": 0.0},
    },
}
_ANY_OPTIONAL = {"required": False, "content": {"application/json": {"schema": {}}}}

REQUEST_BODIES: dict[tuple[str, str], dict[str, Any]] = {
    ("put", "/v1/models/{name}"): {"required": True, "content": {"application/json": {"schema": CONFIG}}},
    ("post", "/v1/models/{name}/observations"): {"required": True, "content": {"application/json": {"schema": {
        "oneOf": [_OBSERVATION, {"type": "object", "required": ["observations"], "properties": {
            "observations": {"type": "array", "items": _OBSERVATION, "minItems": 1}}}]}}}},
    ("post", "/v1/models/{name}/predict"): {"required": True, "content": {"application/json": {"schema": {
        "type": "object",
        "properties": {"x": _NUMBER_ROW, "rows": {"type": "array", "items": _NUMBER_ROW, "minItems": 1},
                       "level": {"type": "number", "exclusiveMinimum": 0, "exclusiveMaximum": 1}}}}}},
    ("post", "/v1/models/{name}/reset"): _ANY_OPTIONAL,
    ("post", "/v1/models/{name}/snapshots/{snapshot}/restore"): _ANY_OPTIONAL,
    ("post", "/v1/models/{name}/snapshots"): {"required": False, "content": {"application/json": {"schema": {
        "type": "object", "additionalProperties": False,
        "properties": {"label": {"type": ["string", "null"], "maxLength": 200}}}}}},
}

_DESCRIPTION = {
    "type": "object",
    "required": ["name", "config", "version", "created"],
    "properties": {"name": {"type": "string"}, "config": _OBJ, "version": _INT, "created": _TIME},
}
_STATE = {
    "type": "object",
    "required": ["name", "config", "version", "n", "identifiable", "coefficients", "drift"],
    "properties": {
        **_DESCRIPTION["properties"],
        "n": _INT, "effective_n": _NUM, "identifiable": {"type": "boolean"}, "rank": _INT,
        "coefficients": {"type": "object", "additionalProperties": _NUM},
        "sigma": _NUM, "rss": _NUM, "dof": _NUM,
        "unidentified_directions": {"type": "array", "items": {"type": "object", "additionalProperties": _NUM}},
        "last_time": _TIME, "drift": _OBJ,
    },
}
_SNAPSHOT = {
    "type": "object",
    "required": ["id", "version", "n"],
    "properties": {"id": _INT, "label": {"type": ["string", "null"]}, "created": _TIME, "version": _INT, "n": _INT},
}
_TOKEN = {
    "type": "object",
    "required": ["id", "label", "scope", "models", "created", "revoked"],
    "properties": {"id": _INT, "label": {"type": "string"}, "scope": {"enum": ["read", "write", "admin"]},
                   "models": {"type": ["string", "null"]}, "created": _TIME, "revoked": _TIME},
}
_AUDIT = {
    "type": "object",
    "required": ["id", "at", "action", "outcome", "status"],
    "properties": {"id": _INT, "at": _TIME, "token_label": {"type": ["string", "null"]}, "action": {"type": "string"},
                   "model": {"type": ["string", "null"]}, "version_before": {"type": ["integer", "null"]},
                   "version_after": {"type": ["integer", "null"]},
                   "outcome": {"enum": ["ok", "failed", "denied"]}, "status": _INT,
                   "detail": {"type": ["string", "null"]}},
}


def _json(schema: dict[str, Any], description: str = "OK") -> dict[str, Any]:
    return {"description": description, "content": {"application/json": {"schema": schema}}}


_EMPTY = {"description": "Done; no body"}

#: the success answers per operation (status -> response object)
SUCCESS: dict[tuple[str, str], dict[str, Any]] = {
    ("get", "/healthz"): {"200": _json({"type": "object", "required": ["status"],
                                        "properties": {"status": {"const": "ok"}}}, "Alive")},
    ("get", "/v1/metrics"): {"200": {"description": "Prometheus text exposition (api/metrics.py)",
                                     "content": {"text/plain": {"schema": {"type": "string"}}}}},
    ("get", "/v1/models"): {"200": _json({"type": "object", "required": ["models"],
                                          "properties": {"models": {"type": "array", "items": _DESCRIPTION}}})},
    ("put", "/v1/models/{name}"): {"200": _json(_DESCRIPTION, "Exists with the same configuration"),
                                   "201": _json(_DESCRIPTION, "Created")},
    ("get", "/v1/models/{name}"): {"200": _json(_STATE), "304": {"description": "Not modified (If-None-Match)"}},
    ("delete", "/v1/models/{name}"): {"204": _EMPTY},
    ("post", "/v1/models/{name}/observations"): {"200": _json({
        "type": "object", "required": ["results", "applied", "duplicates", "version", "n"],
        "properties": {"results": {"type": "array", "items": _OBJ}, "applied": _INT, "duplicates": _INT,
                       "version": _INT, "n": _INT, "identifiable": {"type": "boolean"},
                       "coefficients": {"type": "object", "additionalProperties": _NUM}, "sigma": _NUM}})},
    ("post", "/v1/models/{name}/predict"): {"200": _json({"type": "object", "required": ["version"],
                                                          "properties": {"version": _INT, "level": {"type": "number"},
                                                                         "predictions": {"type": "array", "items": _OBJ},
                                                                         "mean": _NUM}})},
    ("get", "/v1/models/{name}/drift"): {"200": _json(_OBJ)},
    ("get", "/v1/models/{name}/covariance"): {"200": _json({
        "type": "object", "required": ["version", "terms"],
        "properties": {"version": _INT, "terms": {"type": "array", "items": {"type": "string"}},
                       "identifiable": {"type": "boolean"}, "sigma": _NUM,
                       "inverse_moment": {"type": ["array", "null"], "items": {"type": "array", "items": _NUM}},
                       "covariance": {"type": ["array", "null"], "items": {"type": "array", "items": _NUM}}}})},
    ("post", "/v1/models/{name}/reset"): {"200": _json({"type": "object", "required": ["name", "version", "n"],
                                                        "properties": {"name": {"type": "string"}, "version": _INT,
                                                                       "n": _INT}})},
    ("post", "/v1/models/{name}/snapshots"): {"201": _json(_SNAPSHOT, "Created")},
    ("get", "/v1/models/{name}/snapshots"): {"200": _json({"type": "object", "required": ["snapshots"],
                                                           "properties": {"snapshots": {"type": "array",
                                                                                        "items": _SNAPSHOT}}})},
    ("post", "/v1/models/{name}/snapshots/{snapshot}/restore"): {"200": _json({
        "type": "object", "required": ["name", "snapshot", "version", "n"],
        "properties": {"name": {"type": "string"}, "snapshot": _INT, "version": _INT, "n": _INT}})},
    ("delete", "/v1/models/{name}/snapshots/{snapshot}"): {"204": _EMPTY},
    ("post", "/v1/tokens"): {"201": _json({**_TOKEN, "required": [*_TOKEN["required"], "token"],
                                           "properties": {**_TOKEN["properties"], "token": {"type": "string"}}},
                                          "Created; the token is shown only in this answer")},
    ("get", "/v1/tokens"): {"200": _json({"type": "object", "required": ["tokens"],
                                          "properties": {"tokens": {"type": "array", "items": _TOKEN}}})},
    ("delete", "/v1/tokens/{token}"): {"204": _EMPTY},
    ("get", "/v1/audit"): {"200": _json({"type": "object", "required": ["entries"],
                                         "properties": {"entries": {"type": "array", "items": _AUDIT}}})},
}

_PROBLEMS = {
    "400": "Bad request (malformed JSON, a token in the query string)",
    "401": "No valid bearer token (once any token exists)",
    "403": "The token's scope or model pattern does not allow this",
    "404": "No such model, snapshot, token or route",
    "405": "Method not allowed",
    "408": "The body did not arrive in time",
    "409": "Conflict (a different configuration, a concurrent change)",
    "413": "The body is larger than the limit",
    "415": "Unsupported media type",
    "422": "Invalid input",
    "503": "The database did not answer",
}


#: header parameters per operation
HEADERS: dict[tuple[str, str], list[dict[str, Any]]] = {
    ("post", "/v1/models/{name}/observations"): [{
        "name": "Prefer", "in": "header", "required": False, "schema": {"type": "string"},
        "description": "RFC 7240; `return=minimal` leaves the coefficients, sigma and identifiable out of the "
                       "answer (answered with `Preference-Applied: return=minimal`)"}],
}


def _problem_responses() -> dict[str, Any]:
    return {code: {"description": text, "content": {"application/problem+json": {"schema": PROBLEM}}}
            for code, text in _PROBLEMS.items()}


def describe(schema: dict[str, Any]) -> dict[str, Any]:
    """Amend FastAPI's generated schema in place (and return it)."""
    components = schema.setdefault("components", {})
    components.setdefault("securitySchemes", {})["bearer"] = {
        "type": "http", "scheme": "bearer",
        "description": "Authorization: Bearer <token> (required once any token exists; never in the query string)"}
    components.setdefault("schemas", {})["Problem"] = PROBLEM
    for path, item in schema.get("paths", {}).items():
        for method, op in item.items():
            if method not in ("get", "put", "post", "delete", "patch"):
                continue
            key = (method, path)
            if key in REQUEST_BODIES:
                op["requestBody"] = REQUEST_BODIES[key]
            if key in HEADERS:
                op["parameters"] = [*op.get("parameters", []), *HEADERS[key]]
            if key in SUCCESS:
                op["responses"] = dict(SUCCESS[key])
            else:
                op.setdefault("responses", {}).pop("422", None)
            if path.startswith("/v1"):
                op["security"] = [{"bearer": []}]
                op["responses"].update(_problem_responses())
    return schema


def install_openapi(app: Any) -> None:
    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            schema = get_openapi(title=app.title, version=app.version, openapi_version=app.openapi_version,
                                 description=app.description, routes=app.routes)
            app.openapi_schema = describe(schema)
        return app.openapi_schema

    app.openapi = openapi
