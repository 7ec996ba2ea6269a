"""
``GET /plan``: each floor of the venue plan drawn as inline SVG, each board where it hangs with its
state told by shape, word and colour, rooms shaded by how many live boards hang in them, reference
tags marked. ``PUT /v1/admin/plan``: import a plan (``collector plan import FILE``); it is kept as
canonical JSON in the collector's state directory (``venue-plan.json``), written whole or not at all.
"""

from __future__ import annotations

import asyncio
import json
import os
from pathlib import Path
from typing import Any

from aiohttp import web

from listenpost.collector.http.admin import require_admin
from listenpost.collector.http.api import read_json
from listenpost.collector.http.middlewares import ApiError
from listenpost.collector.models.plan import PLAN_FILE, Floor, VenuePlan, parse_plan
from listenpost.collector.state import SETTINGS
from listenpost.collector.status import STATE_LABELS, status_doc
from listenpost.collector.web.pages import (
    esc,
    html_response,
    refresh_seconds,
    render_layout,
    site_name,
    state_badge,
)
from listenpost.core.errors import ConfigError

# ------------------------------------------------------------------ keeping the plan


def plan_path(state_dir: str | Path) -> Path:
    return Path(state_dir) / PLAN_FILE


def save_plan(state_dir: str | Path, plan: VenuePlan) -> None:
    """Write the canonical plan atomically: a reader sees the old plan or the new one, never half."""
    path = plan_path(state_dir)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "w", encoding="utf-8") as f:
        json.dump(plan.to_document(), f, indent=1, sort_keys=True)
        f.flush()
        os.fsync(f.fileno())
    os.replace(tmp, path)


def read_plan(state_dir: str | Path) -> VenuePlan | None:
    """The imported plan, or None if none was imported. Raises `ConfigError` if the file is damaged."""
    path = plan_path(state_dir)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return None
    except OSError as e:
        raise ConfigError(f"{path}: cannot read: {e.strerror or e}") from e
    try:
        return parse_plan(json.loads(text), str(path))
    except ValueError as e:
        raise ConfigError(f"{path}: not JSON: {e}") from e


async def current_plan(app: web.Application) -> VenuePlan | None:
    return await asyncio.to_thread(read_plan, app[SETTINGS].state_dir)


async def import_plan(request: web.Request) -> web.Response:
    """``PUT /v1/admin/plan`` with the plan document as JSON: all of it valid, or nothing kept."""
    require_admin(request)
    body = await read_json(request, request.app[SETTINGS].limits)
    try:
        plan = parse_plan(body, "plan")
    except ConfigError as e:
        path, _, problem = str(e).removeprefix("plan: ").partition(": ")
        raise ApiError(400, "bad_plan", f"{path}: {problem}", field=path) from None
    await asyncio.to_thread(save_plan, request.app[SETTINGS].state_dir, plan)
    return web.json_response(
        {
            "floors": len(plan.floors),
            "rooms": sum(len(f.rooms) for f in plan.floors),
            "boards": len(plan.boards),
            "reference_tags": len(plan.reference_tags),
        }
    )


# ------------------------------------------------------------------ drawing

SHAPES = {
    # state → SVG of a marker centred on (0, 0), about 1 unit across: the state is told by shape too.
    "live": '<circle r="0.55"/>',
    "late": '<circle r="0.55" fill-opacity="0.35"/>',
    "silent": '<rect x="-0.5" y="-0.5" width="1" height="1"/>',
    "deaf": '<polygon points="0,-0.65 0.65,0 0,0.65 -0.65,0"/>',
    "drifting": '<polygon points="0,-0.65 0.6,0.45 -0.6,0.45"/>',
    "backlogged": '<polygon points="0,0.65 0.6,-0.45 -0.6,-0.45"/>',
    "retired": '<circle r="0.5" fill="#fff"/>',
    "unknown": '<circle r="0.5" fill="#fff" stroke-dasharray="0.2 0.15"/>',
}
FILL = {
    "live": "#2b7a47",
    "late": "#8f6a00",
    "silent": "#b02a20",
    "deaf": "#6a3a98",
    "drifting": "#1e5ca3",
    "backlogged": "#a85600",
    "retired": "#6f7885",
    "unknown": "#6f7885",
}
COVER = ("none", "#e6f2ea", "#c9e6d2")
"""Room fill by live boards hanging in it: none (hatched), one, two or more."""


