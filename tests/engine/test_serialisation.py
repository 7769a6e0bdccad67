"""State to bytes and back (issue 2, point 5; DESIGN.md "Durability model").

A state restored from bytes and then updated equals, bit for bit (``to_bytes``),
one that never stopped: all three forgetting modes, with and without ridge,
including the not-yet-identifiable phase, a partly filled Gram buffer and after a
block backfill. Corrupt or truncated bytes raise ``StateFormatError``.
"""

from __future__ import annotations

import struct
import zlib

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from leastwise.engine import EngineError, Spec, State, StateFormatError
from leastwise.engine.serial import _HEAD

MODES = ("plain", "forgetting", "half_life")


def _spec(mode: str, d: int, ridge: float) -> Spec:
    if mode == "forgetting":
        return Spec(dim=d, forgetting=0.97, ridge=ridge)
    if mode == "half_life":
        return Spec(dim=d, half_life=25.0, ridge=ridge)
    return Spec(dim=d, ridge=ridge)


def _data(d: int, n: int, seed: int):
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, d)) * 10.0 ** rng.uniform(-2, 2, size=d)
    y = X @ rng.standard_normal(d) + 0.1 * rng.standard_normal(n)
    # irregular times with repeats (used by every mode: times are optional without a half-life)
    t = 50.0 + np.cumsum(rng.exponential(3.0, size=n) * (rng.random(n) > 0.3))
    return X, y, t


def _apply(state: State, X, y, t, how: str):
    if how == "single":
        return [state.update(X[i], float(y[i]), float(t[i])) for i in range(X.shape[0])]
    if how == "many":
        return state.update_many(X, y, t)
    state.absorb_block(X, y, t)
    return None


@settings(max_examples=80, deadline=None, database=None)
@given(
    mode=st.sampled_from(MODES), d=st.integers(1, 6), ridge=st.sampled_from([0.0, 0.5]),
    before=st.integers(0, 80), after=st.integers(1, 70), seed=st.integers(0, 2**32 - 1),
    first=st.sampled_from(["single", "many", "block"]), then=st.sampled_from(["single", "many"]),
)
def test_restored_then_updated_equals_never_stopped(mode, d, ridge, before, after, seed, first, then):
    X, y, t = _data(d, before + after, seed)
    spec = _spec(mode, d, ridge)
    live = State(spec)
    if before:
        _apply(live, X[:before], y[:before], t[:before], first)
    blob = live.to_bytes()
    restored = State.from_bytes(blob)
    assert restored.to_bytes() == blob
    assert restored.n == live.n and restored.spec == live.spec
    np.testing.assert_array_equal(restored.coefficients(), live.coefficients())
    steps_live = _apply(live, X[before:], y[before:], t[before:], then)
    steps_restored = _apply(restored, X[before:], y[before:], t[before:], then)
    assert restored.to_bytes() == live.to_bytes()
    assert steps_restored == steps_live  # the per-update reports too
    sa, sb = restored.solution(), live.solution()
    np.testing.assert_array_equal(sa.coefficients, sb.coefficients)
    assert (sa.identifiable, sa.rank, sa.rss, sa.sigma, sa.refined) == (sb.identifiable, sb.rank, sb.rss, sb.sigma, sb.refined)
    np.testing.assert_array_equal(restored.inverse_moment(), live.inverse_moment())


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("ridge", [0.0, 2.0])
def test_round_trip_in_the_non_identifiable_phase(mode, ridge):
    d = 5
    X, y, t = _data(d, 30, 7)
    live = State(_spec(mode, d, 0.0))
    live.update_many(X[:3], y[:3], t[:3])  # 3 < d rows: not identifiable with the exact start
    assert not live.solution().identifiable
    restored = State.from_bytes(live.to_bytes())
    assert not restored.solution().identifiable
    np.testing.assert_array_equal(restored.coefficients(), live.coefficients())
    for i in range(3, 30):  # through the moment it becomes identifiable, and a Gram fold (32 rows)
        a = live.update(X[i], float(y[i]), float(t[i]))
        b = restored.update(X[i], float(y[i]), float(t[i]))
        assert a == b
        assert restored.to_bytes() == live.to_bytes()
        # and restoring at every step in between changes nothing either
        restored = State.from_bytes(restored.to_bytes())
    assert live.solution().identifiable


