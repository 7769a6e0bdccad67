"""Streaming drift state over the recursive-residual stream of one model.

One :class:`DriftState` per model.  Feed it every recursive residual in order
with :meth:`DriftState.observe`; ask :meth:`DriftState.status` for
"ok" / "watch" / "alarm" with reasons, :meth:`DriftState.report` for all
statistics.  Memory and time per observation are O(1); ``observe`` is plain
Python float arithmetic (no numpy).

What is used
------------
``observe(w, sigma)`` takes the recursive residual
``w_t = (y_t - x_t' b_{t-1}) / sqrt(1 + x_t' A_{t-1}^{-1} x_t)`` and ``sigma``,
the model's residual standard deviation *before* the update (``s_{t-1}``).
Under a stable model (OLS, normal errors) ``w_t`` is independent of
``w_1..w_{t-1}`` and so of ``s_{t-1}``, which makes ``z_t = w_t / s_{t-1}``
exactly Student-t with the model's residual degrees of freedom (Brown, Durbin &
Evans 1975, sec. 2.2).  ``sigma=None`` (or a non-finite / non-positive value,
or a non-finite residual) means "not yet estimable": the observation is
counted in ``n_observed`` but used by no statistic.

Detectors (each documented in its own module):

* ``mean_cusum`` - two-sided tabular CUSUM on ``z`` (Page 1954; Montgomery,
  :mod:`leastwise.drift.tabular`), reference ``k`` and interval ``h`` in sigma
  units.  "since" = start of the current run (change-point estimate).
* ``bde_cusum`` - BDE (1975) CUSUM of recursive residuals, streaming form (see
  below): "watch" at the 5 % line; "alarm" only if ``bde_alpha_alarm`` is set.
* ``bias`` - EWMA of ``z`` (:mod:`leastwise.drift.ewma`), watch only, limit
  ``L * sqrt(alpha / (2 - alpha))``.
* ``scale_ratio`` - ``sqrt(EWMA of z^2)``, observed scale over model sigma;
  watch/alarm when outside ``[1/r, r]``.

The z-based detectors (mean_cusum, bias, scale_ratio) start after ``warmup``
used observations (so that the early, few-degrees-of-freedom sigma does not
load them); BDE accumulates from the first used residual and is checked after
``warmup`` too.

Streaming BDE CUSUM
-------------------
``sigma_hat`` in streaming is the running sample standard deviation (ddof=1,
about the running mean, Welford's update) of the used recursive residuals
since the last reset, so ``W_m = S_m / s_m`` with ``S_m`` their sum.  At the
last observation this equals the batch value
(:func:`leastwise.drift.cusum.cusum`), i.e. statsmodels' ``cusum[-1]``.

The BDE line at position j needs the final horizon T.  The stream uses the
*current horizon* T = now: the test is "would the BDE test on the sample so
far reject at its final point", i.e. ``|W_m| > a sqrt(m) + 2a m / sqrt(m) =
3a sqrt(m)``.  That is checked in O(1) without square roots as
``S^2 (m-1) > 9 a^2 m M2``.  It is the least stringent point of each batch
band, so a single look has size below alpha (3a = 2.84 and 3.43 sigma for 5 %
and 1 %), but it is looked at after every observation: by the law of the
iterated logarithm the chance of ever crossing grows (slowly, like
log log n) with the stream length.  It is a monitoring rule, not a
fixed-size test; the defaults were checked by simulation (see docs/drift.md).
Run the batch form on stored residuals for a fixed-size retrospective test.

CUSUM of squares has no O(1) streaming form (its denominator is the final
total); changes of scale are watched by ``scale_ratio``.

Forgetting
----------
All null laws above are for ordinary least squares.  Under exponential
forgetting (factor lambda) the recursive residuals are only approximately
independent with common variance, and the model's sigma has about
``effective_n - p`` degrees of freedom, with Kish's effective sample size
``effective_n = (1 + lambda) / (1 - lambda)`` (sum of weights squared over sum
of squared weights for weights lambda^i).  Pass ``forgetting_factor`` or
``effective_n`` in :class:`DriftConfig`: the figures are then reported with
``approximate=True``.  Thresholds are not changed.
"""

from __future__ import annotations

import math
import struct
from dataclasses import asdict, dataclass

from ..slots import slot_copier
from .cusum import bde_constant

_INF = math.inf

STATUS_OK = "ok"
STATUS_WATCH = "watch"
STATUS_ALARM = "alarm"