def _cover_text(n: int) -> str:
    return "no live board" if n == 0 else "1 live board" if n == 1 else f"{n} live boards"


def floor_svg(floor: Floor, plan: VenuePlan, rows: dict[str, dict[str, Any]]) -> tuple[str, str]:
    """(the SVG of one floor, the same facts as a text list for people who do not see the drawing)."""
    pts = [p for r in floor.rooms for p in r.polygon] + [
        (p.x, p.y) for p in (*plan.boards, *plan.reference_tags) if p.floor == floor.id
    ]
    if not pts:
        return "", "<p>This floor has no rooms or boards in the plan.</p>"
    x0, x1 = min(p[0] for p in pts) - 2, max(p[0] for p in pts) + 2
    y0, y1 = min(p[1] for p in pts) - 2, max(p[1] for p in pts) + 2

    # Plan y grows north (up the page); SVG y grows down.
    def X(x: float) -> float:
        return round(x - x0, 2)

    def Y(y: float) -> float:
        return round(y1 - y, 2)

    boards = [b for b in plan.boards if b.floor == floor.id]
    live_in: dict[str, int] = {}
    for r in floor.rooms:
        live_in[r.id] = sum(
            1 for b in boards if r.contains(b.x, b.y) and rows.get(b.id, {}).get("state") == "live"
        )
    out = [
        f'<svg viewBox="0 0 {X(x1)} {Y(y0)}" role="group" aria-labelledby="fl-{esc(floor.id)}-h" '
        'xmlns="http://www.w3.org/2000/svg">',
        f'<defs><pattern id="nolive-{esc(floor.id)}" width="1.2" height="1.2" patternUnits="userSpaceOnUse" '
        'patternTransform="rotate(45)"><rect width="1.2" height="1.2" fill="#fbe9e6"/>'
        '<line x1="0" y1="0" x2="0" y2="1.2" stroke="#d9a59e" stroke-width="0.5"/></pattern></defs>',
    ]
    listing = []

    def fill(n: int) -> str:
        return f"url(#nolive-{esc(floor.id)})" if n == 0 else COVER[min(n, 2)]

    for r in floor.rooms:
        n = live_in[r.id]
        poly = " ".join(f"{X(x)},{Y(y)}" for x, y in r.polygon)
        cx = sum(x for x, _ in r.polygon) / len(r.polygon)
        top = max(y for _, y in r.polygon)
        out.append(
            f'<polygon points="{poly}" fill="{fill(n)}" stroke="#17202a" stroke-width="0.15" '
            f'data-room="{esc(r.id)}" data-live="{n}"/>'
            f'<text x="{X(cx)}" y="{Y(top) + 1.6}" text-anchor="middle" font-size="1.1" font-weight="600">'
            f"{esc(r.name)}</text>"
            f'<text x="{X(cx)}" y="{Y(top) + 2.9}" text-anchor="middle" font-size="0.9">{_cover_text(n)}</text>'
        )
        here = [b for b in boards if r.contains(b.x, b.y)]
        names = ", ".join(
            f'<a href="/board/{esc(b.id)}">{esc(b.id)}</a> '
            f"({esc(STATE_LABELS.get(rows.get(b.id, {}).get('state', ''), ('not registered',))[0])})"
            for b in here
        )
        listing.append(f"<li><b>{esc(r.name)}</b>: {_cover_text(n)}{' — ' + names if names else ''}</li>")
    for t in plan.reference_tags:
        if t.floor != floor.id:
            continue
        out.append(
            f'<g transform="translate({X(t.x)} {Y(t.y)})" data-reference="{esc(t.id)}">'
            '<path d="M-0.5,0 H0.5 M0,-0.5 V0.5" stroke="#17202a" stroke-width="0.18"/>'
            '<circle r="0.3" fill="none" stroke="#17202a" stroke-width="0.1"/>'
            '<text x="0.6" y="1.1" font-size="0.8">ref</text></g>'
        )
    for b in boards:
        st = rows.get(b.id, {}).get("state", "unknown") if b.id in rows else "unknown"
        label = STATE_LABELS.get(st, (st,))[0] if b.id in rows else "not registered"
        out.append(
            f'<a href="/board/{esc(b.id)}" aria-label="{esc(b.id)}: {esc(label)}">'
            f'<g transform="translate({X(b.x)} {Y(b.y)})" data-board="{esc(b.id)}" data-state="{esc(st)}" '
            f'fill="{FILL.get(st, "#6f7885")}" stroke="#17202a" stroke-width="0.12">'
            f"{SHAPES.get(st, SHAPES['unknown'])}"
            f'<text x="0.9" y="0.35" font-size="1" stroke="none" fill="#17202a" font-weight="600">'
            f"{esc(b.id)} {esc(label)}</text></g></a>"
        )
    out.append("</svg>")
    return "".join(out), f'<ul class="rooms">{"".join(listing)}</ul>'


