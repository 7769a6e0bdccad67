"""State to bytes and back, bit for bit.

Layout (little-endian): magic ``b"LWSQ"``, format version (u8), flags (u8:
bit 0 half-life set, bit 1 first time set, bit 2 last time set), dim (u16),
n (u64), eight float64 scalars (forgetting, half-life, ridge, prior weight,
S1, S2, first time, last time), then the ``(d+1)^2`` float64 entries of the
augmented factor in column-major order. Raw IEEE 754 bytes: nothing is
rounded, so a restored state continues exactly as one that never stopped.
"""

from __future__ import annotations

import math
import struct

import numpy as np

from .errors import StateFormatError
from .spec import Spec

__all__ = ["dump_state", "load_state", "FORMAT_VERSION"]

MAGIC = b"LWSQ"
FORMAT_VERSION = 1
_HEAD = struct.Struct("<4sBBHQ8d")


def dump_state(state) -> bytes:  # state: State (not imported: state.py imports this module lazily)
    spec = state.spec
    flags = (spec.half_life is not None) | ((state.first_time is not None) << 1) | ((state.last_time is not None) << 2)
    head = _HEAD.pack(
        MAGIC, FORMAT_VERSION, flags, spec.dim, state.n,
        float(spec.forgetting), float(spec.half_life or 0.0), float(spec.ridge),
        state.prior_weight, state.weight_sum, state.weight_sq_sum,
        float(state.first_time or 0.0), float(state.last_time or 0.0),
    )
    return head + np.asfortranarray(state._factor, dtype="<f8").tobytes(order="F")


def load_state(data: bytes):
    from .state import State

    if len(data) < _HEAD.size:
        raise StateFormatError("state bytes too short")
    (magic, version, flags, dim, n, lam, half_life, ridge,
     prior_weight, s1, s2, first_time, last_time) = _HEAD.unpack_from(data)
    if magic != MAGIC or version != FORMAT_VERSION:
        raise StateFormatError("not a leastwise state, or an unknown format version")
    size = (dim + 1) * (dim + 1) * 8
    if len(data) != _HEAD.size + size:
        raise StateFormatError("state bytes have the wrong length")
    factor = np.frombuffer(data, dtype="<f8", offset=_HEAD.size).reshape((dim + 1, dim + 1), order="F")
    scalars = (lam, half_life, ridge, prior_weight, s1, s2, first_time, last_time)
    if not (np.isfinite(factor).all() and all(math.isfinite(v) for v in scalars)):
        raise StateFormatError("state holds a non-finite number")
    state = State(Spec(dim=dim, forgetting=lam, half_life=half_life if flags & 1 else None, ridge=ridge))
    state._factor = np.array(factor, dtype=np.float64, order="F")
    state.n = n
    state.prior_weight = prior_weight
    state.weight_sum = s1
    state.weight_sq_sum = s2
    state.first_time = first_time if flags & 2 else None
    state.last_time = last_time if flags & 4 else None
    return state