@dataclass(frozen=True)
class DriftConfig:
    """Thresholds of the drift detectors (all in sigma units where that applies)."""

    #: tabular CUSUM reference value k (half the mean shift to detect fastest).
    cusum_k: float = 0.25
    #: tabular CUSUM decision interval h for "watch".
    cusum_h_watch: float = 15.0
    #: tabular CUSUM decision interval h for "alarm".
    cusum_h_alarm: float = 25.0
    #: BDE significance level of the "watch" line (0.10, 0.05 or 0.01).
    bde_alpha_watch: float = 0.05
    #: BDE level of an "alarm" line (0.10, 0.05, 0.01), or None: BDE only raises "watch".
    #: None by default: under continuous monitoring even the 1 % line alarms on
    #: about 2 % of stable 2,000-observation streams (repeated looks).
    bde_alpha_alarm: float | None = None
    #: EWMA smoothing alpha for bias and scale ratio (span 1/alpha observations).
    ewma_alpha: float = 0.02
    #: bias "watch" limit L, in units of the EWMA's null sd sqrt(alpha/(2-alpha)).
    bias_limit: float = 4.0
    #: scale ratio "watch" when outside [1/r, r].
    scale_watch: float = 1.5
    #: scale ratio "alarm" when outside [1/r, r].
    scale_alarm: float = 2.0
    #: used observations before any detector is checked (z-detectors start after it).
    warmup: int = 20
    #: keep an alarm until reset() once it has fired.
    latch: bool = True
    #: forgetting factor lambda of the model (None or 1.0: none).
    forgetting_factor: float | None = None
    #: effective sample size under forgetting (overrides the one from lambda).
    effective_n: float | None = None

    def __post_init__(self) -> None:
        pos = ("cusum_k", "cusum_h_watch", "cusum_h_alarm", "bias_limit")
        for name in pos:
            v = getattr(self, name)
            if not (isinstance(v, (int, float)) and math.isfinite(v) and v > 0):
                raise ValueError(f"{name} must be a positive finite number")
        if not 0.0 < self.ewma_alpha <= 1.0:
            raise ValueError("ewma_alpha must be in (0, 1]")
        if not (1.0 < self.scale_watch <= self.scale_alarm and math.isfinite(self.scale_alarm)):
            raise ValueError("need 1 < scale_watch <= scale_alarm < inf")
        if self.cusum_h_watch > self.cusum_h_alarm:
            raise ValueError("cusum_h_watch must not exceed cusum_h_alarm")
        bde_constant(self.bde_alpha_watch)
        if self.bde_alpha_alarm is not None:
            bde_constant(self.bde_alpha_alarm)
        if not (isinstance(self.warmup, int) and 2 <= self.warmup < 2**31):
            raise ValueError("warmup must be an integer >= 2")
        lam = self.forgetting_factor
        if lam is not None and not 0.0 < lam <= 1.0:
            raise ValueError("forgetting_factor must be in (0, 1]")
        en = self.effective_n
        if en is not None and not (math.isfinite(en) and en > 0):
            raise ValueError("effective_n must be positive and finite")

    @property
    def approximate(self) -> bool:
        """True when the null distributions are only approximate (forgetting)."""
        lam = self.forgetting_factor
        return self.effective_n is not None or (lam is not None and lam < 1.0)

    def effective_sample_size(self) -> float | None:
        """Kish effective sample size (1+lambda)/(1-lambda), or the given effective_n."""
        if self.effective_n is not None:
            return float(self.effective_n)
        lam = self.forgetting_factor
        if lam is None or lam >= 1.0:
            return None
        return (1.0 + lam) / (1.0 - lam)


@dataclass(frozen=True)
class Reason:
    """Why a status is not "ok"."""

    statistic: str  #: "mean_cusum_up", "mean_cusum_down", "bde_cusum", "bias", "scale_ratio"
    level: str  #: "watch" or "alarm"
    value: float
    threshold: float
    since: int  #: observation index (see DriftState) since when
    latched: bool = False  #: an alarm kept from the past (value/threshold as when it fired)
    approximate: bool = False  #: null law only approximate (forgetting)


@dataclass(frozen=True)
class DriftStatus:
    status: str  #: "ok" | "watch" | "alarm"
    reasons: tuple[Reason, ...]


# latch codes
_L_NONE, _L_UP, _L_DOWN, _L_BDE, _L_SCALE = 0, 1, 2, 3, 4
_LATCH_NAMES = {_L_UP: "mean_cusum_up", _L_DOWN: "mean_cusum_down", _L_BDE: "bde_cusum",
                _L_SCALE: "scale_ratio"}

