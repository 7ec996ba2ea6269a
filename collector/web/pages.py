"""
The technician's view: ``GET /`` (server-rendered health page) and ``GET /v1/status`` (the same facts as JSON).

The page works without JavaScript; a small inline script re-fetches ``/v1/status`` every few seconds
and redraws the tables. No external assets: the CSS and the script are inlined from ``templates/``.
"""

from __future__ import annotations

import html
import json
import math
import time
from collections import deque
from pathlib import Path
from string import Template
from typing import Any

from aiohttp import web

from collector.app import CLOCK, RUNTIME, SETTINGS, STORE
from collector.ingest import clock_model
from collector.store import Event, Heartbeat

TEMPLATES = Path(__file__).parent / "templates"
# Read at import, not per request: the page handler must not read files on the event loop.
_TEMPLATE_TEXT = {name: (TEMPLATES / name).read_text(encoding="utf-8")
                  for name in ("health.html", "health.css", "health.js")}

REFRESH_SECONDS = 5
RATE_WINDOW_SECONDS = 120.0

STATE_LABELS = {
    "live": ("live", "●"), "late": ("late", "◐"), "silent": ("silent", "■"), "deaf": ("deaf", "◆"),
    "drifting": ("drifting", "▲"), "backlogged": ("backlogged", "▼"), "retired": ("retired", "○"),
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
        contact = max([t for t in (c.last_batch_at if c else None, hb.at if hb else None) if t is not None], default=None)
        state = runtime.states.get(b.name, {})
        st = "retired" if b.retired_at is not None else state.get("state") or "unknown"
        fit = None
        boot = hb.boot if hb else await store.latest_boot(b.name)
        if boot is not None:
            fit = (await clock_model(runtime.clock_models, store, b.name, boot)).fit()
        total = c.readings_total if c else 0
        wall_err = stats.get("wall_error_s")
        ev = last_event.get(b.name)
        rows.append({
            "name": b.name, "room": b.room, "floor": b.floor, "state": st,
            "state_reason": state.get("reason"), "state_since": state.get("since"),
            "enrolled": b.enrolled_at is not None, "boot": boot,
            "last_contact_at": contact,
            "heartbeat_age_s": None if hb is None else max(0.0, now - hb.at), "last_contact_age_s": None if contact is None else max(0.0, now - contact),
            "readings_total": total, "batches_total": c.batches_total if c else 0,
            "readings_per_s": readings_rate(runtime.rates.get(b.name)) if b.enrolled_at is not None else None,
            "tag_rate_hz_median": _number(stats.get("tag_rate_hz_median")),
            "tags_heard": _number(stats.get("tags_heard")),
            "gap_readings": c.gap_readings if c else 0,
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
        })
    by_state: dict[str, int] = {}
    for r in rows:
        by_state[r["state"]] = by_state.get(r["state"], 0) + 1
    return {
        "at": now,
        "fleet": {"boards": len(rows), "by_state": by_state,
                  "readings_total": sum(r["readings_total"] for r in rows),
                  "tags": len(await store.list_tags()),
                  "batches": {"stored": runtime.counters.stored, "duplicate": runtime.counters.duplicate,
                              "conflict": runtime.counters.conflict, "rejected": runtime.counters.rejected,
                              "overloaded": runtime.counters.overloaded}},
        "boards": rows,
        "events": [{"id": e.id, "at": e.at, "board": e.board, "kind": e.kind, "detail": e.detail}
                   for e in reversed(recent[-20:])],
        "refresh_seconds": REFRESH_SECONDS,
    }


async def status(request: web.Request) -> web.Response:
    return web.json_response(await status_doc(request.app))


# ------------------------------------------------------------------ HTML

def _fmt(v: Any, unit: str = "", digits: int = 1) -> str:
    if v is None:
        return "–"
    if isinstance(v, float):
        if abs(v) < 0.5 * 10 ** -digits:
            v = 0.0  # no "-0.00"
        return f"{v:,.{digits}f}{unit}"
    if isinstance(v, int):
        return f"{v:,}{unit}"
    return html.escape(str(v)) + unit


def fmt_clock_error(seconds: float | None) -> str:
    """A wall-clock error a technician can read: "0.3 s", "−4 min 10 s", "−3 h 12 min"."""
    if seconds is None:
        return "–"
    sign, a = ("−" if seconds < 0 else ""), abs(seconds)
    if a < 60:
        return _fmt(seconds, " s", 1).replace("-", "−")
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


def _state_badge(state: str, reason: str | None) -> str:
    text, symbol = STATE_LABELS.get(state, (state, "?"))
    title = f' title="{html.escape(reason)}"' if reason else ""
    return (f'<span class="state s-{html.escape(state)}"{title}><span aria-hidden="true">{symbol}</span> '
            f"{html.escape(text)}</span>")


def _event_text(ev: dict[str, Any]) -> str:
    new = ev["detail"].get("new") if ev["kind"] == "state_changed" else None
    return f"→ {new}" if new else ev["kind"]


def _event_note(ev: dict[str, Any]) -> str:
    """What follows the kind in the events list: the new state, or which batches a loss covers."""
    d = ev["detail"]
    if ev["kind"] == "loss" and "first_seq" in d:
        return f' batches {d["first_seq"]}–{d["last_seq"]} lost'
    return f' → {d["new"]}' if d.get("new") else ""


def _tag_rate_title(r: dict[str, Any]) -> str:
    if r["tags_heard"] is None:
        return ""
    return f' title="median over {r["tags_heard"]:.0f} tags heard recently"'


def _board_row(r: dict[str, Any]) -> str:
    ev = r["last_event"]
    cells = [
        f'<th scope="row">{html.escape(r["name"])}</th>',
        f'<td>{html.escape(r["room"])}</td>', f'<td>{_fmt(r["floor"])}</td>',
        f'<td class="st">{_state_badge(r["state"], r["state_reason"])}</td>',
        f'<td class="age num">{fmt_age(r["last_contact_age_s"])}</td>',
        f'<td class="num readings">{_fmt(r["readings_total"])}</td>',
        f'<td class="num rate">{_fmt(r["readings_per_s"], "/s")}</td>',
        f'<td class="num tagrate"{_tag_rate_title(r)}>{_fmt(r["tag_rate_hz_median"], " Hz", 2)}</td>',
        f'<td class="num">{_fmt(r["clock_skew_ppm"], " ppm", 2)}</td>',
        f'<td class="num">{_fmt(r["clock_residual_ms"], " ms", 2)}</td>',
        f'<td class="num">{fmt_clock_error(r["wall_error_ms"] / 1000.0 if r["wall_error_ms"] is not None else None)}</td>',
        f'<td class="num">{_fmt(r["spool_backlog_batches"])}</td>',
        f'<td class="num">{_fmt(r["adverts_total"])}</td>',
        f'<td>{html.escape(_event_text(ev)) if ev else "–"}</td>',
    ]
    return f'<tr data-board="{html.escape(r["name"])}" data-state="{html.escape(r["state"])}">' + "".join(cells) + "</tr>"


def render_page(doc: dict[str, Any], title: str = "listenpost · receivers") -> str:
    fleet = doc["fleet"]
    summary = " ".join(
        f'<li>{_state_badge(s, None)} <b>{n}</b></li>' for s, n in sorted(fleet["by_state"].items()))
    events = "".join(
        f'<li><time>{time.strftime("%H:%M:%S", time.gmtime(e["at"]))}</time> '
        f'<b>{html.escape(e["board"] or "collector")}</b> {html.escape(e["kind"])}'
        f'{html.escape(_event_note(e))}'
        f'{" <span class=why>" + html.escape(str(e["detail"]["reason"])) + "</span>" if e["detail"].get("reason") else ""}</li>'
        for e in doc["events"]) or "<li>no events yet</li>"
    return Template(_TEMPLATE_TEXT["health.html"]).substitute(
        title=html.escape(title),
        css=_TEMPLATE_TEXT["health.css"],
        js=_TEMPLATE_TEXT["health.js"],
        boards_total=fleet["boards"], readings_total=f'{fleet["readings_total"]:,}', tags_total=fleet["tags"],
        summary=summary, rows="".join(_board_row(r) for r in doc["boards"]), events=events,
        refresh_ms=int(doc["refresh_seconds"] * 1000),
        generated=time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(doc["at"])),
        labels=html.escape(json.dumps(STATE_LABELS), quote=True),
    )


async def page(request: web.Request) -> web.Response:
    doc = await status_doc(request.app)
    try:  # ?refresh=S: a wall display may want it slower, a test faster
        doc["refresh_seconds"] = min(max(float(request.query.get("refresh", REFRESH_SECONDS)), 0.2), 300.0)
    except ValueError:
        pass
    name = request.app[SETTINGS].public_url or request.host
    return web.Response(text=render_page(doc, f"listenpost · {name}"), content_type="text/html",
                        headers={"Cache-Control": "no-store"})


def add_routes(app: web.Application) -> None:
    app.router.add_get("/", page, allow_head=False)
    app.router.add_get("/v1/status", status, allow_head=False)
