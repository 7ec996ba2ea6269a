"""
Store-level ingest throughput, measured side by side in one run, plus bytes per stored reading.

Workload: 100 boards, each sending its batches one at a time (as the agent's uplink does), 250 readings
per batch (5 s of a busy room), 500 tags in the Brackenford mix of identity forms.

SQLite, each on a fresh file with the store's own schema:
  (a) ``SqliteStore.ingest`` from all boards at once: group commit, synchronous=FULL;
  (c) the floor: the same rows in one single transaction, readings in the store's statement shape
      (multi-row INSERTs of up to 2,048 rows).
PostgreSQL (LISTENPOST_TEST_PG, a throw-away schema per run):
  (d) ``PostgresStore.ingest`` from all boards at once, a pool of ``POOL`` connections;
  (e) raw ``copy_records_to_table`` of the same rows, one transaction per batch, ``POOL`` connections.
(c) and (e) are ``bench._raw_baselines``, shared with bench.ingest_http. The sides run interleaved,
``_repeat.repeats(5)`` rounds, each on a fresh file or schema; each ratio is taken within a round.

Then what interning buys: SQLite bytes per reading with integer ids (the store's schema) against a table
that repeats board name, tag identity and boot id as text in every row (same time index).
"""

from __future__ import annotations

import asyncio
import os
import sqlite3
import tempfile
import time
import uuid
from itertools import repeat
from pathlib import Path

import numpy as np

from bench import _repeat
from bench._raw_baselines import raw_pg_copy, raw_sqlite
from listenpost.collector.store import Board, Enrollment, IngestBatch
from listenpost.core import wire

N_BOARDS = 100
BATCHES_PER_BOARD = 8
PER_BATCH = 250
QUICK_SHAPE = (10, 2)
POOL = 10
"""The store's pool size here, and the PostgreSQL anchor's connections (bench._raw_baselines.POOL)."""
PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")
VENUE = "6f1d8a52-3c0e-4b7a-a9d1-5e2c7b40f913"  # invented for the bench


def make_tags() -> list[str]:
    tags = [f"ibeacon:{VENUE}:1:{i}" for i in range(350)]
    tags += [f"eddystone:b7e4019c2d5a83f6e011:{i:012x}" for i in range(100)]
    return tags + [f"lpx:{i:08x}" for i in range(50)]


def make_batches(
    n_boards: int = N_BOARDS, batches_per_board: int = BATCHES_PER_BOARD, seed: int = 1
) -> list[list[IngestBatch]]:
    """Per board, its batches in seq order."""
    rng = np.random.default_rng(seed)
    tags = np.array(make_tags(), dtype=object)
    out = []
    for b in range(n_boards):
        board = f"b{b:03d}"
        mine = []
        for seq in range(batches_per_board):
            t_ms = np.sort(rng.integers(0, 5000, PER_BATCH)) + seq * 5000 + 60_000
            tag = tags[rng.integers(0, len(tags), PER_BATCH)]
            rssi = rng.integers(-1000, -400, PER_BATCH).astype(np.int32)
            content = {"b": board, "seq": seq, "t": t_ms.tolist(), "tag": tag.tolist(), "r": rssi.tolist()}
            mine.append(
                IngestBatch(
                    board=board,
                    boot=str(uuid.UUID(int=b)),
                    epoch=f"{b:016x}",
                    seq=seq,
                    digest=wire.digest(content),
                    received_at=1_800_000_000.0 + seq * 5,
                    offset_db=1.5,
                    tags=tag,
                    t_board_ms=t_ms.astype(np.int64),
                    t_collector=1_800_000_000.0 + t_ms / 1000.0,
                    rssi_dd=rssi,
                )
            )
        out.append(mine)
    return out


async def run_store(store, per_board: list[list[IngestBatch]]) -> float:
    """Seconds to ingest everything, each board one batch in flight."""
    for mine in per_board:
        await store.add_board(
            Board(mine[0].board, "bench", None, 0.0), Enrollment(mine[0].board, "c" + mine[0].board, 1.0)
        )

    async def board(mine: list[IngestBatch]) -> None:
        for b in mine:
            await store.ingest(b)

    t = time.perf_counter()
    await asyncio.gather(*[board(m) for m in per_board])
    return time.perf_counter() - t


def bytes_per_reading_text(path: Path, per_board: list[list[IngestBatch]]) -> float:
    """The same readings with names repeated as text in every row (the layout interning replaces)."""
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("PRAGMA journal_mode = WAL")
    con.execute(
        "CREATE TABLE readings (board TEXT NOT NULL, tag TEXT NOT NULL, boot TEXT NOT NULL, "
        "t_board_ms INTEGER NOT NULL, t_collector REAL NOT NULL, rssi_dd INTEGER NOT NULL, "
        "offset_dd INTEGER NOT NULL)"
    )
    con.execute("CREATE INDEX readings_t ON readings(t_collector)")
    con.execute("BEGIN")
    n = 0
    for mine in per_board:
        for b in mine:
            con.executemany(
                "INSERT INTO readings VALUES (?, ?, ?, ?, ?, ?, 15)",
                zip(
                    repeat(b.board),
                    b.tags.tolist(),
                    repeat(b.boot),
                    b.t_board_ms.tolist(),
                    b.t_collector.tolist(),
                    b.rssi_dd.tolist(),
                ),
            )
            n += b.n
    con.execute("COMMIT")
    return _db_bytes(con) / n


