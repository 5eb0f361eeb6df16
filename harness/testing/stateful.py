"""Stateful property test of exactly-once delivery through a hostile channel.

Hypothesis drives a terminal's sender and a master's reassembler through
rules that are the channel's misbehaviours: frames lost, duplicated,
delivered out of order, corrupted, truncated, acknowledgements lost, long
silences.  The sender is asked for fragments only as the burst link asks
(see :mod:`ionotrail.harness.testing.pair`): ``presume_lost`` when a burst
starts and on each probe within it, ``next_fragment`` frame by frame, and
``on_ack`` with the time each acknowledgement was issued.

After every step the invariants hold:

* nothing is delivered twice, and delivered bytes equal queued bytes;
* an acknowledgement claims exactly the bytes the receiver holds, and they
  are the right bytes;
* no acknowledged byte is sent again: a fragment carries no byte that the
  last acknowledgement the sender was given for its message lists as held.
  The one exception is the solicitation: a one-byte fragment carrying the
  message's last byte (final), sent while that acknowledgement lists every
  byte of the message as held but reported no verdict;
* the receiver's buffers stay within their caps.

At the end the channel turns fair and every queued message must arrive
exactly once.

The endpoints come from :meth:`ExactlyOnceMachine.make_sender` and
:meth:`ExactlyOnceMachine.make_receiver`; :func:`machine_for` builds the
machine around other ones (another implementation's, or a mutant that proves
the suite can fail).  ``tests/test_exactly_once.py`` runs it.
"""

from __future__ import annotations

import dataclasses

from hypothesis import event
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, precondition, rule
from ionotrail.harness.testing import strategies
from ionotrail.harness.testing.pair import (
    MASTER,
    SECONDS_PER_BYTE,
    TERMINAL,
    ReceiverFactory,
    SenderFactory,
    burst,
    probe_heard,
    standard_receiver,
    standard_sender,
    start_burst,
    transmit,
)
from ionotrail.terminal.delivery.rangeset import RangeSet
from ionotrail.terminal.delivery.reassembly import Reassembler
from ionotrail.terminal.delivery.sender import MessageRefused, Priority, Sender
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.wire import Ack, AckBlock, Fragment, decode, encode, seal_message

SOURCE = (False, TERMINAL, MASTER)
MAX_IN_FLIGHT = 64  # frames the simulated air holds before the oldest is lost
FAIR_BUDGET = 400  # frame bytes per opening once the channel turns fair


