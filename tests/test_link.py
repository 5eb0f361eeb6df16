"""The burst link: its transition table, cell by cell, and the behaviour around it."""

from __future__ import annotations

import dataclasses

import pytest
from ionotrail.terminal.delivery.sender import MessageAcknowledged, Sender
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.link.policy import Fixed, StopAndWait
from ionotrail.terminal.link.terminal import (
    TRANSITIONS,
    Action,
    Arrival,
    BurstEnded,
    BurstStarted,
    CommandArrived,
    Duplex,
    Input,
    Link,
    State,
    Transmit,
)
from ionotrail.terminal.wire import AckBlock, CommandBlock, Fragment, Probe, Reply, ReplyStatus, decode, encode

TERMINAL, OTHER, MASTER = 0x0A31, 0x0B00, 7
BIT_RATE = 4800.0


def probe(sequence: int = 0, poll: int | None = None, ack: AckBlock | None = None, command: CommandBlock | None = None) -> bytes:
    return encode(Probe(MASTER, sequence, poll=poll, ack=ack, command=command))


def make_link(messages: int = 1, size: int = 600, *, duplex: Duplex = Duplex.FULL, policy: object = None, limits: Limits = DEFAULT_LIMITS) -> Link:
    sender = Sender(TERMINAL, MASTER, limits=limits)
    for n in range(messages):
        sender.queue(bytes([n + 1]) * size, 0.0)
    return Link(sender, policy or Fixed(64), bit_rate=BIT_RATE, duplex=duplex, limits=limits)  # type: ignore[arg-type]


def hear(link: Link, t: float, frame: bytes | None = None, snr: float = 20.0) -> list[object]:
    return list(link.on_frame(Arrival(frame if frame is not None else probe(), t, snr)))


def fire(link: Link) -> list[object]:
    assert link.deadline is not None
    return list(link.on_timer(link.deadline))


def transmitted(effects: list[object]) -> list[Fragment]:
    out = []
    for e in effects:
        if isinstance(e, Transmit):
            frame = decode(e.frame)
            assert isinstance(frame, Fragment)
            out.append(frame)
    return out


# --- the table itself ------------------------------------------------------------------


def test_every_state_has_a_row_for_every_input() -> None:
    assert set(TRANSITIONS) == {(s, i) for s in State for i in Input}
    for nxt, action in TRANSITIONS.values():
        assert isinstance(nxt, State) and isinstance(action, Action)


@pytest.mark.parametrize(("state", "event"), sorted(TRANSITIONS, key=lambda k: (k[0].name, k[1].name)), ids=lambda v: v.name)
def test_each_cell_does_what_its_action_says(state: State, event: Input) -> None:
    """White box: put the link in ``state``, apply ``event``, check the cell's
    next state and the effect its action promises, for all 28 cells."""
    link = make_link()
    now = 100.0
    link.state = state
    link._last_probe = now - 0.01  # a probe was heard just now
    link._last_probe_ours = True
    link.deadline = before = 123.0
    effects: list[object] = []
    link._apply(event, now, effects)  # type: ignore[arg-type]
    nxt, action = TRANSITIONS[(state, event)]
    assert link.state is nxt
    limits = link.limits
    if action is Action.NONE:
        assert effects == [] and link.deadline == before
    elif action is Action.START_BURST:
        assert [type(e) for e in effects] == [BurstStarted] and link.deadline == now + limits.turnaround
        assert link.counters.bursts == 1
    elif action is Action.ARM_TURNAROUND:
        assert effects == [] and link.deadline == now + limits.turnaround
    elif action is Action.TRANSMIT:
        (sent,) = effects
        assert isinstance(sent, Transmit) and link.deadline == sent.air_end
        assert sent.air_end == pytest.approx(now + 8 * len(sent.frame) / BIT_RATE)
    elif action is Action.WAIT:
        assert effects == [] and link.deadline == link._last_probe + limits.burst_silence
    elif action is Action.END_BURST:
        assert [type(e) for e in effects] == [BurstEnded] and link.deadline is None


# Cells no sequence of inputs can reach: no timer runs while listening, only the
# silence timer runs while waiting, and a hold is decided only at a frame's end.
UNREACHABLE = {(State.LISTENING, i) for i in (Input.CLEAR_READY, Input.CLEAR_HOLD, Input.CLEAR_EMPTY, Input.SILENT)} | {
    (State.WAITING, i) for i in (Input.CLEAR_READY, Input.CLEAR_HOLD, Input.CLEAR_EMPTY)
} | {(State.TURNAROUND, Input.CLEAR_HOLD)}


