"""
A venue in one process: the real collector on loopback and one real agent per board replaying its
recording, each board on its own clock derived from one shared base clock.

    base clock ─┬─ collector (aiohttp on 127.0.0.1, SQLite in the state directory, monitor)
                └─ DerivedClock per board ─ run_agent(... source = that board's recording)

The base is a `ScaledClock` for the demo (time flows, sped up) or a `VirtualClock` for tests (time
moves only when `Fleet.run_until` moves it). Each board's clock has the board's true skew, boot time
and wall-clock error from the simulator's ``truth.json``, chosen so that the board's monotonic clock
reads the recording's board time at the matching true moment (replay_logs/README.md):

    t_board = (t_true + uptime_at_start_s) · (1 + skew_ppm·1e-6)        t_true = base.monotonic() − recording_start

and the collector's clock reads ``start_wall + t_true`` on a virtual base, so the truth's segments are
directly in collector time there.

On virtual time the driver steps the clock and then waits until the fleet is idle: no HTTP request
in flight and every task that ever slept on the clock sleeping on it again. That wait is for loopback
I/O and worker threads (SQLite), never for time to pass, and it is bounded.
"""

from __future__ import annotations

import asyncio
import contextlib
import time as _real_time
from collections.abc import Awaitable, Callable
from pathlib import Path
from typing import Any

import aiohttp
import structlog

from listenpost.core.clock import ScaledClock, VirtualClock, settle
from listenpost.demo.board import PACE_S, VirtualBoard
from listenpost.demo.collector import (
    REQUEST_TIMEOUT_S,
    FleetError,
    RunningCollector,
    admin_call,
    start_collector,
    venue_plan,
    write_collector_yaml,
)
from listenpost.demo.idle import InFlight, TrackingClock
from listenpost.demo.outcome import BoardSummary, expected_state
from listenpost.sim.truth import Truth

log = structlog.get_logger("listenpost.demo.fleet")

QUIESCE_TIMEOUT_S = 60.0
"""Longest real wait for loopback I/O and worker threads after one virtual step, seconds."""
QUIESCE_POLL_S = 0.0005
"""Real pause between idle checks while I/O is pending, seconds."""


