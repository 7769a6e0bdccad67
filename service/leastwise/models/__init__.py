"""leastwise.models: the registry of live model states (cache, locking, durability, idempotency)."""

from .config import INTERCEPT, MAX_FEATURES, NAME_PATTERN, ModelConfig, check_model_name
from .drift import ResidualMonitor, drift_available
from .errors import Busy, Conflict, FieldError, InvalidInput, NotFound, RegistryError
from .inputs import MAX_KEY, Observation, parse_observations, parse_predict, parse_time
from .registry import LiveModel, Registry

__all__ = [
    "Registry", "LiveModel", "ModelConfig", "ResidualMonitor", "drift_available",
    "RegistryError", "InvalidInput", "NotFound", "Conflict", "Busy", "FieldError",
    "Observation", "parse_observations", "parse_predict", "parse_time", "check_model_name",
    "INTERCEPT", "MAX_FEATURES", "NAME_PATTERN", "MAX_KEY",
]
