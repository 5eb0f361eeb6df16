"""Authenticated commands through the link and the master endpoint: forged,
replayed, truncated and out-of-window commands are refused, counted, and change
nothing; a key rotation over the air converges whatever power cut strikes it;
the key state and the commands run survive a reboot through a store.

The authentication core is checked against its RFC vectors in tests/test_auth.py
(RFC 4231, RFC 5869); here it is the integration that is under test."""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
from pathlib import Path

import pytest
from ionotrail.harness.runners.keying import simulated_site
from ionotrail.terminal.auth.authenticator import MasterAuthenticator, TerminalAuthenticator
from ionotrail.terminal.delivery.sender import Sender
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import AUTH_REPLAY_WINDOW, FORMAT_VERSION
from ionotrail.terminal.link.master import MasterEndpoint, ProbeChanged, ReplyArrived
from ionotrail.terminal.link.policy import Fixed
from ionotrail.terminal.link.terminal import Arrival, CommandArrived, Link, Transmit
from ionotrail.terminal.outbox.store import Batch
from ionotrail.terminal.stores.memory import MemoryStore
from ionotrail.terminal.wire import Command, CommandBlock, Probe, Reply, ReplyStatus, decode, encode
from ionotrail.terminal.wire.crc import crc16

TERMINAL, MASTER = 0x0A31, 7
SITE = simulated_site(42)
IDLE_PROBE = encode(Probe(MASTER, 0xFFFF))


class Terminal:
    """A link behind a store, its shell reduced to what matters here: commit after every input."""

    def __init__(self, store: MemoryStore) -> None:
        self.store = store
        self.link = Link(Sender(TERMINAL, MASTER), Fixed(64), bit_rate=4800.0, auth=TerminalAuthenticator(SITE.root(TERMINAL)))
        self.link.restore_durable(store.load())
        self.commit()
        self.ran: list[tuple[int, int, bytes]] = []

    def commit(self) -> None:
        if self.link.unsaved:
            self.store.commit(self.link.durable_batch())
            self.link.durable_committed()

    def hear(self, frame: bytes, t: float) -> list[bytes]:
        """Hear ``frame``; run what arrived; return what the terminal transmits in the burst it opens."""
        sent: list[bytes] = []
        for effect in self.link.on_frame(Arrival(frame, t, 20.0)):
            if isinstance(effect, CommandArrived):
                self.commit()  # recorded as run before it runs
                self.ran.append((effect.command_id, effect.opcode, effect.arguments))
                self.link.reply(effect.command_id, ReplyStatus.OK, effect.arguments)
        self.commit()
        for effect in self.link.on_frame(Arrival(IDLE_PROBE, t + 0.001, 20.0)):  # the next probe: replies go once committed
            if isinstance(effect, Transmit):
                sent.append(effect.frame)
        while self.link.deadline is not None and self.link.deadline < t + 0.2:
            for effect in self.link.on_timer(self.link.deadline):
                if isinstance(effect, Transmit):
                    sent.append(effect.frame)
        return sent

    def state(self) -> tuple[object, ...]:
        auth = self.link.auth
        assert auth is not None
        return auth.records(), self.link.commands.batch().puts, self.link.commands.queued, self.link.counters.command_repeats


def signed(master: MasterAuthenticator, command_id: int, opcode: int = 1, arguments: bytes = b"\x00\x00\x03\x84") -> CommandBlock:
    sig = master.sign_command(TERMINAL, frame_version=FORMAT_VERSION, master=MASTER, command_id=command_id, opcode=opcode, arguments=arguments)
    return CommandBlock(command_id, opcode, arguments, sig.epoch, sig.counter, sig.tag)


def frame(block: CommandBlock) -> bytes:
    return encode(Command(MASTER, TERMINAL, block))


def with_crc(body: bytes) -> bytes:
    return body + crc16(body).to_bytes(2, "big")