def _record(link: Link, visited: set[tuple[State, Input]]) -> None:
    apply = link._apply

    def recording(event: Input, now: float, effects: list[object], snr_db: float = float("nan")) -> None:
        visited.add((link.state, event))
        apply(event, now, effects, snr_db)  # type: ignore[arg-type]

    link._apply = recording  # type: ignore[method-assign]


def test_ordinary_inputs_reach_every_reachable_cell() -> None:
    """Black box: drive links only through on_frame and on_timer, and check that
    together the walks visit every cell except the unreachable ones."""
    visited: set[tuple[State, Input]] = set()

    # A full-duplex burst: probe, turnaround, fragments with probes in between.
    link = make_link(messages=1, size=150)
    _record(link, visited)
    hear(link, 0.0, probe(poll=OTHER))  # polled elsewhere while listening
    hear(link, 0.1)  # LISTENING, PROBE_READY
    hear(link, 0.105)  # TURNAROUND, PROBE_READY
    fire(link)  # TURNAROUND, CLEAR_READY
    hear(link, link.deadline - 0.01)  # TRANSMITTING, PROBE_READY
    hear(link, link.deadline - 0.005, probe(poll=OTHER))  # TRANSMITTING, PROBE_ELSEWHERE
    fire(link)  # CLEAR_EMPTY: the last probe polled someone else -> WAITING
    hear(link, link.deadline - 0.2, probe(poll=OTHER))  # WAITING, PROBE_ELSEWHERE
    hear(link, link.deadline - 0.2)  # WAITING, PROBE_READY -> TURNAROUND
    fire(link)
    while link.state is State.TRANSMITTING and link.sender.next_id == 1 and link.sender.outstanding()[0][2] == ():
        t = link.deadline
        hear(link, t - 0.001)
        effects = fire(link)
        if not transmitted(effects):
            break
    # Everything sent: the fragments are in flight, nothing fresh -> CLEAR_EMPTY.
    assert link.state is State.WAITING
    done = AckBlock(TERMINAL, 0, (), complete=True)
    assert any(isinstance(e, MessageAcknowledged) for e in hear(link, link.deadline - 0.1, probe(ack=done)))  # WAITING, PROBE_EMPTY
    fire(link)  # WAITING, SILENT

    # A probe answered, then the message acknowledged during the turnaround.
    link = make_link(messages=1, size=20)
    _record(link, visited)
    hear(link, 0.0)
    hear(link, 0.001, probe(ack=AckBlock(TERMINAL, 0, (), complete=True)))  # TURNAROUND, PROBE_EMPTY
    fire(link)  # TURNAROUND, CLEAR_EMPTY
    link = make_link()
    _record(link, visited)
    hear(link, 0.0)
    hear(link, 0.001, probe(poll=OTHER))  # TURNAROUND, PROBE_ELSEWHERE

    # A turnaround longer than the silence interval ends the burst at once.
    link = make_link(limits=Limits(turnaround=0.3, burst_silence=0.2))
    _record(link, visited)
    hear(link, 0.0)
    fire(link)  # TURNAROUND, SILENT

    # A long fragment with no probe during it: the path is gone when it ends.
    link = make_link(policy=Fixed(256))
    _record(link, visited)
    hear(link, 0.0)
    fire(link)
    hear(link, link.deadline - 0.1)
    fire(link)
    assert link.state is State.TRANSMITTING
    fire(link)  # 0.44 s of airtime after the last probe: TRANSMITTING, SILENT
    assert link.state is State.LISTENING

    # Half duplex: every fragment waits for the next probe.
    link = make_link(duplex=Duplex.HALF)
    _record(link, visited)
    hear(link, 0.0)
    fire(link)
    fire(link)  # TRANSMITTING, CLEAR_HOLD

    # Nothing to send: a probe changes nothing.
    link = make_link(messages=0)
    _record(link, visited)
    hear(link, 0.0)  # LISTENING, PROBE_EMPTY

    # The acknowledgement that ends the queue arrives while a fragment is on the air.
    link = make_link(messages=1, size=20, policy=Fixed(256))
    _record(link, visited)
    hear(link, 0.0)
    fire(link)
    hear(link, link.deadline - 0.001, probe(ack=AckBlock(TERMINAL, 0, (), complete=True)))  # TRANSMITTING, PROBE_EMPTY

    expected = set(TRANSITIONS) - UNREACHABLE
    assert expected - visited == set()
    assert visited & UNREACHABLE == set()


