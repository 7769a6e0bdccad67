"""``State.update_block``: blocked updates of many observations, checked against single updates and outside references.

``update_block`` absorbs runs of rows with one triangular solve, the Cholesky
factor of the innovations matrix ``S = I + U^T U`` and one blocked Householder
update (``state.py``), and promises the steps and state of ``update_many``
(k single updates) to rounding, bit-for-bit determinism, and single updates
where a block does not apply (warm-up, format-1 state, a row of large
leverage). Checked here:

* every ``Step`` field and the final counters against ``update_many`` on the
  same data (no forgetting, forgetting 0.99, half-life with irregular times;
  d = 1, 3, 8; with and without a column of ones), and the final
  coefficients against ``numpy.linalg.lstsq`` of the weighted problem;
* recursive residuals, residuals, predictions and recursive coefficients of a
  stream fed in blocks of 64 against statsmodels (``recursive_olsresiduals``
  and ``RecursiveLS``), leverages of rows absorbed in blocks against
  ``x_i^T (X_<i^T X_<i)^-1 x_i`` by ``numpy.linalg.lstsq`` on the prefix;
* that the block path is taken (``State._absorb_one`` is wrapped to count the
  single updates; the wrapper calls the original), and where it is not;
* determinism: copies and byte round trips stay bit-identical;
* edge cases: renormalisation of the scale (forgetting 0.9 over 20,000 rows;
  a half-life with a gap of 300 half-lives), a zero decay after a gap of 1200
  half-lives inside a batch, refused input, the exact-sum bookkeeping at a
  fold of the row buffer inside a block;
* NIST StRD certified coefficients streamed in blocks of 16, and the identity
  RSS_n = sum of squared recursive residuals (Brown, Durbin & Evans 1975) on
  NoInt1 (cond 1) and Pontius (the dataset with most rows absorbed in blocks).
"""

from __future__ import annotations

import json
import math
import struct
import warnings
import zlib
from contextlib import contextmanager
from pathlib import Path
from unittest import mock

import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm
from statsmodels.stats.diagnostic import recursive_olsresiduals

from leastwise.engine import EngineError, NonFiniteError, Spec, State, TimeOrderError
from leastwise.engine.gram import FOLD_ROWS
from leastwise.engine.serial import _HEAD
from leastwise.engine.state import BLOCK_LEVERAGE_SUM, MIN_BLOCK_ROWS

from .reference import batch_solve, lre_min, weights_forgetting, weights_half_life

NIST = json.loads((Path(__file__).resolve().parent.parent / "data" / "nist_strd_linear.json").read_text())["datasets"]

MODES = ("plain", "forgetting", "half_life")
#: Batch sizes cycled through: below MIN_BLOCK_ROWS, single rows, longer than BLOCK_ROWS, odd lengths.
SIZES = (3, 64, 1, 130, 17, 64, 250, 5, 40)
FIELDS = ("prediction", "residual", "leverage", "recursive_residual", "standardized_residual", "decay")


# ------------------------------------------------------------------ helpers
def _spec(mode: str, d: int, ridge: float = 0.0) -> Spec:
    if mode == "forgetting":
        return Spec(dim=d, forgetting=0.99, ridge=ridge)
    if mode == "half_life":
        return Spec(dim=d, half_life=50.0, ridge=ridge)
    return Spec(dim=d, ridge=ridge)


def _data(d: int, n: int, seed: int, intercept: bool = False, noise: float = 0.3):
    """Well-conditioned rows (column scales 0.1..10), y = X w + noise, irregular times with ~30 % repeats."""
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, d)) * 10.0 ** rng.uniform(-1, 1, size=d)
    if intercept:
        X[:, 0] = 1.0
    y = X @ rng.standard_normal(d) + noise * rng.standard_normal(n)
    t = 1000.0 + np.cumsum(rng.exponential(1.0, size=n) * (rng.random(n) > 0.3))
    return X, y, t


def _feed(state: State, X, y, t, sizes=SIZES) -> list:
    """update_block over consecutive batches whose sizes cycle through ``sizes``."""
    steps, start, i = [], 0, 0
    while start < X.shape[0]:
        stop = min(start + sizes[i % len(sizes)], X.shape[0])
        steps += state.update_block(X[start:stop], y[start:stop], None if t is None else t[start:stop])
        start, i = stop, i + 1
    return steps


