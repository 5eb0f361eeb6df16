"""The master endpoint: probe contents, acknowledgements, commands, reassembly deadline, refusals.

Expectations follow the rules in docs/link.md; the reassembly timer starts at
the first fragment and is not restarted by later ones (RFC 8200 s4.5).
"""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.runners.keying import simulated_site
from ionotrail.terminal.auth.authenticator import MasterAuthenticator, TerminalAuthenticator
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, FORMAT_VERSION, Limits
from ionotrail.terminal.link.master import Delivered, MasterEndpoint, ProbeChanged, ReplyArrived
from ionotrail.terminal.link.timer import Purpose
from ionotrail.terminal.wire import (
    AckBlock,
    CommandBlock,
    Fragment,
    Probe,
    Reply,
    ReplyStatus,
    decode,
    encode,
    seal_message,
)
from ionotrail.terminal.wire.codec import decode_with_construct, encode_with_construct
from ionotrail.terminal.wire.crc import crc16

MASTER, T1, T2 = 7, 0x0A31, 0x0B00
SITE = simulated_site(0)
_TERMINALS: dict[int, TerminalAuthenticator] = {}


def keyed(**options: object) -> MasterEndpoint:
    """A master holding the site's keys (commands are signed, replies checked)."""
    return MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE), **options)  # type: ignore[arg-type]


def signed_reply(terminal: int, command_id: int, status: ReplyStatus, result: bytes = b"") -> bytes:
    """A reply frame as ``terminal`` signs it (a fresh counter each time)."""
    auth = _TERMINALS.setdefault(terminal, TerminalAuthenticator(SITE.root(terminal)))
    sig = auth.sign_reply(frame_version=FORMAT_VERSION, master=MASTER, command_id=command_id, status=int(status), result=result)
    return encode(Reply(terminal, MASTER, command_id, status, result, sig.epoch, sig.counter, sig.tag))
INTERVAL = DEFAULT_LIMITS.probe_interval


def fragment(terminal: int, message_id: int, sealed: bytes, start: int, end: int) -> bytes:
    return encode(Fragment(terminal, MASTER, message_id, start, sealed[start:end], final=end == len(sealed)))


def probe_of(endpoint: MasterEndpoint) -> Probe:
    frame = decode(endpoint.probe)
    assert isinstance(frame, Probe)
    return frame


def fire(endpoint: MasterEndpoint) -> list[object]:
    assert endpoint.timer is not None and endpoint.timer.purpose is Purpose.MASTER
    now = endpoint.timer.at
    effects = list(endpoint.on_timer(now))
    assert endpoint.deadline is None or endpoint.deadline > now, "after on_timer(now) the deadline is None or later than now"
    return effects


def test_a_half_built_message_expires_at_its_deadline_with_no_further_fragment() -> None:
    master = keyed()
    sealed = seal_message(b"x" * 100)
    master.on_frame(fragment(T1, 0, sealed, 0, 50), 10.0)
    master.on_frame(fragment(T1, 0, sealed, 50, 60), 20.0)  # a later fragment does not restart the timer
    assert master.reassembler.partial_count == 1
    assert master.deadline == pytest.approx(10.0 + DEFAULT_LIMITS.reassembly_lifetime)
    assert master.on_timer(master.deadline - 1.0) == []  # early: nothing happens
    assert master.reassembler.partial_count == 1
    fire(master)
    assert master.reassembler.partial_count == 0 and master.reassembler.counters.expired == 1
    assert master.deadline is None


def test_every_message_with_news_is_acknowledged_in_turn() -> None:
    master = keyed()
    a, b = seal_message(b"a" * 80), seal_message(b"b" * 80)
    effects = master.on_frame(fragment(T1, 0, a, 0, 40), 1.0)
    assert [type(e) for e in effects] == [ProbeChanged]
    assert probe_of(master).ack == AckBlock(T1, 0, ((0, 40),))
    assert master.on_frame(fragment(T1, 1, b, 0, 40), 1.02) == []  # news for b waits its turn
    assert master.on_frame(fragment(T1, 0, a, 40, 60), 1.04) != []  # fresher news for a: at once ...
    assert probe_of(master).ack == AckBlock(T1, 0, ((0, 60),))
    assert master.deadline == pytest.approx(1.0 + INTERVAL), "... without restarting a's interval"
    fire(master)
    assert probe_of(master).ack == AckBlock(T1, 1, ((0, 40),)), "b's news follows a probe interval later"
    assert master.deadline == pytest.approx(1.0 + DEFAULT_LIMITS.reassembly_lifetime), "no news left: the reassembly deadline"


def test_a_complete_message_is_delivered_once_and_acknowledged_complete() -> None:
    master = keyed()
    sealed = seal_message(b"hello")
    effects = master.on_frame(fragment(T1, 3, sealed, 0, len(sealed)), 5.0)
    (delivered,) = [e for e in effects if isinstance(e, Delivered)]
    assert delivered.delivery.payload == b"hello" and delivered.delivery.terminal == T1
    assert probe_of(master).ack == AckBlock(T1, 3, (), complete=True)
    again = master.on_frame(fragment(T1, 3, sealed, 0, len(sealed)), 6.0)
    assert not any(isinstance(e, Delivered) for e in again)
    assert master.counters.deliveries == 1


