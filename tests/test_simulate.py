"""The main job end to end: terminal service, simulated air and master, over virtual time."""

from __future__ import annotations

import json
import math
import random

import pytest
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.channel.model import Opening, TrailSet, with_openings
from ionotrail.harness.demo.gauge import SET_INTERVAL, DemoGauge
from ionotrail.harness.runners.simulate import REPORT_KEYS, invariant_holds, simulate
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.wire import Probe, ReplyStatus, decode
from ionotrail.terminal.wire.crc import crc32c


class Messages:
    """An application with a fixed set of messages, all due at the start."""

    def __init__(self, *sizes: int) -> None:
        self.payloads = [bytes([n + 1]) * size for n, size in enumerate(sizes)]
        self._due: float | None = 0.0

    def next_due(self) -> float | None:
        return self._due

    def take(self, now: float, room: int) -> list[tuple[bytes, Priority]]:
        self._due = None
        return [(p, Priority.ROUTINE) for p in self.payloads]

    def command(self, opcode: int, arguments: bytes) -> tuple[ReplyStatus, bytes]:
        return ReplyStatus.UNKNOWN_OPCODE, b""


def short_scenario(hours: float = 0.01) -> scenarios.Scenario:
    # The protocol's tests keep the receiver on: with the power scheduler's
    # batching, a lone message would wait for company (tests/test_power_run.py).
    return scenarios.load(None, [f"scenario.duration_hours={hours}", *scenarios.PROTOCOL_ONLY])


def openings(s: scenarios.Scenario, *items: Opening) -> TrailSet:
    return with_openings(TrailSet(s), list(items))


def flat(report: dict[str, object], prefix: str = "") -> dict[str, object]:
    out: dict[str, object] = {}
    for key, value in report.items():
        if isinstance(value, dict) and key != "abandoned_reasons":
            out |= flat(value, f"{prefix}{key}.")
        else:
            out[prefix + key] = value
    return out


@pytest.fixture(scope="module")
def six_hours() -> dict[str, object]:
    return simulate(short_scenario(6.0)).report


def test_report_has_every_key_and_the_invariant_holds(six_hours: dict[str, object]) -> None:
    keys = flat(six_hours)
    assert set(REPORT_KEYS) <= set(keys)
    assert invariant_holds(six_hours)
    messages = six_hours["messages"]
    assert isinstance(messages, dict) and messages["offered"] >= 24 and messages["delivered"] > 0
    json.dumps(six_hours)  # plain JSON all the way down


def test_the_same_seed_replays_exactly(six_hours: dict[str, object]) -> None:
    again = simulate(short_scenario(6.0)).report
    drop = {"wall_seconds", "speedup"}
    assert {k: v for k, v in six_hours.items() if k not in drop} == {k: v for k, v in again.items() if k not in drop}
    other = simulate(scenarios.load(None, ["scenario.duration_hours=6", "scenario.seed=2"])).report
    assert other["messages"] != six_hours["messages"] or other["frames"] != six_hours["frames"]


def test_a_day_without_trails_delivers_nothing_and_loses_nothing() -> None:
    s = short_scenario(24.0)
    run = simulate(s, trails=openings(s), limits=Limits(max_queued_messages=200))
    m = run.report["messages"]
    assert m["delivered"] == 0 and m["abandoned"] == 0
    assert m["pending"] == m["offered"] >= 96
    frames = dict(run.report["frames"])
    assert all(n == 0 for n in frames.pop("refused").values())
    assert frames == {"sent": 0, "received": 0, "crc_failed": 0}
    assert run.link.counters.probes_heard == 0
    assert invariant_holds(run.report)


