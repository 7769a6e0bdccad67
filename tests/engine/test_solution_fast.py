"""The read-time solve (``State.solution``) gives the same bits as the previous implementation.

``State.solution`` got cheaper (``gram.py``: the fold of the buffered rows and its
split are memoised per state content, the one-step refinement skips what is known
in advance, long rows are summed by error-free extraction instead of ``fsum``).
None of that may change a single bit: the NIST accuracy tests, replay
bit-exactness and the cross-path comparisons rest on it. So this module keeps the
implementation as it was before that change (``previous_*`` below, copied from
``gram.py`` / ``solution.py`` / ``State.solution`` and frozen: do not "fix" it)
and requires bitwise equality of coefficients, rss, sigma, rank, identifiable,
refined (and rcond, dof, the unidentified directions) on many random states, on
the NIST StRD datasets streamed, and through copies, restores and in-place
changes of the Gram matrix. No wall-clock assertions.
"""

from __future__ import annotations

import json
import math
import struct
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.linalg.lapack import dtrcon, dtrtrs

from leastwise.engine import Spec, State
from leastwise.engine import gram as gram_mod
from leastwise.engine.gram import accumulate_rows, exact_row_sums, fold_memo, refine, row_gram, split_gram, split_pairs

DATA = json.loads((Path(__file__).resolve().parent.parent / "data" / "nist_strd_linear.json").read_text())["datasets"]


# --------------------------------------------------------------------------------------------
# The previous implementation, kept for comparison (frozen copy; do not change).
# --------------------------------------------------------------------------------------------

PREVIOUS_EXTENDED = np.longdouble
PREVIOUS_EXTENDED_ROUNDOFF = float(np.finfo(PREVIOUS_EXTENDED).eps) / 2.0
PREVIOUS_DOUBLE_ROUNDOFF = float(np.finfo(np.float64).eps) / 2.0
PREVIOUS_CONVERGENCE_LIMIT = 1e-4
PREVIOUS_REFINE_STEPS = 3
PREVIOUS_RCOND_TOL = 64 * np.finfo(np.float64).eps
PREVIOUS_INFORMATION_FLOOR = 1e-120
_PREVIOUS_NO_LSB = 1 << 20
_PREVIOUS_NO_EXP = -(1 << 20)


def previous_fold(gram, rows):
    if rows.shape[0] == 0:
        return gram
    r = rows.astype(PREVIOUS_EXTENDED)
    return gram + r.T @ r


def previous_split_pairs(gram):
    hi = gram.astype(np.float64)
    lo = (gram - hi.astype(PREVIOUS_EXTENDED)).astype(np.float64)
    return np.stack([hi, lo])


def _previous_split(a):
    c = 134217729.0 * a
    hi = c - (c - a)
    return hi, a - hi


def _previous_exact_residual(terms, a_hi, a_lo, a_hi_hi, a_hi_lo, w_hi, w_lo):
    d = w_hi.shape[0]
    with np.errstate(over="ignore", invalid="ignore"):
        w_hi_hi, w_hi_lo = _previous_split(w_hi)
        p = a_hi * w_hi
        e = ((a_hi_hi * w_hi_hi - p) + a_hi_hi * w_hi_lo + a_hi_lo * w_hi_hi) + a_hi_lo * w_hi_lo
        np.negative(p, out=terms[:, 3:3 + d])
        np.negative(e, out=terms[:, 3 + d:])
        terms[:, 2] = -(a_hi @ w_lo + a_lo @ w_hi)
    if not np.isfinite(terms).all():
        return None
    return np.array([math.fsum(row) for row in terms.tolist()])


