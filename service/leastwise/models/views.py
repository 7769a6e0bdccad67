"""Plain-dict views of a model's state for the API (JSON-ready; never NaN or infinity)."""

from __future__ import annotations

import math
from datetime import datetime, timezone
from typing import Any

import numpy as np

from leastwise.engine import State, Step

from .config import ModelConfig

__all__ = ["rfc3339", "finite", "by_name", "state_view", "step_view", "prediction_view", "covariance_view"]


def rfc3339(t: float | None) -> str | None:
    if t is None:
        return None
    try:
        return datetime.fromtimestamp(t, tz=timezone.utc).isoformat().replace("+00:00", "Z")
    except (OverflowError, OSError, ValueError):
        return None


def finite(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def by_name(config: ModelConfig, values: np.ndarray) -> dict[str, float | None]:
    return {name: finite(v) for name, v in zip(config.terms, values.tolist())}


def state_view(config: ModelConfig, view: State) -> dict[str, Any]:
    """Coefficients by name, counts, sigma and identifiability of a state (``view`` may cache its solution)."""
    sol = view.solution()
    return {
        "n": view.n,
        "effective_n": finite(view.effective_n),
        "identifiable": bool(sol.identifiable),
        "rank": sol.rank,
        "coefficients": by_name(config, sol.coefficients),
        "sigma": finite(sol.sigma),
        "rss": finite(sol.rss),
        "dof": finite(sol.dof),
        "unidentified_directions": [by_name(config, row) for row in sol.unidentified],
        "last_time": rfc3339(view.last_time),
    }


def _finite_step_value(v: float | None) -> float | None:
    """:func:`finite` for a step's fields, which are floats or None (the hot path of every answer)."""
    if v is None:
        return None
    if type(v) is not float:
        v = float(v)
    return v if -math.inf < v < math.inf else None


def step_view(step: Step, seq: int, t: float | None) -> dict[str, Any]:
    f = _finite_step_value
    return {
        "status": "applied",
        "seq": seq,
        "prediction": f(step.prediction),
        "residual": f(step.residual),
        "recursive_residual": f(step.recursive_residual),
        "standardized_residual": f(step.standardized_residual),
        "leverage": f(step.leverage),
        "time": t,
    }


def prediction_view(pred: Any, i: int) -> dict[str, Any]:
    return {
        "mean": finite(pred.mean[i]),
        "se_fit": finite(pred.se_fit[i]),
        "se_prediction": finite(pred.se_prediction[i]),
        "lower": finite(pred.lower[i]),
        "upper": finite(pred.upper[i]),
    }


def _matrix(m: np.ndarray | None) -> list[list[float | None]] | None:
    """Rows and columns in ``terms`` order."""
    if m is None:
        return None
    return [[finite(v) for v in row] for row in m.tolist()]


def covariance_view(config: ModelConfig, view: State) -> dict[str, Any]:
    sol = view.solution()
    return {
        "terms": list(config.terms),
        "identifiable": bool(sol.identifiable),
        "sigma": finite(sol.sigma),
        "inverse_moment": _matrix(view.inverse_moment()),
        "covariance": _matrix(view.covariance()),
    }
