"""Drift monitoring of one model: the residual summary, the detectors of :mod:`leastwise.drift`,
the outlier gate, excitation (erosion under forgetting), the reference point and the
coefficient-change test against it.  See docs/drift.md.

Everything a restart needs is in :meth:`ResidualMonitor.to_bytes` (checkpointed and
snapshotted with the engine state), so the statistics survive restarts bit for bit and
follow snapshots and restores.  The monitor does no I/O; the registry writes the events
it yields (:meth:`ResidualMonitor.take_events`) in the observations' own transaction.

Bytes layout, version 2: magic ``b"LWRM"``, version (u8), flags (u8), the summary
(count u64, without-residual count u64, last, sum, sum of squares, max abs as float64),
then three length-prefixed (u32) parts: the ``DriftState`` bytes, a JSON document of the
monitor's own scalars, and raw little-endian float64 arrays named in that document.
Version 1 (summary + ``DriftState`` bytes) still loads.
"""

from __future__ import annotations

import math
import struct
from collections.abc import Iterable, Iterator
from dataclasses import asdict, fields
from typing import TYPE_CHECKING, Any

import numpy as np
import orjson

from leastwise.drift import DriftConfig, DriftState, chow_predictive_test, wald_change
from leastwise.engine import EngineError, State, Step
from leastwise.slots import slot_copier

from .errors import FieldError

if TYPE_CHECKING:  # pragma: no cover
    from .config import ModelConfig

__all__ = ["ResidualMonitor", "drift_available", "DRIFT_DEFAULTS", "parse_drift", "drift_config",
           "replay", "OK", "WATCH", "ALARM"]

OK, WATCH, ALARM = "ok", "watch", "alarm"

_MAGIC = b"LWRM"
_HEAD = struct.Struct("<4sBBQQdddd")
_LEN = struct.Struct("<I")

#: Thresholds taken from :class:`DriftConfig` (the model config may override each under ``drift``).
_DETECTOR_KEYS = tuple(f.name for f in fields(DriftConfig) if f.name not in ("forgetting_factor", "effective_n"))
_DEFAULT_CFG = DriftConfig()
#: Every ``drift`` setting of a model config and its default.
DRIFT_DEFAULTS: dict[str, Any] = {
    **{k: getattr(_DEFAULT_CFG, k) for k in _DETECTOR_KEYS},
    #: |standardised residual| above which an observation is logged but not applied (None: no gate)
    "gate": None,
    #: consecutive gated observations that raise an alarm (a shift larger than the gate cannot hide)
    "gate_run": 5,
    #: under forgetting: renewal ratio (new information / forgotten information along the
    #: least-informed direction over one weight half-life) below which excitation is eroding
    "erosion_renewal": 0.1,
}
_INT_KEYS = {"warmup", "gate_run"}
_BOOL_KEYS = {"latch"}
_NULLABLE = {"bde_alpha_alarm", "gate"}


def drift_available() -> bool:
    return True


# ---------------------------------------------------------------------------- config
def parse_drift(value: Any, errors: list[FieldError]) -> tuple[tuple[str, Any], ...]:
    """Validate the ``drift`` section of a model config; returns the settings that differ from the defaults.

    Problems are appended to ``errors`` (JSON pointers under ``/drift``).
    """
    if value is None:
        return ()
    if not isinstance(value, dict):
        errors.append(FieldError("/drift", "must be an object of drift settings"))
        return ()
    merged = dict(DRIFT_DEFAULTS)
    bad = False
    for key, v in value.items():
        where = f"/drift/{key}"
        if key not in DRIFT_DEFAULTS:
            errors.append(FieldError(where, "unknown drift setting"))
            bad = True
            continue
        if v is None and key in _NULLABLE:
            merged[key] = None
            continue
        if key in _BOOL_KEYS:
            if not isinstance(v, bool):
                errors.append(FieldError(where, "must be true or false"))
                bad = True
                continue
        elif key in _INT_KEYS:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or v != int(v):
                errors.append(FieldError(where, "must be an integer"))
                bad = True
                continue
            v = int(v)
            lo = 2 if key == "warmup" else 1
            if not lo <= v <= 1_000_000:
                errors.append(FieldError(where, f"must be between {lo} and 1000000"))
                bad = True
                continue
        else:
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                errors.append(FieldError(where, "must be a finite number" + (" or null" if key in _NULLABLE else "")))
                bad = True
                continue
            v = float(v)
            if key == "gate" and not 1.0 <= v <= 1e6:
                errors.append(FieldError(where, "must be between 1 and 1e6 (sigma units) or null"))
                bad = True
                continue
            if key == "erosion_renewal" and not 0.0 < v < 1.0:
                errors.append(FieldError(where, "must be in (0, 1)"))
                bad = True
                continue
        merged[key] = v
    if bad:
        return ()
    try:
        DriftConfig(**{k: merged[k] for k in _DETECTOR_KEYS})
    except (ValueError, TypeError) as exc:
        errors.append(FieldError("/drift", str(exc)))
        return ()
    return tuple((k, merged[k]) for k in DRIFT_DEFAULTS if merged[k] != DRIFT_DEFAULTS[k])


def drift_settings(overrides: Iterable[tuple[str, Any]]) -> dict[str, Any]:
    """All drift settings: the defaults with the model's overrides."""
    return {**DRIFT_DEFAULTS, **dict(overrides)}


