"""
Export of N stored readings through a collector process against the floor of the same work.

- (a) export: ``POST /v1/admin/exports`` (npz, 5 s bins) to a ``listenpost collector serve`` subprocess
  on a SQLite file, polled with ``?wait=`` and downloaded, as ``listenpost collector export`` does;
- (b) floor: in this process, the same rows by a plain ``SELECT`` of the four columns into numpy and a
  numpy group-by (``np.maximum.at`` / ``np.add.at`` on the flat cell index) into the same table.

The sides run interleaved (A B A B ...); the ratio a/b is taken per round and printed as median and
spread. Beside it: the collector's peak resident set (``VmHWM`` before the first export and after the
last; ``ru_maxrss`` from ``wait4`` when it exits) and the latency of board uploads (200 readings each)
before any export and while exports run.

``python -m bench.export [--readings N] [--rounds R]``; ``python -m bench export`` runs it with the
others (default N = 10,000,000; ``--quick``: 200,000).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import os
import signal
import socket
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from bench import _repeat

T0 = 1_800_000_000.0
BOARDS = 50
TAGS = 200
PER_SECOND = 10_000
"""Readings per second of collector time: 100 boards × 100 tags at 1 Hz, as the schema is sized for."""
BIN_S = 5.0
UPLOAD_READINGS = 200


def build(path: Path, n: int) -> tuple[float, float]:
    """A migrated store with N readings over N / PER_SECOND seconds; the range to export."""
    from listenpost.collector.store import Board, Enrollment
    from listenpost.collector.store.sqlite import SqliteStore

    span = n / PER_SECOND

    async def schema() -> None:
        store = await SqliteStore.open(path)
        for b in range(BOARDS):
            name = f"b{b:02d}-a"
            await store.add_board(Board(name, "Hall", None, T0 - 10), Enrollment(name, f"h{b}", T0))
        await store.add_tags([f"lpx:{g:08x}" for g in range(TAGS)], T0 - 10)
        await store.close()

    asyncio.run(schema())
    con = sqlite3.connect(path, isolation_level=None)
    board_ids = [r[0] for r in con.execute("SELECT id FROM boards ORDER BY name")]
    tag_ids = [r[0] for r in con.execute("SELECT id FROM tags ORDER BY tag")]
    con.execute("BEGIN")
    batch_of = {}
    for b in board_ids:
        cur = con.execute(
            "INSERT INTO batches (board_id, epoch, seq, digest, boot, n, received_at, offset_dd) "
            "VALUES (?, 'e', 0, 'd', 'boot', 0, ?, 0)",
            (b, T0),
        )
        batch_of[b] = cur.lastrowid
    rng = np.random.default_rng(1)
    step = 1_000_000
    for lo in range(0, n, step):
        m = min(step, n - lo)
        t = np.sort(T0 + rng.uniform(lo / PER_SECOND, (lo + m) / PER_SECOND, m))
        bi = rng.integers(0, BOARDS, m)
        gi = rng.integers(0, TAGS, m)
        rssi = rng.integers(-1000, -300, m)
        bid = np.asarray(board_ids)[bi]
        rows = zip(
            np.asarray([batch_of[b] for b in board_ids])[bi].tolist(),
            bid.tolist(),
            np.asarray(tag_ids)[gi].tolist(),
            ((t - T0) * 1000).astype(np.int64).tolist(),
            t.tolist(),
            rssi.tolist(),
            strict=True,
        )
        con.executemany(
            "INSERT INTO readings (batch_id, board_id, tag_id, t_board_ms, t_collector, rssi_dd) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            rows,
        )
    con.execute("COMMIT")
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.close()
    return T0, T0 + span


def floor(path: Path, t_from: float, t_to: float) -> float:
    """Seconds for SELECT + numpy group-by into the (tag, bin, board) max and counts."""
    start = time.perf_counter()
    con = sqlite3.connect(path)
    board_ids = np.array([r[0] for r in con.execute("SELECT id FROM boards ORDER BY name")])
    tag_ids = np.array([r[0] for r in con.execute("SELECT id FROM tags ORDER BY tag")])
    arr = np.fromiter(
        con.execute(
            "SELECT board_id, tag_id, t_collector, rssi_dd FROM readings WHERE t_collector >= ? AND t_collector < ?",
            (t_from, t_to),
        ),
        dtype=[("b", np.int64), ("g", np.int64), ("t", np.float64), ("r", np.int32)],
    )
    con.close()
    n_bins = int(np.ceil((t_to - t_from) / BIN_S))
    bi = np.searchsorted(board_ids, arr["b"])
    gi = np.searchsorted(tag_ids, arr["g"])
    k = np.minimum(((arr["t"] - t_from) / BIN_S).astype(np.int64), n_bins - 1)
    flat = (gi * n_bins + k) * len(board_ids) + bi
    size = len(tag_ids) * n_bins * len(board_ids)
    out = np.full(size, -np.inf)
    np.maximum.at(out, flat, arr["r"].astype(np.float64))
    counts = np.bincount(flat, minlength=size)
    assert counts.sum() == len(arr)
    return time.perf_counter() - start


def vm_hwm_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1])
    return 0


class Collector:
    """``listenpost collector serve`` on the bench's file, in a child process."""

    def __init__(self, state: Path, db: Path) -> None:
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            self.port = s.getsockname()[1]
        self.url = f"http://127.0.0.1:{self.port}"
        self.state = state
        self.proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "listenpost",
                "collector",
                "serve",
                "--state-dir",
                str(state),
                "--db",
                f"sqlite:///{db}",
                "--port",
                str(self.port),
                "--log-format",
                "json",
            ],
            stdout=subprocess.DEVNULL,
            stderr=(state / "collector.log").open("wb"),
        )

    def log_tail(self) -> str:
        return "\n".join((self.state / "collector.log").read_text(errors="replace").splitlines()[-30:])

    def stop(self) -> int:
        """SIGTERM, reap; the child's ru_maxrss, KiB."""
        self.proc.send_signal(signal.SIGTERM)
        _, _, usage = os.wait4(self.proc.pid, 0)
        self.proc.returncode = 0
        return usage.ru_maxrss


