"""The write path's fast drift code against the code it replaced, bit for bit.

``DriftState.observe`` now returns its signature, ``ResidualMonitor.observe`` uses it
and skips building the status when the (statistic, level) pairs did not change, the
gate is inlined in ``advance`` and ``a_priori`` reads the factor once.  The reference
classes below hold the previous code verbatim; after every observation of many
streams (shifts, scale changes, outliers and the gate, forgetting, half-life, ridge,
unlatched alarms, BDE alarms, a short warm-up) the statistics, the stored bytes, the
status changes and the events must be identical.
"""

from __future__ import annotations

import math
import random

import numpy as np
import orjson
import pytest

from leastwise.drift import DriftConfig, DriftState
from leastwise.drift.state import _L_BDE, _L_DOWN, _L_SCALE, _L_UP
from leastwise.engine import State
from leastwise.models import ModelConfig
from leastwise.models.drift import ResidualMonitor, a_priori
from leastwise.models.inputs import parse_observations


# ---------------------------------------------------------------------------- the previous code
class _RefDriftState(DriftState):
    __slots__ = ()

    def observe(self, recursive_residual, sigma, index=None):  # noqa: C901 - verbatim
        t = self._t + 1 if index is None else index
        self._t = t
        self._n_obs += 1
        w = recursive_residual
        if sigma is None or not (0.0 < sigma < math.inf) or w - w != 0.0:
            return
        w = float(w)
        m = self._m + 1
        self._m = m
        d = w - self._mean
        mean = self._mean + d / m
        m2 = self._m2 + d * (w - mean)
        s = self._sum + w
        self._mean = mean
        self._m2 = m2
        self._sum = s
        self._sumsq += w * w
        if m <= self._warm:
            return
        lhs = s * s * (m - 1)
        rhs = m * m2
        if lhs > self._c2w * rhs:
            if self._bde_w_since < 0:
                self._bde_w_since = t
            if lhs > self._c2a * rhs:
                if self._bde_a_since < 0:
                    self._bde_a_since = t
                    if self._latch_on and self._latch_code == 0:
                        self._latch(_L_BDE, math.sqrt(lhs / m2) if m2 > 0.0 else math.inf,
                                    math.sqrt(self._c2a * m), t, t)
            else:
                self._bde_a_since = -1
        else:
            self._bde_w_since = -1
            self._bde_a_since = -1
        z = w / float(sigma)
        self._nz += 1
        k = self._k
        cp = self._cp + z - k
        if cp > 0.0:
            if self._cp_since < 0:
                self._cp_since = t
            if cp > self._ha and self._latch_on and self._latch_code == 0:
                self._latch(_L_UP, cp, self._ha, t, self._cp_since)
        else:
            cp = 0.0
            self._cp_since = -1
        self._cp = cp
        cn = self._cn - z - k
        if cn > 0.0:
            if self._cn_since < 0:
                self._cn_since = t
            if cn > self._ha and self._latch_on and self._latch_code == 0:
                self._latch(_L_DOWN, cn, self._ha, t, self._cn_since)
        else:
            cn = 0.0
            self._cn_since = -1
        self._cn = cn
        a = self._ea
        b = self._bias + a * (z - self._bias)
        self._bias = b
        if b > self._blim or -b > self._blim:
            if self._bias_since < 0:
                self._bias_since = t
        else:
            self._bias_since = -1
        q = self._msq + a * (z * z - self._msq)
        self._msq = q
        if q > self._s2w_hi or q < self._s2w_lo:
            if self._scale_w_since < 0:
                self._scale_w_since = t
            if q > self._s2a_hi or q < self._s2a_lo:
                if self._scale_a_since < 0:
                    self._scale_a_since = t
                    if self._latch_on and self._latch_code == 0:
                        thr = self.config.scale_alarm
                        self._latch(_L_SCALE, math.sqrt(q), thr if q > 1.0 else 1.0 / thr, t, t)
            else:
                self._scale_a_since = -1
        else:
            self._scale_w_since = -1
            self._scale_a_since = -1


class _RefMonitor(ResidualMonitor):
    __slots__ = ()

    def observe(self, step, seq=None, state=None):
        self.seq = seq = self.seq + 1 if seq is None else seq
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
            det.observe(math.nan, None, seq)
        elif z is None and det.n_used < det.config.warmup:
            det.observe(w, 1.0, seq)
        else:
            det.observe(w, (w / z) if (z is not None and z != 0.0) else (1.0 if z is not None else None), seq)
        if self.gated_run:
            self.gated_run = 0
            self.gated_run_since = -1
        if self.forgets and state is not None:
            self.roll_decay *= step.decay
            if self.roll_decay <= 0.5 or self.lag_factor is None:
                self._roll(state, seq)
        return self._changed(seq)

    def gate(self, state, x, y, t):
        g = self.settings.get("gate")
        if g is None or self.detector.n_used < self.detector.config.warmup:
            return None
        step = a_priori(state, x, y, t)  # the gate's step is the engine's (State.preview)
        if step is None or not abs(step.standardized_residual) > g:
            return None
        return step

    def advance(self, state, x, y, t, seq):
        gated = self.gate(state, x, y, t) if self.settings.get("gate") is not None else None
        if gated is not None:
            return gated, "gated", self.record_gated(gated, seq)
        step = state.update(x, y, t)
        return step, "applied", self.observe(step, seq, state)

    def _changed(self, seq, sig=None):
        from leastwise.models.drift import ALARM, _event

        sig = self._signature()
        if sig == self._sig:
            return None
        self._sig = sig
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


