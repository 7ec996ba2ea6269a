"""
The agent service end to end: a fake radio (the only fake), the real pipeline, a real SQLite spool
under tmp_path, the real uplink and heartbeat against a loopback collector, on virtual time.
"""

from __future__ import annotations

import asyncio
import contextlib
import gzip
import json
import os
import signal
import socket
import subprocess
import sys
from collections import Counter
from collections.abc import AsyncIterator
from pathlib import Path
from typing import Any

import aiohttp
from aiohttp import web

from listenpost.agent.client.remote_config import ConfigCache
from listenpost.agent.config import parse_agent_config
from listenpost.agent.service import AgentService, SourceState, run_agent
from listenpost.agent.spool import Spool
from listenpost.core import wire
from listenpost.core.clock import VirtualClock, settle
from listenpost.core.records import Advert

UUID = bytes.fromhex("4d2a0c1e7f3b4c559e612b8f0a7d3c10")
UUID_TEXT = "4d2a0c1e-7f3b-4c55-9e61-2b8f0a7d3c10"
TOKEN = "tok-g1-a-0123456789abcdef0123"


def tag(minor: int) -> str:
    return f"ibeacon:{UUID_TEXT}:7:{minor}"


def ibeacon(t_s: float, minor: int, rssi: int, address: str = "D0:00:00:00:00:01") -> Advert:
    """An iBeacon-format advert (Apple "Proximity Beacon Specification" layout, from memory; docs/references.md §4)."""
    payload = b"\x02\x15" + UUID + (7).to_bytes(2, "big") + minor.to_bytes(2, "big") + b"\xc5"
    return Advert(round(t_s * 1e9), address, 1, rssi, manufacturer_data={0x004C: payload})


class ListSource:
    """The radio edge: adverts at their own times on the injected clock, then end (or hang like a radio)."""

    def __init__(self, clock: VirtualClock, adverts: list[Advert], hang: bool = False) -> None:
        self.clock, self.adverts_list, self.hang = clock, adverts, hang
        self.yielded = 0

    async def adverts(self) -> AsyncIterator[Advert]:
        for a in self.adverts_list:
            wait = a.t_mono_ns / 1e9 - self.clock.monotonic()
            if wait > 0:
                await self.clock.sleep(wait)
            self.yielded += 1
            yield a
        if self.hang:
            await asyncio.Event().wait()


