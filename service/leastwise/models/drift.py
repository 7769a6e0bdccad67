"""Residual monitoring for one model: a summary of the standardised residuals, plus
:class:`leastwise.drift.DriftState` when that package provides it.

Bytes layout (checkpointed with the engine state): magic ``b"LWRM"``, version
(u8), flags (u8: bit 0 a last residual is set, bit 1 drift bytes follow), the
summary (count u64, without-residual count u64, last, sum, sum of squares, max
abs as float64), then the ``DriftState`` bytes if any.
"""

from __future__ import annotations

import math
import struct
from typing import Any

from leastwise.engine import Step

try:  # the drift package is optional at this layer: the summary works without it
    from leastwise.drift import DriftConfig, DriftState
except ImportError:  # pragma: no cover - exercised only when the drift package is absent
    DriftConfig = None  # type: ignore[assignment,misc]
    DriftState = None  # type: ignore[assignment,misc]

__all__ = ["ResidualMonitor", "drift_available"]

_MAGIC = b"LWRM"
_HEAD = struct.Struct("<4sBBQQdddd")


def drift_available() -> bool:
    return DriftState is not None


def _new_detector(forgetting: float) -> Any:
    if DriftState is None:
        return None
    try:
        config = DriftConfig(forgetting_factor=forgetting if forgetting < 1.0 else None)
        return DriftState(config)
    except Exception:  # noqa: BLE001 - a drift package in flux must not stop the service
        return None


class ResidualMonitor:
    """Running statistics of the standardised residuals and the drift detectors of one model."""

    __slots__ = ("count", "missing", "last", "total", "total_sq", "max_abs", "detector", "forgetting")

    def __init__(self, forgetting: float = 1.0) -> None:
        self.forgetting = forgetting
        self.count = 0
        self.missing = 0
        self.last: float | None = None
        self.total = 0.0
        self.total_sq = 0.0
        self.max_abs = 0.0
        self.detector = _new_detector(forgetting)

    def observe(self, step: Step) -> None:
        """Feed one engine step (in log order)."""
        z = step.standardized_residual
        w = step.recursive_residual
        if z is None:
            self.missing += 1
        else:
            self.count += 1
            self.last = z
            self.total += z
            self.total_sq += z * z
            if abs(z) > self.max_abs:
                self.max_abs = abs(z)
        if self.detector is not None:
            if w is None:
                self.detector.observe(math.nan, None)
            else:
                # the engine gives z = w / sigma_before; recover sigma (any positive value when w == 0)
                sigma = (w / z) if (z is not None and z != 0.0) else (1.0 if z is not None else None)
                self.detector.observe(w, sigma)

    def summary(self) -> dict[str, Any]:
        n = self.count
        return {
            "count": n,
            "without_residual": self.missing,
            "last_standardized": self.last,
            "mean_standardized": self.total / n if n else None,
            "rms_standardized": math.sqrt(self.total_sq / n) if n else None,
            "max_abs_standardized": self.max_abs if n else None,
        }

    def status(self) -> dict[str, Any]:
        """``{"status": "ok" | "watch" | "alarm", "reasons": [...]}``."""
        if self.detector is None:
            return {"status": "ok", "reasons": [], "detectors": False}
        st = self.detector.status()
        reasons = [_clean(_as_dict(r)) for r in st.reasons]
        return {"status": st.status, "reasons": reasons, "detectors": True}

    def report(self) -> dict[str, Any]:
        out = {**self.status(), "residuals": self.summary()}
        if self.detector is not None and hasattr(self.detector, "report"):
            out["statistics"] = _clean(self.detector.report())
        return out

    def to_bytes(self) -> bytes:
        extra = self.detector.to_bytes() if self.detector is not None else b""
        flags = (self.last is not None) | (bool(extra) << 1)
        head = _HEAD.pack(_MAGIC, 1, flags, self.count, self.missing, self.last or 0.0, self.total, self.total_sq, self.max_abs)
        return head + extra

    @classmethod
    def from_bytes(cls, data: bytes, forgetting: float = 1.0) -> "ResidualMonitor":
        mon = cls(forgetting)
        if not data:
            return mon
        magic, _v, flags, count, missing, last, total, total_sq, max_abs = _HEAD.unpack_from(data)
        if magic != _MAGIC:
            raise ValueError("not residual-monitor bytes")
        mon.count, mon.missing, mon.total, mon.total_sq, mon.max_abs = count, missing, total, total_sq, max_abs
        mon.last = last if flags & 1 else None
        rest = data[_HEAD.size :]
        if flags & 2 and DriftState is not None:
            try:
                mon.detector = DriftState.from_bytes(rest)
            except Exception:  # noqa: BLE001 - an old format: start the detectors afresh
                mon.detector = _new_detector(forgetting)
        return mon

    def copy(self) -> "ResidualMonitor":
        return ResidualMonitor.from_bytes(self.to_bytes(), self.forgetting)


def _as_dict(obj: Any) -> dict[str, Any]:
    if isinstance(obj, dict):
        return obj
    if hasattr(obj, "__dataclass_fields__"):
        return {k: getattr(obj, k) for k in obj.__dataclass_fields__}
    return {"value": str(obj)}


def _clean(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become None, tuples lists."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if hasattr(value, "__dataclass_fields__"):
        return _clean(_as_dict(value))
    if value is None or isinstance(value, (bool, int, str)):
        return value
    return str(value)
