"""Helpers of the end-to-end tests: LRE, weighted batch solves, posting through HTTP."""

from __future__ import annotations

import math

import numpy as np


def lre(estimate: float, certified: float) -> float:
    """-log10(|est - cert| / |cert|) (absolute error when cert == 0), capped at 15, floored at 0."""
    err = abs(estimate - certified) if certified == 0 else abs(estimate - certified) / abs(certified)
    if err == 0:
        return 15.0
    return max(0.0, min(15.0, -math.log10(err)))


def lre_min(estimates, certified) -> float:
    return min(lre(float(e), float(c)) for e, c in zip(estimates, certified))


def weighted_ridge_solve(A: np.ndarray, y: np.ndarray, b: np.ndarray, b0: float, ridge: float) -> np.ndarray:
    """Minimiser of sum b_i (y_i - a_i^T w)^2 + b0 ridge ||w||^2 by lstsq on the augmented weighted system."""
    d = A.shape[1]
    sw = np.sqrt(b)
    top = A * sw[:, None]
    aug = np.vstack([top, math.sqrt(b0 * ridge) * np.eye(d)])
    rhs = np.concatenate([y * sw, np.zeros(d)])
    return np.linalg.lstsq(aug, rhs, rcond=None)[0]


def coefficients(body: dict, terms: list[str]) -> np.ndarray:
    return np.array([body["coefficients"][t] for t in terms])
