"""
What a collector's recurring work costs after an hour, a day and a week of history, against the same boards
without it.

Each store is filled by direct bulk inserts (not through ingest, which would take the week it simulates)
with what ``BOARDS`` boards leave behind in that time:

- a batch header every ``BATCH_S`` seconds per board (one epoch per board, a lost batch every 1,000),
  with its seq accounting rows, one reading each; the holes the lost batches left are marked reported,
  as the monitor rounds of that time would have left them;
- a clock sample with every batch of the last hour (`CLOCK_SPAN`);
- a heartbeat every 30 s, at most the store's ``heartbeat_history`` (2,880) per board.

Then, interleaved over the stores (empty, live, 1 h, 1 day, 1 week) for ``_repeat.repeats`` rounds:

- **monitor round**: ``Monitor.run_once`` (liveness of every board, the loss check, retention), after a
  warm-up round that builds the clock models;
- **/v1/status**: a GET over loopback to a real aiohttp server on the collector app;
- **ingest**: ``INGEST_BATCHES`` batches of 50 readings from 50 boards at once through ``Store.ingest``.

Each figure is reported as a ratio to two anchors of the same round:

- **live** (the fair anchor, target within 1.5x): the same boards up for ``LIVE_SPAN`` (15 minutes), which
  holds everything a round reads of a board (the liveness step's 6-minute heartbeat window, its clock
  model), so the ratio is what the *history* costs;
- **empty**: the same boards that never made contact. Its monitor round judges every board "no contact
  yet" without reading a heartbeat or a clock fit, so a ratio to it also counts the liveness work that
  500 talking boards need whatever the history (reported for comparison with earlier figures).

``/v1/status`` must stay under 50 ms with 500 boards at a week.
"""

from __future__ import annotations

import asyncio
import os
import statistics
import sys
import tempfile
import time
import uuid
from pathlib import Path
from typing import Any

import numpy as np

from bench import _repeat
from listenpost.collector.store import Board, Enrollment, IngestBatch, Store

BOARDS = 500
BATCH_S = 60.0
HEARTBEAT_S = 30.0
HISTORY_CAP = 2880
INGEST_BATCHES = 200
CLOCK_SPAN = 3600.0
FILL_TIMEOUT_S = 1800.0
"""Clock samples are filled for the last hour only: the warm-up round rebuilds every board's clock model
from all its stored samples (about 2 ms a sample here), a restart cost that this bench does not measure."""
T_END = 1_800_000_000.0
EPOCH = "a1b2c3d4e5f60718"
SPANS = {"1 hour": 3600.0, "1 day": 86400.0, "1 week": 7 * 86400.0}
LIVE_SPAN = 900.0
ANCHORS = {"empty": None, "live": LIVE_SPAN}
PG_URL = os.environ.get("LISTENPOST_TEST_PG", "postgresql://postgres@127.0.0.1:5432/test")


