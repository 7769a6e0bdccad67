"""Turning parsed JSON into engine rows: observations, prediction rows, times, levels.

Every problem is reported as a JSON pointer into the request body plus a
reason; a batch with one bad row is refused as a whole.

Limits: every number finite with ``|v| <= 1e100`` (the engine's
``MAX_ABS_VALUE``; each row's Euclidean norm too); booleans are not numbers;
times are RFC 3339 strings with an offset (``2024-05-01T12:00:00Z``) or epoch
seconds, between years 1 and 9999; keys are 1-200 characters.

Observations take a fast path first (:func:`_fast_observations`): one pass that
accepts only bodies it can prove valid (exact ``float``/``int`` types, bounds
checked with a safety margin) and builds all rows as one float64 array.  Anything
it cannot accept goes through the detailed path (:func:`_parse_detailed`), which
finds and words every problem, so error messages and pointers do not depend on
the fast path; the values accepted are the same on both paths.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import numpy as np

from leastwise.engine import MAX_ABS_VALUE

from .config import ModelConfig
from .errors import FieldError, InvalidInput, pointer

__all__ = ["Observation", "parse_observations", "parse_predict", "parse_time", "MIN_TIME", "MAX_TIME", "MAX_KEY"]

MIN_TIME = -62135596800.0  # 0001-01-01T00:00:00Z
MAX_TIME = 253402300799.0  # 9999-12-31T23:59:59Z
MAX_KEY = 200
_OBS_FIELDS = {"x", "y", "time", "key"}
_MAX_SQ = MAX_ABS_VALUE * MAX_ABS_VALUE
#: The fast path accepts a row only when its float64 sum of squares is below this: any two
#: summation orders of at most 129 squares differ by far less than 1e-12 relative, so such a
#: row passes the detailed path's check too; rows at the edge take the detailed path.
_FAST_MAX_SQ = _MAX_SQ * (1.0 - 1e-12)
_FLOAT64 = np.float64
_ONLY_FLOAT = {float}
_NUMBER_TYPES = {float, int}


@dataclass(slots=True)
class Observation:
    """One validated observation: the engine row (intercept included), response, time, key.

    ``x`` is a read-only 1-d float64 array of ``config.dim`` values (on the fast path a row
    view of one array per request), which the engine takes without re-checking it.
    """

    x: np.ndarray
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
    x = np.array(row, dtype=_FLOAT64)
    x.flags.writeable = False
    return Observation(x, y, t, key)


def _fast_observations(items: list[Any], config: ModelConfig) -> list[Observation] | None:
    """The observations of ``items`` when every one is plainly valid; ``None`` to take the detailed path.

    Accepts a subset of what :func:`_observation` accepts (exact ``dict``/``list``/``float``/``int``/
    ``str`` types, no borderline norms) and gives the same values for it.
    """
    try:
        return _fast_observations_unchecked(items, config)
    except (ArithmeticError, ValueError, TypeError):  # e.g. an int too large for a float: let the detailed path speak
        return None


def _fast_observations_unchecked(items: list[Any], config: ModelConfig) -> list[Observation] | None:
    names = config.features
    n = len(names)
    intercept = config.intercept
    fields = _OBS_FIELDS
    flat: list[Any] = []
    push = flat.append
    extend = flat.extend
    ys: list[float] = []
    ts: list[float | None] = []
    keys: list[str | None] = []
    name_set: frozenset[str] | None = None
    errs: _Errors | None = None
    lo, hi = -MAX_ABS_VALUE, MAX_ABS_VALUE
    for item in items:
        if type(item) is not dict or not item.keys() <= fields:
            return None
        x = item.get("x")
        if intercept:
            push(1.0)
        if type(x) is list:
            if len(x) != n:
                return None
            extend(x)
        elif type(x) is dict:
            if name_set is None:
                name_set = frozenset(names)
            if x.keys() != name_set:
                return None
            extend(map(x.__getitem__, names))
        else:
            return None
        y = item.get("y")
        if type(y) is not float:
            if type(y) is not int:
                return None
            y = float(y)
        if not lo <= y <= hi:  # NaN fails too
            return None
        ys.append(y)
        t = item.get("time")
        if t is not None:
            kind = type(t)
            if kind is float or kind is int:
                t = float(t)
                if not MIN_TIME <= t <= MAX_TIME:
                    return None
            elif kind is str:
                if errs is None:
                    errs = _Errors()
                t = _time(t, "", errs)
                if t is None:
                    return None
            else:
                return None
        ts.append(t)
        key = item.get("key")
        if key is not None and not (type(key) is str and 0 < len(key) <= MAX_KEY):
            return None
        keys.append(key)
    types = set(map(type, flat))
    if types != _ONLY_FLOAT:
        if not types <= _NUMBER_TYPES:  # booleans, strings, None, int or float subclasses, ...
            return None
        flat = list(map(float, flat))  # what the detailed path's float(value) gives
    rows = np.array(flat, dtype=_FLOAT64).reshape(len(items), n + intercept)
    # One norm bound checks every value too (|v| <= norm; NaN and inf fail). A single
    # reading sums its squares in Python: the same bound, without numpy's per-call cost.
    if len(items) == 1:
        square_sum = 0.0
        for v in flat:
            square_sum += v * v
        if not square_sum <= _FAST_MAX_SQ:
            return None
    elif not np.einsum("ij,ij->i", rows, rows).max() <= _FAST_MAX_SQ:
        return None
    rows.flags.writeable = False  # the rows are shared views: nobody may change one
    return list(map(Observation, rows, ys, ts, keys))


def parse_observations(body: Any, config: ModelConfig, max_batch: int) -> tuple[list[Observation], bool]:
    """Validated observations of a POST body and whether it was a batch (``{"observations": [...]}``)."""
    if type(body) is dict:
        if "observations" in body:
            items = body["observations"]
            if len(body) == 1 and type(items) is list and 0 < len(items) <= max_batch:
                out = _fast_observations(items, config)
                if out is not None:
                    return out, True
        else:
            out = _fast_observations([body], config)
            if out is not None:
                return out, False
    return _parse_detailed(body, config, max_batch)


def _parse_detailed(body: Any, config: ModelConfig, max_batch: int) -> tuple[list[Observation], bool]:
    """:func:`parse_observations` value by value, collecting every problem with its JSON pointer."""
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
