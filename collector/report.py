"""
The study-day report: one self-contained HTML file of what the fleet did between two times.

``listenpost collector report`` gathers everything over the admin API (so it works remotely, like
``export``, and all the drawing happens in the command's own process, never on the collector's event
loop): the status document, every board with its calibration history, the stored events, and the
readings as an export job binned per board. `render` turns that into HTML with the plots inlined as
SVG (matplotlib, Agg backend), CSS inline and no external request, readable printed on A4 and on a
390 px phone.
"""

from __future__ import annotations

import hashlib
import html
import io
import math
import re
import tempfile
from collections import defaultdict
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from listenpost.collector.status import STATE_LABELS, event_text

Call = Callable[..., Awaitable[Any]]
"""``call(method, path, *, params=None, body=None)`` → the JSON answer of one admin API request."""
Download = Callable[[str, Path], Awaitable[int]]
"""``download(path, file)``: stream an API file to ``file``; returns its size."""

EVENT_PAGE = 10_000
"""Events per request (the admin API's most)."""
EXPORT_POLL_S = 10.0
COVERING = ("live", "late", "backlogged")
"""States in which a board's readings still reach the collector: a room with none of its boards in
one of these is a coverage gap."""
STATE_COLOURS = {
    "live": "#2e7d32",
    "late": "#f9a825",
    "backlogged": "#6a1b9a",
    "drifting": "#ef6c00",
    "deaf": "#1565c0",
    "silent": "#c62828",
    "retired": "#9e9e9e",
    "unknown": "#e0e0e0",
}
STATE_HATCH = {"late": "//", "backlogged": "..", "drifting": "xx", "deaf": "\\\\", "silent": "", "live": ""}
"""A second cue beside the colour, so states are told apart in black-and-white print too."""


def bin_for(span_s: float) -> float:
    """The readings bin: hours for a day or more, finer for a short run so the plot has some shape."""
    if span_s > 12 * 3600:
        return 3600.0
    if span_s > 2 * 3600:
        return 600.0
    return 60.0


@dataclass
class ReportData:
    t_from: float
    t_to: float
    collector: str
    status: dict[str, Any]
    boards: list[dict[str, Any]]
    """``GET /v1/admin/boards/{name}`` of every board: record, calibration history."""
    events: list[dict[str, Any]]
    """Every stored event up to ``t_to`` (older state changes give each board's state at ``t_from``)."""
    bin_s: float
    readings: dict[tuple[str, float], int] = field(default_factory=dict)
    """(board, bin start) → readings stored in that bin."""
    walktest: dict[str, Any] | None = None
    walk_tag: str | None = None

    @property
    def t_end(self) -> float:
        """The report's end: ``t_to``, or the collector's now if that is earlier."""
        return max(self.t_from, min(self.t_to, float(self.status.get("at") or self.t_to)))


# ------------------------------------------------------------------ gathering


async def gather(
    call: Call,
    download: Download,
    *,
    collector: str,
    t_from: float,
    t_to: float,
    walk: tuple[str, list[dict[str, Any]]] | None = None,
) -> ReportData:
    """Everything the report shows, through the admin API only."""
    status = await call("GET", "/v1/status")
    listed = await call("GET", "/v1/admin/boards")
    names = [b["name"] for b in listed["boards"]]
    boards = [await call("GET", f"/v1/admin/boards/{n}") for n in names]
    events: list[dict[str, Any]] = []
    since = 0
    while True:
        page = (
            await call("GET", "/v1/admin/events", params=[("since", str(since)), ("limit", str(EVENT_PAGE))])
        )["events"]
        events += [e for e in page if e["at"] <= t_to]
        if len(page) < EVENT_PAGE:
            break
        since = page[-1]["id"]
    bin_s = bin_for(t_to - t_from)
    data = ReportData(t_from, t_to, collector, status, boards, events, bin_s)
    data.readings = await _binned_readings(call, download, t_from, t_to, bin_s)
    if walk is not None:
        data.walk_tag = walk[0]
        data.walktest = await call("POST", "/v1/admin/walktest", body={"tag": walk[0], "marks": walk[1]})
    return data


