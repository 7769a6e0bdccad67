"""CUSUM of recursive residuals (Brown, Durbin & Evans 1975), batch form.

Reference
---------
Brown, R. L., Durbin, J. & Evans, J. M. (1975). "Techniques for testing the
constancy of regression relationships over time." Journal of the Royal
Statistical Society, Series B 37(2), 149-192.

Formula
-------
With recursive residuals ``w_{k+1}, ..., w_T`` (``k`` = number of coefficients,
the first ``k`` observations produce none) the CUSUM is

    W_r = (1 / sigma_hat) * sum_{j=k+1}^{r} w_j ,        r = k+1, ..., T

Under a stable model ``W_r`` behaves like a random walk, and the test rejects
constancy at level alpha if ``W_r`` leaves the band

    +/- [ a * sqrt(T-k) + 2 a (r-k) / sqrt(T-k) ]

anywhere, with ``a`` from BDE (1975), Table 1 / eq. (19): 0.850 (10 %),
0.948 (5 %), 1.143 (1 %).

This module works on the *used* recursive residuals only: pass the array
``w = (w_{k+1}, ..., w_T)`` of length ``m = T - k``; position ``i`` of the
output is ``r - k = i + 1``.  ``sigma_hat`` is the sample standard deviation of
``w`` with ``ddof=1`` (about its mean), which is what statsmodels'
``RecursiveLSResults.cusum`` uses; with that choice :func:`cusum` and
:func:`cusum_bounds` reproduce ``RecursiveLSResults.cusum`` and
``RecursiveLSResults._cusum_significance_bounds`` exactly.  (BDE's own
sigma_hat^2 is the full-sample residual mean square ``sum w_j^2 / (T-k)``; the
two agree to first order under the null.)

Note: statsmodels 0.14/0.15 uses 0.950 for the 10 % level, a typo for BDE's
0.850; here the published 0.850 is used.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: BDE (1975) Table 1 constants ``a`` for the CUSUM band, keyed by the
#: two-sided significance level.
BDE_CUSUM_CONSTANTS: dict[float, float] = {0.10: 0.850, 0.05: 0.948, 0.01: 1.143}


def bde_constant(alpha: float) -> float:
    """Return BDE (1975) Table 1 constant ``a`` for level ``alpha`` (0.10, 0.05, 0.01)."""
    for level, a in BDE_CUSUM_CONSTANTS.items():
        if abs(alpha - level) < 1e-12:
            return a
    raise ValueError(f"no published BDE constant for alpha={alpha!r}; use 0.10, 0.05 or 0.01")


def cusum(w) -> np.ndarray:
    """Batch CUSUM ``W_r = cumsum(w) / std(w, ddof=1)`` over the used residuals.

    ``w`` holds ``w_{k+1..T}`` (length ``m >= 2``).  Equals statsmodels
    ``RecursiveLSResults.cusum`` when fed ``resid_recursive[k:]``.
    """
    w = np.asarray(w, dtype=np.float64)
    if w.ndim != 1 or w.size < 2:
        raise ValueError("need a 1-d array of at least 2 recursive residuals")
    s = np.std(w, ddof=1)
    if not s > 0.0:
        raise ValueError("recursive residuals have zero spread; CUSUM undefined")
    return np.cumsum(w) / s


def cusum_bounds(m: int, alpha: float = 0.05, points=None) -> tuple[np.ndarray, np.ndarray]:
    """Lower and upper BDE lines ``-/+ [a sqrt(m) + 2 a j / sqrt(m)]``.

    ``m = T - k`` is the number of recursive residuals, ``points`` the values of
    ``j = r - k`` at which to evaluate (default ``[0, m]``, the two ends, like
    statsmodels).  ``points = j`` corresponds to statsmodels' ``points = j + k``.
    """
    a = bde_constant(alpha)
    if m < 1:
        raise ValueError("m must be >= 1")
    root = math.sqrt(m)
    j = np.array([0, m], dtype=np.float64) if points is None else np.asarray(points, dtype=np.float64)
    upper = a * root + 2.0 * a * j / root
    return -upper, upper


@dataclass(frozen=True)
class CusumTest:
    """Outcome of the batch BDE CUSUM test over a whole sample."""

    statistic: float  #: max_j |W_j| / line_j  (> 1 means rejection)
    alpha: float
    reject: bool
    first_crossing: int | None  #: j = r - k of the first crossing (1-based), or None


def cusum_test(w, alpha: float = 0.05) -> CusumTest:
    """Batch BDE CUSUM test: reject if ``|W_j|`` exceeds the line anywhere, j = 1..m."""
    W = cusum(w)
    m = W.size
    _, upper = cusum_bounds(m, alpha, points=np.arange(1, m + 1))
    ratio = np.abs(W) / upper
    over = np.nonzero(ratio > 1.0)[0]
    first = int(over[0]) + 1 if over.size else None
    return CusumTest(float(ratio.max()), alpha, first is not None, first)
