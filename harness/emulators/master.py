"""The master-station emulator: the master endpoint bound to a port, a clock and a sink.

All protocol decisions (what a probe carries, which acknowledgement, polls,
command ids and repeats, the reassembly deadline) are the sans-I/O
:class:`~ionotrail.terminal.link.master.MasterEndpoint`'s.  This adapter
feeds it the port's arrivals, keeps its one timer armed on the event loop,
restarts the port's probe stream when the probe changes, and writes every
delivered message to a sink as one JSON line:

``{"terminal": 2609, "message_id": 17, "created_s": 901.25, "delivered_s": 1034.5,
"latency_s": 133.25, "size": 83, "crc32c": "0x1c291ca3"}``

Times are seconds on the link clock from the run's start; ``created_s`` is
read from the message itself (the demo report format) and null when the
payload carries no creation time.

With a store (``ionotrail master --state FILE``) the station keeps a
:class:`~ionotrail.terminal.outbox.journal.MasterJournal`: after every frame
or timer, what the reassembler changed and the messages delivered are
committed together *before* any new probe (which may carry the "complete"
acknowledgement) goes to the port, and the sink is fed only after the commit.
A commit the store refuses (a full disk, a lock held too long) sends the
station quiet: it stops probing and listening, holds what the endpoint gave,
and tries the commit again after STORE_RETRY_FIRST_S, doubling up to
STORE_RETRY_MAX_S; the first commit that works releases what was held and
starts the probes again.  Nothing the store has not kept is acknowledged, and
while quiet nothing new arrives, so what is held cannot grow.
"""

from __future__ import annotations

import asyncio
import dataclasses
import json
from collections.abc import Callable
from typing import IO

from ionotrail.harness.demo.gauge import report_created
from ionotrail.terminal.auth.authenticator import MasterAuthenticator
from ionotrail.terminal.auth.keys import SiteSecret
from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler
from ionotrail.terminal.limits import DEFAULT_LIMITS, STORE_RETRY_FIRST_S, STORE_RETRY_MAX_S, Limits
from ionotrail.terminal.link.master import (
    Delivered,
    MasterCounters,
    MasterEffect,
    MasterEndpoint,
    ProbeChanged,
    ReplyArrived,
)
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.outbox.journal import MasterJournal
from ionotrail.terminal.outbox.store import Store, StoreError
from ionotrail.terminal.ports import Port
from ionotrail.terminal.wire.crc import crc32c


@dataclasses.dataclass(frozen=True, slots=True)
class DeliveryRecord:
    terminal: int
    message_id: int
    created_s: float | None
    delivered_s: float
    size: int
    crc32c: int
    priority: str = "routine"
    """alarm or routine: the urgency its fragments carried."""

    def to_json(self) -> str:
        latency = None if self.created_s is None else round(self.delivered_s - self.created_s, 3)
        return json.dumps(
            {
                "terminal": self.terminal,
                "message_id": self.message_id,
                "created_s": None if self.created_s is None else round(self.created_s, 3),
                "delivered_s": round(self.delivered_s, 3),
                "latency_s": latency,
                "size": self.size,
                "crc32c": f"0x{self.crc32c:08x}",
                "priority": self.priority,
            }
        )


@dataclasses.dataclass(frozen=True, slots=True)
class ReplyRecord:
    terminal: int
    command_id: int
    status: int
    result: bytes
    time_s: float


