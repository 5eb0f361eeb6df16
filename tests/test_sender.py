"""The sender's one-fragment-at-a-time interface, as the burst link drives it."""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.delivery.rangeset import RangeSet
from ionotrail.terminal.delivery.sender import FRAGMENT_OVERHEAD, Priority, Sender, _Outgoing
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.wire import AckBlock, Fragment

TERMINAL, MASTER = 0x0A31, 7


def test_alarms_jump_the_queue() -> None:
    sender = Sender(TERMINAL, MASTER)
    routine = sender.queue(b"r" * 300, 0.0)
    alarm = sender.queue(b"a" * 20, 1.0, Priority.ALARM)
    first = sender.next_fragment(64, 2.0)
    assert first is not None and first.message_id == alarm and first.urgent
    assert routine != alarm


def test_air_end_follows_the_real_frame_length() -> None:
    sender = Sender(TERMINAL, MASTER)
    sender.queue(b"x" * 20, 0.0)  # 24 sealed bytes: one short fragment
    fragment = sender.next_fragment(256, 10.0, 8 / 4800)
    assert fragment is not None and len(fragment.payload) == 24
    ends = next(iter(sender._queue.values())).in_flight
    assert ends[0][0] == 10.0 + (24 + FRAGMENT_OVERHEAD) * 8 / 4800
    # An acknowledgement issued 0.2 s later that does not show the bytes proves them lost.
    sender.on_ack(AckBlock(TERMINAL, fragment.message_id, ()), 10.3, issued=10.25)
    again = sender.next_fragment(256, 10.3, 8 / 4800)
    assert again is not None and again.offset == 0


def test_a_solicitation_never_strands_the_last_byte() -> None:
    """A receiver that reports everything held but not complete gets a one-byte
    solicitation; if it then forgets bytes, every one of them, the last
    included, must be sent again (it once stalled here)."""
    sender = Sender(TERMINAL, MASTER)
    message_id = sender.queue(b"m" * 60, 0.0)
    size = 64
    while sender.next_fragment(256, 0.0) is not None:
        pass
    everything = AckBlock(TERMINAL, message_id, ((0, size),))
    sender.on_ack(everything, 1.0, issued=1.0)
    solicit = sender.next_fragment(256, 1.0)
    assert solicit is not None and (solicit.offset, len(solicit.payload)) == (size - 1, 1)
    sender.on_ack(everything, 2.0, issued=2.0)  # repeated: the solicitation settles as held
    sender.on_ack(AckBlock(TERMINAL, message_id, ()), 3.0, issued=3.0)  # then the receiver forgets it all
    sent: set[int] = set()
    for round_ in range(3):
        while (fragment := sender.next_fragment(256, 4.0 + round_)) is not None:
            sent |= set(range(fragment.offset, fragment.end))
        if sent != set(range(size)):  # what it resent arrived, the rest is still owed
            sender.on_ack(AckBlock(TERMINAL, message_id, tuple(sorted({(0, max(sent) + 1)}))), 4.5 + round_, issued=4.5 + round_)
    assert sent == set(range(size))


def test_unconfirmed_pieces_are_bounded() -> None:
    sender = Sender(TERMINAL, MASTER, limits=Limits(max_unconfirmed_pieces=4))
    sender.queue(b"z" * 400, 0.0)
    for k in range(10):
        assert sender.next_fragment(16, float(k)) is not None
    (message,) = sender._queue.values()
    assert len(message.in_flight) == 4
    assert sender.counters.presumed_lost_bytes == 6 * 16


def test_the_bound_settles_only_its_excess_when_pieces_share_an_instant() -> None:
    # With no airtime given (seconds_per_byte 0) every piece ends at the same
    # instant; the bound must still count only the oldest piece as lost, not
    # every piece of that instant (common practice, no source: a bound drops
    # exactly what exceeds it).
    sender = Sender(TERMINAL, MASTER, limits=Limits(max_unconfirmed_pieces=4))
    sender.queue(b"z" * 400, 0.0)
    offsets = []
    for _ in range(5):
        fragment = sender.next_fragment(16, 0.0)
        assert fragment is not None
        offsets.append(fragment.offset)
    assert offsets == [0, 16, 32, 48, 64]
    (message,) = sender._queue.values()
    assert [(start, end) for _, start, end in message.in_flight] == [(16, 32), (32, 48), (48, 64), (64, 80)]
    assert sender.counters.presumed_lost_bytes == 16


