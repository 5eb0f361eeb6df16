"""The bundled capture (harness/demo/capture.hex) agrees with the demo gauge it
claims to record: its messages are demo reports, its command is the gauge's."""

from __future__ import annotations

import random
from importlib import resources

from ionotrail.harness.channel import scenario
from ionotrail.harness.demo.gauge import HEADER_BYTES, REPORT_BYTES, SET_INTERVAL, DemoGauge, decode_report
from ionotrail.terminal.wire import Fragment, Frame, Probe, Reply, ReplyStatus, decode, unseal_message


def capture() -> list[Frame]:
    text = resources.files("ionotrail.harness.demo").joinpath("capture.hex").read_text(encoding="utf-8")
    lines = (line.split("#", 1)[0].strip() for line in text.splitlines())
    return [decode(bytes.fromhex(line)) for line in lines if line]


def messages(frames: list[Frame]) -> dict[int, bytes]:
    """Each message's fragments, put back together and unsealed (CRC-32C checked)."""
    pieces: dict[int, list[Fragment]] = {}
    for frame in frames:
        if isinstance(frame, Fragment):
            pieces.setdefault(frame.message_id, []).append(frame)
    out = {}
    for message_id, parts in pieces.items():
        parts.sort(key=lambda f: f.offset)
        assert [p.offset for p in parts] == [0, *(p.end for p in parts[:-1])], "contiguous"
        assert parts[-1].final and not any(p.final for p in parts[:-1])
        out[message_id] = unseal_message(b"".join(p.payload for p in parts))
    return out


def test_the_capture_carries_demo_reports_of_the_demo_day() -> None:
    reports = {k: decode_report(v) for k, v in messages(capture()).items()}
    assert 1 <= len(reports) <= 2, "one or two reports in one opening"
    demo = scenario.load(None)
    start, end = demo.start.timestamp(), demo.start.timestamp() + demo.duration_s
    for report in reports.values():
        assert report["kind"] == "report"
        assert start <= report["created"] <= end  # type: ignore[operator]
        # A routine report's size range and header are the gauge's (REPORT_BYTES, HEADER_BYTES).
        assert REPORT_BYTES[0] <= HEADER_BYTES + 2 * len(report["readings"]) <= REPORT_BYTES[1]  # type: ignore[arg-type]
    sequences = [r["sequence"] for _, r in sorted(reports.items())]
    assert sequences == list(range(sequences[0], sequences[0] + len(sequences)))


def test_the_capture_command_is_the_gauge_set_interval_and_its_reply_the_gauge_answer() -> None:
    frames = capture()
    commands = [f.command for f in frames if isinstance(f, Probe) and f.command is not None]
    replies = [f for f in frames if isinstance(f, Reply)]
    assert len(commands) == 1 and len(replies) == 1
    command, reply = commands[0], replies[0]
    # The gauge's set-interval command: opcode SET_INTERVAL, seconds as a 4-byte
    # unsigned integer (harness/demo/gauge.py, DemoGauge.command).
    assert command.opcode == SET_INTERVAL and len(command.arguments) == 4
    gauge = DemoGauge(random.Random(1))
    assert gauge.command(command.opcode, command.arguments) == (ReplyStatus(reply.status), reply.result)
    assert reply.status == ReplyStatus.OK and reply.command_id == command.command_id
    assert gauge.interval_s == int.from_bytes(command.arguments, "big")


def test_every_acknowledgement_in_the_capture_names_a_message_it_carries() -> None:
    frames = capture()
    carried = set(messages(frames))
    acked = {f.ack.message_id for f in frames if isinstance(f, Probe) and f.ack is not None}
    assert acked == carried


def test_the_captures_command_and_reply_verify_under_the_demo_keys() -> None:
    """Signed as a simulated run of the demo signs them (harness/runners/keying.py)."""
    from ionotrail.harness.runners.keying import simulated_site
    from ionotrail.terminal.auth.authenticator import MasterAuthenticator, Outcome, TerminalAuthenticator
    from ionotrail.terminal.limits import FORMAT_VERSION

    demo = scenario.load(None)
    site = simulated_site(demo.seed)
    frames = capture()
    (probe,) = [f for f in frames if isinstance(f, Probe) and f.command is not None]
    (reply,) = [f for f in frames if isinstance(f, Reply)]
    c = probe.command
    assert c is not None
    terminal = TerminalAuthenticator(site.root(demo.terminal_address))
    check = terminal.receive_command(
        frame_version=FORMAT_VERSION, master=probe.master, command_id=c.command_id, opcode=c.opcode, arguments=c.arguments,
        epoch=c.epoch, counter=c.counter, tag=c.tag,
    )  # fmt: skip
    assert check.accepted
    outcome = MasterAuthenticator(site).receive_reply(
        demo.terminal_address, frame_version=FORMAT_VERSION, master=reply.master, command_id=reply.command_id,
        status=int(reply.status), result=reply.result, epoch=reply.epoch, counter=reply.counter, tag=reply.tag,
    )  # fmt: skip
    assert outcome is Outcome.ACCEPTED
