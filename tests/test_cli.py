"""The command line: decode, bench and docs, as a user would run them."""

from __future__ import annotations

import itertools
import json
import subprocess
import sys

import pytest
from ionotrail.harness.cli.decode import demo_capture
from ionotrail.harness.cli.main import main
from ionotrail.terminal.modem.records import Transmit, encode_record_body
from ionotrail.terminal.wire import Fragment, decode, encode, unseal_message
from ionotrail.terminal.wire.serial_framing import encode_record


def run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "ionotrail.harness.cli.main", *args], capture_output=True, text=True, timeout=120, check=False)


def test_decode_demo_prints_fields() -> None:
    result = run("decode", "--demo")
    assert result.returncode == 0, result.stderr
    assert "demo:22  fragment frame, 58 bytes, CRC-16 ok" in result.stdout  # 48 payload bytes and the 10 of docs/wire.md
    assert "terminal    0x0a31 (2609)" in result.stdout
    assert "command   command_id=0, opcode=1, arguments=00000384, epoch=0, counter=1, tag=5e7e0d0199487cb5" in result.stdout
    assert "payload     0100016b972ac2012b04b004" in result.stdout, "a binary demo report, shown in hexadecimal only"


def test_demo_fragments_reassemble_to_sealed_messages() -> None:
    frames = [decode(bytes.fromhex(line)) for line in demo_capture().splitlines() if line and not line.startswith("#")]
    for message_id in {f.message_id for f in frames if isinstance(f, Fragment)}:
        pieces = sorted((f for f in frames if isinstance(f, Fragment) and f.message_id == message_id), key=lambda f: f.offset)
        assert pieces[-1].final and all(a.end == b.offset for a, b in itertools.pairwise(pieces))
        assert unseal_message(b"".join(p.payload for p in pieces))[0] == 1  # a routine demo report (gauge.ReportKind)


def test_decode_json_one_object_per_frame() -> None:
    result = run("decode", "--demo", "--json")
    records = [json.loads(line) for line in result.stdout.splitlines()]
    assert [r["type"] for r in records] == [
        "probe", "reply", "probe", "fragment", "fragment", "probe", "fragment", "probe", "fragment", "probe", "probe",
    ]  # fmt: skip
    assert records[3]["fields"]["terminal"] == 0x0A31 and records[3]["crc"] == "ok"
    assert records[0]["fields"]["command"] == {
        "command_id": 0, "opcode": 1, "epoch": 0, "counter": 1, "arguments": "00000384", "tag": "5e7e0d0199487cb5",
    }  # fmt: skip


def test_bad_input_is_one_line_and_non_zero() -> None:
    good = encode(Fragment(1, 2, 3, 0, b"ok")).hex()
    bad_crc = good[:-2] + ("00" if good[-2:] != "00" else "01")
    result = run("decode", good, bad_crc, "zz", "12")
    assert result.returncode == 1
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 3, result.stderr
    assert "bad_crc" in lines[0] and "computed 0x" in lines[0]
    assert "not a hexadecimal frame" in lines[1]
    assert "truncated" in lines[2]
    assert "Traceback" not in result.stderr


def test_missing_file_is_a_usage_error() -> None:
    result = run("decode", "--file", "/nonexistent/capture.hex")
    assert result.returncode == 2
    assert result.stderr.count("\n") == 1 and "cannot read" in result.stderr


def test_decode_cobs_capture(tmp_path: object, capsys: pytest.CaptureFixture[str]) -> None:
    capture = tmp_path / "line.bin"  # type: ignore[operator]
    record = encode_record_body(Transmit(7, encode(Fragment(1, 2, 3, 0, b"ok"))))  # docs/modem.md
    capture.write_bytes(b"\x00" + encode_record(record))
    assert main(["decode", "--cobs", "--file", str(capture)]) == 0
    out = capsys.readouterr().out
    assert "transmit record" in out and "fragment frame" in out


def test_help_carries_the_safety_note() -> None:
    for args in (["--help"], ["decode", "--help"]):
        result = run(*args)
        assert result.returncode == 0
        assert "authorisation" in result.stdout and "lightning" in result.stdout


