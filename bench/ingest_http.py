"""
Collector ingest over HTTP, measured side by side with the raw floor of the same rows in one run.

Workloads (``WORKLOADS``): boards posting concurrently, each one request in flight (as the agent's uplink
does), readings from about 40 tags in the room, RSSI in whole dBm plus a 2.5 dB offset. Each board
sends what an agent sends: every batch is built and gzip'd when it is sent (``wire.encode_batch``,
gzip level 6, as agent/client/uplink.py does) with its ``t1`` and the previous clock exchange, on a
board clock of its own; after every ``HEARTBEAT_EVERY`` batches a heartbeat (``agent.heartbeat_seconds``
/ ``agent.flush_seconds`` of the defaults) with its own exchange. Tags are registered and boards
enrolled through the admin API first. The server is the real collector app (``create_app`` with the
monitor running, every ``MONITOR_S`` seconds) on a loopback TCP socket in this process; the boards run
in a process of their own (`boards_process`, one keep-alive connection each, `_Uplink`), as boards are
hardware of their own. On a machine of two cores they still take CPU from the collector.

  (a) HTTP → collector → SQLite store vs (b) the floor: the same rows (clock samples, heartbeats, seq
      spans and board counts too) in one transaction, readings in the store's statement shape
      (``bench._raw_baselines.raw_sqlite``);
  (c) HTTP → collector → PostgreSQL store (pool of ``POOL``) vs (d) COPY of the same rows, one
      transaction per batch from ``POOL`` connections, clock samples in it and heartbeats without
      waiting for the WAL flush, as the store keeps them (``bench._raw_baselines.raw_pg_copy``);
  (e) bytes on the wire per reading (batch request bodies as sent).

The sides run interleaved (``_repeat.repeats(5)`` rounds, each on a fresh file or schema); each ratio
is taken within a round and reported as median and spread.
Targets: (a) ≥ 60 % of (b); (c) ≥ 60 % of (d); (e) ≤ 6.
"""

from __future__ import annotations

import asyncio
import gzip
import json
import os
import pickle
import statistics
import sys
import tempfile
import time
import uuid
from pathlib import Path
from typing import Any

import numpy as np

from bench import _repeat
from bench._raw_baselines import POOL as ANCHOR_POOL
from bench._raw_baselines import raw_pg_copy, raw_sqlite, schedule
from bench.ingest_store import make_tags
from listenpost.collector.store import IngestBatch
from listenpost.core import wire
from listenpost.core.clock import DerivedClock, SystemClock
from listenpost.core.records import Reading

WORKLOADS = (
    # (name, boards, batches per board, readings per batch)
    ("venue: 5 s batches of a busy room", 100, 8, 250),
    ("backlog drain: large batches after an outage", 16, 16, 2500),
)
QUICK_WORKLOADS = (("quick", 4, 4, 250),)
OFFSET_DB = 2.5
POOL = 10
"""The PostgreSQL store's pool size here, and the COPY anchor's connections (bench._raw_baselines.POOL)."""
MONITOR_S = 1.0
"""Monitor interval (the default is 5 s): a round or more falls inside every measured run."""
HEARTBEAT_EVERY = 2
"""Batches per heartbeat: agent.heartbeat_seconds (10) / agent.flush_seconds (5), the defaults."""
HEARTBEAT_STATS: dict[str, Any] = {
    "adverts_seen": 120_000,
    "adverts_registered": 61_000,
    "decode_errors": 0,
    "readings_total": 61_000,
    "spool": {"bytes": 2_000_000, "pending_batches": 0, "dropped_readings": 0, "degraded": False},
    "spool_degraded": False,
    "drops": {"spool_readings": 0, "spool_batches": 0, "dead_letters": 0},
    "source": {"kind": "hci", "state": "ok", "error": None},
    "uplink": {"sent": 120, "acked": 120, "last_error": None},
    "agent_uptime_s": 600.0,
    "version": "0",
    "config_etag": None,
}
"""A heartbeat's stats as an agent reports them (their shape; the values are invented)."""
RAW_EXTRA: dict[str, Any] = {
    "heartbeat_every": HEARTBEAT_EVERY,
    "exchanges": True,
    "stats_text": json.dumps(HEARTBEAT_STATS),
    "counts": True,
}
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
                    "content": content,
                    "content_json": wire.canonical_json(content),  # as the spool holds it
                    "last_t_ms": t_ms,
                }
            )
        out.append(bodies)
    return out