def _rows(boards: int, span: float) -> dict[str, list[tuple[Any, ...]]]:
    """
    Rows of one simulated history ending at T_END (board ids 1..boards), in time order across the boards,
    as ingest stores them: a window of recent rows then lies together, not spread over one stretch per board.
    """
    n_batches = int(span // BATCH_S)
    n_beats = min(int(span // HEARTBEAT_S), HISTORY_CAP)
    out: dict[str, list[tuple[Any, ...]]] = {
        k: [] for k in ("batches", "readings", "clock_samples", "heartbeats", "seq_reach", "seq_holes")
    }
    t0 = T_END - span
    seqs = [s for s in range(n_batches) if s % 1000 != 999]  # a lost batch now and then
    for s in seqs:
        at = t0 + s * BATCH_S
        for bid in range(1, boards + 1):
            out["batches"].append((bid, EPOCH, s, "0" * 64, "boot-1", 1, at, 0))
            out["readings"].append((len(out["batches"]), bid, 1, int(s * BATCH_S * 1000), at, -700))
            if at >= T_END - CLOCK_SPAN:
                out["clock_samples"].append((bid, "boot-1", s * BATCH_S, at, at + 0.001, s * BATCH_S + 0.002))
    if seqs:
        for bid in range(1, boards + 1):
            out["seq_reach"].append((bid, EPOCH, 0, seqs[-1]))
            out["seq_holes"] += [(bid, EPOCH, s, s, True) for s in range(999, seqs[-1], 1000)]
    for k in range(n_beats):
        at = T_END - (n_beats - k) * HEARTBEAT_S
        for bid in range(1, boards + 1):
            out["heartbeats"].append((bid, at, "boot-1", f'{{"adverts_total": {k}, "spool_batches": 0}}'))
    return out


_INSERT = {
    "batches": "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd) "
    "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
    "readings": "INSERT INTO readings (batch_id, board_id, tag_id, t_board_ms, t_collector, rssi_dd) "
    "VALUES (?, ?, ?, ?, ?, ?)",
    "clock_samples": "INSERT INTO clock_samples (board_id, boot, t1, t2, t3, t4) VALUES (?, ?, ?, ?, ?, ?)",
    "heartbeats": "INSERT INTO heartbeats (board_id, at, boot, stats) VALUES (?, ?, ?, ?)",
    "seq_reach": "INSERT INTO seq_reach (board_id, epoch, first_seq, reach) VALUES (?, ?, ?, ?)",
    "seq_holes": "INSERT INTO seq_holes (board_id, epoch, first_seq, last_seq, reported) VALUES (?, ?, ?, ?, ?)",
}


async def _fill(store: Any, boards: int, span: float | None) -> dict[str, int]:
    """Boards (enrolled), one tag, and ``span`` seconds of history; returns the rows per table."""
    for i in range(boards):
        name = f"b{i:03d}-a"
        await store.add_board(
            Board(name, "G0 Foyer", "ground", T_END - 8 * 86400, enrolled_at=T_END - 8 * 86400),
            Enrollment(name, f"code-{name}-{uuid.uuid4().hex}", T_END),
        )
    await store.add_tags(["lpx:00000001"], T_END - 8 * 86400)
    if span is None:
        return {}
    rows = _rows(boards, span)
    if hasattr(store, "_wcon"):

        def job() -> None:
            con = store._wcon
            con.execute("BEGIN IMMEDIATE")
            for table, sql in _INSERT.items():
                con.executemany(sql, rows[table])
            con.execute(
                "UPDATE boards SET batches_total = (SELECT count(*) FROM batches WHERE board_id = boards.id), "
                "readings_total = batches_total, last_batch_at = ?, last_boot = 'boot-1', last_boot_at = ?",
                (T_END, T_END),
            )
            con.execute("COMMIT")
            con.execute("ANALYZE")

        await store._write(job)
    else:
        await store.ensure_reading_days(T_END - span, T_END)  # the day partitions the readings go to
        async with store._acquire() as con:
            async with con.transaction():
                for table, sql in _INSERT.items():
                    cols = sql[sql.index("(") + 1 : sql.index(")")].replace(" ", "").split(",")
                    # A simulated week is millions of rows: the fill is not held to the store's statement timeout.
                    await con.copy_records_to_table(
                        table,
                        records=rows[table],
                        columns=cols,
                        schema_name=store.schema,
                        timeout=FILL_TIMEOUT_S,
                    )
                await con.execute(
                    "UPDATE boards SET batches_total = (SELECT count(*) FROM batches WHERE board_id = boards.id), "
                    "readings_total = batches_total, last_batch_at = $1, last_boot = 'boot-1', last_boot_at = $1",
                    T_END,
                    timeout=FILL_TIMEOUT_S,
                )
            await con.execute("ANALYZE", timeout=FILL_TIMEOUT_S)
    return {k: len(v) for k, v in rows.items()}


class Side:
    """One store with its collector app, served on loopback."""

    def __init__(self, store: Store, tmp: Path) -> None:
        self.store, self.tmp = store, tmp
        self.next_seq = 10**9  # ingest during the bench goes to a fresh range of the board's epoch

    async def start(self) -> None:
        from aiohttp.test_utils import TestClient, TestServer

        from listenpost.collector.app import create_app
        from listenpost.collector.config import parse_settings
        from listenpost.collector.monitor import MONITOR
        from listenpost.core.clock import VirtualClock

        self.clock = VirtualClock(wall=T_END)
        settings = parse_settings({}, "bench.yaml", state_dir=str(self.tmp))
        self.app = create_app(settings, clock=self.clock, store=self.store, run_monitor=False)
        self.client = TestClient(TestServer(self.app))
        await self.client.start_server()
        self.monitor = self.app[MONITOR]
        await self.monitor.run_once()  # warm-up: seeds states and builds every clock model
        r = await self.client.get("/v1/status")
        if r.status != 200:
            raise RuntimeError(f"/v1/status answered {r.status}: {await r.text()}")

    async def monitor_round(self) -> float:
        t = time.perf_counter()
        await self.monitor.run_once()
        return time.perf_counter() - t

    async def status(self) -> float:
        t = time.perf_counter()
        r = await self.client.get("/v1/status")
        await r.read()
        return time.perf_counter() - t

    async def ingest(self, boards: int) -> float:
        """Batches per second for INGEST_BATCHES batches from up to 50 boards at once."""
        senders = min(50, boards)
        per = INGEST_BATCHES // senders
        base = self.next_seq
        self.next_seq += per

        async def board(i: int) -> None:
            for k in range(per):
                n = 50
                await self.store.ingest(
                    IngestBatch(
                        board=f"b{i:03d}-a",
                        boot="boot-1",
                        epoch=EPOCH,
                        seq=base + k,
                        digest=uuid.uuid4().hex * 2,
                        received_at=T_END,
                        offset_db=0.0,
                        tags=np.array(["lpx:00000001"] * n, dtype=object),
                        t_board_ms=np.arange(n, dtype=np.int64),
                        t_collector=np.full(n, T_END - 1.0),
                        rssi_dd=np.full(n, -700, dtype=np.int32),
                    )
                )

        t = time.perf_counter()
        await asyncio.gather(*(board(i) for i in range(senders)))
        return senders * per / (time.perf_counter() - t)

    async def close(self) -> None:
        await self.client.close()
        await self.store.close()


async def _run_backend(backend: str, boards: int, rounds: int, tmp: Path) -> None:
    from listenpost.collector.store import open_store

    sides: dict[str, Side] = {}
    schemas: list[str] = []
    for label, span in [*ANCHORS.items(), *SPANS.items()]:
        t = time.perf_counter()
        if backend == "sqlite":
            store = await open_store(f"sqlite:///{tmp / (label.replace(' ', '_') + '.db')}")
        else:
            schema = f"lp_bench_{uuid.uuid4().hex[:10]}"
            schemas.append(schema)
            store = await open_store(PG_URL, schema=schema, max_size=8)
        sizes = await _fill(store, boards, span)
        side = Side(store, tmp / label.replace(" ", "_"))
        side.tmp.mkdir(exist_ok=True)
        await side.start()
        sides[label] = side
        desc = ", ".join(f"{k} {v:,}" for k, v in sizes.items()) or "no history"
        print(
            f"  {backend} {label}: {boards} boards; {desc} (filled in {time.perf_counter() - t:.1f} s)",
            flush=True,
        )
    try:
        figures: dict[str, dict[str, list[float]]] = {
            m: {s: [] for s in sides} for m in ("round", "status", "ingest")
        }
        for _ in range(rounds):
            for label, side in sides.items():  # interleaved: every store once per round, same order
                figures["round"][label].append(await side.monitor_round())
                figures["status"][label].append(statistics.median([await side.status() for _ in range(5)]))
                figures["ingest"][label].append(await side.ingest(boards))
        for metric, unit, scale, better in (
            ("round", " ms", 1000.0, "lower"),
            ("status", " ms", 1000.0, "lower"),
            ("ingest", " batches/s", 1.0, "higher"),
        ):
            print(f"  {backend} {metric}:", flush=True)
            for label, values in figures[metric].items():
                print(f"    {label}: {_repeat.spread([v * scale for v in values], ',.1f', unit)}")
            for anchor in ANCHORS:
                base = figures[metric][anchor]
                for label in SPANS:
                    # Ratios as "how many times the anchor's cost": for a rate that is anchor / this.
                    vals = [
                        (v / a if better == "lower" else a / v)
                        for v, a in zip(figures[metric][label], base, strict=True)
                    ]
                    target = "<= 1.5" if anchor == "live" else ""
                    _repeat.report("history", f"{backend} {metric} cost {label} / {anchor}", vals, target)
        week = statistics.median(figures["status"]["1 week"]) * 1000
        print(f"  {backend} /v1/status at 1 week, {boards} boards: {week:.1f} ms median (target < 50 ms)")
    finally:
        for side in sides.values():
            await side.close()
        if schemas:
            import asyncpg

            con = await asyncpg.connect(PG_URL, timeout=5)
            try:
                for schema in schemas:
                    await con.execute(f'DROP SCHEMA IF EXISTS "{schema}" CASCADE')
            finally:
                await con.close()


async def _pg_reachable() -> bool:
    try:
        import asyncpg

        con = await asyncpg.connect(PG_URL, timeout=3)
        await con.close()
        return True
    except Exception:
        return False


def main(quick: bool = False) -> None:
    boards = 50 if quick or _repeat.QUICK else int(os.environ.get("LISTENPOST_BENCH_BOARDS", BOARDS))
    rounds = _repeat.repeats(5)
    backends = [b for b in os.environ.get("LISTENPOST_BENCH_BACKENDS", "sqlite,postgres").split(",") if b]
    with tempfile.TemporaryDirectory(prefix="lp-bench-history-") as d:
        for backend in backends:
            if backend == "postgres" and not asyncio.run(_pg_reachable()):
                print(f"  postgres: skipped, {PG_URL} unreachable")
                continue
            asyncio.run(_run_backend(backend, boards, rounds, Path(d)))


if __name__ == "__main__":
    from listenpost.core.logs import configure

    configure("console", "error")  # the figures are the output
    if "--quick" in sys.argv:
        _repeat.QUICK = True
    main()
