"""
What the day partitions of PostgreSQL ``readings`` save at retention and cost at ingest, against the one
table they replaced.

Two schemas on the test server: the store's (``readings`` partitioned by UTC day) and one left at schema
version 5 (one ``readings`` table with its BRIN index: the layout before partitioning). The sides run
interleaved, ``_repeat.repeats(5)`` rounds; each ratio is taken within a round.

**Retention.** Each round refills both schemas with the same readings (not timed): ``DAYS`` full days of
``PER_DAY`` readings, then the first ``STRADDLE_H`` hours of the next day; then every reading before a cut
``CUT_H`` hours into that last day goes:

- days: ``PostgresStore.delete_readings_before(cut, chunk=CHUNK)``: each whole day detached, counted
  exactly and dropped; the hours before the cut in the last day deleted in chunks;
- chunks: what retention did before, on the version 5 table: ``DELETE ... WHERE ctid = ANY(ARRAY(SELECT
  ctid ... WHERE t_collector < cut LIMIT CHUNK))`` until a chunk comes back short.

Both must remove the same number of readings. Ratio days / chunks (lower is better).

**Ingest.** ``BATCHES`` batches of ``BATCH_ROWS`` readings, each COPYed in its own transaction on one
connection (the store's statement), into each schema's emptied ``readings``; the batches cross a
midnight, and the two sides swap order every round. Ratio: partitioned / one table, in seconds (above 1
is what routing rows to their day costs).
"""

from __future__ import annotations

import asyncio
import os
import sys
import time
import uuid
from itertools import repeat
from typing import Any

import numpy as np

from bench import _repeat

PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")
DAYS = 2
PER_DAY = 400_000
STRADDLE_H = 12
CUT_H = 6
CHUNK = 10_000
MIDNIGHT = 1_799_971_200.0  # 2027-01-15 00:00 UTC
BATCHES = 400
BATCH_ROWS = 250
COLS = ["t_collector", "t_board_ms", "batch_id", "tag_id", "board_id", "rssi_dd"]


def _times(per_day: int) -> np.ndarray:
    """Collector times in arrival order: ``DAYS`` days and ``STRADDLE_H`` hours, evenly spread."""
    n = per_day * DAYS + per_day * STRADDLE_H // 24
    return MIDNIGHT + np.arange(n, dtype=np.float64) * (86400.0 / per_day)


async def _fill(con: Any, schema: str, t: np.ndarray) -> None:
    await con.execute("TRUNCATE readings")
    records = zip(t.tolist(), range(len(t)), repeat(1), repeat(1), repeat(1), repeat(-700))
    await con.copy_records_to_table(
        "readings", records=records, columns=COLS, schema_name=schema, timeout=600
    )
    await con.execute("VACUUM ANALYZE readings", timeout=600)


