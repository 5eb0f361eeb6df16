"""The stateful suite's power: each mutant below breaks one rule of the
protocol, and the exactly-once machine must catch it with the invariant that
rule protects.  The mutants are built here and injected through the
machine's endpoint factories; production code carries no switch for them."""

from __future__ import annotations

from collections.abc import Hashable

import pytest
from hypothesis import HealthCheck, Phase, settings
from hypothesis.stateful import run_state_machine_as_test
from ionotrail.harness.testing.pair import MASTER, TERMINAL, standard_sender
from ionotrail.harness.testing.stateful import machine_for
from ionotrail.terminal.delivery.duplicates import DuplicateFilter
from ionotrail.terminal.delivery.reassembly import Reassembler
from ionotrail.terminal.delivery.sender import Sender
from ionotrail.terminal.limits import Limits
from ionotrail.terminal.wire.frames import AckBlock, Fragment


class ResendsAcknowledgedBytes(Sender):
    """Mutant: when nothing is owed, it fills the rest of the burst with bytes
    the receiver has acknowledged instead of waiting.  It still delivers
    everything, so only the rule itself can catch it."""

    def next_fragment(self, max_payload: int, now: float, seconds_per_byte: float = 0.0) -> Fragment | None:
        fragment = super().next_fragment(max_payload, now, seconds_per_byte)
        if fragment is not None:
            return fragment
        for message in self._eligible():
            for start, end in message.acked.overlapping(0, len(message.sealed)):
                take = min(end - start, max_payload, self.limits.max_fragment_payload)
                fragment = self._fragment(message, start, take)
                message.sent.discard(start, start + take)  # held already: nothing to confirm
                return fragment
        return None


class ForgetsCompletedIds(DuplicateFilter):
    """Mutant: a completed-id window that records nothing, so every id looks new."""

    def complete(self, source: Hashable, seq: int) -> None:
        pass


def resending_sender(limits: Limits, first_id: int) -> Sender:
    return ResendsAcknowledgedBytes(TERMINAL, MASTER, limits=limits, first_id=first_id)


def forgetful_receiver(limits: Limits) -> Reassembler:
    receiver = Reassembler(limits)
    receiver.completed = ForgetsCompletedIds(limits.duplicate_window, limits.max_duplicate_sources)
    return receiver


def hunt() -> settings:
    """Enough examples to find the bug every time (derandomized, so the same
    examples every run); the first failure is the evidence, no shrinking."""
    return settings(
        settings.default,
        max_examples=max(300, settings.default.max_examples),
        stateful_step_count=80,
        derandomize=True,
        database=None,
        print_blob=False,
        report_multiple_bugs=False,
        phases=[Phase.generate],
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much],
    )


def test_the_mutants_fail_their_own_rule_in_isolation() -> None:
    # Each mutant is what its name says, checked directly (protocol rule: an
    # acknowledged byte is never resent; a completed id is recognised again).
    limits = Limits()
    for make, resent in ((standard_sender, None), (resending_sender, (0, 20))):
        sender = make(limits, 0)
        wire_id = sender.queue(b"x" * 40, 0.0)  # 44 sealed bytes
        sent = [sender.next_fragment(20, 0.0) for _ in range(3)]
        assert [(f.offset, f.end) for f in sent if f is not None] == [(0, 20), (20, 40), (40, 44)]
        sender.on_ack(AckBlock(TERMINAL, wire_id, ((0, 20),)), 1.0)  # the rest still in flight
        again = sender.next_fragment(20, 1.0)
        assert (None if again is None else (again.offset, again.end)) == resent
    receiver = forgetful_receiver(limits)
    receiver.completed.complete("source", 5)
    assert receiver.completed.classify("source", 5)[0].value == "new"


@pytest.mark.property
def test_suite_catches_a_sender_that_resends_acknowledged_bytes() -> None:
    machine = machine_for(make_sender=resending_sender, name="ResendsAcknowledgedBytesMachine")
    with pytest.raises(AssertionError, match="acknowledged bytes sent again"):
        run_state_machine_as_test(machine, settings=hunt())


@pytest.mark.property
def test_suite_catches_a_receiver_without_duplicate_window() -> None:
    # A retransmission of a message already delivered (its acknowledgement lost,
    # or a copy still in the air) is taken as new and delivered again.
    machine = machine_for(make_receiver=forgetful_receiver, name="ForgetsCompletedIdsMachine")
    with pytest.raises(AssertionError, match="delivered twice"):
        run_state_machine_as_test(machine, settings=hunt())