def previous_refine(R, rcond, w0, gram, exact_sums):
    d = w0.shape[0]
    if PREVIOUS_EXTENDED_ROUNDOFF >= PREVIOUS_DOUBLE_ROUNDOFF:
        return w0, False
    if not rcond > 0.0:
        return w0, False
    kappa = 1.0 / rcond
    kappa_a = kappa * kappa
    if kappa_a * PREVIOUS_DOUBLE_ROUNDOFF * d > PREVIOUS_CONVERGENCE_LIMIT:
        return w0, False
    if not (exact_sums or kappa <= PREVIOUS_DOUBLE_ROUNDOFF / PREVIOUS_EXTENDED_ROUNDOFF):
        return w0, False
    pairs = previous_split_pairs(gram)
    a_hi, a_lo = pairs[0][:d, :d], pairs[1][:d, :d]
    b_hi, b_lo = pairs[0][:d, d], pairs[1][:d, d]
    a_hi_hi, a_hi_lo = _previous_split(a_hi)
    terms = np.empty((d, 2 * d + 3))
    terms[:, 0] = b_hi
    terms[:, 1] = b_lo
    steps = 1 if kappa_a * PREVIOUS_DOUBLE_ROUNDOFF * d < 1e-8 else PREVIOUS_REFINE_STEPS
    w_hi = w0.copy()
    w_lo = np.zeros(d)
    for _ in range(steps):
        resid = _previous_exact_residual(terms, a_hi, a_lo, a_hi_hi, a_hi_lo, w_hi, w_lo)
        if resid is None:
            return w0, False
        v, _ = dtrtrs(R, resid, lower=0, trans=1)
        step, _ = dtrtrs(R, v, lower=0, trans=0)
        step = np.asarray(step, dtype=np.float64)
        if not np.abs(step).max() > PREVIOUS_DOUBLE_ROUNDOFF * np.abs(w_hi).max():
            break
        total = w_hi + step
        bb = total - w_hi
        w_lo = w_lo + ((w_hi - (total - bb)) + (step - bb))
        w_hi = total
    refined = w_hi + w_lo
    if not np.isfinite(refined).all():
        return w0, False
    return refined, True


def previous_value_span(rows):
    v = np.abs(rows)
    f, e = np.frexp(v)
    significand = (f * 2.0**53).astype(np.int64)
    _, low = np.frexp((significand & -significand).astype(np.float64))
    lsb = e.astype(np.int64) - 54 + low
    nonzero = v > 0.0
    return (np.where(nonzero, lsb, _PREVIOUS_NO_LSB).min(axis=0),
            np.where(nonzero, e, _PREVIOUS_NO_EXP).max(axis=0).astype(np.int64))


def previous_sums_are_exact(lsb, top, n_terms):
    present = lsb < _PREVIOUS_NO_LSB
    if not present.any():
        return True
    span = int((top[present] - lsb[present]).max())
    bits = np.finfo(PREVIOUS_EXTENDED).nmant + 1
    return 2 * span + max(int(n_terms), 1).bit_length() <= bits


def previous_solve(factor, spec, prior_weight, weight_sum, gram=None, exact_sums=False, scale=1.0):
    """The fields of the previous ``solution.solve`` as a dict."""
    d = spec.dim
    R = factor[:d, :d]
    z = factor[:d, d]
    rho = float(abs(factor[d, d])) * scale
    colnorm = np.sqrt(np.einsum("ij,ij->j", R, R))
    rcond = 0.0
    identifiable = bool(colnorm.min() * scale > PREVIOUS_INFORMATION_FLOOR)
    if identifiable:
        rcond, info = dtrcon(R / colnorm, norm="1", uplo="U", diag="N")
        rcond = float(rcond) if math.isfinite(rcond) else 0.0
        identifiable = bool(info == 0 and rcond > PREVIOUS_RCOND_TOL)
    extra = 0.0
    refined = False
    if identifiable:
        w, info = dtrtrs(R, z, lower=0, trans=0)
        w = np.asarray(w, dtype=np.float64).reshape(d)
        if gram is not None:
            w, refined = previous_refine(R, rcond, w, gram, exact_sums)
        rank = d
        unidentified = np.zeros((0, d))
        if info != 0 or not np.isfinite(w).all():
            identifiable = False
    if not identifiable:
        U, s, Vt = np.linalg.svd(R)
        floor = PREVIOUS_INFORMATION_FLOOR / scale
        cutoff = max(s[0] * PREVIOUS_RCOND_TOL, floor) if s[0] > 0 else floor
        rank = min(int(np.count_nonzero(s > cutoff)), d - 1)
        coords = U[:, :rank].T @ z
        w = Vt[:rank].T @ (coords / s[:rank])
        leftover = U[:, rank:].T @ z
        extra = float(np.dot(leftover, leftover)) * scale * scale
        unidentified = Vt[rank:].copy()
    penalty = prior_weight * spec.ridge * float(np.dot(w, w)) if spec.ridge > 0.0 else 0.0
    rss = max(rho * rho + extra - penalty, 0.0)
    dof = weight_sum - rank
    sigma = math.sqrt(rss / dof) if dof > 0.0 else None
    if sigma is not None and not math.isfinite(sigma):
        sigma = None
    return {"coefficients": w, "identifiable": identifiable, "rank": rank, "rss": rss, "dof": float(dof),
            "sigma": sigma, "rcond": rcond, "unidentified": unidentified, "refined": refined}