def legend() -> str:
    marks = "".join(
        f'<li><svg viewBox="-1 -1 2 2" width="18" height="18" aria-hidden="true" fill="{FILL[s]}" '
        f'stroke="#17202a" stroke-width="0.12">{SHAPES[s]}</svg> {state_badge(s)}</li>'
        for s in ("live", "late", "silent", "deaf", "drifting", "backlogged", "unknown")
    )
    cover = (
        '<li><span class="swatch" style="background:#fbe9e6"></span>room with no live board (hatched)</li>'
        '<li><span class="swatch" style="background:#e6f2ea"></span>one live board</li>'
        '<li><span class="swatch" style="background:#c9e6d2"></span>two or more</li>'
        "<li>✛ reference tag</li>"
    )
    return f'<ul class="legend" aria-label="Legend">{marks}{cover}</ul>'


async def plan_page(request: web.Request) -> web.Response:
    refresh = refresh_seconds(request)
    doc = await status_doc(request.app)
    rows = {r["name"]: r for r in doc["boards"]}
    try:
        plan = await current_plan(request.app)
    except ConfigError as e:
        plan, problem = None, str(e)
    else:
        problem = None
    if plan is None:
        body = (
            "<h1>Venue plan</h1>"
            + (f'<p class="lede">The stored plan cannot be read: {esc(problem)}</p>' if problem else "")
            + "<p>No venue plan has been imported yet. The installer writes one (floors, rooms as "
            "polygons in metres, board and reference tag positions; see docs/technician.md) and runs "
            "<code>listenpost collector plan import FILE</code>.</p>"
        )
    else:
        parts = [f"<h1>Venue plan{': ' + esc(plan.title) if plan.title else ''}</h1>", legend()]
        for f in plan.floors:
            svg, listing = floor_svg(f, plan, rows)
            parts.append(
                f'<section class="plan" aria-labelledby="fl-{esc(f.id)}-h"><h2 id="fl-{esc(f.id)}-h">'
                f"{esc(f.title)}</h2>{svg}<h3>Rooms on this floor</h3>{listing}</section>"
            )
        placed = {b.id for b in plan.boards}
        missing = sorted(n for n in rows if n not in placed)
        if missing:
            parts.append(
                "<h2>Boards not on the plan</h2><p>"
                + ", ".join(f'<a href="/board/{esc(n)}">{esc(n)}</a>' for n in missing)
                + "</p>"
            )
        body = "".join(parts)
    site = site_name(request)
    return html_response(
        render_layout(
            title=f"listenpost · plan · {site}",
            site=site,
            body=body,
            current="/plan",
            at=doc["at"],
            refresh=refresh,
        )
    )


def add_routes(app: web.Application) -> None:
    app.router.add_get("/plan", plan_page, allow_head=False)
    app.router.add_put("/v1/admin/plan", import_plan)
