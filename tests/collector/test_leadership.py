"""
Monitor leadership across collectors on one PostgreSQL database (docs/design.md §7): when the leader's
lock connection dies, one collector leads at every moment afterwards, no state change is stored twice,
and a leader whose lock connection is dead still stops when cancelled.

Two real stores (each its own pool) on one test schema, each with its own monitor loop on one
VirtualClock; the lock connection is killed from a third connection with ``pg_terminate_backend``.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
from collections import Counter
from collections.abc import Callable
from pathlib import Path

import aiohttp
import asyncpg
import pytest

from listenpost.collector.http.auth import ADMIN_TOKEN_FILE
from listenpost.collector.monitor import Monitor
from listenpost.collector.state import Runtime
from listenpost.collector.store import Board, Enrollment, Event, LeadershipLost, Store
from listenpost.collector.store.postgres import PostgresStore, lock_key
from listenpost.core.clock import VirtualClock
from tests.collector.conftest import PG_URL, StoreFactory
from tests.collector.test_api import settings_for
from tests.collector.test_scaleout_processes import _serve, _wait_listening, fresh_database  # noqa: F401

INTERVAL = 5.0  # monitor.interval_seconds default


async def until(cond: Callable[[], bool], what: str, seconds: float = 30.0) -> None:
    """Poll ``cond`` while real loopback I/O to PostgreSQL finishes; fail naming ``what`` after ``seconds``."""
    loop = asyncio.get_running_loop()
    end = loop.time() + seconds
    while not cond():
        if loop.time() > end:
            pytest.fail(f"timed out waiting for {what}")
        await asyncio.sleep(0.005)


async def _add_board(store: Store, name: str, at: float) -> None:
    """A board enrolled at ``at`` that never calls in: the first led round from ``silent_after_s`` after
    ``at`` stores it as ``silent``, once."""
    await store.add_board(
        Board(name, "G0 Foyer", None, at, enrolled_at=at), Enrollment(name, f"h-{name}", at)
    )


def _key_parts(store: PostgresStore, name: str) -> tuple[int, int]:
    # PostgreSQL docs, "pg_locks": a bigint advisory key shows its high half in classid, its low half in objid.
    key = lock_key(name, store.lock_scope) & 0xFFFF_FFFF_FFFF_FFFF
    return key >> 32, key & 0xFFFF_FFFF


async def _lock_pids(admin: asyncpg.Connection, store: PostgresStore, name: str = "monitor") -> list[int]:
    hi, lo = _key_parts(store, name)
    rows = await admin.fetch(
        "SELECT pid FROM pg_locks WHERE locktype = 'advisory' AND classid::bigint = $1 "
        "AND objid::bigint = $2 AND objsubid = 1 AND granted",
        hi,
        lo,
    )
    return [r["pid"] for r in rows]


async def _kill_lock_connection(admin: asyncpg.Connection, store: PostgresStore) -> None:
    """Terminate the backend holding the monitor lock and wait until the server has let the lock go."""
    (pid,) = await _lock_pids(admin, store)
    assert await admin.fetchval("SELECT pg_terminate_backend($1)", pid)
    loop = asyncio.get_running_loop()
    end = loop.time() + 30  # the backend exits asynchronously after the signal
    while await _lock_pids(admin, store):
        assert loop.time() < end, "the terminated backend still holds the lock"
        await asyncio.sleep(0.01)


@pytest.fixture
async def admin():
    con = await asyncpg.connect(PG_URL, timeout=5)
    try:
        yield con
    finally:
        await con.close()


async def _two_monitors(pg_factory: StoreFactory, tmp_path: Path, clock: VirtualClock) -> list[Monitor]:
    monitors = []
    for name in ("a", "b"):
        store = await pg_factory.open()
        settings = settings_for(tmp_path / name)
        assert settings.monitor_interval_seconds == INTERVAL
        monitors.append(Monitor(store, clock=clock, settings=settings, runtime=Runtime()))
    return monitors


async def _step(clock: VirtualClock, running: int) -> None:
    """One interval: every monitor wakes, does its round (or stands down) and is asleep again."""
    await clock.advance(INTERVAL)
    await until(lambda: clock.pending_sleepers == running, "every monitor to finish its round")


# pg_factory comes first so the monitors stop before the factory closes the stores.
async def test_killed_lock_connection_leaves_exactly_one_leader_and_no_event_twice(
    pg_factory, admin, tmp_path, clock
):
    monitors = await _two_monitors(pg_factory, tmp_path, clock)
    try:
        for m in monitors:
            m.start()
        await until(lambda: clock.pending_sleepers == 2, "both monitors to reach their first sleep")
        boards = 0
        led_per_step: list[list[int]] = []

        async def step() -> None:
            nonlocal boards
            before = [m.rounds_led for m in monitors]
            await _add_board(monitors[0].store, f"b{boards:02d}-a", clock.time() - 3600)  # an hour ago
            boards += 1
            await _step(clock, 2)
            led_per_step.append([m.rounds_led - b for m, b in zip(monitors, before, strict=True)])

        for _ in range(3):
            await step()
        leader = next(m for m in monitors if m.rounds_led)
        other = next(m for m in monitors if m is not leader)
        assert isinstance(leader.store, PostgresStore)
        await _kill_lock_connection(admin, leader.store)
        for _ in range(6):
            await step()
        # Exactly one collector led each round, before and after the kill; the other took over.
        assert [sum(s) for s in led_per_step] == [1] * 9, led_per_step
        assert [s[monitors.index(other)] for s in led_per_step[3:]] == [1] * 6, led_per_step
        assert sum(m.leading for m in monitors) == 1 and other.leading and not leader.leading
        # Every board turned silent once, in the store.
        events: list[Event] = await other.store.events()
        per_board = Counter(e.board for e in events if e.kind == "state_changed")
        assert per_board == {f"b{i:02d}-a": 1 for i in range(boards)}, per_board
    finally:
        for m in monitors:
            await asyncio.wait_for(m.stop(), 60)


async def test_cancelling_a_leader_whose_lock_connection_died_stops_it(pg_factory, admin, tmp_path, clock):
    """The lock cannot be released on a dead connection: the stop still ends, with the task cancelled."""
    (monitor, _) = await _two_monitors(pg_factory, tmp_path, clock)
    monitor.start()
    await until(lambda: clock.pending_sleepers == 1, "the monitor to reach its sleep")
    await _step(clock, 1)
    assert monitor.rounds_led == 2 and monitor.leading
    assert isinstance(monitor.store, PostgresStore)
    await _kill_lock_connection(admin, monitor.store)
    task = monitor._task
    assert task is not None
    task.cancel()  # what the service's shutdown does on SIGTERM (collector/app.py, Monitor.stop)
    # A generous bound, not a speed check: a loop that swallowed the cancellation would never end.
    await asyncio.wait({task}, timeout=60)
    assert task.done() and task.cancelled()
    await asyncio.wait_for(monitor.stop(), 60)


async def test_a_write_by_a_deposed_leader_is_refused_in_its_transaction(pg_factory, admin):
    """The fencing term: the old leader's lock died and another took it; its write is refused, not stored."""
    a, b = await pg_factory.open(), await pg_factory.open()
    assert isinstance(a, PostgresStore)
    async with a.exclusive("monitor") as held_a:
        assert held_a
        event = Event(1.0, None, "loss", {"note": "from a"}, key="fence-test-1")
        assert await a.add_event(event, lead="monitor") is not None
        await _kill_lock_connection(admin, a)
        async with b.exclusive("monitor") as held_b:
            assert held_b
            with pytest.raises(LeadershipLost):
                await a.add_event(
                    Event(2.0, None, "loss", {"note": "late"}, key="fence-test-2"), lead="monitor"
                )
            assert not await a.holds("monitor") and await b.holds("monitor")
            assert await b.add_event(Event(3.0, None, "loss", {}, key="fence-test-3"), lead="monitor")
    assert [e.detail for e in await b.events()] == [{"note": "from a"}, {}]