async def _binned_readings(
    call: Call, download: Download, t_from: float, t_to: float, bin_s: float
) -> dict[tuple[str, float], int]:
    """Readings per board and bin, from an export job (it runs in the collector's worker threads)."""
    import numpy as np

    params = [("from", repr(t_from)), ("to", repr(t_to)), ("bin", repr(bin_s)), ("format", "npz")]
    job = await call("POST", "/v1/admin/exports", params=params)
    while job["state"] == "running":
        job = await call("GET", f"/v1/admin/exports/{job['job']}", params=[("wait", f"{EXPORT_POLL_S:g}")])
    if job["state"] != "done":
        raise RuntimeError((job.get("error") or {}).get("message") or "the export failed")
    counts: dict[tuple[str, float], int] = {}
    if not job["readings"]:
        return counts
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "readings.npz"
        await download(f"/v1/admin/exports/{job['job']}/file", path)
        with np.load(path, allow_pickle=False) as z:
            per = z["counts"].sum(axis=0)  # counts[tag, bin, board] -> [bin, board]
            boards, starts = [str(b) for b in z["boards"]], z["bin_starts"].tolist()
    for k, o in zip(*np.nonzero(per), strict=True):
        counts[(boards[o], float(starts[k]))] = int(per[k, o])
    return counts


# ------------------------------------------------------------------ models


Segment = tuple[float, float, str]
FIG_W = 5.6
"""Figure width, inches: narrow enough that a 390 px phone shows the labels at a readable size."""


def state_segments(data: ReportData) -> dict[str, list[Segment]]:
    """Board → (start, end, state) over the report's span, from the stored state changes."""
    t0, t1 = data.t_from, data.t_end
    changes: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for e in data.events:
        if e["kind"] == "state_changed" and e["board"] and isinstance(e["detail"], dict):
            changes[e["board"]].append(e)
    out: dict[str, list[Segment]] = {}
    for row in data.status.get("boards", []):
        name = row["name"]
        evs = sorted(changes.get(name, []), key=lambda e: (e["at"], e["id"] or 0))
        before = [e for e in evs if e["at"] <= t0]
        after = [e for e in evs if t0 < e["at"] <= t1]
        if before:
            state = str(before[-1]["detail"].get("new") or "unknown")
        elif after:
            state = str(after[0]["detail"].get("old") or "unknown")
        else:
            state = str(row.get("state") or "unknown")
        segs: list[Segment] = []
        at = t0
        for e in after:
            if e["at"] > at:
                segs.append((at, e["at"], state))
            at, state = e["at"], str(e["detail"].get("new") or "unknown")
        if t1 > at:
            segs.append((at, t1, state))
        out[name] = segs
    return out


def coverage_gaps(
    data: ReportData, segments: dict[str, list[Segment]]
) -> dict[str, list[tuple[float, float]]]:
    """Room → intervals in which none of its boards was in a `COVERING` state."""
    rooms: dict[str, list[str]] = defaultdict(list)
    for row in data.status.get("boards", []):
        rooms[row["room"]].append(row["name"])
    gaps: dict[str, list[tuple[float, float]]] = {}
    for room, names in sorted(rooms.items()):
        # Before the monitor's first verdict a board is "not yet seen": unknown, not a gap.
        covered = sorted(
            (a, b) for n in names for a, b, s in segments.get(n, []) if s in COVERING or s == "unknown"
        )
        out, at = [], data.t_from
        for a, b in covered:
            if a > at:
                out.append((at, a))
            at = max(at, b)
        if data.t_end > at:
            out.append((at, data.t_end))
        gaps[room] = [(a, b) for a, b in out if b - a > 1e-6]
    return gaps


# ------------------------------------------------------------------ drawing


def _plt() -> Any:
    import matplotlib

    matplotlib.use("Agg")  # no display, no GUI event loop
    import matplotlib.pyplot as plt

    plt.rcParams.update(
        {
            "svg.fonttype": "none",  # text stays text: small files, selectable, crisp in print
            "font.size": 10,
            "axes.spines.top": False,
            "axes.spines.right": False,
        }
    )
    return plt


_SVG_HEAD = re.compile(r"^.*?(<svg\b)", re.S)


