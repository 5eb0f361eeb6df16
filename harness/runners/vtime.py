"""An asyncio event loop whose clock is virtual: the simulator's time machine.

``VirtualTimeLoop`` is an ordinary selector event loop except that
``time()`` returns a virtual clock, and whenever the loop would block waiting
for its next timer it jumps the clock to that timer instead.  Code written
against the loop's clock (``loop.time()``, ``asyncio.sleep``, ``call_later``,
``wait_for``) runs unchanged, in real time on the default loop and thousands
of times faster here.  Two guarantees a simulation needs and asyncio does not
give:

* timers due at the same instant run in the order they were scheduled (a
  sequence number breaks the tie), so a run replays exactly: the loop keeps
  its timers as ``(when, sequence, timer)`` entries, a heap that compares in
  C, and takes one turn as asyncio's ``_run_once`` does, on those entries;
* a loop with nothing scheduled and nothing that could wake it raises
  :class:`VirtualTimeDeadlock` instead of hanging;
* the clock keeps running however far it gets (tested to 3.2e9 s, a century):
  asyncio runs a timer only if ``when < time() + clock_resolution``, and the
  host's resolution (1e-9 s) vanishes when added to a clock past 2^24 s (194
  days), so a clock that jumps exactly to a timer would never see it due.  The
  loop's resolution is therefore one unit in the last place of the clock
  (never below 1e-9 s): a timer runs once the clock has reached it, not before.

Real I/O and virtual time do not mix (a socket does not wait for a jumped
clock): only the loop's own wake-up pipe is polled, never waited on.
Use with ``asyncio.Runner(loop_factory=VirtualTimeLoop)``.

asyncio only logs an exception raised in a callback and carries on, so a
simulation whose callback failed would run to the end and report figures that
mean nothing.  :func:`raise_callback_errors` (on this loop or any other) ends
the run instead, with :class:`CallbackError`.
"""

from __future__ import annotations

import asyncio
import collections
import heapq
import itertools
import math
import selectors
from asyncio import base_events
from asyncio.log import logger
from collections.abc import Awaitable, Callable
from contextvars import Context
from typing import Any, TypeVar

# What asyncio's turn of the loop uses, as base_events defines it (typeshed does not declare them).
_MAXIMUM_SELECT_TIMEOUT: float = base_events.MAXIMUM_SELECT_TIMEOUT  # type: ignore[attr-defined]
_MIN_SCHEDULED_TIMER_HANDLES: int = base_events._MIN_SCHEDULED_TIMER_HANDLES  # type: ignore[attr-defined]
_MIN_CANCELLED_TIMER_HANDLES_FRACTION: float = base_events._MIN_CANCELLED_TIMER_HANDLES_FRACTION  # type: ignore[attr-defined]
_format_handle: Callable[[asyncio.Handle], str] = base_events._format_handle  # type: ignore[attr-defined]
POLL_EVERY = 16
MIN_CLOCK_RESOLUTION = 1e-9
"""The loop's clock resolution near zero (asyncio's on Linux); above 2^23 s it is the clock's ulp."""
T = TypeVar("T")


class VirtualTimeDeadlock(RuntimeError):
    """Nothing is scheduled and nothing can arrive: virtual time would stop forever."""


class CallbackError(RuntimeError):
    """An exception escaped a callback of the event loop (its ``__cause__``);
    the run it belonged to was ended.  The message is one line."""