def test_a_burst_closing_mid_fragment_loses_only_that_fragment() -> None:
    # One strong opening (30 dB, no fading) that holds 1.0 s and then collapses
    # (tau 2 ms); 256-byte fragments take 0.44 s each, so the third one is on the
    # air when the path closes.
    s = short_scenario()
    close = 10.0 + 1.0 + 0.002 * math.log(10 ** (30 / 10) / 10 ** (9.59 / 10))
    frames: list[tuple[float, int, bool]] = []
    run = simulate(
        s,
        "fixed-256",
        source=Messages(3000),
        trails=openings(s, Opening(10.0, 30.0, 0.002, hold=1.0)),
        seconds=30.0,
        configure_air=lambda air: setattr(air, "on_uplink", lambda t, n, ok, snr: frames.append((t, n, ok))),
    )
    bit_time = 1 / s.bit_rate
    before = [f for f in frames if f[0] + 8 * f[1] * bit_time <= close]
    straddling = [f for f in frames if f[0] < close < f[0] + 8 * f[1] * bit_time]
    assert len(before) == 2 and all(ok for _, _, ok in before)
    assert len(straddling) == 1 and not straddling[0][2]
    # The master holds exactly the bytes of the fragments that ended before the close.
    held = run.master.reassembler.held((False, 0x0A31, 7), 0)
    assert held == ((0, 512),)
    assert run.report["messages"]["pending"] == 1 and invariant_holds(run.report)


@pytest.mark.parametrize(
    ("policy", "duplex", "resends"),
    [("fixed-128", "full", True), ("adaptive", "full", True), ("stop-and-wait", "full", False), ("adaptive", "half", False)],
)
def test_lost_acknowledgements_cause_retransmission_not_double_delivery(policy: str, duplex: str, resends: bool) -> None:
    # Two openings; in the first every probe that carries an acknowledgement is
    # lost, so the terminal hears nothing once its first fragment has arrived.
    # Sending back to back, it has put out fragments of several messages by
    # then; the next opening's first probe acknowledges only one of them, the
    # others' unconfirmed bytes are presumed lost and go again, and the master
    # keeps one copy.  Waiting for each acknowledgement (stop-and-wait, half
    # duplex) it had one fragment out, which that probe confirms.  Either way
    # nothing is delivered twice.
    s = scenarios.load(None, ["scenario.duration_hours=0.01", f"protocol.duplex={duplex}", *scenarios.PROTOCOL_ONLY])
    def lose_acks_in_first_opening(air: object) -> None:
        def keep(t: float, frame: bytes) -> bool:
            probe = decode(frame)
            return not (isinstance(probe, Probe) and probe.ack is not None and t < 20.0)

        air.probe_filter = keep  # type: ignore[attr-defined]

    run = simulate(
        s,
        policy,
        source=Messages(100, 150, 120),
        trails=openings(s, Opening(10.0, 30.0, 0.3, hold=2.0), Opening(25.0, 30.0, 0.3, hold=4.0)),
        seconds=35.0,
        configure_air=lose_acks_in_first_opening,
    )
    report = run.report
    assert run.air.counters.probes_filtered > 0
    assert report["messages"]["delivered"] == 3 and report["messages"]["duplicates_delivered"] == 0
    assert len(run.deliveries) == 3, "every message reached the master once"
    if resends:
        assert run.link.sender.counters.presumed_lost_bytes > 0, "unconfirmed bytes were sent again"
        assert run.master.reassembler.counters.duplicate_fragments > 0, "the master saw the repeats and kept one copy"
    assert run.link.sender.pending == 0 and invariant_holds(report)
    assert sorted(r.crc32c for r in run.deliveries) == sorted(crc32c(p) for p in Messages(100, 150, 120).payloads)


def test_real_time_and_virtual_time_deliver_the_same() -> None:
    """The same service, air and master on asyncio's own loop in real time (3 s of
    wall clock) and on the virtual-time loop: the same messages arrive."""
    s = short_scenario()
    trails = openings(s, Opening(0.5, 30.0, 0.005, hold=0.8), Opening(1.8, 30.0, 0.005, hold=0.8))
    runs = [simulate(s, "adaptive", source=Messages(200, 200, 200, 200), trails=trails, seconds=3.0, realtime=rt) for rt in (False, True)]
    virtual, real = ([(r.message_id, r.size, r.crc32c) for r in run.deliveries] for run in runs)
    assert len(virtual) == 4
    assert virtual == real
    assert runs[1].report["wall_seconds"] >= 3.0, "the real-time run took its 3 s of wall clock"


