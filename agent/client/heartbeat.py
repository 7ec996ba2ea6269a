"""
Periodic ``POST /v1/heartbeat``: the board's health figures, and a clock exchange.

The body is ``{"board", "boot", "t1", "clock", "wall", "stats": {...}}`` (DEVELOPERS.md); the answer
``{"t2", "t3", "config_etag"}`` closes a four-timestamp exchange and says which config version the
collector holds for this board. When that differs from the cached one, the config is fetched.
Heartbeats keep going while the uplink is backing off: they are how the collector tells a board
with a dead network path from a dead board.
"""

from __future__ import annotations

import asyncio
import enum
import json
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

import aiohttp
import structlog

from listenpost import __version__
from listenpost.agent.boardinfo import board_info
from listenpost.agent.client.net import request_timeout
from listenpost.agent.client.remote_config import ConfigFetcher, FetchResult, RemoteConfig
from listenpost.agent.client.uplink import ExchangeLog
from listenpost.core.clock import Clock
from listenpost.core.wire import canonical_json

log = structlog.get_logger("listenpost.agent.client.heartbeat")


class BeatResult(enum.Enum):
    """How one heartbeat ended."""

    OK = "ok"
    UNAUTHORIZED = "unauthorized"
    FAILED = "failed"


class Heartbeat:
    """
    Send a heartbeat every ``period_s`` seconds of the injected clock.

    Args:
        base_url: collector base URL.
        token: bearer token.
        board: board name.
        clock: injected clock (t1/t4, wall time, the period).
        session: `aiohttp.ClientSession` owned by the caller.
        stats_fn: returns the agent's figures (pipeline, spool, uplink, source); JSON-able.
        exchanges: the clock-exchange log shared with the uplink.
        period_s: seconds between heartbeats (`period_s` may be changed while running).
        timeout_s: total timeout of each request.
        config: fetcher to run when the collector's config ETag differs from ours.
        on_config: called with the new config after a successful fetch.
        state_dir: where free disk space is measured.
    """

    def __init__(
        self,
        *,
        base_url: str,
        token: str,
        board: str,
        clock: Clock,
        session: aiohttp.ClientSession,
        stats_fn: Callable[[], Mapping[str, Any]],
        exchanges: ExchangeLog,
        period_s: float = 10.0,
        timeout_s: float = 10.0,
        config: ConfigFetcher | None = None,
        on_config: Callable[[RemoteConfig], None] | None = None,
        state_dir: str | Path = ".",
        board_info_fn: Callable[[], Mapping[str, Any]] | None = None,
    ) -> None:
        if period_s <= 0 or timeout_s <= 0:
            raise ValueError("heartbeat: period_s and timeout_s must be > 0")
        self.url = base_url.rstrip("/") + "/v1/heartbeat"
        self.token = token
        self.board = board
        self.clock = clock
        self.session = session
        self.stats_fn = stats_fn
        self.exchanges = exchanges
        self.period_s = period_s
        self.timeout = request_timeout(timeout_s)
        self.config = config
        self.on_config = on_config
        self._board_info = board_info_fn or (lambda: board_info(state_dir).as_dict())
        self.started_mono = clock.monotonic()
        self.sent = 0
        self.ok = 0
        self.failed = 0
        self.last_error: str | None = None
        self.collector_etag: str | None = None
        self._parked = asyncio.Event()
        self.parked_until: float | None = None
        """Board monotonic time the current wait ends (while parked on the clock)."""

    def body(self, t1: float) -> dict[str, Any]:
        """The request body for a heartbeat sent at board monotonic time ``t1``."""
        stats = dict(self.stats_fn())
        stats.update(self._board_info())
        stats["agent_uptime_s"] = round(t1 - self.started_mono, 3)
        stats["version"] = __version__
        stats["config_etag"] = self.config.etag if self.config is not None else None
        return {
            "board": self.board,
            "boot": self.clock.boot_id,
            "t1": t1,
            "clock": self.exchanges.take(),
            "wall": self.clock.time(),
            "stats": stats,
        }

    async def beat(self) -> BeatResult:
        """Send one heartbeat; fetch the config if the collector's ETag moved on. Never raises for I/O."""
        t1 = self.clock.monotonic()
        payload = canonical_json(self.body(t1))
        headers = {"Authorization": f"Bearer {self.token}", "Content-Type": "application/json"}
        self.sent += 1
        try:
            async with self.session.post(
                self.url, data=payload, headers=headers, timeout=self.timeout
            ) as resp:
                status = resp.status
                text = await resp.text()
        except (TimeoutError, aiohttp.ClientError, OSError) as e:
            return self._fail(f"{type(e).__name__}: {e}")
        t4 = self.clock.monotonic()
        if status in (401, 403):
            self._fail(f"{status}")
            return BeatResult.UNAUTHORIZED
        if status != 200:
            return self._fail(f"{status}: {text[:120]}")
        try:
            answer = json.loads(text)
        except ValueError:
            answer = None
        if not isinstance(answer, dict):
            return self._fail(f"200 with a body that is not a JSON object: {text[:120]!r}")
        self.exchanges.record(t1, t4, answer)
        self.exchanges.delivered()
        self.exchanges.note_contact()  # an uplink waiting out an unreachable collector goes now
        self.ok += 1
        self.last_error = None
        etag = answer.get("config_etag")
        self.collector_etag = etag if isinstance(etag, str) else None
        if self.config is not None and self.collector_etag and self.collector_etag != self.config.etag:
            log.info("config_etag_changed", ours=self.config.etag, collector=self.collector_etag)
            if (
                await self.config.fetch() is FetchResult.UPDATED
                and self.on_config is not None
                and self.config.current is not None
            ):
                self.on_config(self.config.current)
        return BeatResult.OK

    def _fail(self, error: str) -> BeatResult:
        self.failed += 1
        self.last_error = error[:200]
        log.warning("heartbeat_failed", error=self.last_error)
        return BeatResult.FAILED

    async def wait_parked(self) -> None:
        """Return once the loop is waiting on the clock (tests step virtual time with it)."""
        await self._parked.wait()

    async def run(self) -> None:
        """Beat now, then every `period_s`, until cancelled."""
        while True:
            await self.beat()
            self.parked_until = self.clock.monotonic() + self.period_s
            self._parked.set()
            try:
                await self.clock.sleep(self.period_s)
            finally:
                self._parked.clear()

    def stats(self) -> dict[str, Any]:
        return {"sent": self.sent, "ok": self.ok, "failed": self.failed, "last_error": self.last_error}
