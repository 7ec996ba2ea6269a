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
import json
import time as _real_time
import weakref
from collections.abc import AsyncIterator, Awaitable, Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiohttp
import structlog
import yaml

from listenpost.core.clock import Clock, DerivedClock, ScaledClock, VirtualClock, settle
from listenpost.core.errors import ConfigError, ListenpostError
from listenpost.core.records import Advert

log = structlog.get_logger("listenpost.demo.fleet")

REQUEST_TIMEOUT_S = 10.0
"""Total timeout of the fleet's own admin calls, real seconds."""
QUIESCE_TIMEOUT_S = 60.0
"""Longest real wait for loopback I/O and worker threads after one virtual step, seconds."""
QUIESCE_POLL_S = 0.0005
"""Real pause between idle checks while I/O is pending, seconds."""
PACE_S = 0.5
"""Replay pacing grain, board seconds: adverts are handed to the agent when the board clock passes
the next multiple of this after their recorded time (a radio's scan window delivers in bursts too)."""


class FleetError(ListenpostError):
    """The fleet could not be set up or driven (collector refused, enrollment failed, stuck I/O)."""


# ---------------------------------------------------------------- the venue's truth


@dataclass(frozen=True, slots=True)
class BoardTruth:
    """One board as the simulator made it (``truth.json`` ``boards.<name>``)."""

    name: str
    room: str
    """Room code, e.g. ``G0``."""
    room_label: str
    """Room as the collector is told, e.g. ``G0 Foyer``."""
    floor: str
    """Floor name, e.g. ``ground``."""
    recording: Path
    boot: str
    """Boot id of the recording; the virtual board uses it, so the collector's clock model keys match."""
    skew_ppm: float
    """True clock rate error, parts per million (positive: board fast)."""
    uptime_at_start_s: float
    """True seconds since boot when the recording starts."""
    wall_error_s: float
    """Board wall clock minus true time, seconds."""
    true_offset_db: float
    """What the board's adapter adds to every RSSI report, dB."""
    power_off_at_s: float | None = None
    """True seconds from recording start when the board loses power for good."""
    radio_hang_at_s: float | None = None
    """True seconds from recording start when the radio stops hearing (the board stays up)."""

    def board_time(self, t_true: float) -> float:
        """Board monotonic seconds at true time ``t_true`` (seconds from recording start)."""
        return (t_true + self.uptime_at_start_s) * (1.0 + self.skew_ppm * 1e-6)


@dataclass(frozen=True, slots=True)
class Venue:
    """A simulator output directory: recordings, ``truth.json`` and ``tags.txt``."""

    directory: Path
    start_wall: float
    """True Unix time of recording start, seconds."""
    duration_s: float
    """Length of the recording, seconds."""
    boards: tuple[BoardTruth, ...]
    tags_file: Path
    decode_rules: tuple[dict[str, Any], ...]
    """Decode rules for the custom tag firmware, in the collector.yaml form."""
    truth: dict[str, Any] = field(repr=False)
    """The whole ``truth.json`` (segments of every tag, noise, venue plan)."""

    def board(self, name: str) -> BoardTruth:
        for b in self.boards:
            if b.name == name:
                return b
        raise KeyError(name)


def load_venue(directory: str | Path) -> Venue:
    """
    Read ``truth.json`` of a simulator output directory.

    Raises:
        ConfigError: a missing file or field, named with the file.
    """
    d = Path(directory)
    path = d / "truth.json"
    try:
        truth = json.loads(path.read_text())
    except OSError as e:
        raise ConfigError(f"{path}: cannot read: {e.strerror or e}") from e
    except ValueError as e:
        raise ConfigError(f"{path}: not JSON: {e}") from e

    def need(obj: Any, key: str, where: str) -> Any:
        if not isinstance(obj, dict) or key not in obj:
            raise ConfigError(f"{path}: {where}{key}: is required")
        return obj[key]

    venue = need(truth, "venue", "")
    rooms = need(venue, "rooms", "venue.")
    floors = need(venue, "floors", "venue.")
    boards = []
    for name, b in sorted(need(truth, "boards", "").items()):
        where = f"boards.{name}."
        room = need(b, "room", where)
        info = need(rooms, room, "venue.rooms.")
        floor_idx = need(info, "floor", f"venue.rooms.{room}.")
        if not isinstance(floor_idx, int) or not 0 <= floor_idx < len(floors):
            raise ConfigError(f"{path}: venue.rooms.{room}.floor: must index venue.floors, got {floor_idx!r}")
        rec = d / need(b, "file", where)
        if not rec.exists():
            raise ConfigError(f"{path}: {where}file: {rec} does not exist")
        boards.append(
            BoardTruth(
                name=name,
                room=room,
                room_label=f"{room} {need(info, 'title', f'venue.rooms.{room}.')}",
                floor=str(floors[floor_idx]),
                recording=rec,
                boot=str(need(b, "boot", where)),
                skew_ppm=float(need(b, "skew_ppm", where)),
                uptime_at_start_s=float(need(b, "uptime_at_start_s", where)),
                wall_error_s=float(need(b, "wall_error_s", where)),
                true_offset_db=float(need(b, "true_offset_db", where)),
                power_off_at_s=b.get("power_off_at_s"),
                radio_hang_at_s=b.get("radio_hang_at_s"),
            )
        )
    tags_file = d / "tags.txt"
    if not tags_file.exists():
        raise ConfigError(f"{tags_file}: does not exist (the simulator writes it next to truth.json)")
    return Venue(
        directory=d,
        start_wall=float(need(truth, "start_wall", "")),
        duration_s=float(need(truth, "duration_s", "")),
        boards=tuple(boards),
        tags_file=tags_file,
        decode_rules=tuple(truth.get("decode_rules") or ()),
        truth=truth,
    )