@pytest.mark.parametrize("mode", MODES)
def test_round_trip_at_every_gram_buffer_fill(mode):
    d = 3
    X, y, t = _data(d, 100, 3)
    live = State(_spec(mode, d, 0.0))
    chain = State(_spec(mode, d, 0.0))
    for i in range(100):
        live.update(X[i], float(y[i]), float(t[i]))
        chain = State.from_bytes(chain.to_bytes())
        chain.update(X[i], float(y[i]), float(t[i]))
        assert chain.to_bytes() == live.to_bytes(), i


@pytest.mark.parametrize("mode", MODES)
def test_reads_between_updates_leave_no_trace_in_the_state(mode):
    """A state read (solution, predictions) after every update folds exactly like one never read.

    Reads keep the blocked update of the buffered rows for reuse; the fold
    that a full buffer triggers must not pick up a read made before the
    buffer's last row arrived (replay never reads, so it would differ).
    """
    d = 4
    X, y, t = _data(d, 150, 8)
    read = State(_spec(mode, d, 0.0))
    unread = State(_spec(mode, d, 0.0))
    for i in range(150):
        read.update(X[i], float(y[i]), float(t[i]))
        unread.update(X[i], float(y[i]), float(t[i]))
        read.solution()
        read.predict(X[i:i + 1], 0.9)
        assert read.to_bytes() == unread.to_bytes(), i
    assert read.coefficients().tolist() == unread.coefficients().tolist()


def test_reset_and_copy():
    X, y, t = _data(2, 20, 1)
    s = State(Spec(dim=2, half_life=10.0, ridge=1.0))
    fresh = s.to_bytes()
    s.update_many(X, y, t)
    c = s.copy()
    assert c.to_bytes() == s.to_bytes() and c is not s
    s.reset()
    assert s.to_bytes() == fresh
    assert c.n == 20  # the copy is independent


# ----------------------------------------------------------------- corrupt bytes
def _sample_blob() -> bytes:
    X, y, t = _data(3, 45, 5)  # 45 = one Gram fold + 13 buffered rows
    s = State(Spec(dim=3, forgetting=0.95, ridge=1.0))
    s.update_many(X, y, t)
    return s.to_bytes()


BLOB = _sample_blob()
FIELDS = ["magic", "version", "flags", "dim", "n", "pending", "forgetting", "half_life", "ridge",
          "prior_weight", "weight_sum", "weight_sq_sum", "first_time", "last_time"]


def _resign(payload: bytes) -> bytes:
    """Re-append a valid CRC-32, so the semantic checks behind the checksum are exercised."""
    return payload + struct.pack("<I", zlib.crc32(payload))


def _patch(name: str, value) -> bytes:
    fields = list(_HEAD.unpack_from(BLOB))
    fields[FIELDS.index(name)] = value
    return _resign(_HEAD.pack(*fields) + BLOB[_HEAD.size:-4])


def _body_patch(index: int, value: float) -> bytes:
    out = bytearray(BLOB[:-4])
    struct.pack_into("<d", out, _HEAD.size + 8 * index, value)
    return _resign(bytes(out))


