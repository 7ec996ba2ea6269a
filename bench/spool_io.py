"""
Bytes the spool writes to storage per hour, against a naive one-row-per-reading SQLite table, in the
same run (docs/reliability.md §1 and §5: estimated 10-20 MB/h for 5 s batches vs 70+ MB/h naive,
budget 20 MB/h).

Both sides take 200 readings/s from ~300 tags for ``LISTENPOST_BENCH_SPOOL_MINUTES`` (default 60) of
virtual time, commit every 5 s with synchronous=FULL, and drain (ack / delete) as they go, as a board
with a live uplink would. Written bytes come from ``/proc/self/io`` (``write_bytes``: bytes this
process caused to be sent to the block layer; ``wchar``: bytes passed to write calls).
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import os
import random
import sqlite3
import tempfile
import time
from pathlib import Path

from bench import _repeat
from listenpost.agent.spool import GZIP_LEVEL, Spool
from listenpost.core.clock import VirtualClock
from listenpost.core.records import Reading

RATE_PER_S = 200
FLUSH_S = 5.0
TAGS = [f"ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:{i}" for i in range(300)]


def proc_io() -> dict[str, int]:
    out = {}
    for line in Path("/proc/self/io").read_text().splitlines():
        k, v = line.split(":")
        out[k] = int(v)
    return out


def readings(rng: random.Random, t0_s: float, n: int) -> list[Reading]:
    return [
        Reading(
            rng.choice(TAGS),
            round((t0_s + i / RATE_PER_S) * 1e9) + rng.randrange(2_000_000),
            round(rng.uniform(-95, -45), 1),
        )
        for i in range(n)
    ]


async def spool_side(directory: Path, periods: int) -> tuple[int, int]:
    """Returns (compressed payload bytes, readings)."""
    clock = VirtualClock()
    spool = await Spool.open(
        directory / "spool.sqlite", clock=clock, max_bytes=64 << 20, flush_seconds=FLUSH_S
    )
    rng = random.Random(1)
    payload = n = 0
    for k in range(periods):
        for r in readings(rng, k * FLUSH_S, int(RATE_PER_S * FLUSH_S)):
            spool.add(r)
        await clock.advance(FLUSH_S)
        b = await spool.seal(boot=clock.boot_id, offset_db=0.0)
        assert b is not None
        payload += len(gzip.compress(b.content, compresslevel=GZIP_LEVEL, mtime=0))
        n += b.n_readings
        head = await spool.peek_oldest()  # the uplink delivers each batch before the next seal
        assert head is not None
        await spool.ack(head.epoch, head.seq)
    await spool.close()
    return payload, n


def naive_side(directory: Path, periods: int) -> int:
    """One row per reading, indexed by time, committed every 5 s, delivered rows deleted."""
    rng = random.Random(1)
    with contextlib.closing(sqlite3.connect(directory / "naive.sqlite", isolation_level=None)) as c:
        c.execute("PRAGMA journal_mode=WAL")
        c.execute("PRAGMA synchronous=FULL")
        c.execute(
            "CREATE TABLE readings (id INTEGER PRIMARY KEY, tag TEXT NOT NULL, t_ns INTEGER NOT NULL,"
            " rssi REAL NOT NULL)"
        )
        c.execute("CREATE INDEX readings_t ON readings (t_ns)")
        n = 0
        for k in range(periods):
            rs = readings(rng, k * FLUSH_S, int(RATE_PER_S * FLUSH_S))
            c.execute("BEGIN")
            c.execute("DELETE FROM readings")  # the previous period was delivered
            c.executemany(
                "INSERT INTO readings (tag, t_ns, rssi) VALUES (?,?,?)",
                [(r.tag, r.t_mono_ns, r.rssi_dbm) for r in rs],
            )
            c.execute("COMMIT")
            n += len(rs)
    return n


def _one_round(minutes: float) -> dict[str, float]:
    periods = int(minutes * 60 / FLUSH_S)
    with tempfile.TemporaryDirectory(prefix="spool-io-", dir=os.environ.get("LISTENPOST_BENCH_DIR")) as d:
        directory = Path(d)
        io0, t0 = proc_io(), time.perf_counter()
        payload, n_spool = asyncio.run(spool_side(directory, periods))
        io1, t1 = proc_io(), time.perf_counter()
        n_naive = naive_side(directory, periods)
        io2, t2 = proc_io(), time.perf_counter()
    return {
        "spool_w": io1["write_bytes"] - io0["write_bytes"],
        "naive_w": io2["write_bytes"] - io1["write_bytes"],
        "spool_c": io1["wchar"] - io0["wchar"],
        "naive_c": io2["wchar"] - io1["wchar"],
        "payload": payload,
        "n_spool": n_spool,
        "n_naive": n_naive,
        "spool_s": t1 - t0,
        "naive_s": t2 - t1,
    }


def main(quick: bool = False) -> None:
    minutes = 1.0 if quick else float(os.environ.get("LISTENPOST_BENCH_SPOOL_MINUTES", "60"))
    per_hour = 3600 / (int(minutes * 60 / FLUSH_S) * FLUSH_S)
    rounds = [_one_round(minutes) for _ in range(_repeat.repeats(3))]  # each round: spool, then naive
    r = rounds[-1]
    print(
        f"{minutes:g} virtual minutes at {RATE_PER_S} readings/s, {FLUSH_S:g} s commits "
        f"({r['n_spool']} / {r['n_naive']} readings), {len(rounds)} rounds; MB/h:"
    )
    for side, label in (
        ("spool", "spool (one gzip'd row per batch)"),
        ("naive", "naive (one row per reading)     "),
    ):
        w = [x[f"{side}_w"] * per_hour / 1e6 for x in rounds]
        c = [x[f"{side}_c"] * per_hour / 1e6 for x in rounds]
        print(f"  {label}: write_bytes {_repeat.spread(w, '.1f')}   wchar {_repeat.spread(c, '.1f')}")
    payload = r["payload"]
    print(
        f"  spool payload (compressed bodies): {payload * per_hour / 1e6:.1f} MB/h, "
        f"{payload / max(r['n_spool'], 1):.2f} B/reading; write amplification "
        f"{r['spool_w'] / max(payload, 1):.1f}x (write_bytes / payload)"
    )
    if all(x["spool_w"] for x in rounds):
        _repeat.report("spool_io", "naive/spool write_bytes", [x["naive_w"] / x["spool_w"] for x in rounds])
    else:
        print("  write_bytes is 0 here (no block device under this directory?): compare wchar")
    _repeat.report("spool_io", "naive/spool wchar", [x["naive_c"] / max(x["spool_c"], 1) for x in rounds])


if __name__ == "__main__":
    main()
