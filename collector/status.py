"""
The status model: the fleet and per-board figures that the health page, ``/v1/status``, ``/metrics``,
``collector status``, the monitor and the demo all read, and the words they are told in.
"""

from __future__ import annotations

import math
import re
from collections import Counter, deque
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from aiohttp import web

from listenpost import __version__
from listenpost.collector.ingest import clock_model
from listenpost.collector.provision import AGENT_PREFIX
from listenpost.collector.state import CLOCK, RUNTIME, SETTINGS, STORE
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

STATE_ORDER = ("silent", "deaf", "drifting", "backlogged", "late", "unknown", "live", "retired")
"""States from the most to the least urgent (the precedence of collector/models/liveness.py, then the
states that need nobody): the page and the CLI list boards and state counts in this order."""

WALL_CLOCK_TOLERANCE_S = 10.0
"""A board wall clock further off than this has no working time sync: worth a visit, though readings
are unaffected (they are placed on the collector's clock)."""


# ------------------------------------------------------------------ vocabulary


def fmt_count(v: Any) -> str:
    return f"{v:,}" if isinstance(v, int) and not isinstance(v, bool) else f"{v:,.0f}"


def fmt_bytes(v: float) -> str:
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if abs(v) >= size:
            return f"{v / size:.1f} {unit}"
    return f"{v:.0f} B"


def _fixed(digits: int, unit: str = "", signed: bool = False) -> Callable[[Any], str]:
    def fmt(v: Any) -> str:
        if abs(v) < 0.5 * 10**-digits:
            v = 0.0  # no "-0.00"
        text = f"{v:{'+' if signed and v else ''},.{digits}f}".replace("-", "−")
        return f"{text}{unit}"

    return fmt


@dataclass(frozen=True, slots=True)
class Figure:
    """
    One per-board figure under one name everywhere: the row field of ``/v1/status`` (``key``, in
    ``unit``), the label the page and ``collector status`` print, the help text the page's glossary
    and the ``/metrics`` HELP line carry, and the metric family (its value is the row's times ``scale``,
    in the base unit its name ends in).
    """

    key: str
    label: str
    unit: str
    help: str
    metric: str | None = None
    counter: bool = False
    scale: float = 1.0
    fmt: Callable[[Any], str] = fmt_count

    def text(self, value: Any) -> str:
        """The value as the page and the CLI print it; "–" when there is none."""
        return "–" if value is None else self.fmt(value)

    def heading(self) -> str:
        """The label with its unit, as a column heading."""
        return f"{self.label} ({self.unit})" if self.unit else self.label


