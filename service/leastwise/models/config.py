"""Model configuration (the PUT body): validation, normalisation and the engine spec.

Limits: 1..128 features, each name 1..128 printable characters, unique, not
``"intercept"`` when the intercept is on; ``forgetting`` in (0, 1];
``half_life`` > 0 seconds (excludes forgetting < 1); ``ridge`` >= 0 and finite;
``drift`` an optional object of drift thresholds and the outlier gate (validated in
:func:`leastwise.models.drift.parse_drift`; defaults in ``DRIFT_DEFAULTS``).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any

import orjson

from leastwise.engine import MAX_ABS_VALUE, Spec

from .drift import parse_drift
from .errors import FieldError, InvalidInput, pointer

__all__ = ["ModelConfig", "MAX_FEATURES", "NAME_PATTERN", "check_model_name", "INTERCEPT"]

MAX_FEATURES = 128
INTERCEPT = "intercept"
NAME_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,127}")
_FEATURE_NAME = re.compile(r"[^\x00-\x1f\x7f]{1,128}")
_FIELDS = {"features", "intercept", "forgetting", "half_life", "ridge", "drift"}


def check_model_name(name: str) -> str:
    """Raise :class:`InvalidInput` unless ``name`` matches ``^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$``."""
    if not NAME_PATTERN.fullmatch(name):
        raise InvalidInput(
            "model names are 1-128 characters of A-Z a-z 0-9 . _ - starting with a letter or digit",
            [FieldError("name", "does not match ^[A-Za-z0-9][A-Za-z0-9._-]{0,127}$")],
        )
    return name


def _number(body: dict, key: str, default: float | None, errors: list[FieldError]) -> float | None:
    value = body.get(key, default)
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        errors.append(FieldError(pointer(key), "must be a number"))
        return None
    value = float(value)
    if not (math.isfinite(value) and abs(value) <= MAX_ABS_VALUE):
        errors.append(FieldError(pointer(key), f"must be finite with magnitude at most {MAX_ABS_VALUE:g}"))
        return None
    return value


@dataclass(frozen=True, slots=True)
class ModelConfig:
    """A validated, normalised model configuration."""

    features: tuple[str, ...]
    intercept: bool = True
    forgetting: float = 1.0
    half_life: float | None = None
    ridge: float = 0.0
    #: drift settings that differ from the defaults (see models/drift.py, docs/drift.md), sorted by name
    drift: tuple[tuple[str, Any], ...] = ()

    @classmethod
    def parse(cls, body: Any) -> "ModelConfig":
        """Validate a PUT body; every problem is listed in one :class:`InvalidInput`."""
        if not isinstance(body, dict):
            raise InvalidInput.at("", "the model configuration must be a JSON object")
        errors: list[FieldError] = [FieldError(pointer(k), "unknown field") for k in body if k not in _FIELDS]
        features = body.get("features")
        names: tuple[str, ...] = ()
        if not isinstance(features, list):
            errors.append(FieldError("/features", "required: a list of feature names"))
        elif not 1 <= len(features) <= MAX_FEATURES:
            errors.append(FieldError("/features", f"needs 1 to {MAX_FEATURES} names, got {len(features)}"))
        else:
            seen: set[str] = set()
            for i, f in enumerate(features):
                if not isinstance(f, str) or not _FEATURE_NAME.fullmatch(f):
                    errors.append(FieldError(pointer("features", i), "must be a string of 1-128 printable characters"))
                elif f in seen:
                    errors.append(FieldError(pointer("features", i), f"duplicate feature name {f!r}"))
                seen.add(f) if isinstance(f, str) else None
            names = tuple(f for f in features if isinstance(f, str))
        intercept = body.get("intercept", True)
        if not isinstance(intercept, bool):
            errors.append(FieldError("/intercept", "must be true or false"))
            intercept = True
        if intercept and INTERCEPT in names:
            errors.append(FieldError("/features", "'intercept' is reserved when intercept is true"))
        forgetting = _number(body, "forgetting", 1.0, errors)
        if forgetting is None and "forgetting" in body and body["forgetting"] is None:
            errors.append(FieldError("/forgetting", "must be a number in (0, 1]"))
        if forgetting is not None and not 0.0 < forgetting <= 1.0:
            errors.append(FieldError("/forgetting", "must be in (0, 1]"))
        half_life = _number(body, "half_life", None, errors)
        if half_life is not None and not half_life > 0.0:
            errors.append(FieldError("/half_life", "must be a positive number of seconds"))
        if half_life is not None and forgetting is not None and forgetting < 1.0:
            errors.append(FieldError("/half_life", "a half-life excludes forgetting < 1"))
        ridge = _number(body, "ridge", 0.0, errors)
        if ridge is None and "ridge" in body and body["ridge"] is None:
            errors.append(FieldError("/ridge", "must be a number >= 0"))
        if ridge is not None and not ridge >= 0.0:
            errors.append(FieldError("/ridge", "must be >= 0"))
        drift = parse_drift(body.get("drift"), errors)
        if errors:
            raise InvalidInput("; ".join(f"{e.pointer}: {e.reason}" for e in errors), errors)
        return cls(names, intercept, float(forgetting), half_life, float(ridge), drift)

    @classmethod
    def from_json(cls, text: str) -> "ModelConfig":
        return cls.parse(orjson.loads(text))

    def to_dict(self) -> dict[str, Any]:
        out = {"features": list(self.features), "intercept": self.intercept, "forgetting": self.forgetting,
               "half_life": self.half_life, "ridge": self.ridge}
        if self.drift:  # only the drift settings that differ from the defaults
            out["drift"] = dict(self.drift)
        return out

    def to_json(self) -> str:
        return orjson.dumps(self.to_dict()).decode()

    @property
    def terms(self) -> tuple[str, ...]:
        """Coefficient names in engine column order (``intercept`` first when configured)."""
        return ((INTERCEPT,) if self.intercept else ()) + self.features

    @property
    def feature_index(self) -> dict[str, int]:
        return {name: i for i, name in enumerate(self.features)}

    @property
    def dim(self) -> int:
        return len(self.features) + int(self.intercept)

    def spec(self) -> Spec:
        return Spec(dim=self.dim, forgetting=self.forgetting, half_life=self.half_life, ridge=self.ridge)
