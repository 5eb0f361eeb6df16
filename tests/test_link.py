"""The terminal's burst link: the table's shape, its behaviour step by step, and
proof that every cell matters.

The expectations here come from the protocol's rules as docs/link.md states
them, worked out by hand for each step (times from the airtime of a frame at
4800 bit/s, the 10 ms turnaround and the 0.25 s silence), never read from the
table.  ``test_every_single_cell_change_is_caught`` then changes each cell of
the table in turn, to every other next state and every other action, and
shows that some scenario here fails for each change.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable

import pytest
from ionotrail.harness.runners.keying import simulated_site, simulated_terminal
from ionotrail.terminal.auth.authenticator import MasterAuthenticator
from ionotrail.terminal.delivery.sender import MessageAcknowledged, Sender
from ionotrail.terminal.errors import ProtocolError, UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, FORMAT_VERSION, Limits
from ionotrail.terminal.link import table
from ionotrail.terminal.link.policy import Adaptive, Fixed, StopAndWait
from ionotrail.terminal.link.terminal import (
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
from ionotrail.terminal.link.timer import Purpose, Timer
from ionotrail.terminal.wire import AckBlock, Command, CommandBlock, Fragment, Probe, ReplyStatus, decode, encode

TERMINAL, OTHER, MASTER = 0x0A31, 0x0B00, 7
BIT_RATE = 4800.0
TURN = DEFAULT_LIMITS.turnaround  # 0.010 s
QUIET = DEFAULT_LIMITS.burst_silence  # 0.25 s


def air(payload: int) -> float:
    """Airtime of a fragment carrying ``payload`` bytes: 10 bytes of header and CRC on top (docs/wire.md)."""
    return 8 * (payload + 10) / BIT_RATE


def probe(sequence: int = 0, poll: int | None = None, ack: AckBlock | None = None, command: CommandBlock | None = None) -> bytes:
    return encode(Probe(MASTER, sequence, poll=poll, ack=ack, command=command))


def done(message_id: int = 0) -> bytes:
    return probe(ack=AckBlock(TERMINAL, message_id, (), complete=True))


def make_link(messages: int = 1, size: int = 600, *, duplex: Duplex = Duplex.FULL, policy: object = None, limits: Limits = DEFAULT_LIMITS) -> Link:
    sender = Sender(TERMINAL, MASTER, limits=limits)
    for n in range(messages):
        sender.queue(bytes([n + 1]) * size, 0.0)
    auth = simulated_terminal(0, TERMINAL)
    return Link(sender, policy or Fixed(64), bit_rate=BIT_RATE, duplex=duplex, limits=limits, auth=auth)  # type: ignore[arg-type]


SIGNER = MasterAuthenticator(simulated_site(0))


def signed(block: CommandBlock) -> CommandBlock:
    """``block`` as the master signs it for TERMINAL (a fresh counter each call)."""
    sig = SIGNER.sign_command(
        TERMINAL, frame_version=FORMAT_VERSION, master=MASTER, command_id=block.command_id, opcode=block.opcode, arguments=block.arguments
    )
    return CommandBlock(block.command_id, block.opcode, block.arguments, sig.epoch, sig.counter, sig.tag)


def signed_block(command_id: int, opcode: int, arguments: bytes = b"") -> CommandBlock:
    return signed(CommandBlock(command_id, opcode, arguments))


def commit(link: Link) -> None:
    """What the shell does after every input: make the link's key and command state durable."""
    if link.unsaved:
        link.durable_batch()
        link.durable_committed()


def hear(link: Link, t: float, frame: bytes | None = None, snr: float = 20.0) -> list[object]:
    effects = list(link.on_frame(Arrival(frame if frame is not None else probe(), t, snr)))
    commit(link)
    return effects


def fire(link: Link) -> list[object]:
    assert link.deadline is not None
    now = link.deadline
    effects = list(link.on_timer(now))
    assert link.deadline is None or link.deadline > now, "after on_timer(now) the deadline is None or later than now"
    return effects


def transmitted(effects: list[object]) -> list[Fragment]:
    out = []
    for e in effects:
        if isinstance(e, Transmit):
            frame = decode(e.frame)
            assert isinstance(frame, Fragment)
            out.append(frame)
    return out


# --- the table's shape, from the timer rule --------------------------------------------