FIGURES: tuple[Figure, ...] = (
    Figure(
        "last_contact_age_s",
        "Last contact",
        "s",
        "Seconds since the board's latest heartbeat or batch reached the collector, on the collector's clock.",
        "listenpost_last_contact_age_seconds",
        fmt=lambda v: fmt_age(v),
    ),
    Figure(
        "heartbeat_age_s",
        "Last heartbeat",
        "s",
        "Seconds since the board's latest heartbeat reached the collector (every 10 s when all is well).",
        "listenpost_heartbeat_age_seconds",
        fmt=lambda v: fmt_age(v),
    ),
    Figure(
        "readings_total",
        "Readings stored",
        "",
        "Tag readings from this board the collector has stored since the board was enrolled.",
        "listenpost_readings",
        counter=True,
    ),
    Figure(
        "readings_per_s",
        f"Reading rate, last {RATE_WINDOW_SECONDS / 60:.0f} min",
        "/s",
        f"Readings stored per second over the last {RATE_WINDOW_SECONDS:.0f} s (the window actually "
        "covered is readings_rate_window_s); none while the board is silent: it has no current rate.",
        "listenpost_readings_per_second",
        fmt=_fixed(1, "/s"),
    ),
    Figure(
        "tag_rate_hz_median",
        "Readings per tag",
        "/s",
        "Median over the tags the board heard lately of each tag's readings per second, from its latest "
        "heartbeat. A tag advertising twice a second heard every time gives 2/s; far less means the radio "
        "misses adverts (distance, walls, a weak antenna).",
        "listenpost_tag_rate_median_hertz",
        fmt=_fixed(2, "/s"),
    ),
    Figure(
        "tags_heard",
        "Tags heard",
        "",
        "Registered tags the board heard lately, from its latest heartbeat.",
        "listenpost_tags_heard",
    ),
    Figure(
        "clock_skew_ppm",
        "Clock rate error",
        "ppm",
        "How much faster (+) or slower (−) the board's clock runs than the collector's, in parts per "
        "million (86 ppm is 7.4 s a day). Readings are corrected for it; beyond ±50 ppm the board is "
        "drifting: its crystal is failing or overheating.",
        "listenpost_clock_skew_ppm",
        fmt=_fixed(1, " ppm", signed=True),
    ),
    Figure(
        "clock_residual_ms",
        "Clock scatter",
        "ms",
        "How far the board's clock exchanges stray from its fitted clock line (root mean square): the "
        "uncertainty of a reading's time. Beyond 50 ms the board is drifting (clock jumps, a congested link).",
        "listenpost_clock_residual_seconds",
        scale=1e-3,
        fmt=_fixed(1, " ms"),
    ),
    Figure(
        "clock_offset_ms",
        "Clock offset",
        "ms",
        "Collector time minus the board's clock at the fit's reference point. Large by nature (the board "
        "clock counts from its boot); only its changes matter.",
        "listenpost_clock_offset_seconds",
        scale=1e-3,
        fmt=_fixed(0, " ms"),
    ),
    Figure(
        "wall_error_ms",
        "Wall clock error",
        "ms",
        "The board's calendar clock minus the collector's time, from its latest heartbeat. Readings do "
        f"not use it; beyond {WALL_CLOCK_TOLERANCE_S:.0f} s the board has no working time sync and its "
        "own logs are misdated.",
        "listenpost_wall_clock_error_seconds",
        scale=1e-3,
        fmt=lambda v: fmt_clock_error(v / 1000.0),
    ),
    Figure(
        "spool_backlog_batches",
        "Spool backlog",
        "batches",
        "Sealed batches on the board waiting to be sent (latest heartbeat). A few come and go; a steady "
        "rise means the link is slower than the radio.",
        "listenpost_spool_backlog_batches",
    ),
    Figure(
        "spool_backlog_bytes",
        "Spool backlog size",
        "bytes",
        "Bytes of the waiting batches on the board's disk (latest heartbeat); 0 when no batch waits "
        "(sent batches leave the board's disk at its next seal and are not a backlog).",
        "listenpost_spool_backlog_bytes",
        fmt=fmt_bytes,
    ),
    Figure(
        "adverts_total",
        "Adverts heard",
        "",
        "Advertisements the board's radio heard from any device since its agent started (latest "
        "heartbeat). Flat while other boards hear tags: the radio is deaf.",
        "listenpost_adverts",
        counter=True,
    ),
    Figure(
        "gap_readings",
        "Readings lost",
        "",
        "Readings the board itself reported lost (spool full, corrupt file), summed over its life.",
        "listenpost_gap_readings",
        counter=True,
    ),
    Figure(
        "unregistered_readings",
        "Unregistered readings",
        "",
        "Readings of tags not in the collector's tag list, dropped on arrival.",
        "listenpost_unregistered_readings",
        counter=True,
    ),
    Figure(
        "cpu_temperature_c",
        "Temperature",
        "°C",
        "The board's processor temperature (latest heartbeat); above 80 °C boards slow down and clocks drift.",
        "listenpost_board_temperature_celsius",
        fmt=_fixed(0, " °C"),
    ),
    Figure(
        "disk_free_bytes",
        "Disk free",
        "bytes",
        "Free space where the board keeps its spool (latest heartbeat); near 0 the spool cannot write.",
        "listenpost_board_disk_free_bytes",
        fmt=fmt_bytes,
    ),
)
"""Every per-board figure the page, ``/v1/status``, ``/metrics`` and ``collector status`` show."""

