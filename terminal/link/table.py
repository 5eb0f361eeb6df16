"""Every decision of the terminal's burst link: inputs, the table, and how
what happened becomes an input.

Everything that affects the terminal link's state machine lives here.
:func:`classify_probe` and :func:`classify_timer` are pure functions of facts
the link reports (was the probe for us, is anything ready to send, has the
path gone quiet); they never look at the table.  :data:`TRANSITIONS` maps a
(state, input) pair to the next state and the action that sets the link's
one timer.  A pair that cannot happen is absent: meeting one raises
:class:`~ionotrail.terminal.errors.ProtocolError`.

Which pairs can happen follows from the timer: no timer runs while
listening, so no timer input arrives there; the turnaround timer runs only
in TURNAROUND, the end of a frame's airtime only in TRANSMITTING, and the
silence timer only in WAITING.  Probes can arrive in every state.
"""

from __future__ import annotations

import enum

from ionotrail.terminal.errors import ProtocolError
from ionotrail.terminal.link.timer import Purpose


class State(enum.Enum):
    LISTENING = "listening"
    """Receiver on, no burst: waiting for a probe.  No timer runs."""
    TURNAROUND = "turnaround"
    """Heard a probe; the radio is switching to transmit (turnaround timer)."""
    TRANSMITTING = "transmitting"
    """A frame is on the air (timer at the end of its airtime)."""
    WAITING = "waiting"
    """In a burst but not transmitting: waiting for a probe, for an
    acknowledgement, a poll or the path to show itself open (silence timer)."""


class Input(enum.Enum):
    PROBE_READY = "probe for us, something to send"
    PROBE_EMPTY = "probe for us, nothing to send"
    PROBE_ELSEWHERE = "probe polling another terminal"
    GO_READY = "turnaround over, a frame ready"
    GO_EMPTY = "turnaround over, nothing to send"
    SENT_READY = "frame sent, the next ready"
    SENT_HOLD = "frame sent, must wait for a probe"
    SENT_EMPTY = "frame sent, nothing to send"
    SILENT = "no probe for burst_silence"


class Action(enum.Enum):
    """What the link does; every action sets its timer (or clears it)."""

    STAY_IDLE = "no timer"
    START_BURST = "start burst; timer: turnaround"
    ARM_TURNAROUND = "timer: turnaround"
    KEEP_TURNAROUND = "timer: the running turnaround"
    TRANSMIT = "transmit the ready frame; timer: its air end"
    KEEP_AIR_END = "timer: the frame's air end"
    WAIT = "timer: silence"
    END_BURST = "end burst; no timer"


S, I, A = State, Input, Action
TRANSITIONS: dict[tuple[State, Input], tuple[State, Action]] = {
    # Idle: only a probe we may answer, with something to send, starts a burst.
    (S.LISTENING, I.PROBE_READY): (S.TURNAROUND, A.START_BURST),
    (S.LISTENING, I.PROBE_EMPTY): (S.LISTENING, A.STAY_IDLE),
    (S.LISTENING, I.PROBE_ELSEWHERE): (S.LISTENING, A.STAY_IDLE),
    # Switching to transmit: the turnaround decides; a poll for another yields.
    (S.TURNAROUND, I.PROBE_READY): (S.TURNAROUND, A.KEEP_TURNAROUND),
    (S.TURNAROUND, I.PROBE_EMPTY): (S.TURNAROUND, A.KEEP_TURNAROUND),
    (S.TURNAROUND, I.PROBE_ELSEWHERE): (S.WAITING, A.WAIT),
    (S.TURNAROUND, I.GO_READY): (S.TRANSMITTING, A.TRANSMIT),
    (S.TURNAROUND, I.GO_EMPTY): (S.WAITING, A.WAIT),
    (S.TURNAROUND, I.SILENT): (S.LISTENING, A.END_BURST),
    # On the air: probes heard meanwhile (full duplex) feed acks and the silence clock.
    (S.TRANSMITTING, I.PROBE_READY): (S.TRANSMITTING, A.KEEP_AIR_END),
    (S.TRANSMITTING, I.PROBE_EMPTY): (S.TRANSMITTING, A.KEEP_AIR_END),
    (S.TRANSMITTING, I.PROBE_ELSEWHERE): (S.TRANSMITTING, A.KEEP_AIR_END),  # finish the frame, then yield
    (S.TRANSMITTING, I.SENT_READY): (S.TRANSMITTING, A.TRANSMIT),
    (S.TRANSMITTING, I.SENT_HOLD): (S.WAITING, A.WAIT),
    (S.TRANSMITTING, I.SENT_EMPTY): (S.WAITING, A.WAIT),
    (S.TRANSMITTING, I.SILENT): (S.LISTENING, A.END_BURST),
    # In a burst, quiet: the next probe we may answer resumes it.
    (S.WAITING, I.PROBE_READY): (S.TURNAROUND, A.ARM_TURNAROUND),
    (S.WAITING, I.PROBE_EMPTY): (S.WAITING, A.WAIT),
    (S.WAITING, I.PROBE_ELSEWHERE): (S.WAITING, A.WAIT),
    (S.WAITING, I.SILENT): (S.LISTENING, A.END_BURST),
}
del S, I, A


def decide(state: State, event: Input) -> tuple[State, Action]:
    """The table's cell for ``(state, event)``; a pair it lacks cannot happen."""
    try:
        return TRANSITIONS[(state, event)]
    except KeyError:
        raise ProtocolError(f"the link cannot take input {event.name} in state {state.name}") from None


def classify_probe(*, ours: bool, ready: bool) -> Input:
    """A probe from our master: ``ours`` when it polls nobody or us, ``ready``
    when the terminal has something it may send now."""
    if not ours:
        return Input.PROBE_ELSEWHERE
    return Input.PROBE_READY if ready else Input.PROBE_EMPTY


def classify_timer(purpose: Purpose, *, silent: bool, ours: bool, hold: bool, ready: bool) -> Input:
    """A timer of ``purpose`` came due.

    ``silent``: no probe for ``burst_silence``.  ``ours``: the last probe heard
    let us transmit.  ``hold``: after each frame the link must wait for a
    probe (half duplex, or a stop-and-wait policy).  ``ready``: a frame could
    be built now (the sender's own selection says so, not a guess).
    """
    if silent:
        return Input.SILENT
    if purpose is Purpose.TURNAROUND:
        return Input.GO_READY if ours and ready else Input.GO_EMPTY
    if purpose is Purpose.AIR_END:
        if hold:
            return Input.SENT_HOLD
        return Input.SENT_READY if ours and ready else Input.SENT_EMPTY
    # The silence timer is due exactly when silence begins; anything else is not a terminal timer.
    raise ProtocolError(f"the link's {purpose.value} timer came due while the path was not silent")
