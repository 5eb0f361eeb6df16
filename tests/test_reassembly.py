"""Corner cases of fragmentation, reassembly and exactly-once delivery."""

from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from ionotrail.harness.testing.faults import FaultSchedule
from ionotrail.harness.testing.pair import MASTER, TERMINAL, LinkPair
from ionotrail.harness.testing.strategies import fault_schedules, workloads
from ionotrail.terminal.delivery.reassembly import Reassembler, _Partial
from ionotrail.terminal.delivery.sender import FRAGMENT_OVERHEAD, MessageAcknowledged, MessageRefused, Priority, Sender
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, MAX_ACK_RANGES, Limits
from ionotrail.terminal.wire import AckBlock, Fragment, seal_message

SOURCE = (False, TERMINAL, MASTER)


def _fragment(message_id: int, offset: int, payload: bytes, final: bool = False, terminal: int = TERMINAL) -> Fragment:
    return Fragment(terminal, MASTER, message_id, offset, payload, final=final)


# --- sizes and budgets -------------------------------------------------------------------


@pytest.mark.parametrize("size", [1, DEFAULT_LIMITS.max_message_payload])
def test_smallest_and_largest_message(size: int) -> None:
    pair = LinkPair(FaultSchedule(budgets=(300,)))
    payload = bytes(i % 251 for i in range(size))
    pair.queue(payload)
    assert pair.run_until_done(max_openings=100)
    assert [d.payload for d in pair.deliveries] == [payload]


def test_message_over_the_limit_is_refused_at_the_door() -> None:
    sender = Sender(TERMINAL, MASTER)
    with pytest.raises(UsageError, match="4096-byte limit"):
        sender.queue(bytes(4097), 0.0)
    with pytest.raises(UsageError):
        sender.queue(b"", 0.0)


def test_queue_is_bounded() -> None:
    sender = Sender(TERMINAL, MASTER, limits=Limits(max_queued_messages=2))
    sender.queue(b"a", 0.0)
    sender.queue(b"b", 0.0)
    assert not sender.can_queue()
    with pytest.raises(UsageError, match="can_queue"):
        sender.queue(b"c", 0.0)


def test_budget_smaller_than_a_header_sends_nothing() -> None:
    sender = Sender(TERMINAL, MASTER)
    sender.queue(b"reading", 0.0)
    assert sender.fill(FRAGMENT_OVERHEAD, 0.0) == []
    assert sender.fill(3, 0.0) == []
    (one,) = sender.fill(FRAGMENT_OVERHEAD + 1, 0.0)
    assert len(one.payload) == 1 and one.offset == 0


def test_fragment_size_follows_each_opening_and_acknowledged_bytes_are_never_resent() -> None:
    sender = Sender(TERMINAL, MASTER)
    sender.queue(bytes(300), 0.0)  # sealed: 304 bytes
    first = sender.fill(40, 0.0)  # one fragment of 30 bytes
    assert [(f.offset, len(f.payload)) for f in first] == [(0, 30)]
    sender.on_ack(AckBlock(TERMINAL, first[0].message_id, ((0, 30),)), 1.0)
    second = sender.fill(500, 2.0)
    assert [(f.offset, len(f.payload)) for f in second] == [(30, 256), (286, 18)]
    assert second[-1].final


def test_fresh_bytes_go_before_retransmissions() -> None:
    sender = Sender(TERMINAL, MASTER)
    sender.queue(bytes(100), 0.0)  # sealed 104
    sender.fill(40, 0.0)  # sends [0, 30), not acknowledged
    nxt = sender.fill(60, 1.0)
    assert [(f.offset, len(f.payload)) for f in nxt] == [(30, 50)]
    rest = sender.fill(200, 2.0)
    assert [(f.offset, f.end) for f in rest] == [(80, 104), (0, 80)]  # fresh tail, then the oldest unconfirmed bytes


def test_alarms_go_first_then_oldest() -> None:
    sender = Sender(TERMINAL, MASTER)
    routine_old = sender.queue(b"r1", 0.0)
    routine_new = sender.queue(b"r2", 5.0)
    alarm = sender.queue(b"flood", 10.0, Priority.ALARM)
    order = [f.message_id for f in sender.fill(300, 11.0)]
    assert order == [alarm, routine_old, routine_new]
    assert sender.fill(300, 12.0)[0].urgent is True