def previous_solution(state: State) -> dict:
    """The previous ``State.solution`` on the same arrays (read only; nothing is cached)."""
    gram = previous_fold(state._gram, state._pending[:state._pending_n]) if state.gram_exact else None
    exact = False
    if gram is not None and state._sums_exact:
        lsb, top = state._span_lsb, state._span_top
        k = state._pending_n
        if k:
            plsb, ptop = previous_value_span(state._pending[:k])
            lsb, top = np.minimum(lsb, plsb), np.maximum(top, ptop)
        exact = previous_sums_are_exact(lsb, top, state.n)
    return previous_solve(state._read_factor(), state.spec, state.prior_weight, state.weight_sum, gram, exact, state._scale)


# --------------------------------------------------------------------------------------------
# Comparison helpers
# --------------------------------------------------------------------------------------------

def _bits(x: float | None) -> bytes | None:
    return None if x is None else struct.pack("<d", x)


def assert_same_solution(state: State, context: object = "") -> dict:
    """Fresh ``state.solution()`` (no cached Solution) equals the previous implementation bit for bit."""
    state._solution = None
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the new code emits no numpy warning on these states
        new = state.solution()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        old = previous_solution(state)
    assert new.coefficients.dtype == np.float64 and new.coefficients.shape == old["coefficients"].shape, context
    assert new.coefficients.tobytes() == old["coefficients"].tobytes(), (context, new.coefficients, old["coefficients"])
    assert (new.identifiable, new.rank, new.refined) == (old["identifiable"], old["rank"], old["refined"]), context
    assert _bits(new.rss) == _bits(old["rss"]), (context, new.rss, old["rss"])
    assert _bits(new.sigma) == _bits(old["sigma"]), (context, new.sigma, old["sigma"])
    assert _bits(new.rcond) == _bits(old["rcond"]) and _bits(new.dof) == _bits(old["dof"]), context
    assert new.unidentified.tobytes() == old["unidentified"].tobytes(), context
    return old


def _steps_needed(sol: dict, d: int) -> int:
    """1 or 3 refinement steps by the previous rule (0: no refinement attempted)."""
    if not sol["refined"]:
        return 0
    kappa = 1.0 / sol["rcond"]
    return 1 if kappa * kappa * PREVIOUS_DOUBLE_ROUNDOFF * d < 1e-8 else PREVIOUS_REFINE_STEPS


def _spec(mode: int, d: int, ridge: float, lam: float) -> Spec:
    if mode == 1:
        return Spec(dim=d, forgetting=lam, ridge=ridge)
    if mode == 2:
        return Spec(dim=d, half_life=20.0, ridge=ridge)
    return Spec(dim=d, ridge=ridge)


def _data(rng: np.random.Generator, d: int, n: int, kind: str) -> tuple[np.ndarray, np.ndarray]:
    X = rng.normal(size=(n, d))
    if kind == "scaled":
        X *= 10.0 ** rng.uniform(-3, 3, size=d)
    elif kind == "ill" and d > 1:  # nearly collinear: kappa from ~1e3 to beyond the refinement limit
        X[:, -1] = X[:, 0] + 10.0 ** rng.uniform(-7, -1) * rng.normal(size=n)
    elif kind == "deficient" and d > 1:
        X[:, -1] = X[:, 0]
    elif kind == "integer":  # fixed-point data: the Gram sums stay exact (refinement up to kappa ~1e5)
        X = np.round(X * 100.0)
    elif kind == "poly":  # Vandermonde-like columns, large dynamic range
        t = rng.uniform(0.5, 3.0, size=n)
        X = np.stack([t**j for j in range(d)], axis=1)
    y = X @ rng.normal(size=d) + rng.normal(size=n) * float(rng.choice([1e-6, 1.0, 100.0]))
    if kind == "integer":
        y = np.round(y)
    return X, y


