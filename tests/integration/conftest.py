"""Fixtures of the integration tests that start real processes."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from tests.support.processes import Process


@pytest.fixture(scope="module")
def processes() -> Iterator[list[Process]]:
    """Every process a test module starts; all are stopped at the end, newest first."""
    started: list[Process] = []
    yield started
    for proc in reversed(started):
        proc.stop()
