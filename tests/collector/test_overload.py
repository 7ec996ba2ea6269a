"""
Overload: past ``limits.max_inflight_batches`` batches at once the collector answers 429 with Retry-After
before reading the body; the agent's real uplink backs off on its clock and, in the end, every batch is
stored exactly once. A real collector on loopback with a SQLite file; agent spools are real files.
"""

from __future__ import annotations

import asyncio
import json
import random
from pathlib import Path

import pytest
from aiohttp.test_utils import TestClient

from listenpost.agent.client.uplink import Uplink, UplinkState
from listenpost.agent.spool import Spool
from listenpost.collector.config import parse_settings
from listenpost.collector.state import RUNTIME, STORE
from listenpost.core.clock import VirtualClock
from listenpost.core.errors import ConfigError
from listenpost.core.records import Reading
from tests.collector.test_api import TAGS, batch_body, enrolled, import_tags, make_client, readings
from tests.collector.test_monitor import until


async def filled_spool(path: Path, clock: VirtualClock, batches: int, per_batch: int) -> Spool:
    spool = await Spool.open(path, clock=clock, max_bytes=4 << 20, flush_seconds=5.0)
    for _ in range(batches):
        base = clock.monotonic_ns()
        for i in range(per_batch):
            spool.add(Reading(TAGS[i % len(TAGS)], base + i * 9_000_000, -58.0 - i % 25))
        await spool.seal(boot=clock.boot_id, offset_db=0.0)
        await clock.advance(1.0)
    return spool


def uplink_for(
    client: TestClient, auth: dict[str, str], board: str, clock: VirtualClock, spool: Spool, seed: int
) -> Uplink:
    return Uplink(
        base_url=str(client.make_url("")),
        token=auth["Authorization"].removeprefix("Bearer "),
        board=board,
        clock=clock,
        spool=spool,
        session=client.session,
        timeout_s=5.0,
        backoff_initial_s=0.5,
        backoff_max_s=8.0,
        rng=random.Random(seed),
    )


class SlowPost:
    """A batch POST whose body arrives in two parts: between them it holds an in-flight slot."""

    def __init__(self, client: TestClient, auth: dict[str, str], body: dict) -> None:
        self.client, self.auth = client, auth
        self.data = json.dumps(body).encode()

    async def start(self) -> None:
        host, port = self.client.server.host, self.client.server.port
        self.reader, self.writer = await asyncio.open_connection(host, port)
        head = (
            f"POST /v1/batches HTTP/1.1\r\nHost: {host}:{port}\r\nAuthorization: {self.auth['Authorization']}\r\n"
            f"Content-Type: application/json\r\nContent-Length: {len(self.data)}\r\nConnection: close\r\n\r\n"
        )
        self.writer.write(head.encode() + self.data[:10])
        await self.writer.drain()

    async def finish(self) -> int:
        self.writer.write(self.data[10:])
        await self.writer.drain()
        answer = await asyncio.wait_for(self.reader.read(), 5)
        self.writer.close()
        await self.writer.wait_closed()
        return int(answer.split(b" ", 2)[1])


