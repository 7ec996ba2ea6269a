"""
The uplink against real aiohttp servers on loopback that fail on purpose.

The test collector stores by (board, epoch, seq) and digest, as DEVELOPERS.md's wire protocol says
the real one does, so the oracle is: every reading the spool sealed is stored exactly once, and
duplicate *sends* (> 0, so the test cannot pass vacuously) were absorbed as ``duplicate``.
"""

from __future__ import annotations

import asyncio
import email.utils
import gzip
import json
import random
import socket
import struct
from collections import Counter, deque
from collections.abc import Callable
from typing import Any

import aiohttp
import ntplib
import pytest
from aiohttp import web

from listenpost.agent.client.heartbeat import Heartbeat
from listenpost.agent.client.uplink import (
    Exchange,
    ExchangeLog,
    Outcome,
    Uplink,
    UplinkState,
    parse_retry_after,
)
from listenpost.agent.spool import Spool
from listenpost.core import wire
from listenpost.core.clock import VirtualClock
from listenpost.core.records import Reading

TOKEN = "tok-g3-a-0123456789abcdef"
TAGS = [
    "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:1",
    "ibeacon:4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10:7:2",
    "eddystone:8b0ca750e7a74e14bd99:00000000001e",
    "lpx:00000007",
]


# --------------------------------------------------------------------------- the test collector


def _rst(request: web.Request) -> None:
    """Close the connection with a TCP reset (SO_LINGER 0), as a crashing proxy would."""
    sock = request.transport.get_extra_info("socket") if request.transport else None
    if sock is not None:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
    if request.transport is not None:
        request.transport.abort()


