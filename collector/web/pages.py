"""
The technician's view: ``GET /`` (what needs a person, then the fleet by floor and room) and
``GET /v1/status`` (the same facts as JSON), plus the layout every page of the view shares.

Every page is rendered on the server and works without JavaScript; a small script re-fetches the
same page every few seconds and swaps in its ``<main>``. No external assets: the CSS and the script
are inlined from ``templates/``.
"""

from __future__ import annotations

import html
import math
import time
from pathlib import Path
from string import Template
from typing import Any

from aiohttp import web

from listenpost.collector.http.middlewares import bad_field
from listenpost.collector.state import SETTINGS
from listenpost.collector.status import (
    FIGURE,
    FIGURES,
    REFRESH_SECONDS,
    STATE_LABELS,
    STATE_ORDER,
    status_doc,
)

TEMPLATES = Path(__file__).parent / "templates"
# Read at import, not per request: the page handler must not read files on the event loop.
_TEMPLATE_TEXT = {
    name: (TEMPLATES / name).read_text(encoding="utf-8") for name in ("layout.html", "site.css", "refresh.js")
}

NAV = (("/", "Fleet"), ("/plan", "Plan"))
CURRENT = ' aria-current="page"'

CARD_FIGURES = (
    "last_contact_age_s",
    "readings_per_s",
    "tag_rate_hz_median",
    "clock_skew_ppm",
    "clock_residual_ms",
    "wall_error_ms",
    "spool_backlog_batches",
    "adverts_total",
)
"""The figures on each board's card, in this order (all of them are on the board's own page)."""


async def status(request: web.Request) -> web.Response:
    return web.json_response(await status_doc(request.app))


# ------------------------------------------------------------------ shared pieces


def esc(v: Any) -> str:
    return html.escape(str(v), quote=True)


def state_badge(state: str) -> str:
    text, symbol = STATE_LABELS.get(state, (state, "?"))
    return f'<span class="state s-{esc(state)}"><span aria-hidden="true">{symbol}</span> {esc(text)}</span>'


def clock_text(t: float) -> str:
    return time.strftime("%H:%M:%S", time.gmtime(t))


def figure_list(r: dict[str, Any], keys: tuple[str, ...] = CARD_FIGURES) -> str:
    """A board's figures as label/value pairs; each value carries its figure key for tools and tests."""
    items = []
    for key in keys:
        f = FIGURE[key]
        off = key == "wall_error_ms" and any(i["what"] == "Wall clock off" for i in r.get("attention", ()))
        cls = ' class="off"' if off else ""
        items.append(
            f'<div><dt>{esc(f.label)}</dt><dd data-figure="{key}"{cls}>{esc(f.text(r.get(key)))}</dd></div>'
        )
    return f'<dl class="figs">{"".join(items)}</dl>'


def where(r: dict[str, Any]) -> str:
    floor = f" · floor {r['floor']}" if r.get("floor") else ""
    return f"{r['room']}{floor}"


def refresh_seconds(request: web.Request) -> float:
    """``?refresh=S``: a wall display may want it slower, a test faster; 0 turns refreshing off."""
    raw = request.query.get("refresh")
    try:
        refresh = float(raw) if raw is not None else REFRESH_SECONDS
    except ValueError:
        refresh = math.nan
    if not math.isfinite(refresh):
        raise bad_field(
            "refresh", f"must be seconds (0 for never, else clamped to 0.2..300), got {raw[:40]!r}"
        )
    return 0.0 if refresh <= 0 else min(max(refresh, 0.2), 300.0)


def render_layout(*, title: str, site: str, body: str, current: str, at: float, refresh: float) -> str:
    nav = "".join(
        f'<li><a href="{href}"{CURRENT if href == current else ""}>{text}</a></li>' for href, text in NAV
    )
    return Template(_TEMPLATE_TEXT["layout.html"]).substitute(
        title=esc(title),
        site=esc(site),
        nav=nav,
        css=_TEMPLATE_TEXT["site.css"],
        js=_TEMPLATE_TEXT["refresh.js"],
        body=body,
        refresh_ms=int(refresh * 1000),
        generated=time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(at)),
    )


def site_name(request: web.Request) -> str:
    return request.app[SETTINGS].public_url or request.host


def html_response(text: str, status: int = 200) -> web.Response:
    return web.Response(
        text=text, status=status, content_type="text/html", headers={"Cache-Control": "no-store"}
    )


# ------------------------------------------------------------------ the fleet page


def issue_list(r: dict[str, Any]) -> str:
    """A board's issues: what, why, what to check on site, which commands to run."""
    parts = []
    for i in r["attention"]:
        todo = "".join(
            f"<li>{'On the board, run' if c['on'] == 'board' else 'Run'} <code>{esc(c['run'])}</code></li>"
            for c in i["commands"]
        )
        parts.append(
            f'<p class="what"><b>{esc(i["what"])}</b></p><p class="why">{esc(i["why"])}</p>'
            f'<ul class="todo"><li>On site: {esc(i["site"])}</li>{todo}</ul>'
        )
    return "".join(parts)