def _svg(fig: Any, label: str) -> str:
    """The figure as inline SVG that scales to its container; ``label`` is its text alternative."""
    plt = _plt()
    buf = io.StringIO()
    # Ids inside each figure (clip paths, hatches) must not collide with another figure's on one page.
    plt.rcParams["svg.hashsalt"] = label
    fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    plt.close(fig)
    svg = _SVG_HEAD.sub(r"\1", buf.getvalue(), count=1)
    svg = re.sub(r'(<svg\b[^>]*?)\swidth="[^"]*"\s+height="[^"]*"', r"\1", svg, count=1)
    # Matplotlib numbers its ids per figure (figure_1, patch_1, ...): prefix them so that several figures
    # on one page neither repeat an id nor point at another figure's clip path or hatch.
    prefix = "f" + hashlib.sha1(label.encode()).hexdigest()[:8] + "-"
    svg = re.sub(r'\bid="([^"]+)"', rf'id="{prefix}\1"', svg)
    svg = re.sub(r"url\(#([^)]+)\)", rf"url(#{prefix}\1)", svg)
    svg = re.sub(r'href="#([^"]+)"', rf'href="#{prefix}\1"', svg)
    return svg.replace("<svg ", f'<svg role="img" aria-label="{html.escape(label)}" class="plot" ', 1)


def _minutes_axis(ax: Any, data: ReportData) -> None:
    """Time on the x axis as clock time UTC (the readings' own time base)."""
    import matplotlib.dates as mdates

    ax.xaxis_date(tz=UTC)
    span = data.t_end - data.t_from
    fmt = "%H:%M" if span < 2 * 86400 else "%d %H:%M"
    ax.xaxis.set_major_formatter(mdates.DateFormatter(fmt, tz=UTC))
    ax.xaxis.set_major_locator(mdates.AutoDateLocator(minticks=3, maxticks=7, tz=UTC))
    ax.set_xlim(_num(data.t_from), _num(data.t_end))
    ax.set_xlabel("time (UTC)")


def _num(t: float) -> float:
    """Unix seconds → matplotlib date number (days since 1970)."""
    return t / 86400.0


def _floors(data: ReportData) -> dict[str, list[dict[str, Any]]]:
    floors: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for row in data.status.get("boards", []):
        floors[row.get("floor") or "(no floor)"].append(row)
    return dict(sorted(floors.items()))


def plot_states(
    data: ReportData, floor: str, rows: list[dict[str, Any]], segs: dict[str, list[Segment]]
) -> str:
    from matplotlib.patches import Patch

    plt = _plt()
    rows = sorted(rows, key=lambda r: r["name"])
    fig, ax = plt.subplots(figsize=(FIG_W, 1.2 + 0.42 * len(rows)))
    seen: set[str] = set()
    for i, r in enumerate(rows):
        for a, b, s in segs.get(r["name"], []):
            seen.add(s)
            ax.broken_barh(
                [(_num(a), _num(b) - _num(a))],
                (i - 0.38, 0.76),
                facecolors=STATE_COLOURS.get(s, "#bdbdbd"),
                hatch=STATE_HATCH.get(s, ""),
                edgecolor="white",
                linewidth=0.5,
            )
    ax.set_yticks(range(len(rows)), [f"{r['name']}\n{r['room']}" for r in rows], fontsize=9)
    ax.set_ylim(len(rows) - 0.5, -0.5)
    _minutes_axis(ax, data)
    order = [s for s in STATE_COLOURS if s in seen]
    ax.legend(
        handles=[
            Patch(
                facecolor=STATE_COLOURS[s], hatch=STATE_HATCH.get(s, ""), label=STATE_LABELS.get(s, (s,))[0]
            )
            for s in order
        ],
        loc="lower left",
        bbox_to_anchor=(0.0, 1.0),
        ncol=min(5, max(1, len(order))),
        frameon=False,
        fontsize=9,
        handlelength=1.6,
        columnspacing=1.0,
    )
    return _svg(fig, f"board states over time on floor {floor}")


