"""The square-root information factor and the orthogonal updates that maintain it.

The state of a weighted ridge least-squares problem with ``d`` coefficients is
kept as one upper-triangular ``(d+1) x (d+1)`` matrix (the *augmented factor*)

    M = [[R, z],
         [0, rho]]

with ``R^T R = A`` (the weighted information matrix, ridge prior included),
``R^T z = X^T B y`` and ``rho^2`` the minimum of the weighted objective. It is
the triangular factor of a QR decomposition of the weighted data matrix
``[sqrt(b_i) x_i^T, sqrt(b_i) y_i]`` stacked under the prior rows
``[sqrt(b_0 delta) I, 0]`` (Golub & Van Loan, *Matrix Computations*, 4th ed.,
sec. 6.5.3 "updating the QR factorization"; Bierman, *Factorization Methods
for Discrete Sequential Estimation*, 1977, ch. V, square-root information
filter). Forgetting is carried by a scalar scale outside ``M`` (see
:mod:`.state`): each new row enters divided by it and is absorbed by
Householder reflections (LAPACK ``dtpqrt``), which are backward stable. The
inverse moment matrix ``P = A^{-1}`` is never propagated, so there is no
"covariance windup": the true factor only ever shrinks under forgetting and
grows by finite rows.

Every function here is pure arithmetic on arrays.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg.lapack import dtpqrt

__all__ = ["new_factor", "absorb_rows", "block_size", "BLOCK_CHUNK"]

#: Rows handed to LAPACK per call on the block path (bounded working memory).
BLOCK_CHUNK = 8192


def new_factor(dim: int, ridge: float) -> np.ndarray:
    """Return the augmented factor of the prior alone: ``R = sqrt(delta) I``, ``z = 0``, ``rho = 0``.

    The array is Fortran-ordered so LAPACK updates it in place without copies.
    """
    factor = np.zeros((dim + 1, dim + 1), dtype=np.float64, order="F")
    if ridge > 0.0:
        idx = np.arange(dim)
        factor[idx, idx] = np.sqrt(ridge)
    return factor


def block_size(n: int) -> int:
    """LAPACK ``dtpqrt`` block size for an ``n``-column factor (measured: 8 is fastest from d = 8 to 128)."""
    return n if n < 8 else 8


def absorb_rows(factor: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Absorb weighted rows ``[x^T, y]`` into the augmented factor.

    Computes the triangular factor of ``[[M], [rows]]`` by the triangular-
    pentagonal QR factorisation (LAPACK ``dtpqrt``, Householder reflections),
    i.e. ``M'^T M' = M^T M + rows^T rows``. ``factor`` must be Fortran-ordered
    float64 and is overwritten; ``rows`` (``k x (d+1)``, Fortran-ordered) is
    overwritten with the reflectors. Returns the updated factor (the same
    buffer when LAPACK could work in place).
    """
    out, _v, _t, info = dtpqrt(0, block_size(factor.shape[0]), factor, rows, overwrite_a=1, overwrite_b=1)
    if info != 0:  # pragma: no cover - only on an argument error, a programming bug
        raise RuntimeError(f"dtpqrt failed with info={info}")
    return out