@contextmanager
def _recording(method: str):
    """Record ``state.n`` at every call of ``State.<method>`` (wrapped for counting; the original still runs)."""
    seen: list[int] = []
    original = getattr(State, method)

    def counted(self, *args):
        seen.append(self.n)
        return original(self, *args)

    with mock.patch.object(State, method, counted):
        yield seen


def _singles():
    """Record the single updates (``State._absorb_one``): a row absorbed in a block never calls it."""
    return _recording("_absorb_one")


def _assert_steps_close(expected: list, got: list, scale: float) -> dict[str, float]:
    """Field by field; returns the worst error per field (absolute, leverage relative)."""
    assert len(expected) == len(got)
    worst = dict.fromkeys(FIELDS, 0.0)
    for i, (a, b) in enumerate(zip(expected, got)):
        for f in FIELDS:
            u, v = getattr(a, f), getattr(b, f)
            assert (u is None) == (v is None), (i, f, u, v)
            if u is None:
                continue
            if f == "decay":
                err = abs(u - v)
                assert u == v, (i, u, v)  # both from the same _decays_for
            elif f == "leverage":
                err = abs(u - v) / u if u else abs(v)
                assert err <= 1e-12, (i, u, v)
            elif f == "standardized_residual":
                err = abs(u - v) / max(1.0, abs(u))
                assert err <= 1e-9, (i, u, v)
            else:  # prediction, residual, recursive residual: absolute, in units of the noise
                err = abs(u - v) / max(1.0, scale)
                assert err <= 1e-9, (i, f, u, v)
            worst[f] = max(worst[f], err)
    return worst


def _rel(a, b) -> float:
    a, b = np.asarray(a, dtype=np.float64), np.asarray(b, dtype=np.float64)
    return float(np.max(np.abs(a - b)) / max(float(np.max(np.abs(b))), 1e-300))


def _format_1(state: State) -> State:
    """The state as a checkpoint of storage format 1 would restore it (no base factor; as test_serialisation)."""
    new = state.to_bytes()
    m = state.dim + 1
    head = bytearray(new[:_HEAD.size])
    head[4] = 1  # format version
    head[5] &= ~32  # no base
    payload = bytes(head) + new[_HEAD.size:len(new) - 4 - 8 * m * m]
    return State.from_bytes(payload + struct.pack("<I", zlib.crc32(payload)))


# ------------------------------------------------- 1. the same as update_many
@pytest.mark.parametrize("intercept", [False, True], ids=["no_ones", "ones"])
@pytest.mark.parametrize("d", [1, 3, 8])
@pytest.mark.parametrize("mode", MODES)
def test_steps_and_state_equal_update_many(mode, d, intercept):
    # Reference: State.update_many (k single updates, checked against numpy lstsq in test_exactness.py
    # and statsmodels in test_recursive_residuals.py); the coefficients also against numpy.linalg.lstsq.
    n = 1500
    X, y, t = _data(d, n, seed=100 * d + intercept, intercept=intercept)
    t = t if mode == "half_life" else None
    spec = _spec(mode, d)
    many, block = State(spec), State(spec)
    expected = many.update_many(X, y, t)
    with _singles() as seen:
        got = _feed(block, X, y, t)
    assert len(seen) < n // 2, "most rows must go through the block path, or this compares nothing new"
    sigma = many.solution().sigma
    _assert_steps_close(expected, got, sigma or 1.0)
    assert block.n == many.n == n
    assert block.last_time == many.last_time and block.first_time == many.first_time
    for name in ("weight_sum", "weight_sq_sum", "prior_weight"):
        assert getattr(block, name) == pytest.approx(getattr(many, name), rel=1e-13, abs=1e-300), name
    assert _rel(block.coefficients(), many.coefficients()) <= 1e-12
    # update_block puts the rows in the row buffer update fills (state.py), so the buffered rows, the
    # factor at the last fold and the extended Gram matrix are the ones update_many builds, bit for bit
    # (only the row-by-row factor between folds differs)
    k = many._pending_n
    assert block._pending_n == k and np.array_equal(block._pending[:k], many._pending[:k])
    assert np.array_equal(block._base, many._base) and np.array_equal(block._gram, many._gram)
    assert (block.gram_exact, block._sums_exact) == (many.gram_exact, many._sums_exact)
    # reference: numpy.linalg.lstsq of the weighted problem (reference.batch_solve), DESIGN.md weights
    b, b0 = weights_half_life(t, spec.half_life) if t is not None else weights_forgetting(n, spec.forgetting)
    assert _rel(block.coefficients(), batch_solve(X, y, b, b0, 0.0).coefficients) <= 1e-10
    assert block.solution().sigma == pytest.approx(sigma, rel=1e-10)