def test_forged_replayed_truncated_and_stale_commands_are_refused_counted_and_change_nothing() -> None:
    master = MasterAuthenticator(SITE)
    terminal = Terminal(MemoryStore())
    first = signed(master, 1)
    terminal.hear(frame(first), 0.0)
    terminal.hear(frame(signed(master, 2)), 1.0)
    assert [c for c, _, _ in terminal.ran] == [1, 2]
    auth = terminal.link.auth
    assert auth is not None
    before = terminal.state()
    writes = terminal.store.writes

    # Forged: every field the tag covers, changed (the CRC made good again, as a forger would).
    good = frame(signed(master, 3))
    body = bytearray(good[:-2])
    # Command frame: head, master, terminal (2), then the block: id 4, opcode 5, epoch 6-7, counter 8-11, length 12, arguments, tag.
    for name, offset in (("command_id", 4), ("opcode", 5), ("epoch", 7), ("counter", 11), ("argument", 14), ("tag", -1)):
        forged = bytearray(body)
        forged[offset] ^= 0x01
        terminal.hear(with_crc(bytes(forged)), 2.0)
        assert terminal.state() == before, f"a forged {name} changed the terminal's state"
    assert (auth.counters.forged, auth.counters.wrong_epoch) == (5, 1)  # a changed epoch names a key this terminal lacks
    # Replayed: the first command, heard again after another was accepted.
    terminal.hear(frame(first), 3.0)
    assert auth.counters.replayed == 1
    # Truncated: the tag cut short; the frame no longer decodes.
    decode_errors = terminal.link.counters.decode_errors
    terminal.hear(with_crc(good[:-2][:-3]), 4.0)
    assert terminal.link.counters.decode_errors == decode_errors + 1
    # Reordered out of the window: the newest arrives first, the oldest a window later.
    blocks = [signed(master, 10 + k % 40) for k in range(AUTH_REPLAY_WINDOW + 2)]
    stale_before = auth.counters.stale
    terminal.hear(frame(blocks[-1]), 5.0)
    after_newest = terminal.state()
    terminal.hear(frame(blocks[0]), 6.0)
    assert auth.counters.stale == stale_before + 1 and terminal.state() == after_newest
    assert [c for c, _, _ in terminal.ran] == [1, 2, 10 + (AUTH_REPLAY_WINDOW + 1) % 40], "nothing refused ran"
    assert terminal.store.writes > writes  # only the accepted one wrote


def test_the_same_signed_block_again_is_answered_not_run() -> None:
    master = MasterAuthenticator(SITE)
    terminal = Terminal(MemoryStore())
    block = signed(master, 5)
    first = terminal.hear(encode(Probe(MASTER, 1, poll=TERMINAL, command=block)), 0.0)
    again = terminal.hear(encode(Probe(MASTER, 2, poll=TERMINAL, command=block)), 1.0)  # the master's probes repeat it
    assert len(terminal.ran) == 1 and terminal.link.counters.command_repeats >= 1
    replies = [decode(f) for f in first + again]
    assert replies and all(isinstance(r, Reply) and r.command_id == 5 for r in replies)
    assert len({r.counter for r in replies if isinstance(r, Reply)}) == 1, "the kept reply, not a new one"


def test_a_terminal_without_keys_runs_no_command() -> None:
    link = Link(Sender(TERMINAL, MASTER), Fixed(64), bit_rate=4800.0)
    effects = link.on_frame(Arrival(frame(signed(MasterAuthenticator(SITE), 1)), 0.0, 20.0))
    assert effects == [] and link.counters.commands_without_key == 1


def test_a_master_without_keys_sends_no_command() -> None:
    with pytest.raises(UsageError, match="no site key"):
        MasterEndpoint(MASTER).command(TERMINAL, 1, b"", 0.0)


def test_commands_run_and_keys_survive_a_reboot() -> None:
    store = MemoryStore()
    master = MasterAuthenticator(SITE)
    terminal = Terminal(store)
    replayable = frame(signed(master, 1))
    terminal.hear(replayable, 0.0)
    rebooted = Terminal(store)
    rebooted.hear(replayable, 1.0)  # a replay after the reboot: the window came back
    assert rebooted.ran == [] and rebooted.link.auth is not None and rebooted.link.auth.counters.replayed == 1
    # The master's next turn re-signs command 1 (a fresh counter): answered from the kept reply, not run again.
    sent = rebooted.hear(frame(signed(master, 1)), 2.0)
    assert rebooted.ran == [] and [decode(f).result for f in sent] == [b"\x00\x00\x03\x84"]  # type: ignore[union-attr]


