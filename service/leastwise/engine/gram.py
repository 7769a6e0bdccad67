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

Read-time cost (``State.solution``): the fold of the buffered rows and its
double-double split are memoised per state content (:class:`FoldMemo`), the
one-step refinement used at moderate condition skips every operation whose
value is known in advance (:func:`_refine_once`), and long rows are summed by
error-free extraction instead of ``math.fsum`` (:func:`exact_row_sums`); each
gives the same bits as the plain computation (``tests/engine/test_solution_fast.py``
keeps the previous implementation to compare against).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.linalg.blas import dnrm2 as _nrm2
from scipy.linalg.lapack import dtrtrs

__all__ = [
    "FOLD_ROWS", "NATIVE", "EXTENDED", "new_gram", "fold", "refine", "split_pairs", "join_pairs",
    "GramSplit", "split_gram", "FoldMemo", "fold_memo", "fold_continuing", "accumulate_rows", "exact_row_sums", "row_gram",
]

#: Rows buffered before they are folded into the Gram matrix.
FOLD_ROWS = 32

try:  # the compiled kernels (service/native, built by setup.py when a C compiler is at hand)
    import _leastwise_native as _native_lib
except ImportError:  # pragma: no cover - CI requires the module (tests/engine/test_native.py)
    _native_lib = None
#: True when the extended sums of :func:`fold` and :func:`accumulate_rows`, the split of
#: :func:`split_gram` and the residual of one refinement step run compiled
#: (``_leastwise_native``): the same bits as the numpy path, which runs otherwise.
NATIVE = _native_lib is not None and np.dtype(np.longdouble).itemsize > 8
#: Largest d whose refinement residual the compiled kernel takes (its scratch is on the stack).
_NATIVE_MAX_DIM = _native_lib.REFINE_MAX_DIM if _native_lib is not None else 0

EXTENDED = np.longdouble
#: Unit roundoff of the extended type (2^-64 on x86-64; 2^-53 where long double is double).
EXTENDED_ROUNDOFF = float(np.finfo(EXTENDED).eps) / 2.0
DOUBLE_ROUNDOFF = float(np.finfo(np.float64).eps) / 2.0

#: Refine only while kappa(A) * u_d stays below this (fast, certain convergence).
CONVERGENCE_LIMIT = 1e-4
REFINE_STEPS = 3

#: Dekker's splitting constant 2^27 + 1 (53-bit doubles into 26-bit halves).
_SPLITTER = 134217729.0
#: Fast paths run only while every operand is at most this (no product, split or sum can overflow).
_OPERAND_LIMIT = 1e290
_SUM_LIMIT = 1e300


def new_gram(dim: int, ridge: float) -> NDArray[np.longdouble]:
    gram = np.zeros((dim + 1, dim + 1), dtype=EXTENDED)
    if ridge > 0.0:
        idx = np.arange(dim)
        gram[idx, idx] = EXTENDED(ridge)
    return gram


#: Column blocks of :func:`row_gram` (from this many columns up the product is split).
_GRAM_BLOCK = 16


def row_gram(r: NDArray[np.longdouble]) -> NDArray[np.longdouble]:
    """``R^T R`` of extended rows ``R`` (k x m), bit for bit numpy's long double ``r.T @ r``.

    numpy has no BLAS for long double: its product keeps one accumulator per
    entry and adds the rows' products in row order, starting from 0. Entry
    ``(i, j)`` and entry ``(j, i)`` are then the same sums of the same
    (commutative, identically rounded) products, so the product is exactly
    symmetric, and this computes only the block upper triangle — ``R_a^T
    [R_a, R_b, ...]`` for each block ``a`` of ``_GRAM_BLOCK`` columns, each entry
    the same sequential sum — and mirrors it: about 60 % of the work from 64
    columns up (``tests/engine/test_solution_fast.py`` compares the bits).
    """
    k, m = r.shape
    if m < 2 * _GRAM_BLOCK:
        return r.T @ r
    out = np.empty((m, m), dtype=EXTENDED)
    for start in range(0, m, _GRAM_BLOCK):
        end = min(m, start + _GRAM_BLOCK)
        upper = r[:, start:end].T @ r[:, start:]  # rows start:end, columns start:m
        out[start:end, start:] = upper
        out[end:, start:end] = upper[:, end - start:].T
    return out