KINDS = ("normal", "scaled", "ill", "deficient", "integer", "poly")


# --------------------------------------------------------------------------------------------
# States: random streams, NIST, copies, restores, in-place changes
# --------------------------------------------------------------------------------------------

def test_random_streams_match_previous():
    """Service pattern (copy, update, read) over many random models; every read compared."""
    rng = np.random.default_rng(20240611)
    seen = {"refined": 0, "steps3": 0, "unrefined": 0, "not identifiable": 0, "big d": 0, "small d": 0}
    for trial in range(420):
        d = 1 + trial % 40
        mode = int(rng.integers(0, 3))
        ridge = float(rng.choice([0.0, 0.0, 0.5, 1e-3]))
        spec = _spec(mode, d, ridge, float(rng.choice([0.9, 0.99, 0.999])))
        kind = KINDS[trial % len(KINDS)]
        n = int(rng.integers(1, 3 * d + 80))
        X, y = _data(rng, d, n, kind)
        t = np.cumsum(rng.exponential(1.0, size=n))
        state = State(spec)
        every = int(rng.choice([1, 3, 7]))
        for i in range(n):
            state = state.copy()
            state.update(X[i], float(y[i]), float(t[i]))
            if i % every == 0 or i == n - 1:
                old = assert_same_solution(state, (trial, d, kind, i))
                steps = _steps_needed(old, d)
                seen["refined"] += steps > 0
                seen["steps3"] += steps == 3
                seen["unrefined"] += old["identifiable"] and steps == 0
                seen["not identifiable"] += not old["identifiable"]
                seen["big d"] += steps > 0 and d > gram_mod._ONE_CALL_MAX_DIM
                seen["small d"] += steps > 0 and d <= gram_mod._ONE_CALL_MAX_DIM
        assert_same_solution(state, (trial, "again"))  # memo hit
    assert all(v > 0 for v in seen.values()), seen


@settings(max_examples=60, deadline=None, database=None)
@given(
    d=st.integers(1, 40), n=st.integers(1, 160), mode=st.integers(0, 2), ridge=st.sampled_from([0.0, 0.5, 1e-6]),
    lam=st.sampled_from([0.9, 0.99, 0.999]), kind=st.sampled_from(KINDS), seed=st.integers(0, 2**32 - 1),
    path=st.sampled_from(["single", "many", "copies"]),
)
def test_hypothesis_states_match_previous(d, n, mode, ridge, lam, kind, seed, path):
    rng = np.random.default_rng(seed)
    X, y = _data(rng, d, n, kind)
    t = np.cumsum(rng.exponential(2.0, size=n))
    state = State(_spec(mode, d, ridge, lam))
    if path == "many":
        state.update_many(X, y, t)
    else:
        for i in range(n):
            if path == "copies":
                state = state.copy()
            state.update(X[i], float(y[i]), float(t[i]))
            if i % 5 == 0:
                assert_same_solution(state, i)
    assert_same_solution(state, "end")
    assert_same_solution(State.from_bytes(state.to_bytes()), "restored")


@pytest.mark.parametrize("name", list(DATA))
@pytest.mark.parametrize("forgetting", [1.0, 0.999])
def test_nist_streams_match_previous(name, forgetting):
    X = np.asarray(DATA[name]["X"], dtype=np.float64)
    y = np.asarray(DATA[name]["y"], dtype=np.float64)
    state = State(Spec(dim=X.shape[1], forgetting=forgetting))
    for i in range(X.shape[0]):
        state.update(X[i], float(y[i]))
        assert_same_solution(state, (name, i))
    copied = state.copy()
    assert_same_solution(copied, (name, "copy"))
    assert_same_solution(State.from_bytes(state.to_bytes()), (name, "restored"))
    many = State(Spec(dim=X.shape[1], forgetting=forgetting))
    many.update_many(X, y)
    assert_same_solution(many, (name, "update_many"))
    block = State(Spec(dim=X.shape[1], forgetting=forgetting))
    block.absorb_block(X, y)
    assert_same_solution(block, (name, "block"))


