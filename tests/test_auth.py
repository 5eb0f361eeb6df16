"""Authentication: the primitives against their RFC vectors, the key hierarchy, the
anti-replay window, the command and reply authenticators, rotation through power
cuts, the fragment tag, the key file and the records."""

from __future__ import annotations

import hashlib
import hmac
import itertools
import re
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.harness.reports import wiredoc
from ionotrail.terminal import limits
from ionotrail.terminal.auth import (
    FRAGMENT_AUTH_BYTES,
    KEY_FILE_BYTES,
    ROTATE_OPCODE,
    Action,
    Direction,
    KeyFileError,
    MasterAuthenticator,
    Outcome,
    Purpose,
    RecordError,
    ReplayWindow,
    SendCounter,
    SiteSecret,
    TerminalAuthenticator,
    Verdict,
    command_mac_input,
    decode_key_file,
    encode_key_file,
    fragment_mac_input,
    fragment_tag_matches,
    rotate_arguments,
    sign_fragment,
)
from ionotrail.terminal.auth.formats import COMMAND_MAC, DERIVATION_INFO, Derivation
from ionotrail.terminal.auth.keys import derivation_info
from ionotrail.terminal.auth.primitives import hkdf, hkdf_expand, hkdf_extract, hmac_tag, tag_matches
from ionotrail.terminal.errors import DecodeError, Reason, UsageError
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.stores.memory import MemoryStore

DOCS = Path(__file__).resolve().parent.parent / "docs"
SITE = SiteSecret(bytes(range(32)))  # an invented site secret
TERMINAL = 0x0A31  # the demo terminal's address (harness/demo)
MASTER = 7

# --- HKDF-SHA256 (RFC 5869) ------------------------------------------------------

RFC5869_TC1 = {  # RFC 5869 Appendix A.1, test case 1 (SHA-256, basic)
    "ikm": bytes([0x0B] * 22),
    "salt": bytes(range(0x0D)),
    "info": bytes(range(0xF0, 0xFA)),
    "prk": "077709362c2e32df0ddc3f0dc47bba6390b6c73bb50f9c3122ec844ad7c2b3e5",
    "okm": "3cb25f25faacd57a90434f64d0362f2a2d2d0a90cf1a5a4c5db02d56ecc4c5bf34007208d5b887185865",
}


def test_hkdf_rfc5869_test_case_1() -> None:
    tc = RFC5869_TC1
    assert hkdf_extract(tc["salt"], tc["ikm"]).hex() == tc["prk"]  # RFC 5869 A.1, PRK
    assert (
        hkdf_expand(hkdf_extract(tc["salt"], tc["ikm"]), tc["info"], 42).hex() == tc["okm"]
    )  # RFC 5869 A.1, OKM (L=42)
    assert hkdf(tc["ikm"], tc["salt"], tc["info"], 42).hex() == tc["okm"]  # RFC 5869 A.1, OKM (L=42)


def test_hkdf_rfc5869_test_case_3_empty_salt_and_info() -> None:
    # RFC 5869 Appendix A.3, test case 3: zero-length salt and info (salt defaults to HashLen zeros, s2.2).
    # Values recalled from the RFC, not read in this session; they agree with test case 1's code path.
    ikm = bytes([0x0B] * 22)
    assert hkdf_extract(b"", ikm).hex() == "19ef24a32c717b167f33a91d6f648bdf96596776afdb6377ac434c1c293ccb04"
    assert hkdf(ikm, b"", b"", 42).hex() == (
        "8da4e775a563c18f715f802a063c5a31b8a11f5c5ee1879ec3454e5f3c738d2d9d201395faa4b61a96c8"
    )


def test_hkdf_length_bounds() -> None:
    prk = bytes(32)
    assert len(hkdf_expand(prk, b"", 255 * 32)) == 255 * 32  # RFC 5869 s2.3: L <= 255*HashLen
    for bad in (0, 255 * 32 + 1):
        with pytest.raises(UsageError):
            hkdf_expand(prk, b"", bad)
    with pytest.raises(UsageError):
        hkdf_expand(bytes(31), b"", 32)  # RFC 5869 s2.3: PRK of at least HashLen octets


def test_hkdf_and_tags_match_the_cryptography_package() -> None:
    # A second, independent implementation from the package registry (the test extra
    # only; not a dependency of the project): pyca/cryptography's HKDF and HMAC.
    from cryptography.hazmat.primitives import hashes
    from cryptography.hazmat.primitives import hmac as crypto_hmac
    from cryptography.hazmat.primitives.kdf.hkdf import HKDF

    tc = RFC5869_TC1
    for ikm, salt, info, length in ((tc["ikm"], tc["salt"], tc["info"], 42), (SITE.material, b"x", b"y" * 40, 100)):
        theirs = HKDF(algorithm=hashes.SHA256(), length=length, salt=salt, info=info).derive(ikm)
        assert hkdf(ikm, salt, info, length) == theirs
    for key, data in ((SITE.material, b""), (b"k" * 100, b"m" * 1000)):
        mac = crypto_hmac.HMAC(key, hashes.SHA256())
        mac.update(data)
        assert hmac_tag(key, data, limits.AUTH_TAG_BYTES) == mac.finalize()[: limits.AUTH_TAG_BYTES]


# --- HMAC-SHA-256 tags (RFC 4231) -------------------------------------------------