def test_ids_in_flight_never_span_more_than_the_window() -> None:
    sender = Sender(TERMINAL, MASTER, limits=Limits(duplicate_window=4))
    ids = [sender.queue(b"x", 0.0) for _ in range(8)]
    assert sorted({f.message_id for f in sender.fill(1000, 0.0)}) == ids[:4]
    sender.on_ack(AckBlock(TERMINAL, ids[0], complete=True), 1.0)
    assert sorted({f.message_id for f in sender.fill(1000, 2.0)}) == ids[1:5]


def test_no_more_messages_in_progress_than_the_receiver_keeps() -> None:
    # Found by the thorough stateful run: working on more messages than the
    # receiver keeps half-built made it evict one per opening, and the sender,
    # resending only what the last acknowledgement lacked, never caught up.
    sender = Sender(TERMINAL, MASTER, limits=Limits(max_partials_per_source=2))
    ids = [sender.queue(bytes(100), float(i)) for i in range(5)]
    assert sorted({f.message_id for f in sender.fill(10_000, 10.0)}) == ids[:2]


def test_a_message_being_fed_is_not_evicted_for_a_stale_one() -> None:
    receiver = Reassembler(Limits(max_partials_per_source=2))
    receiver.receive(_fragment(1, 0, b"stale"), 0.0)
    receiver.receive(_fragment(2, 0, b"busy"), 1.0)
    receiver.receive(_fragment(1, 5, b"fed again"), 2.0)  # 1 is now the most recently fed
    receiver.receive(_fragment(3, 0, b"new"), 3.0)  # evicts 2, not 1
    assert receiver.held(SOURCE, 1) == ((0, 14),) and receiver.held(SOURCE, 2) == ()


def test_all_bytes_held_but_no_verdict_solicits_one() -> None:
    sender = Sender(TERMINAL, MASTER)
    wire_id = sender.queue(b"abc", 0.0)  # sealed: 7 bytes
    sender.fill(100, 0.0)
    sender.on_ack(AckBlock(TERMINAL, wire_id, ((0, 7),)), 1.0)  # held, but the CRC-32C check failed at the master
    (poke,) = sender.fill(100, 2.0)
    assert (poke.offset, poke.payload, poke.final) == (6, seal_message(b"abc")[6:], True)
    assert sender.counters.solicitations == 1


# --- identifiers ---------------------------------------------------------------------------


def test_id_wrap_around_delivers_every_message_once() -> None:
    pair = LinkPair(FaultSchedule(loss=0.2, duplicate=0.2, reorder=0.5, budgets=(60, 200)), seed=5, first_id=65530)
    payloads = [f"report {i}".encode() * 5 for i in range(20)]
    for p in payloads:
        pair.queue(p)
    assert pair.run_until_done(max_openings=2000)
    assert sorted(d.payload for d in pair.deliveries) == sorted(payloads)
    assert {d.message_id for d in pair.deliveries} >= {65535, 0, 1}


def test_ids_unwrap_against_the_window_at_completion_not_at_first_fragment() -> None:
    # Found by the thorough stateful run: message 65535 starts while the source
    # is unknown, message 0 completes first, then 65535 completes.  Unwrapping
    # 65535 at its first fragment would put it 65535 ids ahead of message 0 and
    # make the window forget 0, so a copy of 0 was delivered again.
    receiver = Reassembler()
    sealed_a, sealed_b = seal_message(b"first"), seal_message(b"second")
    receiver.receive(_fragment(65535, 0, sealed_a[:3]), 0.0)
    assert receiver.receive(_fragment(0, 0, sealed_b, final=True), 1.0).delivery
    assert receiver.receive(_fragment(65535, 3, sealed_a[3:], final=True), 2.0).delivery
    again = receiver.receive(_fragment(0, 0, sealed_b, final=True), 3.0)
    assert again.delivery is None and again.ack.complete
    assert receiver.receive(_fragment(65535, 0, sealed_a, final=True), 4.0).delivery is None


def test_completing_behind_the_window_keeps_the_bitmap_bounded() -> None:
    from ionotrail.terminal.delivery.duplicates import CompletedWindow

    window = CompletedWindow(64, top=10_000, bitmap=1)
    window.complete(10_000 - 5_000)
    assert window.bitmap.bit_length() <= 64


