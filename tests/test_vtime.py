"""The virtual-time event loop: time jumps, order is kept, deadlocks are named."""

from __future__ import annotations

import asyncio
import heapq
import math
import random
from collections.abc import Callable, Coroutine
from fractions import Fraction
from typing import Any, TypeVar

import pytest
from ionotrail.harness.runners.vtime import CallbackError, VirtualTimeDeadlock, VirtualTimeLoop, raise_callback_errors

T = TypeVar("T")


def run(coro_factory, start: float = 0.0):  # type: ignore[no-untyped-def]
    with asyncio.Runner(loop_factory=lambda: VirtualTimeLoop(start)) as runner:
        return runner.run(coro_factory())


HANG_BOUND = 10_000
"""Loop iterations a far-clock test may take; each needs a handful (a hang spins without end)."""


class LoopHung(AssertionError):
    """The loop went round HANG_BOUND times without finishing: it was spinning, not advancing."""


class BoundedLoop(VirtualTimeLoop):
    """A VirtualTimeLoop that fails after HANG_BOUND iterations instead of spinning for ever."""

    def __init__(self, start: float) -> None:
        super().__init__(start)
        self.iterations = 0
        self.bound = HANG_BOUND

    def _run_once(self) -> None:
        self.iterations += 1
        if self.iterations > self.bound:
            self.bound = self.iterations + HANG_BOUND  # room for the runner to cancel and close
            raise LoopHung(f"{HANG_BOUND} loop iterations, clock stuck at {self.time()!r} s")
        super()._run_once()  # type: ignore[misc]


def run_bounded(coro_factory: Callable[[], Coroutine[Any, Any, T]], start: float) -> T:
    with asyncio.Runner(loop_factory=lambda: BoundedLoop(start)) as runner:
        return runner.run(coro_factory())


# 16,777,215.95 s is the reproduction: the three sleeps straddle 2^24 s (194 days).
# 2^31 - 0.15 s straddles another binade; 3.2e9 s is past a century (3.156e9 s).
FAR_STARTS = [16_777_215.95, 2.0**24, 2.0**30, 2.0**31 - 0.15, 3.2e9]


@pytest.mark.parametrize("start", FAR_STARTS)
def test_sleeps_complete_and_time_advances_by_them_however_far_the_clock_is(start: float) -> None:
    """Three sleeps of 0.1 s finish, one jump each, and the clock lands on each
    timer exactly: the double nearest the previous time + 0.1 s.  Against exact
    arithmetic each step can be off by half an ulp of the clock (at 2^24 s an
    ulp is 3.7e-9 s, at 2^30 s 2.4e-7 s, at 3.2e9 s 4.8e-7 s), no more."""

    async def main() -> tuple[list[float], int]:
        loop = asyncio.get_running_loop()
        assert isinstance(loop, VirtualTimeLoop)
        times = []
        for _ in range(3):
            await asyncio.sleep(0.1)
            times.append(loop.time())
        return times, loop.wakeups

    times, jumps = run_bounded(main, start)
    assert jumps == 3
    expected = start
    for step, now in enumerate(times, start=1):
        expected = expected + 0.1  # the timer's deadline, rounded as asyncio's call_later rounds it
        assert now == expected
        error = abs(Fraction(now) - (Fraction(start) + step * Fraction(1, 10)))
        assert error <= step * Fraction(math.ulp(now)) / 2
    assert times[-1] - start == pytest.approx(0.3, abs=2 * math.ulp(times[-1]))


def test_timers_due_at_the_same_instant_keep_scheduling_order_a_century_out() -> None:
    start = 3.2e9

    async def main() -> list[tuple[int, float]]:
        loop = asyncio.get_running_loop()
        order: list[tuple[int, float]] = []

        def note(i: int) -> None:
            order.append((i, loop.time()))

        for i in range(50):
            loop.call_at(start + 10.0, note, i)
        await asyncio.sleep(11)
        return order

    assert run_bounded(main, start) == [(i, start + 10.0) for i in range(50)]


def test_timers_one_ulp_apart_run_in_time_order_and_never_early() -> None:
    """The loop's resolution is one ulp of the clock, not a window: a timer one
    ulp later than another runs after it, on a later jump, and sees its own time."""
    start = 3.2e9
    ulp = math.ulp(start + 1.0)
    offsets = [2, 0, 1, 0, 2, 1]  # scheduled out of time order, with ties

    async def main() -> list[tuple[float, float, int]]:
        loop = asyncio.get_running_loop()
        seen: list[tuple[float, float, int]] = []

        def note(when: float, tag: int) -> None:
            seen.append((loop.time(), when, tag))

        for tag, k in enumerate(offsets):
            when = start + 1.0 + k * ulp
            loop.call_at(when, note, when, tag)
        await asyncio.sleep(2.0)
        return seen

    seen = run_bounded(main, start)
    assert all(now == when for now, when, _ in seen)
    assert [tag for _, _, tag in seen] == [1, 3, 2, 5, 0, 4]  # by time, then by scheduling order
    assert len({when for _, when, _ in seen}) == 3


