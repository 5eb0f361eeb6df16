"""The property harness asks the sender only what the burst link asks: a
suite that drove a second, test-only path would prove nothing about the one
that runs (docs/delivery.md, "How it is tested")."""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, settings
from hypothesis.stateful import run_state_machine_as_test
from ionotrail.harness.testing.faults import FaultSchedule
from ionotrail.harness.testing.pair import MASTER, TERMINAL, LinkPair
from ionotrail.harness.testing.stateful import machine_for
from ionotrail.terminal.delivery.sender import Sender, SenderEvent
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.link import terminal as link_module
from ionotrail.terminal.wire import AckBlock, Fragment

LINK_FACING = ("fill", "next_fragment", "presume_lost", "on_ack")
"""The sender's methods for the link's side (the application's are queue and can_queue)."""


def methods_the_link_calls() -> set[str]:
    source = Path(link_module.__file__).read_text(encoding="utf-8")
    return set(re.findall(r"self\.sender\.(\w+)\(", source))


class Recording(Sender):
    """A sender that notes each link-facing call and how it was made."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.calls: list[str] = []
        self.unissued_acks = 0
        self.zero_airtime = 0

    def fill(self, budget: int, now: float) -> list[Fragment]:
        self.calls.append("fill")
        return super().fill(budget, now)

    def next_fragment(self, max_payload: int, now: float, seconds_per_byte: float = 0.0) -> Fragment | None:
        self.calls.append("next_fragment")
        self.zero_airtime += seconds_per_byte <= 0
        return super().next_fragment(max_payload, now, seconds_per_byte)

    def presume_lost(self, sent_before: float) -> None:
        self.calls.append("presume_lost")
        super().presume_lost(sent_before)

    def on_ack(self, block: AckBlock, now: float, issued: float | None = None) -> list[SenderEvent]:
        self.calls.append("on_ack")
        self.unissued_acks += issued is None
        return super().on_ack(block, now, issued)


def check(sender: Recording) -> None:
    assert sender.calls, "the harness never asked the sender for anything"
    assert set(sender.calls) <= methods_the_link_calls(), f"called {set(sender.calls) - methods_the_link_calls()}"
    assert sender.unissued_acks == 0, "an acknowledgement was applied without the time it was issued"
    assert sender.zero_airtime == 0, "a fragment was asked for without its airtime"
    first_fragment = sender.calls.index("next_fragment")
    assert "presume_lost" in sender.calls[:first_fragment], "a burst began without presuming the last one's tail lost"


def test_the_link_calls_the_methods_this_test_watches() -> None:
    # Guards the test itself: if the link stopped calling these, the check
    # above would compare against the wrong set.
    assert methods_the_link_calls() >= {"next_fragment", "presume_lost", "on_ack"}
    assert "fill" not in methods_the_link_calls()
    assert set(LINK_FACING) - methods_the_link_calls() == {"fill"}


def test_link_pair_drives_the_link_path() -> None:
    recorders: list[Recording] = []

    def make(limits: Limits, first_id: int) -> Sender:
        recorders.append(Recording(TERMINAL, MASTER, limits=limits, first_id=first_id))
        return recorders[-1]

    pair = LinkPair(FaultSchedule(loss=0.3, duplicate=0.2, reorder=0.5, budgets=(40, 300)), seed=3, make_sender=make)
    for k in range(6):
        pair.queue(bytes([k]) * (50 + 90 * k))
    assert pair.run_until_done(max_openings=500)
    (sender,) = recorders
    check(sender)


@pytest.mark.property
def test_stateful_machine_drives_the_link_path() -> None:
    recorders: list[Recording] = []

    def make(limits: Limits, first_id: int) -> Sender:
        recorders.append(Recording(TERMINAL, MASTER, limits=limits, first_id=first_id))
        return recorders[-1]

    few = settings(
        settings.default,
        max_examples=20,
        stateful_step_count=40,
        derandomize=True,
        database=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much],
    )
    run_state_machine_as_test(machine_for(make_sender=make, name="RecordingMachine"), settings=few)
    busy = [sender for sender in recorders if "next_fragment" in sender.calls]
    assert busy, "no example asked for a fragment"
    for sender in recorders:
        assert set(sender.calls) <= methods_the_link_calls()
        assert sender.unissued_acks == 0 and sender.zero_airtime == 0
