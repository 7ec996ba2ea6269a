"""Shared fixtures: virtual clock, structlog reset, PostgreSQL URL."""

from __future__ import annotations

import os
import shutil

import pytest
import structlog

from listenpost.core.clock import VirtualClock

PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")


def pytest_addoption(parser: pytest.Parser) -> None:
    parser.addoption("--ble-adapter", default=None, help="run live-radio tests on this adapter (e.g. hci0)")


# The modules that take longest, started first: `make test` hands whole modules to two workers in
# collection order (``--dist loadscope``), so a long module collected last would run alone at the end.
LONG_MODULES = (
    "tests/packaging/test_wheel.py",  # a wheel, two fresh environments and the demo
    "tests/collector/test_report.py",
    "tests/collector/test_wheelhouse.py",
    "tests/collector/test_openapi.py",
    "tests/collector/test_leadership.py",
    "tests/collector/test_calibration.py",
)


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    def rank(item: pytest.Item) -> int:
        path = item.nodeid.split("::")[0]
        return LONG_MODULES.index(path) if path in LONG_MODULES else len(LONG_MODULES)

    items.sort(key=rank)  # stable: the order within each module and among the rest stays


def require_tool(name: str) -> str:
    """
    The path of a command-line tool the test checks against; skip without it locally, but fail when
    LISTENPOST_REQUIRE_TOOLS=1 (CI installs every tool, so there a missing one is a broken install).
    """
    path = shutil.which(name)
    if path is None:
        if os.environ.get("LISTENPOST_REQUIRE_TOOLS") == "1":
            pytest.fail(f"{name} is not installed and LISTENPOST_REQUIRE_TOOLS=1")
        pytest.skip(f"{name} is not installed")
    return path


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