def test_nist_refinement_still_taken():
    """The datasets the refinement exists for are still refined (one step each, as before)."""
    steps = {}
    for name in ("Pontius", "Wampler1", "Wampler4", "Wampler5"):
        X = np.asarray(DATA[name]["X"], dtype=np.float64)
        y = np.asarray(DATA[name]["y"], dtype=np.float64)
        state = State(Spec(dim=X.shape[1]))
        state.update_many(X, y)
        old = assert_same_solution(state, name)
        steps[name] = _steps_needed(old, X.shape[1])
    assert all(steps.values()), steps


def test_copies_share_the_memo_and_diverge():
    rng = np.random.default_rng(5)
    d = 6
    X = rng.normal(size=(80, d))
    y = X @ rng.normal(size=d) + rng.normal(size=80)
    base = State(Spec(dim=d, forgetting=0.99))
    base.update_many(X[:45], y[:45])
    assert_same_solution(base)
    memo = base._fold_memo
    assert memo is not None
    a, b = base.copy(), base.copy()
    assert a._fold_memo is memo and b._fold_memo is memo  # shared (immutable)
    a.update(X[50], float(y[50]))
    b.update(X[51], float(y[51]))
    assert_same_solution(a, "a")
    assert_same_solution(b, "b")
    assert a._fold_memo is not memo and b._fold_memo is not memo and base._fold_memo is memo
    assert_same_solution(base, "base after its copies moved on")
    for i in range(52, 80):  # across the 32-row fold
        a.update(X[i], float(y[i]))
        assert_same_solution(a, i)


def test_memo_notices_in_place_changes():
    """The memo is keyed on content: in-place changes of the Gram matrix or the rows are seen."""
    rng = np.random.default_rng(9)
    d = 4
    state = State(Spec(dim=d))
    X = rng.normal(size=(40, d))
    state.update_many(X[:10], X[:10] @ np.arange(1.0, d + 1) + rng.normal(size=10))
    assert_same_solution(state)
    state._gram *= np.longdouble(1.0 + 2.0**-40)  # as _renormalise does (in place)
    assert_same_solution(state, "gram scaled in place")
    state._pending[3, 1] += 1e-9  # a buffered row changed under the memo
    assert_same_solution(state, "row changed")
    state._gram[:] = 0  # as _forget_all does
    state._gram[np.arange(d), np.arange(d)] = 1.0
    assert_same_solution(state, "gram zeroed")
    state._fold_memo = fold_memo(None, state._gram, state._pending, 3)  # a memo of a prefix of the rows
    assert_same_solution(state, "memo of a prefix")
    state._fold_memo = fold_memo(None, state._gram, state._pending, state._pending_n + 1)  # more rows than held
    assert_same_solution(state, "memo of more rows")


def test_renormalisation_forgetting_everything_and_reset():
    rng = np.random.default_rng(11)
    d = 3
    lam = Spec(dim=d, forgetting=0.9)
    state = State(lam)
    for i in range(1800):  # 0.9^(n/2) < 2^-128 after ~1684 steps: one renormalisation
        state = state.copy()
        x = rng.normal(size=d)
        state.update(x, float(x.sum() + 0.1 * rng.normal()))
        if i % 97 == 0 or 1675 <= i <= 1700:
            assert_same_solution(state, i)
    half = State(Spec(dim=d, half_life=1.0))
    for i, t in enumerate([0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 2000.0, 2001.0, 2002.0, 2003.0]):
        half.update(rng.normal(size=d), float(rng.normal()), t)  # the gap forgets everything
        assert_same_solution(half, t)
    half.reset()
    assert half._fold_memo is None
    for i in range(5):
        half.update(rng.normal(size=d), float(rng.normal()), float(i))
        assert_same_solution(half, ("after reset", i))


