"""leastwise.drift - pure statistics over the recursive-residual stream.

No I/O, no web, no database; numpy/scipy only.  See docs/drift.md.
"""

from .coefficients import ChangeTest, chow_predictive_test, chow_test, wald_change
from .cusum import BDE_CUSUM_CONSTANTS, CusumTest, bde_constant, cusum, cusum_bounds, cusum_test
from .cusum_squares import (
    CusumSquaresTest,
    cusum_squares,
    cusum_squares_bounds,
    cusum_squares_critical_value,
    cusum_squares_test,
)
from .ewma import ewma, ewma_sd
from .state import STATUS_ALARM, STATUS_OK, STATUS_WATCH, DriftConfig, DriftState, DriftStatus, Reason
from .tabular import siegmund_arl, tabular_cusum

__all__ = [
    "BDE_CUSUM_CONSTANTS",
    "ChangeTest",
    "CusumSquaresTest",
    "CusumTest",
    "DriftConfig",
    "DriftState",
    "DriftStatus",
    "Reason",
    "STATUS_ALARM",
    "STATUS_OK",
    "STATUS_WATCH",
    "bde_constant",
    "chow_predictive_test",
    "chow_test",
    "cusum",
    "cusum_bounds",
    "cusum_squares",
    "cusum_squares_bounds",
    "cusum_squares_critical_value",
    "cusum_squares_test",
    "cusum_test",
    "ewma",
    "ewma_sd",
    "siegmund_arl",
    "tabular_cusum",
    "wald_change",
]