def _native_sums(partial: NDArray[np.longdouble] | None, rows: NDArray[np.float64]) -> NDArray[np.longdouble]:
    """``partial + R^T R`` (``R^T R`` alone when ``partial`` is None) by the compiled kernel: the same bits."""
    m = rows.shape[1]
    if partial is None:
        out = np.empty((m, m), dtype=EXTENDED)
    else:
        out = np.array(partial, dtype=EXTENDED, order="C")  # a copy: memos share their partial sums
    _native_lib.gram_sums(np.ascontiguousarray(rows, dtype=np.float64), out, partial is not None)
    return out


def fold(gram: NDArray[np.longdouble], rows: NDArray[np.float64]) -> NDArray[np.longdouble]:
    """Return ``G + R^T R`` for the buffered (already scaled) rows ``R``, in extended precision."""
    if rows.shape[0] == 0:
        return gram
    if NATIVE:
        return gram + _native_sums(None, rows)
    return gram + row_gram(rows.astype(EXTENDED))


def accumulate_rows(partial: NDArray[np.longdouble] | None, rows: NDArray[np.float64]) -> NDArray[np.longdouble]:
    """``S + sum_i r_i r_i^T`` in extended precision, one row after another (``S = 0`` when ``partial`` is None).

    Each entry is one running extended sum over the rows in order, starting from 0: exactly
    the order of numpy's long double ``r.T @ r`` (which has no BLAS: one accumulator per
    entry, rows in order). So the sum over ``k`` rows may be continued from the sum over
    the first ``j`` and still equals :func:`fold`'s product bit for bit
    (``tests/engine/test_solution_fast.py`` checks it).
    """
    if NATIVE and rows.shape[0]:
        return _native_sums(partial, rows)
    if partial is None:
        if rows.shape[0] > 1:
            return row_gram(rows.astype(EXTENDED))  # from 0, the same order
        partial = np.zeros((rows.shape[1], rows.shape[1]), dtype=EXTENDED)
    for row in rows:
        # The double values widen exactly; each product is rounded once, in extended precision.
        partial = partial + np.multiply.outer(row, row, dtype=EXTENDED)
    return partial


@dataclass(frozen=True, slots=True, eq=False)
class GramSplit:
    """The folded Gram matrix in the double-double form the refinement reads (never modified).

    ``pairs`` is :func:`split_pairs` of it (``hi = double(G)``, ``lo = double(G - hi)``
    in one ``(2, d+1, d+1)`` block laid out as ``np.stack`` does, so BLAS sees the same
    operands as before); ``bound`` is ``||hi[:d, :]||_F >= max |entry|`` (NaN if an entry is). While
    ``bound <= _OPERAND_LIMIT``: ``a3t`` holds ``[A_hi, hh, hl]^T`` (``(3, d, d)``: the
    transposes of ``A_hi`` and of Dekker's halves of it, the first factor of each product
    of :func:`_refine_once`), and ``neg_b`` is ``[-b_hi, -b_lo]``; otherwise both are None.
    """

    pairs: NDArray[np.float64]
    bound: float
    a3t: NDArray[np.float64] | None
    neg_b: NDArray[np.float64] | None


def split_gram(folded: NDArray[np.longdouble]) -> GramSplit:
    """Split ``G`` once for :func:`refine`: :func:`split_pairs` and the pieces of ``A_hi`` and ``b``."""
    m = folded.shape[0]
    d = m - 1
    pairs = np.empty((2, m, m))
    if NATIVE and d >= 1:
        return _native_split(folded, pairs)
    hi = pairs[0]
    hi[...] = folded  # the same rounding cast as astype(float64)
    np.subtract(folded, hi, out=pairs[1])  # in extended precision (hi widened exactly), then rounded: exact
    # ||.||_2 >= max |entry|: an upper bound is all the guards need. dnrm2 scales (no
    # overflow) and is NaN or infinite when an entry is (the input checks rely on it too).
    bound = float(_nrm2(hi[:d].ravel()))
    if not bound <= _OPERAND_LIMIT:
        pairs.flags.writeable = False
        return GramSplit(pairs, bound, None, None)
    a3t = np.empty((3, d, d))
    a3t[0] = hi[:d, :d].T
    c = _SPLITTER * a3t[0]  # _split, transposed
    np.subtract(c, c - a3t[0], out=a3t[1])
    np.subtract(a3t[0], a3t[1], out=a3t[2])
    # Into a new array: numpy 2.4's float64 negative misreads an input of stride 64 bytes
    # (d = 7 here) when given a strided out=.
    neg_b = -pairs[:, :d, d]
    for a in (pairs, a3t, neg_b):  # shared by every copy of the state: never written
        a.flags.writeable = False
    return GramSplit(pairs, bound, a3t, neg_b)


