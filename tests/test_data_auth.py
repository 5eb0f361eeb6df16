"""Uplink data authentication (docs/keys.md): the tagged fragment on the air,
the terminal that signs every transmission with a durable counter, the master
that checks tag and window before reassembly, and the option in a simulated day.

Expected sizes come from docs/wire.md's tables and docs/keys.md (epoch
2 bytes, counter 4, tag 8: 14 bytes per fragment); anti-replay rules from
RFC 4303 s3.4.3 (window) and s5 (sender counters across reboots) and RFC 6347
s4.1.2.6 (a retransmission is a new transmission with a new counter).
"""

from __future__ import annotations

import pickle
from collections.abc import Callable

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.runners.keying import simulated_site
from ionotrail.harness.runners.simulate import simulate
from ionotrail.terminal.auth import FRAGMENT_AUTH_BYTES, MasterAuthenticator, Outcome, TerminalAuthenticator
from ionotrail.terminal.auth.authenticator import DATA_COUNTER_KEY
from ionotrail.terminal.auth.formats import COUNTER_RECORD
from ionotrail.terminal.delivery.sender import Sender
from ionotrail.terminal.errors import BadField, CrcMismatch, TruncatedFrame, UsageError
from ionotrail.terminal.limits import AUTH_COUNTER_RESERVE, FORMAT_VERSION, FRAGMENT_OVERHEAD_BYTES, MAX_FRAME_BYTES
from ionotrail.terminal.link.master import Delivered, MasterEndpoint
from ionotrail.terminal.link.policy import Fixed
from ionotrail.terminal.link.terminal import Arrival, Link, Transmit
from ionotrail.terminal.wire import AuthFragment, Fragment, FrameType, decode, encode, formats
from ionotrail.terminal.wire.codec import decode_with_construct, encode_with_construct
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.frames import MAX_TAGGED_PAYLOAD, TAGGED_OVERHEAD_BYTES

TERMINAL, MASTER = 0x0A31, 7
SITE = simulated_site(11)


# --- the frame ---------------------------------------------------------------------


def test_the_tagged_fragment_by_hand() -> None:
    # docs/wire.md's tagged-fragment table: head (version 1, type 6), terminal,
    # master, message id, position (final, urgent, downlink, 13-bit offset),
    # epoch, counter, payload, tag, CRC-16/IBM-3740.
    frame = AuthFragment(Fragment(0x0A31, 7, 0x0102, 5, b"abc", final=True), 2, 0x01020304, b"TTTTTTTT")
    body = bytes.fromhex("16" "0a31" "07" "0102" "8005" "0002" "01020304") + b"abc" + b"TTTTTTTT"
    wire = body + crc16(body).to_bytes(2, "big")
    assert encode(frame) == encode_with_construct(frame) == wire
    assert decode(wire) == decode_with_construct(wire) == frame
    assert formats.TAGGED.parse(wire).fields.value.counter == 0x01020304
    assert frame.wire_length == len(wire) == len(b"abc") + TAGGED_OVERHEAD_BYTES
    assert FrameType.TAGGED == 6 and wire[0] == 0x16


def test_authentication_costs_fourteen_bytes_per_fragment() -> None:
    # docs/keys.md: epoch 2 + counter 4 + tag 8 = 14 bytes on top of the 10 of a plain fragment.
    assert FRAGMENT_AUTH_BYTES == 14
    assert TAGGED_OVERHEAD_BYTES == FRAGMENT_OVERHEAD_BYTES + FRAGMENT_AUTH_BYTES == 24
    plain = Fragment(1, 7, 3, 0, bytes(100))
    assert len(encode(AuthFragment(plain, 0, 1, bytes(8)))) - len(encode(plain)) == 14
    # The largest tagged fragment still fits the one receive buffer every frame fits.
    assert MAX_TAGGED_PAYLOAD == MAX_FRAME_BYTES - 24 == 242
    assert len(encode(AuthFragment(Fragment(1, 7, 3, 0, bytes(242)), 0, 1, bytes(8)))) == MAX_FRAME_BYTES
    with pytest.raises(UsageError, match="at most 242"):
        AuthFragment(Fragment(1, 7, 3, 0, bytes(243)), 0, 1, bytes(8))


