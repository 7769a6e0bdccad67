"""Extended-precision Gram matrix and the refinement it allows.

Besides the square-root factor the state keeps the weighted augmented Gram
matrix ``G = [X y]^T B [X y] + b_0 delta diag(I, 0)`` in ``numpy.longdouble``
(x86-64 80-bit extended: 64-bit significand, unit roundoff ``u_e = 2^-64``).
It lives in the same scaled coordinates as the factor (true Gram = scale^2 G).
Rows are buffered ``FOLD_ROWS`` at a time and folded in one product (the
buffer is part of the state, and folding happens at fixed row counts, so the
state stays deterministic and serialisable bit for bit).

Why: the factor's solution ``w_0`` is backward stable, but for problems with
large residuals its forward error carries the ``kappa^2 * residual`` term of
least-squares sensitivity (Golub & Van Loan, *Matrix Computations*, 4th ed.,
Thm 5.3.1), which costs digits on e.g. high-degree polynomial fits. At read
time, mixed-precision iterative refinement of the normal equations
``A w = b`` held in ``G``, with the double factor as preconditioner,

    w_{k+1} = w_k + R^{-1} R^{-T} (b - A w_k)      (residual exactly rounded),

converges whenever ``kappa(A) u_d << 1`` (Higham, *Accuracy and Stability of
Numerical Algorithms*, 2nd ed., ch. 12) to the solution of the equations as
accumulated in extended precision, whose error is of order
``kappa(A) u_e`` (``u_e = 2^-64``) instead of ``kappa(A) u_d``. Where it
would not converge (``kappa(A) u_d d >= 1e-4``), the factor's solution is used
as it is; so is it after a block backfill, whose Gram contribution is
accumulated in double precision for speed.
"""

from __future__ import annotations

import math

import numpy as np
from numpy.typing import NDArray
from scipy.linalg.lapack import dtrtrs

__all__ = ["FOLD_ROWS", "EXTENDED", "new_gram", "fold", "refine", "split_pairs", "join_pairs"]

#: Rows buffered before they are folded into the Gram matrix.
FOLD_ROWS = 32

EXTENDED = np.longdouble
#: Unit roundoff of the extended type (2^-64 on x86-64; 2^-53 where long double is double).
EXTENDED_ROUNDOFF = float(np.finfo(EXTENDED).eps) / 2.0
DOUBLE_ROUNDOFF = float(np.finfo(np.float64).eps) / 2.0

#: Refine only while kappa(A) * u_d stays below this (fast, certain convergence).
CONVERGENCE_LIMIT = 1e-4
REFINE_STEPS = 3


def new_gram(dim: int, ridge: float) -> NDArray[np.longdouble]:
    gram = np.zeros((dim + 1, dim + 1), dtype=EXTENDED)
    if ridge > 0.0:
        idx = np.arange(dim)
        gram[idx, idx] = EXTENDED(ridge)
    return gram


def fold(gram: NDArray[np.longdouble], rows: NDArray[np.float64]) -> NDArray[np.longdouble]:
    """Return ``G + R^T R`` for the buffered (already scaled) rows ``R``, in extended precision."""
    if rows.shape[0] == 0:
        return gram
    r = rows.astype(EXTENDED)
    return gram + r.T @ r


def refine(
    R: NDArray[np.float64], rcond: float, w0: NDArray[np.float64],
    gram: NDArray[np.longdouble], exact_sums: bool,
) -> tuple[NDArray[np.float64], bool]:
    """Refine ``w0`` against the extended Gram matrix when that cannot lose accuracy.

    With ``kappa = 1/rcond`` the (LAPACK ``dtrcon``) condition estimate of the
    column-equilibrated factor, the
    factor's solution has a first-order error of order ``u_d kappa`` (plus a
    ``kappa^2 tan(theta)`` term for large residuals; Golub & Van Loan, Thm
    5.3.1) and the normal equations held in ``G`` one of order
    ``kappa^2 * (relative error of G)``. Refinement is used when
    (a) ``kappa <= u_d / u_e`` (2048 on x86-64), so even an ``u_e``-accurate
    ``G`` is good enough, or (b) ``exact_sums``: every entry of ``G`` was
    accumulated without rounding (:func:`sums_are_exact`), so its solution is
    exact up to the refinement's own roundoff. It must also converge:
    ``kappa^2 u_d d < CONVERGENCE_LIMIT``. Otherwise ``w0`` is returned.

    Each residual ``b - A w`` is evaluated exactly rounded from the double-double
    split of ``G`` and of the iterate (Dekker's product, ``math.fsum``), so the
    fixed point is the solution of the normal equations as held in ``G``.
    """
    d = w0.shape[0]
    if EXTENDED_ROUNDOFF >= DOUBLE_ROUNDOFF:
        return w0, False
    if not rcond > 0.0:
        return w0, False
    kappa = 1.0 / rcond  # LAPACK dtrcon estimate (1-norm) for the column-equilibrated factor
    kappa_a = kappa * kappa
    if kappa_a * DOUBLE_ROUNDOFF * d > CONVERGENCE_LIMIT:
        return w0, False
    if not (exact_sums or kappa <= DOUBLE_ROUNDOFF / EXTENDED_ROUNDOFF):
        return w0, False
    pairs = split_pairs(gram)
    a_hi, a_lo = pairs[0][:d, :d], pairs[1][:d, :d]
    b_hi, b_lo = pairs[0][:d, d], pairs[1][:d, d]
    a_hi_hi, a_hi_lo = _split(a_hi)
    terms = np.empty((d, 2 * d + 3))
    terms[:, 0] = b_hi
    terms[:, 1] = b_lo
    # One step already reaches the normal-equations limit when the contraction
    # kappa(A) u_d is tiny; more are needed only close to CONVERGENCE_LIMIT.
    steps = 1 if kappa_a * DOUBLE_ROUNDOFF * d < 1e-8 else REFINE_STEPS
    w_hi = w0.copy()
    w_lo = np.zeros(d)
    for _ in range(steps):
        resid = _exact_residual(terms, a_hi, a_lo, a_hi_hi, a_hi_lo, w_hi, w_lo)
        if resid is None:
            return w0, False
        v, _ = dtrtrs(R, resid, lower=0, trans=1)
        step, _ = dtrtrs(R, v, lower=0, trans=0)
        step = np.asarray(step, dtype=np.float64)
        if not np.abs(step).max() > DOUBLE_ROUNDOFF * np.abs(w_hi).max():
            break  # converged: the correction is below one unit in the last place
        total = w_hi + step  # two-sum: keep what the addition rounds off in w_lo
        bb = total - w_hi
        w_lo = w_lo + ((w_hi - (total - bb)) + (step - bb))
        w_hi = total
    refined = w_hi + w_lo
    if not np.isfinite(refined).all():
        return w0, False
    return refined, True


