"""The stateful suite: exactly-once delivery through loss, duplication,
reordering, corruption, lost acknowledgements and long silences."""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import HealthCheck, Phase, settings
from hypothesis.stateful import run_state_machine_as_test
from ionotrail.harness.testing.stateful import ExactlyOnceMachine, WithoutDuplicateWindow


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


@pytest.mark.property
def test_suite_catches_a_receiver_without_duplicate_window() -> None:
    # The suite must be able to fail: with the window off, a retransmission
    # after a lost acknowledgement is delivered again, and the machine says so.
    quick = suite_settings(
        max_examples=max(300, settings.default.max_examples),
        derandomize=True,
        print_blob=False,
        report_multiple_bugs=False,
        phases=[Phase.generate],  # the first failure is the evidence; no need to shrink it
    )
    with pytest.raises(AssertionError, match="delivered twice|undelivered message"):
        run_state_machine_as_test(WithoutDuplicateWindow, settings=quick)