def drift_config(config: "ModelConfig") -> DriftConfig:
    s = drift_settings(getattr(config, "drift", ()))
    lam = config.forgetting if config.forgetting < 1.0 else None
    return DriftConfig(**{k: s[k] for k in _DETECTOR_KEYS}, forgetting_factor=lam)


# ---------------------------------------------------------------------------- helpers
def _finite(v: Any) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _clean(value: Any) -> Any:
    """JSON-safe copy: non-finite floats become None, tuples lists."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_clean(v) for v in value]
    if hasattr(value, "__dataclass_fields__"):
        return _clean(asdict(value))
    if isinstance(value, np.generic):
        return _clean(value.item())
    if value is None or isinstance(value, (bool, int, str)):
        return value
    return str(value)


def a_priori(state: State, x: np.ndarray, y: float, t: float | None) -> Step | None:
    """The step an update of ``state`` with ``(x, y, t)`` would report, without applying it.

    :meth:`State.preview`: the very numbers the update would give. ``None`` when
    the residual cannot be standardised (no information along x, or sigma not
    estimable) or the engine refuses the observation. Used only for the gate
    decision, which is then logged, so replay never recomputes the decision.
    """
    try:
        step = state.preview(x, y, t)
    except EngineError:
        return None
    return step if step.standardized_residual is not None else None


def _information(R: np.ndarray, v: np.ndarray) -> float:
    """``v' A v = ||R v||^2`` for the upper-triangular factor R of A."""
    rv = R @ v
    return float(rv @ rv)


def _roll_due(decay_since_roll: float, primed: bool) -> bool:
    """Whether the excitation window rolls now (:meth:`ResidualMonitor._roll`): at the first
    observation, and once the weight of the window's first observation has halved."""
    return decay_since_roll <= 0.5 or not primed


# ---------------------------------------------------------------------------- the monitor
_REF_KINDS = ("start", "reset", "snapshot", "now")


