"""Two protocol endpoints joined through a misbehaving channel.

``LinkPair`` puts a terminal's :class:`Sender` and a master's
:class:`Reassembler` on either side of two :class:`FaultyChannel` s and runs
trail openings: the sender fills the opening, fragments cross the uplink,
every fragment that decodes is received, and the newest acknowledgement for
each message crosses the downlink back.  It is the harness the property
suite, the corner-case tests and ``ionotrail bench reassembly`` share.
"""

from __future__ import annotations

import dataclasses
import random

from ionotrail.harness.testing.faults import FAIR, FaultSchedule, FaultyChannel
from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler
from ionotrail.terminal.delivery.sender import Priority, Sender, SenderEvent
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.wire import Ack, AckBlock, Fragment, decode, encode

TERMINAL = 0x0A31
MASTER = 7


@dataclasses.dataclass
class LinkPair:
    """A terminal sending to a master; time advances only when told."""

    schedule: FaultSchedule = FAIR
    seed: int = 0
    limits: Limits = DEFAULT_LIMITS
    first_id: int = 0
    duplicate_window: bool = True
    now: float = 0.0

    def __post_init__(self) -> None:
        rng = random.Random(self.seed)
        self.sender = Sender(TERMINAL, MASTER, limits=self.limits, first_id=self.first_id)
        self.receiver = Reassembler(self.limits, duplicate_window=self.duplicate_window)
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
        """One opening: fragments up, then the acknowledgements they earned down."""
        if budget is None:
            budgets = self.schedule.budgets
            budget = budgets[self.openings % len(budgets)]
        self.openings += 1
        sent = [encode(f) for f in self.sender.fill(budget, self.now)]
        acks: dict[int, AckBlock] = {}
        for frame in self.uplink.carry(sent):
            fragment = self._decode(frame)
            if isinstance(fragment, Fragment):
                reception = self.receiver.receive(fragment, self.now)
                acks[reception.ack.message_id] = reception.ack
                if reception.delivery is not None:
                    self.deliveries.append(reception.delivery)
        for frame in self.downlink.carry([encode(Ack(MASTER, block)) for block in acks.values()]):
            ack = self._decode(frame)
            if isinstance(ack, Ack):
                self.sender_events += self.sender.on_ack(ack.ack, self.now)

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