PROBES = {Input.PROBE_READY, Input.PROBE_EMPTY, Input.PROBE_ELSEWHERE}
# Which timer runs in each state (docs/link.md), and so which timer inputs can arrive there.
TIMER_INPUTS = {
    State.LISTENING: set(),  # no timer runs while listening
    State.TURNAROUND: {Input.GO_READY, Input.GO_EMPTY, Input.SILENT},
    State.TRANSMITTING: {Input.SENT_READY, Input.SENT_HOLD, Input.SENT_EMPTY, Input.SILENT},
    State.WAITING: {Input.SILENT},  # the silence timer is due exactly when silence begins
}
POSSIBLE = {(s, i) for s in State for i in PROBES | TIMER_INPUTS[s]}


def test_the_table_has_a_cell_for_exactly_the_pairs_that_can_happen() -> None:
    assert set(table.TRANSITIONS) == POSSIBLE
    assert len(POSSIBLE) == 20


@pytest.mark.parametrize(("state", "event"), sorted(set(dict.fromkeys((s, i) for s in State for i in Input)) - POSSIBLE, key=str))
def test_a_pair_that_cannot_happen_raises_a_protocol_error(state: State, event: Input) -> None:
    with pytest.raises(ProtocolError, match=f"cannot take input {event.name} in state {state.name}"):
        table.decide(state, event)


def test_timer_classification_follows_the_facts() -> None:
    classify = table.classify_timer
    assert classify(Purpose.AIR_END, silent=True, ours=True, hold=False, ready=True) is Input.SILENT
    assert classify(Purpose.TURNAROUND, silent=True, ours=True, hold=False, ready=True) is Input.SILENT
    assert classify(Purpose.TURNAROUND, silent=False, ours=True, hold=True, ready=True) is Input.GO_READY  # the probe just heard is the go-ahead
    assert classify(Purpose.TURNAROUND, silent=False, ours=False, hold=False, ready=True) is Input.GO_EMPTY
    assert classify(Purpose.TURNAROUND, silent=False, ours=True, hold=False, ready=False) is Input.GO_EMPTY
    assert classify(Purpose.AIR_END, silent=False, ours=True, hold=True, ready=True) is Input.SENT_HOLD
    assert classify(Purpose.AIR_END, silent=False, ours=True, hold=False, ready=False) is Input.SENT_EMPTY
    assert classify(Purpose.AIR_END, silent=False, ours=False, hold=False, ready=True) is Input.SENT_EMPTY
    assert classify(Purpose.AIR_END, silent=False, ours=True, hold=False, ready=True) is Input.SENT_READY
    with pytest.raises(ProtocolError):
        classify(Purpose.SILENCE, silent=False, ours=True, hold=False, ready=True)
    assert table.classify_probe(ours=False, ready=True) is Input.PROBE_ELSEWHERE
    assert table.classify_probe(ours=True, ready=True) is Input.PROBE_READY
    assert table.classify_probe(ours=True, ready=False) is Input.PROBE_EMPTY


# --- scenarios: every step's state, timer and effects worked out by hand ---------------

Expected = tuple[State, Timer | None, list[type]]


class Script:
    """Drives a link and checks each step against what the protocol says."""

    def __init__(self, link: Link) -> None:
        self.link = link

    def _check(self, effects: list[object], now: float, state: State, timer: Timer | None, kinds: list[type]) -> None:
        link = self.link
        assert link.state is state, f"at {now}: state {link.state} != {state}"
        if timer is None:
            assert link.timer is None, f"at {now}: timer {link.timer} should be None"
        else:
            assert link.timer is not None and link.timer.purpose is timer.purpose, f"at {now}: timer {link.timer} != {timer}"
            assert link.timer.at == pytest.approx(timer.at, abs=1e-9), f"at {now}: timer {link.timer} != {timer}"
        assert [type(e) for e in effects] == kinds, f"at {now}: effects {effects}"

    def hear(self, t: float, frame: bytes | None, state: State, timer: Timer | None, kinds: list[type]) -> list[object]:
        effects = hear(self.link, t, frame)
        assert self.link.deadline is None or self.link.deadline >= t
        self._check(effects, t, state, timer, kinds)
        return effects

    def fire(self, state: State, timer: Timer | None, kinds: list[type]) -> list[object]:
        assert self.link.deadline is not None
        now = self.link.deadline
        effects = fire(self.link)
        self._check(effects, now, state, timer, kinds)
        return effects


L, T, X, W = State.LISTENING, State.TURNAROUND, State.TRANSMITTING, State.WAITING
TA, AE, SI = Purpose.TURNAROUND, Purpose.AIR_END, Purpose.SILENCE


