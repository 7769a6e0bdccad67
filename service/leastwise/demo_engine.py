"""A small engine-only demo in an invented scenario (Harrow Vale cooling plant, chiller CH-2)."""

from __future__ import annotations

from typing import Callable

import numpy as np

from leastwise.engine import Spec, State


def run(readings: int = 2000, seed: int = 7, echo: Callable[[str], None] = print) -> State:
    """Simulate power = 12 + 0.21 load_kw + 1.8 condenser_c + noise and fit it reading by reading."""
    rng = np.random.default_rng(seed)
    truth = np.array([12.0, 0.21, 1.8])
    state = State(Spec(dim=3, forgetting=0.999))
    echo("Harrow Vale cooling plant, chiller CH-2: power_kw ~ intercept + load_kw + condenser_c")
    for i in range(readings):
        load = rng.uniform(150.0, 600.0)
        condenser = 24.0 + 6.0 * np.sin(i / 200.0) + rng.normal(0.0, 0.5)
        x = np.array([1.0, load, condenser])
        y = float(x @ truth + rng.normal(0.0, 2.0))
        step = state.update(x, y)
        if (i + 1) % max(readings // 5, 1) == 0:
            w = state.coefficients()
            z = step.standardized_residual
            echo(
                f"reading {i + 1:6d}: intercept={w[0]:8.3f} load_kw={w[1]:7.4f} condenser_c={w[2]:7.4f}"
                f"  last standardised residual={z:+.2f}" if z is not None else f"reading {i + 1}: warming up"
            )
    sol = state.solution()
    pred = state.predict([1.0, 400.0, 27.0])
    echo(f"sigma={sol.sigma:.3f} kW over an effective {state.effective_n:.0f} readings")
    echo(f"predicted power at 400 kW load, 27 C condenser: {pred.mean[0]:.1f} kW "
         f"(95% interval {pred.lower[0]:.1f} .. {pred.upper[0]:.1f})")
    return state
