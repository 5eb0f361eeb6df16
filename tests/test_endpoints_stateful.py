"""The terminal's link and the master endpoint, driven together through a hostile channel.

The machine is :class:`ionotrail.harness.testing.endpoints.EndpointsMachine`;
its rules and invariants are listed there (exactly-once delivery as in
RFC 4303's anti-replay window and RFC 5722's overlap rule, the table's timer
rule, polls for another terminal honoured).  The ``ci`` and ``dev`` profiles run
100 examples, ``thorough`` 1,000 (tests/conftest.py).
"""

from __future__ import annotations

import pytest
from hypothesis import Phase, settings
from hypothesis.stateful import run_state_machine_as_test
from ionotrail.harness.testing.endpoints import LIMITS, MASTER, TERMINAL, EndpointsMachine
from ionotrail.terminal.delivery.rangeset import RangeSet
from ionotrail.terminal.delivery.reassembly import Reassembler
from ionotrail.terminal.delivery.sender import Sender, SenderEvent
from ionotrail.terminal.link.master import MasterEndpoint
from ionotrail.terminal.wire import AckBlock

pytestmark = pytest.mark.property

TestEndpoints = EndpointsMachine.TestCase
TestEndpoints.settings = settings(settings(), stateful_step_count=60)


# --- the suite can fail: two mutants it must catch ------------------------------------------


class ResendsAcknowledgedBytes(Sender):
    """A sender that forgets every acknowledgement's ranges as soon as it applies them."""

    def on_ack(self, block: AckBlock, now: float, issued: float | None = None) -> list[SenderEvent]:
        events = super().on_ack(block, now, issued)
        for message in self._queue.values():
            message.acked = RangeSet()
            message.last_ack = None
        return events


class SenderMutant(EndpointsMachine):
    def make_sender(self) -> Sender:
        return ResendsAcknowledgedBytes(TERMINAL, MASTER, limits=LIMITS)


class NoDuplicateWindow(EndpointsMachine):
    def make_master(self) -> MasterEndpoint:
        master = super().make_master()
        master.reassembler = Reassembler(LIMITS, duplicate_window=False)
        return master


# Finding the failure is the point; shrinking it would only cost time.
MUTANT_SETTINGS = settings(phases=[Phase.generate], max_examples=500, stateful_step_count=60, deadline=None, derandomize=True, database=None, report_multiple_bugs=False)


def test_a_sender_that_resends_acknowledged_bytes_fails_the_machine() -> None:
    with pytest.raises(AssertionError, match="sent again"):
        run_state_machine_as_test(SenderMutant, settings=MUTANT_SETTINGS)


def test_a_master_without_a_duplicate_window_fails_the_machine() -> None:
    with pytest.raises(AssertionError, match="delivered twice"):
        run_state_machine_as_test(NoDuplicateWindow, settings=MUTANT_SETTINGS)
