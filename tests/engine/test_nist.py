"""Accuracy on the NIST StRD linear least-squares datasets, streamed one row at a time.

Data: ``tests/data/nist_strd_linear.json``
# NIST StRD, Linear Least Squares Regression (Longley, Filip, Pontius, NoInt1,
# Wampler1-5): data, certified coefficients and certified standard deviations.
Its note says ``X`` already holds every regressor column of the certified
model (intercept and powers expanded), so the engine gets ``Spec(dim=X.shape[1])``
and no separate intercept.

LRE = -log10(|est - cert| / |cert|) (absolute error when cert == 0), minimum
over the coefficients, capped at 15 (McCullough 1998; see ``reference.lre``).
The table of every LRE is printed in the terminal summary (``conftest.py``).
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import statsmodels.api as sm

from leastwise.engine import Spec, State

from .reference import lre_min

DATA = json.loads((Path(__file__).resolve().parent.parent / "data" / "nist_strd_linear.json").read_text())
DATASETS = DATA["datasets"]
NAMES = list(DATASETS)


def _arrays(name: str) -> tuple[np.ndarray, np.ndarray]:
    ds = DATASETS[name]
    return np.asarray(ds["X"], dtype=np.float64), np.asarray(ds["y"], dtype=np.float64)


def _references(X: np.ndarray, y: np.ndarray) -> dict[str, np.ndarray]:
    """Batch solves of the same problem by the reference libraries."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # rank warnings on Filip are expected
        return {
            # numpy.linalg.lstsq, reference library (LAPACK gelsd)
            "numpy lstsq": np.linalg.lstsq(X, y, rcond=None)[0],
            # scipy.linalg.lstsq, reference library (LAPACK gelsy, pivoted QR)
            "scipy gelsy": scipy.linalg.lstsq(X, y, lapack_driver="gelsy")[0],
            # scipy.linalg.lstsq, reference library (LAPACK gelsd, SVD)
            "scipy gelsd": scipy.linalg.lstsq(X, y, lapack_driver="gelsd")[0],
            # statsmodels OLS (default pinv method), reference library
            "statsmodels": np.asarray(sm.OLS(y, X).fit().params),
        }


@pytest.fixture(scope="module")
def results(nist_table: dict) -> dict[str, dict[str, float]]:
    """Per dataset: LRE of the streamed engine, the block path, each reference, and the streamed sd."""
    out: dict[str, dict[str, float]] = {}
    for name in NAMES:
        X, y = _arrays(name)
        cert = DATASETS[name]["certified"]
        stream = State(Spec(dim=X.shape[1], ridge=0.0))
        for xi, yi in zip(X, y):
            stream.update(xi, float(yi))
        block = State(Spec(dim=X.shape[1], ridge=0.0))
        block.absorb_block(X, y)
        cov = stream.covariance()
        row = {
            "stream": lre_min(stream.coefficients(), cert),
            "block": lre_min(block.coefficients(), cert),
        }
        for ref_name, coef in _references(X, y).items():
            row[ref_name] = lre_min(coef, cert)
        row["best ref"] = max(row[k] for k in ("numpy lstsq", "scipy gelsy", "scipy gelsd", "statsmodels"))
        row["stream sd"] = lre_min(np.sqrt(np.diag(cov)), DATASETS[name]["certified_sd"]) if cov is not None else 0.0
        row["_identifiable"] = float(stream.solution().identifiable)
        out[name] = row
    for name, row in out.items():
        nist_table[name] = {k: v for k, v in row.items() if not k.startswith("_")}
    print("\nNIST StRD linear, LRE")
    for name, row in nist_table.items():
        print(f"{name:<10}", "  ".join(f"{k} {v:5.2f}" for k, v in row.items()))
    return out


@pytest.mark.parametrize("name", NAMES)
def test_streamed_lre_within_half_a_digit_of_best_reference(results, name):
    # NIST StRD, Linear Least Squares Regression, certified values; references computed above.
    # Tightest today: Filip, 7.78 against scipy gelsy's 7.81 (the extended refinement is off there,
    # kappa too large). Before commit 41604c8 (the refinement) Pontius, Wampler4 and Wampler5 missed this:
    # streamed 11.67 / 8.23 / 6.23 against gelsy's 12.21 / 9.08 / 7.50.
    row = results[name]
    assert row["_identifiable"] == 1.0
    assert row["stream"] >= row["best ref"] - 0.5, row


@pytest.mark.parametrize("name", NAMES)
def test_certified_standard_deviations(results, name):
    # NIST StRD, Linear Least Squares Regression, certified standard deviations of the estimates.
    # Measured minimum: 7.6 (Filip); the bound leaves a margin for other BLAS builds.
    assert results[name]["stream sd"] >= 6.0, results[name]


@pytest.mark.parametrize("name", NAMES)
def test_block_path_lre_floor(results, name):
    # NIST StRD certified values. absorb_block keeps its Gram in double precision and so gets no
    # extended refinement: measured minimum 6.82 (Wampler5). A floor against regressions.
    assert results[name]["block"] >= 6.0, results[name]


def test_min_lre_over_the_nine_is_at_least_7(results):
    # issue 2: minimum LRE over the nine >= 7.0, streamed one observation at a time.
    # NIST StRD, Linear Least Squares Regression, certified values. Measured minimum 7.78 (Filip).
    # Wampler1-5 reach 13-15 through the extended-precision refinement (gram.py); where long double
    # is plain double (refinement skipped) Wampler5 falls back to 6.23 and this fails.
    worst = min(row["stream"] for row in results.values())
    assert worst >= 7.0, {n: round(r["stream"], 2) for n, r in results.items()}
