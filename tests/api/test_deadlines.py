"""The body reader's coarse deadlines (api/deadlines.py): who gets cancelled, who does not, and when the sweeper stops."""

from __future__ import annotations

import asyncio

from leastwise.api import deadlines as dl


def test_a_stalled_read_is_cancelled_and_reported_as_timed_out():
    async def main():
        d = dl.body_deadlines()
        outcome = {}

        async def stalled():
            task = asyncio.current_task()
            d.arm(task, 0.05)
            try:
                await asyncio.Event().wait()  # a body that never arrives
            except asyncio.CancelledError:
                outcome["timed_out"] = d.timed_out(task)
                task.uncancel()
            finally:
                d.disarm(task)

        await asyncio.wait_for(asyncio.create_task(stalled()), timeout=30)
        await asyncio.sleep(dl.RESOLUTION * 2)  # the sweeper finds nothing left and ends
        return outcome, d.sweeper, d.due, d.expired

    outcome, sweeper, due, expired = asyncio.run(main())
    assert outcome == {"timed_out": True}
    assert sweeper is None and not due and not expired


def test_a_read_that_finishes_in_time_is_left_alone():
    async def main():
        d = dl.body_deadlines()
        task = asyncio.current_task()
        d.arm(task, 0.2)
        await asyncio.sleep(0.01)  # the body arrives
        d.disarm(task)
        await asyncio.sleep(dl.RESOLUTION * 2)  # past the due time: nothing may cancel us now
        return d.timed_out(task), task.cancelling()

    assert asyncio.run(main()) == (False, 0)


def test_another_cancellation_is_not_taken_for_a_timeout():
    async def main():
        d = dl.body_deadlines()
        seen = {}

        async def reader():
            task = asyncio.current_task()
            d.arm(task, 60.0)
            try:
                await asyncio.Event().wait()
            except asyncio.CancelledError:
                seen["timed_out"] = d.timed_out(task)
                raise
            finally:
                d.disarm(task)

        task = asyncio.create_task(reader())
        await asyncio.sleep(0.01)
        task.cancel()  # the client went away
        try:
            await task
        except asyncio.CancelledError:
            seen["cancelled"] = True
        return seen

    assert asyncio.run(main()) == {"timed_out": False, "cancelled": True}


def test_each_loop_has_its_own_deadlines():
    first = asyncio.run(_deadlines_of_this_loop())
    second = asyncio.run(_deadlines_of_this_loop())
    assert first[0] is first[1] and second[0] is second[1]  # the same object within a loop
    assert first[0] is not second[0]


async def _deadlines_of_this_loop():
    return dl.body_deadlines(), dl.body_deadlines()
