"""Typed answers of the REST contract v1 (frozen dataclasses built from the JSON).

Fields the service adds later are kept in ``raw`` (every class has it), so
an older client keeps working against a newer service.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, Mapping, NamedTuple, Sequence, Union

__all__ = [
    "ModelConfig", "ModelInfo", "ModelState", "DriftStatus", "DriftReport", "ObservationResult",
    "ObservationAnswer", "Prediction", "Covariance", "Snapshot", "StateChange", "Reading", "ReadingLike",
]

Number = Union[int, float]
#: an input row: values in feature order, or a mapping by feature name
Inputs = Union[Sequence[Number], Mapping[str, Number]]
#: a time: RFC 3339 string, epoch seconds, or an aware datetime
TimeLike = Union[str, int, float, datetime, None]


class Reading(NamedTuple):
    """One observation to send: inputs ``x``, response ``y``, optional time and idempotency key."""

    x: Inputs
    y: float
    time: TimeLike = None
    key: str | None = None


#: what ``observe_batch`` / ``stream`` accept per item: a Reading, a tuple ``(x, y[, time[, key]])``, or a dict
ReadingLike = Union[Reading, tuple, Mapping[str, Any]]


@dataclass(frozen=True, slots=True)
class ModelConfig:
    features: tuple[str, ...]
    intercept: bool = True
    forgetting: float = 1.0
    half_life: float | None = None
    ridge: float = 0.0

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "ModelConfig":
        return cls(tuple(d.get("features") or ()), bool(d.get("intercept", True)), float(d.get("forgetting", 1.0)),
                   d.get("half_life"), float(d.get("ridge", 0.0)))

    def to_json(self) -> dict[str, Any]:
        return {"features": list(self.features), "intercept": self.intercept, "forgetting": self.forgetting,
                "half_life": self.half_life, "ridge": self.ridge}

    @property
    def terms(self) -> tuple[str, ...]:
        """Coefficient names in order (``intercept`` first when configured)."""
        return (("intercept",) if self.intercept else ()) + self.features


@dataclass(frozen=True, slots=True)
class ModelInfo:
    """A model as listed (``GET /v1/models``) or created (``PUT``)."""

    name: str
    config: ModelConfig
    version: int
    created: str | None
    #: True when this call created the model (PUT answered 201), False when it existed already or was listed
    is_new: bool = False
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, d: Mapping[str, Any], is_new: bool = False) -> "ModelInfo":
        return cls(d["name"], ModelConfig.from_json(d.get("config") or {}), int(d.get("version", 0)),
                   d.get("created"), is_new, dict(d))


@dataclass(frozen=True, slots=True)
class DriftStatus:
    """``ok``, ``watch`` or ``alarm`` and the reasons (statistic, level, value, threshold, since, ...)."""

    status: str
    reasons: tuple[dict[str, Any], ...] = ()
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, d: Mapping[str, Any] | None) -> "DriftStatus":
        d = d or {}
        return cls(str(d.get("status", "ok")), tuple(d.get("reasons") or ()), dict(d))


@dataclass(frozen=True, slots=True)
class ModelState:
    """``GET /v1/models/{name}``: coefficients by term name, counts, sigma, drift status, ETag."""

    name: str
    config: ModelConfig
    version: int
    created: str | None
    n: int
    effective_n: float | None
    identifiable: bool
    rank: int | None
    coefficients: dict[str, float | None]
    sigma: float | None
    rss: float | None
    dof: float | None
    unidentified_directions: tuple[dict[str, float | None], ...]
    last_time: str | None
    drift: DriftStatus
    etag: str | None = None
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, d: Mapping[str, Any], etag: str | None = None) -> "ModelState":
        return cls(
            name=d["name"], config=ModelConfig.from_json(d.get("config") or {}), version=int(d.get("version", 0)),
            created=d.get("created"), n=int(d.get("n", 0)), effective_n=d.get("effective_n"),
            identifiable=bool(d.get("identifiable", False)), rank=d.get("rank"),
            coefficients=dict(d.get("coefficients") or {}), sigma=d.get("sigma"), rss=d.get("rss"), dof=d.get("dof"),
            unidentified_directions=tuple(d.get("unidentified_directions") or ()), last_time=d.get("last_time"),
            drift=DriftStatus.from_json(d.get("drift")), etag=etag, raw=dict(d),
        )


@dataclass(frozen=True, slots=True)
class DriftReport:
    """``GET /v1/models/{name}/drift``: status, reasons, residual summary and the detectors' statistics."""

    status: str
    reasons: tuple[dict[str, Any], ...]
    residuals: dict[str, Any]
    statistics: dict[str, Any]
    version: int
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "DriftReport":
        return cls(str(d.get("status", "ok")), tuple(d.get("reasons") or ()), dict(d.get("residuals") or {}),
                   dict(d.get("statistics") or {}), int(d.get("version", 0)), dict(d))


