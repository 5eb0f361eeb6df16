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

The decisions live in one table, :data:`TRANSITIONS`, mapping every
(state, input) pair to the next state and an action; ``ionotrail docs`` draws
it into docs/link.md.  The class around it only classifies what happened into
an :class:`Input` and carries out actions.  It is sans-I/O: frames come in as
bytes with their arrival time and signal quality, and what the link wants done
comes back as effects (frames to transmit, events for the application), with
:attr:`Link.deadline` saying when to call :meth:`Link.on_timer` next.
"""

from __future__ import annotations

import dataclasses
import enum
from collections import OrderedDict
from typing import NamedTuple

from ionotrail.terminal.delivery.sender import Sender, SenderEvent
from ionotrail.terminal.errors import DecodeError, UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, MAX_COMMAND_BYTES, Limits
from ionotrail.terminal.link.policy import FragmentPolicy
from ionotrail.terminal.wire import Ack, AckBlock, Command, Frame, Probe, Reply, decode, encode
from ionotrail.terminal.wire.formats import ReplyStatus


class State(enum.Enum):
    LISTENING = "listening"
    """Receiver on, no burst: waiting for a probe."""
    TURNAROUND = "turnaround"
    """Heard a probe; the radio is switching to transmit."""
    TRANSMITTING = "transmitting"
    """A frame is on the air."""
    WAITING = "waiting"
    """In a burst but not transmitting: waiting for a probe (for an
    acknowledgement, a poll, or the path to show itself open again)."""


class Input(enum.Enum):
    PROBE_READY = "probe for us, something to send"
    PROBE_EMPTY = "probe for us, nothing to send"
    PROBE_ELSEWHERE = "probe polling another terminal"
    CLEAR_READY = "timer: path open, something to send"
    CLEAR_HOLD = "timer: path open, must wait for a probe"
    CLEAR_EMPTY = "timer: path open, nothing to send"
    SILENT = "timer: no probe for burst_silence"


class Action(enum.Enum):
    NONE = "none"
    START_BURST = "start burst, arm turnaround"
    ARM_TURNAROUND = "arm turnaround"
    TRANSMIT = "transmit next frame"
    WAIT = "arm silence timer"
    END_BURST = "end burst"


S, I, A = State, Input, Action
TRANSITIONS: dict[tuple[State, Input], tuple[State, Action]] = {
    # Idle: only a probe we may answer, with something to send, starts a burst.
    (S.LISTENING, I.PROBE_READY): (S.TURNAROUND, A.START_BURST),
    (S.LISTENING, I.PROBE_EMPTY): (S.LISTENING, A.NONE),
    (S.LISTENING, I.PROBE_ELSEWHERE): (S.LISTENING, A.NONE),
    (S.LISTENING, I.CLEAR_READY): (S.LISTENING, A.NONE),  # no timer runs while listening
    (S.LISTENING, I.CLEAR_HOLD): (S.LISTENING, A.NONE),
    (S.LISTENING, I.CLEAR_EMPTY): (S.LISTENING, A.NONE),
    (S.LISTENING, I.SILENT): (S.LISTENING, A.NONE),
    # Switching to transmit: the turnaround timer decides; a poll for another yields.
    (S.TURNAROUND, I.PROBE_READY): (S.TURNAROUND, A.NONE),
    (S.TURNAROUND, I.PROBE_EMPTY): (S.TURNAROUND, A.NONE),
    (S.TURNAROUND, I.PROBE_ELSEWHERE): (S.WAITING, A.WAIT),
    (S.TURNAROUND, I.CLEAR_READY): (S.TRANSMITTING, A.TRANSMIT),
    (S.TURNAROUND, I.CLEAR_HOLD): (S.TRANSMITTING, A.TRANSMIT),  # the probe just heard is the go-ahead
    (S.TURNAROUND, I.CLEAR_EMPTY): (S.WAITING, A.WAIT),
    (S.TURNAROUND, I.SILENT): (S.LISTENING, A.END_BURST),
    # On the air: probes heard meanwhile (full duplex) feed acks and the silence clock.
    (S.TRANSMITTING, I.PROBE_READY): (S.TRANSMITTING, A.NONE),
    (S.TRANSMITTING, I.PROBE_EMPTY): (S.TRANSMITTING, A.NONE),
    (S.TRANSMITTING, I.PROBE_ELSEWHERE): (S.TRANSMITTING, A.NONE),  # finish the frame; then nothing is ready
    (S.TRANSMITTING, I.CLEAR_READY): (S.TRANSMITTING, A.TRANSMIT),
    (S.TRANSMITTING, I.CLEAR_HOLD): (S.WAITING, A.WAIT),
    (S.TRANSMITTING, I.CLEAR_EMPTY): (S.WAITING, A.WAIT),
    (S.TRANSMITTING, I.SILENT): (S.LISTENING, A.END_BURST),
    # In a burst, quiet: the next probe we may answer resumes it.
    (S.WAITING, I.PROBE_READY): (S.TURNAROUND, A.ARM_TURNAROUND),
    (S.WAITING, I.PROBE_EMPTY): (S.WAITING, A.WAIT),
    (S.WAITING, I.PROBE_ELSEWHERE): (S.WAITING, A.WAIT),
    (S.WAITING, I.CLEAR_READY): (S.WAITING, A.NONE),  # only the silence timer runs here
    (S.WAITING, I.CLEAR_HOLD): (S.WAITING, A.NONE),
    (S.WAITING, I.CLEAR_EMPTY): (S.WAITING, A.NONE),
    (S.WAITING, I.SILENT): (S.LISTENING, A.END_BURST),
}
del S, I, A


class Duplex(enum.Enum):
    FULL = "full"
    """Separate transmit and receive frequencies: probes are heard while sending."""
    HALF = "half"
    """One radio that either sends or hears."""


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
    commands_executed: int = 0
    commands_repeated: int = 0
    decode_errors: int = 0
    ignored_frames: int = 0


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
    ) -> None:
        if not bit_rate > 0:
            raise UsageError(f"bit_rate must be positive, not {bit_rate!r}")
        self.sender = sender
        self.terminal, self.master = sender.terminal, sender.master
        self.policy = policy
        self.bit_rate = float(bit_rate)
        self.duplex = Duplex(duplex)
        self.limits = limits
        self.counters = LinkCounters()
        self.state = State.LISTENING
        self.deadline: float | None = None
        """When :meth:`on_timer` must next be called (None: only frames matter)."""
        self._last_probe = -float("inf")
        self._last_probe_ours = False
        self._air_end = -float("inf")  # when the last transmitted frame left the antenna
        self._burst_frames = 0
        self._next: bytes | None = None  # frame prepared while classifying
        self._last_raw: bytes | None = None  # the last frame decoded, and what it decoded to
        self._last_frame: Frame | None = None
        # command id -> reply frame (None until the application answers); oldest first
        self._commands: OrderedDict[int, bytes | None] = OrderedDict()
        self._replies: list[bytes] = []  # waiting for airtime

    # --- inputs ----------------------------------------------------------------------

    def on_frame(self, arrival: Arrival) -> list[Effect]:
        """A frame the modem heard: a probe from our master (its acknowledgement,
        poll and command included), or a stand-alone acknowledgement or command
        for us.  Anything else, or anything that fails to decode, is counted and
        ignored; the terminal does not act on what it cannot trust."""
        raw = arrival.frame
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
            self._take_command(frame.command.command_id, frame.command.opcode, frame.command.arguments, effects)
            return effects
        if not isinstance(frame, Probe) or frame.master != self.master:
            self.counters.ignored_frames += 1
            return []
        self.counters.probes_heard += 1
        if frame.ack is not None:
            self._take_ack(frame.ack, arrival, effects)
        ours = frame.poll is None or frame.poll == self.terminal
        if frame.command is not None and frame.poll == self.terminal:
            block = frame.command
            self._take_command(block.command_id, block.opcode, block.arguments, effects)
        self._last_probe = arrival.time
        self._last_probe_ours = ours
        if self.state is not State.LISTENING:  # in a burst (a new one starts in _apply)
            # A piece unconfirmed for a whole silence interval of live probes is lost
            # (acknowledgements ride on every probe); this is what times out a
            # stop-and-wait fragment whose loss no acknowledgement shows.
            self.sender.presume_lost(arrival.time - self.limits.burst_silence)
            self._report_outcomes()
            self.policy.probe_heard(arrival.time, arrival.snr_db)
        if not ours:
            self.counters.probes_elsewhere += 1
            event = Input.PROBE_ELSEWHERE
        else:
            event = Input.PROBE_READY if self._has_something() else Input.PROBE_EMPTY
        self._apply(event, arrival.time, effects, arrival.snr_db)
        return effects

    def on_timer(self, now: float) -> list[Effect]:
        """Call at (or after) :attr:`deadline`; an early call does nothing."""
        if self.deadline is None or now < self.deadline:
            return []
        effects: list[Effect] = []
        self._apply(self._classify_clear(now), now, effects)
        return effects

    def reply(self, command_id: int, status: ReplyStatus, result: bytes = b"") -> None:
        """The application's answer to a :class:`CommandArrived`; sent at the
        next transmit opportunity and repeated if the master asks again."""
        if self._commands.get(command_id, b"") is not None:
            raise UsageError(f"command {command_id} is not awaiting a reply")
        if len(result) > MAX_COMMAND_BYTES:
            raise UsageError(f"reply result of {len(result)} bytes exceeds {MAX_COMMAND_BYTES}")
        frame = encode(Reply(self.terminal, self.master, command_id, status, result))
        self._commands[command_id] = frame
        self._replies.append(frame)

    # --- classification --------------------------------------------------------------

    def _has_something(self) -> bool:
        """Replies waiting, or messages pending (under stop-and-wait, within a
        burst: none still awaiting its acknowledgement)."""
        if self._replies:
            return True
        if self.policy.waits_for_ack and self.state is not State.LISTENING and self.sender.awaiting:
            return False  # within a burst; a new burst presumes the last one's fragment lost
        return self.sender.pending > 0

    def _classify_clear(self, now: float) -> Input:
        """What a timer found.  The next frame is built here when the table
        would transmit it, so that "something to send" is a fact, not a guess."""
        if now >= self._silence_since() + self.limits.burst_silence:
            return Input.SILENT
        if self.state is State.TRANSMITTING and (self.duplex is Duplex.HALF or self.policy.waits_for_ack):
            return Input.CLEAR_HOLD
        if not self._last_probe_ours or not self._has_something():
            return Input.CLEAR_EMPTY
        if TRANSITIONS[(self.state, Input.CLEAR_READY)][1] is not Action.TRANSMIT:
            return Input.CLEAR_READY
        self._next = self._prepare(now)
        return Input.CLEAR_READY if self._next is not None else Input.CLEAR_EMPTY

    def _prepare(self, now: float) -> bytes | None:
        if self._replies:
            self.counters.replies_sent += 1
            return self._replies.pop(0)
        size = self.policy.payload_bytes(now)
        fragment = self.sender.next_fragment(size, now, 8 / self.bit_rate)
        if fragment is None:
            return None
        self.counters.fragments_sent += 1
        return encode(fragment)

    # --- the table, applied ----------------------------------------------------------

    def _apply(self, event: Input, now: float, effects: list[Effect], snr_db: float = float("nan")) -> None:
        state, action = TRANSITIONS[(self.state, event)]
        self.state = state
        limits = self.limits
        if action is Action.START_BURST:
            self.counters.bursts += 1
            self._burst_frames = 0
            self.sender.presume_lost(now)
            self.sender.outcomes.clear()  # the last burst's tail died with its trail: the decay's loss, not the path's
            self.policy.burst_started(now)
            self.policy.probe_heard(now, snr_db)
            effects.append(BurstStarted(now, snr_db))
            self.deadline = now + limits.turnaround
        elif action is Action.ARM_TURNAROUND:
            self.deadline = now + limits.turnaround
        elif action is Action.TRANSMIT:
            frame = self._next if self._next is not None else self._prepare(now)
            self._next = None
            if frame is None:  # only after CLEAR_HOLD, whose go-ahead found nothing to send
                self.state = State.WAITING
                self.deadline = self._silence_since() + limits.burst_silence
                return
            air_end = self._air_end = now + self._airtime(len(frame))
            self.counters.bytes_sent += len(frame)
            self._burst_frames += 1
            effects.append(Transmit(frame, air_end))
            self.deadline = air_end
        elif action is Action.WAIT:
            self.deadline = self._silence_since() + limits.burst_silence
        elif action is Action.END_BURST:
            self.deadline = None
            effects.append(BurstEnded(now, self._burst_frames))
        # Action.NONE leaves the deadline as it was.

    def _silence_since(self) -> float:
        """Since when the terminal has heard no probe: the last probe, or in half
        duplex the end of its own last frame, if later (it was deaf meanwhile)."""
        if self.duplex is Duplex.HALF:
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
            self.policy.fragment_settled(*outcomes.popleft())

    def _take_command(self, command_id: int, opcode: int, arguments: bytes, effects: list[Effect]) -> None:
        if command_id in self._commands:
            self.counters.commands_repeated += 1
            reply = self._commands[command_id]
            if reply is not None and reply not in self._replies:
                self._replies.append(reply)
            return
        self._commands[command_id] = None
        while len(self._commands) > self.limits.max_remembered_commands:
            self._commands.popitem(last=False)
        self.counters.commands_executed += 1
        effects.append(CommandArrived(command_id, opcode, arguments))