def test_retransmission_after_the_window_moved_on_is_refused_not_delivered() -> None:
    # Documented behaviour: an id more than duplicate_window behind the newest
    # completed id cannot be told from a delivered message, so the receiver
    # refuses it (acknowledgement with the refused flag) and never delivers it.
    receiver = Reassembler(Limits(duplicate_window=32))
    for wire_id in range(1, 101):
        assert receiver.receive(_fragment(wire_id, 0, seal_message(b"m"), final=True), 0.0).delivery
    late = receiver.receive(_fragment(50, 0, seal_message(b"m"), final=True), 1.0)
    assert late.delivery is None and late.ack.refused
    assert receiver.counters.stale_fragments == 1
    recent = receiver.receive(_fragment(90, 0, seal_message(b"m"), final=True), 1.0)
    assert recent.delivery is None and recent.ack.complete  # inside the window: a duplicate
    sender = Sender(TERMINAL, MASTER)
    wire_id = sender.queue(b"m", 0.0)
    assert sender.on_ack(AckBlock(TERMINAL, wire_id, refused=True), 2.0) == [MessageRefused(wire_id, 0.0, 2.0)]
    assert sender.pending == 0


def test_lost_complete_ack_is_acknowledged_again_not_delivered_again() -> None:
    receiver = Reassembler()
    sealed = seal_message(b"stage=1.84m")
    first = receiver.receive(_fragment(9, 0, sealed, final=True), 0.0)
    again = receiver.receive(_fragment(9, 0, sealed, final=True), 600.0)
    assert first.delivery is not None and again.delivery is None
    assert again.ack.complete and receiver.counters.duplicate_fragments == 1


def test_window_state_restored_after_reboot_still_rejects() -> None:
    before = Reassembler()
    sealed = seal_message(b"x")
    before.receive(_fragment(3, 0, sealed, final=True), 0.0)
    after = Reassembler()
    after.completed.restore(before.completed.snapshot())
    assert after.receive(_fragment(3, 0, sealed, final=True), 1.0).delivery is None


def test_streams_are_keyed_by_both_addresses() -> None:
    # Found in review: keyed by the sender alone, message 0 from master 7 to
    # terminal 2 was taken for message 0 from master 7 to terminal 1, which was
    # then acknowledged complete and never delivered.
    receiver = Reassembler()
    down = [Fragment(terminal, MASTER, 0, 0, seal_message(f"to {terminal}".encode()), final=True, downlink=True) for terminal in (2, 1)]
    up = [Fragment(TERMINAL, master, 0, 0, seal_message(f"to {master}".encode()), final=True) for master in (7, 8)]
    delivered = [receiver.receive(f, 0.0).delivery for f in down + up]
    assert [d.payload if d else None for d in delivered] == [b"to 2", b"to 1", b"to 7", b"to 8"]


def test_memory_is_charged_for_bytes_held_not_for_the_offset_claimed() -> None:
    # Found in review: a one-byte fragment at offset 4099 reserved a 4 KiB buffer.
    receiver = Reassembler()
    for terminal in range(4):
        receiver.receive(_fragment(1, 4099, b"x", terminal=terminal), 0.0)
    assert receiver.buffered_bytes == 4
    genuine = seal_message(bytes(3000))
    for offset in range(0, 2048, 256):
        receiver.receive(_fragment(1, offset, genuine[offset : offset + 256], terminal=TERMINAL), 1.0)
    assert receiver.held(SOURCE, 1) == ((0, 2048),)
    assert receiver.buffered_bytes == 4 + 2048
    assert receiver.counters.evicted_bytes == 0


def test_duplicate_rejection_covers_at_most_max_duplicate_sources_streams() -> None:
    # Documented limit: a receiver remembers completed ids for max_duplicate_sources
    # streams; beyond that it forgets the least recently used one (counted), and a
    # late copy from that stream would be taken as new.  A master serving N
    # terminals sets max_duplicate_sources >= N.
    sealed = seal_message(b"r")
    small = Reassembler(Limits(max_duplicate_sources=4))
    for terminal in range(5):
        small.receive(_fragment(1, 0, sealed, final=True, terminal=terminal), 0.0)
    assert small.counters.windows_evicted == 1
    big = Reassembler(Limits(max_duplicate_sources=8))
    for terminal in range(5):
        big.receive(_fragment(1, 0, sealed, final=True, terminal=terminal), 0.0)
    assert big.receive(_fragment(1, 0, sealed, final=True, terminal=0), 1.0).delivery is None
    assert big.counters.windows_evicted == 0