async def raise_callback_errors(awaitable: Awaitable[T]) -> T:
    """Await ``awaitable`` on the running loop; if any callback of the loop
    raises meanwhile, cancel it and raise :class:`CallbackError` instead.

    The first such exception ends the run; any raised while it winds down are
    consequences and are dropped.  Reports that carry no exception go to the
    loop's previous handler, which is restored on the way out.
    """
    loop = asyncio.get_running_loop()
    failed: asyncio.Future[None] = loop.create_future()
    previous = loop.get_exception_handler()

    def handler(loop: asyncio.AbstractEventLoop, context: dict[str, Any]) -> None:
        error = context.get("exception")
        if error is None:
            if previous is not None:
                previous(loop, context)
            else:
                loop.default_exception_handler(context)
        elif not failed.done():
            where = str(context.get("message") or "a callback failed").splitlines()[0]
            failure = CallbackError(f"{where}: {type(error).__name__}: {error}".replace("\n", " "))
            failure.__cause__ = error
            failed.set_exception(failure)

    loop.set_exception_handler(handler)
    task = asyncio.ensure_future(awaitable)
    try:
        await asyncio.wait((task, failed), return_when=asyncio.FIRST_COMPLETED)
    finally:
        if not task.done():
            task.cancel()
            await asyncio.wait((task,))
        loop.set_exception_handler(previous)
    if failed.done():
        if not task.cancelled():
            task.exception()  # retrieved: a consequence of the failure, not news
        failed.result()
    return task.result()


class _JumpingSelector(selectors.DefaultSelector):
    """Polls without waiting; where the loop would wait, moves the clock instead."""

    def __init__(self) -> None:
        super().__init__()
        self.loop: VirtualTimeLoop | None = None
        self._skipped = 0

    def select(self, timeout: float | None = None) -> list[tuple[selectors.SelectorKey, int]]:
        # The only descriptor that can become ready is the loop's wake-up pipe
        # (call_soon_threadsafe from another thread), so while timers are due
        # the real poll, a system call, runs on one jump in POLL_EVERY.
        if timeout is None or timeout == 0 or self._skipped >= POLL_EVERY:
            self._skipped = 0
            ready = super().select(0)
            if ready or timeout == 0:
                return ready
        else:
            self._skipped += 1
        loop = self.loop
        assert loop is not None
        if timeout is None:
            raise VirtualTimeDeadlock(
                f"at virtual time {loop.time():.3f} s nothing is scheduled and nothing can arrive: "
                "every task is waiting for something no timer or callback will provide"
            )
        loop._advance(timeout)
        return []