class ResidualMonitor:
    """Running residual statistics, drift detectors, gate, excitation and reference of one model."""

    __slots__ = ("count", "missing", "last", "total", "total_sq", "max_abs", "detector", "forgetting",
                 "settings", "forgets", "seq", "gated_total", "gated_since_ref", "gated_run", "gated_run_since",
                 "gated_last", "gated_alarm", "reference", "ref_arrays", "lineage_version", "restored_from",
                 "roll_decay", "lag_factor", "erosion", "_sig", "_level", "_keys", "events")

    def __init__(self, forgetting: float = 1.0, settings: dict[str, Any] | None = None, *,
                 forgets: bool | None = None) -> None:
        self.forgetting = float(forgetting)
        self.settings = dict(settings) if settings is not None else dict(DRIFT_DEFAULTS)
        self.forgets = bool(forgets) if forgets is not None else self.forgetting < 1.0
        self.count = 0
        self.missing = 0
        self.last: float | None = None
        self.total = 0.0
        self.total_sq = 0.0
        self.max_abs = 0.0
        s = self.settings
        self.detector = DriftState(DriftConfig(**{k: s[k] for k in _DETECTOR_KEYS},
                                               forgetting_factor=self.forgetting if self.forgetting < 1.0 else None))
        self.seq = 0  # last log seq seen (applied or gated)
        self.gated_total = 0
        self.gated_since_ref = 0
        self.gated_run = 0
        self.gated_run_since = -1
        self.gated_last: dict[str, Any] | None = None  # {"seq", "standardized_residual"}
        self.gated_alarm: dict[str, Any] | None = None  # latched gated-run alarm
        #: where the statistics run from: {"kind", "seq", "snapshot", "version", "at", "n", "nested", ...}
        self.reference: dict[str, Any] = {"kind": "start", "seq": 0, "snapshot": None, "version": 1, "at": None,
                                          "n": 0, "estimate": False}
        self.ref_arrays: dict[str, np.ndarray] = {}  # "coefficients", "inverse_moment" of the reference
        self.lineage_version = 1  # model version at which the engine state last started afresh
        self.restored_from: int | None = None
        self.roll_decay = 1.0
        self.lag_factor: np.ndarray | None = None
        self.erosion: dict[str, Any] | None = None
        self.events: list[dict[str, Any]] = []
        self._sig = -1
        self._level = OK
        self._keys: frozenset = frozenset()
        self._refresh()

    @classmethod
    def for_model(cls, config: "ModelConfig", *, kind: str = "start", seq: int = 0, version: int = 1,
                  at: float | None = None) -> "ResidualMonitor":
        mon = cls(config.forgetting, drift_settings(getattr(config, "drift", ())),
                  forgets=config.forgetting < 1.0 or config.half_life is not None)
        mon.seq = seq
        mon.reference = {"kind": kind, "seq": seq, "snapshot": None, "version": version, "at": at, "n": 0,
                         "estimate": False}
        mon.lineage_version = version
        mon._refresh()
        return mon

    # -- the hot path ------------------------------------------------------------
    def observe(self, step: Step, seq: int | None = None, state: State | None = None) -> dict[str, Any] | None:
        """Feed one applied engine step (in log order); returns the status change it caused, if any."""
        if seq is None:
            seq = self.seq + 1
        self.seq = seq
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
        det = self.detector
        if w is None:
            dsig = det.observe(math.nan, None, seq)
        elif z is None:
            # sigma not yet estimable (n <= d): within the warm-up only the BDE sums use the residual
            # (the z-detectors start after it), so W covers every recursive residual like statsmodels
            dsig = det.observe(w, 1.0 if det.n_used < det.config.warmup else None, seq)
        else:
            # the engine gives z = w / sigma_before; recover sigma (any positive value when w == 0)
            dsig = det.observe(w, w / z if z != 0.0 else 1.0, seq)
        if self.gated_run:
            self.gated_run = 0
            self.gated_run_since = -1
        if self.forgets and state is not None:
            self.roll_decay *= step.decay
            if _roll_due(self.roll_decay, self.lag_factor is not None):
                self._roll(state, seq)
        sig = self._signature(dsig)
        if sig == self._sig:
            return None
        return self._changed(seq, sig)

    def gate(self, state: State, x: np.ndarray, y: float, t: float | None) -> Step | None:
        """The a-priori step when the gate rejects ``(x, y)``; ``None`` to apply it."""
        g = self.settings.get("gate")
        if g is None or self.detector.n_used < self.detector.config.warmup:
            return None
        step = a_priori(state, x, y, t)
        if step is None or not abs(step.standardized_residual) > g:
            return None
        return step

    def record_gated(self, step: Step, seq: int) -> dict[str, Any] | None:
        """Count a gated (logged, not applied) observation; returns the status change, if any."""
        self.seq = seq
        self.gated_total += 1
        self.gated_since_ref += 1
        if self.gated_run == 0:
            self.gated_run_since = seq
        self.gated_run += 1
        self.gated_last = {"seq": seq, "standardized_residual": _finite(step.standardized_residual)}
        run = self.settings["gate_run"]
        if self.gated_run >= run and self.gated_alarm is None and self.settings["latch"]:
            self.gated_alarm = {"value": float(self.gated_run), "since": self.gated_run_since, "seq": seq}
        return self._changed(seq)

    def advance(self, state: State, x: np.ndarray, y: float, t: float | None, seq: int
                ) -> tuple[Step, str, dict[str, Any] | None]:
        """Gate check, then update ``state`` and feed the step: ``(step, "applied" | "gated", change)``.

        ``x`` may be anything the engine takes; a 1-d float64 array of the model's dimension
        (what :func:`leastwise.models.inputs.parse_observations` gives) skips the engine's checks.
        """
        g = self.settings.get("gate")
        if g is not None and self.detector.n_used >= self.detector.config.warmup:  # self.gate(), inline
            gated = a_priori(state, x, y, t)
            if gated is not None and abs(gated.standardized_residual) > g:
                return gated, "gated", self.record_gated(gated, seq)
        step = state.update(x, y, t)
        return step, "applied", self.observe(step, seq, state)

    def advance_block(self, state: State, x: np.ndarray, ys: list[float], times: list[float] | None,
                      seqs: list[int]) -> list[tuple[Step, str, dict[str, Any] | None, int]]:
        """Update ``state`` with the rows in engine blocks (:meth:`State.update_block`) and feed each step.

        Returns ``(step, "applied", change, block)`` per row, ``block`` being the seq of the
        first row of the engine block it went in with (the log records it, so replay repeats
        the blocks). Under forgetting a block ends at each row where the excitation window
        rolls (:meth:`_roll` reads the state after that row). No gate: callers take
        :meth:`advance` per observation when one is configured.
        """
        m = len(seqs)
        # Arrays: the engine's checks then look at one dtype instead of every element.
        y = np.array(ys, dtype=np.float64)
        t = None if times is None else np.array(times, dtype=np.float64)
        ends = [m]
        if self.forgets:
            ends = []
            roll, primed = self.roll_decay, self.lag_factor is not None
            for j, f in enumerate(state.decays(t, m)):
                roll *= f
                if _roll_due(roll, primed):
                    ends.append(j + 1)
                    roll, primed = 1.0, True
            if not ends or ends[-1] != m:
                ends.append(m)
        out: list[tuple[Step, str, dict[str, Any] | None, int]] = []
        start = 0
        for end in ends:
            steps = state.update_block(x[start:end], y[start:end], None if t is None else t[start:end])
            block = seqs[start]
            for step, seq in zip(steps, seqs[start:end]):
                out.append((step, "applied", self.observe(step, seq, state), block))
            start = end
        return out

    def take_events(self) -> list[dict[str, Any]]:
        out, self.events = self.events, []
        return out

    # -- status ------------------------------------------------------------------
    def _signature(self, detector_signature: int | None = None) -> int:
        """Fingerprint of :meth:`status` (``detector_signature``: the detector's, when the caller has it)."""
        g = 0
        if self.gated_alarm is not None:
            g = 3
        elif self.gated_run >= self.settings["gate_run"]:
            g = 2
        elif self.gated_run:
            g = 1
        e = 1 if (self.erosion is not None and self.erosion.get("eroding")) else 0
        if detector_signature is None:
            detector_signature = self.detector.signature()
        return detector_signature << 4 | g << 1 | e

    def _changed(self, seq: int, sig: int | None = None) -> dict[str, Any] | None:
        """The status change at ``seq``, if any (``sig``: :meth:`_signature`, when the caller has it).

        The status is built only when the signature moved and the set of (statistic, level)
        pairs really differs from the one last recorded (:meth:`_reason_keys`, cheap).
        """
        if sig is None:
            sig = self._signature()
        if sig == self._sig:
            return None
        self._sig = sig
        if self._reason_keys() == self._keys:
            return None  # same keys, so the same level and no new alarm: what the full check below concludes
        st = self.status()
        level = st["status"]
        keys = frozenset((r["statistic"], r["level"]) for r in st["reasons"])
        alarms = {k for k in keys if k[1] == ALARM}
        new_alarm = bool(alarms - {k for k in self._keys if k[1] == ALARM})
        previous = self._level
        self._keys = keys
        self._level = level
        if level == previous and not new_alarm:
            return None
        change = {"status": level, "previous": previous, "seq": seq, "reasons": st["reasons"]}
        self.events.append(_event(change))
        return change

    def _reason_keys(self) -> frozenset:
        """``{(statistic, level)}`` of :meth:`reasons`, without building them (same conditions)."""
        keys = self.detector.reason_keys()
        run = self.settings["gate_run"]
        if self.gated_alarm is not None or self.gated_run >= run:
            keys = keys | {("gated_run", ALARM)}
        elif self.gated_run:
            keys = keys | {("gated_run", WATCH)}
        e = self.erosion
        if e is not None and e.get("eroding"):
            keys = keys | {("excitation_erosion", WATCH)}
        return keys

    def _refresh(self) -> None:
        """Recompute the derived status memo (after loading or replacing parts)."""
        self._sig = self._signature()
        st = self.status()
        self._level = st["status"]
        self._keys = frozenset((r["statistic"], r["level"]) for r in st["reasons"])

    def reasons(self) -> list[dict[str, Any]]:
        approx = self.forgets
        out = []
        for r in self.detector.status().reasons:
            d = _clean(asdict(r))
            d["approximate"] = approx
            out.append(d)
        run = self.settings["gate_run"]
        if self.gated_alarm is not None:
            out.append({"statistic": "gated_run", "level": ALARM, "value": self.gated_alarm["value"],
                        "threshold": float(run), "since": self.gated_alarm["since"], "latched": True,
                        "approximate": False})
        elif self.gated_run >= run:
            out.append({"statistic": "gated_run", "level": ALARM, "value": float(self.gated_run),
                        "threshold": float(run), "since": self.gated_run_since, "latched": False,
                        "approximate": False})
        elif self.gated_run:
            out.append({"statistic": "gated_run", "level": WATCH, "value": float(self.gated_run),
                        "threshold": float(run), "since": self.gated_run_since, "latched": False,
                        "approximate": False})
        e = self.erosion
        if e is not None and e.get("eroding"):
            out.append({"statistic": "excitation_erosion", "level": WATCH, "value": e["renewal"],
                        "threshold": self.settings["erosion_renewal"], "since": e["since"], "latched": False,
                        "approximate": False})
        out.sort(key=lambda r: 0 if r["level"] == ALARM else 1)
        return out

    @property
    def level(self) -> str:
        """The current drift status, ``ok``, ``watch`` or ``alarm`` (kept up to date by every update; costs nothing)."""
        return self._level

    def status(self) -> dict[str, Any]:
        """``{"status": "ok" | "watch" | "alarm", "reasons": [...], "gated": n, "reference": {...}}``."""
        reasons = self.reasons()
        level = ALARM if any(r["level"] == ALARM for r in reasons) else (WATCH if reasons else OK)
        return {"status": level, "reasons": reasons, "detectors": True, "approximate": self.forgets,
                "gated": self.gated_total, "reference": self.reference_view()}

    def reference_view(self) -> dict[str, Any]:
        r = self.reference
        return {"kind": r["kind"], "seq": r["seq"], "snapshot": r.get("snapshot"), "version": r.get("version"),
                "n": r.get("n", 0), "at": r.get("at")}

    # -- excitation ----------------------------------------------------------------
    def _roll(self, state: State, seq: int) -> None:
        """Once per weight half-life under forgetting: evaluate erosion, keep the factor for the next window."""
        d = state.spec.dim
        # C order, as from_bytes gives it back: products with it then sum in the same order
        # live and after a restart (a Fortran-ordered copy gave other last bits).
        R = np.ascontiguousarray(state.factor[:d, :d])
        lag, f = self.lag_factor, self.roll_decay
        self.lag_factor, self.roll_decay = R, 1.0
        if lag is None or not np.isfinite(R).all():
            return
        _, s, vt = np.linalg.svd(R)
        v = vt[-1]
        now = _information(R, v)
        then = _information(lag, v)
        forgotten = (1.0 - f) * then
        if not forgotten > 0.0:
            return
        renewal = max(now - f * then, 0.0) / forgotten
        eroding = renewal < self.settings["erosion_renewal"]
        prev = self.erosion
        since = prev["since"] if (prev is not None and prev.get("eroding") and eroding) else seq
        self.erosion = {"eroding": bool(eroding), "renewal": _finite(renewal), "information_now": _finite(now),
                        "information_window_ago": _finite(then), "window_decay": _finite(f),
                        "direction": [_finite(c) for c in (v if v[np.argmax(np.abs(v))] >= 0 else -v)],
                        "evaluated_at": seq, "since": since if eroding else None}

    def excitation_view(self, config: "ModelConfig", view: State) -> dict[str, Any]:
        ex = view.excitation()
        s1, s2 = view.weight_sum, view.weight_sq_sum
        out: dict[str, Any] = {
            "condition": _finite(ex.condition),
            "scaled_condition": _finite(ex.scaled_condition),
            "least_information": _finite(ex.least_information),
            "least_informed_direction": {n: _finite(c) for n, c in zip(config.terms, ex.least_informed_direction)},
            "effective_n": _finite(s1),
            "kish_effective_n": _finite(s1 * s1 / s2) if s2 > 0 else None,
            "prior_information": _finite(view.prior_weight * config.ridge),
            "forgets": self.forgets,
            "erosion": None,
            "warning": None,
        }
        e = self.erosion
        if self.forgets and e is not None:
            out["erosion"] = {**{k: v for k, v in e.items() if k != "direction"},
                              "direction": dict(zip(config.terms, e["direction"])),
                              "threshold": self.settings["erosion_renewal"]}
            if e.get("eroding"):
                out["warning"] = ("forgetting is eroding the least-informed direction: over the last weight "
                                  f"half-life the new data renewed {e['renewal']:.3g} of the information "
                                  "forgetting removed along it; excite it or expect it to become unidentified")
        return out

    # -- reference and the coefficient test -----------------------------------------
    def set_reference(self, kind: str, seq: int, version: int, at: float | None, *,
                      estimate: State | None = None, snapshot: int | None = None, nested: bool = False,
                      n: int = 0) -> None:
        """Move the reference point: every detector and alarm starts afresh from here."""
        self.detector.reset()
        self.gated_since_ref = 0
        self.gated_run = 0
        self.gated_run_since = -1
        self.gated_alarm = None
        self.erosion = None
        self.ref_arrays = {}
        ref: dict[str, Any] = {"kind": kind, "seq": seq, "snapshot": snapshot, "version": version, "at": at,
                               "n": n, "estimate": False, "nested": bool(nested)}
        if estimate is not None:
            sol = estimate.solution()
            if sol.identifiable and sol.sigma is not None:
                # C order, as from_bytes gives them back (the same sums live and after a restart)
                self.ref_arrays = {"coefficients": np.array(sol.coefficients, dtype=np.float64, order="C"),
                                   "inverse_moment": np.array(estimate.inverse_moment(), dtype=np.float64, order="C")}
                ref.update(estimate=True, sigma=float(sol.sigma), dof=float(sol.dof), rss=float(sol.rss),
                           effective_n=float(estimate.weight_sum))
        self.reference = ref
        self._refresh()

    def coefficient_test(self, config: "ModelConfig", view: State) -> dict[str, Any]:
        ref = self.reference
        base: dict[str, Any] = {"reference": self.reference_view(), "approximate": self.forgets}
        if not ref.get("estimate"):
            return {**base, "available": False,
                    "reason": "the reference point carries no coefficient estimate (model start or reset); "
                              "move the reference to a snapshot or to now (POST .../drift/reference)"}
        sol = view.solution()
        if not sol.identifiable or sol.sigma is None:
            return {**base, "available": False, "reason": "the current state is not identifiable or has no sigma"}
        b0 = self.ref_arrays["coefficients"]
        P0 = self.ref_arrays["inverse_moment"]
        b1 = sol.coefficients
        P1 = view.inverse_moment()
        s1 = float(sol.sigma)
        nested = bool(ref.get("nested")) and not self.forgets
        if nested:  # Hausman: Var(b1 - b0) = s^2 (A0^-1 - A1^-1) with the current (efficient) sigma
            C0, C1 = s1 * s1 * P0, s1 * s1 * P1
        else:
            s0 = float(ref["sigma"])
            C0, C1 = s0 * s0 * P0, s1 * s1 * P1
        diff = b1 - b0
        out = {**base, "available": True, "method": "wald_nested" if nested else "wald_independent",
               "difference": {n: _finite(v) for n, v in zip(config.terms, diff)},
               "reference_coefficients": {n: _finite(v) for n, v in zip(config.terms, b0)},
               "n_since_reference": view.n - int(ref.get("n", 0))}
        try:
            test = wald_change(b1, C1, b0, C0, nested=nested)
        except ValueError as exc:
            return {**out, "available": False, "reason": str(exc)}
        out.update(statistic=_finite(test.statistic), df=test.df[0], p_value=_finite(test.p_value))
        if self.forgets:
            out["note"] = ("under forgetting the estimates share down-weighted data: the independent form is used "
                           "and is conservative; the chi-square law is approximate (effective sample sizes "
                           f"{_finite(ref.get('effective_n'))} at the reference, {_finite(view.weight_sum)} now)")
        n_new = view.n - int(ref.get("n", 0))
        if nested and n_new >= 1 and ref.get("dof", 0) > 0:
            try:  # Chow (1960) predictive test; RSS_pooled - RSS_old = sum of the new squared recursive residuals
                chow = chow_predictive_test(float(sol.rss), float(ref["rss"]), int(ref["n"]), n_new, config.dim)
                out["chow_predictive"] = {"statistic": _finite(chow.statistic), "df": list(chow.df),
                                          "p_value": _finite(chow.p_value)}
            except ValueError:
                pass
        return out

    # -- the full report -------------------------------------------------------------
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

    def report(self, config: "ModelConfig | None" = None, view: State | None = None,
               bde_history: dict[str, Any] | None = None) -> dict[str, Any]:
        out = {**self.status(), "residuals": self.summary()}
        rep = _clean(self.detector.report())
        s = self.settings
        out["statistics"] = rep
        out["settings"] = dict(s)
        out["gate"] = {"threshold": s["gate"], "run_alarm": s["gate_run"], "gated_total": self.gated_total,
                       "gated_since_reference": self.gated_since_ref, "current_run": self.gated_run,
                       "last": self.gated_last}
        out["mean_shift"] = {
            "method": "two-sided tabular CUSUM (Page 1954) on standardised recursive residuals",
            "up": rep["mean_cusum"]["up"], "down": rep["mean_cusum"]["down"],
            "reference_k_sigma": rep["mean_cusum"]["k"], "watch_h_sigma": rep["mean_cusum"]["h_watch"],
            "alarm_h_sigma": rep["mean_cusum"]["h_alarm"],
            "units": "sigma: the statistic is a running sum of (z - k); h = 25 with k = 0.25 fires after about "
                     "100 observations of a 0.5-sigma shift",
            "up_since": rep["mean_cusum"]["up_since"], "down_since": rep["mean_cusum"]["down_since"]}
        det = self.detector
        m = det.n_used
        bde = rep["bde_cusum"]
        from leastwise.drift import bde_constant

        out["bde_cusum"] = {
            "value": bde["value"], "m": m, "sigma_hat": bde["sigma_hat"],
            "line_5pct": _finite(3.0 * bde_constant(0.05) * math.sqrt(m)) if m else None,
            "line_1pct": _finite(3.0 * bde_constant(0.01) * math.sqrt(m)) if m else None,
            "a_5pct": bde_constant(0.05), "a_1pct": bde_constant(0.01),
            "note": "current-horizon line 3a*sqrt(m) (the end point of the BDE band); the full band is in 'history'",
        }
        if bde_history is not None:
            out["bde_cusum"]["history"] = bde_history
        out["ewma"] = {"bias": rep["bias"], "scale_ratio": rep["scale_ratio"]}
        out["null_distributions"] = ("approximate: forgetting makes the recursive residuals only approximately "
                                     "independent; effective sample sizes are used" if self.forgets else "exact (OLS)")
        if config is not None and view is not None:
            out["excitation"] = self.excitation_view(config, view)
            out["coefficient_test"] = self.coefficient_test(config, view)
        return _clean(out)

    # -- persistence ---------------------------------------------------------------
    def _meta(self) -> dict[str, Any]:
        return {
            "forgetting": self.forgetting, "forgets": self.forgets, "settings": self.settings, "seq": self.seq,
            "gated_total": self.gated_total, "gated_since_ref": self.gated_since_ref, "gated_run": self.gated_run,
            "gated_run_since": self.gated_run_since, "gated_last": self.gated_last, "gated_alarm": self.gated_alarm,
            "reference": self.reference, "lineage_version": self.lineage_version,
            "restored_from": self.restored_from, "roll_decay": self.roll_decay, "erosion": self.erosion,
        }

    def to_bytes(self) -> bytes:
        det = self.detector.to_bytes()
        arrays = dict(self.ref_arrays)
        if self.lag_factor is not None:
            arrays["lag_factor"] = self.lag_factor
        meta = self._meta()
        meta["arrays"] = {k: list(a.shape) for k, a in arrays.items()}
        meta_b = orjson.dumps(meta)
        raw = b"".join(np.ascontiguousarray(a, dtype="<f8").tobytes() for a in arrays.values())
        flags = (self.last is not None) | 2 | 4
        head = _HEAD.pack(_MAGIC, 2, flags, self.count, self.missing, self.last or 0.0, self.total,
                          self.total_sq, self.max_abs)
        return b"".join((head, _LEN.pack(len(det)), det, _LEN.pack(len(meta_b)), meta_b, _LEN.pack(len(raw)), raw))

    @classmethod
    def from_bytes(cls, data: bytes, forgetting: float = 1.0) -> "ResidualMonitor":
        mon = cls(forgetting)
        if not data:
            return mon
        magic, version, flags, count, missing, last, total, total_sq, max_abs = _HEAD.unpack_from(data)
        if magic != _MAGIC:
            raise ValueError("not residual-monitor bytes")
        mon.count, mon.missing, mon.total, mon.total_sq, mon.max_abs = count, missing, total, total_sq, max_abs
        mon.last = last if flags & 1 else None
        rest = memoryview(data)[_HEAD.size:]
        if version < 2:
            if flags & 2:
                try:
                    mon.detector = DriftState.from_bytes(bytes(rest))
                except ValueError:  # an old format: start the detectors afresh
                    pass
            mon._refresh()
            return mon
        parts = []
        off = 0
        for _ in range(3):
            (n,) = _LEN.unpack_from(rest, off)
            parts.append(bytes(rest[off + 4: off + 4 + n]))
            off += 4 + n
        mon.detector = DriftState.from_bytes(parts[0])
        meta = orjson.loads(parts[1])
        for key in ("forgetting", "forgets", "settings", "seq", "gated_total", "gated_since_ref", "gated_run",
                    "gated_run_since", "gated_last", "gated_alarm", "reference", "lineage_version",
                    "restored_from", "roll_decay", "erosion"):
            setattr(mon, key, meta[key])
        mon.settings = {**DRIFT_DEFAULTS, **mon.settings}
        raw, pos = parts[2], 0
        arrays: dict[str, np.ndarray] = {}
        for name, shape in meta["arrays"].items():
            size = int(np.prod(shape)) * 8
            arrays[name] = np.frombuffer(raw[pos: pos + size], dtype="<f8").reshape(shape).astype(np.float64)
            pos += size
        mon.lag_factor = arrays.pop("lag_factor", None)
        mon.ref_arrays = arrays
        mon._refresh()
        return mon

    def copy(self) -> "ResidualMonitor":
        """An independent copy (arrays are never changed in place, so they are shared)."""
        new = _copy_slots(self)
        new.detector = self.detector.copy()
        new.settings = dict(self.settings)
        new.reference = dict(self.reference)
        new.events = list(self.events)  # chained prepares (group commit) keep the events not yet written
        return new