async def _run(per_day: int, rounds: int) -> None:
    import asyncpg

    from listenpost.collector.store import migrations as mig
    from listenpost.collector.store.postgres import PostgresStore

    t = _times(per_day)
    cut = MIDNIGHT + DAYS * 86400.0 + CUT_H * 3600.0
    want = int((t < cut).sum())
    new, old = f"lp_bench_{uuid.uuid4().hex[:10]}", f"lp_bench_{uuid.uuid4().hex[:10]}"
    store = await PostgresStore.open(PG_URL, schema=new, max_size=2)
    con = await asyncpg.connect(PG_URL, timeout=10, command_timeout=600)
    try:
        await con.execute(f'CREATE SCHEMA "{old}"')
        await con.execute(f'SET search_path TO "{old}"')
        await mig.migrate_postgres(con, upto=5)
        print(f"  {len(t):,} readings over {DAYS} days and {STRADDLE_H} h; cut removes {want:,}", flush=True)
        days_s: list[float] = []
        chunks_s: list[float] = []
        for _ in range(rounds):  # interleaved: both sides once per round, same order
            await store.ensure_reading_days(float(t[0]), float(t[-1]))
            await con.execute(f'SET search_path TO "{new}"')
            await _fill(con, new, t)
            start = time.perf_counter()
            gone = await store.delete_readings_before(cut, chunk=CHUNK)
            days_s.append(time.perf_counter() - start)
            assert gone == want, (gone, want)

            await con.execute(f'SET search_path TO "{old}"')
            await _fill(con, old, t)
            start = time.perf_counter()
            gone = 0
            while True:
                st = await con.execute(
                    "DELETE FROM readings WHERE ctid = ANY(ARRAY(SELECT ctid FROM readings "
                    "WHERE t_collector < $1 LIMIT $2))",
                    cut,
                    CHUNK,
                )
                n = int(st.rsplit(" ", 1)[-1])
                gone += n
                if n < CHUNK:
                    break
            chunks_s.append(time.perf_counter() - start)
            assert gone == want, (gone, want)
        ingest: dict[str, list[float]] = {new: [], old: []}
        batches = [
            MIDNIGHT - 600.0 + k * 3.0 + np.arange(BATCH_ROWS, dtype=np.float64) * 0.01
            for k in range(BATCHES)
        ]
        for r in range(rounds):
            await store.ensure_reading_days(MIDNIGHT - 86400.0, MIDNIGHT + 86400.0)
            # Sides swap places every round, so going first (or second) favours neither.
            for schema in (new, old) if r % 2 == 0 else (old, new):
                await con.execute(f'SET search_path TO "{schema}"')
                await con.execute("TRUNCATE readings")
                start = time.perf_counter()
                for k, ts in enumerate(batches):
                    async with con.transaction():
                        await con.copy_records_to_table(
                            "readings",
                            records=zip(
                                ts.tolist(), range(BATCH_ROWS), repeat(k), repeat(1), repeat(1), repeat(-700)
                            ),
                            columns=COLS,
                            schema_name=schema,
                        )
                ingest[schema].append(time.perf_counter() - start)
        print(f"    days:   {_repeat.spread([s * 1000 for s in days_s], ',.0f', ' ms')}")
        print(f"    chunks: {_repeat.spread([s * 1000 for s in chunks_s], ',.0f', ' ms')}")
        print("  retention:")
        _repeat.report(
            "partitions",
            f"PostgreSQL retention of {want:,} readings, days dropped / chunked delete",
            [a / b for a, b in zip(days_s, chunks_s, strict=True)],
        )
        print(f"  ingest, {BATCHES} COPYs of {BATCH_ROWS} readings across a midnight:")
        print(f"    partitioned: {_repeat.spread([s * 1000 for s in ingest[new]], ',.0f', ' ms')}")
        print(f"    one table:   {_repeat.spread([s * 1000 for s in ingest[old]], ',.0f', ' ms')}")
        _repeat.report(
            "partitions",
            f"PostgreSQL ingest, {BATCHES} COPYs of {BATCH_ROWS}, day partitions / one table",
            [a / b for a, b in zip(ingest[new], ingest[old], strict=True)],
        )
    finally:
        await store.close()
        for schema in (new, old):
            await con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        await con.close()


async def _pg_reachable() -> bool:
    import asyncpg

    try:
        con = await asyncpg.connect(PG_URL, timeout=3)
    except (OSError, asyncpg.PostgresError):
        return False
    await con.close()
    return True


def main(quick: bool = False) -> None:
    if not asyncio.run(_pg_reachable()):
        print(f"  postgres: skipped, {PG_URL} unreachable")
        return
    per_day = 20_000 if quick or _repeat.QUICK else int(os.environ.get("LISTENPOST_BENCH_PER_DAY", PER_DAY))
    asyncio.run(_run(per_day, _repeat.repeats(5)))


if __name__ == "__main__":
    from listenpost.core.logs import configure

    configure("console", "error")  # the figures are the output
    if "--quick" in sys.argv:
        _repeat.QUICK = True
    main()