def test_a_command_whose_reply_a_power_cut_took_is_answered_result_lost() -> None:
    store = MemoryStore()
    master = MasterAuthenticator(SITE)
    terminal = Terminal(store)
    link = terminal.link
    effects = link.on_frame(Arrival(frame(signed(master, 4)), 0.0, 20.0))
    assert isinstance(effects[0], CommandArrived)
    terminal.commit()  # recorded as run; the power goes before the reply is made
    rebooted = Terminal(store)
    sent = rebooted.hear(frame(signed(master, 4)), 1.0)
    (reply,) = [decode(f) for f in sent]
    assert isinstance(reply, Reply) and reply.status is ReplyStatus.RESULT_LOST and rebooted.ran == []


def exchange(master: MasterEndpoint, terminal: Terminal, t: float) -> list[object]:
    """One probe of the master heard by the terminal, and its answer heard by the master."""
    effects: list[object] = []
    for sent in terminal.hear(master.probe, t):
        effects += master.on_frame(sent, t + 0.05)
    return effects


STEPS = ("none", "terminal-before-commit", "terminal-after-commit", "master-before-commit", "master-after-commit", "both")


@pytest.mark.parametrize("cut", STEPS)
def test_a_key_rotation_over_the_air_converges_through_a_power_cut(cut: str) -> None:
    """The master rotates a terminal's keys; the power fails at one step on one
    side (or both); both come back from their stores; afterwards both are at
    epoch 1 and an ordinary command runs exactly once."""
    t_store, m_store = MemoryStore(), MemoryStore()
    terminal = Terminal(t_store)
    master = MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE))

    def master_commit() -> None:
        """What MasterStation does before a probe airs: key state and command ids, durable."""
        assert master.auth is not None
        batch = master.auth.batch() if master.auth.dirty else Batch()
        if master.command_ids_unsaved:
            batch = batch.merged(master.command_id_batch())
        if batch:
            m_store.commit(batch)
        master.auth.committed()
        master.command_ids_committed()

    def master_reboot() -> MasterEndpoint:
        """A restart as MasterStation.start does it: no hint about ids or rotations but the store."""
        rebooted = MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE))
        rebooted.restore(m_store.load(), t)
        return rebooted

    master.rotate_keys(TERMINAL, 0.0)
    master_commit()  # the rotation is marked durably before the rotate command airs
    t = 0.0
    if cut in ("terminal-before-commit", "both"):
        terminal.link.on_frame(Arrival(master.probe, t, 20.0))  # accepted and rotated in memory ...
        assert terminal.link.unsaved and not terminal.link._ready(), "no reply may speak for keys not yet durable"
        terminal = Terminal(t_store)  # ... and the power went before the commit
    elif cut == "terminal-after-commit":
        terminal.link.on_frame(Arrival(master.probe, t, 20.0))
        terminal.commit()
        terminal = Terminal(t_store)  # rotated and saved; the reply never went
    for step in range(40):
        t += 1.0
        effects = exchange(master, terminal, t)
        if any(isinstance(e, ReplyArrived) for e in effects):
            if cut in ("master-before-commit", "both") and step < 20:
                master = master_reboot()  # switched in memory only: the restart sends the rotate again
                master_commit()
                cut = "done"
                continue
            master_commit()
            if cut == "master-after-commit":
                master = master_reboot()
            break
        master.on_timer(master.timer.at if master.timer else t)
    assert master.auth is not None and master.auth.epoch(TERMINAL) == 1
    assert terminal.link.auth is not None and terminal.link.auth.epoch == 1
    assert not master.auth.rotating(TERMINAL)
    master.command(TERMINAL, 9, b"\x01", t)
    master_commit()
    for _ in range(10):
        t += 1.0
        if any(isinstance(e, ReplyArrived) for e in exchange(master, terminal, t)):
            break
    assert [opcode for _, opcode, _ in terminal.ran] == [9], "the ordinary command ran exactly once, in the new epoch"
    assert isinstance(terminal.link.auth, TerminalAuthenticator) and terminal.link.auth.counters.forged == 0


def test_probe_changes_carry_freshly_signed_blocks() -> None:
    master = MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE))
    _, effects = master.command(TERMINAL, 1, b"", 0.0)
    (changed,) = [e for e in effects if isinstance(e, ProbeChanged)]
    first = decode(changed.frame)
    assert isinstance(first, Probe) and first.command is not None and first.command.counter >= 1
    assert dataclasses.is_dataclass(master.counters)


def _ionotrail(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "ionotrail", *args], capture_output=True, text=True, timeout=60, check=False)


