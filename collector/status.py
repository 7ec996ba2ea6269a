"""
The status model: the fleet and per-board figures that the health page, ``/v1/status``, ``/metrics``,
``collector status``, the monitor and the demo all read, and the words they are told in.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any

from aiohttp import web

from listenpost.collector.ingest import clock_model
from listenpost.collector.state import CLOCK, RUNTIME, STORE
from listenpost.collector.store import Event, Heartbeat

REFRESH_SECONDS = 5
RATE_WINDOW_SECONDS = 120.0

STATE_LABELS = {
    "live": ("live", "●"),
    "late": ("late", "◐"),
    "silent": ("silent", "■"),
    "deaf": ("deaf", "◆"),
    "drifting": ("drifting", "▲"),
    "backlogged": ("backlogged", "▼"),
    "retired": ("retired", "○"),
    "unknown": ("not yet seen", "?"),
}
"""State → (text, symbol): the state is never told by colour alone."""


def stat(stats: dict[str, Any], *names: str) -> Any:
    """A heartbeat figure by any of ``names``, at the top level or one level down (``spool.batches``)."""
    for name in names:
        head, _, tail = name.partition(".")
        v = stats.get(head)
        if tail:
            v = v.get(tail) if isinstance(v, dict) else None
        if v is not None and not isinstance(v, bool):
            return v
    return None


def _spool_degraded(stats: dict[str, Any]) -> bool:
    """The board's spool cannot write (disk full, I/O error): its readings are in memory only."""
    spool = stats.get("spool")
    return stats.get("spool_degraded") is True or (isinstance(spool, dict) and spool.get("degraded") is True)


def _with_spool_problem(reason: str | None, stats: dict[str, Any]) -> str | None:
    if not _spool_degraded(stats):
        return reason
    problem = "spool cannot write (disk full?): readings held in memory only"
    return f"{problem}; {reason}" if reason else problem


def note_total(history: deque[tuple[float, int]], at: float, total: int) -> None:
    """
    Keep one (collector time, readings total) sample; drop samples no longer needed for the window.

    The monitor calls this for every board each round (leader or follower), so every collector's page
    shows the same rate, however often the page is looked at.
    """
    if history and at <= history[-1][0]:
        return
    history.append((at, total))
    while len(history) > 2 and at - history[1][0] >= RATE_WINDOW_SECONDS:
        history.popleft()


def readings_rate(history: deque[tuple[float, int]] | None) -> float | None:
    """
    Readings stored per second over about the last ``RATE_WINDOW_SECONDS`` (oldest kept sample to newest);
    None until two samples at least a second apart exist. Batches arrive every few seconds, so a
    window of minutes smooths their steps.
    """
    if not history or len(history) < 2:
        return None
    (t0, n0), (t1, n1) = history[0], history[-1]
    return (n1 - n0) / (t1 - t0) if t1 - t0 >= 1.0 else None


def _number(v: Any) -> float | None:
    """A heartbeat figure if it is a finite number (boards may be older or newer than this collector)."""
    return float(v) if isinstance(v, int | float) and not isinstance(v, bool) and math.isfinite(v) else None


async def recent_events(app: web.Application) -> list[Event]:
    """The newest events, oldest first; reads only what was stored since the last call."""
    runtime, store = app[RUNTIME], app[STORE]
    while True:
        page = await store.events(since_id=runtime.events_cursor, limit=1000)
        runtime.recent_events.extend(page)
        for e in page:  # every stored event passes here once: the per-board sum is exact and durable
            if e.kind == "unregistered_ids" and e.board:
                n = e.detail.get("readings")
                runtime.unregistered[e.board] = runtime.unregistered.get(e.board, 0) + (
                    n if isinstance(n, int) else 0
                )
        if page:
            runtime.events_cursor = max(e.id or 0 for e in page)
        if len(page) < 1000:
            return list(runtime.recent_events)