# --- hostile fragments ---------------------------------------------------------------------


def test_identical_overlap_is_accepted() -> None:
    receiver = Reassembler()
    sealed = seal_message(bytes(range(40)))
    receiver.receive(_fragment(1, 0, sealed[:20]), 0.0)
    receiver.receive(_fragment(1, 10, sealed[10:30]), 0.0)
    receiver.receive(_fragment(1, 12, sealed[12:14]), 0.0)  # inside an earlier one
    done = receiver.receive(_fragment(1, 25, sealed[25:], final=True), 0.0)
    assert done.delivery is not None and done.delivery.payload == bytes(range(40))


def test_conflicting_overlap_abandons_the_message() -> None:
    # RFC 5722: overlapping fragments that disagree abandon the whole message.
    receiver = Reassembler()
    receiver.receive(_fragment(1, 0, b"A" * 20), 0.0)
    reception = receiver.receive(_fragment(1, 10, b"B" * 20), 0.0)
    assert reception.ack.ranges == () and receiver.partial_count == 0
    assert receiver.counters.abandoned_overlap == 1 and receiver.buffered_bytes == 0


def test_fragment_beyond_the_declared_end_abandons() -> None:
    receiver = Reassembler()
    receiver.receive(_fragment(1, 10, b"end", final=True), 0.0)
    receiver.receive(_fragment(1, 12, b"xyz"), 0.0)
    assert receiver.counters.abandoned_length == 1 and receiver.partial_count == 0


def test_two_different_ends_abandon() -> None:
    receiver = Reassembler()
    receiver.receive(_fragment(1, 10, b"abc", final=True), 0.0)
    receiver.receive(_fragment(1, 10, b"abcd", final=True), 0.0)
    assert receiver.counters.abandoned_length == 1


def test_final_fragment_before_held_bytes_abandons() -> None:
    receiver = Reassembler()
    receiver.receive(_fragment(1, 50, b"late"), 0.0)
    receiver.receive(_fragment(1, 0, b"early", final=True), 0.0)
    assert receiver.counters.abandoned_length == 1


def test_message_failing_its_crc32c_is_abandoned_then_resent_whole() -> None:
    pair = LinkPair()
    wire_id = pair.queue(b"river stage report")
    forged = bytearray(seal_message(b"river stage report"))
    forged[0] ^= 0xFF  # passes every frame CRC, fails the message CRC
    pair.receiver.receive(_fragment(wire_id, 0, bytes(forged), final=True), 0.0)
    assert pair.receiver.counters.abandoned_message_crc == 1
    assert pair.run_until_done(max_openings=10)
    assert [d.payload for d in pair.deliveries] == [b"river stage report"]


def test_message_larger_than_this_receiver_accepts_is_refused() -> None:
    receiver = Reassembler(Limits(max_message_payload=100, max_bytes_per_source=1024))
    reception = receiver.receive(_fragment(1, 200, b"x"), 0.0)
    assert reception.ack.refused and receiver.counters.too_long == 1 and receiver.buffered_bytes == 0


def test_hole_cap_drops_the_fragment_that_would_exceed_it() -> None:
    receiver = Reassembler()
    for i in range(MAX_ACK_RANGES + 3):
        reception = receiver.receive(_fragment(1, 10 * i, b"x"), 0.0)
    assert len(reception.ack.ranges) == MAX_ACK_RANGES
    assert receiver.counters.hole_cap_drops == 3
    receiver.receive(_fragment(1, 1, b"y"), 0.0)  # touching an island: merges, no new range
    assert receiver.held(SOURCE, 1)[0] == (0, 2)
    assert len(receiver.held(SOURCE, 1)) == MAX_ACK_RANGES and receiver.counters.hole_cap_drops == 3


