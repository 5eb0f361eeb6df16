"""The terminal as an asyncio service: the protocol core bound to a port and a clock.

Nothing protocol-related lives here.  The service hands every received frame
to the :class:`~ionotrail.terminal.link.terminal.Link`, carries out the effects it returns
(frames to the port, events to an observer), keeps one timer armed at the
link's deadline, and moves messages from the application's
:class:`MessageSource` into the sender queue.  Time is the
event loop's clock, so the same code runs in real time on a modem and
thousands of times faster on a virtual-time loop.

With a :class:`~ionotrail.terminal.power.scheduler.PowerScheduler` the
service also switches the receiver: it asks for a plan at the start, when
the plan's time comes, when messages are queued and when a burst ends;
turns the receiver on or off as the plan says (never in the middle of a
burst: off waits for the burst's end); and holds routine traffic in the
sender while the plan defers it.  The state of charge comes from a *gauge*
the caller supplies (a fuel gauge on a real terminal, the energy model in a
simulation).  Without a scheduler the receiver is always on.

Every message passes through a durable :class:`~ionotrail.terminal.outbox.outbox.Outbox`
on a :class:`~ionotrail.terminal.outbox.store.Store` (in memory unless the
caller gives one): a message is queued, and reported queued, only once its
commit has returned, and after every frame or timer the records catch up
with what the acknowledgements changed.  At the start the service takes up
what the store kept from an earlier run (:class:`MessagesRestored`).

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
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.link.table import State
from ionotrail.terminal.link.terminal import Arrival, BurstEnded, CommandArrived, Effect, Link, Transmit
from ionotrail.terminal.outbox.outbox import Outbox
from ionotrail.terminal.outbox.store import Store, StoreError
from ionotrail.terminal.ports import Port
from ionotrail.terminal.power.scheduler import Plan, PowerScheduler, QueueView
from ionotrail.terminal.stores.memory import MemoryStore
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
class MessagesRestored:
    """At the start: the messages the store kept from an earlier run are queued
    again, and new ids go on from ``next_id`` (unwrapped)."""

    count: int
    next_id: int


@dataclasses.dataclass(frozen=True, slots=True)
class MessageAbandoned:
    """A message that will never be sent, and why."""

    created: float
    size: int
    reason: str
    priority: Priority = Priority.ROUTINE


@dataclasses.dataclass(frozen=True, slots=True)
class MessageEvicted:
    """A queued routine message, never sent, dropped for an alarm: to make room
    in a full queue, or because, held, it kept a waiting message out of the
    duplicate window."""

    message_id: int
    created: float


@dataclasses.dataclass(frozen=True, slots=True)
class ReceiverSwitched:
    """The receiver went on (True) or off."""

    time: float
    on: bool


@dataclasses.dataclass(frozen=True, slots=True)
class PlanMade:
    """The power scheduler's plan from ``time``, made at state of charge ``soc``."""

    time: float
    plan: Plan
    soc: float


ServiceEvent = Effect | MessageQueued | MessagesRestored | MessageAbandoned | MessageEvicted | ReceiverSwitched | PlanMade
Gauge = Callable[[float], float]
"""The state of charge (0 to 1) at a time on the loop's clock."""
Observer = Callable[[float, ServiceEvent], None]