# ------------------------------------------ 2. recursive residuals, leverages
def _stream_in_blocks_of_64(X, y, warm: int = 20):
    state = State(Spec(dim=X.shape[1]))
    steps = [state.update(X[i], float(y[i])) for i in range(warm)]
    coef_at = {}  # row index of a block's last row -> coefficients after it
    with _singles() as seen:
        for start in range(warm, X.shape[0], 64):
            steps += state.update_block(X[start:start + 64], y[start:start + 64])
            coef_at[min(start + 64, X.shape[0]) - 1] = state.coefficients()
    return state, steps, coef_at, seen


def _recursive_data():
    # As test_recursive_residuals.py: column scales 0.1..100 and an intercept.
    rng = np.random.default_rng(7)
    n, k = 1000, 5
    scales = np.array([1.0, 10.0, 0.1, 100.0, 3.0])
    X = rng.standard_normal((n, k)) * scales
    X[:, 0] = 1.0
    y = X @ (rng.standard_normal(k) / scales) + 0.5 * rng.standard_normal(n)
    return X, y


def _scaled_error(eng: np.ndarray, ref: np.ndarray) -> float:
    # As test_recursive_residuals._compare: relative to the value or to the typical size.
    scale = float(np.std(ref)) or 1.0
    return float(np.max(np.abs(eng - ref) / (np.abs(ref) + scale)))


def test_recursive_residuals_in_blocks_of_64_equal_statsmodels():
    X, y = _recursive_data()
    n, k = X.shape
    state, steps, coef_at, seen = _stream_in_blocks_of_64(X, y)
    assert len(seen) < (n - 20) // 4, "the blocks of 64 must mostly take the block path"
    assert all(s.recursive_residual is None for s in steps[:k])
    rec = np.array([s.recursive_residual for s in steps[k:]], dtype=np.float64)
    res = np.array([s.residual for s in steps[k:]])
    pred = np.array([s.prediction for s in steps[k:]])
    # reference: statsmodels.stats.diagnostic.recursive_olsresiduals (skip = k): rypred, rresid (a priori
    # residual), rresid_scaled (= rresid / sqrt(1 + leverage), the BDE recursive residual), rparams
    rresid, rparams, rypred, _, rresid_scaled, _, _ = recursive_olsresiduals(sm.OLS(y, X).fit())
    assert _scaled_error(rec, rresid_scaled[k:]) <= 1e-8
    assert _scaled_error(res, rresid[k:]) <= 1e-8
    assert np.max(np.abs(pred - rypred[k:]) / (np.abs(rypred[k:]) + 1.0)) <= 1e-10
    for row, coef in coef_at.items():
        assert _rel(coef, rparams[row]) <= 1e-8, row
    # reference: statsmodels RecursiveLS resid_recursive, as test_recursive_residuals.py uses it
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # diffuse-start chatter
        ref = np.asarray(sm.RecursiveLS(y, X).fit().resid_recursive, dtype=np.float64)
    assert _scaled_error(rec, ref[k:]) <= 1e-8