def test_lifetime_runs_from_the_first_fragment() -> None:
    # RFC 8200 s4.5: the reassembly timer is not restarted by later fragments.
    limits = Limits(reassembly_lifetime=100.0)
    receiver = Reassembler(limits)
    receiver.receive(_fragment(1, 0, b"a"), 0.0)
    receiver.receive(_fragment(1, 1, b"b"), 99.0)
    assert receiver.next_deadline() == 100.0
    receiver.expire(100.0)
    assert receiver.partial_count == 0 and receiver.counters.expired == 1
    assert receiver.next_deadline() is None


def test_many_sources_cannot_exhaust_memory() -> None:
    limits = DEFAULT_LIMITS
    receiver = Reassembler(limits)
    for terminal in range(10_000):
        receiver.receive(_fragment(1, 0, bytes(256), terminal=terminal), float(terminal))
        assert receiver.buffered_bytes <= limits.max_bytes_total
        assert receiver.partial_count <= limits.max_partials_total
    assert receiver.counters.evicted_count + receiver.counters.evicted_bytes >= 10_000 - limits.max_partials_total


def test_one_source_cannot_take_more_than_its_share() -> None:
    limits = DEFAULT_LIMITS
    receiver = Reassembler(limits)
    for message_id in range(50):
        receiver.receive(_fragment(message_id, 4000, bytes(96)), 0.0)  # each claims a 4 KiB buffer
        assert receiver.buffered_bytes_of(SOURCE) <= limits.max_bytes_per_source
        assert receiver.partial_count_of(SOURCE) <= limits.max_partials_per_source


# --- end to end through faulty channels -----------------------------------------------------


@pytest.mark.property
@settings(max_examples=40)
@given(workloads(max_messages=8), fault_schedules(), st.integers(0, 2**32))
def test_fault_schedules_then_fair_channel_deliver_exactly_once(
    workload: list[tuple[bytes, Priority, float]], schedule: FaultSchedule, seed: int
) -> None:
    pair = LinkPair(schedule, seed=seed, limits=Limits(max_queued_messages=16))
    acknowledged: list[int] = []
    for payload, priority, arrival in workload:
        while pair.now < arrival / 100:  # compress the day: openings every 10 s
            pair.open_trail()
            pair.wait(10.0)
        pair.queue(payload, priority)
    for _ in range(50):  # the hostile phase
        pair.open_trail()
        pair.wait(10.0)
    # Fair: every frame arrives, and openings carry at least 54 payload bytes.
    # (Openings of 11 bytes move one byte each: a 4 KiB message would then
    # outlast the reassembly lifetime and restart forever, which is the
    # documented cost of a lifetime timed from the first fragment.)
    fair = FaultSchedule(budgets=tuple(max(b, 64) for b in schedule.budgets))
    pair.set_schedule(fair)
    assert pair.run_until_done(max_openings=2000)
    acknowledged = [e.message_id for e in pair.sender_events if isinstance(e, MessageAcknowledged)]
    assert sorted(d.payload for d in pair.deliveries) == sorted(p for p, _, _ in workload)
    assert len(acknowledged) == len(workload)


# --- the quick paths against the long way --------------------------------------------------


class LongWay(Reassembler):
    """The reference: the deadline found afresh, every partial message looked at
    on every expiry, overlaps and growth read through generators of ranges, as
    they were first written."""

    def next_deadline(self) -> float | None:
        if not self._partials:
            return None
        return min(p.first_fragment for p in self._partials.values()) + self.limits.reassembly_lifetime

    def expire(self, now: float) -> None:
        lifetime = self.limits.reassembly_lifetime
        for partial in [p for p in self._partials.values() if p.first_fragment + lifetime <= now]:
            self._drop(partial)
            self.counters.expired += 1

    def _consistent(self, partial: _Partial, fragment: Fragment) -> bool:
        if fragment.final:
            if partial.end is not None and partial.end != fragment.end:
                self.counters.abandoned_length += 1
                return False
            if partial.held.maximum() > fragment.end:
                self.counters.abandoned_length += 1
                return False
        elif partial.end is not None and fragment.end > partial.end:
            self.counters.abandoned_length += 1
            return False
        for start, end in partial.held.overlapping(fragment.offset, fragment.end):
            lo = start - fragment.offset
            if partial.read(start, end) != fragment.payload[lo : lo + end - start]:
                self.counters.abandoned_overlap += 1
                return False
        return True

    def _store(self, partial: _Partial, fragment: Fragment) -> bool:
        if partial.held.contains(fragment.offset, fragment.end):
            if fragment.final:
                partial.end = fragment.end
            return True
        if partial.held.ranges_after_add(fragment.offset, fragment.end) > self.limits.max_ranges_per_message:
            self.counters.hole_cap_drops += 1
            return False
        growth = sum(e - s for s, e in partial.held.gaps(fragment.offset, fragment.end))
        if not self._make_room(partial, growth):
            return False
        partial.write(fragment.offset, fragment.payload)
        self._account(partial.source, growth)
        if fragment.final:
            partial.end = fragment.end
        partial.urgent = partial.urgent or fragment.urgent
        return True