RFC4231 = [  # RFC 4231 s4.2, s4.3 (test cases 1 and 2), HMAC-SHA-256 row
    (bytes([0x0B] * 20), b"Hi There", "b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"),
    (b"Jefe", b"what do ya want for nothing?", "5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"),
]


@pytest.mark.parametrize(("key", "data", "expected"), RFC4231)
def test_hmac_rfc4231_full_and_64_bit(key: bytes, data: bytes, expected: str) -> None:
    assert hmac_tag(key, data, 32).hex() == expected  # RFC 4231 test cases 1 and 2
    assert hmac_tag(key, data, limits.AUTH_TAG_BYTES).hex() == expected[:16]  # our tag: the leading 8 bytes
    assert tag_matches(key, data, bytes.fromhex(expected[:16]))


def test_hmac_rfc4231_test_case_5_truncation() -> None:
    # RFC 4231 s4.6, test case 5: key 0x0c x 20, "Test With Truncation", truncated to 128 bits.
    tag = hmac_tag(bytes([0x0C] * 20), b"Test With Truncation", 16)
    assert tag.hex() == "a3b6167473100ee06e0c796c2955552b"
    assert hmac_tag(bytes([0x0C] * 20), b"Test With Truncation", 8) == tag[:8]  # 64 bits: the leading 8 bytes


def test_tag_matches_refuses_every_wrong_tag() -> None:
    key, data = bytes([0x0B] * 20), b"Hi There"
    tag = hmac_tag(key, data, 8)
    for i in range(8):
        for bit in range(8):
            forged = bytearray(tag)
            forged[i] ^= 1 << bit
            assert not tag_matches(key, data, bytes(forged))
    assert not tag_matches(key, data, b"")
    assert not tag_matches(key, b"Hi There!", tag)


def test_tags_compare_in_constant_time(monkeypatch: pytest.MonkeyPatch) -> None:
    seen: list[tuple[bytes, bytes]] = []
    real = hmac.compare_digest

    def spy(a: bytes, b: bytes) -> bool:
        seen.append((a, b))
        return real(a, b)

    monkeypatch.setattr(hmac, "compare_digest", spy)
    assert tag_matches(b"k" * 32, b"m", hmac_tag(b"k" * 32, b"m", 8))
    assert len(seen) == 1


# --- the key hierarchy --------------------------------------------------------------


def test_derivation_info_is_fixed_width_and_unambiguous() -> None:
    assert DERIVATION_INFO.sizeof() == 23
    seen = {}
    for step, terminal, epoch, direction, purpose in itertools.product(
        Derivation, (0, 1, 0x0A31, 0xFFFF), (0, 1, 256, 65535), Direction, Purpose
    ):
        info = derivation_info(step, terminal, epoch, direction, purpose)
        assert len(info) == 23
        assert seen.setdefault(info, (step, terminal, epoch, direction, purpose)) == (
            step,
            terminal,
            epoch,
            direction,
            purpose,
        )


def test_every_working_key_is_distinct() -> None:
    keys = {}
    for terminal, epoch in itertools.product((1, 2, TERMINAL), (0, 1, 2)):
        root = SITE.root(terminal, epoch)
        keys[("root", terminal, epoch)] = root.material
        for direction, purpose in itertools.product(Direction, Purpose):
            keys[(terminal, epoch, direction, purpose)] = root.working_key(direction, purpose).material
    assert len(set(keys.values())) == len(keys)
    assert SITE.material not in keys.values()


def test_the_chain_of_roots_follows_the_epochs() -> None:
    root = SITE.root(TERMINAL)
    assert root.epoch == 0 and root.terminal == TERMINAL
    assert root.next().next() == SITE.root(TERMINAL, 2)
    assert SiteSecret(bytes(32)).root(TERMINAL) != root  # another site
    # Epoch 0 is the RFC 5869 extract-then-expand of the site secret with the derivation's info.
    info = DERIVATION_INFO.build({"step": 1, "terminal": TERMINAL, "epoch": 0, "direction": 0, "purpose": 0})
    assert root.material == hkdf(SITE.material, b"ionotrail-auth\x00\x01", info, 32)


def test_no_key_in_a_repr() -> None:
    for key in (SITE, SITE.root(TERMINAL), SITE.root(TERMINAL).working_key(Direction.DOWNLINK, Purpose.COMMAND)):
        text = repr(key) + str(key)
        assert key.material.hex() not in text and repr(key.material) not in text
        assert key.fingerprint in text
    text = repr(TerminalAuthenticator(SITE.root(TERMINAL))) + repr(MasterAuthenticator(SITE))
    assert SITE.material.hex() not in text and SITE.root(TERMINAL).material.hex() not in text


# --- the anti-replay window (RFC 4303 s3.4.3, Appendix A; RFC 6479) -----------------


def test_worked_example_window_4() -> None:
    # docs/shared reliability guide, worked example [derived]: window 4.
    arrivals = [1, 2, 3, 5, 4, 4, 9, 6, 5, 10, 7]
    expected = [Verdict.NEW] * 5 + [
        Verdict.DUPLICATE,
        Verdict.NEW,
        Verdict.NEW,
        Verdict.STALE,
        Verdict.NEW,
        Verdict.NEW,
    ]
    window = ReplayWindow(4)
    got = []
    for counter in arrivals:
        verdict = window.check(counter)
        got.append(verdict)
        if verdict is Verdict.NEW:
            window.accept(counter)
    assert got == expected