async def test_the_lock_key_is_per_schema(pg_factory, tmp_path):
    """Advisory locks are per database: collectors on two schemas of one database do not contend."""
    other = StoreFactory("postgres", tmp_path)
    try:
        a, b = await pg_factory.open(), await other.open()
        async with a.exclusive("monitor") as held_a, b.exclusive("monitor") as held_b:
            assert held_a and held_b
    finally:
        await other.cleanup()


async def test_a_forced_double_write_of_one_transition_stores_one_row(store_factory):
    """Two writers storing the same (board, transition, time): one row; the second learns it was not new."""
    a = await store_factory.open()
    b = await store_factory.open() if store_factory.backend == "postgres" else a
    await _add_board(a, "g0-a", 10.0)
    detail = {"old": "live", "new": "deaf", "reason": "heard nothing"}
    first = Event(20.0, "g0-a", "state_changed", detail, key="state_changed/g0-a/live>deaf@20.0")
    ids = [await a.add_event(first), await b.add_event(first)]
    assert ids[0] is not None and ids[1] is None
    assert [(e.id, e.detail) for e in await b.events()] == [(ids[0], detail)]
    # Events without a key (API and admin events) are never merged.
    await a.add_event(Event(21.0, "g0-a", "retired"))
    await b.add_event(Event(21.0, "g0-a", "retired"))
    assert [e.kind for e in await a.events()] == ["state_changed", "retired", "retired"]


