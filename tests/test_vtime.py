"""The virtual-time event loop: time jumps, order is kept, deadlocks are named."""

from __future__ import annotations

import asyncio
import time

import pytest
from ionotrail.harness.runners.vtime import VirtualTimeDeadlock, VirtualTimeLoop


def run(coro_factory, start: float = 0.0):  # type: ignore[no-untyped-def]
    with asyncio.Runner(loop_factory=lambda: VirtualTimeLoop(start)) as runner:
        return runner.run(coro_factory())


def test_a_simulated_day_of_sleeping_takes_no_wall_time() -> None:
    async def day() -> float:
        loop = asyncio.get_running_loop()
        for _ in range(96):  # a report every 15 minutes
            await asyncio.sleep(900)
        return loop.time()

    wall = time.monotonic()
    assert run(day) == pytest.approx(86400.0)
    assert time.monotonic() - wall < 2.0


def test_timers_due_at_the_same_instant_run_in_scheduling_order() -> None:
    async def main() -> list[int]:
        loop = asyncio.get_running_loop()
        order: list[int] = []
        for i in range(50):
            loop.call_at(10.0, order.append, i)
        await asyncio.sleep(11)
        return order

    assert run(main) == list(range(50))


def test_wait_for_times_out_on_the_virtual_clock() -> None:
    async def main() -> tuple[bool, float]:
        loop = asyncio.get_running_loop()
        never: asyncio.Future[None] = loop.create_future()
        loop.call_later(3600.0, lambda: None)  # keeps the loop from deadlocking meanwhile
        try:
            await asyncio.wait_for(never, timeout=120.0)
        except TimeoutError:
            return True, loop.time()
        return False, loop.time()

    timed_out, now = run(main, start=1000.0)
    assert timed_out and now == pytest.approx(1120.0)


def test_a_task_waiting_for_nothing_is_a_named_deadlock() -> None:
    async def stuck() -> None:
        await asyncio.get_running_loop().create_future()

    with pytest.raises(VirtualTimeDeadlock, match="nothing is scheduled"):
        run(stuck)


def test_tasks_interleave_by_virtual_time() -> None:
    async def main() -> list[tuple[float, str]]:
        loop = asyncio.get_running_loop()
        log: list[tuple[float, str]] = []

        async def ticker(name: str, period: float, count: int) -> None:
            for _ in range(count):
                await asyncio.sleep(period)
                log.append((loop.time(), name))

        await asyncio.gather(ticker("probe", 0.25, 8), ticker("report", 1.0, 2))
        return log

    log = run(main)
    assert [t for t, _ in log] == sorted(t for t, _ in log)
    # At 1.0 and 2.0 both are due; the timer scheduled first (the report's, set at
    # 0.0 and 1.0, against the probe's at 0.75 and 1.75) runs first.
    assert log[3:5] == [(1.0, "report"), (1.0, "probe")]
    assert log[-2:] == [(2.0, "report"), (2.0, "probe")]