_copy_slots = slot_copier(ResidualMonitor)


def _event(change: dict[str, Any]) -> dict[str, Any]:
    reasons = change["reasons"]
    top = reasons[0] if reasons else None
    return {"seq": change["seq"], "status": change["status"], "previous": change["previous"],
            "statistic": top["statistic"] if top else "cleared",
            "value": top["value"] if top else None, "threshold": top["threshold"] if top else None,
            "since": top["since"] if top else None, "reasons": reasons}


def replayed_steps(state: State, rows: Iterable[Any], x_row: Any) -> Iterator[tuple[Any, Step | None]]:
    """Apply the applied log rows to ``state`` as they were applied live; yield ``(row, step)`` in order.

    Rows logged with one ``block`` mark go through :meth:`State.update_block` together
    (their steps are yielded once the block is in); gated rows yield ``None`` and are
    not applied, with ``state`` as it was just before them.
    """
    block: list[Any] = []
    for r in rows:
        if block and r.block != block[0].block:
            yield from _replay_block(state, block, x_row)
            block = []
        if r.status != "applied":
            yield r, None
        elif r.block is not None:
            block.append(r)
        else:
            yield r, state.update(x_row(r.x), r.y, r.t)
    if block:
        yield from _replay_block(state, block, x_row)


def _replay_block(state: State, block: list[Any], x_row: Any) -> Iterator[tuple[Any, Step]]:
    times = None if block[0].t is None else np.array([r.t for r in block], dtype=np.float64)
    steps = state.update_block(np.array([x_row(r.x) for r in block]), np.array([r.y for r in block], dtype=np.float64),
                               times)
    return zip(block, steps)


