"""Tests for a change of regression coefficients against a reference.

Wald test, independent estimates
--------------------------------
For two estimates from *disjoint, independent* samples (another machine, a
fit on an earlier window that the current estimate does not contain),
``b1 ~ N(beta, C1)`` and ``b0 ~ N(beta, C0)`` under "no change", so

    W = (b1 - b0)' (C0 + C1)^+ (b1 - b0)  ~  chi2(rank(C0 + C1))

(Wald 1943; the two-sample form e.g. in Greene, Econometric Analysis, sec.
"Tests of structural change with unequal variances", Andrews & Fair 1988).
``^+`` is the Moore-Penrose inverse, the rank is counted from the eigenvalues
above ``rtol * largest``.  Chi-square is asymptotic: with sigma estimated the
small-sample law is closer to ``rank * F(rank, df)``.

Wald test, nested samples (reference = earlier state of the same stream)
----------------------------------------------------------------------
When ``b0`` is a snapshot of the same stream and ``b1`` the current estimate
(ordinary least squares, no forgetting), ``b1`` uses all of ``b0``'s data and
the two are *not* independent.  Under no change ``b1`` is efficient and
``b0`` is not, so ``Cov(b0, b1) = Var(b1)`` and

    Var(b0 - b1) = C0 - C1          (Hausman 1978, Econometrica 46(6), lemma 2.1)

With a common sigma^2, ``C0 - C1 = sigma^2 (A_old^{-1} - A_pooled^{-1})``,
positive semi-definite; ``nested=True`` uses that difference (pseudo-inverse,
negative eigenvalues from estimation noise clipped to zero).  Using
``C0 + C1`` there would be far too conservative.

Chow tests (Chow 1960, Econometrica 28(3), 591-605)
---------------------------------------------------
"Is the new data fitted by the old coefficients?"  With RSS of the old sample
(n_old observations), of the new data alone (n_new) and of the pooled fit,
p coefficients and equal error variances:

    F = ((RSS_pooled - RSS_old - RSS_new) / p) / ((RSS_old + RSS_new) / (n_old + n_new - 2p))
      ~ F(p, n_old + n_new - 2p)                                   (Chow's first test)

needs ``n_new > p`` (the new data must determine a fit of its own).  Otherwise,
or when no separate fit is kept, Chow's second ("predictive") test

    F = ((RSS_pooled - RSS_old) / n_new) / (RSS_old / (n_old - p))  ~  F(n_new, n_old - p)

For a stream without forgetting, ``RSS_pooled - RSS_old`` is exactly the sum of
squared recursive residuals since the snapshot (BDE 1975, eq. (4): the
recursive residuals decompose the RSS), so the predictive test needs only the
residual stream: ``F = (sum_new w^2 / n_new) / s_old^2``.

Independence assumption: the Chow forms assume the old and new *observations*
are independent with a common variance, which is the regression model itself
(no assumption that the two estimates are independent: the nesting is handled
by the RSS decomposition).  Under forgetting none of these laws is exact;
pass ``effective_n`` counts (see :mod:`leastwise.drift.state`) and read the
p-values as approximate.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats


@dataclass(frozen=True)
class ChangeTest:
    """Result of a coefficient-change test."""

    name: str
    statistic: float
    df: tuple[float, ...]
    p_value: float


def _pinv_psd(m: np.ndarray, rtol: float) -> tuple[np.ndarray, int]:
    m = 0.5 * (m + m.T)
    vals, vecs = np.linalg.eigh(m)
    top = float(vals.max()) if vals.size else 0.0
    if not top > 0.0:
        return np.zeros_like(m), 0
    keep = vals > rtol * top
    inv = (vecs[:, keep] / vals[keep]) @ vecs[:, keep].T
    return inv, int(keep.sum())


def wald_change(b1, C1, b0, C0, *, nested: bool = False, rtol: float = 1e-10) -> ChangeTest:
    """Wald chi-square test of ``b1 == b0``.

    ``nested=False``: independent estimates, ``Var(b1 - b0) = C0 + C1``.
    ``nested=True``: ``b0`` is an earlier OLS state of the same stream as
    ``b1``, ``Var(b1 - b0) = C0 - C1`` (Hausman 1978).
    """
    b1 = np.asarray(b1, dtype=np.float64).ravel()
    b0 = np.asarray(b0, dtype=np.float64).ravel()
    C1 = np.asarray(C1, dtype=np.float64)
    C0 = np.asarray(C0, dtype=np.float64)
    p = b1.size
    if b0.size != p or C1.shape != (p, p) or C0.shape != (p, p):
        raise ValueError("shapes of b1, C1, b0, C0 do not agree")
    V = C0 - C1 if nested else C0 + C1
    inv, rank = _pinv_psd(V, rtol)
    if rank == 0:
        raise ValueError("covariance of the difference is zero; test undefined")
    d = b1 - b0
    w = float(d @ inv @ d)
    return ChangeTest("wald", w, (float(rank),), float(stats.chi2.sf(w, rank)))


def chow_test(rss_pooled: float, rss_old: float, rss_new: float,
              n_old: float, n_new: float, p: int) -> ChangeTest:
    """Chow's (1960) first test: separate fits on old and new data vs the pooled fit."""
    df2 = n_old + n_new - 2 * p
    if p < 1 or df2 <= 0 or n_new <= p or n_old <= p:
        raise ValueError("Chow test needs n_old > p, n_new > p")
    num = (rss_pooled - rss_old - rss_new) / p
    den = (rss_old + rss_new) / df2
    if not den > 0.0:
        raise ValueError("zero residual variance; test undefined")
    f = max(num, 0.0) / den
    return ChangeTest("chow", f, (float(p), float(df2)), float(stats.f.sf(f, p, df2)))


def chow_predictive_test(rss_pooled: float, rss_old: float, n_old: float, n_new: float,
                         p: int) -> ChangeTest:
    """Chow's (1960) predictive test: does the old fit predict the new data?

    ``rss_pooled - rss_old`` equals the sum of squared recursive residuals of
    the new observations when there is no forgetting.
    """
    df2 = n_old - p
    if n_new < 1 or df2 <= 0:
        raise ValueError("predictive Chow test needs n_new >= 1 and n_old > p")
    if not rss_old > 0.0:
        raise ValueError("zero residual variance in the old sample; test undefined")
    f = max(rss_pooled - rss_old, 0.0) / n_new / (rss_old / df2)
    return ChangeTest("chow_predictive", f, (float(n_new), float(df2)),
                      float(stats.f.sf(f, n_new, df2)))