def test_block_leverages_equal_prefix_formula():
    X, y = _recursive_data()
    state, steps, _, seen = _stream_in_blocks_of_64(X, y)
    # rows absorbed inside blocks (not by a single update), a sample spread over the stream
    singles = set(seen)  # state.n == i while row i is absorbed
    in_blocks = [i for i in range(20, X.shape[0]) if i not in singles]
    sample = in_blocks[::23]
    assert len(sample) >= 30
    for i in sample:
        # reference: numpy.linalg.lstsq on the prefix. The minimum-norm z with X_<i^T z = x_i is
        # X_<i (X_<i^T X_<i)^-1 x_i, so ||z||^2 = x_i^T (X_<i^T X_<i)^-1 x_i without forming X^T X.
        z = np.linalg.lstsq(X[:i].T, X[i], rcond=None)[0]
        expected = float(z @ z)
        assert steps[i].leverage == pytest.approx(expected, rel=1e-10), i
        assert steps[i].recursive_residual == pytest.approx(steps[i].residual / math.sqrt(1.0 + expected), rel=1e-10)


# ------------------------------------------------- 3. which path is taken
def _warm(spec: Spec, n: int, seed: int = 3):
    X, y, t = _data(spec.dim, n + 64, seed, intercept=True)
    state = State(spec)
    if n:
        state.update_many(X[:n], y[:n], t[:n] if spec.half_life else None)
    return state, X[n:], y[n:], (t[n:] if spec.half_life else None)


def test_well_excited_state_takes_the_block_path_for_all_64_rows():
    # d = 8, n >= 1000: leverages ~ d/n, far below BLOCK_LEVERAGE_SUM / 64 per row.
    state, X, y, t = _warm(Spec(dim=8), 1200)
    twin = state.copy()
    with _singles() as seen:
        got = state.update_block(X, y)
    assert seen == []  # no single update at all
    expected = twin.update_many(X, y)
    assert state.n == twin.n == 1264
    # the buffered rows are the same scaled rows update_many buffers (same count, same bits)
    assert state._pending_n == twin._pending_n
    assert np.array_equal(state._pending[:state._pending_n], twin._pending[:twin._pending_n])
    # a different arithmetic ran: not every step is bit-identical, yet all agree to rounding
    assert sum(a != b for a, b in zip(expected, got)) > 0
    worst = _assert_steps_close(expected, got, twin.solution().sigma)
    assert worst["recursive_residual"] <= 1e-9


@pytest.mark.parametrize("ridge", [0.5, 5e3])
def test_ridge_prior_takes_the_block_path_and_matches_single_updates(ridge):
    # With a ridge prior, sigma before each row removes b_0 delta ||w||^2 from rho^2, so the block
    # derives every row's coefficients (State._block_penalties); at 5e3 the penalty is most of rho^2,
    # so a wrong one would show in every standardised residual. Reference: update_many.
    state, X, y, t = _warm(Spec(dim=3, ridge=ridge), 200)
    twin = state.copy()
    with _singles() as seen:
        got = state.update_block(X, y)
    assert seen == []
    _assert_steps_close(twin.update_many(X, y), got, 1.0)
    np.testing.assert_allclose(state.coefficients(), twin.coefficients(), rtol=1e-12, atol=1e-15)


def test_tries_back_off_while_no_block_forms():
    # At forgetting 0.5 the state remembers ~2 rows at d = 8: every leverage is large, no run
    # forms a block, and every row is a single update (bit for bit those of update_many). The
    # wait between tries doubles (4, 8, 16, ... 64 rows), so 512 rows cost about a dozen tries,
    # not one every 4 rows (update_block's documented back-off).
    X, y, _t = _data(8, 600, 7)
    state = State(Spec(dim=8, forgetting=0.5))
    state.update_many(X[:88], y[:88])
    twin = state.copy()
    with _recording("_absorb_run") as tries, _singles() as seen:
        got = state.update_block(X[88:], y[88:])
    assert len(seen) == 512
    assert got == twin.update_many(X[88:], y[88:]) and state.to_bytes() == twin.to_bytes()
    assert len(tries) <= 12


def test_fresh_state_warms_up_with_single_updates_then_blocks():
    state, X, y, t = _warm(Spec(dim=3), 0)
    twin = state.copy()
    with _singles() as seen:
        got = state.update_block(X, y)
    assert seen[:MIN_BLOCK_ROWS] == list(range(MIN_BLOCK_ROWS))  # n == 0: the first rows are single updates
    assert len(seen) < X.shape[0]  # and once the state is excited, blocks
    _assert_steps_close(twin.update_many(X, y), got, 1.0)


