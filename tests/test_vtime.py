"""The virtual-time event loop: time jumps, order is kept, deadlocks are named."""

from __future__ import annotations

import asyncio

import pytest
from ionotrail.harness.runners.vtime import CallbackError, VirtualTimeDeadlock, VirtualTimeLoop, raise_callback_errors


def run(coro_factory, start: float = 0.0):  # type: ignore[no-untyped-def]
    with asyncio.Runner(loop_factory=lambda: VirtualTimeLoop(start)) as runner:
        return runner.run(coro_factory())


def test_a_simulated_day_of_sleeping_takes_no_wall_time() -> None:
    """The clock gets through the day by jumping, once per sleep, never by waiting
    (a wait would take the day itself); no wall-clock figure is asserted."""

    async def day() -> tuple[float, int]:
        loop = asyncio.get_running_loop()
        assert isinstance(loop, VirtualTimeLoop)
        for _ in range(96):  # a report every 15 minutes
            await asyncio.sleep(900)
        return loop.time(), loop.wakeups

    now, jumps = run(day)
    assert now == pytest.approx(86400.0) and jumps == 96


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


def test_an_exception_in_a_callback_ends_the_guarded_run() -> None:
    """asyncio only logs an exception raised in a callback and runs on; under
    raise_callback_errors it ends the run, with the exception as its cause."""
    seen: list[float] = []

    def gauge_reading() -> None:
        seen.append(asyncio.get_running_loop().time())
        raise ZeroDivisionError("reading / 0")

    async def main() -> str:
        loop = asyncio.get_running_loop()
        loop.call_later(10.0, gauge_reading)
        await asyncio.sleep(100.0)
        return "ran to the end"

    with pytest.raises(CallbackError, match=r"gauge_reading.*ZeroDivisionError: reading / 0") as info:
        run(lambda: raise_callback_errors(main()))
    assert isinstance(info.value.__cause__, ZeroDivisionError)
    assert seen == [10.0]
    assert "\n" not in str(info.value), "one line"


def test_the_guard_works_on_asyncio_own_loop_too() -> None:
    def fail() -> None:
        raise KeyError("terminal 0x0a31")

    async def main() -> None:
        asyncio.get_running_loop().call_soon(fail)
        await asyncio.get_running_loop().create_future()  # would wait forever

    with pytest.raises(CallbackError, match="KeyError"):
        asyncio.run(raise_callback_errors(main()))


def test_the_guard_returns_the_result_and_passes_other_reports_on() -> None:
    reports: list[str] = []

    async def main() -> int:
        loop = asyncio.get_running_loop()
        loop.set_exception_handler(lambda _loop, context: reports.append(context["message"]))
        inner = await raise_callback_errors(_report_without_exception())
        loop.call_exception_handler({"message": "after the guard"})
        return inner

    assert run(main) == 42
    assert reports == ["a report that carries no exception", "after the guard"]


async def _report_without_exception() -> int:
    loop = asyncio.get_running_loop()
    loop.call_exception_handler({"message": "a report that carries no exception"})
    await asyncio.sleep(1.0)
    return 42
