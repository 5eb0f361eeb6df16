"""Downlink commands at the terminal: execute each once, answer every repeat.

The master puts a command on its probes (or sends it alone) until the
terminal's reply arrives, so the same command comes back many times.  The
terminal remembers which 8-bit command ids it has executed in an RFC 4303
style anti-replay window (s3.4.3 and Appendix A: the right edge is the
highest id seen, ids to its left within the window are looked up in a
bitmap, older ids are refused); serial-number arithmetic (RFC 1982) tells
ahead from behind across the wrap.  A command id inside the window is never
executed twice, however often or in whatever order it arrives.  The master
issues a terminal's next id only after the last one is answered, so it never
runs ahead of the window.

What was run survives a power cut: the window and the kept replies are a
store record (:meth:`CommandMemory.batch`), committed before the command runs
and again when its reply is made.  A command is therefore run at most once:
cut between the two commits, it counts as run and a repeat is answered
``RESULT_LOST``.

Every store is bounded: the window is a bitmap of ``command_window`` bits,
the replies kept for repeats are the newest ``max_remembered_commands``, and
replies waiting for airtime are at most ``max_queued_replies`` (the oldest
goes when a new one would pass that; a repeat of its command brings it back).
"""

from __future__ import annotations

import dataclasses
import enum
from collections import OrderedDict, deque

from ionotrail.terminal.errors import BadField, UsageError
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.outbox import records
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.wire import Reply, decode

RECORD_KEY = "commands/memory"

ID_BITS = 8
ID_SPACE = 1 << ID_BITS


class Verdict(enum.Enum):
    NEW = "new"
    """Not seen within the window: execute it."""
    REPEAT = "repeat"
    """Executed already: answer again, do not execute."""
    STALE = "stale"
    """Older than the window: ignore it."""


@dataclasses.dataclass(slots=True)
class CommandCounters:
    executed: int = 0
    repeated: int = 0
    stale: int = 0
    replies_dropped: int = 0


