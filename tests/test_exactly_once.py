"""The stateful suite: exactly-once delivery through loss, duplication,
reordering, corruption, lost acknowledgements and long silences, with the
sender driven as the burst link drives it.  ``tests/test_mutants.py`` proves
the suite fails on a broken sender or receiver."""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import HealthCheck, settings
from ionotrail.harness.testing.pair import MASTER, TERMINAL
from ionotrail.harness.testing.stateful import ExactlyOnceMachine
from ionotrail.terminal.wire import Ack, AckBlock, Fragment, decode, encode, seal_message


def suite_settings(**overrides: Any) -> settings:
    """The active profile (ci, dev or thorough) with the suite's step count."""
    return settings(
        settings.default,
        stateful_step_count=80,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large, HealthCheck.filter_too_much],
        **overrides,
    )


TestExactlyOnceThroughAHostileChannel = pytest.mark.property(ExactlyOnceMachine.TestCase)
TestExactlyOnceThroughAHostileChannel.settings = suite_settings()


def test_the_machine_allows_exactly_the_solicitation_of_a_fully_held_message() -> None:
    # The receiver in the machine never reports every byte held without a
    # verdict, so the machine's one exception to "no acknowledged byte is sent
    # again" is checked here, on the rule as docs/delivery.md states it: a
    # one-byte final fragment carrying the last byte, once every byte is
    # acknowledged.  Anything more is a resend.
    machine = ExactlyOnceMachine()
    machine.start(first_id=0, backlog=[b"abc"])  # 7 sealed bytes
    (wire_id,) = machine.order_of_id
    machine.send_fragment(max_payload=7)
    held = AckBlock(TERMINAL, wire_id, ((0, 7),))  # held, no verdict (say the CRC-32C check failed)
    machine._acknowledge(encode(Ack(MASTER, held)), issued=machine.now)
    machine.send_fragment(max_payload=7)
    solicitation = decode(machine.uplink[-1])
    assert isinstance(solicitation, Fragment)
    assert (solicitation.offset, solicitation.end, solicitation.final) == (6, 7, True)
    sealed = seal_message(b"abc")
    for offset, payload in ((5, sealed[5:]), (0, sealed[:1])):
        resend = Fragment(TERMINAL, MASTER, wire_id, offset, payload, final=offset + len(payload) == 7)
        with pytest.raises(AssertionError, match="acknowledged bytes sent again"):
            machine._on_air(resend, encode(resend))