_pieces = st.lists(
    st.tuples(
        st.integers(0, 1),  # terminal
        st.integers(0, 4),  # message id
        st.integers(0, 90),  # offset
        st.integers(1, 30),  # length
        st.sampled_from(["true", "true", "true", "final", "forged"]),
        st.sampled_from([0.0, 0.5, 1.0, 2.5]),  # time since the last piece (lifetime 5 s: often due exactly)
        st.booleans(),  # expire explicitly first
    ),
    max_size=60,
)


@pytest.mark.property
@given(_pieces)
def test_quick_paths_give_what_the_long_way_gives(pieces: list[tuple[int, int, int, int, str, float, bool]]) -> None:
    """Overlaps, forged bytes, finals, caps, evictions and expiry: the receiver
    answers and holds exactly what the reference does, its kept deadline is
    always the one found afresh, and each held range has one chunk holding
    exactly the range's bytes."""
    limits = Limits(max_message_payload=100, max_bytes_per_source=150, max_bytes_total=200, max_partials_per_source=2,
                    max_partials_total=3, max_ranges_per_message=3, reassembly_lifetime=5.0)  # fmt: skip
    quick, long_way = Reassembler(limits), LongWay(limits)
    truth = {key: seal_message(bytes((7 * key[0] + 13 * key[1] + i) % 256 for i in range(60 + 9 * key[1]))) for key in ((t, m) for t in range(2) for m in range(5))}
    now = 0.0
    for terminal, message_id, offset, length, kind, wait, expire in pieces:
        now += wait
        sealed = truth[(terminal, message_id)]
        if kind == "final":
            offset = max(0, len(sealed) - length)
        payload = sealed[offset : offset + length] or b"\x00"
        if kind == "forged":
            payload = bytes(b ^ 0x55 for b in payload)
        final = kind == "final" or offset + len(payload) == len(sealed)
        fragment = Fragment(TERMINAL + terminal, MASTER, message_id, offset, payload, final=final)
        if expire:
            quick.expire(now)
            long_way.expire(now)
        assert quick.receive(fragment, now) == long_way.receive(fragment, now)
        assert quick.next_deadline() == long_way.next_deadline()
        assert quick.counters == long_way.counters
        assert quick.buffered_bytes == long_way.buffered_bytes
        assert list(quick.partials()) == list(long_way.partials())
        for key in quick.partials():
            held = quick.held(*key)
            assert held == long_way.held(*key)
            partial = quick._partials[key]
            assert sorted(partial.chunks) == [start for start, _ in held]
            for start, end in held:
                assert partial.chunks[start] == long_way._partials[key].chunks[start]
                assert len(partial.chunks[start]) == end - start


@pytest.mark.property
@given(st.lists(st.tuples(st.integers(0, 120), st.integers(1, 40)), max_size=25))
def test_a_partial_holds_one_chunk_per_range_with_exactly_its_bytes(writes: list[tuple[int, int]]) -> None:
    """Whatever order consistent bytes arrive in (extending a range at its end,
    bridging two, inside one, before one), every held range has one chunk,
    holding that range's bytes."""
    message = bytes((31 * i + 5) % 256 for i in range(200))
    partial = _Partial(SOURCE, 1, 0.0)
    for start, length in writes:
        partial.write(start, message[start : start + length])
        assert sorted(partial.chunks) == [s for s, _ in partial.held]
        for s, e in partial.held:
            assert partial.chunks[s] == message[s:e]
            assert partial.read(s, e) == message[s:e]
