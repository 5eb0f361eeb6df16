"""Authenticated commands and replies: the master signs commands and checks replies, the terminal the reverse.

Every command carries, besides its fields, a key epoch, a 32-bit counter and
a tag: the truncated HMAC-SHA-256 of the canonical encoding ``COMMAND_MAC``
(:mod:`~ionotrail.terminal.auth.formats`) of every field that affects how
it is processed, under the terminal's downlink command key of that epoch.
Replies are the same in the other direction under the uplink reply key.

A receiver checks in this order, and a rejection changes no state:

1. the tag's length (``truncated``), then the epoch, which chooses the key
   (``wrong_epoch``; the previous epoch is accepted for a repeat of the
   rotate command only);
2. the tag, compared in constant time (``forged``);
3. the anti-replay window (``replayed``, or ``stale`` when older than it);

and only then moves the window.  Each outcome is counted.

Rotation survives a power cut at any step (docs/keys.md):

* the master marks the rotation durably, then sends ROTATE naming epoch
  e + 1, signed in epoch e, and repeats it (fresh counters) until a reply
  arrives; while rotating it signs nothing else;
* the terminal, on the first ROTATE, derives the root of e + 1 from its
  current root, keeps the root of e and its window for repeats of the rotate
  only, and returns a batch that must be committed before it replies; its
  replies from then on are signed in e + 1;
* the master switches to e + 1 on the first valid reply signed in e + 1
  (which proves the terminal holds the new key), and commits.

Both ends are pure: they export their durable state as records
(``records()``, or ``batch()`` for what changed) and are rebuilt from them
(``restore``).  The shell commits a non-empty ``batch()`` before it acts on
an accepted command and before it transmits a signed frame, then calls
``committed()``.
"""

from __future__ import annotations

import dataclasses
import enum
from collections.abc import Mapping
from typing import Any

from construct import Construct, ConstructError
from ionotrail.terminal.auth.formats import (
    AUTH_VERSION,
    COMMAND_MAC,
    COUNTER_RECORD,
    MASTER_RECORD,
    PREVIOUS_RECORD,
    RECORD_VERSION,
    REPLY_MAC,
    ROOT_RECORD,
    ROTATE_ARGUMENTS,
    WINDOW_RECORD,
    Direction,
    Purpose,
)
from ionotrail.terminal.auth.fragments import mac_input_of
from ionotrail.terminal.auth.keys import MAX_EPOCH, Key, SiteSecret, TerminalRoot
from ionotrail.terminal.auth.primitives import HASH_BYTES, hmac_tag, tag_matches
from ionotrail.terminal.auth.window import ReplayWindow, SendCounter, Verdict
from ionotrail.terminal.errors import DecodeError, Reason, UsageError
from ionotrail.terminal.limits import (
    AUTH_MAX_REPLAY_WINDOW,
    AUTH_MIN_TAG_BYTES,
    AUTH_REPLAY_WINDOW,
    AUTH_TAG_BYTES,
    MAX_COMMAND_BYTES,
)
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.wire.frames import Fragment

ROTATE_OPCODE = 0xF0
"""The rotate command's opcode.  Opcodes 0xF0-0xFF belong to the stack; applications use 0x00-0xEF."""

ROOT_KEY = "auth/root"
COMMAND_WINDOW_KEY = "auth/command-window"
REPLY_COUNTER_KEY = "auth/reply-counter"
PREVIOUS_KEY = "auth/previous"
PREVIOUS_WINDOW_KEY = "auth/previous-window"
DATA_COUNTER_KEY = "auth/data-counter"
MASTER_KEY_PREFIX = "auth/master/"
DATA_WINDOW_PREFIX = "auth/data-window/"
DATA_TARGET_PREFIX = "auth/data-target/"
"""Records of the terminal's key state, and the prefixes of the master's (one
each per terminal, address in 4 hex digits): its key state, and the windows of
authenticated data fragments accepted in its epoch and, while a rotation is
under way, in the epoch it leads to."""


class Outcome(enum.Enum):
    """What became of an authenticated frame; stable names for counters and reports."""

    ACCEPTED = "accepted"
    FORGED = "forged"
    """The tag does not match: forged, corrupted, or signed with another key."""
    REPLAYED = "replayed"
    """A counter already accepted: a copy of an earlier frame."""
    STALE = "stale"
    """A counter older than the anti-replay window."""
    TRUNCATED = "truncated"
    """A tag shorter (or longer) than the deployment's tag length."""
    WRONG_EPOCH = "wrong_epoch"
    """Signed in an epoch the receiver does not accept for this frame."""


