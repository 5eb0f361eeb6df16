"""A simulation whose loop callback raises ends with that error, never with a report."""

from __future__ import annotations

import dataclasses
import datetime as dt

import pytest
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.channel.model import Opening, TrailSet, with_openings
from ionotrail.harness.runners.simulate import simulate
from ionotrail.harness.runners.vtime import CallbackError
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.wire import ReplyStatus


class _Refuses:
    """An application that fails when the terminal asks it for anything."""

    def next_due(self) -> float | None:
        return 0.0

    def take(self, now: float, room: int) -> list[tuple[bytes, Priority]]:
        raise OSError("sensor bus not answering")

    def command(self, opcode: int, arguments: bytes) -> tuple[ReplyStatus, bytes]:
        raise OSError("sensor bus not answering")


class _CommandFails(_Refuses):
    """Has nothing to send; fails only when a downlink command arrives."""

    def next_due(self) -> float | None:
        return None


def test_the_demo_gauge_failing_in_its_callback_ends_the_run() -> None:
    """The gauge's report cannot carry a creation time before 1970 (unsigned
    32-bit seconds, harness/demo/gauge.py); the scenario check refuses such a
    start, so it is forced here past the check to make the gauge's callback fail."""
    scenario = dataclasses.replace(scenarios.load(None, ["scenario.duration_hours=1"]), start=dt.datetime(1960, 1, 1, tzinfo=dt.UTC))
    with pytest.raises(CallbackError, match=r"TerminalService\._produce.*created_s") as info:
        simulate(scenario)
    assert info.value.__cause__ is not None


def test_a_failing_command_handler_ends_the_run() -> None:
    scenario = scenarios.load(None, ["scenario.duration_hours=0.01", *scenarios.PROTOCOL_ONLY])
    trails = with_openings(TrailSet(scenario), [Opening(5.0, 30.0, 0.3, hold=2.0)])
    with pytest.raises(CallbackError, match="OSError: sensor bus not answering"):
        simulate(scenario, source=_CommandFails(), trails=trails, seconds=25.0, master_commands=[(0x0A31, 1, (900).to_bytes(4, "big"))])


def test_a_failing_source_ends_a_real_time_run_too() -> None:
    scenario = scenarios.load(None, ["scenario.duration_hours=0.01", *scenarios.PROTOCOL_ONLY])
    with pytest.raises(CallbackError, match="OSError: sensor bus not answering"):
        simulate(scenario, source=_Refuses(), seconds=30.0, realtime=True)