def test_check_changes_nothing_and_accept_refuses_a_non_new_counter() -> None:
    window = ReplayWindow(64)
    window.accept(100)
    before = window.copy()
    for counter in (0, 1, 36, 37, 99, 100, 101, 10**6):
        window.check(counter)
    assert window == before
    assert window.check(0) is Verdict.STALE  # counters start at 1
    assert window.check(36) is Verdict.STALE and window.check(37) is Verdict.NEW  # 64 entries: 37..100
    for bad in (100, 36):
        with pytest.raises(UsageError):
            window.accept(bad)


class Model:
    """An independent model of RFC 4303 s3.4.3: the set accepted, and the highest."""

    def __init__(self, size: int) -> None:
        self.size, self.accepted, self.top = size, set[int](), 0

    def verdict(self, counter: int) -> Verdict:
        if counter > self.top:
            return Verdict.NEW
        if counter <= self.top - self.size or counter == 0:
            return Verdict.STALE
        return Verdict.DUPLICATE if counter in self.accepted else Verdict.NEW

    def accept(self, counter: int) -> None:
        self.accepted.add(counter)
        self.top = max(self.top, counter)


@pytest.mark.property
@given(
    size=st.sampled_from([1, 2, 4, 7, 32, 64, 100]),
    arrivals=st.lists(st.one_of(st.integers(0, 300), st.integers(2**32 - 300, 2**32 - 1)), max_size=200),
)
def test_window_agrees_with_the_model(size: int, arrivals: list[int]) -> None:
    window, model = ReplayWindow(size), Model(size)
    for counter in arrivals:
        verdict = window.check(counter)
        assert verdict is model.verdict(counter), (counter, window)
        if verdict is Verdict.NEW:
            window.accept(counter)
            model.accept(counter)
    assert window.top == model.top


@pytest.mark.property
@given(
    arrivals=st.lists(st.integers(1, 200), max_size=100),
    forgeries=st.lists(st.integers(0, 2**32 - 1), max_size=20),
)
def test_a_rejected_frame_moves_no_window(arrivals: list[int], forgeries: list[int]) -> None:
    # Same arrivals with forged frames between them: the authenticator's verdicts on the genuine ones are unchanged.
    root = SITE.root(TERMINAL)
    master = MasterAuthenticator(SITE)
    genuine = [
        master.sign_command(TERMINAL, frame_version=1, master=MASTER, command_id=1, opcode=2, arguments=b"")
        for _ in range(200)
    ]
    clean, noisy = TerminalAuthenticator(root), TerminalAuthenticator(root)
    for i, counter in enumerate(arrivals):
        sig = genuine[counter - 1]
        fields: dict[str, Any] = {
            "frame_version": 1,
            "master": MASTER,
            "command_id": 1,
            "opcode": 2,
            "arguments": b"",
            "epoch": 0,
        }
        if i < len(forgeries):
            noisy.receive_command(**fields, counter=forgeries[i], tag=bytes(8))
        assert clean.receive_command(**fields, counter=counter, tag=sig.tag) == noisy.receive_command(
            **fields, counter=counter, tag=sig.tag
        )
    assert clean.records() == noisy.records()


def test_send_counter_reserves_ahead_and_skips_after_a_reboot() -> None:
    # RFC 4303 s5: save R + K before using R; after a reboot continue past the saved value.
    counter = SendCounter()
    taken = [counter.take() for _ in range(300)]
    assert [n for n, _ in taken] == list(range(1, 301))
    assert [n for n, moved in taken if moved] == [1, 257]  # a durable write once per AUTH_COUNTER_RESERVE
    rebooted = SendCounter(counter.reserved)
    assert rebooted.take()[0] == 2 * limits.AUTH_COUNTER_RESERVE + 1 > 300
    spent = SendCounter(2**32 - 1)
    with pytest.raises(UsageError, match="rotate"):
        spent.take()


# --- commands and replies -------------------------------------------------------------

COMMAND = {"frame_version": 1, "master": MASTER, "command_id": 5, "opcode": 1, "arguments": b"\x00\x00\x03\x84"}


def _pair() -> tuple[MasterAuthenticator, TerminalAuthenticator]:
    return MasterAuthenticator(SITE), TerminalAuthenticator(SITE.root(TERMINAL))


def test_a_signed_command_is_accepted_once() -> None:
    master, terminal = _pair()
    sig = master.sign_command(TERMINAL, **COMMAND)
    assert (sig.epoch, sig.counter, len(sig.tag)) == (0, 1, limits.AUTH_TAG_BYTES)
    check = terminal.receive_command(**COMMAND, epoch=sig.epoch, counter=sig.counter, tag=sig.tag)
    assert check.accepted and check.action is Action.EXECUTE
    again = terminal.receive_command(**COMMAND, epoch=sig.epoch, counter=sig.counter, tag=sig.tag)
    assert again.outcome is Outcome.REPLAYED
    # The master's repeat of the same command (a retransmission) carries a fresh counter: accepted.
    repeat = master.sign_command(TERMINAL, **COMMAND)
    assert terminal.receive_command(**COMMAND, epoch=0, counter=repeat.counter, tag=repeat.tag).accepted
    assert terminal.counters.accepted == 2 and terminal.counters.replayed == 1


