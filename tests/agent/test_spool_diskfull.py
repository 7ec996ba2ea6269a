"""
The agent on a full disk: readings wait in a bounded memory queue the uplink can send from, the oldest
give way with an exact count that reaches the collector as a gap record, and a run that ends with
readings neither delivered nor spooled says how many and exits non-zero.

Two ways to fill the disk: ``OSError(ENOSPC)`` injected where the spool opens a write transaction (the
file layer; reads keep working, as on a full card), and a real kernel limit (``RLIMIT_FSIZE`` → EFBIG)
on a real ``listenpost agent replay`` process.
"""

from __future__ import annotations

import asyncio
import contextlib
import errno
import gzip
import json
import os
import random
import resource
import signal
import sys
from collections import Counter
from pathlib import Path

from aiohttp import web

from listenpost.agent.spool import Spool
from listenpost.agent.spool import disk as disk_mod
from listenpost.core import wire
from listenpost.core.clock import VirtualClock
from listenpost.core.records import Reading

FLUSH = 5.0
LISTENPOST = Path(sys.executable).parent / "listenpost"
UUID_HEX = "4d2a0c1e7f3b4c559e612b8f0a7d3c10"
UUID_TEXT = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"
TOKEN = "tok-g9-a-0123456789abcdef0123"
CHILD_TIMEOUT_S = 60.0


class FullDisk:
    """Every write transaction of the spool fails with ENOSPC while ``on``; reads still work."""

    def __init__(self, monkeypatch) -> None:
        self.on = False
        self.refused = 0
        real = disk_mod.transaction

        @contextlib.contextmanager
        def transaction(conn, *, durable):
            if self.on:
                self.refused += 1
                raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
            with real(conn, durable=durable):
                yield

        monkeypatch.setattr(disk_mod, "transaction", transaction)


def reading(i: int) -> Reading:
    """Reading ``i`` carries its id in its tag, so each one can be traced."""
    return Reading(f"lpx:{i:08x}", (50_000 + i) * 1_000_000, -60.0)


def ids_of(content: bytes) -> list[int]:
    d = wire.decode_content(json.loads(content))
    return [int(r.tag.split(":")[1], 16) for r in d.readings()]


async def test_disk_full_keeps_the_newest_in_a_bounded_memory_queue_and_counts_every_drop(
    tmp_path: Path, clock: VirtualClock, monkeypatch
) -> None:
    full = FullDisk(monkeypatch)
    path = tmp_path / "spool.sqlite"
    bound = 1000
    spool = await Spool.open(
        path,
        clock=clock,
        max_bytes=8 << 20,
        flush_seconds=FLUSH,
        max_batch_readings=100,
        max_pending_readings=bound,
    )
    for i in range(50):
        spool.add(reading(i))
    assert await spool.seal(boot="b", offset_db=0.0) is not None
    full.on = True
    n = 50
    for _ in range(40):  # 200 s of a busy room with the card full
        for _ in range(100):
            spool.add(reading(n))
            n += 1
        await spool.seal(boot="b", offset_db=0.0)
        st = spool.stats()
        assert st.degraded and full.refused > 0
        assert st.readings_pending <= bound  # the memory queue is bounded
        await clock.advance(FLUSH)
    st = spool.stats()
    in_memory, dropped = st.readings_pending, st.dropped_readings
    assert dropped > 0 and in_memory + dropped == n - 50  # exact: every reading kept or counted
    # The queue is not "empty" while it holds readings: the uplink gets the newest ones from memory.
    head = await spool.peek_oldest()
    assert head is not None and head.n_readings > 0

    full.on = False  # space again: memory goes to disk under its keys, a gap record counts the drops
    await clock.advance(FLUSH * 16)
    await spool.seal(boot="b", offset_db=0.0)
    assert not spool.stats().degraded
    delivered: Counter = Counter()
    gaps = []
    while (b := await spool.peek_oldest()) is not None:
        content = json.loads(b.content)
        if content["gap"] is not None:
            gaps.append((b.epoch, b.seq, content["gap"]))
        delivered.update(ids_of(b.content))
        await spool.ack(b.epoch, b.seq)
    assert max(delivered.values()) == 1  # nothing twice
    assert set(range(50)) <= set(delivered)  # the batch sealed before the disk filled
    assert set(range(n - 900, n)) <= set(delivered)  # the newest readings survived
    assert len(delivered) + dropped == n
    assert sum(g["readings"] for _, _, g in gaps) == dropped  # the collector is told the exact count
    for epoch, seq, g in gaps:
        # The collector applies a gap's range to the envelope's epoch: they must agree.
        assert g["reason"] == "spool_full" and g["epoch"] == epoch and g["first_seq"] <= seq <= g["last_seq"]
    await spool.close()
    spool = await Spool.open(path, clock=clock, max_bytes=8 << 20, flush_seconds=FLUSH)
    assert spool.stats().dropped_readings == dropped  # the counter is durable
    await spool.close()