assert POOL == ANCHOR_POOL, "the COPY anchor uses as many connections as the store's pool"


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


async def http_ingest(store: Any, per_board: list[list[dict[str, Any]]], tmp: Path) -> tuple[float, int, int]:
    """Seconds to send every board's requests through a real collector on loopback; batch bytes sent; monitor rounds."""
    import aiohttp
    from aiohttp import web

    from listenpost.collector.app import create_app
    from listenpost.collector.config import parse_settings
    from listenpost.collector.http.auth import ADMIN_TOKEN_FILE

    settings = parse_settings({"monitor": {"interval_seconds": MONITOR_S}}, "bench", state_dir=str(tmp))
    base_clock = SystemClock()
    app = create_app(settings, clock=base_clock, store=store, run_monitor=True)
    runner = web.AppRunner(app, access_log=None)
    await runner.setup()
    site = web.TCPSite(runner, "127.0.0.1", 0)
    await site.start()
    port = site._server.sockets[0].getsockname()[1]  # type: ignore[union-attr]
    base = f"http://127.0.0.1:{port}"
    from listenpost.collector.state import RUNTIME

    rounds_before = app[RUNTIME].monitor_rounds
    try:
        admin = {"Authorization": "Bearer " + (tmp / ADMIN_TOKEN_FILE).read_text().strip()}
        timeout = aiohttp.ClientTimeout(total=60)
        async with aiohttp.ClientSession(timeout=timeout) as s:
            async with s.post(f"{base}/v1/admin/tags", json={"ids": make_tags()}, headers=admin) as r:
                if r.status != 200:
                    raise RuntimeError(f"tag registration refused: {r.status} {await r.text()}")
            tokens = []
            for bodies in per_board:
                async with s.post(
                    f"{base}/v1/admin/boards",
                    json={"name": bodies[0]["board"], "room": "bench"},
                    headers=admin,
                ) as r:
                    code = (await r.json())["code"]
                async with s.post(f"{base}/v1/enroll", json={"code": code, "fingerprint": {}}) as r:
                    tokens.append((await r.json())["token"])
        # The boards run in a process of their own, as they run on hardware of their own: building and
        # gzipping batches and the HTTP client are board work, which the raw anchors do not carry either.
        proc = await asyncio.create_subprocess_exec(
            sys.executable,
            "-c",
            "from bench.ingest_http import boards_process; boards_process()",
            stdin=asyncio.subprocess.PIPE,
            stdout=asyncio.subprocess.PIPE,
            env={**os.environ, "PYTHONPATH": os.pathsep.join(sys.path)},
        )
        out, _ = await proc.communicate(pickle.dumps((base, tokens, [_wire_only(b) for b in per_board])))
        if proc.returncode != 0:
            raise RuntimeError(f"boards process failed (exit {proc.returncode})")
        outcome = pickle.loads(out)
        elapsed, sent = outcome
        return elapsed, sent, app[RUNTIME].monitor_rounds - rounds_before
    finally:
        await runner.cleanup()


