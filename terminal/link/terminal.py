"""The terminal's burst link: when to transmit, what, and when to stop.

The master transmits probes continuously.  A terminal hears one only while a
meteor trail joins the two stations, so a probe means "the path is open now".
On a probe it may answer (not polling another terminal) and with something to
send, the terminal waits the radio's turnaround, then sends fragments back to
back, sized by its :mod:`fragment policy <ionotrail.terminal.link.policy>`, for as long as
probes keep arriving; probes carry the master's acknowledgements, which free
acknowledged messages and show lost fragments.  When no probe has come for
``burst_silence`` it ends the burst and listens again.  In half duplex the
radio cannot hear while it transmits, so every fragment waits for the next
probe; so does every fragment under a stop-and-wait policy.

The decisions live in :mod:`ionotrail.terminal.link.table`: one table,
:data:`TRANSITIONS`, mapping each (state, input) pair that can happen to the
next state and an action, and the pure functions that turn what happened
into an :class:`Input`; ``ionotrail docs`` draws the table into docs/link.md.
The class here gathers the facts, looks the cell up and carries the action
out.  It is sans-I/O: frames come in as bytes with their arrival time and
signal quality, and what the link wants done comes back as effects (frames to
transmit, events for the application), with :attr:`Link.timer` (one tagged
value) saying when to call :meth:`Link.on_timer` next and what for.
"""

from __future__ import annotations

import dataclasses
import enum
from collections.abc import Callable, Sequence
from typing import NamedTuple

from ionotrail.terminal.auth.authenticator import Action as AuthAction
from ionotrail.terminal.auth.authenticator import TerminalAuthenticator
from ionotrail.terminal.delivery.sender import Sender, SenderEvent
from ionotrail.terminal.errors import DecodeError, ProtocolError, UsageError
from ionotrail.terminal.limits import (
    DEFAULT_LIMITS,
    FORMAT_VERSION,
    MAX_COMMAND_BYTES,
    MAX_FRAME_BYTES,
    Limits,
)
from ionotrail.terminal.link.commands import CommandMemory, Verdict
from ionotrail.terminal.link.gate import UplinkGate
from ionotrail.terminal.link.policy import FragmentPolicy
from ionotrail.terminal.link.table import TRANSITIONS, Action, Input, State, classify_probe, classify_timer, decide
from ionotrail.terminal.link.timer import Purpose, Timer, due_at
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.power.duty import DutyCycle
from ionotrail.terminal.wire import (
    Ack,
    AckBlock,
    AuthFragment,
    Command,
    CommandBlock,
    Frame,
    Probe,
    Reply,
    decode,
    encode,
)
from ionotrail.terminal.wire.formats import ReplyStatus
from ionotrail.terminal.wire.frames import MAX_TAGGED_PAYLOAD, TAGGED_OVERHEAD_BYTES

__all__ = [
    "TRANSITIONS",
    "Action",
    "Arrival",
    "BurstEnded",
    "BurstStarted",
    "CommandArrived",
    "Duplex",
    "Effect",
    "Input",
    "Link",
    "LinkCounters",
    "State",
    "Transmit",
]


class Duplex(enum.Enum):
    FULL = "full"
    """Separate transmit and receive frequencies: probes are heard while sending."""
    HALF = "half"
    """One radio that either sends or hears."""


# The enum members read on every probe and timer, kept as module globals: on Python
# 3.11 reading a member off its class costs ~70 ns (EnumType's __getattr__ takes the
# class off the fast attribute path), several times the comparison it is read for.
_LISTENING, _WAITING, _HALF, _AIR_END = State.LISTENING, State.WAITING, Duplex.HALF, Purpose.AIR_END
_KEEP_AIR_END, _TRANSMIT = Action.KEEP_AIR_END, Action.TRANSMIT


class Arrival(NamedTuple):
    """A frame the modem received, with what it measured."""

    frame: bytes
    time: float
    """When the frame's last bit arrived, on the caller's clock."""
    snr_db: float
    frequency_offset_hz: float = 0.0


# --- effects: what the link asks of its shell ------------------------------------


class Transmit(NamedTuple):
    frame: bytes
    air_end: float
    """When the last bit leaves the antenna at the link's bit rate."""


class BurstStarted(NamedTuple):
    time: float
    snr_db: float


class BurstEnded(NamedTuple):
    time: float
    frames_sent: int


class CommandArrived(NamedTuple):
    """A downlink command to execute once; answer with :meth:`Link.reply`."""

    command_id: int
    opcode: int
    arguments: bytes


