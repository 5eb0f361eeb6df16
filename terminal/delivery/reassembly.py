"""The receiving side: rebuild messages from fragments, deliver each once.

Used by the master for uplink and by the terminal for downlink.  Partial
messages are keyed by their stream (direction, terminal, master) and message
id, and hold only the bytes received: one chunk per held range, so memory is
charged for bytes present, not for the span a fragment's offset claims.  A message completes when every byte
up to the end given by its final fragment is present *and* its CRC-32C
verifies; it is then delivered once and its id entered in the source's
completed-id window, so later copies are acknowledged again and dropped.

Hostile or broken input is contained, and every containment is counted:

* a fragment that disagrees with bytes already held, a fragment beyond the
  end a final fragment declared, or two different ends abandon the message
  (RFC 5722: no overlap is trusted unless it is identical);
* a fragment that would split the held bytes into more ranges than an
  acknowledgement can describe is dropped (the sender will send it again);
* the count and byte caps per source and in total are checked on every
  fragment; over a cap, the partial message that has gone longest without a
  fragment is evicted first (for a message nobody is completing, that is
  the oldest), so a message being worked on is not evicted by a stale one;
* a partial message dies ``reassembly_lifetime`` after its first fragment.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator

from ionotrail.terminal.delivery.duplicates import DuplicateFilter, Verdict
from ionotrail.terminal.delivery.rangeset import RangeSet
from ionotrail.terminal.errors import DecodeError, UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.wire.codec import unseal_message
from ionotrail.terminal.wire.frames import AckBlock, Fragment

# Held as module globals: a member read off its class costs ~70 ns on Python 3.11
# (EnumType's __getattr__), and two are read per fragment received.
_DUPLICATE, _STALE = Verdict.DUPLICATE, Verdict.STALE

Source = tuple[bool, int, int]
"""A message stream: (downlink, terminal, master).  Ids are per stream, so both
addresses belong in the key: one master's downlink ids to two terminals, or
one terminal's uplink ids to two masters, are different messages."""


@dataclasses.dataclass(frozen=True, slots=True)
class Delivery:
    """A message delivered to the application, exactly once."""

    downlink: bool
    terminal: int
    master: int
    message_id: int
    payload: bytes
    urgent: bool
    first_fragment: float
    completed: float


@dataclasses.dataclass(frozen=True, slots=True)
class Reception:
    """What one received fragment produced: the acknowledgement to send back
    (it always describes the receiver's whole state for that message) and,
    when the fragment completed a message, its delivery."""

    ack: AckBlock
    delivery: Delivery | None = None


@dataclasses.dataclass(slots=True)
class ReassemblyCounters:
    """Every outcome, for reports; names are stable."""

    fragments: int = 0
    delivered: int = 0
    duplicate_fragments: int = 0
    stale_fragments: int = 0
    too_long: int = 0
    abandoned_overlap: int = 0
    abandoned_length: int = 0
    abandoned_message_crc: int = 0
    expired: int = 0
    evicted_count: int = 0
    evicted_bytes: int = 0
    hole_cap_drops: int = 0
    windows_evicted: int = 0


@dataclasses.dataclass(slots=True)
class _Partial:
    source: Source
    message_id: int
    first_fragment: float
    held: RangeSet = dataclasses.field(default_factory=RangeSet)
    chunks: dict[int, bytes] = dataclasses.field(default_factory=dict)  # start of each held range -> its bytes
    end: int | None = None  # known once the final fragment arrived
    urgent: bool = False

    @property
    def key(self) -> tuple[Source, int]:
        return self.source, self.message_id

    def read(self, start: int, end: int) -> bytes:
        """Bytes [start, end), which must lie inside one held range."""
        if not self.held.contains(start, end):
            raise KeyError((start, end))
        chunk_start = max(s for s in self.chunks if s <= start)
        return self.chunks[chunk_start][start - chunk_start : end - chunk_start]

    def write(self, start: int, payload: bytes) -> None:
        """Hold ``payload`` at ``start``, merging it with the chunks it overlaps or touches."""
        end = start + len(payload)
        first = self.held.extended_at_end(start, end)
        if first is not None:
            # The common case, bytes that extend a held range at its end without
            # reaching the next one: extend that range's one chunk, no merge needed.
            self.chunks[first] += payload
            self.held.add(start, end)
            return
        low, high = start, end
        pieces: list[tuple[int, bytes]] = []
        for first in [s for s in self.chunks if s <= end and s + len(self.chunks[s]) >= start]:
            chunk = self.chunks.pop(first)
            pieces.append((first, chunk))
            low, high = min(low, first), max(high, first + len(chunk))
        merged = bytearray(high - low)
        for first, chunk in pieces:
            merged[first - low : first - low + len(chunk)] = chunk
        merged[start - low : end - low] = payload
        self.chunks[low] = bytes(merged)
        self.held.add(start, end)

    @property
    def size(self) -> int:
        """Bytes held (what the partial costs in memory)."""
        return self.held.covered()


