"""
The raw baselines the ingest benches compare the collector against: the same rows written straight into
the store's own schema with no collector code in between.

- `raw_sqlite`: ``executemany`` into a fresh SQLite file (WAL, synchronous=FULL), one durable transaction
  per batch, or all in one transaction (the floor);
- `raw_pg_copy`: ``copy_records_to_table`` on one asyncpg connection, one transaction per batch, into a
  fresh PostgreSQL schema migrated by the store.

Both take the batches per board (``list[list[IngestBatch]]``), pre-register ``tags`` and every board
outside the timed part, and return the seconds of the timed part.
"""

from __future__ import annotations

import sqlite3
import time
from collections.abc import Sequence
from itertools import repeat
from pathlib import Path

from listenpost.collector.store import IngestBatch
from listenpost.collector.store.migrations import migrate_sqlite


def _offset_dd(b: IngestBatch) -> int:
    return round(b.offset_db * 10)


def raw_sqlite(
    path: Path, per_board: list[list[IngestBatch]], tags: Sequence[str], *, per_batch_commit: bool
) -> float:
    """Seconds to insert every batch row and its readings; ``per_batch_commit=False`` uses one transaction."""
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
    flat = [(i, b) for i, mine in enumerate(per_board, 1) for b in mine]
    t = time.perf_counter()
    if not per_batch_commit:
        con.execute("BEGIN")
    for board_id, b in flat:
        if per_batch_commit:
            con.execute("BEGIN")
        cur = con.execute(
            "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
            (board_id, b.epoch, b.seq, b.digest, b.boot, b.n, b.received_at, _offset_dd(b)),
        )
        con.executemany(
            "INSERT INTO readings (batch_id, board_id, tag_id, t_board_ms, t_collector, rssi_dd) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            zip(
                repeat(cur.lastrowid),
                repeat(board_id),
                [tag_ids[x] for x in b.tags.tolist()],
                b.t_board_ms.tolist(),
                b.t_collector.tolist(),
                b.rssi_dd.tolist(),
            ),
        )
        if per_batch_commit:
            con.execute("COMMIT")
    if not per_batch_commit:
        con.execute("COMMIT")
    elapsed = time.perf_counter() - t
    con.close()
    return elapsed


async def raw_pg_copy(
    url: str, schema: str, per_board: list[list[IngestBatch]], tags: Sequence[str]
) -> tuple[float, int]:
    """Seconds to COPY every batch (one transaction each, synchronous_commit=on) and the readings table's bytes."""
    import asyncpg

    from listenpost.collector.store.postgres import PostgresStore

    migrated = await PostgresStore.open(url, schema=schema, max_size=1)  # the store's schema, migrated
    await migrated.close()
    con = await asyncpg.connect(url, server_settings={"search_path": schema, "synchronous_commit": "on"})
    try:
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
        t = time.perf_counter()
        for i, mine in enumerate(per_board, 1):
            for b in mine:
                async with con.transaction():
                    bid = await con.fetchval(
                        "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, "
                        "offset_dd) VALUES ($1, $2, $3, $4, $5, $6, $7, $8) RETURNING id",
                        i,
                        b.epoch,
                        b.seq,
                        b.digest,
                        b.boot,
                        b.n,
                        b.received_at,
                        _offset_dd(b),
                    )
                    await con.copy_records_to_table(
                        "readings",
                        schema_name=schema,
                        columns=["t_collector", "t_board_ms", "batch_id", "tag_id", "board_id", "rssi_dd"],
                        records=zip(
                            b.t_collector.tolist(),
                            b.t_board_ms.tolist(),
                            repeat(bid),
                            [tag_ids[x] for x in b.tags.tolist()],
                            repeat(i),
                            b.rssi_dd.tolist(),
                        ),
                    )
        elapsed = time.perf_counter() - t
        size = await con.fetchval("SELECT pg_total_relation_size($1::regclass)", f'"{schema}".readings')
        return elapsed, int(size)
    finally:
        await con.close()