@dataclass(frozen=True, slots=True)
class ObservationResult:
    """One observation's outcome: ``applied`` (with the prior prediction and residuals) or ``duplicate``."""

    status: str
    seq: int | None
    key: str | None = None
    prediction: float | None = None
    residual: float | None = None
    recursive_residual: float | None = None
    standardized_residual: float | None = None
    leverage: float | None = None
    time: float | None = None

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "ObservationResult":
        return cls(str(d.get("status")), d.get("seq"), d.get("key"), d.get("prediction"), d.get("residual"),
                   d.get("recursive_residual"), d.get("standardized_residual"), d.get("leverage"), d.get("time"))

    @property
    def applied(self) -> bool:
        return self.status == "applied"


@dataclass(frozen=True, slots=True)
class ObservationAnswer:
    """The answer to a POST of observations: per-observation results and the model after them.

    For a minimal answer (``minimal=True``) ``coefficients`` is empty and
    ``identifiable`` and ``sigma`` are ``None``: the service left the model out.
    """

    results: tuple[ObservationResult, ...]
    applied: int
    duplicates: int
    version: int
    n: int
    identifiable: bool | None
    coefficients: dict[str, float | None]
    sigma: float | None
    raw: dict[str, Any] = field(default_factory=dict, repr=False, compare=False)

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "ObservationAnswer":
        return cls(tuple(ObservationResult.from_json(r) for r in d.get("results") or ()), int(d.get("applied", 0)),
                   int(d.get("duplicates", 0)), int(d.get("version", 0)), int(d.get("n", 0)),
                   None if "identifiable" not in d else bool(d["identifiable"]), dict(d.get("coefficients") or {}),
                   d.get("sigma"), dict(d))

    @property
    def result(self) -> ObservationResult:
        """The first (for a single observation: the only) result."""
        return self.results[0]


@dataclass(frozen=True, slots=True)
class Prediction:
    """A prediction with its standard errors and the interval at ``level``."""

    mean: float | None
    se_fit: float | None
    se_prediction: float | None
    lower: float | None
    upper: float | None
    level: float
    dof: float | None
    approximate: bool
    version: int

    @classmethod
    def from_json(cls, d: Mapping[str, Any], common: Mapping[str, Any] | None = None) -> "Prediction":
        c = common if common is not None else d
        return cls(d.get("mean"), d.get("se_fit"), d.get("se_prediction"), d.get("lower"), d.get("upper"),
                   float(c.get("level", 0.95)), c.get("dof"), bool(c.get("approximate", False)),
                   int(c.get("version", 0)))


@dataclass(frozen=True, slots=True)
class Covariance:
    """The inverse second-moment matrix and the coefficient covariance, rows/columns in ``terms`` order."""

    terms: tuple[str, ...]
    identifiable: bool
    sigma: float | None
    inverse_moment: list[list[float | None]] | None
    covariance: list[list[float | None]] | None
    version: int

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "Covariance":
        return cls(tuple(d.get("terms") or ()), bool(d.get("identifiable", False)), d.get("sigma"),
                   d.get("inverse_moment"), d.get("covariance"), int(d.get("version", 0)))


@dataclass(frozen=True, slots=True)
class Snapshot:
    id: int
    label: str | None
    created: str | None
    version: int
    n: int

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "Snapshot":
        return cls(int(d["id"]), d.get("label"), d.get("created"), int(d.get("version", 0)), int(d.get("n", 0)))


@dataclass(frozen=True, slots=True)
class StateChange:
    """The answer to a reset or a restore: the model's new version and count (and the snapshot restored)."""

    name: str
    version: int
    n: int
    snapshot: int | None = None

    @classmethod
    def from_json(cls, d: Mapping[str, Any]) -> "StateChange":
        return cls(d.get("name", ""), int(d.get("version", 0)), int(d.get("n", 0)), d.get("snapshot"))