class Reassembler:
    """Reassembly, duplicate rejection and acknowledgement for one receiver."""

    def __init__(self, limits: Limits = DEFAULT_LIMITS, *, duplicate_window: bool = True) -> None:
        self.limits = limits
        self.counters = ReassemblyCounters()
        self.completed = DuplicateFilter(limits.duplicate_window, limits.max_duplicate_sources)
        self._check_duplicates = duplicate_window  # off only to prove tests catch duplicates
        self._partials: dict[tuple[Source, int], _Partial] = {}  # least recently fed first
        # next_deadline(), kept: it changes only when a partial message starts or is dropped
        # (a partial's first_fragment never changes); _start and _drop forget it.
        self._deadline: float | None = None
        self._deadline_known = True
        self._bytes_by_source: dict[Source, int] = {}
        self._count_by_source: dict[Source, int] = {}
        self._bytes = 0
        self.touched: set[tuple[Source, int]] | None = None
        """While tracked (a set; :meth:`track_changes`): partial messages changed
        since the caller last cleared it (a durable journal rewrites their
        records).  It holds at most what changed between two commits."""
        self.window_touched: set[Source] | None = None
        """The same for completed-id windows."""

    # --- state, for reports and invariants --------------------------------------

    @property
    def buffered_bytes(self) -> int:
        return self._bytes

    @property
    def partial_count(self) -> int:
        return len(self._partials)

    def buffered_bytes_of(self, source: Source) -> int:
        return self._bytes_by_source.get(source, 0)

    def partial_count_of(self, source: Source) -> int:
        return self._count_by_source.get(source, 0)

    def held(self, source: Source, message_id: int) -> tuple[tuple[int, int], ...]:
        partial = self._partials.get((source, message_id))
        return () if partial is None else partial.held.ranges()

    def held_bytes(self, source: Source, message_id: int, start: int, end: int) -> bytes:
        """Bytes [start, end) of a partial message; they must lie in one held range."""
        return self._partials[(source, message_id)].read(start, end)

    def partials(self) -> Iterator[tuple[Source, int]]:
        return iter(list(self._partials))

    def track_changes(self) -> None:
        """Record from now on which partial messages and windows change (for a durable journal)."""
        if self.touched is None:
            self.touched, self.window_touched = set(), set()

    def partial_state(
        self, source: Source, message_id: int
    ) -> tuple[bool, int | None, tuple[tuple[int, bytes], ...]] | None:
        """(urgent, end, held chunks as (start, bytes)) of a partial message, or None."""
        partial = self._partials.get((source, message_id))
        if partial is None:
            return None
        return partial.urgent, partial.end, tuple(sorted(partial.chunks.items()))

    def restore_partial(
        self,
        source: Source,
        message_id: int,
        now: float,
        urgent: bool,
        end: int | None,
        chunks: tuple[tuple[int, bytes], ...],
    ) -> None:
        """Hold again a partial message a durable journal kept across a restart; its
        lifetime starts again at ``now``.  Within every cap, as if its bytes had
        arrived as fragments (a chunk that would pass one is refused)."""
        if (source, message_id) in self._partials:
            raise UsageError(f"partial message {message_id} of {source} is held already")
        if end is not None and not 0 < end <= self.limits.max_sealed_message:
            raise UsageError(f"a kept partial message ends at {end}")
        partial = self._start(source, Fragment(source[1], source[2], message_id, 0, b"\x00", downlink=source[0]), now)
        partial.urgent, partial.end = urgent, end
        for start, data in chunks:
            if not data or start + len(data) > (end if end is not None else self.limits.max_sealed_message):
                raise UsageError(f"a kept chunk of {len(data)} bytes at {start} lies outside message {message_id}")
            if partial.held.covered_within(start, start + len(data)) or partial.held.ranges_after_add(
                start, start + len(data)
            ) > (self.limits.max_ranges_per_message):
                raise UsageError(f"kept chunks of message {message_id} overlap or pass the range limit")
            if not self._make_room(partial, len(data)):
                raise UsageError(f"kept message {message_id} does not fit the reassembly caps")
            partial.write(start, data)
            self._account(source, len(data))

    # --- timers -----------------------------------------------------------------

    def next_deadline(self) -> float | None:
        """When the oldest partial message expires (None: nothing to expire)."""
        if not self._deadline_known:
            if self._partials:
                self._deadline = min(p.first_fragment for p in self._partials.values()) + self.limits.reassembly_lifetime
            else:
                self._deadline = None
            self._deadline_known = True
        return self._deadline

    def expire(self, now: float) -> None:
        """Drop partial messages whose lifetime has run out."""
        deadline = self.next_deadline()
        if deadline is None or now < deadline:
            # None is due: rounding is monotonic, so min(first) + lifetime is the
            # least of the sums each partial is judged by below.
            return
        lifetime = self.limits.reassembly_lifetime
        # The same sum as next_deadline(), so a call at the deadline always expires
        # (now - first >= lifetime can round the other way).
        for partial in [p for p in self._partials.values() if p.first_fragment + lifetime <= now]:
            self._drop(partial)
            self.counters.expired += 1

    # --- receiving ----------------------------------------------------------------

    def receive(self, fragment: Fragment, now: float) -> Reception:
        """Take one fragment (already CRC-checked by the decoder)."""
        self.counters.fragments += 1
        self.expire(now)
        source: Source = (fragment.downlink, fragment.terminal, fragment.master)
        verdict, _ = self.completed.classify(source, fragment.message_id)
        if not self._check_duplicates:
            verdict = Verdict.NEW
        if verdict is _DUPLICATE:
            self.counters.duplicate_fragments += 1
            return Reception(self._ack(fragment, complete=True))
        if verdict is _STALE:
            self.counters.stale_fragments += 1
            return Reception(self._ack(fragment, refused=True))
        if fragment.end > self.limits.max_sealed_message:
            self.counters.too_long += 1
            partial = self._partials.get((source, fragment.message_id))
            if partial is not None:
                self._drop(partial)
            return Reception(self._ack(fragment, refused=True))

        partial = self._partials.pop((source, fragment.message_id), None)
        if partial is None:
            partial = self._start(source, fragment, now)
        else:
            self._partials[partial.key] = partial  # now the most recently fed
        if not self._consistent(partial, fragment):
            self._drop(partial)
            return Reception(self._ack(fragment))
        if not self._store(partial, fragment):
            return Reception(self._ack(fragment, held=partial.held.ranges() if partial.key in self._partials else ()))
        if partial.end is not None and partial.held.contains(0, partial.end):
            return self._complete(partial, fragment, now)
        return Reception(self._ack(fragment, held=partial.held.ranges()))

    def _start(self, source: Source, fragment: Fragment, now: float) -> _Partial:
        while self._count_by_source.get(source, 0) >= self.limits.max_partials_per_source and self._evict_oldest(source):
            self.counters.evicted_count += 1
        while len(self._partials) >= self.limits.max_partials_total and self._evict_oldest(None):
            self.counters.evicted_count += 1
        partial = _Partial(source, fragment.message_id, now)
        self._partials[partial.key] = partial
        self._deadline_known = False
        self._count_by_source[source] = self._count_by_source.get(source, 0) + 1
        return partial

    def _consistent(self, partial: _Partial, fragment: Fragment) -> bool:
        """Does the fragment agree with everything held for its message?"""
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
        if not partial.held.covered_within(fragment.offset, fragment.end):
            return True  # nothing held to compare with
        for start, end in partial.held.overlapping(fragment.offset, fragment.end):
            lo = start - fragment.offset
            if partial.read(start, end) != fragment.payload[lo : lo + end - start]:
                self.counters.abandoned_overlap += 1
                return False
        return True

    def _store(self, partial: _Partial, fragment: Fragment) -> bool:
        """Copy the fragment in, within every cap; False if it was not kept."""
        if partial.held.contains(fragment.offset, fragment.end):
            if fragment.final and partial.end != fragment.end:
                partial.end = fragment.end
                if self.touched is not None:
                    self.touched.add(partial.key)
            return True
        if partial.held.ranges_after_add(fragment.offset, fragment.end) > self.limits.max_ranges_per_message:
            self.counters.hole_cap_drops += 1
            return False
        growth = fragment.end - fragment.offset - partial.held.covered_within(fragment.offset, fragment.end)
        if not self._make_room(partial, growth):
            return False
        partial.write(fragment.offset, fragment.payload)
        self._account(partial.source, growth)
        if fragment.final:
            partial.end = fragment.end
        partial.urgent = partial.urgent or fragment.urgent
        if self.touched is not None:
            self.touched.add(partial.key)
        return True

    def _make_room(self, partial: _Partial, growth: int) -> bool:
        """Evict other partial messages, oldest first, until ``growth`` fits."""
        source = partial.source
        limits = self.limits
        while self._bytes_by_source.get(source, 0) + growth > limits.max_bytes_per_source and self._evict_oldest(
            source, sparing=partial
        ):
            self.counters.evicted_bytes += 1
        while self._bytes + growth > limits.max_bytes_total and self._evict_oldest(None, sparing=partial):
            self.counters.evicted_bytes += 1
        if self._bytes_by_source.get(source, 0) + growth > limits.max_bytes_per_source or self._bytes + growth > limits.max_bytes_total:
            # Unreachable with validated limits (a source's cap holds the largest
            # message), but the caps are never overshot whatever happens.
            self._drop(partial)
            self.counters.evicted_bytes += 1
            return False
        return True

    def _evict_oldest(self, source: Source | None, sparing: _Partial | None = None) -> bool:
        """Drop the least recently fed partial message (of ``source``, if given)."""
        for partial in self._partials.values():
            if partial is not sparing and (source is None or partial.source == source):
                self._drop(partial)
                return True
        return False

    def _complete(self, partial: _Partial, fragment: Fragment, now: float) -> Reception:
        assert partial.end is not None
        sealed = partial.read(0, partial.end)
        self._drop(partial)
        try:
            payload = unseal_message(sealed)
        except DecodeError:
            self.counters.abandoned_message_crc += 1
            return Reception(self._ack(fragment))
        # Unwrap the id now, against the window as it stands at completion: other
        # messages may have completed (and moved the window) since this one began.
        _, seq = self.completed.classify(partial.source, partial.message_id)
        before = self.completed.evicted
        self.completed.complete(partial.source, seq)
        if self.window_touched is not None:
            self.window_touched.add(partial.source)
        self.counters.windows_evicted += self.completed.evicted - before
        self.counters.delivered += 1
        delivery = Delivery(
            fragment.downlink,
            fragment.terminal,
            fragment.master,
            fragment.message_id,
            payload,
            partial.urgent,
            partial.first_fragment,
            now,
        )
        return Reception(self._ack(fragment, complete=True), delivery)

    # --- bookkeeping ----------------------------------------------------------------

    def _account(self, source: Source, delta: int) -> None:
        self._bytes += delta
        self._bytes_by_source[source] = self._bytes_by_source.get(source, 0) + delta
        if not self._bytes_by_source[source]:
            del self._bytes_by_source[source]

    def _drop(self, partial: _Partial) -> None:
        if self._partials.pop(partial.key, None) is None:
            return
        if self.touched is not None:
            self.touched.add(partial.key)
        self._deadline_known = False
        if partial.size:
            self._account(partial.source, -partial.size)
        self._count_by_source[partial.source] -= 1
        if not self._count_by_source[partial.source]:
            del self._count_by_source[partial.source]

    @staticmethod
    def _ack(
        fragment: Fragment,
        *,
        held: tuple[tuple[int, int], ...] = (),
        complete: bool = False,
        refused: bool = False,
    ) -> AckBlock:
        return AckBlock(fragment.terminal, fragment.message_id, held, complete, fragment.downlink, refused)
