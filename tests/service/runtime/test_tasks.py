"""stop_task: a background task is stopped even when it loses a cancellation, as a task can inside
`asyncio.wait_for` on Python 3.11 (CPython bpo-42130; from memory), which redis-py uses for writes."""

from __future__ import annotations

import asyncio

from service.runtime.tasks import stop_task


async def _loses_first_cancel(log: list[str]) -> None:
    try:
        await asyncio.sleep(10)
    except asyncio.CancelledError:
        log.append("lost")  # carries on as if the cancel never came, as in the wait_for race
    await asyncio.sleep(10)


def test_a_task_that_loses_a_cancel_is_stopped():
    async def go() -> tuple[list[str], bool]:
        log: list[str] = []
        task = asyncio.ensure_future(_loses_first_cancel(log))
        await asyncio.sleep(0)
        task.cancel()  # what a plain cancel-then-await does: the task runs on
        done, _ = await asyncio.wait({task}, timeout=0.2)
        still_running = not done
        await stop_task(task, recancel_s=0.05)
        return log, still_running and task.cancelled()

    log, ok = asyncio.run(go())
    assert log == ["lost"] and ok


def test_stop_task_consumes_the_outcome_of_a_finished_or_failing_task(caplog):
    async def fails() -> None:
        await asyncio.sleep(0)
        raise RuntimeError("boom")

    async def go() -> None:
        failing = asyncio.ensure_future(fails())
        await asyncio.sleep(0.01)
        await stop_task(failing)  # already failed: nothing to cancel, its error is consumed
        plain = asyncio.ensure_future(asyncio.sleep(10))
        await stop_task(plain)
        assert plain.cancelled()

    asyncio.run(go())
    assert "never retrieved" not in caplog.text


def test_a_cooperative_task_stops_at_the_first_cancel():
    recancel_s = 2.0
    async def go() -> int:
        task = asyncio.ensure_future(asyncio.sleep(10))
        await asyncio.sleep(0)
        loop = asyncio.get_running_loop()
        t0 = loop.time()
        await stop_task(task, recancel_s=recancel_s)
        return loop.time() - t0

    assert asyncio.run(go()) < recancel_s / 2  # no waiting for the next round when the task obeys