def _native_split(folded: NDArray[np.longdouble], pairs: NDArray[np.float64]) -> GramSplit:
    """:func:`split_gram` with its elementwise work compiled (``_leastwise_native.split_gram``: the same bits)."""
    d = folded.shape[0] - 1
    a3t = np.empty((3, d, d))
    neg_b = np.empty((2, d))
    _native_lib.split_gram(np.ascontiguousarray(folded), pairs, a3t, neg_b)
    bound = float(_nrm2(pairs[0][:d].ravel()))
    if not bound <= _OPERAND_LIMIT:  # as the numpy path: no fast-path pieces for huge entries
        pairs.flags.writeable = False
        return GramSplit(pairs, bound, None, None)
    for a in (pairs, a3t, neg_b):
        a.flags.writeable = False
    return GramSplit(pairs, bound, a3t, neg_b)


@dataclass(frozen=True, slots=True, eq=False)
class FoldMemo:
    """A state's read-time fold (:func:`fold` of its buffered rows) and its split, kept for later reads.

    Valid for any state whose Gram matrix has the bytes ``gram_key`` and whose first ``k``
    buffered rows have the bytes ``rows_key``: :func:`fold_memo` compares both on every
    use, so copies of a state may share one memo and an in-place change of the Gram
    matrix (block backfill, renormalisation, forgetting everything) cannot go unnoticed.
    Nothing in it is ever modified. ``partial`` is ``sum r_i r_i^T`` over the ``k`` rows
    (:func:`accumulate_rows`; None when ``k = 0``).
    """

    gram_key: bytes
    rows_key: bytes
    k: int
    partial: NDArray[np.longdouble] | None
    split: GramSplit


