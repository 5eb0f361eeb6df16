"""The stateful suite: exactly-once delivery through loss, duplication,
reordering, corruption, lost acknowledgements and long silences, with the
sender driven as the burst link drives it.  ``tests/test_mutants.py`` proves
the suite fails on a broken sender or receiver."""

from __future__ import annotations

from typing import Any

import pytest
from hypothesis import HealthCheck, settings
from ionotrail.harness.testing.stateful import ExactlyOnceMachine


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