def test_no_timer_runs_while_listening() -> None:
    link = make_link()
    assert link.deadline is None and link.on_timer(1e9) == []
    hear(link, 0.0, probe(poll=OTHER))
    assert link.state is State.LISTENING and link.deadline is None


# --- behaviour ---------------------------------------------------------------------


def test_burst_sends_back_to_back_from_turnaround_until_silence() -> None:
    link = make_link(messages=4, size=1000)
    effects = hear(link, 10.0)
    assert isinstance(effects[0], BurstStarted) and link.deadline == pytest.approx(10.0 + DEFAULT_LIMITS.turnaround)
    fire(link)
    starts, ends = [], []
    probe_at = 10.0
    while link.state is not State.LISTENING:
        now = link.deadline
        while probe_at + 0.1 <= now and probe_at + 0.1 < 12.0:  # probes every 0.1 s until t = 12
            probe_at += 0.1
            hear(link, probe_at)
        effects = fire(link)
        for e in effects:
            if isinstance(e, Transmit):
                starts.append(now)
                ends.append(e.air_end)
    assert len(starts) > 10
    # Back to back: each fragment starts when the previous one ends.
    assert all(s == pytest.approx(e) for s, e in zip(starts[1:], ends[:-1], strict=False))
    # The last fragment begins within burst_silence of the last probe.
    assert starts[-1] - probe_at < DEFAULT_LIMITS.burst_silence
    assert link.counters.bursts == 1


def test_a_poll_for_another_terminal_keeps_the_terminal_quiet() -> None:
    link = make_link()
    assert hear(link, 0.0, probe(poll=OTHER)) == []
    assert link.state is State.LISTENING
    assert isinstance(hear(link, 0.1, probe(poll=TERMINAL))[0], BurstStarted)


def test_probe_acknowledgement_completes_a_message() -> None:
    link = make_link(messages=1, size=20)
    hear(link, 0.0)
    (fragment,) = transmitted(fire(link))
    assert fragment.final
    events = hear(link, 0.1, probe(ack=AckBlock(TERMINAL, fragment.message_id, (), complete=True)))
    assert [type(e) for e in events] == [MessageAcknowledged]
    assert link.sender.pending == 0


def test_a_fragment_an_acknowledgement_does_not_show_is_sent_again_in_the_burst() -> None:
    link = make_link(messages=1, size=300, policy=Fixed(64))
    hear(link, 0.0)
    first = transmitted(fire(link))[0]
    second = transmitted(fire(link))[0]
    assert (first.offset, second.offset) == (0, 64)
    # The master got the second fragment but not the first; the probe carrying that
    # news was issued after both had left the antenna.
    t = link.deadline + 0.05
    hear(link, t, probe(ack=AckBlock(TERMINAL, first.message_id, ((64, 128),))))
    offsets = [f.offset for f in transmitted(fire(link))]
    assert offsets == [0], "the lost bytes go first"


def test_half_duplex_waits_for_a_probe_after_every_fragment() -> None:
    link = make_link(messages=2, size=500, duplex=Duplex.HALF)
    hear(link, 0.0)
    assert len(transmitted(fire(link))) == 1
    assert transmitted(fire(link)) == [] and link.state is State.WAITING
    hear(link, link.deadline - 0.2)
    assert link.state is State.TURNAROUND
    assert len(transmitted(fire(link))) == 1


def test_stop_and_wait_sends_the_next_fragment_only_after_an_acknowledgement() -> None:
    link = make_link(messages=1, size=300, policy=StopAndWait())
    hear(link, 0.0)
    (first,) = transmitted(fire(link))
    fire(link)
    assert link.state is State.WAITING
    hear(link, link.deadline - 0.2)  # a probe without news: still waiting
    assert link.state is State.WAITING
    hear(link, link.deadline - 0.2, probe(ack=AckBlock(TERMINAL, first.message_id, ((0, 64),))))
    assert link.state is State.TURNAROUND
    (second,) = transmitted(fire(link))
    assert second.offset == 64