def traffic(clock: VirtualClock, seconds: float, registered: list[int]) -> tuple[list[Advert], set]:
    """Registered tags and noise (unregistered minors, phones) every 0.1 s; returns adverts + oracle."""
    adverts, expected = [], set()
    t0 = clock.monotonic() + 0.05
    for i in range(int(seconds * 10)):
        t = t0 + i * 0.1
        minor = registered[i % len(registered)] if i % 4 else 100 + i % 7  # every fourth advert is noise
        a = ibeacon(t, minor, -55 - i % 20, address=f"D0:00:00:00:{i % 200:02X}:01")
        adverts.append(a)
        if minor in registered:
            expected.add((tag(minor), a.t_mono_ns // 1_000_000, a.rssi_dbm * 10))
    adverts.append(Advert(round((t0 + seconds) * 1e9), "5A:11:22:33:44:55", 1, -40))  # a phone
    return adverts, expected


class Collector:
    """Stores batches by (board, epoch, seq) + digest; heartbeat with t2/t3 and a config ETag; config."""

    def __init__(self, clock: VirtualClock, config: dict[str, Any] | None = None) -> None:
        self.clock = clock
        self.batches: dict[tuple[str, str, int], str] = {}
        self.readings: Counter = Counter()
        self.raw_bodies: list[bytes] = []
        self.heartbeats: list[dict] = []
        self.config = config
        self.etag = '"cfg-1"'
        self.config_gets = 0

    def app(self) -> web.Application:
        app = web.Application()
        app.router.add_post("/v1/batches", self.batch)
        app.router.add_post("/v1/heartbeat", self.heartbeat)
        app.router.add_get("/v1/config", self.get_config)
        return app

    async def batch(self, request: web.Request) -> web.Response:
        assert request.headers["Authorization"] == f"Bearer {TOKEN}"
        raw = await request.read()
        raw = gzip.decompress(raw) if raw[:2] == b"\x1f\x8b" else raw
        self.raw_bodies.append(raw)
        body = json.loads(raw)
        assert wire.digest(body["content"]) == body["digest"]
        key = (body["board"], body["epoch"], body["seq"])
        status = "duplicate" if key in self.batches else "stored"
        if status == "stored":
            self.batches[key] = body["digest"]
            for r in wire.decode_content(body["content"]).readings():
                self.readings[(r.tag, r.t_mono_ns // 1_000_000, round(r.rssi_dbm * 10))] += 1
        return web.json_response({"status": status, "t2": self.clock.time(), "t3": self.clock.time()})

    async def heartbeat(self, request: web.Request) -> web.Response:
        body = await request.json()
        self.heartbeats.append(body)
        return web.json_response(
            {
                "t2": self.clock.time(),
                "t3": self.clock.time(),
                "config_etag": self.etag if self.config else None,
            }
        )

    async def get_config(self, request: web.Request) -> web.Response:
        self.config_gets += 1
        if self.config is None:
            return web.json_response({"error": {"code": "none"}}, status=404)
        if request.headers.get("If-None-Match") == self.etag:
            return web.Response(status=304)
        return web.json_response(self.config, headers={"ETag": self.etag})


def board_config(tmp_path: Path, url: str | None, tags: list[int], **extra: Any):
    state = tmp_path / "state"
    state.mkdir(exist_ok=True)
    (state / "tags.txt").write_text("# registered\n" + "".join(tag(m) + "\n" for m in tags))
    (state / "credential").write_text(TOKEN + "\n")
    data: dict[str, Any] = {
        "board": "g1-a",
        "state_dir": str(state),
        "tags": {"file": "tags.txt"},
        "spool": {"flush_seconds": 2.0},
        "heartbeat": {"period_seconds": 5.0},
        "uplink": {"backoff_initial_seconds": 1.0, "backoff_max_seconds": 8.0},
        **extra,
    }
    if url:
        data["collector"] = {"url": url, "timeout_seconds": 5.0}
    return parse_agent_config(data, origin=str(state / "agent.yaml"))


async def run_on_virtual_time(
    clock: VirtualClock, task: asyncio.Task[Any], step: float = 0.25, limit_s: float = 2000.0
) -> Any:
    """Advance virtual time in small steps, letting loopback I/O and the spool's thread finish between them."""
    start = clock.monotonic()
    while not task.done():
        assert clock.monotonic() - start < limit_s, "service did not finish on virtual time"
        await asyncio.wait({task}, timeout=0.002)  # bounded real wait for loopback I/O and the spool thread
        await clock.advance(step)
    return task.result()


async def run_until_source_ends(
    cfg: Any,
    clock: VirtualClock,
    adverts: list[Advert],
    session: aiohttp.ClientSession | None = None,
    step: float = 0.25,
    **run: Any,
) -> int:
    """``agent run`` (with ``run``'s options) over ``adverts`` on virtual time until the source ends, on
    the caller's HTTP session or one of its own; its exit code."""
    async with contextlib.AsyncExitStack() as stack:
        if session is None:
            session = await stack.enter_async_context(aiohttp.ClientSession())
        task = asyncio.create_task(
            run_agent(
                cfg,
                clock=clock,
                source=ListSource(clock, adverts),
                exit_when_source_ends=True,
                session=session,
                **run,
            )
        )
        return await run_on_virtual_time(clock, task, step=step)


async def spooled_readings(path: Path, clock: VirtualClock) -> Counter:
    """Everything left in a spool file (read with the real Spool, acking as we go)."""
    spool = await Spool.open(path, clock=clock, max_bytes=64 << 20, flush_seconds=5.0)
    out: Counter = Counter()
    while (b := await spool.peek_oldest()) is not None:
        for r in wire.decode_content(json.loads(b.content)).readings():
            out[(r.tag, r.t_mono_ns // 1_000_000, round(r.rssi_dbm * 10))] += 1
        await spool.ack(b.epoch, b.seq)
    await spool.close()
    return out


# ------------------------------------------------------------------------------------------ tests


async def test_replay_upload_stores_every_registered_reading_once_and_nothing_else(aiohttp_server, tmp_path):
    clock = VirtualClock()
    collector = Collector(clock)
    server = await aiohttp_server(collector.app())
    cfg = board_config(tmp_path, str(server.make_url("")).rstrip("/"), tags=[1, 2, 3])
    adverts, expected = traffic(clock, 30.0, [1, 2, 3])
    async with aiohttp.ClientSession() as session:
        rc = await run_until_source_ends(cfg, clock, adverts, session)
        assert not session.closed  # a shared session stays the caller's
    assert rc == 0
    assert set(collector.readings) == expected and set(collector.readings.values()) == {1}
    # Nothing about unregistered devices leaves the board: no noise minor, no phone address.
    blob = b"".join(collector.raw_bodies)
    assert b":7:100" not in blob and b"5A:11:22:33:44:55" not in blob
    # Heartbeats went out with the board's figures, and the last one after the drain has the totals.
    assert collector.heartbeats
    last = collector.heartbeats[-1]["stats"]
    assert last["adverts_seen"] == len(adverts) and last["readings_total"] == len(expected)
    assert last["uplink"]["acked"] == len(collector.batches) and last["source"]["state"] == "ended"
    assert any(h["clock"] is not None for h in collector.heartbeats)


async def test_stop_seals_pending_readings_and_spool_only_without_a_collector(tmp_path):
    clock = VirtualClock()
    cfg = board_config(tmp_path, None, tags=[4, 5])
    adverts, expected = traffic(clock, 9.0, [4, 5])
    source = ListSource(clock, adverts, hang=True)
    service = AgentService(cfg, clock=clock, source=source)
    task = asyncio.create_task(service.run())
    # Virtual time must stand still while the spool works on its thread (the open, each seal's commit):
    # the sealer's next period starts when a seal returns, so a clock moved meanwhile shifts every later
    # seal, and the last one before the stop can land after the last registered advert.
    await asyncio.wait_for(service.started.wait(), 10)
    while source.yielded < len(adverts):
        await asyncio.wait_for(service.spool.idle(), 10)
        await clock.advance(0.5)
    assert service.uplink is None and service.source_state is SourceState.RUNNING
    assert service.spool.stats().readings_pending > 0  # the stop must not lose these
    service.request_stop()  # what SIGTERM does in run_command
    assert await asyncio.wait_for(task, 10) == 0
    assert await spooled_readings(cfg.state_path("spool.sqlite"), clock) == Counter({k: 1 for k in expected})


async def test_boots_from_the_cached_config_when_the_collector_is_unreachable(tmp_path):
    """Cached collector config wins over the local tag file; the drain is bounded and says it failed."""
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    dead_url = f"http://127.0.0.1:{s.getsockname()[1]}"
    s.close()
    clock = VirtualClock()
    cfg = board_config(tmp_path, dead_url, tags=[3])
    ConfigCache(cfg.state_dir).save(
        {
            "board": "g1-a",
            "tags": [tag(1), tag(2)],
            "rules": [],
            "offset_db": 3.0,
            "flush_seconds": 2,
            "heartbeat_seconds": 5,
        },
        '"cached"',
    )
    adverts, _ = traffic(clock, 6.0, [1, 2, 3])
    # not drained: the collector is gone
    assert await run_until_source_ends(cfg, clock, adverts, step=0.5, drain_timeout_s=20.0) == 1
    kept = await spooled_readings(cfg.state_path("spool.sqlite"), clock)
    tags = {k[0] for k in kept}
    assert tags == {tag(1), tag(2)}  # from the cache, not the local tag file's minor 3
    by_key = {(a.t_mono_ns // 1_000_000): a.rssi_dbm for a in adverts}
    assert all(rssi == (by_key[t] + 3.0) * 10 for (_, t, rssi) in kept)  # cached +3 dB offset applied


async def test_a_changed_collector_config_is_applied_without_a_restart(aiohttp_server, tmp_path):
    clock = VirtualClock()
    collector = Collector(
        clock,
        config={
            "board": "g1-a",
            "tags": [tag(1)],
            "rules": [],
            "offset_db": 4.5,
            "flush_seconds": 3,
            "heartbeat_seconds": 7,
        },
    )
    server = await aiohttp_server(collector.app())
    cfg = board_config(tmp_path, str(server.make_url("")).rstrip("/"), tags=[1, 2])
    source = ListSource(clock, [], hang=True)
    async with aiohttp.ClientSession() as session:
        service = AgentService(cfg, clock=clock, source=source, session=session)
        task = asyncio.create_task(service.run())
        for _ in range(200):
            await asyncio.wait({task}, timeout=0.002)
            await clock.advance(0.25)
            if service.remote is not None and service.remote.etag == '"cfg-1"':
                break
        assert service.pipeline.calibrate.offset_db == 4.5
        assert service.pipeline.stats()["registered_tags"] == 1
        assert service.spool.flush_seconds == 3.0 and service.heartbeat.period_s == 7.0
        assert ConfigCache(cfg.state_dir).load().etag == '"cfg-1"'  # cached for the next boot
        service.request_stop()
        assert await asyncio.wait_for(task, 10) == 0
    assert collector.config_gets == 1


def test_run_command_under_a_notify_socket_signals_ready_and_stops_on_sigterm(tmp_path):
    """A real process: READY=1 on start, STOPPING=1 and exit 0 on SIGTERM, JSON logs with the board."""
    state = tmp_path / "state"
    state.mkdir()
    rec = state / "walk.jsonl"
    lines = [
        json.dumps(
            {
                "format": "listenpost-recording",
                "version": 1,
                "board": "g1-a",
                "boot": "b",
                "wall_at_start": 1_800_000_000.0,
            }
        )
    ]
    payload = (b"\x02\x15" + UUID + (7).to_bytes(2, "big") + (1).to_bytes(2, "big") + b"\xc5").hex()
    lines += [
        json.dumps({"t": 0.01 * i, "a": "D0:00:00:00:00:01", "at": 1, "r": -60, "m": {"004c": payload}})
        for i in range(50)
    ]
    rec.write_text("\n".join(lines) + "\n")
    (state / "tags.txt").write_text(tag(1) + "\n")
    (state / "agent.yaml").write_text(
        f"board: g1-a\nstate_dir: {state}\ntags: {{file: tags.txt}}\n"
        f"source: {{kind: replay, files: [{rec}], speed: 0}}\nlog: {{format: json}}\n"
    )
    name = f"lp-svc-test-{os.getpid()}"
    rx = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
    rx.bind("\0" + name)
    rx.settimeout(30)
    env = {**os.environ, "NOTIFY_SOCKET": "@" + name}
    proc = subprocess.Popen(
        [sys.executable, "-m", "listenpost", "agent", "run", "--config", str(state / "agent.yaml")],
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    try:
        ready = rx.recv(4096)
        assert ready.startswith(b"READY=1\nSTATUS=g1-a: ")
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=30)
        assert proc.returncode == 0, err.decode()
        assert rx.recv(4096) == b"STOPPING=1"
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.communicate()
        rx.close()
    events = [json.loads(x) for x in err.decode().splitlines() if x.startswith("{")]
    stopped = [e for e in events if e["event"] == "agent_stopped"]
    assert stopped and stopped[0]["board"] == "g1-a" and stopped[0]["readings"] == 50
    assert all(e.get("board") == "g1-a" for e in events if e["event"].startswith("agent_"))


async def test_no_process_global_state_two_boards_in_one_loop(tmp_path):
    """Two boards side by side in one event loop keep their own spools and tag sets."""
    clock = VirtualClock()
    services = []
    for name, minors in (("g1-a", [1]), ("g1-b", [2])):
        sub = tmp_path / name
        sub.mkdir()
        cfg = board_config(sub, None, tags=minors).replace(board=name)
        adverts, _ = traffic(clock, 3.0, minors)
        services.append(
            AgentService(cfg, clock=clock, source=ListSource(clock, adverts), exit_when_source_ends=True)
        )
    tasks = [asyncio.create_task(s.run()) for s in services]
    while not all(t.done() for t in tasks):
        await asyncio.wait(tasks, timeout=0.002)
        await clock.advance(0.5)
    assert [t.result() for t in tasks] == [0, 0]
    for s, minor in zip(services, (1, 2), strict=True):
        kept = await spooled_readings(s.cfg.state_path("spool.sqlite"), clock)
        assert {k[0] for k in kept} == {tag(minor)} and len(kept) > 0


async def enrolled_at_a_real_collector(
    aiohttp_server: Any, tmp_path: Path, clock: VirtualClock, *middlewares: Any
) -> tuple[web.Application, Any]:
    """The real collector app (SQLite under tmp_path, monitor not started, ``middlewares`` innermost) with
    g1-a added and tags 1 and 2 registered, and g1-a enrolled through it; returns the app and its config."""
    from listenpost.agent.client.enroll import EnrollStatus, enroll
    from listenpost.agent.config import load_agent_config
    from listenpost.collector.app import create_app
    from listenpost.collector.config import CollectorSettings
    from listenpost.collector.http.auth import code_hash
    from listenpost.collector.state import STORE
    from listenpost.collector.store import Board, Enrollment

    app = create_app(CollectorSettings(state_dir=str(tmp_path / "collector")), clock=clock, run_monitor=False)
    (tmp_path / "collector").mkdir()
    app.middlewares.extend(middlewares)
    server = await aiohttp_server(app)
    store = app[STORE]
    await store.add_board(
        Board("g1-a", "G1", "ground", clock.time()),
        Enrollment("g1-a", code_hash("BRK-G1A-7731"), clock.time() + 3600),
    )
    await store.add_tags([tag(1), tag(2)], clock.time())
    url = str(server.make_url("")).rstrip("/")
    result = await enroll(url, "BRK-G1A-7731", tmp_path / "board", clock=clock)
    assert result.status is EnrollStatus.ENROLLED, result.message
    return app, load_agent_config(result.config_path)


async def test_contract_with_the_real_collector_enroll_then_upload(aiohttp_server, tmp_path):
    """The real collector app (SQLite under tmp_path): enroll, fetch config, upload; readings stored once."""
    from listenpost.collector.state import STORE

    clock = VirtualClock()
    app, cfg = await enrolled_at_a_real_collector(aiohttp_server, tmp_path, clock)
    store = app[STORE]
    adverts, expected = traffic(clock, 20.0, [1, 2, 3])
    expected = {k for k in expected if k[0] != tag(3)}  # minor 3 is not registered at the collector
    assert await run_until_source_ends(cfg, clock, adverts) == 0
    counts = {c.board: c for c in await store.board_counts()}
    assert counts["g1-a"].readings_total == len(expected)
    assert (await store.latest_heartbeats())["g1-a"].stats["adverts_seen"] == len(adverts)


def lose_spool(path: Path, epoch: str) -> list[int]:
    """The seqs of ``epoch`` a spool file still holds, unsent; then the file is gone (a failed card)."""
    import sqlite3

    with contextlib.closing(sqlite3.connect(path)) as con:
        seqs = [s for (s,) in con.execute("SELECT seq FROM batches WHERE epoch = ? ORDER BY seq", (epoch,))]
    for suffix in ("", "-wal", "-shm"):
        Path(str(path) + suffix).unlink(missing_ok=True)
    return seqs


async def test_a_lost_spool_with_batches_unsent_is_reported_as_exactly_those_batches(
    aiohttp_server, tmp_path
):
    """
    A board keeps sealing while the collector refuses its uploads (its heartbeats still get through), then
    its spool file is lost and it starts over in a new epoch. Its heartbeats had said how far the old
    epoch reached, so once a batch of the new epoch arrives the collector's loss check names exactly the
    batches the lost file held, as the tail of the old epoch.
    """
    from listenpost.collector.monitor import LOSS_GRACE_SECONDS, MONITOR
    from listenpost.collector.state import STORE

    clock = VirtualClock()
    refusing = False

    @web.middleware
    async def outage(request: web.Request, handler: Any) -> web.StreamResponse:
        # Fault injected at the network edge: the batch endpoint is unavailable, the rest answers.
        if refusing and request.path == "/v1/batches":
            return web.json_response({"error": {"code": "unavailable"}}, status=503)
        return await handler(request)

    app, cfg = await enrolled_at_a_real_collector(aiohttp_server, tmp_path, clock, outage)
    spool_file = cfg.state_path(cfg.spool.path)

    async def step() -> None:
        await asyncio.wait_for(service.spool.idle(), 10)  # the spool's thread has caught up
        await settle()  # loopback requests in this loop go as far as they can
        await clock.advance(0.25)

    async def advance_to(t: float) -> None:  # seconds after the agent started
        while clock.monotonic() < started + t:
            await step()

    async def announced() -> int | None:
        hb = (await app[STORE].latest_heartbeats()).get("g1-a")
        return None if hb is None else hb.stats["spool"]["next_seq"]

    async with aiohttp.ClientSession() as session:
        started = clock.monotonic()
        adverts, _ = traffic(clock, 40.0, [1, 2])
        service = AgentService(
            cfg, clock=clock, source=ListSource(clock, adverts, hang=True), session=session
        )
        task = asyncio.create_task(service.run())
        await asyncio.wait_for(service.started.wait(), 10)
        await advance_to(15.0)
        refusing = True
        await advance_to(50.0)  # past the last advert: everything sealed
        # Until a heartbeat has announced all of it (one every 10 s; bounded in virtual time).
        while await announced() != service.spool.stats().next_seq:
            assert clock.monotonic() < started + 300, "no heartbeat announced the spool"
            await step()
        old_epoch = service.spool.stats().epoch
        service.request_stop()
        await run_on_virtual_time(clock, task)
    unsent = await asyncio.to_thread(lose_spool, spool_file, old_epoch)
    assert len(unsent) >= 5 and unsent == list(range(unsent[0], unsent[-1] + 1)), unsent

    refusing = False
    assert await run_until_source_ends(cfg, clock, traffic(clock, 10.0, [1, 2])[0]) == 0
    monitor = app[MONITOR]
    assert (await monitor.run_once()).losses == []  # inside the grace period
    await clock.advance(LOSS_GRACE_SECONDS + 1)
    losses = (await monitor.run_once()).losses
    assert [(e.board, e.detail) for e in losses] == [
        (
            "g1-a",
            {
                "epoch": old_epoch,
                "first_seq": unsent[0],
                "last_seq": unsent[-1],
                "batches": len(unsent),
                "tail": True,
            },
        )
    ]
    from listenpost.collector.status import event_text

    assert event_text("loss", losses[0].detail) == (
        f"batches {unsent[0]}–{unsent[-1]} lost (sealed on the board, never sent before its spool started a new epoch)"
    )


async def test_a_stop_with_the_disk_full_and_no_collector_exits_1_naming_the_lost_readings(
    tmp_path, monkeypatch
):
    """``agent run`` stopped while its card is full: the readings held in memory are lost, and it says so."""
    import contextlib
    import errno

    import structlog

    from listenpost.agent.spool import disk as disk_mod

    @contextlib.contextmanager
    def no_space(conn, *, durable):  # the file layer refuses every write, as a full card does
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        yield

    clock = VirtualClock()
    cfg = board_config(tmp_path, None, tags=[4, 5])
    adverts, expected = traffic(clock, 9.0, [4, 5])
    source = ListSource(clock, adverts, hang=True)
    service = AgentService(cfg, clock=clock, source=source)
    task = asyncio.create_task(service.run())
    await asyncio.wait_for(service.started.wait(), 10)
    monkeypatch.setattr(disk_mod, "transaction", no_space)
    while source.yielded < len(adverts):
        await asyncio.wait_for(service.spool.idle(), 10)
        await clock.advance(0.5)
    assert service.spool.stats().degraded
    with structlog.testing.capture_logs() as logs:
        service.request_stop()
        assert await asyncio.wait_for(task, 10) == 1
    lost = [e for e in logs if e["event"] == "readings_lost"]
    assert lost and lost[-1]["readings"] == len(expected), logs[-5:]