class CommandMemory:
    """Which command ids ran, their replies, and the replies waiting to go."""

    def __init__(self, limits: Limits) -> None:
        self.window = limits.command_window
        self.keep_replies = limits.max_remembered_commands
        self.queue_limit = limits.max_queued_replies
        self.counters = CommandCounters()
        self._top: int | None = None  # highest id executed (the window's right edge)
        self._seen = 0  # bit k set: id top - k executed
        self._replies: OrderedDict[int, bytes | None] = OrderedDict()  # id -> reply frame (None: not yet answered)
        self._queue: deque[bytes] = deque()
        self._unsaved = False
        self._lost: set[int] = set()  # run before the last boot, reply never made

    def classify(self, command_id: int) -> Verdict:
        """What to do with an arriving command id (changes nothing)."""
        if self._top is None:
            return Verdict.NEW
        ahead = (command_id - self._top) % ID_SPACE
        if 0 < ahead < ID_SPACE // 2:
            return Verdict.NEW
        behind = (self._top - command_id) % ID_SPACE
        if behind >= self.window:
            return Verdict.STALE
        return Verdict.REPEAT if self._seen >> behind & 1 else Verdict.NEW

    def arrived(self, command_id: int) -> Verdict:
        """Record an arriving command; for a repeat, queue its reply again."""
        verdict = self.classify(command_id)
        if verdict is Verdict.STALE:
            self.counters.stale += 1
        elif verdict is Verdict.REPEAT:
            self.counters.repeated += 1
            reply = self._replies.get(command_id)
            if reply is not None and reply not in self._queue:
                self._enqueue(reply)
        else:
            self._mark(command_id)
            self.counters.executed += 1
            self._replies[command_id] = None
            self._replies.move_to_end(command_id)
            while len(self._replies) > self.keep_replies:
                self._replies.popitem(last=False)
            self._unsaved = True
        return verdict

    def result_lost(self, command_id: int) -> bool:
        """Run before the last boot, and its reply was never made (asked once: then answered)."""
        if command_id in self._lost and self.awaiting_reply(command_id):
            self._lost.discard(command_id)
            return True
        return False

    def awaiting_reply(self, command_id: int) -> bool:
        return command_id in self._replies and self._replies[command_id] is None

    def answered(self, command_id: int, reply: bytes) -> None:
        """The application's reply frame for an executed command: keep it for
        repeats and queue it for the next transmit opportunity."""
        self._replies[command_id] = reply
        self._unsaved = True
        self._enqueue(reply)

    def kept_reply(self, command_id: int) -> bytes | None:
        """The reply frame kept for ``command_id`` (None: none kept, or not yet made)."""
        return self._replies.get(command_id)

    def keep_reply(self, command_id: int, reply: bytes) -> None:
        """Replace the kept reply of a command run (a reply signed again); queued replies are left alone."""
        if command_id not in self._replies or self._replies[command_id] is None:
            raise UsageError(f"command {command_id} has no kept reply to replace")
        self._replies[command_id] = reply
        self._unsaved = True

    def next_reply(self) -> bytes | None:
        return self._queue.popleft() if self._queue else None

    @property
    def queued(self) -> int:
        """Replies waiting for airtime."""
        return len(self._queue)

    @property
    def kept(self) -> int:
        """Command ids whose replies are kept for repeats."""
        return len(self._replies)

    # --- durable state -------------------------------------------------------------

    @property
    def unsaved(self) -> bool:
        return self._unsaved

    def batch(self) -> Batch:
        """The memory as one record (the window and the kept replies)."""
        value = records.COMMANDS.build(
            {
                "has_top": self._top is not None,
                "top": self._top or 0,
                "seen": self._seen.to_bytes((self.window + 7) // 8, "big"),
                "replies": [{"command_id": k, "answered": v is not None, "frame": v or b""} for k, v in self._replies.items()],
            }
        )
        return Batch({RECORD_KEY: bytes(value)})

    def committed(self) -> None:
        self._unsaved = False

    def restore(self, stored: dict[str, bytes]) -> None:
        """Take up the memory a store kept (at boot, before any command arrives)."""
        if RECORD_KEY not in stored:
            return
        value = records.parse(records.COMMANDS, RECORD_KEY, stored[RECORD_KEY])
        if len(value.seen) != (self.window + 7) // 8 or len(value.replies) > self.keep_replies:
            raise BadField(f"record {RECORD_KEY}: a window or reply count this terminal does not keep")
        self._top = value.top if value.has_top else None
        self._seen = int.from_bytes(value.seen, "big") & ((1 << self.window) - 1)
        replies: OrderedDict[int, bytes | None] = OrderedDict()
        for r in value.replies:
            frame = bytes(r.frame) if r.answered else None
            if frame is not None:
                reply = decode(frame)  # a stored frame is sent again as it is: it must be the reply it claims to be
                if not isinstance(reply, Reply) or reply.command_id != r.command_id:
                    raise BadField(f"record {RECORD_KEY}: the reply kept for command {r.command_id} is not its reply frame")
            replies[r.command_id] = frame
        self._replies = replies
        self._lost = {k for k, v in self._replies.items() if v is None}
        self._unsaved = False

    def _enqueue(self, reply: bytes) -> None:
        self._queue.append(reply)
        while len(self._queue) > self.queue_limit:
            self._queue.popleft()
            self.counters.replies_dropped += 1

    def _mark(self, command_id: int) -> None:
        mask = (1 << self.window) - 1
        if self._top is None:
            self._top, self._seen = command_id, 1
            return
        ahead = (command_id - self._top) % ID_SPACE
        if 0 < ahead < ID_SPACE // 2:
            self._seen = (self._seen << ahead | 1) & mask
            self._top = command_id
        else:
            self._seen |= 1 << ((self._top - command_id) % ID_SPACE)