@settings(max_examples=60, deadline=None)
@given(
    terminal=st.integers(0, 0xFFFF), master=st.integers(0, 0xFF), message_id=st.integers(0, 0xFFFF),
    offset=st.integers(0, 4000), payload=st.binary(min_size=1, max_size=MAX_TAGGED_PAYLOAD),
    flags=st.tuples(st.booleans(), st.booleans(), st.booleans()),
    epoch=st.integers(0, 0xFFFF), counter=st.integers(0, 2**32 - 1), tag=st.binary(min_size=8, max_size=8),
)  # fmt: skip
def test_round_trip_through_both_codecs(
    terminal: int, master: int, message_id: int, offset: int, payload: bytes, flags: tuple[bool, bool, bool],
    epoch: int, counter: int, tag: bytes,
) -> None:  # fmt: skip
    frame = AuthFragment(Fragment(terminal, master, message_id, offset, payload, *flags), epoch, counter, tag)
    wire = encode(frame)
    assert wire == encode_with_construct(frame)
    assert decode(wire) == decode_with_construct(wire) == frame
    assert len(wire) == frame.wire_length


def _framed(body: bytes) -> bytes:
    return body + crc16(body).to_bytes(2, "big")


@pytest.mark.parametrize(
    ("body", "error"),
    [
        (bytes.fromhex("16 0a31 07 0001 8000 0000 00000001") + b"TTTTTTTT", BadField),  # no payload byte
        (bytes.fromhex("16 0a31 07 0001 8000 0000 00000001") + b"TTTT", TruncatedFrame),  # shorter than its tag
        (bytes.fromhex("16 0a31 07 0001 80"), TruncatedFrame),  # ends inside the position
    ],
)
def test_a_malformed_tagged_fragment_is_refused(body: bytes, error: type[Exception]) -> None:
    with pytest.raises(error):
        decode(_framed(body))
    damaged = bytearray(_framed(bytes.fromhex("16 0a31 07 0001 8000 0000 00000001") + b"x" + b"TTTTTTTT"))
    damaged[9] ^= 1
    with pytest.raises(CrcMismatch):
        decode(bytes(damaged))


# --- the master's checks -------------------------------------------------------------


def _terminal_auth() -> TerminalAuthenticator:
    auth = TerminalAuthenticator(SITE.root(TERMINAL))
    auth.reserve_data()
    auth.batch()
    auth.committed()
    return auth


def _signed(auth: TerminalAuthenticator, fragment: Fragment) -> bytes:
    s = auth.sign_fragment(fragment, frame_version=FORMAT_VERSION)
    return encode(AuthFragment(fragment, s.epoch, s.counter, s.tag))


def _master(require: bool | frozenset[int] = True) -> MasterEndpoint:
    return MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE), require_data_auth=require)


def _state(master: MasterEndpoint) -> tuple[object, ...]:
    """Everything a refused frame must leave as it was."""
    assert master.auth is not None
    return (
        pickle.dumps(master.reassembler), master.probe, master.auth.records(), master.auth.dirty,
        master.auth.data_windows(TERMINAL), master.counters.fragments,
    )  # fmt: skip


MESSAGE = Fragment(TERMINAL, MASTER, 0, 0, b"first half ", final=False)
REST = Fragment(TERMINAL, MASTER, 0, 11, b"and the rest", final=False)


def test_an_authentic_fragment_reaches_reassembly_and_moves_the_window() -> None:
    terminal, master = _terminal_auth(), _master()
    master.on_frame(_signed(terminal, MESSAGE), 1.0)
    assert master.counters.authenticated_fragments == master.counters.fragments == 1
    assert master.reassembler.held((False, TERMINAL, MASTER), 0) == ((0, 11),)
    window, target = master.auth.data_windows(TERMINAL)  # type: ignore[union-attr]
    assert (window.top, target) == (1, None)
    assert master.auth.dirty and "auth/data-window/0a31" in master.auth.batch().puts  # type: ignore[union-attr]


def _tampered(wire: bytes, position: int) -> bytes:
    body = bytearray(wire[:-2])
    body[position] ^= 0x01
    return _framed(bytes(body))