async def wait_up(c: Collector) -> dict[str, str]:
    import aiohttp

    for _ in range(300):  # bounded: 300 tries, 0.1 s apart
        with contextlib.suppress(aiohttp.ClientError, OSError):
            async with aiohttp.ClientSession(timeout=aiohttp.ClientTimeout(total=2)) as s:
                async with s.get(c.url + "/v1/openapi.json") as r:
                    if r.status == 200:
                        return {"Authorization": "Bearer " + (c.state / "admin-token").read_text().strip()}
        await asyncio.sleep(0.1)
    raise RuntimeError("the collector did not come up")


async def enroll(session, c: Collector, admin: dict[str, str]) -> dict[str, str]:
    async with session.post(
        c.url + "/v1/admin/boards", json={"name": "up-a", "room": "Hall"}, headers=admin
    ) as r:
        code = (await r.json())["code"]
    async with session.post(c.url + "/v1/enroll", json={"code": code, "fingerprint": {}}) as r:
        return {"Authorization": "Bearer " + (await r.json())["token"]}


async def upload(session, c: Collector, token: dict[str, str], seq: int) -> float:
    from listenpost.core import wire
    from listenpost.core.records import Reading

    readings = [
        Reading(f"lpx:{i % TAGS:08x}", (seq * 10 + i // 20) * 10**9, -70.0) for i in range(UPLOAD_READINGS)
    ]
    content = wire.encode_content(readings, boot="boot-1", offset_db=0.0, gap=None)
    body = {
        "v": 1,
        "board": "up-a",
        "boot": "boot-1",
        "epoch": "00112233aabbccdd",
        "seq": seq,
        "digest": wire.digest(content),
        "clock": None,
        "t1": seq * 10.0 + 10,
        "content": content,
    }
    start = time.perf_counter()
    async with session.post(c.url + "/v1/batches", json=body, headers=token) as r:
        await r.read()
        assert r.status == 200, r.status
    return time.perf_counter() - start


async def export(session, c: Collector, admin, t_from: float, t_to: float, out: Path) -> tuple[float, int]:
    """Seconds for one export job start to file on disk, and its readings."""
    start = time.perf_counter()
    params = {"from": repr(t_from), "to": repr(t_to), "bin": repr(BIN_S), "format": "npz"}
    async with session.post(c.url + "/v1/admin/exports", params=params, headers=admin) as r:
        job = await r.json()
    while job["state"] == "running":
        async with session.get(
            f"{c.url}/v1/admin/exports/{job['job']}", params={"wait": "5"}, headers=admin
        ) as r:
            job = await r.json()
    assert job["state"] == "done", job
    async with session.get(f"{c.url}/v1/admin/exports/{job['job']}/file", headers=admin) as r:
        with out.open("wb") as f:
            async for piece in r.content.iter_chunked(1 << 20):
                f.write(piece)
    return time.perf_counter() - start, job["readings"]


async def uploads_during(session, c, token, seq: list[int], busy: asyncio.Task) -> list[float]:
    """Upload latencies, one upload every 50 ms or so, until ``busy`` is done."""
    lat: list[float] = []
    while not busy.done():
        lat.append(await upload(session, c, token, seq[0]))
        seq[0] += 1
        await asyncio.sleep(0.05)
    return lat


def run(n: int, rounds: int) -> None:
    import aiohttp

    with tempfile.TemporaryDirectory(prefix="lp-bench-export-") as d:
        db, state = Path(d) / "collector.sqlite", Path(d) / "state"
        state.mkdir()
        t = time.perf_counter()
        t_from, t_to = build(db, n)
        print(
            f"  {n:,} readings, {BOARDS} boards x {TAGS} tags over {t_to - t_from:,.0f} s; "
            f"built in {time.perf_counter() - t:.0f} s; {db.stat().st_size / 1e6:,.0f} MB",
            flush=True,
        )
        c = Collector(state, db)
        seq = [0]

        async def main() -> tuple[dict[str, list[float]], list[float], list[float], int, int]:
            admin = await wait_up(c)
            idle_hwm = vm_hwm_kib(c.proc.pid)
            timeout = aiohttp.ClientTimeout(total=600)
            async with aiohttp.ClientSession(timeout=timeout) as s:
                token = await enroll(s, c, admin)
                before = []
                for _ in range(40):
                    before.append(await upload(s, c, token, seq[0]))
                    seq[0] += 1
                    await asyncio.sleep(0.05)
                got: dict[str, list[float]] = {"export": [], "floor": []}
                for _ in range(rounds):  # the timed exports run alone, like the floor
                    secs, readings = await export(s, c, admin, t_from, t_to, Path(d) / "out.npz")
                    assert readings == n, (readings, n)
                    got["export"].append(secs)
                    got["floor"].append(await asyncio.to_thread(floor, db, t_from, t_to))
                # One more export, with a board uploading throughout.
                task = asyncio.create_task(export(s, c, admin, t_from, t_to, Path(d) / "out.npz"))
                during = await uploads_during(s, c, token, seq, task)
                got["export_with_uploads"] = [(await task)[0]]
                return got, before, during, idle_hwm, vm_hwm_kib(c.proc.pid)

        try:
            got, before, during, idle_hwm, hwm = asyncio.run(main())
        except BaseException:
            print(c.log_tail(), file=sys.stderr)
            raise
        finally:
            maxrss = c.stop()
        print(f"  (a) export, npz via the job API   : {_repeat.spread(got['export'], '.2f', ' s')}")
        print(f"      the same, a board uploading   : {got['export_with_uploads'][0]:.2f} s")
        print(f"  (b) floor, SELECT + numpy group-by: {_repeat.spread(got['floor'], '.2f', ' s')}")
        _repeat.report(
            "export",
            f"export / (SELECT + numpy group-by), {n:,} readings",
            [a / b for a, b in zip(got["export"], got["floor"], strict=True)],
            "<= 1.3",
        )
        size = TAGS * int(np.ceil((t_to - t_from) / BIN_S)) * BOARDS
        print(f"  table {size:,} cells = {size * 12 / 1e6:,.0f} MB of output arrays")
        print(
            f"  collector peak RSS: {idle_hwm / 1024:,.0f} MiB idle, {hwm / 1024:,.0f} MiB after the exports "
            f"(VmHWM); ru_maxrss at exit {maxrss / 1024:,.0f} MiB"
        )
        q = lambda v, p: float(np.percentile(v, p)) * 1000  # noqa: E731
        print(
            f"  upload latency, {UPLOAD_READINGS} readings: before exports median {statistics.median(before) * 1000:.1f} ms "
            f"p95 {q(before, 95):.1f} ms ({len(before)}); during exports median "
            f"{statistics.median(during) * 1000:.1f} ms p95 {q(during, 95):.1f} ms max {max(during) * 1000:.1f} ms "
            f"({len(during)})"
        )
        _repeat.report(
            "export",
            "upload latency during / before export (median)",
            [statistics.median(during) / statistics.median(before)],
        )


def main(quick: bool = False, argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(prog="python -m bench.export")
    p.add_argument("--readings", type=int, default=200_000 if quick else 10_000_000)
    p.add_argument("--rounds", type=int, default=_repeat.repeats(3, 2))
    args = p.parse_args(argv or [])
    run(args.readings, args.rounds)


if __name__ == "__main__":
    from listenpost.core.logs import configure

    configure("console", "error")  # the figures are the output
    main(argv=sys.argv[1:])