# ---------------------------------------------------------------- clock and I/O bookkeeping


class TrackingClock:
    """
    A pass-through clock that knows which tasks sleep on it: the virtual-time driver's idle test.

    Every task that ever slept through this clock is a *user*; the fleet is idle when every user
    still running is sleeping here again (and no request is in flight).
    """

    def __init__(self, inner: Clock) -> None:
        self.inner = inner
        self._users: weakref.WeakSet[asyncio.Task[Any]] = weakref.WeakSet()
        self._sleeping: weakref.WeakSet[asyncio.Task[Any]] = weakref.WeakSet()

    @property
    def boot_id(self) -> str:
        return self.inner.boot_id

    def monotonic(self) -> float:
        return self.inner.monotonic()

    def monotonic_ns(self) -> int:
        return self.inner.monotonic_ns()

    def time(self) -> float:
        return self.inner.time()

    async def sleep(self, seconds: float) -> None:
        task = asyncio.current_task()
        if task is None:
            await self.inner.sleep(seconds)
            return
        self._users.add(task)
        self._sleeping.add(task)
        try:
            await self.inner.sleep(seconds)
        finally:
            self._sleeping.discard(task)

    def busy(self) -> list[str]:
        """Names of the clock's users that are running or waiting on something else than the clock."""
        return [t.get_name() for t in list(self._users) if not t.done() and t not in self._sleeping]


class InFlight:
    """Counts the HTTP requests of one `aiohttp.ClientSession` that have not been answered yet."""

    def __init__(self) -> None:
        self._tasks: dict[int, asyncio.Task[Any]] = {}
        self.trace = aiohttp.TraceConfig()
        self.trace.on_request_start.append(self._start)
        self.trace.on_request_end.append(self._end)
        self.trace.on_request_exception.append(self._end)

    async def _start(self, session: Any, ctx: Any, params: Any) -> None:
        task = asyncio.current_task()
        if task is not None:
            self._tasks[id(ctx)] = task

    async def _end(self, session: Any, ctx: Any, params: Any) -> None:
        self._tasks.pop(id(ctx), None)

    @property
    def count(self) -> int:
        """Requests still waiting for an answer (a cancelled requester no longer counts)."""
        for key in [k for k, t in self._tasks.items() if t.done()]:
            del self._tasks[key]
        return len(self._tasks)


# ---------------------------------------------------------------- replay paced by the board's own clock


class BoardTimeReplay:
    """
    A board's recording delivered when the board's clock reaches each advert's recorded time.

    The recording is read by the agent's own replay source (`listenpost.agent.sources.open_replay`, unpaced);
    this wrapper only holds each advert back until ``clock.monotonic()`` reaches its ``t`` rounded up
    to ``pace_s``. Pacing by absolute board time (not by time since start) keeps every virtual board
    aligned with the truth however late its agent started.
    """

    def __init__(self, paths: list[Path], clock: Clock, pace_s: float = PACE_S) -> None:
        from listenpost.agent.sources import open_replay

        if pace_s <= 0:
            raise ValueError(f"pace_s must be > 0, got {pace_s!r}")
        self.clock = clock
        self.pace_s = pace_s
        self.inner = open_replay(paths, clock, 0.0)
        self.count = 0
        """Adverts delivered so far."""

    async def adverts(self) -> AsyncIterator[Advert]:
        import math

        clock, q = self.clock, self.pace_s
        async for adv in self.inner.adverts():
            t = adv.t_mono_ns / 1e9
            wait = t - clock.monotonic()
            if wait > 0:
                # Sleep to the grain boundary after t; the small tolerance keeps float rounding of a
                # derived clock from pushing an advert one whole grain late.
                boundary = math.ceil(t / q - 1e-9) * q
                await clock.sleep(max(boundary - clock.monotonic(), 0.0))
            self.count += 1
            yield adv