@pytest.mark.parametrize("data", [
    pytest.param(b"", id="empty"),
    pytest.param(BLOB[:10], id="shorter than the header"),
    pytest.param(BLOB[:-1], id="truncated by one byte"),
    pytest.param(BLOB[:-8], id="truncated by one number"),
    pytest.param(BLOB[:_HEAD.size], id="header only"),
    pytest.param(BLOB + b"\0" * 8, id="trailing bytes"),
    pytest.param(b"XXXX" + BLOB[4:], id="wrong magic"),
    pytest.param(_patch("version", 99), id="unknown version"),
    pytest.param(_patch("dim", 0), id="dim 0"),
    pytest.param(_patch("dim", 4), id="dim not matching the length"),
    pytest.param(_patch("pending", 40), id="buffer count beyond the buffer"),
    pytest.param(_body_patch(0, float("nan")), id="NaN in the factor"),
    pytest.param(_body_patch(20, float("inf")), id="inf in the Gram matrix"),
    pytest.param(_patch("weight_sum", float("inf")), id="inf scalar"),
    pytest.param("not bytes", id="a str"),
])
def test_corrupt_or_truncated_bytes_raise_state_format_error(data):
    with pytest.raises(StateFormatError):
        State.from_bytes(data)


@pytest.mark.parametrize("data", [
    # Found by this test: these reach Spec(...) inside load_state and escape as SpecError,
    # which callers catching StateFormatError (a damaged checkpoint) do not expect.
    pytest.param(_patch("forgetting", 1.5), id="forgetting above 1"),
    pytest.param(_patch("forgetting", 0.0), id="forgetting 0"),
    pytest.param(_patch("ridge", -1.0), id="negative ridge"),
    pytest.param(_patch("flags", _HEAD.unpack_from(BLOB)[2] | 1), id="half-life flag with half-life 0 and forgetting < 1"),
])
def test_corrupt_spec_fields_raise_state_format_error(data):
    with pytest.raises(StateFormatError):
        State.from_bytes(data)


@pytest.mark.parametrize("data", [
    # Found by this test: accepted today, and the restored state is not one the engine can reach.
    pytest.param(_patch("prior_weight", -1.0), id="negative prior weight"),
    pytest.param(_patch("prior_weight", 2.0), id="prior weight above 1"),
    pytest.param(_patch("weight_sum", -5.0), id="negative effective sample size"),
    pytest.param(_patch("flags", _HEAD.unpack_from(BLOB)[2] | 0xF0), id="unknown flag bits"),
    pytest.param(_body_patch(1, 5.0), id="factor not upper triangular"),
])
def test_impossible_states_raise_state_format_error(data):
    with pytest.raises(StateFormatError):
        State.from_bytes(data)


def test_flipped_bit_in_the_factor_is_detected():
    # The CRC-32 trailer (serial.py) catches a single flipped bit anywhere.
    out = bytearray(BLOB)
    out[_HEAD.size + 3] ^= 0x10  # low mantissa byte of R[0, 0]
    with pytest.raises(StateFormatError):
        State.from_bytes(bytes(out))


def test_state_format_error_is_an_engine_error():
    assert issubclass(StateFormatError, EngineError)


def test_format_1_states_still_load_and_regain_the_base_at_the_next_fold():
    # Checkpoints written before format 2 hold no base factor: reads use the row-by-row factor
    # until the next fold of the row buffer, which starts the base afresh.
    from leastwise.engine.gram import FOLD_ROWS

    rng = np.random.default_rng(21)
    state = State(Spec(dim=3))
    for _ in range(40):  # 40 = one fold + 8 buffered rows
        state.update(rng.normal(size=3), float(rng.normal()))
    new = state.to_bytes()
    m = 4
    head = bytearray(new[:_HEAD.size])
    head[4] = 1  # format version
    head[5] &= ~32  # no base
    body = new[_HEAD.size:len(new) - 4 - 8 * m * m]  # drop the base and the CRC
    payload = bytes(head) + body
    old = payload + struct.pack("<I", zlib.crc32(payload))
    loaded = State.from_bytes(old)
    assert loaded._base is None
    assert np.allclose(loaded.coefficients(), state.coefficients(), rtol=1e-12, atol=0)
    for _ in range(FOLD_ROWS):
        loaded.update(rng.normal(size=3), float(rng.normal()))
    assert loaded._base is not None
    again = State.from_bytes(loaded.to_bytes())
    assert again.to_bytes() == loaded.to_bytes()