class MasterStation:
    """A master that serves terminals through one port.

    ``epoch_unix`` is the Unix time of link-clock zero, to turn a message's
    creation time into link-clock seconds; ``origin`` is the loop time of
    link-clock zero.  ``probe_interval``, when given, overrides the limits'.
    """

    def __init__(
        self,
        port: Port,
        address: int,
        *,
        limits: Limits = DEFAULT_LIMITS,
        probe_interval: float | None = None,
        epoch_unix: float = 0.0,
        origin: float = 0.0,
        sink: Callable[[DeliveryRecord], None] | None = None,
        on_arrival: Callable[[Arrival], None] | None = None,
        store: Store | None = None,
        site: SiteSecret | None = None,
        require_data_auth: bool | frozenset[int] = False,
        on_store_trouble: Callable[[str], None] | None = None,
    ) -> None:
        """``site`` is the site secret that signs commands (none: no commands);
        ``require_data_auth`` (True, or terminal addresses) refuses plain fragments
        from those terminals: their data must come authenticated (docs/keys.md);
        ``on_store_trouble`` hears one line when the store refuses a commit and
        the station goes quiet, and one when it works again."""
        if probe_interval is not None:
            limits = dataclasses.replace(limits, probe_interval=probe_interval)
        self.port = port
        self.address = address
        self.site = site
        self.endpoint = MasterEndpoint(
            address,
            limits=limits,
            auth=MasterAuthenticator(site) if site is not None else None,
            require_data_auth=require_data_auth,
        )
        self.probe_interval = limits.probe_interval
        self.epoch_unix = epoch_unix
        self.origin = origin
        self.sink = sink
        self.on_arrival = on_arrival
        """Sees every frame the port delivers, before the endpoint does (a soak's frame statistics)."""
        self.store = store
        self.journal = MasterJournal(self.endpoint.reassembler) if store is not None else None
        self.restored = (0, 0)
        """(completed-id windows, partial messages) taken up from the store at the start."""
        self.deliveries: list[DeliveryRecord] = []
        self.replies: list[ReplyRecord] = []
        self._loop: asyncio.AbstractEventLoop | None = None
        self._timer: asyncio.TimerHandle | None = None
        self._armed_for: float | None = None  # the endpoint deadline the loop timer stands for
        self.on_store_trouble = on_store_trouble
        self.store_failures = 0
        """Commits the store refused."""
        self.frames_unheard = 0
        """Frames the port delivered while the station was quiet, dropped unread."""
        self._held: list[MasterEffect] = []  # what the endpoint gave while its commit waits
        self._quiet_since: float | None = None  # loop time the store first refused, while quiet
        self._retry: asyncio.TimerHandle | None = None
        self._retry_delay = STORE_RETRY_FIRST_S

    @property
    def counters(self) -> MasterCounters:
        return self.endpoint.counters

    @property
    def reassembler(self) -> Reassembler:
        return self.endpoint.reassembler

    @property
    def poll(self) -> int | None:
        return self.endpoint.poll

    def start(self) -> None:
        """Attach to the port and start probing; call from within the running loop."""
        self._loop = asyncio.get_running_loop()
        if self.journal is not None and self.store is not None:
            stored = self.store.load()
            self.restored = self.journal.restore(stored, self._now())
            self._carry_out(self.endpoint.restore(stored, self._now()))  # committed before the probe airs
            self._arm()
        self.port.attach(self._arrived)
        if not self.quiet:  # else the first commit that works starts them
            self.port.start_listening()
            self.port.start_probing(self.endpoint.probe, self.probe_interval)

    async def stop(self) -> None:
        """Stop probing and listening.  What a quiet station held is not kept:
        it was never acknowledged, so the terminals send it again to the next life."""
        if self._timer is not None:
            self._timer.cancel()
            self._timer, self._armed_for = None, None
        if self._retry is not None:
            self._retry.cancel()
            self._retry = None
        self.port.stop_probing()
        self.port.stop_listening()

    @property
    def quiet(self) -> bool:
        """The store refused the last commit: no probes, no listening, until one works."""
        return self._quiet_since is not None

    # --- what the operator asks ------------------------------------------------------

    def command(self, terminal: int, opcode: int, arguments: bytes = b"") -> int:
        """Send a command to ``terminal`` on the probes until it replies; polls it."""
        command_id, effects = self.endpoint.command(terminal, opcode, arguments, self._now())
        self._carry_out(effects)
        return command_id

    def rotate_keys(self, terminal: int) -> int:
        """Move ``terminal`` to its next key epoch over the air (docs/keys.md)."""
        command_id, effects = self.endpoint.rotate_keys(terminal, self._now())
        self._carry_out(effects)
        return command_id

    # --- the port's and the clock's side ------------------------------------------------

    def _now(self) -> float:
        return (self._loop.time() if self._loop is not None else self.origin) - self.origin

    def _arrived(self, arrival: Arrival) -> None:
        if self.quiet:  # (a frame the modem had in hand as the receiver went off)
            self.frames_unheard += 1
            return
        if self.on_arrival is not None:
            self.on_arrival(arrival)
        self._carry_out(self.endpoint.on_frame(arrival.frame, arrival.time - self.origin))

    def _fire(self) -> None:
        # The loop fired at origin + deadline; taking origin off again can round
        # to just below the deadline, which the endpoint would take for an early
        # call (and the timer would be armed at the same instant for ever).
        armed_for, self._timer, self._armed_for = self._armed_for, None, None
        now = self._now()
        self._carry_out(self.endpoint.on_timer(now if armed_for is None else max(now, armed_for)))

    def _carry_out(self, effects: list[MasterEffect]) -> None:
        if self._held:  # a refused commit's effects go first, in order
            effects, self._held = self._held + effects, []
        if self.journal is not None and self.store is not None:
            # Durable first: no acknowledgement leaves, and no delivery reaches the sink, before this commit.
            # A refused commit leaves the journal's, the keys' and the command ids' changes marked
            # unsaved, so the next batch built here holds them again.
            batch = self.journal.changes([e.delivery for e in effects if isinstance(e, Delivered)])
            auth = self.endpoint.auth
            # A newly signed command's counter is reserved, and a data window moved by an
            # authenticated fragment kept, durably before the probe carrying either airs.
            if auth is not None and auth.dirty:
                batch = batch.merged(auth.batch())
            if self.endpoint.command_ids_unsaved:  # a restarted master must not give out an id again
                batch = batch.merged(self.endpoint.command_id_batch())
            if batch:
                try:
                    self.store.commit(batch)
                except StoreError as exc:
                    self._held = effects
                    self._refused(exc)
                    return
                self.journal.committed(batch)
                if auth is not None:
                    auth.committed()
                self.endpoint.command_ids_committed()
        for effect in effects:
            if isinstance(effect, ProbeChanged):
                self.port.start_probing(effect.frame, self.probe_interval)
            elif isinstance(effect, Delivered):
                self.export(effect.delivery)
            elif isinstance(effect, ReplyArrived):
                self.replies.append(ReplyRecord(effect.terminal, effect.command_id, effect.status, effect.result, effect.time))
        if self.quiet:
            self._resume()
        self._arm()

    def _refused(self, error: StoreError) -> None:
        """The store refused a commit: go quiet (or stay so) and try again later."""
        loop = self._loop
        if loop is None:  # not started: the caller hears it
            raise error
        self.store_failures += 1
        if self._quiet_since is None:
            self._quiet_since, self._retry_delay = loop.time(), STORE_RETRY_FIRST_S
            if self._timer is not None:
                self._timer.cancel()
                self._timer, self._armed_for = None, None
            self.port.stop_probing()
            self.port.stop_listening()
            if self.on_store_trouble is not None:
                self.on_store_trouble(
                    f"{error}; quiet (no probes, not listening) until a commit works, trying again in {self._retry_delay:g} s"
                )
        else:
            self._retry_delay = min(2 * self._retry_delay, STORE_RETRY_MAX_S)
        if self._retry is None:
            self._retry = loop.call_later(self._retry_delay, self._try_again)

    def _try_again(self) -> None:
        self._retry = None
        self._carry_out([])

    def _resume(self) -> None:
        """A commit worked after the store refused one: probe and listen again."""
        assert self._loop is not None and self._quiet_since is not None
        quiet_s, self._quiet_since = self._loop.time() - self._quiet_since, None
        if self._retry is not None:  # (an operator's command committed first)
            self._retry.cancel()
            self._retry = None
        self.port.start_listening()
        self.port.start_probing(self.endpoint.probe, self.probe_interval)
        if self.on_store_trouble is not None:
            self.on_store_trouble(
                f"the store works again; quiet for {quiet_s:.1f} s, {self.store_failures} commits refused so far"
            )

    def _arm(self) -> None:
        """Keep one loop timer at the endpoint's deadline (re-armed only when it moves earlier)."""
        deadline = self.endpoint.deadline
        if self._loop is None or deadline is None or self.quiet:
            return
        when = self.origin + deadline
        if self._timer is not None:
            if self._timer.when() <= when:
                return  # fires early, finds nothing due, and is armed again
            self._timer.cancel()
        self._timer = self._loop.call_at(when, self._fire)
        self._armed_for = deadline

    def export(self, delivery: Delivery) -> None:
        """Record a delivery and hand it to the sink (also for deliveries a store's log kept)."""
        created = report_created(delivery.payload)
        record = DeliveryRecord(
            terminal=delivery.terminal,
            message_id=delivery.message_id,
            created_s=None if created is None else created - self.epoch_unix,
            delivered_s=delivery.completed,
            size=len(delivery.payload),
            crc32c=crc32c(delivery.payload),
            priority="alarm" if delivery.urgent else "routine",
        )
        self.deliveries.append(record)
        if self.sink is not None:
            self.sink(record)


def json_lines_sink(stream: IO[str]) -> Callable[[DeliveryRecord], None]:
    def write(record: DeliveryRecord) -> None:
        stream.write(record.to_json() + "\n")

    return write