FIGURE = {f.key: f for f in FIGURES}


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


# ------------------------------------------------------------------ what to do


AGENT_UNIT = "listenpost-agent"


def on_board(command: str) -> dict[str, str]:
    """A command to run in a shell on the board itself."""
    return {"run": command, "on": "board"}


def admin(command: str) -> dict[str, str]:
    """A command to run wherever the admin CLI reaches the collector."""
    return {"run": command, "on": "admin"}


def _issue(severity: int, what: str, why: str, site: str, commands: list[dict[str, str]]) -> dict[str, Any]:
    return {"severity": severity, "what": what, "why": why, "site": site, "commands": commands}


def attention(r: dict[str, Any]) -> list[dict[str, Any]]:
    """
    What needs a person at this board, most urgent first: each issue says what is wrong and why in
    words, what to check on site, and which commands to run (on the board, or with the admin CLI).
    Severity 0 is the most urgent (the state order of `STATE_ORDER`; a wall clock off comes after the
    states that cost data).
    """
    name, st, why = r["name"], r["state"], r["state_reason"] or ""
    events = admin(f"listenpost collector events --board {name}")
    logs = on_board(f"journalctl -u {AGENT_UNIT} -n 100")
    out: list[dict[str, Any]] = []
    if st == "silent":
        out.append(
            _issue(
                0,
                "Not reaching the collector",
                why,
                "Check the board has power (its LED) and its network at that spot (cable seated, "
                "Wi-Fi in reach). A board that comes back catches up from its spool by itself.",
                [events, on_board(f"systemctl status {AGENT_UNIT}"), logs],
            )
        )
    elif st == "deaf":
        out.append(
            _issue(
                1,
                "Radio hears nothing",
                why,
                "The board still talks to the collector, but its Bluetooth radio has stopped hearing "
                "anything. Restart the agent; if it stays deaf, re-seat the Bluetooth adapter or "
                "power-cycle the board.",
                [on_board(f"sudo systemctl restart {AGENT_UNIT}"), logs],
            )
        )
    elif st == "drifting":
        if "stepped" in why:
            site = (
                "The board's clock jumped: usually the agent restarted on a board whose clock was set by "
                "hand or by a late time sync. Readings around the jump are placed by the new line; check "
                "the board's logs for a restart or a clock change."
            )
        elif "residual" in why:
            site = (
                "Its clock exchanges scatter: the round trips to the collector vary a lot (a congested or "
                "flaky Wi-Fi link, or a board too busy to answer promptly). Check the link at the board "
                "and the board's load; readings keep the fitted times, with this much uncertainty."
            )
        else:
            site = (
                "Readings are still corrected with the fitted clock line, but a clock this far off points "
                "at a failing crystal or heat: check the board is not in the sun or next to a heater "
                "(its temperature is on its page), and plan to swap the board if it persists."
            )
        out.append(_issue(2, "Clock running off", why, site, [events, logs]))
    elif st == "backlogged":
        out.append(
            _issue(
                3,
                "Sending slower than it records",
                why,
                "Check the network at the board (Wi-Fi signal, cable, a busy access point). Nothing is "
                "lost while the spool has room; the backlog drains by itself when the link recovers.",
                [admin("listenpost collector status"), logs],
            )
        )
    elif st == "late":
        out.append(
            _issue(
                5,
                "Contact overdue",
                why,
                "Usually passes by itself within a minute; if it turns silent, follow the silent steps.",
                [admin("listenpost collector status")],
            )
        )
    elif st == "unknown" and not r["enrolled"]:
        out.append(
            _issue(
                6,
                "Never enrolled",
                "registered, but no board has enrolled under this name yet",
                "Flash the board's card with its provisioning bundle and power it on; a new enrollment "
                "code replaces a lost or expired one.",
                [admin(f"listenpost collector board reissue {name} --bundle DIR")],
            )
        )
    if r["spool_degraded"]:
        out.append(
            _issue(
                1,
                "Board disk cannot be written",
                "its spool cannot write (disk full or failing): readings are held in memory only and "
                "are lost if the board restarts",
                "Free space on the board's card or replace the card.",
                [on_board("df -h /var/lib/listenpost"), logs],
            )
        )
    shift = r.get("calibration_shift_db")
    if shift is not None and st != "retired":
        out.append(
            _issue(
                4,
                "Signal level shifted since calibration",
                f"it hears the reference tags {shift:+.1f} dB from their level at its calibration, for "
                "more than 5 minutes: its offset no longer holds, so its RSSI is off by about that much",
                "Check the board's antenna and adapter are seated and that nothing new stands around the "
                "board or the reference tags (a closed case, a moved display); then calibrate again.",
                [events, admin("listenpost collector calibrate --fleet")],
            )
        )
    wall = r["wall_error_ms"]
    if st not in ("silent", "retired") and wall is not None and abs(wall) / 1000.0 > WALL_CLOCK_TOLERANCE_S:
        ahead = "ahead" if wall > 0 else "behind"
        out.append(
            _issue(
                4,
                "Wall clock off",
                f"the board's calendar clock is {fmt_clock_error(abs(wall) / 1000.0)} {ahead}: its time "
                "sync does not work. Readings are unaffected (they are placed on the collector's clock), "
                "but the board's own logs are misdated.",
                "Check the board reaches a time server (network time is often blocked on venue "
                "networks), then enable time sync.",
                [on_board("timedatectl"), on_board("sudo timedatectl set-ntp true")],
            )
        )
    version = r.get("agent_version")
    if st not in ("silent", "retired") and version is not None and version != __version__:
        out.append(
            _issue(
                5,
                "Agent version differs",
                f"the board runs listenpost {version}, the collector {__version__}: a board left behind "
                "after an upgrade, or a card from another installation",
                "Reinstall the agent on the board from the collector's wheelhouse (build it first with "
                "`listenpost collector wheelhouse build` if the collector was upgraded), then restart it; "
                "COLLECTOR_URL is the address in the board's agent.yaml.",
                [
                    on_board(
                        f"sudo {AGENT_PREFIX}/bin/pip install --no-index --find-links COLLECTOR_URL/wheels/ "
                        f"listenpost=={__version__}"
                    ),
                    on_board(f"sudo systemctl restart {AGENT_UNIT}"),
                ],
            )
        )
    return sorted(out, key=lambda i: i["severity"])


