"""
The collector's aiohttp application: composed, never subclassed; state under typed `web.AppKey`s.

``create_app(settings, clock=...)`` wires the board API (api.py), the admin API (admin.py), the health
page, ``/v1/status`` and ``/metrics`` (web/), the OpenAPI description, the store and the monitor.
The store and the monitor live in ``cleanup_ctx``: they open at startup and close at shutdown, and a
store passed in by the caller stays the caller's to close.
"""

from __future__ import annotations

from collections import deque
from collections.abc import AsyncIterator
from dataclasses import dataclass, field
from typing import Any

import structlog
from aiohttp import web

from agent.clock import Clock
from collector.config import CollectorSettings
from collector.store import Store, open_store

log = structlog.get_logger("collector")


@dataclass(slots=True)
class BatchCounters:
    """Batches answered since start, by outcome (this process only; readings totals come from the store)."""

    stored: int = 0
    duplicate: int = 0
    conflict: int = 0
    rejected: int = 0
    unavailable: int = 0
    overloaded: int = 0
    """Answered 429: ``limits.max_inflight_batches`` batches were being stored already."""
    readings_stored: int = 0
    bytes_received: int = 0
    """Request body bytes as sent (compressed), for the bytes-per-reading figure."""


@dataclass(slots=True)
class Runtime:
    """Mutable per-application state. One per `web.Application`; never a module global."""

    admin_token_hash: str = ""
    clock_models: dict[tuple[str, str], Any] = field(default_factory=dict)
    """(board, boot) → collector.clock.ClockModel, filled from the store on first use."""
    states: dict[str, dict[str, Any]] = field(default_factory=dict)
    """board → {"state", "since", "reason"}: the monitor's latest verdict."""
    counters: BatchCounters = field(default_factory=BatchCounters)
    monitor_rounds: int = 0
    batches_inflight: int = 0
    """Batch requests past authentication and not yet answered (bounded by ``limits.max_inflight_batches``)."""
    rates: dict[str, deque[tuple[float, int]]] = field(default_factory=dict)
    """board → (collector time, readings total) snapshots, for readings per second."""
    recent_events: deque[Any] = field(default_factory=lambda: deque(maxlen=50))
    """The newest stored events (the page shows them), refreshed incrementally from ``events_cursor``."""
    events_cursor: int = 0
    token_cache: dict[str, tuple[Any, float]] = field(default_factory=dict)
    """sha256(token) → (Board, cached at): saves a database round trip per board request."""


SETTINGS = web.AppKey("settings", CollectorSettings)
CLOCK = web.AppKey("clock", Clock)
STORE = web.AppKey("store", Store)
RUNTIME = web.AppKey("runtime", Runtime)
MONITOR = web.AppKey("monitor", Any)


def create_app(settings: CollectorSettings, *, clock: Clock, store: Store | None = None,
               run_monitor: bool = True) -> web.Application:
    """
    Build the collector application.

    Args:
        settings: validated settings (`collector.config.load_settings`).
        clock: the injected clock; every timestamp and every sleep of the service goes through it.
        store: an open store to use (the caller closes it); ``None`` opens ``settings.resolved_db_url()``.
        run_monitor: start the background liveness/retention/webhook task (tests may drive it by hand).
    """
    from collector import admin, api
    from collector.auth import ensure_admin_token, hash_secret
    from collector.middlewares import error_middleware, request_context_middleware
    from collector.monitor import Monitor
    from collector.openapi import add_routes as add_openapi_routes
    from collector.web import metrics, pages

    app = web.Application(
        middlewares=[request_context_middleware(clock=clock), error_middleware()],
        # The board API reads bodies as streams with its own limits; this bounds everything else.
        client_max_size=1024 * 1024,
    )
    app[SETTINGS] = settings
    app[CLOCK] = clock
    app[RUNTIME] = Runtime()
    api.add_routes(app)
    admin.add_routes(app)
    pages.add_routes(app)
    metrics.add_routes(app)
    add_openapi_routes(app)

    async def store_ctx(app: web.Application) -> AsyncIterator[None]:
        app[RUNTIME].admin_token_hash = hash_secret(ensure_admin_token(settings.state_dir))
        own = store is None
        app[STORE] = await open_store(settings.resolved_db_url()) if own else store  # type: ignore[assignment]
        log.info("collector_started", store=app[STORE].url.split("@")[-1], state_dir=settings.state_dir)
        try:
            yield
        finally:
            if own:
                await app[STORE].close()

    async def monitor_ctx(app: web.Application) -> AsyncIterator[None]:
        monitor = Monitor(app[STORE], clock=clock, settings=settings, runtime=app[RUNTIME])
        app[MONITOR] = monitor
        if run_monitor:
            monitor.start()
        try:
            yield
        finally:
            await monitor.stop()

    app.cleanup_ctx.append(store_ctx)
    app.cleanup_ctx.append(monitor_ctx)
    return app