def test_the_tag_is_the_hmac_of_the_canonical_encoding() -> None:
    master, _ = _pair()
    sig = master.sign_command(TERMINAL, **COMMAND)
    key = SITE.root(TERMINAL).working_key(Direction.DOWNLINK, Purpose.COMMAND).material
    # COMMAND_MAC laid out by hand: version, purpose, direction, frame version, master, terminal, epoch, counter,
    # command id, opcode, length, arguments.
    by_hand = (
        bytes([1, 1, 0, 1, MASTER]) + TERMINAL.to_bytes(2, "big") + (0).to_bytes(2, "big") + (1).to_bytes(4, "big")
    )
    by_hand += bytes([5, 1, 4]) + b"\x00\x00\x03\x84"
    assert command_mac_input(terminal=TERMINAL, epoch=0, counter=1, **COMMAND) == by_hand
    assert sig.tag == hmac.new(key, by_hand, hashlib.sha256).digest()[:8]


@pytest.mark.property
@given(
    arguments=st.lists(
        st.tuples(st.integers(0, 255), st.integers(0, 255), st.binary(max_size=8)), min_size=2, max_size=2
    )
)
def test_the_mac_encoding_is_unambiguous(arguments: list[tuple[int, int, bytes]]) -> None:
    (op_a, id_a, args_a), (op_b, id_b, args_b) = arguments
    a = command_mac_input(
        frame_version=1, master=1, terminal=2, epoch=3, counter=4, command_id=id_a, opcode=op_a, arguments=args_a
    )
    b = command_mac_input(
        frame_version=1, master=1, terminal=2, epoch=3, counter=4, command_id=id_b, opcode=op_b, arguments=args_b
    )
    assert (a == b) == ((op_a, id_a, args_a) == (op_b, id_b, args_b))
    assert COMMAND_MAC.parse(a).arguments == args_a


CHANGES = [  # every field the tag covers, changed one at a time
    ("frame_version", 2), ("master", MASTER + 1), ("command_id", 6), ("opcode", 2), ("arguments", b"\x00\x00\x03\x85"),
    ("arguments", b"\x00\x00\x03"), ("counter", 2),
]  # fmt: skip


@pytest.mark.parametrize(("field", "value"), CHANGES)
def test_changing_any_covered_field_is_a_forgery(field: str, value: object) -> None:
    master, terminal = _pair()
    sig = master.sign_command(TERMINAL, **COMMAND)
    fields: dict[str, Any] = {**COMMAND, "epoch": sig.epoch, "counter": sig.counter, "tag": sig.tag, field: value}
    assert terminal.receive_command(**fields).outcome is Outcome.FORGED


def test_another_terminals_command_is_a_forgery() -> None:
    master, _ = _pair()
    other = TerminalAuthenticator(SITE.root(TERMINAL + 1))
    sig = master.sign_command(TERMINAL, **COMMAND)
    assert other.receive_command(**COMMAND, epoch=0, counter=sig.counter, tag=sig.tag).outcome is Outcome.FORGED


def test_every_rejection_is_counted_and_changes_no_state() -> None:
    master, terminal = _pair()
    sigs = [master.sign_command(TERMINAL, **COMMAND) for _ in range(100)]
    assert terminal.receive_command(**COMMAND, epoch=0, counter=100, tag=sigs[99].tag).accepted
    terminal.committed()
    before = terminal.records()
    cases = [
        (Outcome.TRUNCATED, {"epoch": 0, "counter": 1, "tag": sigs[0].tag[:7]}),
        (Outcome.TRUNCATED, {"epoch": 0, "counter": 1, "tag": sigs[0].tag + b"\x00"}),
        (Outcome.WRONG_EPOCH, {"epoch": 1, "counter": 1, "tag": sigs[0].tag}),
        (Outcome.FORGED, {"epoch": 0, "counter": 99, "tag": sigs[0].tag}),
        (Outcome.REPLAYED, {"epoch": 0, "counter": 100, "tag": sigs[99].tag}),
        (Outcome.STALE, {"epoch": 0, "counter": 1, "tag": sigs[0].tag}),  # 99 behind a 64-entry window
    ]
    for outcome, fields in cases:
        assert terminal.receive_command(**COMMAND, **fields).outcome is outcome
        assert terminal.records() == before and not terminal.dirty and not terminal.batch()
    c = terminal.counters
    assert (c.accepted, c.truncated, c.wrong_epoch, c.forged, c.replayed, c.stale) == (1, 2, 1, 1, 1, 1)


def test_a_forged_counter_far_ahead_cannot_push_the_window() -> None:
    master, terminal = _pair()
    sig = master.sign_command(TERMINAL, **COMMAND)
    assert terminal.receive_command(**COMMAND, epoch=0, counter=2**32 - 1, tag=bytes(8)).outcome is Outcome.FORGED
    assert terminal.receive_command(**COMMAND, epoch=0, counter=sig.counter, tag=sig.tag).accepted