def _reference_of(mon: ResidualMonitor) -> _RefMonitor:
    ref = _RefMonitor.from_bytes(mon.to_bytes(), mon.forgetting)
    ref.detector = _RefDriftState.from_bytes(mon.detector.to_bytes())
    ref._refresh()
    return ref


# ---------------------------------------------------------------------------- DriftState
DETECTOR_CONFIGS = {
    "default": DriftConfig(),
    "short": DriftConfig(warmup=2, cusum_h_watch=2.0, cusum_h_alarm=4.0, scale_watch=1.2, scale_alarm=1.4,
                         bias_limit=1.0, ewma_alpha=0.1),
    "bde_alarm": DriftConfig(bde_alpha_alarm=0.01, bde_alpha_watch=0.10, warmup=5),
    "unlatched": DriftConfig(latch=False, bde_alpha_alarm=0.05, warmup=3, cusum_h_watch=3.0, cusum_h_alarm=5.0),
    "forgetting": DriftConfig(forgetting_factor=0.98),
}


def _residual_stream(seed: int, n: int):
    """Recursive residuals and sigmas with shifts, scale changes, gaps (None, NaN) and odd values."""
    rng = random.Random(seed)
    out = []
    for i in range(n):
        phase = (i // 150) % 6
        w = rng.gauss((0.0, 0.8, -0.8, 0.0, 0.0, 0.3)[phase], (1.0, 1.0, 1.0, 2.5, 0.3, 1.0)[phase])
        sigma: float | None = 1.0 + 0.1 * rng.random()
        r = rng.random()
        if r < 0.01:
            sigma = None
        elif r < 0.015:
            w = math.nan
        elif r < 0.02:
            sigma = 0.0
        elif r < 0.025:
            w = 0.0
        elif r < 0.03:
            w, sigma = 3, 2  # ints
        if i == n - 50:
            w, sigma = 1e300, 1e-10  # z overflows to inf (and the EWMAs to NaN from here on)
        out.append((w, sigma))
    return out


@pytest.mark.parametrize("name", list(DETECTOR_CONFIGS))
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_drift_state_observe_matches_the_previous_code(name, seed):
    cfg = DETECTOR_CONFIGS[name]
    new, old = DriftState(cfg), _RefDriftState(cfg)
    seen_keys = set()
    for i, (w, sigma) in enumerate(_residual_stream(seed, 1800)):
        if i == 1000:  # a reference move in the middle
            new.reset()
            old.reset()
        index = None if i % 3 else 10 * i
        sig = new.observe(w, sigma, index)
        old.observe(w, sigma, index)
        assert new.to_bytes() == old.to_bytes(), i
        assert sig == new.signature() == old.signature(), i
        keys = frozenset((r.statistic, r.level) for r in new.status().reasons)
        assert new.reason_keys() == keys, i
        seen_keys |= keys
    assert repr(new.report()) == repr(old.report())  # NaN-safe
    assert seen_keys  # the streams do raise watches and alarms


def test_reason_keys_with_a_latched_alarm_that_is_also_current():
    s = DriftState(DriftConfig(warmup=2))
    for _ in range(300):
        s.observe(2.0, 1.0)
    st = s.status()
    assert st.status == "alarm"
    assert s.reason_keys() == frozenset((r.statistic, r.level) for r in st.reasons)
    # constant residuals: BDE has zero spread (no bde_cusum reason although its flags are set)
    c = DriftState(DriftConfig(warmup=2))
    for _ in range(30):
        c.observe(1.0, 1.0)
    assert c.bde_cusum() is None
    assert c.reason_keys() == frozenset((r.statistic, r.level) for r in c.status().reasons)


# ---------------------------------------------------------------------------- ResidualMonitor
FEATS = ["load", "temp", "flow"]
MODEL_CONFIGS = {
    "ols": {"features": FEATS},
    "forgetting": {"features": FEATS, "forgetting": 0.98},
    "half_life": {"features": FEATS, "half_life": 600.0},
    "ridge": {"features": FEATS, "ridge": 2.0, "intercept": False},
    "gate": {"features": FEATS, "drift": {"gate": 3.5}},
    "gate_run": {"features": FEATS, "drift": {"gate": 2.5, "gate_run": 2, "warmup": 5}},
    "unlatched": {"features": FEATS, "drift": {"latch": False, "bde_alpha_alarm": 0.05, "cusum_h_watch": 4.0,
                                                "cusum_h_alarm": 6.0}},
    "erosion": {"features": FEATS, "forgetting": 0.95, "drift": {"erosion_renewal": 0.9}},
}


def _stream(seed: int, n: int, dim: int):
    rng = np.random.default_rng(seed)
    beta = rng.normal(size=dim)
    obs = []
    for i in range(n):
        x = rng.normal(size=dim)
        if i > n // 2:
            x[-1] *= 0.01  # excitation fades in one direction (erosion under forgetting)
        e = rng.normal() * (2.5 if (i // 200) % 4 == 2 else 1.0)
        if (i // 200) % 4 == 1:
            e += 0.9
        if rng.random() < 0.03:
            e += rng.choice([-25.0, 25.0])
        obs.append((x.tolist(), float(x @ beta + e), 1.7e9 + 5.0 * i + (3600.0 if i >= n // 3 else 0.0)))
    return obs


@pytest.mark.parametrize("name", list(MODEL_CONFIGS))
def test_monitor_matches_the_previous_code(name):
    cfg = ModelConfig.parse(MODEL_CONFIGS[name])
    state_new, state_old = State(cfg.spec()), State(cfg.spec())
    new = ResidualMonitor.for_model(cfg)
    old = _reference_of(new)
    half_life = cfg.half_life is not None
    changes = 0
    statuses = set()
    for seq, (x, y, t) in enumerate(_stream(7, 1600, len(FEATS)), start=1):
        if seq == 900:  # a reference move: everything starts afresh
            for m, s in ((new, state_new), (old, state_old)):
                m.set_reference("now", seq - 1, 3, None, estimate=s, nested=True, n=s.n)
        row = ([1.0] if cfg.intercept else []) + x
        tt = t if half_life else None
        a = new.advance(state_new, np.array(row), y, tt, seq)
        b = old.advance(state_old, row, y, tt, seq)  # the previous path: a list, checked by the engine
        assert a[0] == b[0] and a[1] == b[1], seq
        assert orjson.dumps(a[2]) == orjson.dumps(b[2]), seq
        assert new.to_bytes() == old.to_bytes(), seq
        assert new.take_events() == old.take_events(), seq
        assert new._keys == new._reason_keys(), seq
        changes += a[2] is not None
        statuses.add(new._level)
    assert state_new.to_bytes() == state_old.to_bytes()
    assert orjson.dumps(new.report(cfg, state_new)) == orjson.dumps(old.report(cfg, state_old))
    assert changes >= 1 and len(statuses) >= 2


def test_a_priori_is_the_step_the_update_reports():
    """The gate decides on State.preview: the very step update() then reports, bit for bit; nothing changes."""
    for name in ("ols", "half_life", "ridge", "forgetting"):
        cfg = ModelConfig.parse(MODEL_CONFIGS[name])
        state = State(cfg.spec())
        standardised = 0
        for i, (x, y, t) in enumerate(_stream(3, 300, len(FEATS))):
            row = np.array(([1.0] if cfg.intercept else []) + x)
            tt = t if cfg.half_life is not None else None
            before = state.to_bytes()
            seen = a_priori(state, row, y, tt)
            assert a_priori(state, row.tolist(), y, tt) == seen
            assert state.to_bytes() == before
            step = state.update(row, y, tt)
            if step.standardized_residual is None:
                assert seen is None, (name, i)
            else:
                assert seen == step, (name, i)
                standardised += 1
        assert standardised > 250  # past the start-up phase every step is standardised


def test_registry_flow_with_parsed_rows_equals_the_list_path():
    """parse_observations -> advance with the parsed float64 rows gives what lists gave."""
    cfg = ModelConfig.parse({"features": FEATS, "forgetting": 0.99, "drift": {"gate": 4.0}})
    data = _stream(11, 1200, len(FEATS))
    body = orjson.loads(orjson.dumps({"observations": [{"x": x, "y": y} for x, y, _ in data]}))
    obs, _ = parse_observations(body, cfg, 10_000)
    s1, s2 = State(cfg.spec()), State(cfg.spec())
    m1 = ResidualMonitor.for_model(cfg)
    m2 = _reference_of(m1)
    for seq, (o, (x, y, _)) in enumerate(zip(obs, data), start=1):
        assert type(o.x) is np.ndarray and np.asarray(o.x, dtype="<f8").tobytes() == np.array([1.0] + x).tobytes()
        a = m1.advance(s1, o.x, o.y, None, seq)
        b = m2.advance(s2, [1.0] + x, y, None, seq)
        assert (a[0], a[1], orjson.dumps(a[2])) == (b[0], b[1], orjson.dumps(b[2])), seq
    assert s1.to_bytes() == s2.to_bytes() and m1.to_bytes() == m2.to_bytes()
