"""Independent reference computations for the engine tests.

Nothing here imports :mod:`leastwise`: these are the batch computations the
streaming engine is checked against.

* :func:`weights_forgetting`, :func:`weights_half_life` — the weights ``b_i``
  and the prior weight ``b_0`` exactly as ``DESIGN.md`` ("What exact means")
  defines them.
* :func:`augmented_system` / :func:`batch_solve` — the weighted ridge problem
  written as one ordinary least-squares problem

      [ sqrt(b) X           ]       [ sqrt(b) y ]
      [ sqrt(b_0 delta) I   ] w  ~  [ 0         ]

  solved by a backward-stable LAPACK driver (``numpy.linalg.lstsq``, SVD based;
  common practice: the augmented-system form of ridge regression).
* :func:`lre` — log relative error as used by NIST StRD assessments
  (McCullough, "Assessing the reliability of statistical software", The
  American Statistician 52(4), 1998): ``-log10(|est - cert| / |cert|)``, the
  absolute error when ``cert == 0``, capped at 15 (the certified digits).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = [
    "LRE_CAP", "lre", "lre_min", "weights_forgetting", "weights_half_life",
    "augmented_system", "batch_solve", "Batch",
]

#: NIST certifies 15 significant digits, so an LRE above 15 means nothing.
LRE_CAP = 15.0


def lre(estimate: float, certified: float) -> float:
    """Log relative error of one value (absolute error when ``certified == 0``), capped at 15, floored at 0."""
    estimate = float(estimate)
    certified = float(certified)
    if not math.isfinite(estimate):
        return 0.0
    err = abs(estimate - certified)
    if certified != 0.0:
        err /= abs(certified)
    if err == 0.0:
        return LRE_CAP
    return max(0.0, min(LRE_CAP, -math.log10(err)))


def lre_min(estimates, certified) -> float:
    """Minimum LRE over the components (the NIST convention for a coefficient vector)."""
    est = np.asarray(estimates, dtype=np.float64).reshape(-1)
    cert = np.asarray(certified, dtype=np.float64).reshape(-1)
    assert est.shape == cert.shape
    return min(lre(e, c) for e, c in zip(est, cert))


def weights_forgetting(n: int, lam: float) -> tuple[np.ndarray, float]:
    """``b_i = lambda^(n-i)`` for i = 1..n and ``b_0 = lambda^n`` (DESIGN.md)."""
    i = np.arange(1, n + 1, dtype=np.float64)
    return lam ** (n - i), lam ** float(n)


def weights_half_life(times, half_life: float) -> tuple[np.ndarray, float]:
    """``b_i = 2^(-(t_n - t_i)/h)`` and ``b_0 = 2^(-(t_n - t_1)/h)`` (DESIGN.md)."""
    t = np.asarray(times, dtype=np.float64)
    return 2.0 ** (-(t[-1] - t) / half_life), 2.0 ** (-(t[-1] - t[0]) / half_life)


def augmented_system(X, y, b, b0: float, ridge: float) -> tuple[np.ndarray, np.ndarray]:
    """The augmented weighted matrix and right-hand side (prior rows only when ``b_0 delta > 0``)."""
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    sb = np.sqrt(np.asarray(b, dtype=np.float64))
    d = X.shape[1]
    A = sb[:, None] * X
    rhs = sb * y
    if ridge > 0.0 and b0 > 0.0:
        A = np.vstack([A, math.sqrt(b0 * ridge) * np.eye(d)])
        rhs = np.concatenate([rhs, np.zeros(d)])
    return A, rhs


@dataclass(frozen=True)
class Batch:
    """A batch solution of the weighted ridge problem and the quantities derived from it."""

    coefficients: np.ndarray
    condition: float          # 2-norm condition number of the augmented weighted matrix
    rss: float                # weighted data RSS: sum b_i (y_i - x_i^T w)^2 (no penalty)
    weight_sum: float         # S1 = sum b_i
    sigma: float | None       # sqrt(rss / (S1 - d)) when S1 > d
    inverse_moment: np.ndarray  # inv(A_aug^T A_aug) = inv(b0 delta I + sum b_i x_i x_i^T), via the SVD


def batch_solve(X, y, b, b0: float, ridge: float) -> Batch:
    """Solve the augmented system with ``numpy.linalg.lstsq`` (LAPACK gelsd) and derive sigma and P."""
    X = np.asarray(X, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    d = X.shape[1]
    A, rhs = augmented_system(X, y, b, b0, ridge)
    w = np.linalg.lstsq(A, rhs, rcond=None)[0]
    _, s, vt = np.linalg.svd(A, full_matrices=False)
    cond = float(s[0] / s[-1]) if s[-1] > 0 else math.inf
    r = y - X @ w
    rss = float(np.sum(b * r * r))
    s1 = float(b.sum())
    sigma = math.sqrt(rss / (s1 - d)) if s1 > d else None
    # inv(A^T A) = V S^-2 V^T from the SVD of A: the same matrix as inverting the
    # normal matrix, without squaring the condition number first.
    if math.isfinite(cond) and A.shape[0] >= d:
        P = (vt.T / (s * s)) @ vt
    else:
        P = np.full((d, d), np.nan)
    return Batch(w, cond, rss, s1, sigma, 0.5 * (P + P.T))


def exact_solve(A, rhs) -> np.ndarray:
    """The exact least-squares solution of the float system ``A w ~ rhs``, rounded once to float64.

    Normal equations in rational arithmetic (``fractions.Fraction``: every float is a
    rational, so nothing is rounded until the end); common practice for a ground truth.
    Small problems only (d <= 8, a few hundred rows).
    """
    from fractions import Fraction

    A = np.asarray(A, dtype=np.float64)
    rhs = np.asarray(rhs, dtype=np.float64)
    n, d = A.shape
    F = [[Fraction(float(v)) for v in row] for row in A]
    r = [Fraction(float(v)) for v in rhs]
    N = [[sum(F[k][i] * F[k][j] for k in range(n)) for j in range(d)] for i in range(d)]
    b = [sum(F[k][i] * r[k] for k in range(n)) for i in range(d)]
    for c in range(d):  # Gauss-Jordan; N is symmetric positive definite, no pivoting needed
        p = N[c][c]
        for i in range(d):
            if i != c and N[i][c] != 0:
                f = N[i][c] / p
                N[i] = [a - f * q for a, q in zip(N[i], N[c])]
                b[i] -= f * b[c]
    return np.array([float(b[i] / N[i][i]) for i in range(d)])