def test_a_command_is_executed_once_and_its_reply_repeated() -> None:
    link = make_link(messages=0)
    command = CommandBlock(3, 1, b"\x00\x00\x03\x84")
    effects = hear(link, 0.0, probe(poll=TERMINAL, command=command))
    assert effects[0] == CommandArrived(3, 1, b"\x00\x00\x03\x84")
    assert not any(isinstance(e, BurstStarted) for e in effects), "no reply yet, nothing to send"
    link.reply(3, ReplyStatus.OK, b"ok")
    effects = hear(link, 0.1, probe(poll=TERMINAL, command=command))  # repeated: not executed again
    assert not any(isinstance(e, CommandArrived) for e in effects)
    (sent,) = [e for e in fire(link) if isinstance(e, Transmit)]
    assert decode(sent.frame) == Reply(TERMINAL, MASTER, 3, ReplyStatus.OK, b"ok")
    hear(link, link.deadline + 0.05, probe(poll=TERMINAL, command=command))  # the master did not hear it
    fire(link)
    assert link.counters.replies_sent == 2 and link.counters.commands_executed == 1
    with pytest.raises(UsageError):
        link.reply(3, ReplyStatus.OK)


def test_remembered_commands_are_bounded() -> None:
    limits = Limits(max_remembered_commands=2)
    link = make_link(messages=0, limits=limits)
    for n in range(5):
        hear(link, n, probe(poll=TERMINAL, command=CommandBlock(n, 1)))
        link.reply(n, ReplyStatus.OK)
    assert len(link._commands) == 2


def test_frames_the_link_cannot_use_are_counted_not_acted_on() -> None:
    link = make_link()
    assert hear(link, 0.0, b"\x11\x00\x00") == []
    assert hear(link, 0.0, encode(Probe(MASTER + 1, 0))) == []
    assert link.counters.decode_errors == 1 and link.counters.ignored_frames == 1
    assert link.state is State.LISTENING


def test_link_refuses_a_nonsense_bit_rate() -> None:
    with pytest.raises(UsageError):
        Link(Sender(TERMINAL, MASTER), Fixed(64), bit_rate=0)


def test_limits_check_the_link_timeouts() -> None:
    with pytest.raises(UsageError):
        Limits(burst_silence=-1.0)
    with pytest.raises(UsageError):
        dataclasses.replace(DEFAULT_LIMITS, turnaround=True)


def test_idle_probes_and_a_new_bursts_first_probe_stay_out_of_the_last_bursts_fit() -> None:
    from ionotrail.terminal.link.policy import Adaptive

    policy = Adaptive(BIT_RATE, prior_tau_s=0.3)
    link = make_link(messages=3, size=1000, policy=policy)
    decay_db_per_s = 10 / (0.3 * 2.302585)  # a clean 0.3 s decay
    hear(link, 0.0, snr=25.0)
    for k in range(1, 5):
        hear(link, 0.1 * k, snr=25.0 - decay_db_per_s * 0.1 * k)
    while link.state is not State.LISTENING:
        fire(link)
    for k in range(5):  # idle probes from other trails, minutes later
        hear(link, 60.0 + k, probe(poll=OTHER), snr=12.0)
    hear(link, 100.0, snr=30.0)  # the next burst starts
    assert policy.typical_tau_s == __import__("pytest").approx(0.3 + (0.3 - 0.3) / 8, rel=1e-3)


def test_half_duplex_silence_counts_from_the_end_of_the_terminals_own_frame() -> None:
    link = make_link(messages=1, size=1000, duplex=Duplex.HALF, policy=Fixed(256))
    hear(link, 0.0)
    fire(link)  # a 0.44 s fragment: longer than burst_silence
    fire(link)
    assert link.state is State.WAITING, "deaf while sending is not silence"
    hear(link, link.deadline - 0.1)
    assert link.state is State.TURNAROUND and link.counters.bursts == 1


def test_stop_and_wait_carries_on_in_the_next_burst_when_an_acknowledgement_never_came() -> None:
    link = make_link(messages=1, size=300, policy=StopAndWait())
    hear(link, 0.0)
    (first,) = transmitted(fire(link))
    while link.state is not State.LISTENING:  # the trail dies before any acknowledgement
        fire(link)
    effects = hear(link, 60.0)  # the next trail
    assert isinstance(effects[0], BurstStarted)
    (again,) = transmitted(fire(link))
    assert again.offset == first.offset == 0, "the unconfirmed fragment goes again"
