"""Streaming detectors in DriftState against batch forms and hand-checked formulas."""

import math
import warnings

import numpy as np
import pytest

from leastwise.drift import DriftConfig, DriftState, cusum, ewma, ewma_sd, tabular_cusum


def test_streaming_bde_cusum_last_index_equals_batch_statsmodels():
    RecursiveLS = pytest.importorskip("statsmodels.regression.recursive_ls").RecursiveLS
    rng = np.random.default_rng(21)
    n = 150
    X = np.column_stack([np.ones(n), rng.normal(size=n)])
    y = X @ [0.5, -1.0] + rng.normal(size=n)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = RecursiveLS(y, X).fit()
    d = max(res.nobs_diffuse, res.loglikelihood_burn)
    w = res.resid_recursive[d:]
    s = DriftState()
    for i, v in enumerate(w):
        s.observe(float(v), 1.0)
        if i >= 1:
            # streaming W_m = batch CUSUM of the first m residuals, at its last point
            assert math.isclose(s.bde_cusum(), cusum(w[: i + 1])[-1], rel_tol=1e-10, abs_tol=1e-10)
    # statsmodels RecursiveLSResults.cusum, reference library
    assert math.isclose(s.bde_cusum(), res.cusum[-1], rel_tol=1e-10)
    assert math.isclose(s.residual_std(), np.std(w, ddof=1), rel_tol=1e-12)


def test_tabular_cusum_hand_checked():
    # Page (1954) / Montgomery eq. (9.2)-(9.3), computed by hand with k = 0.5:
    z = [1.0, 2.0, -0.5, 0.2, -3.0, -1.0, 0.5]
    # C+: 0.5, 2.0, 1.0, 0.7, 0.0, 0.0, 0.0
    # C-: 0.0, 0.0, 0.0, 0.0, 2.5, 3.0, 2.0
    cp_hand = [0.5, 2.0, 1.0, 0.7, 0.0, 0.0, 0.0]
    cn_hand = [0.0, 0.0, 0.0, 0.0, 2.5, 3.0, 2.0]
    cp, cn = tabular_cusum(z, k=0.5)
    np.testing.assert_allclose(cp, cp_hand, atol=1e-15)
    np.testing.assert_allclose(cn, cn_hand, atol=1e-15)
    # the state, fed w = 2 z with sigma = 2, after a warm-up of 2 zero-weight residuals
    cfg = DriftConfig(cusum_k=0.5, cusum_h_watch=2.2, cusum_h_alarm=2.8, warmup=2)
    s = DriftState(cfg)
    s.observe(0.3, 2.0)
    s.observe(-0.3, 2.0)
    for i, v in enumerate(z):
        s.observe(2.0 * v, 2.0)
        assert s.mean_cusum() == pytest.approx((cp_hand[i], cn_hand[i]), abs=1e-15)
        if i == 4:
            st = s.status()
            assert st.status == "watch"
            (r,) = [x for x in st.reasons if x.statistic == "mean_cusum_down"]
            assert (r.value, r.threshold, r.since) == (2.5, 2.2, 7)  # run began at index 7
    st = s.status()
    assert st.status == "alarm"  # C- reached 3.0 > 2.8 at index 8, latched
    r = st.reasons[0]
    assert (r.statistic, r.level, r.value, r.threshold, r.since, r.latched) == (
        "mean_cusum_down", "alarm", 3.0, 2.8, 7, True)


def test_ewma_bias_and_scale_hand_checked():
    a = 0.1
    z = [0.5, -1.0, 2.0, 0.0]
    # by hand: bias 0.05, -0.055, 0.1505, 0.13545 ; msq 0.925, 0.9325, 1.23925, 1.115325
    np.testing.assert_allclose(ewma(z, a), [0.05, -0.055, 0.1505, 0.13545], atol=1e-15)
    np.testing.assert_allclose(ewma(np.square(z), a, start=1.0),
                               [0.925, 0.9325, 1.23925, 1.115325], atol=1e-15)
    s = DriftState(DriftConfig(ewma_alpha=a, warmup=2))
    s.observe(1.0, 1.0)
    s.observe(-1.0, 1.0)
    for v in z:
        s.observe(3.0 * v, 3.0)
    assert math.isclose(s.bias(), 0.13545, abs_tol=1e-15)
    assert math.isclose(s.scale_ratio(), math.sqrt(1.115325), rel_tol=1e-15)
    # null sd of an EWMA of unit-variance iid values (Montgomery eq. 9.24)
    assert math.isclose(ewma_sd(a), math.sqrt(a / (2 - a)))
    assert math.isclose(ewma_sd(a, 1), a)


def test_sigma_none_counted_not_used():
    s = DriftState()
    s.observe(5.0, None)
    s.observe(float("nan"), 1.0)
    s.observe(1.0, float("inf"))
    s.observe(1.0, 0.0)
    assert (s.n_observed, s.n_used, s.index) == (4, 0, 4)
    s.observe(1.0, 1.0)
    assert (s.n_observed, s.n_used) == (5, 1)
    s.observe(2.0, 1.0, index=42)
    assert s.index == 42