async def status_doc(app: web.Application) -> dict[str, Any]:
    """Fleet and per-board figures for the page, ``/v1/status``, ``collector status`` and the demo."""
    store, runtime, now = app[STORE], app[RUNTIME], app[CLOCK].time()
    boards = await store.list_boards()
    counts = {c.board: c for c in await store.board_counts()}
    beats: dict[str, Heartbeat] = await store.latest_heartbeats()
    recent = await recent_events(app)
    last_event: dict[str, Event] = {e.board: e for e in recent if e.board}
    rows = []
    for b in boards:
        c = counts.get(b.name)
        hb = beats.get(b.name)
        stats = hb.stats if hb else {}
        contact = max(
            [t for t in (c.last_batch_at if c else None, hb.at if hb else None) if t is not None],
            default=None,
        )
        state = runtime.states.get(b.name, {})
        st = "retired" if b.retired_at is not None else state.get("state") or "unknown"
        fit = None
        boot = hb.boot if hb else await store.latest_boot(b.name)
        if boot is not None:
            fit = (await clock_model(runtime.clock_models, store, b.name, boot)).fit()
        total = c.readings_total if c else 0
        wall_err = stats.get("wall_error_s")
        ev = last_event.get(b.name)
        rows.append(
            {
                "name": b.name,
                "room": b.room,
                "floor": b.floor,
                "state": st,
                "state_reason": _with_spool_problem(state.get("reason"), stats),
                "spool_degraded": _spool_degraded(stats),
                "state_since": state.get("since"),
                "enrolled": b.enrolled_at is not None,
                "boot": boot,
                "last_contact_at": contact,
                "heartbeat_age_s": None if hb is None else max(0.0, now - hb.at),
                "last_contact_age_s": None if contact is None else max(0.0, now - contact),
                "readings_total": total,
                "batches_total": c.batches_total if c else 0,
                "readings_per_s": readings_rate(runtime.rates.get(b.name))
                if b.enrolled_at is not None
                else None,
                "tag_rate_hz_median": _number(stats.get("tag_rate_hz_median")),
                "tags_heard": _number(stats.get("tags_heard")),
                "gap_readings": c.gap_readings if c else 0,
                "unregistered_readings": runtime.unregistered.get(b.name, 0),
                "clock_exchanges_refused": sum(
                    m.n_refused for (name, _), m in runtime.clock_models.items() if name == b.name
                ),
                "clock_offset_ms": fit.offset_s * 1000.0 if fit else None,
                "clock_skew_ppm": fit.skew_ppm if fit else None,
                "clock_residual_ms": fit.residual_ms if fit else None,
                "clock_steps": len(fit.steps) if fit else 0,
                "wall_error_ms": wall_err * 1000.0 if isinstance(wall_err, int | float) else None,
                "spool_backlog_batches": stat(stats, "spool_batches", "spool.batches"),
                "spool_backlog_bytes": stat(stats, "spool_bytes", "spool.bytes"),
                "adverts_total": stat(stats, "adverts_total", "pipeline.adverts_total"),
                "adverts_registered": stat(stats, "adverts_registered", "pipeline.adverts_registered"),
                "offset_db": b.offset_db,
                "last_event": {"kind": ev.kind, "at": ev.at, "detail": ev.detail} if ev else None,
            }
        )
    by_state: dict[str, int] = {}
    for r in rows:
        by_state[r["state"]] = by_state.get(r["state"], 0) + 1
    return {
        "at": now,
        "fleet": {
            "boards": len(rows),
            "by_state": by_state,
            "readings_total": sum(r["readings_total"] for r in rows),
            "tags": len(await store.list_tags()),
            "batches": {
                "stored": runtime.counters.stored,
                "duplicate": runtime.counters.duplicate,
                "conflict": runtime.counters.conflict,
                "rejected": runtime.counters.rejected,
                "overloaded": runtime.counters.overloaded,
            },
        },
        "boards": rows,
        "events": [
            {"id": e.id, "at": e.at, "board": e.board, "kind": e.kind, "detail": e.detail}
            for e in reversed(recent[-20:])
        ],
        "refresh_seconds": REFRESH_SECONDS,
    }


def fmt_clock_error(seconds: float | None) -> str:
    """A wall-clock error a technician can read: "0.3 s", "−4 min 10 s", "−3 h 12 min"."""
    if seconds is None:
        return "–"
    sign, a = ("−" if seconds < 0 else ""), abs(seconds)
    if a < 60:
        return f"{0.0 if a < 0.05 else seconds:.1f} s".replace("-", "−")
    if a < 3600:
        return f"{sign}{int(a // 60)} min {int(round(a % 60))} s"
    return f"{sign}{int(a // 3600)} h {int(round(a % 3600 / 60))} min"


def fmt_age(seconds: float | None) -> str:
    if seconds is None:
        return "never"
    if seconds < 90:
        return f"{seconds:.0f} s ago"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min ago"
    if seconds < 172800:
        return f"{seconds / 3600:.1f} h ago"
    return f"{seconds / 86400:.0f} d ago"
