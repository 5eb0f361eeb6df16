"""Test configuration: hypothesis profiles and shared helpers.

Profiles (select with ``--hypothesis-profile NAME``):
  ci        derandomized, no deadline, modest example counts (loaded when CI is set)
  dev       the default on a workstation: random, no deadline
  thorough  ten times the examples of ci, for soaks before a release
"""

from __future__ import annotations

import os

import pytest
from hypothesis import HealthCheck, settings

BASE_EXAMPLES = 100

settings.register_profile(
    "ci", derandomize=True, deadline=None, max_examples=BASE_EXAMPLES, print_blob=True,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.register_profile("dev", deadline=None, max_examples=BASE_EXAMPLES)
settings.register_profile(
    "thorough", deadline=None, max_examples=10 * BASE_EXAMPLES, suppress_health_check=[HealthCheck.too_slow],
)


def pytest_configure(config: pytest.Config) -> None:
    if not config.getoption("hypothesis_profile", None):  # an explicit --hypothesis-profile wins
        settings.load_profile("ci" if os.environ.get("CI") else "dev")


def thorough() -> bool:
    """True when the run was started with ``--hypothesis-profile=thorough``."""
    return settings.get_current_profile_name() == "thorough"  # type: ignore[attr-defined,no-any-return]


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    if thorough():
        return
    skip = pytest.mark.skip(reason="long run: use --hypothesis-profile=thorough")
    for item in items:
        if "thorough" in item.keywords:
            item.add_marker(skip)