def scenario_full_duplex_burst() -> None:
    """A probe starts a burst; fragments go back to back while probes come; the
    burst ends one silence after the last probe."""
    run = Script(make_link(messages=1, size=100))  # sealed 104 bytes: fragments of 64 and 40
    run.hear(0.0, None, T, Timer(TA, TURN), [BurstStarted])
    first_end = TURN + air(64)
    run.fire(X, Timer(AE, first_end), [Transmit])
    run.hear(0.1, None, X, Timer(AE, first_end), [])  # heard while sending: the frame runs on
    run.fire(X, Timer(AE, first_end + air(40)), [Transmit])  # back to back
    run.fire(W, Timer(SI, 0.1 + QUIET), [])  # all sent, awaiting the verdict
    run.hear(0.3, done(), W, Timer(SI, 0.3 + QUIET), [MessageAcknowledged])
    run.fire(L, None, [BurstEnded])
    run.hear(1.0, None, L, None, [])  # nothing to send: no burst


def scenario_polls_for_another_terminal() -> None:
    """A probe polling another terminal keeps this one quiet in every state."""
    run = Script(make_link(messages=1, size=100))
    run.hear(0.0, probe(poll=OTHER), L, None, [])
    run.hear(0.1, None, T, Timer(TA, 0.1 + TURN), [BurstStarted])
    run.hear(0.105, probe(poll=OTHER), W, Timer(SI, 0.105 + QUIET), [])  # yield before transmitting
    run.hear(0.2, probe(poll=OTHER), W, Timer(SI, 0.2 + QUIET), [])
    run.hear(0.3, None, T, Timer(TA, 0.3 + TURN), [])  # our turn again
    run.hear(0.305, None, T, Timer(TA, 0.3 + TURN), [])  # the turnaround already runs
    end = 0.3 + TURN + air(64)
    run.fire(X, Timer(AE, end), [Transmit])
    run.hear(0.35, probe(poll=OTHER), X, Timer(AE, end), [])  # finish the frame ...
    run.fire(W, Timer(SI, 0.35 + QUIET), [])  # ... then yield
    run.fire(L, None, [BurstEnded])


def scenario_turnaround_finds_nothing_to_send() -> None:
    """An acknowledgement heard during the turnaround completes the last message:
    nothing goes out, and the burst ends after the silence."""
    run = Script(make_link(messages=1, size=20))  # one fragment of 24 bytes
    run.hear(0.0, None, T, Timer(TA, TURN), [BurstStarted])
    run.fire(X, Timer(AE, TURN + air(24)), [Transmit])
    run.fire(W, Timer(SI, QUIET), [])
    run.fire(L, None, [BurstEnded])  # the trail died before any verdict
    run.hear(10.0, None, T, Timer(TA, 10.0 + TURN), [BurstStarted])  # pending: a new burst
    run.hear(10.005, done(), T, Timer(TA, 10.0 + TURN), [MessageAcknowledged])
    run.fire(W, Timer(SI, 10.005 + QUIET), [])
    run.fire(L, None, [BurstEnded])


def scenario_verdict_while_sending() -> None:
    """The verdict on the only message arrives while its resent fragment is on the air."""
    run = Script(make_link(messages=1, size=20))
    run.hear(0.0, None, T, Timer(TA, TURN), [BurstStarted])
    run.fire(X, Timer(AE, TURN + air(24)), [Transmit])
    run.fire(W, Timer(SI, QUIET), [])
    run.fire(L, None, [BurstEnded])
    run.hear(10.0, None, T, Timer(TA, 10.0 + TURN), [BurstStarted])
    end = 10.0 + TURN + air(24)
    run.fire(X, Timer(AE, end), [Transmit])
    run.hear(10.03, done(), X, Timer(AE, end), [MessageAcknowledged])
    run.fire(W, Timer(SI, 10.03 + QUIET), [])


def scenario_half_duplex() -> None:
    """Half duplex: after each frame wait for a probe; silence counts from the frame's end."""
    run = Script(make_link(messages=1, size=100, duplex=Duplex.HALF))
    run.hear(0.0, None, T, Timer(TA, TURN), [BurstStarted])
    first_end = TURN + air(64)
    run.fire(X, Timer(AE, first_end), [Transmit])
    run.fire(W, Timer(SI, first_end + QUIET), [])
    run.hear(0.2, None, T, Timer(TA, 0.2 + TURN), [])
    second_end = 0.2 + TURN + air(40)
    run.fire(X, Timer(AE, second_end), [Transmit])
    run.fire(W, Timer(SI, second_end + QUIET), [])
    run.fire(L, None, [BurstEnded])


def scenario_path_dies_during_a_long_frame() -> None:
    """A 256-byte fragment outlasts the silence: at its end, with no probe since, the burst is over."""
    run = Script(make_link(messages=1, size=1000, policy=Fixed(256)))
    run.hear(0.0, None, T, Timer(TA, TURN), [BurstStarted])
    run.fire(X, Timer(AE, TURN + air(256)), [Transmit])
    run.fire(L, None, [BurstEnded])


