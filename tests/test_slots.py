"""slot_copier: a copy shares every slot's value except arrays named for copying, whose layout it keeps."""

from __future__ import annotations

import numpy as np
import pytest

from leastwise.slots import slot_copier


class Holder:
    __slots__ = ("matrix", "vector", "label", "count", "shared")

    def __init__(self) -> None:
        self.matrix = np.asfortranarray(np.arange(12.0).reshape(3, 4))
        self.vector = np.arange(3.0)
        self.label = "pump-7"
        self.count = 3
        self.shared = np.ones(2)


def test_named_arrays_are_copied_with_their_layout_and_the_rest_shared():
    copy = slot_copier(Holder, arrays=("matrix", "vector", "label"))
    original = Holder()
    twin = copy(original)
    assert type(twin) is Holder and twin is not original
    for name in ("matrix", "vector"):
        assert getattr(twin, name) is not getattr(original, name)
        np.testing.assert_array_equal(getattr(twin, name), getattr(original, name))
    assert twin.matrix.flags.f_contiguous and not twin.matrix.flags.c_contiguous
    assert twin.label is original.label  # named, but not an array: shared
    assert twin.count == 3 and twin.shared is original.shared
    twin.matrix[0, 0] = -1.0
    twin.vector[0] = -1.0
    assert original.matrix[0, 0] == 0.0 and original.vector[0] == 0.0


def test_unknown_slot_names_are_refused():
    with pytest.raises(ValueError, match="not slots"):
        slot_copier(Holder, arrays=("matrix", "nothing"))


def test_an_unset_slot_is_an_error_not_a_silent_gap():
    copy = slot_copier(Holder)
    half = Holder.__new__(Holder)
    half.matrix = np.zeros(1)
    with pytest.raises(AttributeError):
        copy(half)
