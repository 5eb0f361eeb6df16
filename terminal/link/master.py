"""The master station's endpoint: probes, polls, acknowledgements, commands, reassembly.

The master keeps a probe stream going; what each probe carries is decided
here, sans-I/O, so the simulator, a master on a serial modem and a fleet
runner share one implementation:

* **acknowledgements.**  Every fragment that changes what the master holds
  of a message (or repeats a finished one) gives that message *news*.  The
  probe carries the acknowledgement of one message at a time: news goes on
  the probe at once when the probe has carried its current message for a
  probe interval, otherwise at the next rotation, oldest news first, so every
  message with news is announced within a probe interval per message ahead of
  it.  Fresher news for the message already on the probe replaces it at once,
  without restarting that message's interval.
* **commands.**  :meth:`MasterEndpoint.command` queues a command for a
  terminal and allocates its 8-bit id (per terminal, in order, from
  ``first_command_id``).  The oldest queued command is put on the probes,
  polling its terminal (other terminals keep quiet), until the terminal's
  reply arrives; then the next.  A command unanswered after ``command_turn``
  yields: it goes to the back of the queue and for as long again nobody is
  polled, so one silent terminal cannot keep the others quiet.  The ids are
  not kept across a restart of the master: a restarted master must be given
  a ``first_command_id`` past the ids it used, or a terminal's command window
  takes its first new command for a repeat of an old one; with a store, the
  next id per terminal is a record (:meth:`MasterEndpoint.command_id_batch`)
  and a restarted master goes on from it.
* **authentication.**  Every command is signed (key epoch, counter, tag;
  docs/keys.md) by the :class:`~ionotrail.terminal.auth.authenticator.MasterAuthenticator`
  when its turn starts, with a fresh counter each turn, and every reply is
  checked before it counts; a reply that fails is counted and ignored.  A
  master without keys sends no commands.  :meth:`MasterEndpoint.rotate_keys`
  moves a terminal to its next key epoch.  The authenticator's state must be
  durable before a probe carrying a newly signed block goes out
  (:attr:`MasterEndpoint.auth`: the shell commits its ``batch()``).
* **data authentication** (optional, docs/keys.md): a terminal whose data
  must be authenticated (``require_data_auth``) has its plain fragments
  refused; a tagged fragment from any terminal is checked (tag, then the
  terminal's data window) and only then handed to reassembly as its inner
  fragment.  A master without keys refuses tagged fragments: it cannot tell
  them from forgeries.  Every refusal is counted and changes no state; an
  accepted one moves the window, which must be durable before the
  acknowledgement goes out (the shell commits :attr:`auth`'s ``batch()``
  before any new probe, as it does for signed commands).
* **reassembly** of every terminal's messages, with a duplicate window per
  terminal (:class:`~ionotrail.terminal.delivery.reassembly.Reassembler`), and
  its deadline: a half-built message expires ``reassembly_lifetime`` after its
  first fragment whether or not another fragment ever arrives.
* **refusals** are counted by reason; ``crc_failed`` counts CRC failures only.

Inputs are received frames (:meth:`on_frame`) and the timer
(:meth:`on_timer`, due at :attr:`timer`); outputs are effects: a new probe
to transmit, a delivered message, a command's reply.
"""

from __future__ import annotations

import dataclasses
from collections import OrderedDict, deque
from collections.abc import Mapping
from typing import NamedTuple

from ionotrail.terminal.auth.authenticator import MasterAuthenticator, Outcome
from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler
from ionotrail.terminal.errors import BadField, DecodeError, Reason, UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, FORMAT_VERSION, Limits
from ionotrail.terminal.link.commands import ID_SPACE as COMMAND_ID_SPACE
from ionotrail.terminal.link.timer import Purpose, Timer, due_at
from ionotrail.terminal.outbox import records
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.wire import AckBlock, AuthFragment, CommandBlock, Fragment, Probe, Reply, decode
from ionotrail.terminal.wire.fastpath import assemble_probe, pack_ack_block, pack_command_block

NEXT_ID_PREFIX = "commands/next-id/"