def replay(state: State, monitor: ResidualMonitor, rows: Iterable[Any], x_row: Any) -> int | None:
    """Re-apply log rows (applied and gated) to ``state`` and ``monitor``; returns the last seq.

    Gated rows are not applied: the gate decision is read from the log, never recomputed,
    so the monitor reaches exactly the counts it had.  Events are not produced again.
    """
    last = None
    for r, step in replayed_steps(state, rows, x_row):
        if step is None:
            gated = a_priori(state, x_row(r.x), r.y, r.t)
            monitor.record_gated(gated if gated is not None else Step(0.0, 0.0, None, None, None, 1.0), r.seq)
        else:
            monitor.observe(step, r.seq, state)
        last = r.seq
    monitor.events.clear()
    return last


def reference_event(monitor: ResidualMonitor, seq: int, what: str) -> dict[str, Any]:
    """An event row recording a reference move, a reset or a restore (with the status after it)."""
    st = monitor.status()
    return {"seq": seq, "status": st["status"], "previous": None, "statistic": what, "value": None,
            "threshold": None, "since": None, "reasons": st["reasons"], "reference": monitor.reference_view()}


# ---------------------------------------------------------------------------- whole-state changes
def _record(conn: Any, live: Any, monitor: ResidualMonitor, seq: int, at: float, what: str) -> bytes:
    from leastwise.store import drift as drift_store

    ref = monitor.reference
    drift_store.set_reference(conn, live.id, ref["kind"], ref.get("snapshot"), int(ref["seq"]),
                              int(ref.get("version") or 0), float(ref.get("at") or at))
    drift_store.insert_events(conn, live.id, [reference_event(monitor, seq, what)], at)
    return monitor.to_bytes()


