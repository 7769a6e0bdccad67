"""Recursive (a priori, standardised-by-leverage) residuals of every update.

Definition (DEVELOPERS.md; Brown, Durbin & Evans, JRSS B 37, 1975):
``(y_n - x_n^T w_{n-1}) / sqrt(1 + x_n^T (f A_{n-1})^{-1} x_n)``.

Reference: ``statsmodels.regression.recursive_ls.RecursiveLSResults.resid_recursive``
(statsmodels RecursiveLS, reference library). There it is the Kalman filter's
standardised forecast error times ``scale**0.5``, i.e. the same quantity; its
diffuse start reports 0 (or NaN) for the first ``k`` observations, where the
engine reports ``None`` (no information along ``x`` yet). Compared where both
are defined: from observation ``k + 1`` on.
"""

from __future__ import annotations

import json
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm

from leastwise.engine import Spec, State

from .reference import batch_solve, weights_forgetting

DATA = json.loads((Path(__file__).resolve().parent.parent / "data" / "nist_strd_linear.json").read_text())["datasets"]


def _engine_recursive(X: np.ndarray, y: np.ndarray, spec: Spec | None = None) -> tuple[State, list]:
    state = State(spec or Spec(dim=X.shape[1]))
    steps = [state.update(x, float(v)) for x, v in zip(X, y)]
    return state, steps


def _statsmodels_recursive(X: np.ndarray, y: np.ndarray) -> np.ndarray:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence / diffuse-start chatter
        res = sm.RecursiveLS(y, X).fit()
    return np.asarray(res.resid_recursive, dtype=np.float64)


def _compare(X: np.ndarray, y: np.ndarray, tol: float = 1e-8) -> int:
    k = X.shape[1]
    _, steps = _engine_recursive(X, y)
    ref = _statsmodels_recursive(X, y)  # statsmodels RecursiveLS, reference library
    assert all(s.recursive_residual is None for s in steps[:k]), "no information before k rows"
    eng = np.array([np.nan if s.recursive_residual is None else s.recursive_residual for s in steps])
    both = np.isfinite(eng) & np.isfinite(ref)
    both[:k] = False
    assert both[k:].all(), "the engine and statsmodels must both define every residual after k rows"
    scale = float(np.std(ref[both])) or 1.0
    # scale-aware: relative to the residual itself or to the typical residual size
    err = np.abs(eng[both] - ref[both]) / (np.abs(ref[both]) + scale)
    assert err.max() <= tol, (err.max(), int(np.argmax(err)))
    return int(both.sum())


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_equal_statsmodels_recursive_ls_random(seed):
    rng = np.random.default_rng(seed)
    n, k = 300, 5
    # Column scales stay within 0.1..100: with a column at 1e-3 statsmodels' exact diffuse
    # start misjudges the rank of its diffuse covariance and its first residuals are wrong
    # (checked against the batch formula, which the engine matches; see the test below).
    scales = np.array([1.0, 10.0, 0.1, 100.0, 3.0])
    X = rng.standard_normal((n, k)) * scales
    X[:, 0] = 1.0  # intercept
    y = X @ (rng.standard_normal(k) / scales) + rng.standard_normal(n) * 0.5
    assert _compare(X, y) == n - k


@pytest.mark.parametrize("name", ["Wampler4", "NoInt1"])
def test_equal_statsmodels_recursive_ls_nist(name):
    # NIST StRD, Linear Least Squares Regression, data only (no certified recursive residuals).
    # Longley, Pontius and Filip: statsmodels' Kalman filter returns NaN for every recursive
    # residual there (its diffuse start breaks down on those condition numbers), so they cannot
    # serve as a reference; Wampler4 (cond ~5e6, large residuals) and NoInt1 can.
    X = np.asarray(DATA[name]["X"], dtype=np.float64)
    y = np.asarray(DATA[name]["y"], dtype=np.float64)
    assert _compare(X, y) == X.shape[0] - X.shape[1]


@pytest.mark.parametrize("lam,ridge", [(1.0, 0.0), (0.97, 0.0), (0.9, 2.0), (1.0, 0.5)])
def test_recursive_residual_formula_with_forgetting(lam, ridge):
    # The definition above with f = lambda, against batch solves of every prefix (reference.batch_solve).
    rng = np.random.default_rng(42)
    n, d = 60, 3
    X = rng.standard_normal((n, d)) * [1.0, 5.0, 0.2]
    y = X @ [1.0, -2.0, 3.0] + 0.1 * rng.standard_normal(n)
    _, steps = _engine_recursive(X, y, Spec(dim=d, forgetting=lam, ridge=ridge))
    start = d if ridge == 0.0 else 1
    for m in range(start, n):
        b, b0 = weights_forgetting(m, lam)
        prev = batch_solve(X[:m], y[:m], b, b0, ridge)
        x = X[m]
        leverage = float(x @ prev.inverse_moment @ x) / lam
        pred = float(x @ prev.coefficients)
        step = steps[m]
        assert step.decay == lam
        assert step.prediction == pytest.approx(pred, rel=1e-9, abs=1e-12)
        assert step.residual == pytest.approx(y[m] - pred, rel=1e-8, abs=1e-11)
        assert step.leverage == pytest.approx(leverage, rel=1e-8)
        expected = (y[m] - pred) / math.sqrt(1.0 + leverage)
        assert step.recursive_residual == pytest.approx(expected, rel=1e-8, abs=1e-11)
        if prev.sigma is not None and prev.sigma > 0:
            # standardised residual: recursive residual / sigma of the state before the update
            assert step.standardized_residual == pytest.approx(expected / prev.sigma, rel=1e-7, abs=1e-9)
        else:
            assert step.standardized_residual is None


def test_first_observations_have_no_recursive_residual():
    # Exact start: no information along x before the data determine it.
    state = State(Spec(dim=2))
    first = state.update([1.0, 0.0], 2.0)
    assert first.leverage is None and first.recursive_residual is None and first.standardized_residual is None
    assert first.prediction == 0.0 and first.residual == 2.0
    # Along a direction already seen the a priori prediction uses the minimum-norm solution.
    second = state.update([2.0, 0.0], 4.5)
    assert not state.solution().identifiable
    assert second.prediction == pytest.approx(4.0)
    assert second.residual == pytest.approx(0.5)


@pytest.mark.parametrize("spec", [Spec(dim=3), Spec(dim=3, ridge=0.5), Spec(dim=3, forgetting=0.95),
                                  Spec(dim=3, half_life=20.0)], ids=["ols", "ridge", "forgetting", "half_life"])
def test_preview_is_the_step_update_then_reports(spec):
    """State.preview gives the update's step bit for bit (start-up phase included) and changes nothing."""
    from leastwise.engine import TimeOrderError

    rng = np.random.default_rng(21)
    state = State(spec)
    t = 0.0
    for i in range(120):
        x = rng.standard_normal(3) * (0.0 if i == 1 else 1.0)  # a row with no information along it
        y = float(x @ [1.0, -0.5, 2.0] + 0.1 * rng.standard_normal())
        t += float(rng.exponential(2.0))
        before = state.to_bytes()
        seen = state.preview(x, y, t)
        assert state.to_bytes() == before
        assert state.update(x, y, t) == seen, i
    before = state.to_bytes()
    with pytest.raises(TimeOrderError):
        state.preview(np.ones(3), 1.0, t - 1.0)
    assert state.to_bytes() == before