class Collector:
    """
    Stores batches by key and digest; ``faults`` is consumed one per request.

    A fault is one of: ``500``, ``503``/``429`` (with ``retry_after``), ``"reset"`` (before reading the
    body), ``"stall"`` (never answers), ``"lost_ack"`` (store, then drop the connection), ``400``/``413``
    (by seq, see ``reject``), ``401``.
    """

    def __init__(self, clock: VirtualClock) -> None:
        self.clock = clock
        self.batches: dict[tuple[str, str, int], str] = {}
        self.readings: Counter[tuple[str, int, int]] = Counter()
        self.gaps: list[dict[str, Any]] = []
        self.faults: deque[Any] = deque()
        self.reject: dict[int, int] = {}
        """seq → status to answer for that seq every time (400/413)."""
        self.unauthorized = False
        self.log: list[tuple[float, int | None, Any]] = []
        """(virtual arrival time, seq or None, what happened)"""
        self.bodies: list[dict[str, Any]] = []
        self.raw_bodies: list[bytes] = []
        self.encodings: list[str | None] = []
        self.never = asyncio.Event()

    def app(self) -> web.Application:
        app = web.Application()
        app.router.add_post("/v1/batches", self.handle)
        return app

    async def handle(self, request: web.Request) -> web.StreamResponse:
        t2 = self.clock.time()
        fault = self.faults.popleft() if self.faults else None
        if fault == "reset":
            self.log.append((self.clock.monotonic(), None, "reset"))
            _rst(request)
            return web.Response(status=500)
        if fault == "stall":
            self.log.append((self.clock.monotonic(), None, "stall"))
            await self.never.wait()
        if request.headers.get("Authorization") != f"Bearer {TOKEN}" or self.unauthorized:
            self.log.append((self.clock.monotonic(), None, 401))
            return web.json_response({"error": {"code": "unauthorized", "message": "bad token"}}, status=401)
        raw = await request.read()
        self.encodings.append(request.headers.get("Content-Encoding"))
        if raw[:2] == b"\x1f\x8b":  # the server may hand us the body still compressed
            raw = gzip.decompress(raw)
        body = json.loads(raw)
        self.bodies.append(body)
        self.raw_bodies.append(raw)
        seq = body["seq"]
        if isinstance(fault, int) and fault in (500, 503, 429):
            self.log.append((self.clock.monotonic(), seq, fault))
            headers = {"Retry-After": str(self.retry_after)} if fault in (503, 429) else {}
            return web.json_response({"error": {"code": "busy"}}, status=fault, headers=headers)
        if seq in self.reject:
            self.log.append((self.clock.monotonic(), seq, self.reject[seq]))
            return web.json_response(
                {"error": {"code": "bad", "field": "content", "message": "no"}}, status=self.reject[seq]
            )
        content = body["content"]
        if wire.digest(content) != body["digest"]:
            return web.json_response({"error": {"code": "bad_digest", "field": "digest"}}, status=400)
        decoded = wire.decode_content(content)
        key = (body["board"], body["epoch"], seq)
        if key in self.batches:
            status = "duplicate" if self.batches[key] == body["digest"] else "conflict"
        else:
            status = "stored"
            self.batches[key] = body["digest"]
            for r in decoded.readings():
                self.readings[(r.tag, r.t_mono_ns // 1_000_000, round(r.rssi_dbm * 10))] += 1
            if decoded.gap is not None:
                self.gaps.append(decoded.gap)
        self.log.append((self.clock.monotonic(), seq, status))
        if status == "conflict":
            return web.json_response({"error": {"code": "digest_conflict", "field": "digest"}}, status=409)
        if fault == "lost_ack":
            _rst(request)  # stored and committed, but the answer never reaches the board
        return web.json_response({"status": status, "t2": t2, "t3": self.clock.time()})

    retry_after = 7


# --------------------------------------------------------------------------- helpers


async def fill(spool: Spool, clock: VirtualClock, batches: int, per_batch: int) -> set[tuple[str, int, int]]:
    """Seal ``batches`` batches of distinct readings; return the oracle set (tag, t_ms, rssi_dd)."""
    expected = set()
    for _ in range(batches):
        base = clock.monotonic_ns()
        for i in range(per_batch):
            r = Reading(TAGS[i % len(TAGS)], base + i * 7_000_000, -60.0 - (i % 30))
            spool.add(r)
            expected.add((r.tag, r.t_mono_ns // 1_000_000, round(r.rssi_dbm * 10)))
        await spool.seal(boot=clock.boot_id, offset_db=0.0)
        await clock.advance(1.0)
    return expected


async def open_spool(tmp_path, clock: VirtualClock) -> Spool:
    return await Spool.open(tmp_path / "spool.sqlite", clock=clock, max_bytes=4 << 20, flush_seconds=5.0)


def make_uplink(server, clock, spool, **kw) -> Uplink:
    kw.setdefault("timeout_s", 5.0)
    return Uplink(
        base_url=str(server.make_url("")),
        token=TOKEN,
        board="g3-a",
        clock=clock,
        spool=spool,
        rng=random.Random(7),
        **kw,
    )


async def drive(
    clock: VirtualClock,
    uplink: Uplink,
    task: asyncio.Task[Any],
    until: Callable[[], bool] | None = None,
    rounds: int = 400,
) -> None:
    """
    Step virtual time to each of the uplink's wake-ups until the task ends (or ``until`` holds).

    ``until`` is looked at only while the uplink is parked on the clock: right after an advance the
    woken uplink may still have a loopback request in flight, and how far that got is real time.
    """
    for _ in range(rounds):
        if task.done():
            task.result()
            return
        parked = asyncio.ensure_future(uplink.wait_parked())
        done, _ = await asyncio.wait({parked, task}, timeout=10, return_when=asyncio.FIRST_COMPLETED)
        parked.cancel()
        assert done, "uplink neither parked on the clock nor finished within 10 s"
        if task in done:
            task.result()
            return
        if until is not None and until():
            return
        assert uplink.parked_until is not None
        await clock.advance(max(0.0, uplink.parked_until - clock.monotonic()))
    raise AssertionError("uplink did not finish")


# --------------------------------------------------------------------------- tests


async def test_faults_and_lost_ack_store_every_reading_exactly_once(aiohttp_server, tmp_path):
    """500, 503/429 + Retry-After, a reset and a lost ack: all readings stored once, duplicates absorbed."""
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    expected = await fill(spool, clock, batches=6, per_batch=50)
    collector.faults.extend([500, 503, "reset", "lost_ack", None, 429, "lost_ack", None, 500])
    uplink = make_uplink(server, clock, spool)
    task = asyncio.create_task(uplink.run(until_empty=True))
    await drive(clock, uplink, task)

    assert set(collector.readings) == expected
    assert all(n == 1 for n in collector.readings.values()), "a reading was stored twice"
    assert len(collector.batches) == 6
    # Anti-vacuity: the lost acks really caused resends that the collector absorbed.
    assert uplink.counters.duplicates == 2
    assert [x for _, _, x in collector.log].count("duplicate") == 2
    assert uplink.counters.retries == 7  # 500, 503, reset, lost_ack, 429, lost_ack, 500
    assert (uplink.counters.acked, uplink.counters.stored) == (6, 4)
    assert spool.stats().batches == 0 or (await spool.peek_oldest()) is None
    # Retry-After was honoured on virtual time: the attempt after a 503/429 came >= 7 s later.
    for (t, _, what), (t_next, _, _) in zip(collector.log, collector.log[1:], strict=False):
        if what in (503, 429):
            assert t_next - t >= collector.retry_after
    assert all(e == "gzip" for e in collector.encodings)
    await uplink.close()
    await spool.close()


async def test_the_spooled_content_bytes_are_sent_as_they_are(aiohttp_server, tmp_path):
    """Content is encoded once, at seal time: the body carries the digested bytes verbatim."""
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    await fill(spool, clock, batches=3, per_batch=20)
    spooled = []
    while (b := await spool.peek_oldest()) is not None:
        spooled.append(b)
        await spool.ack(b.epoch, b.seq)
    assert len(spooled) == 3
    uplink = make_uplink(server, clock, spool)
    for b in spooled:
        await uplink.send(b)
    for b, raw in zip(spooled, collector.raw_bodies, strict=True):
        assert b'"content":' + b.content + b"}" in raw
        assert wire.digest(b.content) == b.digest
        env = wire.parse_batch(
            json.loads(raw), max_readings=10_000
        )  # the collector's reading of the envelope
        assert (env.epoch, env.seq, env.digest, env.board) == (b.epoch, b.seq, b.digest, "g3-a")
    assert [x for _, _, x in collector.log] == ["stored"] * 3
    await uplink.close()
    await spool.close()


async def test_stalled_collector_times_out_and_the_batch_is_retried(aiohttp_server, tmp_path):
    """A handler that never answers is cut off by the client timeout; the retry stores the batch."""
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    expected = await fill(spool, clock, batches=2, per_batch=10)
    collector.faults.append("stall")
    # The one real wait in this file: a 0.2 s client timeout against a handler that never answers.
    uplink = make_uplink(server, clock, spool, timeout_s=0.2)
    task = asyncio.create_task(uplink.run(until_empty=True))
    await drive(clock, uplink, task)
    assert set(collector.readings) == expected
    assert uplink.counters.retries == 1
    assert collector.log[0][2] == "stall"
    await uplink.close()
    await spool.close()


async def test_400_and_413_are_dead_lettered_without_blocking_later_batches(aiohttp_server, tmp_path):
    """Refused batches go to the dead-letter table; the ones behind them are stored; gaps explain them."""
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    await fill(spool, clock, batches=5, per_batch=20)
    first = await spool.peek_oldest()
    collector.reject = {first.seq + 1: 400, first.seq + 3: 413}
    uplink = make_uplink(server, clock, spool)
    task = asyncio.create_task(uplink.run(until_empty=True))
    await drive(clock, uplink, task)
    stored_seqs = {seq for (_, _, seq) in collector.batches}
    assert {first.seq, first.seq + 2, first.seq + 4} <= stored_seqs
    assert first.seq + 1 not in stored_seqs and first.seq + 3 not in stored_seqs
    assert uplink.counters.dead_letters == 2
    assert spool.stats().dead_letters == 2
    # The spool's gap records name the refused seqs, so the collector can explain the hole.
    covered = {
        s
        for g in collector.gaps
        if g["reason"] == "dead_letter"
        for s in range(g["first_seq"], g["last_seq"] + 1)
    }
    assert {first.seq + 1, first.seq + 3} <= covered
    await uplink.close()
    await spool.close()


async def test_401_stops_sending_keeps_spooling_and_recovers(aiohttp_server, tmp_path):
    """With the credential refused the uplink only probes every backoff_max; spooling goes on."""
    clock = VirtualClock()
    collector = Collector(clock)
    collector.unauthorized = True
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    expected = await fill(spool, clock, batches=2, per_batch=10)
    uplink = make_uplink(server, clock, spool, backoff_max_s=60.0)
    task = asyncio.create_task(uplink.run())
    start = clock.monotonic()
    await drive(clock, uplink, task, until=lambda: clock.monotonic() - start >= 600)
    assert uplink.state is UplinkState.UNAUTHORIZED
    probes = [x for x in collector.log if x[2] == 401]
    assert 5 <= len(probes) <= 11  # ~one per backoff_max over 600 s, not a retry storm
    expected |= await fill(spool, clock, batches=2, per_batch=10)  # scanning and sealing go on
    assert spool.stats().batches == 4
    collector.unauthorized = False  # the credential was re-issued / the board re-enabled
    await drive(clock, uplink, task, until=lambda: len(collector.batches) == 4)
    assert set(collector.readings) == expected
    assert uplink.state is not UplinkState.UNAUTHORIZED
    task.cancel()
    await asyncio.gather(task, return_exceptions=True)
    await uplink.close()
    await spool.close()


async def test_409_raises_an_alarm_and_starts_a_new_epoch(aiohttp_server, tmp_path):
    """Same key, other digest: conflict counted and logged, new epoch, the rest still delivered."""
    from structlog.testing import capture_logs

    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    await fill(spool, clock, batches=3, per_batch=10)
    head = await spool.peek_oldest()
    old_epoch = spool.stats().epoch
    collector.batches[("g3-a", head.epoch, head.seq)] = "0" * 64  # an earlier life of this key
    uplink = make_uplink(server, clock, spool)
    with capture_logs() as logs:
        result = await uplink.step()
        assert result is Outcome.CONFLICT
    assert uplink.counters.conflicts == 1
    assert any(e["event"] == "digest_conflict" and e["log_level"] == "error" for e in logs)
    assert spool.stats().epoch != old_epoch
    task = asyncio.create_task(uplink.run(until_empty=True))
    await drive(clock, uplink, task)
    stored = {(e, s) for (_, e, s) in collector.batches}
    assert (head.epoch, head.seq + 1) in stored and (head.epoch, head.seq + 2) in stored
    await uplink.close()
    await spool.close()


async def test_clock_exchange_is_carried_on_the_next_request(aiohttp_server, tmp_path):
    """t1/t4 on board monotonic time, t2/t3 from the answer, sent with the following request."""
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    spool = await open_spool(tmp_path, clock)
    await fill(spool, clock, batches=2, per_batch=5)
    uplink = make_uplink(server, clock, spool)
    assert await uplink.step() is Outcome.ACKED
    first = collector.bodies[0]
    assert first["clock"] is None and first["v"] == 1 and first["boot"] == clock.boot_id
    ex = uplink.exchanges.last
    assert ex is not None and ex.t1 == first["t1"]
    await clock.advance(2.0)
    assert await uplink.step() is Outcome.ACKED
    assert collector.bodies[1]["clock"] == ex.as_dict()
    assert collector.bodies[1]["t1"] == pytest.approx(ex.t1 + 2.0)
    await uplink.close()
    await spool.close()


# --------------------------------------------------------------------------- pure parts


def test_exchange_offset_and_delay_match_ntplib():
    """RFC 5905 §8 worked example (docs/references.md §5), checked with PyPI ntplib 0.4.0's NTPStats."""
    ex = Exchange(t1=10.000, t2=10.060, t3=10.061, t4=10.023)
    st = ntplib.NTPStats()
    st.orig_timestamp, st.recv_timestamp, st.tx_timestamp, st.dest_timestamp = 10.000, 10.060, 10.061, 10.023
    assert ex.offset == pytest.approx(st.offset, abs=1e-12) == pytest.approx(0.049, abs=1e-9)
    assert ex.delay == pytest.approx(st.delay, abs=1e-12) == pytest.approx(0.022, abs=1e-9)


def test_exchange_log_keeps_an_exchange_until_it_was_delivered():
    log = ExchangeLog()
    assert log.take() is None
    log.record(1.0, 1.2, {"t2": 5.0, "t3": 5.1})
    carried = log.take()
    assert carried == {"t1": 1.0, "t2": 5.0, "t3": 5.1, "t4": 1.2}
    assert log.take() == carried  # the carrying request failed: send it again
    log.delivered()
    assert log.take() is None
    assert (
        log.record(1.0, 1.2, {"t2": "x"}) is None
        and log.record(1.0, 1.2, {"t2": float("nan"), "t3": 1}) is None
    )


def test_retry_after_seconds_and_http_date():
    """RFC 9110 §10.2.3: delay-seconds or an HTTP-date (IMF-fixdate, made here with the stdlib's formatter)."""
    now = 1_800_000_000.0
    assert parse_retry_after("120", now) == 120.0
    date = email.utils.formatdate(now + 30, usegmt=True)
    assert parse_retry_after(date, now) == pytest.approx(30.0)
    assert parse_retry_after(email.utils.formatdate(now - 30, usegmt=True), now) == 0.0
    assert parse_retry_after("Fri, 31 Dec 1999 23:59:59 GMT", now) == 0.0  # the RFC's own example, long past
    assert parse_retry_after("soon", now) is None and parse_retry_after(None, now) is None
    assert parse_retry_after("99999999", now) == 3600.0


async def outage_then_return(tmp_path, seed: int) -> tuple[float, float | None, float, Uplink]:
    """
    A collector unreachable for 2 minutes (connection refused), then back on the same port. Returns
    (when it came back, when the first heartbeat got through, when the first batch was stored, uplink).
    """
    clock = VirtualClock()
    collector = Collector(clock)
    beats: list[float] = []

    async def heartbeat(request: web.Request) -> web.Response:
        beats.append(clock.monotonic())
        return web.json_response({"t2": clock.time(), "t3": clock.time(), "config_etag": None})

    def app() -> web.Application:
        a = collector.app()
        a.router.add_post("/v1/heartbeat", heartbeat)
        return a

    with socket.socket() as s:  # a free port, serving nothing yet: connections are refused
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    url = f"http://127.0.0.1:{port}"
    spool = await Spool.open(
        tmp_path / f"spool-{seed}.sqlite", clock=clock, max_bytes=4 << 20, flush_seconds=5.0
    )
    expected = await fill(spool, clock, batches=3, per_batch=20)
    exchanges = ExchangeLog()
    uplink = Uplink(
        base_url=url,
        token=TOKEN,
        board="g3-a",
        clock=clock,
        spool=spool,
        timeout_s=5.0,
        rng=random.Random(seed),
        exchanges=exchanges,
    )
    runner = None
    async with aiohttp.ClientSession() as session:
        beat = Heartbeat(
            base_url=url,
            token=TOKEN,
            board="g3-a",
            clock=clock,
            session=session,
            stats_fn=dict,
            exchanges=exchanges,
            period_s=10.0,
            timeout_s=5.0,
            board_info_fn=dict,
        )
        tasks = [asyncio.create_task(uplink.run()), asyncio.create_task(beat.run())]
        start = clock.monotonic()
        back_at = start + 120.0
        try:
            while len(collector.batches) < 3:
                assert clock.monotonic() - start < 400, "the backlog never went"
                # Step virtual time only while both loops wait on the clock (loopback I/O is real time).
                for t in (uplink, beat):
                    await asyncio.wait_for(t.wait_parked(), 10)
                if runner is None and clock.monotonic() >= back_at:
                    runner = web.AppRunner(app())
                    await runner.setup()
                    await web.TCPSite(runner, "127.0.0.1", port).start()
                    back_at = clock.monotonic()
                    continue
                wake = min(uplink.parked_until, beat.parked_until)
                if runner is None:
                    wake = min(wake, back_at)
                await clock.advance(max(0.0, wake - clock.monotonic()))
            assert set(collector.readings) == expected
            assert uplink.counters.retries >= 5  # the outage really drove the backoff up
        finally:
            for t in tasks:
                t.cancel()
            await asyncio.gather(*tasks, return_exceptions=True)
            await uplink.close()
            await spool.close()
            if runner is not None:
                await runner.cleanup()
    first_store = min(t for t, _, what in collector.log if what == "stored")
    return back_at, (min(beats) if beats else None), first_store, uplink


async def test_a_collector_back_after_an_outage_gets_the_backlog_within_one_heartbeat(tmp_path):
    """
    After 2 minutes away the uplink's backoff ceiling is near its 60 s cap. The first heartbeat that
    gets through tells the uplink the collector is reachable again: the backlog goes at once, not a
    jittered backoff later. Five boards (jitter seeds), so that no lucky draw hides a slow return.
    """
    for seed in range(5):
        back_at, first_beat, first_store, uplink = await outage_then_return(tmp_path, seed)
        if first_beat is not None and first_beat < first_store:
            assert first_store - first_beat <= 1.0, (seed, first_beat, first_store)
        assert first_store - back_at <= 10.0 + 1.0, (seed, back_at, first_store)  # one heartbeat period