def _continuing_is_cheaper(more: int, k: int, m: int) -> bool:
    """Whether adding ``more`` rows to a partial sum (:func:`accumulate_rows`) beats a fresh product of ``k`` rows.

    Per row, in microseconds, measured (x86-64, numpy 2): a fresh product
    (:func:`row_gram`, 32 rows) 0.6 at m = 9, 5 at 33, 15 at 65, 25 at 100;
    continuing (one extended outer product and sum per row) 4.8, 18, 61, 151:
    about four times the product's from m ~ 17 up, more below (where both are cheap).
    With the compiled sums (:data:`NATIVE`) a row costs the same either way: always continue.
    """
    if NATIVE:
        return more <= k
    m2 = m * m
    return more * (360 + 2 * m2) <= k * (35 + m2 // 2)


def _memo_covers(memo: FoldMemo | None, gram_key: bytes, pending: NDArray[np.float64], k: int) -> bool:
    """Whether ``memo`` was made for the Gram matrix with bytes ``gram_key`` and a prefix of ``pending[:k]``."""
    return (memo is not None and memo.k <= k and memo.gram_key == gram_key
            and pending[:memo.k].tobytes() == memo.rows_key)


def fold_memo(
    memo: FoldMemo | None, gram: NDArray[np.longdouble], pending: NDArray[np.float64], k: int,
) -> FoldMemo:
    """The memo for ``fold(gram, pending[:k])``: ``memo`` itself when it still matches, else a new one.

    When the Gram matrix is unchanged and ``memo`` covers a prefix of the rows, only the
    newer rows are added to its partial sum (one extended outer product each) unless
    a fresh product of all ``k`` is cheaper; either way the same bits as :func:`fold`.
    """
    gram_key = gram.tobytes()
    partial = None
    start = 0
    if _memo_covers(memo, gram_key, pending, k):
        if memo.k == k:
            return memo
        if _continuing_is_cheaper(k - memo.k, k, gram.shape[0]):
            partial, start = memo.partial, memo.k
    if k > start:
        partial = accumulate_rows(partial, pending[start:k])
        partial.flags.writeable = False
    folded = gram if partial is None else gram + partial
    return FoldMemo(gram_key, pending[:k].tobytes(), k, partial, split_gram(folded))


def fold_continuing(
    memo: FoldMemo | None, gram: NDArray[np.longdouble], pending: NDArray[np.float64], k: int,
) -> NDArray[np.longdouble]:
    """``fold(gram, pending[:k])``, continuing the partial sum of ``memo`` when it covers a prefix of the rows.

    The state folds its buffer every ``FOLD_ROWS`` rows; a read since the last
    fold has often summed most of those rows already (:func:`fold_memo`), and
    continuing that sum (:func:`accumulate_rows`) gives the same bits as the
    fresh product. Taken by the same cost rule as :func:`fold_memo`; at d = 64
    a fresh product of 32 rows is most of a fold.
    """
    if (memo is not None and memo.partial is not None and 0 < memo.k <= k
            and _continuing_is_cheaper(k - memo.k, k, gram.shape[0]) and _memo_covers(memo, gram.tobytes(), pending, k)):
        partial = memo.partial if memo.k == k else accumulate_rows(memo.partial, pending[memo.k:k])
        return gram + partial
    return fold(gram, pending[:k])


def refine(
    R: NDArray[np.float64], rcond: float, w0: NDArray[np.float64],
    gram: NDArray[np.longdouble] | GramSplit | Callable[[], GramSplit],
    exact_sums: bool | Callable[[], bool],
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
    split of ``G`` and of the iterate (Dekker's product, exactly rounded row sums:
    :func:`exact_row_sums`), so the fixed point is the solution of the normal
    equations as held in ``G``.

    ``gram`` is the extended matrix, its :func:`split_gram`, or a function giving the
    split; ``exact_sums`` a flag or a function giving it. Functions are called only
    when the condition test passes (reads of ill-conditioned states split nothing).
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
    if not (kappa <= DOUBLE_ROUNDOFF / EXTENDED_ROUNDOFF or (exact_sums() if callable(exact_sums) else exact_sums)):
        return w0, False
    if isinstance(gram, GramSplit):
        split = gram
    elif callable(gram):
        split = gram()
    else:
        split = split_gram(gram)
    # One step already reaches the normal-equations limit when the contraction
    # kappa(A) u_d is tiny; more are needed only close to CONVERGENCE_LIMIT.
    if kappa_a * DOUBLE_ROUNDOFF * d < 1e-8:
        if split.a3t is not None:
            done = _refine_once(R, w0, split)
            if done is not None:
                return done
        return _refine_steps(R, w0, split, 1)
    return _refine_steps(R, w0, split, REFINE_STEPS)


#: Up to this d, :func:`_refine_once` forms all products in one call (9 d^2 values); beyond, in place.
_ONE_CALL_MAX_DIM = 24


def _refine_once(
    R: NDArray[np.float64], w0: NDArray[np.float64], split: GramSplit,
) -> tuple[NDArray[np.float64], bool] | None:
    """One refinement step from ``w_lo = 0``, the common case: the same bits as :func:`_refine_steps` with one step.

    What :func:`_refine_steps` computes that is known in advance is left out:

    * ``A_hi w_lo`` with ``w_lo = 0`` is (signed) zero, so the rounded cross term is ``A_lo w0`` alone;
    * the residual rows are built negated, ``[-b_hi, -b_lo, A_lo w0, p, e]``, as the columns
      of one block (contiguous operands, few calls): rounding to nearest is odd-symmetric,
      so their exact sums are ``-r`` (``+0`` for 0, as for ``r``), and the two triangular
      solves give ``-step`` (a zero may differ in sign only);
    * after one step the two-sum ``(total, err)`` of ``w0 + step`` is error-free (Knuth,
      TAOCP vol. 2, 4.2.2, Thm B), so ``total + (0 + err) = fl(w0 + step) + 0``
      (``+ 0.0`` turns ``-0`` into ``+0`` as that sum does).

    ``p`` and ``e`` are Dekker's two-product ``p + e = a_hi w0`` with ``e`` evaluated in
    :func:`_exact_residual`'s order. ``None`` (the caller takes the general path) when a
    value is not finite or so large that a product, split or row sum could overflow: no
    NaN or infinity and no numpy warning can occur here, so no ``errstate`` is needed.
    """
    d = w0.shape[0]
    listed = w0.tolist()
    wmax = max(map(abs, listed))
    bound = split.bound
    # sum() is NaN or infinite if any entry is (or, harmlessly, on overflow).
    if not (math.isfinite(sum(listed)) and wmax <= _OPERAND_LIMIT
            and bound * wmax * (4 * d + 8) + 4.0 * bound <= _SUM_LIMIT):
        return None
    if NATIVE and d <= _NATIVE_MAX_DIM:
        neg_resid = np.empty(d)
        # A_lo w0 by numpy (its BLAS, as below); the two-products and exact row sums compiled
        _native_lib.refine_residual(split.a3t, split.neg_b, split.pairs[1][:d, :d] @ w0,
                                    np.ascontiguousarray(w0, dtype=np.float64), neg_resid)
        return _refine_finish(R, w0, neg_resid, wmax)
    halves = np.empty((3, d, 1))  # [w0, hh, hl] as columns: the second factor of each product
    w_col = halves[0]
    w_col[:, 0] = w0
    c = _SPLITTER * w_col  # Dekker's split of w0
    np.subtract(c, c - w_col, out=halves[1])
    np.subtract(w_col, halves[1], out=halves[2])
    a3t = split.a3t
    if d <= _ONE_CALL_MAX_DIM:
        block = np.empty((3 + 9 * d, d))  # column i: the negated residual row i, then scratch
        prods = block[3:].reshape(3, 3, d, d)
        # prods[i, j] = (piece i of a_hi) * (piece j of w0), transposed
        np.multiply(a3t[:, None], halves[None, :], out=prods)
        p = prods[0, 0]
        e = prods[0, 1]  # a_hi * hh is not needed: e takes its place, next to p
        np.subtract(prods[1, 1], p, out=e)
        e += prods[1, 2]
        e += prods[2, 1]
        e += prods[2, 2]
    else:
        block = np.empty((3 + 2 * d, d))
        p = block[3:3 + d]
        e = block[3 + d:]
        np.multiply(a3t[0], w_col, out=p)
        np.multiply(a3t[1], halves[1], out=e)
        e -= p
        tmp = a3t[1] * halves[2]
        e += tmp
        np.multiply(a3t[2], halves[1], out=tmp)
        e += tmp
        np.multiply(a3t[2], halves[2], out=tmp)
        e += tmp
    block[:2] = split.neg_b
    block[2] = split.pairs[1][:d, :d] @ w0
    neg_resid = exact_row_sums(block[:3 + 2 * d].T, overwrite=True)
    return _refine_finish(R, w0, neg_resid, wmax)


def _refine_finish(
    R: NDArray[np.float64], w0: NDArray[np.float64], neg_resid: NDArray[np.float64], wmax: float,
) -> tuple[NDArray[np.float64], bool] | None:
    """The rest of :func:`_refine_once` from the negated residual: the two triangular solves and the update."""
    v, _ = dtrtrs(R, neg_resid, lower=0, trans=1)
    neg_step, _ = dtrtrs(R, v, lower=0, trans=0)
    listed = neg_step.tolist()
    if not math.isfinite(sum(listed)):
        return None
    smax = max(map(abs, listed))
    if not smax > DOUBLE_ROUNDOFF * wmax:
        return w0 + 0.0, True  # converged: w_hi + w_lo with w_lo = 0
    if not smax <= _OPERAND_LIMIT:
        return None
    refined = np.subtract(w0, neg_step, out=neg_step)
    refined += 0.0
    return refined, True


def _refine_steps(
    R: NDArray[np.float64], w0: NDArray[np.float64], split: GramSplit, steps: int,
) -> tuple[NDArray[np.float64], bool]:
    """Up to ``steps`` refinement steps ``w += R^{-1} R^{-T} (b - A w)``, ``w = w_hi + w_lo`` (the general path)."""
    d = w0.shape[0]
    pairs = split.pairs
    a_hi, a_lo = pairs[0][:d, :d], pairs[1][:d, :d]
    b_hi, b_lo = pairs[0][:d, d], pairs[1][:d, d]
    if split.a3t is not None:
        a_hi_hi, a_hi_lo = split.a3t[1].T, split.a3t[2].T
    else:
        with np.errstate(over="ignore", invalid="ignore"):  # huge entries: caught by the finite check of the terms
            a_hi_hi, a_hi_lo = _split(a_hi)
    terms = np.empty((d, 2 * d + 3))
    terms[:, 0] = b_hi
    terms[:, 1] = b_lo
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
    c = _SPLITTER * a
    hi = c - (c - a)
    return hi, a - hi


def _exact_residual(terms, a_hi, a_lo, a_hi_hi, a_hi_lo, w_hi, w_lo) -> NDArray[np.float64] | None:
    """``b - A w`` rounded once, for ``A = a_hi + a_lo``, ``b = b_hi + b_lo``, ``w = w_hi + w_lo``.

    ``terms`` holds ``b_hi, b_lo`` in its first two columns; the rest is filled
    here with the negated exact parts of ``A w``, and each row is summed exactly
    (:func:`exact_row_sums`).
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
    return exact_row_sums(terms)


#: Arrays of at least this many terms (d >= 24 in refinement) are summed by extraction,
#: which is faster than fsum from there on (measured).
_EXTRACT_MIN_SIZE = 1200
_EXTRACT_ROUNDS = 8
#: Extraction stops while the grid eps * sigma is still far above the subnormal range.
_EXTRACT_FLOOR = 2.0**-900


def exact_row_sums(terms: NDArray[np.float64], overwrite: bool = False) -> NDArray[np.float64]:
    """Each row's exact sum rounded once to nearest (``math.fsum`` of the row), as a vector.

    For finite terms; large arrays go through :func:`_extracted_row_sums`, which gives
    the same numbers (a correctly rounded sum is unique) and falls back to ``fsum`` itself
    where its preconditions fail. ``overwrite``: ``terms`` is scratch and may be changed.
    """
    if terms.size >= _EXTRACT_MIN_SIZE:
        return _extracted_row_sums(terms, overwrite)
    return np.array([math.fsum(row) for row in terms.tolist()])


def _extracted_row_sums(terms: NDArray[np.float64], overwrite: bool = False) -> NDArray[np.float64]:
    """Exact row sums by repeated error-free extraction (Rump, Ogita & Oishi's ExtractVector).

    For a row ``p_1..p_n``, ``2^M >= n + 2`` and ``sigma = 2^k >= 2^M max |p_j|``:
    ``q_j = fl(fl(sigma + p_j) - sigma)`` and ``p_j - q_j`` are exact, each ``q_j`` is a
    multiple of ``eps sigma`` (``eps = 2^-53``) of size at most ``2^-M sigma``, so every
    partial sum of the ``q_j`` is one too, below ``sigma``, and ``tau = sum q_j`` is exact
    in any summation order; the remainders are at most ``eps sigma`` (Rump, Ogita & Oishi,
    "Accurate floating-point summation part I: faithful rounding", SIAM J. Sci. Comput.
    31(1), 2008, Lemma 3.3 and Theorem 3.4). Repeating with ``sigma' = 2^M eps sigma``
    moves ``53 - M`` bits per round from the remainders into ``tau``; once every
    remainder is zero (three rounds on typical rows) the row sum is exactly
    ``sum_k tau_k``, a few doubles, and their ``fsum`` is the row's correctly rounded sum.
    Rows with remainders left after ``_EXTRACT_ROUNDS`` rounds get ``fsum`` of their
    ``tau_k`` and remainders: the same exact sum. Terms so large that ``sigma`` could
    overflow, or so small that ``eps sigma`` could underflow, take plain ``fsum``.
    """
    n = terms.shape[1]
    M = (n + 1).bit_length()  # 2^M >= n + 2
    q = np.empty_like(terms)  # one scratch block for every round (large temporaries are costly)
    mu = np.abs(terms, out=q).max(axis=1)
    top = float(mu.max())
    if not top <= 2.0 ** (1000 - M):
        return np.array([math.fsum(row) for row in terms.tolist()])
    _, expo = np.frexp(mu)  # mu < 2^expo (expo = 0 for an all-zero row)
    sigma = np.ldexp(1.0, expo + M)[:, None]
    if not float(sigma.min()) >= _EXTRACT_FLOOR:
        return np.array([math.fsum(row) for row in terms.tolist()])
    phi = 2.0 ** (M - 53)
    rest = terms if overwrite else terms.copy()
    taus = []
    for _ in range(_EXTRACT_ROUNDS):
        np.add(sigma, rest, out=q)
        q -= sigma
        rest -= q
        taus.append(q.sum(axis=1))
        if not rest.any():
            break
        sigma = sigma * phi
        if not float(sigma.min()) >= _EXTRACT_FLOOR:
            break
    parts = np.stack(taus, axis=1).tolist()
    left = rest.any(axis=1)
    if left.any():
        for i in np.flatnonzero(left).tolist():
            parts[i].extend(rest[i].tolist())
    return np.array([math.fsum(row) for row in parts])


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
