"""leastwise_client: a typed Python client for the leastwise REST API (v1).

    from leastwise_client import Client, Reading

    with Client("http://127.0.0.1:8622") as lw:
        lw.create_model("ch-1", ["load_kw", "condenser_c"])
        answer = lw.observe("ch-1", {"load_kw": 610.0, "condenser_c": 27.5}, 131.4)
        print(answer.result.residual, lw.model("ch-1").drift.status)
"""

from .client import DEFAULT_URL, Client
from .errors import (
    BadRequest, Busy, Conflict, FieldProblem, Forbidden, InvalidInput, LeastwiseError, MethodNotAllowed, NotFound,
    PayloadTooLarge, Problem, RequestTimeout, ServerError, ServiceUnavailable, TooManyRequests, Unauthorized, Unreachable,
    UnsupportedMediaType,
)
from .types import (
    Covariance, DriftReport, DriftStatus, ModelConfig, ModelInfo, ModelState, ObservationAnswer, ObservationResult,
    Prediction, Reading, Snapshot, StateChange,
)

__version__ = "0.1.0"

__all__ = [
    "Client", "DEFAULT_URL", "Reading",
    # answers
    "ModelConfig", "ModelInfo", "ModelState", "DriftStatus", "DriftReport", "ObservationAnswer", "ObservationResult",
    "Prediction", "Covariance", "Snapshot", "StateChange",
    # errors
    "LeastwiseError", "Unreachable", "Problem", "FieldProblem", "BadRequest", "Unauthorized", "Forbidden", "NotFound",
    "MethodNotAllowed", "RequestTimeout", "Conflict", "Busy", "PayloadTooLarge", "UnsupportedMediaType", "InvalidInput",
    "TooManyRequests", "ServerError", "ServiceUnavailable",
]
