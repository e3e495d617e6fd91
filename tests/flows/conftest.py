"""Flow tests: one Prefect test server for the session."""

from __future__ import annotations

from collections.abc import Iterator

import pytest


@pytest.fixture(scope="session")
def prefect_server() -> Iterator[None]:
    """A throw-away Prefect API for every flow test (started once, 15-20 s)."""
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=180):
        yield
