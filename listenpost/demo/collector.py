"""
The demo's collector: the real app served on loopback in this process, its collector.yaml, and the
admin calls the fleet makes to it.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import aiohttp
import yaml

from listenpost.core.clock import Clock
from listenpost.core.errors import ConfigError, ListenpostError
from listenpost.sim.truth import Truth

REQUEST_TIMEOUT_S = 10.0
"""Total timeout of the fleet's own admin calls, real seconds."""


class FleetError(ListenpostError):
    """The fleet could not be set up or driven (collector refused, enrollment failed, stuck I/O)."""


@dataclass(slots=True)
class RunningCollector:
    """A collector app served on loopback by an `aiohttp.web.AppRunner`."""

    app: Any
    runner: Any
    url: str
    state_dir: Path
    admin_token: str

    async def close(self) -> None:
        await self.runner.cleanup()


def write_collector_yaml(state_dir: Path, venue: Truth, liveness: dict[str, Any] | None = None) -> Path:
    """
    The collector.yaml of a demo venue: its tag firmware's decode rule and any liveness overrides.

    Raises:
        ConfigError: the file cannot be written.
    """
    data: dict[str, Any] = {"decode": {"rules": [dict(r) for r in venue.decode_rules]}}
    if liveness:
        data["liveness"] = dict(liveness)
    path = state_dir / "collector.yaml"
    try:
        path.write_text(
            "# Written by the listenpost fleet runner for the simulated venue.\n"
            + yaml.safe_dump(data, sort_keys=False)
        )
    except OSError as e:
        raise ConfigError(f"{path}: cannot write: {e.strerror or e}") from e
    return path


async def start_collector(
    state_dir: Path, clock: Clock, *, config: Path | None = None, port: int = 0, store: Any = None
) -> RunningCollector:
    """
    Serve the collector on 127.0.0.1 (``port`` 0: a free port) with its SQLite store in ``state_dir``.

    Raises:
        ConfigError: a bad collector.yaml.
        FleetError: the port cannot be bound.
    """
    from aiohttp import web

    from listenpost.collector.app import create_app
    from listenpost.collector.config import load_settings
    from listenpost.collector.http.auth import read_admin_token

    settings = load_settings(config, state_dir=str(state_dir), host="127.0.0.1", port=port)
    app = create_app(settings, clock=clock, store=store)
    runner = web.AppRunner(app, access_log=None)
    await runner.setup()
    try:
        site = web.TCPSite(runner, "127.0.0.1", port)
        await site.start()
    except OSError as e:
        await runner.cleanup()
        raise FleetError(f"cannot listen on 127.0.0.1:{port}: {e.strerror or e}") from e
    host, bound = runner.addresses[0][:2]
    return RunningCollector(app, runner, f"http://{host}:{bound}", state_dir, read_admin_token(state_dir))


def venue_plan(venue: Truth) -> dict[str, Any]:
    """
    The venue plan of the simulated venue, as its installer would write it: rooms and board positions
    from the truth file, reference tag positions from the scenario it was generated from.
    """
    from listenpost.collector.models.plan import plan_from_truth
    from listenpost.core.identity import parse_tag_id
    from listenpost.sim.scenario import load_scenario

    tags = load_scenario(str(venue.document["scenario"])).tags
    refs = [
        (
            parse_tag_id(f"ibeacon:{tags.venue_uuid}:{tags.reference_major}:{r.minor}"),
            r.place.room,
            r.place.at,
        )
        for r in tags.reference
    ]
    return plan_from_truth(venue.document, refs)


async def admin_call(
    session: aiohttp.ClientSession, url: str, token: str, method: str, path: str, body: Any = None
) -> Any:
    """One admin API call with a timeout; the JSON answer, or `FleetError` naming the status and message."""
    timeout = aiohttp.ClientTimeout(total=REQUEST_TIMEOUT_S)
    try:
        async with session.request(
            method, url + path, json=body, timeout=timeout, headers={"Authorization": f"Bearer {token}"}
        ) as resp:
            text = await resp.text()
            if resp.status >= 300:
                raise FleetError(f"{method} {path}: collector answered {resp.status}: {text[:200]}")
            return json.loads(text)
    except (aiohttp.ClientError, TimeoutError) as e:
        raise FleetError(f"{method} {path}: {type(e).__name__}: {e}") from e
