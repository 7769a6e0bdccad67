"""The collector policy: young garbage is still collected, survivors are frozen, the periodic full pass reclaims cycles."""

from __future__ import annotations

import gc
import weakref

import pytest

from leastwise.collector import CollectorPolicy


class _Node:
    def __init__(self) -> None:
        self.other: _Node | None = None


def _cycle() -> weakref.ref:
    a, b = _Node(), _Node()
    a.other, b.other = b, a  # only the cyclic collector can free these
    return weakref.ref(a)


@pytest.fixture(autouse=True)
def _restore_collector():
    yield
    gc.unfreeze()
    gc.collect()


def test_a_step_collects_young_cycles_and_freezes_the_survivors():
    now = [0.0]
    policy = CollectorPolicy(full_every=600.0, clock=lambda: now[0])
    gc.unfreeze()
    dead = _cycle()
    keep = _Node()
    policy.step()
    assert dead() is None  # garbage made before the step is gone, not frozen
    assert gc.get_freeze_count() > 0  # the survivors (keep among them) are out of the collector's sight
    assert policy.full_collections == 0
    del keep


def test_cycles_that_die_frozen_wait_for_the_periodic_full_collection():
    now = [0.0]
    policy = CollectorPolicy(full_every=600.0, clock=lambda: now[0])
    a = _Node()
    a.other = _Node()
    a.other.other = a
    ref = weakref.ref(a)
    policy.step()  # a survives (still referenced) and is frozen
    del a
    gc.collect()
    assert ref() is not None  # frozen: a plain collection does not see it
    now[0] = 601.0
    policy.step()
    assert policy.full_collections == 1
    assert ref() is None  # the full pass unfroze and reclaimed it
