"""The compiled Gram sums (``_leastwise_native``, service/native) against the numpy path they replace.

``gram.fold`` and ``gram.accumulate_rows`` use the compiled kernel when it was built
(``setup.py``); it must give the same bits as numpy's long double product ``r.T @ r``
(sequential sums per entry, no BLAS) and as the row-by-row numpy continuation, signed
zeros included. CI must test the compiled path, so there a missing module is a
failure; elsewhere (no C compiler at install time) the numpy path is what runs, and
the comparison is skipped.
"""

from __future__ import annotations

import os

import numpy as np
import pytest

from leastwise.engine import gram as gram_mod


def _value_bits(a: np.ndarray) -> bytes:
    """The value bits of a long double array (its padding bytes are arbitrary), signs of zeros included."""
    hi = a.astype(np.float64)
    lo = (a - hi.astype(np.longdouble)).astype(np.float64)
    return hi.tobytes() + lo.tobytes() + np.signbit(a).tobytes()


def _rows(rng: np.random.Generator, k: int, m: int, trial: int) -> np.ndarray:
    rows = rng.normal(size=(k, m)) * 10.0 ** rng.uniform(-40, 40, size=m)
    if trial % 3 == 0:  # fixed-point data: exact sums
        rows = np.round(rows * 1000.0)
    if trial % 7 == 0:
        rows[:, 0] = -0.0
    if trial % 11 == 0:
        rows[:, m // 2] = 0.0
    return rows


def test_the_compiled_sums_are_built_where_ci_runs():
    if os.environ.get("CI") and not gram_mod.NATIVE:
        pytest.fail("_leastwise_native is missing: pip install . builds it (setup.py; needs a C compiler)")
    if not gram_mod.NATIVE:
        pytest.skip("built without a C compiler: the numpy path runs")
    assert gram_mod._native_lib is not None


@pytest.mark.skipif(not gram_mod.NATIVE, reason="no compiled sums here (CI requires them, see above)")
def test_compiled_products_and_continuations_equal_numpy_bit_for_bit(monkeypatch):
    rng = np.random.default_rng(2024)
    sizes = [1, 2, 3, 4, 5, 8, 9, 31, 32, 33, 64, 65, 129]
    for trial in range(500):
        m = sizes[trial % len(sizes)] if trial < 3 * len(sizes) else int(rng.integers(1, 130))
        k = int(rng.integers(1, 40))
        rows = _rows(rng, k, m, trial)
        r = rows.astype(np.longdouble)
        gram = gram_mod.row_gram(rng.normal(size=(3, m)).astype(np.longdouble))
        assert _value_bits(gram_mod.fold(gram, rows)) == _value_bits(gram + r.T @ r), (trial, m, k)
        j = int(rng.integers(0, k + 1))
        native_partial = gram_mod.accumulate_rows(None, rows[:j]) if j else None
        native = gram_mod.accumulate_rows(native_partial, rows[j:]) if j < k else native_partial
        with monkeypatch.context() as patched:
            patched.setattr(gram_mod, "NATIVE", False)
            numpy_partial = gram_mod.accumulate_rows(None, rows[:j]) if j else None
            reference = gram_mod.accumulate_rows(numpy_partial, rows[j:]) if j < k else numpy_partial
        assert _value_bits(native) == _value_bits(reference), (trial, m, k, j)
        assert _value_bits(native) == _value_bits(r.T @ r), (trial, m, k, j)
        if native_partial is not None:  # the partial sum handed in is left as it was (memos share it)
            assert _value_bits(native_partial) == _value_bits(numpy_partial)


@pytest.mark.skipif(not gram_mod.NATIVE, reason="no compiled sums here (CI requires them, see above)")
def test_compiled_sums_refuse_other_layouts():
    rows = np.ones((3, 4))
    with pytest.raises(TypeError):
        gram_mod._native_lib.gram_sums(rows, np.zeros((4, 4)), False)  # float64 out
    with pytest.raises(TypeError):
        gram_mod._native_lib.gram_sums(rows.astype(np.float32), np.zeros((4, 4), dtype=np.longdouble), False)
    with pytest.raises(ValueError):
        gram_mod._native_lib.gram_sums(rows, np.zeros((3, 3), dtype=np.longdouble), False)
    with pytest.raises((TypeError, ValueError, BufferError)):
        gram_mod._native_lib.gram_sums(rows, np.zeros((4, 4), dtype=np.longdouble).T[:, ::1][::2], False)


def _split_bits(split) -> bytes:  # noqa: ANN001
    parts = [split.pairs.tobytes(), repr(split.bound).encode()]
    for a in (split.a3t, split.neg_b):
        parts.append(b"none" if a is None else a.tobytes() + np.signbit(a).tobytes())
    return b"|".join(parts)


@pytest.mark.skipif(not gram_mod.NATIVE, reason="no compiled kernels here (CI requires them, see above)")
def test_compiled_split_and_refinement_residual_equal_numpy_bit_for_bit(monkeypatch):
    """``split_gram`` and one refinement step (``_refine_once``) with and without the compiled kernels,
    on Gram matrices of awkward rows (huge entries take the no-fast-path branch in both)."""
    from scipy.linalg.lapack import dtrtrs

    rng = np.random.default_rng(77)
    refined = 0
    for trial in range(400):
        d = int(rng.integers(1, 70))
        m = d + 1
        rows = _rows(rng, int(rng.integers(m, m + 40)), m, trial)
        if trial % 13 == 0:
            rows *= 1e145  # entries beyond the fast path's operand limit
        folded = gram_mod.fold(gram_mod.new_gram(d, 0.0), rows)
        native = gram_mod.split_gram(folded)
        with monkeypatch.context() as patched, np.errstate(over="ignore"):  # huge entries: inf, as wanted
            patched.setattr(gram_mod, "NATIVE", False)
            reference = gram_mod.split_gram(folded)
        assert _split_bits(native) == _split_bits(reference), (trial, d)
        if native.a3t is None:
            continue
        R = np.linalg.qr(rows[:, :d], mode="r")
        R = np.array(R * np.sign(np.diag(R))[:, None], order="F")
        z = np.linalg.qr(rows, mode="r")[:d, d]
        w0 = np.asarray(dtrtrs(R, z, lower=0, trans=0)[0], dtype=np.float64).reshape(d)
        got = gram_mod._refine_once(R, w0, native)
        with monkeypatch.context() as patched:
            patched.setattr(gram_mod, "NATIVE", False)
            want = gram_mod._refine_once(R, w0, reference)
        if want is None:
            assert got is None, (trial, d)
            continue
        refined += 1
        assert got is not None and got[1] == want[1], (trial, d)
        assert got[0].tobytes() == want[0].tobytes() and np.array_equal(np.signbit(got[0]), np.signbit(want[0])), (trial, d)
    assert refined > 200