def test_terminals_have_their_own_ids_and_duplicate_windows() -> None:
    master = keyed()
    one, two = seal_message(b"from one"), seal_message(b"from two")
    got = []
    for terminal, sealed in ((T1, one), (T2, two), (T1, one), (T2, two)):
        for effect in master.on_frame(fragment(terminal, 0, sealed, 0, len(sealed)), 1.0):
            if isinstance(effect, Delivered):
                got.append((effect.delivery.terminal, effect.delivery.payload))
    assert got == [(T1, b"from one"), (T2, b"from two")]


def test_crc_failures_are_counted_apart_from_other_refusals() -> None:
    master = keyed()
    good = signed_reply(T1, 0, ReplyStatus.OK)
    bad_crc = good[:-1] + bytes([good[-1] ^ 0x01])
    master.on_frame(bad_crc, 1.0)
    master.on_frame(good[:2], 1.0)  # shorter than any frame
    body = bytes([0xF0 | good[0] & 0x0F]) + good[1:-2]  # format version 15: nobody speaks it
    master.on_frame(body + crc16(body).to_bytes(2, "big"), 1.0)
    assert master.counters.crc_failed == 1
    assert master.counters.refused == {"bad_crc": 1, "truncated": 1, "unsupported_version": 1}


def test_commands_poll_their_terminal_until_the_reply_then_the_next_goes() -> None:
    master = keyed()
    first, effects = master.command(T1, 1, b"\x00\x00\x03\x84", 0.0)
    assert [type(e) for e in effects] == [ProbeChanged]
    second, effects = master.command(T2, 2, b"", 0.0)
    third, _ = master.command(T1, 3, b"", 0.0)
    assert (first, second, third) == (0, 0, 1), "ids are allocated per terminal, in order"
    assert effects == [], "the second command waits: one poll at a time"
    probe = probe_of(master)
    assert probe.poll == T1 and probe.command[:3] == (0, 1, b"\x00\x00\x03\x84")
    assert master.on_frame(signed_reply(T2, 0, ReplyStatus.OK), 1.0) == []  # not the one asked
    effects = master.on_frame(signed_reply(T1, 0, ReplyStatus.OK, b"ok"), 2.0)
    assert ReplyArrived(T1, 0, int(ReplyStatus.OK), b"ok", 2.0) in effects
    assert probe_of(master).poll == T2
    master.on_frame(signed_reply(T1, 0, ReplyStatus.OK, b"ok"), 2.1)  # a repeat of that reply
    assert master.counters.replies == 1 and master.counters.stray_replies == 2


def test_the_command_queue_is_bounded() -> None:
    master = keyed(limits=Limits(max_queued_commands=2))
    master.command(T1, 1, b"", 0.0)
    master.command(T1, 1, b"", 0.0)
    with pytest.raises(UsageError, match="2 unanswered commands"):
        master.command(T1, 1, b"", 0.0)


def test_acknowledgement_news_is_bounded() -> None:
    master = keyed(limits=Limits(max_ack_news=2, max_partials_per_source=8))
    for message_id in range(6):
        sealed = seal_message(bytes([message_id]) * 40)
        master.on_frame(fragment(T1, message_id, sealed, 0, 10), 1.0)
    assert master.counters.news_dropped == 3  # one on the probe, two waiting, three dropped


def test_a_call_at_the_reassembly_deadline_always_expires() -> None:
    # Found by the endpoints machine: for this first-fragment time, (first + 600) - first
    # rounds to just under 600, so the old check (now - first >= lifetime) left the
    # message, and its deadline, due at the very instant on_timer was called.
    limits = Limits(reassembly_lifetime=600.0)
    master = keyed(limits=limits)
    sealed = seal_message(b"y" * 50)
    first = 3943.616755677566
    assert (first + 600.0) - first < 600.0
    master.on_frame(fragment(T1, 0, sealed, 0, 10), first)
    assert master.deadline == first + 600.0
    fire(master)
    assert master.reassembler.partial_count == 0


def test_a_stream_of_news_for_one_message_does_not_starve_the_others() -> None:
    # Terminal 2 keeps sending one message faster than the probe interval; terminal 3's
    # finished message must still reach the probe within an interval (docs/link.md).
    master = keyed()
    stream, done = seal_message(b"s" * 2000), seal_message(b"done")
    master.on_frame(fragment(T1, 0, stream, 0, 10), 0.0)
    master.on_frame(fragment(T2, 0, done, 0, len(done)), 0.01)
    carried = set()
    t, offset = 0.0, 10
    while t < 1.0:
        t += 0.03
        master.on_frame(fragment(T1, 0, stream, offset, offset + 10), t)
        offset += 10
        while master.deadline is not None and master.deadline <= t:
            fire(master)
        ack = probe_of(master).ack
        assert ack is not None
        carried.add(ack.terminal)
    assert T2 in carried


