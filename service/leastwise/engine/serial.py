"""State to bytes and back, bit for bit.

Layout (little-endian): magic ``b"LWSQ"``, format version (u8), flags (u8:
bit 0 half-life set, bit 1 first time set, bit 2 last time set, bit 3 Gram
matrix exact, bit 4 Gram sums free of rounding, bit 5 base factor present), dim (u16), n (u64), buffered rows (u16), nine float64 scalars
(forgetting, half-life, ridge, prior weight, S1, S2, first time, last time,
scale of the factor, where the scale was last 1),
then the ``(d+1)^2`` float64 entries of the augmented factor in column-major
order, the extended Gram matrix as two float64 matrices (``hi``, ``lo`` with
``G = hi + lo`` exactly), the buffered (scaled) rows, and the
per-column bit span of the folded values (two int64 vectors), from format 2
the factor at the last fold of the row buffer (``(d+1)^2`` float64,
column-major; when bit 5 is set); last, a CRC-32
of everything before it (u32), so corruption is detected on load. Raw IEEE 754 bytes: nothing is
rounded, so a restored state continues exactly as one that never stopped.
"""

from __future__ import annotations

import math
import struct
import zlib

import numpy as np

from .errors import SpecError, StateFormatError
from .gram import FOLD_ROWS, join_pairs, split_pairs
from .spec import Spec

__all__ = ["dump_state", "load_state", "FORMAT_VERSION"]

MAGIC = b"LWSQ"
FORMAT_VERSION = 2  # 2 adds the factor at the last fold (State._base); 1 is still read
_HEAD = struct.Struct("<4sBBHQH10d")
_CRC = struct.Struct("<I")


def dump_state(state) -> bytes:  # state: State (not imported: state.py imports this module lazily)
    spec = state.spec
    flags = (
        (spec.half_life is not None) | ((state.first_time is not None) << 1)
        | ((state.last_time is not None) << 2) | (bool(state.gram_exact) << 3)
        | (bool(state._sums_exact) << 4) | ((state._base is not None) << 5)
    )
    k = state._pending_n
    head = _HEAD.pack(
        MAGIC, FORMAT_VERSION, flags, spec.dim, state.n, k,
        float(spec.forgetting), float(spec.half_life or 0.0), float(spec.ridge),
        state.prior_weight, state.weight_sum, state.weight_sq_sum,
        float(state.first_time or 0.0), float(state.last_time or 0.0), state._scale,
        float(state._scale_origin),
    )
    payload = b"".join((
        head,
        np.asfortranarray(state._factor, dtype="<f8").tobytes(order="F"),
        split_pairs(state._gram).astype("<f8").tobytes(),
        state._pending[:k].astype("<f8").tobytes(),
        state._span_lsb.astype("<i8").tobytes(),
        state._span_top.astype("<i8").tobytes(),
        b"" if state._base is None else np.asfortranarray(state._base, dtype="<f8").tobytes(order="F"),
    ))
    return payload + _CRC.pack(zlib.crc32(payload))


def load_state(data: bytes):
    from .state import State

    if len(data) < _HEAD.size + _CRC.size:
        raise StateFormatError("state bytes too short")
    (crc,) = _CRC.unpack_from(data, len(data) - _CRC.size)
    data = data[: len(data) - _CRC.size]
    if zlib.crc32(data) != crc:
        raise StateFormatError("state bytes are corrupt (checksum mismatch)")
    (magic, version, flags, dim, n, k, lam, half_life, ridge,
     prior_weight, s1, s2, first_time, last_time, scale, origin) = _HEAD.unpack_from(data)
    if magic != MAGIC or version not in (1, FORMAT_VERSION):
        raise StateFormatError("not a leastwise state, or an unknown format version")
    m = dim + 1
    if not (1 <= dim and k < FOLD_ROWS):
        raise StateFormatError("state header out of range")
    floats = 3 * m * m + k * m
    has_base = bool(flags & 32)
    if has_base and version < 2:
        raise StateFormatError("state has unknown flag bits")
    size = floats + 2 * m + (m * m if has_base else 0)
    if len(data) != _HEAD.size + 8 * size:
        raise StateFormatError("state bytes have the wrong length")
    body = np.frombuffer(data, dtype="<f8", offset=_HEAD.size)
    factor = body[: m * m].reshape((m, m), order="F")
    pairs = body[m * m: 3 * m * m].reshape((2, m, m))
    pending = body[3 * m * m: 3 * m * m + k * m].reshape((k, m))
    spans = np.frombuffer(data, dtype="<i8", offset=_HEAD.size + 8 * floats, count=2 * m).reshape((2, m))
    base = (np.frombuffer(data, dtype="<f8", offset=_HEAD.size + 8 * (floats + 2 * m)).reshape((m, m), order="F")
            if has_base else None)
    scalars = (lam, half_life, ridge, prior_weight, s1, s2, first_time, last_time, scale, origin)
    if not (np.isfinite(body[:floats]).all() and all(math.isfinite(v) for v in scalars)):
        raise StateFormatError("state holds a non-finite number")
    if base is not None and not (np.isfinite(base).all() and not np.tril(base, -1).any()):
        raise StateFormatError("state holds an invalid base factor")
    if flags & ~0b111111:
        raise StateFormatError("state has unknown flag bits")
    if not (0.0 <= prior_weight <= 1.0 and s1 >= 0.0 and s2 >= 0.0 and 0.0 < scale <= 1.0):
        raise StateFormatError("state weights out of range")
    if np.tril(factor, -1).any():
        raise StateFormatError("state factor is not upper triangular")
    try:
        spec = Spec(dim=dim, forgetting=lam, half_life=half_life if flags & 1 else None, ridge=ridge)
    except SpecError as exc:
        raise StateFormatError(f"state holds an invalid specification: {exc}") from exc
    state = State(spec)
    state._factor = np.array(factor, dtype=np.float64, order="F")
    state._base = None if base is None else np.array(base, dtype=np.float64, order="F")
    state._gram = join_pairs(pairs)
    state._pending[:k] = pending
    state._scale = scale
    state._scale_origin = origin
    state._pending_n = k
    state.gram_exact = bool(flags & 8)
    state._sums_exact = bool(flags & 16)
    state._span_lsb = spans[0].astype(np.int64)
    state._span_top = spans[1].astype(np.int64)
    state.n = n
    state.prior_weight = prior_weight
    state.weight_sum = s1
    state.weight_sq_sum = s2
    state.first_time = first_time if flags & 2 else None
    state.last_time = last_time if flags & 4 else None
    return state
