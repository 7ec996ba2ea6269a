"""
``GET /board/NAME``: one board over the last hour (``?hours=`` up to a day): its state history,
readings per minute, radio, clock residuals and drift, reference tag signal, spool, temperature and
disk, and its latest events, as server-drawn SVG charts beside what needs doing.
"""

from __future__ import annotations

import math
from collections import defaultdict

import numpy as np
from aiohttp import web

from listenpost.collector.http.middlewares import bad_field
from listenpost.collector.ingest import clock_model
from listenpost.collector.models.liveness import BoardState
from listenpost.collector.state import CLOCK, RUNTIME, STORE
from listenpost.collector.status import FIGURES, STATE_LABELS, event_text, liveness_limits, stat, status_doc
from listenpost.collector.web.charts import time_chart
from listenpost.collector.web.pages import (
    clock_text,
    esc,
    figure_list,
    html_response,
    issue_list,
    refresh_seconds,
    render_layout,
    site_name,
    state_badge,
    where,
)
from listenpost.collector.web.plan import FILL, current_plan
from listenpost.core.errors import ConfigError
from listenpost.core.timesync import offset_delay

NOW_FIGURES = tuple(f.key for f in FIGURES if f.key != "clock_offset_ms")
"""The board's figures on its page; the clock offset is huge by nature and only its changes matter
(drawn below)."""
STRIP = {
    "live": "#154d2a",
    "late": "#533d00",
    "silent": "#761610",
    "deaf": "#452264",
    "drifting": "#113a6b",
    "backlogged": "#663300",
    "retired": "#353c45",
    "unknown": "#353c45",
}
"""State fills of the history strip: dark enough for white words on them."""
MAX_EVENT_PAGES = 20
"""Event pages of 1000 read for one board's history (a bound on the page's cost)."""


def _hours(request: web.Request) -> float:
    raw = request.query.get("hours", "1")
    try:
        hours = float(raw)
    except ValueError:
        hours = math.nan
    if not (math.isfinite(hours) and 0.05 <= hours <= 24):
        raise bad_field("hours", f"must be hours within 0.05..24, got {raw[:40]!r}")
    return hours


def _per_minute(times: np.ndarray, t0: float, t1: float) -> list[tuple[float, float]]:
    edges = np.arange(t0, t1 + 60.0, 60.0)
    counts, _ = np.histogram(times, bins=edges)
    return [(float(e), float(c)) for e, c in zip(edges[:-1], counts, strict=True)]


def _state_strip(changes: list[tuple[float, str]], start_state: str, t0: float, t1: float) -> str:
    """The board's states along the window as a strip of coloured spans, each labelled when wide enough
    and listed in words after it."""
    spans, st, at = [], start_state, t0
    for t, new in changes:
        if t > at:
            spans.append((at, t, st))
        st, at = new, max(t, t0)
    spans.append((at, t1, st))
    span = max(t1 - t0, 1.0)
    cells, words = [], []
    for a, b, s in spans:
        share = 100.0 * (b - a) / span
        text, symbol = STATE_LABELS.get(s, (s, "?"))
        label = f"{symbol} {text}" if share > 12 else ""
        cells.append(
            f'<span style="width:{share:.2f}%;background:{STRIP.get(s, "#353c45")}" aria-hidden="true">{esc(label)}</span>'
        )
        words.append(f"{clock_text(a)}–{clock_text(b)} {text}")
    return (
        f'<div class="timeline">{"".join(cells)}</div>'
        f'<div class="timeline-axis" aria-hidden="true"><span>{clock_text(t0)}</span><span>{clock_text(t1)}</span></div>'
        f'<p class="note">{esc("; ".join(words))}</p>'
    )