def test_replies_are_authenticated_the_other_way() -> None:
    master, terminal = _pair()
    reply = {"frame_version": 1, "master": MASTER, "command_id": 5, "status": 0, "result": b"ok"}
    sig = terminal.sign_reply(**reply)
    assert (
        master.receive_reply(TERMINAL, **reply, epoch=sig.epoch, counter=sig.counter, tag=sig.tag) is Outcome.ACCEPTED
    )
    assert (
        master.receive_reply(TERMINAL, **reply, epoch=sig.epoch, counter=sig.counter, tag=sig.tag) is Outcome.REPLAYED
    )
    sig2 = terminal.sign_reply(**reply)
    assert (
        master.receive_reply(TERMINAL, **{**reply, "status": 3}, epoch=0, counter=sig2.counter, tag=sig2.tag)
        is Outcome.FORGED
    )
    assert master.receive_reply(TERMINAL + 1, **reply, epoch=0, counter=sig2.counter, tag=sig2.tag) is Outcome.FORGED
    # A command's tag is no reply's tag: a different key and a different encoding.
    csig = master.sign_command(TERMINAL, **COMMAND)
    assert master.receive_reply(TERMINAL, **reply, epoch=0, counter=csig.counter + 10, tag=csig.tag) is Outcome.FORGED
    assert master.counters.accepted == 1 and master.counters.forged == 3 and master.counters.replayed == 1
    # The master's rejections change no state either.
    master.committed()
    before = master.records()
    rejected = [
        master.receive_reply(TERMINAL, **reply, epoch=0, counter=sig.counter, tag=sig.tag),  # replayed
        master.receive_reply(TERMINAL, **reply, epoch=0, counter=sig2.counter, tag=sig2.tag[:7]),  # truncated
        master.receive_reply(TERMINAL, **reply, epoch=1, counter=sig2.counter, tag=sig2.tag),  # wrong epoch
        master.receive_reply(TERMINAL, **reply, epoch=0, counter=2**32 - 1, tag=sig2.tag),  # forged
        master.receive_reply(0x0BAD, **reply, epoch=0, counter=sig2.counter, tag=sig2.tag),  # forged, unknown terminal
    ]
    assert rejected == [Outcome.REPLAYED, Outcome.TRUNCATED, Outcome.WRONG_EPOCH, Outcome.FORGED, Outcome.FORGED]
    assert master.records() == before and not master.dirty and not master.batch()
    assert master.receive_reply(TERMINAL, **reply, epoch=0, counter=sig2.counter, tag=sig2.tag) is Outcome.ACCEPTED


def test_out_of_range_fields_are_misuse() -> None:
    master, _terminal = _pair()
    for bad in (
        {"opcode": 256},
        {"master": -1},
        {"arguments": bytes(limits.MAX_COMMAND_BYTES + 1)},
        {"arguments": "text"},
    ):
        with pytest.raises(UsageError):
            master.sign_command(TERMINAL, **{**COMMAND, **bad})
    with pytest.raises(UsageError):
        TerminalAuthenticator(SITE.root(TERMINAL), tag_bytes=limits.AUTH_MIN_TAG_BYTES - 1)
    with pytest.raises(UsageError):
        TerminalAuthenticator(SITE)  # type: ignore[arg-type]  # a terminal never holds the site secret


# --- rotation through power cuts --------------------------------------------------------


class TerminalSite:
    """A terminal shell: key state and an application whose executed commands commit with the window."""

    def __init__(self, store: MemoryStore) -> None:
        self.store = store
        self.auth = TerminalAuthenticator.restore(store.load())
        self.executed = [int(k.split("/")[1]) for k in store.load() if k.startswith("app/")]

    def hear(self, frame: dict[str, Any]) -> dict[str, Any] | None:
        check = self.auth.receive_command(**{k: frame[k] for k in (*COMMAND, "epoch", "counter", "tag")})
        if not check.accepted:
            return None
        effect = Batch()
        if check.action is Action.EXECUTE:
            effect = Batch(
                puts={f"app/{frame['command_id']}": b"done"}
            )  # the command's effect, durable with the window
        return {"batch": self.auth.batch().merged(effect), "command_id": frame["command_id"], "check": check}

    def commit(self, pending: dict[str, Any]) -> None:
        self.store.commit(pending["batch"])
        self.auth.committed()
        if pending["check"].action is Action.EXECUTE:
            self.executed.append(pending["command_id"])

    def reply(self, command_id: int) -> dict[str, Any]:
        fields = {"frame_version": 1, "master": MASTER, "command_id": command_id, "status": 0, "result": b""}
        sig = self.auth.sign_reply(**fields)
        self.store.commit(self.auth.batch())  # a moved counter reservation is durable before the reply goes
        self.auth.committed()
        return {**fields, "epoch": sig.epoch, "counter": sig.counter, "tag": sig.tag}


def _command_frame(
    master: MasterAuthenticator, store: MemoryStore, command_id: int, opcode: int, arguments: bytes
) -> dict[str, Any]:
    fields = {"frame_version": 1, "master": MASTER, "command_id": command_id, "opcode": opcode, "arguments": arguments}
    sig = master.sign_command(TERMINAL, **fields)
    store.commit(master.batch())
    master.committed()
    return {**fields, "epoch": sig.epoch, "counter": sig.counter, "tag": sig.tag}