def room_rates(data: ReportData) -> tuple[list[str], list[float], list[list[float]]]:
    """Rooms, bin starts and readings per hour per (room, bin)."""
    room_of = {r["name"]: r["room"] for r in data.status.get("boards", [])}
    n_bins = max(1, math.ceil((data.t_end - data.t_from) / data.bin_s))
    starts = [data.t_from + k * data.bin_s for k in range(n_bins)]
    rooms = sorted(set(room_of.values()))
    grid = {room: [0.0] * n_bins for room in rooms}
    for (board, t), n in data.readings.items():
        k = int((t - data.t_from) // data.bin_s)
        room = room_of.get(board)
        if room is not None and 0 <= k < n_bins:
            width = min(data.bin_s, data.t_end - starts[k])  # the last bin may be cut by the span's end
            grid[room][k] += n * 3600.0 / max(width, 1e-9)
    return rooms, starts, [grid[r] for r in rooms]


def plot_rates(data: ReportData) -> str:
    import numpy as np
    from matplotlib.ticker import FuncFormatter

    plt = _plt()
    rooms, starts, grid = room_rates(data)
    fig, ax = plt.subplots(figsize=(FIG_W, 1.4 + 0.36 * max(1, len(rooms))))
    arr = np.array(grid, dtype=float) if rooms else np.zeros((1, 1))
    x0, x1 = _num(data.t_from), _num(starts[-1] + data.bin_s) if starts else _num(data.t_end)
    im = ax.imshow(
        arr,
        aspect="auto",
        interpolation="nearest",
        cmap="viridis",
        extent=(x0, x1, len(rooms) - 0.5, -0.5),
    )
    ax.set_yticks(range(len(rooms)), rooms, fontsize=9)
    _minutes_axis(ax, data)
    ax.set_xlim(x0, x1)
    bar = fig.colorbar(im, ax=ax, orientation="horizontal", pad=0.22, fraction=0.05, aspect=40)
    bar.set_label(f"readings per hour ({_dur(data.bin_s)} bins)")
    bar.ax.xaxis.set_major_formatter(
        FuncFormatter(lambda v, _: f"{v / 1e6:g}M" if v >= 1e6 else f"{v / 1e3:g}k" if v >= 1e3 else f"{v:g}")
    )
    return _svg(fig, "readings per room per hour as a heat map")


def plot_coverage(data: ReportData, gaps: dict[str, list[tuple[float, float]]]) -> str:
    plt = _plt()
    rooms = list(gaps)
    fig, ax = plt.subplots(figsize=(FIG_W, 1.2 + 0.36 * max(1, len(rooms))))
    for i, room in enumerate(rooms):
        ax.broken_barh(
            [(_num(data.t_from), _num(data.t_end) - _num(data.t_from))],
            (i - 0.35, 0.7),
            facecolors="#c8e6c9",
        )
        if gaps[room]:
            ax.broken_barh(
                [(_num(a), _num(b) - _num(a)) for a, b in gaps[room]],
                (i - 0.35, 0.7),
                facecolors="#c62828",
                hatch="//",
                edgecolor="white",
                linewidth=0.5,
            )
    ax.set_yticks(range(len(rooms)), rooms, fontsize=9)
    ax.set_ylim(len(rooms) - 0.5, -0.5)
    _minutes_axis(ax, data)
    ax.set_title("red, hatched: no working board in the room", loc="left", fontsize=10)
    return _svg(fig, "coverage gaps per room over time")


def losses(data: ReportData) -> tuple[list[dict[str, Any]], dict[str, int], dict[str, int]]:
    """Loss events in the span, lost batches per board, and readings each board reported lost (gap records)."""
    evs = [
        e
        for e in data.events
        if e["kind"] == "loss" and data.t_from <= e["at"] <= data.t_to and isinstance(e["detail"], dict)
    ]
    batches: dict[str, int] = defaultdict(int)
    for e in evs:
        d = e["detail"]
        batches[e["board"] or "?"] += int(d.get("batches") or (int(d["last_seq"]) - int(d["first_seq"]) + 1))
    gaps = {r["name"]: int(r.get("gap_readings") or 0) for r in data.status.get("boards", [])}
    return evs, dict(batches), gaps


def plot_losses(data: ReportData, batches: dict[str, int], gaps: dict[str, int]) -> str:
    import numpy as np

    plt = _plt()
    names = sorted(n for n in set(batches) | set(gaps) if batches.get(n) or gaps.get(n))
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(FIG_W, 1.4 + 0.3 * max(1, len(names))), sharey=True)
    y = np.arange(len(names))
    a1.barh(y, [batches.get(n, 0) for n in names], color="#c62828")
    a1.set_title("batches never arrived\n(seq holes)", fontsize=10)
    a2.barh(y, [gaps.get(n, 0) for n in names], color="#ef6c00", hatch="//", edgecolor="white")
    a2.set_title("readings the board dropped\n(gap records)", fontsize=10)
    a1.set_yticks(y, names, fontsize=9)
    a1.set_ylim(len(names) - 0.5, -0.5)
    for ax in (a1, a2):
        ax.xaxis.get_major_locator().set_params(integer=True)
        ax.set_xlim(0, max(1, *(p.get_width() for p in ax.patches)) * 1.1)
    return _svg(fig, "lost batches and dropped readings per board")