class ExactlyOnceMachine(RuleBasedStateMachine):
    # Tight limits, so that caps, evictions and the hole cap are exercised.
    limits: Limits = Limits(
        max_message_payload=1024,
        max_queued_messages=8,
        reassembly_lifetime=3600.0,
        max_partials_per_source=2,
        max_partials_total=3,
        max_bytes_per_source=2048,
        max_bytes_total=3072,
        max_ranges_per_message=4,
    )

    def __init__(self) -> None:
        super().__init__()
        self.now = 0.0  # advanced by silences and by the airtime of every frame sent
        self.uplink: list[bytes] = []
        self.downlink: list[tuple[bytes, float]] = []  # acknowledgement frames and when they were issued
        self.queued: dict[int, bytes] = {}  # queue order -> payload
        self.order_of_id: dict[int, int] = {}  # wire id -> queue order, while pending
        self.told_held: dict[int, tuple[tuple[int, int], ...]] = {}  # wire id -> ranges of the last ack given to the sender
        self.delivered: dict[int, int] = {}  # queue order -> times delivered
        self.refused: set[int] = set()
        self.sender: Sender
        self.receiver: Reassembler

    # --- the endpoints (override to test others) -----------------------------------

    def make_sender(self, first_id: int) -> Sender:
        return standard_sender(self.limits, first_id)

    def make_receiver(self) -> Reassembler:
        return standard_receiver(self.limits)

    # --- set-up ----------------------------------------------------------------------

    @initialize(
        first_id=st.one_of(st.integers(0, 0xFFFF), st.integers(0xFFF0, 0xFFFF)),
        backlog=st.lists(strategies.message_payloads(max_size=1024), max_size=4),
    )
    def start(self, first_id: int, backlog: list[bytes]) -> None:
        """A fresh link (ids from anywhere, near wrap-around too) with a backlog."""
        self.sender = self.make_sender(first_id)
        self.receiver = self.make_receiver()
        for payload in backlog:
            self.queue_message(payload, Priority.ROUTINE)

    # --- the application -------------------------------------------------------------

    @rule(payload=strategies.message_payloads(max_size=1024), priority=st.sampled_from(Priority))
    def queue_message(self, payload: bytes, priority: Priority) -> None:
        if not self.sender.can_queue():
            return
        wire_id = self.sender.queue(payload, self.now, priority)
        order = len(self.queued)
        self.queued[order] = payload
        self.order_of_id[wire_id] = order
        self.told_held[wire_id] = ()

    # --- the terminal's link ---------------------------------------------------------

    @rule(budget=st.integers(1, 400), max_payload=st.none() | st.integers(1, 300))
    def open_trail(self, budget: int, max_payload: int | None) -> None:
        """A whole burst: as many fragments as ``budget`` frame bytes carry."""
        sent, self.now = burst(self.sender, budget, self.now, SECONDS_PER_BYTE, max_payload)
        for fragment, frame in sent:
            self._on_air(fragment, frame)

    @rule()
    def burst_starts(self) -> None:
        """A probe opens a burst: the last burst's unconfirmed tail counts as lost."""
        start_burst(self.sender, self.now)

    @rule(max_payload=st.integers(1, 300))
    def send_fragment(self, max_payload: int) -> None:
        """The next frame of a burst, sized by the link's fragment policy."""
        step = transmit(self.sender, max_payload, self.now, SECONDS_PER_BYTE)
        if step is not None:
            fragment, frame, self.now = step
            self._on_air(fragment, frame)

    @rule()
    def probe_within_burst(self) -> None:
        """A probe within a burst: pieces unconfirmed for a silence interval are lost."""
        probe_heard(self.sender, self.now, self.limits)

    # --- the channel -----------------------------------------------------------------

    @precondition(lambda self: self.uplink)
    @rule(pick=st.integers(0, 1 << 16), keep_copy=st.booleans())
    def deliver_fragment(self, pick: int, keep_copy: bool) -> None:
        """Deliver any fragment in flight (reordering); maybe leave a copy (duplication)."""
        index = pick % len(self.uplink)
        frame = self.uplink[index] if keep_copy else self.uplink.pop(index)
        self._receive(frame)

    @precondition(lambda self: self.uplink)
    @rule(pick=st.integers(0, 1 << 16))
    def lose_fragment(self, pick: int) -> None:
        self.uplink.pop(pick % len(self.uplink))

    @precondition(lambda self: self.uplink)
    @rule(pick=st.integers(0, 1 << 16), bit=st.integers(0, 8 * 300), cut=st.booleans())
    def damage_fragment(self, pick: int, bit: int, cut: bool) -> None:
        """Flip one bit or cut the frame short: the CRC must catch it."""
        frame = bytearray(self.uplink.pop(pick % len(self.uplink)))
        if cut:
            del frame[bit % len(frame) :]
        else:
            frame[(bit // 8) % len(frame)] ^= 1 << (bit % 8)
        self._receive(bytes(frame))

    @precondition(lambda self: self.downlink)
    @rule(pick=st.integers(0, 1 << 16), keep_copy=st.booleans())
    def deliver_ack(self, pick: int, keep_copy: bool) -> None:
        index = pick % len(self.downlink)
        frame, issued = self.downlink[index] if keep_copy else self.downlink.pop(index)
        self._acknowledge(frame, issued)

    @precondition(lambda self: self.downlink)
    @rule(pick=st.integers(0, 1 << 16))
    def lose_ack(self, pick: int) -> None:
        self.downlink.pop(pick % len(self.downlink))

    @rule(seconds=st.one_of(st.floats(0.05, 60), st.floats(60, 6 * 3600)))
    def silence(self, seconds: float) -> None:
        """Time passes with no trail: seconds to hours."""
        self.now += seconds
        self.receiver.expire(self.now)

    # --- plumbing with checks --------------------------------------------------------

    def _on_air(self, fragment: Fragment, frame: bytes) -> None:
        """A fragment the sender put on the air: it must not repeat acknowledged bytes."""
        order = self.order_of_id.get(fragment.message_id)
        assert order is not None, f"fragment of message {fragment.message_id}, which is not pending"
        size = len(seal_message(self.queued[order]))
        held = RangeSet(self.told_held[fragment.message_id])
        solicitation = (
            (fragment.offset, len(fragment.payload)) == (size - 1, 1) and fragment.final and held.contains(0, size)
        )
        if not solicitation:
            again = tuple(held.overlapping(fragment.offset, fragment.end))
            assert not again, (
                f"acknowledged bytes sent again: message {fragment.message_id} bytes {again} "
                f"in fragment [{fragment.offset}, {fragment.end}), acknowledged as held {held.ranges()}"
            )
        self.uplink.append(frame)
        del self.uplink[:-MAX_IN_FLIGHT]

    def _receive(self, frame: bytes) -> None:
        try:
            fragment = decode(frame)
        except DecodeError:
            return
        assert isinstance(fragment, Fragment)
        reception = self.receiver.receive(fragment, self.now)
        ack = reception.ack
        if reception.delivery is not None:
            order = self.order_of_id.get(reception.delivery.message_id)
            assert order is not None, "delivered twice: a message the sender already saw acknowledged"
            assert reception.delivery.payload == self.queued[order], "delivered bytes differ from queued bytes"
            self.delivered[order] = self.delivered.get(order, 0) + 1
            assert self.delivered[order] == 1, f"message {order} delivered twice"
        if ack.complete:
            order = self.order_of_id.get(ack.message_id)
            assert order is None or self.delivered.get(order), "complete acknowledgement for an undelivered message"
        elif not ack.refused:
            self._check_claims(ack.message_id, ack.ranges)
        self.downlink.append((encode(Ack(MASTER, ack)), self.now))
        del self.downlink[:-MAX_IN_FLIGHT]

    def _check_claims(self, wire_id: int, ranges: tuple[tuple[int, int], ...]) -> None:
        """An acknowledgement claims only bytes the receiver holds, and holds correctly."""
        assert ranges == self.receiver.held(SOURCE, wire_id), "acknowledgement differs from what is held"
        order = self.order_of_id.get(wire_id)
        if order is None:
            return
        sealed = seal_message(self.queued[order])
        for start, end in ranges:
            assert self.receiver.held_bytes(SOURCE, wire_id, start, end) == sealed[start:end]

    def _acknowledge(self, frame: bytes, issued: float) -> None:
        """Hand an acknowledgement to the sender with the time it was issued; the
        sender infers losses from it (wrongly, when the air delayed a fragment
        past a later acknowledgement: that costs resends only)."""
        ack = decode(frame)
        assert isinstance(ack, Ack)
        block: AckBlock = ack.ack
        if block.message_id in self.told_held and not (block.complete or block.refused):
            self.told_held[block.message_id] = block.ranges
        for outcome in self.sender.on_ack(block, self.now, issued=issued):
            order = self.order_of_id.pop(outcome.message_id)
            del self.told_held[outcome.message_id]
            if isinstance(outcome, MessageRefused):
                self.refused.add(order)

    # --- invariants ------------------------------------------------------------------

    @invariant()
    def buffers_within_caps(self) -> None:
        if not hasattr(self, "receiver"):
            return
        limits = self.limits
        assert self.receiver.buffered_bytes <= limits.max_bytes_total
        assert self.receiver.buffered_bytes_of(SOURCE) <= limits.max_bytes_per_source
        assert self.receiver.partial_count <= limits.max_partials_total
        assert self.receiver.partial_count_of(SOURCE) <= limits.max_partials_per_source
        assert len(self.receiver.completed) <= limits.max_duplicate_sources

    @invariant()
    def nothing_delivered_twice(self) -> None:
        assert all(count == 1 for count in self.delivered.values())

    @invariant()
    def pending_as_the_sender_reports(self) -> None:
        if hasattr(self, "sender"):
            assert self.sender.pending == len(self.order_of_id), "the sender dropped or invented a message"

    def teardown(self) -> None:
        """The channel turns fair: everything queued must now arrive exactly once."""
        if not hasattr(self, "sender"):
            return
        for frame in self.uplink:
            self._receive(frame)
        for frame, issued in self.downlink:
            self._acknowledge(frame, issued)
        self.uplink, self.downlink = [], []
        for _ in range(2000):
            if not self.sender.pending:
                break
            self.open_trail(FAIR_BUDGET, None)
            frames, self.uplink = self.uplink, []
            for frame in frames:
                self._receive(frame)
            acks, self.downlink = self.downlink, []
            for frame, issued in acks:
                self._acknowledge(frame, issued)
            self.now += 5.0
        counters = self.receiver.counters
        for field in dataclasses.fields(counters):
            if getattr(counters, field.name):
                event(f"receiver {field.name}")
        if self.sender.counters.solicitations:
            event("sender solicited a verdict")
        if self.sender.counters.presumed_lost_bytes:
            event("sender presumed bytes lost")
        assert not self.sender.pending, (
            "a fair channel did not deliver every message: "
            f"sender {self.sender.counters}, receiver {self.receiver.counters}, "
            f"pending {self.sender.outstanding()}, "
            f"partials {[(k, self.receiver.held(*k)) for k in self.receiver.partials()]}"
        )
        assert not self.refused, f"messages refused on a fair channel: {sorted(self.refused)}"
        twice = [order for order in self.queued if self.delivered.get(order, 0) > 1]
        assert not twice, f"messages delivered twice: {twice}"
        missing = [order for order in self.queued if not self.delivered.get(order)]
        assert not missing, f"messages never delivered: {missing}"


def machine_for(
    make_sender: SenderFactory = standard_sender,
    make_receiver: ReceiverFactory = standard_receiver,
    name: str = "ExactlyOnceMachineFor",
) -> type[ExactlyOnceMachine]:
    """The machine around other endpoints, built from the link's limits (and,
    for the sender, the first message id)."""

    class Machine(ExactlyOnceMachine):
        def make_sender(self, first_id: int) -> Sender:
            return make_sender(self.limits, first_id)

        def make_receiver(self) -> Reassembler:
            return make_receiver(self.limits)

    Machine.__name__ = Machine.__qualname__ = name
    return Machine