class ProbeChanged(NamedTuple):
    """Transmit this probe from now on, at the probe interval."""

    frame: bytes


class Delivered(NamedTuple):
    """A message complete and verified, delivered once."""

    delivery: Delivery


class ReplyArrived(NamedTuple):
    """A terminal answered the command on the air."""

    terminal: int
    command_id: int
    status: int
    result: bytes
    time: float


MasterEffect = ProbeChanged | Delivered | ReplyArrived


@dataclasses.dataclass(slots=True)
class MasterCounters:
    fragments: int = 0
    deliveries: int = 0
    replies: int = 0
    stray_replies: int = 0
    rejected_replies: int = 0
    """Replies whose authentication failed (the authenticator counts why)."""
    authenticated_fragments: int = 0
    """Tagged fragments whose tag and counter checked, handed to reassembly."""
    rejected_fragments: int = 0
    """Tagged fragments whose authentication failed (the authenticator counts why:
    forged, replayed, stale, truncated, wrong epoch), or that came to a master without keys."""
    unauthenticated_fragments: int = 0
    """Plain fragments from a terminal whose data must be authenticated."""
    other_frames: int = 0
    probe_updates: int = 0
    news_dropped: int = 0
    refused: dict[str, int] = dataclasses.field(default_factory=dict)
    """Frames refused by the decoder, by reason (:class:`~ionotrail.terminal.errors.Reason` values)."""

    @property
    def crc_failed(self) -> int:
        return self.refused.get(Reason.BAD_CRC.value, 0)


class _Pending(NamedTuple):
    terminal: int
    block: CommandBlock