def test_wait_for_and_advance_if_idle_work_a_century_out() -> None:
    """The clock moved by advance_if_idle, not by a jump, gets the same resolution."""

    async def main() -> tuple[bool, float, float]:
        loop = asyncio.get_running_loop()
        assert isinstance(loop, VirtualTimeLoop)
        assert loop.advance_if_idle(3.2e9)
        never: asyncio.Future[None] = loop.create_future()
        loop.call_later(3600.0, lambda: None)
        try:
            await asyncio.wait_for(never, timeout=120.0)
        except TimeoutError:
            timed_out = True
        else:
            timed_out = False
        after_timeout = loop.time()
        await asyncio.sleep(7200.0)
        return timed_out, after_timeout, loop.time()

    timed_out, after_timeout, end = run_bounded(main, 0.0)
    assert timed_out and after_timeout == 3.2e9 + 120.0 and end == 3.2e9 + 120.0 + 7200.0


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


# --- the loop's turn on a heap of entries against asyncio's own turn --------------------


class _SelfComparingTimer(asyncio.TimerHandle):
    """A timer ordered by (when, sequence), as the loop's timers once were."""

    __slots__ = ("_order",)

    def __init__(self, sequence: int, when: float, callback: Callable[..., object], args: tuple[Any, ...], loop: asyncio.AbstractEventLoop, context: Any) -> None:
        super().__init__(when, callback, args, loop, context)
        self._order = (when, sequence)

    def __lt__(self, other: object) -> bool:
        assert isinstance(other, _SelfComparingTimer)
        return self._order < other._order


class AsyncioTurnLoop(VirtualTimeLoop):
    """The reference: timers in asyncio's heap comparing themselves, and
    asyncio's own ``_run_once`` taking them off it."""

    def call_at(self, when: float, callback: Callable[..., object], *args: Any, context: Any = None) -> asyncio.TimerHandle:  # type: ignore[override]
        timer = _SelfComparingTimer(next(self._sequence), when, callback, args, self, context)
        heapq.heappush(self._scheduled, timer)  # type: ignore[attr-defined]
        timer._scheduled = True  # type: ignore[attr-defined]
        return timer

    _run_once = asyncio.BaseEventLoop._run_once  # type: ignore[attr-defined]

    def advance_if_idle(self, when: float) -> bool:
        if self._ready or when < self._virtual_now:  # type: ignore[attr-defined]
            return False
        if self._scheduled and self._scheduled[0]._when <= when:  # type: ignore[attr-defined]
            return False
        self._virtual_now = when
        self.wakeups += 1
        return True

    def quiet_until(self) -> float:
        if self._ready:  # type: ignore[attr-defined]
            return -math.inf
        return float(self._scheduled[0]._when) if self._scheduled else math.inf  # type: ignore[attr-defined]


def _random_program(loop_class: type[VirtualTimeLoop], seed: int, start: float) -> list[tuple[object, ...]]:
    """Timers with many ties, cancelled ones (sometimes most of a large heap),
    call_soon, sleeps, advance_if_idle and quiet_until, all chosen by ``seed``
    as callbacks run: what ran, when, and what the loop answered."""
    rng = random.Random(seed)
    trace: list[tuple[object, ...]] = []
    delays = [0.0, 0.0, 0.05, 0.1, 0.1, 0.25, 1.0]

    async def main() -> None:
        loop = asyncio.get_running_loop()
        assert isinstance(loop, VirtualTimeLoop)
        handles: list[asyncio.Handle] = []
        budget = [400]

        def fire(tag: int) -> None:
            trace.append(("ran", tag, loop.time(), loop.quiet_until()))
            for _ in range(rng.choice([0, 1, 1, 2, 3])):
                budget[0] -= 1
                if budget[0] <= 0:
                    return
                roll = rng.random()
                new = rng.randrange(1 << 30)
                if roll < 0.6:
                    handles.append(loop.call_at(loop.time() + rng.choice(delays), fire, new))
                elif roll < 0.7:
                    handles.append(loop.call_soon(fire, new))
                elif roll < 0.85 and handles:
                    rng.choice(handles).cancel()
                elif roll < 0.95:
                    trace.append(("advance", loop.advance_if_idle(loop.time() + rng.choice(delays)), loop.time()))
                else:  # a burst of timers, most of them cancelled at once (asyncio then sweeps its heap)
                    burst = [loop.call_at(loop.time() + 5.0 + rng.choice(delays), fire, new + k) for k in range(120)]
                    for handle in burst[: rng.randrange(60, 120)]:
                        handle.cancel()
                    handles.extend(burst)

        for tag in range(20):
            handles.append(loop.call_at(start + rng.choice(delays), fire, tag))
        for _ in range(6):
            await asyncio.sleep(rng.choice(delays))
            trace.append(("slept", loop.time()))
        await asyncio.sleep(30.0)
        trace.append(("end", loop.time(), loop.wakeups))

    with asyncio.Runner(loop_factory=lambda: loop_class(start)) as runner:
        runner.run(main())
    return trace


@pytest.mark.parametrize("start", [0.0, 2.0**31 - 0.15])
@pytest.mark.parametrize("seed", range(40))
def test_the_loop_turns_as_asyncio_own_turn_does(seed: int, start: float) -> None:
    """Same callbacks in the same order at the same times, same answers from
    advance_if_idle and quiet_until, same clock jumps: the loop's turn on a heap
    of (when, sequence, timer) entries is asyncio's turn on self-comparing timers."""
    assert _random_program(VirtualTimeLoop, seed, start) == _random_program(AsyncioTurnLoop, seed, start)