def _split(a: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Dekker's split ``a = hi + lo`` with 26-bit halves, so products of halves are exact."""
    c = 134217729.0 * a
    hi = c - (c - a)
    return hi, a - hi


def _exact_residual(terms, a_hi, a_lo, a_hi_hi, a_hi_lo, w_hi, w_lo) -> NDArray[np.float64] | None:
    """``b - A w`` rounded once, for ``A = a_hi + a_lo``, ``b = b_hi + b_lo``, ``w = w_hi + w_lo``.

    ``terms`` holds ``b_hi, b_lo`` in its first two columns; the rest is filled
    here with the negated exact parts of ``A w``, and each row is summed by ``fsum``.
    """
    d = w_hi.shape[0]
    with np.errstate(over="ignore", invalid="ignore"):
        w_hi_hi, w_hi_lo = _split(w_hi)
        p = a_hi * w_hi  # Dekker's two-product: p + e == a_hi * w_hi exactly
        e = ((a_hi_hi * w_hi_hi - p) + a_hi_hi * w_hi_lo + a_hi_lo * w_hi_hi) + a_hi_lo * w_hi_lo
        np.negative(p, out=terms[:, 3:3 + d])
        np.negative(e, out=terms[:, 3 + d:])
        # The cross terms are u_d-relative small: one rounding of their sum is harmless.
        terms[:, 2] = -(a_hi @ w_lo + a_lo @ w_hi)
    if not np.isfinite(terms).all():
        return None
    return np.array([math.fsum(row) for row in terms.tolist()])


def value_span(rows: NDArray[np.float64]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Per column: the least exponent of a nonzero value's last significant bit, and the largest exponent.

    ``v = f 2^e`` with ``f`` in [0.5, 1); the last set bit of the 53-bit
    significand ``f 2^53`` gives the value's least significant bit.
    """
    v = np.abs(rows)
    f, e = np.frexp(v)
    significand = (f * 2.0**53).astype(np.int64)
    _, low = np.frexp((significand & -significand).astype(np.float64))
    lsb = e.astype(np.int64) - 54 + low
    nonzero = v > 0.0
    return (np.where(nonzero, lsb, _NO_LSB).min(axis=0), np.where(nonzero, e, _NO_EXP).max(axis=0).astype(np.int64))


def sums_are_exact(lsb: NDArray[np.int64], top: NDArray[np.int64], n_terms: int) -> bool:
    """True when every ``sum_i r_ij r_ik`` over ``n_terms`` rows is exact in the extended type.

    Each product is a multiple of ``2^(lsb_j + lsb_k)`` below ``2^(top_j + top_k)``; a
    sum of ``n`` of them needs ``top_j + top_k - lsb_j - lsb_k + log2 n`` significand bits.
    """
    present = lsb < _NO_LSB
    if not present.any():
        return True
    span = int((top[present] - lsb[present]).max())
    bits = np.finfo(EXTENDED).nmant + 1
    return 2 * span + max(int(n_terms), 1).bit_length() <= bits


_NO_LSB = 1 << 20
_NO_EXP = -(1 << 20)


def split_pairs(gram: NDArray[np.longdouble]) -> NDArray[np.float64]:
    """Exact portable form of an extended matrix: ``hi = double(G)``, ``lo = double(G - hi)``, stacked."""
    hi = gram.astype(np.float64)
    lo = (gram - hi.astype(EXTENDED)).astype(np.float64)
    return np.stack([hi, lo])


def join_pairs(pairs: NDArray[np.float64]) -> NDArray[np.longdouble]:
    return pairs[0].astype(EXTENDED) + pairs[1].astype(EXTENDED)
