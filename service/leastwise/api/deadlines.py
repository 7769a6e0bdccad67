"""Coarse deadlines for reading request bodies: one sweep per event loop instead of a timer per request.

``asyncio.timeout`` costs 4-5 us a request (a timer handle, its cancellation and
the timeout's bookkeeping), about 3 % of a single-observation post. A body
read instead registers its task with a due time (a dict entry); one sweeper
task per event loop wakes every :data:`RESOLUTION` seconds while reads are
registered and cancels those past their due time, and the reader turns that
cancellation into a 408. A stalled read is so answered between ``seconds``
and ``seconds + RESOLUTION`` after it began; the sweeper ends once nothing is
registered and the next read starts it again.
"""

from __future__ import annotations

import asyncio
import weakref

__all__ = ["BodyDeadlines", "body_deadlines", "RESOLUTION"]

#: Seconds between sweeps: how late a timed-out read may be answered.
RESOLUTION = 0.25


class BodyDeadlines:
    """The registered reads of one event loop. Used from that loop's thread only."""

    __slots__ = ("due", "expired", "sweeper")

    def __init__(self) -> None:
        # no reference to the loop itself: _BY_LOOP's weak key must be able to go
        self.due: dict[asyncio.Task, float] = {}
        self.expired: set[asyncio.Task] = set()
        self.sweeper: asyncio.Task | None = None

    def arm(self, task: asyncio.Task, seconds: float) -> None:
        """Cancel ``task`` once ``seconds`` have passed, unless :meth:`disarm` comes first."""
        loop = task.get_loop()
        self.due[task] = loop.time() + seconds
        if self.sweeper is None:
            self.sweeper = loop.create_task(self._sweep())

    def disarm(self, task: asyncio.Task) -> None:
        self.due.pop(task, None)
        self.expired.discard(task)

    def timed_out(self, task: asyncio.Task) -> bool:
        """True (once) when the sweep cancelled ``task`` for its deadline."""
        if task in self.expired:
            self.expired.discard(task)
            return True
        return False

    async def _sweep(self) -> None:
        loop = asyncio.get_running_loop()
        try:
            while self.due:
                await asyncio.sleep(RESOLUTION)
                now = loop.time()
                late = [task for task, due in self.due.items() if due <= now]
                for task in late:
                    del self.due[task]
                    self.expired.add(task)
                    task.cancel()
        finally:
            self.sweeper = None


_BY_LOOP: weakref.WeakKeyDictionary[asyncio.AbstractEventLoop, BodyDeadlines] = weakref.WeakKeyDictionary()
_last: tuple[weakref.ref, BodyDeadlines] | None = None  # the last loop asked for: the server's, nearly always


def body_deadlines() -> BodyDeadlines:
    """The running loop's :class:`BodyDeadlines`."""
    global _last
    loop = asyncio.get_running_loop()
    last = _last
    if last is not None and last[0]() is loop:
        return last[1]
    found = _BY_LOOP.get(loop)
    if found is None:
        found = _BY_LOOP[loop] = BodyDeadlines()
    _last = (weakref.ref(loop), found)
    return found