def test_a_silent_terminal_cannot_keep_the_others_quiet() -> None:
    limits = Limits(command_turn=60.0)
    master = keyed(limits=limits)
    master.command(T1, 1, b"", 0.0)  # T1 never answers
    assert master.poll == T1
    assert master.deadline == pytest.approx(60.0)
    fire(master)  # its turn is over: nobody is polled for as long
    assert master.poll is None and probe_of(master).command is None
    assert master.deadline == pytest.approx(120.0)
    fire(master)
    assert master.poll == T1, "then it gets another turn"
    master.command(T2, 2, b"", 130.0)
    master.on_frame(signed_reply(T2, 0, ReplyStatus.OK), 131.0)  # T2's command has not been on the air
    assert master.counters.stray_replies == 1
    fire(master)  # T1's turn ends at 180: T2's turn comes after the rest
    fire(master)
    assert master.poll == T2
    effects = master.on_frame(signed_reply(T1, 0, ReplyStatus.OK, b"late"), 250.0)  # an earlier turn's reply
    assert ReplyArrived(T1, 0, int(ReplyStatus.OK), b"late", 250.0) in effects
    assert master.poll == T2


def test_a_restarted_master_starts_its_command_ids_where_it_is_told() -> None:
    master = keyed(first_command_id=200)
    assert master.command(T1, 1, b"", 0.0)[0] == 200
    with pytest.raises(UsageError):
        keyed(first_command_id=256)


# --- the probe the master keeps encoded is the one the declaration gives -----------


class _Reference(MasterEndpoint):
    """The master as it encoded its probe before it kept its blocks encoded: a
    fresh Probe through the construct declaration at every change."""

    def _encode_probe(self) -> bytes:
        pending = self._commands[0] if self._polling else None
        if pending is None:
            return encode_with_construct(Probe(self.address, self._sequence, ack=self._ack))
        return encode_with_construct(Probe(self.address, self._sequence, poll=pending.terminal, ack=self._ack, command=pending.block))


_steps = st.lists(
    st.one_of(
        st.tuples(st.just("fragment"), st.sampled_from([T1, T2]), st.integers(0, 3), st.integers(0, 143), st.integers(1, 60)),
        st.tuples(st.just("command"), st.sampled_from([T1, T2]), st.integers(0, 255), st.binary(max_size=64)),
        st.tuples(st.just("reply"), st.integers(0, 3)),
        st.tuples(st.just("timer"), st.booleans()),
    ),
    max_size=60,
)


@pytest.mark.property
@given(steps=_steps, gaps=st.lists(st.sampled_from([0.0, 0.01, INTERVAL / 2, INTERVAL, 7.0]), min_size=1))
def test_the_master_sends_the_declarations_bytes_at_the_same_times(steps: list[tuple], gaps: list[float]) -> None:  # type: ignore[type-arg]
    # Both masters take the same inputs; every effect, probe and timer must be the
    # same, and every probe byte for byte the declaration's encoding of a Probe.
    limits = Limits(command_turn=5.0, max_ack_news=3)
    fast, reference = keyed(limits=limits), _Reference(MASTER, limits=limits, auth=MasterAuthenticator(SITE))
    assert fast.probe == reference.probe
    sealed = {(t, m): seal_message(bytes([t & 0xFF, m]) * 70) for t in (T1, T2) for m in range(4)}
    now = 0.0
    for k, step in enumerate(steps):
        now += gaps[k % len(gaps)]
        if step[0] == "fragment":
            _, terminal, message_id, start, length = step
            whole = sealed[terminal, message_id]
            start %= len(whole)
            raw = fragment(terminal, message_id, whole, start, min(start + length, len(whole)))
            outcomes = [m.on_frame(raw, now) for m in (fast, reference)]
        elif step[0] == "command":
            _, terminal, opcode, arguments = step
            outcomes = []
            for m in (fast, reference):
                try:
                    outcomes.append(m.command(terminal, opcode, arguments, now))
                except UsageError as exc:
                    outcomes.append(str(exc))
        elif step[0] == "reply":
            pending = fast.pending_commands  # a reply to one of them (a stray one if it has not been on the air)
            terminal, block = pending[step[1] % len(pending)] if pending else (T1, CommandBlock(step[1], 0))
            raw = signed_reply(terminal, block.command_id, ReplyStatus.OK, b"r")
            outcomes = [m.on_frame(raw, now) for m in (fast, reference)]
        else:
            if step[1] and fast.timer is not None:
                now = max(now, fast.timer.at)
            outcomes = [m.on_timer(now) for m in (fast, reference)]
        assert outcomes[0] == outcomes[1], step
        assert fast.probe == reference.probe and fast.timer == reference.timer
        assert encode_with_construct(decode_with_construct(fast.probe)) == fast.probe
    assert fast.counters == reference.counters