def after_reset(conn: Any, live: Any, _drift_bytes: bytes, version: int, seq: int, at: float) -> bytes:
    """Reset: fresh detectors; the reference point moves to the reset."""
    mon = ResidualMonitor.for_model(live.config, kind="reset", seq=seq, version=version, at=at)
    return _record(conn, live, mon, seq, at, "reset")


def after_restore(snapshot_id: int):
    """Restore: the statistics, alarms and reference come back as they were in the snapshot."""

    def hook(conn: Any, live: Any, drift_bytes: bytes, version: int, seq: int, at: float) -> bytes:
        mon = ResidualMonitor.from_bytes(drift_bytes, live.config.forgetting) if drift_bytes else \
            ResidualMonitor.for_model(live.config)
        mon.lineage_version = version
        mon.restored_from = snapshot_id
        mon.seq = seq
        return _record(conn, live, mon, seq, at, "restore")

    return hook


def parse_reference_body(body: Any) -> int | None:
    """``{}`` (now) or ``{"snapshot": id}``; raises InvalidInput otherwise."""
    from .errors import InvalidInput

    if body is None or body == {}:
        return None
    if not isinstance(body, dict) or any(k != "snapshot" for k in body):
        raise InvalidInput.at("", 'the body must be {} (reference = now) or {"snapshot": id}')
    sid = body.get("snapshot")
    if sid is None:
        return None
    if isinstance(sid, bool) or not isinstance(sid, int) or not 0 < sid < 2**62:
        raise InvalidInput.at("/snapshot", "must be a positive integer snapshot id")
    return sid


