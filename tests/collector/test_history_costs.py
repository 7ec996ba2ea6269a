"""
Recurring collector queries cost the same however much history is stored.

Costs are counted, never timed: on SQLite the virtual-machine steps a query takes (a progress handler on
the store's reader), on PostgreSQL the rows its plan reads (``EXPLAIN (ANALYZE, FORMAT JSON)``). Each
recurring read is measured on a small history and on one a hundred times larger.
"""

from __future__ import annotations

import inspect
import json
import random
import sqlite3
from collections import Counter
from collections.abc import Awaitable, Callable
from dataclasses import replace
from typing import Any

import numpy as np
import pytest
from structlog.testing import capture_logs

from listenpost.collector.monitor import MONITOR
from listenpost.collector.state import STORE
from listenpost.collector.store import (
    BadBatch,
    Board,
    ClockSample,
    Enrollment,
    Heartbeat,
    IngestBatch,
    IngestStatus,
    SeqHole,
)
from listenpost.collector.store import migrations as mig
from listenpost.collector.store.sqlite import SqliteStore
from tests.collector.conftest import StoreFactory
from tests.collector.test_api import batch_body, enrolled, make_client, readings
from tests.collector.test_store import _raw_migrate, add_boards, gap_record, make_batch

EPOCH_A = "a1b2c3d4e5f60718"
EPOCH_B = "b0b1b2b3b4b5b6b7"

# The loss check as it was: every batch ever stored, on every round. The incremental accounting must
# find exactly these holes (for gap records whose range is in the batch's own epoch, where it was right).
FULL_SCAN_SQL = """
WITH iv AS (
    SELECT board_id, epoch, seq AS lo, seq AS hi FROM batches
    UNION ALL
    SELECT board_id, epoch, gap_first, gap_last FROM batches WHERE gap_first IS NOT NULL
), w AS (
    SELECT board_id, epoch, lo,
           max(hi) OVER (PARTITION BY board_id, epoch ORDER BY lo, hi
                         ROWS BETWEEN UNBOUNDED PRECEDING AND 1 PRECEDING) AS reach
    FROM iv
)
SELECT b.name, w.epoch, w.reach + 1, w.lo - 1
FROM w JOIN boards b ON b.id = w.board_id
WHERE w.reach IS NOT NULL AND w.lo > w.reach + 1
ORDER BY b.name, w.epoch, w.lo
"""

# The newest heartbeat per board as it was read: a window over every heartbeat row.
LATEST_BY_WINDOW_SQL = (
    "SELECT b.name, h.at, h.boot, h.stats FROM (SELECT *, row_number() OVER "
    "(PARTITION BY board_id ORDER BY at DESC, id DESC) AS k FROM heartbeats) h "
    "JOIN boards b ON b.id = h.board_id WHERE h.k = 1"
)


def named(gap: IngestBatch, epoch: str) -> IngestBatch:
    """A gap record whose range belongs to ``epoch`` (its ``gap.epoch``), whatever epoch carries it."""
    return replace(gap, gap={**(gap.gap or {}), "epoch": epoch})