# ---------------------------------------------------------------- the collector


@dataclass(slots=True)
class RunningCollector:
    """A collector app served on loopback by an `aiohttp.web.AppRunner`."""

    app: Any
    runner: Any
    url: str
    state_dir: Path
    admin_token: str

    async def close(self) -> None:
        await self.runner.cleanup()


def write_collector_yaml(state_dir: Path, venue: Venue, liveness: dict[str, Any] | None = None) -> Path:
    """
    The collector.yaml of a demo venue: its tag firmware's decode rule and any liveness overrides.

    Raises:
        ConfigError: the file cannot be written.
    """
    data: dict[str, Any] = {"decode": {"rules": [dict(r) for r in venue.decode_rules]}}
    if liveness:
        data["liveness"] = dict(liveness)
    path = state_dir / "collector.yaml"
    try:
        path.write_text(
            "# Written by the listenpost fleet runner for the simulated venue.\n"
            + yaml.safe_dump(data, sort_keys=False)
        )
    except OSError as e:
        raise ConfigError(f"{path}: cannot write: {e.strerror or e}") from e
    return path


async def start_collector(
    state_dir: Path, clock: Clock, *, config: Path | None = None, port: int = 0, store: Any = None
) -> RunningCollector:
    """
    Serve the collector on 127.0.0.1 (``port`` 0: a free port) with its SQLite store in ``state_dir``.

    Raises:
        ConfigError: a bad collector.yaml.
        FleetError: the port cannot be bound.
    """
    from aiohttp import web

    from listenpost.collector.app import create_app
    from listenpost.collector.config import load_settings
    from listenpost.collector.http.auth import read_admin_token

    settings = load_settings(config, state_dir=str(state_dir), host="127.0.0.1", port=port)
    app = create_app(settings, clock=clock, store=store)
    runner = web.AppRunner(app, access_log=None)
    await runner.setup()
    try:
        site = web.TCPSite(runner, "127.0.0.1", port)
        await site.start()
    except OSError as e:
        await runner.cleanup()
        raise FleetError(f"cannot listen on 127.0.0.1:{port}: {e.strerror or e}") from e
    host, bound = runner.addresses[0][:2]
    return RunningCollector(app, runner, f"http://{host}:{bound}", state_dir, read_admin_token(state_dir))


async def admin_call(
    session: aiohttp.ClientSession, url: str, token: str, method: str, path: str, body: Any = None
) -> Any:
    """One admin API call with a timeout; the JSON answer, or `FleetError` naming the status and message."""
    timeout = aiohttp.ClientTimeout(total=REQUEST_TIMEOUT_S)
    try:
        async with session.request(
            method, url + path, json=body, timeout=timeout, headers={"Authorization": f"Bearer {token}"}
        ) as resp:
            text = await resp.text()
            if resp.status >= 300:
                raise FleetError(f"{method} {path}: collector answered {resp.status}: {text[:200]}")
            return json.loads(text)
    except (aiohttp.ClientError, TimeoutError) as e:
        raise FleetError(f"{method} {path}: {type(e).__name__}: {e}") from e


# ---------------------------------------------------------------- one virtual board


