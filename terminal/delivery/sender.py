"""The sending side: cut queued messages into fragments that fill each opening.

A meteor trail gives a few hundred bytes at most, at a moment nobody can
predict.  The sender keeps each queued message as a sealed byte stream
(payload plus CRC-32C) and a record of which bytes the receiver has said it
holds.  One method chooses what goes on the air, :meth:`Sender.next_fragment`:
the next fragment of a burst, from the messages that matter most (alarms
before routine, then oldest first), carrying only bytes the receiver has not
acknowledged.  Fragment boundaries are chosen afresh for every fragment, so a
shorter or longer trail never causes an acknowledged byte to be resent.  No
more messages are worked on at once than the receiver keeps half-built for
one source (``max_partials_per_source``).  :meth:`Sender.fill` is a loop over
it for an opening whose size is known in bytes.

Acknowledgements *replace* the sender's record rather than add to it: the
receiver's word is the truth, so when it drops a half-built message (expiry,
eviction, a bad CRC-32C) its next acknowledgement shows fewer bytes and the
sender sends them again.  A message whose bytes are all acknowledged but not
yet reported complete gets a one-byte final fragment at the next opening, to
solicit a fresh verdict.
"""

from __future__ import annotations

import bisect
import collections
import dataclasses
import enum
from collections.abc import Iterator

from ionotrail.terminal.delivery.rangeset import ByteRange, RangeSet
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import (
    DEFAULT_LIMITS,
    FRAGMENT_OVERHEAD_BYTES,
    MESSAGE_ID_BITS,
    OUTCOMES_KEPT,
    Limits,
)
from ionotrail.terminal.wire.codec import seal_message
from ionotrail.terminal.wire.frames import AckBlock, Fragment

FRAGMENT_OVERHEAD = FRAGMENT_OVERHEAD_BYTES
_checked_already = tuple.__new__  # a frame from values known to keep its rules (as wire/fastpath.py decodes)


class Priority(enum.IntEnum):
    """Lower values are served first."""

    ALARM = 0
    ROUTINE = 1


@dataclasses.dataclass(frozen=True, slots=True)
class MessageAcknowledged:
    """The receiver reported the message complete: it was delivered."""

    message_id: int
    created: float
    acknowledged: float


@dataclasses.dataclass(frozen=True, slots=True)
class MessageRefused:
    """The receiver will never deliver the message; it is dropped."""

    message_id: int
    created: float
    refused: float


SenderEvent = MessageAcknowledged | MessageRefused
_ALARM = Priority.ALARM  # read per fragment; a member read off its class is ~70 ns on Python 3.11


@dataclasses.dataclass(slots=True)
class _Outgoing:
    seq: int  # unwrapped id; the wire carries the low 16 bits
    sealed: bytes
    priority: Priority
    created: float
    acked: RangeSet = dataclasses.field(default_factory=RangeSet)
    sent: RangeSet = dataclasses.field(default_factory=RangeSet)  # since it was last acknowledged
    # Pieces sent by next_fragment and not yet confirmed, as (end of airtime, start, end),
    # in airtime order; at most Limits.max_unconfirmed_pieces (a piece resent after an
    # acknowledgement forgot it may overlap an older one; that costs airtime only).
    in_flight: list[tuple[float, int, int]] = dataclasses.field(default_factory=list)
    last_ack: AckBlock | None = None  # the block last applied (probes repeat it)
    on_air: bool = False  # a fragment of it was ever sent (the receiver may hold some of it)
    # Fixed at creation, as seq, priority and created are.
    wire_id: int = dataclasses.field(init=False)  # the low 16 bits of seq
    order: tuple[Priority, float, int] = dataclasses.field(init=False)  # most important first

    def __post_init__(self) -> None:
        self.wire_id = self.seq & ((1 << MESSAGE_ID_BITS) - 1)
        self.order = (self.priority, self.created, self.seq)


def _order(message: _Outgoing) -> tuple[Priority, float, int]:
    return message.order


@dataclasses.dataclass(slots=True)
class SenderCounters:
    queued: int = 0
    acknowledged: int = 0
    refused: int = 0
    fragments: int = 0
    payload_bytes: int = 0
    air_bytes: int = 0
    solicitations: int = 0
    stray_acks: int = 0
    presumed_lost_bytes: int = 0