def _wire_only(bodies: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """What a board's process needs of its batches (the spool's bytes, not the decoded content)."""
    return [{k: v for k, v in b.items() if k != "content"} for b in bodies]


def boards_process() -> None:
    """Entry of the boards' process: (base URL, tokens, batches per board) pickled on stdin; (seconds, batch
    bytes sent) pickled on stdout."""
    base, tokens, per_board = pickle.load(sys.stdin.buffer)
    pickle.dump(asyncio.run(_boards(base, tokens, per_board)), sys.stdout.buffer)


class _Uplink:
    """
    One board's keep-alive HTTP/1.1 connection, one request at a time (as the agent's uplink holds one).

    The load generator's side is plain asyncio streams: the request bytes are what a board sends
    (method, path, Host, Authorization, Content-Type, Content-Encoding, Content-Length and the body), and
    the answer is read by its Content-Length. A full HTTP client per board would cost several times the
    CPU of these few lines, and on a machine of two cores that CPU is taken from the collector measured.
    """

    def __init__(self, host: str, port: int, token: str) -> None:
        self.host, self.port = host, port
        self.auth = f"Authorization: Bearer {token}\r\nContent-Type: application/json\r\n"
        self._streams: tuple[asyncio.StreamReader, asyncio.StreamWriter] | None = None

    async def post(self, path: str, body: bytes, *, gzipped: bool = False) -> dict[str, Any]:
        if self._streams is None:
            self._streams = await asyncio.open_connection(self.host, self.port)
        reader, writer = self._streams
        head = (
            f"POST {path} HTTP/1.1\r\nHost: {self.host}:{self.port}\r\n{self.auth}"
            + ("Content-Encoding: gzip\r\n" if gzipped else "")
            + f"Content-Length: {len(body)}\r\n\r\n"
        )
        writer.write(head.encode() + body)
        status = int((await reader.readline()).split(b" ", 2)[1])
        length = None
        while (line := await reader.readline()) not in (b"\r\n", b""):
            name, _, value = line.partition(b":")
            if name.strip().lower() == b"content-length":
                length = int(value)
        if length is None:
            raise RuntimeError(f"{path}: answer {status} without Content-Length")
        answer = json.loads(await reader.readexactly(length))
        if status != 200:
            raise RuntimeError(f"{path} refused: {status} {answer}")
        return answer  # type: ignore[no-any-return]

    def close(self) -> None:
        if self._streams is not None:
            self._streams[1].close()


async def _boards(base: str, tokens: list[str], per_board: list[list[dict[str, Any]]]) -> tuple[float, int]:
    """Each board one request in flight, as the agent's uplink does: batches, and every ``HEARTBEAT_EVERY``
    batches a heartbeat, each request carrying the previous clock exchange."""
    from listenpost.agent.client.uplink import ExchangeLog

    host, port = base.removeprefix("http://").rsplit(":", 1)
    base_clock = SystemClock()  # CLOCK_MONOTONIC and the wall clock are the collector process's too
    sent = 0

    async def board(token: str, bodies: list[dict[str, Any]]) -> None:
        nonlocal sent
        last_s = bodies[-1]["last_t_ms"] / 1000
        # A board clock on which every reading is already in the past when the first batch goes.
        clock = DerivedClock(
            base_clock, boot_at=base_clock.monotonic() - last_s - 1, boot_id=bodies[0]["boot"]
        )
        exchanges = ExchangeLog()
        uplink = _Uplink(host, int(port), token)
        try:
            for kind, j, _ in schedule(len(bodies), HEARTBEAT_EVERY, True):
                t1 = clock.monotonic()
                if kind == "batch":
                    b = bodies[j]
                    payload = gzip.compress(
                        wire.encode_batch(
                            board=b["board"],
                            boot=clock.boot_id,
                            epoch=b["epoch"],
                            seq=b["seq"],
                            digest=b["digest"],
                            t1=t1,
                            clock=exchanges.take(),
                            content=b["content_json"],
                        ),
                        compresslevel=6,
                    )
                    answer = await uplink.post("/v1/batches", payload, gzipped=True)
                    if answer.get("status") != "stored":
                        raise RuntimeError(f"batch not stored: {answer}")
                    sent += len(payload)
                else:
                    hb = {
                        "board": bodies[0]["board"],
                        "boot": clock.boot_id,
                        "t1": t1,
                        "clock": exchanges.take(),
                        "wall": clock.time(),
                        "stats": HEARTBEAT_STATS,
                    }
                    answer = await uplink.post("/v1/heartbeat", wire.canonical_json(hb))
                exchanges.record(t1, clock.monotonic(), answer)
                exchanges.delivered()
        finally:
            uplink.close()

    t = time.perf_counter()
    await asyncio.gather(*[board(tok, bodies) for tok, bodies in zip(tokens, per_board, strict=True)])
    return time.perf_counter() - t, sent


async def _sqlite_http(per_board: list[list[dict[str, Any]]], tmp: Path) -> tuple[float, int, int]:
    from listenpost.collector.store import open_store

    store = await open_store(f"sqlite:///{tmp / 'http.db'}")
    try:
        return await http_ingest(store, per_board, tmp)
    finally:
        await store.close()


async def _pg_round(
    per_board: list[list[dict[str, Any]]], batches: list[list[IngestBatch]], which: str, tmp: Path
) -> float:
    import asyncpg

    from listenpost.collector.store.postgres import PostgresStore

    schema = f"lp_bench_{uuid.uuid4().hex[:10]}"
    try:
        if which == "http":
            store = await PostgresStore.open(PG_URL, schema=schema, max_size=POOL)
            try:
                return (await http_ingest(store, per_board, tmp))[0]
            finally:
                await store.close()
        return (await raw_pg_copy(PG_URL, schema, batches, make_tags(), **RAW_EXTRA))[0]
    finally:
        con = await asyncpg.connect(PG_URL, timeout=10)
        await con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
        await con.close()


def sqlite_part(
    per_board: list[list[dict[str, Any]]], batches: list[list[IngestBatch]], n: int, tmp: Path
) -> None:
    runs = iter(range(1_000_000))
    sent: list[int] = []
    rounds: list[int] = []

    def http_side() -> float:
        d = tmp / f"sqlite-{next(runs)}"
        d.mkdir()
        t, nbytes, monitor_rounds = asyncio.run(_sqlite_http(per_board, d))
        sent.append(nbytes)
        rounds.append(monitor_rounds)
        return t

    def floor_side() -> float:
        return raw_sqlite(tmp / f"floor-{next(runs)}.db", batches, make_tags(), **RAW_EXTRA)

    got = _repeat.interleave([("http", http_side), ("floor", floor_side)], _repeat.repeats(5))
    print(
        f"sqlite  (a) HTTP ingest                 : {_repeat.spread([n / t for t in got['http']])} readings/s"
    )
    print(
        f"sqlite  (b) floor, one transaction      : {_repeat.spread([n / t for t in got['floor']])} readings/s"
    )
    _repeat.report(
        "ingest_http",
        "sqlite HTTP/floor throughput (a/b)",
        [f / h for h, f in zip(got["http"], got["floor"], strict=True)],
        ">= 0.60",
    )
    print(f"        monitor rounds during (a): {rounds} (every {MONITOR_S:g} s)")
    print(f"wire    (e) bytes per reading (gzip'd)  : {statistics.median(sent) / n:.2f} (target <= 6)")


def pg_part(
    per_board: list[list[dict[str, Any]]], batches: list[list[IngestBatch]], n: int, tmp: Path
) -> None:
    from bench.ingest_store import pg_available

    why = pg_available()
    if why is not None:
        print(f"postgres skipped: {why}")
        return
    runs = iter(range(1_000_000))

    def http_side() -> float:
        d = tmp / f"pg-{next(runs)}"
        d.mkdir()
        return asyncio.run(_pg_round(per_board, batches, "http", d))

    got = _repeat.interleave(
        [("http", http_side), ("copy", lambda: asyncio.run(_pg_round(per_board, batches, "copy", tmp)))],
        _repeat.repeats(5),
    )
    print(
        f"postgres (c) HTTP ingest, pool {POOL}      : {_repeat.spread([n / t for t in got['http']])} readings/s"
    )
    print(
        f"postgres (d) COPY, {POOL} connections       : {_repeat.spread([n / t for t in got['copy']])} readings/s"
    )
    _repeat.report(
        "ingest_http",
        "postgres HTTP/COPY throughput (c/d)",
        [c / h for h, c in zip(got["http"], got["copy"], strict=True)],
        ">= 0.60",
    )


def main(quick: bool = False) -> None:
    for title, n_boards, per_board_batches, per_batch in QUICK_WORKLOADS if quick else WORKLOADS:
        per_board = make_workload(n_boards, per_board_batches, per_batch)
        batches = as_ingest_batches(per_board)
        n = n_boards * per_board_batches * per_batch
        print(
            f"-- {title}: {n_boards} boards x {per_board_batches} batches x {per_batch} readings = {n:,} "
            f"readings, a heartbeat every {HEARTBEAT_EVERY} batches"
        )
        with tempfile.TemporaryDirectory() as d:
            sqlite_part(per_board, batches, n, Path(d))
            pg_part(per_board, batches, n, Path(d))


if __name__ == "__main__":
    from listenpost.core.logs import configure

    configure("console", "error")  # the figures are the output
    main()