def _issue_card(r: dict[str, Any]) -> str:
    issues = r["attention"]
    parts = [
        f'<article class="issue sev-{issues[0]["severity"]}" data-board="{esc(r["name"])}" '
        f'data-state="{esc(r["state"])}" aria-labelledby="i-{esc(r["name"])}">',
        f'<h3 id="i-{esc(r["name"])}"><a href="/board/{esc(r["name"])}">{esc(r["name"])}</a> '
        f'{state_badge(r["state"])} <span class="where">{esc(where(r))}</span></h3>',
    ]
    parts.append(issue_list(r))
    parts.append(figure_list(r))
    parts.append("</article>")
    return "".join(parts)


def _board_card(r: dict[str, Any]) -> str:
    return (
        f'<article class="board" data-board="{esc(r["name"])}" data-state="{esc(r["state"])}" '
        f'aria-labelledby="b-{esc(r["name"])}">'
        f'<h4 id="b-{esc(r["name"])}"><a href="/board/{esc(r["name"])}">{esc(r["name"])}</a> '
        f"{state_badge(r['state'])}</h4>{figure_list(r)}</article>"
    )


def _floor_key(floor: Any) -> tuple[int, str]:
    return (1, "") if floor in (None, "") else (0, str(floor))


def render_page(doc: dict[str, Any], site: str = "", refresh: float = REFRESH_SECONDS) -> str:
    fleet, rows = doc["fleet"], doc["boards"]
    chips = "".join(
        f"<li>{state_badge(s)} <b>{fleet['by_state'][s]}</b></li>"
        for s in (*STATE_ORDER, *sorted(set(fleet["by_state"]) - set(STATE_ORDER)))
        if fleet["by_state"].get(s)
    )
    troubled = sorted(
        (r for r in rows if r["attention"]), key=lambda r: (r["attention"][0]["severity"], r["name"])
    )
    if troubled:
        attention = (
            f'<p class="lede">{len(troubled)} of {fleet["boards"]} boards need a person, the most urgent '
            f'first.</p><div class="issues">{"".join(_issue_card(r) for r in troubled)}</div>'
        )
    else:
        attention = f'<p class="allwell">Nothing needs attention: all {fleet["boards"]} boards are fine.</p>'
    rest = [r for r in rows if not r["attention"]]
    groups: list[str] = []
    for floor in sorted({r["floor"] for r in rest}, key=_floor_key):
        on_floor = [r for r in rest if r["floor"] == floor]
        rooms = []
        for room in sorted({r["room"] for r in on_floor}):
            cards = "".join(
                _board_card(r) for r in sorted(on_floor, key=lambda r: r["name"]) if r["room"] == room
            )
            rooms.append(f'<h4 class="room">{esc(room)}</h4><div class="cards">{cards}</div>')
        title = f"Floor {esc(floor)}" if floor else "No floor given"
        groups.append(f'<section class="floor"><h3>{title}</h3>{"".join(rooms)}</section>')
    events = "".join(
        f'<li><time datetime="{int(e["at"])}">{clock_text(e["at"])}</time> '
        + (
            f'<a href="/board/{esc(e["board"])}">{esc(e["board"])}</a> '
            if e["board"]
            else "<b>collector</b> "
        )
        + f"{esc(e['text'])}</li>"
        for e in doc["events"]
    )
    glossary = "".join(
        f"<dt>{esc(f.heading())}</dt><dd>{esc(f.help)}</dd>" for f in FIGURES if f.key in CARD_FIGURES
    )
    body = f"""
<h1>Receivers</h1>
<p class="lede"><b id="boards-total">{fleet["boards"]}</b> boards · <b id="readings-total">{fleet["readings_total"]:,}</b>
readings stored · <b id="tags-total">{fleet["tags"]}</b> registered tags</p>
<ul class="chips" id="summary" aria-label="Boards per state">{chips}</ul>
<section aria-labelledby="attn-h" id="attention">
<h2 id="attn-h">Needs attention</h2>
{attention}
</section>
<section aria-labelledby="fleet-h" id="fleet">
<h2 id="fleet-h">{"The rest of the fleet" if troubled else "The fleet"}, by floor and room</h2>
{"".join(groups) or '<p class="lede">No other boards.</p>'}
</section>
<section aria-labelledby="events-h">
<h2 id="events-h">Recent events</h2>
<ol id="events" class="events">{events or "<li>no events yet</li>"}</ol>
</section>
<section aria-labelledby="gloss-h">
<h2 id="gloss-h">What the figures mean</h2>
<details id="glossary"><summary>Show the explanations</summary><dl class="glossary">{glossary}</dl></details>
</section>
"""
    return render_layout(
        title=f"listenpost · {site}" if site else "listenpost · receivers",
        site=site,
        body=body,
        current="/",
        at=doc["at"],
        refresh=refresh,
    )


async def page(request: web.Request) -> web.Response:
    refresh = refresh_seconds(request)
    doc = await status_doc(request.app)
    return html_response(render_page(doc, site_name(request), refresh))


def add_routes(app: web.Application) -> None:
    from listenpost.collector.web import board, plan

    app.router.add_get("/", page, allow_head=False)
    app.router.add_get("/v1/status", status, allow_head=False)
    board.add_routes(app)
    plan.add_routes(app)