def scenario_turnaround_longer_than_silence() -> None:
    """A radio slower to turn around than the silence interval never gets to send."""
    limits = Limits(turnaround=0.3, burst_silence=0.25)
    run = Script(make_link(messages=1, size=100, limits=limits))
    run.hear(0.0, None, T, Timer(TA, 0.3), [BurstStarted])
    run.fire(L, None, [BurstEnded])


SCENARIOS = [
    scenario_full_duplex_burst,
    scenario_polls_for_another_terminal,
    scenario_turnaround_finds_nothing_to_send,
    scenario_verdict_while_sending,
    scenario_half_duplex,
    scenario_path_dies_during_a_long_frame,
    scenario_turnaround_longer_than_silence,
]


@pytest.mark.parametrize("scenario", SCENARIOS, ids=lambda f: f.__name__)
def test_scenario(scenario: Callable[[], None]) -> None:
    scenario()


def _caught(cell: tuple[State, Input], mutant: tuple[State, Action]) -> bool:
    original = table.TRANSITIONS[cell]
    table.TRANSITIONS[cell] = mutant
    try:
        for scenario in SCENARIOS:
            try:
                scenario()
            except Exception:  # noqa: BLE001 - an assertion, a protocol error, anything: the change was noticed
                return True
        return False
    finally:
        table.TRANSITIONS[cell] = original


def single_cell_mutants() -> list[tuple[tuple[State, Input], tuple[State, Action]]]:
    out = []
    for cell, (state, action) in table.TRANSITIONS.items():
        out += [(cell, (other, action)) for other in State if other is not state]
        out += [(cell, (state, other)) for other in Action if other is not action]
    return out


def test_every_single_cell_change_is_caught(capsys: pytest.CaptureFixture[str]) -> None:
    mutants = single_cell_mutants()
    missed = [(cell, mutant) for cell, mutant in mutants if not _caught(cell, mutant)]
    with capsys.disabled():
        print(f"\n[link table mutation check] {len(mutants)} single-cell changes, {len(mutants) - len(missed)} caught")
    assert len(mutants) == 20 * (len(State) - 1 + len(Action) - 1)
    assert missed == []


# --- behaviour around the table ----------------------------------------------------------


def test_no_timer_runs_while_listening() -> None:
    link = make_link()
    assert link.deadline is None and link.on_timer(1e9) == []
    hear(link, 0.0, probe(poll=OTHER))
    assert link.state is State.LISTENING and link.deadline is None


def test_an_early_timer_call_does_nothing() -> None:
    link = make_link()
    hear(link, 0.0)
    assert link.on_timer(TURN / 2) == [] and link.timer == Timer(Purpose.TURNAROUND, TURN)


def test_a_flood_of_commands_executes_each_id_once_and_keeps_bounded_queues() -> None:
    # RFC 4303 s3.4.3 window semantics over the 8-bit command id; bounds from terminal/limits.py.
    link = make_link(messages=0)
    executed: list[int] = []
    for n in range(5000):
        command_id = n % 40  # a sender cycling ids inside the 64-id window, no probe between
        for effect in hear(link, n * 1e-3, encode(Command(MASTER, TERMINAL, signed_block(command_id, 1, b"\x00\x00\x03\x84")))):
            if isinstance(effect, CommandArrived):
                executed.append(effect.command_id)
                link.reply(effect.command_id, ReplyStatus.OK)
    assert sorted(executed) == list(range(40)), "each id executed once"
    assert link.commands.queued <= DEFAULT_LIMITS.max_queued_replies
    assert link.commands.kept <= DEFAULT_LIMITS.max_remembered_commands
    assert link.commands.counters.repeated == 5000 - 40


def test_ids_cycling_through_the_whole_space_keep_the_reply_queue_bounded() -> None:
    # A sender cycling all 256 ids runs ahead of any window an 8-bit id allows
    # (at most 2^(8-1), RFC 4303's bound for serial numbers): each arrival is new and
    # runs, until commands are authenticated.  What the terminal bounds is memory.
    link = make_link(messages=0)
    executed = 0
    for n in range(5000):
        for effect in hear(link, n * 1e-3, encode(Command(MASTER, TERMINAL, signed_block(n % 256, 1)))):
            if isinstance(effect, CommandArrived):
                executed += 1
                link.reply(effect.command_id, ReplyStatus.OK)
    assert executed == 5000
    assert link.commands.kept == DEFAULT_LIMITS.max_remembered_commands
    assert link.commands.queued == DEFAULT_LIMITS.max_queued_replies
    assert link.commands.counters.replies_dropped == link.commands.counters.executed - DEFAULT_LIMITS.max_queued_replies