def test_serve_and_master_take_the_right_key_file_or_say_why(tmp_path: Path) -> None:
    site, root = tmp_path / "site.key", tmp_path / "gauge.key"
    assert _ionotrail("keys", "new-site", str(site)).returncode == 0
    assert _ionotrail("keys", "provision", "--site", str(site), "--terminal", "0x0B00", str(root)).returncode == 0
    port = str(tmp_path / "no-modem")
    outbox, state = ("--outbox", str(tmp_path / "o.db")), ("--state", str(tmp_path / "m.db"))
    cases = [
        (("serve", "--keys", str(site), *outbox), "a site secret; a terminal takes its own root key"),
        (("serve", "--keys", str(root), *outbox), "the key of terminal 0x0b00, and this terminal is 0x0a31"),
        (("master", "--keys", str(root), *state), "a terminal's root key; the master takes the site secret"),
        (("serve", "--keys", str(root)), "give --outbox FILE too"),  # a reboot would forget which commands ran
        (("master", "--keys", str(site)), "give --state FILE too"),  # a restart would give out ids again
        (("master", "--rotate-keys"), "--rotate-keys: the rotation is signed with the site secret"),
    ]
    for args, expected in cases:
        run = _ionotrail(*args, "--port", port)
        assert run.returncode == 2 and expected in run.stderr and len(run.stderr.strip().splitlines()) == 1, run.stderr
    os.chmod(site, 0o644)
    run = _ionotrail("master", "--keys", str(site), *state, "--port", port)
    assert run.returncode == 2 and "chmod 600" in run.stderr, run.stderr
    assert site.read_bytes().hex() not in run.stdout + run.stderr


def test_a_command_answered_before_a_rotation_is_answered_again_after_it() -> None:
    """Its reply lost in epoch 0, a command waits out the rotation; re-signed in
    epoch 1 it is a repeat, and the kept reply is signed again in epoch 1 (the
    master no longer accepts epoch 0)."""
    terminal = Terminal(MemoryStore())
    master = MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE))
    master.command(TERMINAL, 5, b"\x07", 0.0)
    terminal.hear(master.probe, 0.0)  # run; its reply never reaches the master
    assert [op for _, op, _ in terminal.ran] == [5]
    t = 0.0
    while master.poll is not None:  # its turn ends unanswered, and the master rests
        assert master.timer is not None
        t = master.timer.at
        master.on_timer(t)
    master.rotate_keys(TERMINAL, t)  # the rotate goes first; command 5 waits for the new epoch
    answered: list[ReplyArrived] = []
    t += 1.0
    for _ in range(60):
        effects = exchange(master, terminal, t)
        answered += [e for e in effects if isinstance(e, ReplyArrived)]
        if master.timer is not None:
            master.on_timer(max(t, master.timer.at))
        t += 1.0
        if not master.pending_commands:
            break
    assert master.auth is not None and master.auth.epoch(TERMINAL) == 1
    assert [r.status for r in answered if r.result == b"\x07"] == [int(ReplyStatus.OK)], "command 5 answered, once"
    assert [op for _, op, _ in terminal.ran] == [5], "and run once"


def test_a_restarted_master_goes_on_from_its_command_ids() -> None:
    """Command ids given out before a restart are not given out again (the
    terminal would take a new command for a repeat of one it ran)."""
    store = MemoryStore()
    master = MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE))
    first, _ = master.command(TERMINAL, 1, b"", 0.0)
    assert master.auth is not None
    store.commit(master.auth.batch().merged(master.command_id_batch()))
    restarted = MasterEndpoint(MASTER, auth=MasterAuthenticator(SITE))
    restarted.restore(store.load(), 1.0)
    second, _ = restarted.command(TERMINAL, 2, b"", 1.0)
    assert (first, second) == (0, 1)


def test_the_same_block_long_after_its_turn_is_a_replay() -> None:
    master = MasterAuthenticator(SITE)
    terminal = Terminal(MemoryStore())
    block = signed(master, 6)
    probe = encode(Probe(MASTER, 1, poll=TERMINAL, command=block))
    terminal.hear(probe, 0.0)
    assert terminal.hear(probe, 1.0), "within the turn: answered from the kept reply"
    auth = terminal.link.auth
    assert auth is not None
    before = terminal.state()
    assert terminal.hear(probe, 1.0 + 10 * 3600.0) == [] and auth.counters.replayed == 1
    assert terminal.state() == before