async def test_close_on_a_full_disk_reports_what_was_lost(
    tmp_path: Path, clock: VirtualClock, monkeypatch
) -> None:
    full = FullDisk(monkeypatch)
    spool = await Spool.open(tmp_path / "spool.sqlite", clock=clock, max_bytes=8 << 20, flush_seconds=FLUSH)
    full.on = True
    for i in range(300):
        spool.add(reading(i))
    await spool.seal(boot="b", offset_db=0.0)
    await spool.close()
    assert spool.lost_at_close == 300


# ---------------------------------------------------------------------------- a real full disk


class Collector:
    """Stores batches by key; answers heartbeats. ``refuse`` answers every batch with 401."""

    def __init__(self, refuse: bool = False) -> None:
        self.refuse = refuse
        self.batches: dict[tuple[str, int], dict] = {}
        self.heartbeats: list[dict] = []

    def app(self) -> web.Application:
        app = web.Application()
        app.router.add_post("/v1/batches", self.batch)
        app.router.add_post("/v1/heartbeat", self.heartbeat)
        return app

    async def batch(self, request: web.Request) -> web.Response:
        if self.refuse:
            return web.json_response({"error": {"code": "unauthorized"}}, status=401)
        raw = await request.read()  # aiohttp undoes Content-Encoding: gzip itself
        body = json.loads(gzip.decompress(raw) if raw[:2] == b"\x1f\x8b" else raw)
        assert wire.digest(body["content"]) == body["digest"]
        key = (body["epoch"], body["seq"])
        status = "duplicate" if key in self.batches else "stored"
        self.batches.setdefault(key, body["content"])
        return web.json_response({"status": status, "t2": 1.8e9, "t3": 1.8e9})

    async def heartbeat(self, request: web.Request) -> web.Response:
        self.heartbeats.append(await request.json())
        return web.json_response({"t2": 1.8e9, "t3": 1.8e9, "config_etag": None})

    def readings(self) -> Counter:
        out: Counter = Counter()
        for content in self.batches.values():
            for r in wire.decode_content(content).readings():
                out[(r.tag, r.t_mono_ns // 1_000_000)] += 1
        return out


def board(tmp_path: Path, url: str, adverts: int) -> tuple[Path, Path, set]:
    """A recording of ``adverts`` iBeacon adverts (20 tags), the board's agent.yaml, and the oracle."""
    state = tmp_path / "state"
    state.mkdir()
    (state / "credential").write_text(TOKEN + "\n")
    (state / "tags.txt").write_text("".join(f"ibeacon:{UUID_TEXT}:7:{m}\n" for m in range(20)))
    lines = [
        json.dumps(
            {
                "format": "listenpost-recording",
                "version": 1,
                "board": "g9-a",
                "boot": "x",
                "wall_at_start": 1.8e9,
            }
        )
    ]
    expected = set()
    rng = random.Random(9)  # times and RSSI that do not compress away: the WAL must outgrow the cap
    t_ms = 100_000
    for i in range(adverts):
        t_ms += rng.randint(1, 40)
        minor = rng.randrange(20)
        lines.append(
            json.dumps(
                {
                    "t": t_ms / 1000,
                    "a": f"C0:00:00:00:{i // 256 % 256:02X}:{i % 256:02X}",
                    "at": 1,
                    "r": rng.randint(-99, -40),
                    "m": {"004c": f"0215{UUID_HEX}0007{minor:04x}c5"},
                }
            )
        )
        expected.add((f"ibeacon:{UUID_TEXT}:7:{minor}", t_ms))
    rec = tmp_path / "g9-a.jsonl"
    rec.write_text("\n".join(lines) + "\n")
    cfg = tmp_path / "agent.yaml"
    cfg.write_text(
        json.dumps(
            {
                "board": "g9-a",
                "state_dir": str(state),
                "tags": {"file": "tags.txt"},
                "collector": {"url": url, "timeout_seconds": 5.0},
                "spool": {"flush_seconds": 1.0},
                "heartbeat": {"period_seconds": 5.0},
                "uplink": {"backoff_initial_seconds": 0.05, "backoff_max_seconds": 0.2},
                "log": {"format": "json"},
            }
        )
    )
    return rec, cfg, expected


async def replay_with_a_full_state_dir(tmp_path: Path, collector: Collector) -> tuple[int, str, set]:
    """``listenpost agent replay --fast`` in a process that may not grow any file past the spool's size."""
    runner = web.AppRunner(collector.app())
    await runner.setup()
    site = web.TCPSite(runner, "127.0.0.1", 0)
    await site.start()
    port = runner.addresses[0][1]
    try:
        rec, cfg, expected = board(tmp_path, f"http://127.0.0.1:{port}", 20_000)
        spool_path = tmp_path / "state" / "spool.sqlite"
        s = await Spool.open(spool_path, clock=VirtualClock(), max_bytes=8 << 20, flush_seconds=FLUSH)
        await s.close()
        # The -shm index needs 32 KiB; past that (and the spool's own size) no file may grow: the first
        # seal's WAL frames fail with EFBIG, as on a card with no space left.
        cap = max(32768, spool_path.stat().st_size) + 4096

        def limit() -> None:
            signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # the write returns EFBIG instead of killing us
            resource.setrlimit(resource.RLIMIT_FSIZE, (cap, cap))

        proc = await asyncio.create_subprocess_exec(
            str(LISTENPOST),
            "agent",
            "replay",
            str(rec),
            "--config",
            str(cfg),
            "--fast",
            stdout=asyncio.subprocess.PIPE,
            stderr=asyncio.subprocess.PIPE,
            preexec_fn=limit,
        )
        out, err = await asyncio.wait_for(proc.communicate(), CHILD_TIMEOUT_S)
        return proc.returncode, (out + err).decode(), expected
    finally:
        await runner.cleanup()


def events(log: str) -> list[dict]:
    out = []
    for line in log.splitlines():
        with contextlib.suppress(ValueError):
            obj = json.loads(line)
            if isinstance(obj, dict):
                out.append(obj)
    return out


async def test_replay_on_a_full_disk_delivers_every_reading_from_memory(tmp_path: Path) -> None:
    collector = Collector()
    rc, log, expected = await replay_with_a_full_state_dir(tmp_path, collector)
    ev = events(log)
    assert any(e.get("event") == "spool_degraded" for e in ev), f"the fault never fired:\n{log[-3000:]}"
    assert rc == 0, log[-3000:]
    got = collector.readings()
    assert set(got) == expected and set(got.values()) == {1}
    assert any(h["stats"].get("spool_degraded") is True for h in collector.heartbeats)


async def test_replay_on_a_full_disk_that_cannot_deliver_exits_non_zero_with_the_count(
    tmp_path: Path,
) -> None:
    collector = Collector(refuse=True)
    rc, log, expected = await replay_with_a_full_state_dir(tmp_path, collector)
    ev = events(log)
    assert any(e.get("event") == "spool_degraded" for e in ev), f"the fault never fired:\n{log[-3000:]}"
    assert rc != 0, log[-3000:]
    lost = [e for e in ev if e.get("event") == "readings_lost"]
    assert lost and lost[-1]["readings"] == len(expected), log[-3000:]