class Sender:
    """Outgoing messages of one stream (one terminal to one master, or the reverse)."""

    def __init__(
        self,
        terminal: int,
        master: int,
        *,
        downlink: bool = False,
        limits: Limits = DEFAULT_LIMITS,
        first_id: int = 0,
    ) -> None:
        # Validate the addresses once, through the frame constructor.
        Fragment(terminal, master, 0, 0, b"\x00", downlink=downlink)
        self.terminal, self.master, self.downlink = terminal, master, downlink
        self._downlink = bool(downlink)  # as the constructor stores it
        self.limits = limits
        self.counters = SenderCounters()
        self.frame_overhead = FRAGMENT_OVERHEAD
        """Bytes a frame adds to the payload it carries: what the airtimes, the
        budget of :meth:`fill`, ``air_bytes`` and the outcomes reckon with.  A link
        that sends tagged fragments sets the tagged frame's overhead."""
        self._next_seq = first_id
        self._queue: dict[int, _Outgoing] = {}  # by unwrapped id, in id order
        # The same messages by 16-bit id: unique, because queued ids span at most
        # max_queued_messages + duplicate_window - 2 < 2^16 (both limits are below 2^15).
        self._by_wire_id: dict[int, _Outgoing] = {}
        self._eligible_now: list[_Outgoing] | None = None
        self._hold_routine = False
        # The selection of _choose, kept until something it reads changes: the queue, or
        # any message's acked, sent or in_flight.  Every method that changes one of them
        # calls _changed() (tests/test_sender.py checks it against the selection made afresh).
        self._selection: tuple[_Outgoing, int, int] | None = None  # (message, start, bytes up to the next sent or held one)
        self._selection_known = False
        # The messages with a piece in flight, by unwrapped id: what presume_lost visits.
        self._flying: dict[int, _Outgoing] = {}
        self.durable_version = 0
        """Bumped whenever what a durable outbox keeps of the queue changes: a
        message queued, restored, finished or dropped, or its acknowledged ranges
        replaced (:class:`~ionotrail.terminal.outbox.outbox.Outbox` compares it)."""
        self.outcomes: collections.deque[tuple[int, bool]] = collections.deque(maxlen=OUTCOMES_KEPT)
        """(frame bytes, lost) of each settled piece from :meth:`next_fragment`,
        newest last, for a fragment policy that learns from them; the link drains it."""

    # --- the application's side ------------------------------------------------

    def can_queue(self) -> bool:
        return len(self._queue) < self.limits.max_queued_messages

    def queue(self, payload: bytes, now: float, priority: Priority = Priority.ROUTINE) -> int:
        """Queue a message; returns its 16-bit message id."""
        if len(payload) > self.limits.max_message_payload:
            raise UsageError(f"message of {len(payload)} bytes exceeds this link's {self.limits.max_message_payload}-byte limit")
        if not payload:
            raise UsageError("a message carries at least one byte")
        if not self.can_queue():
            raise UsageError(f"sender already holds {self.limits.max_queued_messages} messages; check can_queue() first")
        message = _Outgoing(self._next_seq, seal_message(payload), Priority(priority), now)
        self._queue[message.seq] = message
        self._by_wire_id[message.wire_id] = message
        self._eligible_now = None
        self._changed()
        self._next_seq += 1
        self.counters.queued += 1
        self.durable_version += 1
        return message.wire_id

    def resume(
        self, next_seq: int, messages: list[tuple[int, bytes, Priority, float, tuple[tuple[int, int], ...]]]
    ) -> None:
        """Take up the queue a durable outbox kept across a reboot: each message as
        (unwrapped id, sealed bytes, priority, creation time, ranges the receiver
        acknowledged), and the unwrapped id to give the next message queued.  Only
        an empty sender that has queued nothing may resume.  Restored messages
        count as on the air: the receiver may hold part of them."""
        if self._queue or self._next_seq != 0 or self.counters.queued:
            raise UsageError("only a sender that has queued nothing can resume a kept queue")
        if len(messages) > self.limits.max_queued_messages:
            raise UsageError(f"{len(messages)} kept messages exceed the queue's {self.limits.max_queued_messages}")
        for seq, sealed, priority, created, acked in sorted(messages, key=lambda m: m[0]):
            if not 0 <= seq < next_seq:
                raise UsageError(f"kept message {seq} is not below the next id {next_seq}")
            if not 0 < len(sealed) <= self.limits.max_sealed_message:
                raise UsageError(f"kept message {seq} has {len(sealed)} sealed bytes")
            message = _Outgoing(seq, sealed, Priority(priority), created, on_air=True)
            for start, end in acked:
                if not 0 <= start < end <= len(sealed):
                    raise UsageError(
                        f"kept message {seq}: acknowledged range {start}-{end} outside its {len(sealed)} bytes"
                    )
                message.acked.add(start, end)
            self._queue[seq] = message
            self._by_wire_id[message.wire_id] = message
        self._next_seq = next_seq
        self._eligible_now = None
        self._changed()
        self.durable_version += 1

    def kept(self) -> dict[int, tuple[Priority, float, tuple[tuple[int, int], ...]]]:
        """What a durable outbox keeps of each pending message besides its bytes:
        unwrapped id -> (priority, creation time, ranges acknowledged)."""
        return {seq: (m.priority, m.created, m.acked.ranges()) for seq, m in self._queue.items()}

    def sealed(self, seq: int) -> bytes:
        """The sealed bytes of pending message ``seq`` (unwrapped id)."""
        return self._queue[seq].sealed

    @property
    def next_seq(self) -> int:
        """The unwrapped id the next queued message will get."""
        return self._next_seq

    @property
    def pending(self) -> int:
        """Messages queued and not yet acknowledged or refused."""
        return len(self._queue)

    @property
    def hold_routine(self) -> bool:
        """While True, routine messages not yet begun stay queued but are not sent
        (the power scheduler defers them); alarms go as before, and so does a
        routine message already on the air (finishing it keeps its id moving
        out of the receiver's window)."""
        return self._hold_routine

    @hold_routine.setter
    def hold_routine(self, hold: bool) -> None:
        if bool(hold) is not self._hold_routine:
            self._hold_routine = bool(hold)
            self._eligible_now = None
            self._changed()

    @property
    def sendable(self) -> int:
        """Pending messages that may be sent now (all of them unless routine traffic is held)."""
        if not self._hold_routine:
            return len(self._queue)
        return sum(1 for m in self._queue.values() if not self._held(m))

    def _held(self, message: _Outgoing) -> bool:
        return self._hold_routine and message.priority is not _ALARM and not message.on_air

    def _drop(self, message: _Outgoing) -> tuple[int, float]:
        del self._queue[message.seq], self._by_wire_id[message.wire_id]
        self._flying.pop(message.seq, None)
        self.durable_version += 1
        self._eligible_now = None
        self._changed()
        return message.wire_id, message.created

    def evict_for(self, priority: Priority) -> tuple[int, float] | None:
        """Make room for a message of ``priority`` in a full queue: drop the
        oldest less important message none of which ever went on the air (so the
        receiver holds nothing of it and cannot deliver it; the oldest, because it
        is the stalest and holds the id window back).  Returns its (message id,
        creation time), or None when there is none to drop."""
        for message in self._queue.values():
            if message.priority > priority and not message.on_air:
                return self._drop(message)
        return None

    def clear_the_window(self) -> list[tuple[int, float]]:
        """While routine traffic is held, drop held routine messages (never on
        the air) at the head of the queue that keep a waiting message outside the
        duplicate window: only ids within ``duplicate_window`` of the oldest
        pending one may be sent, and a held message would otherwise hold every
        alarm behind it for as long as the hold lasts.  Sent later, such a message
        would be older than the receiver's window and refused anyway.  Returns
        the (message id, creation time) of each dropped."""
        dropped: list[tuple[int, float]] = []
        span = self.limits.duplicate_window
        while self._hold_routine and self._queue:
            oldest = next(iter(self._queue.values()))
            if not self._held(oldest) or not any(m.seq - oldest.seq >= span and not self._held(m) for m in self._queue.values()):
                break
            dropped.append(self._drop(oldest))
        return dropped

    def queue_view(self) -> tuple[int, int, float | None, float | None]:
        """(alarms, routine, creation time of the oldest alarm, of the oldest routine message)."""
        alarms = routine = 0
        oldest_alarm: float | None = None
        oldest_routine: float | None = None
        for m in self._queue.values():
            if m.priority is _ALARM:
                alarms += 1
                oldest_alarm = m.created if oldest_alarm is None else min(oldest_alarm, m.created)
            else:
                routine += 1
                oldest_routine = m.created if oldest_routine is None else min(oldest_routine, m.created)
        return alarms, routine, oldest_alarm, oldest_routine

    def outstanding(self) -> list[tuple[int, int, tuple[tuple[int, int], ...], tuple[tuple[int, int], ...]]]:
        """(message id, sealed size, ranges acknowledged, ranges sent unconfirmed) per
        pending message, oldest first: for reports and test diagnostics."""
        return [(m.wire_id, len(m.sealed), m.acked.ranges(), m.sent.ranges()) for m in self._queue.values()]

    @property
    def awaiting(self) -> bool:
        """True while a piece from :meth:`next_fragment` awaits confirmation."""
        return bool(self._flying)

    @property
    def next_id(self) -> int:
        """The 16-bit id the next queued message will get (to store durably)."""
        return self._next_seq & ((1 << MESSAGE_ID_BITS) - 1)

    # --- the link's side ---------------------------------------------------------

    def _eligible(self) -> list[_Outgoing]:
        """Messages that may be sent now, most important first.

        Two bounds keep the receiver able to follow.  Only ids within
        ``duplicate_window`` of the oldest unfinished one may be in flight, so
        every retransmission stays inside the receiver's completed-id window.
        And only the first ``max_partials_per_source`` messages in order are
        worked on at once, the number of half-built messages the receiver
        keeps for one source: sending more would make it evict one and undo
        the work of earlier openings.
        """
        if self._eligible_now is None:  # recomputed only when the queue changes
            ready: list[_Outgoing] = []
            if self._queue:
                oldest = next(iter(self._queue))
                span = self.limits.duplicate_window
                ready = [m for m in self._queue.values() if m.seq - oldest < span and not self._held(m)]
                ready.sort(key=_order)
            self._eligible_now = ready[: self.limits.max_partials_per_source]
        return self._eligible_now

    def fill(self, budget: int, now: float) -> list[Fragment]:
        """Fragments for an opening that can carry ``budget`` bytes of frames.

        A loop over :meth:`next_fragment`, each fragment as large as the rest
        of the budget allows; there is no other selection.  Bytes never sent
        go first; once none remain, pieces sent before ``now`` and still
        unconfirmed are presumed lost (:meth:`presume_lost`) and go again.  A
        budget of ``frame_overhead`` bytes or less sends nothing.
        """
        fragments: list[Fragment] = []
        presumed = False
        overhead = self.frame_overhead
        while budget > overhead:
            fragment = self.next_fragment(budget - overhead, now)
            if fragment is None:
                if presumed:
                    break
                self.presume_lost(now)
                presumed = True
                continue
            fragments.append(fragment)
            budget -= len(fragment.payload) + overhead
        return fragments

    def _changed(self) -> None:
        """The queue or a message's acked, sent or in_flight changed: the next
        :meth:`_choose` selects afresh."""
        self._selection_known = False

    def _fragment(self, message: _Outgoing, start: int, take: int) -> Fragment:
        message.on_air = True
        message.sent.add(start, start + take)
        self._changed()
        self.counters.payload_bytes += take
        self.counters.air_bytes += take + self.frame_overhead
        # Built without Fragment's checks, which every value here keeps: the addresses
        # passed them in __init__, the id is 16 bits, and 1 to max_fragment_payload bytes
        # (at most MAX_FRAGMENT_PAYLOAD) lie inside a sealed message of at most
        # max_sealed_message bytes (at most MAX_MESSAGE_STREAM): Limits checks both bounds.
        # tests/test_sender.py compares every fragment with the checked constructor's.
        return _checked_already(
            Fragment,
            (
                self.terminal,
                self.master,
                message.wire_id,
                start,
                message.sealed[start : start + take],
                start + take == len(message.sealed),  # final
                message.priority is _ALARM,  # urgent
                self._downlink,
            ),
        )

    # --- one fragment at a time, for a burst with acknowledgements flowing back ------

    def next_fragment(self, max_payload: int, now: float, seconds_per_byte: float = 0.0) -> Fragment | None:
        """The next fragment of a burst, carrying at most ``max_payload`` bytes, or
        None when every eligible byte is sent and awaits its acknowledgement.

        Bytes never sent (or presumed lost) go first, most important message
        first; a message whose bytes are all held but not reported complete
        gets one final one-byte fragment to solicit the verdict.  The fragment
        leaves the antenna at ``now`` plus its frame bytes times
        ``seconds_per_byte``: an acknowledgement issued after that which does
        not show its bytes proves them lost (see :meth:`on_ack`).
        """
        if max_payload < 1:
            raise UsageError(f"max_payload must be at least 1 byte, not {max_payload}")
        choice = self._choose(min(max_payload, self.limits.max_fragment_payload))
        if choice is None:
            return None
        message, start, take = choice
        fragment = self._track(message, start, take, now + (take + self.frame_overhead) * seconds_per_byte)
        if start + take == len(message.sealed) and message.acked.contains(start, start + take):
            # A solicitation: the byte is already acknowledged, so it is not "sent,
            # unconfirmed", or a later acknowledgement that forgets it would leave it
            # never sent again.
            self.counters.solicitations += 1
            message.sent.discard(start, start + take)
            self._changed()
        return fragment

    def can_send(self) -> bool:
        """Whether :meth:`next_fragment` would give a fragment now (changes nothing)."""
        return self._choose(1) is not None

    def _choose(self, take_most: int) -> tuple[_Outgoing, int, int] | None:
        """The selection, without side effects: (message, start, length) of the
        next fragment, or None.  Bytes owed and not in flight go first, most
        important message first; then the one-byte solicitation of a message
        whose every byte is held but whose verdict has not come.

        The link asks twice per fragment (can_send, then next_fragment), so the
        selection is kept until the sender's state changes (:meth:`_changed`);
        only its length depends on ``take_most``."""
        if not self._selection_known:
            self._selection = self._select()
            self._selection_known = True
        selection = self._selection
        if selection is None:
            return None
        message, start, run = selection
        return message, start, min(run, take_most)

    def _select(self) -> tuple[_Outgoing, int, int] | None:
        """What :meth:`_choose` selects, with the longest the fragment could be."""
        eligible = self._eligible()
        for message in eligible:
            # The first byte neither acknowledged nor sent, as _owed() and sent.gaps()
            # would give it: the first of sent's gaps in the first owed range that has one.
            size = len(message.sealed)
            acked, sent = message.acked, message.sent
            owed = acked.first_gap(0, size)
            while owed is not None:
                gap = sent.first_gap(owed[0], owed[1])
                if gap is not None:
                    return message, gap[0], gap[1] - gap[0]
                owed = acked.first_gap(owed[1], size)
        for message in eligible:
            size = len(message.sealed)
            if message.acked.contains(0, size) and not message.in_flight:
                return message, size - 1, 1
        return None

    def _track(self, message: _Outgoing, start: int, take: int, air_end: float) -> Fragment:
        fragment = self._fragment(message, start, take)
        self.counters.fragments += 1
        bisect.insort(message.in_flight, (air_end, start, start + take))  # kept in airtime order
        self._flying[message.seq] = message
        excess = len(message.in_flight) - self.limits.max_unconfirmed_pieces
        if excess > 0:  # the oldest count as lost: nothing waits unboundedly for a verdict
            # By position, not by airtime: pieces of one instant (a zero airtime)
            # would otherwise all settle at once.
            oldest = message.in_flight[:excess]
            message.in_flight = message.in_flight[excess:]
            self._settle_pieces(message, oldest)
        return fragment

    def _owed(self, message: _Outgoing) -> Iterator[ByteRange]:
        """The parts of a message the receiver has not acknowledged as held."""
        return message.acked.gaps(0, len(message.sealed))

    def presume_lost(self, sent_before: float) -> None:
        """Treat every unconfirmed piece whose airtime ended before ``sent_before``
        as lost, so :meth:`next_fragment` sends it again.  The link calls this
        when a new burst starts: an earlier burst's unconfirmed tail most
        likely died with its trail, and the acknowledgement that would say
        otherwise may never come."""
        # Only messages with a piece in flight can have one to settle; in id order, as
        # the queue holds them, so the outcomes keep their order.
        for seq in sorted(self._flying):
            message = self._flying[seq]
            in_flight = message.in_flight
            if in_flight[0][0] < sent_before:
                # In airtime order, the pieces that ended before sent_before come first:
                # (air_end, start, end) < (sent_before,) exactly when air_end < sent_before.
                due = bisect.bisect_left(in_flight, (sent_before,))
                self._settle(message, in_flight[:due], in_flight[due:])

    def _settle(self, message: _Outgoing, settled: list[tuple[float, int, int]], kept: list[tuple[float, int, int]]) -> None:
        """Settle the in-flight pieces ``settled``, whose fate is known, keeping
        ``kept`` (the rest, in order) in flight: held ones are confirmed, the
        others lost (their bytes become unsent again)."""
        message.in_flight = kept
        if not kept:
            self._flying.pop(message.seq, None)
        self._settle_pieces(message, settled)

    def _settle_pieces(self, message: _Outgoing, pieces: list[tuple[float, int, int]]) -> None:
        """Confirm or declare lost ``pieces``, already removed from ``in_flight``."""
        self._changed()
        acked = message.acked
        for _, start, end in pieces:
            lost = 0
            if not acked.contains(start, end):
                for gap_start, gap_end in acked.gaps(start, end):  # not held: lost
                    message.sent.discard(gap_start, gap_end)
                    lost += gap_end - gap_start
            self.counters.presumed_lost_bytes += lost
            self.outcomes.append((end - start + self.frame_overhead, lost > 0))

    def count_stray_acks(self, count: int) -> None:
        """``count`` acknowledgements arrived for messages no longer held: what
        :meth:`on_ack` counts for each, when a caller accounts for them in bulk."""
        if count < 0:
            raise UsageError(f"a count of acknowledgements cannot be negative ({count})")
        if self._queue:
            raise UsageError("acknowledgements counted as stray while messages are held")
        self.counters.stray_acks += count

    def on_ack(self, block: AckBlock, now: float, issued: float | None = None) -> list[SenderEvent]:
        """Apply an acknowledgement from the receiver; returns what finished.

        ``issued``, when known, is when the receiver sent it: a piece from
        :meth:`next_fragment` whose airtime ended before then and whose bytes
        the acknowledgement does not show was lost, and becomes unsent again.
        """
        self._changed()  # whatever it changes below (and a subclass after it)
        if block.terminal != self.terminal or block.downlink != self.downlink:
            self.counters.stray_acks += 1
            return []
        message = self._find(block.message_id)
        if message is None:  # late copy for a message already finished
            self.counters.stray_acks += 1
            return []
        if block.complete:
            overhead = self.frame_overhead
            self.outcomes.extend((end - start + overhead, False) for _, start, end in message.in_flight)
            del self._queue[message.seq], self._by_wire_id[message.wire_id]
            self._flying.pop(message.seq, None)
            self._eligible_now = None
            self.durable_version += 1
            self.counters.acknowledged += 1
            return [MessageAcknowledged(message.wire_id, message.created, now)]
        if block.refused:
            del self._queue[message.seq], self._by_wire_id[message.wire_id]
            self._flying.pop(message.seq, None)
            self._eligible_now = None
            self.durable_version += 1
            self.counters.refused += 1
            return [MessageRefused(message.wire_id, message.created, now)]
        if block != message.last_ack:
            size = len(message.sealed)
            acked, sent = RangeSet(), message.sent
            for start, end in block.ranges:
                if start < size:
                    end = min(end, size)
                    acked.add(start, end)
                    sent.discard(start, end)  # acknowledged bytes are no longer "sent, unconfirmed"
            if acked != message.acked:
                self.durable_version += 1
            message.acked = acked
            message.last_ack = block
        elif not message.in_flight or (issued is not None and message.in_flight[0][0] > issued):
            return []  # a repeat, and nothing it could settle
        # Known now: pieces the acknowledgement shows held, and pieces whose airtime
        # ended by the time it was issued (held or not, it has said).
        acked = message.acked
        settled: list[tuple[float, int, int]] = []
        kept: list[tuple[float, int, int]] = []
        for piece in message.in_flight:
            if (issued is not None and piece[0] <= issued) or acked.contains(piece[1], piece[2]):
                settled.append(piece)
            else:
                kept.append(piece)
        self._settle(message, settled, kept)
        return []

    def _find(self, wire_id: int) -> _Outgoing | None:
        return self._by_wire_id.get(wire_id)