def _rotation_run(cut_at: int | None, side: str = "both") -> tuple[TerminalSite, list[str], int, list[dict[str, Any]]]:
    """An ordinary command, one rotation from epoch 0, then an ordinary command in epoch 1; power is cut
    at step ``cut_at`` at the terminal, the master or both.

    Returns the terminal, the steps taken, the master's final epoch and every command frame sent.
    """
    terminal_store, master_store = MemoryStore(), MemoryStore()
    provisioned = TerminalAuthenticator(SITE.root(TERMINAL))
    terminal_store.commit(provisioned.batch())
    term = TerminalSite(terminal_store)
    master = MasterAuthenticator(SITE)
    step = 0
    steps: list[str] = []
    heard: list[dict[str, Any]] = []

    def cut(which: str) -> None:
        nonlocal term, master, step
        step += 1
        steps.append(which)
        if step == cut_at:  # drop the memory at this step; rebuild from what was committed
            if side in ("terminal", "both"):
                term = TerminalSite(terminal_store)
            if side in ("master", "both"):
                master = MasterAuthenticator.restore(SITE, master_store.load())

    # an ordinary command first, so the old epoch has history
    frame = _command_frame(master, master_store, 1, 1, b"")
    heard.append(frame)
    pending = term.hear(frame)
    assert pending is not None
    term.commit(pending)
    master.receive_reply(TERMINAL, **term.reply(1))
    master_store.commit(master.batch())
    master.committed()
    heard.append(_command_frame(master, master_store, 9, 1, b""))  # genuine, epoch 0, lost on the way: never heard

    for _attempt in range(6):  # the master's policy: terminal 0x0a31 to epoch 1; it repeats until answered
        if master.epoch(TERMINAL) == 1:
            break
        if not master.rotating(TERMINAL):  # (again, if a cut lost the mark before it was committed)
            master.begin_rotation(TERMINAL)
            cut("master marked the rotation in memory")
            master_store.commit(master.batch())
            master.committed()
            cut("master committed the rotation")
            continue
        frame = _command_frame(master, master_store, 2, *master.begin_rotation(TERMINAL))
        heard.append(frame)
        cut("master signed the rotate")
        pending = term.hear(frame)
        cut("terminal accepted the rotate in memory")
        if pending is None:
            continue
        term.commit(pending)
        cut("terminal committed the rotation")
        reply = term.reply(2)
        cut("terminal signed its reply")
        master.receive_reply(TERMINAL, **reply)
        cut("master accepted the reply in memory")
        master_store.commit(master.batch())
        master.committed()
        cut("master committed the switch")
    # then an ordinary command in the new epoch, repeated until it is answered
    for _attempt in range(3):
        frame = _command_frame(master, master_store, 3, 1, b"\x01")
        heard.append(frame)
        pending = term.hear(frame)
        if pending is not None:
            term.commit(pending)
            if master.receive_reply(TERMINAL, **term.reply(3)) is Outcome.ACCEPTED:
                break
    return term, steps, master.epoch(TERMINAL), heard


def _replay_everything(term: TerminalSite, heard: list[dict[str, Any]]) -> None:
    """Every frame sent, heard again: nothing executes again, and in the old epoch only a rotate repeat passes."""
    for frame in heard:
        pending = term.hear(frame)
        if pending is not None:
            assert frame["epoch"] == 0 and frame["opcode"] == ROTATE_OPCODE, frame
            assert pending["check"].action is Action.ROTATE_REPEAT, frame
            term.commit(pending)
    assert term.executed == [1, 3]


def test_rotation_without_a_power_cut() -> None:
    term, steps, master_epoch, heard = _rotation_run(None)
    assert (term.auth.epoch, master_epoch) == (1, 1)
    assert term.executed == [1, 3]
    assert [(f["epoch"], f["opcode"], f["arguments"]) for f in heard] == [
        (0, 1, b""), (0, 1, b""), (0, ROTATE_OPCODE, rotate_arguments(1)), (1, 1, b"\x01")
    ]  # fmt: skip
    assert len(steps) == 8
    _replay_everything(term, heard)


@pytest.mark.parametrize("side", ["terminal", "master", "both"])
@pytest.mark.parametrize("cut_at", range(1, 9))
def test_rotation_survives_a_power_cut_at_every_step(cut_at: int, side: str) -> None:
    term, steps, master_epoch, heard = _rotation_run(cut_at, side)
    assert cut_at <= len(steps)  # the cut happened
    where = f"a cut at the {side} when: {steps[cut_at - 1]}"
    assert (term.auth.epoch, master_epoch) == (1, 1), f"ends disagree after {where}"
    assert term.executed == [1, 3], f"an ordinary command executed other than once after {where}"
    _replay_everything(term, heard)
    restored = TerminalSite(term.store)  # and after one more reboot, the same
    _replay_everything(restored, heard)