def fmt_duration(seconds: float) -> str:
    """A length of time: "37 s", "4 min 10 s", "3 h 12 min"."""
    a = abs(seconds)
    if a < 90:
        return f"{a:.0f} s"
    if a < 3600:
        return f"{int(a // 60)} min {int(round(a % 60))} s"
    return f"{int(a // 3600)} h {int(round(a % 3600 / 60))} min"


def _contact_reason(state: str, age: float | None, limits: Any) -> str | None:
    """
    The reason of a contact state, counted from the last contact to the same ``now`` as the row's
    last-contact age. The monitor's own text was written at its latest round and counted from then,
    so it lagged the age shown beside it by up to a round (and the stored event, written at the change,
    by more): one silence read as two lengths.
    """
    if age is None:
        return "no contact yet"
    if state == "silent":
        return f"no heartbeat or batch for {fmt_duration(age)} (silent after {limits.silent_after_s:.0f} s at most)"
    return f"no heartbeat or batch for {fmt_duration(age)} (expected every {limits.heartbeat_s:.0f} s)"


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


def readings_rate(history: deque[tuple[float, int]] | None) -> tuple[float, float] | None:
    """
    (readings stored per second, seconds the figure covers) over about the last ``RATE_WINDOW_SECONDS``
    (oldest kept sample to newest); None until two samples at least a second apart exist. Batches
    arrive every few seconds, so a window of minutes smooths their steps.
    """
    if not history or len(history) < 2:
        return None
    (t0, n0), (t1, n1) = history[0], history[-1]
    return ((n1 - n0) / (t1 - t0), t1 - t0) if t1 - t0 >= 1.0 else None


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
            elif e.kind == "calibration_shift" and e.board:
                runtime.calibration_shifts[e.board] = e.detail
            elif e.kind == "calibrated" and e.board:
                runtime.calibration_shifts.pop(e.board, None)  # calibrated again: the shift is taken in
        if page:
            runtime.events_cursor = max(e.id or 0 for e in page)
        if len(page) < 1000:
            return list(runtime.recent_events)