def test_half_duplex_and_stop_and_wait_still_deliver_everything() -> None:
    s = short_scenario()
    trails = openings(s, *(Opening(10.0 + 20 * k, 25.0, 0.4, hold=3.0) for k in range(4)))
    for policy, duplex in (("stop-and-wait", "full"), ("adaptive", "half")):
        scenario = scenarios.load(None, ["scenario.duration_hours=0.03", f"protocol.duplex={duplex}", *scenarios.PROTOCOL_ONLY])
        run = simulate(scenario, policy, source=Messages(300, 40, 500), trails=trails, seconds=100.0)
        assert run.report["messages"]["delivered"] == 3, (policy, duplex, run.report["messages"])
        assert invariant_holds(run.report)


def test_a_command_reaches_the_demo_gauge_once() -> None:
    """A master command rides on probes until the terminal's reply comes back;
    the terminal executes it once however often it hears it."""
    s = short_scenario()
    trails = openings(s, Opening(5.0, 30.0, 0.3, hold=2.0), Opening(15.0, 30.0, 0.3, hold=2.0))
    gauge = DemoGauge(random.Random(1), interval_s=3600.0)
    run = simulate(s, source=gauge, trails=trails, seconds=25.0, master_commands=[(0x0A31, SET_INTERVAL, (900).to_bytes(4, "big"))])
    assert gauge.interval_s == 900.0
    assert [(r.terminal, r.status) for r in run.master.replies] == [(0x0A31, int(ReplyStatus.OK))]
    assert run.link.commands.counters.executed == 1
    assert run.link.commands.counters.repeated > 0, "the probes repeated the command until the reply arrived"


def test_the_invariant_catches_a_sender_that_drops_a_message_silently(monkeypatch: pytest.MonkeyPatch) -> None:
    from ionotrail.terminal.delivery.sender import Sender

    queue = Sender.queue
    calls = []

    def forgetful(self: Sender, payload: bytes, now: float, priority: Priority = Priority.ROUTINE) -> int:
        wire_id = queue(self, payload, now, priority)
        calls.append(wire_id)
        if len(calls) == 2:  # the second message vanishes without an event
            message = self._queue.pop(max(self._queue))
            del self._by_wire_id[message.wire_id]
            self._eligible_now = None
        return wire_id

    monkeypatch.setattr(Sender, "queue", forgetful)
    s = short_scenario()
    run = simulate(s, source=Messages(100, 100, 100), trails=openings(s, Opening(5.0, 30.0, 0.3, hold=3.0)), seconds=20.0)
    m = run.report["messages"]
    assert (m["offered"], m["delivered"], m["pending"], m["abandoned"]) == (3, 2, 0, 0)
    assert not invariant_holds(run.report)


@pytest.mark.parametrize(("policy", "duplex"), [(p, "full") for p in ("adaptive", "fixed-32", "fixed-256", "stop-and-wait")] + [("adaptive", "half"), ("stop-and-wait", "half")])
def test_every_policy_keeps_using_the_openings(policy: str, duplex: str) -> None:
    """Liveness over two hours of demo trails with a backlogged source: bursts
    keep starting and payload keeps moving, whatever the policy (a stall, such
    as a fragment waiting forever for an acknowledgement, shows as a collapse).
    The floor is far below every policy's measured efficiency (ionotrail bench
    link), so this is not a performance test."""
    s = scenarios.load(None, ["scenario.duration_hours=2", f"protocol.duplex={duplex}", *scenarios.PROTOCOL_ONLY])
    report = simulate(s, policy, source="backlog", backlog_size=1001).report
    assert report["bursts"] >= 0.5 * report["trails"]["used"] > 0
    assert report["utilisation"] > 0.2
    assert invariant_holds(report)
