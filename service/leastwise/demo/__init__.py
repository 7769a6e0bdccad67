"""``leastwise demo``: an invented cooling plant whose gateways post readings to a real leastwise service.

Three chillers of the Alder Bank cooling plant, each with a power baseline
``power_kw ~ intercept + load_kw + condenser_c``; one (CH-3) starts to foul
partway through and its drift status moves to watch, then alarm.
"""

from .plant import CHILLERS, FEATURES, PLANT_NAME, Chiller, Plant
from .run import DemoResult, Detection, EmbeddedService, run_demo

__all__ = ["CHILLERS", "FEATURES", "PLANT_NAME", "Chiller", "Plant", "DemoResult", "Detection", "EmbeddedService",
           "run_demo"]
