"""
Store-level ingest throughput, measured side by side in one run, plus bytes per stored reading.

Workload: 100 boards, each sending its batches one at a time (as the agent's uplink does), 250 readings
per batch (5 s of a busy room), 500 tags in the Brackenford mix of identity forms.

SQLite, each on a fresh file with the store's own schema:
  (a) ``SqliteStore.ingest`` from all boards at once: group commit, synchronous=FULL;
  (b) raw ``executemany`` of the same rows, one durable transaction per batch (batch row + readings);
  (c) raw ``executemany`` of the same rows in one single transaction (the floor: no per-batch commits).
  (b), (c) and (e) are ``bench._raw_baselines``, shared with bench.ingest_http.
PostgreSQL (LISTENPOST_TEST_PG, a throw-away schema):
  (d) ``PostgresStore.ingest`` from all boards at once;
  (e) raw ``copy_records_to_table`` of the same rows, one transaction per batch, one connection.

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

from bench._raw_baselines import raw_pg_copy, raw_sqlite
from listenpost.collector.store import Board, Enrollment, IngestBatch
from listenpost.core import wire

N_BOARDS = 100
BATCHES_PER_BOARD = 8
PER_BATCH = 250
PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")
VENUE = "6f1d8a52-3c0e-4b7a-a9d1-5e2c7b40f913"  # invented for the bench


def make_tags() -> list[str]:
    tags = [f"ibeacon:{VENUE}:1:{i}" for i in range(350)]
    tags += [f"eddystone:b7e4019c2d5a83f6e011:{i:012x}" for i in range(100)]
    return tags + [f"lpx:{i:08x}" for i in range(50)]


def make_batches(seed: int = 1) -> list[list[IngestBatch]]:
    """Per board, its batches in seq order."""
    rng = np.random.default_rng(seed)
    tags = np.array(make_tags(), dtype=object)
    out = []
    for b in range(N_BOARDS):
        board = f"b{b:03d}"
        mine = []
        for seq in range(BATCHES_PER_BOARD):
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


async def sqlite_part(per_board: list[list[IngestBatch]], n: int, tmp: Path) -> None:
    from listenpost.collector.store.sqlite import SqliteStore

    store = await SqliteStore.open(tmp / "store.db")
    t_store = await run_store(store, per_board)
    commits, batches = store.ingest_commits, store.ingest_batches
    await store.close()
    t_raw = raw_sqlite(tmp / "raw.db", per_board, make_tags(), per_batch_commit=True)
    t_one = raw_sqlite(tmp / "one.db", per_board, make_tags(), per_batch_commit=False)
    print(
        f"sqlite  (a) store ingest, group commit : {n / t_store:>10,.0f} readings/s "
        f"({batches} batches in {commits} commits, {batches / commits:.1f} per commit)"
    )
    print(f"sqlite  (b) raw executemany, commit/batch: {n / t_raw:>10,.0f} readings/s")
    print(f"sqlite  (c) raw executemany, one commit  : {n / t_one:>10,.0f} readings/s")
    print(f"sqlite  ratio a/b = {t_raw / t_store:.2f}, a/c = {t_one / t_store:.2f}")
    con = sqlite3.connect(tmp / "store.db")
    interned = _db_bytes(con, ("readings", "readings_t")) / n
    con.close()
    text = bytes_per_reading_text(tmp / "text.db", per_board)
    print(
        f"sqlite  bytes/reading incl. time index: interned ids {interned:.1f}, names as text {text:.1f} "
        f"({text / interned:.2f}x)"
    )


async def pg_part(per_board: list[list[IngestBatch]], n: int) -> None:
    import asyncpg

    from listenpost.collector.store import StoreUnavailable
    from listenpost.collector.store.postgres import PostgresStore

    schema = f"lp_bench_{uuid.uuid4().hex[:10]}"
    try:
        store = await PostgresStore.open(PG_URL, schema=schema, max_size=10)
    except StoreUnavailable as e:
        print(f"postgres skipped: {e}")
        return
    try:
        t_store = await run_store(store, per_board)
        await store.close()
        t_raw, size = await raw_pg_copy(PG_URL, schema + "_raw", per_board, make_tags())
        print(f"postgres (d) store ingest, 100 boards   : {n / t_store:>10,.0f} readings/s")
        print(f"postgres (e) raw COPY, one connection   : {n / t_raw:>10,.0f} readings/s")
        print(f"postgres ratio d/e = {t_raw / t_store:.2f}; bytes/reading incl. BRIN index {size / n:.1f}")
    finally:
        con = await asyncpg.connect(PG_URL)
        await con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        await con.execute(f'DROP SCHEMA IF EXISTS "{schema}_raw" CASCADE')
        await con.close()


def main() -> None:
    per_board = make_batches()
    n = N_BOARDS * BATCHES_PER_BOARD * PER_BATCH
    print(f"{N_BOARDS} boards x {BATCHES_PER_BOARD} batches x {PER_BATCH} readings = {n:,} readings")
    with tempfile.TemporaryDirectory() as d:
        asyncio.run(sqlite_part(per_board, n, Path(d)))
    asyncio.run(pg_part(per_board, n))


if __name__ == "__main__":
    main()
