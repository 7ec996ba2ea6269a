"""
The raw anchors the ingest benches compare the collector against: the same rows written straight into
the store's own schema with no collector code in between, doing the store's work as well as it can be
done.

- `raw_sqlite`: one transaction for everything (the floor: no per-batch commits at all), readings
  inserted with the store's statement shape (multi-row ``INSERT ... VALUES (...), (...)`` of up to
  2,048 rows, the remainder in powers of two), on a fresh file (WAL, synchronous=FULL);
- `raw_pg_copy`: ``copy_records_to_table`` with one transaction per batch, from as many connections at
  once as the store's pool holds (``POOL``), each board one batch in flight, into a fresh schema
  migrated by the store (synchronous_commit=on).

Besides the batches both write what the collector writes for the same requests (`schedule`): a
``clock_samples`` row for every request that carries a clock exchange and a ``heartbeats`` row per
heartbeat; with ``counts``, also each batch's seq on its (board, epoch) span (``seq_reach``) and the
board's running counts (``boards``), which the collector updates with every batch. PostgreSQL keeps a
batch's clock sample in the batch's transaction and heartbeats without waiting for the WAL flush, as the
store does; a batch request is then one statement (clock sample, batch row, span, counts), the COPY and
the commit. Both take the batches per board, pre-register ``tags`` and every board outside the timed
part, and return the seconds of the timed part.
"""

from __future__ import annotations

import asyncio
import sqlite3
import time
from collections.abc import Iterator, Sequence
from itertools import chain, islice, repeat
from pathlib import Path
from typing import Any

from listenpost.collector.store import IngestBatch
from listenpost.collector.store.common import READING_COPY_COLUMNS
from listenpost.collector.store.migrations import migrate_sqlite

POOL = 10
"""Connections the PostgreSQL anchor uses at once: the pool size the benches open the store with."""
CHUNK = 2048
"""Rows per multi-row INSERT, as the SQLite store sends them."""
COLS = 6


def schedule(n_batches: int, heartbeat_every: int, exchanges: bool) -> list[tuple[str, int, bool]]:
    """
    One board's requests in order: ``("batch", i, carries_clock)`` and ``("heartbeat", i, carries_clock)``.

    A heartbeat follows every ``heartbeat_every``-th batch (0: none); with ``exchanges`` every request
    but the board's first carries the previous exchange, as the agent's requests do.
    """
    out: list[tuple[str, int, bool]] = []
    for i in range(n_batches):
        out.append(("batch", i, exchanges and bool(out)))
        if heartbeat_every and (i + 1) % heartbeat_every == 0:
            out.append(("heartbeat", i, exchanges))
    return out


def _offset_dd(b: IngestBatch) -> int:
    return round(b.offset_db * 10)


def _readings_sql(rows: int) -> str:
    return (
        "INSERT INTO readings (batch_id, board_id, tag_id, t_board_ms, t_collector, rssi_dd) VALUES "
        + ", ".join(["(?, ?, ?, ?, ?, ?)"] * rows)
    )


_SQL = {1 << i: _readings_sql(1 << i) for i in range(CHUNK.bit_length())}


def _insert_readings(con: sqlite3.Connection, n: int, flat: Iterator[Any]) -> None:
    left = n
    while left:
        k = CHUNK if left >= CHUNK else 1 << (left.bit_length() - 1)
        con.execute(_SQL[k], list(islice(flat, k * COLS)))
        left -= k


def raw_sqlite(
    path: Path,
    per_board: list[list[IngestBatch]],
    tags: Sequence[str],
    *,
    heartbeat_every: int = 0,
    exchanges: bool = False,
    stats_text: str = "{}",
    counts: bool = False,
) -> float:
    """Seconds to write every request's rows in one durable transaction (the floor)."""
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("PRAGMA journal_mode = WAL")
    con.execute("PRAGMA synchronous = FULL")
    migrate_sqlite(con)
    tag_ids: dict[str, int] = {}
    for i, tag in enumerate(tags, 1):
        con.execute("INSERT INTO tags (id, tag) VALUES (?, ?)", (i, tag))
        tag_ids[tag] = i
    for i, mine in enumerate(per_board, 1):
        con.execute(
            "INSERT INTO boards (id, name, room, created_at) VALUES (?, ?, 'bench', 0)", (i, mine[0].board)
        )
    plan = [(i, mine, schedule(len(mine), heartbeat_every, exchanges)) for i, mine in enumerate(per_board, 1)]
    t = time.perf_counter()
    con.execute("BEGIN")
    for board_id, mine, requests in plan:
        for kind, j, carries_clock in requests:
            b = mine[j]
            if carries_clock:
                t2 = b.received_at
                con.execute(
                    "INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) VALUES (?, ?, ?, ?, ?, ?)",
                    (board_id, b.boot, 100.0 + j, t2, t2 + 0.001, 100.002 + j),
                )
            if kind == "heartbeat":
                con.execute(
                    "INSERT INTO heartbeats (board_id, at, boot, stats) VALUES (?, ?, ?, ?)",
                    (board_id, b.received_at, b.boot, stats_text),
                )
                continue
            cur = con.execute(
                "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd) "
                "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                (board_id, b.epoch, b.seq, b.digest, b.boot, b.n, b.received_at, _offset_dd(b)),
            )
            if counts:
                con.execute(
                    "INSERT INTO seq_reach (board_id, epoch, first_seq, reach) VALUES (?, ?, ?, ?) "
                    "ON CONFLICT (board_id, epoch) DO UPDATE SET reach = excluded.reach",
                    (board_id, b.epoch, b.seq, b.seq),
                )
                con.execute(
                    "UPDATE boards SET readings_total = readings_total + ?, batches_total = batches_total + 1, "
                    "last_batch_at = ? WHERE id = ?",
                    (b.n, b.received_at, board_id),
                )
            _insert_readings(
                con,
                b.n,
                chain.from_iterable(
                    zip(
                        repeat(cur.lastrowid),
                        repeat(board_id),
                        [tag_ids[x] for x in b.tags.tolist()],
                        b.t_board_ms.tolist(),
                        b.t_collector.tolist(),
                        b.rssi_dd.tolist(),
                    )
                ),
            )
    con.execute("COMMIT")
    elapsed = time.perf_counter() - t
    con.close()
    return elapsed