Effect = Transmit | BurstStarted | BurstEnded | CommandArrived | SenderEvent


@dataclasses.dataclass(slots=True)
class LinkCounters:
    probes_heard: int = 0
    probes_elsewhere: int = 0
    bursts: int = 0
    fragments_sent: int = 0
    replies_sent: int = 0
    bytes_sent: int = 0
    decode_errors: int = 0
    ignored_frames: int = 0
    openings_heard: int = 0
    """Probes heard after more than burst_silence without one: the openings the
    receiver caught (what the power scheduler learns burst rates from)."""
    commands_without_key: int = 0
    """Commands refused because this terminal holds no key (the authenticator
    counts the rest: forged, replayed, stale, truncated, wrong epoch)."""
    command_repeats: int = 0
    """The same signed command block heard again (the master repeats it on every
    probe of its turn): answered from the kept reply, never run again."""


class Link:
    """One terminal's side of the burst link to one master."""

    def __init__(
        self,
        sender: Sender,
        policy: FragmentPolicy,
        *,
        bit_rate: float,
        duplex: Duplex = Duplex.FULL,
        limits: Limits = DEFAULT_LIMITS,
        gate: UplinkGate | None = None,
        duty: DutyCycle | None = None,
        auth: TerminalAuthenticator | None = None,
        authenticate_data: bool = False,
    ) -> None:
        """``gate`` stops transmissions into a path open only downward
        (:mod:`~ionotrail.terminal.link.gate`); ``duty`` holds a transmit
        duty-cycle limit (:mod:`~ionotrail.terminal.power.duty`).  A frame is
        *ready* only when both allow it, so neither needs a cell of its own in
        the table: a refused frame is one not ready.  ``auth`` holds the
        terminal's keys: without it every command is refused.

        ``authenticate_data`` (off by default; needs ``auth``) sends every
        fragment as a tagged frame (docs/keys.md): key epoch, a fresh data
        counter for each transmission, and a tag under the uplink data key,
        14 bytes more per fragment, payloads of at most MAX_TAGGED_PAYLOAD.
        A fragment is ready only while its counter's reservation is durable
        (the shell commits :meth:`durable_batch`, as for replies); the link
        reserves ahead so that a burst never waits for a commit."""
        if not bit_rate > 0:
            raise UsageError(f"bit_rate must be positive, not {bit_rate!r}")
        if authenticate_data and auth is None:
            raise UsageError("authenticating data fragments needs the terminal's keys (auth)")
        self.sender = sender
        self.terminal, self.master = sender.terminal, sender.master
        self.policy = policy
        self.bit_rate = float(bit_rate)
        self.duplex = Duplex(duplex)
        self.limits = limits
        self.counters = LinkCounters()
        self.state = State.LISTENING
        self.timer: Timer | None = None
        """What the link waits for and when (None: only frames matter)."""
        self._last_probe = -float("inf")
        self._last_probe_ours = False
        self._air_end = -float("inf")  # when the last transmitted frame left the antenna
        self._burst_frames = 0
        self._last_raw: bytes | None = None  # the last frame decoded, and what it decoded to
        self._last_frame: Frame | None = None
        self.commands = CommandMemory(limits)
        """Executed command ids, kept replies and replies waiting (its counters count commands)."""
        self.auth = auth
        """The terminal's keys and anti-replay state (docs/keys.md)."""
        self.authenticate_data = bool(authenticate_data)
        """Every fragment goes out as a tagged frame (docs/keys.md)."""
        if auth is not None and self.authenticate_data:
            auth.reserve_data()  # durable with the key state's first commit
            sender.frame_overhead = TAGGED_OVERHEAD_BYTES
        self._last_command: CommandBlock | None = None  # the last signed block accepted, and when
        self._last_command_at = -float("inf")
        self.gate = gate
        self.duty = duty
        self._max_airtime = self._airtime(MAX_FRAME_BYTES)  # what the duty check reserves for the next frame
        if duty is not None and duty.budget_s < self._max_airtime:
            raise UsageError(
                f"a duty-cycle budget of {duty.budget_s:g} s per {duty.window_s:g} s cannot hold one {MAX_FRAME_BYTES}-byte frame"
                f" ({self._max_airtime:.3f} s at {self.bit_rate:g} bit/s): the terminal could never transmit"
            )
        self._last_snr = float("nan")  # Eb/N0 of the last probe heard
        # The burst in progress, for the gate: its first probe's Eb/N0, pieces confirmed,
        # probes heard after its first frame left the antenna (plus the ack margin).
        self._burst_snr = float("nan")
        self._burst_confirmed = 0
        self._burst_heard_after = 0
        self._burst_first_end = float("inf")

    @property
    def deadline(self) -> float | None:
        """When :meth:`on_timer` must next be called (None: only frames matter)."""
        return due_at(self.timer)

    # --- inputs ----------------------------------------------------------------------

    def on_frame(self, arrival: Arrival) -> list[Effect]:
        """A frame the modem heard: a probe from our master (its acknowledgement,
        poll and command included), or a stand-alone acknowledgement or command
        for us.  Anything else, or anything that fails to decode, is counted and
        ignored; the terminal does not act on what it cannot trust."""
        raw = arrival.frame
        frame: Frame | None
        if raw == self._last_raw:  # the probe stream repeats itself; decoding is pure
            frame = self._last_frame
        else:
            try:
                frame = decode(raw)
            except DecodeError:
                self.counters.decode_errors += 1
                return []
            self._last_raw, self._last_frame = raw, frame
        effects: list[Effect] = []
        if isinstance(frame, Ack) and frame.master == self.master:
            self._take_ack(frame.ack, arrival, effects)
            return effects
        if isinstance(frame, Command) and frame.master == self.master and frame.terminal == self.terminal:
            self._take_command(frame.command, arrival.time, effects)
            return effects
        if not isinstance(frame, Probe) or frame.master != self.master:
            self.counters.ignored_frames += 1
            return []
        self._take_probe(frame, arrival, effects)
        return effects

    def _take_probe(self, frame: Probe, arrival: Arrival, effects: list[Effect]) -> None:
        self.counters.probes_heard += 1
        if arrival.time - self._last_probe > self.limits.burst_silence:
            self.counters.openings_heard += 1
        if frame.ack is not None:
            self._take_ack(frame.ack, arrival, effects)
        ours = frame.poll is None or frame.poll == self.terminal
        if frame.command is not None and frame.poll == self.terminal:
            self._take_command(frame.command, arrival.time, effects)
        self._last_probe = arrival.time
        self._last_probe_ours = ours
        if self.state is not _LISTENING:  # in a burst (a new one starts in START_BURST)
            if arrival.time >= self._burst_first_end:
                self._burst_heard_after += 1
            # A piece unconfirmed for a whole silence interval of live probes is lost
            # (acknowledgements ride on every probe); this is what times out a
            # stop-and-wait fragment whose loss no acknowledgement shows.
            self.sender.presume_lost(arrival.time - self.limits.burst_silence)
            self._report_outcomes()
            self.policy.probe_heard(arrival.time, arrival.snr_db)
        if not ours:
            self.counters.probes_elsewhere += 1
        event = classify_probe(ours=ours, ready=self._has_something() and self._may_send(arrival.time, arrival.snr_db))
        self._apply(event, arrival.time, effects, arrival.snr_db)
        if self.state is not _LISTENING:  # the timers' decisions read it; idle, nothing does
            self._last_snr = arrival.snr_db

    def on_timer(self, now: float) -> list[Effect]:
        """Call at (or after) the timer's time; an early call does nothing."""
        timer = self.timer
        if timer is None or now < timer.at:
            return []
        effects: list[Effect] = []
        event = classify_timer(
            timer.purpose,
            silent=now >= self._silence_since() + self.limits.burst_silence,
            ours=self._last_probe_ours,
            hold=self.duplex is _HALF or self.policy.waits_for_ack,
            ready=self._ready() and self._may_send(now, self._last_snr),
        )
        self._apply(event, now, effects)
        return effects

    def reply(self, command_id: int, status: ReplyStatus, result: bytes = b"") -> None:
        """The application's answer to a :class:`CommandArrived`; sent at the
        next transmit opportunity and repeated if the master asks again."""
        if not self.commands.awaiting_reply(command_id):
            raise UsageError(f"command {command_id} is not awaiting a reply")
        if len(result) > MAX_COMMAND_BYTES:
            raise UsageError(f"reply result of {len(result)} bytes exceeds {MAX_COMMAND_BYTES}")
        assert self.auth is not None  # a command awaiting a reply was authenticated
        signature = self.auth.sign_reply(
            frame_version=FORMAT_VERSION, master=self.master, command_id=command_id, status=int(status), result=result
        )
        reply = Reply(self.terminal, self.master, command_id, status, result, signature.epoch, signature.counter, signature.tag)
        self.commands.answered(command_id, encode(reply))

    # --- durable state: keys, anti-replay windows, commands run --------------------------

    @property
    def unsaved(self) -> bool:
        """The keys' or the commands' state changed and is not yet durable.  While
        it is, no reply is sent (a reply must never speak for state a power cut
        could still take back); the shell commits :meth:`durable_batch`."""
        return self.commands.unsaved or (self.auth is not None and self.auth.dirty)

    def durable_batch(self) -> Batch:
        """What to commit: the key state's records and the command memory's."""
        batch = self.auth.batch() if self.auth is not None and self.auth.dirty else Batch()
        return batch.merged(self.commands.batch()) if self.commands.unsaved else batch

    def durable_committed(self) -> None:
        """The last :meth:`durable_batch` is durable: replies may go."""
        if self.auth is not None:
            self.auth.committed()
        self.commands.committed()

    def restore_durable(self, records: dict[str, bytes]) -> None:
        """Take up, at boot, the key state and command memory a store kept
        (records of other kinds are ignored).  Kept keys replace the ones the
        link was built with (they may have been rotated since provisioning),
        unless the key file is of a later epoch (the terminal was provisioned
        again): then the file's keys start afresh.  A store holding another
        terminal's keys is the wrong store (UsageError)."""
        from ionotrail.terminal.auth.authenticator import ROOT_KEY

        if ROOT_KEY in records and self.auth is not None:
            kept = TerminalAuthenticator.restore(records, tag_bytes=self.auth.tag_bytes, window=self.auth.window_size)
            if kept.terminal != self.terminal:
                raise UsageError(f"the store keeps the keys of terminal 0x{kept.terminal:04x}, not of 0x{self.terminal:04x}")
            if kept.epoch >= self.auth.epoch:
                self.auth = kept  # its anti-replay window and counters go on
        if self.auth is not None and self.authenticate_data:
            self.auth.reserve_data()  # past what was reserved before: durable with the next commit
        self.commands.restore(records)

    def indifferent_to(self, raw: bytes) -> bool:
        """Would hearing ``raw`` now give no effect, and change only the probe
        bookkeeping (counts, the time of the last probe and, in a burst, its
        SNR samples and silence timer)?  True when it is the probe last
        decoded, it carries no command for us, nothing is queued, outstanding
        or waiting to be reported, and the link is idle or waiting out a burst.
        A simulator may then hand such probes over in bulk (:meth:`heard_unchanged`)."""
        frame = self._last_frame
        return (
            self.sender.pending == 0  # first: a busy terminal is never indifferent, and it is asked each probe
            and raw == self._last_raw
            and isinstance(frame, Probe)
            and frame.master == self.master
            and not (frame.command is not None and frame.poll == self.terminal)
            and (self.state is _LISTENING or self.state is _WAITING)
            and not self.commands.queued
            and not self.sender.outcomes
        )

    def heard_unchanged(self, raw: bytes, times: Sequence[float], snr_db: Callable[[int], float]) -> None:
        """The probe ``raw`` was heard at each of ``times`` (in order) while
        :meth:`indifferent_to` held: what :meth:`on_frame` does with each,
        without the decoding.  ``snr_db(i)`` gives probe i's Eb/N0 and is asked
        only in a burst (where the policy samples it): idle, the probes are
        only counted."""
        if not times:
            return
        if not self.indifferent_to(raw):
            raise UsageError("probes were handed over in bulk while the link was not indifferent to them")
        frame = self._last_frame
        assert isinstance(frame, Probe)
        if self.state is State.LISTENING:
            # Each would count, settle nothing (a stray acknowledgement: nothing is held) and stay idle.
            count = len(times)
            self.counters.probes_heard += count
            last, silence, openings = self._last_probe, self.limits.burst_silence, 0
            for t in times:
                if t - last > silence:
                    openings += 1
                last = t
            self.counters.openings_heard += openings
            if frame.ack is not None and frame.ack.terminal == self.terminal and not frame.ack.downlink:
                self.sender.count_stray_acks(count)
            if frame.poll is not None and frame.poll != self.terminal:
                self.counters.probes_elsewhere += count
            self._last_probe = max(self._last_probe, times[-1])
            return
        effects: list[Effect] = []
        for i, t in enumerate(times):
            self._take_probe(frame, Arrival(raw, t, snr_db(i), 0.0), effects)
            if effects:
                raise ProtocolError(f"a probe the link was indifferent to gave {effects[0]!r}")

    # --- facts ------------------------------------------------------------------------

    def _has_something(self) -> bool:
        """Replies waiting (and free to go), or messages pending (under
        stop-and-wait, within a burst: none still awaiting its acknowledgement)."""
        if self.commands.queued and not self.unsaved:
            return True
        if self.policy.waits_for_ack and self.state is not State.LISTENING and self.sender.awaiting:
            return False  # within a burst; a new burst presumes the last one's fragment lost
        return self.sender.sendable > 0 and self._may_sign()

    def _may_sign(self) -> bool:
        """A fragment may go: data is not authenticated, or its counter is durably reserved."""
        if not self.authenticate_data:
            return True
        auth = self.auth
        assert auth is not None
        if auth.data_ready():
            return True
        auth.reserve_data()  # commits with this input's durable batch; the fragment waits for it
        return False

    def _may_send(self, now: float, snr_db: float) -> bool:
        """The gate passes a probe heard at ``snr_db``, and the duty-cycle budget
        has room for the longest frame from ``now``."""
        gate, duty = self.gate, self.duty
        if gate is not None and not gate.allows(snr_db, now):
            return False
        return duty is None or duty.allows(now, self._max_airtime)

    def _ready(self) -> bool:
        """A frame could be built now: a reply waits, or the sender would give a fragment."""
        return bool(self.commands.queued and not self.unsaved) or (self._has_something() and self.sender.can_send())

    def _prepare(self, now: float) -> bytes | None:
        reply = None if self.unsaved else self.commands.next_reply()
        if reply is not None:
            self.counters.replies_sent += 1
            return reply
        size = self.policy.payload_bytes(now)
        if not self.authenticate_data:
            fragment = self.sender.next_fragment(size, now, 8 / self.bit_rate)
            if fragment is None:
                return None
            self.counters.fragments_sent += 1
            return encode(fragment)
        fragment = self.sender.next_fragment(min(size, MAX_TAGGED_PAYLOAD), now, 8 / self.bit_rate)
        if fragment is None:
            return None
        auth = self.auth
        assert auth is not None
        signature = auth.sign_fragment(fragment, frame_version=FORMAT_VERSION)
        self.counters.fragments_sent += 1
        return encode(AuthFragment(fragment, signature.epoch, signature.counter, signature.tag))

    # --- the table, applied ----------------------------------------------------------

    def _apply(self, event: Input, now: float, effects: list[Effect], snr_db: float = float("nan")) -> None:
        state, action = decide(self.state, event)
        self.state = state
        # A burst in full flow is nearly all probes kept waiting for the frame on
        # the air, and frames sent: those two actions are tried first.
        if action is _KEEP_AIR_END:
            self.timer = self._running(_AIR_END)
        elif action is _TRANSMIT:
            frame = self._prepare(now)
            if frame is None:
                raise ProtocolError(f"the link's table transmits on {event.name}, an input with no frame ready")
            air_end = self._air_end = now + self._airtime(len(frame))
            self.counters.bytes_sent += len(frame)
            self._burst_frames += 1
            if self._burst_first_end == float("inf"):
                self._burst_first_end = air_end + self.limits.ack_margin
            if self.duty is not None:
                self.duty.record(now, air_end)
            effects.append(Transmit(frame, air_end))
            self.timer = Timer(_AIR_END, air_end)
        elif action is Action.STAY_IDLE:
            self.timer = None
        elif action is Action.START_BURST:
            self.counters.bursts += 1
            self._burst_frames = 0
            self.sender.presume_lost(now)
            self.sender.outcomes.clear()  # the last burst's tail died with its trail: the decay's loss, not the path's
            self.policy.burst_started(now)
            self.policy.probe_heard(now, snr_db)
            self._burst_snr, self._burst_confirmed, self._burst_heard_after = snr_db, 0, 0
            self._burst_first_end = float("inf")
            effects.append(BurstStarted(now, snr_db))
            self.timer = Timer(Purpose.TURNAROUND, now + self.limits.turnaround)
        elif action is Action.ARM_TURNAROUND:
            self.timer = Timer(Purpose.TURNAROUND, now + self.limits.turnaround)
        elif action is Action.KEEP_TURNAROUND:
            self.timer = self._running(Purpose.TURNAROUND)
        elif action is Action.WAIT:
            self.timer = Timer(Purpose.SILENCE, self._silence_since() + self.limits.burst_silence)
        else:  # Action.END_BURST
            self.timer = None
            if self.gate is not None:
                self.gate.burst_ended(now, sent=self._burst_frames, confirmed=self._burst_confirmed,
                                      heard_after=self._burst_heard_after, first_snr_db=self._burst_snr)  # fmt: skip
            effects.append(BurstEnded(now, self._burst_frames))

    def _running(self, purpose: Purpose) -> Timer:
        """The timer of ``purpose`` that runs now, which the table keeps."""
        if self.timer is None or self.timer.purpose is not purpose:
            raise ProtocolError(f"the link's table keeps a {purpose.value} timer in state {self.state.name}, where none runs")
        return self.timer

    def _silence_since(self) -> float:
        """Since when the terminal has heard no probe: the last probe, or in half
        duplex the end of its own last frame, if later (it was deaf meanwhile)."""
        if self.duplex is _HALF:
            return max(self._last_probe, self._air_end)
        return self._last_probe

    def _airtime(self, nbytes: int) -> float:
        return 8 * nbytes / self.bit_rate

    # --- acknowledgements and commands -----------------------------------------------

    def _take_ack(self, block: AckBlock, arrival: Arrival, effects: list[Effect]) -> None:
        if block.terminal != self.terminal or block.downlink:
            return
        issued = arrival.time - self._airtime(len(arrival.frame)) - self.limits.ack_margin
        effects.extend(self.sender.on_ack(block, arrival.time, issued=issued))
        self._report_outcomes()

    def _report_outcomes(self) -> None:
        outcomes = self.sender.outcomes
        while outcomes:
            size, lost = outcomes.popleft()
            if not lost:
                self._burst_confirmed += 1
            self.policy.fragment_settled(size, lost)

    def _fresh_reply(self, command_id: int) -> None:
        """Sign again, in the current epoch, a kept reply to ``command_id`` signed in an older one."""
        kept = self.commands.kept_reply(command_id)
        if kept is None or self.auth is None:
            return
        old = decode(kept)
        if not isinstance(old, Reply) or old.epoch == self.auth.epoch:
            return
        signature = self.auth.sign_reply(
            frame_version=FORMAT_VERSION, master=self.master, command_id=command_id, status=int(old.status), result=old.result
        )
        frame = encode(Reply(self.terminal, self.master, command_id, old.status, old.result, signature.epoch, signature.counter, signature.tag))
        self.commands.keep_reply(command_id, frame)

    def _take_command(self, block: CommandBlock, now: float, effects: list[Effect]) -> None:
        """A command block for us: authenticated first (tag, then anti-replay
        window; a rejection changes nothing and is counted), then run once.
        The master repeats a signed block on every probe of its turn; the same
        block again is a repeat of an accepted command, answered from the kept
        reply.  A new turn comes with a fresh counter, and an id already run
        is answered, not run again.  The shortcut holds only for a command
        turn after the block was accepted; later, the block is a replay and
        the window refuses it.  A kept reply signed in an epoch the keys have
        since left is signed again before it goes (the master checks replies
        in its current epoch)."""
        if block == self._last_command and now - self._last_command_at <= self.limits.command_turn:
            self.counters.command_repeats += 1
            self._fresh_reply(block.command_id)
            self.commands.arrived(block.command_id)
            return
        auth = self.auth
        if auth is None:
            self.counters.commands_without_key += 1
            return
        check = auth.receive_command(
            frame_version=FORMAT_VERSION, master=self.master, command_id=block.command_id, opcode=block.opcode,
            arguments=block.arguments, epoch=block.epoch, counter=block.counter, tag=block.tag,
        )  # fmt: skip
        if not check.accepted:
            return
        self._last_command, self._last_command_at = block, now
        self._fresh_reply(block.command_id)
        verdict = self.commands.arrived(block.command_id)
        if verdict is Verdict.REPEAT and self.commands.result_lost(block.command_id):
            self.reply(block.command_id, ReplyStatus.RESULT_LOST)  # run before a power cut took its reply
        if verdict is not Verdict.NEW:
            return
        if check.action is AuthAction.EXECUTE:
            effects.append(CommandArrived(block.command_id, block.opcode, block.arguments))
        else:  # the stack's own: a key rotation, answered here
            status = ReplyStatus.REFUSED if check.action is AuthAction.ROTATE_REFUSED else ReplyStatus.OK
            self.reply(block.command_id, status)