@pytest.mark.property
@given(
    sizes=st.lists(st.integers(1, 600), min_size=1, max_size=5),
    budgets=st.lists(st.integers(0, 700), min_size=1, max_size=6),
    acked=st.lists(st.tuples(st.integers(0, 4), st.integers(0, 620), st.integers(0, 620)), max_size=6),
)
def test_fill_is_next_fragment_in_a_loop(
    sizes: list[int], budgets: list[int], acked: list[tuple[int, int, int]]
) -> None:
    """fill has no selection of its own: the same fragments come from calling
    next_fragment with the rest of the budget until it has nothing, presuming
    earlier pieces lost, and calling it again."""
    filled, looped = Sender(TERMINAL, MASTER), Sender(TERMINAL, MASTER)
    ids = [(filled.queue(bytes(n), 0.0), looped.queue(bytes(n), 0.0))[0] for n in sizes]
    for k, budget in enumerate(budgets):
        now = float(k)
        by_fill = filled.fill(budget, now)
        by_loop: list[Fragment] = []
        presumed = False
        while budget > FRAGMENT_OVERHEAD:
            fragment = looped.next_fragment(budget - FRAGMENT_OVERHEAD, now)
            if fragment is None:
                if presumed:
                    break
                looped.presume_lost(now)
                presumed = True
                continue
            by_loop.append(fragment)
            budget -= len(fragment.payload) + FRAGMENT_OVERHEAD
        assert by_fill == by_loop
        for which, start, end in acked[k:k + 1]:
            block = AckBlock(TERMINAL, ids[which % len(ids)], ((min(start, end), max(start, end) + 1),))
            assert filled.on_ack(block, now + 0.5, issued=now + 0.5) == looped.on_ack(block, now + 0.5, issued=now + 0.5)
    assert filled.outstanding() == looped.outstanding()
    assert filled.counters == looped.counters


# --- the kept selection against the selection made afresh ------------------------------


class Afresh(Sender):
    """The reference: the selection made afresh on every call, through the
    generators of ranges it was first written with, over every queued message
    when presuming pieces lost, and ``awaiting`` asked of every message."""

    def _eligible(self) -> list[_Outgoing]:
        queued = list(self._queue.values())
        if not queued:
            return []
        ready = [m for m in queued if m.seq - queued[0].seq < self.limits.duplicate_window]
        ready.sort(key=lambda m: (m.priority, m.created, m.seq))
        return ready[: self.limits.max_partials_per_source]

    def _choose(self, take_most: int) -> tuple[_Outgoing, int, int] | None:
        eligible = self._eligible()
        for message in eligible:
            for start, end in message.acked.gaps(0, len(message.sealed)):
                for gap_start, gap_end in message.sent.gaps(start, end):
                    return message, gap_start, min(gap_end - gap_start, take_most)
        for message in eligible:
            size = len(message.sealed)
            if message.acked.contains(0, size) and not message.in_flight:
                return message, size - 1, 1
        return None

    def presume_lost(self, sent_before: float) -> None:
        for message in list(self._queue.values()):
            if message.in_flight and message.in_flight[0][0] < sent_before:
                settled = [piece for piece in message.in_flight if piece[0] < sent_before]
                self._settle(message, settled, [piece for piece in message.in_flight if piece[0] >= sent_before])

    @property
    def awaiting(self) -> bool:
        return any(m.in_flight for m in self._queue.values())


def _as_checked(fragments: Fragment | list[Fragment] | None) -> Fragment | list[Fragment] | None:
    """The sender builds its fragments without the constructor's checks: each
    must be what the checked constructor makes of the same fields, type for type."""
    for fragment in fragments if isinstance(fragments, list) else [fragments]:
        if fragment is not None:
            checked = Fragment(*fragment)
            assert type(fragment) is Fragment and fragment == checked
            assert [type(field) for field in fragment] == [type(field) for field in checked]
    return fragments