@pytest.mark.parametrize(
    "attack",
    [
        "replayed", "forged tag", "payload changed", "offset changed", "final flag set", "counter changed",
        "message id changed", "other terminal's key", "wrong epoch", "stale", "no keys",
    ],
)  # fmt: skip
def test_forged_replayed_and_modified_fragments_change_nothing(attack: str) -> None:
    terminal, master = _terminal_auth(), _master()
    good = _signed(terminal, MESSAGE)
    master.on_frame(good, 1.0)
    if attack == "stale":  # 64 newer counters put counter 1 behind the window (RFC 4303 s3.4.3)
        for _ in range(64):
            master.on_frame(_signed(terminal, MESSAGE), 1.0)
    before = _state(master)
    tag_at = len(good) - 2 - 8
    frames: dict[str, Callable[[], bytes]] = {
        "replayed": lambda: good,
        "forged tag": lambda: _tampered(good, tag_at + 3),
        "payload changed": lambda: _tampered(good, 14),
        "offset changed": lambda: _tampered(good, 7),
        "final flag set": lambda: _framed(bytes([*good[:6], good[6] | 0x80, *good[7:-2]])),
        "counter changed": lambda: _tampered(good, 12),
        "message id changed": lambda: _tampered(good, 5),
        "other terminal's key": lambda: _signed(_other_terminal(), MESSAGE),
        "wrong epoch": lambda: _with_epoch(good, 1),
        "stale": lambda: good,
    }
    if attack == "no keys":
        keyless = MasterEndpoint(MASTER)
        kept = pickle.dumps(keyless.reassembler)
        assert keyless.on_frame(good, 1.0) == []
        assert keyless.counters.rejected_fragments == 1 and keyless.counters.fragments == 0
        assert pickle.dumps(keyless.reassembler) == kept
        return
    rejected = master.counters.rejected_fragments
    assert master.on_frame(frames[attack](), 2.0) == []
    assert master.counters.rejected_fragments == rejected + 1
    assert _state(master) == before


def _other_terminal() -> TerminalAuthenticator:
    other = TerminalAuthenticator(SITE.root(TERMINAL + 1))
    other.reserve_data()
    other.batch()
    other.committed()
    # Same address on the frame, another terminal's key: the tag cannot verify.
    return other


def _with_epoch(wire: bytes, epoch: int) -> bytes:
    return _framed(wire[:8] + epoch.to_bytes(2, "big") + wire[10:-2])


def test_each_refusal_is_counted_by_reason() -> None:
    terminal, master = _terminal_auth(), _master()
    good = _signed(terminal, MESSAGE)
    for frame in (good, good, _tampered(good, len(good) - 5), _with_epoch(_signed(terminal, REST), 3)):
        master.on_frame(frame, 1.0)
    counts = master.auth.counters  # type: ignore[union-attr]
    assert (counts.accepted, counts.replayed, counts.forged, counts.wrong_epoch) == (1, 1, 1, 1)
    assert master.counters.rejected_fragments == 3


def test_a_plain_fragment_from_a_terminal_that_must_authenticate_is_refused() -> None:
    master = _master(frozenset({TERMINAL}))
    before = _state(master)
    assert master.on_frame(encode(MESSAGE), 1.0) == []
    assert master.counters.unauthenticated_fragments == 1
    assert _state(master) == before
    # Another terminal's plain fragments still go to reassembly; so do this one's without the requirement.
    master.on_frame(encode(Fragment(TERMINAL + 1, MASTER, 0, 0, b"x")), 1.0)
    assert master.counters.fragments == 1
    relaxed = _master(False)
    relaxed.on_frame(encode(MESSAGE), 1.0)
    assert relaxed.counters.fragments == 1 and relaxed.counters.unauthenticated_fragments == 0


def test_with_the_option_off_a_tagged_fragment_is_still_checked() -> None:
    terminal, master = _terminal_auth(), _master(False)
    good = _signed(terminal, MESSAGE)
    master.on_frame(_tampered(good, 14), 1.0)
    assert master.counters.rejected_fragments == 1 and master.counters.fragments == 0
    master.on_frame(good, 1.0)
    assert master.counters.authenticated_fragments == 1 and master.counters.fragments == 1


def test_requiring_data_authentication_needs_keys() -> None:
    with pytest.raises(UsageError, match="keys"):
        MasterEndpoint(MASTER, require_data_auth=True)
    with pytest.raises(UsageError, match="keys"):
        Link(Sender(TERMINAL, MASTER), Fixed(16), bit_rate=4800.0, authenticate_data=True)


def test_the_master_keeps_its_data_window_across_a_restart() -> None:
    terminal, master = _terminal_auth(), _master()
    good = _signed(terminal, MESSAGE)
    master.on_frame(good, 1.0)
    records = master.auth.records()  # type: ignore[union-attr]
    again = MasterEndpoint(MASTER, auth=MasterAuthenticator.restore(SITE, records), require_data_auth=True)
    again.on_frame(good, 2.0)
    assert again.counters.rejected_fragments == 1 and again.auth.counters.replayed == 1  # type: ignore[union-attr]
    again.on_frame(_signed(terminal, REST), 2.0)
    assert again.counters.authenticated_fragments == 1


