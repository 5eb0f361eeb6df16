"""Frame traces: written by simulate (and serve, master, soak), read back by decode --trace."""

from __future__ import annotations

import io
import json
import subprocess
import sys
from pathlib import Path

from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.reports.trace import TRACE_KEYS
from ionotrail.harness.runners.simulate import simulate
from ionotrail.terminal.wire import decode


def cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "ionotrail", *args], capture_output=True, text=True, timeout=120, check=False)


def test_a_trace_holds_every_frame_and_does_not_change_the_run() -> None:
    scenario = scenarios.load(None, ["scenario.duration_hours=1"])
    trace = io.StringIO()
    traced = simulate(scenario, trace=trace)
    plain = simulate(scenario)
    lines = [json.loads(line) for line in trace.getvalue().splitlines()]
    assert all(tuple(line) == TRACE_KEYS for line in lines)
    sent = [line for line in lines if line["station"] == "terminal" and line["outcome"] == "sent"]
    assert len(sent) == plain.report["frames"]["sent"], "every uplink frame the air counted is in the trace"
    heard = [line for line in lines if line["station"] == "master" and line["direction"] == "in"]
    assert sum(line["outcome"] == "bad_crc" for line in heard) == plain.report["frames"]["crc_failed"]
    assert all(line["snr_db"] is not None for line in heard), "the simulated modem measures every arrival"
    for line in sent:  # what the terminal sent decodes as the frame it is
        decode(bytes.fromhex(line["hex"]))
    strip = ("wall_seconds", "speedup")
    assert {k: v for k, v in traced.report.items() if k not in strip} == {k: v for k, v in plain.report.items() if k not in strip}


def test_decode_reads_a_trace_back(tmp_path: Path) -> None:
    trace = tmp_path / "t.jsonl"
    run = cli("simulate", "--hours", "1", "--trace", str(trace))
    assert run.returncode == 0, run.stderr
    lines = [json.loads(line) for line in trace.read_text(encoding="utf-8").splitlines()]
    back = cli("decode", "--trace", str(trace), "--json")
    decoded = [json.loads(line) for line in back.stdout.splitlines()]
    assert len(decoded) == sum(line["outcome"] == "ok" or line["direction"] == "out" for line in lines)
    assert back.returncode == (1 if any(line["outcome"] not in ("ok", "sent", "probe_stream") for line in lines) else 0)
    first = cli("decode", "--trace", str(trace)).stdout.splitlines()[0]
    assert " master out probe_stream" in first and "probe frame" in first


def test_decode_refuses_a_line_that_is_not_a_trace_in_one_line(tmp_path: Path) -> None:
    trace = tmp_path / "t.jsonl"
    trace.write_text('{"t": 1.0, "hex": "11"}\nnot json\n', encoding="utf-8")
    run = cli("decode", "--trace", str(trace))
    assert run.returncode == 1
    assert [line for line in run.stdout.splitlines() + run.stderr.splitlines() if "not a trace line" in line][:2] != []
