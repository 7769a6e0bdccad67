"""The group writer on its own: gathering the requests an event loop has in hand into one transaction."""

from __future__ import annotations

import asyncio
import time

from leastwise.models.writer import GroupWriter, Ticket


class _CountingWriter(GroupWriter):
    gathered = 0

    def _gather(self, loop: asyncio.AbstractEventLoop) -> None:
        self.gathered += 1
        super()._gather(loop)


def _recording_writer(**options: float) -> tuple[_CountingWriter, list[list[int]]]:
    groups: list[list[int]] = []

    def handler(tickets: list[Ticket]) -> None:
        groups.append([t.job for t in tickets])
        for t in tickets:
            t.resolve(t.job)

    return _CountingWriter(handler, **options), groups


async def _submit_while_busy(writer: GroupWriter, jobs: int) -> list[int]:
    """Queue one job, keep the loop busy (as parsing more requests does), queue the rest, then await them all."""
    futures = [writer.submit_async(0)]
    time.sleep(0.05)  # the loop is busy: the writer has woken on the first job meanwhile
    futures += [writer.submit_async(i) for i in range(1, jobs)]
    return list(await asyncio.gather(*futures))


def _run_while_busy(jobs: int, **options: float) -> tuple[_CountingWriter, list[list[int]]]:
    """:func:`_submit_while_busy` on a fresh writer; every job must come back answered."""
    writer, groups = _recording_writer(**options)
    try:
        assert asyncio.run(_submit_while_busy(writer, jobs)) == list(range(jobs))
    finally:
        writer.close()
    return writer, groups


def test_a_small_group_waits_for_what_the_loop_has_in_hand():
    writer, groups = _run_while_busy(6, gather_wait=5.0)
    assert groups == [[0, 1, 2, 3, 4, 5]]  # one transaction: the loop queued the rest before it let the writer go
    assert writer.gathered == 1


def test_without_gathering_the_writer_starts_with_what_is_queued():
    _writer, groups = _run_while_busy(6, gather_wait=0.0)
    assert groups[0] == [0] and sorted(j for g in groups for j in g) == list(range(6))


def test_gathering_is_skipped_when_enough_requests_are_queued():
    writer, groups = _run_while_busy(3, gather_wait=5.0, gather_below=1)
    assert groups[0] == [0] and writer.gathered == 0  # it did not wait for the loop


def test_threads_never_wait_for_a_loop():
    writer, groups = _recording_writer(gather_wait=5.0)
    try:
        assert writer.submit(7).wait() == 7
    finally:
        writer.close()
    assert groups == [[7]] and writer.gathered == 0


def test_housekeeping_runs_after_each_group_is_answered_and_its_failure_stops_nothing():
    seen: list[tuple[str, bool]] = []
    tickets: list[Ticket] = []

    def handler(group: list[Ticket]) -> None:
        for t in group:
            t.resolve(t.job)
        tickets.extend(group)

    def after_group() -> None:
        seen.append(("after", all(t.event is not None and t.event.is_set() for t in tickets)))
        raise RuntimeError("housekeeping failed")  # logged; the next group goes on

    writer = GroupWriter(handler, gather_wait=0.0, after_group=after_group)
    try:
        assert writer.submit(1).wait() == 1
        assert writer.submit(2).wait() == 2
        assert writer.submit(3).wait() == 3
    finally:
        writer.close()
    assert len(seen) == 3 and all(released for _, released in seen)  # only once the group was released


def test_stats_count_groups_their_sizes_and_failures():
    def handler(tickets: list[Ticket]) -> None:
        if any(t.job == "boom" for t in tickets):
            raise RuntimeError("database unavailable")
        for t in tickets:
            t.resolve(t.job)

    writer = GroupWriter(handler, gather_wait=0)
    try:
        assert writer.submit("a").wait() == "a"
        try:
            writer.submit("boom").wait()
        except RuntimeError as exc:
            assert "unavailable" in str(exc)
        else:  # pragma: no cover - the handler's error must reach the request
            raise AssertionError("the failed group's request was answered")
        stats = writer.stats()
    finally:
        writer.close()
    assert (stats.groups, stats.requests, stats.failed_groups) == (2, 2, 1)
    assert stats.group_sizes[0] == (1.0, 2)  # both groups held one request (le="1")
    assert stats.group_sizes[-1] == (float("inf"), 2) and stats.group_sizes_sum == 2
    assert stats.group_seconds[-1][1] == 2 and stats.group_seconds_sum > 0


def test_cpu_seconds_count_the_writer_threads_work_not_its_waiting():
    """A group that waits (here a sleep, standing for the disk) adds its duration but almost no
    CPU time; one that computes adds its CPU time (thread CPU clock, not wall-clock time)."""
    mode = {"work": "wait"}

    def handler(tickets: list[Ticket]) -> None:
        if mode["work"] == "wait":
            time.sleep(0.05)
        else:
            start = time.thread_time()
            while time.thread_time() - start < 0.03:
                pass
        for t in tickets:
            t.resolve(t.job)

    writer = GroupWriter(handler, gather_wait=0)
    try:
        writer.submit("a").wait()
        waited = writer.stats()
        mode["work"] = "compute"
        writer.submit("b").wait()
        computed = writer.stats()
    finally:
        writer.close()
    assert waited.group_seconds_sum >= 0.05  # time.sleep sleeps at least that long
    assert waited.cpu_seconds < 0.5 * waited.group_seconds_sum
    assert computed.cpu_seconds - waited.cpu_seconds >= 0.03