def test_a_left_over_target_window_never_stands_in_for_the_newer_window() -> None:
    """A finished rotation's target window record, left in a store, must not
    replace the newer window at a restart, whatever order the store gives the
    records in (a memory store gives insertion order; before, the last one read
    won, and counters between the two tops were accepted a second time)."""
    terminal, master = _terminal_auth(), _master()
    frames = [_signed(terminal, Fragment(TERMINAL, MASTER, i, 0, b"reading", final=False)) for i in range(5)]
    for i, frame in enumerate(frames[:2]):
        master.on_frame(frame, float(i))
    auth = master.auth
    assert auth is not None
    older = auth.records()["auth/data-window/0a31"]
    for i, frame in enumerate(frames[2:], start=2):
        master.on_frame(frame, float(i))
    records = auth.records() | {"auth/data-target/0a31": older}  # after the newer window
    again = MasterEndpoint(MASTER, auth=MasterAuthenticator.restore(SITE, records), require_data_auth=True)
    assert again.auth is not None and again.auth.data_windows(TERMINAL)[0].top == 5
    again.on_frame(frames[3], 9.0)
    assert again.counters.rejected_fragments == 1 and again.auth.counters.replayed == 1
    # And a batch deletes the data records its state no longer has.
    assert auth.batch().deletes == {"auth/data-target/0a31"}


# --- the terminal's link, sans-I/O, against the master ---------------------------------------


class Pair:
    """A terminal's link and the master endpoint on a loss-free path, each with
    a store committed after every input, as the service and the master station do."""

    def __init__(self, link: Link, master: MasterEndpoint, terminal_store: dict[str, bytes]) -> None:
        self.link, self.master = link, master
        self.store = terminal_store
        self.master_store: dict[str, bytes] = {}
        self.counters: list[int] = []
        self.delivered: list[bytes] = []
        self.t = 0.0
        self.next_probe = 0.0

    def saved_reservation(self) -> int:
        data = self.store.get(DATA_COUNTER_KEY)
        return 0 if data is None else int(COUNTER_RECORD.parse(data).reserved)

    def commit(self) -> None:
        if self.link.unsaved:
            batch = self.link.durable_batch()
            self.store.update(batch.puts)
            for key in batch.deletes:
                self.store.pop(key, None)
            self.link.durable_committed()

    def step(self) -> None:
        deadline = self.link.deadline
        if deadline is not None and deadline <= self.next_probe:
            self.t = max(self.t, deadline)
            effects = self.link.on_timer(self.t)
        else:
            self.t = self.next_probe
            self.next_probe += 0.05
            effects = self.link.on_frame(Arrival(self.master.probe, self.t, 20.0))
        for effect in effects:
            if isinstance(effect, Transmit):
                frame = decode(effect.frame)
                assert isinstance(frame, AuthFragment)
                # Sent only under a reservation committed before this input.
                assert frame.counter <= self.saved_reservation()
                self.counters.append(frame.counter)
                for out in self.master.on_frame(effect.frame, self.t):
                    if isinstance(out, Delivered):
                        self.delivered.append(out.delivery.payload)
                auth = self.master.auth
                assert auth is not None
                if auth.dirty:  # durable before the probe with the acknowledgement is heard
                    self.master_store.update(auth.batch().puts)
                    auth.committed()
        self.commit()
        # The reservation runs ahead: after every commit the next counter is already durable.
        assert self.link.auth is not None and self.link.auth.data_ready()


def _link(auth: TerminalAuthenticator, sender: Sender | None = None) -> Link:
    return Link(sender or Sender(TERMINAL, MASTER), Fixed(16), bit_rate=4800.0, auth=auth, authenticate_data=True)


def _messages(first: int, count: int) -> list[bytes]:
    return [bytes((first + k + i) % 251 for i in range(300)) for k in range(count)]


def test_a_long_burst_never_waits_for_its_counters_and_never_repeats_one() -> None:
    link = _link(TerminalAuthenticator(SITE.root(TERMINAL)))
    pair = Pair(link, _master(), {})
    pair.commit()  # the boot commit (TerminalService.run): provisioned keys and the first reservation
    assert link.auth is not None and link.auth.data_ready()
    messages = _messages(0, 30)
    for payload in messages:
        link.sender.queue(payload, 0.0)
    for _ in range(20000):
        if len(pair.delivered) == len(messages):
            break
        pair.step()
    assert sorted(pair.delivered) == sorted(messages)  # each once
    assert len(pair.counters) > 2 * AUTH_COUNTER_RESERVE  # crossed several reservations
    assert pair.counters == list(range(1, len(pair.counters) + 1))  # fresh for every transmission
    assert pair.master.counters.rejected_fragments == 0