async def board_page(request: web.Request) -> web.Response:
    refresh = refresh_seconds(request)
    hours = _hours(request)
    app, name = request.app, request.match_info["name"]
    store, runtime, now = app[STORE], app[RUNTIME], app[CLOCK].time()
    site = site_name(request)
    doc = await status_doc(app)
    row = next((r for r in doc["boards"] if r["name"] == name), None)
    if row is None:
        body = (
            f"<h1>No board named {esc(name)}</h1><p>The fleet page lists every board: "
            '<a href="/">back to the fleet</a>.</p>'
        )
        return html_response(
            render_layout(
                title="listenpost · no such board", site=site, body=body, current="", at=now, refresh=0
            ),
            status=404,
        )
    t0 = now - hours * 3600.0
    if "hours" not in request.query:  # by default the window starts no earlier than the board did
        board = await store.get_board(name)
        if board is not None and board.enrolled_at is not None:
            t0 = max(t0, min(board.enrolled_at - 60.0, now - 900.0))
    hbs = await store.heartbeats(name, t0)
    events = []
    cursor = 0
    for _ in range(MAX_EVENT_PAGES):
        page = await store.events(since_id=cursor, limit=1000, board=name)
        events += page
        if len(page) < 1000:
            break
        cursor = max(e.id or 0 for e in page)
    changes = [(e.at, str(e.detail.get("new"))) for e in events if e.kind == "state_changed" and e.at >= t0]
    before = [e for e in events if e.kind == "state_changed" and e.at < t0]
    start_state = str(before[-1].detail.get("new")) if before else "unknown"
    limits = liveness_limits(app)
    charts: list[str] = []

    # Readings per minute, from what was stored.
    rows = await store.readings(t0, now, boards=[name])
    per_min = _per_minute(rows.t_collector, t0, now)
    total = int(sum(c for _, c in per_min))
    charts.append(
        time_chart(
            "c-readings",
            "Readings stored per minute",
            [("", per_min)],
            t0=t0,
            t1=now,
            unit="per minute",
            summary=f"{total:,} readings in the window",
            bars=60.0,
            zero=True,
        )
    )
    # Radio: adverts heard per second between heartbeats (flat at 0 while others hear tags: deaf).
    adverts = []
    for a, b in zip(hbs, hbs[1:], strict=False):
        n0 = stat(a.stats, "adverts_total", "pipeline.adverts_total")
        n1 = stat(b.stats, "adverts_total", "pipeline.adverts_total")
        if isinstance(n0, int | float) and isinstance(n1, int | float) and n1 >= n0 and b.at > a.at:
            adverts.append((b.at, (n1 - n0) / (b.at - a.at)))
    charts.append(
        time_chart(
            "c-adverts",
            "Radio: adverts heard per second",
            [("", adverts)],
            t0=t0,
            t1=now,
            unit="per second",
            summary="any device; 0 while other boards hear tags means the radio is deaf",
            zero=True,
        )
    )
    # Clock: each exchange's offset around the fitted line (residual), and its drift from the first.
    boot = row["boot"]
    if boot is not None:
        fit = (await clock_model(runtime.clock_models, store, name, boot)).fit()
        samples = [s for s in await store.clock_samples(name, boot) if s.t2 >= t0]
    else:
        fit, samples = None, []
    if samples and fit is not None:
        t = np.array([s.t2 for s in samples])
        off, _ = offset_delay(*(np.array([getattr(s, k) for s in samples]) for k in ("t1", "t2", "t3", "t4")))
        board_t = np.array([(s.t1 + s.t4) / 2 for s in samples])
        resid = (off - fit.offset_at(board_t)) * 1000.0
        drift = (off - off[0]) * 1000.0
        tol = limits.residual_tolerance_ms
        charts.append(
            time_chart(
                "c-resid",
                "Clock: each exchange around the fitted line",
                [("", list(zip(t, resid, strict=True)))],
                t0=t0,
                t1=now,
                unit="ms",
                dots=True,
                band=(-tol, tol),
                summary=f"green band: ±{tol:.0f} ms tolerance; scatter {fit.residual_ms:.1f} ms over {fit.n_samples} exchanges",
            )
        )
        charts.append(
            time_chart(
                "c-drift",
                "Clock: offset change since the first exchange shown",
                [("", list(zip(t, drift, strict=True)))],
                t0=t0,
                t1=now,
                unit="ms",
                summary=f"the slope is the rate error: {fit.skew_ppm:+.1f} ppm "
                f"({fit.skew_ppm * 0.0864:+.1f} ms per 1000 s; tolerance ±{limits.skew_tolerance_ppm:.0f} ppm)",
            )
        )
    else:
        charts.append(
            time_chart(
                "c-resid",
                "Clock exchanges",
                [],
                t0=t0,
                t1=now,
                unit="ms",
                summary="no clock exchanges in the window",
            )
        )
    # Reference tags of the venue plan: their signal at this board, median per minute.
    try:
        plan = await current_plan(app)
    except ConfigError:
        plan = None
    refs = [t.id for t in plan.reference_tags] if plan else []
    series = []
    if refs and len(rows.tag):
        for i, ref in enumerate(refs):
            mask = rows.tag == ref
            if not mask.any():
                continue
            by_min: dict[float, list[float]] = defaultdict(list)
            for tc, r in zip(rows.t_collector[mask], rows.rssi_dd[mask], strict=True):
                by_min[t0 + 60.0 * ((tc - t0) // 60.0)].append(r / 10.0)
            series.append((f"reference {i + 1}", sorted((k, float(np.median(v))) for k, v in by_min.items())))
    charts.append(
        time_chart(
            "c-ref",
            "Reference tag signal (median per minute)",
            series,
            t0=t0,
            t1=now,
            unit="dBm",
            summary="a fixed tag's signal should hold steady; a step means the board or the tag was moved or covered"
            if refs
            else "no reference tags in the venue plan (see the plan view)",
        )
    )
    # The board's own health, from its heartbeats.
    for cid, title, unit, keys, scale, zero in (
        ("c-spool", "Spool backlog", "batches", ("spool_batches", "spool.batches"), 1.0, True),
        ("c-temp", "Temperature", "°C", ("cpu_temperature_c",), 1.0, False),
        ("c-disk", "Disk free", "GB", ("disk_free_bytes",), 1e-9, False),
    ):
        pts = [(h.at, float(v) * scale) for h in hbs if isinstance(v := stat(h.stats, *keys), int | float)]
        charts.append(
            time_chart(
                cid,
                title,
                [("", pts)],
                t0=t0,
                t1=now,
                unit=unit,
                zero=zero,
                summary=f"from {len(pts)} heartbeats" if pts else "the board's heartbeats do not report it",
            )
        )
    history = "".join(
        f"<li><time>{clock_text(e.at)}</time> {esc(event_text(e.kind, e.detail))}</li>"
        for e in reversed(events[-15:])
    )
    issues = (
        issue_list(row) if row["attention"] else '<p class="allwell">Nothing needs doing at this board.</p>'
    )
    minutes = (now - t0) / 60.0
    span_text = f"{minutes / 60:.3g} h" if minutes >= 60 else f"{minutes:.0f} min"
    body = f"""
<h1>{esc(name)} {state_badge(row["state"])}</h1>
<p class="lede">{esc(where(row))}{" · " + esc(row["state_reason"]) if row["state_reason"] else ""}</p>
<section aria-labelledby="todo-h"><h2 id="todo-h">What to do</h2>{issues}</section>
<section aria-labelledby="now-h"><h2 id="now-h">Now</h2>{figure_list(row, NOW_FIGURES)}</section>
<section aria-labelledby="hist-h"><h2 id="hist-h">The last {span_text}</h2>
<p class="lede">Other windows: <a href="?hours=0.25">15 min</a> · <a href="?hours=1">1 h</a> · <a href="?hours=6">6 h</a> · <a href="?hours=24">24 h</a></p>
<figure class="chart"><figcaption id="c-states">State</figcaption>{_state_strip(changes, start_state, t0, now)}</figure>
<div class="charts">{"".join(charts)}</div></section>
<section aria-labelledby="ev-h"><h2 id="ev-h">Latest events</h2><ol class="events">{history or "<li>no events yet</li>"}</ol></section>
"""
    return html_response(
        render_layout(title=f"listenpost · {name}", site=site, body=body, current="", at=now, refresh=refresh)
    )


assert {s.value for s in BoardState} <= set(FILL) & set(STRIP)  # every state has its colours


def add_routes(app: web.Application) -> None:
    app.router.add_get("/board/{name}", board_page, allow_head=False)