class VirtualTimeLoop(asyncio.SelectorEventLoop):
    """A selector event loop on a virtual clock starting at ``start`` seconds."""

    # The state of asyncio's BaseEventLoop that this loop works on (private there, so undeclared).
    _scheduled: list[tuple[float, int, asyncio.TimerHandle]]  # a heap of (when, sequence, timer)
    _ready: collections.deque[asyncio.Handle]
    _stopping: bool
    _timer_cancelled_count: int
    _debug: bool
    _current_handle: asyncio.Handle | None

    def __init__(self, start: float = 0.0) -> None:
        selector = _JumpingSelector()
        super().__init__(selector)
        selector.loop = self
        self._virtual_now = float(start)
        self._sequence = itertools.count()
        self.wakeups = 0
        """How many times the clock jumped (a measure of simulation work)."""

    def time(self) -> float:
        return self._virtual_now

    @property
    def _clock_resolution(self) -> float:
        """How far ahead of the clock a timer counts as due (read by :meth:`_run_once`).

        ``when < now + resolution`` must hold for ``when == now`` at any
        magnitude: one ulp of the clock makes ``now + resolution`` the next
        double above ``now``, so exactly the timers with ``when <= now`` are
        due, however large ``now`` is.  Below 2^23 s the 1e-9 s floor rules,
        as it always did.
        """
        return max(MIN_CLOCK_RESOLUTION, math.ulp(self._virtual_now))  # also written out in _run_once

    @_clock_resolution.setter
    def _clock_resolution(self, host_resolution: float) -> None:
        # asyncio stores the host clock's resolution at construction; a virtual
        # clock has its own (above), the same on every host, so runs replay.
        pass

    def _advance(self, seconds: float) -> None:
        self._virtual_now += seconds
        self.wakeups += 1

    def advance_if_idle(self, when: float) -> bool:
        """Move the clock to ``when`` at once, if nothing else could run first.

        True when no callback is ready and no timer is due at or before
        ``when``: the loop would have done nothing but jump there.  A callback
        that produces a stream of events (the simulated modem's probes) then
        runs the next one itself instead of scheduling a timer for it; the
        outcome is exactly what the timer would have given, at a fraction of
        the cost.  False (and the clock untouched) otherwise: schedule as usual.
        """
        if self._ready or when < self._virtual_now:
            return False
        scheduled = self._scheduled
        if scheduled and scheduled[0][0] <= when:
            return False
        self._virtual_now = when
        self.wakeups += 1
        return True

    def quiet_until(self) -> float:
        """Loop time of the next thing that could run: -inf when a callback is
        ready, else the earliest timer (a cancelled one included: the answer
        may be early, never late), or inf.  Nothing but the caller runs before it."""
        if self._ready:
            return -math.inf
        scheduled = self._scheduled
        return float(scheduled[0][0]) if scheduled else math.inf

    def call_at(  # type: ignore[override]
        self, when: float, callback: Callable[..., object], *args: Any, context: Context | None = None
    ) -> asyncio.TimerHandle:
        if when is None:
            raise TypeError("when cannot be None")
        self._check_closed()  # type: ignore[attr-defined]
        timer = asyncio.TimerHandle(when, callback, args, self, context)
        if timer._source_traceback:  # type: ignore[attr-defined]
            del timer._source_traceback[-1]  # type: ignore[attr-defined]
        heapq.heappush(self._scheduled, (when, next(self._sequence), timer))
        timer._scheduled = True  # type: ignore[attr-defined]
        return timer

    def _run_once(self) -> None:
        """One turn of the loop: asyncio's own (``BaseEventLoop._run_once`` of
        Python 3.11, which 3.12 and 3.13 keep but for how they clamp the
        timeout), on a heap of ``(when, sequence, timer)`` entries rather than
        of timers: the heap compares in C (a timer comparing itself was a
        Python call, several per timer), and a tie on ``when`` goes to the
        timer scheduled first.  tests/test_vtime.py runs random programs on
        both and expects the same trace."""
        scheduled = self._scheduled
        count = len(scheduled)
        if count > _MIN_SCHEDULED_TIMER_HANDLES and self._timer_cancelled_count / count > _MIN_CANCELLED_TIMER_HANDLES_FRACTION:
            kept = []  # mostly cancelled timers: sweep them all out
            for entry in scheduled:
                if entry[2]._cancelled:
                    entry[2]._scheduled = False  # type: ignore[attr-defined]
                else:
                    kept.append(entry)
            heapq.heapify(kept)
            self._scheduled = scheduled = kept
            self._timer_cancelled_count = 0
        else:  # drop the cancelled timers at the head
            while scheduled and scheduled[0][2]._cancelled:
                self._timer_cancelled_count -= 1
                heapq.heappop(scheduled)[2]._scheduled = False  # type: ignore[attr-defined]

        timeout: float | None = None
        ready = self._ready
        if ready or self._stopping:
            timeout = 0
        elif scheduled:
            timeout = min(max(0, scheduled[0][0] - self._virtual_now), _MAXIMUM_SELECT_TIMEOUT)
        event_list = self._selector.select(timeout)  # type: ignore[attr-defined]  # moves the clock when nothing is ready
        if event_list:  # only ever the wake-up pipe
            self._process_events(event_list)  # type: ignore[attr-defined]

        now = self._virtual_now
        end_time = now + max(MIN_CLOCK_RESOLUTION, math.ulp(now))  # now + self._clock_resolution, read out
        while scheduled and scheduled[0][0] < end_time:  # due: to the ready queue, in order
            timer = heapq.heappop(scheduled)[2]
            timer._scheduled = False  # type: ignore[attr-defined]
            ready.append(timer)

        # Run what is ready now, not what those callbacks make ready (the next turn's).
        for _ in range(len(ready)):
            handle = ready.popleft()
            if handle._cancelled:
                continue
            if self._debug:
                try:
                    self._current_handle = handle
                    t0 = self.time()
                    handle._run()
                    dt = self.time() - t0
                    if dt >= self.slow_callback_duration:
                        logger.warning("Executing %s took %.3f seconds", _format_handle(handle), dt)
                finally:
                    self._current_handle = None
            else:
                handle._run()