def test_bench_codec_json_keys(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "codec", "--json", "--seconds", "0.02"]) == 0
    report = json.loads(capsys.readouterr().out)
    for name in ("probe", "fragment", "ack", "command", "reply"):
        row = report["frame_types"][name]
        for key in ("decode_fps", "encode_fps", "baseline_decode_fps", "ratio_to_baseline"):
            assert row[key] > 0


def test_no_command_prints_help() -> None:
    result = run()
    assert result.returncode == 2 and "decode" in result.stdout


def test_simulate_writes_report_deliveries_and_plot(tmp_path: object) -> None:
    from pathlib import Path

    out = Path(str(tmp_path))
    result = run(
        "simulate", "--hours", "3", "--seed", "4", "--policy", "fixed-128",
        "--json", str(out / "r.json"), "--deliveries", str(out / "d.jsonl"), "--plot", str(out / "t.png"),
    )  # fmt: skip
    assert result.returncode == 0, result.stderr
    assert "delivered" in result.stdout and "capacity bound" in result.stdout
    report = json.loads((out / "r.json").read_text())
    assert report["policy"] == "fixed-128" and report["seed"] == 4 and report["sim_seconds"] == 3 * 3600
    m = report["messages"]
    assert m["offered"] == m["delivered"] + m["pending"] + m["abandoned"] and m["duplicates_delivered"] == 0
    lines = [json.loads(line) for line in (out / "d.jsonl").read_text().splitlines()]
    assert len(lines) == m["delivered"]
    assert set(lines[0]) == {"terminal", "message_id", "created_s", "delivered_s", "latency_s", "size", "crc32c", "priority"}
    assert {r["priority"] for r in lines} <= {"alarm", "routine"}
    assert "energy" in result.stdout and "deadlines" in result.stdout
    energy = report["energy"]
    assert abs(energy["ledger_error_wh"]) < 1e-9 and energy["policy"] == "adaptive"
    assert all(r["delivered_s"] >= r["created_s"] for r in lines)
    assert (out / "t.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_simulate_bad_input_is_one_line() -> None:
    for args, expected in (
        (["--policy", "fixed-999"], "fixed fragment size must be 8 to 256"),
        (["--policy", "greedy"], "unknown fragment policy"),
        (["--plot", "/nonexistent/dir/t.png", "--hours", "0.1"], "no such directory"),
        (["--set", "protocol.duplex=quarter"], "protocol.duplex"),
        (["--json", "/nonexistent/dir/r.json", "--hours", "0.1"], "cannot write"),
    ):
        result = run("simulate", *args)
        assert result.returncode == 2, (args, result.stderr)
        assert expected in result.stderr and "Traceback" not in result.stderr
        assert len(result.stderr.strip().splitlines()) == 1


def test_simulate_help_carries_the_safety_note() -> None:
    result = run("simulate", "--help")
    assert result.returncode == 0 and "authorisation" in result.stdout and "--deliveries" in result.stdout


def test_bench_link_json_keys(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["bench", "link", "--json", "--hours", "0.5"]) == 0
    report = json.loads(capsys.readouterr().out)
    policies = report["policies"]
    assert {"adaptive", "stop-and-wait", "fixed-64"} <= set(policies)
    for row in policies.values():
        assert set(row) >= {"efficiency", "bits_per_burst", "speedup"}
        assert 0 <= row["efficiency"] <= 1 and row["speedup"] > 0


def test_simulate_and_bench_refuse_unusable_options_at_once(tmp_path: object) -> None:
    from pathlib import Path

    out = Path(str(tmp_path))
    cases = (
        (["simulate", "--plot", str(out / "t.svg")], "give a name ending in .png"),
        (["simulate", "--json", str(out / "same"), "--deliveries", str(out / "same")], "different files"),
        (["simulate", "--set", "protocol.burst_silence_s=0.05"], "must be longer than protocol.probe_interval_s"),
        (["simulate", "--set", "master.lat_deg=61.2", "--set", "master.lon_deg=14.1", "--json", str(out / "r.json")], "distinct sites"),
        (["bench", "link", "--hours", "-1"], "--hours -1"),
        (["bench", "link", "--hours", "nan"], "--hours nan"),
    )
    for args, expected in cases:
        result = run(*args)
        assert result.returncode == 2, (args, result.stderr)
        assert expected in result.stderr and "Traceback" not in result.stderr, (args, result.stderr)
    assert not (out / "r.json").exists(), "a refused run leaves no report behind"


@pytest.mark.parametrize("command", ["simulate", "channel"])
def test_period_and_seed_errors_name_their_option(command: str) -> None:
    for args, expected in (
        (["--days", "-1"], "--days -1: "),
        (["--days", "abc"], "argument --days: invalid float value: 'abc'"),
        (["--days", "400"], "--days 400: "),
        (["--hours", "0"], "--hours 0: "),
        (["--hours", "nan"], "--hours nan: "),
        (["--seed", "x"], "argument --seed: invalid int value: 'x'"),
        (["--seed", "-1"], "--seed -1: "),
        (["--days", "2", "--set", "scenario.start=2106-02-06T00:00:00Z"], "--set scenario.start=2106-02-06T00:00:00Z and --days 2: "),
    ):
        result = run(command, *args)
        assert result.returncode == 2, (args, result.stderr)
        last = result.stderr.strip().splitlines()[-1]
        assert expected in last and "--set scenario.duration_hours" not in last and "--set scenario.seed" not in last, (args, last)
        assert "Traceback" not in result.stderr


def test_simulate_warns_of_a_short_path_as_channel_does() -> None:
    # SHORT_PATH_KM (harness/channel/geometry.py) is 400 km; this master is about 250 km from the terminal.
    short = ["--hours", "0.1", "--set", "master.lat_deg=60.0", "--set", "master.lon_deg=18.0"]
    warnings = []
    for command in ("channel", "simulate"):
        result = run(command, *short)
        assert result.returncode == 0, result.stderr
        warnings.append([line for line in result.stderr.splitlines() if line.startswith("warning:")])
    assert warnings[0] == warnings[1] and len(warnings[0]) == 1 and "km path is short for meteor burst" in warnings[0][0]


def test_quiet_silences_the_short_path_warning_and_verbose_adds_notes() -> None:
    # The same short path as above (about 250 km; SHORT_PATH_KM in harness/channel/geometry.py is 400 km).
    short = ["--hours", "0.1", "--set", "master.lat_deg=60.0", "--set", "master.lon_deg=18.0"]
    for command in ("channel", "simulate"):
        quiet = run(command, *short, "-q")
        assert quiet.returncode == 0 and quiet.stderr == "", quiet.stderr
        figures = [line for line in quiet.stdout.splitlines() if "wall time" not in line]
        assert figures == [line for line in run(command, *short).stdout.splitlines() if "wall time" not in line]  # stderr only
    verbose = run("simulate", *short, "-v").stderr.splitlines()
    assert verbose[0].startswith("warning: a 251 km path is short for meteor burst"), verbose
    assert verbose[1] == "simulating 00:06:00 of Haldane Creek to Kestrel Ridge (demo) (built-in demo), a 251 km path, policy adaptive, seed 1"
    assert run("simulate", *short, "-q", "-v").returncode == 2  # one or the other


def test_warnings_go_through_logging(caplog: pytest.LogCaptureFixture, capsys: pytest.CaptureFixture[str]) -> None:
    short = ["--hours", "0.1", "--set", "master.lat_deg=60.0", "--set", "master.lon_deg=18.0"]
    assert main(["channel", *short]) == 0
    [record] = [r for r in caplog.records if r.levelname == "WARNING"]
    assert record.name == "ionotrail.harness.cli.common" and "km path is short for meteor burst" in record.getMessage()
    assert "warning: a 251 km path is short for meteor burst" in capsys.readouterr().err
    assert main(["channel", *short]) == 0
    assert capsys.readouterr().err.count("warning:") == 1  # the handler main() adds is gone when it returns


def test_decode_cobs_without_a_file_is_refused(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["decode", "--cobs", "00"]) == 2
    assert "--cobs" in capsys.readouterr().err