async def test_busy_collector_answers_429_and_the_uplink_backs_off_then_stores_once(
    aiohttp_client, tmp_path, clock
):
    client = await make_client(
        aiohttp_client, tmp_path, clock, limits={"max_inflight_batches": 1, "busy_retry_after_seconds": 7}
    )
    await import_tags(client, tmp_path)
    slow_auth = await enrolled(client, tmp_path, "g0-a")
    auth = await enrolled(client, tmp_path, "g1-a", "G1 Light and Colour")
    runtime = client.app[RUNTIME]
    slow = SlowPost(client, slow_auth, batch_body("g0-a", 0, readings(30)))
    await slow.start()
    await until(lambda: runtime.batches_inflight == 1, "the slow request to hold the slot")

    spool = await filled_spool(tmp_path / "g1-a.spool", clock, batches=4, per_batch=25)
    uplink = uplink_for(client, auth, "g1-a", clock, spool, seed=3)
    task = asyncio.create_task(uplink.run(until_empty=True))
    try:
        await asyncio.wait_for(uplink.wait_parked(), 5)
        # Refused before its body was read, told to come back in 7 s; it waits at least that long.
        assert (uplink.state, uplink.counters.last_status, uplink.counters.acked) == (
            UplinkState.BACKOFF,
            429,
            0,
        )
        assert uplink.parked_until - clock.monotonic() >= 7.0
        assert runtime.counters.overloaded == 1 and runtime.batches_inflight == 1
        r = await client.get("/metrics")
        text = await r.text()
        assert 'listenpost_batches_total{status="overloaded"} 1.0' in text
        assert "listenpost_batches_inflight 1.0" in text
        # Nothing moves before Retry-After, however often the clock is looked at.
        await clock.advance(6.9)
        assert uplink.counters.sent == 1
        assert await slow.finish() == 200
        assert runtime.batches_inflight == 0
        await clock.advance(0.2)
        await asyncio.wait_for(task, 10)
    finally:
        task.cancel()
        await spool.close()
    assert (uplink.counters.sent, uplink.counters.stored, uplink.counters.duplicates) == (5, 4, 0)
    counts = {c.board: c for c in await client.app[STORE].board_counts()}
    assert (counts["g1-a"].batches_total, counts["g1-a"].readings_total) == (4, 100)
    assert (counts["g0-a"].batches_total, counts["g0-a"].readings_total) == (1, 30)


async def test_a_fleet_burst_is_stored_once_through_429s(aiohttp_client, tmp_path, clock):
    """Eight boards drain their spools at once against two slots: all stored once, every 429 retried."""
    client = await make_client(
        aiohttp_client, tmp_path, clock, limits={"max_inflight_batches": 2, "busy_retry_after_seconds": 1}
    )
    await import_tags(client, tmp_path)
    uplinks, spools = [], []
    for k in range(8):
        name = f"g{k % 4}-{'ab'[k // 4]}"
        auth = await enrolled(client, tmp_path, name, f"G{k % 4} Room")
        spool = await filled_spool(tmp_path / f"{name}.spool", clock, batches=5, per_batch=200)
        spools.append(spool)
        uplinks.append(uplink_for(client, auth, name, clock, spool, seed=k))
    tasks = [asyncio.create_task(u.run(until_empty=True)) for u in uplinks]
    try:
        for _ in range(500):
            live = [(u, t) for u, t in zip(uplinks, tasks, strict=True) if not t.done()]
            if not live:
                break
            # Wait until every unfinished uplink is parked on the clock (or done), then wake the earliest.
            for u, t in live:
                parked = asyncio.ensure_future(u.wait_parked())
                done, _ = await asyncio.wait({parked, t}, timeout=5, return_when=asyncio.FIRST_COMPLETED)
                parked.cancel()
                assert done, f"uplink {u.board} neither parked nor finished within 5 s"
            waiting = [u.parked_until for u, t in live if not t.done() and u.parked_until is not None]
            if waiting:
                await clock.advance(max(0.0, min(waiting) - clock.monotonic()))
        else:
            pytest.fail("the burst did not drain")
        for t in tasks:
            t.result()
    finally:
        for t in tasks:
            t.cancel()
        for s in spools:
            await s.close()
    runtime = client.app[RUNTIME]
    counts = await client.app[STORE].board_counts()
    assert sorted((c.batches_total, c.readings_total) for c in counts) == [(5, 1000)] * 8
    assert sum(u.counters.stored for u in uplinks) == 40 and sum(u.counters.duplicates for u in uplinks) == 0
    # Every retry the boards made was a 429, and the collector counted each one.
    assert sum(u.counters.retries for u in uplinks) == runtime.counters.overloaded
    assert runtime.batches_inflight == 0
    print(f"\n  burst: {runtime.counters.overloaded} answers 429 for 40 batches from 8 boards, 2 slots")


def test_limits_are_validated_with_the_key_named():
    with pytest.raises(ConfigError, match=r"limits\.max_inflight_batches"):
        parse_settings({"limits": {"max_inflight_batches": 0}}, "c.yaml")
    with pytest.raises(ConfigError, match=r"limits\.busy_retry_after_seconds"):
        parse_settings({"limits": {"busy_retry_after_seconds": 0}}, "c.yaml")
    assert parse_settings({}, "c.yaml").limits.max_inflight_batches == 128
