"""Solving the factored problem: coefficients, identifiability, sigma, moments, predictions.

Given the augmented factor ``M = [[R, z], [0, rho]]`` (see :mod:`.factor`):

* coefficients ``w = R^{-1} z`` by back substitution (LAPACK ``dtrtrs``) when
  the problem is identifiable. This is the semi-normal-free QR solution of the
  weighted ridge problem and is backward stable (Higham, *Accuracy and
  Stability of Numerical Algorithms*, 2nd ed., sec. 20.2).
* identifiable means: every column of ``R`` carries information above
  ``INFORMATION_FLOOR`` and the column-equilibrated factor ``R D^{-1}``
  (``D = diag(||R e_j||)``) has a LAPACK ``dtrcon`` reciprocal 1-norm condition
  estimate above ``RCOND_TOL``. Column equilibration is near optimal among
  diagonal scalings (van der Sluis, 1969), so feature units do not matter.
* otherwise the minimum-norm solution ``w = V_r S_r^{-1} U_r^T z`` from the
  SVD ``R = U S V^T`` truncated to the rank ``r`` (singular values above
  ``RCOND_TOL * s_1`` and ``INFORMATION_FLOOR``, at most ``d - 1``); the
  rows ``V_{r+1..d}^T`` are the unidentified directions.
* ``P = A^{-1} = R^{-1} R^{-T}`` (``dtrtri``), or the pseudo-inverse
  ``V_r S_r^{-2} V_r^T`` when not identifiable.
* weighted data residual sum of squares
  ``RSS = rho^2 + ||U_{r+1..}^T z||^2 - b_0 delta ||w||^2`` (the ridge penalty
  removed from the objective), effective degrees of freedom
  ``nu = S1 - rank`` with ``S1 = sum b_i``, and ``sigma = sqrt(RSS / nu)``
  when ``nu > 0``. Without forgetting ``S1 = n`` and this is the usual
  unbiased estimate; under forgetting it is the weighted analogue with the
  sum of weights as the effective sample size (an approximation).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from scipy import stats
from scipy.linalg.lapack import dtrcon, dtrtri, dtrtrs

from .errors import EngineError
from .gram import GramSplit, refine
from .spec import Spec

__all__ = ["Solution", "Prediction", "Excitation", "solve", "predict", "inverse_moment", "excitation"]

#: Reciprocal condition (of the column-equilibrated factor R) below which the
#: problem counts as numerically rank deficient: 64 units of roundoff.
RCOND_TOL = 64 * np.finfo(np.float64).eps

#: Information (a column norm or singular value of R, in units of x) below which
#: a direction counts as lost; keeps every entry of P = A^{-1} below ~1e300.
INFORMATION_FLOOR = 1e-120


@dataclass(frozen=True, slots=True)
class Solution:
    """The estimate carried by one factor. Never holds NaN or infinity."""

    coefficients: NDArray[np.float64]
    identifiable: bool
    rank: int
    rss: float
    dof: float
    sigma: float | None
    rcond: float
    unidentified: NDArray[np.float64]  # (d - rank) x d orthonormal rows
    refined: bool = False  # True when extended-precision refinement gave the coefficients
    scale: float = 1.0  # the factor's scale (true factor = scale * factor) this was solved with
    _svd: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]] | None = field(
        default=None, repr=False, compare=False
    )


@dataclass(frozen=True, slots=True)
class Prediction:
    """Predictions for k rows; ``None`` entries mean "not determined by the data".

    ``se_fit`` is the standard error of the fitted mean ``sigma sqrt(x^T P x)``;
    ``se_prediction`` that of a new reading ``sigma sqrt(1 + x^T P x)``; the
    interval is the prediction interval at ``level`` from a Student t with
    ``dof`` degrees of freedom (exact without forgetting for Gaussian noise; an
    approximation with effective degrees of freedom under forgetting).
    """

    mean: list[float | None]
    se_fit: list[float | None]
    se_prediction: list[float | None]
    lower: list[float | None]
    upper: list[float | None]
    level: float
    dof: float
    quantile: float | None
    approximate: bool


@dataclass(frozen=True, slots=True)
class Excitation:
    """How well the data excite each direction of the coefficient space.

    ``condition`` is the 2-norm condition number of the information matrix
    ``A`` (``(s_1/s_d)^2`` from the singular values of ``R``), ``scaled_condition``
    the same after column equilibration; both ``None`` when infinite or beyond
    1e300. ``least_informed_direction`` is the unit vector ``v_d`` with the
    least information ``s_d^2`` (sign fixed so its largest entry is positive).
    """

    condition: float | None
    scaled_condition: float | None
    least_information: float
    least_informed_direction: NDArray[np.float64]
    effective_n: float


def solve(
    factor: NDArray[np.float64], spec: Spec, prior_weight: float, weight_sum: float,
    gram: NDArray[np.longdouble] | GramSplit | Callable[[], GramSplit] | None = None,
    exact_sums: bool | Callable[[], bool] = False, scale: float = 1.0,
) -> Solution:
    """Solve the factored weighted ridge problem (see the module docstring for the formulas).

    With ``gram`` (the extended-precision Gram matrix, its split, or a function giving
    the split, called only when needed) the factor's solution is refined when that is
    provably more accurate (:func:`.gram.refine`).
    ``factor`` is in the state's scaled coordinates (true factor = ``scale * factor``):
    coefficients do not depend on the scale; information, RSS and P do.
    """
    d = spec.dim
    R = factor[:d, :d]
    z = factor[:d, d]
    rho = float(abs(factor[d, d])) * scale
    colnorm = np.sqrt(np.einsum("ij,ij->j", R, R))
    rcond = 0.0
    identifiable = bool(colnorm.min() * scale > INFORMATION_FLOOR)
    if identifiable:
        rcond, info = dtrcon(R / colnorm, norm="1", uplo="U", diag="N")
        rcond = float(rcond) if math.isfinite(rcond) else 0.0
        identifiable = bool(info == 0 and rcond > RCOND_TOL)
    extra = 0.0
    svd = None
    refined = False
    if identifiable:
        w, info = dtrtrs(R, z, lower=0, trans=0)
        w = np.asarray(w, dtype=np.float64).reshape(d)
        if gram is not None:
            w, refined = refine(R, rcond, w, gram, exact_sums)
        rank = d
        unidentified = np.zeros((0, d))
        # A refined solution is finite (refine checks); only the factor's own needs the test.
        if info != 0 or not (refined or np.isfinite(w).all()):  # pragma: no cover - excluded by the tests above
            identifiable = False
    if not identifiable:
        U, s, Vt = np.linalg.svd(R)
        floor = INFORMATION_FLOOR / scale
        cutoff = max(s[0] * RCOND_TOL, floor) if s[0] > 0 else floor
        rank = min(int(np.count_nonzero(s > cutoff)), d - 1)
        coords = U[:, :rank].T @ z
        w = Vt[:rank].T @ (coords / s[:rank])
        leftover = U[:, rank:].T @ z
        extra = float(leftover @ leftover) * scale * scale
        unidentified = Vt[rank:].copy()
        svd = (U, s, Vt)
    penalty = prior_weight * spec.ridge * float(w @ w) if spec.ridge > 0.0 else 0.0
    rss = max(rho * rho + extra - penalty, 0.0)
    dof = weight_sum - rank
    sigma = math.sqrt(rss / dof) if dof > 0.0 else None
    if sigma is not None and not math.isfinite(sigma):
        sigma = None
    return Solution(
        coefficients=w, identifiable=identifiable, rank=rank, rss=rss, dof=float(dof),
        sigma=sigma, rcond=rcond, unidentified=unidentified, refined=refined, scale=scale, _svd=svd,
    )


def inverse_moment(factor: NDArray[np.float64], solution: Solution) -> NDArray[np.float64]:
    """``P = A^{-1} = R^{-1} R^{-T}`` or, when not identifiable, its pseudo-inverse on the identified directions."""
    d = solution.coefficients.shape[0]
    if solution.identifiable:
        rinv, info = dtrtri(factor[:d, :d], lower=0)
        rinv = np.triu(rinv)
        P = rinv @ rinv.T
    else:
        assert solution._svd is not None
        _, s, Vt = solution._svd
        r = solution.rank
        basis = Vt[:r] / s[:r, None]
        P = basis.T @ basis
    c = solution.scale
    if c != 1.0:
        P = P / (c * c)
    if not np.isfinite(P).all():  # pragma: no cover - prevented by INFORMATION_FLOOR
        raise EngineError("inverse moment matrix outside the floating-point range")
    return 0.5 * (P + P.T)


def excitation(factor: NDArray[np.float64], solution: Solution, effective_n: float) -> Excitation:
    """Condition estimates and the least-informed direction of the information matrix."""
    d = solution.coefficients.shape[0]
    R = factor[:d, :d]
    _, s, Vt = np.linalg.svd(R)
    s = s * solution.scale
    colnorm = np.sqrt(np.einsum("ij,ij->j", R, R))
    safe = np.where(colnorm > 0, colnorm, 1.0)
    s_scaled = np.linalg.svd(R / safe, compute_uv=False)
    direction = Vt[-1].copy()
    if direction[np.argmax(np.abs(direction))] < 0:
        direction = -direction
    return Excitation(
        condition=_squared_ratio(s[0], s[-1]),
        scaled_condition=_squared_ratio(s_scaled[0], s_scaled[-1]) if colnorm.min() > 0 else None,
        least_information=float(s[-1] ** 2),
        least_informed_direction=direction,
        effective_n=float(effective_n),
    )


def predict(
    factor: NDArray[np.float64], solution: Solution, rows: NDArray[np.float64], level: float, forgets: bool = False
) -> Prediction:
    """Mean, standard errors and prediction intervals for the rows (``k x d``)."""
    if not (isinstance(level, (int, float)) and not isinstance(level, bool) and 0.0 < float(level) < 1.0):
        raise EngineError("level must be in (0, 1)")
    level = float(level)
    d = solution.coefficients.shape[0]
    w = solution.coefficients
    with np.errstate(over="ignore", invalid="ignore"):
        mean = rows @ w
        if solution.identifiable:
            u, _ = dtrtrs(factor[:d, :d], np.asfortranarray(rows.T), lower=0, trans=1)
            q = np.einsum("ij,ij->j", u, u)
            bounded = np.ones(rows.shape[0], dtype=bool)
        else:
            assert solution._svd is not None
            _, s, Vt = solution._svd
            r = solution.rank
            coords = rows @ Vt[:r].T / s[:r]
            q = np.einsum("ij,ij->i", coords, coords)
            null_part = np.linalg.norm(rows @ solution.unidentified.T, axis=1)
            size = np.linalg.norm(rows, axis=1)
            bounded = null_part <= 1e-8 * np.maximum(size, np.finfo(float).tiny)
        c = solution.scale
        if c != 1.0:
            q = q / (c * c)
    sigma = solution.sigma
    dof = solution.dof
    quantile = float(stats.t.ppf(0.5 + level / 2.0, dof)) if (sigma is not None and dof > 0) else None
    out_mean, se_fit, se_pred, lower, upper = [], [], [], [], []
    for i in range(rows.shape[0]):
        m = float(mean[i])
        out_mean.append(m if math.isfinite(m) else None)
        ok = sigma is not None and bool(bounded[i]) and math.isfinite(q[i]) and math.isfinite(m)
        if ok and quantile is not None:
            sf = sigma * math.sqrt(q[i])
            sp = sigma * math.sqrt(1.0 + q[i])
            lo, hi = m - quantile * sp, m + quantile * sp
            if all(math.isfinite(v) for v in (sf, sp, lo, hi)):
                se_fit.append(sf)
                se_pred.append(sp)
                lower.append(lo)
                upper.append(hi)
                continue
        se_fit.append(None)
        se_pred.append(None)
        lower.append(None)
        upper.append(None)
    return Prediction(out_mean, se_fit, se_pred, lower, upper, level, float(dof), quantile, forgets)


def _squared_ratio(big: float, small: float) -> float | None:
    if small <= 0.0:
        return None
    ratio = big / small
    if not math.isfinite(ratio) or ratio > 1e150:
        return None
    return float(ratio * ratio)