def liveness_limits(app: web.Application) -> Any:
    """The liveness settings the monitor judges by (defaults, the heartbeat period, collector.yaml)."""
    from listenpost.collector.models.liveness import LivenessSettings

    settings = app[SETTINGS]
    return LivenessSettings(**{"heartbeat_s": settings.heartbeat_seconds, **settings.liveness})


async def status_doc(app: web.Application) -> dict[str, Any]:
    """Fleet and per-board figures for the page, ``/v1/status``, ``collector status`` and the demo."""
    store, runtime, now = app[STORE], app[RUNTIME], app[CLOCK].time()
    limits = liveness_limits(app)
    boards = await store.list_boards()
    counts = {c.board: c for c in await store.board_counts()}
    beats: dict[str, Heartbeat] = await store.latest_heartbeats()
    recent = await recent_events(app)
    last_event: dict[str, Event] = {e.board: e for e in recent if e.board}
    refused: Counter[str] = Counter()
    for (name, _), m in runtime.clock_models.items():
        refused[name] += m.n_refused
    rows = []
    for b in boards:
        c = counts.get(b.name)
        hb = beats.get(b.name)
        stats = hb.stats if hb else {}
        contact = max(
            [t for t in (c.last_batch_at if c else None, hb.at if hb else None) if t is not None],
            default=None,
        )
        contact_age = None if contact is None else max(0.0, now - contact)
        state = runtime.states.get(b.name, {})
        st = "retired" if b.retired_at is not None else state.get("state") or "unknown"
        reason = state.get("reason")
        if st in ("silent", "late"):
            reason = _contact_reason(st, contact_age, limits)
        fit = None
        # From the counts' row, not one query per board: a fleet that has not called in yet costs one query.
        boot = hb.boot if hb else (c.last_boot if c else None)
        if boot is not None:
            fit = (await clock_model(runtime.clock_models, store, b.name, boot)).fit()
        total = c.readings_total if c else 0
        wall_err = _number(stats.get("wall_error_s"))
        # A silent board has no current rate: an average over a window reaching back before the
        # silence would show it still working.
        rate = (
            readings_rate(runtime.rates.get(b.name))
            if b.enrolled_at is not None and st not in ("silent", "retired")
            else None
        )
        batches = _number(stat(stats, "spool_batches", "spool.batches"))
        spool_bytes = _number(stat(stats, "spool_bytes", "spool.bytes"))
        ev = last_event.get(b.name)
        row = {
            "name": b.name,
            "room": b.room,
            "floor": b.floor,
            "state": st,
            "state_reason": _with_spool_problem(reason, stats),
            "spool_degraded": _spool_degraded(stats),
            "state_since": state.get("since"),
            "enrolled": b.enrolled_at is not None,
            "boot": boot,
            "last_contact_at": contact,
            "heartbeat_age_s": None if hb is None else max(0.0, now - hb.at),
            "last_contact_age_s": contact_age,
            "readings_total": total,
            "batches_total": c.batches_total if c else 0,
            "readings_per_s": rate[0] if rate else None,
            "readings_rate_window_s": rate[1] if rate else None,
            "tag_rate_hz_median": _number(stats.get("tag_rate_hz_median")),
            "tags_heard": _number(stats.get("tags_heard")),
            "gap_readings": c.gap_readings if c else 0,
            "unregistered_readings": runtime.unregistered.get(b.name, 0),
            "clock_exchanges_refused": refused[b.name],
            "clock_offset_ms": fit.offset_s * 1000.0 if fit else None,
            "clock_skew_ppm": fit.skew_ppm if fit else None,
            "clock_residual_ms": fit.residual_ms if fit else None,
            "clock_steps": len(fit.steps) if fit else 0,
            "wall_error_ms": wall_err * 1000.0 if wall_err is not None else None,
            "spool_backlog_batches": None if batches is None else int(batches),
            # The board counts acknowledged batches in its spool bytes until its next seal removes
            # them (its batch count leaves them out already): with no batch waiting, nothing waits.
            "spool_backlog_bytes": None if spool_bytes is None else (0 if batches == 0 else int(spool_bytes)),
            "adverts_total": stat(stats, "adverts_total", "pipeline.adverts_total"),
            "adverts_registered": stat(stats, "adverts_registered", "pipeline.adverts_registered"),
            "cpu_temperature_c": _number(stats.get("cpu_temperature_c")),
            "disk_free_bytes": _number(stats.get("disk_free_bytes")),
            "offset_db": b.offset_db,
            "agent_version": stats.get("version") if isinstance(stats.get("version"), str) else None,
            "calibration_shift_db": _number(runtime.calibration_shifts.get(b.name, {}).get("shift_db")),
            "last_event": {"kind": ev.kind, "at": ev.at, "detail": ev.detail} if ev else None,
        }
        row["attention"] = attention(row)
        rows.append(row)
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
            {
                "id": e.id,
                "at": e.at,
                "board": e.board,
                "kind": e.kind,
                "detail": e.detail,
                "text": event_text(e.kind, e.detail),
            }
            for e in reversed(recent[-20:])
        ],
        "figures": {f.key: {"label": f.label, "unit": f.unit, "help": f.help} for f in FIGURES},
        "refresh_seconds": REFRESH_SECONDS,
    }