async def raw_pg_copy(
    url: str,
    schema: str,
    per_board: list[list[IngestBatch]],
    tags: Sequence[str],
    *,
    heartbeat_every: int = 0,
    exchanges: bool = False,
    stats_text: str = "{}",
    counts: bool = False,
) -> tuple[float, int]:
    """Seconds to COPY every batch (a transaction each) from ``POOL`` connections; the readings table's bytes."""
    import asyncpg

    from listenpost.collector.store.postgres import PostgresStore

    migrated = await PostgresStore.open(url, schema=schema, max_size=1)  # the store's schema, migrated
    times = [
        t
        for mine in per_board
        for b in mine
        if b.n
        for t in (float(b.t_collector.min()), float(b.t_collector.max()))
    ]
    if times:  # the day partitions the COPYs below go to (the store makes them at ingest)
        await migrated.ensure_reading_days(min(times), max(times))
    await migrated.close()
    settings = {"search_path": schema, "synchronous_commit": "on"}
    pool = await asyncpg.create_pool(url, min_size=POOL, max_size=POOL, server_settings=settings, timeout=30)
    try:
        async with pool.acquire() as con:
            tag_ids = {}
            for i, tag in enumerate(tags, 1):
                await con.execute("INSERT INTO tags (id, tag) VALUES ($1, $2)", i, tag)
                tag_ids[tag] = i
            for i, mine in enumerate(per_board, 1):
                await con.execute(
                    "INSERT INTO boards (id, name, room, created_at) VALUES ($1, $2, 'bench', 0)",
                    i,
                    mine[0].board,
                )

        # $1 board, $2 epoch, $3 seq, $4 digest, $5 boot, $6 n, $7 received_at, $8 offset_dd; $9.. t1..t4.
        ctes = []
        if counts:
            ctes += [
                "s AS (INSERT INTO seq_reach (board_id, epoch, first_seq, reach) VALUES ($1, $2, $3, $3) "
                "ON CONFLICT (board_id, epoch) DO UPDATE SET reach = excluded.reach)",
                "c AS (UPDATE boards SET readings_total = readings_total + $6, batches_total = batches_total + 1, "
                "last_batch_at = $7 WHERE id = $1)",
            ]
        insert_batch = (
            "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd) "
            "VALUES ($1, $2, $3, $4, $5, $6, $7, $8) RETURNING id"
        )
        clock_cte = "k AS (INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) VALUES ($1, $5, $9, $10, $11, $12))"
        batch_sql = {
            carries: (
                "WITH " + ", ".join([*ctes, *([clock_cte] if carries else [])]) + " "
                if ctes or carries
                else ""
            )
            + insert_batch
            for carries in (False, True)
        }
        # One implicit transaction that does not wait for the WAL flush (set_config local to it).
        heartbeat_sql = {
            carries: "WITH cfg AS (SELECT set_config('synchronous_commit', 'off', true))"
            + (
                ", k AS (INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) VALUES ($1, $3, $5, $6, $7, $8))"
                if carries
                else ""
            )
            + " INSERT INTO heartbeats (board_id, at, boot, stats) SELECT $1, $2, $3, $4 FROM cfg"
            for carries in (False, True)
        }

        async def board(board_id: int, mine: list[IngestBatch]) -> None:
            for kind, j, carries_clock in schedule(len(mine), heartbeat_every, exchanges):
                b = mine[j]
                t2 = b.received_at
                exchange = (100.0 + j, t2, t2 + 0.001, 100.002 + j) if carries_clock else ()
                async with pool.acquire() as con:
                    if kind == "heartbeat":
                        await con.execute(
                            heartbeat_sql[carries_clock],
                            board_id,
                            b.received_at,
                            b.boot,
                            stats_text,
                            *exchange,
                        )
                        continue
                    async with con.transaction():
                        bid = await con.fetchval(
                            batch_sql[carries_clock],
                            board_id,
                            b.epoch,
                            b.seq,
                            b.digest,
                            b.boot,
                            b.n,
                            b.received_at,
                            _offset_dd(b),
                            *exchange,
                        )
                        await con.copy_records_to_table(
                            "readings",
                            schema_name=schema,
                            columns=READING_COPY_COLUMNS,
                            records=zip(
                                b.t_collector.tolist(),
                                b.t_board_ms.tolist(),
                                repeat(bid),
                                [tag_ids[x] for x in b.tags.tolist()],
                                repeat(board_id),
                                b.rssi_dd.tolist(),
                            ),
                        )

        t = time.perf_counter()
        await asyncio.gather(*[board(i, mine) for i, mine in enumerate(per_board, 1)])
        elapsed = time.perf_counter() - t
        async with pool.acquire() as con:
            # readings is partitioned by day: its bytes are its partitions'.
            size = await con.fetchval(
                "SELECT coalesce(sum(pg_total_relation_size(relid)), 0) FROM pg_partition_tree($1::regclass)",
                f'"{schema}".readings',
            )
        return elapsed, int(size)
    finally:
        await pool.close()
