"""
Collector ingest over HTTP, measured side by side with raw inserts of the same rows in one run.

Workloads (``WORKLOADS``): boards posting concurrently, each one batch in flight (as the agent's uplink
does), readings from about 40 tags in the room, RSSI in whole dBm plus a 2.5 dB offset,
bodies gzip'd JSON exactly as agent/uplink.py sends them (``wire.canonical_json``, gzip level 6).
The server is the real collector app on a loopback TCP socket, in this process (so the clients share
its core: the figure is conservative).

  (a) HTTP → collector → SQLite store (group commit, synchronous=FULL) vs
  (b) raw ``executemany`` of the same rows into the same schema, one durable transaction per batch
      (``bench._raw_baselines.raw_sqlite``);
  (c) HTTP → collector → PostgreSQL store vs (d) raw COPY of the same rows, one transaction per batch
      (``bench._raw_baselines.raw_pg_copy``);
  (e) bytes on the wire per reading (request bodies as sent).

Targets (docs/design.md §7): (a) ≥ 50 % of (b) and ≥ 150,000 readings/s; (c) ≥ 50 % of (d); (e) ≤ 6.
"""

from __future__ import annotations

import asyncio
import gzip
import os
import tempfile
import time
import uuid
from pathlib import Path
from typing import Any

import numpy as np

from bench._raw_baselines import raw_pg_copy, raw_sqlite
from bench.ingest_store import make_tags
from listenpost.collector.store import IngestBatch
from listenpost.core import wire
from listenpost.core.clock import SystemClock
from listenpost.core.records import Reading

WORKLOADS = (
    # (name, boards, batches per board, readings per batch)
    ("venue: 5 s batches of a busy room", 100, 8, 250),
    ("backlog drain: large batches after an outage", 16, 16, 2500),
)
OFFSET_DB = 2.5
PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")


def make_workload(
    n_boards: int, batches_per_board: int, per_batch: int, seed: int = 7
) -> list[list[dict[str, Any]]]:
    """Per board, its batch bodies in seq order (plain dicts, as the agent builds them)."""
    rng = np.random.default_rng(seed)
    universe = make_tags()
    out = []
    for b in range(n_boards):
        room_tags = [universe[i] for i in rng.choice(len(universe), 40, replace=False)]
        mean = rng.uniform(-90, -55, len(room_tags))
        boot = str(uuid.UUID(int=b + 1))
        t_ms = 60_000
        bodies = []
        for seq in range(batches_per_board):
            which = rng.integers(0, len(room_tags), per_batch)
            t_ms_arr = t_ms + np.cumsum(rng.integers(0, 5, per_batch))
            t_ms = int(t_ms_arr[-1]) + 1
            rssi = np.round(mean[which] + rng.normal(0, 5, per_batch)) + OFFSET_DB
            rs = [
                Reading(room_tags[k], int(t) * 1_000_000, float(r))
                for k, t, r in zip(which, t_ms_arr, rssi, strict=True)
            ]
            content = wire.encode_content(rs, boot=boot, offset_db=OFFSET_DB)
            bodies.append(
                {
                    "v": 1,
                    "board": f"b{b:03d}",
                    "boot": boot,
                    "epoch": f"{b + 1:016x}",
                    "seq": seq,
                    "digest": wire.digest(content),
                    "clock": None,
                    "t1": t_ms / 1000.0,
                    "content": content,
                }
            )
        out.append(bodies)
    return out


def as_ingest_batches(per_board: list[list[dict[str, Any]]]) -> list[list[IngestBatch]]:
    """The same rows as the store receives them, for the raw comparators."""
    out = []
    for bodies in per_board:
        mine = []
        for body in bodies:
            c = wire.decode_content(body["content"])
            t = np.asarray(c.t_ms, dtype=np.int64)
            mine.append(
                IngestBatch(
                    board=body["board"],
                    boot=body["boot"],
                    epoch=body["epoch"],
                    seq=body["seq"],
                    digest=body["digest"],
                    received_at=1_800_000_000.0,
                    offset_db=OFFSET_DB,
                    tags=np.array(c.tags, dtype=object),
                    t_board_ms=t,
                    t_collector=1_800_000_000.0 + t / 1000.0,
                    rssi_dd=np.asarray(c.rssi_dd, dtype=np.int32),
                )
            )
        out.append(mine)
    return out


