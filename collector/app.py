"""
The collector's aiohttp application: composed, never subclassed; state under the typed keys of state.py.

``create_app(settings, clock=...)`` wires the board API (api.py), the admin API (admin.py), the health
page, ``/v1/status`` and ``/metrics`` (web/), the OpenAPI description, the store and the monitor.
The store and the monitor live in ``cleanup_ctx``: they open at startup and close at shutdown, and a
store passed in by the caller stays the caller's to close.
"""

from __future__ import annotations

from collections.abc import AsyncIterator

import structlog
from aiohttp import web

from listenpost.collector.config import CollectorSettings
from listenpost.collector.http import admin, api, wheelhouse
from listenpost.collector.http.auth import ensure_admin_token, hash_secret
from listenpost.collector.http.middlewares import error_middleware, request_context_middleware
from listenpost.collector.http.openapi import add_routes as add_openapi_routes
from listenpost.collector.monitor import MONITOR, Monitor
from listenpost.collector.state import CLOCK, RUNTIME, SETTINGS, STORE, Runtime
from listenpost.collector.store import Store, open_store
from listenpost.collector.web import metrics, pages
from listenpost.core.clock import Clock

log = structlog.get_logger("collector")


def create_app(
    settings: CollectorSettings, *, clock: Clock, store: Store | None = None, run_monitor: bool = True
) -> web.Application:
    """
    Build the collector application.

    Args:
        settings: validated settings (`listenpost.collector.config.load_settings`).
        clock: the injected clock; every timestamp and every sleep of the service goes through it.
        store: an open store to use (the caller closes it); ``None`` opens ``settings.resolved_db_url()``.
        run_monitor: start the background liveness/retention/webhook task (tests may drive it by hand).
    """
    app = web.Application(
        middlewares=[request_context_middleware(clock=clock), error_middleware()],
        # The board API reads bodies as streams with its own limits; this bounds everything else.
        client_max_size=1024 * 1024,
        # Bodies arrive undecoded: read_json inflates gzip within its limits and answers any other
        # Content-Encoding with a JSON 415 (aiohttp's own decoder would answer a plain-text 400).
        handler_args={"auto_decompress": False},
    )
    app[SETTINGS] = settings
    app[CLOCK] = clock
    app[RUNTIME] = Runtime()
    api.add_routes(app)
    admin.add_routes(app)
    wheelhouse.add_routes(app)
    pages.add_routes(app)
    metrics.add_routes(app)
    add_openapi_routes(app)

    async def store_ctx(app: web.Application) -> AsyncIterator[None]:
        app[RUNTIME].admin_token_hash = hash_secret(ensure_admin_token(settings.state_dir))
        own = store is None
        app[STORE] = await open_store(settings.resolved_db_url()) if own else store  # type: ignore[assignment]
        log.info("collector_started", store=app[STORE].url.split("@")[-1], state_dir=settings.state_dir)
        try:
            # Today's and tomorrow's day partitions (PostgreSQL) before the first batch; the monitor keeps
            # them a day ahead from then on.
            await app[STORE].ensure_reading_days(clock.time(), clock.time() + 86400.0)
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
