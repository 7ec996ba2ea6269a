"""
The wheelhouse: built with pip for a platform, served read-only under /wheels/, and enough to install
the agent into a fresh environment with no package index reachable (a venue network without internet).
"""

from __future__ import annotations

import asyncio
import io
import os
import platform
import subprocess
import venv
from pathlib import Path

import pytest

from listenpost.collector.app import create_app
from listenpost.collector.http.wheelhouse import (
    WheelhouseError,
    build_wheelhouse,
    manylinux_platforms,
    wheel_dir,
)
from listenpost.collector.provision import build_bundle
from listenpost.core.errors import ConfigError
from listenpost.core.logs import configure
from tests.collector.test_api import settings_for

PIP_TIMEOUT_S = 900


def this_platform() -> tuple[str, ...]:
    """This machine's manylinux tags, as a board's would be."""
    libc, version = platform.libc_ver()
    if libc != "glibc":
        pytest.skip(f"not a glibc system ({libc or 'unknown libc'})")
    major, minor = (int(x) for x in version.split(".")[:2])
    return manylinux_platforms(platform.machine(), (major, minor))


@pytest.fixture(scope="module")
def house(tmp_path_factory) -> Path:
    """A wheelhouse for this machine, built once: listenpost from this checkout, its agent dependencies."""
    state = tmp_path_factory.mktemp("collector")
    py = f"{os.sys.version_info.major}.{os.sys.version_info.minor}"
    build_wheelhouse(wheel_dir(state), platforms=this_platform(), python_version=py)
    return state


async def _serve(aiohttp_server, state: Path):
    configure("json", stream=io.StringIO())
    return await aiohttp_server(create_app(settings_for(state), clock=_clock(), run_monitor=False))


def _clock():
    from listenpost.core.clock import VirtualClock

    return VirtualClock()


def test_the_wheelhouse_holds_listenpost_and_every_agent_dependency_and_no_collector_one(house):
    names = {p.name.split("-")[0].lower() for p in wheel_dir(house).glob("*.whl")}
    assert {"listenpost", "bleak", "aiohttp", "pyyaml", "structlog"} <= names
    assert not names & {"numpy", "asyncpg", "prometheus_client"}  # the collector extra stays out


async def test_the_agent_installs_from_the_collector_with_the_index_unreachable(
    house, aiohttp_server, tmp_path
):
    server = await _serve(aiohttp_server, house)
    url = str(server.make_url("")).rstrip("/")
    env_dir = tmp_path / "board"
    venv.create(env_dir, with_pip=True)  # pip from ensurepip's bundled wheel: nothing fetched
    # The command the bundle runs, with nothing else to fall back on: no index (and a dead one named),
    # no pip config files, no find-links of this machine.
    cmd = build_bundle(board="g0-a", room="G0", floor=None, code="C", collector_url=url, expires_at=0)[
        "user-data"
    ]
    assert f"--no-index, --find-links, '{url}/wheels/'" in cmd
    env = {k: v for k, v in os.environ.items() if not k.startswith("PIP_")}
    env |= {"PIP_INDEX_URL": "http://127.0.0.1:9/", "PIP_CONFIG_FILE": os.devnull, "PIP_NO_CACHE_DIR": "1"}
    r = await asyncio.to_thread(
        subprocess.run,
        [str(env_dir / "bin/pip"), "install", "--no-index", "--find-links", f"{url}/wheels/", "listenpost"],
        capture_output=True,
        text=True,
        timeout=PIP_TIMEOUT_S,
        env=env,
    )
    assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-2000:]
    assert f"{url}/wheels/" in r.stdout + r.stderr or "listenpost" in r.stdout
    version = await asyncio.to_thread(
        subprocess.run,
        [str(env_dir / "bin/listenpost"), "--version"],
        capture_output=True,
        text=True,
        timeout=60,
        cwd=tmp_path,
    )
    assert version.returncode == 0 and version.stdout.startswith("listenpost ")
    importable = await asyncio.to_thread(
        subprocess.run,
        [str(env_dir / "bin/python"), "-c", "import bleak, aiohttp, yaml, structlog"],
        timeout=60,
        cwd=tmp_path,
    )
    assert importable.returncode == 0


def test_a_dependency_without_a_wheel_for_the_platform_is_named(house, tmp_path):
    own = next(wheel_dir(house).glob("listenpost-*.whl"))
    dest = tmp_path / "wheels"
    dest.mkdir()
    (dest / "kept.whl").write_bytes(b"the previous wheelhouse")
    with pytest.raises(
        WheelhouseError,
        match=r"^no wheel of (aiohttp|pyyaml|multidict|yarl|frozenlist|propcache)\S* for Python 3\.11 on linux_bogus_board",
    ):
        build_wheelhouse(dest, platforms=["linux_bogus_board"], python_version="3.11", wheel=own)
    assert [p.name for p in dest.iterdir()] == ["kept.whl"]  # a failed build leaves the old one whole
    assert [p.name for p in tmp_path.iterdir()] == ["wheels"]  # and no scratch folder behind
    with pytest.raises(ConfigError, match="^--python-version"):
        build_wheelhouse(dest, python_version="311", wheel=own)
    with pytest.raises(ConfigError, match="^--platform"):
        build_wheelhouse(dest, platforms=["../x"], wheel=own)


async def test_wheels_are_served_read_only_and_nothing_else_of_the_state_dir(aiohttp_server, tmp_path):
    state = tmp_path / "state"
    server = await _serve(aiohttp_server, state)
    import aiohttp

    async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as s:
        async with s.get(server.make_url("/wheels/")) as r:
            assert r.status == 404 and "wheelhouse build" in await r.text()
        folder = wheel_dir(state)
        folder.mkdir()
        (folder / "demo_pkg-1.0-py3-none-any.whl").write_bytes(b"PK-wheel")
        async with s.get(server.make_url("/wheels/")) as r:
            assert r.status == 200 and r.content_type == "text/html"
            assert '<a href="demo_pkg-1.0-py3-none-any.whl">' in await r.text()
        async with s.get(server.make_url("/wheels/demo_pkg-1.0-py3-none-any.whl")) as r:
            assert r.status == 200 and await r.read() == b"PK-wheel"
        for bad in (
            "admin-token",
            "..%2Fadmin-token",
            "%2E%2E%2Fcollector.sqlite",
            "nope-1.0-py3-none-any.whl",
        ):
            async with s.get(
                server.make_url("/wheels/") / bad if "%" not in bad else f"{server.make_url('/wheels/')}{bad}"
            ) as r:
                assert r.status == 404, bad
        async with s.post(server.make_url("/wheels/demo_pkg-1.0-py3-none-any.whl")) as r:
            assert r.status == 405