async def raw(store: Any, sql: str, params: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Run SQL on the store's own database (reader connection / a pooled connection)."""
    if isinstance(store, SqliteStore):
        return [tuple(r) for r in await store._query(sql, params)]
    pg_sql = sql
    for i in range(len(params)):
        pg_sql = pg_sql.replace("?", f"${i + 1}", 1)
    async with store._acquire() as con:
        return [tuple(r) for r in await con.fetch(pg_sql, *params)]


async def bulk(store: Any, sql: str, rows: list[tuple[Any, ...]]) -> None:
    """Insert many rows in one transaction, straight into the store's tables (to fill history fast)."""
    if isinstance(store, SqliteStore):

        def job() -> None:
            con = store._wcon
            con.execute("BEGIN IMMEDIATE")
            con.executemany(sql, rows)
            con.execute("COMMIT")

        await store._write(job)
        return
    pg_sql = sql
    for i in range(sql.count("?")):
        pg_sql = pg_sql.replace("?", f"${i + 1}", 1)
    async with store._acquire() as con, con.transaction():
        await con.executemany(pg_sql, rows)
        await con.execute("ANALYZE")


async def cost(store: Any, call: Callable[[], Awaitable[Any]]) -> int:
    """
    What one store call costs the database, counted: SQLite VM steps, or rows the PostgreSQL plans read.
    """
    if isinstance(store, SqliteStore):
        steps = [0]

        def tick() -> int:
            steps[0] += 1
            return 0

        await store._read(lambda: store._rcon.set_progress_handler(tick, 10))
        try:
            await call()
        finally:
            await store._read(lambda: store._rcon.set_progress_handler(None, 10))
        return steps[0]
    seen: list[tuple[str, tuple[Any, ...]]] = []
    inner = store._fetch

    async def spy(sql: str, *args: Any) -> Any:
        seen.append((sql, args))
        return await inner(sql, *args)

    store._fetch = spy
    try:
        await call()
    finally:
        del store._fetch
    rows = 0
    async with store._acquire() as con:
        for sql, args in seen:
            plan = json.loads(await con.fetchval(f"EXPLAIN (ANALYZE, FORMAT JSON) {sql}", *args))
            stack = [plan[0]["Plan"]]
            while stack:
                node = stack.pop()
                if "Relation Name" in node:
                    rows += (node["Actual Rows"] + node.get("Rows Removed by Filter", 0)) * node[
                        "Actual Loops"
                    ]
                stack += node.get("Plans", [])
    return rows


# -- latest heartbeats ----------------------------------------------------------------------------------------


async def test_latest_heartbeats_cost_does_not_grow_with_the_history(store_factory: StoreFactory):
    """The newest heartbeat per board is found per board, not by reading every heartbeat kept; same answer
    as the window over all rows, ties on ``at`` included (the later row wins)."""
    store = await store_factory.open()
    boards = [f"g{i}-a" for i in range(20)]
    await add_boards(store, *boards)
    ids = {name: (await raw(store, "SELECT id FROM boards WHERE name = ?", (name,)))[0][0] for name in boards}
    sql = "INSERT INTO heartbeats (board_id, at, boot, stats) VALUES (?, ?, ?, ?)"

    def history(start: int, n: int) -> list[tuple[Any, ...]]:
        return [
            (ids[b], 1_800_000_000.0 + 30.0 * k, f"boot-{k // 100}", json.dumps({"k": k, "b": b}))
            for b in boards
            for k in range(start, start + n)
        ]

    await bulk(store, sql, history(0, 3))
    small = await cost(store, store.latest_heartbeats)
    await bulk(store, sql, history(3, 300))
    # A tie on the newest time: the row stored later is the newest, as before.
    await bulk(
        store, sql, [(ids["g0-a"], 1_800_000_000.0 + 30.0 * 302, "boot-tie", json.dumps({"k": "tie"}))]
    )
    large = await cost(store, store.latest_heartbeats)
    print(f"latest_heartbeats cost: {small} at 3 per board, {large} at 303")
    assert large <= 1.5 * small + 20, f"cost grew from {small} to {large} with 100x the heartbeats"

    latest = await store.latest_heartbeats()
    expected = {
        name: Heartbeat(name, at, boot, json.loads(stats))
        for name, at, boot, stats in await raw(store, LATEST_BY_WINDOW_SQL)
    }
    assert latest == expected and latest["g0-a"].boot == "boot-tie" and len(latest) == 20


# -- the monitor round -----------------------------------------------------------------------------------------


async def test_the_monitor_round_asks_the_same_questions_whatever_the_history(
    store_factory: StoreFactory, aiohttp_client, tmp_path, clock
):
    """A monitor round asks the store a fixed set of questions, none per board, and what they read does not
    grow with the history: ten minutes of heartbeats per board, then a hundred times that and a hundred
    reported losses per board."""
    store = await store_factory.open()
    now = clock.time()
    boards = [f"g{i}-a" for i in range(8)]
    for name in boards:
        await store.add_board(
            Board(name, "G0 Foyer", "ground", now - 86400.0, enrolled_at=now - 86400.0),
            Enrollment(name, f"code-{name}", now),
        )
    ids = {name: (await raw(store, "SELECT id FROM boards WHERE name = ?", (name,)))[0][0] for name in boards}
    sql = "INSERT INTO heartbeats (board_id, at, boot, stats) VALUES (?, ?, ?, ?)"

    def beats(first: int, n: int) -> list[tuple[Any, ...]]:
        """Heartbeats every 30 s, ``first`` beats back from now and ``n`` of them going back further."""
        return [
            (ids[b], now - 30.0 * k, "boot-1", json.dumps({"adverts_total": 10_000 - k, "spool_batches": 0}))
            for b in boards
            for k in range(first, first + n)
        ]

    await bulk(store, sql, beats(0, 20))
    client = await make_client(aiohttp_client, tmp_path, clock, store=store)
    monitor = client.app[MONITOR]
    await monitor.run_once()  # seeds the states; every board is live from here on

    calls: Counter[str] = Counter()
    for name in [n for n in dir(store) if not n.startswith("_")]:
        method = getattr(store, name)
        if inspect.iscoroutinefunction(method):

            async def counted(*a: Any, _m: Any = method, _n: str = name, **k: Any) -> Any:
                calls[_n] += 1
                return await _m(*a, **k)

            setattr(store, name, counted)

    async def one_round() -> tuple[Counter[str], int, dict[str, str]]:
        calls.clear()
        steps = await cost(store, monitor.run_once)
        states = {b: s["state"] for b, s in monitor.runtime.states.items()}
        return Counter(calls), steps, states

    small_calls, small, small_states = await one_round()
    await bulk(store, sql, beats(20, 2000))
    # A hundred losses per board reported long ago: they stay holes, but the loss check is done with them.
    await bulk(
        store,
        "INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq, reported) VALUES (?, ?, ?, ?, ?)",
        [(ids[b], EPOCH_A, 10 * k, 10 * k, True) for b in boards for k in range(100)],
    )
    large_calls, large, large_states = await one_round()
    print(
        f"monitor round: {dict(small_calls)}; cost {small} at 20 heartbeats per board, {large} at 2,020 + holes"
    )
    assert small_states == large_states == dict.fromkeys(boards, "live")
    assert large_calls == small_calls
    assert max(small_calls.values()) < len(boards), f"a store call per board: {dict(small_calls)}"
    assert large <= 1.5 * small + 20, f"cost grew from {small} to {large} with 100x the heartbeats"


# -- loss accounting --------------------------------------------------------------------------------------------


async def test_seq_hole_check_cost_does_not_grow_with_the_batches(store_factory: StoreFactory):
    """The monitor's loss check reads the holes there are, not every batch ever stored."""
    store = await store_factory.open()
    await add_boards(store, "g1-a", "u2-a")

    async def ingest(seqs: range) -> None:
        for s in seqs:
            if s % 37 != 5:  # a few holes
                for board in ("g1-a", "u2-a"):
                    assert (await store.ingest(make_batch(board, s, n=1))).status is IngestStatus.STORED

    await ingest(range(0, 40))
    small = await cost(store, store.seq_holes)
    await ingest(range(40, 400))
    # Only the holes differ: 2 boards x 1 hole at 40 batches, 2 x 11 at 400.
    holes = await store.seq_holes()
    assert len(holes) == 22
    large = await cost(store, store.seq_holes)
    print(f"seq_holes cost: {small} at 40 batches, {large} at 400")
    # Reading 2 holes, then 22: the cost may follow the holes, not the 10x batches.
    assert large <= 2 * small + 2 * len(holes) + 10, f"cost grew from {small} to {large} with 10x the batches"


# Fixed seeds: every worker of a parallel run must collect the same test ids, and a failure reproduces.
@pytest.mark.parametrize("seed", [11, 80004523, 1605338274, 2933666143])
async def test_incremental_holes_equal_the_full_scan(store_factory: StoreFactory, seed: int):
    """Random seqs and gap records arriving in random order (late ones included): after every step of
    the way, the holes kept by ingest equal the full scan over all batches (seed in the test id)."""
    rng = random.Random(seed)
    store = await store_factory.open()
    await add_boards(store, "g5-a", "u6-b")
    work: list[Any] = []
    for board in ("g5-a", "u6-b"):
        for e in range(3):
            epoch = f"{e:04x}{board.encode().hex()[:12]}"
            for s in rng.sample(range(80), rng.randint(1, 40)):
                if rng.random() < 0.2:
                    lo = rng.randint(0, 85)
                    hi = lo + rng.randint(0, 8)
                    work.append(gap_record(board, s, lo, hi, 10, epoch=epoch))
                else:
                    work.append(make_batch(board, s, n=1, epoch=epoch))
    # Mostly in seq order per epoch with some arriving late, as a board's spool and retries produce.
    work.sort(key=lambda b: (b.seq + rng.choice([0, 0, 0, 30]), rng.random()))
    for i, b in enumerate(work):
        await store.ingest(b)
        if i % 25 == 24 or i == len(work) - 1:
            expected = [SeqHole(*r) for r in await raw(store, FULL_SCAN_SQL)]
            assert await store.seq_holes() == expected, f"after {i + 1} of {len(work)} batches"
    assert await store.seq_holes("u6-b") == [h for h in expected if h.board == "u6-b"]


async def test_migration_fills_the_hole_accounting_from_stored_batches(sqlite_factory: StoreFactory):
    """A database from before the kept accounting gets its holes from the batches it holds."""
    con = sqlite3.connect(sqlite_factory.path, isolation_level=None)
    assert mig.migrate_sqlite(con, upto=3) == 3
    con.execute("INSERT INTO boards (id, name, room, created_at) VALUES (1, 'g0-a', 'G0', 5)")
    rows = [(1, EPOCH_A, s, "d", "boot", 1, 10.0, 0, None, None) for s in (0, 1, 4, 9)]
    rows.append((1, EPOCH_A, 10, "d", "boot", 0, 10.0, 0, 5, 6))
    con.executemany(
        "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd, gap_first, gap_last) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        rows,
    )
    con.close()
    store = await sqlite_factory.open()
    assert await store.seq_holes() == [SeqHole("g0-a", EPOCH_A, 2, 3), SeqHole("g0-a", EPOCH_A, 7, 8)]
    await store.ingest(make_batch("g0-a", 2, n=1))  # and it goes on from there
    assert await store.seq_holes() == [SeqHole("g0-a", EPOCH_A, 3, 3), SeqHole("g0-a", EPOCH_A, 7, 8)]


def test_a_new_database_is_logged_once_and_an_upgrade_migration_by_migration(tmp_path):
    """Upgrading a large database can take minutes: each migration says when it starts and how long it
    took. A new database is made by the same migrations and says so once."""
    con = sqlite3.connect(tmp_path / "old.db", isolation_level=None)
    with capture_logs() as logs:
        assert mig.migrate_sqlite(con, upto=3) == 3
    assert [(e["event"], e["version"]) for e in logs] == [("schema_created", 3)]
    with capture_logs() as logs:
        assert mig.migrate_sqlite(con) == mig.latest(mig.SQLITE)
        assert mig.migrate_sqlite(con) == mig.latest(mig.SQLITE)  # nothing left to do: nothing logged
    want = [
        (what, v)
        for v in range(4, mig.latest(mig.SQLITE) + 1)
        for what in ("schema_migrating", "schema_migrated")
    ]
    assert [(e["event"], e["version"]) for e in logs] == want
    assert all(e["seconds"] >= 0 for e in logs if e["event"] == "schema_migrated")
    assert [e["name"] for e in logs if e["event"] == "schema_migrating"] == [
        m.name for m in mig.SQLITE if m.version >= 4
    ]


async def test_a_reported_hole_stays_reported_when_a_late_batch_splits_it(store):
    """Holes are read "unreported" until marked; what a late batch leaves of a marked hole stays marked,
    and a hole that opens later is unreported."""
    await add_boards(store, "g3-a")
    for s in (0, 1, 9):
        await store.ingest(make_batch("g3-a", s, epoch=EPOCH_A))
    assert await store.seq_holes(unreported=True) == [SeqHole("g3-a", EPOCH_A, 2, 8)]
    await store.mark_holes_reported([SeqHole("g3-a", EPOCH_A, 2, 8), SeqHole("g3-a", EPOCH_A, 20, 30)])
    assert await store.seq_holes(unreported=True) == []
    await store.ingest(make_batch("g3-a", 5, epoch=EPOCH_A))  # late: splits the hole in two
    await store.ingest(make_batch("g3-a", 12, epoch=EPOCH_A))  # a new hole, 10-11
    assert await store.seq_holes() == [
        SeqHole("g3-a", EPOCH_A, 2, 4),
        SeqHole("g3-a", EPOCH_A, 6, 8),
        SeqHole("g3-a", EPOCH_A, 10, 11),
    ]
    assert await store.seq_holes(unreported=True) == [SeqHole("g3-a", EPOCH_A, 10, 11)]
    assert await store.seq_holes("g3-a", unreported=True) == [SeqHole("g3-a", EPOCH_A, 10, 11)]


async def test_migration_marks_the_holes_whose_loss_event_is_stored(store_factory: StoreFactory):
    """A database from before the marks: holes with a stored loss event come out reported, others not."""
    await _raw_migrate(store_factory, upto=7)
    for sql in (
        "INSERT INTO boards (id, name, room, created_at) VALUES (1, 'g0-a', 'G0', 5)",
        f"INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq) VALUES (1, '{EPOCH_A}', 2, 3)",
        f"INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq) VALUES (1, '{EPOCH_A}', 7, 8)",
        f"INSERT INTO events (at, board_id, kind, detail, key) VALUES (9, 1, 'loss', '{{}}', 'loss/g0-a/{EPOCH_A}/2-3')",
    ):
        await _raw_migrate(store_factory, upto=7, sql=sql)
    store = await store_factory.open()
    assert await store.seq_holes() == [SeqHole("g0-a", EPOCH_A, 2, 3), SeqHole("g0-a", EPOCH_A, 7, 8)]
    assert await store.seq_holes(unreported=True) == [SeqHole("g0-a", EPOCH_A, 7, 8)]


async def test_a_gap_record_covers_seqs_of_the_epoch_it_names(store):
    """A gap record sent in a new epoch for the epoch the board left (after a corrupt spool) covers that
    epoch's seqs, not the new epoch's (docs/wire-protocol.md §6.2)."""
    await add_boards(store, "g3-a")
    for s in (0, 1, 2, 5):
        await store.ingest(make_batch("g3-a", s, epoch=EPOCH_A))
    await store.ingest(named(gap_record("g3-a", 0, 3, 4, 120, epoch=EPOCH_B), EPOCH_A))
    for s in (1, 2):
        await store.ingest(make_batch("g3-a", s, epoch=EPOCH_B))
    assert await store.seq_holes() == []


async def test_a_missing_tail_is_a_hole_once_a_gap_record_names_a_later_range(store):
    """Seqs after the last one received are lost once a later range of that epoch is accounted for,
    here by a gap record sent from the board's next epoch."""
    await add_boards(store, "g3-a")
    for s in range(4):
        await store.ingest(make_batch("g3-a", s, epoch=EPOCH_A))
    assert await store.seq_holes() == []  # 4.. may still be on their way
    await store.ingest(named(gap_record("g3-a", 0, 8, 9, 50, epoch=EPOCH_B), EPOCH_A))
    assert await store.seq_holes() == [SeqHole("g3-a", EPOCH_A, 4, 7)]
    with pytest.raises(BadBatch) as e:
        await store.ingest(named(gap_record("g3-a", 1, 8, 9, 50, epoch=EPOCH_B), "NOT-HEX"))
    assert e.value.field == "gap.epoch"


# -- clock exchanges ride with their batch ----------------------------------------------------------------------


async def test_a_batch_and_its_clock_exchange_are_stored_together_or_not_at_all(store):
    """The exchange is written in the batch's transaction: a refused batch leaves no sample behind, a
    stored or duplicate one keeps it."""
    await add_boards(store, "g4-a")
    sample = ClockSample("g4-a", "boot-1", 10.0, 1_800_000_000.0, 1_800_000_000.1, 10.2)
    bad = make_batch("g4-a", 0, rssi=np.full(10, 9000, dtype=np.int32))
    with pytest.raises(BadBatch):
        await store.ingest(replace(bad, clock=sample))
    assert await store.clock_samples("g4-a", "boot-1") == []
    assert (await raw(store, "SELECT count(*) FROM batches"))[0][0] == 0
    good = make_batch("g4-a", 0)
    assert (await store.ingest(replace(good, clock=sample))).status is IngestStatus.STORED
    again = ClockSample("g4-a", "boot-1", 20.0, 1_800_000_010.0, 1_800_000_010.1, 20.2)
    assert (await store.ingest(replace(good, clock=again))).status is IngestStatus.DUPLICATE
    assert await store.clock_samples("g4-a", "boot-1") == [sample, again]
    with pytest.raises(BadBatch) as e:
        await store.ingest(replace(make_batch("g4-a", 1), clock=ClockSample("u0-a", "b", 1.0, 2.0, 3.0, 4.0)))
    assert e.value.field == "clock"


async def test_batches_with_clock_exchanges_take_one_commit_each(aiohttp_client, tmp_path, clock):
    """Through the board API, each batch carrying an exchange is one durable commit, not two."""
    client = await make_client(aiohttp_client, tmp_path, clock)
    auth = await enrolled(client, tmp_path, "g1-a")
    store = client.app[STORE]
    commits: list[str] = []
    await store._write(
        lambda: store._wcon.set_trace_callback(
            lambda s: commits.append(s) if s.startswith("COMMIT") else None
        )
    )
    w = clock.time() - 200.0
    for k in range(8):
        b = 200.0 + 10 * k
        ex = {"t1": b, "t2": w + b + 0.004, "t3": w + b + 0.005, "t4": b + 0.009}
        r = await client.post(
            "/v1/batches", json=batch_body("g1-a", k, readings(2, t0_s=b), t1=b, clock=ex), headers=auth
        )
        assert r.status == 200, await r.text()
    assert len(commits) == 8
    assert len(await store.clock_samples("g1-a", "boot-1")) == 8


async def test_a_heartbeat_and_its_exchange_are_one_commit_that_does_not_fsync(
    aiohttp_client, tmp_path, clock
):
    """A heartbeat and its clock exchange share one commit, made with synchronous=NORMAL (no fsync of its
    own: the next batch commit's fsync covers it); batches keep synchronous=FULL."""
    client = await make_client(aiohttp_client, tmp_path, clock)
    auth = await enrolled(client, tmp_path, "g1-a")
    store = client.app[STORE]
    trace: list[str] = []
    await store._write(lambda: store._wcon.set_trace_callback(trace.append))
    w = clock.time() - 200.0
    for k in range(3):
        b = 200.0 + 10 * k
        ex = {"t1": b, "t2": w + b + 0.004, "t3": w + b + 0.005, "t4": b + 0.009}
        body = {"board": "g1-a", "boot": "boot-1", "t1": b + 0.01, "clock": ex, "stats": {"k": k}}
        r = await client.post("/v1/heartbeat", json=body, headers=auth)
        assert r.status == 200, await r.text()
    r = await client.post(
        "/v1/batches", json=batch_body("g1-a", 0, readings(2, t0_s=230.0), t1=230.0), headers=auth
    )
    assert r.status == 200, await r.text()
    commits = [i for i, sql in enumerate(trace) if sql.startswith("COMMIT")]
    assert len(commits) == 4  # three heartbeats with their exchanges, one batch

    # The pragma in force at each commit: the last one set before it.
    def sync_at(i: int) -> str:
        return [sql for sql in trace[:i] if "PRAGMA synchronous" in sql][-1]

    assert [sync_at(i) for i in commits[:3]] == ["PRAGMA synchronous = NORMAL"] * 3
    assert sync_at(commits[3]) == "PRAGMA synchronous = FULL"
    assert len(await store.clock_samples("g1-a", "boot-1")) == 3
    assert (await store.latest_heartbeats())["g1-a"].stats["k"] == 2


# -- retention of history -------------------------------------------------------------------------------------


async def test_history_retention_keeps_the_newest_and_goes_in_bounded_chunks(store):
    """Heartbeats, clock samples and batch keys older than their cut go, a bounded number per call;
    each board's newest heartbeat, each boot's newest sample and each epoch's newest batch stay."""
    await add_boards(store, "g2-a", "u7-a")
    t0 = 1_800_000_000.0
    for i in range(6):
        await store.add_heartbeat(Heartbeat("g2-a", t0 + i, "boot-1", {"i": i}))
        await store.add_clock_sample(ClockSample("g2-a", "boot-1", 1.0 + i, t0 + i, t0 + i, 1.1 + i))
        await store.ingest(make_batch("g2-a", i, n=1, received_at=t0 + i))
    await store.add_heartbeat(Heartbeat("u7-a", t0 - 50, "boot-9", {}))  # old, but its board's newest
    await store.add_clock_sample(ClockSample("g2-a", "boot-0", 1.0, t0 - 99, t0 - 99, 1.1))
    await store.ingest(make_batch("u7-a", 0, n=1, received_at=t0 - 50))
    cut = t0 + 100
    with pytest.raises(ValueError, match="chunk"):
        await store.delete_history_before(heartbeats=cut, chunk=0)
    done = await store.delete_history_before(
        heartbeats=cut, clock_samples=cut, batches=cut, chunk=2, max_chunks=1
    )
    assert done == {"heartbeats": 2, "clock_samples": 2, "batches": 2}
    done = await store.delete_history_before(heartbeats=cut, clock_samples=cut, batches=cut, chunk=2)
    assert done == {"heartbeats": 3, "clock_samples": 3, "batches": 3}
    assert [h.at for h in await store.heartbeats("g2-a", 0.0)] == [t0 + 5]
    assert (await store.latest_heartbeats())["u7-a"].at == t0 - 50
    assert [s.t1 for s in await store.clock_samples("g2-a", "boot-1")] == [6.0]
    assert len(await store.clock_samples("g2-a", "boot-0")) == 1
    assert (
        await store.ingest(make_batch("g2-a", 5, n=1, received_at=t0 + 5))
    ).status is IngestStatus.DUPLICATE
    assert await store.seq_holes() == []  # the accounting does not need the batch rows
    # Only what is older than the cut goes.
    await store.add_heartbeat(Heartbeat("g2-a", cut + 1, "boot-1", {}))
    assert (await store.delete_history_before(heartbeats=t0 + 5)) == {"heartbeats": 0}
