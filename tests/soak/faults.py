"""
The soak's faults, one function each, every one returning a `Row` of the table.

Readings expected come from the simulator's recordings through ``agent replay --dry-run`` (one
reading per registered advert, exactly what a board sends); each agent start is a boot of its own
that replays the recording from its beginning, so a killed boot is expected up to the point its
replay had reached, estimated from when it started and the replay speed.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import json
import random
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import aiohttp

from tests.soak.harness import (
    STOP_TIMEOUT_S,
    Board,
    Collector,
    PrivatePostgres,
    Reading,
    Tally,
    boots_in_order,
    count_readings,
    gz_body,
    leading_now,
    make_board,
    register,
    stored,
    tally_boot,
)

FLUSH_S = 5.0
"""agent.flush_seconds the collector tells every board (the default): the unsealed RAM window."""


@dataclass
class Params:
    kills: int
    speed: float
    """Replay speed of the agents (recording seconds per real second)."""
    outage_s: float
    disk_full_s: float
    load_boards: int
    load_s: float
    load_period_s: float
    load_readings: int
    drain_timeout_s: float


FULL = Params(
    kills=5,
    speed=6.0,
    outage_s=120.0,
    disk_full_s=30.0,
    load_boards=500,
    load_s=180.0,
    load_period_s=5.0,
    load_readings=40,
    drain_timeout_s=240.0,
)
QUICK = Params(
    kills=2,
    speed=8.0,
    outage_s=15.0,
    disk_full_s=8.0,
    load_boards=50,
    load_s=20.0,
    load_period_s=5.0,
    load_readings=40,
    drain_timeout_s=120.0,
)


@dataclass
class Ctx:
    root: Path
    params: Params
    rng: random.Random
    venue: Path
    rules: list[dict[str, Any]]
    tags: list[str]
    truth: dict[str, list[Reading]]
    recording_s: float
    pg: PrivatePostgres | None = None
    pg_problem: str = ""


@dataclass
class Row:
    fault: str
    window: str
    expected: int = 0
    stored: int = 0
    duplicates: int = 0
    http_500: int = 0
    recover_s: str = "-"
    leaders_max: int = 0
    stopped_in_time: str = "-"
    ok: bool | None = False
    """None: not run."""
    fired: str = ""
    """Evidence that the fault took effect; empty when none was seen (the row then fails)."""
    failures: list[str] = field(default_factory=list)
    """Row-specific promises broken (each also a note)."""
    notes: list[str] = field(default_factory=list)


# ---------------------------------------------------------------- one scene: collectors, boards, a sampler


class Scene:
    def __init__(self, ctx: Ctx, label: str, backend: str, boards: list[str], n_collectors: int = 1) -> None:
        self.ctx = ctx
        self.label = label
        self.backend = backend
        self.work = ctx.root / label
        self.work.mkdir(parents=True)
        self.board_names = boards
        self.n_collectors = n_collectors
        self.collectors: list[Collector] = []
        self.boards: dict[str, Board] = {}
        self.db = ""
        self.leaders_max = 0
        self.deaths: list[str] = []
        """Processes that ended without being told to: a failure of the row."""
        self.notes: list[str] = []
        self.ended: dict[int, float] = {}
        """Agent PID -> when its process ended (killed, or found dead by the sampler)."""
        self._sampler: asyncio.Task[None] | None = None

    async def open(self, *, start_agents: bool = True) -> None:
        db_arg = None
        if self.backend == "postgres":
            assert self.ctx.pg is not None
            db_arg = await self.ctx.pg.create_database(self.label.replace("-", "_"))
            self.db = db_arg
        for i in range(self.n_collectors):
            self.collectors.append(Collector(self.work, f"c{i}", db_arg, self.ctx.rules))
        if self.backend == "sqlite":
            self.db = f"sqlite:///{self.collectors[0].state_dir / 'collector.sqlite'}"
        for c in self.collectors:
            c.start()
        for c in self.collectors:
            await c.wait_listening()
        tokens = await register(self.collectors[0], self.ctx.tags, self.board_names)
        for name in self.board_names:
            self.boards[name] = make_board(
                self.work,
                name,
                self.ctx.venue / f"{name}.jsonl.gz",
                tokens[name],
                self.collectors[0].url,
                self.ctx.venue / "tags.txt",
                self.ctx.rules,
                self.ctx.params.speed,
            )
        self._sampler = asyncio.create_task(self._sample())
        if start_agents:
            for b in self.boards.values():
                b.start()

    async def _sample(self) -> None:
        while True:
            self.leaders_max = max(self.leaders_max, leading_now(self.collectors))
            for b in self.boards.values():
                p = b.proc
                if p is not None and not p.alive() and p.pid not in self.ended:
                    self.ended[p.pid] = time.time()
                    self.deaths.append(f"agent {b.name} exited with {p.popen.returncode}")
            for c in self.collectors:
                q = c.proc
                if q is not None and not q.alive() and q.pid not in c.told_to_end:
                    c.told_to_end.add(q.pid)
                    self.deaths.append(f"collector {c.name} exited with {q.popen.returncode}")
            await asyncio.sleep(0.25)

    def kill_agent(self, b: Board) -> None:
        assert b.proc is not None
        self.ended[b.proc.pid] = time.time()
        b.kill9()

    async def wait_count_above(self, n: int, bound_s: float, done_at: int | None = None) -> float | None:
        """
        Seconds until more than ``n`` readings are stored (or ``done_at``: nothing was left to send),
        or None when the bound ran out.
        """
        t0 = time.monotonic()
        while time.monotonic() - t0 < bound_s:
            now = await count_readings(self.db)
            if now > n or (done_at is not None and now >= done_at):
                return time.monotonic() - t0
            await asyncio.sleep(0.25)
        return None

    async def wait_count(self, target: int, bound_s: float) -> float | None:
        t0 = time.monotonic()
        while time.monotonic() - t0 < bound_s:
            if await count_readings(self.db) >= target:
                return time.monotonic() - t0
            await asyncio.sleep(0.5)
        return None

    async def wait_quiet(self, quiet_s: float, bound_s: float) -> None:
        """Until the stored count has not moved for ``quiet_s`` (bounded by ``bound_s``)."""
        t0 = time.monotonic()
        last, since = -2, time.monotonic()
        while time.monotonic() - t0 < bound_s:
            n = await count_readings(self.db)
            if n != last:
                last, since = n, time.monotonic()
            elif time.monotonic() - since >= quiet_s:
                return
            await asyncio.sleep(0.5)

    def expected_total(self) -> int:
        return sum(len(self.ctx.truth[b]) for b in self.board_names)

    async def close(self) -> tuple[list[bool], Counter[int]]:
        if self._sampler is not None:
            self._sampler.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._sampler
        for b in self.boards.values():
            b.stop()
        for c in self.collectors:
            c.stop()
        stops = [s for b in self.boards.values() for s in b.stops] + [
            s for c in self.collectors for s in c.stops
        ]
        statuses: Counter[int] = Counter()
        for c in self.collectors:
            statuses.update(c.statuses())
        return stops, statuses

    async def tally(self) -> Tally:
        """Every board, every boot: stored readings against the dry run (killed boots up to their cut)."""
        total = Tally()
        window_ms = int(self.ctx.params.speed * (FLUSH_S + 1.0) * 1000)
        for name, b in self.boards.items():
            truth = self.ctx.truth[name]
            rows = await stored(self.db, name)
            by_boot: dict[str, list[Reading]] = {}
            for boot, tag, t, r in rows:
                by_boot.setdefault(boot, []).append((tag, t, r))
            first = dict(await boots_in_order(self.db, name))
            if len(set(by_boot) | set(first)) != len(b.procs):
                self.notes.append(
                    f"{name}: {len(set(by_boot) | set(first))} boots seen for {len(b.procs)} agent starts"
                )
            t0_ms = min(t for _, t, _ in truth)
            for boot in set(by_boot) | set(first):
                # the agent process whose lifetime holds the boot's first heartbeat (same machine clock)
                at = first.get(boot)
                p = None
                if at is not None:
                    for cand in b.procs:
                        if cand.started_at - 1 <= at <= self.ended.get(cand.pid, float("inf")) + 1:
                            p = cand
                cut: int | None = None
                if p is not None and p.pid in self.ended:
                    started = [d["_seen"] for d in p.events("agent_started")]
                    ran = self.ended[p.pid] - started[0] if started else 0.0
                    cut = t0_ms + int(ran * self.ctx.params.speed * 1000) if started else t0_ms - 1
                total.add(tally_boot(truth, by_boot.get(boot, []), cut_ms=cut, window_ms=window_ms))
        return total


def finish_row(row: Row, t: Tally, stops: list[bool], statuses: Counter[int], scene: Scene) -> Row:
    row.expected, row.stored, row.duplicates = t.expected, t.stored, t.duplicates
    row.http_500 = statuses.get(500, 0)
    row.leaders_max = scene.leaders_max
    row.stopped_in_time = f"{'yes' if all(stops) else 'no'} ({sum(stops)}/{len(stops)})"
    other5 = {s: n for s, n in statuses.items() if s >= 500 and s != 500}
    if other5:
        row.notes.append("other 5xx: " + ", ".join(f"{s}×{n}" for s, n in sorted(other5.items())))
    if t.invented:
        row.notes.append(f"{t.invented} stored readings no board was given")
    if t.holes:
        row.notes.append(f"{t.holes} sealed readings missing (before a boot's last stored one)")
    if t.lost_in_window:
        row.notes.append(
            f"{t.lost_in_window:,} readings lost unsealed at the kills, inside the window (not counted as expected)"
        )
    if t.lost_outside_window:
        row.notes.append(f"{t.lost_outside_window} missing outside any lossy window")
    row.notes += row.failures + scene.deaths + scene.notes
    if row.fired:
        row.notes.insert(0, "fault seen: " + row.fired)
    else:
        row.notes.insert(0, "the fault left no trace (did it fire?)")
    if row.recover_s.startswith(">"):
        row.notes.append("did not recover within the bound")
    row.ok = (
        not row.recover_s.startswith(">")
        and t.duplicates == 0
        and t.invented == 0
        and t.holes == 0
        and t.lost_outside_window == 0
        and row.http_500 == 0
        and row.leaders_max <= 1
        and all(stops)
        and not scene.deaths
        and not row.failures
        and bool(row.fired)
    )
    return row


def fmt_s(v: float | None, bound: float) -> str:
    return f">{bound:.0f} s" if v is None else f"{v:.1f} s"


def worst(values: list[float | None], bound: float) -> str:
    if any(v is None for v in values):
        return f">{bound:.0f} s"
    return f"{max(values):.1f} s" if values else "-"  # type: ignore[type-var]


async def wait_event(b: Board, name: str, bound_s: float) -> dict[str, Any] | None:
    t0 = time.monotonic()
    while time.monotonic() - t0 < bound_s:
        p = b.proc
        if p is not None:
            ev = p.events(name)
            if ev:
                return ev[0]
            if not p.alive():
                return None
        await asyncio.sleep(0.1)
    return None


async def run_scene(ctx: Ctx, row: Row, scene: Scene, body: Any) -> Row:
    """Open the scene, run the fault, drain, close and fill the row; a broken harness step is a note."""
    try:
        await scene.open()
        await body(scene, row)
    except Exception as e:  # noqa: BLE001 - the row records the failure and the soak goes on
        row.notes.append(f"harness: {type(e).__name__}: {e}")
        row.ok = None  # type: ignore[assignment]
    finally:
        stops, statuses = await scene.close()
    try:
        t = await scene.tally()
    except Exception as e:  # noqa: BLE001
        row.notes.append(f"tally failed: {type(e).__name__}: {e}")
        row.ok = False
        return row
    failed_harness = row.ok is None
    finish_row(row, t, stops, statuses, scene)
    if failed_harness:
        row.ok = False
    return row


# ---------------------------------------------------------------- the faults


async def agent_kill_loop(ctx: Ctx, backend: str) -> Row:
    p = ctx.params
    window = FLUSH_S * p.speed
    row = Row(
        f"agent SIGKILL ×{p.kills} ({backend})",
        f"unsealed RAM per kill: ≤ flush {FLUSH_S:.0f} s (= {window:.0f} s of recording at ×{p.speed:g})",
    )

    async def body(scene: Scene, row: Row) -> None:
        (b,) = scene.boards.values()
        recover: list[float | None] = []
        for _ in range(p.kills):
            if await wait_event(b, "agent_started", 60) is None:
                raise RuntimeError("agent did not start within 60 s")
            await asyncio.sleep(ctx.rng.uniform(3.0, 8.0))
            before = await count_readings(scene.db)
            scene.kill_agent(b)
            b.start()
            recover.append(await scene.wait_count_above(before, 60))
        row.recover_s = worst(recover, 60)
        row.fired = f"{sum(q.popen.returncode == -9 for q in b.procs)} agents ended by SIGKILL"
        # the last boot plays the whole recording; then everything it sealed must arrive
        if await wait_event(b, "source_ended", ctx.recording_s / p.speed + 60) is None:
            raise RuntimeError("the last boot did not finish its replay")
        await scene.wait_quiet(FLUSH_S + 5, p.drain_timeout_s)

    return await run_scene(ctx, row, Scene(ctx, f"agent-kill-{backend}", backend, ["g3-a"]), body)


async def collector_kill_loop(ctx: Ctx, backend: str) -> Row:
    p = ctx.params
    row = Row(f"collector SIGKILL ×{p.kills} ({backend})", "none: 200 only after a durable commit")

    async def body(scene: Scene, row: Row) -> None:
        (c,) = scene.collectors
        if await scene.wait_count_above(0, 60) is None:
            raise RuntimeError("nothing stored within 60 s")
        recover: list[float | None] = []
        for _ in range(p.kills):
            await asyncio.sleep(ctx.rng.uniform(2.0, 5.0))
            before = await count_readings(scene.db)
            c.kill9()
            await asyncio.sleep(ctx.rng.uniform(0.5, 2.0))
            c.start()
            recover.append(await scene.wait_count_above(before, 90, scene.expected_total()))
        row.recover_s = worst(recover, 90)
        row.fired = f"{sum(q.popen.returncode == -9 for q in c.procs)} collectors ended by SIGKILL"
        if await scene.wait_count(scene.expected_total(), p.drain_timeout_s) is None:
            row.notes.append(f"not drained within {p.drain_timeout_s:.0f} s")

    return await run_scene(ctx, row, Scene(ctx, f"collector-kill-{backend}", backend, ["g3-a", "g0-a"]), body)


async def pg_restart(ctx: Ctx) -> Row:
    p = ctx.params
    row = Row("PostgreSQL restart under load", "none: boards retry 503 and keep their batches")

    async def body(scene: Scene, row: Row) -> None:
        assert ctx.pg is not None
        if await scene.wait_count_above(0, 60) is None:
            raise RuntimeError("nothing stored within 60 s")
        await asyncio.sleep(3)
        await asyncio.to_thread(ctx.pg.stop_server)
        await asyncio.sleep(5)
        await asyncio.to_thread(ctx.pg.start)
        before = await count_readings(scene.db)
        row.recover_s = fmt_s(await scene.wait_count_above(before, 90, scene.expected_total()), 90)
        if await scene.wait_count(scene.expected_total(), p.drain_timeout_s) is None:
            row.notes.append(f"not drained within {p.drain_timeout_s:.0f} s")
        (c,) = scene.collectors
        unavailable = c.statuses().get(503, 0)
        row.fired = f"{unavailable} answers 503 while the database was down" if unavailable else ""

    return await run_scene(ctx, row, Scene(ctx, "pg-restart", "postgres", ["g3-a", "g0-a"]), body)


async def leader_lock_killed(ctx: Ctx) -> Row:
    p = ctx.params
    row = Row("leader's lock connection killed, 2 collectors (PostgreSQL)", "none")

    async def lock_holders(db: str) -> list[int]:
        import asyncpg

        con = await asyncpg.connect(db, timeout=10)
        try:
            rows = await con.fetch(
                "SELECT pid FROM pg_locks WHERE locktype = 'advisory' AND granted "
                "AND database = (SELECT oid FROM pg_database WHERE datname = current_database())"
            )
            return [r["pid"] for r in rows]
        finally:
            await con.close()

    async def body(scene: Scene, row: Row) -> None:
        t0 = time.monotonic()
        while not await lock_holders(scene.db):
            if time.monotonic() - t0 > 30:
                raise RuntimeError("no collector took the monitor lock within 30 s")
            await asyncio.sleep(0.25)
        recover: list[float | None] = []
        for _ in range(max(1, p.kills // 2)):
            (pid, *_) = await lock_holders(scene.db)
            import asyncpg

            con = await asyncpg.connect(scene.db, timeout=10)
            try:
                await con.fetchval("SELECT pg_terminate_backend($1)", pid)
            finally:
                await con.close()
            t0 = time.monotonic()
            got: float | None = None
            while time.monotonic() - t0 < 60:
                holders = await lock_holders(scene.db)
                if holders and pid not in holders:
                    got = time.monotonic() - t0
                    break
                await asyncio.sleep(0.25)
            recover.append(got)
            await asyncio.sleep(12)  # several monitor rounds: a second leader would show here
        row.recover_s = worst(recover, 60)
        if await scene.wait_count(scene.expected_total(), p.drain_timeout_s) is None:
            row.notes.append(f"not drained within {p.drain_timeout_s:.0f} s")
        took = {c.name: len(c.proc.events("monitor_leading")) for c in scene.collectors if c.proc is not None}
        down = sum(
            len(c.proc.events("monitor_standing_down")) for c in scene.collectors if c.proc is not None
        )
        if sum(took.values()) > 1:
            row.fired = (
                f"{len(recover)} lock sessions terminated; monitor_leading lines per collector {took}, "
                f"stand-downs {down}"
            )

    return await run_scene(ctx, row, Scene(ctx, "leader-lock", "postgres", ["g3-a"], n_collectors=2), body)


async def agent_disk_full(ctx: Ctx) -> Row:
    p = ctx.params
    row = Row(
        f"agent state disk full {p.disk_full_s:.0f} s (sqlite)",
        "none while RAM holds the readings (50 000 cap)",
    )

    async def body(scene: Scene, row: Row) -> None:
        (b,) = scene.boards.values()
        if await scene.wait_count_above(0, 60) is None:
            raise RuntimeError("nothing stored within 60 s")
        assert b.proc is not None
        b.proc.set_fsize_limit(4096)  # every write past the first page fails with EFBIG
        full_from = await count_readings(scene.db)
        await asyncio.sleep(p.disk_full_s)
        # docs/reliability.md §1: while storage fails the uplink sends sealed memory batches from RAM
        during = await count_readings(scene.db) - full_from
        row.notes.append(f"{during:,} readings stored while the agent's disk was full")
        if during <= 0:
            row.failures.append("nothing delivered while the disk was full")
        degraded = [d for d in b.proc.events() if d.get("level") in ("error", "warning")]
        if degraded:
            row.fired = "agent logged " + ", ".join(sorted({str(d.get("event")) for d in degraded}))
        if b.proc.alive():
            b.proc.set_fsize_limit(None)
            before = await count_readings(scene.db)
            row.recover_s = fmt_s(await scene.wait_count_above(before, 90, scene.expected_total()), 90)
        else:
            row.notes.append("agent died while its disk was full; restarted")
            b.start()
            row.recover_s = "restart"
        if await wait_event(b, "source_ended", ctx.recording_s / p.speed + 60) is None:
            raise RuntimeError("the agent did not finish its replay")
        await scene.wait_quiet(FLUSH_S + 5, p.drain_timeout_s)

    return await run_scene(ctx, row, Scene(ctx, "agent-disk-full", "sqlite", ["g3-a"]), body)


async def collector_disk_full(ctx: Ctx) -> Row:
    p = ctx.params
    row = Row(f"collector disk full {p.disk_full_s:.0f} s (sqlite)", "none: 503, boards keep their batches")

    async def body(scene: Scene, row: Row) -> None:
        (c,) = scene.collectors
        if await scene.wait_count_above(0, 60) is None:
            raise RuntimeError("nothing stored within 60 s")
        assert c.proc is not None
        c.proc.set_fsize_limit(4096)
        await asyncio.sleep(p.disk_full_s)
        if c.proc.alive():
            c.proc.set_fsize_limit(None)
        else:
            row.notes.append("collector died while its disk was full; restarted")
            c.start()
            await c.wait_listening()
        before = await count_readings(scene.db)
        row.recover_s = fmt_s(await scene.wait_count_above(before, 90, scene.expected_total()), 90)
        if await scene.wait_count(scene.expected_total(), p.drain_timeout_s) is None:
            row.notes.append(f"not drained within {p.drain_timeout_s:.0f} s")
        unavailable = c.statuses().get(503, 0)
        row.fired = f"{unavailable} answers 503 while full" if unavailable else ""

    return await run_scene(ctx, row, Scene(ctx, "collector-disk-full", "sqlite", ["g3-a", "g0-a"]), body)


async def collector_outage(ctx: Ctx) -> Row:
    p = ctx.params
    row = Row(
        f"collector outage {p.outage_s:.0f} s (sqlite)", "none: boards spool (64 MiB bound not reached)"
    )

    async def body(scene: Scene, row: Row) -> None:
        (c,) = scene.collectors
        if await scene.wait_count_above(0, 60) is None:
            raise RuntimeError("nothing stored within 60 s")
        await asyncio.sleep(2)
        c.stop()
        await asyncio.sleep(p.outage_s)
        c.start()
        await c.wait_listening()
        t = await scene.wait_count(scene.expected_total(), p.drain_timeout_s)
        row.recover_s = fmt_s(t, p.drain_timeout_s) + " (all stored)"
        failed = sum(len(b.proc.events("batch_send_failed")) for b in scene.boards.values() if b.proc)
        row.fired = f"{failed} failed sends while down" if failed else ""
        if t is None:
            row.notes.append(f"not drained within {p.drain_timeout_s:.0f} s")

    return await run_scene(ctx, row, Scene(ctx, "outage", "sqlite", ["g3-a", "g0-a"]), body)


async def many_boards(ctx: Ctx) -> Row:
    """Simulated boards posting sealed batches on their own period (bench/ingest_http.py's workload)."""
    from bench.ingest_http import make_workload
    from bench.ingest_store import make_tags
    from listenpost.core import wire

    p = ctx.params
    n_batches = int(p.load_s / p.load_period_s)
    row = Row(
        f"{p.load_boards} boards for {p.load_s / 60:g} min (sqlite)"
        if p.load_s >= 60
        else f"{p.load_boards} boards for {p.load_s:.0f} s (sqlite)",
        "none: 429/503 are retried after Retry-After",
    )
    scene = Scene(ctx, "many-boards", "sqlite", [])
    per_board = make_workload(p.load_boards, n_batches, p.load_readings)
    names = [bodies[0]["board"] for bodies in per_board]
    codes: Counter[int] = Counter()
    errors: Counter[str] = Counter()
    refused: Counter[str] = Counter()
    acked_at: list[float] = []
    try:
        await scene.open(start_agents=False)
        (c,) = scene.collectors
        tokens = await register(c, make_tags(), names)
        conn = aiohttp.TCPConnector(limit=0)
        async with aiohttp.ClientSession(connector=conn, timeout=aiohttp.ClientTimeout(total=10)) as s:
            t0 = time.monotonic() + 2.0

            async def board(name: str, bodies: list[dict[str, Any]]) -> None:
                headers = {
                    "Authorization": "Bearer " + tokens[name],
                    "Content-Encoding": "gzip",
                    "Content-Type": "application/json",
                }
                phase = ctx.rng.uniform(0, p.load_period_s)
                # a board clock on which every reading is already in the past (as bench/ingest_http.py does)
                last_s, born = bodies[-1]["last_t_ms"] / 1000, time.monotonic()
                for seq, body in enumerate(bodies):
                    await asyncio.sleep(max(0.0, t0 + phase + seq * p.load_period_s - time.monotonic()))
                    deadline = time.monotonic() + p.drain_timeout_s
                    while time.monotonic() < deadline:
                        wait = 1.0
                        data = gzip.compress(
                            wire.encode_batch(
                                board=name,
                                boot=body["boot"],
                                epoch=body["epoch"],
                                seq=body["seq"],
                                digest=body["digest"],
                                t1=last_s + 1.0 + time.monotonic() - born,
                                clock=None,
                                content=body["content_json"],
                            ),
                            compresslevel=6,
                        )
                        try:
                            async with s.post(c.url + "/v1/batches", data=data, headers=headers) as r:
                                codes[r.status] += 1
                                if r.status == 200:
                                    acked_at.append(time.monotonic())
                                    break
                                if 400 <= r.status < 500 and r.status != 429:
                                    refused[f"{r.status} {(await r.text())[:160]}"] += 1
                                    break  # a refused batch is a dead letter on a board: never sent again
                                wait = float(r.headers.get("Retry-After", "1"))
                        except (aiohttp.ClientError, TimeoutError) as e:
                            errors[type(e).__name__] += 1
                        await asyncio.sleep(min(wait, 60.0) * ctx.rng.uniform(1.0, 1.5))
                    else:
                        errors["gave up"] += 1

            await asyncio.gather(*(board(n, b) for n, b in zip(names, per_board, strict=True)))
        end = t0 + p.load_period_s * n_batches
        row.recover_s = f"{max(0.0, max(acked_at, default=end) - end):.1f} s (last ack after load)"
        row.fired = f"{sum(codes.values())} batch posts from {len(names)} boards"
    except Exception as e:  # noqa: BLE001
        row.notes.append(f"harness: {type(e).__name__}: {e}")
    stops, statuses = await scene.close()
    want: Counter[tuple[str, str, int, int]] = Counter()
    for bodies in per_board:
        for body in bodies:
            dc = wire.decode_content(body["content"])
            want.update(
                (body["board"], tag, int(t), int(r))
                for tag, t, r in zip(dc.tags, dc.t_ms, dc.rssi_dd, strict=True)
            )
    have: Counter[tuple[str, str, int, int]] = Counter()
    for name in names:
        have.update((name, tag, t, r) for _, tag, t, r in await stored(scene.db, name))
    t = Tally(expected=sum(want.values()), stored=sum(have.values()))
    for k, n in have.items():
        if k in want:
            t.duplicates += max(0, n - want[k])
        else:
            t.invented += n
    missing = sum(max(0, n - have[k]) for k, n in want.items())
    t.lost_outside_window = missing
    finish_row(row, t, stops, statuses, scene)
    row.notes.append(
        "answers "
        + ", ".join(f"{k}×{v}" for k, v in sorted(codes.items()))
        + (("; client errors " + ", ".join(f"{k}×{v}" for k, v in errors.items())) if errors else "")
        + (("; refused " + ", ".join(f"{k}×{v}" for k, v in refused.items())) if refused else "")
    )
    return row


def hostile_bodies(tag: str) -> list[tuple[str, bytes, dict[str, str]]]:
    """(what, body, extra headers): requests a board must never be able to turn into a 500 or a stored row."""
    import uuid

    from listenpost.core import wire
    from listenpost.core.records import Reading

    def content(tags: list[str]) -> dict[str, Any]:
        c = wire.encode_content(
            [Reading(tag, 50_000_000_000, -60.0), Reading(tag, 50_001_000_000, -61.0)],
            boot="hostile",
            offset_db=0.0,
        )
        c["readings"]["tags"] = tags
        return c

    def batch(c: Any, **env: Any) -> dict[str, Any]:
        head = {"v": 1, "board": "x0", "boot": str(uuid.uuid4()), "epoch": "00112233aabbccdd", "seq": 0}
        head |= {"clock": None, "t1": 60.0, "digest": "0" * 64, **env}
        with contextlib.suppress(ValueError, TypeError):
            head["digest"] = wire.digest(c)
        return {**head, "content": c}

    def js(obj: Any) -> bytes:
        return json.dumps(obj, allow_nan=True).encode("utf-8", "surrogatepass")

    nul = content([tag, tag[:8] + "\x00" + tag[9:]])
    nan = content([tag, tag])
    nan["readings"]["rssi_dd"] = [float("nan"), 1]
    gz = {"Content-Encoding": "gzip"}
    return [
        ("NUL in a tag", js(batch(nul)), {}),
        ("NaN RSSI", js(batch(nan)), {}),
        ("deep nesting", b"[" * 100_000 + b"]" * 100_000, {}),
        ("lone surrogate", js(batch(content([tag, "ibeacon:\ud800"]))), {}),
        ("tag outside the grammar", js(batch(content([tag, "ibeacon:zz"]))), {}),
        ("wrong digest", js({**batch(content([tag, tag])), "digest": "f" * 64}), {}),
        ("seq 10**30", js(batch(content([tag, tag]), seq=10**30)), {}),
        ("negative t1", js(batch(content([tag, tag]), t1=-5.0)), {}),
        ("invalid UTF-8", b'{"v": 1, "board": "\xff\xfe"}', {}),
        ("not gzip", b"garbage" * 10, gz),
        ("gzip bomb", gzip.compress(b"0" * 40_000_000, 9), gz),
        ("unknown encoding", b"{}", {"Content-Encoding": "br"}),
        ("truncated JSON", js(batch(content([tag, tag])))[:-40], {}),
    ]


async def hostile_input(ctx: Ctx) -> Row:
    """A poison batch and hostile bodies from one board while the agents and a burst of good batches are stored."""
    import uuid

    from listenpost.core import wire
    from listenpost.core.records import Reading

    p = ctx.params
    row = Row("poison batch and hostile input (sqlite)", "none: each refused alone with a 4xx")
    burst, per = 100, 20
    tag = ctx.tags[0]
    good_truth: list[Reading] = []
    accepted: list[int] = []

    async def body(scene: Scene, row: Row) -> None:
        (c,) = scene.collectors
        tokens = await register(c, ctx.tags, ["x0", "x1"])
        if await scene.wait_count_above(0, 60) is None:
            raise RuntimeError("nothing stored within 60 s")
        boot = str(uuid.uuid4())
        goods = []
        for seq in range(burst):
            rs = [
                Reading(ctx.tags[i % len(ctx.tags)], (1000 + seq * per + i) * 1_000_000, -70.0)
                for i in range(per)
            ]
            good_truth.extend((r.tag, r.t_mono_ns // 1_000_000, -700) for r in rs)
            content = wire.encode_content(rs, boot=boot, offset_db=0.0)
            head = {
                "v": 1,
                "board": "x1",
                "boot": boot,
                "epoch": "0123456789abcdef",
                "seq": seq,
                "clock": None,
            }
            goods.append(
                gz_body(
                    {
                        **head,
                        "t1": 1000.0 + (seq + 1) * per,
                        "digest": wire.digest(content),
                        "content": content,
                    }
                )
            )
        hostile = hostile_bodies(tag)
        answers: Counter[str] = Counter()
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=30)) as s:

            async def post(board: str, data: bytes, extra: dict[str, str], what: str) -> None:
                headers = {
                    "Authorization": "Bearer " + tokens[board],
                    "Content-Type": "application/json",
                    **extra,
                }
                async with s.post(c.url + "/v1/batches", data=data, headers=headers) as r:
                    answers[f"{what}: {r.status}"] += 1

            gz = {"Content-Encoding": "gzip"}
            jobs = [post("x1", g, gz, "good") for g in goods]
            for i, (what, data, extra) in enumerate(hostile * 3):
                jobs.insert((i * 7) % len(jobs), post("x0", data, extra, what))
            await asyncio.gather(*jobs)
        bad = {
            k: n
            for k, n in answers.items()
            if not k.startswith("good") and not k.split(": ")[1].startswith("4")
        }
        good_ok = answers.get("good: 200", 0)
        row.fired = f"{sum(answers.values()) - good_ok} hostile posts among {burst} good ones"
        row.notes.append(
            "hostile answers: "
            + ", ".join(sorted({k.split(": ")[1] for k in answers if not k.startswith("good")}))
        )
        if bad:
            row.notes.append(
                "not refused with a 4xx: " + ", ".join(f"{k}×{n}" for k, n in sorted(bad.items()))
            )
            accepted.append(sum(bad.values()))
        if good_ok != burst:
            row.notes.append(
                f"good batches: {dict((k, n) for k, n in answers.items() if k.startswith('good'))}"
            )
        if await scene.wait_count(scene.expected_total() + len(good_truth), p.drain_timeout_s) is None:
            row.notes.append(f"not drained within {p.drain_timeout_s:.0f} s")

    scene = Scene(ctx, "hostile", "sqlite", ["g3-a", "g0-a"])
    row = await run_scene(ctx, row, scene, body)
    # the burst board and the hostile board, against what was sent
    have = Counter((tag, t, r) for _, tag, t, r in await stored(scene.db, "x1"))
    want = Counter(good_truth)
    row.expected += sum(want.values())
    row.stored += sum(have.values())
    row.duplicates += sum(max(0, n - want[k]) for k, n in have.items() if k in want)
    strays = len(await stored(scene.db, "x0")) + sum(n for k, n in have.items() if k not in want)
    missing = sum(max(0, n - have[k]) for k, n in want.items())
    if strays or missing:
        row.notes.append(f"{strays} readings stored from hostile bodies, {missing} good ones missing")
    if strays or missing or accepted:
        row.ok = False
    return row


def all_faults(ctx: Ctx) -> list[tuple[str, Any]]:
    """(name, coroutine factory) in running order; names are what --only takes."""
    return [
        ("agent-kill-sqlite", lambda: agent_kill_loop(ctx, "sqlite")),
        ("collector-kill-sqlite", lambda: collector_kill_loop(ctx, "sqlite")),
        ("agent-kill-postgres", lambda: agent_kill_loop(ctx, "postgres")),
        ("collector-kill-postgres", lambda: collector_kill_loop(ctx, "postgres")),
        ("pg-restart", lambda: pg_restart(ctx)),
        ("leader-lock", lambda: leader_lock_killed(ctx)),
        ("agent-disk-full", lambda: agent_disk_full(ctx)),
        ("collector-disk-full", lambda: collector_disk_full(ctx)),
        ("outage", lambda: collector_outage(ctx)),
        ("many-boards", lambda: many_boards(ctx)),
        ("hostile", lambda: hostile_input(ctx)),
    ]


NEEDS_PG = {"agent-kill-postgres", "collector-kill-postgres", "pg-restart", "leader-lock"}
STOP_BOUND = STOP_TIMEOUT_S
