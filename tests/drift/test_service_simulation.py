"""Seeded simulation of the default drift thresholds through the engine and the service's monitor.

Fast: engine ``State.update`` + ``ResidualMonitor.observe`` exactly as the registry runs
them (no HTTP, no database).  The plant: an energy baseline

    power_kw = 20 + 1.0 * load_kw + 0.5 * ambient_c + e,   load ~ N(60, 10), ambient ~ N(15, 5)

with e ~ N(0, 5.15^2): signal sd 10.3 kW over noise sd 5.15 kW, a signal-to-noise ratio of 2
(R^2 = 0.8), typical of a metered baseline.  No forgetting, default thresholds (DriftConfig).

* stable: 2,000 observations per run; a run counts when it ever reaches "alarm" (alarms latch).
* shift: the load coefficient rises 15 % (1.0 -> 1.15) at observation 1,000; the delay is the
  number of observations from the shift to the first alarm.

Run ``python tests/drift/test_service_simulation.py`` for the documented figures (more runs).
"""

from __future__ import annotations

import math
import statistics
import sys

import numpy as np

from leastwise.engine import State
from leastwise.models import ModelConfig
from leastwise.models.drift import ResidualMonitor

BETA = np.array([20.0, 1.0, 0.5])
NOISE = 5.15
CONFIG = ModelConfig.parse({"features": ["load_kw", "ambient_c"]})


def run(seed: int, n: int = 2000, shift_at: int | None = None, shift: float = 0.15) -> int | None:
    """Seq of the first alarm (None: never)."""
    rng = np.random.default_rng(seed)
    X = np.column_stack([np.ones(n), rng.normal(60.0, 10.0, n), rng.normal(15.0, 5.0, n)])
    beta = np.tile(BETA, (n, 1))
    if shift_at is not None:
        beta[shift_at:, 1] *= 1.0 + shift
    y = np.einsum("ij,ij->i", X, beta) + rng.normal(0.0, NOISE, n)
    state = State(CONFIG.spec())
    mon = ResidualMonitor.for_model(CONFIG)
    for i in range(n):
        change = mon.observe(state.update(X[i], float(y[i])), i + 1, state)
        if change is not None and change["status"] == "alarm":
            return i + 1
    return None


def false_alarm_rate(runs: int, seed0: int = 1000) -> float:
    return sum(run(seed0 + r) is not None for r in range(runs)) / runs


def delays(runs: int, seed0: int = 5000) -> list[float]:
    out = []
    for r in range(runs):
        at = run(seed0 + r, shift_at=1000)
        out.append(at - 1000 if at is not None and at > 1000 else math.inf)
    return out


def test_false_alarm_rate_below_one_percent():
    rate = false_alarm_rate(300)
    print(f"stable runs reaching alarm: {rate:.2%} of 300 x 2,000 observations")
    assert rate < 0.01


def test_median_delay_for_15_percent_load_coefficient_shift():
    d = delays(60)
    med = statistics.median(d)
    print(f"15% load-coefficient shift: median delay {med} observations (60 runs)")
    assert med < 200


def test_monitor_continues_bit_for_bit_after_bytes_round_trip():
    rng = np.random.default_rng(3)
    X = np.column_stack([np.ones(400), rng.normal(60, 10, 400), rng.normal(15, 5, 400)])
    y = X @ BETA + rng.normal(0, NOISE, 400)
    y[250:] += 8.0  # a shift, so alarms and latches are part of what is restored
    state, mon = State(CONFIG.spec()), ResidualMonitor.for_model(CONFIG)
    for i in range(400):
        mon.observe(state.update(X[i], float(y[i])), i + 1, state)
        if i == 200:
            state2, mon2 = State.from_bytes(state.to_bytes()), ResidualMonitor.from_bytes(mon.to_bytes())
        elif i > 200:
            mon2.observe(state2.update(X[i], float(y[i])), i + 1, state2)
    assert mon.status()["status"] == "alarm"
    assert mon2.to_bytes() == mon.to_bytes()
    assert mon2.status() == mon.status()


if __name__ == "__main__":
    runs = int(sys.argv[1]) if len(sys.argv) > 1 else 1000
    rate = false_alarm_rate(runs)
    d = delays(runs // 2)
    finite = sorted(v for v in d if math.isfinite(v))
    print(f"false alarms: {rate:.3%} of {runs} stable runs of 2,000 observations")
    print(f"median delay: {statistics.median(d)} observations, 90th percentile "
          f"{finite[int(0.9 * len(finite))] if finite else None} ({len(d)} runs, {len(d) - len(finite)} missed)")
