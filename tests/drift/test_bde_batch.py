"""Batch BDE CUSUM and CUSUM of squares against statsmodels RecursiveLS."""

import warnings

import numpy as np
import pytest

from leastwise.drift import (
    BDE_CUSUM_CONSTANTS,
    bde_constant,
    cusum,
    cusum_bounds,
    cusum_squares,
    cusum_squares_bounds,
    cusum_squares_critical_value,
    cusum_squares_test,
    cusum_test,
)

RecursiveLS = pytest.importorskip("statsmodels.regression.recursive_ls").RecursiveLS


def _fit(seed, n=120, p=3, shift=0.0):
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.ones(n), rng.normal(size=(n, p - 1))])
    beta = np.arange(1.0, p + 1)
    y = X @ beta + rng.normal(scale=0.7, size=n)
    y[n // 2:] += shift
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = RecursiveLS(y, X).fit()
    d = max(res.nobs_diffuse, res.loglikelihood_burn)
    return res, d


@pytest.mark.parametrize("seed,shift", [(0, 0.0), (1, 0.0), (2, 1.5), (3, -0.8)])
def test_cusum_equals_statsmodels(seed, shift):
    res, d = _fit(seed, shift=shift)
    w = res.resid_recursive[d:]
    # statsmodels RecursiveLSResults.cusum, reference library
    np.testing.assert_allclose(cusum(w), res.cusum, rtol=1e-8, atol=1e-8)
    m = w.size
    pts = np.arange(d, res.nobs + 1)
    # statsmodels RecursiveLSResults._cusum_significance_bounds, reference library
    for alpha in (0.05, 0.01):
        lo_ref, hi_ref = res._cusum_significance_bounds(alpha, points=pts)
        lo, hi = cusum_bounds(m, alpha, points=pts - d)
        np.testing.assert_allclose(lo, lo_ref, rtol=1e-8, atol=1e-8)
        np.testing.assert_allclose(hi, hi_ref, rtol=1e-8, atol=1e-8)
    lo_ref, hi_ref = res._cusum_significance_bounds(0.05)
    lo, hi = cusum_bounds(m, 0.05)
    np.testing.assert_allclose(hi, hi_ref, rtol=1e-12)
    np.testing.assert_allclose(lo, lo_ref, rtol=1e-12)


@pytest.mark.parametrize("seed,shift", [(4, 0.0), (5, 2.0)])
def test_cusum_squares_equals_statsmodels(seed, shift):
    res, d = _fit(seed, shift=shift)
    w = res.resid_recursive[d:]
    # statsmodels RecursiveLSResults.cusum_squares, reference library
    np.testing.assert_allclose(cusum_squares(w), res.cusum_squares, rtol=1e-8, atol=1e-8)
    pts = np.arange(d, res.nobs + 1)
    # statsmodels RecursiveLSResults._cusum_squares_significance_bounds, reference library
    for alpha in (0.2, 0.1, 0.05, 0.02, 0.01):
        lo_ref, hi_ref = res._cusum_squares_significance_bounds(alpha, points=pts)
        lo, hi = cusum_squares_bounds(w.size, alpha, points=pts - d)
        np.testing.assert_allclose(lo, lo_ref, rtol=1e-8, atol=1e-8)
        np.testing.assert_allclose(hi, hi_ref, rtol=1e-8, atol=1e-8)


def test_bde_constants_published():
    # Brown, Durbin & Evans (1975), JRSS B 37(2), Table 1 / eq. (19): published constants
    assert bde_constant(0.05) == 0.948
    assert bde_constant(0.01) == 1.143
    assert bde_constant(0.10) == 0.850  # statsmodels has 0.950 here (typo); BDE publish 0.850
    assert BDE_CUSUM_CONSTANTS == {0.10: 0.850, 0.05: 0.948, 0.01: 1.143}
    with pytest.raises(ValueError):
        bde_constant(0.025)


def test_bde_constants_are_brownian_crossing_probabilities():
    # BDE (1975) eq. (19): P(crossing a(1 + 2t) on [0,1] by Brownian motion, either side)
    # = 2 [1 - Phi(3a) + exp(-4a^2) Phi(a)]; check it reproduces the nominal levels.
    from scipy.stats import norm

    for alpha, a in BDE_CUSUM_CONSTANTS.items():
        q = 1 - norm.cdf(3 * a) + np.exp(-4 * a * a) * norm.cdf(a)
        assert abs(2 * q - alpha) < 0.002, (alpha, 2 * q)


def test_cusum_squares_band_size_by_simulation():
    # Monte Carlo under the null (iid normal recursive residuals), independent of any table:
    # the Edgerton-Wells band should have size near the nominal two-sided level.
    rng = np.random.default_rng(3)
    m = 102
    w = rng.normal(size=(10000, m))
    s = np.cumsum(w**2, axis=1)
    s /= s[:, -1:]
    dev = np.abs(s - np.arange(1, m + 1) / m).max(axis=1)
    size = (dev > cusum_squares_critical_value(m, 0.05)).mean()
    assert 0.04 < size < 0.066, size  # measured 0.057 at m=102, 0.051 at m=400


def test_batch_tests_detect_shift_and_accept_null():
    res, d = _fit(7, n=200, shift=3.0)
    assert cusum_test(res.resid_recursive[d:], 0.05).reject
    rng = np.random.default_rng(11)
    rejects = sum(cusum_test(rng.normal(size=200), 0.05).reject for _ in range(400))
    assert rejects / 400 < 0.08
    rejects = sum(cusum_squares_test(rng.normal(size=200), 0.05).reject for _ in range(400))
    assert rejects / 400 < 0.09


def test_invalid_inputs():
    with pytest.raises(ValueError):
        cusum([1.0])
    with pytest.raises(ValueError):
        cusum([1.0, 1.0, 1.0])
    with pytest.raises(ValueError):
        cusum_squares([0.0, 0.0])
    with pytest.raises(ValueError):
        cusum_squares_critical_value(2, 0.05)
    with pytest.raises(ValueError):
        cusum_squares_critical_value(100, 0.03)