def test_the_old_epoch_accepts_only_the_rotate_repeat() -> None:
    master, terminal = _pair()
    old_command = master.sign_command(TERMINAL, **COMMAND)  # epoch 0, not yet delivered
    opcode, arguments = master.begin_rotation(TERMINAL)
    with pytest.raises(UsageError, match="rotating"):
        master.sign_command(TERMINAL, **COMMAND)  # nothing but the rotate while rotating
    rotate = {**COMMAND, "opcode": opcode, "arguments": arguments}
    first, repeat, another = (master.sign_command(TERMINAL, **rotate) for _ in range(3))
    check = terminal.receive_command(**rotate, epoch=0, counter=first.counter, tag=first.tag)
    assert check.action is Action.ROTATED and terminal.epoch == 1
    # In epoch 0 now: an ordinary command (genuine, never heard before) is refused ...
    assert (
        terminal.receive_command(**COMMAND, epoch=0, counter=old_command.counter, tag=old_command.tag).outcome
        is Outcome.WRONG_EPOCH
    )
    # ... a copy of the rotate is a replay, a repeat (fresh counter) is answered again, once.
    assert terminal.receive_command(**rotate, epoch=0, counter=first.counter, tag=first.tag).outcome is Outcome.REPLAYED
    assert (
        terminal.receive_command(**rotate, epoch=0, counter=repeat.counter, tag=repeat.tag).action
        is Action.ROTATE_REPEAT
    )
    assert (
        terminal.receive_command(**rotate, epoch=0, counter=repeat.counter, tag=repeat.tag).outcome is Outcome.REPLAYED
    )
    # A rotate naming another epoch is no repeat.
    odd = {**rotate, "arguments": rotate_arguments(2)}
    assert (
        terminal.receive_command(**odd, epoch=0, counter=another.counter, tag=another.tag).outcome
        is Outcome.WRONG_EPOCH
    )
    # The master switches on the first reply made with the new key.
    sig = terminal.sign_reply(frame_version=1, master=MASTER, command_id=5, status=0, result=b"")
    assert sig.epoch == 1
    assert (
        master.receive_reply(
            TERMINAL,
            frame_version=1,
            master=MASTER,
            command_id=5,
            status=0,
            result=b"",
            epoch=1,
            counter=sig.counter,
            tag=sig.tag,
        )
        is Outcome.ACCEPTED
    )
    assert master.epoch(TERMINAL) == 1 and not master.rotating(TERMINAL)
    new = master.sign_command(TERMINAL, **COMMAND)
    assert new.epoch == 1 and terminal.receive_command(**COMMAND, epoch=1, counter=new.counter, tag=new.tag).accepted
    # A second rotation forgets epoch 0 altogether.
    master.begin_rotation(TERMINAL)
    rotate2 = {**COMMAND, "opcode": ROTATE_OPCODE, "arguments": rotate_arguments(2)}
    r2 = master.sign_command(TERMINAL, **rotate2)
    assert terminal.receive_command(**rotate2, epoch=1, counter=r2.counter, tag=r2.tag).action is Action.ROTATED
    assert (
        terminal.receive_command(**rotate, epoch=0, counter=another.counter, tag=another.tag).outcome
        is Outcome.WRONG_EPOCH
    )


def test_a_rotate_to_a_wrong_epoch_is_refused_but_authenticated() -> None:
    master, terminal = _pair()
    odd = {**COMMAND, "opcode": ROTATE_OPCODE, "arguments": rotate_arguments(5)}
    sig = master.sign_command(TERMINAL, **odd)
    check = terminal.receive_command(**odd, epoch=0, counter=sig.counter, tag=sig.tag)
    assert check.accepted and check.action is Action.ROTATE_REFUSED and terminal.epoch == 0


# --- records ------------------------------------------------------------------------------


def test_records_round_trip_on_both_ends() -> None:
    master, terminal = _pair()
    master.enrol(TERMINAL + 1, 3)
    for _ in range(3):
        sig = master.sign_command(TERMINAL, **COMMAND)
        terminal.receive_command(**COMMAND, epoch=0, counter=sig.counter, tag=sig.tag)
    rotate = {**COMMAND, "opcode": ROTATE_OPCODE, "arguments": master.begin_rotation(TERMINAL)[1]}
    sig = master.sign_command(TERMINAL, **rotate)
    terminal.receive_command(**rotate, epoch=0, counter=sig.counter, tag=sig.tag)
    terminal.sign_reply(frame_version=1, master=MASTER, command_id=1, status=0, result=b"")
    again = TerminalAuthenticator.restore(terminal.records())
    assert again.records() == terminal.records() and again.epoch == 1
    assert set(terminal.records()) == {
        "auth/root",
        "auth/command-window",
        "auth/reply-counter",
        "auth/previous",
        "auth/previous-window",
    }
    master_again = MasterAuthenticator.restore(SITE, master.records() | {"other/record": b"x"})
    assert master_again.records() == master.records()
    assert master_again.rotating(TERMINAL) and master_again.epoch(TERMINAL + 1) == 3
    assert set(master.records()) == {"auth/master/0a31", "auth/master/0a32"}


def test_a_fresh_terminal_batch_deletes_stale_previous_records() -> None:
    batch = TerminalAuthenticator(SITE.root(TERMINAL)).batch()
    assert batch.deletes == {"auth/previous", "auth/previous-window"}
    assert set(batch.puts) == {"auth/root", "auth/command-window", "auth/reply-counter"}


def test_broken_records_raise_only_decode_errors() -> None:
    _, terminal = _pair()
    good = terminal.records()
    cases = {
        "no root": {k: v for k, v in good.items() if k != "auth/root"},
        "short root": good | {"auth/root": good["auth/root"][:-1]},
        "long window": good | {"auth/command-window": good["auth/command-window"] + b"\x00"},
        "version": good | {"auth/reply-counter": b"\x02" + good["auth/reply-counter"][1:]},
        "epoch mismatch": good | {"auth/reply-counter": b"\x01\x00\x01" + good["auth/reply-counter"][3:]},
        "half a previous": good | {"auth/previous": b"\x01" + bytes(34)},
    }
    for name, records in cases.items():
        with pytest.raises(RecordError) as caught:
            TerminalAuthenticator.restore(records)
        assert isinstance(caught.value, DecodeError) and caught.value.message, name


@pytest.mark.property
@given(st.dictionaries(st.sampled_from(["auth/root", "auth/command-window", "auth/reply-counter", "auth/previous",
                                        "auth/previous-window", "auth/master/0a31"]), st.binary(max_size=80)))  # fmt: skip
def test_hostile_records_raise_only_decode_errors(records: dict[str, bytes]) -> None:
    for restore in (TerminalAuthenticator.restore, lambda r: MasterAuthenticator.restore(SITE, r)):
        try:
            restore(records)
        except DecodeError:
            pass


# --- fragments ----------------------------------------------------------------------------