class MasterEndpoint:
    """The master's side of the burst link, for any number of terminals."""

    def __init__(
        self,
        address: int,
        *,
        limits: Limits = DEFAULT_LIMITS,
        first_command_id: int = 0,
        auth: MasterAuthenticator | None = None,
        require_data_auth: bool | frozenset[int] = False,
    ) -> None:
        """``require_data_auth``: True, or the addresses of the terminals whose
        fragments must come authenticated (plain ones are refused); it needs ``auth``."""
        Probe(address, 0)  # validates the address
        if require_data_auth is not False and auth is None:
            raise UsageError("requiring authenticated data needs the site's keys (auth)")
        if not isinstance(require_data_auth, (bool, frozenset)):
            raise UsageError(f"require_data_auth is a bool or a frozenset of terminal addresses, not {type(require_data_auth).__name__}")
        self.require_data_auth = require_data_auth
        """True (every terminal), or the terminals whose data must be authenticated."""
        self.address = address
        self.limits = limits
        self.reassembler = Reassembler(limits)
        self.counters = MasterCounters()
        self.auth = auth
        """The site's keys: signs commands, checks replies (None: no commands)."""
        self.timer: Timer | None = None
        """When :meth:`on_timer` must next be called, and what for."""
        self._sequence = 0
        self._ack: AckBlock | None = None
        self._ack_wire: bytes | None = None  # self._ack encoded, kept with it
        self._ack_since = -float("inf")  # when the probe began carrying self._ack
        self._news: OrderedDict[tuple[int, int], AckBlock] = OrderedDict()  # (terminal, message id) -> latest
        self._commands: deque[_Pending] = deque()
        if not isinstance(first_command_id, int) or not 0 <= first_command_id < COMMAND_ID_SPACE:
            raise UsageError(f"first_command_id={first_command_id!r} must be an integer from 0 to {COMMAND_ID_SPACE - 1}")
        self._first_command_id = first_command_id
        self._next_command_id: dict[int, int] = {}
        self._ids_unsaved: set[int] = set()  # terminals whose next command id is not yet durable
        self._polling = False  # the head command is on the probes
        self._aired: set[tuple[int, int]] = set()  # (terminal, id) of queued commands that have had a turn
        self._turn_ends = float("inf")  # when the head command's turn ends, or the rest after one
        self._command_wire: tuple[CommandBlock | None, bytes] = (None, b"")  # the last command put on a probe, encoded
        self.probe = self._encode_probe()
        """The probe frame the master transmits now."""

    @property
    def deadline(self) -> float | None:
        return due_at(self.timer)

    @property
    def pending_commands(self) -> tuple[tuple[int, CommandBlock], ...]:
        """(terminal, command) of every unanswered command, the one on the air first."""
        return tuple(self._commands)

    @property
    def poll(self) -> int | None:
        """The terminal the probes poll (None: any terminal may answer)."""
        return self._commands[0].terminal if self._polling else None

    # --- what the operator asks --------------------------------------------------------

    def command(self, terminal: int, opcode: int, arguments: bytes, now: float) -> tuple[int, list[MasterEffect]]:
        """Queue a command for ``terminal``; returns its id and the effects (a new
        probe when it goes on the air at once)."""
        if self.auth is None:
            raise UsageError("commands are signed: this master holds no site key (ionotrail keys new-site)")
        if len(self._commands) >= self.limits.max_queued_commands:
            raise UsageError(f"the master already holds {self.limits.max_queued_commands} unanswered commands")
        command_id = self._next_command_id.get(terminal, self._first_command_id)
        block = CommandBlock(command_id, opcode, arguments)  # validates opcode and arguments
        Probe(self.address, 0, poll=terminal)  # validates the address
        self._next_command_id[terminal] = (command_id + 1) % COMMAND_ID_SPACE
        self._ids_unsaved.add(terminal)
        self._commands.append(_Pending(terminal, block))
        effects: list[MasterEffect] = []
        if len(self._commands) == 1:
            self._start_turn(now, effects)
        self._arm(now)
        return command_id, effects

    def rotate_keys(self, terminal: int, now: float) -> tuple[int, list[MasterEffect]]:
        """Move ``terminal`` to its next key epoch: the rotate command, queued like
        any command; until its reply (signed in the new epoch) arrives, the
        terminal's other commands wait.  Commit :attr:`auth`'s batch first."""
        if self.auth is None:
            raise UsageError("commands are signed: this master holds no site key (ionotrail keys new-site)")
        opcode, arguments = self.auth.begin_rotation(terminal)
        return self.command(terminal, opcode, arguments, now)

    # --- durable command ids -----------------------------------------------------------

    @property
    def command_ids_unsaved(self) -> bool:
        """A command id was given out that a store does not hold yet (commit
        :meth:`command_id_batch` before the probe carrying it goes out)."""
        return bool(self._ids_unsaved)

    def command_id_batch(self) -> Batch:
        """The next command id of every terminal given one since the last commit."""
        return Batch(
            {
                f"{NEXT_ID_PREFIX}{t:04x}": bytes(records.NEXT_COMMAND_ID.build({"terminal": t, "next": self._next_command_id[t]}))
                for t in sorted(self._ids_unsaved)
            }
        )

    def command_ids_committed(self) -> None:
        self._ids_unsaved.clear()

    def restore_command_ids(self, stored: Mapping[str, bytes]) -> None:
        """Go on, after a restart, from the next command ids a store kept (other records are ignored)."""
        for key, value in stored.items():
            if key.startswith(NEXT_ID_PREFIX):
                record = records.parse(records.NEXT_COMMAND_ID, key, value)
                if key != f"{NEXT_ID_PREFIX}{record.terminal:04x}":
                    raise BadField(f"record {key}: holds terminal 0x{record.terminal:04x}")
                self._next_command_id[record.terminal] = record.next

    def restore(self, stored: Mapping[str, bytes], now: float) -> list[MasterEffect]:
        """Take up what a store kept, after a restart: the next command ids, and
        the key state, whose rotations under way go out again (a rotation cut
        short must finish before the terminal's other commands can be signed).
        Returns the effects (a new probe); commit before it airs."""
        self.restore_command_ids(stored)
        effects: list[MasterEffect] = []
        if self.auth is not None:
            old = self.auth
            self.auth = MasterAuthenticator.restore(old.site, stored, tag_bytes=old.tag_bytes, window=old.window_size)
            for terminal in self.auth.rotating_terminals():
                effects += self.rotate_keys(terminal, now)[1]
        return effects

    # --- inputs ------------------------------------------------------------------------

    def on_frame(self, raw: bytes, now: float) -> list[MasterEffect]:
        """A frame the master's receiver produced at ``now``."""
        try:
            frame = decode(raw)
        except DecodeError as error:
            refused = self.counters.refused
            refused[error.reason.value] = refused.get(error.reason.value, 0) + 1
            return []
        effects: list[MasterEffect] = []
        if isinstance(frame, Fragment) and frame.master == self.address and not frame.downlink:
            if self._must_authenticate(frame.terminal):
                self.counters.unauthenticated_fragments += 1
            else:
                self._fragment(frame, now, effects)
        elif isinstance(frame, AuthFragment) and frame.fragment.master == self.address and not frame.fragment.downlink:
            if self._verified(frame):
                self._fragment(frame.fragment, now, effects)
        elif isinstance(frame, Reply) and frame.master == self.address:
            self._reply(frame, now, effects)
        else:
            self.counters.other_frames += 1
        self._arm(now)
        return effects

    def on_timer(self, now: float) -> list[MasterEffect]:
        """Call at (or after) the timer's time; an early call does nothing."""
        if self.timer is None or now < self.timer.at:
            return []
        effects: list[MasterEffect] = []
        self.reassembler.expire(now)
        if self._news and now >= self._ack_since + self.limits.probe_interval:
            self._announce(now, effects)
        if self._commands and now >= self._turn_ends:
            if self._polling:  # the turn is over: to the back of the queue, and rest
                self._commands.rotate(-1)
                self._polling = False
                self._turn_ends = now + self.limits.command_turn
                self._probe_changed(effects)
            else:
                self._start_turn(now, effects)
        self._arm(now)
        return effects

    # --- data authentication -----------------------------------------------------------

    def _must_authenticate(self, terminal: int) -> bool:
        required = self.require_data_auth
        return required if isinstance(required, bool) else terminal in required

    def _verified(self, frame: AuthFragment) -> bool:
        """Tag, then the terminal's data window (moved only when both pass)."""
        auth = self.auth
        if auth is None:  # no key to tell it from a forgery
            self.counters.rejected_fragments += 1
            return False
        outcome = auth.receive_fragment(
            frame.fragment, frame_version=FORMAT_VERSION, epoch=frame.epoch, counter=frame.counter, tag=frame.tag
        )
        if outcome is not Outcome.ACCEPTED:
            self.counters.rejected_fragments += 1
            return False
        self.counters.authenticated_fragments += 1
        return True

    # --- acknowledgements --------------------------------------------------------------

    def _fragment(self, fragment: Fragment, now: float, effects: list[MasterEffect]) -> None:
        self.counters.fragments += 1
        reception = self.reassembler.receive(fragment, now)
        if reception.delivery is not None:
            self.counters.deliveries += 1
            effects.append(Delivered(reception.delivery))
        ack = reception.ack
        key = (ack.terminal, ack.message_id)
        if self._ack is not None and (self._ack.terminal, self._ack.message_id) == key:
            if ack != self._ack:  # fresher news for the message on the probe: at once, same interval
                self._news.pop(key, None)
                self._carry(ack)
                self._probe_changed(effects)
            return
        if ack == self._news.get(key):
            return
        self._news[key] = ack
        self._news.move_to_end(key)
        while len(self._news) > self.limits.max_ack_news:
            self._news.popitem(last=False)
            self.counters.news_dropped += 1
        if now >= self._ack_since + self.limits.probe_interval:
            self._announce(now, effects)

    def _announce(self, now: float, effects: list[MasterEffect]) -> None:
        _, ack = self._news.popitem(last=False)
        self._put_on_probe(ack, now, effects)

    def _put_on_probe(self, ack: AckBlock, now: float, effects: list[MasterEffect]) -> None:
        self._carry(ack)
        self._ack_since = now
        self._probe_changed(effects)

    def _carry(self, ack: AckBlock) -> None:
        """The probe carries ``ack`` from now on; it is encoded once, here."""
        self._ack, self._ack_wire = ack, pack_ack_block(ack)

    # --- commands ----------------------------------------------------------------------

    def _reply(self, reply: Reply, now: float, effects: list[MasterEffect]) -> None:
        """A reply answers the unanswered command it names (one that had its turn,
        possibly some turns ago); anything else is a repeat or not ours."""
        key = (reply.terminal, reply.command_id)
        position = next((k for k, p in enumerate(self._commands) if (p.terminal, p.block.command_id) == key), None)
        if position is None or key not in self._aired:
            self.counters.stray_replies += 1
            return
        assert self.auth is not None  # commands were queued, so the master holds keys
        outcome = self.auth.receive_reply(
            reply.terminal, frame_version=FORMAT_VERSION, master=self.address, command_id=reply.command_id,
            status=int(reply.status), result=reply.result, epoch=reply.epoch, counter=reply.counter, tag=reply.tag,
        )  # fmt: skip
        if outcome is not Outcome.ACCEPTED:
            self.counters.rejected_replies += 1
            return
        self.counters.replies += 1
        del self._commands[position]
        self._aired.discard(key)
        effects.append(ReplyArrived(reply.terminal, reply.command_id, int(reply.status), reply.result, now))
        if position > 0 or not self._polling:
            return  # the command on the air, or the rest, goes on
        if self._commands:
            self._start_turn(now, effects)
        else:
            self._polling, self._turn_ends = False, float("inf")
            self._probe_changed(effects)

    def _start_turn(self, now: float, effects: list[MasterEffect]) -> None:
        """The head command goes on the probes, polling its terminal, for one
        turn, signed afresh (a new counter each turn).  While a terminal's keys
        rotate only its rotate command may go: others wait behind it."""
        assert self.auth is not None
        for _ in range(len(self._commands)):
            head = self._commands[0]
            block = head.block
            try:
                signature = self.auth.sign_command(
                    head.terminal, frame_version=FORMAT_VERSION, master=self.address, command_id=block.command_id,
                    opcode=block.opcode, arguments=block.arguments,
                )  # fmt: skip
            except UsageError:  # a command for a terminal whose keys are rotating: after the rotate
                self._commands.rotate(-1)
                continue
            signed = CommandBlock(block.command_id, block.opcode, block.arguments, signature.epoch, signature.counter, signature.tag)
            self._commands[0] = _Pending(head.terminal, signed)
            self._polling = True
            self._turn_ends = now + self.limits.command_turn
            self._aired.add((head.terminal, block.command_id))
            self._probe_changed(effects)
            return
        self._polling, self._turn_ends = False, now + self.limits.command_turn  # nothing may go yet: rest

    # --- the probe and the timer -------------------------------------------------------

    def _probe_changed(self, effects: list[MasterEffect]) -> None:
        self._sequence = (self._sequence + 1) & 0xFFFF
        self.counters.probe_updates += 1
        self.probe = self._encode_probe()
        effects.append(ProbeChanged(self.probe))

    def _encode_probe(self) -> bytes:
        """The probe's bytes, put together from the blocks encoded when they went
        on it (every value was validated on its way in: the address by the
        constructor, a poll and a command by :meth:`command`, the ack block by
        its own constructor in the reassembler), byte for byte what
        ``encode(Probe(...))`` gives (tests/test_master.py)."""
        if not self._polling:
            return assemble_probe(self.address, self._sequence, None, self._ack_wire, None)
        terminal, block = self._commands[0]
        if self._command_wire[0] is not block:
            self._command_wire = (block, pack_command_block(block))
        return assemble_probe(self.address, self._sequence, terminal, self._ack_wire, self._command_wire[1])

    def _arm(self, now: float) -> None:
        """One timer: the earliest of the next news rotation, the end of a command's
        turn (or of the rest after one) and the reassembly deadline."""
        due = [t for t in (self.reassembler.next_deadline(),) if t is not None]
        if self._news:
            due.append(max(self._ack_since + self.limits.probe_interval, now))
        if self._commands:
            due.append(self._turn_ends)
        self.timer = Timer(Purpose.MASTER, min(due)) if due else None