def _db_bytes(con: sqlite3.Connection, tables: tuple[str, ...] | None = None) -> int:
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    if tables is None:
        return con.execute("PRAGMA page_count").fetchone()[0] * con.execute("PRAGMA page_size").fetchone()[0]
    q = "SELECT sum(pgsize) FROM dbstat WHERE name IN (SELECT value FROM json_each(?))"
    import json

    return con.execute(q, (json.dumps(list(tables)),)).fetchone()[0]


def _sqlite_store_once(per_board: list[list[IngestBatch]], path: Path) -> tuple[float, str]:
    from listenpost.collector.store.sqlite import SqliteStore

    async def go() -> tuple[float, str]:
        store = await SqliteStore.open(path)
        try:
            t = await run_store(store, per_board)
            return t, f"{store.ingest_batches} batches in {store.ingest_commits} commits"
        finally:
            await store.close()

    return asyncio.run(go())


def sqlite_part(per_board: list[list[IngestBatch]], n: int, tmp: Path) -> None:
    runs = iter(range(1_000_000))
    commits: list[str] = []

    def store_side() -> float:
        t, what = _sqlite_store_once(per_board, tmp / f"store-{next(runs)}.db")
        commits.append(what)
        return t

    def floor_side() -> float:
        return raw_sqlite(tmp / f"floor-{next(runs)}.db", per_board, make_tags())

    got = _repeat.interleave([("store", store_side), ("floor", floor_side)], _repeat.repeats(5))
    print(
        f"sqlite  (a) store ingest, group commit : {_repeat.spread([n / t for t in got['store']])} readings/s"
    )
    print(f"        ({commits[-1]})")
    print(
        f"sqlite  (c) floor, one transaction     : {_repeat.spread([n / t for t in got['floor']])} readings/s"
    )
    _repeat.report(
        "ingest_store",
        "sqlite store/floor throughput (a/c)",
        [f / s for s, f in zip(got["store"], got["floor"], strict=True)],
    )
    last_store = sorted(tmp.glob("store-*.db"), key=lambda p: p.stat().st_mtime)[-1]
    con = sqlite3.connect(last_store)
    interned = _db_bytes(con, ("readings", "readings_t")) / n
    con.close()
    text = bytes_per_reading_text(tmp / "text.db", per_board)
    print(
        f"sqlite  bytes/reading incl. time index: interned ids {interned:.1f}, names as text {text:.1f} "
        f"({text / interned:.2f}x)"
    )


async def _pg_round(per_board: list[list[IngestBatch]], which: str) -> tuple[float, int]:
    import asyncpg

    from listenpost.collector.store.postgres import PostgresStore

    schema = f"lp_bench_{uuid.uuid4().hex[:10]}"
    try:
        if which == "store":
            store = await PostgresStore.open(PG_URL, schema=schema, max_size=POOL)
            try:
                return await run_store(store, per_board), 0
            finally:
                await store.close()
        return await raw_pg_copy(PG_URL, schema, per_board, make_tags())
    finally:
        con = await asyncpg.connect(PG_URL, timeout=10)
        await con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        await con.close()


def pg_available() -> str | None:
    """Why PostgreSQL cannot be used here, or ``None`` when it can."""
    import asyncpg

    async def probe() -> None:
        con = await asyncpg.connect(PG_URL, timeout=5)
        await con.close()

    try:
        asyncio.run(probe())
    except (OSError, asyncpg.PostgresError, TimeoutError) as e:
        return f"{type(e).__name__}: {e}"
    return None


def pg_part(per_board: list[list[IngestBatch]], n: int) -> None:
    why = pg_available()
    if why is not None:
        print(f"postgres skipped: {why}")
        return
    sizes: list[int] = []

    def copy_side() -> float:
        t, size = asyncio.run(_pg_round(per_board, "copy"))
        sizes.append(size)
        return t

    got = _repeat.interleave(
        [("store", lambda: asyncio.run(_pg_round(per_board, "store"))[0]), ("copy", copy_side)],
        _repeat.repeats(5),
    )
    print(
        f"postgres (d) store ingest, pool {POOL}     : {_repeat.spread([n / t for t in got['store']])} readings/s"
    )
    print(
        f"postgres (e) COPY, {POOL} connections      : {_repeat.spread([n / t for t in got['copy']])} readings/s"
    )
    print(f"postgres bytes/reading incl. BRIN index: {sizes[-1] / n:.1f}")
    _repeat.report(
        "ingest_store",
        "postgres store/COPY throughput (d/e)",
        [c / s for s, c in zip(got["store"], got["copy"], strict=True)],
    )


def main(quick: bool = False) -> None:
    shape = QUICK_SHAPE if quick else (N_BOARDS, BATCHES_PER_BOARD)
    per_board = make_batches(*shape)
    n = sum(b.n for mine in per_board for b in mine)
    print(f"{shape[0]} boards x {shape[1]} batches x {PER_BATCH} readings = {n:,} readings")
    with tempfile.TemporaryDirectory() as d:
        sqlite_part(per_board, n, Path(d))
    pg_part(per_board, n)


if __name__ == "__main__":
    main()