class Fleet:
    """
    The collector and one virtual board per board of ``venue``, on one base clock.

    Example (tests, virtual time)::

        fleet = Fleet(venue, tmp_path, VirtualClock(start=1000.0, wall=venue.start_wall))
        await fleet.start()
        await fleet.run_until(venue.duration_s + 30)
        summary = await fleet.summary()
        await fleet.close()
    """

    def __init__(
        self,
        venue: Truth,
        state_dir: Path,
        base: VirtualClock | ScaledClock,
        *,
        liveness: dict[str, Any] | None = None,
        pace_s: float = PACE_S,
        boards: list[str] | None = None,
    ) -> None:
        self.venue = venue
        self.state_dir = Path(state_dir)
        self.virtual = base if isinstance(base, VirtualClock) else None
        self.clock = TrackingClock(base)
        self.liveness = liveness
        self.recording_start = base.monotonic()
        """Base monotonic time of the recording's start (t_true = 0)."""
        chosen = [b for b in venue.boards if boards is None or b.name in boards]
        self.boards = {
            b.name: VirtualBoard(
                b, self.clock, self.recording_start, self.state_dir / "boards" / b.name, pace_s
            )
            for b in chosen
        }
        self.inflight = InFlight()
        self.session: aiohttp.ClientSession | None = None
        self.collector: RunningCollector | None = None
        self._pending_power_offs = sorted(
            (b.truth.power_off_at_s, name)
            for name, b in self.boards.items()
            if b.truth.power_off_at_s is not None
        )
        self.power_off_log: dict[str, float] = {}
        """Board → true time its power was cut."""

    # ------------------------------------------------------------ set-up

    @property
    def url(self) -> str:
        assert self.collector is not None, "start() first"
        return self.collector.url

    def t_true(self) -> float:
        """True seconds since the recording's start."""
        return self.clock.monotonic() - self.recording_start

    async def start(self, *, port: int = 0, on_board: Callable[[str], None] | None = None) -> None:
        """Start the collector, register the boards and tags, enroll every board and start its agent."""
        await self.start_collector(port=port)
        await self.start_boards(on_board=on_board)

    async def start_collector(self, *, port: int = 0) -> str:
        """Serve the collector (its collector.yaml carries the venue's decode rule); returns its URL."""
        (self.state_dir / "boards").mkdir(parents=True, exist_ok=True)
        config = write_collector_yaml(self.state_dir, self.venue, self.liveness)
        self.collector = await start_collector(self.state_dir, self.clock, config=config, port=port)
        self.session = aiohttp.ClientSession(trace_configs=[self.inflight.trace])
        return self.collector.url

    async def start_boards(self, *, on_board: Callable[[str], None] | None = None) -> None:
        """Register tags and boards through the admin API, then enroll and start each board."""
        from listenpost.collector.cli import read_tag_file

        assert self.collector is not None and self.session is not None, "start_collector() first"
        url, token = self.collector.url, self.collector.admin_token
        tags = read_tag_file(self.venue.tags_file)
        await admin_call(self.session, url, token, "POST", "/v1/admin/tags", {"ids": tags})
        # The venue plan, as the installer imports it: the plan view draws it.
        await admin_call(self.session, url, token, "PUT", "/v1/admin/plan", venue_plan(self.venue))
        codes = {}
        for name, board in self.boards.items():
            answer = await admin_call(
                self.session,
                url,
                token,
                "POST",
                "/v1/admin/boards",
                {"name": name, "room": board.truth.room_label, "floor": board.truth.floor},
            )
            codes[name] = answer["code"]
        # Enroll and start one board at a time, so no enrolled board waits long for its first heartbeat.
        for name, board in self.boards.items():
            await board.enroll(url, codes[name], self.session)
            board.start(self.session)
            if on_board is not None:
                on_board(name)
        await self.quiesce()
        log.info("fleet_started", boards=len(self.boards), collector=url)

    # ------------------------------------------------------------ driving time

    async def quiesce(self) -> None:
        """
        On virtual time: return once no request is in flight and every clock user sleeps on the clock.

        Raises:
            FleetError: still busy after `QUIESCE_TIMEOUT_S` real seconds (names the busy tasks).
        """
        if self.virtual is None:
            return
        # Real time here only bounds the wait for sockets and worker threads; virtual time stands still.
        deadline = _real_time.monotonic() + QUIESCE_TIMEOUT_S
        calm = 0
        while True:
            await settle()
            if self.inflight.count == 0 and not self.clock.busy():
                calm += 1
                if calm >= 2:  # twice in a row: a task woken by the last advance has had its turn
                    return
                continue
            calm = 0
            if _real_time.monotonic() > deadline:
                raise FleetError(
                    f"fleet still busy after {QUIESCE_TIMEOUT_S:.0f} s: {self.inflight.count} requests "
                    f"in flight, busy tasks {sorted(self.clock.busy())[:8]}"
                )
            await asyncio.sleep(QUIESCE_POLL_S)

    async def run_until(
        self,
        t_true_end: float,
        *,
        step_s: float = 0.5,
        on_step: Callable[[Fleet], Awaitable[None]] | None = None,
    ) -> None:
        """
        Let the venue run until ``t_true_end`` seconds after the recording's start, cutting power of
        the boards the truth says lose it, at their moment.

        On a virtual base the clock moves in steps of ``step_s`` with `quiesce` after each; on a
        scaled base this simply sleeps. ``on_step`` runs after every step.
        """
        if step_s <= 0:
            raise ValueError(f"step_s must be > 0, got {step_s!r}")
        while True:
            now = self.t_true()
            if now >= t_true_end - 1e-9:
                break
            nxt = min(t_true_end, now + step_s)
            if self._pending_power_offs:
                nxt = min(nxt, max(self._pending_power_offs[0][0], now))
            if nxt > now:
                if self.virtual is not None:
                    await self.virtual.advance(nxt - now)
                    await self.quiesce()
                else:
                    await self.clock.sleep(nxt - now)
            await self._cut_power()
            if on_step is not None:
                await on_step(self)

    async def _cut_power(self) -> None:
        while self._pending_power_offs and self._pending_power_offs[0][0] <= self.t_true() + 1e-9:
            at, name = self._pending_power_offs.pop(0)
            await self.boards[name].power_off()
            self.power_off_log[name] = self.t_true()
            log.info("board_power_cut", board=name, t_true=round(self.t_true(), 3), scheduled=at)
            await self.quiesce()

    # ------------------------------------------------------------ reading the outcome

    async def status(self) -> dict[str, Any]:
        """``GET /v1/status`` of the collector (the same document the health page shows)."""
        assert self.session is not None and self.collector is not None
        timeout = aiohttp.ClientTimeout(total=REQUEST_TIMEOUT_S)
        async with self.session.get(self.url + "/v1/status", timeout=timeout) as resp:
            if resp.status != 200:
                raise FleetError(f"GET /v1/status: {resp.status}: {(await resp.text())[:200]}")
            doc: dict[str, Any] = await resp.json()
        await self.quiesce()
        return doc

    async def summary(self) -> list[BoardSummary]:
        """Each board's state, readings, and clock estimates beside the truth."""
        from listenpost.collector.ingest import clock_model
        from listenpost.collector.models.liveness import LivenessSettings
        from listenpost.collector.state import RUNTIME, STORE

        assert self.collector is not None
        doc = await self.status()
        rows = {r["name"]: r for r in doc["boards"]}
        app = self.collector.app
        tolerance = float(
            (self.liveness or {}).get("skew_tolerance_ppm", LivenessSettings().skew_tolerance_ppm)
        )
        base = self.clock
        wall_minus_mono = base.time() - base.monotonic()
        out = []
        for name, board in self.boards.items():
            r = rows.get(name, {})
            truth = board.truth
            fit = (await clock_model(app[RUNTIME].clock_models, app[STORE], name, truth.boot)).fit()
            est = true = err = at_b = None
            if fit is not None:
                at_b = fit.ref_board_s
                est = float(fit.offset_at(at_b))
                # The board read at_b at base time boot_at + at_b/rate; the collector's clock read
                # that base time plus its constant wall-minus-monotonic difference.
                true = wall_minus_mono + board.clock.boot_at + at_b / board.clock.rate - at_b
                err = (est - true) * 1000.0
            wall_ms = r.get("wall_error_ms")
            out.append(
                BoardSummary(
                    name=name,
                    room=truth.room_label,
                    state=r.get("state") or "unknown",
                    expected_state=expected_state(truth, tolerance),
                    readings_stored=int(r.get("readings_total") or 0),
                    skew_est_ppm=fit.skew_ppm if fit is not None and fit.skew_estimated else None,
                    skew_true_ppm=truth.skew_ppm,
                    offset_est_s=est,
                    offset_true_s=true,
                    offset_error_ms=err,
                    offset_at_board_s=at_b,
                    wall_error_est_s=None if wall_ms is None else wall_ms / 1000.0,
                    wall_error_true_s=truth.wall_error_s,
                    state_reason=r.get("state_reason"),
                )
            )
        await self.quiesce()
        return out

    async def calibrate(self, minutes: float, *, apply: bool) -> dict[str, Any]:
        """The collector's fleet calibration over the last ``minutes`` (its answer, docs/calibration.md)."""
        assert self.session is not None and self.collector is not None
        body = {"minutes": minutes, "apply": apply}
        doc: dict[str, Any] = await admin_call(
            self.session, self.url, self.collector.admin_token, "POST", "/v1/admin/calibrate/fleet", body
        )
        await self.quiesce()
        return doc

    # ------------------------------------------------------------ shutdown

    async def stop_boards(self) -> None:
        """Stop every agent still running, cleanly."""
        for board in self.boards.values():
            await board.stop()

    async def close(self) -> None:
        """Stop the agents, the session and the collector (idempotent)."""
        with contextlib.suppress(Exception):
            await self.stop_boards()
        for board in self.boards.values():
            if board.task is not None and not board.task.done():
                board.task.cancel()
                with contextlib.suppress(BaseException):
                    await board.task
        if self.session is not None:
            await self.session.close()
            self.session = None
        if self.collector is not None:
            await self.collector.close()
            self.collector = None