# --------------------------------------------------------------------------------------------
# Building blocks
# --------------------------------------------------------------------------------------------

def _ld_bits(a: np.ndarray) -> bytes:
    """The value bits of a long double array (its padding bytes are arbitrary)."""
    return previous_split_pairs(a).tobytes()


def _awkward_rows(rng: np.random.Generator, k: int, m: int, trial: int) -> np.ndarray:
    """Rows of widely spread magnitudes; every third trial integers, every seventh a column of -0.0."""
    rows = rng.normal(size=(k, m)) * np.exp(5.0 * rng.normal(size=(k, 1)))
    if trial % 3 == 0:
        rows = np.round(rows * 1000.0)
    if trial % 7 == 0:
        rows[:, 0] = -0.0
    return rows


def test_accumulate_rows_continues_the_fold_product():
    rng = np.random.default_rng(3)
    for trial in range(300):
        m = int(rng.integers(2, 42)) if trial % 20 else int(rng.integers(60, 130))
        k = int(rng.integers(1, 32))
        rows = _awkward_rows(rng, k, m, trial)
        gram = previous_fold(np.zeros((m, m), dtype=np.longdouble), rng.normal(size=(3, m)))
        want = previous_fold(gram, rows)
        j = int(rng.integers(0, k + 1))
        partial = accumulate_rows(None, rows[:j]) if j else None
        partial = accumulate_rows(partial, rows[j:]) if j < k else partial
        assert _ld_bits(gram + partial) == _ld_bits(want), (trial, m, k, j)


def test_folds_that_continue_a_read_give_the_gram_matrix_of_a_state_never_read(monkeypatch):
    """``gram.fold_continuing``: a state read between folds (its memo then covers most of the buffer)
    folds by continuing that sum; its Gram matrix, factor and stored bytes must stay those of the same
    rows absorbed by a state never read (every fold a fresh product), compared against the frozen
    ``previous_fold`` too."""
    fresh_products = {"read": 0, "unread": 0}
    real_fold = gram_mod.fold
    counting = ["unread"]

    def counted_fold(gram, rows):  # noqa: ANN001
        fresh_products[counting[0]] += 1
        return real_fold(gram, rows)

    import leastwise.engine.state as state_mod

    monkeypatch.setattr(state_mod, "fold", counted_fold)
    monkeypatch.setattr(gram_mod, "fold", counted_fold)
    rng = np.random.default_rng(29)
    for trial, d in enumerate((1, 3, 8, 31, 33, 64)):
        spec = _spec(trial % 3, d, float((0.0, 0.5)[trial % 2]), 0.99)
        read, unread = State(spec), State(spec)
        n = 5 * gram_mod.FOLD_ROWS + 7
        X, y = _data(rng, d, n, KINDS[trial % len(KINDS)])
        t = np.cumsum(rng.exponential(1.0, size=n))
        every = (1, 5, 13, 29)[trial % 4]
        reference = None
        for i in range(n):
            counting[0] = "read"
            read.update(X[i], float(y[i]), float(t[i]))
            if i % every == 0:
                read.copy().solution()  # a copy shares the memo it makes (as the service's reads do)
                read.solution()
            counting[0] = "unread"
            folded_before = unread._pending_n
            unread.update(X[i], float(y[i]), float(t[i]))
            if unread._pending_n < folded_before + 1:  # this row completed the buffer: a fold happened
                reference = unread._gram
            assert _ld_bits(read._gram) == _ld_bits(unread._gram), (trial, d, i)
            assert read._factor.tobytes() == unread._factor.tobytes(), (trial, d, i)
        assert reference is not None
        assert read.to_bytes() == unread.to_bytes(), (trial, d)
        # and the fresh product itself is still the frozen previous fold of the same rows
        rows = np.array(unread._pending[: unread._pending_n])
        assert _ld_bits(real_fold(unread._gram, rows)) == _ld_bits(previous_fold(unread._gram, rows))
    assert fresh_products["read"] < fresh_products["unread"], fresh_products  # the continuing path was taken


