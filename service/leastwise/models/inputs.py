"""Turning parsed JSON into engine rows: observations, prediction rows, times, levels.

Every problem is reported as a JSON pointer into the request body plus a
reason; a batch with one bad row is refused as a whole.

Limits: every number finite with ``|v| <= 1e100`` (the engine's
``MAX_ABS_VALUE``; each row's Euclidean norm too); booleans are not numbers;
times are RFC 3339 strings with an offset (``2024-05-01T12:00:00Z``) or epoch
seconds, between years 1 and 9999; keys are 1-200 characters.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from leastwise.engine import MAX_ABS_VALUE

from .config import ModelConfig
from .errors import FieldError, InvalidInput, pointer

__all__ = ["Observation", "parse_observations", "parse_predict", "parse_time", "MIN_TIME", "MAX_TIME", "MAX_KEY"]

MIN_TIME = -62135596800.0  # 0001-01-01T00:00:00Z
MAX_TIME = 253402300799.0  # 9999-12-31T23:59:59Z
MAX_KEY = 200
_OBS_FIELDS = {"x", "y", "time", "key"}
_MAX_SQ = MAX_ABS_VALUE * MAX_ABS_VALUE


@dataclass(slots=True)
class Observation:
    """One validated observation: the engine row (intercept included), response, time, key."""

    x: list[float]
    y: float
    t: float | None
    key: str | None


class _Errors:
    def __init__(self) -> None:
        self.items: list[FieldError] = []

    def add(self, where: str, reason: str) -> None:
        if len(self.items) < 100:
            self.items.append(FieldError(where, reason))

    def raise_if_any(self) -> None:
        if self.items:
            first = self.items[0]
            more = f" (and {len(self.items) - 1} more)" if len(self.items) > 1 else ""
            raise InvalidInput(f"{first.pointer}: {first.reason}{more}", self.items)


def _number(value: Any, where: str, errs: _Errors) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        errs.add(where, "must be a number" + (" (booleans are not numbers)" if isinstance(value, bool) else ""))
        return None
    v = float(value)
    if not (math.isfinite(v) and abs(v) <= MAX_ABS_VALUE):
        errs.add(where, f"must be finite with magnitude at most {MAX_ABS_VALUE:g}")
        return None
    return v


def parse_time(value: Any, where: str = "/time") -> float:
    """Epoch seconds from an RFC 3339 string (offset required) or a number."""
    errs = _Errors()
    t = _time(value, where, errs)
    errs.raise_if_any()
    assert t is not None
    return t


def _time(value: Any, where: str, errs: _Errors) -> float | None:
    if isinstance(value, str):
        text = value.strip()
        try:
            if len(text) < 20 or text[10] not in "Tt ":
                raise ValueError
            parsed = datetime.fromisoformat(text[:-1] + "+00:00" if text[-1] in "zZ" else text)
        except (ValueError, IndexError):
            errs.add(where, "must be an RFC 3339 time such as 2024-05-01T12:00:00Z, or epoch seconds")
            return None
        if parsed.tzinfo is None or parsed.utcoffset() is None:
            errs.add(where, "an RFC 3339 time needs an offset (Z or +hh:mm)")
            return None
        return parsed.timestamp()
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        errs.add(where, "must be an RFC 3339 string or epoch seconds")
        return None
    t = float(value)
    if not (math.isfinite(t) and MIN_TIME <= t <= MAX_TIME):
        errs.add(where, "epoch seconds must lie between years 1 and 9999")
        return None
    return t


def _row(x: Any, config: ModelConfig, where: str, errs: _Errors) -> list[float] | None:
    """The engine row for ``x`` (a list in feature order or an object by feature name)."""
    names = config.features
    values: list[float | None]
    if isinstance(x, list):
        if len(x) != len(names):
            errs.add(where, f"needs {len(names)} values (features {list(names)}), got {len(x)}")
            return None
        values = [_number(v, f"{where}/{i}", errs) for i, v in enumerate(x)]
    elif isinstance(x, dict):
        unknown = [k for k in x if k not in names]
        for k in unknown:
            errs.add(f"{where}{pointer(k)}", "unknown feature")
        missing = [n for n in names if n not in x]
        if missing:
            errs.add(where, f"missing features {missing}")
        if unknown or missing:
            return None
        values = [_number(x[n], f"{where}{pointer(n)}", errs) for n in names]
    else:
        errs.add(where, "must be a list of numbers in feature order or an object keyed by feature name")
        return None
    if any(v is None for v in values):
        return None
    row = ([1.0] if config.intercept else []) + values  # type: ignore[operator]
    if not sum(v * v for v in row) <= _MAX_SQ:
        errs.add(where, f"the row's Euclidean norm must be at most {MAX_ABS_VALUE:g}")
        return None
    return row  # type: ignore[return-value]


def _observation(item: Any, config: ModelConfig, where: str, errs: _Errors) -> Observation | None:
    if not isinstance(item, dict):
        errs.add(where or "/", "an observation must be an object with x and y")
        return None
    for k in item:
        if k not in _OBS_FIELDS:
            errs.add(f"{where}{pointer(k)}", "unknown field")
    row = _row(item["x"], config, f"{where}/x", errs) if "x" in item else errs.add(f"{where}/x", "required")
    y = _number(item["y"], f"{where}/y", errs) if "y" in item else errs.add(f"{where}/y", "required")
    t = None
    if item.get("time") is not None:
        t = _time(item["time"], f"{where}/time", errs)
    key = item.get("key")
    if key is not None and not (isinstance(key, str) and 1 <= len(key) <= MAX_KEY):
        errs.add(f"{where}/key", f"must be a string of 1 to {MAX_KEY} characters")
        key = None
    if row is None or y is None:
        return None
    return Observation(row, y, t, key)


def parse_observations(body: Any, config: ModelConfig, max_batch: int) -> tuple[list[Observation], bool]:
    """Validated observations of a POST body and whether it was a batch (``{"observations": [...]}``)."""
    errs = _Errors()
    if isinstance(body, dict) and "observations" in body:
        extra = [k for k in body if k != "observations"]
        for k in extra:
            errs.add(pointer(k), "unknown field (a batch body holds only 'observations')")
        items = body["observations"]
        if not isinstance(items, list):
            errs.add("/observations", "must be a list of observations")
            errs.raise_if_any()
        if not items:
            errs.add("/observations", "a batch needs at least one observation")
        elif len(items) > max_batch:
            errs.add("/observations", f"at most {max_batch} observations per request, got {len(items)}")
        errs.raise_if_any()
        out = [_observation(item, config, f"/observations/{i}", errs) for i, item in enumerate(items)]
        errs.raise_if_any()
        return out, True  # type: ignore[return-value]
    obs = _observation(body, config, "", errs)
    errs.raise_if_any()
    return [obs], False  # type: ignore[list-item]


def parse_predict(body: Any, config: ModelConfig, max_batch: int) -> tuple[list[list[float]], bool, float]:
    """Rows, whether the body was ``{"rows": [...]}``, and the interval level (default 0.95)."""
    errs = _Errors()
    if not isinstance(body, dict):
        raise InvalidInput.at("", 'the body must be {"x": ...} or {"rows": [...]}, optionally with "level"')
    for k in body:
        if k not in {"x", "rows", "level"}:
            errs.add(pointer(k), "unknown field")
    level = 0.95
    if "level" in body:
        lv = _number(body["level"], "/level", errs)
        if lv is not None and not 0.0 < lv < 1.0:
            errs.add("/level", "must be in (0, 1)")
        elif lv is not None:
            level = lv
    rows: list[list[float] | None] = []
    many = "rows" in body
    if many and "x" in body:
        errs.add("", 'give either "x" or "rows", not both')
    elif many:
        items = body["rows"]
        if not isinstance(items, list) or not items:
            errs.add("/rows", "must be a non-empty list of inputs")
        elif len(items) > max_batch:
            errs.add("/rows", f"at most {max_batch} rows per request, got {len(items)}")
        else:
            rows = [_row(item, config, f"/rows/{i}", errs) for i, item in enumerate(items)]
    elif "x" in body:
        rows = [_row(body["x"], config, "/x", errs)]
    else:
        errs.add("/x", 'required: "x" (one input) or "rows" (several)')
    errs.raise_if_any()
    return rows, many, level  # type: ignore[return-value]
