"""The terminal as an asyncio service: the protocol core bound to a port and a clock.

Nothing protocol-related lives here.  The service hands every received frame
to the :class:`~ionotrail.terminal.link.terminal.Link`, carries out the effects it returns
(frames to the port, events to an observer), keeps one timer armed at the
link's deadline, and moves messages from the application's
:class:`MessageSource` into the sender queue.  Time is the
event loop's clock, so the same code runs in real time on a modem and
thousands of times faster on a virtual-time loop.

The timer is re-armed lazily: when the link's deadline moves later (every
probe pushes the silence deadline), the armed timer is left alone, fires
early, finds nothing due and is armed again.  That keeps the loop to about
one timer per frame or burst rather than one per probe.
"""

from __future__ import annotations

import asyncio
import dataclasses
from collections.abc import Callable
from typing import Protocol

from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.link.terminal import Arrival, CommandArrived, Effect, Link, Transmit
from ionotrail.terminal.ports import Port
from ionotrail.terminal.wire.formats import ReplyStatus


class MessageSource(Protocol):
    """What the service asks of an application that produces messages."""

    def next_due(self) -> float | None:
        """Link-clock time of the next message (None: no more)."""

    def take(self, now: float, room: int) -> list[tuple[bytes, Priority]]:
        """Messages due by ``now``, oldest first.  ``room`` is how many the
        sender can still queue; a sensor's readings happen regardless (the
        service reports the overflow as abandoned), a backlog fills only the room."""

    def command(self, opcode: int, arguments: bytes) -> tuple[ReplyStatus, bytes]:
        """Execute a downlink command once; its reply status and result."""


@dataclasses.dataclass(frozen=True, slots=True)
class MessageQueued:
    """The application's message entered the sender queue."""

    message_id: int
    created: float
    payload: bytes
    priority: Priority


@dataclasses.dataclass(frozen=True, slots=True)
class MessageAbandoned:
    """A message that will never be sent, and why."""

    created: float
    size: int
    reason: str


ServiceEvent = Effect | MessageQueued | MessageAbandoned
Observer = Callable[[float, ServiceEvent], None]


class TerminalService:
    """Runs one :class:`Link` over one :class:`Port` until stopped."""

    def __init__(self, link: Link, port: Port, source: MessageSource, *, observer: Observer | None = None) -> None:
        self.link = link
        self.port = port
        self.source = source
        self.observer = observer
        self._loop: asyncio.AbstractEventLoop | None = None
        self._link_timer: asyncio.TimerHandle | None = None
        self._source_timer: asyncio.TimerHandle | None = None
        self._stopped: asyncio.Event | None = None

    async def run(self, until: float | None = None) -> None:
        """Serve until :meth:`stop`, or until the loop's clock reaches ``until``."""
        self._loop = loop = asyncio.get_running_loop()
        self._stopped = asyncio.Event()
        self.port.attach(self._arrived)
        self.port.start_listening()
        self._arm_source()
        stop_timer = loop.call_at(until, self.stop) if until is not None else None
        try:
            await self._stopped.wait()
        finally:
            if stop_timer is not None:
                stop_timer.cancel()
            for handle in (self._link_timer, self._source_timer):
                if handle is not None:
                    handle.cancel()
            self._link_timer = self._source_timer = None
            self.port.stop_listening()

    def stop(self) -> None:
        if self._stopped is not None:
            self._stopped.set()

    # --- the core's inputs -----------------------------------------------------------

    def _arrived(self, arrival: Arrival) -> None:
        self._carry_out(self.link.on_frame(arrival))

    def _timer_fired(self) -> None:
        assert self._loop is not None
        self._link_timer = None
        self._carry_out(self.link.on_timer(self._loop.time()))

    def _produce(self) -> None:
        assert self._loop is not None
        self._source_timer = None
        now = self._loop.time()
        sender = self.link.sender
        room = sender.limits.max_queued_messages - sender.pending
        for payload, priority in self.source.take(now, room):
            if sender.can_queue():
                message_id = sender.queue(payload, now, priority)
                self._tell(now, MessageQueued(message_id, now, payload, priority))
            else:
                self._tell(now, MessageAbandoned(now, len(payload), "queue_full"))
        self._arm_source()

    # --- the core's outputs ----------------------------------------------------------

    def _carry_out(self, effects: list[Effect]) -> None:
        assert self._loop is not None
        if effects:  # most probes give none
            now = self._loop.time()
            for effect in effects:
                if isinstance(effect, Transmit):
                    self.port.send(effect.frame)
                elif isinstance(effect, CommandArrived):
                    status, result = self.source.command(effect.opcode, effect.arguments)
                    self.link.reply(effect.command_id, status, result)
                self._tell(now, effect)
        self._arm_link()

    def _tell(self, now: float, event: ServiceEvent) -> None:
        if self.observer is not None:
            self.observer(now, event)

    def _arm_link(self) -> None:
        assert self._loop is not None
        timer = self.link.timer  # its deadline (Link.deadline), read once per frame or timer
        if timer is None:
            return  # an armed timer stays; it will find nothing due
        deadline = timer.at
        if self._link_timer is not None:
            if self._link_timer.when() <= deadline:
                return
            self._link_timer.cancel()
        self._link_timer = self._loop.call_at(deadline, self._timer_fired)

    def _arm_source(self) -> None:
        assert self._loop is not None
        due = self.source.next_due()
        if due is not None:
            self._source_timer = self._loop.call_at(due, self._produce)