def test_fragment_tags() -> None:
    master, terminal = _pair()
    key = terminal.data_key(Direction.UPLINK)
    assert key == master.data_key(TERMINAL, Direction.UPLINK) != master.data_key(TERMINAL, Direction.DOWNLINK)
    fields = {"frame_version": 1, "direction": Direction.UPLINK, "master": MASTER, "terminal": TERMINAL, "epoch": 0, "counter": 9,
                  "message_id": 300, "final": True, "urgent": False, "offset": 48, "payload": b"reading"}  # fmt: skip
    tag = sign_fragment(key, fragment_mac_input(**fields))
    assert fragment_tag_matches(key, fragment_mac_input(**fields), tag)
    for change in ({"final": False}, {"urgent": True}, {"offset": 49}, {"payload": b"reading!"}, {"message_id": 301},
                   {"direction": Direction.DOWNLINK}, {"counter": 10}):  # fmt: skip
        assert not fragment_tag_matches(key, fragment_mac_input(**{**fields, **change}), tag), change
    assert not fragment_tag_matches(key, fragment_mac_input(**fields), tag[:7])
    assert FRAGMENT_AUTH_BYTES == 2 + 4 + limits.AUTH_TAG_BYTES == 14


# --- the key file ---------------------------------------------------------------------------


def test_key_file_round_trip_and_layout() -> None:
    root = SITE.root(TERMINAL, 2)
    data = encode_key_file(root)
    assert len(data) == KEY_FILE_BYTES == 50
    assert data[:8] == b"IONOKEY\x00" and data[8:14] == bytes([1, 2, 0x0A, 0x31, 0, 2]) and data[14:46] == root.material
    assert decode_key_file(data) == root
    assert decode_key_file(encode_key_file(SITE)) == SITE


def test_every_damaged_key_file_is_refused() -> None:
    data = encode_key_file(SITE.root(TERMINAL))
    for i in range(len(data)):
        for bit in range(8):
            damaged = bytearray(data)
            damaged[i] ^= 1 << bit
            with pytest.raises(KeyFileError) as caught:
                decode_key_file(bytes(damaged))
            assert caught.value.reason in (Reason.BAD_CRC, Reason.BAD_FIELD)  # magic or CRC
    for cut in range(len(data)):
        with pytest.raises(KeyFileError, match="truncated|empty"):
            decode_key_file(data[:cut])
    with pytest.raises(KeyFileError, match="too long"):
        decode_key_file(data + b"\n")


def _with_crc(body: bytes) -> bytes:
    from ionotrail.terminal.wire.crc import crc32c

    return body + crc32c(body).to_bytes(4, "big")


def test_key_file_fields_are_checked() -> None:
    body = encode_key_file(SITE.root(TERMINAL))[:-4]
    with pytest.raises(KeyFileError, match="version 2") as caught:
        decode_key_file(_with_crc(body[:8] + b"\x02" + body[9:]))
    assert caught.value.reason is Reason.UNSUPPORTED_VERSION
    with pytest.raises(KeyFileError, match="role 3"):
        decode_key_file(_with_crc(body[:9] + b"\x03" + body[10:]))
    with pytest.raises(KeyFileError, match="site-secret"):
        decode_key_file(_with_crc(body[:9] + b"\x01" + body[10:]))  # a site secret naming a terminal


@pytest.mark.property
@given(st.binary(max_size=60))
def test_hostile_key_files_raise_only_decode_errors(data: bytes) -> None:
    try:
        decode_key_file(data)
    except DecodeError as exc:
        assert exc.message


# --- docs/keys.md agrees with the code -------------------------------------------------------


def _generated(name: str) -> str:
    text = (DOCS / "keys.md").read_text(encoding="utf-8")
    match = re.search(rf"<!-- table: {name} -->\n(.*?)<!-- end table -->", text, re.DOTALL)
    assert match, f"docs/keys.md has no {name} table"
    return match.group(1)


def test_docs_tables_are_the_declarations() -> None:
    from ionotrail.terminal.auth import formats as f

    tables = {
        "key-file": f.KEY_FILE, "derivation-info": f.DERIVATION_INFO, "command-mac": f.COMMAND_MAC,
        "reply-mac": f.REPLY_MAC, "fragment-mac": f.FRAGMENT_MAC, "rotate-arguments": f.ROTATE_ARGUMENTS,
        "root-record": f.ROOT_RECORD, "window-record": f.WINDOW_RECORD, "counter-record": f.COUNTER_RECORD,
        "previous-record": f.PREVIOUS_RECORD, "master-record": f.MASTER_RECORD,
    }  # fmt: skip
    text = (DOCS / "keys.md").read_text(encoding="utf-8")
    assert set(re.findall(r"<!-- table: ([a-z-]+) -->", text)) == set(tables)
    for name, declaration in tables.items():
        assert _generated(name) == wiredoc.table(declaration), f"docs/keys.md table {name} is stale"


def test_docs_state_the_sizes_the_code_has() -> None:
    prose = " ".join((DOCS / "keys.md").read_text(encoding="utf-8").split())
    for sentence in (
        f"{limits.AUTH_TAG_BYTES * 8}-bit tag",
        f"{FRAGMENT_AUTH_BYTES} bytes per fragment",
        f"window of {limits.AUTH_REPLAY_WINDOW} counters",
        f"{KEY_FILE_BYTES} bytes",
        f"opcode 0x{ROTATE_OPCODE:02X}",
    ):
        assert sentence in prose, sentence
