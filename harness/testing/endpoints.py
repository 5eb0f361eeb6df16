"""Stateful property test of the two endpoints themselves: the terminal's link and the master.

Hypothesis drives a :class:`~ionotrail.terminal.link.terminal.Link` (with its
real sender and a fragment policy) and a
:class:`~ionotrail.terminal.link.master.MasterEndpoint` through the same
methods the service and the master adapter call (``on_frame``, ``on_timer``,
``reply``, ``command``), joined by a channel whose rules are its
misbehaviours: probes lost, corrupted or delivered late (an older probe,
with its older acknowledgement, after newer ones), uplink frames lost,
duplicated, delivered out of order or corrupted, time jumps of seconds to
hours, polls for another terminal and commands for both.  Time only moves
forward; timers are served when they come due, or late (a busy shell).

After every step the invariants hold:

* nothing is delivered twice, and delivered bytes equal queued bytes;
* no acknowledged byte is sent again: no fragment carries a byte that the
  last acknowledgement the link heard for its message listed as held (the
  receiver's word replaces the sender's record, so a master that forgot bytes
  may be sent them again), except the one-byte solicitation of the last
  byte of a message whose every byte is listed as held;
* after a probe that polled another terminal the link transmits nothing
  until a probe that lets it (for us, or for nobody);
* after ``on_timer(now)`` each endpoint's deadline is None or later than ``now``.

At the end the channel turns fair (probes every interval, every frame
delivered, the other terminal answers its commands) and every queued
message must be delivered exactly once.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable

from hypothesis import event
from hypothesis import strategies as st
from hypothesis.stateful import RuleBasedStateMachine, initialize, invariant, rule
from ionotrail.harness.runners.keying import simulated_site, simulated_terminal
from ionotrail.terminal.auth.authenticator import MasterAuthenticator
from ionotrail.terminal.delivery.rangeset import RangeSet
from ionotrail.terminal.delivery.sender import Sender
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import FORMAT_VERSION, Limits
from ionotrail.terminal.link.master import Delivered, MasterEffect, MasterEndpoint, ProbeChanged
from ionotrail.terminal.link.policy import Adaptive, Fixed, FragmentPolicy, StopAndWait
from ionotrail.terminal.link.terminal import Arrival, CommandArrived, Duplex, Effect, Link, Transmit
from ionotrail.terminal.wire import Fragment, Probe, Reply, ReplyStatus, decode, encode

TERMINAL, OTHER, MASTER = 0x0A31, 0x0B00, 7
BIT_RATE = 4800.0
LIMITS = Limits(max_queued_messages=8, reassembly_lifetime=600.0)
MAX_IN_FLIGHT = 32  # uplink frames the simulated air holds before the oldest is lost
FAIR_SECONDS = 4 * 3600.0  # how long the fair channel may take to deliver the rest

POLICIES: dict[str, Callable[[], FragmentPolicy]] = {
    "fixed-16": lambda: Fixed(16),
    "fixed-64": lambda: Fixed(64),
    "fixed-256": lambda: Fixed(256),
    "stop-and-wait": StopAndWait,
    "adaptive": lambda: Adaptive(BIT_RATE),
}


class EndpointsMachine(RuleBasedStateMachine):
    """A terminal link and a master endpoint over a hostile channel."""

    def __init__(self) -> None:
        super().__init__()
        self.now = 0.0
        self.queued: dict[int, bytes] = {}  # message id -> payload
        self.delivered: dict[int, bytes] = {}
        self.acked: dict[int, RangeSet] = {}  # message id -> bytes the last acknowledgement heard lists as held
        self.complete: set[int] = set()
        self.uplink: list[tuple[float, bytes]] = []  # (air end, frame) in flight
        self.silenced = False
        self.serial = 0
        self.old_probes: deque[bytes] = deque(maxlen=8)  # probes the master sent before its current one

    @initialize(
        policy=st.sampled_from(sorted(POLICIES)),
        duplex=st.sampled_from([Duplex.FULL, Duplex.HALF]),
        sizes=st.lists(st.integers(1, 700), min_size=1, max_size=4),
    )
    def start(self, policy: str, duplex: Duplex, sizes: list[int]) -> None:
        event(f"policy {policy}, {duplex.value} duplex")
        self.link = Link(
            self.make_sender(), POLICIES[policy](), bit_rate=BIT_RATE, duplex=duplex, limits=LIMITS, auth=simulated_terminal(0, TERMINAL)
        )
        self.other = simulated_terminal(0, OTHER)
        self.master = self.make_master()
        for size in sizes:
            self.queue(size)

    def make_sender(self) -> Sender:
        """The terminal's sender; a subclass may put another one under test."""
        return Sender(TERMINAL, MASTER, limits=LIMITS)

    def make_master(self) -> MasterEndpoint:
        """The master endpoint; a subclass may put another one under test."""
        return MasterEndpoint(MASTER, limits=LIMITS, auth=MasterAuthenticator(simulated_site(0)))

    # --- the application and the operator ------------------------------------------------

    @rule(size=st.integers(1, 700))
    def queue(self, size: int) -> None:
        if not self.link.sender.can_queue():
            return
        self.serial += 1
        payload = self.serial.to_bytes(4, "big") + bytes((self.serial + k) & 0xFF for k in range(size))
        message_id = self.link.sender.queue(payload, self.now)
        self.queued[message_id] = payload
        self.acked[message_id] = RangeSet()

    @rule(ours=st.booleans(), opcode=st.integers(0, 255))
    def command(self, ours: bool, opcode: int) -> None:
        if len(self.master.pending_commands) >= LIMITS.max_queued_commands:
            return
        _, effects = self.master.command(TERMINAL if ours else OTHER, opcode, b"", self.now)
        self._master_effects(effects)

    @rule()
    def other_terminal_answers(self) -> None:
        pending = self.master.pending_commands
        if pending and pending[0][0] == OTHER:
            command_id = pending[0][1].command_id
            sig = self.other.sign_reply(frame_version=FORMAT_VERSION, master=MASTER, command_id=command_id, status=0, result=b"")
            reply = Reply(OTHER, MASTER, command_id, ReplyStatus.OK, b"", sig.epoch, sig.counter, sig.tag)
            self._master_effects(self.master.on_frame(encode(reply), self.now))

    # --- the channel -------------------------------------------------------------------

    @rule(gap=st.floats(0.0, 0.3), fate=st.sampled_from(["heard", "heard", "heard", "lost", "corrupted"]), bit=st.integers(0, 1 << 16))
    def probe(self, gap: float, fate: str, bit: int) -> None:
        self.advance(self.now + gap)
        frame = self.master.probe
        if fate == "lost":
            return
        if fate == "corrupted":
            frame = _flip(frame, bit)
        self._hear(frame)

    @rule(index=st.integers(0, MAX_IN_FLIGHT), fate=st.sampled_from(["delivered", "delivered", "duplicated", "lost", "corrupted"]), bit=st.integers(0, 1 << 16))
    def uplink_frame(self, index: int, fate: str, bit: int) -> None:
        if not self.uplink:
            return
        air_end, frame = self.uplink[index % len(self.uplink)]  # any order: reordering
        self.advance(max(self.now, air_end))
        if fate != "duplicated":
            self.uplink.remove((air_end, frame))
        if fate == "lost":
            return
        if fate == "corrupted":
            frame = _flip(frame, bit)
        self._master_effects(self.master.on_frame(frame, self.now))

    @rule(age=st.integers(0, 7), gap=st.floats(0.0, 0.3))
    def late_probe(self, age: int, gap: float) -> None:
        """An older probe, delayed on its way, arrives after newer ones."""
        self.advance(self.now + gap)
        if self.old_probes:
            self._hear(self.old_probes[-1 - age % len(self.old_probes)])

    @rule(seconds=st.sampled_from([0.01, 0.1, 0.3, 5.0, 120.0, 3600.0]))
    def time_passes(self, seconds: float) -> None:
        self.advance(self.now + seconds)

    @rule(delay=st.sampled_from([0.001, 0.05, 0.3, 2.0]))
    def busy_shell(self, delay: float) -> None:
        """The shell serves the next due timer late, at ``delay`` after it came due."""
        due = [d for d in (self.link.deadline, self.master.deadline) if d is not None]
        if due:
            self.advance(max(self.now, min(due) + delay), late=True)

    @rule()
    def link_timer(self) -> None:
        if self.link.deadline is not None:
            self.advance(self.link.deadline)

    # --- the shells' part: serve every timer when due ------------------------------------

    def advance(self, until: float, *, late: bool = False) -> None:
        """Move time to ``until``, serving every timer that comes due on the way, in
        order, each when it comes due (or, ``late``, all of them at ``until``)."""
        while True:
            due = [d for d in (self.link.deadline, self.master.deadline) if d is not None and d <= until]
            if not due:
                break
            self.now = max(self.now, until if late else min(due))
            if self.link.deadline is not None and self.link.deadline <= self.now:
                self._link_effects(self.link.on_timer(self.now))
                assert self.link.deadline is None or self.link.deadline > self.now, "link deadline not later than now after on_timer"
            if self.master.deadline is not None and self.master.deadline <= self.now:
                self._master_effects(self.master.on_timer(self.now))
                assert self.master.deadline is None or self.master.deadline > self.now, "master deadline not later than now after on_timer"
        self.now = max(self.now, until)

    def _hear(self, frame: bytes) -> None:
        try:
            probe = decode(frame)
        except DecodeError:  # a corrupted probe: the link counts and ignores it
            probe = None
        if isinstance(probe, Probe) and probe.master == MASTER:
            if probe.ack is not None and probe.ack.terminal == TERMINAL and not probe.ack.downlink:
                self._ack_heard(probe.ack.message_id, probe.ack.ranges, probe.ack.complete or probe.ack.refused)
            self.silenced = probe.poll is not None and probe.poll != TERMINAL
        self._link_effects(self.link.on_frame(Arrival(frame, self.now, 20.0)))

    def _ack_heard(self, message_id: int, ranges: tuple[tuple[int, int], ...], final: bool) -> None:
        if message_id not in self.acked:
            return
        if final:
            self.complete.add(message_id)
        self.acked[message_id] = RangeSet(ranges)

    def _link_effects(self, effects: list[Effect]) -> None:
        for effect in effects:
            if isinstance(effect, Transmit):
                assert not self.silenced, "transmitted after a probe that polled another terminal"
                self._check_fragment(effect.frame)
                self.uplink.append((effect.air_end, effect.frame))
                if len(self.uplink) > MAX_IN_FLIGHT:
                    self.uplink.pop(0)
            elif isinstance(effect, CommandArrived):
                self.link.reply(effect.command_id, ReplyStatus.OK)
        if self.link.unsaved:  # the shell's commit (in memory here): replies go only after it
            self.link.durable_batch()
            self.link.durable_committed()

    def _check_fragment(self, frame: bytes) -> None:
        fragment = decode(frame)
        if not isinstance(fragment, Fragment):
            return
        message_id = fragment.message_id
        assert message_id not in self.complete, f"message {message_id} sent again after it was acknowledged complete"
        held = self.acked[message_id]
        sealed_size = len(self.queued[message_id]) + 4
        if held.contains(0, sealed_size) and (fragment.offset, fragment.end) == (sealed_size - 1, sealed_size):
            return  # the solicitation of a verdict
        assert not any(held.overlapping(fragment.offset, fragment.end)), (
            f"bytes [{fragment.offset}, {fragment.end}) of message {message_id} sent again; acknowledged {held.ranges()}"
        )

    def _master_effects(self, effects: list[MasterEffect]) -> None:
        for effect in effects:
            if isinstance(effect, ProbeChanged):
                self.old_probes.append(effect.frame)
            if isinstance(effect, Delivered):
                delivery = effect.delivery
                assert delivery.message_id not in self.delivered, f"message {delivery.message_id} delivered twice"
                assert delivery.payload == self.queued[delivery.message_id], "delivered bytes differ from the queued bytes"
                self.delivered[delivery.message_id] = delivery.payload

    # --- invariants and the fair end ------------------------------------------------------

    @invariant()
    def bounded(self) -> None:
        if hasattr(self, "master"):  # after the machine's initialisation
            assert self.master.reassembler.buffered_bytes <= LIMITS.max_bytes_total
            assert self.link.commands.queued <= LIMITS.max_queued_replies

    def teardown(self) -> None:
        if not hasattr(self, "link"):
            return
        end = self.now + FAIR_SECONDS
        next_probe = self.now
        while self.link.sender.pending and self.now < end:
            self.other_terminal_answers()
            next_probe += LIMITS.probe_interval
            # Deliver every frame that has left the antenna before the next probe.
            while self.uplink and min(self.uplink)[0] <= next_probe:
                air_end, frame = min(self.uplink)
                self.uplink.remove((air_end, frame))
                self.advance(max(self.now, air_end))
                self._master_effects(self.master.on_frame(frame, self.now))
            self.advance(next_probe)
            self._hear(self.master.probe)
        event(f"messages queued: {min(len(self.queued), 5)}{'+' if len(self.queued) >= 5 else ''}")
        event(f"bursts: {'0' if not self.link.counters.bursts else '1-9' if self.link.counters.bursts < 10 else '10+'}")
        missing = sorted(set(self.queued) - set(self.delivered))
        assert not self.link.sender.pending, f"messages {missing} not delivered over a fair channel"
        assert set(self.delivered) == set(self.queued)


def _flip(frame: bytes, bit: int) -> bytes:
    bit %= 8 * len(frame)
    data = bytearray(frame)
    data[bit // 8] ^= 1 << (bit % 8)
    return bytes(data)

