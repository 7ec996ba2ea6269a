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
from pathlib import Path
from string import Template
from typing import Any

from aiohttp import web

from listenpost.collector.http.middlewares import bad_field
from listenpost.collector.state import SETTINGS
from listenpost.collector.status import REFRESH_SECONDS, STATE_LABELS, fmt_age, fmt_clock_error, status_doc

TEMPLATES = Path(__file__).parent / "templates"
# Read at import, not per request: the page handler must not read files on the event loop.
_TEMPLATE_TEXT = {
    name: (TEMPLATES / name).read_text(encoding="utf-8")
    for name in ("health.html", "health.css", "health.js")
}


async def status(request: web.Request) -> web.Response:
    return web.json_response(await status_doc(request.app))


# ------------------------------------------------------------------ HTML


def _fmt(v: Any, unit: str = "", digits: int = 1) -> str:
    if v is None:
        return "–"
    if isinstance(v, float):
        if abs(v) < 0.5 * 10**-digits:
            v = 0.0  # no "-0.00"
        return f"{v:,.{digits}f}{unit}"
    if isinstance(v, int):
        return f"{v:,}{unit}"
    return html.escape(str(v)) + unit


def _state_badge(state: str, reason: str | None) -> str:
    text, symbol = STATE_LABELS.get(state, (state, "?"))
    title = f' title="{html.escape(reason)}"' if reason else ""
    return (
        f'<span class="state s-{html.escape(state)}"{title}><span aria-hidden="true">{symbol}</span> '
        f"{html.escape(text)}</span>"
    )


def _event_text(ev: dict[str, Any]) -> str:
    new = ev["detail"].get("new") if ev["kind"] == "state_changed" else None
    return f"→ {new}" if new else ev["kind"]


def _event_note(ev: dict[str, Any]) -> str:
    """What follows the kind in the events list: the new state, or which batches a loss covers."""
    d = ev["detail"]
    if ev["kind"] == "loss" and "first_seq" in d:
        return f" batches {d['first_seq']}–{d['last_seq']} lost"
    return f" → {d['new']}" if d.get("new") else ""


def _tag_rate_title(r: dict[str, Any]) -> str:
    if r["tags_heard"] is None:
        return ""
    return f' title="median over {r["tags_heard"]:.0f} tags heard recently"'


def _board_row(r: dict[str, Any]) -> str:
    ev = r["last_event"]
    cells = [
        f'<th scope="row">{html.escape(r["name"])}</th>',
        f"<td>{html.escape(r['room'])}</td>",
        f"<td>{_fmt(r['floor'])}</td>",
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
        f"<td>{html.escape(_event_text(ev)) if ev else '–'}</td>",
    ]
    return (
        f'<tr data-board="{html.escape(r["name"])}" data-state="{html.escape(r["state"])}">'
        + "".join(cells)
        + "</tr>"
    )


def render_page(doc: dict[str, Any], title: str = "listenpost · receivers") -> str:
    fleet = doc["fleet"]
    summary = " ".join(
        f"<li>{_state_badge(s, None)} <b>{n}</b></li>" for s, n in sorted(fleet["by_state"].items())
    )
    events = (
        "".join(
            f"<li><time>{time.strftime('%H:%M:%S', time.gmtime(e['at']))}</time> "
            f"<b>{html.escape(e['board'] or 'collector')}</b> {html.escape(e['kind'])}"
            f"{html.escape(_event_note(e))}"
            f"{' <span class=why>' + html.escape(str(e['detail']['reason'])) + '</span>' if e['detail'].get('reason') else ''}</li>"
            for e in doc["events"]
        )
        or "<li>no events yet</li>"
    )
    return Template(_TEMPLATE_TEXT["health.html"]).substitute(
        title=html.escape(title),
        css=_TEMPLATE_TEXT["health.css"],
        js=_TEMPLATE_TEXT["health.js"],
        boards_total=fleet["boards"],
        readings_total=f"{fleet['readings_total']:,}",
        tags_total=fleet["tags"],
        summary=summary,
        rows="".join(_board_row(r) for r in doc["boards"]),
        events=events,
        refresh_ms=int(doc["refresh_seconds"] * 1000),
        generated=time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(doc["at"])),
        labels=html.escape(json.dumps(STATE_LABELS), quote=True),
    )


async def page(request: web.Request) -> web.Response:
    raw = request.query.get("refresh")  # ?refresh=S: a wall display may want it slower, a test faster
    try:
        refresh = float(raw) if raw is not None else REFRESH_SECONDS
    except ValueError:
        refresh = math.nan
    if not math.isfinite(refresh):
        raise bad_field("refresh", f"must be seconds (clamped to 0.2..300), got {raw[:40]!r}")
    doc = await status_doc(request.app)
    doc["refresh_seconds"] = min(max(refresh, 0.2), 300.0)
    name = request.app[SETTINGS].public_url or request.host
    return web.Response(
        text=render_page(doc, f"listenpost · {name}"),
        content_type="text/html",
        headers={"Cache-Control": "no-store"},
    )


def add_routes(app: web.Application) -> None:
    app.router.add_get("/", page, allow_head=False)
    app.router.add_get("/v1/status", status, allow_head=False)