# serialised layout
_MAGIC = b"LWDS"
_VERSION = 1
_CFG_FLOATS = ("cusum_k", "cusum_h_watch", "cusum_h_alarm", "bde_alpha_watch", "ewma_alpha", "bias_limit", "scale_watch", "scale_alarm")
# float state: order is the wire format
_F_STATE = ("_mean", "_m2", "_sum", "_sumsq", "_cp", "_cn", "_bias", "_msq",
            "_latch_value", "_latch_threshold")
# int state
_I_STATE = ("_t", "_ref", "_n_obs", "_m", "_nz", "_cp_since", "_cn_since",
            "_bde_w_since", "_bde_a_since", "_bias_since", "_scale_w_since", "_scale_a_since",
            "_latch_code", "_latch_t", "_latch_since")
_HEAD = struct.Struct("<4sH")
_BODY = struct.Struct("<" + "d" * (len(_CFG_FLOATS) + 3 + len(_F_STATE))
                      + "q" * (5 + len(_I_STATE)))


class DriftState:
    """Accumulators of all drift detectors for one residual stream.

    Observation indices: ``index`` passed to :meth:`observe`, or else a
    counter of observations seen by this state, 1-based, not reset by
    :meth:`reset` (so "since" stays comparable across resets).
    """

    __slots__ = ("config", "_k", "_hw", "_ha", "_c2w", "_c2a", "_ea", "_blim",
                 "_s2w_hi", "_s2w_lo", "_s2a_hi", "_s2a_lo", "_warm", "_latch_on") + _F_STATE + _I_STATE

    def __init__(self, config: DriftConfig | None = None) -> None:
        self.config = config if config is not None else DriftConfig()
        self._derive()
        self._t = 0
        self.reset()

    # -- set-up -----------------------------------------------------------------
    def _derive(self) -> None:
        c = self.config
        self._k = float(c.cusum_k)
        self._hw = float(c.cusum_h_watch)
        self._ha = float(c.cusum_h_alarm)
        aw = 3.0 * bde_constant(c.bde_alpha_watch)
        self._c2w = aw * aw
        if c.bde_alpha_alarm is None:
            self._c2a = math.inf  # never crossed
        else:
            aa = 3.0 * bde_constant(c.bde_alpha_alarm)
            self._c2a = aa * aa
        self._ea = float(c.ewma_alpha)
        self._blim = c.bias_limit * math.sqrt(c.ewma_alpha / (2.0 - c.ewma_alpha))
        self._s2w_hi = c.scale_watch * c.scale_watch
        self._s2w_lo = 1.0 / self._s2w_hi
        self._s2a_hi = c.scale_alarm * c.scale_alarm
        self._s2a_lo = 1.0 / self._s2a_hi
        self._warm = int(c.warmup)
        self._latch_on = bool(c.latch)

    def reset(self) -> None:
        """Start a new reference point: clear every accumulator and alarm.

        The observation counter keeps running; ``reference_index`` records where
        the new reference starts.
        """
        self._ref = self._t
        self._n_obs = 0  # observations seen since reset (used or not)
        self._m = 0  # used observations since reset
        self._nz = 0  # observations fed to the z-detectors
        self._mean = 0.0
        self._m2 = 0.0
        self._sum = 0.0
        self._sumsq = 0.0
        self._cp = 0.0
        self._cn = 0.0
        self._bias = 0.0
        self._msq = 1.0
        self._cp_since = -1
        self._cn_since = -1
        self._bde_w_since = -1
        self._bde_a_since = -1
        self._bias_since = -1
        self._scale_w_since = -1
        self._scale_a_since = -1
        self._latch_code = _L_NONE
        self._latch_t = -1
        self._latch_since = -1
        self._latch_value = 0.0
        self._latch_threshold = 0.0

    # -- the hot path -------------------------------------------------------------
    def observe(self, recursive_residual: float, sigma: float | None, index: int | None = None) -> int:
        """Take one recursive residual ``w_t`` and the model's sigma before the update.

        ``sigma=None`` (not estimable yet): counted, not used.  Non-finite or
        non-positive sigma and non-finite residuals are treated the same way.

        Returns :meth:`signature` after the update (a caller watching for
        status changes needs no second call).
        """
        t = self._t + 1 if index is None else index
        self._t = t
        self._n_obs += 1
        w = recursive_residual
        if sigma is None or not (0.0 < sigma < _INF) or w - w != 0.0:
            return self.signature()
        if type(w) is not float:
            w = float(w)
        m = self._m + 1
        self._m = m
        # BDE accumulators (Welford running mean / M2, sum, sum of squares)
        mean = self._mean
        d = w - mean
        mean = mean + d / m
        m2 = self._m2 + d * (w - mean)
        s = self._sum + w
        self._mean = mean
        self._m2 = m2
        self._sum = s
        self._sumsq += w * w
        if m <= self._warm:
            return self.signature()
        # BDE streaming check, current horizon: S^2 (m-1) > (3a)^2 m M2
        lhs = s * s * (m - 1)
        rhs = m * m2
        if lhs > self._c2w * rhs:
            if self._bde_w_since < 0:
                self._bde_w_since = t
            if lhs > self._c2a * rhs:
                if self._bde_a_since < 0:
                    self._bde_a_since = t
                    if self._latch_on and self._latch_code == 0:
                        self._latch(_L_BDE, math.sqrt(lhs / m2) if m2 > 0.0 else _INF,
                                    math.sqrt(self._c2a * m), t, t)
            else:
                self._bde_a_since = -1
        else:
            self._bde_w_since = -1
            self._bde_a_since = -1
        # z-detectors
        z = w / (sigma if type(sigma) is float else float(sigma))
        self._nz += 1
        k = self._k
        ha = self._ha
        cp = self._cp + z - k
        if cp > 0.0:
            if self._cp_since < 0:
                self._cp_since = t
            if cp > ha and self._latch_on and self._latch_code == 0:
                self._latch(_L_UP, cp, ha, t, self._cp_since)
        else:
            cp = 0.0
            self._cp_since = -1
        self._cp = cp
        cn = self._cn - z - k
        if cn > 0.0:
            if self._cn_since < 0:
                self._cn_since = t
            if cn > ha and self._latch_on and self._latch_code == 0:
                self._latch(_L_DOWN, cn, ha, t, self._cn_since)
        else:
            cn = 0.0
            self._cn_since = -1
        self._cn = cn
        a = self._ea
        b = self._bias
        b = b + a * (z - b)
        self._bias = b
        if b > self._blim or -b > self._blim:
            if self._bias_since < 0:
                self._bias_since = t
        else:
            self._bias_since = -1
        q = self._msq
        q = q + a * (z * z - q)
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
        return self.signature()

    def _latch(self, code: int, value: float, threshold: float, t: int, since: int) -> None:
        self._latch_code = code
        self._latch_value = float(value) if math.isfinite(value) else 1.7976931348623157e308
        self._latch_threshold = float(threshold)
        self._latch_t = t
        self._latch_since = since

    # -- read-outs ----------------------------------------------------------------
    @property
    def n_observed(self) -> int:
        """Observations seen since the last reset (used or not)."""
        return self._n_obs

    @property
    def n_used(self) -> int:
        """Observations used since the last reset."""
        return self._m

    @property
    def index(self) -> int:
        """Index of the last observation."""
        return self._t

    @property
    def reference_index(self) -> int:
        """Index of the last observation before the current reference (reset) point."""
        return self._ref

    def bde_cusum(self) -> float | None:
        """Streaming BDE CUSUM ``W_m = S_m / s_m`` (None before 2 residuals or zero spread)."""
        if self._m < 2 or not self._m2 > 0.0:
            return None
        return self._sum / math.sqrt(self._m2 / (self._m - 1))

    def bde_line(self, alpha: float | None) -> float | None:
        """Current-horizon BDE line ``3 a sqrt(m)`` at level alpha."""
        if self._m < 1 or alpha is None:
            return None
        return 3.0 * bde_constant(alpha) * math.sqrt(self._m)

    def residual_std(self) -> float | None:
        """Running std (ddof=1) of the used recursive residuals: the streaming sigma_hat."""
        if self._m < 2:
            return None
        return math.sqrt(self._m2 / (self._m - 1))

    def scale_ratio(self) -> float:
        """sqrt(EWMA of z^2): observed residual scale over the model's sigma (1.0 at start)."""
        return math.sqrt(self._msq)

    def bias(self) -> float:
        """EWMA of the standardised residual (0.0 at start)."""
        return self._bias

    def mean_cusum(self) -> tuple[float, float]:
        """Tabular CUSUM statistics ``(C+, C-)`` in sigma units."""
        return self._cp, self._cn

    def signature(self) -> int:
        """Cheap fingerprint of :meth:`status`: the same value means the same status and reasons.

        O(1), no allocation: lets a caller skip building the status after every
        observation and only do so when the fingerprint changes.
        """
        code = self._latch_code
        if self._m > self._warm:
            cp, cn = self._cp, self._cn
            code |= ((cp > self._hw) + (cp > self._ha)) << 3
            code |= ((cn > self._hw) + (cn > self._ha)) << 5
            code |= ((self._bde_w_since >= 0) + (self._bde_a_since >= 0)) << 7
            code |= (self._bias_since >= 0) << 9
            code |= ((self._scale_w_since >= 0) + (self._scale_a_since >= 0)) << 10
            code |= (self._bias > 0.0) << 12 | 1 << 13
        return code

    def reason_keys(self) -> frozenset:
        """``{(statistic, level)}`` of :meth:`status`'s reasons, without building them.

        Same conditions as :meth:`status` (a latched alarm that is also current is one key).
        """
        keys = set()
        if self._latch_code != _L_NONE:
            keys.add((_LATCH_NAMES[self._latch_code], STATUS_ALARM))
        if self._m > self._warm:
            ha, hw = self._ha, self._hw
            for name, val in (("mean_cusum_up", self._cp), ("mean_cusum_down", self._cn)):
                if val > ha:
                    keys.add((name, STATUS_ALARM))
                elif val > hw:
                    keys.add((name, STATUS_WATCH))
            if self._m >= 2 and self._m2 > 0.0:  # bde_cusum() is not None
                if self._bde_a_since >= 0:
                    keys.add(("bde_cusum", STATUS_ALARM))
                elif self._bde_w_since >= 0:
                    keys.add(("bde_cusum", STATUS_WATCH))
            if self._bias_since >= 0:
                keys.add(("bias", STATUS_WATCH))
            if self._scale_a_since >= 0:
                keys.add(("scale_ratio", STATUS_ALARM))
            elif self._scale_w_since >= 0:
                keys.add(("scale_ratio", STATUS_WATCH))
        return frozenset(keys)

    def status(self) -> DriftStatus:
        """Current status and its reasons (alarms first)."""
        c = self.config
        approx = c.approximate
        reasons: list[Reason] = []
        checked = self._m > self._warm
        if self._latch_code != _L_NONE:
            reasons.append(Reason(_LATCH_NAMES[self._latch_code], STATUS_ALARM, self._latch_value,
                                  self._latch_threshold, self._latch_since, True, approx))
        if checked:
            for name, val, since in (("mean_cusum_up", self._cp, self._cp_since),
                                     ("mean_cusum_down", self._cn, self._cn_since)):
                if val > self._ha:
                    reasons.append(Reason(name, STATUS_ALARM, val, self._ha, since, False, approx))
                elif val > self._hw:
                    reasons.append(Reason(name, STATUS_WATCH, val, self._hw, since, False, approx))
            W = self.bde_cusum()
            if W is not None:
                if self._bde_a_since >= 0:
                    reasons.append(Reason("bde_cusum", STATUS_ALARM, W, self.bde_line(c.bde_alpha_alarm),
                                          self._bde_a_since, False, approx))
                elif self._bde_w_since >= 0:
                    reasons.append(Reason("bde_cusum", STATUS_WATCH, W, self.bde_line(c.bde_alpha_watch),
                                          self._bde_w_since, False, approx))
            if self._bias_since >= 0:
                reasons.append(Reason("bias", STATUS_WATCH, self._bias,
                                      self._blim if self._bias > 0 else -self._blim,
                                      self._bias_since, False, approx))
            r = math.sqrt(self._msq)
            if self._scale_a_since >= 0:
                thr = c.scale_alarm if r > 1.0 else 1.0 / c.scale_alarm
                reasons.append(Reason("scale_ratio", STATUS_ALARM, r, thr, self._scale_a_since, False, approx))
            elif self._scale_w_since >= 0:
                thr = c.scale_watch if r > 1.0 else 1.0 / c.scale_watch
                reasons.append(Reason("scale_ratio", STATUS_WATCH, r, thr, self._scale_w_since, False, approx))
        # de-duplicate a latched alarm that is also current
        if reasons and reasons[0].latched:
            cur = [x for x in reasons[1:] if x.statistic == reasons[0].statistic and x.level == STATUS_ALARM]
            if cur:
                reasons.pop(0)
        reasons.sort(key=lambda x: 0 if x.level == STATUS_ALARM else 1)
        if any(x.level == STATUS_ALARM for x in reasons):
            s = STATUS_ALARM
        elif reasons:
            s = STATUS_WATCH
        else:
            s = STATUS_OK
        return DriftStatus(s, tuple(reasons))

    def report(self) -> dict:
        """All statistics as a JSON-ready dict (None where undefined; never NaN/inf)."""
        st = self.status()
        c = self.config
        W = self.bde_cusum()
        return {
            "status": st.status,
            "reasons": [asdict(r) for r in st.reasons],
            "index": self._t,
            "reference_index": self._ref,
            "n_observed": self._n_obs,
            "n_used": self._m,
            "warming_up": self._m <= self._warm,
            "approximate": c.approximate,
            "effective_n": c.effective_sample_size(),
            "mean_cusum": {"up": self._cp, "down": self._cn, "k": c.cusum_k,
                           "h_watch": c.cusum_h_watch, "h_alarm": c.cusum_h_alarm,
                           "up_since": self._cp_since if self._cp_since >= 0 else None,
                           "down_since": self._cn_since if self._cn_since >= 0 else None},
            "bde_cusum": {"value": W, "sigma_hat": self.residual_std(),
                          "line_watch": self.bde_line(c.bde_alpha_watch),
                          "line_alarm": self.bde_line(c.bde_alpha_alarm),
                          "alpha_watch": c.bde_alpha_watch, "alpha_alarm": c.bde_alpha_alarm},
            "bias": {"value": self._bias, "limit": self._blim, "smoothing": c.ewma_alpha},
            "scale_ratio": {"value": math.sqrt(self._msq), "watch": c.scale_watch,
                            "alarm": c.scale_alarm, "smoothing": c.ewma_alpha},
            "sum_squared_residuals": self._sumsq,
        }

    # -- persistence ----------------------------------------------------------------
    def to_bytes(self) -> bytes:
        """Serialise config and accumulators (raw little-endian float64/int64)."""
        c = self.config
        lam = c.forgetting_factor
        en = c.effective_n
        floats = [float(getattr(c, f)) for f in _CFG_FLOATS]
        ba = c.bde_alpha_alarm
        floats += [0.0 if lam is None else float(lam), 0.0 if en is None else float(en),
                   0.0 if ba is None else float(ba)]
        floats += [getattr(self, f) for f in _F_STATE]
        ints = [int(c.warmup), int(c.latch), int(lam is not None), int(en is not None),
                int(ba is not None)]
        ints += [getattr(self, f) for f in _I_STATE]
        return _HEAD.pack(_MAGIC, _VERSION) + _BODY.pack(*floats, *ints)

    def copy(self) -> "DriftState":
        """An independent copy that continues bit for bit like the original.

        Every slot holds a number or the frozen config, so a slot-wise copy is
        complete; it costs under 1 us against about 60 us for a byte round trip.
        """
        return _copy_slots(self)

    @classmethod
    def from_bytes(cls, data: bytes) -> "DriftState":
        """Inverse of :meth:`to_bytes`; the restored state continues bit for bit."""
        data = bytes(data)
        if len(data) != _HEAD.size + _BODY.size:
            raise ValueError("not a serialised DriftState (size)")
        magic, version = _HEAD.unpack_from(data, 0)
        if magic != _MAGIC or version != _VERSION:
            raise ValueError("not a serialised DriftState (magic/version)")
        vals = _BODY.unpack_from(data, _HEAD.size)
        nf = len(_CFG_FLOATS)
        cfg = dict(zip(_CFG_FLOATS, vals[:nf]))
        lam, en, ba = vals[nf], vals[nf + 1], vals[nf + 2]
        fstate = vals[nf + 3: nf + 3 + len(_F_STATE)]
        ints = vals[nf + 3 + len(_F_STATE):]
        warmup, latch, has_lam, has_en, has_ba = ints[:5]
        config = DriftConfig(**cfg, warmup=int(warmup), latch=bool(latch),
                             forgetting_factor=lam if has_lam else None,
                             effective_n=en if has_en else None,
                             bde_alpha_alarm=ba if has_ba else None)
        obj = cls.__new__(cls)
        obj.config = config
        obj._derive()
        for name, v in zip(_F_STATE, fstate):
            setattr(obj, name, v)
        for name, v in zip(_I_STATE, ints[5:]):
            setattr(obj, name, int(v))
        return obj

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, DriftState):
            return NotImplemented
        return self.to_bytes() == other.to_bytes()

    __hash__ = None  # mutable

    def __repr__(self) -> str:
        return f"DriftState(index={self._t}, n_used={self._m}, status={self.status().status!r})"


_copy_slots = slot_copier(DriftState)