@dataclasses.dataclass(slots=True)
class AuthCounters:
    """Every outcome, counted: a rising ``forged`` count is someone trying tags (docs/keys.md)."""

    accepted: int = 0
    forged: int = 0
    replayed: int = 0
    stale: int = 0
    truncated: int = 0
    wrong_epoch: int = 0

    def count(self, outcome: Outcome) -> None:
        name = outcome.value
        setattr(self, name, getattr(self, name) + 1)


class Action(enum.Enum):
    """What the terminal does with an accepted command."""

    EXECUTE = "hand the command to the application"
    ROTATED = "the keys moved to the next epoch: commit, then reply OK"
    ROTATE_REPEAT = "a repeat of the rotate already done: commit, then reply OK again"
    ROTATE_REFUSED = "a rotate naming an epoch other than the next: reply REFUSED"


@dataclasses.dataclass(frozen=True, slots=True)
class CommandCheck:
    """The terminal's verdict on a command: the outcome, and for an accepted one what to do."""

    outcome: Outcome
    action: Action | None = None

    @property
    def accepted(self) -> bool:
        return self.outcome is Outcome.ACCEPTED


@dataclasses.dataclass(frozen=True, slots=True)
class Signature:
    """What a sender adds to a frame: the epoch, the counter and the tag."""

    epoch: int
    counter: int
    tag: bytes


class RecordError(DecodeError):
    """A durable record of the key state that cannot be read back."""

    def __init__(self, message: str, reason: Reason = Reason.BAD_FIELD) -> None:
        super().__init__(message)
        self.reason = reason


# --- canonical MAC inputs -----------------------------------------------------


def _build(declaration: Construct, what: str, fields: dict[str, Any]) -> bytes:
    try:
        return bytes(declaration.build(fields))
    except (ConstructError, TypeError, ValueError) as exc:
        raise UsageError(f"{what} fields out of range: {exc}") from None


def _payload(value: bytes, what: str) -> bytes:
    if not isinstance(value, bytes) or len(value) > MAX_COMMAND_BYTES:
        raise UsageError(f"{what} must be at most {MAX_COMMAND_BYTES} bytes")
    return value


def command_mac_input(
    *,
    frame_version: int,
    master: int,
    terminal: int,
    epoch: int,
    counter: int,
    command_id: int,
    opcode: int,
    arguments: bytes,
) -> bytes:
    """What a command's tag covers (``COMMAND_MAC``)."""
    return _build(COMMAND_MAC, "command", {
        "version": AUTH_VERSION, "direction": int(Direction.DOWNLINK), "frame_version": frame_version,
        "master": master, "terminal": terminal, "epoch": epoch, "counter": counter,
        "command_id": command_id, "opcode": opcode, "arguments": _payload(arguments, "command arguments"),
    })  # fmt: skip


def reply_mac_input(
    *,
    frame_version: int,
    master: int,
    terminal: int,
    epoch: int,
    counter: int,
    command_id: int,
    status: int,
    result: bytes,
) -> bytes:
    """What a reply's tag covers (``REPLY_MAC``)."""
    return _build(REPLY_MAC, "reply", {
        "version": AUTH_VERSION, "direction": int(Direction.UPLINK), "frame_version": frame_version,
        "master": master, "terminal": terminal, "epoch": epoch, "counter": counter,
        "command_id": command_id, "status": status, "result": _payload(result, "reply result"),
    })  # fmt: skip


def rotate_arguments(epoch: int) -> bytes:
    """The rotate command's arguments naming ``epoch``."""
    return _build(ROTATE_ARGUMENTS, "rotate", {"epoch": epoch})


def _check_sizes(tag_bytes: int, window: int) -> None:
    if not isinstance(tag_bytes, int) or not AUTH_MIN_TAG_BYTES <= tag_bytes <= HASH_BYTES:
        raise UsageError(f"tags are {AUTH_MIN_TAG_BYTES} to {HASH_BYTES} bytes, not {tag_bytes!r}")
    if not isinstance(window, int) or not 1 <= window <= AUTH_MAX_REPLAY_WINDOW:
        raise UsageError(f"an anti-replay window holds 1 to {AUTH_MAX_REPLAY_WINDOW} entries, not {window!r}")


def _judge(key: Key, message: bytes, tag: bytes, window: ReplayWindow, counter: int) -> Outcome:
    """Tag first (constant time), then the window; nothing is changed."""
    if not tag_matches(key.material, message, tag):
        return Outcome.FORGED
    verdict = window.check(counter)
    if verdict is Verdict.DUPLICATE:
        return Outcome.REPLAYED
    if verdict is Verdict.STALE:
        return Outcome.STALE
    return Outcome.ACCEPTED