class TerminalService:
    """Runs one :class:`Link` over one :class:`Port` until stopped."""

    def __init__(
        self,
        link: Link,
        port: Port,
        source: MessageSource,
        *,
        observer: Observer | None = None,
        power: PowerScheduler | None = None,
        gauge: Gauge | None = None,
        forecast: Gauge | None = None,
        store: Store | None = None,
    ) -> None:
        """``gauge(now)`` reads the state of charge; ``forecast(now)`` the harvest
        expected over the power scheduler's next slot, mean watts (optional);
        ``store`` keeps the outbox (default: in memory, nothing survives)."""
        if (power is None) != (gauge is None):
            raise UsageError("a power scheduler needs a gauge of the state of charge, and a gauge a scheduler")
        self.link = link
        self.port = port
        self.source = source
        self.observer = observer
        self.power = power
        self.gauge = gauge
        self.forecast = forecast
        self.store: Store = store if store is not None else MemoryStore()
        self.outbox = Outbox(link.sender)
        self.store_failures = 0
        """Commits the store refused (a message abandoned, or records that lag until a later commit)."""
        self._kept_version = link.sender.durable_version
        self.receiver_on = False
        self._power_timer: asyncio.TimerHandle | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._link_timer: asyncio.TimerHandle | None = None
        self._source_timer: asyncio.TimerHandle | None = None
        self._stopped: asyncio.Event | None = None

    async def run(self, until: float | None = None) -> None:
        """Serve until :meth:`stop`, or until the loop's clock reaches ``until``."""
        self._loop = loop = asyncio.get_running_loop()
        self._stopped = asyncio.Event()
        stored = self.store.load()
        kept = self.outbox.restore(stored, loop.time())
        self.link.restore_durable(stored)
        self._save_link()  # keys provisioned from a key file become durable before anything is heard
        self._kept_version = self.link.sender.durable_version
        self._tell(loop.time(), MessagesRestored(kept.messages, kept.next_seq))
        self.port.attach(self._arrived)
        if self.power is None:
            self._switch(True, loop.time())
        else:
            self._replan()
        self._arm_source()
        stop_timer = loop.call_at(until, self.stop) if until is not None else None
        try:
            await self._stopped.wait()
        finally:
            if stop_timer is not None:
                stop_timer.cancel()
            for handle in (self._link_timer, self._source_timer, self._power_timer):
                if handle is not None:
                    handle.cancel()
            self._link_timer = self._source_timer = self._power_timer = None
            if self.receiver_on:
                self._switch(False, loop.time())

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
        taken = self.source.take(now, room)
        for payload, priority in taken:
            if not sender.can_queue() and priority is Priority.ALARM:
                evicted = sender.evict_for(priority)  # an alarm is not lost to routine reports waiting their turn
                if evicted is not None:
                    self._tell(now, MessageEvicted(evicted[0], evicted[1]))
            if sender.can_queue():
                batch = self.outbox.accept(payload, priority, now)
                try:
                    self.store.commit(batch)  # accepted only once durable
                except StoreError:
                    self.outbox.abandon()
                    self.store_failures += 1
                    self._tell(now, MessageAbandoned(now, len(payload), "store_failed", priority))
                    continue
                message_id = self.outbox.committed(batch)
                self._tell(now, MessageQueued(message_id, now, payload, priority))
                for dropped_id, created in sender.clear_the_window():
                    self._tell(now, MessageEvicted(dropped_id, created))
                self._keep()
            else:
                self._tell(now, MessageAbandoned(now, len(payload), "queue_full", priority))
        if taken and self.power is not None:
            self._replan()
        self._arm_source()  # (reached whatever the store did: a failed commit abandons one message, not the source)

    def gauge_alert(self) -> None:
        """The fuel gauge says the state of charge crossed a threshold: decide again now."""
        if self.power is not None and self._loop is not None and self._stopped is not None and not self._stopped.is_set():
            self._replan()

    def _replan(self) -> None:
        """Ask the power scheduler for a plan from now and carry it out."""
        loop, power, gauge = self._loop, self.power, self.gauge
        assert loop is not None and power is not None and gauge is not None
        if self._power_timer is not None:
            self._power_timer.cancel()
        now = loop.time()
        sender = self.link.sender
        alarms, routine, oldest_alarm, oldest_routine = sender.queue_view()
        soc = gauge(now)
        queue = QueueView(alarms, routine, oldest_alarm, oldest_routine, sender.limits.max_queued_messages)
        forecast_w = self.forecast(now) if self.forecast is not None else 0.0
        plan = power.decide(now, soc, queue, heard=self.link.counters.openings_heard, listening=self.receiver_on, forecast_w=forecast_w)
        sender.hold_routine = not plan.routine
        for dropped_id, created in sender.clear_the_window():
            self._tell(now, MessageEvicted(dropped_id, created))
        self._keep()
        self._tell(now, PlanMade(now, plan, soc))
        if plan.listen != self.receiver_on and (plan.listen or self.link.state is State.LISTENING):
            self._switch(plan.listen, now)  # off waits for the burst's end
        self._power_timer = loop.call_at(max(plan.until, now), self._replan)

    def _switch(self, on: bool, now: float) -> None:
        if on:
            self.port.start_listening()
        else:
            self.port.stop_listening()
        self.receiver_on = on
        self._tell(now, ReceiverSwitched(now, on))

    # --- the core's outputs ----------------------------------------------------------

    def _carry_out(self, effects: list[Effect]) -> None:
        assert self._loop is not None
        if effects:  # most probes give none
            now = self._loop.time()
            for effect in effects:
                if isinstance(effect, Transmit):
                    self.port.send(effect.frame)
                elif isinstance(effect, CommandArrived):
                    if self._save_link():  # run at most once: recorded as run before it runs
                        status, result = self.source.command(effect.opcode, effect.arguments)
                    else:  # not recorded, so not run
                        status, result = ReplyStatus.REFUSED, b""
                    self.link.reply(effect.command_id, status, result)
                    self._save_link()
                self._tell(now, effect)
                if isinstance(effect, BurstEnded) and self.power is not None and self._stopped is not None and not self._stopped.is_set():
                    self._replan()
        if self.link.sender.durable_version != self._kept_version:  # acknowledgements change records, with or without effects
            self._keep()
        if self.link.unsaved:  # a command accepted, keys rotated, a reply made: no reply goes before this commit
            self._save_link()
        self._arm_link()

    def _save_link(self) -> bool:
        """Commit the link's key state and command memory, when changed; False
        if the store failed (the link then holds its replies, and the next
        input tries again)."""
        if self.link.unsaved:
            try:
                self.store.commit(self.link.durable_batch())
            except StoreError:
                self.store_failures += 1
                return False
            self.link.durable_committed()
        return True

    def _keep(self) -> None:
        """Bring the outbox's records up to date with the sender (cheap when nothing changed)."""
        batch = self.outbox.changes()
        if batch:
            try:
                self.store.commit(batch)
            except StoreError:  # the records lag; the next input tries again
                self.store_failures += 1
                return
            self.outbox.committed(batch)
        self._kept_version = self.link.sender.durable_version

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
