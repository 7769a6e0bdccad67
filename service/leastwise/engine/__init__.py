"""Exact streaming weighted ridge least squares in square-root information form.

Pure numerical code (numpy/scipy): arrays in, arrays out, no I/O.
"""

from .errors import DimensionError, EngineError, NonFiniteError, SpecError, StateFormatError, TimeOrderError
from .solution import Excitation, Prediction, Solution
from .spec import MAX_DIM, Spec
from .state import MAX_ABS_VALUE, State, Step

__all__ = [
    "State", "Step", "Spec", "Solution", "Prediction", "Excitation",
    "EngineError", "DimensionError", "NonFiniteError", "SpecError", "StateFormatError", "TimeOrderError",
    "MAX_DIM", "MAX_ABS_VALUE",
]