def test_format_1_state_takes_single_updates_until_the_next_fold():
    # A format-1 checkpoint has no base factor: single updates until the fold of the row buffer sets it.
    state, X, y, t = _warm(Spec(dim=3), 40)  # one fold + 8 buffered rows
    old = _format_1(state)
    assert old._base is None and old._pending_n == 40 - FOLD_ROWS
    with _singles() as seen:
        got = old.update_block(X, y)
    assert seen[:FOLD_ROWS - 8] == list(range(40, 40 + FOLD_ROWS - 8))
    assert len(seen) < X.shape[0]
    _assert_steps_close(state.update_many(X, y), got, 1.0)


def test_row_of_large_leverage_cuts_the_run():
    # A row far outside the data seen so far (leverage >> BLOCK_LEVERAGE_SUM) ends the block before it.
    state, X, y, t = _warm(Spec(dim=8), 1200)
    X = X.copy()
    X[10] *= 1e3
    twin = state.copy()
    with _singles() as seen:
        got = state.update_block(X, y)
    assert seen and seen[0] == 1200 + 10  # rows 0..9 went in one block; the outlier is a single update
    assert got[10].leverage > BLOCK_LEVERAGE_SUM
    assert len(seen) < 64 - 10
    _assert_steps_close(twin.update_many(X, y), got, twin.solution().sigma)


def test_exact_sum_bookkeeping_at_a_fold_inside_a_block():
    # gram.sums_are_exact: the Gram sums of n rows of integers below 2^s are exact in the extended type
    # while 2 s + bit_length(n) <= its significand bits; a fold counts n as update would at that row.
    # Integer data put the bound exactly at a fold inside a block; reference: update_many's bookkeeping.
    bits = np.finfo(np.longdouble).nmant + 1
    length = 8 if bits % 2 == 0 else 7  # bit_length of the count at the edge (2^length - 1 terms)
    s = (bits - length) // 2
    fold_at = 2**length - 1 - FOLD_ROWS  # n when the row buffer fills with 2^length - 1 terms folded
    rng = np.random.default_rng(17)
    rows = rng.integers(2 ** (s - 1), 2**s, size=(fold_at + 60, 3)).astype(np.float64)
    X, y = rows[:, :2], rows[:, 2]
    many, block = State(Spec(dim=2)), State(Spec(dim=2))
    many.update_many(X, y)
    block.update_many(X[:fold_at - 20], y[:fold_at - 20])
    with _singles() as seen:
        block.update_block(X[fold_at - 20:fold_at + 10], y[fold_at - 20:fold_at + 10])
    assert seen == []  # the fold happened inside the block
    edge = State(Spec(dim=2))
    edge.update_many(X[:fold_at + 10], y[:fold_at + 10])
    assert block._sums_exact == edge._sums_exact is True
    block.update_block(X[fold_at + 10:], y[fold_at + 10:])
    assert block._sums_exact == many._sums_exact is False  # one fold later the bound is passed


# ------------------------------------------------------- 4. determinism
@pytest.mark.parametrize("mode", MODES)
def test_update_block_is_deterministic_and_round_trips(mode):
    spec = _spec(mode, 5)
    X, y, t = _data(5, 900, seed=11, intercept=True)
    t = t if mode == "half_life" else None
    base = State(spec)
    _feed(base, X[:300], y[:300], None if t is None else t[:300])
    a, b = base.copy(), State.from_bytes(base.to_bytes())
    sa = a.update_block(X[300:500], y[300:500], None if t is None else t[300:500])
    sb = b.update_block(X[300:500], y[300:500], None if t is None else t[300:500])
    assert sa == sb  # every field, floats compared exactly
    assert a.to_bytes() == b.to_bytes()
    c = State.from_bytes(a.to_bytes())
    assert c.to_bytes() == a.to_bytes()
    a.coefficients(), a.predict(X[:3])  # reads leave no trace
    for s, e in ((500, 700), (700, 701), (701, 900)):
        tt = None if t is None else t[s:e]
        if e - s == 1:
            assert a.update(X[s], float(y[s]), None if tt is None else float(tt[0])) == c.update(
                X[s], float(y[s]), None if tt is None else float(tt[0]))
        else:
            assert a.update_block(X[s:e], y[s:e], tt) == c.update_block(X[s:e], y[s:e], tt)
        assert a.to_bytes() == c.to_bytes()


