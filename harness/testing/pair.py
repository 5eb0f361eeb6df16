"""Two protocol endpoints joined through a misbehaving channel.

``LinkPair`` puts a terminal's :class:`Sender` and a master's
:class:`Reassembler` on either side of two :class:`FaultyChannel` s and runs
trail openings: the sender is asked for fragments exactly as the burst link
(``ionotrail.terminal.link.terminal``) asks, fragments cross the uplink,
every fragment that decodes is received, and the newest acknowledgement for
each message crosses the downlink back.  It is the harness the property
suite and the corner-case tests share.

What the link calls, and so what :func:`burst` and :meth:`LinkPair.open_trail`
call, in this order:

* when a burst starts, ``presume_lost(now)``, then the outcomes of the last
  burst are cleared;
* for each frame, ``next_fragment(max_payload, now, seconds_per_byte)``, the
  next frame starting when the last one has left the antenna;
* for each acknowledgement heard, ``on_ack(block, arrival, issued=...)``;
* for each probe heard within a burst, ``presume_lost(now - burst_silence)``
  (:func:`probe_heard`).
"""

from __future__ import annotations

import dataclasses
import random
from collections.abc import Callable

from ionotrail.harness.testing.faults import FAIR, FaultSchedule, FaultyChannel
from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler
from ionotrail.terminal.delivery.sender import FRAGMENT_OVERHEAD, Priority, Sender, SenderEvent
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.wire import Ack, AckBlock, Fragment, decode, encode

TERMINAL = 0x0A31
MASTER = 7
SECONDS_PER_BYTE = 8 / 4800.0
"""Airtime of a byte at the demo scenario's 4800 bit/s (harness/demo/link.toml)."""

SenderFactory = Callable[[Limits, int], Sender]
"""Builds the terminal's sender from the link's limits and the first message id."""
ReceiverFactory = Callable[[Limits], Reassembler]
"""Builds the master's receiver from the link's limits."""


def standard_sender(limits: Limits, first_id: int) -> Sender:
    return Sender(TERMINAL, MASTER, limits=limits, first_id=first_id)


def standard_receiver(limits: Limits) -> Reassembler:
    return Reassembler(limits)


def start_burst(sender: Sender, now: float) -> None:
    """A probe opened a burst: the last burst's unconfirmed tail counts as lost."""
    sender.presume_lost(now)
    sender.outcomes.clear()


def probe_heard(sender: Sender, now: float, limits: Limits) -> None:
    """A probe within a burst: a piece unconfirmed for a whole silence interval is lost."""
    sender.presume_lost(now - limits.burst_silence)
    sender.outcomes.clear()


def transmit(sender: Sender, max_payload: int, now: float, seconds_per_byte: float) -> tuple[Fragment, bytes, float] | None:
    """The next frame of a burst started at ``now``: the fragment, its bytes and
    when its last bit leaves the antenna; None when nothing is ready."""
    fragment = sender.next_fragment(max_payload, now, seconds_per_byte)
    if fragment is None:
        return None
    frame = encode(fragment)
    return fragment, frame, now + len(frame) * seconds_per_byte


def burst(
    sender: Sender,
    budget: int,
    now: float,
    seconds_per_byte: float = SECONDS_PER_BYTE,
    max_payload: int | None = None,
) -> tuple[list[tuple[Fragment, bytes]], float]:
    """One opening that carries ``budget`` bytes of frames, back to back from
    ``now``: each fragment as large as ``max_payload`` (the link's fragment
    policy; None: the rest of the budget) and the budget allow.  Returns the
    fragments with their frames, and when the last one left the antenna."""
    start_burst(sender, now)
    sent: list[tuple[Fragment, bytes]] = []
    while budget > FRAGMENT_OVERHEAD:
        room = budget - FRAGMENT_OVERHEAD
        step = transmit(sender, room if max_payload is None else min(room, max_payload), now, seconds_per_byte)
        if step is None:
            break
        fragment, frame, now = step
        sent.append((fragment, frame))
        budget -= len(frame)
    return sent, now


@dataclasses.dataclass
class LinkPair:
    """A terminal sending to a master; time advances only when told, and by
    the airtime of what is sent."""

    schedule: FaultSchedule = FAIR
    seed: int = 0
    limits: Limits = DEFAULT_LIMITS
    first_id: int = 0
    now: float = 0.0
    make_sender: SenderFactory = standard_sender
    make_receiver: ReceiverFactory = standard_receiver

    def __post_init__(self) -> None:
        rng = random.Random(self.seed)
        self.sender = self.make_sender(self.limits, self.first_id)
        self.receiver = self.make_receiver(self.limits)
        self.uplink = FaultyChannel(self.schedule, random.Random(rng.random()))
        self.downlink = FaultyChannel(self.schedule, random.Random(rng.random()))
        self.deliveries: list[Delivery] = []
        self.sender_events: list[SenderEvent] = []
        self.decode_errors = 0
        self.openings = 0

    def set_schedule(self, schedule: FaultSchedule) -> None:
        """Change how both directions misbehave from now on (e.g. turn fair)."""
        self.schedule = self.uplink.schedule = self.downlink.schedule = schedule

    def queue(self, payload: bytes, priority: Priority = Priority.ROUTINE) -> int:
        return self.sender.queue(payload, self.now, priority)

    def open_trail(self, budget: int | None = None) -> None:
        """One opening: a burst of fragments up, then, once the master has heard
        it, the acknowledgements they earned down."""
        if budget is None:
            budgets = self.schedule.budgets
            budget = budgets[self.openings % len(budgets)]
        self.openings += 1
        sent, self.now = burst(self.sender, budget, self.now)
        acks: dict[int, AckBlock] = {}
        for frame in self.uplink.carry([frame for _, frame in sent]):
            fragment = self._decode(frame)
            if isinstance(fragment, Fragment):
                reception = self.receiver.receive(fragment, self.now)
                acks[reception.ack.message_id] = reception.ack
                if reception.delivery is not None:
                    self.deliveries.append(reception.delivery)
        issued = self.now  # after the burst's last bit: an ack that lacks a piece proves it lost
        for frame in self.downlink.carry([encode(Ack(MASTER, block)) for block in acks.values()]):
            ack = self._decode(frame)
            if isinstance(ack, Ack):
                self.now += len(frame) * SECONDS_PER_BYTE
                self.sender_events += self.sender.on_ack(ack.ack, self.now, issued=issued)

    def _decode(self, frame: bytes) -> object:
        try:
            return decode(frame)
        except DecodeError:
            self.decode_errors += 1
            return None

    def wait(self, seconds: float) -> None:
        self.now += seconds
        self.receiver.expire(self.now)

    def run_until_done(self, max_openings: int = 10_000, gap: float = 10.0) -> bool:
        """Open trails every ``gap`` seconds until the sender holds nothing;
        False if ``max_openings`` ran out first."""
        for _ in range(max_openings):
            if not self.sender.pending:
                return True
            self.open_trail()
            self.wait(gap)
        return not self.sender.pending
