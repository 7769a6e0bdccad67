"""CUSUM of squares of recursive residuals (Brown, Durbin & Evans 1975), batch form.

References
----------
Brown, R. L., Durbin, J. & Evans, J. M. (1975), JRSS B 37(2), 149-192, sec. 2.4.
Durbin, J. (1969). "Tests for serial correlation in regression analysis based
on the periodogram of least-squares residuals." Biometrika 56(1), 1-15
(Table 1: critical values c0 of the Kolmogorov-Smirnov-type statistic).
Edgerton, D. & Wells, C. (1994). "Critical values for the CUSUMSQ statistic in
medium and large sized samples." Oxford Bulletin of Economics and Statistics
56(3), 355-365 (response-surface approximation used here).

Formula
-------
    s_r = sum_{j=k+1}^{r} w_j^2 / sum_{j=k+1}^{T} w_j^2 ,     r = k+1, ..., T

Under a stable model ``s_r`` has a beta distribution with mean ``(r-k)/(T-k)``;
the test rejects at level alpha if ``s_r`` leaves the band

    (r - k) / (T - k)  +/-  c0

anywhere.  ``c0`` is Durbin's (1969) tabulated value, approximated here by
Edgerton & Wells (1994):

    n  = (T - k) / 2 - 1
    c0 = b1 / sqrt(n) + b2 / n + b3 / n^1.5

with (b1, b2, b3) tabulated per one-sided level alpha/2 in {0.10, 0.05, 0.025,
0.01, 0.005}.  These are the numbers statsmodels uses; :func:`cusum_squares`
and :func:`cusum_squares_bounds` reproduce ``RecursiveLSResults.cusum_squares``
and ``_cusum_squares_significance_bounds`` exactly.

The statistic needs the whole-sample total in its denominator, so it is a
retrospective test; there is no O(1) streaming form (with the current horizon
``T = r`` the statistic at ``r`` is identically 1).  In the stream, changes of
scale are watched by the scale ratio (:mod:`leastwise.drift.ewma`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: Edgerton & Wells (1994) coefficients; columns = one-sided levels.
EDGERTON_WELLS_LEVELS: tuple[float, ...] = (0.10, 0.05, 0.025, 0.01, 0.005)
EDGERTON_WELLS_COEFFICIENTS: tuple[tuple[float, ...], ...] = (
    (1.0729830, 1.2238734, 1.3581015, 1.5174271, 1.6276236),
    (-0.6698868, -0.6700069, -0.6701218, -0.6702672, -0.6703724),
    (-0.5816458, -0.7351697, -0.8858694, -1.0847745, -1.2365861),
)


def cusum_squares_critical_value(m: int, alpha: float = 0.05) -> float:
    """Edgerton-Wells approximation of Durbin's c0 for ``m = T - k`` residuals.

    ``alpha`` is the two-sided level (0.20, 0.10, 0.05, 0.02, 0.01).  The
    approximation is intended for ``n = m/2 - 1`` of about 5 and more.
    """
    n = 0.5 * m - 1.0
    if n <= 0:
        raise ValueError("need at least 3 recursive residuals")
    half = alpha / 2.0
    for ix, level in enumerate(EDGERTON_WELLS_LEVELS):
        if abs(half - level) < 1e-12:
            b1, b2, b3 = (row[ix] for row in EDGERTON_WELLS_COEFFICIENTS)
            return b1 / n**0.5 + b2 / n + b3 / n**1.5
    raise ValueError(f"no tabulated CUSUMSQ value for alpha={alpha!r}")


def cusum_squares(w) -> np.ndarray:
    """Batch ``s_r = cumsum(w^2) / sum(w^2)`` over the used residuals ``w_{k+1..T}``."""
    w = np.asarray(w, dtype=np.float64)
    if w.ndim != 1 or w.size < 1:
        raise ValueError("need a 1-d array of recursive residuals")
    numer = np.cumsum(w**2)
    if not numer[-1] > 0.0:
        raise ValueError("all recursive residuals are zero; CUSUMSQ undefined")
    return numer / numer[-1]


def cusum_squares_bounds(m: int, alpha: float = 0.05, points=None) -> tuple[np.ndarray, np.ndarray]:
    """Band ``j/m -/+ c0`` at ``points`` = values of ``j = r - k`` (default ``[0, m]``)."""
    crit = cusum_squares_critical_value(m, alpha)
    j = np.array([0, m], dtype=np.float64) if points is None else np.asarray(points, dtype=np.float64)
    line = j / m
    return line - crit, line + crit


@dataclass(frozen=True)
class CusumSquaresTest:
    """Outcome of the batch CUSUMSQ test."""

    statistic: float  #: max_j |s_j - j/m|
    critical_value: float
    alpha: float
    reject: bool
    first_crossing: int | None  #: j = r - k of the first crossing (1-based), or None


def cusum_squares_test(w, alpha: float = 0.05) -> CusumSquaresTest:
    """Batch BDE CUSUM-of-squares test over a whole sample."""
    s = cusum_squares(w)
    m = s.size
    crit = cusum_squares_critical_value(m, alpha)
    dev = np.abs(s - np.arange(1, m + 1) / m)
    over = np.nonzero(dev > crit)[0]
    first = int(over[0]) + 1 if over.size else None
    return CusumSquaresTest(float(dev.max()), crit, alpha, first is not None, first)