# ------------------------------------------------------- 5. edge cases
@pytest.mark.parametrize("mode", ["forgetting_0.9", "half_life_with_gap"])
def test_renormalisation_of_the_scale_between_blocks(mode):
    # The scale falls below 2^-128 when the weight of the oldest row since the last renormalisation
    # goes below 2^-256: at forgetting 0.9 after 256 / log2(1/0.9) ~ 1684 rows; with a half-life after
    # 256 half-lives, and at once after a gap of 300 half-lives (decay 2^-300: renormalised, not reset).
    n, d = 20_000, 4
    X, y, t = _data(d, n, seed=5, intercept=True, noise=0.1)
    if mode == "forgetting_0.9":
        spec, t, period = Spec(dim=d, forgetting=0.9), None, math.ceil(256.0 / -math.log2(0.9))
        b, b0 = weights_forgetting(n, 0.9)  # DESIGN.md: b_i = 0.9^(n-i)
    else:
        spec = Spec(dim=d, half_life=20.0)
        t[n // 2:] += 300 * spec.half_life
        period = math.ceil(256 * spec.half_life / float(np.mean(np.diff(t[: n // 2]))))
        b, b0 = weights_half_life(t, spec.half_life)  # DESIGN.md: b_i = 2^(-(t_n - t_i)/h)
    many, block = State(spec), State(spec)
    with _recording("_renormalise") as renormalised_many:
        expected = many.update_many(X, y, t)
    with _recording("_renormalise") as renormalised_block, _singles() as seen:
        got = _feed(block, X, y, t, (64,))
    assert len(seen) < n // 2  # mostly blocks
    assert renormalised_block == renormalised_many  # at the same rows
    assert len(renormalised_block) >= n // (period + 1)
    _assert_steps_close(expected, got, 1.0)
    # reference: numpy.linalg.lstsq of the weighted problem (reference.batch_solve)
    assert _rel(block.coefficients(), batch_solve(X, y, b, b0, 0.0).coefficients) <= 1e-8
    assert block.weight_sum == pytest.approx(many.weight_sum, rel=1e-13)


def test_gap_of_1200_half_lives_inside_a_batch_forgets_everything():
    h, d, n, gap_at = 10.0, 4, 600, 300
    X, y, t = _data(d, n, seed=9, intercept=True, noise=0.1)
    y[gap_at:] = X[gap_at:] @ np.array([-3.0, 1.0, 1.0, 1.0]) + 0.1 * np.random.default_rng(1).standard_normal(n - gap_at)
    t[gap_at:] += 1200 * h  # 2^-1200 underflows: the decay is exactly 0
    spec = Spec(dim=d, half_life=h)
    many, block = State(spec), State(spec)
    many.update_many(X[:256], y[:256], t[:256])
    block.update_block(X[:256], y[:256], t[:256])
    expected = many.update_many(X[256:], y[256:], t[256:])
    got = block.update_block(X[256:], y[256:], t[256:])  # the gap sits inside this batch
    gap = got[gap_at - 256]
    assert gap.decay == 0.0 and gap.leverage is None and gap.recursive_residual is None
    _assert_steps_close(expected, got, 1.0)
    assert block.prior_weight == many.prior_weight == 0.0
    # reference: numpy.linalg.lstsq on the rows after the gap alone, half-life weights (DESIGN.md)
    b, b0 = weights_half_life(t[gap_at:], h)
    assert _rel(block.coefficients(), batch_solve(X[gap_at:], y[gap_at:], b, b0, 0.0).coefficients) <= 1e-10
    assert block.weight_sum == pytest.approx(float(b.sum()), rel=1e-12)


@pytest.mark.parametrize("bad", ["nan_in_last_row", "inf_y", "time_backwards"])
def test_refused_batch_changes_nothing(bad):
    # Engine contract (errors.py): an EngineError leaves the state unchanged.
    X, y, t = _data(3, 400, seed=13, intercept=True)
    state = State(Spec(dim=3, half_life=40.0))
    _feed(state, X[:300], y[:300], t[:300])
    assert state._pending_n > 0  # a partly filled row buffer, the harder case
    before = state.to_bytes()
    Xb, yb, tb = X[300:400].copy(), y[300:400].copy(), t[300:400].copy()
    error: type[EngineError] = NonFiniteError
    if bad == "nan_in_last_row":
        Xb[-1, 1] = np.nan
    elif bad == "inf_y":
        yb[70] = np.inf
    else:
        tb[-1] = tb[-2] - 1.0
        error = TimeOrderError
    with pytest.raises(error):
        state.update_block(Xb, yb, tb)
    assert state.to_bytes() == before
    # and the state goes on as one that never saw the bad batch
    twin = State.from_bytes(before)
    assert state.update_block(X[300:400], y[300:400], t[300:400]) == twin.update_block(X[300:400], y[300:400], t[300:400])
    assert state.to_bytes() == twin.to_bytes()


# ------------------------------------------------------------ 6. NIST StRD
def _best_reference_lre(X, y, cert) -> float:
    # As test_nist._references: numpy lstsq (gelsd), scipy gelsy and gelsd, statsmodels OLS.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        coefs = [
            np.linalg.lstsq(X, y, rcond=None)[0],
            scipy.linalg.lstsq(X, y, lapack_driver="gelsy")[0],
            scipy.linalg.lstsq(X, y, lapack_driver="gelsd")[0],
            np.asarray(sm.OLS(y, X).fit().params),
        ]
    return max(lre_min(c, cert) for c in coefs)


@pytest.mark.parametrize("name", list(NIST))
def test_nist_lre_streamed_in_blocks_of_16(name):
    # NIST StRD, Linear Least Squares Regression, certified values; LRE as McCullough 1998 (reference.lre).
    X = np.asarray(NIST[name]["X"], dtype=np.float64)
    y = np.asarray(NIST[name]["y"], dtype=np.float64)
    cert = NIST[name]["certified"]
    rows = State(Spec(dim=X.shape[1]))
    for xi, yi in zip(X, y):
        rows.update(xi, float(yi))
    block = State(Spec(dim=X.shape[1]))
    _feed(block, X, y, None, (16,))
    assert block.solution().identifiable
    got, row_by_row = lre_min(block.coefficients(), cert), lre_min(rows.coefficients(), cert)
    # test_nist.py's bounds for the row-by-row stream: within half a digit of the best reference, and >= 7
    assert got >= _best_reference_lre(X, y, cert) - 0.5, (got, row_by_row)
    assert got >= 7.0
    assert got >= row_by_row - 1.0


@pytest.mark.parametrize("name", ["NoInt1", "Pontius"])
def test_rss_equals_warm_up_rss_plus_squared_recursive_residuals(name):
    # Brown, Durbin & Evans (1975): for OLS, RSS_n = RSS_k + sum_{i>k} w_i^2 (recursive residuals w_i).
    # Data: NIST StRD (no certified RSS in the data file; the RSS reference is numpy.linalg.lstsq).
    X = np.asarray(NIST[name]["X"], dtype=np.float64)
    y = np.asarray(NIST[name]["y"], dtype=np.float64)
    d = X.shape[1]
    state = State(Spec(dim=d))
    with _singles() as seen:
        steps = _feed(state, X, y, None, (16,))
    assert len(seen) < X.shape[0]  # some rows went through the block path
    warm = sum(s.recursive_residual is None for s in steps)
    assert warm == d and all(s.recursive_residual is not None for s in steps[warm:])
    # reference: numpy.linalg.lstsq on the warm-up rows and on all rows
    w0 = np.linalg.lstsq(X[:warm], y[:warm], rcond=None)[0]
    w = np.linalg.lstsq(X, y, rcond=None)[0]
    rss_warm = float(np.sum((y[:warm] - X[:warm] @ w0) ** 2))
    rss = float(np.sum((y - X @ w) ** 2))
    total = rss_warm + math.fsum(s.recursive_residual ** 2 for s in steps[warm:])
    assert total == pytest.approx(rss, rel=1e-10)
    assert float(state.factor[d, d]) ** 2 == pytest.approx(rss, rel=1e-10)  # rho^2 of the factor