def test_counters_never_repeat_across_a_reboot() -> None:
    root = SITE.root(TERMINAL)
    link = _link(TerminalAuthenticator(root))
    store: dict[str, bytes] = {}
    pair = Pair(link, _master(), store)
    pair.commit()
    first = _messages(0, 12)
    for payload in first:
        link.sender.queue(payload, 0.0)
    while len(pair.counters) < AUTH_COUNTER_RESERVE // 2 + 5:  # past the first top-up
        pair.step()
    before = list(pair.counters)
    # Power cut: whatever was not committed is gone.  The terminal boots from its
    # key file and the store; its ids continue (the outbox keeps them).
    sender = Sender(TERMINAL, MASTER)
    sender.resume(link.sender.next_seq, [])
    rebooted = _link(TerminalAuthenticator(root), sender)
    rebooted.restore_durable(dict(store))
    assert rebooted.auth is not None and not rebooted.auth.data_ready() and rebooted.unsaved
    pair.link = rebooted
    pair.commit()  # one commit: the boot's
    assert rebooted.auth.data_ready()
    second = _messages(100, 6)
    for payload in second:
        rebooted.sender.queue(payload, pair.t)
    for _ in range(20000):
        if all(p in pair.delivered for p in second):
            break
        pair.step()
    after = pair.counters[len(before) :]
    assert after and min(after) > max(before)
    assert after == sorted(set(after))
    counts = pair.master.auth.counters  # type: ignore[union-attr]
    assert (counts.replayed, counts.stale, counts.forged) == (0, 0, 0)
    assert all(pair.delivered.count(p) == 1 for p in second)


def test_a_terminal_without_its_reservation_saved_does_not_send() -> None:
    link = _link(TerminalAuthenticator(SITE.root(TERMINAL)))
    link.sender.queue(b"hello", 0.0)
    master = _master()
    effects = link.on_frame(Arrival(master.probe, 0.0, 20.0))
    assert effects == [] and link.unsaved  # nothing committed yet: no burst
    link.durable_batch()
    link.durable_committed()
    assert link.on_frame(Arrival(master.probe, 0.05, 20.0))  # the burst starts
    with pytest.raises(UsageError, match="durably reserved"):
        TerminalAuthenticator(SITE.root(TERMINAL)).sign_fragment(MESSAGE, frame_version=FORMAT_VERSION)


# --- the option in a simulated day -----------------------------------------------------------


def test_a_simulated_day_with_authenticated_data_delivers_everything_once() -> None:
    runs = {}
    for on in (False, True):
        s = scenarios.load(None, [f"link.authenticate_data={str(on).lower()}"])
        runs[on] = simulate(s, bounds=False)
    for on, run in runs.items():
        report = run.report
        assert report["messages"]["duplicates_delivered"] == 0
        assert report["messages"]["delivered"] + report["messages"]["pending"] == report["messages"]["offered"]
        assert run.link.counters.replies_sent == 0  # every byte sent is a fragment's
        master = run.master.counters
        assert master.rejected_fragments == master.unauthenticated_fragments == 0
        assert master.authenticated_fragments == (master.fragments if on else 0)
    delivered = {on: sorted((d.message_id, d.crc32c) for d in run.deliveries) for on, run in runs.items()}
    assert delivered[True] == delivered[False]
    # Bytes on the air beyond the payload, per fragment: 10 plain, 24 tagged.
    per_fragment = {
        on: (run.link.counters.bytes_sent - run.link.sender.counters.payload_bytes) / run.link.counters.fragments_sent
        for on, run in runs.items()
    }
    assert per_fragment == {False: FRAGMENT_OVERHEAD_BYTES, True: FRAGMENT_OVERHEAD_BYTES + FRAGMENT_AUTH_BYTES}
    assert per_fragment[True] - per_fragment[False] == 14
    # The sender reckons with the frames the link sends: its air bytes are the
    # link's bytes sent, and the sizes it learns losses by are tagged frames'.
    for on, run in runs.items():
        assert run.link.sender.counters.air_bytes == run.link.counters.bytes_sent
        assert run.link.sender.frame_overhead == per_fragment[on]


def test_the_scenario_option_is_off_by_default() -> None:
    assert scenarios.load(None).authenticate_data is False
    assert scenarios.load(None, ["link.authenticate_data=true"]).authenticate_data is True
    with pytest.raises(scenarios.ScenarioError):
        scenarios.load(None, ["link.authenticate_data=7"])
    assert isinstance(Outcome.ACCEPTED, Outcome)