# ------------------------------------------------------------------ two `collector serve` processes


def _logged(log: Path, event: str) -> int:
    """How many JSON log lines of a child's log are ``event``."""
    n = 0
    for line in log.read_text().splitlines():  # noqa: ASYNC240 - a small local file
        with contextlib.suppress(ValueError):
            n += json.loads(line).get("event") == event
    return n


async def _add_enrolled(session: aiohttp.ClientSession, url: str, admin: dict[str, str], name: str) -> None:
    async with session.post(
        url + "/v1/admin/boards", headers=admin, json={"name": name, "room": "G0 Foyer"}
    ) as r:
        assert r.status == 201, await r.text()
        code = (await r.json())["code"]
    async with session.post(url + "/v1/enroll", json={"code": code, "fingerprint": {}}) as r:
        assert r.status == 200, await r.text()


async def test_serve_pair_sigterm_stops_a_leader_whose_lock_connection_died_and_the_other_takes_over(
    tmp_path: Path,
    fresh_database: str,  # noqa: F811 - the fixture imported above
) -> None:
    """Real processes on real time (monitor rounds every 5 s), every wait bounded generously."""
    # A board that never calls in is judged silent 3 s after its enrolment, not the default 45 s.
    quick = {"liveness": {"min_late_s": 1, "min_silent_s": 2, "silent_after_s": 3}}
    procs = [await _serve(tmp_path, name, fresh_database, quick) for name in ("a", "b")]
    logs = [tmp_path / "a.log", tmp_path / "b.log"]
    admin = await asyncpg.connect(fresh_database, timeout=5)
    try:
        async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=10)) as session:
            for (proc, url), log in zip(procs, logs, strict=True):
                await _wait_listening(session, proc, url, log)
            url_a = procs[0][1]
            token = {"Authorization": "Bearer " + (tmp_path / "a" / ADMIN_TOKEN_FILE).read_text().strip()}
            await until(lambda: sum(_logged(p, "monitor_leading") for p in logs) == 1, "one leader", 60)
            old = next(i for i, p in enumerate(logs) if _logged(p, "monitor_leading"))
            new = 1 - old
            await _add_enrolled(session, url_a, token, "g0-a")
            scope = await admin.fetchval("SELECT current_schema()")
            key = lock_key("monitor", scope) & 0xFFFF_FFFF_FFFF_FFFF
            q = (
                "SELECT pid FROM pg_locks WHERE locktype = 'advisory' AND classid::bigint = $1 "
                "AND objid::bigint = $2 AND objsubid = 1 AND granted"
            )
            (pid,) = [r["pid"] for r in await admin.fetch(q, key >> 32, key & 0xFFFF_FFFF)]
            assert await admin.fetchval("SELECT pg_terminate_backend($1)", pid)
            # SIGTERM to the leader whose lock session just died (most likely before its next round has
            # noticed): it stops, cleanly, within a generous bound.
            proc = procs[old][0]
            proc.terminate()
            assert await asyncio.wait_for(proc.wait(), 60) == 0, logs[old].read_text()  # noqa: ASYNC240
            assert _logged(logs[old], "collector_stopping") == 1
            await until(
                lambda: _logged(logs[new], "monitor_leading") == 1, "the other process to take over", 60
            )
            url_new = procs[new][1]
            token_new = {
                "Authorization": "Bearer " + (tmp_path / "ab"[new] / ADMIN_TOKEN_FILE).read_text().strip()
            }
            await _add_enrolled(session, url_new, token_new, "g1-a")
            rows = []
            for _ in range(600):  # the new leader's next round stores g1-a's change (bounded: 60 s)
                rows = await admin.fetch(
                    "SELECT b.name FROM events e JOIN boards b ON b.id = e.board_id "
                    "WHERE e.kind = 'state_changed'"
                )
                if len(rows) >= 2:
                    break
                await asyncio.sleep(0.1)
        # Each board's change stored once, whichever process stored it.
        rows = await admin.fetch("SELECT b.name FROM events e JOIN boards b ON b.id = e.board_id")
        assert Counter(r["name"] for r in rows) == {"g0-a": 1, "g1-a": 1}
        assert _logged(logs[new], "monitor_standing_down") == 0
    finally:
        await admin.close()
        for proc, _ in procs:
            if proc.returncode is None:
                proc.terminate()
        for proc, _ in procs:
            try:
                await asyncio.wait_for(proc.wait(), 20)
            except TimeoutError:
                proc.kill()
                await proc.wait()