async def http_ingest(
    store: Any, per_board: list[list[bytes]], names: list[str], tmp: Path
) -> tuple[float, int]:
    """Seconds to post every batch through a real collector on loopback; also the bytes sent."""
    import aiohttp
    from aiohttp import web

    from listenpost.collector.app import create_app
    from listenpost.collector.config import parse_settings
    from listenpost.collector.http.auth import ADMIN_TOKEN_FILE

    settings = parse_settings({}, "bench", state_dir=str(tmp / "state"))
    app = create_app(settings, clock=SystemClock(), store=store, run_monitor=False)
    runner = web.AppRunner(app, access_log=None)
    await runner.setup()
    site = web.TCPSite(runner, "127.0.0.1", 0)
    await site.start()
    port = site._server.sockets[0].getsockname()[1]  # type: ignore[union-attr]
    base = f"http://127.0.0.1:{port}"
    try:
        admin = {"Authorization": "Bearer " + (tmp / "state" / ADMIN_TOKEN_FILE).read_text().strip()}
        timeout = aiohttp.ClientTimeout(total=60)
        async with aiohttp.ClientSession(timeout=timeout) as s:
            await s.post(f"{base}/v1/admin/tags", json={"ids": make_tags()}, headers=admin)
            tokens = []
            for name in names:
                async with s.post(
                    f"{base}/v1/admin/boards", json={"name": name, "room": "bench"}, headers=admin
                ) as r:
                    code = (await r.json())["code"]
                async with s.post(f"{base}/v1/enroll", json={"code": code, "fingerprint": {}}) as r:
                    tokens.append((await r.json())["token"])
            sent = 0

            async def board(token: str, bodies: list[bytes]) -> None:
                nonlocal sent
                headers = {
                    "Authorization": f"Bearer {token}",
                    "Content-Encoding": "gzip",
                    "Content-Type": "application/json",
                }
                for body in bodies:
                    async with s.post(f"{base}/v1/batches", data=body, headers=headers) as r:
                        answer = await r.json()
                        if r.status != 200 or answer.get("status") != "stored":
                            raise RuntimeError(f"batch refused: {r.status} {answer}")
                    sent += len(body)

            t = time.perf_counter()
            await asyncio.gather(*[board(tok, bodies) for tok, bodies in zip(tokens, per_board, strict=True)])
            return time.perf_counter() - t, sent
    finally:
        await runner.cleanup()


async def pg_part(
    bodies: list[list[bytes]], batches: list[list[IngestBatch]], names: list[str], n: int, tmp: Path
) -> None:
    import asyncpg

    from listenpost.collector.store import StoreUnavailable
    from listenpost.collector.store.postgres import PostgresStore

    schema = f"lp_bench_{uuid.uuid4().hex[:10]}"
    try:
        store = await PostgresStore.open(PG_URL, schema=schema, max_size=10)
    except (StoreUnavailable, OSError) as e:
        print(f"postgres skipped: {e}")
        return
    try:
        try:
            t_http, _ = await http_ingest(store, bodies, names, tmp / "pg")
        finally:
            await store.close()
        t_raw, _ = await raw_pg_copy(PG_URL, schema + "_raw", batches, make_tags())
        print(f"postgres (c) HTTP ingest                 : {n / t_http:>10,.0f} readings/s")
        print(f"postgres (d) raw COPY, txn per batch     : {n / t_raw:>10,.0f} readings/s")
        print(f"postgres ratio c/d = {t_raw / t_http:.2f} (target >= 0.50)")
    finally:
        con = await asyncpg.connect(PG_URL, timeout=10)
        await con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        await con.execute(f'DROP SCHEMA IF EXISTS "{schema}_raw" CASCADE')
        await con.close()


async def sqlite_part(
    bodies: list[list[bytes]], batches: list[list[IngestBatch]], names: list[str], n: int, tmp: Path
) -> None:
    from listenpost.collector.store import open_store

    store = await open_store(f"sqlite:///{tmp / 'http.db'}")
    try:
        t_http, sent = await http_ingest(store, bodies, names, tmp / "sqlite")
    finally:
        await store.close()
    t_raw = raw_sqlite(tmp / "raw.db", batches, make_tags(), per_batch_commit=True)
    print(
        f"sqlite  (a) HTTP ingest, {len(names)} clients     : {n / t_http:>10,.0f} readings/s (target >= 150,000)"
    )
    print(f"sqlite  (b) raw executemany, commit/batch: {n / t_raw:>10,.0f} readings/s")
    print(f"sqlite  ratio a/b = {t_raw / t_http:.2f} (target >= 0.50)")
    print(f"wire    (e) bytes per reading (gzip'd)   : {sent / n:>10.2f} (target <= 6)")


def main() -> None:
    import structlog

    from listenpost.core.logs import configure

    configure("json", level="warning")
    try:
        for title, n_boards, per_board_batches, per_batch in WORKLOADS:
            per_board = make_workload(n_boards, per_board_batches, per_batch)
            names = [bodies[0]["board"] for bodies in per_board]
            bodies = [
                [gzip.compress(wire.canonical_json(b), compresslevel=6) for b in mine] for mine in per_board
            ]
            batches = as_ingest_batches(per_board)
            n = n_boards * per_board_batches * per_batch
            print(
                f"-- {title}: {n_boards} boards x {per_board_batches} batches x {per_batch} readings = {n:,} readings"
            )
            with tempfile.TemporaryDirectory() as d:
                asyncio.run(sqlite_part(bodies, batches, names, n, Path(d)))
                asyncio.run(pg_part(bodies, batches, names, n, Path(d)))
    finally:
        structlog.reset_defaults()


if __name__ == "__main__":
    main()