class VirtualBoard:
    """One board: its derived clock, state directory, enrollment and agent task."""

    def __init__(
        self, truth: BoardTruth, base: Clock, recording_start: float, state_dir: Path, pace_s: float = PACE_S
    ) -> None:
        self.truth = truth
        self.state_dir = state_dir
        self.pace_s = pace_s
        # boot_at is where the board's monotonic clock read zero: uptime before the recording start.
        self.clock = DerivedClock(
            base,
            skew_ppm=truth.skew_ppm,
            boot_at=recording_start - truth.uptime_at_start_s,
            wall_error_s=truth.wall_error_s,
            boot_id=truth.boot,
        )
        self.cfg: Any = None
        self.service: Any = None
        self.source: BoardTimeReplay | None = None
        self.task: asyncio.Task[int] | None = None
        self.powered_off = False

    @property
    def name(self) -> str:
        return self.truth.name

    async def enroll(self, url: str, code: str, session: aiohttp.ClientSession) -> None:
        """The real enrollment: credential and agent.yaml in this board's state directory."""
        from listenpost.agent.client.enroll import EnrollStatus, enroll
        from listenpost.agent.config import load_agent_config

        result = await enroll(
            url,
            code,
            self.state_dir,
            clock=self.clock,
            session=session,
            attempts=2,
            backoff_s=1.0,
            fingerprint_data={"machine_id": f"virtual-{self.name}", "model": "listenpost virtual board"},
        )
        if result.status is not EnrollStatus.ENROLLED or result.config_path is None:
            raise FleetError(f"{self.name}: enrollment failed: {result.message}")
        self.cfg = load_agent_config(result.config_path)

    def start(self, session: aiohttp.ClientSession) -> None:
        """Run the agent on this board's recording until stopped or powered off."""
        from listenpost.agent.service import run_agent

        def keep(service: Any) -> None:
            self.service = service

        self.source = BoardTimeReplay([self.truth.recording], self.clock, self.pace_s)
        self.task = asyncio.create_task(
            run_agent(self.cfg, clock=self.clock, source=self.source, session=session, on_start=keep),
            name=f"agent:{self.name}",
        )

    async def power_off(self) -> None:
        """
        A power cut: the agent task is cancelled where it stands. Nothing is drained or sent after it.

        (The service's cancellation path still closes its spool file, which seals what was in memory
        into the on-board spool; nothing of it reaches the collector, which is what a cut looks like
        from the collector's side.)
        """
        self.powered_off = True
        if self.task is not None and not self.task.done():
            self.task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self.task

    async def stop(self) -> None:
        """A clean stop (end of the run), as SIGTERM would do."""
        if self.task is None or self.task.done():
            return
        if self.service is not None:
            self.service.request_stop()
        try:
            await asyncio.wait_for(asyncio.shield(self.task), timeout=REQUEST_TIMEOUT_S * 3)
        except TimeoutError:
            self.task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self.task


# ---------------------------------------------------------------- the fleet


@dataclass(frozen=True, slots=True)
class BoardSummary:
    """One board at the end of a run: what the collector concluded, beside the truth."""

    name: str
    room: str
    state: str
    expected_state: str
    readings_stored: int
    skew_est_ppm: float | None
    skew_true_ppm: float
    offset_est_s: float | None
    """Collector time − board monotonic time at ``offset_at_board_s``, as the collector's clock fit says."""
    offset_true_s: float | None
    """The same, true (from the board's derived clock)."""
    offset_error_ms: float | None
    offset_at_board_s: float | None
    """Board monotonic seconds where the offset is compared: the newest clock exchange the fit kept."""
    wall_error_est_s: float | None
    """The collector's estimate of the board's wall-clock error, seconds."""
    wall_error_true_s: float
    state_reason: str | None

    @property
    def skew_error_ppm(self) -> float | None:
        return None if self.skew_est_ppm is None else self.skew_est_ppm - self.skew_true_ppm

    def to_json(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "room": self.room,
            "state": self.state,
            "expected_state": self.expected_state,
            "readings_stored": self.readings_stored,
            "skew_est_ppm": self.skew_est_ppm,
            "skew_true_ppm": self.skew_true_ppm,
            "skew_error_ppm": self.skew_error_ppm,
            "offset_est_s": self.offset_est_s,
            "offset_true_s": self.offset_true_s,
            "offset_error_ms": self.offset_error_ms,
            "offset_at_board_s": self.offset_at_board_s,
            "wall_error_est_s": self.wall_error_est_s,
            "wall_error_true_s": self.wall_error_true_s,
            "state_reason": self.state_reason,
        }


def expected_state(truth: BoardTruth, skew_tolerance_ppm: float) -> str:
    """The state the collector should end on for this board, from the faults the simulator put in."""
    if truth.power_off_at_s is not None:
        return "silent"
    if truth.radio_hang_at_s is not None:
        return "deaf"
    if abs(truth.skew_ppm) > skew_tolerance_ppm:
        return "drifting"
    return "live"


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
        venue: Venue,
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


__all__ = [
    "BoardSummary",
    "BoardTimeReplay",
    "BoardTruth",
    "Fleet",
    "FleetError",
    "InFlight",
    "RunningCollector",
    "TrackingClock",
    "Venue",
    "VirtualBoard",
    "admin_call",
    "expected_state",
    "load_venue",
    "start_collector",
    "write_collector_yaml",
]
