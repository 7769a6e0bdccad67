"""Exponentially weighted residual bias and scale ratio.

Reference
---------
Roberts, S. W. (1959). "Control chart tests based on geometric moving
averages." Technometrics 1(3), 239-250;  Montgomery, Introduction to
Statistical Quality Control (6th ed.), sec. 9.2, eq. (9.22)-(9.25).

Formula
-------
With standardised residuals ``z_t = w_t / sigma`` and smoothing ``alpha`` in
(0, 1] (``alpha = 1 / span``; the weight of an observation halves after
``ln 2 / -ln(1 - alpha)`` further observations):

    bias_t  = (1 - alpha) bias_{t-1} + alpha z_t           bias_0 = 0
    msq_t   = (1 - alpha) msq_{t-1}  + alpha z_t^2         msq_0  = 1
    scale_ratio_t = sqrt(msq_t)    (observed scale / model sigma)

Under a stable model (z iid N(0,1)) bias_t has mean 0 and, asymptotically,
sd ``sqrt(alpha / (2 - alpha))`` (exactly that times
``sqrt(1 - (1-alpha)^(2t))`` at step t); msq_t has mean 1 and sd
``sqrt(2 alpha / (2 - alpha))``.  The bias limit used by the drift state is
``L * sqrt(alpha / (2 - alpha))`` (Montgomery's EWMA chart, L ~ 3).
"""

from __future__ import annotations

import math

import numpy as np


def ewma_sd(alpha: float, t: int | None = None) -> float:
    """Null standard deviation of the EWMA of iid N(0,1) values (asymptotic if t is None)."""
    v = alpha / (2.0 - alpha)
    if t is not None:
        v *= 1.0 - (1.0 - alpha) ** (2 * t)
    return math.sqrt(v)


def ewma(z, alpha: float, start: float = 0.0) -> np.ndarray:
    """Reference (batch) EWMA ``e_t = (1 - alpha) e_{t-1} + alpha z_t``, ``e_0 = start``."""
    z = np.asarray(z, dtype=np.float64)
    out = np.empty_like(z)
    e = float(start)
    for i, v in enumerate(z.tolist()):
        e += alpha * (v - e)
        out[i] = e
    return out