def move_reference(snapshot_id: int | None, name: str):
    """The ``make`` and ``drift`` callbacks of the registry's state replacement for a reference move."""
    from leastwise.store import queries as q

    from .errors import NotFound

    picked: dict[str, Any] = {}

    def make(conn: Any, live: Any) -> tuple[bytes, bytes]:
        if snapshot_id is not None:
            snap = q.get_snapshot(conn, live.id, snapshot_id)
            if snap is None:
                raise NotFound(f"model {name!r} has no snapshot {snapshot_id}")
            picked["snap"] = snap
        return live.state.to_bytes(), live.monitor.to_bytes()

    def hook(conn: Any, live: Any, drift_bytes: bytes, version: int, seq: int, at: float) -> bytes:
        mon = ResidualMonitor.from_bytes(drift_bytes, live.config.forgetting)
        snap = picked.get("snap")
        if snap is None:
            mon.set_reference("now", seq, version, at, estimate=live.state, nested=True, n=live.state.n)
        else:
            est = State.from_bytes(snap.state)
            # an earlier state of this stream: taken since the engine state last started afresh, or restored from
            nested = (snap.version >= mon.lineage_version or snap.id == mon.restored_from) and est.n <= live.state.n
            mon.set_reference("snapshot", seq, version, at, estimate=est, snapshot=snap.id, nested=nested, n=est.n)
        mon.seq = seq
        return _record(conn, live, mon, seq, at, "reference")

    return make, hook


