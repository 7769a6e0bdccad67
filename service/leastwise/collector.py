"""Keeping the cyclic garbage collector's pauses short in a long-running service.

Every live model holds some twenty container objects (state, drift monitor,
configuration, locks); with 10,000 models a full collection walks over
200,000 of them and stops the process for 150-300 ms, every few thousand
writes (each write replaces a model's state objects, and the survivors count
towards the next full pass). :class:`CollectorPolicy` keeps the collector's
generations small instead:

* every ``interval`` seconds it collects the young generations (cheap: only
  objects created since the last step) and then freezes the survivors
  (``gc.freeze``: moved to the permanent generation, which collections skip;
  frozen objects are still freed by reference counting when they die, and
  the models' objects hold no reference cycles);
* every ``full_every`` seconds it unfreezes everything and runs one full
  collection, so cyclic garbage among frozen objects (a closed connection's
  protocol and transport, say) is reclaimed: one long pause per period
  instead of one every few seconds under load.

This is the technique of freezing long-lived objects out of the collector's
sight (Python's ``gc.freeze`` documentation), applied periodically.
"""

from __future__ import annotations

import asyncio
import gc
import logging
import time
from collections.abc import Callable

__all__ = ["CollectorPolicy"]

log = logging.getLogger("leastwise.collector")


class CollectorPolicy:
    def __init__(self, interval: float = 1.0, full_every: float = 600.0,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.interval = interval
        self.full_every = full_every
        self.clock = clock
        self._last_full = clock()
        self.steps = 0
        self.full_collections = 0

    def step(self) -> None:
        """One period: young collection and freeze, or (every ``full_every``) unfreeze and a full collection."""
        if self.clock() - self._last_full >= self.full_every:
            gc.unfreeze()
            started = time.perf_counter()
            gc.collect()
            self._last_full = self.clock()
            self.full_collections += 1
            log.debug("full collection", extra={"ms": round((time.perf_counter() - started) * 1e3, 1)})
        else:
            gc.collect(1)
        gc.freeze()
        self.steps += 1

    async def run(self) -> None:
        """Step every ``interval`` seconds on the running event loop (start it as a task)."""
        while True:
            await asyncio.sleep(self.interval)
            self.step()
