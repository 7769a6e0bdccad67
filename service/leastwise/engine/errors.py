"""Errors raised by the engine. All are ``ValueError`` subclasses: bad input, never a bug."""

from __future__ import annotations


class EngineError(ValueError):
    """Base class: the engine refused an input and its state is unchanged."""


class DimensionError(EngineError):
    """An input has the wrong shape for the model."""


class NonFiniteError(EngineError):
    """An input holds NaN, infinity or a magnitude beyond ``MAX_ABS_VALUE``."""


class TimeOrderError(EngineError):
    """An observation time is missing where required or earlier than the last one."""


class SpecError(EngineError):
    """A model specification value is out of range."""


class StateFormatError(EngineError):
    """Bytes given to :func:`State.from_bytes` are not a serialised state."""