class _Unavailable(Exception):
    """The history cannot be recomputed (the message says why)."""


def history(conn: Any, live: Any, limit: int = 200_000) -> dict[str, Any]:
    """The batch BDE CUSUM and CUSUM of squares with their lines since the reference point.

    Recomputed by replaying the log from the checkpoint written when the reference was set
    (model start, reset, or reference move); unavailable when that checkpoint or log was compacted,
    or when the reference predates the last restore.
    """
    from leastwise.drift import cusum, cusum_bounds, cusum_squares, cusum_squares_bounds
    from leastwise.store import drift as drift_store

    mon: ResidualMonitor = live.monitor
    ref = mon.reference
    version = int(ref.get("version") or 0)
    if version < mon.lineage_version:
        return {"available": False, "reason": "the reference point predates the last restore"}
    cp = drift_store.checkpoint_at(conn, live.id, version)
    if cp is None:
        return {"available": False, "reason": "the checkpoint of the reference point was compacted away"}
    state = State.from_bytes(cp.state)
    seqs: list[int] = []
    ws: list[float] = []

    def contiguous(rows: Iterable[Any]) -> Iterator[Any]:
        expected, applied = cp.seq, 0
        for r in rows:
            expected += 1
            if r.seq != expected:
                raise _Unavailable("log rows since the reference point were compacted away")
            applied += r.status == "applied"
            if applied > limit:
                raise _Unavailable(f"more than {limit} observations since the reference point")
            yield r

    try:
        logged = contiguous(drift_store.log_rows_after(conn, live.id, cp.seq, upto=live.seq))
        for r, step in replayed_steps(state, logged, lambda b: np.frombuffer(b, dtype="<f8")):
            if step is not None and step.recursive_residual is not None:
                seqs.append(r.seq)
                ws.append(step.recursive_residual)
    except _Unavailable as exc:
        return {"available": False, "reason": str(exc)}
    m = len(ws)
    out: dict[str, Any] = {"available": True, "m": m, "seq": seqs, "recursive_residuals": ws,
                           "approximate": mon.forgets}
    if m >= 2 and np.std(ws, ddof=1) > 0:
        w = np.asarray(ws)
        j = np.arange(1, m + 1)
        lo5, hi5 = cusum_bounds(m, 0.05, points=j)
        lo1, hi1 = cusum_bounds(m, 0.01, points=j)
        out["cusum"] = {"values": cusum(w).tolist(), "lower_5pct": lo5.tolist(), "upper_5pct": hi5.tolist(),
                        "lower_1pct": lo1.tolist(), "upper_1pct": hi1.tolist()}
        sq = cusum_squares(w)
        if np.isfinite(sq).all():
            lo, hi = cusum_squares_bounds(m, 0.05, points=j)
            out["cusum_squares"] = {"values": sq.tolist(), "lower_5pct": lo.tolist(), "upper_5pct": hi.tolist()}
    return _clean(out)