# --- durable records ----------------------------------------------------------


def _parse(declaration: Construct, data: bytes, key: str) -> Any:
    """A record, strictly: every byte used, the version known; else :class:`RecordError`."""
    if not isinstance(data, bytes):
        raise RecordError(f"record {key} is not bytes")
    try:
        value = declaration.parse(data)
        length = len(declaration.build(value))
    except ConstructError as exc:
        raise RecordError(
            f"record {key} is truncated or malformed ({len(data)} bytes): {exc}", Reason.TRUNCATED
        ) from None
    if length != len(data):
        raise RecordError(f"record {key} has {len(data) - length} bytes after its fields", Reason.TOO_LONG)
    if value.version != RECORD_VERSION:
        raise RecordError(
            f"record {key} has version {value.version}; this build reads {RECORD_VERSION}", Reason.UNSUPPORTED_VERSION
        )
    return value


def _window_fields(window: ReplayWindow, epoch: int) -> dict[str, Any]:
    bitmap = window.ring.to_bytes((window.size + 7) // 8, "little")
    return {"version": RECORD_VERSION, "epoch": epoch, "size": window.size, "top": window.top, "bitmap": bitmap}


def _window_from(value: Any, key: str) -> ReplayWindow:
    if not 1 <= value.size <= AUTH_MAX_REPLAY_WINDOW:
        raise RecordError(f"record {key}: window of {value.size} entries (1 to {AUTH_MAX_REPLAY_WINDOW})")
    ring = int.from_bytes(value.bitmap, "little")
    if ring >> value.size:
        raise RecordError(f"record {key}: bits set beyond the window's {value.size} entries")
    return ReplayWindow(value.size, value.top, ring)


def _record(declaration: Construct, fields: dict[str, Any]) -> bytes:
    return bytes(declaration.build(fields))


# --- the terminal's side ------------------------------------------------------


@dataclasses.dataclass(slots=True)
class _Epoch:
    """One epoch's root, the keys used in it, and its command window."""

    root: TerminalRoot
    window: ReplayWindow
    command_key: Key = dataclasses.field(init=False)
    reply_key: Key = dataclasses.field(init=False)

    def __post_init__(self) -> None:
        self.command_key = self.root.working_key(Direction.DOWNLINK, Purpose.COMMAND)
        self.reply_key = self.root.working_key(Direction.UPLINK, Purpose.REPLY)


class TerminalAuthenticator:
    """The terminal's key state: verifies commands, signs replies, rotates; pure and restorable."""

    def __init__(
        self, root: TerminalRoot, *, tag_bytes: int = AUTH_TAG_BYTES, window: int = AUTH_REPLAY_WINDOW
    ) -> None:
        """A terminal freshly provisioned with ``root`` (its state not yet committed)."""
        _check_sizes(tag_bytes, window)
        if not isinstance(root, TerminalRoot):
            raise UsageError("a terminal is provisioned with its TerminalRoot, never the site secret")
        self.tag_bytes = tag_bytes
        self.window_size = window
        self.counters = AuthCounters()
        self._current = _Epoch(root, ReplayWindow(window))
        self._previous: _Epoch | None = None
        self._replies = SendCounter()
        self._data = SendCounter()  # data fragments' counters (RFC 4303 s5, as the replies')
        self._data_saved = 0  # the data reservation last committed: counters up to it may be sent
        self._data_batched = 0  # the data reservation in the last batch()
        self._dirty = True

    @property
    def terminal(self) -> int:
        return self._current.root.terminal

    @property
    def epoch(self) -> int:
        return self._current.root.epoch

    @property
    def dirty(self) -> bool:
        """True while the state has changes not yet committed."""
        return self._dirty

    def data_key(self, direction: Direction) -> Key:
        """The current epoch's data key of ``direction`` (for :mod:`~ionotrail.terminal.auth.fragments`)."""
        return self._current.root.working_key(direction, Purpose.DATA)

    def data_ready(self) -> bool:
        """Whether :meth:`sign_fragment` may sign now: the next data counter's
        reservation is durable.  When it is not, call :meth:`reserve_data` and
        commit ``batch()`` first."""
        return self._data.next <= self._data_saved

    def reserve_data(self) -> bool:
        """Reserve data counters ahead when fewer than half a block is left, so
        the save is committed while counters already saved are still in use
        (a burst never waits for it); True when the state changed (commit ``batch()``)."""
        moved = self._data.top_up()
        self._dirty |= moved
        return moved

    def sign_fragment(self, fragment: Fragment, *, frame_version: int) -> Signature:
        """Epoch, a fresh data counter and the tag for one transmission of
        ``fragment`` (a retransmission is a new transmission: RFC 6347
        s4.1.2.6).  Only when :meth:`data_ready`; reserves ahead as it goes."""
        if not self.data_ready():
            raise UsageError("the next data counter is not durably reserved: reserve_data(), commit batch(), then sign")
        counter, moved = self._data.take()
        assert not moved  # within the saved reservation
        message = mac_input_of(fragment, frame_version=frame_version, epoch=self.epoch, counter=counter)
        self.reserve_data()
        key = self.data_key(Direction.DOWNLINK if fragment.downlink else Direction.UPLINK)
        return Signature(self.epoch, counter, hmac_tag(key.material, message, self.tag_bytes))

    def receive_command(
        self, *, frame_version: int, master: int, command_id: int, opcode: int, arguments: bytes,
        epoch: int, counter: int, tag: bytes,
    ) -> CommandCheck:  # fmt: skip
        """Check a received command; if accepted, move the window (and rotate on a first ROTATE)."""
        if len(tag) != self.tag_bytes:
            return self._reject(Outcome.TRUNCATED)
        previous = self._previous
        if epoch == self.epoch:
            chosen = self._current
        elif (
            previous is not None
            and epoch == previous.root.epoch
            and opcode == ROTATE_OPCODE
            and arguments == rotate_arguments(self.epoch)
        ):
            chosen = previous
        else:
            return self._reject(Outcome.WRONG_EPOCH)
        message = command_mac_input(
            frame_version=frame_version, master=master, terminal=self.terminal, epoch=epoch, counter=counter,
            command_id=command_id, opcode=opcode, arguments=arguments,
        )  # fmt: skip
        outcome = _judge(chosen.command_key, message, tag, chosen.window, counter)
        if outcome is not Outcome.ACCEPTED:
            return self._reject(outcome)
        chosen.window.accept(counter)
        self._dirty = True
        self.counters.count(Outcome.ACCEPTED)
        if chosen is previous:
            return CommandCheck(Outcome.ACCEPTED, Action.ROTATE_REPEAT)
        if opcode != ROTATE_OPCODE:
            return CommandCheck(Outcome.ACCEPTED, Action.EXECUTE)
        if self.epoch >= MAX_EPOCH or arguments != rotate_arguments(self.epoch + 1):
            return CommandCheck(Outcome.ACCEPTED, Action.ROTATE_REFUSED)
        self._previous = self._current
        self._current = _Epoch(self._current.root.next(), ReplayWindow(self.window_size))
        self._replies = SendCounter()
        self._data = SendCounter()  # the new epoch's key: its counters start again
        self._data_saved = self._data_batched = 0
        return CommandCheck(Outcome.ACCEPTED, Action.ROTATED)

    def sign_reply(self, *, frame_version: int, master: int, command_id: int, status: int, result: bytes) -> Signature:
        """Epoch, counter and tag for a reply, signed in the current epoch (commit ``batch()`` before sending)."""
        counter, moved = self._replies.take()
        self._dirty |= moved
        message = reply_mac_input(
            frame_version=frame_version, master=master, terminal=self.terminal, epoch=self.epoch, counter=counter,
            command_id=command_id, status=status, result=result,
        )  # fmt: skip
        return Signature(self.epoch, counter, hmac_tag(self._current.reply_key.material, message, self.tag_bytes))

    def _reject(self, outcome: Outcome) -> CommandCheck:
        self.counters.count(outcome)
        return CommandCheck(outcome)

    # durable state

    def records(self) -> dict[str, bytes]:
        """The whole durable state, as store records."""
        current, epoch = self._current, self.epoch
        out = {
            ROOT_KEY: _record(ROOT_RECORD, {"version": RECORD_VERSION, "terminal": self.terminal, "epoch": epoch, "root": current.root.material}),
            COMMAND_WINDOW_KEY: _record(WINDOW_RECORD, _window_fields(current.window, epoch)),
            REPLY_COUNTER_KEY: _record(COUNTER_RECORD, {"version": RECORD_VERSION, "epoch": epoch, "reserved": self._replies.reserved}),
        }  # fmt: skip
        if self._data.reserved:  # only once data fragments are authenticated
            out[DATA_COUNTER_KEY] = _record(COUNTER_RECORD, {"version": RECORD_VERSION, "epoch": epoch, "reserved": self._data.reserved})
        if self._previous is not None:
            old = self._previous.root
            out[PREVIOUS_KEY] = _record(
                PREVIOUS_RECORD, {"version": RECORD_VERSION, "epoch": old.epoch, "root": old.material}
            )
            out[PREVIOUS_WINDOW_KEY] = _record(WINDOW_RECORD, _window_fields(self._previous.window, old.epoch))
        return out

    def batch(self) -> Batch:
        """What to commit now: every record when anything changed, else an empty batch."""
        if not self._dirty:
            return Batch()
        gone = frozenset() if self._previous is not None else frozenset({PREVIOUS_KEY, PREVIOUS_WINDOW_KEY})
        self._data_batched = self._data.reserved
        return Batch(puts=self.records(), deletes=gone)

    def committed(self) -> None:
        """The last ``batch()`` is durable."""
        self._dirty = False
        self._data_saved = self._data_batched

    @classmethod
    def restore(
        cls, records: Mapping[str, bytes], *, tag_bytes: int = AUTH_TAG_BYTES, window: int = AUTH_REPLAY_WINDOW
    ) -> TerminalAuthenticator:
        """The state the records describe (after a reboot); :class:`RecordError` if they do not describe one."""
        if ROOT_KEY not in records:
            raise RecordError(f"no {ROOT_KEY} record: this terminal holds no key (provision it)", Reason.TRUNCATED)
        root_value = _parse(ROOT_RECORD, records[ROOT_KEY], ROOT_KEY)
        root = TerminalRoot(bytes(root_value.root), root_value.terminal, root_value.epoch)
        self = cls(root, tag_bytes=tag_bytes, window=window)
        for key in (COMMAND_WINDOW_KEY, REPLY_COUNTER_KEY):
            if key not in records:
                raise RecordError(f"no {key} record beside {ROOT_KEY}", Reason.TRUNCATED)
        commands = _parse(WINDOW_RECORD, records[COMMAND_WINDOW_KEY], COMMAND_WINDOW_KEY)
        replies = _parse(COUNTER_RECORD, records[REPLY_COUNTER_KEY], REPLY_COUNTER_KEY)
        for key, value in ((COMMAND_WINDOW_KEY, commands), (REPLY_COUNTER_KEY, replies)):
            if value.epoch != root.epoch:
                raise RecordError(f"record {key} is of epoch {value.epoch}, the root of epoch {root.epoch}")
        self._current.window = _window_from(commands, COMMAND_WINDOW_KEY)
        self._replies = SendCounter(replies.reserved)
        if DATA_COUNTER_KEY in records:  # absent: no data fragment was ever signed in this epoch
            data = _parse(COUNTER_RECORD, records[DATA_COUNTER_KEY], DATA_COUNTER_KEY)
            if data.epoch > root.epoch:
                raise RecordError(f"record {DATA_COUNTER_KEY} is of epoch {data.epoch}, after the root's {root.epoch}")
            if data.epoch == root.epoch:  # one of an earlier epoch counted under another key: the counters start again
                # Continue past the reservation; nothing past it is saved yet.
                self._data = SendCounter(data.reserved)
                self._data_saved = self._data_batched = data.reserved
        if (PREVIOUS_KEY in records) != (PREVIOUS_WINDOW_KEY in records):
            raise RecordError(f"records {PREVIOUS_KEY} and {PREVIOUS_WINDOW_KEY} must come together", Reason.TRUNCATED)
        if PREVIOUS_KEY in records:
            old = _parse(PREVIOUS_RECORD, records[PREVIOUS_KEY], PREVIOUS_KEY)
            old_window = _parse(WINDOW_RECORD, records[PREVIOUS_WINDOW_KEY], PREVIOUS_WINDOW_KEY)
            if old.epoch + 1 != root.epoch or old_window.epoch != old.epoch:
                raise RecordError(f"records {PREVIOUS_KEY} (epoch {old.epoch}) and {PREVIOUS_WINDOW_KEY} (epoch "
                                  f"{old_window.epoch}) must be of the epoch before the root's ({root.epoch})")  # fmt: skip
            previous_root = TerminalRoot(bytes(old.root), root.terminal, old.epoch)
            self._previous = _Epoch(previous_root, _window_from(old_window, PREVIOUS_WINDOW_KEY))
        self._dirty = False
        return self

    def __repr__(self) -> str:
        return f"TerminalAuthenticator(terminal=0x{self.terminal:04x}, epoch={self.epoch}, root={self._current.root.fingerprint})"


# --- the master's side --------------------------------------------------------


class _Link:
    """The master's state for one terminal."""

    __slots__ = (
        "commands", "data_key", "data_window", "reply_key", "root", "target", "target_data_key", "target_data_window",
        "target_reply_key", "target_window", "window",
    )  # fmt: skip

    def __init__(
        self,
        root: TerminalRoot,
        window: ReplayWindow,
        commands: SendCounter,
        target: TerminalRoot | None,
        data_window: ReplayWindow | None = None,
    ) -> None:
        self.root = root
        self.window = window
        self.commands = commands
        self.reply_key = root.working_key(Direction.UPLINK, Purpose.REPLY)
        self.data_key = root.working_key(Direction.UPLINK, Purpose.DATA)
        self.data_window = data_window if data_window is not None else ReplayWindow(window.size)
        """Uplink data fragments accepted in ``root``'s epoch."""
        self.target = target
        self.target_reply_key = target.working_key(Direction.UPLINK, Purpose.REPLY) if target else None
        self.target_window = ReplayWindow(window.size) if target else None
        self.target_data_key = target.working_key(Direction.UPLINK, Purpose.DATA) if target else None
        self.target_data_window = ReplayWindow(window.size) if target else None
        """Data fragments signed in the epoch a rotation leads to (the terminal moves first)."""


class MasterAuthenticator:
    """The master's key state for every terminal it commands: signs commands, checks replies, rotates."""

    def __init__(self, site: SiteSecret, *, tag_bytes: int = AUTH_TAG_BYTES, window: int = AUTH_REPLAY_WINDOW) -> None:
        _check_sizes(tag_bytes, window)
        if not isinstance(site, SiteSecret):
            raise UsageError("the master holds the site secret")
        self.site = site
        self.tag_bytes = tag_bytes
        self.window_size = window
        self.counters = AuthCounters()
        self._links: dict[int, _Link] = {}
        self._changed: set[int] = set()

    def enrol(self, terminal: int, epoch: int) -> None:
        """Start from ``epoch`` for a terminal provisioned at an epoch other than 0."""
        if terminal in self._links:
            raise UsageError(f"terminal 0x{terminal:04x} is already known, at epoch {self._links[terminal].root.epoch}")
        self._links[terminal] = _Link(
            self.site.root(terminal, epoch), ReplayWindow(self.window_size), SendCounter(), None
        )
        self._changed.add(terminal)

    def _link(self, terminal: int) -> _Link:
        """The terminal's state; a terminal never enrolled is at epoch 0 (created, not yet saved)."""
        link = self._links.get(terminal)
        return (
            link
            if link is not None
            else _Link(self.site.root(terminal, 0), ReplayWindow(self.window_size), SendCounter(), None)
        )

    def _keep(self, terminal: int, link: _Link) -> None:
        self._links[terminal] = link
        self._changed.add(terminal)

    def epoch(self, terminal: int) -> int:
        """The epoch commands to ``terminal`` are signed in."""
        return self._link(terminal).root.epoch

    def rotating_terminals(self) -> list[int]:
        """Terminals whose rotation is under way (after a restart: send their rotate again)."""
        return sorted(t for t, link in self._links.items() if link.target is not None)

    def rotating(self, terminal: int) -> bool:
        """True from ``begin_rotation`` until the terminal's first reply in the new epoch."""
        return self._link(terminal).target is not None

    def data_key(self, terminal: int, direction: Direction) -> Key:
        """The terminal's current data key of ``direction`` (for :mod:`~ionotrail.terminal.auth.fragments`)."""
        return self._link(terminal).root.working_key(direction, Purpose.DATA)

    def begin_rotation(self, terminal: int) -> tuple[int, bytes]:
        """Mark a rotation of ``terminal``'s keys (commit ``batch()`` first); the command to send: opcode, arguments."""
        link = self._link(terminal)
        if link.target is None:
            link = _Link(link.root, link.window, link.commands, link.root.next(), link.data_window)
            self._keep(terminal, link)
        assert link.target is not None
        return ROTATE_OPCODE, rotate_arguments(link.target.epoch)

    def sign_command(
        self, terminal: int, *, frame_version: int, master: int, command_id: int, opcode: int, arguments: bytes
    ) -> Signature:
        """Epoch, counter and tag for a command (commit ``batch()`` before sending).  While a rotation
        is under way only the rotate command may be signed: the terminal refuses anything else in the old epoch."""
        link = self._link(terminal)
        if link.target is not None and (opcode != ROTATE_OPCODE or arguments != rotate_arguments(link.target.epoch)):
            raise UsageError(
                f"terminal 0x{terminal:04x} is rotating to epoch {link.target.epoch}: send only its rotate command"
            )
        counter, moved = link.commands.take()
        if moved or terminal not in self._links:
            self._keep(terminal, link)
        message = command_mac_input(
            frame_version=frame_version, master=master, terminal=terminal, epoch=link.root.epoch, counter=counter,
            command_id=command_id, opcode=opcode, arguments=arguments,
        )  # fmt: skip
        key = link.root.working_key(Direction.DOWNLINK, Purpose.COMMAND)
        return Signature(link.root.epoch, counter, hmac_tag(key.material, message, self.tag_bytes))

    def receive_reply(
        self, terminal: int, *, frame_version: int, master: int, command_id: int, status: int, result: bytes,
        epoch: int, counter: int, tag: bytes,
    ) -> Outcome:  # fmt: skip
        """Check a received reply; if accepted, move the window (and finish a rotation on the new epoch's first reply)."""
        if len(tag) != self.tag_bytes:
            return self._count(Outcome.TRUNCATED)
        link = self._link(terminal)
        if epoch == link.root.epoch:
            key, window = link.reply_key, link.window
        elif (
            link.target is not None
            and link.target_reply_key is not None
            and link.target_window is not None
            and epoch == link.target.epoch
        ):
            key, window = link.target_reply_key, link.target_window
        else:
            return self._count(Outcome.WRONG_EPOCH)
        message = reply_mac_input(
            frame_version=frame_version, master=master, terminal=terminal, epoch=epoch, counter=counter,
            command_id=command_id, status=status, result=result,
        )  # fmt: skip
        outcome = _judge(key, message, tag, window, counter)
        if outcome is not Outcome.ACCEPTED:
            return self._count(outcome)
        window.accept(counter)
        if link.target is not None and epoch == link.target.epoch:  # the terminal holds the new key: switch
            link = _Link(link.target, window, SendCounter(), None, link.target_data_window)
        self._keep(terminal, link)
        return self._count(Outcome.ACCEPTED)

    def receive_fragment(self, fragment: Fragment, *, frame_version: int, epoch: int, counter: int, tag: bytes) -> Outcome:
        """Check an authenticated uplink data fragment from ``fragment.terminal``: the tag's
        length, the epoch (the current one, or while a rotation is under way the
        one it leads to: the terminal moves first), the tag, then the terminal's
        data window; if accepted, move the window (commit ``batch()`` before the
        acknowledgement goes out).  A rejection changes nothing and is counted."""
        if len(tag) != self.tag_bytes:
            return self._count(Outcome.TRUNCATED)
        terminal = fragment.terminal
        link = self._link(terminal)
        if epoch == link.root.epoch:
            key, window = link.data_key, link.data_window
        elif (
            link.target is not None
            and link.target_data_key is not None
            and link.target_data_window is not None
            and epoch == link.target.epoch
        ):
            key, window = link.target_data_key, link.target_data_window
        else:
            return self._count(Outcome.WRONG_EPOCH)
        message = mac_input_of(fragment, frame_version=frame_version, epoch=epoch, counter=counter)
        outcome = _judge(key, message, tag, window, counter)
        if outcome is not Outcome.ACCEPTED:
            return self._count(outcome)
        window.accept(counter)
        self._keep(terminal, link)
        return self._count(Outcome.ACCEPTED)

    def data_windows(self, terminal: int) -> tuple[ReplayWindow, ReplayWindow | None]:
        """Copies of ``terminal``'s data windows: its epoch's, and the rotation target's (None: no rotation)."""
        link = self._link(terminal)
        target = link.target_data_window
        return link.data_window.copy(), None if target is None else target.copy()

    def _count(self, outcome: Outcome) -> Outcome:
        self.counters.count(outcome)
        return outcome

    # durable state

    @staticmethod
    def record_key(terminal: int) -> str:
        return f"{MASTER_KEY_PREFIX}{terminal:04x}"

    def _data_records(self, terminal: int, link: _Link) -> dict[str, bytes]:
        """The terminal's data windows as window records, once authenticated data has come (else none)."""
        out: dict[str, bytes] = {}
        if link.data_window.top:
            out[f"{DATA_WINDOW_PREFIX}{terminal:04x}"] = _record(WINDOW_RECORD, _window_fields(link.data_window, link.root.epoch))
        if link.target is not None and link.target_data_window is not None and link.target_data_window.top:
            out[f"{DATA_TARGET_PREFIX}{terminal:04x}"] = _record(
                WINDOW_RECORD, _window_fields(link.target_data_window, link.target.epoch)
            )
        return out

    def _encode(self, terminal: int, link: _Link) -> bytes:
        target = link.target.epoch if link.target is not None else link.root.epoch
        return _record(MASTER_RECORD, {
            "version": RECORD_VERSION, "terminal": terminal, "epoch": link.root.epoch, "target": target,
            "reserved": link.commands.reserved, "window": _window_fields(link.window, link.root.epoch),
        })  # fmt: skip

    def records(self) -> dict[str, bytes]:
        """The whole durable state, as store records (one per terminal)."""
        out: dict[str, bytes] = {}
        for t, link in sorted(self._links.items()):
            out[self.record_key(t)] = self._encode(t, link)
            out |= self._data_records(t, link)
        return out

    def batch(self) -> Batch:
        """The records of every terminal whose state changed since the last commit;
        a data window record the state no longer has (a rotation's target window,
        once the rotation is done) is deleted, so none is left to restore."""
        puts: dict[str, bytes] = {}
        deletes: set[str] = set()
        for t in sorted(self._changed):
            link = self._links[t]
            puts[self.record_key(t)] = self._encode(t, link)
            data = self._data_records(t, link)
            puts |= data
            deletes |= {f"{prefix}{t:04x}" for prefix in (DATA_WINDOW_PREFIX, DATA_TARGET_PREFIX)} - set(data)
        return Batch(puts=puts, deletes=frozenset(deletes))

    @property
    def dirty(self) -> bool:
        return bool(self._changed)

    def committed(self) -> None:
        self._changed.clear()

    @classmethod
    def restore(
        cls,
        site: SiteSecret,
        records: Mapping[str, bytes],
        *,
        tag_bytes: int = AUTH_TAG_BYTES,
        window: int = AUTH_REPLAY_WINDOW,
    ) -> MasterAuthenticator:
        """The master's state from its records (other records in the mapping are ignored)."""
        self = cls(site, tag_bytes=tag_bytes, window=window)
        for key, data in records.items():
            if not key.startswith(MASTER_KEY_PREFIX):
                continue
            value = _parse(MASTER_RECORD, data, key)
            if key != self.record_key(value.terminal):
                raise RecordError(f"record {key} holds terminal 0x{value.terminal:04x}")
            if value.target not in (value.epoch, value.epoch + 1) or value.window.epoch != value.epoch:
                raise RecordError(
                    f"record {key}: epochs {value.epoch}, {value.target} and {value.window.epoch} do not fit together"
                )
            root = site.root(value.terminal, value.epoch)
            target = root.next() if value.target != value.epoch else None
            self._links[value.terminal] = _Link(
                root, _window_from(value.window, key), SendCounter(value.reserved), target
            )
        for prefix in (DATA_WINDOW_PREFIX, DATA_TARGET_PREFIX):  # (the outcome does not hang on the records' order)
            for key, data in records.items():
                if key.startswith(prefix):
                    self._restore_data(key, prefix, data)
        return self

    def _restore_data(self, key: str, prefix: str, data: bytes) -> None:
        """A data window record: a ``data-window`` record is the window of the
        terminal's epoch, a ``data-target`` record that of its rotation's target.
        One of an earlier epoch, or a target record of the epoch a finished
        rotation reached, is left over from before (a store written before target
        records were deleted): ignored, never put in place of the newer window."""
        try:
            terminal = int(key[len(prefix):], 16)
        except ValueError:
            raise RecordError(f"record {key}: no terminal address after {prefix}") from None
        if key != f"{prefix}{terminal:04x}":
            raise RecordError(f"record {key}: the address is not four hex digits")
        value = _parse(WINDOW_RECORD, data, key)
        window = _window_from(value, key)
        link = self._links.get(terminal)
        if link is None:
            if value.epoch != 0:
                raise RecordError(f"record {key}: epoch {value.epoch} for a terminal without a record {self.record_key(terminal)}")
            link = self._links[terminal] = self._link(terminal)
        newest = link.root.epoch if prefix == DATA_WINDOW_PREFIX else (link.target or link.root).epoch
        if prefix == DATA_WINDOW_PREFIX and value.epoch == newest:
            link.data_window = window
        elif prefix == DATA_TARGET_PREFIX and link.target is not None and value.epoch == newest:
            link.target_data_window = window
        elif value.epoch > newest:
            holder = "terminal" if prefix == DATA_WINDOW_PREFIX else "rotation"
            raise RecordError(f"record {key}: epoch {value.epoch}, after the {holder}'s {newest}")

    def __repr__(self) -> str:
        return f"MasterAuthenticator(site={self.site.fingerprint}, terminals={len(self._links)})"
