"""The metrics' running counts (models/tally.py) against numpy on the same values."""

from __future__ import annotations

import math
import threading

import numpy as np

from leastwise.models.tally import Buckets, ObservationTally


def test_buckets_count_values_at_or_below_each_bound_like_numpy():
    bounds = (0.001, 0.01, 0.1, 1.0)
    rng = np.random.default_rng(7)
    values = np.concatenate([10.0 ** rng.uniform(-4, 1, 500), np.array(bounds)])  # the bounds themselves too
    b = Buckets(bounds)
    for v in values:
        b.observe(float(v))
    got = b.cumulative()
    # Prometheus "le": a bucket counts the observations <= its upper bound (exposition format spec)
    expected = [(bound, int(np.count_nonzero(values <= bound))) for bound in bounds] + [(float("inf"), len(values))]
    assert got == expected
    assert b.count == len(values)
    assert math.isclose(b.sum, math.fsum(values), rel_tol=1e-12)  # a running sum of positive values


def test_observation_tally_loses_no_count_across_threads():
    tally = ObservationTally()
    batch = [{"seq": 1}, {"status": "duplicate"}, {"status": "gated"}, {}]

    def work():
        for _ in range(2000):
            tally.add(batch)

    threads = [threading.Thread(target=work) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert tally.snapshot() == {"applied": 2 * 8000, "duplicate": 8000, "gated": 8000}