def plot_clock(data: ReportData) -> str:
    import numpy as np

    plt = _plt()
    rows = sorted(data.status.get("boards", []), key=lambda r: r["name"])
    names = [r["name"] for r in rows]
    y = np.arange(len(names))
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(FIG_W, 1.4 + 0.3 * max(1, len(names))), sharey=True)
    res = [None if r.get("clock_residual_ms") is None else r["clock_residual_ms"] * 1000.0 for r in rows]
    skew = [r.get("clock_skew_ppm") for r in rows]
    a1.barh(y, [v or 0.0 for v in res], color="#1565c0")
    a1.set_title("fit residual, µs", fontsize=10)
    a2.barh(
        y,
        [v or 0.0 for v in skew],
        color=["#ef6c00" if r["state"] == "drifting" else "#607d8b" for r in rows],
    )
    a2.axvline(0, color="black", linewidth=0.6)
    a2.set_title("crystal skew, ppm", fontsize=10)
    for ax, vals in ((a1, res), (a2, skew)):
        for i, v in enumerate(vals):
            if v is None:
                ax.text(0, i, " no fit", va="center", fontsize=8, color="#555")
    a1.set_yticks(y, names, fontsize=9)
    a1.set_ylim(len(names) - 0.5, -0.5)
    return _svg(fig, "clock fit residual and skew per board")


def plot_calibrations(data: ReportData) -> str | None:
    plt = _plt()
    hist = [(b["name"], c) for b in data.boards for c in b.get("calibrations") or []]
    if not hist:
        return None
    fig, ax = plt.subplots(figsize=(FIG_W, 3.2))
    by_board: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for name, c in hist:
        by_board[name].append(c)
    for name, cs in sorted(by_board.items()):
        cs.sort(key=lambda c: c["at"])
        ax.errorbar(
            [_num(c["at"]) for c in cs],
            [c["offset_db"] for c in cs],
            yerr=[c["spread_db"] for c in cs],
            marker="o",
            capsize=3,
            label=name,
        )
    import matplotlib.dates as mdates

    times = [c["at"] for _, c in hist]
    lo, hi = min(times + [data.t_from]), max(times + [data.t_end])
    pad = max(60.0, 0.05 * (hi - lo))
    ax.xaxis_date(tz=UTC)
    ax.set_xlim(_num(lo - pad), _num(hi + pad))
    ax.xaxis.set_major_formatter(mdates.DateFormatter("%m-%d %H:%M", tz=UTC))
    ax.xaxis.set_major_locator(mdates.AutoDateLocator(minticks=2, maxticks=5, tz=UTC))
    ax.set_ylabel("offset, dB (bar: spread)")
    ax.set_xlabel("calibrated at (UTC)")
    ax.legend(fontsize=9, ncol=5, frameon=False, loc="lower left", bbox_to_anchor=(0.0, 1.0))
    return _svg(fig, "calibration offset history per board")


def plot_walk(data: ReportData) -> str | None:
    plt = _plt()
    rooms = (data.walktest or {}).get("rooms") or []
    if not rooms:
        return None
    fig, ax = plt.subplots(figsize=(FIG_W, 1.2 + 0.36 * len(rooms)))
    names = [r["room"] for r in rooms]
    margins = [r.get("margin_db") or 0.0 for r in rooms]
    colours = ["#2e7d32" if r.get("strongest_in_room") else "#c62828" for r in rooms]
    ax.barh(range(len(rooms)), margins, color=colours)
    ax.set_yticks(range(len(rooms)), names, fontsize=9)
    ax.set_ylim(len(rooms) - 0.5, -0.5)
    ax.set_xlabel("margin of the strongest board over the runner-up, dB")
    ax.set_title("green: the strongest board is in the room; red: it is not", loc="left", fontsize=10)
    return _svg(fig, "walk test margin per room")


