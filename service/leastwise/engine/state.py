"""One model's exact recursive least-squares state (square-root information form).

After observations ``1..n`` with weights ``b_i`` and ridge start ``delta`` the
state represents the exact minimiser of

    J(w) = sum_i b_i (y_i - x_i^T w)^2 + b_0 delta ||w||^2

with, for a forgetting factor ``lambda``, ``b_i = lambda^(n-i)`` and
``b_0 = lambda^n``; for a half-life ``h`` seconds, ``b_i = 2^(-(t_n-t_i)/h)``
and ``b_0 = 2^(-(t_n-t_1)/h)`` (the prior forgets like an observation made at
the first observation's time). Both follow from the recursion
``A_n = f_n A_{n-1} + x_n x_n^T`` with a decay ``f_n`` per step, which is how
the factor is advanced (see :mod:`leastwise.engine.factor`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
import numpy as np
from numpy.typing import ArrayLike
from scipy.linalg.blas import dnrm2 as _nrm2
from scipy.linalg.blas import dtrsm, dtrsv
from scipy.linalg.lapack import dpotrf

from .errors import DimensionError, NonFiniteError, TimeOrderError
from scipy.linalg.lapack import dtpqrt as _tpqrt

from .factor import BLOCK_CHUNK, absorb_rows, block_size, new_factor
from .gram import (
    _NO_EXP, _NO_LSB, EXTENDED, FOLD_ROWS, FoldMemo, GramSplit, fold, fold_continuing, fold_memo, new_gram, sums_are_exact,
    value_span,
)
from .solution import Excitation, Prediction, Solution, excitation, inverse_moment, predict, solve
from .spec import Spec
from ..slots import slot_copier

__all__ = ["State", "Step", "MAX_ABS_VALUE"]

#: Largest magnitude accepted for any x, y or time value. Squares and sums of
#: up to 10^12 such terms stay far inside the float64 range, so no overflow.
MAX_ABS_VALUE = 1e100

#: Leverage ``x^T (f A)^{-1} x`` above which the state is taken to carry no
#: information along ``x`` (an unexcited direction); the a priori residual is
#: then not standardised.
LEVERAGE_LIMIT = 1e24

_MAX_SQUARED_NORM = MAX_ABS_VALUE * MAX_ABS_VALUE
_FLOAT64 = np.dtype(np.float64)

#: The scale is renormalised (exactly, by a power of two) when it falls below this.
_RENORMALISE_BELOW = 2.0**-128

#: Bound on the sum of the leverages ``x_i^T A^{-1} x_i`` of a block's rows with respect
#: to the state before the block (see :meth:`State.update_block`). The innovations
#: matrix ``S = I + X A^{-1} X^T`` then has 2-norm condition at most ``1 + bound``
#: (its eigenvalues lie in ``[1, 1 + trace]``), so its Cholesky factorisation and the
#: triangular solve for the recursive residuals are well conditioned; large leverages
#: (the warm-up, a new direction) take the row-by-row update instead.
BLOCK_LEVERAGE_SUM = 4.0
#: Most rows in one block (the innovations matrix is ``m x m``).
BLOCK_ROWS = 64
#: Fewest rows worth a block; shorter runs take single updates.
MIN_BLOCK_ROWS = 4



@dataclass(slots=True)
class Step:
    """What one update reports, all computed before the observation is absorbed.

    Attributes:
        prediction: the a priori prediction ``x^T w_{n-1}`` (coefficients before this
            observation; minimum-norm ones while the model is not identifiable).
        residual: ``y - prediction``.
        leverage: ``x^T (f A_{n-1})^{-1} x``, or ``None`` when the state had no
            information along ``x``.
        recursive_residual: ``residual / sqrt(1 + leverage)``, the recursive
            residual of Brown, Durbin & Evans (1975); ``None`` as for leverage.
        standardized_residual: ``recursive_residual / sigma_{n-1}``; ``None`` while
            sigma is not estimable.
        decay: the factor ``f_n`` applied to the old information.
    """

    prediction: float
    residual: float
    leverage: float | None
    recursive_residual: float | None
    standardized_residual: float | None
    decay: float


class State:
    """Exact weighted ridge least-squares state for one model.

    Holds the augmented factor ``M = [[R, z], [0, rho]]`` plus the scalar
    counters of the weights. Pure: no I/O. Not thread-safe; callers serialise.
    """

    __slots__ = (
        "spec", "_factor", "n", "prior_weight", "weight_sum", "weight_sq_sum",
        "first_time", "last_time", "_solution", "_sigma",
        "_gram", "_pending", "_pending_n", "gram_exact", "_scale", "_scale_origin",
        "_span_lsb", "_span_top", "_sums_exact", "_fold_memo", "_base", "_read",
    )

    def __init__(self, spec: Spec) -> None:
        self.spec = spec
        # The true augmented factor is _scale * _factor: forgetting shrinks the scalar,
        # so old rows are never re-rounded (only each new row is divided by it once).
        self._factor = new_factor(spec.dim, float(spec.ridge))
        # The factor as it was at the last fold of the row buffer (None: unknown, a state stored by
        # format 1). Every FOLD_ROWS rows the row-by-row factor is replaced by one block update of it,
        # and reads use the block update of it by the buffered rows (see _read_factor): rounding of
        # single-row updates never accumulates over more than FOLD_ROWS rows.
        self._base: np.ndarray | None = np.array(self._factor, order="F")
        self._read: np.ndarray | None = None  # cached _read_factor() of the current state
        self._scale = 1.0
        # Where the scale was last 1: an observation count (forgetting) or a time (half-life).
        # Each scale is computed afresh from it with one pow(), so weights do not collect rounding.
        self._scale_origin = 0.0
        #: observations absorbed since the prior
        self.n = 0
        #: b_0, the current weight of the ridge prior
        self.prior_weight = 1.0
        #: S1 = sum_i b_i, the effective sample size (documented in DEVELOPERS.md)
        self.weight_sum = 0.0
        #: S2 = sum_i b_i^2
        self.weight_sq_sum = 0.0
        self.first_time: float | None = None
        self.last_time: float | None = None
        self._solution: Solution | None = None
        self._sigma = -1.0  # cached sigma of the current state; -1 = not computed
        # Extended-precision Gram matrix (see gram.py) and rows not yet folded into it.
        self._gram = new_gram(spec.dim, float(spec.ridge))
        self._pending = np.zeros((FOLD_ROWS, spec.dim + 1), dtype=np.float64)
        self._pending_n = 0
        #: False once a block backfill added rows to the Gram matrix in double precision
        self.gram_exact = True
        # Bit span of the folded (scaled) rows, to tell when the Gram sums are free of
        # rounding; not with a ridge prior, whose diagonal is not tracked.
        self._span_lsb = np.full(spec.dim + 1, _NO_LSB, dtype=np.int64)
        self._span_top = np.full(spec.dim + 1, _NO_EXP, dtype=np.int64)
        self._sums_exact = spec.ridge == 0.0
        # The read-time fold of the buffered rows and its split (gram.FoldMemo): immutable and
        # checked against the Gram matrix and rows on every use, so copies may share it.
        self._fold_memo: FoldMemo | None = None

    # ------------------------------------------------------------------ views
    @property
    def dim(self) -> int:
        return self.spec.dim

    @property
    def factor(self) -> np.ndarray:
        """The augmented factor ``[[R, z], [0, rho]]`` (a read-only copy in true scale)."""
        out = self._factor * self._scale
        out.flags.writeable = False
        return out

    def solution(self) -> Solution:
        """Coefficients, identifiability, sigma and the moment matrices (cached per state)."""
        if self._solution is None:
            # The Gram split and the exact-sums test are handed over as functions: refinement
            # asks for them only when the condition estimate allows it.
            self._solution = solve(
                self._read_factor(), self.spec, self.prior_weight, self.weight_sum,
                self._gram_split if self.gram_exact else None, self._gram_sums_exact, self._scale,
            )
        return self._solution

    def _read_factor(self) -> np.ndarray:
        """The factor reads solve with: the factor at the last fold updated by the buffered rows in one block.

        Mathematically the same as the row-by-row factor ``_factor`` (which the
        per-observation steps use); numerically that of a blocked Householder
        update (LAPACK ``dtpqrt`` on up to ``FOLD_ROWS`` rows), whose rounding
        does not grow with every single-row reflection. Measured on NIST Filip
        (cond ~ 1e15 unscaled), streamed: LRE 6.9-7.8 row by row depending on
        the BLAS kernel, 7.8-8.3 this way.
        """
        k = self._pending_n
        if k == 0 or self._base is None:
            return self._factor
        read = self._read
        if read is None:
            read = self._read = absorb_rows(np.array(self._base, order="F"), np.array(self._pending[:k], order="F"))
        return read

    def gram(self) -> np.ndarray:
        """The extended-precision augmented Gram matrix with the buffered rows folded in (a new array)."""
        k = self._pending_n
        return fold(self._gram, self._pending[:k])

    def _gram_split(self) -> GramSplit:
        """:func:`.gram.split_gram` of :meth:`gram`, memoised across reads (and copies) of the same content."""
        memo = fold_memo(self._fold_memo, self._gram, self._pending, self._pending_n)
        self._fold_memo = memo
        return memo.split

    def _gram_sums_exact(self) -> bool:
        """True when every sum in :meth:`gram` was accumulated without rounding (:func:`.gram.sums_are_exact`)."""
        if not self._sums_exact:
            return False
        lsb, top = self._span_lsb, self._span_top
        k = self._pending_n
        if k:
            plsb, ptop = value_span(self._pending[:k])
            lsb, top = np.minimum(lsb, plsb), np.maximum(top, ptop)
        return sums_are_exact(lsb, top, self.n)

    def coefficients(self) -> np.ndarray:
        """The exact minimiser ``w_n`` (minimum-norm while not identifiable)."""
        return self.solution().coefficients.copy()

    def predict(self, rows: ArrayLike, level: float = 0.95) -> Prediction:
        """Prediction mean, standard errors and intervals for the rows ``X`` (``k x d`` or ``d``)."""
        x = self._check_matrix(rows)
        return predict(self._read_factor(), self.solution(), x, level, self.spec.forgets)

    def inverse_moment(self) -> np.ndarray:
        """``P = A^{-1}``, derived from the factor (pseudo-inverse when not identifiable)."""
        return inverse_moment(self._read_factor(), self.solution())

    def covariance(self) -> np.ndarray | None:
        """Coefficient covariance ``sigma^2 P``; ``None`` while sigma is not estimable."""
        sol = self.solution()
        if sol.sigma is None:
            return None
        return sol.sigma * sol.sigma * self.inverse_moment()

    def excitation(self) -> Excitation:
        """Condition of the information matrix and its least-informed direction."""
        return excitation(self._read_factor(), self.solution(), self.weight_sum)

    @property
    def effective_n(self) -> float:
        """Effective sample size ``S1 = sum_i b_i`` (equals n without forgetting)."""
        return self.weight_sum

    # ---------------------------------------------------------------- updates
    def update(self, x: ArrayLike, y: float, t: float | None = None) -> Step:
        """Absorb one observation ``(x, y)`` made at time ``t`` (seconds).

        The state is unchanged when an error is raised.
        """
        return self._absorb_one(*self._checked(x, y, t))

    def preview(self, x: ArrayLike, y: float, t: float | None = None) -> Step:
        """The step :meth:`update` would report for ``(x, y, t)``, bit for bit, without absorbing it.

        Same checks and errors as :meth:`update`; the state is never changed
        (a drift gate decides on it whether to apply the observation).
        """
        return self._look_ahead(*self._checked(x, y, t))[0]

    def decays(self, times: ArrayLike | None, count: int) -> list[float]:
        """The decays ``f`` that ``count`` observations made at ``times`` would get, in order (nothing changes)."""
        t = None if times is None else np.asarray(times, dtype=np.float64).reshape(-1)
        return self._decays_for(t, count)

    def _checked(self, x: ArrayLike, y: float, t: float | None) -> tuple[np.ndarray, float, float | None, float]:
        """``(x, y, t, decay)`` validated for :meth:`_absorb_one` (raises EngineError subclasses)."""
        if type(x) is np.ndarray and x.dtype == _FLOAT64 and x.ndim == 1 and x.shape[0] == self.spec.dim:
            xv = x  # fast path: already a float vector of the right length
            if not float(_nrm2(xv)) <= MAX_ABS_VALUE:  # NaN and inf fail too; dnrm2 cannot overflow
                raise NonFiniteError(f"x must be finite with Euclidean norm at most {MAX_ABS_VALUE:g}")
        else:
            xv = self._check_vector(x)
        if type(y) is float and -MAX_ABS_VALUE <= y <= MAX_ABS_VALUE:
            yv = y  # fast path; NaN fails the comparison and takes the checked path
        elif type(y) is np.float64 and -MAX_ABS_VALUE <= y <= MAX_ABS_VALUE:
            yv = float(y)  # an element of a float array: the same value, as _check_scalar gives it
        else:
            yv = _check_scalar(y, "y")
        if t is None and self.spec.half_life is None:
            return xv, yv, None, self.spec.forgetting
        tv = _check_time(t) if t is not None else None
        return xv, yv, tv, self._decay_for(tv)

    def update_many(
        self, rows: ArrayLike, ys: ArrayLike, times: ArrayLike | None = None
    ) -> list[Step]:
        """Absorb k observations in order: exactly ``k`` calls of :meth:`update`.

        Every row is checked first, so an error leaves the state unchanged.
        """
        x, y, t = self._check_batch(rows, ys, times)
        decays = self._decays_for(t, x.shape[0])
        steps = []
        for i in range(x.shape[0]):
            steps.append(self._absorb_one(x[i], float(y[i]), None if t is None else float(t[i]), decays[i]))
        return steps

    def update_block(
        self, rows: ArrayLike, ys: ArrayLike, times: ArrayLike | None = None
    ) -> list[Step]:
        """Absorb k observations in order, with blocked arithmetic: the steps and state of :meth:`update_many` to rounding.

        For a run of ``m`` rows with scaled rows ``X~`` (row ``i`` divided by
        the scale after it, as :meth:`update` does) and the factor ``[[R, z],
        [0, rho]]`` before them, one triangular solve ``U = R^{-T} X~^T`` gives
        every leverage ``||u_i||^2`` and a priori residual ``y~_i - u_i^T z``
        with respect to the state before the run. The sequential steps follow
        from the Cholesky factor of the innovations matrix
        ``S = I + U^T U = L L^T``: the recursive residuals are the
        innovations of the block, orthonormalised in order (Gram-Schmidt on
        the innovations, as in Kailath, Sayed & Hassibi, *Linear Estimation*,
        2000; the reference is cited from memory):

            recursive residuals  w~ = L^{-1} (y~ - U^T z)
            leverages            lev_i = ||u_i||^2 - sum_{j<i} L_ij^2   (= L_ii^2 - 1)
            rho_i^2              = rho_{i-1}^2 + w~_i^2

        and the rows are then absorbed by one blocked Householder update
        (LAPACK ``dtpqrt``), in the same row buffer :meth:`update` fills. A
        run is cut where the sum of its leverages would exceed
        ``BLOCK_LEVERAGE_SUM`` (so ``cond(S) <= 1 + BLOCK_LEVERAGE_SUM``), before
        a renormalisation or a zero decay, and at ``BLOCK_ROWS`` rows; rows
        outside such runs (the warm-up, a state of storage format 1) take
        :meth:`update`. With a ridge prior sigma needs every step's
        coefficients, which follow from the same factors (:meth:`_block_penalties`).

        Deterministic: the same state and rows give the same bits, so a log
        that records which rows were absorbed together replays bit for bit.
        Every row is checked first, so an error leaves the state unchanged.
        """
        x, y, t = self._check_batch(rows, ys, times)
        decays = self._decays_for(t, x.shape[0])
        steps: list[Step] = []
        k = x.shape[0]
        i = 0
        # After a try that found no block, single updates until the next; the wait doubles while
        # tries keep failing (a state whose leverages stay large, e.g. a very short memory).
        single_until = 0
        wait = MIN_BLOCK_ROWS
        while i < k:
            taken = 0
            if i >= single_until and k - i >= MIN_BLOCK_ROWS:
                taken = self._absorb_run(x, y, t, decays, i, steps)
                if taken:
                    wait = MIN_BLOCK_ROWS
                else:
                    single_until = i + wait
                    wait = min(2 * wait, BLOCK_ROWS)
            if not taken:
                steps.append(self._absorb_one(x[i], float(y[i]), None if t is None else float(t[i]), decays[i]))
                taken = 1
            i += taken
        return steps

    def _absorb_run(self, x: np.ndarray, y: np.ndarray, t: np.ndarray | None, decays: list[float], start: int,
                    steps: list[Step]) -> int:
        """Absorb a run of rows from ``start`` as one block (see :meth:`update_block`); the rows taken, 0 if none."""
        if self._base is None or self.n == 0:
            return 0
        d = self.dim
        n0 = self.n
        stop = min(x.shape[0], start + BLOCK_ROWS)
        # Each row's scale as _absorb_one computes it; the run ends before a row that would
        # renormalise the scale or forget everything.
        scales: list[float] = []
        scale = self._scale
        for j in range(start, stop):
            if decays[j] != 1.0:
                # A zero decay (a gap of over ~1075 half-lives) gives a scale below the bound too.
                scale = self._scale_at(n0 + 1 + j - start, None if t is None else float(t[j]))
                if not scale >= _RENORMALISE_BELOW:
                    break
            scales.append(scale)
        m = len(scales)
        if m < MIN_BLOCK_ROWS:
            return 0
        block = np.empty((m, d + 1), dtype=np.float64)
        block[:, :d] = x[start:start + m]
        block[:, d] = y[start:start + m]
        c = np.array(scales)
        if not (c == 1.0).all():
            block /= c[:, None]  # elementwise, as _absorb_one divides a row
        factor = self._factor
        # U = R^{-T} X~^T: column i is the u of row i against the state before the run.
        u = dtrsm(1.0, factor[:d, :d], block[:, :d].T, trans_a=1)
        lev0 = np.einsum("ij,ij->j", u, u)
        # The longest prefix whose leverages sum to at most the bound (NaN or inf end it too).
        within = np.cumsum(lev0) <= BLOCK_LEVERAGE_SUM
        m = int(within.argmin()) if not within.all() else m
        if m < MIN_BLOCK_ROWS:
            return 0
        if m < len(scales):
            u, lev0, block, c = u[:, :m], lev0[:m], block[:m], c[:m]
        innovations = u.T @ u
        innovations.flat[:: m + 1] += 1.0
        chol, info = dpotrf(innovations, lower=1, clean=1, overwrite_a=1)
        if info != 0:  # pragma: no cover - S >= I is positive definite; only on a LAPACK failure
            return 0
        apriori = block[:, d] - u.T @ factor[:d, d]
        rec = dtrsv(chol, apriori, lower=1)  # the scaled recursive residuals
        diag = chol.diagonal().copy()
        chol.flat[:: m + 1] = 0.0  # what is left is strictly lower (dpotrf's clean=1 zeroed the upper part)
        lev = np.maximum(lev0 - np.einsum("ij,ij->i", chol, chol), 0.0)
        chol.flat[:: m + 1] = diag
        recursive = rec * c
        observed = y[start:start + m]
        predicted = observed - recursive * diag  # the a priori residual is L_ii times the recursive one
        residual = observed - predicted  # as update() reports it: y minus the prediction, exactly
        rho2 = float(factor[d, d]) ** 2 + np.cumsum(rec * rec)  # rho~_i^2 after row i (scaled)
        # Sigma before each row: the current one, then from rho~^2, the scale and the weights.
        sigma_first = self._sigma_now()
        prior_weight, weight_sum, weight_sq_sum = self.prior_weight, self.weight_sum, self.weight_sq_sum
        rec_l, res_l, lev_l, pred_l = recursive.tolist(), residual.tolist(), lev.tolist(), predicted.tolist()
        rss_l = (rho2 * (c * c)).tolist()
        penalty_l = self._block_penalties(factor, u, chol, rec) if self.spec.ridge > 0.0 else None
        sigma = sigma_first
        for j in range(m):
            f = decays[start + j]
            r = rec_l[j]
            steps.append(Step(pred_l[j], res_l[j], lev_l[j], r, r / sigma if sigma else None, f))
            prior_weight *= f
            weight_sum = f * weight_sum + 1.0
            weight_sq_sum = f * f * weight_sq_sum + 1.0
            dof = weight_sum - d
            rss = rss_l[j]
            if penalty_l is not None and prior_weight > 0.0:
                rss -= prior_weight * penalty_l[j]  # the ridge penalty is not part of the data's RSS
            sigma = math.sqrt(rss / dof) if dof > 0.0 and rss > 0.0 and math.isfinite(rss) else None
        # Absorb: the rows enter the buffer as single updates would put them; full buffers fold.
        self._read = None
        pos = 0
        while pos < m:
            filled = self._pending_n
            take = min(FOLD_ROWS - filled, m - pos)
            self._pending[filled:filled + take] = block[pos:pos + take]
            self._pending_n = filled + take
            pos += take
            if self._pending_n == FOLD_ROWS:
                self.n = n0 + pos - 1  # as _absorb_one folds before it counts its row
                self._fold_all_pending()
        filled = self._pending_n
        if filled:
            self._factor = absorb_rows(np.array(self._base, order="F"), np.array(self._pending[:filled], order="F"))
            self._read = np.array(self._factor, order="F")  # what _read_factor() would compute
        self.n = n0 + m
        self._scale = float(c[-1])
        self.prior_weight, self.weight_sum, self.weight_sq_sum = prior_weight, weight_sum, weight_sq_sum
        if t is not None:
            if self.first_time is None:
                self.first_time = float(t[start])
            self.last_time = float(t[start + m - 1])
        self._solution = None
        self._sigma = -1.0
        return m

    def _block_penalties(self, factor: np.ndarray, u: np.ndarray, chol: np.ndarray, rec: np.ndarray) -> list[float]:
        """``delta ||w_i||^2`` after each row of a block (the ridge term :meth:`_sigma_now` removes from rho^2).

        The coefficients after row ``i`` are ``w_i = w_0 + R^{-1} sum_{j<=i} g_j w~_j`` with
        ``G = U L^{-T}``: the gain ``(A_{i-1})^{-1} x~_i / sqrt(1 + lev_i)`` of row ``i`` is
        ``R^{-1} g_i`` (Woodbury's identity on the block's prefix), so one triangular solve
        each for ``G`` and for the cumulative corrections gives every ``w_i``.
        """
        d = self.dim
        R = factor[:d, :d]
        w0 = dtrsv(R, factor[:d, d])
        gains = dtrsm(1.0, chol, u, side=1, lower=1, trans_a=1)  # G = U L^{-T}
        corrections = dtrsm(1.0, R, np.cumsum(gains * rec, axis=1))  # R^{-1} sum_{j<=i} g_j w~_j
        w = corrections + w0[:, None]
        return (self.spec.ridge * np.einsum("ij,ij->j", w, w)).tolist()

    def absorb_block(self, rows: ArrayLike, ys: ArrayLike, times: ArrayLike | None = None) -> None:
        """Absorb many observations at once (backfills): the same state as ``update_many``.

        Each row enters divided by the scale the state has after it (``c_i``),
        as on the row-by-row path, and rows are absorbed up to ``BLOCK_CHUNK``
        at a time by the blocked QR update, so the state equals the
        row-by-row one to rounding (not bit for bit). No
        per-row residuals. The block's Gram contribution is accumulated in
        double precision for speed, which switches the extended-precision
        refinement off for this state (``gram_exact``).
        """
        x, y, t = self._check_batch(rows, ys, times)
        k = x.shape[0]
        decays = np.asarray(self._decays_for(t, k), dtype=np.float64)
        # Weight bookkeeping over the whole block: b_i relative to its end is prod_{j>i} f_j.
        tail = np.ones(k, dtype=np.float64)
        if k > 1:
            tail[:-1] = np.cumprod(decays[:0:-1])[::-1]
        total_decay = float(tail[0] * decays[0])
        self._fold_all_pending()
        d = self.dim
        lam, half_life = self.spec.forgetting, self.spec.half_life
        if half_life is not None and self.n == 0:
            self._scale_origin = float(t[0])  # the prior sits at the first observation's time
        start = 0
        while start < k:
            stop = min(start + BLOCK_CHUNK, k)
            if decays[start] == 0.0:  # everything before this row weighs nothing any more
                self._forget_all()
                self._scale_origin = float(t[start])
            # Each row enters divided by the scale after it, computed afresh (one pow each).
            if half_life is not None:
                scales = np.exp2(-(t[start:stop] - self._scale_origin) / (2.0 * half_life))
            elif lam != 1.0:
                counts = np.arange(self.n + start + 1, self.n + stop + 1, dtype=np.float64)
                scales = np.power(lam, 0.5 * (counts - self._scale_origin))
            else:
                scales = np.ones(stop - start)
            cut = np.flatnonzero((scales < _RENORMALISE_BELOW) | (decays[start:stop] == 0.0))
            if cut.size and cut[0] == 0 and decays[start] != 0.0:
                self._renormalise(float(scales[0]))
                self._scale_origin = float(self.n + start + 1) if half_life is None else float(t[start])
                continue
            end = start + (int(cut[cut > 0][0]) if (cut > 0).any() else stop - start)
            chunk = np.empty((end - start, d + 1), dtype=np.float64, order="F")
            chunk[:, :d] = x[start:end]
            chunk[:, d] = y[start:end]
            scales = scales[: end - start]
            if not (scales == 1.0).all():
                chunk /= scales[:, None]
            self._gram += (chunk.T @ chunk).astype(EXTENDED)
            self._factor = absorb_rows(self._factor, chunk)
            self._scale = float(scales[-1])
            start = end
        self.gram_exact = False
        self.prior_weight *= total_decay
        self.weight_sum = total_decay * self.weight_sum + float(tail.sum())
        self.weight_sq_sum = total_decay * total_decay * self.weight_sq_sum + float(tail @ tail)
        self.n += k
        self._sigma = -1.0
        if t is not None:
            if self.first_time is None:
                self.first_time = float(t[0])
            self.last_time = float(t[-1])
        self._base = np.array(self._factor, order="F")  # the buffer is empty: the factor is its own base
        self._read = None
        self._solution = None

    def reset(self) -> None:
        """Back to the prior: as if no observation had been made."""
        fresh = State(self.spec)
        for name in State.__slots__:
            setattr(self, name, getattr(fresh, name))

    # ------------------------------------------------------------- internals
    def _absorb_one(self, x: np.ndarray, y: float, t: float | None, decay: float) -> Step:
        # Everything that can fail is computed before the state is touched.
        step, scale = self._look_ahead(x, y, t, decay)
        d = self.spec.dim
        # Mutations from here on.
        if decay == 0.0 or scale == 0.0 or scale < _RENORMALISE_BELOW:
            if decay == 0.0 or scale == 0.0:
                self._forget_all()
            else:
                self._renormalise(scale)
            scale = 1.0
            self._scale_origin = float(self.n + 1) if self.spec.half_life is None else t
        elif self.n == 0 and self.spec.half_life is not None:
            self._scale_origin = t  # the prior sits at the first observation's time
        self._scale = scale
        k = self._pending_n
        pending = self._pending
        if scale != 1.0:  # the row enters divided by the scale (elementwise, as an in-place division would)
            np.divide(x, scale, out=pending[k, :d])
            pending[k, d] = y / scale
        else:
            pending[k, :d] = x
            pending[k, d] = y
        row = pending[k:k + 1]
        # Positional flags (keywords cost f2py ~0.4 us): overwrite_a=1, overwrite_b=0, so
        # LAPACK works on a copy of the row, which stays in the buffer for the Gram fold.
        self._factor = _tpqrt(0, block_size(d + 1), self._factor, row, 1, 0)[0]
        self._pending_n = k + 1
        self._read = None  # before a fold: it would reuse a read's update, which lacks this row
        if k + 1 == FOLD_ROWS:
            self._fold_all_pending()
        self.n += 1
        self.prior_weight *= decay
        self.weight_sum = decay * self.weight_sum + 1.0
        self.weight_sq_sum = decay * decay * self.weight_sq_sum + 1.0
        if t is not None:
            if self.first_time is None:
                self.first_time = t
            self.last_time = t
        self._solution = None
        self._read = None
        self._sigma = -1.0
        return step

    def _look_ahead(self, x: np.ndarray, y: float, t: float | None, decay: float) -> tuple[Step, float]:
        """The step of absorbing ``(x, y, t)`` and the scale the state would have after it; changes nothing."""
        d = self.spec.dim
        factor = self._factor
        sigma = self._sigma if self._sigma >= 0.0 else self._sigma_now()
        scale = self._scale_at(self.n + 1, t) if decay != 1.0 else self._scale  # decayed state = scale * factor
        # u solves M^T u = x: x^T (f A)^{-1} x = u.u / scale^2 and x^T w = u.z (w is scale-free).
        u = dtrsv(factor[:d, :d], x, 1, 0, 0, 1)  # trans=1, passed positionally (keywords cost f2py ~0.25 us)
        # dnrm2 scales internally: no overflow warning when x lies along an unexcited direction.
        norm_u = float(_nrm2(u))
        # scale == 0 (a gap of over ~1074 half-lives) forgets everything: no information along x.
        leverage = (norm_u / scale) ** 2 if scale > 0.0 and norm_u / scale < 1e150 else math.inf
        recursive: float | None = None
        lev: float | None = None
        prediction = math.inf
        if leverage <= LEVERAGE_LIMIT:  # False for NaN and inf too
            # ``@``, not np.dot: the same ddot, but np.dot lets go of the interpreter lock for
            # it, and winning the lock back from a busy event loop costs the writer thread
            # tens of microseconds per call (tests/bench/engine.py, "gil" line).
            prediction = float(u @ factor[:d, d])
            lev = leverage
        if not math.isfinite(prediction):
            # No information along x yet: predict with the minimum-norm solution.
            lev = None
            previous = solve(factor, self.spec, self.prior_weight, self.weight_sum, None, False, self._scale)
            with np.errstate(over="ignore", invalid="ignore"):
                prediction = float(previous.coefficients @ x)
            if not math.isfinite(prediction):
                raise NonFiniteError("prediction outside the floating-point range; rescale the features")
        residual = y - prediction
        if lev is not None:
            recursive = residual / math.sqrt(1.0 + lev)
        standardized = recursive / sigma if (recursive is not None and sigma) else None
        return Step(prediction, residual, lev, recursive, standardized, decay), scale

    def _merge_span(self, rows: np.ndarray) -> None:
        lsb, top = value_span(rows)
        np.minimum(self._span_lsb, lsb, out=self._span_lsb)
        np.maximum(self._span_top, top, out=self._span_top)
        # Spans only widen and n only grows: once the sums can round, they stay so.
        if not sums_are_exact(self._span_lsb, self._span_top, self.n + FOLD_ROWS):
            self._sums_exact = False

    def _renormalise(self, scale: float) -> None:
        """Fold ``scale`` into the factor and the Gram matrix (one rounding) and restart the scale at 1.

        Happens when the scale drops below 2^-128, e.g. every ~17,600 steps at lambda = 0.99.
        """
        self._fold_all_pending()
        self._factor *= scale
        self._base = np.array(self._factor, order="F")
        self._read = None
        self._gram *= EXTENDED(scale) * EXTENDED(scale)
        self._sums_exact = False
        self._scale = 1.0

    def _fold_all_pending(self) -> None:
        """Fold the buffered rows into the Gram matrix (when the buffer is full, or before a change of scale)."""
        k = self._pending_n
        if k == 0:
            return
        self._gram = fold_continuing(self._fold_memo, self._gram, self._pending, k)
        if self._sums_exact:
            self._merge_span(self._pending[:k])
        if self._base is not None:
            # One blocked update of the factor at the last fold replaces the k single-row ones
            # (the same update a read of this state may already have made).
            self._factor = self._read_factor()
        self._base = np.array(self._factor, order="F")
        self._read = None
        self._pending_n = 0

    def _forget_all(self) -> None:
        """A decay of 0: every past observation and the prior weigh nothing any more."""
        self._factor[:] = 0.0
        self._base = np.array(self._factor, order="F")
        self._read = None
        self._gram[:] = 0
        self._pending_n = 0
        self._scale = 1.0

    def _scale_at(self, count: float, t: float | None) -> float:
        """Scale of the factor once ``count`` observations (the last at time ``t``) are in: one pow()."""
        if self.spec.half_life is None:
            return self.spec.forgetting ** (0.5 * (count - self._scale_origin))
        if self.n == 0:
            return 1.0
        return 2.0 ** (-(t - self._scale_origin) / (2.0 * self.spec.half_life))

    def _sigma_now(self) -> float | None:
        """Sigma of the current state from the factor alone; ``None`` if not estimable.

        Deliberately independent of the cached :meth:`solution`, so what an update
        reports never depends on whether the state was read before it.
        """
        if self._sigma >= 0.0:
            return self._sigma or None
        d = self.dim
        dof = self.weight_sum - d
        value = 0.0
        if dof > 0.0:
            rho = float(self._factor[d, d]) * self._scale
            rss = rho * rho
            if self.spec.ridge > 0.0 and self.prior_weight > 0.0:
                w = dtrsv(self._factor[:d, :d], self._factor[:d, d])
                rss -= self.prior_weight * self.spec.ridge * float(w @ w)
            if rss > 0.0 and math.isfinite(rss):
                value = math.sqrt(rss / dof)
        self._sigma = value
        return value or None

    def _decay_for(self, t: float | None) -> float:
        return self._decay_between(self.last_time, t)

    def _decays_for(self, t: np.ndarray | None, count: int) -> list[float]:
        if t is None:
            return [self._decay_between(self.last_time, None)] * count
        last = self.last_time
        out = []
        for ti in t.tolist():
            out.append(self._decay_between(last, ti))
            last = ti
        return out

    def _decay_between(self, last: float | None, t: float | None) -> float:
        """The decay ``f`` of an observation at ``t`` following one at ``last`` (DESIGN.md weights)."""
        if t is not None and last is not None and t < last:
            raise TimeOrderError(f"time {t!r} is earlier than the previous observation's {last!r}")
        if self.spec.half_life is None:
            return float(self.spec.forgetting)
        if t is None:
            raise TimeOrderError("a model with a half-life needs a time on every observation")
        if last is None:
            return 1.0  # the prior sits at the first observation's time
        return 2.0 ** (-(t - last) / self.spec.half_life)

    def _check_vector(self, x: ArrayLike) -> np.ndarray:
        _reject_booleans(x, "x")
        xv = np.asarray(x, dtype=np.float64)
        if xv.shape != (self.dim,):
            raise DimensionError(f"x must have {self.dim} values, got shape {xv.shape}")
        # One norm checks both: NaN/inf propagate, and |x_j| <= ||x|| <= MAX_ABS_VALUE.
        if not float(_nrm2(xv)) <= MAX_ABS_VALUE:
            raise NonFiniteError(f"x must be finite with Euclidean norm at most {MAX_ABS_VALUE:g}")
        return xv

    def _check_matrix(self, rows: ArrayLike) -> np.ndarray:
        _reject_booleans(rows, "x")
        x = np.asarray(rows, dtype=np.float64)
        if x.ndim == 1:
            x = x[None, :]
        if x.ndim != 2 or x.shape[1] != self.dim:
            raise DimensionError(f"rows must have {self.dim} columns, got shape {x.shape}")
        _check_finite(x, "x")
        return x

    def _check_batch(
        self, rows: ArrayLike, ys: ArrayLike, times: ArrayLike | None
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        _reject_booleans(rows, "x")
        _reject_booleans(ys, "y")
        if times is not None:
            _reject_booleans(times, "time")
        x = np.asarray(rows, dtype=np.float64)
        if x.ndim != 2 or x.shape[1] != self.dim:
            raise DimensionError(f"rows must be k x {self.dim}, got shape {x.shape}")
        y = np.asarray(ys, dtype=np.float64).reshape(-1)
        if y.shape[0] != x.shape[0]:
            raise DimensionError(f"{x.shape[0]} rows but {y.shape[0]} responses")
        if x.shape[0] == 0:
            raise DimensionError("a batch needs at least one observation")
        _check_finite(x, "x")
        _check_finite(y, "y")
        t = None
        if times is not None:
            t = np.asarray(times, dtype=np.float64).reshape(-1)
            if t.shape[0] != x.shape[0]:
                raise DimensionError(f"{x.shape[0]} rows but {t.shape[0]} times")
            _check_finite(t, "time")
        return x, y, t

    # ------------------------------------------------------------ round trip
    def to_bytes(self) -> bytes:
        from .serial import dump_state

        return dump_state(self)

    @classmethod
    def from_bytes(cls, data: bytes) -> "State":
        from .serial import load_state

        return load_state(data)

    def copy(self) -> "State":
        """An independent copy, equal bit for bit to a ``to_bytes``/``from_bytes`` round trip.

        Copies slot by slot (arrays copied, scalars shared; ~3 us at d = 8 instead of
        ~90 us for the byte round trip). The cached solution is not carried over.
        """
        # order="K" (slot_copier): the factor stays Fortran-ordered, as after from_bytes. A
        # C-ordered copy gives the same bytes but not the same steps: BLAS sums a strided
        # column of it (the prediction u . z) in another order than a contiguous one.
        new = _copy_slots(self)
        new._solution = None
        new._read = None
        return new

    def __repr__(self) -> str:
        return f"State(dim={self.dim}, n={self.n}, forgetting={self.spec.forgetting}, half_life={self.spec.half_life}, ridge={self.spec.ridge})"


def _reject_booleans(value: object, field: str) -> None:
    """numpy turns True/False into 1.0/0.0 silently; a boolean reading is a client error."""
    if isinstance(value, np.ndarray):
        if value.dtype.kind == "b" or (value.dtype.kind == "O" and any(isinstance(v, (bool, np.bool_)) for v in value.flat)):
            raise NonFiniteError(f"{field} must be numbers, not booleans")
        return
    if isinstance(value, (bool, np.bool_)):
        raise NonFiniteError(f"{field} must be numbers, not booleans")
    if isinstance(value, (list, tuple)):
        for v in value:
            if isinstance(v, (bool, np.bool_)):
                raise NonFiniteError(f"{field} must be numbers, not booleans")
            if isinstance(v, (list, tuple, np.ndarray)):
                _reject_booleans(v, field)


def _check_finite(a: np.ndarray, field: str) -> None:
    """One pass: NaN and inf fail the comparison, and |v| <= (row) norm <= MAX_ABS_VALUE."""
    if not a.size:
        return
    if a.ndim == 2:
        if not (np.einsum("ij,ij->i", a, a) <= _MAX_SQUARED_NORM).all():
            raise NonFiniteError(f"each row of {field} must be finite with Euclidean norm at most {MAX_ABS_VALUE:g}")
    elif not (np.abs(a) <= MAX_ABS_VALUE).all():
        raise NonFiniteError(f"{field} must be finite with magnitude at most {MAX_ABS_VALUE:g}")


def _check_scalar(v: float, field: str) -> float:
    if isinstance(v, bool):
        raise NonFiniteError(f"{field} must be a number")
    fv = float(v)
    if not (math.isfinite(fv) and abs(fv) <= MAX_ABS_VALUE):
        raise NonFiniteError(f"{field} must be finite with magnitude at most {MAX_ABS_VALUE:g}")
    return fv


def _check_time(t: float) -> float:
    return _check_scalar(t, "time")


# The read cache and the solution are dropped by copy(): shared there, not copied only to be discarded.
_copy_slots = slot_copier(State, arrays=[s for s in State.__slots__ if s not in ("_read", "_solution")])
