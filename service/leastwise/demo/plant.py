"""The demo's invented plant: Alder Bank district cooling, three water-cooled chillers.

Each chiller's electrical power (kW) follows a linear baseline in its cooling
load (kW thermal) and the condenser-water entering temperature (deg C), with
metering noise. Partway through the run the condenser tubes of one chiller
start to foul: its efficiency degrades, so at the same duty it draws more
power, growing linearly over a ramp to ``fouling_loss`` and staying there.
Everything is seeded, so a run is reproducible.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["Chiller", "Plant", "PLANT_NAME", "FEATURES"]

PLANT_NAME = "Alder Bank cooling plant"
FEATURES = ("load_kw", "condenser_c")


@dataclass(frozen=True)
class Chiller:
    name: str  #: model name in the service
    label: str  #: what the operators call it
    intercept: float  #: kW drawn at no load (pumps, controls)
    per_load: float  #: kW electrical per kW of cooling
    per_condenser: float  #: kW per deg C of condenser water
    noise: float  #: metering noise, kW (standard deviation)
    share: float  #: its share of the plant's cooling load
    fouls: bool = False


CHILLERS = (
    Chiller("ch-1", "CH-1", 14.0, 0.155, 2.2, 2.5, 0.36),
    Chiller("ch-2", "CH-2", 16.0, 0.162, 2.4, 2.5, 0.34),
    Chiller("ch-3", "CH-3", 12.0, 0.150, 2.0, 2.5, 0.30, fouls=True),
)


class Plant:
    """Readings of every chiller, one per ``interval`` seconds of plant time."""

    def __init__(self, *, duration: float, interval: float = 60.0, seed: int = 4, fouling_loss: float = 0.05,
                 fouling_start: float = 0.4, fouling_ramp: float = 0.3) -> None:
        """``fouling_start`` and ``fouling_ramp`` are fractions of ``duration``."""
        self.duration = duration
        self.interval = interval
        self.chillers = CHILLERS
        self.fouling_loss = fouling_loss
        self.fouling_begins = fouling_start * duration
        self.fouling_full = (fouling_start + fouling_ramp) * duration
        self.count = max(int(duration // interval), 1)
        self.rng = np.random.default_rng(seed)

    def fouling(self, t: float) -> float:
        """Fraction of extra power drawn by the fouling chiller at plant second ``t``."""
        if t <= self.fouling_begins:
            return 0.0
        if t >= self.fouling_full:
            return self.fouling_loss
        return self.fouling_loss * (t - self.fouling_begins) / (self.fouling_full - self.fouling_begins)

    def reading(self, i: int, chiller: Chiller) -> tuple[float, dict[str, float], float]:
        """Plant second, inputs and measured power of reading ``i`` of ``chiller``."""
        t = (i + 1) * self.interval
        hour = (t / 3600.0) % 24.0
        plant_load = 2600.0 + 1300.0 * math.sin(2 * math.pi * (hour - 9.0) / 24.0)
        load = float(np.clip(plant_load * chiller.share + self.rng.normal(0.0, 90.0), 120.0, 1500.0))
        condenser = float(24.5 + 3.5 * math.sin(2 * math.pi * (hour - 14.0) / 24.0) + self.rng.normal(0.0, 0.6))
        power = chiller.intercept + chiller.per_load * load + chiller.per_condenser * condenser
        if chiller.fouls:
            power *= 1.0 + self.fouling(t)
        power += self.rng.normal(0.0, chiller.noise)
        return t, {"load_kw": round(load, 2), "condenser_c": round(condenser, 2)}, round(power, 2)