def test_a_command_older_than_the_window_is_not_executed() -> None:
    link = make_link(messages=0)
    for command_id in (0, 100):
        hear(link, 0.0, encode(Command(MASTER, TERMINAL, signed_block(command_id, 1))))
        link.reply(command_id, ReplyStatus.OK)
    assert hear(link, 0.1, encode(Command(MASTER, TERMINAL, signed_block(0, 1)))) == []  # 100 behind: outside 64
    assert link.commands.counters.stale == 1 and link.commands.counters.executed == 2


def test_the_policy_learns_the_paths_decay_from_bursts_and_not_from_idle_probes() -> None:
    policy = Adaptive(BIT_RATE, prior_tau_s=0.3)
    link = make_link(messages=3, size=1000, policy=policy)
    tau = 0.5  # the path's real decay, away from the prior
    decay_db_per_s = 10 / (tau * 2.302585)  # power exp(-t/tau) falls 4.343/tau dB per second
    hear(link, 0.0, snr=25.0)
    for k in range(1, 5):
        hear(link, 0.1 * k, snr=25.0 - decay_db_per_s * 0.1 * k)
    while link.state is not State.LISTENING:
        fire(link)
    for k in range(5):  # idle probes from other trails, minutes later, at unrelated levels
        hear(link, 60.0 + k, probe(poll=OTHER), snr=12.0 + 3 * k)
    hear(link, 100.0, snr=30.0)  # the next burst starts: the last one's fit is learnt, 1/8 of the way
    # The gain 1/8 is RFC 6298's SRTT gain (s2), which the policy borrows.
    assert policy.typical_tau_s == pytest.approx(0.3 + (tau - 0.3) / 8, rel=1e-3)


def test_limits_check_the_command_bounds() -> None:
    with pytest.raises(UsageError):
        Limits(command_window=129)  # the selective-repeat bound 2^(8-1) for 8-bit ids
    with pytest.raises(UsageError):
        Limits(max_queued_replies=0)


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
    command = signed(CommandBlock(3, 1, b"\x00\x00\x03\x84"))
    effects = hear(link, 0.0, probe(poll=TERMINAL, command=command))
    assert effects[0] == CommandArrived(3, 1, b"\x00\x00\x03\x84")
    assert not any(isinstance(e, BurstStarted) for e in effects), "no reply yet, nothing to send"
    link.reply(3, ReplyStatus.OK, b"ok")
    assert link.unsaved and not link._ready(), "a reply waits until the state it speaks for is durable"
    commit(link)
    effects = hear(link, 0.1, probe(poll=TERMINAL, command=command))  # repeated: not executed again
    assert not any(isinstance(e, CommandArrived) for e in effects)
    (sent,) = [e for e in fire(link) if isinstance(e, Transmit)]
    assert decode(sent.frame)[:5] == (TERMINAL, MASTER, 3, ReplyStatus.OK, b"ok")
    hear(link, link.deadline + 0.05, probe(poll=TERMINAL, command=command))  # the master did not hear it
    fire(link)
    assert link.counters.replies_sent == 2 and link.commands.counters.executed == 1
    assert link.counters.command_repeats == 2  # the same signed block, heard again twice
    with pytest.raises(UsageError):
        link.reply(3, ReplyStatus.OK)


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


def test_the_command_window_follows_serial_arithmetic_across_the_wrap() -> None:
    # RFC 4303 s3.4.3 window over 8-bit ids, ahead/behind by RFC 1982 serial arithmetic.
    from ionotrail.terminal.link.commands import CommandMemory, Verdict

    memory = CommandMemory(Limits(command_window=64))
    assert memory.arrived(250) is Verdict.NEW
    assert memory.arrived(3) is Verdict.NEW, "9 ahead across the wrap"
    assert memory.arrived(250) is Verdict.REPEAT, "9 behind, inside the window"
    assert memory.arrived(252) is Verdict.NEW, "behind but never seen"
    assert memory.classify((3 + 127) % 256) is Verdict.NEW, "127 ahead: the last id that is ahead"
    assert memory.classify((3 + 128) % 256) is Verdict.STALE, "128 ahead counts as behind, and far outside the window"
    assert memory.classify((3 - 64) % 256) is Verdict.STALE, "exactly the window behind: too old"
    assert memory.classify((3 - 63) % 256) is Verdict.NEW
