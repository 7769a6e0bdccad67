"""Bad input is refused with an ``EngineError`` subclass and changes nothing.

Contract: DEVELOPERS.md "Inputs: finite, each row's Euclidean norm at most 1e100";
``EngineError``: "the engine refused an input and its state is unchanged";
DESIGN.md: no NaN or infinity anywhere.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from leastwise.engine import (
    MAX_ABS_VALUE, MAX_DIM, DimensionError, EngineError, NonFiniteError, Spec, SpecError, State, TimeOrderError,
)

D = 3
NAN, INF = float("nan"), float("inf")
GOOD_X = [1.0, 2.0, 3.0]
HUGE_ROW = [0.8e100, 0.8e100, 0.0]  # every entry <= 1e100, Euclidean norm 1.13e100 > 1e100


def _states() -> list[State]:
    """Warm states of every kind: plain, forgetting + ridge, half-life; one still not identifiable."""
    rng = np.random.default_rng(0)
    X = rng.standard_normal((40, D))
    y = X @ [1.0, -1.0, 0.5] + 0.01 * rng.standard_normal(40)
    t = 10.0 + np.arange(40.0)
    out = []
    for spec, n in [
        (Spec(dim=D), 40), (Spec(dim=D, forgetting=0.9, ridge=1.0), 40),
        (Spec(dim=D, half_life=5.0), 40), (Spec(dim=D), 2),
    ]:
        s = State(spec)
        s.update_many(X[:n], y[:n], t[:n])
        out.append(s)
    return out


STATE_IDS = ["plain", "forgetting+ridge", "half-life", "not identifiable"]

BAD_UPDATES = [
    # (id, x, y, t, expected error class)
    ("NaN in x", [1.0, NAN, 0.0], 1.0, 100.0, NonFiniteError),
    ("inf in x", [INF, 0.0, 0.0], 1.0, 100.0, NonFiniteError),
    ("-inf in x", [0.0, -INF, 0.0], 1.0, 100.0, NonFiniteError),
    ("NaN y", GOOD_X, NAN, 100.0, NonFiniteError),
    ("inf y", GOOD_X, INF, 100.0, NonFiniteError),
    ("huge y", GOOD_X, 1e101, 100.0, NonFiniteError),
    ("entry above 1e100", [1e101, 0.0, 0.0], 1.0, 100.0, NonFiniteError),
    ("row norm above 1e100", HUGE_ROW, 1.0, 100.0, NonFiniteError),
    ("NaN time", GOOD_X, 1.0, NAN, NonFiniteError),
    ("inf time", GOOD_X, 1.0, INF, NonFiniteError),
    ("too few values", [1.0, 2.0], 1.0, 100.0, DimensionError),
    ("too many values", [1.0, 2.0, 3.0, 4.0], 1.0, 100.0, DimensionError),
    ("matrix for a vector", [GOOD_X], 1.0, 100.0, DimensionError),
    ("scalar x", 1.0, 1.0, 100.0, DimensionError),
    ("bool y", GOOD_X, True, 100.0, NonFiniteError),
    ("bool time", GOOD_X, 1.0, True, NonFiniteError),
    ("earlier time", GOOD_X, 1.0, 0.0, TimeOrderError),
]


@pytest.mark.parametrize("case", BAD_UPDATES, ids=[c[0] for c in BAD_UPDATES])
@pytest.mark.parametrize("which", range(4), ids=STATE_IDS)
def test_bad_single_update_is_refused_and_changes_nothing(case, which):
    _, x, y, t, error = case
    state = _states()[which]
    before = state.to_bytes()
    coef = state.coefficients()
    with pytest.raises(error):
        state.update(x, y, t)
    assert state.to_bytes() == before
    np.testing.assert_array_equal(state.coefficients(), coef)
    # and the state still works
    state.update(GOOD_X, 1.0, 100.0)


@pytest.mark.parametrize("call", [
    lambda s: s.update([True, False, True], 1.0),
    lambda s: s.update(np.array([True, False, True]), 1.0),
    lambda s: s.update_many([[True, False, True]], [1.0]),
    lambda s: s.update_many([GOOD_X], [True]),
    lambda s: s.absorb_block([[True, False, True]], [1.0]),
], ids=["update x list", "update x bool array", "update_many x", "update_many ys", "absorb_block x"])
def test_bool_values_are_refused(call):
    # Found by this test: update(y=True) and time=True are refused (NonFiniteError), but booleans
    # in x, and in the ys of a batch, are converted to 0/1 and applied.
    state = State(Spec(dim=D))
    before = state.to_bytes()
    with pytest.raises(EngineError):
        call(state)
    assert state.to_bytes() == before


def _bad_batches():
    good = np.array([GOOD_X, [0.5, 0.1, 0.2], [2.0, 1.0, 0.0]])
    ys = np.array([1.0, 2.0, 3.0])
    ts = np.array([100.0, 101.0, 102.0])

    def with_x(i, j, v):
        x = good.copy()
        x[i, j] = v
        return x

    def with_y(i, v):
        y = ys.copy()
        y[i] = v
        return y

    def with_t(i, v):
        t = ts.copy()
        t[i] = v
        return t

    huge = good.copy()
    huge[2] = HUGE_ROW
    return [
        # (id, rows, ys, times, error); the bad value is never in the first row
        ("NaN in a later row", with_x(2, 1, NAN), ys, ts, NonFiniteError),
        ("inf in a later row", with_x(1, 0, INF), ys, ts, NonFiniteError),
        ("entry above 1e100", with_x(1, 2, 2e100), ys, ts, NonFiniteError),
        ("row norm above 1e100", huge, ys, ts, NonFiniteError),
        ("NaN y", good, with_y(2, NAN), ts, NonFiniteError),
        ("huge y", good, with_y(1, -1e101), ts, NonFiniteError),
        ("inf time", good, ys, with_t(2, INF), NonFiniteError),
        ("time going back", good, ys, with_t(2, 100.5), TimeOrderError),
        ("time before the state's last", good, ys, with_t(0, 1.0), TimeOrderError),
        ("wrong width", good[:, :2], ys, ts, DimensionError),
        ("one row as a vector", good[0], ys[:1], ts[:1], DimensionError),
        ("fewer ys than rows", good, ys[:2], ts, DimensionError),
        ("more ys than rows", good, np.append(ys, 4.0), ts, DimensionError),
        ("fewer times than rows", good, ys, ts[:2], DimensionError),
        ("empty batch", np.empty((0, D)), np.empty(0), None, DimensionError),
        ("empty list", [], [], None, DimensionError),
    ]


BAD_BATCHES = _bad_batches()


@pytest.mark.parametrize("how", ["update_many", "absorb_block"])
@pytest.mark.parametrize("case", BAD_BATCHES, ids=[c[0] for c in BAD_BATCHES])
@pytest.mark.parametrize("which", range(4), ids=STATE_IDS)
def test_bad_batch_is_refused_and_changes_nothing(case, which, how):
    _, rows, ys, times, error = case
    state = _states()[which]
    before = state.to_bytes()
    with pytest.raises(error):
        getattr(state, how)(rows, ys, times)
    assert state.to_bytes() == before


def test_half_life_needs_times():
    state = State(Spec(dim=D, half_life=60.0))
    before = state.to_bytes()
    for call in (lambda: state.update(GOOD_X, 1.0), lambda: state.update_many([GOOD_X], [1.0]),
                 lambda: state.absorb_block([GOOD_X], [1.0])):
        with pytest.raises(TimeOrderError):
            call()
    assert state.to_bytes() == before


def test_largest_allowed_values_are_accepted_and_stay_finite():
    # The boundary itself is allowed: |entries| and row norm exactly at 1e100.
    state = State(Spec(dim=2, forgetting=0.9))
    state.update([MAX_ABS_VALUE, 0.0], MAX_ABS_VALUE)
    state.update([0.0, MAX_ABS_VALUE], -MAX_ABS_VALUE)
    state.update([1.0, 1.0], 0.0)
    sol = state.solution()
    assert np.isfinite(sol.coefficients).all() and np.isfinite(state.inverse_moment()).all()
    assert sol.sigma is None or math.isfinite(sol.sigma)


@pytest.mark.parametrize("rows,error", [
    ([1.0, NAN, 0.0], NonFiniteError),
    ([[1.0, 2.0, 3.0], [INF, 0.0, 0.0]], NonFiniteError),
    ([HUGE_ROW], NonFiniteError),
    ([1.0, 2.0], DimensionError),
    ([[[1.0, 2.0, 3.0]]], DimensionError),
])
def test_bad_prediction_rows(rows, error):
    state = _states()[0]
    with pytest.raises(error):
        state.predict(rows)


@pytest.mark.parametrize("level", [0.0, 1.0, -0.5, 1.5, NAN, True, "0.9"])
def test_bad_prediction_level(level):
    state = _states()[0]
    with pytest.raises(EngineError):
        state.predict(GOOD_X, level=level)


@pytest.mark.parametrize("kwargs", [
    dict(dim=0), dict(dim=-1), dict(dim=MAX_DIM + 1), dict(dim=2.0), dict(dim=True), dict(dim="3"),
    dict(dim=2, forgetting=0.0), dict(dim=2, forgetting=-0.5), dict(dim=2, forgetting=1.0000001),
    dict(dim=2, forgetting=NAN), dict(dim=2, forgetting=INF),
    dict(dim=2, ridge=-1e-12), dict(dim=2, ridge=NAN), dict(dim=2, ridge=INF),
    dict(dim=2, half_life=0.0), dict(dim=2, half_life=-3.0), dict(dim=2, half_life=NAN), dict(dim=2, half_life=INF),
    dict(dim=2, half_life=60.0, forgetting=0.99),
], ids=lambda kw: ",".join(f"{k}={v!r}" for k, v in kw.items()))
def test_bad_spec(kwargs):
    with pytest.raises(SpecError):
        Spec(**kwargs)


@pytest.mark.parametrize("kwargs", [
    dict(dim=1), dict(dim=MAX_DIM), dict(dim=2, forgetting=1.0), dict(dim=2, forgetting=1e-9),
    dict(dim=2, ridge=0.0), dict(dim=2, ridge=1e300), dict(dim=2, half_life=1e-9), dict(dim=2, half_life=60.0, forgetting=1.0),
])
def test_good_spec(kwargs):
    State(Spec(**kwargs))


def test_every_engine_error_is_a_value_error():
    for cls in (DimensionError, NonFiniteError, TimeOrderError, SpecError):
        assert issubclass(cls, EngineError) and issubclass(cls, ValueError)
