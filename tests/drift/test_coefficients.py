"""Wald and Chow tests for a change of coefficients."""

import math

import numpy as np
import pytest
from scipy import stats

from leastwise.drift import chow_predictive_test, chow_test, wald_change


def test_wald_known_answer():
    # d = (1, 1), C0 + C1 = I: W = 2, chi2(2) survival = exp(-1) (closed form)
    r = wald_change([1.0, 1.0], np.eye(2) * 0.5, [0.0, 0.0], np.eye(2) * 0.5)
    assert r.statistic == pytest.approx(2.0)
    assert r.df == (2.0,)
    assert r.p_value == pytest.approx(math.exp(-1.0), rel=1e-12)
    # scipy.stats.chi2, reference library
    assert r.p_value == pytest.approx(stats.chi2.sf(2.0, 2), rel=1e-14)


def test_wald_rank_deficient():
    C = np.array([[1.0, 1.0], [1.0, 1.0]])  # rank 1: only b[0]+b[1] is informative
    r = wald_change([1.0, 1.0], C, [0.0, 0.0], np.zeros((2, 2)))
    assert r.df == (1.0,)
    assert r.statistic == pytest.approx(1.0)  # d = (1,1), pinv(C) = C/4 -> d'C d/4 = 1
    assert r.p_value == pytest.approx(stats.chi2.sf(1.0, 1))


def _ols(X, y):
    A = X.T @ X
    b = np.linalg.solve(A, X.T @ y)
    rss = float(np.sum((y - X @ b) ** 2))
    return b, A, rss


def test_wald_false_positive_rates_near_nominal():
    rng = np.random.default_rng(1234)
    p, n0, n1, reps = 3, 200, 200, 2000
    beta = np.array([1.0, -2.0, 0.5])
    rej_ind = rej_nest = 0
    for _ in range(reps):
        X = np.column_stack([np.ones(n0 + n1), rng.normal(size=(n0 + n1, p - 1))])
        y = X @ beta + rng.normal(size=n0 + n1)
        b0, A0, rss0 = _ols(X[:n0], y[:n0])
        bn, An, rssn = _ols(X[n0:], y[n0:])
        bp, Ap, rssp = _ols(X, y)
        s0 = rss0 / (n0 - p)
        sn = rssn / (n1 - p)
        sp = rssp / (n0 + n1 - p)
        # independent samples: old fit vs fit on the new data only
        r = wald_change(bn, sn * np.linalg.inv(An), b0, s0 * np.linalg.inv(A0))
        rej_ind += r.p_value < 0.05
        # nested: current (pooled) state vs its own earlier snapshot, common sigma
        r = wald_change(bp, sp * np.linalg.inv(Ap), b0, sp * np.linalg.inv(A0), nested=True)
        rej_nest += r.p_value < 0.05
    # binomial sd at 5 % and 2000 reps is 0.005
    assert 0.035 < rej_ind / reps < 0.068, rej_ind / reps
    assert 0.035 < rej_nest / reps < 0.068, rej_nest / reps


def test_chow_equals_statsmodels_dummy_regression():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(77)
    n0, n1, p = 60, 25, 2
    X = np.column_stack([np.ones(n0 + n1), rng.normal(size=n0 + n1)])
    y = X @ [1.0, 2.0] + rng.normal(size=n0 + n1)
    y[n0:] += 0.6
    _, _, rss0 = _ols(X[:n0], y[:n0])
    _, _, rssn = _ols(X[n0:], y[n0:])
    _, _, rssp = _ols(X, y)
    r = chow_test(rssp, rss0, rssn, n0, n1, p)
    # statsmodels OLS.compare_f_test with a full set of interaction dummies, reference library
    D = np.zeros((n0 + n1, 1))
    D[n0:] = 1.0
    full = sm.OLS(y, np.column_stack([X, X * D])).fit()
    restr = sm.OLS(y, X).fit()
    f, pv, dfd = full.compare_f_test(restr)
    assert r.statistic == pytest.approx(f, rel=1e-9)
    assert r.p_value == pytest.approx(pv, rel=1e-9)
    assert r.df == (float(p), float(n0 + n1 - 2 * p))


def test_chow_predictive_from_recursive_residuals():
    sm = pytest.importorskip("statsmodels.api")
    rng = np.random.default_rng(78)
    n0, n1, p = 50, 2, 3  # fewer new observations than coefficients
    X = np.column_stack([np.ones(n0 + n1), rng.normal(size=(n0 + n1, 2))])
    y = X @ [1.0, 0.0, -1.0] + rng.normal(size=n0 + n1)
    _, _, rss0 = _ols(X[:n0], y[:n0])
    _, _, rssp = _ols(X, y)
    # recursive residuals of the new observations, computed directly (BDE 1975 eq. 3)
    q = 0.0
    for t in range(n0, n0 + n1):
        b, A, _ = _ols(X[:t], y[:t])
        x = X[t]
        w = (y[t] - x @ b) / math.sqrt(1.0 + x @ np.linalg.solve(A, x))
        q += w * w
    assert rssp - rss0 == pytest.approx(q, rel=1e-9)  # BDE (1975) eq. (4)
    r = chow_predictive_test(rssp, rss0, n0, n1, p)
    # statsmodels OLS.compare_f_test with one dummy per new observation, reference library
    D = np.zeros((n0 + n1, n1))
    D[n0:, :] = np.eye(n1)
    f, pv, _ = sm.OLS(y, np.column_stack([X, D])).fit().compare_f_test(sm.OLS(y, X).fit())
    assert r.statistic == pytest.approx(f, rel=1e-9)
    assert r.p_value == pytest.approx(pv, rel=1e-9)


def test_invalid():
    with pytest.raises(ValueError):
        wald_change([1.0], [[1.0]], [1.0, 2.0], np.eye(2))
    with pytest.raises(ValueError):
        wald_change([1.0], [[0.0]], [0.0], [[0.0]])
    with pytest.raises(ValueError):
        chow_test(1.0, 0.5, 0.4, 10, 2, 3)
