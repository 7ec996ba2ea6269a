"""Shared fixtures: virtual clock, structlog reset, PostgreSQL URL."""

from __future__ import annotations

import os

import pytest
import structlog

from agent.clock import VirtualClock

PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--ble-adapter", default=None, help="run live-radio tests on this adapter (e.g. hci0)")


@pytest.fixture(autouse=True)
def _reset_structlog():
    """Each test starts with structlog's defaults and no bound context."""
    structlog.reset_defaults()
    structlog.contextvars.clear_contextvars()
    yield
    structlog.reset_defaults()
    structlog.contextvars.clear_contextvars()


@pytest.fixture
def clock() -> VirtualClock:
    """A virtual clock: time moves only with ``await clock.advance(seconds)``."""
    return VirtualClock()


@pytest.fixture
def ble_adapter(request: pytest.FixtureRequest) -> str:
    adapter = request.config.getoption("--ble-adapter")
    if not adapter:
        pytest.skip("live radio test: pass --ble-adapter=hci0 to run")
    return adapter