# ------------------------------------------------------------------ HTML


def _t(t: float | None) -> str:
    return "–" if t is None else datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M:%S")


def _dur(s: float) -> str:
    if s < 90:
        return f"{s:.0f} s"
    if s < 5400:
        return f"{s / 60:.0f} min"
    return f"{s / 3600:.1f} h"


def _f(v: Any, fmt: str) -> str:
    return "–" if v is None else format(v, fmt)


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]], num: Sequence[int] = ()) -> str:
    e = html.escape
    head = "".join(f"<th{' class=n' if i in num else ''}>{e(h)}</th>" for i, h in enumerate(headers))
    body = "".join(
        "<tr>"
        + "".join(f"<td{' class=n' if i in num else ''}>{e(str(v))}</td>" for i, v in enumerate(r))
        + "</tr>"
        for r in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _section(key: str, title: str, *parts: str) -> str:
    return f'<section id="{key}"><h2>{html.escape(title)}</h2>{"".join(parts)}</section>'


def _p(text: str) -> str:
    return f"<p>{html.escape(text)}</p>"


def _fig(svg: str) -> str:
    return f'<figure class="plot">{svg}</figure>'


CSS = """
*{box-sizing:border-box}
html{-webkit-text-size-adjust:100%}
body{font:15px/1.45 system-ui,-apple-system,"Segoe UI",sans-serif;color:#1b1b1b;margin:0 auto;
 max-width:60rem;padding:1rem}
h1{font-size:1.5rem;margin:.2rem 0}h2{font-size:1.2rem;margin:1.6rem 0 .5rem;border-bottom:1px solid #ccc}h3{font-size:1rem;margin:1rem 0 .2rem}
.meta{color:#444;margin:0 0 1rem}
figure.plot{margin:.5rem 0;max-width:100%}
svg.plot{display:block;width:100%;height:auto;max-width:100%}
svg.plot{max-width:46rem}
table{border-collapse:collapse;width:100%;font-size:.85rem;margin:.5rem 0}
th,td{border-bottom:1px solid #ddd;padding:.25rem .3rem;text-align:left;vertical-align:top}
td{overflow-wrap:break-word}
th{background:#f3f3f3}.n{text-align:right;font-variant-numeric:tabular-nums}
.note{color:#555;font-size:.9rem}
@media (max-width:480px){body{font-size:14px;padding:.6rem}table{font-size:.75rem}}
@page{size:A4;margin:12mm}
@media print{body{max-width:none;padding:0;font-size:10pt}section{break-inside:auto}
 h2{break-after:avoid}figure.plot,tr{break-inside:avoid}a{color:inherit;text-decoration:none}}
"""


def _watch_table(data: ReportData, clock: Any) -> str:
    """The calibration watch's events in the span: boards whose reference-tag level moved and stayed moved."""
    rows = [
        (
            e["board"],
            clock(e["at"]),
            clock(e["detail"].get("since", e["at"])),
            _f(e["detail"].get("shift_db"), "+.1f"),
            e["detail"].get("tags", ""),
        )
        for e in sorted(data.events, key=lambda e: e["at"])
        if e["kind"] == "calibration_shift" and e["at"] >= data.t_from and isinstance(e["detail"], dict)
    ]
    if not rows:
        return _p(
            "Calibration watch: no board's reference-tag level moved from its level at calibration and stayed "
            "moved in this span."
        )
    return _p(
        "Calibration watch: these boards' reference-tag levels moved from their level at calibration and "
        "stayed moved (a knocked antenna, a case closed around a board); recalibrate them or look at them."
    ) + _table(("Board", "Flagged (UTC)", "Since (UTC)", "Shift dB", "Tags"), rows, num=(3, 4))


def render(data: ReportData) -> str:
    """The report as one HTML document (no external resources)."""
    segs = state_segments(data)
    one_day = _t(data.t_from)[:10] == _t(data.t_end)[:10]

    def clock(t: float) -> str:
        """Time of day when the whole span is one UTC day (the title gives the date), else date and time."""
        return _t(t)[11:] if one_day else _t(t)

    gaps = coverage_gaps(data, segs)
    loss_events, lost_batches, gap_readings = losses(data)
    rows = data.status.get("boards", [])
    parts = []

    # states
    floors = _floors(data)
    changes = [
        e for e in data.events if e["kind"] == "state_changed" and data.t_from <= e["at"] <= data.t_end
    ]
    # A board's first verdict (from "not yet seen") is routine: one line for all of them.
    first = [e for e in changes if e["detail"].get("old") in (None, "unknown")]
    later = [e for e in changes if e not in first]
    by_new: dict[str, list[dict[str, Any]]] = defaultdict(list)
    for e in first:
        by_new[str(e["detail"].get("new"))].append(e)
    first_line = "; ".join(
        f"{len(es)} board{'s' if len(es) != 1 else ''} first judged {STATE_LABELS.get(s, (s,))[0]} "
        f"by {clock(max(e['at'] for e in es))}"
        for s, es in sorted(by_new.items(), key=lambda kv: (-len(kv[1]), kv[0]))  # most boards first
    )
    parts.append(
        _section(
            "states",
            "Board states over time",
            _p(f"{len(rows)} boards on {len(floors)} floors; {len(changes)} state changes in the span."),
            *(
                f"<h3>Floor {html.escape(floor)}</h3>" + _fig(plot_states(data, floor, fr, segs))
                for floor, fr in floors.items()
            ),
            _p(first_line) if first_line else "",
            _table(
                ("At (UTC)", "Board", "Change"),
                [(clock(e["at"]), e["board"], event_text(e["kind"], e["detail"])) for e in later[-200:]],
            )
            if later
            else "",
        )
    )

    # readings
    rooms, _, grid = room_rates(data)
    room_of = {r["name"]: r["room"] for r in rows}
    room_totals: dict[str, int] = defaultdict(int)
    for (board, _t0), n in data.readings.items():
        room_totals[room_of.get(board, "?")] += n
    hours = max(1e-9, (data.t_end - data.t_from) / 3600.0)
    parts.append(
        _section(
            "readings",
            "Readings per room per hour",
            _fig(plot_rates(data)),
            _table(
                ("Room", "Readings", "Per hour (mean)", "Per hour (peak bin)"),
                [
                    (
                        room,
                        f"{room_totals.get(room, 0):,}",
                        f"{room_totals.get(room, 0) / hours:,.0f}",
                        f"{max(g, default=0):,.0f}",
                    )
                    for room, g in zip(rooms, grid, strict=True)
                ],
                num=(1, 2, 3),
            ),
        )
    )

    # coverage
    span = max(1e-9, data.t_end - data.t_from)
    uncovered = [(room, sum(b - a for a, b in g)) for room, g in gaps.items()]
    parts.append(
        _section(
            "coverage",
            "Coverage gaps",
            _p(
                "A room is covered while at least one of its boards is live, late or backlogged (its "
                "readings still arrive); silent, deaf, drifting or retired boards do not count. Time before the "
                "collector first judged a board (not yet seen) is not counted as a gap."
            ),
            _fig(plot_coverage(data, gaps)),
            _table(
                ("Room", "Uncovered", "Share", "Gaps"),
                [(room, _dur(u), f"{100 * u / span:.0f} %", len(gaps[room])) for room, u in uncovered],
                num=(1, 2, 3),
            ),
        )
    )

    # losses
    parts.append(
        _section(
            "losses",
            "Losses and their cause",
            _p(
                f"{sum(lost_batches.values())} batches never arrived (seq holes the collector gave up "
                f"waiting for, as loss events in the span); {sum(gap_readings.values()):,} readings the "
                "boards themselves reported dropped (gap records, since each board's start)."
            ),
            _fig(plot_losses(data, lost_batches, gap_readings))
            if any(lost_batches.values()) or any(gap_readings.values())
            else _p("No board lost a batch or dropped a reading."),
            _table(
                ("At (UTC)", "Board", "Seqs", "Batches"),
                [
                    (
                        clock(e["at"]),
                        e["board"],
                        f"{e['detail'].get('first_seq')}–{e['detail'].get('last_seq')}",
                        e["detail"].get("batches"),
                    )
                    for e in loss_events
                ],
                num=(3,),
            )
            if loss_events
            else "",
        )
    )

    # clock
    parts.append(
        _section(
            "clock",
            "Clock fit quality per board",
            _p(
                "Each board's clock is mapped onto the collector's by a fit over its clock exchanges: "
                "the residual is how far exchanges sit from the fit, the skew is the board crystal's rate error."
            ),
            _fig(plot_clock(data)),
            _table(
                ("Board", "Residual µs", "Skew ppm", "Steps", "Refused", "State"),
                [
                    (
                        r["name"],
                        _f(
                            None if r.get("clock_residual_ms") is None else r["clock_residual_ms"] * 1000,
                            ".1f",
                        ),
                        _f(r.get("clock_skew_ppm"), "+.1f"),
                        r.get("clock_steps", 0),
                        r.get("clock_exchanges_refused", 0),
                        STATE_LABELS.get(r["state"], (r["state"],))[0],
                    )
                    for r in sorted(rows, key=lambda r: r["name"])
                ],
                num=(1, 2, 3, 4),
            ),
        )
    )

    # calibration
    cal_rows, hist_rows = [], []
    for b in sorted(data.boards, key=lambda b: b["name"]):
        cs = sorted(b.get("calibrations") or [], key=lambda c: c["at"])
        cal_rows.append(
            (
                b["name"],
                f"{b.get('offset_db', 0.0):+.1f}",
                len(cs),
                clock(cs[-1]["at"]) if cs else "never",
                "yes" if b.get("recalibrate") else "",
            )
        )
        prev = None
        for c in cs:
            shift = "–" if prev is None else f"{c['offset_db'] - prev:+.1f}"
            hist_rows.append(
                (
                    b["name"],
                    clock(c["at"]),
                    f"{c['offset_db']:+.1f}",
                    shift,
                    f"{c['spread_db']:.1f}",
                    c["samples"],
                )
            )
            prev = c["offset_db"]
    cal_plot = plot_calibrations(data)
    parts.append(
        _section(
            "calibration",
            "Calibration",
            _table(("Board", "Offset dB", "Times", "Last", "Redo"), cal_rows, num=(1, 2)),
            _fig(cal_plot) if cal_plot else _p("No board has been calibrated: every offset is 0 dB."),
            _table(
                ("Board", "At (UTC)", "Offset dB", "Shift dB", "Spread dB", "n"), hist_rows, num=(2, 3, 4, 5)
            )
            if hist_rows
            else "",
            _p(
                "Shift: change from the board's previous calibration. Spread: how widely the reference "
                "readings scattered. Per-reading residuals are not kept by the collector."
            ),
            _watch_table(data, clock),
        )
    )

    # walk test
    walk_plot = plot_walk(data)
    if data.walktest is None:
        walk = [
            _p(
                "The collector does not store walk tests. To include one, run the report with "
                "--walk-tag ID --walk-marks FILE (the same marks file 'collector walktest' reads)."
            )
        ]
    else:
        wrows = []
        for r in data.walktest.get("rooms", []):
            best = r.get("strongest")
            wrows.append(
                (
                    r["room"],
                    best["board"] if best else "nobody",
                    _f(best["median_dbm"] if best else None, ".1f"),
                    _f(r.get("margin_db"), ".1f"),
                    "–" if not best else "yes" if r.get("strongest_in_room") else "NO",
                )
            )
        walk = [
            _p(f"Reference tag {data.walk_tag}."),
            _fig(walk_plot) if walk_plot else _p("No room was visited."),
            _table(("Room", "Strongest", "dBm", "Margin dB", "In room"), wrows, num=(2, 3)),
        ]
    parts.append(_section("walktest", "Walk test", *walk))

    f = data.status.get("fleet", {})
    title = f"Study-day report {_t(data.t_from)} – {_t(data.t_end)} UTC"
    meta = (
        f"Collector {data.collector} · {f.get('boards', len(rows))} boards · {f.get('tags', 0)} tags · "
        f"{sum(data.readings.values()):,} readings in the span · generated at collector time {_t(data.status.get('at'))}"
    )
    if data.t_end < data.t_to:
        meta += f" (the span asked for ran to {_t(data.t_to)})"
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width,initial-scale=1">'
        f"<title>{html.escape(title)}</title><style>{CSS}</style></head><body>"
        f'<h1>{html.escape(title)}</h1><p class="meta">{html.escape(meta)}</p>'
        + "".join(parts)
        + "</body></html>\n"
    )