EVENT_WORDS = {
    "state_changed": "state changed",
    "loss": "readings lost",
    "digest_conflict": "two different batches under one number",
    "fingerprint_changed": "board identity changed",
    "unregistered_ids": "readings of unregistered tags dropped",
    "calibrated": "RSSI offset calibrated",
    "calibration_shift": "signal level shifted since calibration",
}
"""Stored event kinds in words; a kind not listed reads as its name with spaces."""


def event_text(kind: str, detail: dict[str, Any]) -> str:
    """One event in words, e.g. "became silent (was live): no contact for 37 s"."""
    d = detail
    if kind == "state_changed" and d.get("new"):
        new = STATE_LABELS.get(str(d["new"]), (str(d["new"]), ""))[0]
        old = STATE_LABELS.get(str(d.get("old")), (None, ""))[0] if d.get("old") else None
        text = f"became {new}" + (f" (was {old})" if old else "")
    elif kind == "loss" and "first_seq" in d:
        text = f"batches {d['first_seq']}–{d['last_seq']} lost"
        if d.get("tail"):
            text += " (sealed on the board, never sent before its spool started a new epoch)"
    elif kind == "calibration_shift" and isinstance(d.get("shift_db"), int | float):
        text = f"reference tags heard {d['shift_db']:+.1f} dB from their level at calibration"
    else:
        text = EVENT_WORDS.get(kind, kind.replace("_", " "))
    reason = d.get("reason")
    return f"{text}: {_plain_reason(str(reason))}" if reason else text


def _plain_reason(reason: str) -> str:
    """A stored reason without the detector's internals ("(phi 24.0)" means nothing on site)."""
    return re.sub(r",? ?\(phi [0-9.]+\)", "", reason)


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
