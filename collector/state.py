"""
The collector's state: the typed runtime of one application and the `web.AppKey`s it is kept under.

Handlers, the status model and the monitor import this module; only app.py imports the handlers.
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass, field
from typing import Any

from aiohttp import web

from listenpost.collector.config import CollectorSettings
from listenpost.collector.store import Store
from listenpost.core.clock import Clock


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
    """(board, boot) → listenpost.collector.models.clock.ClockModel, filled from the store on first use."""
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
    tag_registry: tuple[frozenset[str], float] | None = None
    """(registered tags, read at): the registry a batch's identities are checked against, re-read
    every ``REGISTRY_CACHE_SECONDS`` (collector/http/api.py)."""
    board_configs: dict[str, tuple[frozenset[str], float, dict[str, Any], str]] = field(default_factory=dict)
    """board → (registry snapshot, offset_db, config document, ETag): `board_config` builds each once."""
    unregistered: dict[str, int] = field(default_factory=dict)
    """board → readings dropped as unregistered, summed from the stored ``unregistered_ids`` events."""
    calibration_shifts: dict[str, dict[str, Any]] = field(default_factory=dict)
    """board → detail of its latest ``calibration_shift`` event not followed by a calibration."""


SETTINGS = web.AppKey("settings", CollectorSettings)
CLOCK = web.AppKey("clock", Clock)
STORE = web.AppKey("store", Store)
RUNTIME = web.AppKey("runtime", Runtime)