def _selection(sender: Sender, take_most: int) -> tuple[int, int, int] | None:
    chosen = sender._choose(take_most)
    return None if chosen is None else (chosen[0].wire_id, chosen[1], chosen[2])


_steps = st.one_of(
    st.tuples(st.just("queue"), st.integers(1, 300), st.booleans()),
    st.tuples(st.just("next"), st.integers(1, 200), st.sampled_from([0.0, 8 / 4800])),
    st.tuples(st.just("ack"), st.integers(0, 7), st.lists(st.tuples(st.integers(0, 310), st.integers(1, 40)), max_size=5),
              st.sampled_from(["held", "complete", "refused", "stray"]), st.sampled_from([None, -1.0, 0.0, 1.0])),
    st.tuples(st.just("presume"), st.sampled_from([-1.0, 0.0, 0.5])),
    st.tuples(st.just("fill"), st.integers(0, 400)),
)  # fmt: skip


@pytest.mark.property
@given(
    steps=st.lists(_steps, min_size=10, max_size=80),
    limits=st.sampled_from([Limits(), Limits(max_partials_per_source=2, max_unconfirmed_pieces=3, max_queued_messages=6, duplicate_window=3, max_fragment_payload=40)]),
    downlink=st.booleans(),
)
def test_the_kept_selection_is_always_the_one_made_afresh(steps: list[tuple[Any, ...]], limits: Limits, downlink: bool) -> None:
    """Whatever the sender went through (queueing, fragments, fills, every kind of
    acknowledgement, presumed losses), the selection it kept is the one made
    afresh, at every step and for every length asked; the two senders give the
    same fragments, events and state throughout; and the messages it counts as
    having pieces in flight are exactly those that have some."""
    kept, afresh = Sender(TERMINAL, MASTER, limits=limits, downlink=downlink), Afresh(TERMINAL, MASTER, limits=limits, downlink=downlink)
    now = 0.0
    for step in steps:
        now += 0.25
        kind = step[0]
        if kind == "queue":
            _, size, alarm = step
            if kept.can_queue():
                priority = Priority.ALARM if alarm else Priority.ROUTINE
                assert kept.queue(bytes([size % 251]) * size, now, priority) == afresh.queue(bytes([size % 251]) * size, now, priority)
        elif kind == "next":
            _, most, per_byte = step
            assert _as_checked(kept.next_fragment(most, now, per_byte)) == afresh.next_fragment(most, now, per_byte)
        elif kind == "ack":
            _, which, spans, verdict, issued_offset = step
            ids = [wire_id for wire_id, *_ in kept.outstanding()]
            message_id = ids[which % len(ids)] if ids and verdict != "stray" else (kept.next_id + 1) & 0xFFFF
            held = RangeSet((start, start + length) for start, length in spans).ranges()[:15]
            block = AckBlock(TERMINAL, message_id, held if verdict in ("held", "stray") else (), verdict == "complete", downlink, verdict == "refused")
            issued = None if issued_offset is None else now + issued_offset
            assert kept.on_ack(block, now, issued=issued) == afresh.on_ack(block, now, issued=issued)
        elif kind == "presume":
            kept.presume_lost(now + step[1])
            afresh.presume_lost(now + step[1])
        else:
            assert _as_checked(kept.fill(step[1], now)) == afresh.fill(step[1], now)
        for take_most in (1, 7, 64, 256):
            assert _selection(kept, take_most) == _selection(afresh, take_most)
        assert kept.can_send() == afresh.can_send()
        assert kept.awaiting == afresh.awaiting
        assert kept._flying == {m.seq: m for m in kept._queue.values() if m.in_flight}
        assert kept.outstanding() == afresh.outstanding()
        assert list(kept.outcomes) == list(afresh.outcomes)
        assert kept.counters == afresh.counters