def test_row_gram_is_numpy_long_double_product_bit_for_bit():
    """The block upper triangle, mirrored, against numpy's own ``r.T @ r`` (the reference), around the block edges."""
    rng = np.random.default_rng(11)
    sizes = [1, 2, 9, 31, 32, 33, 47, 48, 49, 64, 65, 80, 129]
    for trial in range(150):
        m = sizes[trial % len(sizes)] if trial < 2 * len(sizes) else int(rng.integers(1, 130))
        k = int(rng.integers(1, 33))
        rows = _awkward_rows(rng, k, m, trial)
        if trial % 11 == 0:
            rows[:, m // 2] = 0.0
        r = rows.astype(np.longdouble)
        assert _ld_bits(row_gram(r)) == _ld_bits(r.T @ r), (trial, m, k)


def test_split_gram_matches_split_pairs():
    rng = np.random.default_rng(4)
    for d in range(1, 41):
        rows = rng.normal(size=(50, d + 1)) * 10.0 ** rng.uniform(-3, 3, size=d + 1)
        folded = previous_fold(np.zeros((d + 1, d + 1), dtype=np.longdouble), rows)
        split = split_gram(folded)
        assert split.pairs.tobytes() == previous_split_pairs(folded).tobytes() == split_pairs(folded).tobytes()
        hh, hl = _previous_split(split.pairs[0][:d, :d])
        assert split.a3t[0].T.tobytes() == np.ascontiguousarray(split.pairs[0][:d, :d]).tobytes()
        assert np.ascontiguousarray(split.a3t[1].T).tobytes() == hh.tobytes()
        assert np.ascontiguousarray(split.a3t[2].T).tobytes() == hl.tobytes()
        assert split.neg_b.tobytes() == (-np.ascontiguousarray(split.pairs[:, :d, d])).tobytes()


def _hard_rows(rng: np.random.Generator, rows: int, n: int) -> np.ndarray:
    """Rows with cancellation, wide exponent ranges, exact zeros, signed zeros and subnormals."""
    a = rng.normal(size=(rows, n)) * np.exp2(rng.integers(-60, 60, size=(rows, n)))
    a[:, : n // 2] = -a[:, n // 2: 2 * (n // 2)] * (1.0 + 2.0**-52 * rng.integers(-3, 4, size=(rows, n // 2)))
    a[rng.random(size=a.shape) < 0.1] = 0.0
    a[rng.random(size=a.shape) < 0.02] = -0.0
    a[rng.random(size=a.shape) < 0.02] = 5e-324 * rng.integers(1, 1000)
    return a


def test_exact_row_sums_equal_fsum():
    rng = np.random.default_rng(6)
    cases = []
    for _ in range(60):
        rows, n = int(rng.integers(1, 140)), int(rng.integers(1, 300))
        cases.append(_hard_rows(rng, rows, n))
    wide = rng.normal(size=(20, 60)) * np.exp2(rng.integers(-900, 100, size=(20, 60)))  # > 8 rounds
    cases.append(wide)
    cases.append(np.zeros((30, 50)))
    cases.append(np.full((5, 40), 2.0**990) * rng.choice([-1.0, 1.0], size=(5, 40)))  # large, still extracted
    cases.append(np.full((5, 40), 2.0**1000) * rng.choice([-1.0, 1.0], size=(5, 40)))  # sigma could overflow: fsum
    cases.append(rng.normal(size=(8, 30)) * 2.0**-1000)  # eps sigma would underflow: fsum
    ties = np.zeros((16, 40))
    ties[:, 0] = 1.0
    ties[:, 1] = 2.0**-53 * rng.choice([-1.0, 1.0], size=16)  # exact halfway cases (ties to even)
    ties[:, 2] = 2.0**-110 * rng.integers(-1, 2, size=16)
    cases.append(ties)
    for n in (30, 62, 126, 254):  # every row near its maximum, one sign: tau close to its bound n 2^-M sigma
        cases.append(np.exp2(rng.integers(-5, 5, size=(12, 1))) * (1.0 - rng.random(size=(12, n)) * 2.0**-20))
    for terms in cases:
        want = np.array([math.fsum(row) for row in terms.tolist()])
        for got in (exact_row_sums(terms), gram_mod._extracted_row_sums(terms),
                    gram_mod._extracted_row_sums(np.asfortranarray(terms).copy(order="F"), overwrite=True),
                    gram_mod._extracted_row_sums(np.ascontiguousarray(terms.T).T)):
            assert got.tobytes() == want.tobytes(), terms.shape


def _problem(rng: np.random.Generator, d: int, n: int, cond: float, integer: bool):
    Q, _ = np.linalg.qr(rng.normal(size=(n, d)))
    V, _ = np.linalg.qr(rng.normal(size=(d, d)))
    X = (Q * np.logspace(0, -math.log10(cond), d)) @ V.T
    if integer:
        X = np.round(X * 2.0**20)
    y = X @ rng.normal(size=d) + rng.normal(size=n) * 1e-3 * np.abs(X).max()
    if integer:
        y = np.round(y)
    rows = np.column_stack([X, y])
    gram = previous_fold(np.zeros((d + 1, d + 1), dtype=np.longdouble), rows)
    factor = np.linalg.qr(rows, mode="r")
    factor = factor * np.sign(np.diag(factor))[:, None]
    R = np.asfortranarray(factor[:d, :d])
    w0 = np.asarray(dtrtrs(R, factor[:d, d], lower=0, trans=0)[0]).reshape(d)
    colnorm = np.sqrt(np.einsum("ij,ij->j", R, R))
    rcond = float(dtrcon(R / colnorm, norm="1", uplo="U", diag="N")[0])
    return R, rcond, w0, gram


def test_refine_matches_previous_directly():
    """refine() with every kind of gram argument, one and three steps, and the guarded fallbacks."""
    rng = np.random.default_rng(8)
    kinds = set()
    for trial in range(400):
        d = int(rng.integers(1, 45))
        cond = float(10.0 ** rng.uniform(0, 6))
        R, rcond, w0, gram = _problem(rng, d, d + int(rng.integers(1, 40)), cond, trial % 2 == 0)
        scale = [2.0**1010, 2.0**900, 2.0**-900, 2.0**970][trial % 4] if trial % 10 == 9 else 1.0
        w_scale = [1.0, 1e292, 1e-300][trial % 3] if trial % 13 == 12 else 1.0
        gram = gram * np.longdouble(scale)
        w0 = w0 * w_scale
        exact = bool(trial % 2 == 0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            want = previous_refine(R, rcond, w0, gram, exact)
            split = split_gram(gram)
            for got in (refine(R, rcond, w0, gram, exact), refine(R, rcond, w0, split, exact),
                        refine(R, rcond, w0, lambda: split, lambda: exact)):
                assert got[1] == want[1] and got[0].tobytes() == want[0].tobytes(), (trial, d, cond, scale, w_scale)
        if want[1]:
            kappa = 1.0 / rcond
            kinds.add("one" if kappa * kappa * PREVIOUS_DOUBLE_ROUNDOFF * d < 1e-8 else "three")
        kinds.add(("guard", split.a3t is None))
    assert kinds >= {"one", "three", ("guard", True), ("guard", False)}, kinds


def test_lazy_arguments_are_not_called_when_refinement_is_off():
    rng = np.random.default_rng(10)
    R, rcond, w0, gram = _problem(rng, 5, 20, 1e7, False)  # too ill-conditioned for refinement

    def boom():
        raise AssertionError("called")

    out, refined = refine(R, rcond, w0, boom, boom)
    assert not refined and out is w0


def test_signed_zeros_match_previous():
    """Zero coefficients come out as +0 on both refinement branches, as before (w_hi + w_lo, w_lo = +0)."""
    R = np.asfortranarray(np.eye(2))
    gram = np.array([[1.0, 0.0, 0.0], [0.0, 1.0, 1.0], [0.0, 1.0, 3.0]], dtype=np.longdouble)
    for w0 in ([-0.0, 1.0], [-0.0, 0.5], [-0.0, -0.0], [0.0, 1.0 + 2.0**-52]):
        w0 = np.array(w0)
        want = previous_refine(R, 1.0, w0, gram, False)
        got = refine(R, 1.0, w0, gram, False)
        assert got[1] == want[1] and got[0].tobytes() == want[0].tobytes(), (w0, got, want)
